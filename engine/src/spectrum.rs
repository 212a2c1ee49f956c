//! The windowed FFT of one frame: magnitude and power spectra, with the FFT plan made once.
//!
//! Conventions follow librosa 0.11.0 `stft` so the descriptors built on it can be checked against
//! librosa:
//!
//! - the window is the *periodic* Hann window (scipy 1.15 `get_window("hann", n, fftbins=True)`):
//!   `w[i] = 0.5 + 0.5·cos(−π + 2π·i/n)`, i.e. `0.5 − 0.5·cos(2π·i/n)`;
//! - the windowed frame is transformed in float64 (librosa multiplies the float32 samples by a
//!   float64 window, so scipy's FFT runs in float64) and each complex bin is then rounded to
//!   float32 (librosa stores the STFT as complex64);
//! - magnitude is `|X[k]|` rounded to float32, power is that magnitude squared in float32
//!   (librosa's `np.abs(stft) ** 2`), over the `n / 2 + 1` bins from DC to Nyquist, unscaled
//!   (a full-scale sine of amplitude 1 peaks near `n / 4`).
//!
//! Computing the FFT in float64 matters: in float32 the rounding noise floor (about 140 dB below
//! the peak) sits above librosa's `amin = 1e-10` power floor for loud frames, and flatness,
//! valleys and dB values of clean signals would then differ from librosa's.
//!
//! Samples that are not finite are read as 0, and finite samples are held to ±[`SAMPLE_LIMIT`],
//! so every value stays finite whatever the input.

use realfft::num_complex::Complex;
use realfft::{RealFftPlanner, RealToComplex};
use std::sync::Arc;

/// The largest sample magnitude analysed (+120 dBFS); larger samples are clamped to it so that
/// powers and their sums stay finite in float32.
pub const SAMPLE_LIMIT: f32 = 1.0e6;

/// The periodic Hann window of length `n` (scipy 1.15 `signal.get_window("hann", n,
/// fftbins=True)`, which librosa 0.11.0 uses): `0.5 + 0.5·cos(−π + 2π·i/n)`, computed with
/// scipy's `linspace(−π, π, n + 1)[:n]` arithmetic.
pub fn hann_periodic(n: usize) -> Vec<f64> {
    if n == 1 {
        return vec![1.0];
    }
    let m = n + 1;
    let step = (std::f64::consts::PI - -std::f64::consts::PI) / (m - 1) as f64;
    (0..n)
        .map(|i| {
            let fac = i as f64 * step + -std::f64::consts::PI;
            0.5 * 0.0_f64.cos() + 0.5 * fac.cos()
        })
        .collect()
}

/// Replaces a non-finite sample by 0 and clamps it to ±[`SAMPLE_LIMIT`].
#[inline]
pub fn sanitize(x: f32) -> f32 {
    if x.is_finite() {
        x.clamp(-SAMPLE_LIMIT, SAMPLE_LIMIT)
    } else {
        0.0
    }
}

/// Whether any sample is non-finite or beyond ±[`SAMPLE_LIMIT`] (one vectorised pass: the
/// magnitude bits of a float compare like the magnitudes, and NaN and ∞ have the largest).
pub fn needs_sanitizing(frame: &[f32]) -> bool {
    let limit = SAMPLE_LIMIT.to_bits() as i32;
    frame.iter().fold(0_u32, |any, &x| {
        any | u32::from(((x.to_bits() & 0x7fff_ffff) as i32) > limit)
    }) != 0
}

/// A windowed real FFT of fixed length with its plan, window and buffers made at construction.
#[derive(Clone)]
pub struct Spectrum {
    n_fft: usize,
    window: Vec<f64>,
    plan: Arc<dyn RealToComplex<f64>>,
    input: Vec<f64>,
    output: Vec<Complex<f64>>,
    scratch: Vec<Complex<f64>>,
    magnitude: Vec<f32>,
    power: Vec<f32>,
    sanitized: bool,
}

impl std::fmt::Debug for Spectrum {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Spectrum")
            .field("n_fft", &self.n_fft)
            .finish_non_exhaustive()
    }
}

impl Spectrum {
    /// Plans an FFT of `n_fft` samples (any length ≥ 2; powers of two are fastest).
    ///
    /// # Panics
    /// If `n_fft < 2`.
    pub fn new(n_fft: usize) -> Self {
        assert!(n_fft >= 2, "FFT length {n_fft} is below 2");
        let plan = RealFftPlanner::<f64>::new().plan_fft_forward(n_fft);
        let input = plan.make_input_vec();
        let output = plan.make_output_vec();
        let scratch = plan.make_scratch_vec();
        let bins = n_fft / 2 + 1;
        Self {
            n_fft,
            window: hann_periodic(n_fft),
            plan,
            input,
            output,
            scratch,
            magnitude: vec![0.0; bins],
            power: vec![0.0; bins],
            sanitized: false,
        }
    }

    /// The frame length, samples.
    pub fn n_fft(&self) -> usize {
        self.n_fft
    }

    /// Number of bins, `n_fft / 2 + 1` (DC to Nyquist).
    pub fn bins(&self) -> usize {
        self.n_fft / 2 + 1
    }

    /// The analysis window (periodic Hann, float64).
    pub fn window(&self) -> &[f64] {
        &self.window
    }

    /// Windows and transforms one frame, updating [`Spectrum::magnitude`] and
    /// [`Spectrum::power`]. Does not allocate.
    ///
    /// # Panics
    /// If `frame.len() != self.n_fft()`.
    pub fn process(&mut self, frame: &[f32]) {
        assert_eq!(frame.len(), self.n_fft, "frame length");
        self.sanitized = needs_sanitizing(frame);
        if self.sanitized {
            for ((x, &s), &w) in self.input.iter_mut().zip(frame).zip(&self.window) {
                *x = w * f64::from(sanitize(s));
            }
        } else {
            for ((x, &s), &w) in self.input.iter_mut().zip(frame).zip(&self.window) {
                *x = w * f64::from(s);
            }
        }
        self.transform();
        for ((c, m), p) in self
            .output
            .iter()
            .zip(self.magnitude.iter_mut())
            .zip(self.power.iter_mut())
        {
            // Round to complex64 as librosa stores it, then |·| (exact in float64 for float32
            // parts) rounded to float32, and its square in float32.
            let re = f64::from(c.re as f32);
            let im = f64::from(c.im as f32);
            let mag = (re * re + im * im).sqrt() as f32;
            *m = mag;
            *p = mag * mag;
        }
    }

    fn transform(&mut self) {
        // The buffers were made by the plan for this length, so the call cannot fail; if it ever
        // did, the spectrum would read as silence rather than stale data.
        if self
            .plan
            .process_with_scratch(&mut self.input, &mut self.output, &mut self.scratch)
            .is_err()
        {
            self.output.fill(Complex::new(0.0, 0.0));
        }
    }

    /// Whether the last frame held non-finite samples or samples beyond ±[`SAMPLE_LIMIT`] (and
    /// so was sanitised before the transform).
    pub fn sanitized(&self) -> bool {
        self.sanitized
    }

    /// `|X[k]|` of the last processed frame, float32 (librosa's `np.abs(stft)`).
    pub fn magnitude(&self) -> &[f32] {
        &self.magnitude
    }

    /// `|X[k]|²` of the last processed frame, float32 (librosa's `np.abs(stft) ** 2`).
    pub fn power(&self) -> &[f32] {
        &self.power
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hann_is_periodic() {
        // Periodic Hann: w[0] = 0, w[n/2] = 1, symmetric about n/2 (scipy fftbins=True).
        let w = hann_periodic(8);
        assert!(w[0].abs() < 1e-15);
        assert!((w[4] - 1.0).abs() < 1e-15);
        for i in 1..4 {
            assert!((w[i] - w[8 - i]).abs() < 1e-15);
        }
        let expect = 0.5 - 0.5 * (std::f64::consts::TAU / 8.0).cos();
        assert!((w[1] - expect).abs() < 1e-15);
    }

    #[test]
    fn bin_centred_sine_peaks_at_quarter_length() {
        // A Hann-windowed sine of amplitude A on bin k has |X[k]| = A·n/4 (window mean 1/2, and
        // half the energy in the negative frequency).
        let n = 1024;
        let k = 37;
        let frame: Vec<f32> = (0..n)
            .map(|i| (0.5 * (std::f64::consts::TAU * (k * i) as f64 / n as f64).sin()) as f32)
            .collect();
        let mut s = Spectrum::new(n);
        s.process(&frame);
        assert!((f64::from(s.magnitude()[k]) - 0.5 * n as f64 / 4.0).abs() < 1e-3);
        assert!((s.power()[k] - s.magnitude()[k] * s.magnitude()[k]).abs() == 0.0);
        // Far from the peak, the float64 transform leaves essentially nothing.
        assert!(s.magnitude()[k + 100] < 1e-6, "{}", s.magnitude()[k + 100]);
    }

    #[test]
    fn poison_samples_read_as_finite() {
        let mut frame = vec![0.1_f32; 64];
        frame[3] = f32::NAN;
        frame[7] = f32::INFINITY;
        frame[9] = f32::MAX;
        let mut s = Spectrum::new(64);
        s.process(&frame);
        assert!(s.power().iter().all(|p| p.is_finite()));
    }

    #[test]
    fn process_does_not_allocate() {
        let mut s = Spectrum::new(2048);
        let frame = vec![0.25_f32; 2048];
        assert_no_alloc::assert_no_alloc(|| s.process(&frame));
        assert!(s.magnitude()[0] > 0.0);
    }
}
