//! Rows of a file's timeline: one per analysis frame ([`FrameRow`]) and one per window
//! ([`WindowRow`]), and the [`WindowSummarizer`] that turns the first into the second.
//!
//! Rows are plain `Serialize` structs with units in their field names; the writers in
//! [`crate::report`] turn them into JSON lines or CSV columns generically, so a group of values
//! added to a row (descriptors, shares, closeness) appears in every output without touching the
//! writers.
//!
//! Family shares (when the analysis has a palette) follow one rule everywhere: a window's share of
//! a family is the mean of the engine's *raw* per-frame shares over the window's frames that
//! carry a signal (`Shares::signal`: above the engine's no-signal floor,
//! `weft_engine::shares::NO_SIGNAL_DB`). Silent frames are left out rather than averaged in as
//! zeros, so a window half silence, half bass reads "bass 100 %", and the shares and
//! `unexplained` of a window with any signal sum to 1. A window without any such frame reads 0
//! for every share and for `unexplained` (the engine's own convention for silence), and its
//! `signal_frames` is 0.
//!
//! With a style model, each window row also carries a `closeness`: see [`ClosenessAssigner`]
//! for which style window a row takes it from.

use serde::Serialize;
use serde::ser::SerializeMap;
use std::collections::VecDeque;
use std::sync::Arc;
use weft_engine::FrameResult;
use weft_engine::level::amplitude_to_db;
use weft_engine::palette::{MAX_FAMILIES, Palette};
use weft_engine::shares::Shares;
use weft_engine::timbre::{Descriptors, N_CONTRAST, N_MFCC, N_SCALARS};
use weft_engine::windows::slug;

/// The names under which a palette's families appear in rows.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ShareNames {
    /// Family names as the palette spells them ("driven guitar"): the keys of `--frames`
    /// JSON lines' `shares` object.
    pub families: Vec<String>,
    /// `share_<slug>` per family (`share_driven_guitar`, see `weft_engine::windows::slug`): the
    /// window timeline's keys and every CSV column.
    pub columns: Vec<String>,
    /// Index of each family's section in `sections`.
    pub section_of: Vec<usize>,
    /// Section names, in the palette's order.
    pub sections: Vec<String>,
}

impl ShareNames {
    /// The names of `palette`'s families.
    pub fn of(palette: &Palette) -> Self {
        let families: Vec<String> = palette.families().iter().map(|f| f.name.clone()).collect();
        Self {
            columns: families
                .iter()
                .map(|f| format!("share_{}", slug(f)))
                .collect(),
            section_of: palette.families().iter().map(|f| f.section).collect(),
            sections: palette.sections().to_vec(),
            families,
        }
    }

    /// Number of families.
    pub fn len(&self) -> usize {
        self.families.len()
    }
}

/// Share values with the names they are written under (a JSON object, or one CSV column each).
#[derive(Debug, Clone, PartialEq)]
pub struct NamedShares {
    /// The names.
    pub names: Arc<ShareNames>,
    /// Whether to key by family name (`--frames`) instead of `share_<slug>`.
    pub by_family_name: bool,
    /// One value per family, 0–1, in the palette's order.
    pub values: Vec<f32>,
}

impl NamedShares {
    /// The value of family `i`.
    pub fn get(&self, i: usize) -> f32 {
        self.values.get(i).copied().unwrap_or(0.0)
    }
}

impl Serialize for NamedShares {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let keys = if self.by_family_name {
            &self.names.families
        } else {
            &self.names.columns
        };
        let mut map = serializer.serialize_map(Some(keys.len()))?;
        for (k, v) in keys.iter().zip(&self.values) {
            map.serialize_entry(k, v)?;
        }
        map.end()
    }
}

/// One analysis frame, as `--frames` writes it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FrameRow {
    /// Time of the frame's centre, seconds since the start of the file.
    pub t: f64,
    /// The frame's level.
    pub level: FrameLevel,
    /// The frame's timbre descriptors, named with their units (see `weft_engine::timbre`).
    pub descriptors: Descriptors,
    /// The frame's raw family shares, when the analysis has a palette (written through
    /// [`FrameOut`], which knows the families' names).
    #[serde(skip)]
    pub shares: Option<Shares>,
}

/// A frame row as `--frames` writes it: `t`, `level`, `descriptors` and, with a palette, `shares`
/// (family name → raw share, 0–1) and `unexplained` (0–1). In CSV the shares become `share_<slug>`
/// columns.
pub struct FrameOut<'a> {
    /// The row.
    pub row: &'a FrameRow,
    /// The palette's names, when the row has shares.
    pub names: Option<&'a Arc<ShareNames>>,
}

impl Serialize for FrameOut<'_> {
    fn serialize<S: serde::Serializer>(&self, serializer: S) -> Result<S::Ok, S::Error> {
        let shares = self.row.shares.zip(self.names);
        let mut map = serializer.serialize_map(Some(if shares.is_some() { 5 } else { 3 }))?;
        map.serialize_entry("t", &self.row.t)?;
        map.serialize_entry("level", &self.row.level)?;
        map.serialize_entry("descriptors", &self.row.descriptors)?;
        if let Some((s, names)) = shares {
            let values = (0..names.len())
                .map(|f| if f < s.families { s.share[f] } else { 0.0 })
                .collect();
            map.serialize_entry(
                "shares",
                &NamedShares {
                    names: Arc::clone(names),
                    by_family_name: true,
                    values,
                },
            )?;
            map.serialize_entry("unexplained", &s.unexplained)?;
        }
        map.end()
    }
}

/// A frame's level (mid and side, see `weft_engine::level`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FrameLevel {
    /// RMS level, dBFS.
    pub rms_dbfs: f32,
    /// Sample peak of the louder channel, dBFS.
    pub peak_dbfs: f32,
}

impl FrameRow {
    /// The row for one engine frame; `with_shares` when the analyzer has a palette (frames
    /// before its first column carry zero shares without a signal).
    pub fn from_engine(frame: &FrameResult, with_shares: bool) -> Self {
        Self {
            t: frame.time_s,
            level: FrameLevel {
                rms_dbfs: frame.level.rms_db,
                peak_dbfs: frame.level.peak_db,
            },
            descriptors: frame.descriptors,
            shares: with_shares.then_some(frame.shares.raw),
        }
    }
}

/// One window of the timeline: the frames whose centres fall in `[start_s, end_s)`.
///
/// Field order is column order: times, level, closeness, shares, then the descriptors.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct WindowRow {
    /// Start of the window, seconds.
    pub start_s: f64,
    /// End of the window, seconds (the end of the file for the last window).
    pub end_s: f64,
    /// Analysis frames summarised.
    pub frames: u32,
    /// The window's level.
    pub level: WindowLevel,
    /// Closeness to the style model's category, 0–1 (only with a style model; `null` if no style
    /// window could be assigned). See [`ClosenessAssigner`].
    #[serde(skip_serializing_if = "Option::is_none")]
    pub closeness: Option<Option<f32>>,
    /// Mean raw share of each family over the window's frames with a signal, 0–1 (only with a
    /// palette; see the module documentation).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub shares: Option<NamedShares>,
    /// Mean share the palette cannot explain, 0–1, same frames.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unexplained: Option<f32>,
    /// Frames of the window with a signal to share out (the frames the shares average).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub signal_frames: Option<u32>,
    /// Mean and standard deviation of the frames' descriptors.
    pub descriptors: WindowDescriptors,
}

impl WindowRow {
    /// Centre of the window, seconds.
    pub fn centre_s(&self) -> f64 {
        0.5 * (self.start_s + self.end_s)
    }
}

/// A window's level.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WindowLevel {
    /// Energy mean of the frames' RMS levels, dBFS: `10·log10(mean(10^(rms/10)))`.
    pub rms_dbfs: f32,
    /// The loudest frame's RMS level, dBFS.
    pub rms_max_dbfs: f32,
    /// The highest sample peak, dBFS.
    pub peak_dbfs: f32,
}

/// Mean and population standard deviation (ddof = 0, numpy's default) of one descriptor over
/// a window's frames, in the descriptor's unit.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Default)]
pub struct Stat {
    /// Mean.
    pub mean: f32,
    /// Standard deviation.
    pub sd: f32,
}

/// [`Stat`] of each element of a descriptor array.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct ArrayStat<const N: usize> {
    /// Means.
    #[serde(serialize_with = "serialize_array")]
    pub mean: [f32; N],
    /// Standard deviations.
    #[serde(serialize_with = "serialize_array")]
    pub sd: [f32; N],
}

fn serialize_array<S: serde::Serializer, const N: usize>(
    values: &[f32; N],
    serializer: S,
) -> Result<S::Ok, S::Error> {
    serializer.collect_seq(values.iter())
}

/// The window summary of a frame's [`Descriptors`]: every scalar descriptor, the MFCCs and the
/// contrast bands (the 128 mel powers are left to `--frames`). Units as in `Descriptors`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WindowDescriptors {
    /// Spectral centroid, Hz.
    pub centroid_hz: Stat,
    /// Spectral bandwidth, Hz.
    pub bandwidth_hz: Stat,
    /// Roll-off at 85 %, Hz.
    pub rolloff_hz: Stat,
    /// Roll-off at the custom fraction, Hz.
    pub rolloff_custom_hz: Stat,
    /// Spectral flatness, 0–1.
    pub flatness: Stat,
    /// Spectral flux (onset strength), dB.
    pub flux_db: Stat,
    /// Zero crossings per sample, 0–1.
    pub zero_crossings_per_sample: Stat,
    /// RMS amplitude, linear.
    pub rms: Stat,
    /// MFCCs.
    pub mfcc: ArrayStat<N_MFCC>,
    /// Spectral contrast per band, dB.
    pub contrast_db: ArrayStat<N_CONTRAST>,
}

/// Values summarised per window: the scalars, the MFCCs, the contrast bands.
const N_SUMMARISED: usize = N_SCALARS + N_MFCC + N_CONTRAST;

fn summarised_values(d: &Descriptors) -> [f64; N_SUMMARISED] {
    let mut v = [0.0; N_SUMMARISED];
    let scalars = d.scalars();
    for (slot, x) in v
        .iter_mut()
        .zip(scalars.iter().chain(&d.mfcc).chain(&d.contrast_db))
    {
        *slot = f64::from(*x);
    }
    v
}

/// Sums for means and standard deviations.
#[derive(Debug, Clone, Copy)]
struct DescriptorAcc {
    sum: [f64; N_SUMMARISED],
    sum_sq: [f64; N_SUMMARISED],
}

impl DescriptorAcc {
    fn new() -> Self {
        Self {
            sum: [0.0; N_SUMMARISED],
            sum_sq: [0.0; N_SUMMARISED],
        }
    }

    fn add(&mut self, d: &Descriptors) {
        for (i, x) in summarised_values(d).into_iter().enumerate() {
            self.sum[i] += x;
            self.sum_sq[i] += x * x;
        }
    }

    fn stat(&self, i: usize, n: f64) -> Stat {
        let mean = self.sum[i] / n;
        let var = (self.sum_sq[i] / n - mean * mean).max(0.0);
        Stat {
            mean: mean as f32,
            sd: var.sqrt() as f32,
        }
    }

    fn array_stat<const N: usize>(&self, offset: usize, n: f64) -> ArrayStat<N> {
        ArrayStat {
            mean: std::array::from_fn(|j| self.stat(offset + j, n).mean),
            sd: std::array::from_fn(|j| self.stat(offset + j, n).sd),
        }
    }

    fn summary(&self, frames: u32) -> WindowDescriptors {
        let n = f64::from(frames.max(1));
        WindowDescriptors {
            centroid_hz: self.stat(0, n),
            bandwidth_hz: self.stat(1, n),
            rolloff_hz: self.stat(2, n),
            rolloff_custom_hz: self.stat(3, n),
            flatness: self.stat(4, n),
            flux_db: self.stat(5, n),
            zero_crossings_per_sample: self.stat(6, n),
            rms: self.stat(7, n),
            mfcc: self.array_stat(N_SCALARS, n),
            contrast_db: self.array_stat(N_SCALARS + N_MFCC, n),
        }
    }
}

/// The range (lowest and highest window mean) of the scalar descriptors over a file.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct DescriptorRanges {
    /// Spectral centroid, Hz.
    pub centroid_hz: [f32; 2],
    /// Spectral bandwidth, Hz.
    pub bandwidth_hz: [f32; 2],
    /// Roll-off at 85 %, Hz.
    pub rolloff_hz: [f32; 2],
    /// Spectral flatness, 0–1.
    pub flatness: [f32; 2],
    /// Spectral flux, dB.
    pub flux_db: [f32; 2],
    /// Zero crossings per sample, 0–1.
    pub zero_crossings_per_sample: [f32; 2],
}

impl DescriptorRanges {
    fn empty() -> Self {
        let e = [f32::INFINITY, f32::NEG_INFINITY];
        Self {
            centroid_hz: e,
            bandwidth_hz: e,
            rolloff_hz: e,
            flatness: e,
            flux_db: e,
            zero_crossings_per_sample: e,
        }
    }

    fn add(&mut self, w: &WindowDescriptors) {
        let widen = |r: &mut [f32; 2], s: Stat| {
            r[0] = r[0].min(s.mean);
            r[1] = r[1].max(s.mean);
        };
        widen(&mut self.centroid_hz, w.centroid_hz);
        widen(&mut self.bandwidth_hz, w.bandwidth_hz);
        widen(&mut self.rolloff_hz, w.rolloff_hz);
        widen(&mut self.flatness, w.flatness);
        widen(&mut self.flux_db, w.flux_db);
        widen(
            &mut self.zero_crossings_per_sample,
            w.zero_crossings_per_sample,
        );
    }
}

/// A file's whole-length figures, accumulated over every frame.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Totals {
    /// Analysis frames.
    pub frames: u64,
    /// Energy mean of all frames' RMS levels, dBFS.
    pub rms_dbfs: f32,
    /// The highest sample peak, dBFS.
    pub peak_dbfs: f32,
    /// The loudest window's level (energy mean), dBFS.
    pub loudest_window_dbfs: f32,
    /// The quietest window's level (energy mean), dBFS.
    pub quietest_window_dbfs: f32,
    /// Lowest and highest window mean of the scalar descriptors.
    pub descriptor_ranges: DescriptorRanges,
    /// Mean raw share of each family over all frames with a signal, 0–1 (with a palette).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub shares: Option<NamedShares>,
    /// Mean unexplained share over the same frames, 0–1.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub unexplained: Option<f32>,
    /// Frames with a signal to share out.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub signal_frames: Option<u64>,
}

impl Totals {
    /// The `n` families with the highest mean share, highest first (ties keep palette order),
    /// with their shares (0–1); families at 0 are left out.
    pub fn dominant_families(&self, n: usize) -> Vec<(&str, f32)> {
        let Some(shares) = &self.shares else {
            return Vec::new();
        };
        let mut order: Vec<usize> = (0..shares.values.len())
            .filter(|&i| shares.values[i] > 0.0)
            .collect();
        order.sort_by(|&a, &b| shares.values[b].total_cmp(&shares.values[a]));
        order
            .into_iter()
            .take(n)
            .map(|i| (shares.names.families[i].as_str(), shares.values[i]))
            .collect()
    }
}

/// Sums of raw shares over frames with a signal.
#[derive(Debug, Clone, Copy)]
struct ShareAcc {
    sum: [f64; MAX_FAMILIES],
    unexplained: f64,
    frames: u64,
}

impl ShareAcc {
    fn new() -> Self {
        Self {
            sum: [0.0; MAX_FAMILIES],
            unexplained: 0.0,
            frames: 0,
        }
    }

    fn add(&mut self, s: &Shares) {
        if !s.signal {
            return;
        }
        for (acc, &v) in self
            .sum
            .iter_mut()
            .zip(&s.share[..s.families.min(MAX_FAMILIES)])
        {
            *acc += f64::from(v);
        }
        self.unexplained += f64::from(s.unexplained);
        self.frames += 1;
    }

    /// Means over the frames with a signal (all 0 without one).
    fn means(&self, names: &Arc<ShareNames>) -> (NamedShares, f32) {
        let n = self.frames.max(1) as f64;
        let values = (0..names.len())
            .map(|i| (self.sum.get(i).copied().unwrap_or(0.0) / n) as f32)
            .collect();
        (
            NamedShares {
                names: Arc::clone(names),
                by_family_name: false,
                values,
            },
            (self.unexplained / n) as f32,
        )
    }
}

/// Energy sums for one window.
#[derive(Debug, Clone, Copy)]
struct WindowAcc {
    index: u64,
    frames: u32,
    power: f64,
    rms_max_db: f32,
    peak_db: f32,
    descriptors: DescriptorAcc,
    shares: ShareAcc,
}

impl WindowAcc {
    fn new(index: u64) -> Self {
        Self {
            index,
            frames: 0,
            power: 0.0,
            rms_max_db: f32::NEG_INFINITY,
            peak_db: f32::NEG_INFINITY,
            descriptors: DescriptorAcc::new(),
            shares: ShareAcc::new(),
        }
    }

    fn add(&mut self, frame: &FrameRow) {
        self.frames += 1;
        self.power += db_to_power(frame.level.rms_dbfs);
        self.rms_max_db = self.rms_max_db.max(frame.level.rms_dbfs);
        self.peak_db = self.peak_db.max(frame.level.peak_dbfs);
        self.descriptors.add(&frame.descriptors);
        if let Some(s) = &frame.shares {
            self.shares.add(s);
        }
    }
}

fn db_to_power(db: f32) -> f64 {
    10f64.powf(f64::from(db) / 10.0)
}

fn power_to_db(power: f64) -> f32 {
    amplitude_to_db(power.sqrt())
}

/// Groups frames into windows of a fixed number of samples.
///
/// Frame `k` (centred on sample `k · hop`) belongs to window `⌊k · hop / window_len⌋`. The whole-
/// clip path ends with a frame centred exactly on the last sample boundary; when that boundary is
/// also a window boundary, that frame joins the last real window instead of opening an empty one.
/// So a clip of `n` samples has `max(1, ⌈n / window_len⌉)` windows.
#[derive(Debug)]
pub struct WindowSummarizer {
    window_len: u64,
    hop_len: u64,
    sample_rate_hz: f64,
    held: Option<(u64, FrameRow)>,
    current: Option<WindowAcc>,
    total_frames: u64,
    total_power: f64,
    total_peak_db: f32,
    loudest_db: f32,
    quietest_db: f32,
    ranges: DescriptorRanges,
    share_names: Option<Arc<ShareNames>>,
    total_shares: ShareAcc,
}

impl WindowSummarizer {
    /// Windows of `window_len` samples for frames `hop_len` samples apart at `sample_rate_hz`.
    /// `window_len` must be at least `hop_len` (checked by the caller), so no window is empty.
    /// With `share_names`, rows and totals carry the frames' family shares.
    pub fn new(
        window_len: u64,
        hop_len: u64,
        sample_rate_hz: f64,
        share_names: Option<Arc<ShareNames>>,
    ) -> Self {
        debug_assert!(window_len >= hop_len && hop_len > 0);
        Self {
            window_len,
            hop_len,
            sample_rate_hz,
            held: None,
            current: None,
            total_frames: 0,
            total_power: 0.0,
            total_peak_db: f32::NEG_INFINITY,
            loudest_db: f32::NEG_INFINITY,
            quietest_db: f32::INFINITY,
            ranges: DescriptorRanges::empty(),
            share_names,
            total_shares: ShareAcc::new(),
        }
    }

    /// Adds the next frame (index `index` since the start); calls `emit` for each window it
    /// completes.
    pub fn push(&mut self, index: u64, frame: FrameRow, emit: &mut impl FnMut(&WindowRow)) {
        if let Some((held_index, held)) = self.held.take() {
            let window = held_index * self.hop_len / self.window_len;
            self.commit(window, &held, None, emit);
        }
        self.held = Some((index, frame));
    }

    /// Completes the timeline of a clip of `total_samples` samples, emitting the last window,
    /// and returns the whole-length figures.
    pub fn finish(&mut self, total_samples: u64, emit: &mut impl FnMut(&WindowRow)) -> Totals {
        let last_window = total_samples.div_ceil(self.window_len).max(1) - 1;
        if let Some((held_index, held)) = self.held.take() {
            let window = (held_index * self.hop_len / self.window_len).min(last_window);
            self.commit(window, &held, Some(total_samples), emit);
        }
        if let Some(acc) = self.current.take() {
            self.emit_window(acc, Some(total_samples), emit);
        }
        let (loudest, quietest) = if self.loudest_db.is_finite() {
            (self.loudest_db, self.quietest_db)
        } else {
            (weft_engine::SILENCE_FLOOR_DB, weft_engine::SILENCE_FLOOR_DB)
        };
        let shares = self
            .share_names
            .as_ref()
            .map(|names| self.total_shares.means(names));
        Totals {
            frames: self.total_frames,
            rms_dbfs: power_to_db(self.total_power / self.total_frames.max(1) as f64),
            peak_dbfs: self.total_peak_db.max(weft_engine::SILENCE_FLOOR_DB),
            loudest_window_dbfs: loudest,
            quietest_window_dbfs: quietest,
            descriptor_ranges: self.ranges,
            signal_frames: shares.is_some().then_some(self.total_shares.frames),
            unexplained: shares.as_ref().map(|s| s.1),
            shares: shares.map(|s| s.0),
        }
    }

    fn commit(
        &mut self,
        window: u64,
        frame: &FrameRow,
        total_samples: Option<u64>,
        emit: &mut impl FnMut(&WindowRow),
    ) {
        self.total_frames += 1;
        self.total_power += db_to_power(frame.level.rms_dbfs);
        self.total_peak_db = self.total_peak_db.max(frame.level.peak_dbfs);
        if let Some(s) = &frame.shares {
            self.total_shares.add(s);
        }
        match &mut self.current {
            Some(acc) if acc.index == window => acc.add(frame),
            _ => {
                if let Some(done) = self.current.take() {
                    self.emit_window(done, total_samples, emit);
                }
                let mut acc = WindowAcc::new(window);
                acc.add(frame);
                self.current = Some(acc);
            }
        }
    }

    fn emit_window(
        &mut self,
        acc: WindowAcc,
        total_samples: Option<u64>,
        emit: &mut impl FnMut(&WindowRow),
    ) {
        let start = acc.index * self.window_len;
        let mut end = start + self.window_len;
        if let Some(total) = total_samples {
            end = end.min(total.max(start));
        }
        let rms_dbfs = power_to_db(acc.power / f64::from(acc.frames.max(1)));
        self.loudest_db = self.loudest_db.max(rms_dbfs);
        self.quietest_db = self.quietest_db.min(rms_dbfs);
        let descriptors = acc.descriptors.summary(acc.frames);
        self.ranges.add(&descriptors);
        let shares = self.share_names.as_ref().map(|n| acc.shares.means(n));
        emit(&WindowRow {
            start_s: start as f64 / self.sample_rate_hz,
            end_s: end as f64 / self.sample_rate_hz,
            frames: acc.frames,
            level: WindowLevel {
                rms_dbfs,
                rms_max_dbfs: acc.rms_max_db,
                peak_dbfs: acc.peak_db,
            },
            closeness: None,
            signal_frames: shares.is_some().then_some(acc.shares.frames as u32),
            unexplained: shares.as_ref().map(|s| s.1),
            shares: shares.map(|s| s.0),
            descriptors,
        });
    }
}

/// Gives each timeline row the closeness of one style window: **the style window whose centre
/// is nearest the row's centre** (the earlier one on a tie). Style windows are 3 s long every
/// 1 s by default (`weft_engine::windows`) while rows follow `--window`, so a row near the start
/// takes the first style window and a file shorter than one style window gives every row the
/// same value.
///
/// Style windows complete up to a window length after the rows they cover, so rows are held
/// back until the nearest style window is known (a style window centred at or after the row's
/// centre has arrived, or the file ended): a few rows at most, whatever the file's length.
#[derive(Debug, Default)]
pub struct ClosenessAssigner {
    pending: VecDeque<WindowRow>,
    /// Style windows not yet ruled out: (centre, closeness), in time order.
    estimates: VecDeque<(f64, f32)>,
}

impl ClosenessAssigner {
    /// An assigner with nothing held.
    pub fn new() -> Self {
        Self::default()
    }

    /// A completed row; emits the rows whose closeness is decided.
    pub fn push_row(&mut self, row: WindowRow, emit: &mut impl FnMut(&WindowRow)) {
        self.pending.push_back(row);
        self.release(false, emit);
    }

    /// A completed style window (centre in seconds, closeness 0–1), in time order.
    pub fn push_estimate(
        &mut self,
        centre_s: f64,
        closeness: f32,
        emit: &mut impl FnMut(&WindowRow),
    ) {
        self.estimates.push_back((centre_s, closeness));
        self.release(false, emit);
    }

    /// The end of the file: emits every held row.
    pub fn finish(&mut self, emit: &mut impl FnMut(&WindowRow)) {
        self.release(true, emit);
    }

    fn release(&mut self, finishing: bool, emit: &mut impl FnMut(&WindowRow)) {
        while let Some(front) = self.pending.front() {
            let c = front.centre_s();
            let after = self.estimates.iter().position(|&(e, _)| e >= c);
            if after.is_none() && !finishing {
                return;
            }
            // The last style window centred at or before c, and the first at or after it.
            let before = self.estimates.iter().rposition(|&(e, _)| e <= c);
            let chosen = match (before, after) {
                (Some(b), Some(a)) => {
                    let (eb, ea) = (self.estimates[b].0, self.estimates[a].0);
                    if c - eb <= ea - c { b } else { a }
                }
                (Some(i), None) | (None, Some(i)) => i,
                (None, None) => usize::MAX,
            };
            let value = self.estimates.get(chosen).map(|&(_, v)| v);
            if let Some(mut row) = self.pending.pop_front() {
                row.closeness = Some(value);
                emit(&row);
            }
            // Later rows are centred later: windows before `before` can no longer be nearest.
            if let Some(b) = before {
                self.estimates.drain(..b);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn frame(t: f64, rms_dbfs: f32, peak_dbfs: f32) -> FrameRow {
        // A centroid that tracks the level, so its window statistics are known in closed form.
        let mut mfcc = [0.0; N_MFCC];
        mfcc[19] = rms_dbfs;
        let descriptors = Descriptors {
            centroid_hz: -rms_dbfs * 100.0,
            mfcc,
            ..Descriptors::default()
        };
        FrameRow {
            t,
            level: FrameLevel {
                rms_dbfs,
                peak_dbfs,
            },
            descriptors,
            shares: None,
        }
    }

    fn run(
        n_samples: u64,
        hop: u64,
        window: u64,
        levels: &[(f32, f32)],
    ) -> (Vec<WindowRow>, Totals) {
        let mut s = WindowSummarizer::new(window, hop, 100.0, None);
        let mut rows = Vec::new();
        for (k, &(r, p)) in levels.iter().enumerate() {
            s.push(
                k as u64,
                frame(k as f64 * hop as f64 / 100.0, r, p),
                &mut |w| rows.push(w.clone()),
            );
        }
        let totals = s.finish(n_samples, &mut |w| rows.push(w.clone()));
        (rows, totals)
    }

    #[test]
    fn windows_take_the_frames_centred_in_them() {
        // 250 samples at 100 Hz, hop 25, window 100: frames centred at 0, 25, …, 250 (11 frames,
        // the whole-clip count 1 + n/hop); windows [0,1) s, [1,2) s, [2,2.5) s.
        let levels: Vec<(f32, f32)> = (0..11)
            .map(|k| (-20.0 - k as f32, -10.0 + k as f32 * 0.1))
            .collect();
        let (rows, totals) = run(250, 25, 100, &levels);
        assert_eq!(rows.len(), 3);
        assert_eq!(rows.iter().map(|r| r.frames).collect::<Vec<_>>(), [4, 4, 3]);
        assert_eq!((rows[2].start_s, rows[2].end_s), (2.0, 2.5));
        // Energy mean of −20…−23 dB, by the formula.
        let expected: f64 = (0..4)
            .map(|k| 10f64.powf((-20.0 - f64::from(k)) / 10.0))
            .sum::<f64>()
            / 4.0;
        assert!((f64::from(rows[0].level.rms_dbfs) - 10.0 * expected.log10()).abs() < 1e-4);
        assert_eq!(rows[0].level.rms_max_dbfs, -20.0);
        assert_eq!(rows[1].level.peak_dbfs, levels[7].1);
        assert_eq!(totals.frames, 11);
        assert_eq!(totals.loudest_window_dbfs, rows[0].level.rms_dbfs);
        assert_eq!(totals.quietest_window_dbfs, rows[2].level.rms_dbfs);
        // Centroids 2000, 2100, 2200, 2300 Hz: mean 2150, population sd √12500.
        let c = rows[0].descriptors.centroid_hz;
        assert!(
            (c.mean - 2150.0).abs() < 1e-3 && (c.sd - 12_500f32.sqrt()).abs() < 1e-3,
            "{c:?}"
        );
        let m = rows[0].descriptors.mfcc;
        assert!((m.mean[19] + 21.5).abs() < 1e-5 && m.mean[0] == 0.0 && m.sd[0] == 0.0);
        assert_eq!(
            totals.descriptor_ranges.centroid_hz,
            [2150.0, c_last(&rows)]
        );
    }

    fn c_last(rows: &[WindowRow]) -> f32 {
        rows[2].descriptors.centroid_hz.mean
    }

    #[test]
    fn a_frame_on_the_final_boundary_joins_the_last_window() {
        // 200 samples, hop 50: frames at 0, 50, 100, 150, 200; two windows of 100, not three.
        let levels = vec![(-30.0, -20.0); 5];
        let (rows, _) = run(200, 50, 100, &levels);
        assert_eq!(rows.len(), 2);
        assert_eq!(rows[1].frames, 3);
        assert_eq!(rows[1].end_s, 2.0);
    }

    fn names() -> Arc<ShareNames> {
        Arc::new(ShareNames {
            families: vec!["bass".into(), "driven guitar".into()],
            columns: vec!["share_bass".into(), "share_driven_guitar".into()],
            section_of: vec![0, 1],
            sections: vec!["bass".into(), "guitars".into()],
        })
    }

    fn with_shares(mut row: FrameRow, signal: bool, bass: f32, guitar: f32) -> FrameRow {
        let mut s = Shares {
            signal,
            families: 2,
            ..Shares::default()
        };
        s.share[0] = bass;
        s.share[1] = guitar;
        s.unexplained = if signal { 1.0 - bass - guitar } else { 0.0 };
        row.shares = Some(s);
        row
    }

    #[test]
    fn shares_average_the_frames_with_a_signal() {
        // Window 0: two frames with a signal (bass 0.6 and 0.2) and one silent frame;
        // window 1: silent only. Hop 25, window 75 samples at 100 Hz.
        let frames = [
            with_shares(frame(0.0, -20.0, -10.0), true, 0.6, 0.3),
            with_shares(frame(0.25, -20.0, -10.0), true, 0.2, 0.5),
            with_shares(frame(0.5, -160.0, -160.0), false, 0.0, 0.0),
            with_shares(frame(0.75, -160.0, -160.0), false, 0.0, 0.0),
        ];
        let mut s = WindowSummarizer::new(75, 25, 100.0, Some(names()));
        let mut rows = Vec::new();
        for (k, f) in frames.iter().enumerate() {
            s.push(k as u64, *f, &mut |w| rows.push(w.clone()));
        }
        let totals = s.finish(100, &mut |w| rows.push(w.clone()));
        assert_eq!(rows.len(), 2);
        let w0 = rows[0].shares.as_ref().expect("shares");
        assert!((w0.get(0) - 0.4).abs() < 1e-6 && (w0.get(1) - 0.4).abs() < 1e-6);
        assert!((rows[0].unexplained.expect("unexplained") - 0.2).abs() < 1e-6);
        assert_eq!(rows[0].signal_frames, Some(2));
        let w1 = rows[1].shares.as_ref().expect("shares");
        assert_eq!(
            (w1.get(0), w1.get(1), rows[1].signal_frames),
            (0.0, 0.0, Some(0))
        );
        // The whole file: the same two frames; guitar ties bass and keeps palette order.
        assert_eq!(totals.signal_frames, Some(2));
        let dominant = totals.dominant_families(3);
        assert_eq!(dominant.len(), 2);
        assert_eq!(dominant[0].0, "bass");
        // Written under share_<slug> keys.
        let json = serde_json::to_value(&rows[0]).expect("json");
        assert!((json["shares"]["share_driven_guitar"].as_f64().expect("v") - 0.4).abs() < 1e-6);
        let out = FrameOut {
            row: &frames[0],
            names: Some(&names()),
        };
        let json = serde_json::to_value(&out).expect("json");
        assert!((json["shares"]["driven guitar"].as_f64().expect("v") - 0.3).abs() < 1e-6);
    }

    fn row_at(start_s: f64, end_s: f64) -> WindowRow {
        let (rows, _) = run(100, 50, 100, &[(-20.0, -10.0); 3]);
        WindowRow {
            start_s,
            end_s,
            ..rows[0].clone()
        }
    }

    #[test]
    fn rows_take_the_nearest_style_window_in_order() {
        // Rows of 0.5 s; style windows centred at 1.5, 2.5, 3.5 s arrive 1.5 s after their
        // centre, as 3-s windows every second do.
        let mut a = ClosenessAssigner::new();
        let mut out: Vec<(f64, Option<f32>)> = Vec::new();
        let mut emit = |r: &WindowRow| out.push((r.centre_s(), r.closeness.flatten()));
        let estimates = [(1.5, 0.1), (2.5, 0.2), (3.5, 0.3)];
        let mut next = 0;
        for i in 0..10 {
            let (start, end) = (0.5 * f64::from(i), 0.5 * f64::from(i + 1));
            while next < estimates.len() && estimates[next].0 + 1.5 <= end {
                a.push_estimate(estimates[next].0, estimates[next].1, &mut emit);
                next += 1;
            }
            a.push_row(row_at(start, end), &mut emit);
        }
        for &(c, v) in &estimates[next..] {
            a.push_estimate(c, v, &mut emit);
        }
        a.finish(&mut emit);
        let want = [
            (0.25, 0.1),
            (0.75, 0.1),
            (1.25, 0.1),
            (1.75, 0.1),
            (2.25, 0.2),
            (2.75, 0.2),
            (3.25, 0.3),
            (3.75, 0.3),
            (4.25, 0.3),
            (4.75, 0.3),
        ];
        assert_eq!(out.len(), want.len());
        for ((c, v), (wc, wv)) in out.iter().zip(want) {
            assert_eq!(*c, wc);
            assert_eq!(*v, Some(wv), "row at {c}");
        }
        // A tie (row centre 2.0 between 1.5 and 2.5) takes the earlier window.
        let mut a = ClosenessAssigner::new();
        let mut got = None;
        a.push_estimate(1.5, 0.1, &mut |_| {});
        a.push_row(row_at(1.5, 2.5), &mut |r| got = Some(r.closeness));
        a.push_estimate(2.5, 0.2, &mut |r| got = Some(r.closeness));
        assert_eq!(got, Some(Some(Some(0.1))));
        // No style window at all: rows still come out, without a value.
        let mut a = ClosenessAssigner::new();
        let mut got = Vec::new();
        a.push_row(row_at(0.0, 1.0), &mut |r| got.push(r.closeness));
        assert!(got.is_empty(), "held until decided");
        a.finish(&mut |r| got.push(r.closeness));
        assert_eq!(got, [Some(None)]);
    }

    #[test]
    fn silence_reads_the_floor() {
        let floor = weft_engine::SILENCE_FLOOR_DB;
        let (rows, totals) = run(100, 50, 100, &[(floor, floor); 3]);
        assert_eq!(rows[0].level.rms_dbfs, floor);
        assert_eq!(totals.rms_dbfs, floor);
        assert_eq!(totals.peak_dbfs, floor);
    }
}
