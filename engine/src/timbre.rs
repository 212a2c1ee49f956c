//! Per-frame timbre descriptors, computed the way librosa 0.11.0 computes them.
//!
//! [`Timbre::describe`] turns one frame of the analysis signal into a [`Descriptors`] value: the
//! mel power spectrum, 20 MFCCs, spectral centroid, bandwidth, roll-off (at 85 % and at a
//! configurable fraction), flatness, octave-band contrast and valleys, flux (librosa's onset
//! strength), zero-crossing rate and RMS. All tables (window, FFT plan, mel filterbank as sparse
//! rows, DCT matrix, contrast bands) are built in [`Timbre::new`]; describing a frame never
//! allocates.
//!
//! # Using it
//!
//! Most callers do not use [`Timbre`] directly but the [`crate::Analyzer`], which frames any
//! block size into librosa's centred frames and reports a [`crate::FrameResult`] per frame whose
//! `descriptors` field is a [`Descriptors`]:
//!
//! - **live** (plugin, standalone): [`crate::Analyzer::process`] block by block; frames come out
//!   as soon as they are complete, with the *live* dB convention below.
//! - **offline, equal to librosa** (command-line tool, reference tests):
//!   [`crate::Analyzer::analyze_clip`] on the whole clip returns every frame (librosa's
//!   `center=True` framing: `1 + len / hop` frames, frame `k` centred on sample `k·hop`, time
//!   `k·hop / sr` seconds) with librosa's whole-clip dB floor applied, so each field equals
//!   librosa's function named in its documentation. [`Timbre::describe_clip`] does the same for
//!   descriptors alone (no level, no times).
//!
//! [`Descriptors`] implements `serde::Serialize` with unit-bearing field names (`centroid_hz`,
//! `mfcc` as an array, …), one JSON object per frame. For `weft analyze FILE --frames --json`:
//!
//! ```text
//! let settings = AnalysisSettings::new(sample_rate_hz, FrameConfig::new(frame_len, hop_len)?)?;
//! for f in Analyzer::new(settings).analyze_clip(&mid, Some(&side)) {
//!     // {"t": f.time_s, "descriptors": f.descriptors, …}: serde_json::to_string(&f.descriptors)
//! }
//! ```
//!
//! Per-band rows: `mel_power` has [`N_MELS`] Slaney mel bands (centres in
//! [`Timbre::mel_filterbank`]); `contrast_db` and `valley_db` have [`N_CONTRAST`] bands — below
//! 200 Hz, 200–400, 400–800, 800–1600, 1600–3200, 3200–6400 Hz and 6400 Hz to Nyquist (librosa's
//! `n_bands = 6` octaves plus the band above them, 7 rows) — with the valley level of each band
//! alongside its contrast.
//!
//! # Conventions (librosa 0.11.0, with its defaults)
//!
//! The spectrum is [`crate::spectrum`]'s: periodic Hann window, float64 FFT rounded to
//! complex64, magnitude `|X|` and power `|X|²` in float32, bins DC to Nyquist. Centroid,
//! bandwidth, roll-off and contrast use the magnitude (librosa's `power=1` default); mel, MFCC,
//! flux and flatness use the power. dB values are `10·log10(max(amin, x))` with
//! `amin = 1e-10` ([`AMIN_POWER`]) and `ref = 1`, so they floor at −100 dB ([`DB_FLOOR`]).
//!
//! # Precision of each step
//!
//! Each step computes in the precision librosa 0.11.0 stores its result in, or in float64 where
//! that is as cheap and at least as close:
//!
//! - window × frame and FFT: float64 (librosa multiplies the float32 frame by a float64 window,
//!   so its FFT runs in float64; a float32 FFT would put its rounding floor above `amin` for
//!   loud clean frames, see [`crate::spectrum`]); bins rounded to complex64 as librosa stores
//!   them; magnitude `|X|` in float64 rounded to float32, power its float32 square;
//! - mel power: float32 sums (librosa's float32 `melspectrogram`);
//! - dB: float64 logarithm rounded to float32 for the mel bands (float32 `power_to_db`), kept in
//!   float64 for the contrast peaks and valleys;
//! - MFCC: float64 DCT sums rounded to float32; flux: float32 differences, float64 mean;
//! - centroid and bandwidth: float64 moments; roll-off: the float32 running sum taken in the
//!   same order as librosa's float32 `cumsum`, so the chosen bin is the same;
//! - flatness: float64 log-sum and mean (closer than librosa's float32 logarithms; the two agree
//!   to float32 precision); contrast: float32 sums of the band extremes as numpy's float32 `mean`;
//! - zero-crossing rate: an exact count; RMS: float64 sum of squares rounded to float32.
//!
//! # Where live and offline differ, by nature
//!
//! librosa's `power_to_db` (used by `feature.mfcc`, `onset.onset_strength` and
//! `feature.spectral_contrast`) also applies `top_db = 80`: every dB value is raised to at least
//! *the whole clip's maximum* minus 80 dB. A live stream has no whole clip, so:
//!
//! - **live** ([`crate::Analyzer::process`]): no `top_db` floor, only the −100 dB `amin` floor,
//!   i.e. librosa's `power_to_db(S, top_db=None)`. This depends on nothing but the frame (and, for
//!   flux, the frames before it), so it never drifts and is the same for any block size;
//! - **offline** ([`crate::Analyzer::analyze_clip`], [`Timbre::describe_clip`],
//!   [`Timbre::apply_clip_floor`]): the frames are computed as live while each frame's unfloored
//!   values are kept ([`FloorRecord`]), then MFCC, flux, contrast and valleys are recomputed where
//!   the clip-wide floor changes them, which reproduces librosa exactly.
//!
//! The two agree whenever no value of the clip is more than 80 dB below the clip's loudest
//! (typical for music; not for clean test tones, whose spectra fall far below that).
//! Everything else (mel power, centroid, bandwidth, roll-off, flatness, zero-crossing rate, RMS)
//! is the same in both.
//!
//! # Defined values for silence and poison
//!
//! No field is ever NaN or infinite. For digital silence: mel power 0, MFCC 0 except
//! `mfcc[0] = −100·√128 ≈ −1131.37` (the DCT of a flat −100 dB spectrum), centroid, bandwidth and
//! roll-off 0 Hz (librosa's results), flatness 1 (all bins at `amin`), contrast 0 dB, valleys
//! −100 dB, flux 0 dB, zero-crossing rate 0, RMS 0. Non-finite samples read as 0 and samples
//! beyond ±[`crate::spectrum::SAMPLE_LIMIT`] are clamped. Where librosa would refuse (a contrast
//! band with no bin, or whose lower edge is at or above Nyquist, as at sample rates up to
//! 12.8 kHz), that band reads 0 dB contrast and a −100 dB valley.

use crate::bands::{BandLayout, BandNorm, BandsError, Filterbank, MelScale, fft_frequencies};
use crate::frames::FrameConfig;
use crate::spectrum::{Spectrum, sanitize};
use serde::{Serialize, Serializer};
use std::ops::Range;
use thiserror::Error;

/// Mel bands in [`Descriptors::mel_power`] (librosa 0.11.0 `n_mels` default).
pub const N_MELS: usize = 128;
/// MFCCs in [`Descriptors::mfcc`] (librosa 0.11.0 `n_mfcc` default).
pub const N_MFCC: usize = 20;
/// Octave bands of spectral contrast above the lowest band (librosa 0.11.0 `n_bands` default).
pub const CONTRAST_OCTAVES: usize = 6;
/// Contrast bands reported: the band below [`CONTRAST_FMIN_HZ`], the [`CONTRAST_OCTAVES`] octaves
/// above it, the last one extended to Nyquist (librosa 0.11.0 returns `n_bands + 1` rows).
pub const N_CONTRAST: usize = CONTRAST_OCTAVES + 1;
/// Lower edge of the first contrast octave, Hz (librosa 0.11.0 `fmin` default).
pub const CONTRAST_FMIN_HZ: f64 = 200.0;
/// Fraction of a band's bins averaged for its peak and its valley (librosa 0.11.0 `quantile`).
pub const CONTRAST_QUANTILE: f64 = 0.02;
/// The smallest power converted to dB (librosa 0.11.0 `power_to_db` `amin`; also the floor of
/// `spectral_flatness`).
pub const AMIN_POWER: f32 = 1e-10;
/// The lowest dB value reported, `10·log10(AMIN_POWER)`, dB.
pub const DB_FLOOR: f32 = -100.0;
/// The whole-clip dynamic range librosa 0.11.0 `power_to_db` keeps (`top_db`), dB.
pub const TOP_DB: f32 = 80.0;
/// Roll-off fraction of [`Descriptors::rolloff_hz`] (librosa 0.11.0 `roll_percent` default).
pub const ROLLOFF_FRACTION: f64 = 0.85;
/// Default fraction of [`Descriptors::rolloff_custom_hz`] (0.95: common practice).
pub const ROLLOFF_CUSTOM_FRACTION: f64 = 0.95;
/// Samples whose magnitude is at most this count as zero when counting zero crossings
/// (librosa 0.11.0 `zero_crossings` `threshold`, compared in float32).
pub const ZERO_CROSSING_THRESHOLD: f32 = 1e-10;

/// The choices a user may make about the descriptors; everything else follows librosa.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct TimbreOptions {
    /// Energy fraction of [`Descriptors::rolloff_custom_hz`], strictly between 0 and 1.
    pub rolloff_custom_fraction: f64,
    /// The mel scale of [`Descriptors::mel_power`] and the MFCCs (librosa's default: Slaney).
    pub mel_scale: MelScale,
}

impl Default for TimbreOptions {
    fn default() -> Self {
        Self {
            rolloff_custom_fraction: ROLLOFF_CUSTOM_FRACTION,
            mel_scale: MelScale::Slaney,
        }
    }
}

/// Why timbre settings were refused.
#[derive(Debug, Clone, Copy, PartialEq, Error)]
pub enum TimbreError {
    /// The custom roll-off fraction is not strictly between 0 and 1.
    #[error("roll-off fraction {fraction} is not strictly between 0 and 1")]
    RolloffFraction {
        /// The refused fraction.
        fraction: f64,
    },
    /// The mel filterbank cannot be built for this sample rate and frame length.
    #[error("cannot build the mel bands")]
    Bands(#[from] BandsError),
}

/// Everything measured on one frame. Fixed size and `Copy`, so it can travel in snapshots.
///
/// Each field names the librosa 0.11.0 function it equals (called with `n_fft` = frame length,
/// `hop_length` = hop, and otherwise default arguments) on the offline path
/// ([`crate::Analyzer::analyze_clip`]); see the module documentation for the live path.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Descriptors {
    /// Mel power spectrum: energy of each of [`N_MELS`] Slaney-normalised mel bands from 0 Hz to
    /// Nyquist, in units of `|X|²` (librosa `feature.melspectrogram`, float32).
    #[serde(serialize_with = "serialize_array")]
    pub mel_power: [f32; N_MELS],
    /// Mel-frequency cepstral coefficients: DCT-II (orthonormal) of the mel power in dB, first
    /// [`N_MFCC`] (librosa `feature.mfcc`; Davis & Mermelstein 1980).
    pub mfcc: [f32; N_MFCC],
    /// Spectral centroid, Hz: magnitude-weighted mean frequency (librosa
    /// `feature.spectral_centroid`).
    pub centroid_hz: f32,
    /// Spectral bandwidth (p = 2), Hz: magnitude-weighted standard deviation of frequency about
    /// the centroid (librosa `feature.spectral_bandwidth`).
    pub bandwidth_hz: f32,
    /// Roll-off, Hz: the lowest bin frequency below which (inclusive) 85 % of the summed magnitude
    /// lies (librosa `feature.spectral_rolloff`, `roll_percent=0.85`).
    pub rolloff_hz: f32,
    /// Roll-off at [`TimbreOptions::rolloff_custom_fraction`] (0.95 by default), Hz (librosa
    /// `feature.spectral_rolloff` with that `roll_percent`).
    pub rolloff_custom_hz: f32,
    /// Spectral flatness, 0–1: geometric over arithmetic mean of the power, each bin floored at
    /// [`AMIN_POWER`] (librosa `feature.spectral_flatness`; Dubnov 2004).
    pub flatness: f32,
    /// Spectral contrast per band, dB: peak minus valley level, each the mean magnitude of the
    /// top or bottom 2 % of the band's bins (librosa `feature.spectral_contrast`; Jiang et al.
    /// 2002). Bands: below 200 Hz, then octaves from 200 Hz, the last extended to Nyquist.
    pub contrast_db: [f32; N_CONTRAST],
    /// Valley level per contrast band, dB: `10·log10` of the mean of the band's lowest 2 % of
    /// magnitudes (the `power_to_db(valley)` term inside librosa `feature.spectral_contrast`;
    /// offline floored at the clip's highest valley − 80 dB as there, live at −100 dB).
    pub valley_db: [f32; N_CONTRAST],
    /// Spectral flux, dB: librosa `onset.onset_strength` — the mean over mel bands of the rise
    /// in mel dB from one frame to the next (falls count as 0), reported
    /// `1 + frame_len / (2·hop)` frames after the later of the two frames, as librosa shifts it
    /// (0 for the first frames).
    pub flux_db: f32,
    /// Zero crossings per sample, 0–1: sign changes between neighbouring samples divided by the
    /// frame length, samples within ±[`ZERO_CROSSING_THRESHOLD`] counting as positive, the clip's
    /// edges extended with its first and last samples (librosa `feature.zero_crossing_rate`).
    pub zero_crossings_per_sample: f32,
    /// Root-mean-square amplitude of the frame, linear (1.0 = full scale), zero-padded at the
    /// clip's edges (librosa `feature.rms`).
    pub rms: f32,
}

fn serialize_array<S: Serializer, const N: usize>(
    values: &[f32; N],
    serializer: S,
) -> Result<S::Ok, S::Error> {
    serializer.collect_seq(values.iter())
}

/// How many values [`Descriptors::scalars`] returns.
pub const N_SCALARS: usize = 8;

impl Descriptors {
    /// The one-number descriptors, in this order: centroid (Hz), bandwidth (Hz), roll-off (Hz),
    /// custom roll-off (Hz), flatness, flux (dB), zero crossings per sample, RMS (linear).
    pub fn scalars(&self) -> [f32; N_SCALARS] {
        [
            self.centroid_hz,
            self.bandwidth_hz,
            self.rolloff_hz,
            self.rolloff_custom_hz,
            self.flatness,
            self.flux_db,
            self.zero_crossings_per_sample,
            self.rms,
        ]
    }
}

impl Default for Descriptors {
    /// All zeros (not the values of silence: see the module documentation for those).
    fn default() -> Self {
        Self {
            mel_power: [0.0; N_MELS],
            mfcc: [0.0; N_MFCC],
            centroid_hz: 0.0,
            bandwidth_hz: 0.0,
            rolloff_hz: 0.0,
            rolloff_custom_hz: 0.0,
            flatness: 0.0,
            contrast_db: [0.0; N_CONTRAST],
            valley_db: [0.0; N_CONTRAST],
            flux_db: 0.0,
            zero_crossings_per_sample: 0.0,
            rms: 0.0,
        }
    }
}

/// The values of one frame that librosa's whole-clip `top_db` floor acts on, before that floor
/// (only the `amin` floor applied). The offline path keeps one per frame to apply the clip-wide
/// floor exactly ([`Timbre::apply_clip_floor`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FloorRecord {
    /// Mel power in dB, per band (float32, as librosa's `power_to_db` of its float32 mel).
    pub mel_db: [f32; N_MELS],
    /// Contrast peak level per band, dB (float64, as librosa converts it).
    pub peak_db: [f64; N_CONTRAST],
    /// Contrast valley level per band, dB (float64).
    pub valley_db: [f64; N_CONTRAST],
}

impl Default for FloorRecord {
    fn default() -> Self {
        Self {
            mel_db: [DB_FLOOR; N_MELS],
            peak_db: [f64::from(DB_FLOOR); N_CONTRAST],
            valley_db: [f64::from(DB_FLOOR); N_CONTRAST],
        }
    }
}

impl AsMut<Descriptors> for Descriptors {
    fn as_mut(&mut self) -> &mut Descriptors {
        self
    }
}

/// One contrast band in bins: the sub-band `start..end` whose lowest and highest `q` magnitudes
/// are averaged. `q == 0` marks a band librosa would refuse (no bin, or above Nyquist).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
struct ContrastBand {
    start: usize,
    end: usize,
    q: usize,
}

/// The per-frame descriptor extractor. Build once per sample rate and framing.
#[derive(Debug, Clone)]
pub struct Timbre {
    framing: FrameConfig,
    options: TimbreOptions,
    spectrum: Spectrum,
    mel: Filterbank,
    freqs: Vec<f64>,
    /// `freqs²`, Hz².
    freqs_sq: Vec<f64>,
    /// Orthonormal DCT-II rows, first halves, `N_MFCC × N_MELS / 2`, row-major.
    dct: Vec<f64>,
    contrast_bands: [ContrastBand; N_CONTRAST],
    /// Flux values waiting for librosa's shift, indexed by frame number modulo the length.
    flux_delay: Vec<f32>,
    prev_mel_db: [f32; N_MELS],
    frames: u64,
    cumsum: Vec<f32>,
    /// Scratch for the extremes of a contrast band.
    extremes: ExtremeScratch,
    record: FloorRecord,
}

impl Timbre {
    /// Checks `options` for use at `sample_rate_hz` with `framing`, without building anything.
    pub fn check(
        sample_rate_hz: f64,
        framing: FrameConfig,
        options: TimbreOptions,
    ) -> Result<(), TimbreError> {
        let f = options.rolloff_custom_fraction;
        if !(f > 0.0 && f < 1.0) {
            return Err(TimbreError::RolloffFraction { fraction: f });
        }
        if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
            return Err(BandsError::SampleRate { sample_rate_hz }.into());
        }
        if framing.frame_len < 2 {
            return Err(BandsError::FftSize {
                n_fft: framing.frame_len,
            }
            .into());
        }
        Ok(())
    }

    /// Builds the extractor: FFT plan, window, mel filterbank, DCT matrix, contrast bands and
    /// every buffer. The only allocating call.
    pub fn new(
        sample_rate_hz: f64,
        framing: FrameConfig,
        options: TimbreOptions,
    ) -> Result<Self, TimbreError> {
        Self::check(sample_rate_hz, framing, options)?;
        let n_fft = framing.frame_len;
        let layout = BandLayout::Mel {
            bands: N_MELS,
            fmin_hz: 0.0,
            fmax_hz: None,
            scale: options.mel_scale,
            norm: BandNorm::Slaney,
        };
        let mel = Filterbank::new(&layout, sample_rate_hz, n_fft)?;
        let freqs = fft_frequencies(sample_rate_hz, n_fft);
        let contrast_bands = contrast_bands(&freqs, sample_rate_hz);
        let max_len = contrast_bands
            .iter()
            .map(|b| b.end - b.start)
            .max()
            .unwrap_or(0);
        // librosa 0.11.0 onset_strength_multi: pad by lag (1) + n_fft // (2·hop) when centred.
        let shift = 1 + n_fft / (2 * framing.hop_len);
        let bins = freqs.len();
        Ok(Self {
            framing,
            options,
            spectrum: Spectrum::new(n_fft),
            mel,
            freqs_sq: freqs.iter().map(|f| f * f).collect(),
            freqs,
            dct: dct_ortho_matrix(N_MFCC, N_MELS),
            contrast_bands,
            flux_delay: vec![0.0; shift],
            prev_mel_db: [DB_FLOOR; N_MELS],
            frames: 0,
            cumsum: vec![0.0; bins],
            extremes: ExtremeScratch::new(max_len),
            record: FloorRecord::default(),
        })
    }

    /// The framing this extractor was built for.
    pub fn framing(&self) -> FrameConfig {
        self.framing
    }

    /// The options this extractor was built with.
    pub fn options(&self) -> TimbreOptions {
        self.options
    }

    /// The mel filterbank ([`N_MELS`] Slaney-normalised bands, 0 Hz to Nyquist).
    pub fn mel_filterbank(&self) -> &Filterbank {
        &self.mel
    }

    /// How many frames after the later of its two frames a flux value is reported:
    /// `1 + frame_len / (2·hop)` (librosa 0.11.0 `onset_strength` with `center=True`).
    pub fn flux_shift(&self) -> usize {
        self.flux_delay.len()
    }

    /// Forgets the frames seen so far (flux history), as if newly built.
    pub fn reset(&mut self) {
        self.flux_delay.fill(0.0);
        self.prev_mel_db = [DB_FLOOR; N_MELS];
        self.frames = 0;
        self.record = FloorRecord::default();
    }

    /// The last described frame's values before librosa's whole-clip floor (what
    /// [`Timbre::apply_clip_floor`] needs of each frame).
    pub fn floor_record(&self) -> &FloorRecord {
        &self.record
    }

    /// Describes one frame (`frame.len()` = the frame length) with the live dB convention.
    ///
    /// `signal` is the part of the frame that holds the clip's samples rather than centre
    /// padding (all of it except at a clip's edges); only the zero-crossing rate uses it, to
    /// extend the clip with its edge samples as librosa does. Frames must come in order: flux
    /// compares each frame with the one before. Does not allocate.
    ///
    /// # Panics
    /// If `frame.len()` is not the frame length.
    pub fn describe(&mut self, frame: &[f32], signal: Range<usize>, out: &mut Descriptors) {
        self.spectrum.process(frame);
        let (magnitude, power) = (self.spectrum.magnitude(), self.spectrum.power());

        self.mel.apply(power, &mut out.mel_power);
        for (db, &p) in self.record.mel_db.iter_mut().zip(&out.mel_power) {
            *db = power_to_db(p);
        }
        dct(&self.dct, &self.record.mel_db, &mut out.mfcc);
        out.flux_db = flux(
            &mut self.flux_delay,
            &mut self.prev_mel_db,
            &self.record.mel_db,
            self.frames,
        );

        let (centroid, bandwidth) = centroid_bandwidth(magnitude, &self.freqs, &self.freqs_sq);
        out.centroid_hz = centroid as f32;
        out.bandwidth_hz = bandwidth as f32;
        let (r1, r2) = rolloff(
            magnitude,
            &self.freqs,
            &mut self.cumsum,
            ROLLOFF_FRACTION,
            self.options.rolloff_custom_fraction,
        );
        out.rolloff_hz = r1 as f32;
        out.rolloff_custom_hz = r2 as f32;
        out.flatness = flatness(power);

        for (b, band) in self.contrast_bands.iter().enumerate() {
            let (peak, valley) = if band.q == 0 {
                (f64::from(DB_FLOOR), f64::from(DB_FLOOR))
            } else {
                let (p, v) =
                    peak_valley(&magnitude[band.start..band.end], band.q, &mut self.extremes);
                (amplitude_mean_to_db(p), amplitude_mean_to_db(v))
            };
            self.record.peak_db[b] = peak;
            self.record.valley_db[b] = valley;
            out.contrast_db[b] = (peak - valley) as f32;
            out.valley_db[b] = valley as f32;
        }

        let signal = signal.start.min(frame.len())..signal.end.min(frame.len());
        out.zero_crossings_per_sample =
            (zero_crossings(&frame[signal.clone()]) as f64 / frame.len() as f64) as f32;
        out.rms = rms(frame, self.spectrum.sanitized());
        self.frames += 1;
    }

    /// The one-sided power spectrum of the frame [`Timbre::describe`] last measured (`|X|²` of
    /// the Hann-windowed frame, `frame_len / 2 + 1` bins, see [`crate::spectrum`]); zeros
    /// before the first frame. The shares estimator reads it so the FFT runs once per frame.
    pub fn power(&self) -> &[f32] {
        self.spectrum.power()
    }

    /// Describes a whole clip offline, exactly as librosa 0.11.0 does (each field's function is
    /// named on [`Descriptors`]): librosa's centred framing (`1 + len / hop` frames, frame `k`
    /// centred on sample `k·hop`, i.e. at `k·hop / sr` seconds) and its whole-clip `top_db`
    /// floor. Forgets earlier frames first and afterwards. Allocates the result.
    ///
    /// The same descriptors as [`crate::Analyzer::analyze_clip`] gives, without levels or times.
    pub fn describe_clip(&mut self, samples: &[f32]) -> Vec<Descriptors> {
        self.reset();
        let (n, hop) = (self.framing.frame_len, self.framing.hop_len);
        let frames = 1 + samples.len() / hop;
        let mut out = Vec::with_capacity(frames);
        let mut records = Vec::with_capacity(frames);
        // Frames inside the clip are read in place; only those that reach into the centre
        // padding are copied into a zero-padded buffer.
        let mut padded = vec![0.0_f32; n];
        let mut d = Descriptors::default();
        for k in 0..frames {
            let signal = self
                .framing
                .signal_range(k as u64, Some(samples.len() as u64));
            let frame = if signal == (0..n) {
                let start = k * hop - n / 2;
                &samples[start..start + n]
            } else {
                padded.fill(0.0);
                let first = (k * hop + signal.start) - n / 2;
                padded[signal.clone()].copy_from_slice(&samples[first..first + signal.len()]);
                &padded[..]
            };
            self.describe(frame, signal, &mut d);
            out.push(d);
            records.push(self.record);
        }
        self.apply_clip_floor(&mut out, &records);
        self.reset();
        out
    }

    /// Rewrites a whole clip's frames to librosa 0.11.0's whole-clip `top_db = 80` floor.
    ///
    /// `frames` are all the clip's frames in order, described live from the clip's start, and
    /// `records[t]` is the [`Timbre::floor_record`] of frame `t`. MFCC, flux, contrast and valleys
    /// change where a value lies more than 80 dB below the clip's maximum (librosa floors the mel
    /// dB values at their maximum − 80, and the contrast peaks and valleys each at their own);
    /// the other fields never change. Allocates a flag per frame.
    ///
    /// # Panics
    /// If `frames` and `records` differ in length.
    pub fn apply_clip_floor<F: AsMut<Descriptors>>(
        &self,
        frames: &mut [F],
        records: &[FloorRecord],
    ) {
        assert_eq!(frames.len(), records.len(), "one floor record per frame");
        if frames.is_empty() {
            return;
        }
        // Mel dB: librosa's floor is max(log_spec) − top_db, in float32.
        let max_db = records
            .iter()
            .flat_map(|r| r.mel_db.iter())
            .fold(f32::NEG_INFINITY, |m, &v| m.max(v));
        let floor = max_db - TOP_DB;
        let floored = |r: &FloorRecord| -> [f32; N_MELS] {
            let mut db = r.mel_db;
            for d in &mut db {
                *d = d.max(floor);
            }
            db
        };
        let needs: Vec<bool> = records
            .iter()
            .map(|r| r.mel_db.iter().any(|&d| d < floor))
            .collect();
        for ((f, r), &need) in frames.iter_mut().zip(records).zip(&needs) {
            if need {
                dct(&self.dct, &floored(r), &mut f.as_mut().mfcc);
            }
        }
        let s = self.flux_shift();
        for (t, f) in frames.iter_mut().enumerate() {
            let f = f.as_mut();
            if t < s {
                f.flux_db = 0.0;
                continue;
            }
            // librosa raw[t − s] compares frames t − s + 1 and t − s.
            let (later, earlier) = (t + 1 - s, t - s);
            if needs[later] || needs[earlier] {
                f.flux_db = mean_rise(&floored(&records[earlier]), &floored(&records[later]));
            }
        }
        // Contrast: librosa converts the peak and the valley arrays separately, each floored at
        // its own maximum − top_db (float64).
        let max_of = |pick: fn(&FloorRecord) -> &[f64; N_CONTRAST]| {
            records
                .iter()
                .flat_map(|r| pick(r).iter())
                .fold(f64::NEG_INFINITY, |m, &v| m.max(v))
        };
        let peak_floor = max_of(|r| &r.peak_db) - f64::from(TOP_DB);
        let valley_floor = max_of(|r| &r.valley_db) - f64::from(TOP_DB);
        for (f, r) in frames.iter_mut().zip(records) {
            let f = f.as_mut();
            for b in 0..N_CONTRAST {
                let peak = r.peak_db[b].max(peak_floor);
                let valley = r.valley_db[b].max(valley_floor);
                f.contrast_db[b] = (peak - valley) as f32;
                f.valley_db[b] = valley as f32;
            }
        }
    }
}

/// librosa 0.11.0 `power_to_db(x, ref=1, amin=1e-10, top_db=None)` for one float32 value:
/// `10·log10(max(amin, x))`, dB (computed in float64 to about 1e-13 relative, then rounded).
#[inline]
pub fn power_to_db(x: f32) -> f32 {
    let x = if x > AMIN_POWER { x } else { AMIN_POWER };
    (10.0 * std::f64::consts::LOG10_E * ln_positive(f64::from(x))) as f32
}

/// Natural logarithm of a positive normal float64, branch-free so loops over it vectorise:
/// `x = m·2^e` with `m` in `[√½, √2)`, `ln m = 2·atanh(s)`, `s = (m − 1)/(m + 1)`, `|s| ≤ 0.172`,
/// by its series to `s^15` (truncation below 4e-14 relative; Abramowitz & Stegun 4.1.27).
#[inline]
fn ln_positive(x: f64) -> f64 {
    let bits = x.to_bits();
    let e = ((bits >> 52) & 0x7ff) as i64 - 1023;
    let m = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    let big = m > std::f64::consts::SQRT_2;
    let m = if big { 0.5 * m } else { m };
    let e = (e + i64::from(big)) as f64;
    let s = (m - 1.0) / (m + 1.0);
    let z = s * s;
    let series = 1.0
        + z * (1.0 / 3.0
            + z * (1.0 / 5.0
                + z * (1.0 / 7.0
                    + z * (1.0 / 9.0 + z * (1.0 / 11.0 + z * (1.0 / 13.0 + z * (1.0 / 15.0)))))));
    2.0 * s * series + e * std::f64::consts::LN_2
}

/// dB of a contrast peak or valley (a mean magnitude, which librosa converts with `power_to_db`
/// in float64), with the series logarithm of [`power_to_db`] (about 1e-13 relative).
#[inline]
fn amplitude_mean_to_db(x: f64) -> f64 {
    10.0 * std::f64::consts::LOG10_E * ln_positive(x.max(1e-10))
}

/// The first half of each of the first `rows` rows of the orthonormal DCT-II matrix (scipy 1.15
/// `fft.dct(type=2, norm="ortho")`, which librosa 0.11.0 `feature.mfcc` uses):
/// `C[k][n] = s_k·cos(π·k·(2n + 1) / 2N)`, `s_0 = √(1/N)`, `s_k = √(2/N)`. The second half
/// mirrors the first: `C[k][N − 1 − n] = (−1)^k·C[k][n]`.
fn dct_ortho_matrix(rows: usize, n: usize) -> Vec<f64> {
    let mut m = Vec::with_capacity(rows * n / 2);
    for k in 0..rows {
        let scale = if k == 0 {
            (1.0 / n as f64).sqrt()
        } else {
            (2.0 / n as f64).sqrt()
        };
        for i in 0..n / 2 {
            let angle = std::f64::consts::PI * (k * (2 * i + 1)) as f64 / (2 * n) as f64;
            m.push(scale * angle.cos());
        }
    }
    m
}

/// `out = C · db` in float64 (using the mirror symmetry of even and odd rows), rounded to
/// float32.
fn dct(half_matrix: &[f64], db: &[f32; N_MELS], out: &mut [f32; N_MFCC]) {
    const HALF: usize = N_MELS / 2;
    let mut sum = [0.0_f64; HALF];
    let mut diff = [0.0_f64; HALF];
    for i in 0..HALF {
        let (a, b) = (f64::from(db[i]), f64::from(db[N_MELS - 1 - i]));
        sum[i] = a + b;
        diff[i] = a - b;
    }
    for (k, (o, row)) in out
        .iter_mut()
        .zip(half_matrix.chunks_exact(HALF))
        .enumerate()
    {
        let x = if k % 2 == 0 { &sum } else { &diff };
        let mut acc = [0.0_f64; 8];
        for (r, v) in row.chunks_exact(8).zip(x.chunks_exact(8)) {
            for i in 0..8 {
                acc[i] += r[i] * v[i];
            }
        }
        *o = (((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7])))
            as f32;
    }
}

/// The flux of frame `t` (mel dB `mel_db`), delayed by librosa's shift (the length of `delay`).
fn flux(delay: &mut [f32], prev_mel_db: &mut [f32; N_MELS], mel_db: &[f32; N_MELS], t: u64) -> f32 {
    let rise = if t == 0 {
        0.0
    } else {
        mean_rise(prev_mel_db, mel_db)
    };
    *prev_mel_db = *mel_db;
    let s = delay.len() as u64;
    // The rise computed at frame j is librosa's raw[j − 1], reported at frame j − 1 + s.
    delay[(t % s) as usize] = rise;
    if t >= s {
        delay[((t + 1) % s) as usize]
    } else {
        0.0
    }
}

/// Mean over bands of `max(0, later − earlier)` (float32 differences as librosa takes them), dB.
fn mean_rise(earlier: &[f32; N_MELS], later: &[f32; N_MELS]) -> f32 {
    // Eight independent partial sums (N_MELS is a multiple of 8).
    let mut acc = [0.0_f64; 8];
    for (a, b) in earlier.chunks_exact(8).zip(later.chunks_exact(8)) {
        for i in 0..8 {
            acc[i] += f64::from((b[i] - a[i]).max(0.0));
        }
    }
    let sum = ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]));
    (sum / N_MELS as f64) as f32
}

/// Centroid and bandwidth (p = 2) of a magnitude spectrum, Hz (librosa 0.11.0: the magnitudes
/// are divided by their sum unless the sum is below float32's smallest normal, `util.tiny`).
///
/// One pass over the moments `Σm`, `Σm·f`, `Σm·f²` in float64 (`freqs_sq` holds `f²`); the
/// variance `Σm·(f − c)²` is then `Σm·f² − 2c·Σm·f + c²·Σm`, whose cancellation costs about
/// `(c / bandwidth)²` float64 epsilons (below 1e-7 relative for any audio spectrum).
fn centroid_bandwidth(magnitude: &[f32], freqs: &[f64], freqs_sq: &[f64]) -> (f64, f64) {
    // Eight independent partial sums per moment, so the additions are not long dependency
    // chains.
    let mut m0 = [0.0_f64; 8];
    let mut m1 = [0.0_f64; 8];
    let mut m2 = [0.0_f64; 8];
    let mut mc = magnitude.chunks_exact(8);
    let mut fc = freqs.chunks_exact(8);
    let mut qc = freqs_sq.chunks_exact(8);
    for ((m, f), f2) in (&mut mc).zip(&mut fc).zip(&mut qc) {
        for i in 0..8 {
            let m = f64::from(m[i]);
            m0[i] += m;
            m1[i] += m * f[i];
            m2[i] += m * f2[i];
        }
    }
    let sum8 = |a: [f64; 8]| ((a[0] + a[1]) + (a[2] + a[3])) + ((a[4] + a[5]) + (a[6] + a[7]));
    let (mut s0, mut s1, mut s2) = (sum8(m0), sum8(m1), sum8(m2));
    for ((&m, &f), &f2) in mc
        .remainder()
        .iter()
        .zip(fc.remainder())
        .zip(qc.remainder())
    {
        let m = f64::from(m);
        s0 += m;
        s1 += m * f;
        s2 += m * f2;
    }
    let norm = if s0 < f64::from(f32::MIN_POSITIVE) {
        1.0
    } else {
        s0
    };
    let centroid = s1 / norm;
    let spread = (s2 - 2.0 * centroid * s1 + centroid * centroid * s0).max(0.0);
    (centroid, (spread / norm).sqrt())
}

/// Roll-off at two fractions, Hz: the first bin whose float32 running sum of magnitude reaches
/// `fraction × total` (librosa 0.11.0: `cumsum` in float32, threshold `fraction · total` in
/// float32, the bin's frequency returned).
fn rolloff(
    magnitude: &[f32],
    freqs: &[f64],
    cumsum: &mut [f32],
    fraction_a: f64,
    fraction_b: f64,
) -> (f64, f64) {
    let mut acc = 0.0_f32;
    for (c, &m) in cumsum.iter_mut().zip(magnitude) {
        acc += m;
        *c = acc;
    }
    let last = freqs.len() - 1;
    let at = |fraction: f64| {
        let threshold = fraction as f32 * acc;
        freqs[cumsum.partition_point(|&c| c < threshold).min(last)]
    };
    (at(fraction_a), at(fraction_b))
}

/// Spectral flatness of a power spectrum (librosa 0.11.0 `spectral_flatness`: each bin floored
/// at `amin`, geometric mean over arithmetic mean). The log-sum is taken in float64 as the sum of
/// the float32 exponents plus the logarithm of the product of the mantissas: one logarithm per
/// frame, the running product renormalised to [1, 2) every 64 bins (its rounding costs about one
/// float64 epsilon per 64 bins, far below librosa's own float32 logarithms).
fn flatness(power: &[f32]) -> f32 {
    const LANES: usize = 8;
    let mut exponents = 0_i64;
    // The product of all mantissas so far, kept in [1, 2) (its exponent is in `exponents`).
    let mut mantissas = 1.0_f64;
    let mut sum = [0.0_f64; LANES];
    // 8 lanes × 8 steps: each lane's product of 8 mantissas in [1, 2) stays below 2^8, and the
    // product of the lanes below 2^64, far inside float64's range.
    for block in power.chunks(LANES * 8) {
        let mut prod = [1.0_f64; LANES];
        let mut exps = [0_i32; LANES];
        let mut chunks = block.chunks_exact(LANES);
        for c in &mut chunks {
            for i in 0..LANES {
                let x = c[i].max(AMIN_POWER);
                let bits = x.to_bits();
                sum[i] += f64::from(x);
                exps[i] += ((bits >> 23) & 0xff) as i32 - 127;
                prod[i] *= f64::from(f32::from_bits((bits & 0x007f_ffff) | 0x3f80_0000));
            }
        }
        for &p in chunks.remainder() {
            let x = p.max(AMIN_POWER);
            let bits = x.to_bits();
            sum[0] += f64::from(x);
            exps[0] += ((bits >> 23) & 0xff) as i32 - 127;
            prod[0] *= f64::from(f32::from_bits((bits & 0x007f_ffff) | 0x3f80_0000));
        }
        // The block's product (below 2^64) joins the running product, which is then brought
        // back to [1, 2) by moving its binary exponent into the integer sum.
        let p = ((prod[0] * prod[1]) * (prod[2] * prod[3]))
            * ((prod[4] * prod[5]) * (prod[6] * prod[7]))
            * mantissas;
        let bits = p.to_bits();
        exponents += ((bits >> 52) & 0x7ff) as i64 - 1023;
        mantissas = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
        exponents += exps.iter().map(|&e| i64::from(e)).sum::<i64>();
    }
    let n = power.len() as f64;
    let mean_log = (mantissas.ln() + exponents as f64 * std::f64::consts::LN_2) / n;
    let amean =
        ((sum[0] + sum[1]) + (sum[2] + sum[3]) + ((sum[4] + sum[5]) + (sum[6] + sum[7]))) / n;
    (mean_log.exp() / amean) as f32
}

/// Values per block when looking for a band's extremes.
const EXTREME_BLOCK: usize = 16;

/// Scratch for [`peak_valley`], sized at construction for the widest band.
#[derive(Debug, Clone)]
struct ExtremeScratch {
    /// Per-block minimum and maximum.
    low_keys: Vec<f32>,
    high_keys: Vec<f32>,
    /// A copy of the keys to select in.
    select: Vec<f32>,
    /// Candidate values.
    candidates: Vec<f32>,
}

impl ExtremeScratch {
    fn new(max_len: usize) -> Self {
        let blocks = max_len.div_ceil(EXTREME_BLOCK);
        Self {
            low_keys: vec![0.0; blocks],
            high_keys: vec![0.0; blocks],
            select: vec![0.0; blocks],
            candidates: vec![0.0; max_len],
        }
    }
}

/// Mean of the `q` largest and of the `q` smallest values of `x` (at most all of them), each a
/// float32 sum in ascending order divided by `q` in float32, as numpy 2.2 `mean` does over
/// librosa 0.11.0's sorted rows.
fn peak_valley(x: &[f32], q: usize, scratch: &mut ExtremeScratch) -> (f64, f64) {
    let q = q.min(x.len()).max(1);
    if q == 1 {
        let (lo, hi) = min_max(x);
        return (f64::from(hi), f64::from(lo));
    }
    let blocks = x.len().div_ceil(EXTREME_BLOCK);
    let mut chunks = x.chunks_exact(EXTREME_BLOCK);
    for ((lo, hi), c) in scratch
        .low_keys
        .iter_mut()
        .zip(scratch.high_keys.iter_mut())
        .zip(&mut chunks)
    {
        // Pairwise trees, so the values are reduced in a few vector steps.
        let mut l = [0.0_f32; 8];
        let mut h = [0.0_f32; 8];
        for i in 0..8 {
            l[i] = c[i].min(c[i + 8]);
            h[i] = c[i].max(c[i + 8]);
        }
        for i in 0..4 {
            l[i] = l[i].min(l[i + 4]);
            h[i] = h[i].max(h[i + 4]);
        }
        *lo = l[0].min(l[2]).min(l[1].min(l[3]));
        *hi = h[0].max(h[2]).max(h[1].max(h[3]));
    }
    if !chunks.remainder().is_empty() {
        let (lo, hi) = min_max(chunks.remainder());
        scratch.low_keys[blocks - 1] = lo;
        scratch.high_keys[blocks - 1] = hi;
    }
    let valley = extreme_sum::<false>(x, q, scratch) / q as f32;
    let peak = extreme_sum::<true>(x, q, scratch) / q as f32;
    (f64::from(peak), f64::from(valley))
}

/// The float32 sum, in ascending order, of the `q` smallest (or largest, if `HIGH`) values of
/// `x` (`2 ≤ q ≤ x.len()`), given the per-block minima (maxima) in `scratch`.
///
/// Exact selection in about one pass: with `t` the `q`-th most extreme of the per-block extremes,
/// at least `q` values reach `t`, so the `q` most extreme values all reach it too; they are
/// gathered from the blocks whose extreme reaches `t` (about `q` blocks), then sorted.
fn extreme_sum<const HIGH: bool>(x: &[f32], q: usize, scratch: &mut ExtremeScratch) -> f32 {
    let blocks = x.len().div_ceil(EXTREME_BLOCK);
    let keys = if HIGH {
        &scratch.high_keys[..blocks]
    } else {
        &scratch.low_keys[..blocks]
    };
    // Keys in the order sought: ascending for the smallest values, descending for the largest.
    let order = |a: &f32, b: &f32| {
        if HIGH { b.total_cmp(a) } else { a.total_cmp(b) }
    };
    let bound = if blocks <= q {
        if HIGH {
            f32::NEG_INFINITY
        } else {
            f32::INFINITY
        }
    } else {
        let select = &mut scratch.select[..blocks];
        select.copy_from_slice(keys);
        *select.select_nth_unstable_by(q - 1, order).1
    };
    // Gather every value that reaches the bound, from the blocks that can hold one (branch-free
    // compaction).
    let candidates = &mut scratch.candidates;
    let mut count = 0;
    for (&k, c) in keys.iter().zip(x.chunks(EXTREME_BLOCK)) {
        let reaches = if HIGH { k >= bound } else { k <= bound };
        if reaches {
            for &v in c {
                candidates[count] = v;
                count += usize::from(if HIGH { v >= bound } else { v <= bound });
            }
        }
    }
    let candidates = &mut candidates[..count];
    if count > 2 * q {
        candidates.select_nth_unstable_by(q - 1, order);
    } else {
        candidates.sort_unstable_by(order);
    }
    let chosen = &mut candidates[..q];
    chosen.sort_unstable_by(f32::total_cmp);
    chosen.iter().fold(0.0_f32, |acc, &v| acc + v)
}

/// Minimum and maximum of non-NaN values (eight lanes, so it vectorises).
fn min_max(x: &[f32]) -> (f32, f32) {
    let mut lo = [f32::INFINITY; 8];
    let mut hi = [f32::NEG_INFINITY; 8];
    let mut chunks = x.chunks_exact(8);
    for c in &mut chunks {
        for i in 0..8 {
            lo[i] = lo[i].min(c[i]);
            hi[i] = hi[i].max(c[i]);
        }
    }
    for (i, &v) in chunks.remainder().iter().enumerate() {
        lo[i] = lo[i].min(v);
        hi[i] = hi[i].max(v);
    }
    (
        lo.iter().fold(f32::INFINITY, |m, &v| m.min(v)),
        hi.iter().fold(f32::NEG_INFINITY, |m, &v| m.max(v)),
    )
}

/// The contrast bands of librosa 0.11.0 `spectral_contrast` in bins (see its source: band `k`
/// takes the bins with `octa[k] ≤ f ≤ octa[k+1]`, plus the bin below for `k > 0`, plus every bin
/// above for the last band, then drops its last bin unless it is the last band; `q =
/// max(1, rint(quantile · count))`).
fn contrast_bands(freqs: &[f64], sample_rate_hz: f64) -> [ContrastBand; N_CONTRAST] {
    let mut octa = [0.0_f64; N_CONTRAST + 1];
    for (j, o) in octa.iter_mut().skip(1).enumerate() {
        *o = CONTRAST_FMIN_HZ * 2f64.powi(j as i32);
    }
    let nyquist_hz = 0.5 * sample_rate_hz;
    let mut bands = [ContrastBand::default(); N_CONTRAST];
    for (k, band) in bands.iter_mut().enumerate() {
        let (f_low, f_high) = (octa[k], octa[k + 1]);
        if f_low >= nyquist_hz {
            continue;
        }
        let lo = freqs.partition_point(|&f| f < f_low);
        let hi_excl = freqs.partition_point(|&f| f <= f_high);
        if lo >= hi_excl {
            continue;
        }
        let start = if k > 0 { lo - 1 } else { lo };
        let last = k == CONTRAST_OCTAVES;
        let end_incl = if last { freqs.len() - 1 } else { hi_excl - 1 };
        let count = end_incl - start + 1;
        let end = if last { end_incl + 1 } else { end_incl };
        if end <= start {
            continue;
        }
        let q = (CONTRAST_QUANTILE * count as f64)
            .round_ties_even()
            .max(1.0) as usize;
        *band = ContrastBand { start, end, q };
    }
    bands
}

/// Sign changes between neighbours, samples within ±threshold counting as positive (librosa
/// 0.11.0 `zero_crossings(threshold=1e-10, zero_pos=True)`).
fn zero_crossings(x: &[f32]) -> usize {
    if x.len() < 2 {
        return 0;
    }
    let negative = |v: f32| v < -ZERO_CROSSING_THRESHOLD;
    x[..x.len() - 1]
        .iter()
        .zip(&x[1..])
        .map(|(&a, &b)| u32::from(negative(a) != negative(b)))
        .sum::<u32>() as usize
}

/// RMS of the frame, linear, with samples sanitised as for the spectrum
/// ([`crate::spectrum::sanitize`]) when `poisoned` (the spectrum found samples to sanitise).
fn rms(frame: &[f32], poisoned: bool) -> f32 {
    // Eight independent partial sums, so the additions are not one long dependency chain.
    let mut acc = [0.0_f64; 8];
    let mut chunks = frame.chunks_exact(8);
    for c in &mut chunks {
        for i in 0..8 {
            let v = f64::from(c[i]);
            acc[i] += v * v;
        }
    }
    let mut s = ((acc[0] + acc[1]) + (acc[2] + acc[3])) + ((acc[4] + acc[5]) + (acc[6] + acc[7]));
    for &v in chunks.remainder() {
        s += f64::from(v) * f64::from(v);
    }
    if poisoned {
        // Poison or huge samples (rare): sanitise each.
        s = frame
            .iter()
            .map(|&v| {
                let v = f64::from(sanitize(v));
                v * v
            })
            .sum();
    }
    (s / frame.len() as f64).sqrt() as f32
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::{AnalysisSettings, Analyzer};
    use rand::rngs::SmallRng;
    use rand::{Rng, SeedableRng};

    /// Seed of every random generator here; printed in failure messages.
    const SEED: u64 = 0x7157_BE55_0103;

    fn timbre(sr: f64) -> Timbre {
        Timbre::new(
            sr,
            FrameConfig::for_sample_rate(sr),
            TimbreOptions::default(),
        )
        .expect("valid settings")
    }

    fn sine(freq_hz: f64, amp: f64, sr: f64, n: usize) -> Vec<f32> {
        (0..n)
            .map(|i| (amp * (std::f64::consts::TAU * freq_hz * i as f64 / sr).sin()) as f32)
            .collect()
    }

    /// Gaussian white noise (Box–Muller), standard deviation `sigma`.
    fn noise(n: usize, sigma: f64, rng: &mut SmallRng) -> Vec<f32> {
        (0..n)
            .map(|_| {
                let u1: f64 = rng.gen_range(f64::EPSILON..1.0);
                let u2: f64 = rng.r#gen();
                (sigma * (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()) as f32
            })
            .collect()
    }

    /// Frames far enough from the clip's edges that no centre padding reaches them.
    fn inner(frames: &[Descriptors], framing: FrameConfig) -> &[Descriptors] {
        let edge = framing.frame_len / framing.hop_len + 1;
        &frames[edge..frames.len() - edge]
    }

    fn mean(values: impl Iterator<Item = f32>) -> f64 {
        let (mut sum, mut n) = (0.0, 0.0);
        for v in values {
            sum += f64::from(v);
            n += 1.0;
        }
        sum / n
    }

    #[test]
    fn sine_centroid_is_its_frequency_within_one_bin() {
        // Closed form: a sinusoid's magnitude spectrum is its window's transform centred on the
        // sinusoid's frequency, symmetric, so its magnitude-weighted mean frequency is that
        // frequency (up to the mirror image's tail, far below one bin).
        for sr in [8_000.0, 22_050.0, 44_100.0, 48_000.0, 96_000.0] {
            let mut t = timbre(sr);
            let framing = t.framing();
            let bin_hz = sr / framing.frame_len as f64;
            for f in [220.0, 440.0, 1000.0, 0.3 * sr] {
                let frames = t.describe_clip(&sine(f, 0.5, sr, sr as usize));
                for d in inner(&frames, framing) {
                    let c = f64::from(d.centroid_hz);
                    assert!(
                        (c - f).abs() <= bin_hz,
                        "{sr} Hz, {f} Hz sine: centroid {c}"
                    );
                }
            }
        }
    }

    #[test]
    fn white_noise_flatness_is_exp_minus_euler_gamma() {
        // Each DFT bin of Gaussian white noise (windowed or not) is complex Gaussian, so its
        // power is exponentially distributed (periodogram ordinates: Brockwell & Davis, "Time
        // Series: Theory and Methods", 1991, §10.3, from memory). For an exponential variable
        // E[ln P] = ln E[P] − γ, γ the Euler–Mascheroni constant, so geometric over arithmetic
        // mean tends to e^(−γ) ≈ 0.5615 (value from memory). DC and Nyquist (χ² with one degree
        // of freedom) and finite-sample bias shift it by well under 0.01.
        let expected = (-0.577_215_664_901_532_9_f64).exp();
        for sr in [22_050.0, 48_000.0] {
            let mut rng = SmallRng::seed_from_u64(SEED);
            let mut t = timbre(sr);
            let framing = t.framing();
            let frames = t.describe_clip(&noise(sr as usize * 2, 0.1, &mut rng));
            let flatness = mean(inner(&frames, framing).iter().map(|d| d.flatness));
            assert!(
                (flatness - expected).abs() < 0.01,
                "{sr} Hz (seed {SEED:#x}): mean flatness {flatness}, e^-γ = {expected}"
            );
        }
    }

    #[test]
    fn sine_flatness_is_near_zero() {
        // A pure tone puts its power in a few bins; the rest sit at the amin floor (1e-10),
        // so the geometric mean is tiny next to the arithmetic mean.
        let mut t = timbre(48_000.0);
        let framing = t.framing();
        let frames = t.describe_clip(&sine(1000.0, 0.5, 48_000.0, 24_000));
        for d in inner(&frames, framing) {
            assert!(d.flatness < 1e-6, "{}", d.flatness);
        }
    }

    /// White noise brick-wall low-passed at `edge_hz` over the whole signal (zeroed DFT bins).
    fn low_passed_noise(n: usize, sr: f64, edge_hz: f64, rng: &mut SmallRng) -> Vec<f32> {
        let x: Vec<f64> = noise(n, 0.1, rng).iter().map(|&v| f64::from(v)).collect();
        let mut planner = realfft::RealFftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(n);
        let inverse = planner.plan_fft_inverse(n);
        let mut input = x;
        let mut spectrum = forward.make_output_vec();
        forward
            .process(&mut input, &mut spectrum)
            .expect("sized by the plan");
        for (k, c) in spectrum.iter_mut().enumerate() {
            if k as f64 * sr / n as f64 > edge_hz {
                *c = realfft::num_complex::Complex::new(0.0, 0.0);
            }
        }
        let mut out = inverse.make_output_vec();
        inverse
            .process(&mut spectrum, &mut out)
            .expect("sized by the plan");
        out.iter().map(|&v| (v / n as f64) as f32).collect()
    }

    #[test]
    fn rolloff_of_band_limited_noise_sits_at_its_band_edge() {
        // Closed form: the expected magnitude of band-limited white noise is flat up to the band
        // edge and zero above, so the running sum grows linearly to the edge and a fraction p
        // of it is reached at p × edge. With p = 0.99 that is the band edge itself (within 1 %).
        let sr = 48_000.0;
        let edge = 6_000.0;
        let mut rng = SmallRng::seed_from_u64(SEED + 1);
        let x = low_passed_noise(96_000, sr, edge, &mut rng);
        let framing = FrameConfig::for_sample_rate(sr);
        let options = TimbreOptions {
            rolloff_custom_fraction: 0.99,
            ..TimbreOptions::default()
        };
        let mut t = Timbre::new(sr, framing, options).expect("valid");
        let frames = t.describe_clip(&x);
        let inner = inner(&frames, framing);
        let at_edge = mean(inner.iter().map(|d| d.rolloff_custom_hz));
        let at_85 = mean(inner.iter().map(|d| d.rolloff_hz));
        let bin_hz = sr / framing.frame_len as f64;
        assert!(
            (at_edge - 0.99 * edge).abs() < 0.01 * edge + bin_hz,
            "seed {:#x}: 99 % roll-off {at_edge} Hz, band edge {edge} Hz",
            SEED + 1
        );
        assert!(
            (at_85 - 0.85 * edge).abs() < 0.01 * edge + bin_hz,
            "seed {:#x}: 85 % roll-off {at_85} Hz, expected {} Hz",
            SEED + 1,
            0.85 * edge
        );
        for d in inner {
            assert!(
                f64::from(d.rolloff_custom_hz) <= edge + 2.0 * bin_hz,
                "{d:?}"
            );
        }
    }

    fn assert_all_finite(d: &Descriptors) {
        let scalars = d.scalars();
        let all = scalars
            .iter()
            .chain(&d.mel_power)
            .chain(&d.mfcc)
            .chain(&d.contrast_db)
            .chain(&d.valley_db);
        for v in all {
            assert!(v.is_finite(), "{d:?}");
        }
    }

    #[test]
    fn silence_gives_the_documented_values() {
        let sr = 44_100.0;
        let silence = vec![0.0_f32; 20_000];
        let mut t = timbre(sr);
        let offline = t.describe_clip(&silence);
        let mut live = Vec::new();
        let mut d = Descriptors::default();
        let framing = t.framing();
        for k in 0..offline.len() {
            t.describe(
                &silence[..framing.frame_len],
                framing.signal_range(k as u64, None),
                &mut d,
            );
            live.push(d);
        }
        for d in offline.iter().chain(&live) {
            assert_all_finite(d);
            assert!(d.mel_power.iter().all(|&p| p == 0.0));
            // DCT-II (ortho) of a flat −100 dB vector: −100·√128 in the first coefficient.
            let c0 = -100.0 * (N_MELS as f64).sqrt();
            assert!((f64::from(d.mfcc[0]) - c0).abs() < 1e-3, "{}", d.mfcc[0]);
            assert!(d.mfcc[1..].iter().all(|c| c.abs() < 1e-3), "{:?}", d.mfcc);
            assert_eq!(d.centroid_hz, 0.0);
            assert_eq!(d.bandwidth_hz, 0.0);
            assert_eq!(d.rolloff_hz, 0.0);
            assert_eq!(d.rolloff_custom_hz, 0.0);
            assert!((d.flatness - 1.0).abs() < 1e-6, "{}", d.flatness);
            assert!(d.contrast_db.iter().all(|&c| c == 0.0));
            assert!(d.valley_db.iter().all(|&v| v == DB_FLOOR));
            assert_eq!(d.flux_db, 0.0);
            assert_eq!(d.zero_crossings_per_sample, 0.0);
            assert_eq!(d.rms, 0.0);
        }
    }

    #[test]
    fn poison_and_extreme_samples_give_finite_values() {
        let mut x = sine(440.0, 0.5, 48_000.0, 12_000);
        for (i, v) in [
            f32::NAN,
            f32::INFINITY,
            f32::NEG_INFINITY,
            f32::MAX,
            f32::MIN,
            f32::from_bits(1),
            -0.0,
        ]
        .into_iter()
        .enumerate()
        {
            x[1000 + 997 * i] = v;
        }
        x[9000..9100].fill(f32::MAX);
        let mut t = timbre(48_000.0);
        for d in t.describe_clip(&x) {
            assert_all_finite(&d);
        }
    }

    #[test]
    fn the_clip_floor_raises_quiet_frames_to_80_db_below_the_loudest() {
        // librosa 0.11.0 power_to_db(top_db=80): every mel dB value is at least the clip's
        // maximum − 80 dB. Silent frames after a loud tone therefore read a flat spectrum at that
        // floor: MFCC 0 is floor·√128 and the others vanish (the DCT of a constant). Contrast
        // floors its peaks and valleys separately, each at its own maximum − 80 dB, so a silent
        // band reads (max peak − 80) − (max valley − 80).
        let sr = 48_000.0;
        let mut x = sine(1000.0, 0.5, sr, 48_000);
        x.extend(vec![0.0; 48_000]);
        let mut t = timbre(sr);
        let framing = t.framing();
        let offline = t.describe_clip(&x);
        let max_db = offline
            .iter()
            .flat_map(|d| d.mel_power.iter())
            .fold(0.0_f32, |m, &p| m.max(p));
        let floor = f64::from(power_to_db(max_db) - TOP_DB);
        let (mut max_peak, mut max_valley) = (f64::NEG_INFINITY, f64::NEG_INFINITY);
        let mut d = Descriptors::default();
        // The same centred frames, described one by one, to read each frame's unfloored levels.
        let half = vec![0.0_f32; framing.frame_len / 2];
        let padded: Vec<f32> = half.iter().chain(&x).chain(&half).copied().collect();
        for k in 0..offline.len() {
            let start = k * framing.hop_len;
            let signal = framing.signal_range(k as u64, Some(x.len() as u64));
            t.describe(&padded[start..start + framing.frame_len], signal, &mut d);
            let r = t.floor_record();
            max_peak = r.peak_db.iter().fold(max_peak, |m, &v| m.max(v));
            max_valley = r.valley_db.iter().fold(max_valley, |m, &v| m.max(v));
        }
        let contrast = (max_peak - 80.0) - (max_valley - 80.0);
        let silent =
            &offline[offline.len() - 20..offline.len() - framing.frame_len / framing.hop_len];
        for d in silent {
            let c0 = floor * (N_MELS as f64).sqrt();
            assert!(
                (f64::from(d.mfcc[0]) - c0).abs() < 1e-3,
                "{} vs {c0}",
                d.mfcc[0]
            );
            assert!(d.mfcc[1..].iter().all(|c| c.abs() < 1e-3));
            for &c in &d.contrast_db {
                assert!((f64::from(c) - contrast).abs() < 1e-4, "{c} vs {contrast}");
            }
        }
        // Fields the floor never touches are the live values.
        let mut live = Vec::new();
        let mut analyzer = Analyzer::new(AnalysisSettings::for_sample_rate(sr).expect("valid"));
        analyzer.process(&x, None, |f| live.push(f.descriptors));
        analyzer.finish(|f| live.push(f.descriptors));
        for (a, b) in offline.iter().zip(&live) {
            assert_eq!(a.mel_power, b.mel_power);
            assert_eq!(a.centroid_hz, b.centroid_hz);
            assert_eq!(a.rolloff_hz, b.rolloff_hz);
            assert_eq!(a.flatness, b.flatness);
            assert_eq!(a.zero_crossings_per_sample, b.zero_crossings_per_sample);
        }
    }

    #[test]
    fn describe_clip_equals_the_analyzer_offline_path() {
        let sr = 22_050.0;
        let mut rng = SmallRng::seed_from_u64(SEED + 2);
        let mut x = noise(30_001, 0.05, &mut rng);
        for (v, s) in x.iter_mut().zip(sine(330.0, 0.3, sr, 30_001)) {
            *v += s;
        }
        let mut t = timbre(sr);
        let a = t.describe_clip(&x);
        let mut analyzer = Analyzer::new(AnalysisSettings::for_sample_rate(sr).expect("valid"));
        let b = analyzer.analyze_clip(&x, None);
        assert_eq!(a.len(), b.len());
        for (k, (a, b)) in a.iter().zip(&b).enumerate() {
            assert_eq!(*a, b.descriptors, "frame {k} (seed {:#x})", SEED + 2);
        }
    }

    #[test]
    fn reset_reproduces_results() {
        let sr = 48_000.0;
        let mut rng = SmallRng::seed_from_u64(SEED + 3);
        let x = noise(10_000, 0.2, &mut rng);
        let mut t = timbre(sr);
        let framing = t.framing();
        let run = |t: &mut Timbre| {
            let mut out = Vec::new();
            let mut d = Descriptors::default();
            for (k, frame) in x
                .windows(framing.frame_len)
                .step_by(framing.hop_len)
                .enumerate()
            {
                t.describe(frame, framing.signal_range(k as u64 + 4, None), &mut d);
                out.push(d);
            }
            out
        };
        let first = run(&mut t);
        t.reset();
        assert_eq!(run(&mut t), first, "seed {:#x}", SEED + 3);
    }

    #[test]
    fn describing_does_not_allocate() {
        let sr = 48_000.0;
        let mut t = timbre(sr);
        let framing = t.framing();
        let x = sine(440.0, 0.5, sr, 3 * framing.frame_len);
        let mut d = Descriptors::default();
        assert_no_alloc::assert_no_alloc(|| {
            for frame in x.windows(framing.frame_len).step_by(framing.hop_len) {
                t.describe(frame, 0..framing.frame_len, &mut d);
            }
        });
        assert!(d.centroid_hz > 0.0);
    }

    #[test]
    fn descriptors_serialise_with_unit_names() {
        let json = serde_json::to_value(Descriptors::default()).expect("serialisable");
        let object = json.as_object().expect("an object");
        for key in [
            "mel_power",
            "mfcc",
            "centroid_hz",
            "bandwidth_hz",
            "rolloff_hz",
            "rolloff_custom_hz",
            "flatness",
            "contrast_db",
            "valley_db",
            "flux_db",
            "zero_crossings_per_sample",
            "rms",
        ] {
            assert!(object.contains_key(key), "{key} missing from {json}");
        }
        assert_eq!(json["mel_power"].as_array().map(Vec::len), Some(N_MELS));
        assert_eq!(json["mfcc"].as_array().map(Vec::len), Some(N_MFCC));
        assert_eq!(
            json["contrast_db"].as_array().map(Vec::len),
            Some(N_CONTRAST)
        );
    }

    #[test]
    fn settings_are_validated() {
        let framing = FrameConfig::for_sample_rate(48_000.0);
        for fraction in [0.0, 1.0, -0.5, f64::NAN] {
            let options = TimbreOptions {
                rolloff_custom_fraction: fraction,
                ..TimbreOptions::default()
            };
            assert!(matches!(
                Timbre::new(48_000.0, framing, options),
                Err(TimbreError::RolloffFraction { .. })
            ));
        }
        assert!(matches!(
            Timbre::new(0.0, framing, TimbreOptions::default()),
            Err(TimbreError::Bands(BandsError::SampleRate { .. }))
        ));
    }

    #[test]
    fn fast_log_matches_the_library_logarithm() {
        // power_to_db's series logarithm against f64::log10 over the whole float32 range it sees.
        let mut x = AMIN_POWER;
        while x < 1e30 {
            let want = (10.0 * f64::from(x).log10()) as f32;
            let got = power_to_db(x);
            assert!(
                (got - want).abs() <= 1e-5_f32.max(want.abs() * 2.0 * f32::EPSILON),
                "{x}"
            );
            x *= 1.37;
        }
    }

    #[test]
    fn contrast_extremes_equal_a_full_sort() {
        // The block-wise selection against sorting the whole band.
        let mut rng = SmallRng::seed_from_u64(SEED + 4);
        let mut scratch = ExtremeScratch::new(1000);
        for len in [2, 3, 15, 16, 17, 100, 751, 1000] {
            for q in [1, 2, 3, 15] {
                let x: Vec<f32> = (0..len)
                    .map(|i| {
                        let v: f32 = rng.r#gen();
                        // Falling spectra, ties and repeated values included.
                        if i % 7 == 0 {
                            0.25
                        } else {
                            v / (1.0 + i as f32)
                        }
                    })
                    .collect();
                let q = q.min(len);
                let mut sorted = x.clone();
                sorted.sort_by(f32::total_cmp);
                let low: f32 = sorted[..q].iter().fold(0.0, |a, &v| a + v) / q as f32;
                let high: f32 = sorted[len - q..].iter().fold(0.0, |a, &v| a + v) / q as f32;
                let (p, v) = peak_valley(&x, q, &mut scratch);
                assert_eq!((p, v), (f64::from(high), f64::from(low)), "len {len} q {q}");
            }
        }
    }
}
