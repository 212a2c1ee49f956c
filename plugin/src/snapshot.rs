//! What the analysis thread publishes and the panel draws.
//!
//! A [`Snapshot`] describes itself: fixed-size arrays with the counts needed to read them, in raw
//! units (dBFS, Hz, samples). The panel does all display scaling. Names (families, sections,
//! the category, feature names) live in [`Labels`], shared by `Arc` and replaced only when a
//! palette or style model is loaded. The long history of the mix travels apart, in a
//! [`MixHistory`] published twice a second.

use std::sync::Arc;
use weft_engine::palette::{MAX_FAMILIES, MAX_SECTIONS};
use weft_engine::shares::Shares;
use weft_engine::style::{MAX_REASONS, Relation};

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

/// Seconds summarised by one cell of the mix history.
pub const MIX_HISTORY_CELL_S: f64 = 0.5;
/// Cells of mix history kept: ten minutes.
pub const MIX_HISTORY_LEN: usize = 1200;
/// Reasons the snapshot carries per estimate.
pub const SNAPSHOT_REASONS: usize = 3;

const _: () = assert!(SNAPSHOT_REASONS <= MAX_REASONS);

/// Names for what the snapshot's numbers mean, and the state of loaded files.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Labels {
    /// The palette's name ("built-in" when none was loaded).
    pub palette: String,
    /// The palette file, when one was loaded from a file.
    pub palette_path: Option<String>,
    /// Family names, palette order.
    pub families: Vec<String>,
    /// Section of each family.
    pub section_of: Vec<usize>,
    /// Section names, display order.
    pub sections: Vec<String>,
    /// What went wrong with the last palette request, in words (the built-in palette is used).
    pub palette_problem: Option<String>,
    /// The loaded style model, if any.
    pub style: Option<StyleLabels>,
    /// What went wrong with the last style request, in words.
    pub style_problem: Option<String>,
    /// The set log being written, if any.
    pub log_file: Option<String>,
    /// What went wrong with the set log, in words.
    pub log_problem: Option<String>,
}

/// Names of a loaded style model.
#[derive(Debug, Clone, PartialEq)]
pub struct StyleLabels {
    /// The file it came from.
    pub path: String,
    /// Category (class) names, model order.
    pub classes: Vec<String>,
    /// The class the panel shows closeness for (the named category in a one-vs-rest model).
    pub category: usize,
    /// Feature names, schema order (reasons point into it).
    pub features: Vec<String>,
    /// Model type, in words.
    pub model: String,
    /// Cross-validated balanced error of the tracks, mean and sd, 0–1.
    pub cv_balanced_error: (f64, f64),
    /// Tracks it was trained on.
    pub tracks: usize,
}

/// The live instrument mix: family shares smoothed with the response time.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct MixReading {
    /// Share updates since activation (0: none yet).
    pub updates: u64,
    /// The smoothed shares (`families` valid entries; sum with `unexplained` to 1 when
    /// `signal`).
    pub shares: Shares,
    /// The same summed per section.
    pub sections: [f32; MAX_SECTIONS],
}

/// One reason of a style estimate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ReasonReading {
    /// Feature index in [`StyleLabels::features`].
    pub feature: usize,
    /// Change of the closeness's log-odds due to the feature (positive raises it).
    pub push_log_odds: f32,
    /// The window's value against the category's training mean.
    pub relation: Relation,
}

/// The latest style estimate.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct StyleReading {
    /// Windows estimated since the model was loaded (0: none yet).
    pub windows: u64,
    /// Calibrated closeness to each class, 0–1 (`classes` valid entries).
    pub closeness: [f32; 8],
    /// Valid entries in `closeness`.
    pub classes: usize,
    /// The strongest reasons for the category, strongest first.
    pub reasons: [Option<ReasonReading>; SNAPSHOT_REASONS],
}

/// The set log's state.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct LogReading {
    /// Whether a set log is being written.
    pub recording: bool,
    /// Rows written to the current (or last) log.
    pub rows: u64,
}

/// One cell of the mix history: means over [`MIX_HISTORY_CELL_S`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct HistoryCell {
    /// Energy-weighted mean share of each family.
    pub shares: [f32; MAX_FAMILIES],
    /// Energy-weighted mean unexplained share.
    pub unexplained: f32,
    /// Mean closeness to the category, 0–1; NaN without a style estimate in the cell.
    pub closeness: f32,
    /// Mean RMS level, dBFS.
    pub rms_db: f32,
    /// Whether the cell had any signal.
    pub signal: bool,
}

impl Default for HistoryCell {
    fn default() -> Self {
        Self {
            shares: [0.0; MAX_FAMILIES],
            unexplained: 0.0,
            closeness: f32::NAN,
            rms_db: weft_engine::SILENCE_FLOOR_DB,
            signal: false,
        }
    }
}

/// The last ten minutes of the mix, oldest cell first.
#[derive(Debug, Clone, PartialEq)]
pub struct MixHistory {
    /// [`MIX_HISTORY_LEN`] cells; the first `len` are valid.
    pub cells: Vec<HistoryCell>,
    /// Valid cells.
    pub len: usize,
    /// Cells completed since activation (numbers the newest cell).
    pub completed: u64,
    /// Labels of the palette the cells were measured with.
    pub labels: Arc<Labels>,
}

impl Default for MixHistory {
    fn default() -> Self {
        Self {
            cells: vec![HistoryCell::default(); MIX_HISTORY_LEN],
            len: 0,
            completed: 0,
            labels: Arc::default(),
        }
    }
}

impl MixHistory {
    /// The valid cells, oldest first.
    pub fn cells(&self) -> &[HistoryCell] {
        &self.cells[..self.len]
    }

    /// Appends a cell, forgetting the oldest when full. Does not allocate.
    pub fn push(&mut self, cell: HistoryCell) {
        if self.len == self.cells.len() {
            self.cells.copy_within(1.., 0);
            self.len -= 1;
        }
        self.cells[self.len] = cell;
        self.len += 1;
        self.completed += 1;
    }

    /// Copies `other` into `self` without allocating (both hold [`MIX_HISTORY_LEN`] cells).
    pub fn copy_from(&mut self, other: &Self) {
        self.cells.copy_from_slice(&other.cells);
        self.len = other.len;
        self.completed = other.completed;
        if !Arc::ptr_eq(&self.labels, &other.labels) {
            self.labels = other.labels.clone();
        }
    }
}

/// The newest analysis results, published through a triple buffer.
#[derive(Debug, Clone, PartialEq)]
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
    /// The live instrument mix.
    pub mix: MixReading,
    /// The latest style estimate.
    pub style: StyleReading,
    /// The set log.
    pub log: LogReading,
    /// Names for the numbers, and the state of loaded files.
    pub labels: Arc<Labels>,
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
            mix: MixReading::default(),
            style: StyleReading::default(),
            log: LogReading::default(),
            labels: Arc::default(),
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
        let labels = &self.labels;
        let n = self.mix.shares.families.min(labels.families.len());
        let shares: serde_json::Map<String, serde_json::Value> = (0..n)
            .map(|f| (labels.families[f].clone(), self.mix.shares.share[f].into()))
            .collect();
        let style = labels.style.as_ref().map(|st| {
            serde_json::json!({
                "path": st.path,
                "category": st.classes.get(st.category),
                "windows": self.style.windows,
                "closeness": self.style.closeness.get(st.category),
                "reasons": self.style.reasons.iter().flatten().map(|r| serde_json::json!({
                    "feature": st.features.get(r.feature),
                    "push_log_odds": r.push_log_odds,
                    "relation": r.relation,
                })).collect::<Vec<_>>(),
            })
        });
        serde_json::json!({
            "palette": labels.palette,
            "palette_problem": labels.palette_problem,
            "mix": {
                "updates": self.mix.updates,
                "signal": self.mix.shares.signal,
                "shares": shares,
                "unexplained": self.mix.shares.unexplained,
            },
            "style": style,
            "style_problem": labels.style_problem,
            "log": {
                "recording": self.log.recording,
                "rows": self.log.rows,
                "file": labels.log_file,
                "problem": labels.log_problem,
            },
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
