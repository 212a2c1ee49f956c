//! Test and demo signals written as WAV files.

use anyhow::{Context, Result};
use std::path::Path;

/// Writes a stereo 48 kHz, 32-bit float WAV of `seconds`: a 1 kHz tone at −20 dBFS peak for the
/// first half of every 4 s, then a 220 Hz tone with its harmonics at −12 dBFS peak, panned
/// slightly, so the level meter and its history have something to show. Deterministic.
pub fn write_demo_wav(path: &Path, seconds: f64) -> Result<()> {
    let sample_rate = 48_000u32;
    let spec = hound::WavSpec {
        channels: 2,
        sample_rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    let mut w = hound::WavWriter::create(path, spec)
        .with_context(|| format!("cannot write {}", path.display()))?;
    let n = (seconds * f64::from(sample_rate)) as usize;
    for i in 0..n {
        let t = i as f64 / f64::from(sample_rate);
        let (l, r) = if t % 4.0 < 2.0 {
            let x = 0.1 * (std::f64::consts::TAU * 1000.0 * t).sin();
            (x, x)
        } else {
            let x: f64 = (1..=6)
                .map(|h| {
                    let h = f64::from(h);
                    (std::f64::consts::TAU * 220.0 * h * t).sin() / h
                })
                .sum::<f64>()
                * 0.16;
            (x * 1.1, x * 0.9)
        };
        w.write_sample(l as f32)?;
        w.write_sample(r as f32)?;
    }
    w.finalize()
        .with_context(|| format!("cannot finish {}", path.display()))?;
    Ok(())
}
