//! `cargo xtask bench-timbre`: Weft's timbre descriptors against librosa 0.11.0 on the same
//! 3-minute file, in one run.
//!
//! 1. Writes a deterministic 3-minute, 48 kHz mono float32 WAV (notes with harmonics and
//!    envelopes, noise hits, a quiet passage) to `target/weft-bench/timbre-3min-48k.wav`.
//! 2. Extracts the full descriptor set with Weft's offline path
//!    ([`weft_engine::Timbre::describe_clip`]: librosa's centred framing, every descriptor, the
//!    whole-clip floor), in this release-built process, on one thread; best of [`WEFT_REPEATS`]
//!    runs before and as many after the librosa run. For reference it also times [`weft_engine::Analyzer::analyze_clip`], which adds the
//!    level meter and frame times (what `weft analyze --frames` runs).
//! 3. Runs `tests/python/timbre_reference.py bench`, which extracts the same set with librosa,
//!    timed inside Python so interpreter start-up and imports are excluded, on one BLAS/OpenMP
//!    thread (and without any OpenBLAS kernel pinning from the environment, which would slow
//!    numpy), best of [`LIBROSA_REPEATS`] runs: once sharing one STFT between the features (the
//!    fastest way to script librosa) and once calling each feature function on the samples (the
//!    usual way, an STFT per function).
//! 4. Times the float64 spectrum stage alone ([`Spectrum::process`]) on as many frames: librosa's
//!    time over that is the ceiling of any speedup at the precision the librosa checks need.
//! 5. Prints the times and ends with `speedup_vs_librosa: <librosa time / Weft descriptor time>`,
//!    against librosa at its fastest (the shared STFT).

use anyhow::{Context, Result, bail};
use std::path::Path;
use std::process::Command;
use std::time::Instant;
use weft_engine::spectrum::Spectrum;
use weft_engine::{AnalysisSettings, Analyzer, FrameConfig, Timbre, TimbreOptions};

/// Sample rate of the benchmark file, Hz.
const SAMPLE_RATE_HZ: u32 = 48_000;
/// Length of the benchmark file, seconds.
const DURATION_S: u32 = 180;
/// librosa 0.11.0's default framing (n_fft 2048, hop 512), samples.
const FRAME: usize = 2048;
const HOP: usize = 512;
/// Timed repetitions (the best is reported: common practice for benchmarks of fixed work).
const WEFT_REPEATS: usize = 5;
const LIBROSA_REPEATS: usize = 3;
/// The goal of issue 3: Weft at least this many times faster than librosa on one core.
const GOAL: f64 = 30.0;

/// Runs the benchmark.
pub fn run() -> Result<()> {
    let path = Path::new("target/weft-bench/timbre-3min-48k.wav");
    let samples = signal();
    write_wav(path, &samples)?;
    println!(
        "bench-timbre: {} s at {SAMPLE_RATE_HZ} Hz ({} samples), frames {FRAME}/{HOP}",
        DURATION_S,
        samples.len()
    );

    let framing = FrameConfig::new(FRAME, HOP)?;
    let settings = AnalysisSettings::new(f64::from(SAMPLE_RATE_HZ), framing)?
        .with_timbre(TimbreOptions::default())?;
    let mut timbre = Timbre::new(settings.sample_rate_hz, framing, settings.timbre)?;
    let mut analyzer = Analyzer::new(settings);
    let mut weft = WeftTimes::default();
    weft.measure(&mut timbre, &mut analyzer, &samples);
    let python = Path::new(".venv/bin/python");
    if !python.is_file() {
        bail!("no Python reference tools at .venv: run cargo xtask setup");
    }
    let rolloff = TimbreOptions::default().rolloff_custom_fraction.to_string();
    let output = Command::new(python)
        .args(["tests/python/timbre_reference.py", "bench"])
        .arg(path)
        .args([
            FRAME.to_string(),
            HOP.to_string(),
            rolloff,
            LIBROSA_REPEATS.to_string(),
        ])
        // One core for the reference too (the script sets these as well, before numpy loads).
        .env("OPENBLAS_NUM_THREADS", "1")
        .env("OMP_NUM_THREADS", "1")
        .env("MKL_NUM_THREADS", "1")
        .env("NUMBA_NUM_THREADS", "1")
        // This machine's environment may pin OpenBLAS to an older kernel (OPENBLAS_CORETYPE,
        // OPENBLAS_L2_SIZE), which slows a current numpy: the reference runs without them.
        .env_remove("OPENBLAS_CORETYPE")
        .env_remove("OPENBLAS_L2_SIZE")
        .output()
        .context("could not run tests/python/timbre_reference.py")?;
    if !output.status.success() {
        bail!(
            "timbre_reference.py bench failed ({}): {}",
            output.status,
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let report: serde_json::Value = serde_json::from_slice(&output.stdout)
        .context("timbre_reference.py bench printed no JSON")?;
    let librosa_s = report["seconds"]
        .as_f64()
        .context("no 'seconds' in the librosa report")?;
    let per_function_s = report["per_function_seconds"]
        .as_f64()
        .context("no 'per_function_seconds' in the librosa report")?;
    let librosa_frames = report["frames"].as_u64().unwrap_or(0);
    let frames = weft.frames;
    if librosa_frames != frames as u64 {
        bail!("librosa made {librosa_frames} frames, Weft {frames}");
    }
    println!(
        "librosa: {librosa_s:.4} s for {librosa_frames} frames ({:.2} µs per frame), best of \
         {LIBROSA_REPEATS} (librosa {})",
        librosa_s * 1e6 / frames as f64,
        report["librosa_version"].as_str().unwrap_or("?")
    );
    println!(
        "librosa, each feature function on the samples (its own STFT each): {per_function_s:.4} \
         s ({:.2} µs per frame)",
        per_function_s * 1e6 / frames as f64
    );
    // Weft again after librosa, so a burst of load from other processes during either half
    // cannot decide the ratio (best of both halves; common practice on shared machines).
    weft.measure(&mut timbre, &mut analyzer, &samples);
    let (weft_s, analyzer_s) = (weft.descriptors_s, weft.analyzer_s);
    println!(
        "weft descriptors (Timbre::describe_clip): {weft_s:.4} s ({:.2} µs per frame), best of \
         {}",
        weft_s * 1e6 / frames as f64,
        2 * WEFT_REPEATS
    );
    println!(
        "weft with levels and times (Analyzer::analyze_clip): {analyzer_s:.4} s ({:.2} µs per \
         frame), librosa / that: {:.1}",
        analyzer_s * 1e6 / frames as f64,
        librosa_s / analyzer_s
    );
    println!(
        "librosa per-function calls / Weft descriptors: {:.1}",
        per_function_s / weft_s
    );
    // The ceiling: the float64 spectrum stage alone (window, FFT, magnitude and power), which
    // every descriptor needs at the precision the librosa checks ask for.
    let spectrum_s = spectrum_only_s(&samples, frames);
    println!(
        "weft spectrum stage alone (Spectrum::process, float64 FFT): {spectrum_s:.4} s ({:.2} µs \
         per frame); librosa / that: {:.1} (the most any descriptor code could reach at this \
         precision)",
        spectrum_s * 1e6 / frames as f64,
        librosa_s / spectrum_s
    );
    // The headline compares with librosa at its fastest (one shared STFT).
    let speedup = librosa_s / weft_s;
    println!(
        "goal: ≥ {GOAL}× ({})",
        if speedup >= GOAL { "met" } else { "not met" }
    );
    println!("speedup_vs_librosa: {speedup:.1}");
    Ok(())
}

/// Best time of [`Spectrum::process`] over `frames` frames of `samples` (hop [`HOP`], wrapping
/// at the end), best of [`WEFT_REPEATS`] runs.
fn spectrum_only_s(samples: &[f32], frames: usize) -> f64 {
    let mut spectrum = Spectrum::new(FRAME);
    let last_start = samples.len().saturating_sub(FRAME);
    let mut best = f64::INFINITY;
    for _ in 0..WEFT_REPEATS {
        let start = Instant::now();
        let mut acc = 0.0_f32;
        for k in 0..frames {
            let at = (k * HOP) % last_start.max(1);
            spectrum.process(&samples[at..at + FRAME]);
            acc += spectrum.power()[16];
        }
        std::hint::black_box(acc);
        best = best.min(start.elapsed().as_secs_f64());
    }
    best
}

/// Best times of Weft's two offline paths.
struct WeftTimes {
    descriptors_s: f64,
    analyzer_s: f64,
    frames: usize,
}

impl Default for WeftTimes {
    fn default() -> Self {
        Self {
            descriptors_s: f64::INFINITY,
            analyzer_s: f64::INFINITY,
            frames: 0,
        }
    }
}

impl WeftTimes {
    /// Runs each path [`WEFT_REPEATS`] times, keeping the best times.
    fn measure(&mut self, timbre: &mut Timbre, analyzer: &mut Analyzer, samples: &[f32]) {
        for _ in 0..WEFT_REPEATS {
            let start = Instant::now();
            let out = timbre.describe_clip(samples);
            self.descriptors_s = self.descriptors_s.min(start.elapsed().as_secs_f64());
            self.frames = out.len();
            std::hint::black_box(out);
            let start = Instant::now();
            let out = analyzer.analyze_clip(samples, None);
            self.analyzer_s = self.analyzer_s.min(start.elapsed().as_secs_f64());
            std::hint::black_box(out);
        }
    }
}

/// The benchmark signal, deterministic: two voices of harmonic notes with attack/decay
/// envelopes, noise hits every half second, and a quiet 10 s passage every minute.
fn signal() -> Vec<f32> {
    let sr = f64::from(SAMPLE_RATE_HZ);
    let n = (DURATION_S * SAMPLE_RATE_HZ) as usize;
    let mut noise_state = 0x2545_f491_u32;
    let mut noise = move || {
        // xorshift32, uniform in −1..1.
        noise_state ^= noise_state << 13;
        noise_state ^= noise_state >> 17;
        noise_state ^= noise_state << 5;
        f64::from(noise_state) / f64::from(u32::MAX) * 2.0 - 1.0
    };
    // A pentatonic walk (MIDI keys), one note per 0.25 s in the upper voice, per 1 s below.
    const KEYS: [f64; 10] = [57.0, 60.0, 62.0, 64.0, 67.0, 69.0, 72.0, 74.0, 76.0, 79.0];
    let hz = |key: f64| 440.0 * 2f64.powf((key - 69.0) / 12.0);
    (0..n)
        .map(|i| {
            let t = i as f64 / sr;
            let quiet = t % 60.0 >= 50.0;
            let upper_note = (t / 0.25) as usize;
            let lower_note = t as usize;
            let f_up = hz(KEYS[(upper_note * 7) % KEYS.len()]);
            let f_low = hz(KEYS[(lower_note * 3) % KEYS.len()] - 24.0);
            let env_up = (-(t % 0.25) * 12.0).exp();
            let env_low = (-(t % 1.0) * 2.0).exp();
            let mut x = 0.0;
            for h in 1..=10 {
                let h = f64::from(h);
                x += 0.2 * env_up / h * (std::f64::consts::TAU * f_up * h * t).sin();
                x += 0.25 * env_low / (h * h) * (std::f64::consts::TAU * f_low * h * t).sin();
            }
            let hit = (-(t % 0.5) * 40.0).exp();
            x += 0.15 * hit * noise();
            if quiet {
                x *= 0.001;
            }
            x as f32
        })
        .collect()
}

fn write_wav(path: &Path, samples: &[f32]) -> Result<()> {
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: SAMPLE_RATE_HZ,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec)
        .with_context(|| format!("cannot write {}", path.display()))?;
    for &s in samples {
        w.write_sample(s)?;
    }
    w.finalize()
        .with_context(|| format!("cannot finish {}", path.display()))?;
    Ok(())
}
