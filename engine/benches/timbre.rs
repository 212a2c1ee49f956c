//! Per-frame cost of the timbre descriptors at 48 kHz with 2048-sample frames and a 512-sample
//! hop (librosa 0.11.0's default framing), against the spectrum alone (window, float64 FFT,
//! magnitude and power) of the same frame measured in the same run: `describe` ÷
//! `spectrum_only` is how many spectra the whole descriptor set costs.
//!
//! Run: `cargo bench -p weft-engine --bench timbre`.

#![allow(missing_docs)] // criterion's macros generate undocumented items

use criterion::{Criterion, black_box, criterion_group, criterion_main};
use weft_engine::spectrum::Spectrum;
use weft_engine::timbre::Descriptors;
use weft_engine::{AnalysisSettings, Analyzer, FrameConfig, Timbre, TimbreOptions};

const SAMPLE_RATE_HZ: f64 = 48_000.0;
const FRAME: usize = 2048;
const HOP: usize = 512;

/// A music-like test signal: a few harmonics of two notes plus a little deterministic noise.
fn signal(n: usize) -> Vec<f32> {
    let mut state = 0x1234_5678_u32;
    (0..n)
        .map(|i| {
            let t = i as f64 / SAMPLE_RATE_HZ;
            let mut s = 0.0;
            for (f0, a) in [(220.0, 0.3), (330.0, 0.2)] {
                for h in 1..=8 {
                    s += a / f64::from(h) * (std::f64::consts::TAU * f0 * f64::from(h) * t).sin();
                }
            }
            // xorshift32 noise (deterministic), ±0.01.
            state ^= state << 13;
            state ^= state >> 17;
            state ^= state << 5;
            s += 0.01 * (f64::from(state) / f64::from(u32::MAX) - 0.5);
            s as f32
        })
        .collect()
}

fn per_frame(c: &mut Criterion) {
    let framing = FrameConfig::new(FRAME, HOP).expect("valid framing");
    let x = signal(FRAME * 4);
    let frame = &x[FRAME..2 * FRAME];
    let mut group = c.benchmark_group("timbre_48k_2048_512");

    let mut spectrum = Spectrum::new(FRAME);
    group.bench_function("spectrum_only", |b| {
        b.iter(|| {
            spectrum.process(black_box(frame));
            black_box(spectrum.power()[10])
        })
    });

    let mut timbre =
        Timbre::new(SAMPLE_RATE_HZ, framing, TimbreOptions::default()).expect("valid settings");
    let mut out = Descriptors::default();
    group.bench_function("describe", |b| {
        b.iter(|| {
            timbre.describe(black_box(frame), 0..FRAME, &mut out);
            black_box(out.centroid_hz)
        })
    });

    // The whole analyzer (framing, level, descriptors), one hop of input per iteration, so one
    // frame per iteration in the steady state.
    let settings = AnalysisSettings::new(SAMPLE_RATE_HZ, framing).expect("valid settings");
    let mut analyzer = Analyzer::new(settings);
    let long = signal(SAMPLE_RATE_HZ as usize);
    let mut at = 0;
    group.bench_function("analyzer_per_hop", |b| {
        b.iter(|| {
            if at + HOP > long.len() {
                at = 0;
            }
            let mut frames = 0;
            analyzer.process(black_box(&long[at..at + HOP]), None, |_| frames += 1);
            at += HOP;
            black_box(frames)
        })
    });
    group.finish();
}

criterion_group!(benches, per_frame);
criterion_main!(benches);
