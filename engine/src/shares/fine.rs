//! Fine-resolution statistics of each column for the presence stage: what the palette's mel
//! bands blur away. The atoms of tonal families are pitched templates, so a fit over mel bands
//! tells pitches apart better than timbres; the FFT bins under those bands still hold how
//! peaked (tonal) or noisy each register is and the shape of the spectral envelope.
//!
//! Per column (the mean power spectrum of the column's frames), [`FINE_VALUES`] values, all
//! unchanged by a gain change of the input:
//! - per half-octave band from [`FINE_LOW_HZ`] ([`FINE_BANDS`] bands): spectral flatness over
//!   the band's bins (geometric over arithmetic mean; N. S. Jayant and P. Noll, *Digital Coding
//!   of Waveforms*, 1984) and the natural log of its crest (largest bin over the mean);
//! - the real cepstrum of the log power spectrum (B. P. Bogert, M. J. R. Healy and J. W. Tukey,
//!   1963; A. M. Noll, "Cepstrum pitch determination", JASA 41(2), 1967), coefficients
//!   `1..=CEPSTRA`: the spectral envelope;
//! - the cepstrum's largest value between the quefrencies of 1 kHz and 50 Hz and the natural
//!   log of that quefrency in seconds: how strongly periodic (harmonic) the column is, and at
//!   what pitch.

use realfft::num_complex::Complex;
use realfft::{ComplexToReal, RealFftPlanner};
use std::sync::Arc;

/// Half-octave bands of flatness and crest.
pub const FINE_BANDS: usize = 16;
/// Lower edge of the first band, Hz.
pub const FINE_LOW_HZ: f64 = 100.0;
/// Cepstral coefficients kept (after the 0th, which is the level).
pub const CEPSTRA: usize = 24;
/// Values per column.
pub const FINE_VALUES: usize = 2 * FINE_BANDS + CEPSTRA + 2;
/// Floor added to every bin, relative to the column's mean bin power (keeps logarithms finite
/// and the values independent of the gain).
const FLOOR: f32 = 1e-6;

/// Accumulates the power spectra of a column's frames and turns them into [`FINE_VALUES`]
/// values. Allocates only in [`FineSpectrum::new`].
pub struct FineSpectrum {
    acc: Vec<f32>,
    frames: usize,
    /// Bin ranges of the bands (empty when the band lies above Nyquist or holds < 2 bins).
    bands: [(usize, usize); FINE_BANDS],
    /// Quefrency range (samples) searched for the cepstral peak.
    peak_range: (usize, usize),
    sample_rate_hz: f64,
    plan: Arc<dyn ComplexToReal<f32>>,
    spectrum: Vec<Complex<f32>>,
    cepstrum: Vec<f32>,
    scratch: Vec<Complex<f32>>,
}

impl std::fmt::Debug for FineSpectrum {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("FineSpectrum")
            .field("bins", &self.acc.len())
            .field("frames", &self.frames)
            .finish_non_exhaustive()
    }
}

impl Clone for FineSpectrum {
    fn clone(&self) -> Self {
        let mut c = Self::new(self.acc.len(), self.sample_rate_hz);
        c.acc.copy_from_slice(&self.acc);
        c.frames = self.frames;
        c
    }
}

impl FineSpectrum {
    /// For one-sided power spectra of `bins` bins (a frame of `2 (bins − 1)` samples) at
    /// `sample_rate_hz`.
    pub fn new(bins: usize, sample_rate_hz: f64) -> Self {
        let bins = bins.max(2);
        let n = 2 * (bins - 1);
        let hz_per_bin = sample_rate_hz / n as f64;
        let mut bands = [(0, 0); FINE_BANDS];
        for (k, b) in bands.iter_mut().enumerate() {
            let lo = FINE_LOW_HZ * 2f64.powf(k as f64 / 2.0);
            let hi = lo * std::f64::consts::SQRT_2;
            let a = (lo / hz_per_bin).ceil() as usize;
            let z = ((hi / hz_per_bin).ceil() as usize).min(bins);
            if z >= a + 2 {
                *b = (a, z);
            }
        }
        let q_lo = (sample_rate_hz / 1000.0).round() as usize;
        let q_hi = ((sample_rate_hz / 50.0).round() as usize).min(n / 2);
        let plan = RealFftPlanner::<f32>::new().plan_fft_inverse(n);
        let scratch = plan.make_scratch_vec();
        Self {
            acc: vec![0.0; bins],
            frames: 0,
            bands,
            peak_range: (q_lo.max(1), q_hi.max(q_lo.max(1) + 1)),
            sample_rate_hz,
            spectrum: plan.make_input_vec(),
            cepstrum: plan.make_output_vec(),
            scratch,
            plan,
        }
    }

    /// Forgets the frames added since the last column.
    pub fn reset(&mut self) {
        self.acc.fill(0.0);
        self.frames = 0;
    }

    /// Adds one frame's power spectrum (its length must be the `bins` given to `new`).
    pub fn add(&mut self, power: &[f32]) {
        for (a, &p) in self.acc.iter_mut().zip(power) {
            *a += p;
        }
        self.frames += 1;
    }

    /// Writes the values of the frames added since the last call into `out` (all 0 when they
    /// were silent) and starts a new column. Does not allocate.
    pub fn finish_column(&mut self, out: &mut [f32; FINE_VALUES]) {
        let bins = self.acc.len();
        let mean = self.acc.iter().sum::<f32>() / bins as f32;
        self.frames = 0;
        out.fill(0.0);
        if !(mean.is_finite() && mean > 0.0) {
            self.acc.fill(0.0);
            return;
        }
        let floor = FLOOR * mean;
        for (k, &(a, z)) in self.bands.iter().enumerate() {
            if z == 0 {
                out[k] = 1.0;
                continue;
            }
            let s = &self.acc[a..z];
            let am = s.iter().map(|&p| p + floor).sum::<f32>() / s.len() as f32;
            let lg = s.iter().map(|&p| (p + floor).ln()).sum::<f32>() / s.len() as f32;
            let max = s.iter().fold(0.0_f32, |m, &p| m.max(p + floor));
            out[k] = (lg.exp() / am).clamp(0.0, 1.0);
            out[FINE_BANDS + k] = (max / am).ln().max(0.0);
        }
        for (c, &p) in self.spectrum.iter_mut().zip(&self.acc) {
            *c = Complex::new((p + floor).ln(), 0.0);
        }
        self.acc.fill(0.0);
        if self
            .plan
            .process_with_scratch(&mut self.spectrum, &mut self.cepstrum, &mut self.scratch)
            .is_err()
        {
            return;
        }
        let n = self.cepstrum.len() as f32;
        let o = 2 * FINE_BANDS;
        for q in 1..=CEPSTRA {
            out[o + q - 1] = self.cepstrum[q] / n;
        }
        let (lo, hi) = self.peak_range;
        let mut best = (lo, f32::MIN);
        for q in lo..hi.min(self.cepstrum.len()) {
            if self.cepstrum[q] > best.1 {
                best = (q, self.cepstrum[q]);
            }
        }
        out[o + CEPSTRA] = best.1.max(0.0) / n;
        out[o + CEPSTRA + 1] = (best.0 as f64 / self.sample_rate_hz).ln() as f32;
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::spectrum::Spectrum;

    fn values(signal: &[f32], sr: f64, gain: f32) -> [f32; FINE_VALUES] {
        let mut spectrum = Spectrum::new(2048);
        let mut fine = FineSpectrum::new(1025, sr);
        for start in (0..signal.len() - 2048).step_by(512).take(5) {
            let frame: Vec<f32> = signal[start..start + 2048]
                .iter()
                .map(|v| v * gain)
                .collect();
            spectrum.process(&frame);
            fine.add(spectrum.power());
        }
        let mut out = [0.0; FINE_VALUES];
        fine.finish_column(&mut out);
        out
    }

    #[test]
    fn a_harmonic_tone_is_peaked_and_periodic_and_noise_is_flat() {
        let sr = 48_000.0;
        // 220 Hz with 12 harmonics falling as 1/k, against seeded white noise.
        let tone: Vec<f32> = (0..8192)
            .map(|i| {
                let t = i as f64 / sr;
                (1..=12)
                    .map(|k| (2.0 * std::f64::consts::PI * 220.0 * k as f64 * t).sin() / k as f64)
                    .sum::<f64>() as f32
                    * 0.1
            })
            .collect();
        let mut rng = crate::scene::SceneRng::new(9);
        let noise: Vec<f32> = (0..8192).map(|_| (rng.unit() as f32 - 0.5) * 0.2).collect();
        let t = values(&tone, sr, 1.0);
        let w = values(&noise, sr, 1.0);
        // Band 2 is 200–283 Hz (holds the fundamental): a peak in the tone, flat in noise.
        assert!(
            t[2] < 0.3 && w[2] > 0.5,
            "flatness tone {} noise {}",
            t[2],
            w[2]
        );
        // Band 9 (2.26–3.2 kHz) holds harmonics 11 and 12 among ~40 bins: a high crest.
        assert!(
            t[FINE_BANDS + 9] > w[FINE_BANDS + 9] + 1.0,
            "crest tone {} noise {}",
            t[FINE_BANDS + 9],
            w[FINE_BANDS + 9]
        );
        let peak = 2 * FINE_BANDS + CEPSTRA;
        assert!(
            t[peak] > 3.0 * w[peak],
            "cepstral peak {} vs {}",
            t[peak],
            w[peak]
        );
        // The peak's quefrency is the period, 1/220 s (within a sample at 48 kHz).
        let period = f64::from(t[peak + 1]).exp();
        assert!((period - 1.0 / 220.0).abs() < 1.5 / sr, "period {period}");
        // A gain change of 40 dB changes nothing but rounding.
        let g = values(&tone, sr, 100.0);
        for (a, b) in t.iter().zip(&g) {
            assert!((a - b).abs() < 1e-3 * (1.0 + a.abs()), "{a} vs {b}");
        }
        // Silence gives zeros.
        let s = values(&vec![0.0; 8192], sr, 1.0);
        assert!(s.iter().all(|&v| v == 0.0));
    }
}
