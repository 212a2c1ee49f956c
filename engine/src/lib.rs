//! Weft's analysis engine.
//!
//! Everything that turns audio into numbers lives here, with no GUI, plugin or audio I/O
//! dependency, so the plugin, the standalone program and the command-line tool all run the same
//! code. One module per concept:
//!
//! - [`frames`]: the streaming framer (any block size in, hop-aligned frames out);
//! - [`level`]: per-frame RMS and peak level in dBFS;
//! - [`bands`]: band layouts in Hz (mel, log-frequency) and their sparse filterbanks;
//! - [`spectrum`]: the windowed FFT of a frame (magnitude and power);
//! - [`timbre`]: per-frame descriptors equal to librosa 0.11.0's ([`Descriptors`]);
//! - [`palette`]: families, sections, atoms and presence models (the built-in default palette);
//! - [`shares`]: live family shares in two stages (presence, then amount), and their checks;
//! - [`scene`]: seeded composed scenes rendered from a SoundFont, with exact ground truth;
//! - [`analyzer`]: the [`Analyzer`] that feeds frames to every measurement;
//! - [`style`]: style models (forest, linear SVM, logistic regression), closeness and reasons;
//! - [`evaluation`]: cross-validation folds, balanced error, confusion, calibration tables;
//! - [`windows`]: window statistics of frames, the features style models read, live and offline.

#![forbid(unsafe_code)]

pub mod analyzer;
pub mod bands;
pub mod evaluation;
pub mod frames;
pub mod level;
pub mod palette;
mod parallel;
pub mod scene;
pub mod shares;
pub mod spectrum;
pub mod style;
pub mod timbre;
pub mod windows;

pub use analyzer::{AnalysisSettings, Analyzer, FrameResult, FrameShares, SettingsError};
pub use frames::{FrameConfig, Framer, FramingError};
pub use level::{Level, SILENCE_FLOOR_DB};
pub use timbre::{Descriptors, Timbre, TimbreOptions};

/// An error and its sources in one line, joined by ": ", leaving out a source whose text the
/// line already holds (an error that quotes its cause would otherwise say it twice).
pub fn error_chain(err: &dyn std::error::Error) -> String {
    let mut text = err.to_string();
    let mut source = err.source();
    while let Some(s) = source {
        let part = s.to_string();
        if !text.contains(&part) {
            text.push_str(": ");
            text.push_str(&part);
        }
        source = s.source();
    }
    text
}

#[cfg(test)]
#[global_allocator]
static ALLOCATOR: assert_no_alloc::AllocDisabler = assert_no_alloc::AllocDisabler;

#[cfg(test)]
mod tests {
    use super::error_chain;
    use crate::palette::PaletteError;

    #[test]
    fn error_chains_say_each_cause_once() {
        // PaletteError::InFamily quotes its cause in its own text.
        let inner = PaletteError::Invalid {
            field: "atoms",
            reason: "too many".into(),
        };
        let inner_text = inner.to_string();
        let err = inner.in_family("kick");
        let line = error_chain(&err);
        assert_eq!(line.matches(&inner_text).count(), 1, "{line}");
        assert!(line.starts_with("family 'kick'"), "{line}");
        // A cause the message does not quote is appended.
        #[derive(Debug)]
        struct Reading(PaletteError);
        impl std::fmt::Display for Reading {
            fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                f.write_str("reading the palette")
            }
        }
        impl std::error::Error for Reading {
            fn source(&self) -> Option<&(dyn std::error::Error + 'static)> {
                Some(&self.0)
            }
        }
        let outer = Reading(err);
        assert_eq!(error_chain(&outer), format!("reading the palette: {line}"));
    }
}
