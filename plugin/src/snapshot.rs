//! What the analysis thread publishes and the panel draws.
//!
//! A [`Snapshot`] describes itself: fixed-size arrays with the counts needed to read them, in raw
//! units (dBFS, Hz, samples). The panel does all display scaling.

/// Level history cells kept in a snapshot (one per [`LEVEL_HISTORY_CELL_S`]).
pub const LEVEL_HISTORY_LEN: usize = 100;
/// Seconds summarised by one level history cell.
pub const LEVEL_HISTORY_CELL_S: f64 = 0.1;

/// The newest analysis results, published through a triple buffer.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Snapshot {
    /// True while the plugin is active and its analysis thread runs.
    pub active: bool,
    /// True while the host renders offline (nothing is dropped then).
    pub offline: bool,
    /// Sample rate of the analysis signal, Hz (0 before the first activation).
    pub sample_rate_hz: f32,
    /// Channels of the main input (1 or 2).
    pub channels: u32,
    /// Samples the analysis has consumed since activation.
    pub samples_analysed: u64,
    /// Samples the audio thread dropped since activation because the ring was full.
    pub samples_dropped: u64,
    /// Frames analysed since activation.
    pub frames: u64,
    /// RMS level of the newest frame, dBFS.
    pub rms_db: f32,
    /// Sample peak of the newest frame, dBFS.
    pub peak_db: f32,
    /// RMS level smoothed with the response time, dBFS.
    pub rms_smoothed_db: f32,
    /// Loudest frame peak since activation, dBFS.
    pub peak_hold_db: f32,
    /// Mean RMS level per history cell, dBFS, oldest first; `level_history_len` are valid.
    pub level_history_db: [f32; LEVEL_HISTORY_LEN],
    /// Valid entries in `level_history_db`.
    pub level_history_len: usize,
}

impl Default for Snapshot {
    fn default() -> Self {
        let floor = weft_engine::SILENCE_FLOOR_DB;
        Self {
            active: false,
            offline: false,
            sample_rate_hz: 0.0,
            channels: 0,
            samples_analysed: 0,
            samples_dropped: 0,
            frames: 0,
            rms_db: floor,
            peak_db: floor,
            rms_smoothed_db: floor,
            peak_hold_db: floor,
            level_history_db: [floor; LEVEL_HISTORY_LEN],
            level_history_len: 0,
        }
    }
}

impl Snapshot {
    /// The valid part of the level history, oldest first.
    pub fn level_history(&self) -> &[f32] {
        &self.level_history_db[..self.level_history_len]
    }

    /// The snapshot as JSON, for test hosts and tools.
    pub fn to_json(&self) -> serde_json::Value {
        serde_json::json!({
            "active": self.active,
            "offline": self.offline,
            "sample_rate_hz": self.sample_rate_hz,
            "channels": self.channels,
            "samples_analysed": self.samples_analysed,
            "samples_dropped": self.samples_dropped,
            "frames": self.frames,
            "rms_db": self.rms_db,
            "peak_db": self.peak_db,
            "rms_smoothed_db": self.rms_smoothed_db,
            "peak_hold_db": self.peak_hold_db,
            "level_history_db": self.level_history(),
        })
    }
}
