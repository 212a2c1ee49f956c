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

#[cfg(test)]
#[global_allocator]
static ALLOCATOR: assert_no_alloc::AllocDisabler = assert_no_alloc::AllocDisabler;
