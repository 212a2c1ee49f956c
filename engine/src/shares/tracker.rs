//! Samples in, shares out: the framer, the windowed FFT and the [`SharesEstimator`] in one
//! object, for callers that do not already frame the signal (the command-line tool, palette
//! learning and checks, tests). The plugin's [`crate::Analyzer`] feeds its own frames'
//! spectra to a [`SharesEstimator`] instead; both paths compute the same numbers.

use super::estimator::{SharesError, SharesEstimator, SharesSettings, SharesUpdate};
use crate::frames::{FrameConfig, Framer};
use crate::palette::Palette;
use crate::spectrum::Spectrum;

/// Streams a mono analysis signal into family shares. Allocates only in
/// [`SharesTracker::new`].
#[derive(Debug, Clone)]
pub struct SharesTracker {
    framer: Framer,
    spectrum: Spectrum,
    estimator: SharesEstimator,
}

impl SharesTracker {
    /// A tracker for `palette` at `sample_rate_hz`, with the engine's default framing for that
    /// rate ([`FrameConfig::for_sample_rate`]).
    pub fn new(
        palette: &Palette,
        settings: SharesSettings,
        sample_rate_hz: f64,
    ) -> Result<Self, SharesError> {
        let framing = FrameConfig::for_sample_rate(sample_rate_hz);
        Ok(Self {
            framer: Framer::new(framing),
            spectrum: Spectrum::new(framing.frame_len),
            estimator: SharesEstimator::new(palette, settings, sample_rate_hz, framing)?,
        })
    }

    /// The estimator (settings, sections, last update).
    pub fn estimator(&self) -> &SharesEstimator {
        &self.estimator
    }

    /// The estimator, to change its response time or known presence.
    pub fn estimator_mut(&mut self) -> &mut SharesEstimator {
        &mut self.estimator
    }

    /// Forgets all input.
    pub fn reset(&mut self) {
        self.framer.reset();
        self.estimator.reset();
    }

    /// Analyses a block of any size and calls `on_update` for every column completed (the
    /// columns of one block are completed together, see [`SharesEstimator::flush`]; the
    /// values do not depend on the block size). Does not allocate.
    pub fn process(&mut self, mid: &[f32], mut on_update: impl FnMut(&SharesUpdate)) {
        self.each_frame(mid, |t| t.push_frame(&mut on_update));
        self.estimator.flush(on_update);
    }

    /// Frames `mid` and calls `on_frame` for every frame completed (the framer's frame is then
    /// ready to read).
    fn each_frame(&mut self, mid: &[f32], mut on_frame: impl FnMut(&mut Self)) {
        let mut i = 0;
        while i < mid.len() {
            let (used, ready) = self.framer.feed(&mid[i..]);
            i += used;
            if ready {
                on_frame(self);
            }
        }
    }

    /// Completes the trailing centre padding, calling `on_frame` for every frame completed.
    fn each_tail_frame(&mut self, mut on_frame: impl FnMut(&mut Self)) {
        let mut left = self.framer.tail_len();
        while left > 0 {
            let (used, ready) = self.framer.feed_zeros(left);
            left -= used;
            if ready {
                on_frame(self);
            }
        }
    }

    /// Completes a whole clip (the trailing centre padding), reporting the last updates.
    pub fn finish(&mut self, mut on_update: impl FnMut(&SharesUpdate)) {
        self.each_tail_frame(|t| t.push_frame(&mut on_update));
        self.estimator.flush(on_update);
    }

    /// One frame into the estimator's batch, completing the batch when it is full.
    fn push_frame(&mut self, on_update: &mut impl FnMut(&SharesUpdate)) {
        self.spectrum.process(self.framer.frame());
        if self.estimator.push_power(self.spectrum.power()) && self.estimator.is_full() {
            self.estimator.flush(&mut *on_update);
        }
        self.framer.advance();
    }

    /// As [`SharesTracker::process`], but completes each column on its own and hands the
    /// estimator itself to `on_column` after it (its [`SharesEstimator::last`] is the update),
    /// so a caller can also read the presence features. Does not allocate.
    pub fn process_each(&mut self, mid: &[f32], mut on_column: impl FnMut(&mut SharesEstimator)) {
        self.each_frame(mid, |t| t.frame(&mut on_column));
    }

    /// As [`SharesTracker::finish`], handing the estimator to `on_column`.
    pub fn finish_each(&mut self, mut on_column: impl FnMut(&mut SharesEstimator)) {
        self.each_tail_frame(|t| t.frame(&mut on_column));
    }

    fn frame(&mut self, on_column: &mut impl FnMut(&mut SharesEstimator)) {
        self.spectrum.process(self.framer.frame());
        if self
            .estimator
            .process_power(self.spectrum.power())
            .is_some()
        {
            on_column(&mut self.estimator);
        }
        self.framer.advance();
    }
}
