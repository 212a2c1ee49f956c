//! The [`Analyzer`]: one engine for live and offline analysis.
//!
//! It takes the analysis signal in blocks of any size (mid and side, see [`crate::level`]), frames
//! it with the streaming [`Framer`], and measures every frame: its [`Level`] (mid and side) and
//! its timbre [`Descriptors`] (mid only: the mean of the channels, as librosa 0.11.0 `to_mono`
//! makes it). The plugin's analysis thread and the command-line tool run the same code.
//!
//! - **Live**: [`Analyzer::process`] per block, then (for a finite clip) [`Analyzer::finish`].
//!   Frames come out as soon as they are complete; the descriptors use the live dB convention
//!   (no whole-clip `top_db` floor; see [`crate::timbre`]).
//! - **Family shares**: an analyzer built with [`Analyzer::with_palette`] also feeds every
//!   frame's power spectrum (the same FFT the descriptors use) to a [`SharesEstimator`]; each
//!   [`FrameResult`] carries the latest shares ([`FrameShares`]). The presence stage decides
//!   the columns of one block together (see [`SharesEstimator::flush`]), so with a palette the
//!   frames of a block come out together at the end of the call that completed them; the
//!   values are the same for any block size.
//! - **Offline, equal to librosa**: [`Analyzer::analyze_clip`] takes the whole clip and returns
//!   every frame with librosa's whole-clip floor applied (what `weft analyze --frames` prints).
//!
//! Frames are librosa's `center=True` frames: frame `k` is centred on sample `k·hop` (time
//! `k·hop / sr`), the clip padded with `frame_len / 2` zeros at each end, `1 + len / hop` frames.

use crate::frames::{FrameConfig, Framer, FramingError};
use crate::level::Level;
use crate::palette::Palette;
use crate::shares::{MAX_BATCH, Shares, SharesError, SharesEstimator, SharesSettings};
use crate::timbre::{Descriptors, FloorRecord, Timbre, TimbreError, TimbreOptions};
use thiserror::Error;

/// The lowest and highest sample rates the engine accepts, in Hz.
pub const SAMPLE_RATE_RANGE_HZ: (f64, f64) = (8_000.0, 384_000.0);

/// Settings fixed when an [`Analyzer`] is built.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct AnalysisSettings {
    /// Sample rate of the analysis signal, Hz.
    pub sample_rate_hz: f64,
    /// Frame and hop lengths, samples.
    pub framing: FrameConfig,
    /// The user's timbre choices (custom roll-off fraction, mel scale).
    pub timbre: TimbreOptions,
}

/// Why analysis settings were refused.
#[derive(Debug, Clone, Copy, PartialEq, Error)]
pub enum SettingsError {
    /// The sample rate is outside [`SAMPLE_RATE_RANGE_HZ`] or not finite.
    #[error("sample rate {sample_rate_hz} Hz is outside 8000..=384000 Hz")]
    SampleRate {
        /// The refused sample rate, Hz.
        sample_rate_hz: f64,
    },
    /// The framing is invalid.
    #[error("invalid framing")]
    Framing(#[from] FramingError),
    /// The timbre options are invalid.
    #[error("invalid timbre options")]
    Timbre(#[from] TimbreError),
}

impl AnalysisSettings {
    /// Default settings for a sample rate, checked.
    pub fn for_sample_rate(sample_rate_hz: f64) -> Result<Self, SettingsError> {
        Self::new(sample_rate_hz, FrameConfig::for_sample_rate(sample_rate_hz))
    }

    /// Checks the sample rate; the framing was checked when it was made.
    pub fn new(sample_rate_hz: f64, framing: FrameConfig) -> Result<Self, SettingsError> {
        let (lo, hi) = SAMPLE_RATE_RANGE_HZ;
        if !(lo..=hi).contains(&sample_rate_hz) {
            return Err(SettingsError::SampleRate { sample_rate_hz });
        }
        // Re-check so a hand-built FrameConfig cannot bypass validation.
        FrameConfig::new(framing.frame_len, framing.hop_len)?;
        Ok(Self {
            sample_rate_hz,
            framing,
            timbre: TimbreOptions::default(),
        })
    }

    /// The same settings with other timbre options, checked.
    pub fn with_timbre(self, timbre: TimbreOptions) -> Result<Self, SettingsError> {
        Timbre::check(self.sample_rate_hz, self.framing, timbre)?;
        Ok(Self { timbre, ..self })
    }
}

impl AsMut<Descriptors> for FrameResult {
    fn as_mut(&mut self) -> &mut Descriptors {
        &mut self.descriptors
    }
}

/// What the analyzer measured on one frame.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct FrameResult {
    /// Index of the frame since the start (or the last reset).
    pub index: u64,
    /// Time of the frame's centre, seconds since the start of the signal.
    pub time_s: f64,
    /// The frame's level.
    pub level: Level,
    /// The frame's timbre descriptors (of the mid signal).
    pub descriptors: Descriptors,
    /// The latest family shares (all zero, `families == 0`, without a palette).
    pub shares: FrameShares,
}

/// The family shares a frame carries: those of the latest completed column (columns are
/// longer than the hop, so several frames carry the same values).
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct FrameShares {
    /// Whether a column completed on this frame (the values are new).
    pub updated: bool,
    /// The column's shares, unsmoothed (what window statistics summarise).
    pub raw: Shares,
    /// The shares smoothed with the response time (what a meter shows).
    pub smoothed: Shares,
}

/// Streams the analysis signal through every measurement. Allocates only in [`Analyzer::new`]
/// (and in the offline [`Analyzer::analyze_clip`], which returns a vector).
#[derive(Debug, Clone)]
pub struct Analyzer {
    settings: AnalysisSettings,
    mid: Framer,
    side: Framer,
    timbre: Timbre,
    shares: Option<SharesEstimator>,
    frames_done: u64,
    samples_in: u64,
    /// Whether [`Analyzer::finish`] is feeding the trailing centre padding.
    finishing: bool,
    result: FrameResult,
    /// With a palette: the frames measured since the estimator's last flush, held back until
    /// their columns' shares are known (capacity reserved in [`Analyzer::with_palette`]).
    held: Vec<HeldFrame>,
}

/// A frame waiting for the shares of the columns before it.
#[derive(Debug, Clone, Copy)]
struct HeldFrame {
    result: FrameResult,
    floor: FloorRecord,
    /// Whether a column completed on this frame.
    column: bool,
}

impl Analyzer {
    /// Builds an analyzer; all memory it will use is reserved here.
    ///
    /// # Panics
    /// If `settings` was assembled by hand with values [`AnalysisSettings::new`] would refuse.
    pub fn new(settings: AnalysisSettings) -> Self {
        let timbre = Timbre::new(settings.sample_rate_hz, settings.framing, settings.timbre)
            .expect("analysis settings are checked by AnalysisSettings::new and with_timbre");
        Self {
            settings,
            mid: Framer::new(settings.framing),
            side: Framer::new(settings.framing),
            timbre,
            shares: None,
            frames_done: 0,
            samples_in: 0,
            finishing: false,
            result: FrameResult::default(),
            held: Vec::new(),
        }
    }

    /// An analyzer that also estimates family shares with `palette` (see [`crate::shares`]).
    ///
    /// # Errors
    /// When the palette's bands cannot be built at this rate and framing, or the shares
    /// settings are out of range.
    ///
    /// # Panics
    /// As [`Analyzer::new`].
    pub fn with_palette(
        settings: AnalysisSettings,
        palette: &Palette,
        shares: SharesSettings,
    ) -> Result<Self, SharesError> {
        let estimator =
            SharesEstimator::new(palette, shares, settings.sample_rate_hz, settings.framing)?;
        let mut analyzer = Self::new(settings);
        // Every frame of a full batch of columns, and the frame that fills it.
        analyzer.held = Vec::with_capacity(MAX_BATCH * estimator.hops_per_column() + 1);
        analyzer.shares = Some(estimator);
        Ok(analyzer)
    }

    /// The shares estimator, when built with a palette.
    pub fn shares_estimator(&self) -> Option<&SharesEstimator> {
        self.shares.as_ref()
    }

    /// The shares estimator, to change its response time.
    pub fn shares_estimator_mut(&mut self) -> Option<&mut SharesEstimator> {
        self.shares.as_mut()
    }

    /// The settings this analyzer was built with.
    pub fn settings(&self) -> AnalysisSettings {
        self.settings
    }

    /// Samples received since the start or the last reset.
    pub fn samples_in(&self) -> u64 {
        self.samples_in
    }

    /// The timbre extractor (its mel filterbank, flux shift, options).
    pub fn timbre(&self) -> &Timbre {
        &self.timbre
    }

    /// Forgets all input.
    pub fn reset(&mut self) {
        self.mid.reset();
        self.side.reset();
        self.timbre.reset();
        if let Some(est) = &mut self.shares {
            est.reset();
        }
        self.result.shares = FrameShares::default();
        self.held.clear();
        self.frames_done = 0;
        self.samples_in = 0;
        self.finishing = false;
    }

    /// Analyses a block of mid and side samples (equal lengths; pass `None` for side when the
    /// source is mono) and calls `on_frame` for every frame completed. Does not allocate.
    ///
    /// Descriptors follow the live convention (see [`crate::timbre`]); results do not depend on
    /// how the stream is split into blocks.
    pub fn process(
        &mut self,
        mid: &[f32],
        side: Option<&[f32]>,
        mut on_frame: impl FnMut(&FrameResult),
    ) {
        self.run(mid, side, &mut |f, _| on_frame(f));
    }

    /// [`Analyzer::process`] that also hands out each frame's floor record.
    fn run(
        &mut self,
        mid: &[f32],
        side: Option<&[f32]>,
        on_frame: &mut impl FnMut(&FrameResult, &FloorRecord),
    ) {
        if let Some(side) = side {
            assert_eq!(
                mid.len(),
                side.len(),
                "mid and side blocks must be equally long"
            );
        }
        self.samples_in += mid.len() as u64;
        let mut i = 0;
        while i < mid.len() {
            let (used, ready) = self.mid.feed(&mid[i..]);
            match side {
                Some(side) => self.side.feed(&side[i..i + used]),
                None => self.side.feed_zeros(used),
            };
            i += used;
            if ready {
                self.emit(on_frame);
            }
        }
        self.release(on_frame);
    }

    /// Completes a whole clip: feeds the trailing centre padding (librosa's `center=True`) and
    /// reports the last frames. Call [`Analyzer::reset`] before reusing the analyzer. Does not
    /// allocate.
    pub fn finish(&mut self, mut on_frame: impl FnMut(&FrameResult)) {
        self.finish_run(&mut |f, _| on_frame(f));
    }

    fn finish_run(&mut self, on_frame: &mut impl FnMut(&FrameResult, &FloorRecord)) {
        self.finishing = true;
        let mut left = self.mid.tail_len();
        while left > 0 {
            let (used, ready) = self.mid.feed_zeros(left);
            self.side.feed_zeros(used);
            left -= used;
            if ready {
                self.emit(on_frame);
            }
        }
        self.release(on_frame);
    }

    /// Analyses a whole clip offline, exactly as librosa 0.11.0 does (see [`crate::timbre`] for
    /// each descriptor's librosa function): resets, feeds the clip, finishes, applies librosa's
    /// whole-clip `top_db` floor ([`Timbre::apply_clip_floor`]) and returns every frame in order
    /// (`1 + len / hop` of them). The analyzer is reset again afterwards.
    ///
    /// This is the path for files (`weft analyze --frames`): it allocates the returned vector
    /// and a few bytes per frame. Live input uses [`Analyzer::process`] instead.
    ///
    /// # Panics
    /// If `side` is given with a length other than `mid`'s.
    pub fn analyze_clip(&mut self, mid: &[f32], side: Option<&[f32]>) -> Vec<FrameResult> {
        self.reset();
        let frames = 1 + mid.len() / self.settings.framing.hop_len;
        let mut results = Vec::with_capacity(frames);
        let mut records = Vec::with_capacity(frames);
        let mut collect = |f: &FrameResult, r: &FloorRecord| {
            results.push(*f);
            records.push(*r);
        };
        self.run(mid, side, &mut collect);
        self.finish_run(&mut collect);
        self.timbre.apply_clip_floor(&mut results, &records);
        self.reset();
        results
    }

    fn emit(&mut self, on_frame: &mut impl FnMut(&FrameResult, &FloorRecord)) {
        let column = self.measure();
        match &self.shares {
            None => on_frame(&self.result, self.timbre.floor_record()),
            Some(est) => {
                self.held.push(HeldFrame {
                    result: self.result,
                    floor: *self.timbre.floor_record(),
                    column,
                });
                if est.is_full() || self.held.len() == self.held.capacity() {
                    self.release(on_frame);
                }
            }
        }
        self.mid.advance();
        self.side.advance();
    }

    /// Completes the estimator's waiting columns, gives each held frame the shares of the
    /// latest column up to it, and hands the frames out in order.
    fn release(&mut self, on_frame: &mut impl FnMut(&FrameResult, &FloorRecord)) {
        let Some(est) = &mut self.shares else {
            return;
        };
        let held = &mut self.held;
        let mut next = 0;
        est.flush(|u| {
            // `push_power` queued one column per frame marked `column`, in order.
            while let Some(h) = held.get(next)
                && !h.column
            {
                next += 1;
            }
            if let Some(h) = held.get_mut(next) {
                h.result.shares = FrameShares {
                    updated: true,
                    raw: u.raw,
                    smoothed: u.smoothed,
                };
                next += 1;
            }
        });
        let mut latest = self.result.shares;
        for h in held.iter_mut() {
            if h.column {
                latest = h.result.shares;
            } else {
                h.result.shares = FrameShares {
                    updated: false,
                    ..latest
                };
            }
            on_frame(&h.result, &h.floor);
        }
        self.result.shares = FrameShares {
            updated: false,
            ..latest
        };
        held.clear();
    }

    /// Measures the current frame into `self.result` (its shares are filled in by
    /// [`Analyzer::release`] when a palette is used); returns whether a column completed.
    fn measure(&mut self) -> bool {
        let index = self.frames_done;
        let signal = self
            .settings
            .framing
            .signal_range(self.frames_done, self.finishing.then_some(self.samples_in));
        self.timbre
            .describe(self.mid.frame(), signal, &mut self.result.descriptors);
        let column = self
            .shares
            .as_mut()
            .is_some_and(|est| est.push_power(self.timbre.power()));
        self.frames_done += 1;
        self.result.index = index;
        self.result.time_s =
            (index * self.settings.framing.hop_len as u64) as f64 / self.settings.sample_rate_hz;
        self.result.level = Level::measure(self.mid.frame(), self.side.frame());
        column
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sine(freq_hz: f64, amp: f64, sample_rate_hz: f64, n: usize) -> Vec<f32> {
        (0..n)
            .map(|i| {
                (amp * (std::f64::consts::TAU * freq_hz * i as f64 / sample_rate_hz).sin()) as f32
            })
            .collect()
    }

    #[test]
    fn sine_level_matches_closed_form_at_every_rate() {
        for sr in [8_000.0, 44_100.0, 48_000.0, 96_000.0, 192_000.0, 384_000.0] {
            let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
            let mut analyzer = Analyzer::new(settings);
            let x = sine(1000.0, 0.1, sr, sr as usize);
            let mut last = FrameResult::default();
            analyzer.process(&x, None, |f| last = *f);
            // −20 dBFS peak ⇒ −23.0103 dBFS RMS (closed form for a sine).
            assert!((last.level.rms_db + 23.0103).abs() < 0.05, "{sr}: {last:?}");
            assert!((last.level.peak_db + 20.0).abs() < 0.05, "{sr}: {last:?}");
        }
    }

    #[test]
    fn block_size_and_reset_never_change_results() {
        let settings = AnalysisSettings::for_sample_rate(48_000.0).expect("valid");
        let x = sine(440.0, 0.5, 48_000.0, 20_000);
        let side = sine(3.0, 0.2, 48_000.0, 20_000);
        let run = |analyzer: &mut Analyzer, block: usize| {
            let mut out = Vec::new();
            for (m, s) in x.chunks(block).zip(side.chunks(block)) {
                analyzer.process(m, Some(s), |f| out.push(*f));
            }
            analyzer.finish(|f| out.push(*f));
            out
        };
        let mut analyzer = Analyzer::new(settings);
        let reference = run(&mut analyzer, x.len());
        assert_eq!(reference.len(), 1 + x.len() / settings.framing.hop_len);
        for block in [1, 64, 333, 512, 4096, 16384] {
            analyzer.reset();
            assert_eq!(run(&mut analyzer, block), reference, "block {block}");
        }
    }

    #[test]
    fn block_sizes_1_to_16384_give_identical_descriptors() {
        // Noise, a tone, silence and a DC step, so every descriptor (flux and the clip-edge
        // zero-crossing rule included) is exercised; seeded.
        const SEED: u64 = 0x7157_BE55_0203;
        let sr = 44_100.0;
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let mut state = SEED;
        let mut x: Vec<f32> = (0..40_000)
            .map(|i| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let noise = (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
                let tone = (0.4 * (std::f64::consts::TAU * 660.0 * i as f64 / sr).sin()) as f32;
                if i < 15_000 { 0.2 * noise + tone } else { 0.0 }
            })
            .collect();
        x[30_000..].fill(-0.25);
        let run = |analyzer: &mut Analyzer, block: usize| {
            let mut out = Vec::new();
            for chunk in x.chunks(block) {
                analyzer.process(chunk, None, |f| out.push(*f));
            }
            analyzer.finish(|f| out.push(*f));
            analyzer.reset();
            out
        };
        let mut analyzer = Analyzer::new(settings);
        let reference = run(&mut analyzer, x.len());
        assert_eq!(reference.len(), 1 + x.len() / settings.framing.hop_len);
        for block in [1, 2, 3, 7, 64, 441, 512, 1000, 2048, 4096, 16_384] {
            assert!(
                run(&mut analyzer, block) == reference,
                "block {block} (seed {SEED:#x})"
            );
        }
    }

    #[test]
    fn settings_are_validated() {
        assert!(matches!(
            AnalysisSettings::for_sample_rate(1000.0),
            Err(SettingsError::SampleRate { .. })
        ));
        assert!(AnalysisSettings::for_sample_rate(f64::NAN).is_err());
        let bad = FrameConfig {
            frame_len: 4,
            hop_len: 9,
        };
        assert!(matches!(
            AnalysisSettings::new(48_000.0, bad),
            Err(SettingsError::Framing(_))
        ));
    }

    #[test]
    fn processing_does_not_allocate() {
        let settings = AnalysisSettings::for_sample_rate(48_000.0).expect("valid");
        let mut analyzer = Analyzer::new(settings);
        let x = sine(440.0, 0.5, 48_000.0, 9_000);
        let mut frames = 0;
        assert_no_alloc::assert_no_alloc(|| {
            for block in x.chunks(333) {
                analyzer.process(block, None, |_| frames += 1);
            }
            analyzer.finish(|_| frames += 1);
        });
        assert!(frames > 0);
    }

    /// A seeded mix of a tone and noise, 2 s at 48 kHz, for the shares tests.
    fn shares_signal() -> Vec<f32> {
        const SEED: u64 = 0x5EED_0A11_2026;
        let mut state = SEED;
        (0..96_000)
            .map(|i| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let noise = (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
                let tone =
                    (0.3 * (std::f64::consts::TAU * 220.0 * i as f64 / 48_000.0).sin()) as f32;
                tone + if i > 48_000 { 0.3 * noise } else { 0.0 }
            })
            .collect()
    }

    #[test]
    fn shares_equal_the_trackers_and_ignore_block_size() {
        let palette = Palette::default_palette();
        let shares = SharesSettings::default();
        let settings = AnalysisSettings::for_sample_rate(48_000.0).expect("valid");
        let mut analyzer = Analyzer::with_palette(settings, &palette, shares).expect("palette");
        let x = shares_signal();
        // The tracker frames and transforms on its own: an independent path to the same numbers.
        let mut tracker =
            crate::shares::SharesTracker::new(&palette, shares, 48_000.0).expect("palette");
        let mut expected = Vec::new();
        tracker.process(&x, |u| expected.push((u.raw, u.smoothed)));
        tracker.finish(|u| expected.push((u.raw, u.smoothed)));
        assert!(expected.len() > 10, "{} columns", expected.len());
        // More columns than one batch holds (`MAX_BATCH`), so the whole-signal block completes
        // a full batch and then a partial one; the small blocks complete a column or two each.
        assert!(expected.len() > MAX_BATCH + 1, "{} columns", expected.len());
        let mut reference = Vec::new();
        let mut reference_frames = Vec::new();
        for block in [x.len(), 1, 333, 4096] {
            let mut got = Vec::new();
            let mut frames = Vec::new();
            let mut on_frame = |f: &FrameResult| {
                if f.shares.updated {
                    got.push((f.shares.raw, f.shares.smoothed));
                }
                frames.push(*f);
            };
            for chunk in x.chunks(block) {
                analyzer.process(chunk, None, &mut on_frame);
            }
            analyzer.finish(&mut on_frame);
            analyzer.reset();
            assert_eq!(got, expected, "block {block}");
            // Every frame, those between columns included, whatever the block size.
            assert_eq!(frames.len(), 1 + x.len() / settings.framing.hop_len);
            if reference.is_empty() {
                reference = got;
                reference_frames = frames;
            } else {
                assert!(frames == reference_frames, "frames, block {block}");
            }
        }
        // A frame between columns carries the latest column's values, marked as not new.
        let mut latest = FrameShares::default();
        for f in &reference_frames {
            if f.shares.updated {
                latest = f.shares;
            } else {
                assert_eq!(
                    (f.shares.raw, f.shares.smoothed),
                    (latest.raw, latest.smoothed)
                );
            }
        }
        let (raw, _) = reference.last().expect("columns");
        assert!(raw.signal && raw.families == palette.families().len());
        let total: f32 = raw.share[..raw.families].iter().sum::<f32>() + raw.unexplained;
        assert!((total - 1.0).abs() < 1e-4, "shares sum to {total}");
    }

    #[test]
    fn processing_with_a_palette_does_not_allocate() {
        let palette = Palette::default_palette();
        let settings = AnalysisSettings::for_sample_rate(48_000.0).expect("valid");
        let mut analyzer =
            Analyzer::with_palette(settings, &palette, SharesSettings::default()).expect("palette");
        let x = shares_signal();
        // Small blocks, then the whole signal at once (full batches of columns).
        for block in [333, x.len()] {
            let mut updates = 0;
            assert_no_alloc::assert_no_alloc(|| {
                for chunk in x.chunks(block) {
                    analyzer.process(chunk, None, |f| updates += usize::from(f.shares.updated));
                }
                analyzer.finish(|f| updates += usize::from(f.shares.updated));
            });
            assert!(updates > MAX_BATCH, "{updates} updates, block {block}");
            analyzer.reset();
        }
    }
}
