#![allow(missing_docs)]
//! Cost of live shares at 48 kHz with the built-in palette: one second of audio through the
//! framer, FFT and shares estimator, in blocks of 512 samples (a common host buffer).
//!
//! Reported against references measured in the same run: the framer and FFT alone (the part
//! every analysis pays), and NMF alone (no presence stage). After the criterion groups, the
//! bench prints each path's cost as a percentage of one core (time per second of audio), the
//! mean multiplicative updates per solve (early stopping) and the share of columns whose fit
//! started from scratch.

use criterion::{Criterion, black_box, criterion_group, criterion_main};
use std::time::Instant;
use weft_engine::frames::{FrameConfig, Framer};
use weft_engine::palette::Palette;
use weft_engine::scene::SceneRng;
use weft_engine::shares::{SharesMode, SharesSettings, SharesTracker};
use weft_engine::spectrum::Spectrum;

const SR: f64 = 48_000.0;
const BLOCK: usize = 512;

/// One second of a dense test signal: harmonic tones, a noise bed and clicks (seeded).
fn signal() -> Vec<f32> {
    let mut rng = SceneRng::new(2024);
    (0..SR as usize)
        .map(|i| {
            let t = i as f64 / SR;
            let tones: f64 = [110.0, 220.0 * 1.26, 440.0 * 1.5]
                .iter()
                .flat_map(|&f| {
                    (1..6).map(move |h| (std::f64::consts::TAU * f * h as f64 * t).sin() / h as f64)
                })
                .sum();
            let click =
                (-((i % 12_000) as f64) / 400.0).exp() * (std::f64::consts::TAU * 70.0 * t).sin();
            (0.05 * tones + 0.02 * rng.normal() + 0.3 * click) as f32
        })
        .collect()
}

fn framing_only(x: &[f32], framer: &mut Framer, spectrum: &mut Spectrum) -> f32 {
    let mut acc = 0.0;
    for block in x.chunks(BLOCK) {
        let mut i = 0;
        while i < block.len() {
            let (used, ready) = framer.feed(&block[i..]);
            i += used;
            if ready {
                spectrum.process(framer.frame());
                acc += spectrum.power()[10];
                framer.advance();
            }
        }
    }
    acc
}

fn shares(x: &[f32], tracker: &mut SharesTracker) -> f32 {
    let mut acc = 0.0;
    for block in x.chunks(BLOCK) {
        tracker.process(block, |u| acc += u.smoothed.share[0]);
    }
    acc
}

fn bench(c: &mut Criterion) {
    let palette = Palette::default_palette();
    let x = signal();
    let framing = FrameConfig::for_sample_rate(SR);
    let mut framer = Framer::new(framing);
    let mut spectrum = Spectrum::new(framing.frame_len);
    let tracker = |mode| {
        SharesTracker::new(
            &palette,
            SharesSettings {
                mode,
                ..SharesSettings::default()
            },
            SR,
        )
        .expect("the built-in palette runs at 48 kHz")
    };
    let mut nmf = tracker(SharesMode::NmfAlone);
    let mut two = tracker(SharesMode::TwoStage);
    let mut g = c.benchmark_group("shares_48k_one_second");
    g.sample_size(20);
    g.bench_function("framer_and_fft_only", |b| {
        b.iter(|| black_box(framing_only(&x, &mut framer, &mut spectrum)))
    });
    g.bench_function("nmf_alone", |b| b.iter(|| black_box(shares(&x, &mut nmf))));
    g.bench_function("two_stage", |b| b.iter(|| black_box(shares(&x, &mut two))));
    g.finish();

    // Percent of one core: the best of 10 runs of one second of audio each.
    let best = |f: &mut dyn FnMut() -> f32| {
        (0..10)
            .map(|_| {
                let t = Instant::now();
                black_box(f());
                t.elapsed().as_secs_f64()
            })
            .fold(f64::MAX, f64::min)
    };
    let fft = best(&mut || framing_only(&x, &mut framer, &mut spectrum));
    let n = best(&mut || shares(&x, &mut nmf));
    let t = best(&mut || shares(&x, &mut two));
    println!(
        "percent of one core at 48 kHz: framer+FFT {:.2} %, NMF alone {:.2} %, two stages {:.2} % \
         (two stages = {:.1}x framer+FFT, {:.2}x NMF alone)",
        100.0 * fft,
        100.0 * n,
        100.0 * t,
        t / fft,
        t / n
    );
    println!(
        "mean updates per activation solve: NMF alone {:.1}, two stages {:.1} (cap {}); \
         columns started from scratch (onsets): {:.0} %",
        nmf.estimator().mean_iterations(),
        two.estimator().mean_iterations(),
        palette.analysis().iterations,
        100.0 * two.estimator().cold_start_fraction()
    );
}

criterion_group!(benches, bench);
criterion_main!(benches);
