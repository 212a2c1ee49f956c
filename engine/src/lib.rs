//! Weft's analysis engine.
//!
//! Everything that turns audio into numbers lives here, with no GUI, plugin or audio I/O
//! dependency, so the plugin, the standalone program and the command-line tool all run the same
//! code. One module per concept:
//!
//! - [`frames`]: the streaming framer (any block size in, hop-aligned frames out);
//! - [`level`]: per-frame RMS and peak level in dBFS;
//! - [`analyzer`]: the [`Analyzer`] that feeds frames to every measurement.

#![forbid(unsafe_code)]

pub mod analyzer;
pub mod frames;
pub mod level;

pub use analyzer::{AnalysisSettings, Analyzer, FrameResult, SettingsError};
pub use frames::{FrameConfig, Framer, FramingError};
pub use level::{Level, SILENCE_FLOOR_DB};

#[cfg(test)]
#[global_allocator]
static ALLOCATOR: assert_no_alloc::AllocDisabler = assert_no_alloc::AllocDisabler;
