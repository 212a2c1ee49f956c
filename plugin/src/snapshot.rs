//! What the analysis thread publishes and the panel draws.
//!
//! A [`Snapshot`] describes itself: fixed-size arrays with the counts needed to read them, in raw
//! units (dBFS, Hz, samples). The panel does all display scaling.

/// History cells kept in a snapshot (one per [`LEVEL_HISTORY_CELL_S`]).
pub const LEVEL_HISTORY_LEN: usize = 100;
/// Seconds summarised by one history cell.
pub const LEVEL_HISTORY_CELL_S: f64 = 0.1;

/// The timbre descriptors the panel shows, smoothed with the response time. Raw units.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct TimbreReading {
    /// Spectral centroid, Hz (power-weighted over frames, so quiet gaps do not drag it to 0).
    pub centroid_hz: f32,
    /// Spectral bandwidth (p = 2), Hz (power-weighted like the centroid).
    pub bandwidth_hz: f32,
    /// 85 % roll-off frequency, Hz (power-weighted like the centroid).
    pub rolloff_hz: f32,
    /// Spectral flatness, 0 (tonal) to 1 (noise-like).
    pub flatness: f32,
    /// Spectral flux (onset strength), dB per frame.
    pub flux_db: f32,
    /// Zero crossings per sample, 0–1.
    pub zero_crossings_per_sample: f32,
}

/// One history cell: means over [`LEVEL_HISTORY_CELL_S`].
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct TrendCell {
    /// Mean RMS level, dBFS.
    pub rms_db: f32,
    /// Power-weighted mean centroid, Hz.
    pub centroid_hz: f32,
    /// Power-weighted mean 85 % roll-off, Hz.
    pub rolloff_hz: f32,
    /// Mean flatness, 0–1.
    pub flatness: f32,
    /// Mean flux, dB per frame.
    pub flux_db: f32,
}

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
    /// Smoothed timbre descriptors of the newest frames.
    pub timbre: TimbreReading,
    /// History cells, oldest first; `history_len` are valid.
    pub history: [TrendCell; LEVEL_HISTORY_LEN],
    /// Valid entries in `history`.
    pub history_len: usize,
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
            timbre: TimbreReading::default(),
            history: [TrendCell::default(); LEVEL_HISTORY_LEN],
            history_len: 0,
        }
    }
}

impl Snapshot {
    /// The valid part of the history, oldest first.
    pub fn history(&self) -> &[TrendCell] {
        &self.history[..self.history_len]
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
            "level_history_db": self.history().iter().map(|c| c.rms_db).collect::<Vec<_>>(),
            "timbre": {
                "centroid_hz": self.timbre.centroid_hz,
                "bandwidth_hz": self.timbre.bandwidth_hz,
                "rolloff_hz": self.timbre.rolloff_hz,
                "flatness": self.timbre.flatness,
                "flux_db": self.timbre.flux_db,
                "zero_crossings_per_sample": self.timbre.zero_crossings_per_sample,
            },
        })
    }
}
