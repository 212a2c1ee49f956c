//! Rows of a file's timeline: one per analysis frame ([`FrameRow`]) and one per window
//! ([`WindowRow`]), and the [`WindowSummarizer`] that turns the first into the second.
//!
//! Rows are plain `Serialize` structs with units in their field names; the writers in
//! [`crate::report`] turn them into JSON lines or CSV columns generically, so a group of values
//! added to a row (descriptors, shares, closeness) appears in every output without touching the
//! writers.

use serde::Serialize;
use weft_engine::FrameResult;
use weft_engine::level::amplitude_to_db;
use weft_engine::timbre::{Descriptors, N_CONTRAST, N_MFCC, N_SCALARS};

/// One analysis frame, as `--frames` writes it.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FrameRow {
    /// Time of the frame's centre, seconds since the start of the file.
    pub t: f64,
    /// The frame's level.
    pub level: FrameLevel,
    /// The frame's timbre descriptors, named with their units (see `weft_engine::timbre`).
    pub descriptors: Descriptors,
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
    /// The row for one engine frame.
    pub fn from_engine(frame: &FrameResult) -> Self {
        Self {
            t: frame.time_s,
            level: FrameLevel {
                rms_dbfs: frame.level.rms_db,
                peak_dbfs: frame.level.peak_db,
            },
            descriptors: frame.descriptors,
        }
    }
}

/// One window of the timeline: the frames whose centres fall in `[start_s, end_s)`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct WindowRow {
    /// Start of the window, seconds.
    pub start_s: f64,
    /// End of the window, seconds (the end of the file for the last window).
    pub end_s: f64,
    /// Analysis frames summarised.
    pub frames: u32,
    /// The window's level.
    pub level: WindowLevel,
    /// Mean and standard deviation of the frames' descriptors.
    pub descriptors: WindowDescriptors,
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
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
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
        }
    }

    fn add(&mut self, frame: &FrameRow) {
        self.frames += 1;
        self.power += db_to_power(frame.level.rms_dbfs);
        self.rms_max_db = self.rms_max_db.max(frame.level.rms_dbfs);
        self.peak_db = self.peak_db.max(frame.level.peak_dbfs);
        self.descriptors.add(&frame.descriptors);
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
}

impl WindowSummarizer {
    /// Windows of `window_len` samples for frames `hop_len` samples apart at `sample_rate_hz`.
    /// `window_len` must be at least `hop_len` (checked by the caller), so no window is empty.
    pub fn new(window_len: u64, hop_len: u64, sample_rate_hz: f64) -> Self {
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
        Totals {
            frames: self.total_frames,
            rms_dbfs: power_to_db(self.total_power / self.total_frames.max(1) as f64),
            peak_dbfs: self.total_peak_db.max(weft_engine::SILENCE_FLOOR_DB),
            loudest_window_dbfs: loudest,
            quietest_window_dbfs: quietest,
            descriptor_ranges: self.ranges,
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
        emit(&WindowRow {
            start_s: start as f64 / self.sample_rate_hz,
            end_s: end as f64 / self.sample_rate_hz,
            frames: acc.frames,
            level: WindowLevel {
                rms_dbfs,
                rms_max_dbfs: acc.rms_max_db,
                peak_dbfs: acc.peak_db,
            },
            descriptors,
        });
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
        }
    }

    fn run(
        n_samples: u64,
        hop: u64,
        window: u64,
        levels: &[(f32, f32)],
    ) -> (Vec<WindowRow>, Totals) {
        let mut s = WindowSummarizer::new(window, hop, 100.0);
        let mut rows = Vec::new();
        for (k, &(r, p)) in levels.iter().enumerate() {
            s.push(
                k as u64,
                frame(k as f64 * hop as f64 / 100.0, r, p),
                &mut |w| rows.push(*w),
            );
        }
        let totals = s.finish(n_samples, &mut |w| rows.push(*w));
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

    #[test]
    fn silence_reads_the_floor() {
        let floor = weft_engine::SILENCE_FLOOR_DB;
        let (rows, totals) = run(100, 50, 100, &[(floor, floor); 3]);
        assert_eq!(rows[0].level.rms_dbfs, floor);
        assert_eq!(totals.rms_dbfs, floor);
        assert_eq!(totals.peak_dbfs, floor);
    }
}
