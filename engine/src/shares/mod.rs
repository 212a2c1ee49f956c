//! Shares: each family's fraction of the mix's energy, live, in two stages (presence, then
//! amount), plus the share the palette cannot explain.
//!
//! - [`SharesEstimator`]: per-frame power spectra in (the plugin's [`crate::Analyzer`] feeds
//!   its own), one [`SharesUpdate`] per column out (≥ 10 Hz). No allocation per frame.
//! - [`SharesTracker`]: the same from raw samples of any block size (framer and FFT included):
//!   the command-line tool, palette learning and checks use it.
//! - [`nmf`]: β-divergence NMF (fixed dictionary, and dictionary learning).
//! - [`presence`]: the presence features and models.
//! - [`trees`]: gradient-boosted trees, the presence model's second opinion.
//! - [`split`]: split atoms, fitted to divide the amount stage's energy as the stems do.
//! - [`check`]: scoring against exact ground truth.

pub mod check;
mod columns;
mod estimator;
pub mod fine;
pub mod nmf;
pub mod presence;
pub mod split;
mod tracker;
pub mod trees;

pub use columns::ColumnStream;
pub use estimator::{
    DEFAULT_RESPONSE_MS, MAX_BATCH, MAX_RESPONSE_MS, NO_SIGNAL_DB, ONSET_RISE_FRACTION,
    SOLVE_TOLERANCE, Shares, SharesError, SharesEstimator, SharesMode, SharesSettings,
    SharesUpdate,
};
pub use presence::{
    DEFAULT_SHARE_ADMIT, PresenceModel, PresenceTraining, ShareNetwork, ShareTraining,
    train_presence, train_share_network,
};
pub use tracker::SharesTracker;
