//! Band layouts defined in Hz, built into sparse triangular filterbanks for one sample rate and
//! frame length.
//!
//! A layout ([`BandLayout`]) names its bands by their frequencies, so the same layout (and so a
//! palette defined on it) means the same thing at every sample rate; [`Filterbank::new`] turns it
//! into weights over the bins of one FFT size. Two families:
//!
//! - **mel** ([`BandLayout::Mel`]): triangles evenly spaced on the mel scale, on either the
//!   Slaney scale (linear below 1 kHz, logarithmic above: M. Slaney, *Auditory Toolbox*, Interval
//!   Research Technical Report 1998-010) or the HTK scale (`2595·log10(1 + f/700)`: S. Young et
//!   al., *The HTK Book*). With Slaney normalisation the weights are, bit for bit up to float32
//!   rounding, those of librosa 0.11.0 `filters.mel` (which stores them as float32);
//! - **log-frequency** ([`BandLayout::LogFrequency`]): triangles whose centres are a fixed
//!   fraction of an octave apart, `fmin·2^(k / bands_per_octave)`.
//!
//! Every filterbank is stored as one contiguous run of non-zero weights per band, so applying it
//! costs about two multiply-adds per FFT bin and never allocates.

use thiserror::Error;

/// A mel scale: how frequency in Hz maps to mels.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub enum MelScale {
    /// Slaney's Auditory Toolbox scale: linear (66.67 Hz per mel) below 1 kHz, logarithmic
    /// (27 mels per factor 6.4) above; librosa 0.11.0's default (`htk=False`).
    #[default]
    Slaney,
    /// The HTK scale, `2595·log10(1 + f/700)` (Young et al., *The HTK Book*; librosa `htk=True`).
    Htk,
}

/// How each triangular band's weights are scaled.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, serde::Serialize)]
pub enum BandNorm {
    /// Each triangle has a peak of 1 (librosa 0.11.0 `filters.mel(norm=None)`).
    Peak,
    /// Each triangle is divided by half its width in Hz, `2 / (f_hi − f_lo)`, so every band has
    /// about the same area (Slaney's Auditory Toolbox; librosa 0.11.0 `norm="slaney"`, its default).
    #[default]
    Slaney,
}

/// A set of bands defined in Hz, independent of sample rate and FFT size.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub enum BandLayout {
    /// `bands` triangles evenly spaced in mels between `fmin_hz` and `fmax_hz` (librosa 0.11.0
    /// `filters.mel`: the band edges are `bands + 2` points `mel_frequencies(bands + 2, fmin,
    /// fmax)`; band `i` rises from point `i` to point `i + 1` and falls to point `i + 2`).
    Mel {
        /// Number of bands (librosa's default is 128).
        bands: usize,
        /// Lowest edge, Hz (librosa's default is 0).
        fmin_hz: f64,
        /// Highest edge, Hz; `None` means the Nyquist frequency of the sample rate it is built for
        /// (librosa's default).
        fmax_hz: Option<f64>,
        /// Which mel scale spaces the bands.
        scale: MelScale,
        /// How the triangles are scaled.
        norm: BandNorm,
    },
    /// Triangles centred `1 / bands_per_octave` octave apart: the edge points are
    /// `fmin_hz·2^(j / bands_per_octave)` for every `j` with a point at or below `fmax_hz`, and
    /// band `i` spans points `i`, `i + 1`, `i + 2` (so it is centred on point `i + 1`).
    LogFrequency {
        /// The lowest edge point, Hz.
        fmin_hz: f64,
        /// The highest allowed edge point, Hz; `None` means the Nyquist frequency.
        fmax_hz: Option<f64>,
        /// Bands per octave (for example 3 for third-octave bands).
        bands_per_octave: f64,
        /// How the triangles are scaled.
        norm: BandNorm,
    },
}

impl BandLayout {
    /// librosa 0.11.0's default mel layout: 128 Slaney-scale bands from 0 Hz to Nyquist with
    /// Slaney normalisation.
    pub const LIBROSA_MEL: Self = Self::Mel {
        bands: 128,
        fmin_hz: 0.0,
        fmax_hz: None,
        scale: MelScale::Slaney,
        norm: BandNorm::Slaney,
    };
}

/// Why a band layout could not be built.
#[derive(Debug, Clone, Copy, PartialEq, Error)]
pub enum BandsError {
    /// The sample rate is not a positive finite number.
    #[error("sample rate {sample_rate_hz} Hz is not positive and finite")]
    SampleRate {
        /// The refused sample rate, Hz.
        sample_rate_hz: f64,
    },
    /// The FFT size is below 2.
    #[error("FFT size {n_fft} is below 2")]
    FftSize {
        /// The refused FFT size, samples.
        n_fft: usize,
    },
    /// The frequency range is empty, negative, above Nyquist or not finite.
    #[error("band range {fmin_hz}..{fmax_hz} Hz is not inside 0..={nyquist_hz} Hz")]
    Range {
        /// The lowest edge asked for, Hz.
        fmin_hz: f64,
        /// The highest edge asked for (or Nyquist), Hz.
        fmax_hz: f64,
        /// The Nyquist frequency, Hz.
        nyquist_hz: f64,
    },
    /// The layout would have no band, or more than [`MAX_BANDS`].
    #[error("the layout has {bands} bands; 1..={max} are allowed", max = MAX_BANDS)]
    BandCount {
        /// The number of bands the layout asks for (or would make).
        bands: usize,
    },
    /// `bands_per_octave` is not a positive finite number.
    #[error("{bands_per_octave} bands per octave is not positive and finite")]
    BandsPerOctave {
        /// The refused value.
        bands_per_octave: f64,
    },
}

/// The most bands a layout may have.
pub const MAX_BANDS: usize = 4096;

/// Converts Hz to mels on `scale` (librosa 0.11.0 `hz_to_mel`, same operations in the same
/// order, so results agree to the last bit where the math library does).
pub fn hz_to_mel(hz: f64, scale: MelScale) -> f64 {
    match scale {
        MelScale::Htk => 2595.0 * (1.0 + hz / 700.0).log10(),
        MelScale::Slaney => {
            let f_min = 0.0;
            let f_sp = 200.0 / 3.0;
            let min_log_hz = 1000.0;
            let min_log_mel = (min_log_hz - f_min) / f_sp;
            let logstep = 6.4_f64.ln() / 27.0;
            if hz >= min_log_hz {
                min_log_mel + (hz / min_log_hz).ln() / logstep
            } else {
                (hz - f_min) / f_sp
            }
        }
    }
}

/// Converts mels on `scale` to Hz (librosa 0.11.0 `mel_to_hz`; the inverse of [`hz_to_mel`]).
pub fn mel_to_hz(mel: f64, scale: MelScale) -> f64 {
    match scale {
        MelScale::Htk => 700.0 * (10.0_f64.powf(mel / 2595.0) - 1.0),
        MelScale::Slaney => {
            let f_min = 0.0;
            let f_sp = 200.0 / 3.0;
            let min_log_hz = 1000.0;
            let min_log_mel = (min_log_hz - f_min) / f_sp;
            let logstep = 6.4_f64.ln() / 27.0;
            if mel >= min_log_mel {
                min_log_hz * (logstep * (mel - min_log_mel)).exp()
            } else {
                f_min + f_sp * mel
            }
        }
    }
}

/// `n` points evenly spaced in mels from `fmin_hz` to `fmax_hz`, in Hz (librosa 0.11.0
/// `mel_frequencies`, with numpy 2's `linspace` arithmetic: `start + i·step`, last point exact).
pub fn mel_frequencies(n: usize, fmin_hz: f64, fmax_hz: f64, scale: MelScale) -> Vec<f64> {
    let lo = hz_to_mel(fmin_hz, scale);
    let hi = hz_to_mel(fmax_hz, scale);
    linspace(lo, hi, n)
        .into_iter()
        .map(|m| mel_to_hz(m, scale))
        .collect()
}

/// numpy 2.2 `linspace(start, stop, n)` with `endpoint=True`.
fn linspace(start: f64, stop: f64, n: usize) -> Vec<f64> {
    if n == 0 {
        return Vec::new();
    }
    if n == 1 {
        return vec![start];
    }
    let div = (n - 1) as f64;
    let step = (stop - start) / div;
    let mut out: Vec<f64> = (0..n).map(|i| i as f64 * step + start).collect();
    out[n - 1] = stop;
    out
}

/// The centre frequency of every FFT bin, Hz: `k · sr / n_fft` for `k` in `0..=n_fft/2`
/// (librosa 0.11.0 `fft_frequencies`, i.e. numpy `rfftfreq(n_fft, 1/sr)`, same arithmetic).
pub fn fft_frequencies(sample_rate_hz: f64, n_fft: usize) -> Vec<f64> {
    let val = 1.0 / (n_fft as f64 * (1.0 / sample_rate_hz));
    (0..=n_fft / 2).map(|k| k as f64 * val).collect()
}

/// One band's non-zero weights: `weights[offset..offset + len]` apply to bins `start..start + len`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Row {
    start: usize,
    offset: usize,
    len: usize,
}

/// A layout built for one sample rate and FFT size: sparse rows of float32 weights over the
/// `n_fft / 2 + 1` bins of a one-sided spectrum.
#[derive(Debug, Clone, PartialEq)]
pub struct Filterbank {
    rows: Vec<Row>,
    weights: Vec<f32>,
    centers_hz: Vec<f64>,
    n_bins: usize,
}

impl Filterbank {
    /// Builds `layout` for spectra of `n_fft`-sample frames at `sample_rate_hz`.
    ///
    /// Bands too narrow to hold a bin come out empty (all-zero weights), as in librosa 0.11.0,
    /// which only warns about them.
    pub fn new(layout: &BandLayout, sample_rate_hz: f64, n_fft: usize) -> Result<Self, BandsError> {
        if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
            return Err(BandsError::SampleRate { sample_rate_hz });
        }
        if n_fft < 2 {
            return Err(BandsError::FftSize { n_fft });
        }
        let nyquist_hz = sample_rate_hz / 2.0;
        let check_range = |fmin_hz: f64, fmax_hz: f64| {
            let ok = fmin_hz.is_finite()
                && fmax_hz.is_finite()
                && fmin_hz >= 0.0
                && fmin_hz < fmax_hz
                && fmax_hz <= nyquist_hz;
            if ok {
                Ok(())
            } else {
                Err(BandsError::Range {
                    fmin_hz,
                    fmax_hz,
                    nyquist_hz,
                })
            }
        };
        let (points, norm) = match *layout {
            BandLayout::Mel {
                bands,
                fmin_hz,
                fmax_hz,
                scale,
                norm,
            } => {
                let fmax_hz = fmax_hz.unwrap_or(nyquist_hz);
                check_range(fmin_hz, fmax_hz)?;
                if !(1..=MAX_BANDS).contains(&bands) {
                    return Err(BandsError::BandCount { bands });
                }
                (mel_frequencies(bands + 2, fmin_hz, fmax_hz, scale), norm)
            }
            BandLayout::LogFrequency {
                fmin_hz,
                fmax_hz,
                bands_per_octave,
                norm,
            } => {
                let fmax_hz = fmax_hz.unwrap_or(nyquist_hz);
                check_range(fmin_hz, fmax_hz)?;
                if fmin_hz <= 0.0 {
                    return Err(BandsError::Range {
                        fmin_hz,
                        fmax_hz,
                        nyquist_hz,
                    });
                }
                if !(bands_per_octave.is_finite() && bands_per_octave > 0.0) {
                    return Err(BandsError::BandsPerOctave { bands_per_octave });
                }
                let octaves = (fmax_hz / fmin_hz).log2();
                // A little slack so an fmax that is an exact number of steps above fmin is kept.
                let steps = (octaves * bands_per_octave + 1e-9).floor();
                let points = steps as usize + 1;
                if points < 3 || points - 2 > MAX_BANDS {
                    return Err(BandsError::BandCount {
                        bands: points.saturating_sub(2),
                    });
                }
                let points: Vec<f64> = (0..points)
                    .map(|j| fmin_hz * 2f64.powf(j as f64 / bands_per_octave))
                    .collect();
                (points, norm)
            }
        };
        Ok(Self::triangles(
            &points,
            norm,
            &fft_frequencies(sample_rate_hz, n_fft),
        ))
    }

    /// Triangles over edge points (Hz) on bins at `freqs` (Hz), with librosa 0.11.0
    /// `filters.mel`'s arithmetic: weights rounded to float32, then scaled in float64 and rounded
    /// again.
    fn triangles(points: &[f64], norm: BandNorm, freqs: &[f64]) -> Self {
        let bands = points.len() - 2;
        let mut rows = Vec::with_capacity(bands);
        let mut weights = Vec::new();
        let mut dense = vec![0.0_f32; freqs.len()];
        for i in 0..bands {
            let fdiff_lo = points[i + 1] - points[i];
            let fdiff_hi = points[i + 2] - points[i + 1];
            let enorm = match norm {
                BandNorm::Peak => None,
                BandNorm::Slaney => Some(2.0 / (points[i + 2] - points[i])),
            };
            for (w, &f) in dense.iter_mut().zip(freqs) {
                let lower = -(points[i] - f) / fdiff_lo;
                let upper = (points[i + 2] - f) / fdiff_hi;
                let tri = 0.0_f64.max(lower.min(upper)) as f32;
                *w = match enorm {
                    Some(e) => (f64::from(tri) * e) as f32,
                    None => tri,
                };
            }
            let start = dense.iter().position(|&w| w > 0.0).unwrap_or(0);
            let end = dense
                .iter()
                .rposition(|&w| w > 0.0)
                .map_or(start, |e| e + 1);
            rows.push(Row {
                start,
                offset: weights.len(),
                len: end - start,
            });
            weights.extend_from_slice(&dense[start..end]);
        }
        Self {
            rows,
            weights,
            centers_hz: points[1..=bands].to_vec(),
            n_bins: freqs.len(),
        }
    }

    /// Number of bands.
    pub fn len(&self) -> usize {
        self.rows.len()
    }

    /// Whether the filterbank has no band (never true for a built layout).
    pub fn is_empty(&self) -> bool {
        self.rows.is_empty()
    }

    /// Number of spectrum bins the filterbank expects, `n_fft / 2 + 1`.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }

    /// The centre (peak) frequency of each band, Hz.
    pub fn centers_hz(&self) -> &[f64] {
        &self.centers_hz
    }

    /// Band `band`'s non-zero weights and the first bin they apply to (empty for an empty band).
    ///
    /// # Panics
    /// If `band >= self.len()`.
    pub fn row(&self, band: usize) -> (usize, &[f32]) {
        let r = self.rows[band];
        (r.start, &self.weights[r.offset..r.offset + r.len])
    }

    /// The full `len() × n_bins()` weight matrix, row by row (for tests and plots; allocates).
    pub fn to_dense(&self) -> Vec<Vec<f32>> {
        (0..self.len())
            .map(|b| {
                let mut row = vec![0.0; self.n_bins];
                let (start, w) = self.row(b);
                row[start..start + w.len()].copy_from_slice(w);
                row
            })
            .collect()
    }

    /// Band energies of one spectrum: `out[b] = Σ_k w[b][k] · spectrum[k]`, summed in float32
    /// like librosa 0.11.0 `feature.melspectrogram` (whose filterbank and power spectrum are both
    /// float32). Feed it a power spectrum for librosa's mel spectrogram. Does not allocate.
    ///
    /// # Panics
    /// If `spectrum.len() != self.n_bins()` or `out.len() != self.len()`.
    pub fn apply(&self, spectrum: &[f32], out: &mut [f32]) {
        assert_eq!(spectrum.len(), self.n_bins, "spectrum length");
        assert_eq!(out.len(), self.rows.len(), "output length");
        for (o, r) in out.iter_mut().zip(&self.rows) {
            let w = &self.weights[r.offset..r.offset + r.len];
            let s = &spectrum[r.start..r.start + r.len];
            *o = dot_f32(w, s);
        }
    }
}

/// A float32 dot product with eight independent partial sums (so it vectorises).
fn dot_f32(a: &[f32], b: &[f32]) -> f32 {
    let mut acc = [0.0_f32; 8];
    let mut ca = a.chunks_exact(8);
    let mut cb = b.chunks_exact(8);
    for (x, y) in (&mut ca).zip(&mut cb) {
        for i in 0..8 {
            acc[i] += x[i] * y[i];
        }
    }
    let mut tail = 0.0;
    for (x, y) in ca.remainder().iter().zip(cb.remainder()) {
        tail += x * y;
    }
    ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7])) + tail
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn slaney_scale_is_linear_below_1khz_and_log_above() {
        // Slaney's Auditory Toolbox: 200/3 Hz per mel up to 1 kHz (15 mels), then 27 mels per
        // factor 6.4 in frequency.
        assert!((hz_to_mel(1000.0, MelScale::Slaney) - 15.0).abs() < 1e-12);
        assert!((hz_to_mel(500.0, MelScale::Slaney) - 7.5).abs() < 1e-12);
        assert!((hz_to_mel(6400.0, MelScale::Slaney) - 42.0).abs() < 1e-9);
        for hz in [0.0, 10.0, 999.0, 1000.0, 1001.0, 8000.0, 96_000.0] {
            for scale in [MelScale::Slaney, MelScale::Htk] {
                let back = mel_to_hz(hz_to_mel(hz, scale), scale);
                assert!((back - hz).abs() <= 1e-9 * hz.max(1.0), "{scale:?} {hz}");
            }
        }
    }

    #[test]
    fn htk_scale_reads_1000_mels_near_1khz() {
        // HTK Book: mel(f) = 2595·log10(1 + f/700), about 1000 mels at 1 kHz.
        assert!((hz_to_mel(1000.0, MelScale::Htk) - 999.985_6).abs() < 1e-3);
        assert_eq!(hz_to_mel(0.0, MelScale::Htk), 0.0);
    }

    #[test]
    fn fft_frequencies_span_dc_to_nyquist() {
        let f = fft_frequencies(48_000.0, 2048);
        assert_eq!(f.len(), 1025);
        assert_eq!(f[0], 0.0);
        assert_eq!(f[1024], 24_000.0);
        assert!((f[1] - 23.4375).abs() < 1e-12);
    }

    #[test]
    fn peak_normalised_triangles_sum_to_one_between_centres() {
        // Adjacent triangles that share edge points cross-fade: inside the span of the centres,
        // the peak-normalised weights of each bin sum to 1.
        let layout = BandLayout::Mel {
            bands: 40,
            fmin_hz: 0.0,
            fmax_hz: None,
            scale: MelScale::Htk,
            norm: BandNorm::Peak,
        };
        let fb = Filterbank::new(&layout, 16_000.0, 1024).expect("valid");
        let dense = fb.to_dense();
        let freqs = fft_frequencies(16_000.0, 1024);
        let (lo, hi) = (fb.centers_hz()[0], fb.centers_hz()[39]);
        for (k, &f) in freqs.iter().enumerate() {
            if f >= lo && f <= hi {
                let s: f32 = dense.iter().map(|r| r[k]).sum();
                assert!((s - 1.0).abs() < 1e-5, "bin {k} ({f} Hz): {s}");
            }
        }
    }

    #[test]
    fn slaney_norm_gives_equal_area_per_band() {
        // Slaney normalisation divides a triangle of base (f_hi − f_lo) by half its base, so each
        // band's area in Hz is 1; summed over bins of width Δf it is ≈ 1/Δf.
        let fb = Filterbank::new(&BandLayout::LIBROSA_MEL, 44_100.0, 8192).expect("valid");
        let df = 44_100.0 / 8192.0;
        for b in 20..128 {
            let (_, w) = fb.row(b);
            let area: f64 = w.iter().map(|&v| f64::from(v) * df).sum();
            assert!((area - 1.0).abs() < 0.02, "band {b}: {area}");
        }
    }

    #[test]
    fn apply_equals_dense_product() {
        let fb = Filterbank::new(&BandLayout::LIBROSA_MEL, 22_050.0, 2048).expect("valid");
        let spectrum: Vec<f32> = (0..1025).map(|k| ((k * 37 % 101) as f32) * 0.01).collect();
        let mut out = vec![0.0; 128];
        fb.apply(&spectrum, &mut out);
        for (b, row) in fb.to_dense().iter().enumerate() {
            let want: f64 = row
                .iter()
                .zip(&spectrum)
                .map(|(&w, &s)| f64::from(w) * f64::from(s))
                .sum();
            assert!(
                (f64::from(out[b]) - want).abs() <= 1e-5 * want.abs() + 1e-12,
                "{b}"
            );
        }
    }

    #[test]
    fn log_frequency_layout_is_octave_spaced_at_any_rate() {
        let layout = BandLayout::LogFrequency {
            fmin_hz: 62.5,
            fmax_hz: Some(8000.0),
            bands_per_octave: 3.0,
            norm: BandNorm::Peak,
        };
        for sr in [22_050.0, 48_000.0, 192_000.0] {
            let fb = Filterbank::new(&layout, sr, 4096).expect("valid");
            // 7 octaves at 3 per octave: 22 points, 20 bands centred on points 1..=20.
            assert_eq!(fb.len(), 20, "{sr}");
            for pair in fb.centers_hz().windows(2) {
                assert!((pair[1] / pair[0] - 2f64.powf(1.0 / 3.0)).abs() < 1e-12);
            }
        }
    }

    #[test]
    fn bad_layouts_are_refused_with_their_values() {
        let mel = |bands, fmax| BandLayout::Mel {
            bands,
            fmin_hz: 0.0,
            fmax_hz: fmax,
            scale: MelScale::Slaney,
            norm: BandNorm::Slaney,
        };
        assert_eq!(
            Filterbank::new(&mel(0, None), 48_000.0, 2048),
            Err(BandsError::BandCount { bands: 0 })
        );
        assert!(matches!(
            Filterbank::new(&mel(10, Some(30_000.0)), 48_000.0, 2048),
            Err(BandsError::Range { .. })
        ));
        assert!(matches!(
            Filterbank::new(&mel(10, None), f64::NAN, 2048),
            Err(BandsError::SampleRate { .. })
        ));
        assert!(matches!(
            Filterbank::new(&mel(10, None), 48_000.0, 1),
            Err(BandsError::FftSize { n_fft: 1 })
        ));
    }
}
