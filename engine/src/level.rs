//! Per-frame level: RMS and sample peak in dBFS.
//!
//! The analysis signal arrives as *mid* (the mean of the channels) and *side* (half the difference
//! of a stereo pair; zero for mono). Level is measured on both, so anti-phase stereo reads its real
//! level instead of silence: `mid² + side² = (L² + R²) / 2`, the mean power per channel, and
//! `|mid| + |side| = max(|L|, |R|)`, the sample peak of the louder channel.
//!
//! dBFS here is `20·log10(amplitude)` relative to a full-scale sample of 1.0 (so a full-scale sine
//! has a peak of 0 dBFS and an RMS of −3.01 dBFS). Levels are floored at [`SILENCE_FLOOR_DB`], so
//! silence gives a defined number, never −∞ or NaN.

/// The lowest level reported, in dBFS (values below it, silence included, read as this).
pub const SILENCE_FLOOR_DB: f32 = -160.0;

/// The level of one frame.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct Level {
    /// Root-mean-square level, dBFS, floored at [`SILENCE_FLOOR_DB`].
    pub rms_db: f32,
    /// Sample peak of the louder channel, dBFS, floored at [`SILENCE_FLOOR_DB`].
    pub peak_db: f32,
}

/// Converts a linear amplitude to dBFS, flooring zero, negatives, NaN and tiny values at
/// [`SILENCE_FLOOR_DB`] and keeping +∞ finite at the largest `f32`.
pub fn amplitude_to_db(amplitude: f64) -> f32 {
    if amplitude.is_nan() || amplitude <= 0.0 {
        return SILENCE_FLOOR_DB;
    }
    let db = 20.0 * amplitude.log10();
    (db as f32).clamp(SILENCE_FLOOR_DB, f32::MAX)
}

impl Level {
    /// Measures one frame of mid and side samples (equal lengths). Non-finite samples are
    /// ignored, so one bad sample cannot poison the meter.
    pub fn measure(mid: &[f32], side: &[f32]) -> Self {
        debug_assert_eq!(mid.len(), side.len());
        // Eight independent lanes, so the sums are not one long dependency chain (the
        // compiler vectorises them); a non-finite pair contributes nothing.
        const LANES: usize = 8;
        let mut power = [0.0_f64; LANES];
        let mut peak = [0.0_f64; LANES];
        let mut mc = mid.chunks_exact(LANES);
        let mut sc = side.chunks_exact(LANES);
        for (m, s) in (&mut mc).zip(&mut sc) {
            for i in 0..LANES {
                let (m, s) = (f64::from(m[i]), f64::from(s[i]));
                let ok = m.is_finite() & s.is_finite();
                power[i] += if ok { m * m + s * s } else { 0.0 };
                peak[i] = peak[i].max(if ok { m.abs() + s.abs() } else { 0.0 });
            }
        }
        for (&m, &s) in mc.remainder().iter().zip(sc.remainder()) {
            let (m, s) = (f64::from(m), f64::from(s));
            if m.is_finite() && s.is_finite() {
                power[0] += m * m + s * s;
                peak[0] = peak[0].max(m.abs() + s.abs());
            }
        }
        let power: f64 = power.iter().sum();
        let peak = peak.iter().fold(0.0_f64, |a, &b| a.max(b));
        let n = mid.len().max(1) as f64;
        Self {
            rms_db: amplitude_to_db((power / n).sqrt()),
            peak_db: amplitude_to_db(peak),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn full_scale_sine_reads_zero_peak_and_minus_three_rms() {
        // Closed form: a sine of amplitude 1 has RMS 1/√2, i.e. −3.0103 dBFS.
        let n = 4800;
        let mid: Vec<f32> = (0..n)
            .map(|i| (2.0 * std::f64::consts::PI * 100.0 * i as f64 / 48_000.0).sin() as f32)
            .collect();
        let level = Level::measure(&mid, &vec![0.0; n]);
        assert!((level.rms_db + 3.0103).abs() < 1e-3, "{level:?}");
        assert!(level.peak_db.abs() < 1e-3, "{level:?}");
    }

    #[test]
    fn anti_phase_stereo_is_not_silence() {
        // L = x, R = −x: mid 0, side x. Level equals that of x on both channels.
        let x = [0.5_f32, -0.5, 0.5, -0.5];
        let level = Level::measure(&[0.0; 4], &x);
        assert!((level.rms_db - amplitude_to_db(0.5)).abs() < 1e-6);
        assert!((level.peak_db - amplitude_to_db(0.5)).abs() < 1e-6);
    }

    #[test]
    fn silence_and_poison_read_the_floor() {
        let level = Level::measure(&[0.0; 8], &[0.0; 8]);
        assert_eq!(level.rms_db, SILENCE_FLOOR_DB);
        assert_eq!(level.peak_db, SILENCE_FLOOR_DB);
        let level = Level::measure(&[f32::NAN, f32::INFINITY, f32::NEG_INFINITY], &[0.0; 3]);
        assert_eq!(level.rms_db, SILENCE_FLOOR_DB);
        assert_eq!(amplitude_to_db(f64::NAN), SILENCE_FLOOR_DB);
    }
}
