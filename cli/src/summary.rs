//! What a batch prints: the summary table for people, JSON lines for machines, and the closing
//! throughput line.
//!
//! The table is a list of [`Column`]s, each a heading and a function of a file's report: level
//! figures, the range of window means of the centroid and flatness, the dominant families (the
//! three with the highest mean share over the frames with a signal) when shares were estimated,
//! and the mean closeness and the time above 50 % with a style model.

use crate::analyze::{BatchResult, FileReport, StyleTarget};
use crate::plot::clock;
use crate::timeline::{Totals, WindowRow};
use serde::Serialize;
use std::path::Path;

/// One column of the summary table.
struct Column {
    heading: &'static str,
    right_aligned: bool,
    cell: fn(&FileReport) -> String,
}

fn db(v: f32) -> String {
    format!("{v:.1}")
}

/// Families named in the table's "dominant families" column.
pub const DOMINANT_FAMILIES: usize = 3;

fn percent(v: f64) -> String {
    format!("{:.0} %", 100.0 * v)
}

/// The dominant families of a file: `voice 41 %, piano 22 %, bass 9 %`.
pub fn dominant_text(r: &FileReport) -> String {
    let d = r.totals.dominant_families(DOMINANT_FAMILIES);
    if d.is_empty() {
        return "(silent)".to_owned();
    }
    d.iter()
        .map(|(name, v)| format!("{name} {}", percent(f64::from(*v))))
        .collect::<Vec<_>>()
        .join(", ")
}

const SHARE_COLUMNS: &[Column] = &[Column {
    heading: "dominant families (mean share)",
    right_aligned: false,
    cell: dominant_text,
}];

const STYLE_COLUMNS: &[Column] = &[
    Column {
        heading: "closeness mean",
        right_aligned: true,
        cell: |r| {
            r.closeness_summary()
                .map_or_else(String::new, |c| percent(c.mean))
        },
    },
    Column {
        heading: "time > 50 %",
        right_aligned: true,
        cell: |r| {
            r.closeness_summary()
                .map_or_else(String::new, |c| percent(c.above_half))
        },
    },
];

const COLUMNS: &[Column] = &[
    Column {
        heading: "length",
        right_aligned: true,
        cell: |r| clock(r.duration_s),
    },
    Column {
        heading: "source",
        right_aligned: false,
        cell: |r| {
            format!(
                "{} {} Hz {} ch",
                r.source.codec, r.source.sample_rate_hz, r.source.channels
            )
        },
    },
    Column {
        heading: "RMS dBFS",
        right_aligned: true,
        cell: |r| db(r.totals.rms_dbfs),
    },
    Column {
        heading: "peak dBFS",
        right_aligned: true,
        cell: |r| db(r.totals.peak_dbfs),
    },
    Column {
        heading: "loudest window dBFS",
        right_aligned: true,
        cell: |r| db(r.totals.loudest_window_dbfs),
    },
    Column {
        heading: "quietest window dBFS",
        right_aligned: true,
        cell: |r| db(r.totals.quietest_window_dbfs),
    },
    Column {
        heading: "centroid Hz",
        right_aligned: true,
        cell: |r| {
            let [lo, hi] = r.totals.descriptor_ranges.centroid_hz;
            format!("{lo:.0}–{hi:.0}")
        },
    },
    Column {
        heading: "flatness",
        right_aligned: true,
        cell: |r| {
            let [lo, hi] = r.totals.descriptor_ranges.flatness;
            format!("{lo:.3}–{hi:.3}")
        },
    },
];

/// The summary table, one line per successful file (failures were already reported).
pub fn table(batch: &BatchResult) -> String {
    let ok: Vec<&FileReport> = batch
        .results
        .iter()
        .filter_map(|(_, r)| r.as_ref().ok())
        .collect();
    if ok.is_empty() {
        return String::new();
    }
    let mut columns: Vec<&Column> = COLUMNS.iter().collect();
    if ok.iter().any(|r| r.totals.shares.is_some()) {
        columns.extend(SHARE_COLUMNS);
    }
    if ok.iter().any(|r| !r.style_estimates.is_empty()) {
        columns.extend(STYLE_COLUMNS);
    }
    let mut rows: Vec<Vec<String>> = vec![
        std::iter::once("file".to_owned())
            .chain(columns.iter().map(|c| c.heading.to_owned()))
            .collect(),
    ];
    for r in &ok {
        rows.push(
            std::iter::once(r.path.display().to_string())
                .chain(columns.iter().map(|c| (c.cell)(r)))
                .collect(),
        );
    }
    let widths: Vec<usize> = (0..rows[0].len())
        .map(|i| rows.iter().map(|r| r[i].chars().count()).max().unwrap_or(0))
        .collect();
    let mut out = String::new();
    for row in &rows {
        let cells: Vec<String> = row
            .iter()
            .enumerate()
            .map(|(i, cell)| {
                let right = i > 0 && columns[i - 1].right_aligned;
                if right {
                    format!("{cell:>w$}", w = widths[i])
                } else {
                    format!("{cell:<w$}", w = widths[i])
                }
            })
            .collect();
        out.push_str(cells.join("  ").trim_end());
        out.push('\n');
    }
    out
}

/// The file's source as JSON.
#[derive(Serialize)]
struct SourceJson<'a> {
    container: &'a str,
    codec: &'a str,
    sample_rate_hz: u32,
    channels: usize,
}

/// The analysis settings as JSON.
#[derive(Serialize)]
struct AnalysisJson {
    sample_rate_hz: u32,
    frame_len: usize,
    hop_len: usize,
    window_s: f64,
}

/// One file's line of `--json` output.
#[derive(Serialize)]
struct FileJson<'a> {
    file: String,
    ok: bool,
    #[serde(skip_serializing_if = "Option::is_none")]
    error: Option<&'a str>,
    #[serde(skip_serializing_if = "Option::is_none")]
    source: Option<SourceJson<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    analysis: Option<AnalysisJson>,
    #[serde(skip_serializing_if = "Option::is_none")]
    duration_s: Option<f64>,
    #[serde(skip_serializing_if = "Option::is_none")]
    totals: Option<&'a Totals>,
    #[serde(skip_serializing_if = "Option::is_none")]
    rows_file: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    plot_file: Option<String>,
    #[serde(skip_serializing_if = "Option::is_none")]
    style: Option<StyleJson<'a>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    windows: Option<&'a [WindowRow]>,
}

/// A file's closeness to the style model's category, as JSON.
#[derive(Serialize)]
struct StyleJson<'a> {
    model: String,
    category: &'a str,
    /// Mean closeness (0–1), fraction of style windows above 0.5, and their count.
    closeness: crate::analyze::ClosenessSummary,
    /// Every style window: first and last frame centres (s) and closeness (0–1).
    style_windows: Vec<StyleWindowJson>,
}

#[derive(Serialize)]
struct StyleWindowJson {
    start_s: f64,
    end_s: f64,
    closeness: f64,
}

fn path_text(p: &Path) -> String {
    p.display().to_string()
}

/// One JSON line per file, in input order; `style` is the style model the batch used.
pub fn json_lines(
    batch: &BatchResult,
    style: Option<&StyleTarget>,
) -> serde_json::Result<Vec<String>> {
    batch
        .results
        .iter()
        .map(|(path, result)| {
            let line = match result {
                Ok(r) => FileJson {
                    file: path_text(path),
                    ok: true,
                    error: None,
                    source: Some(SourceJson {
                        container: &r.source.container,
                        codec: &r.source.codec,
                        sample_rate_hz: r.source.sample_rate_hz,
                        channels: r.source.channels,
                    }),
                    analysis: Some(AnalysisJson {
                        sample_rate_hz: r.analysis_rate_hz,
                        frame_len: r.framing.frame_len,
                        hop_len: r.framing.hop_len,
                        window_s: r.window_s,
                    }),
                    duration_s: Some(r.duration_s),
                    totals: Some(&r.totals),
                    rows_file: r.rows_file.as_deref().map(path_text),
                    plot_file: r.plot_file.as_deref().map(path_text),
                    style: style
                        .zip(r.closeness_summary())
                        .map(|(t, closeness)| StyleJson {
                            model: path_text(&t.path),
                            category: t.category_name(),
                            closeness,
                            style_windows: r
                                .style_estimates
                                .iter()
                                .map(|e| StyleWindowJson {
                                    start_s: e.start_s,
                                    end_s: e.end_s,
                                    closeness: e.closeness,
                                })
                                .collect(),
                        }),
                    windows: Some(&r.windows),
                },
                Err(reason) => FileJson {
                    file: path_text(path),
                    ok: false,
                    error: Some(reason),
                    source: None,
                    analysis: None,
                    duration_s: None,
                    totals: None,
                    rows_file: None,
                    plot_file: None,
                    style: None,
                    windows: None,
                },
            };
            serde_json::to_string(&line)
        })
        .collect()
}

/// The batch's closing figures.
#[derive(Debug, Serialize)]
pub struct BatchJson {
    /// Files attempted.
    pub files: usize,
    /// Files that failed.
    pub failed: usize,
    /// Seconds of audio analysed.
    pub audio_s: f64,
    /// Wall-clock seconds.
    pub elapsed_s: f64,
    /// Audio seconds per wall-clock second.
    pub realtime_factor: f64,
    /// Worker threads used.
    pub threads: usize,
}

impl BatchJson {
    /// The figures of a batch.
    pub fn of(batch: &BatchResult) -> Self {
        let failed = batch.results.iter().filter(|(_, r)| r.is_err()).count();
        Self {
            files: batch.results.len(),
            failed,
            audio_s: batch.audio_s,
            elapsed_s: batch.elapsed_s,
            realtime_factor: batch.audio_s / batch.elapsed_s.max(1e-9),
            threads: batch.threads,
        }
    }

    /// `analysed N s of audio in M s: X× real time (Y× per thread on T threads); F files, K failed`.
    pub fn line(&self) -> String {
        format!(
            "analysed {:.1} s of audio in {:.2} s: {:.0}× real time ({:.0}× per thread on {} thread{}); {} file{}, {} failed",
            self.audio_s,
            self.elapsed_s,
            self.realtime_factor,
            self.realtime_factor / self.threads.max(1) as f64,
            self.threads,
            if self.threads == 1 { "" } else { "s" },
            self.files,
            if self.files == 1 { "" } else { "s" },
            self.failed
        )
    }
}
