//! Numerical poison through the whole analyzer (level, timbre descriptors and family shares with
//! the built-in palette): NaN, ±∞, the largest finite value, subnormals, a full-scale square
//! wave, DC, and a stream silent for a long time then loud.
//!
//! For every case, as the issue asks:
//! - no output field is ever NaN or infinite, during the poison or after it;
//! - one window (3 s) after the bad samples end, every output equals what a fresh analyzer gives
//!   on the same clean tail (the invariant: the analysis has no memory longer than a window);
//! - the shares of the clean tail are not stuck: a signal is seen and the shares and
//!   *unexplained* sum to 1.

use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use std::f64::consts::TAU;
use std::time::Instant;
use weft_engine::palette::Palette;
use weft_engine::shares::{Shares, SharesMode, SharesSettings};
use weft_engine::spectrum::SAMPLE_LIMIT;
use weft_engine::{AnalysisSettings, Analyzer, FrameResult};

/// Sample rate of the poison cases, Hz.
const RATE_HZ: f64 = 48_000.0;
/// The window the analysis must recover within, seconds (the style window).
const WINDOW_S: f64 = 3.0;
/// Seed of the clean signal; printed with every failure.
const SEED: u64 = 0x9015_0000_0008;
/// Block size the signals are fed in, samples (odd, so blocks and frames never line up).
const BLOCK: usize = 4_999;
/// Hops per alignment unit: the clean tail starts at a multiple of this many hops, so that the
/// poisoned and the fresh analyzer cut frames and share columns at the same places (60 is a
/// multiple of every column length of 1–6 hops).
const ALIGN_HOPS: usize = 60;
/// Level difference allowed after recovery, dB (both analyzers see the same samples).
const LEVEL_TOLERANCE_DB: f32 = 1e-3;
/// Relative difference allowed on descriptors after recovery (same samples, same arithmetic).
const DESCRIPTOR_TOLERANCE: f32 = 1e-3;
/// Absolute difference allowed on shares between two analyzers that have seen the same audio
/// for a window (`shares_forget_their_history_within_one_window`).
const SHARE_TOLERANCE: f32 = 0.02;
/// Difference allowed on the mean explained share (1 − *unexplained*) after the poison against
/// a fresh analyzer: a dictionary stuck at zero would explain nothing.
const EXPLAINED_TOLERANCE: f32 = 0.1;
/// Largest error on the sum of shares and *unexplained*.
const SUM_TOLERANCE: f32 = 1e-3;
/// Seconds of silence fed before the loud part of the long-silence case. The issue names an
/// hour; silence takes the whole per-frame path (FFT, descriptors, columns) and measured
/// 0.15 s of CPU per second of audio in the test profile (opt-level 1; 89 s of CPU for 600 s,
/// 274 s of wall time on the shared 2-core machine), so an hour would take minutes. Nothing in
/// the analysis accumulates over silent frames except integer counters (frame and column
/// indices, u64) and times computed from them, so 30 s (2 800 frames, 560 share columns)
/// exercises the same path in a few seconds; hours of audio run through the plugin in
/// `cargo xtask soak`.
const SILENCE_S: f64 = 30.0;

fn analyzer() -> Analyzer {
    let settings = AnalysisSettings::for_sample_rate(RATE_HZ)
        .unwrap_or_else(|err| panic!("{RATE_HZ} Hz: {err}"));
    Analyzer::with_palette(
        settings,
        &Palette::default_palette(),
        SharesSettings::default(),
    )
    .unwrap_or_else(|err| panic!("the built-in palette at {RATE_HZ} Hz: {err}"))
}

fn hop() -> usize {
    analyzer().settings().framing.hop_len
}

/// A seeded stand-in for music: a bass line, a chord of harmonic tones, noise bursts (hats)
/// and decaying clicks (kicks), peak about `peak`.
fn music(seed: u64, n: usize, peak: f32) -> Vec<f32> {
    let mut rng = SmallRng::seed_from_u64(seed);
    let beat = (0.25 * RATE_HZ) as usize;
    let mut x = vec![0.0_f32; n];
    let mut bass_hz = 55.0;
    let mut chord_hz = [220.0, 277.2, 329.6];
    for (i, v) in x.iter_mut().enumerate() {
        if i % (8 * beat) == 0 {
            bass_hz = 55.0 * 2f64.powf(f64::from(rng.gen_range(0..12)) / 12.0);
            let root = 220.0 * 2f64.powf(f64::from(rng.gen_range(0..12)) / 12.0);
            chord_hz = [root, root * 1.26, root * 1.5];
        }
        let t = i as f64 / RATE_HZ;
        let in_beat = (i % beat) as f64 / RATE_HZ;
        let mut s = 0.3 * (TAU * bass_hz * t).sin();
        for f in chord_hz {
            for h in 1..5 {
                s += 0.08 / f64::from(h) * (TAU * f * f64::from(h) * t).sin();
            }
        }
        if (i / beat) % 2 == 1 {
            s += 0.15 * rng.gen_range(-1.0..1.0) * (-in_beat * 40.0).exp();
        }
        s += 0.5 * (TAU * 60.0 * in_beat).sin() * (-in_beat * 25.0).exp();
        *v = s as f32;
    }
    let max = x.iter().fold(0.0_f32, |m, v| m.max(v.abs()));
    x.iter_mut().for_each(|v| *v *= peak / max);
    x
}

/// Feeds `signal` in [`BLOCK`]-sample blocks and returns every frame.
fn run(analyzer: &mut Analyzer, signal: &[f32], what: &str) -> Vec<FrameResult> {
    let mut frames = Vec::with_capacity(signal.len() / 512 + 2);
    for block in signal.chunks(BLOCK) {
        analyzer.process(block, None, |f| {
            assert_finite(f, what);
            frames.push(*f);
        });
    }
    frames
}

fn assert_shares_finite(s: &Shares, which: &str, f: &FrameResult, what: &str) {
    for (i, v) in s.share[..s.families]
        .iter()
        .chain([&s.unexplained])
        .enumerate()
    {
        assert!(
            v.is_finite() && (0.0..=1.0 + SUM_TOLERANCE).contains(v),
            "[{what}] frame {} ({:.3} s): {which} share {i} is {v} (seed {SEED:#x})",
            f.index,
            f.time_s
        );
    }
}

/// Every field of a frame is a number (and shares are in 0–1).
fn assert_finite(f: &FrameResult, what: &str) {
    let d = &f.descriptors;
    let scalars = [
        ("rms_db", f.level.rms_db),
        ("peak_db", f.level.peak_db),
        ("centroid_hz", d.centroid_hz),
        ("bandwidth_hz", d.bandwidth_hz),
        ("rolloff_hz", d.rolloff_hz),
        ("rolloff_custom_hz", d.rolloff_custom_hz),
        ("flatness", d.flatness),
        ("flux_db", d.flux_db),
        ("zero_crossings_per_sample", d.zero_crossings_per_sample),
        ("rms", d.rms),
    ];
    let arrays: [(&str, &[f32]); 4] = [
        ("mel_power", &d.mel_power),
        ("mfcc", &d.mfcc),
        ("contrast_db", &d.contrast_db),
        ("valley_db", &d.valley_db),
    ];
    for (name, v) in scalars {
        assert!(
            v.is_finite(),
            "[{what}] frame {} ({:.3} s): {name} is {v} (seed {SEED:#x})",
            f.index,
            f.time_s
        );
    }
    for (name, values) in arrays {
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            panic!(
                "[{what}] frame {} ({:.3} s): {name}[{i}] is {} (seed {SEED:#x})",
                f.index, f.time_s, values[i]
            );
        }
    }
    assert!(f.time_s.is_finite(), "[{what}] time {}", f.time_s);
    assert_shares_finite(&f.shares.raw, "raw", f, what);
    assert_shares_finite(&f.shares.smoothed, "smoothed", f, what);
}

fn close(a: f32, b: f32, relative: f32) -> bool {
    (a - b).abs() <= relative * a.abs().max(b.abs()).max(1.0)
}

/// Worst share difference between two frames.
fn share_gap(a: &Shares, b: &Shares) -> f32 {
    let families = a.families.max(b.families);
    a.share[..families]
        .iter()
        .zip(&b.share[..families])
        .map(|(x, y)| (x - y).abs())
        .fold((a.unexplained - b.unexplained).abs(), f32::max)
}

/// The shares of a frame with a clean signal: a signal, summing to 1.
fn assert_not_stuck(s: &Shares, f: &FrameResult, what: &str) {
    assert!(
        s.signal && s.families > 0,
        "[{what}] frame {} ({:.3} s): no signal in the clean tail: {s:?} (seed {SEED:#x})",
        f.index,
        f.time_s
    );
    let total: f32 = s.share[..s.families].iter().sum::<f32>() + s.unexplained;
    assert!(
        (total - 1.0).abs() <= SUM_TOLERANCE,
        "[{what}] frame {} ({:.3} s): shares sum to {total}: {s:?} (seed {SEED:#x})",
        f.index,
        f.time_s
    );
}

/// Worst differences seen after recovery (printed).
#[derive(Debug, Default)]
struct Gaps {
    level_db: f32,
    descriptor: f32,
    compared: usize,
    /// Mean explained share (1 − *unexplained*) over the compared frames with a signal:
    /// poisoned run, fresh run.
    explained: (f32, f32),
    /// Distinct raw share vectors among the poisoned run's compared columns.
    distinct_columns: usize,
}

/// Compares the poisoned run's frames (consecutive, numbered from the first's index) from
/// `tail_start` (a sample index, a multiple of the hop) on with a fresh analyzer's frames of the
/// tail alone, from one window in: level and descriptors equal, shares alive (a signal where the
/// fresh analyzer sees one, summing to 1, explaining as much of the energy, moving from column
/// to column). Equal shares are checked separately, in `shares_forget_their_history_within_one_window`.
fn assert_recovered(poisoned: &[FrameResult], tail: &[f32], tail_start: usize, what: &str) -> Gaps {
    let hop = hop();
    assert_eq!(tail_start % hop, 0, "the tail must start on a hop");
    let offset = tail_start / hop;
    let base = poisoned.first().map_or(0, |f| f.index as usize);
    let fresh = run(&mut analyzer(), tail, &format!("{what}, fresh"));
    let mut gaps = Gaps::default();
    let (mut explained, mut explained_fresh, mut with_signal) = (0.0, 0.0, 0);
    let mut columns: Vec<[u32; 33]> = Vec::new();
    for g in fresh.iter().filter(|g| g.time_s >= WINDOW_S) {
        let k = offset + g.index as usize;
        let Some(f) = k.checked_sub(base).and_then(|i| poisoned.get(i)) else {
            break;
        };
        assert_eq!(f.index as usize, k, "[{what}] frame numbering");
        let at = format!(
            "[{what}] {:.3} s after the poison (frame {k}, seed {SEED:#x})",
            g.time_s
        );
        for (name, a, b) in [
            ("rms_db", f.level.rms_db, g.level.rms_db),
            ("peak_db", f.level.peak_db, g.level.peak_db),
        ] {
            gaps.level_db = gaps.level_db.max((a - b).abs());
            assert!(
                (a - b).abs() <= LEVEL_TOLERANCE_DB,
                "{at}: {name} {a} vs {b} fresh"
            );
        }
        let (d, e) = (&f.descriptors, &g.descriptors);
        let (ds, es) = (d.scalars(), e.scalars());
        let pairs = d
            .mel_power
            .iter()
            .zip(&e.mel_power)
            .chain(d.mfcc.iter().zip(&e.mfcc))
            .chain(d.contrast_db.iter().zip(&e.contrast_db))
            .chain(d.valley_db.iter().zip(&e.valley_db))
            .chain(ds.iter().zip(&es));
        for (i, (&a, &b)) in pairs.enumerate() {
            let gap = (a - b).abs() / a.abs().max(b.abs()).max(1.0);
            gaps.descriptor = gaps.descriptor.max(gap);
            assert!(
                close(a, b, DESCRIPTOR_TOLERANCE),
                "{at}: descriptor value {i} is {a}, fresh {b}"
            );
        }
        assert_eq!(
            f.shares.updated, g.shares.updated,
            "{at}: share columns out of step"
        );
        let (s, t) = (&f.shares.raw, &g.shares.raw);
        assert_eq!(
            s.signal, t.signal,
            "{at}: the poisoned run sees a signal: {}, the fresh one: {}",
            s.signal, t.signal
        );
        if t.signal {
            assert_not_stuck(s, f, what);
            assert_not_stuck(&f.shares.smoothed, f, what);
            explained += 1.0 - s.unexplained;
            explained_fresh += 1.0 - t.unexplained;
            with_signal += 1;
        }
        if f.shares.updated {
            let mut key = [0_u32; 33];
            for (k, v) in key.iter_mut().zip(s.share.iter().chain([&s.unexplained])) {
                *k = v.to_bits();
            }
            if !columns.contains(&key) {
                columns.push(key);
            }
        }
        gaps.compared += 1;
    }
    assert!(
        gaps.compared > 50 && with_signal > 50,
        "[{what}] only {} frames compared, {with_signal} with a signal",
        gaps.compared
    );
    let n = with_signal as f32;
    gaps.explained = (explained / n, explained_fresh / n);
    gaps.distinct_columns = columns.len();
    assert!(
        (gaps.explained.0 - gaps.explained.1).abs() <= EXPLAINED_TOLERANCE,
        "[{what}] after the poison the palette explains {:.3} of the energy on average, a fresh \
         analyzer {:.3} (seed {SEED:#x})",
        gaps.explained.0,
        gaps.explained.1
    );
    assert!(
        gaps.distinct_columns >= 2,
        "[{what}] the shares are frozen after the poison: one value for every column"
    );
    gaps
}

/// Clean music, `poison` for a while, clean music again: never a non-number, and the tail
/// recovers within a window. With `equivalent`, the run must also equal, frame for frame once
/// the frames hold no poisoned sample, a run with `equivalent` in place of `poison` (what the
/// engine documents it reads the poison as).
fn poison_case(
    what: &str,
    poison: impl Fn(usize) -> f32,
    equivalent: Option<&dyn Fn(usize) -> f32>,
) {
    let start = Instant::now();
    let unit = ALIGN_HOPS * hop();
    let before = 3 * unit; // ≈ 1.9 s
    let bad = 2 * unit; // ≈ 1.3 s
    let tail_len = (2.0 * WINDOW_S * RATE_HZ) as usize;
    let clean = music(SEED, before + bad + tail_len, 0.5);
    let with = |f: &dyn Fn(usize) -> f32| {
        let mut signal = clean.clone();
        for (i, v) in signal[before..before + bad].iter_mut().enumerate() {
            *v = f(i);
        }
        signal
    };
    let signal = with(&poison);
    let tail = &clean[before + bad..];
    let poisoned = run(&mut analyzer(), &signal, what);
    let gaps = assert_recovered(&poisoned, tail, before + bad, what);
    let mut same_as = String::new();
    if let Some(equivalent) = equivalent {
        let reference = run(
            &mut analyzer(),
            &with(equivalent),
            &format!("{what}, equivalent"),
        );
        assert_eq!(reference.len(), poisoned.len());
        // Frame k spans samples k·hop − frame_len/2 .. k·hop + frame_len/2.
        let frame_len = analyzer().settings().framing.frame_len;
        let first_clean = (before + bad + frame_len / 2).div_ceil(hop());
        for (f, g) in poisoned.iter().zip(&reference).skip(first_clean) {
            assert!(
                f == g,
                "[{what}] frame {} ({:.3} s) differs from the run with the equivalent samples:\n \
                 {f:?}\n {g:?} (seed {SEED:#x})",
                f.index,
                f.time_s
            );
        }
        same_as = format!(
            "; equal to the equivalent run on all {} frames after the poison",
            poisoned.len() - first_clean
        );
    }
    println!(
        "{what}: {} frames, all numbers{same_as}; {} frames compared with a fresh analyzer from \
         {WINDOW_S} s after the poison: level gap {:.1e} dB, descriptor gap {:.1e} (relative), \
         explained share {:.3} (fresh {:.3}), {} distinct share columns; {:.1} s",
        poisoned.len(),
        gaps.compared,
        gaps.level_db,
        gaps.descriptor,
        gaps.explained.0,
        gaps.explained.1,
        gaps.distinct_columns,
        start.elapsed().as_secs_f64()
    );
}

#[test]
fn nan_samples() {
    poison_case("NaN", |_| f32::NAN, Some(&|_| 0.0));
}

#[test]
fn nan_samples_scattered_in_music() {
    let noise = music(SEED ^ 1, 200_000, 0.5);
    let sample = |i: usize| noise[i % noise.len()];
    poison_case(
        "NaN every 97th sample",
        |i| if i % 97 == 0 { f32::NAN } else { sample(i) },
        Some(&|i| if i % 97 == 0 { 0.0 } else { sample(i) }),
    );
}

#[test]
fn positive_infinity() {
    poison_case("+inf", |_| f32::INFINITY, Some(&|_| 0.0));
}

#[test]
fn negative_infinity() {
    poison_case("-inf", |_| f32::NEG_INFINITY, Some(&|_| 0.0));
}

#[test]
fn alternating_infinities() {
    poison_case(
        "±inf alternating",
        |i| {
            if i % 2 == 0 {
                f32::INFINITY
            } else {
                f32::NEG_INFINITY
            }
        },
        Some(&|_| 0.0),
    );
}

#[test]
fn largest_finite_values() {
    // The spectrum holds samples to ±SAMPLE_LIMIT (engine/src/spectrum.rs), the level meter
    // reads them as they are: equal results are asked for once the frames are clean.
    let square = |i: usize, v: f32| if (i / 240).is_multiple_of(2) { v } else { -v };
    poison_case(
        "±f32::MAX square",
        |i| square(i, f32::MAX),
        Some(&|i| square(i, SAMPLE_LIMIT)),
    );
}

#[test]
fn subnormals() {
    poison_case(
        "subnormals",
        |i| {
            let v = f32::from_bits(1 + (i as u32 % 0x007F_FFFF));
            if i % 2 == 0 { v } else { -v }
        },
        None,
    );
}

#[test]
fn full_scale_square_wave() {
    // 100 Hz, ±1.0: the loudest signal a fixed-point path can carry.
    poison_case(
        "full-scale square",
        |i| {
            if (i / 240).is_multiple_of(2) {
                1.0
            } else {
                -1.0
            }
        },
        None,
    );
}

#[test]
fn dc_offset() {
    poison_case("DC +1.0", |_| 1.0, None);
}

#[test]
fn silence_then_loud() {
    // The issue asks for an hour of silence; see SILENCE_S for the length fed and why.
    let start = Instant::now();
    let mut a = analyzer();
    let unit = ALIGN_HOPS * hop();
    // Music first, so the smoothing and the warm start hold something from before the silence.
    let before = music(SEED ^ 3, 3 * unit, 0.5);
    let mut frames = 0_u64;
    a.process(&before, None, |f| {
        assert_finite(f, "music before the silence");
        frames += 1;
    });
    let zeros = vec![0.0_f32; 1 << 16];
    let silent = ((SILENCE_S * RATE_HZ) as usize).div_ceil(unit) * unit;
    let mut fed = 0;
    let frame_len = a.settings().framing.frame_len;
    while fed < silent {
        let n = zeros.len().min(silent - fed);
        a.process(&zeros[..n], None, |f| {
            assert_finite(f, "silence");
            // Half a second into the silence, a frame's stacked share column (3 columns of
            // ≈ 53 ms, plus half a frame) holds no music any more: no signal.
            let centre = (f.index as usize) * hop();
            if centre >= before.len() + frame_len / 2 + (RATE_HZ / 2.0) as usize {
                assert!(
                    !f.shares.raw.signal,
                    "silence has a signal at {:.1} s: {:?}",
                    f.time_s, f.shares.raw
                );
            }
            frames += 1;
        });
        fed += n;
    }
    let silence_s = start.elapsed().as_secs_f64();
    // Then loud: music peaking at full scale.
    let loud = music(SEED ^ 2, (2.0 * WINDOW_S * RATE_HZ) as usize, 1.0);
    let mut after = Vec::new();
    for block in loud.chunks(BLOCK) {
        a.process(block, None, |f| {
            assert_finite(f, "loud after silence");
            after.push(*f);
        });
    }
    let gaps = assert_recovered(&after, &loud, before.len() + silent, "silence then loud");
    println!(
        "{:.0} s of music, {SILENCE_S} s of silence ({frames} frames, {silence_s:.1} s to \
         analyse), then full-scale music: all numbers; {} frames compared with a fresh analyzer \
         from {WINDOW_S} s on: level gap {:.1e} dB, descriptor gap {:.1e}, explained share {:.3} \
         (fresh {:.3}), {} distinct share columns",
        before.len() as f64 / RATE_HZ,
        gaps.compared,
        gaps.level_db,
        gaps.descriptor,
        gaps.explained.0,
        gaps.explained.1,
        gaps.distinct_columns
    );
}

/// Two analyzers that have both heard the same audio for a whole window should show the same
/// shares, whatever came before: that is what "recovers within one window" means for shares.
/// They once did not (a warm start that never forgot: up to 0.9 of the energy on a family 3–20 s
/// later); the estimator now starts its fit afresh at onsets (a column with more than half of its
/// band energy new), so the same onset makes two analyzers identical from then on. A passage
/// with no onset at all still keeps its history.
#[test]
fn shares_forget_their_history_within_one_window() {
    let unit = ALIGN_HOPS * hop();
    let prefix_len = 5 * unit;
    let tail = music(SEED, (4.0 * WINDOW_S * RATE_HZ) as usize, 0.5);
    for mode in [SharesMode::TwoStage, SharesMode::NmfAlone] {
        let build = || {
            let settings = AnalysisSettings::for_sample_rate(RATE_HZ)
                .unwrap_or_else(|err| panic!("{RATE_HZ} Hz: {err}"));
            Analyzer::with_palette(
                settings,
                &Palette::default_palette(),
                SharesSettings {
                    mode,
                    ..SharesSettings::default()
                },
            )
            .unwrap_or_else(|err| panic!("palette: {err}"))
        };
        let fresh = run(&mut build(), &tail, "fresh");
        for (history, prefix) in [
            ("other music", music(SEED ^ 9, prefix_len, 0.5)),
            ("silence", vec![0.0; prefix_len]),
        ] {
            let mut signal = prefix;
            signal.extend_from_slice(&tail);
            let frames = run(&mut build(), &signal, history);
            let offset = prefix_len / hop();
            let mut worst = (0.0_f32, 0.0_f64);
            for g in fresh.iter().filter(|g| g.time_s >= WINDOW_S) {
                let f = &frames[offset + g.index as usize];
                let gap = share_gap(&f.shares.raw, &g.shares.raw)
                    .max(share_gap(&f.shares.smoothed, &g.shares.smoothed));
                if gap > worst.0 {
                    worst = (gap, g.time_s);
                }
            }
            assert!(
                worst.0 <= SHARE_TOLERANCE,
                "{mode:?}, after {history}: shares differ from a fresh analyzer's by {:.3} at \
                 {:.2} s, {WINDOW_S} s or more after both heard the same audio (seed {SEED:#x})",
                worst.0,
                worst.1
            );
        }
    }
}
