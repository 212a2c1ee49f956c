//! `weft analyze`: one file through decoder, optional resampler, the engine's [`Analyzer`] and
//! the window summary ([`analyse_file`]); many files in parallel with a progress bar
//! ([`run_batch`]).

use crate::decode::{Source, SourceInfo};
use crate::plot::{self, PlotFormat, PlotPanel};
use crate::report::{AtomicFile, RowFormat, RowWriter};
use crate::resample::StreamResampler;
use crate::timeline::{FrameRow, Totals, WindowRow, WindowSummarizer};
use anyhow::{Context, Result, bail};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rayon::prelude::*;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Instant;
use weft_engine::{AnalysisSettings, Analyzer, FrameConfig, FrameResult};

/// Extensions picked up when a folder is searched (files named explicitly are always tried).
pub const AUDIO_EXTENSIONS: &[&str] = &[
    "wav", "wave", "flac", "mp3", "ogg", "oga", "m4a", "mp4", "aac", "aif", "aiff", "caf", "mka",
    "mkv", "webm",
];

/// How every file of a batch is analysed.
#[derive(Debug, Clone)]
pub struct AnalyzeOptions {
    /// Window length, seconds.
    pub window_s: f64,
    /// Framing in samples at the analysis rate; `None` for the engine's default for that rate.
    pub framing: Option<FrameConfig>,
    /// Resample every file to this rate first, Hz.
    pub resample_hz: Option<u32>,
    /// Per-frame rows instead of per-window rows, and how.
    pub frames: FramesMode,
}

/// What one file's analysis produced.
#[derive(Debug, Clone)]
pub struct FileReport {
    /// The file.
    pub path: PathBuf,
    /// What the file declares.
    pub source: SourceInfo,
    /// The analysis sample rate, Hz (the file's, or `--sample-rate`).
    pub analysis_rate_hz: u32,
    /// The framing used, samples at the analysis rate.
    pub framing: FrameConfig,
    /// Window length used, seconds.
    pub window_s: f64,
    /// Length of the analysed audio, seconds.
    pub duration_s: f64,
    /// The timeline.
    pub windows: Vec<WindowRow>,
    /// Whole-length figures.
    pub totals: Totals,
    /// The rows file written, if any.
    pub rows_file: Option<PathBuf>,
    /// The plot written for this file, if any.
    pub plot_file: Option<PathBuf>,
}

/// How `--frames` computes its frames.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FramesMode {
    /// No per-frame rows: per-window rows, streamed (the live convention, bounded memory).
    Off,
    /// Per-frame rows equal to librosa 0.11.0: the whole clip is decoded into memory (at most
    /// [`MAX_CLIP_FRAMES`]) and analysed with `Analyzer::analyze_clip`, which applies librosa's
    /// whole-clip `top_db` floor to MFCC, flux and contrast.
    WholeClip,
    /// Per-frame rows streamed with the live convention (no whole-clip floor), as the plugin
    /// computes them; memory stays bounded whatever the length.
    Live,
}

/// The longest clip `--frames` holds in memory, in sample frames at the analysis rate (2^26:
/// about 23 minutes at 48 kHz, 512 MiB for mid and side).
pub const MAX_CLIP_FRAMES: usize = 1 << 26;

/// Everything downstream of the decoder, fed block by block.
struct Pipeline<'w, W: Write> {
    analyzer: Analyzer,
    summarizer: WindowSummarizer,
    windows: Vec<WindowRow>,
    frames_out: bool,
    rows: Option<&'w mut RowWriter<W>>,
    error: Option<anyhow::Error>,
    /// The whole clip, for [`FramesMode::WholeClip`].
    clip: Option<(Vec<f32>, Vec<f32>)>,
}

impl<W: Write> Pipeline<'_, W> {
    fn feed(&mut self, mid: &[f32], side: &[f32]) {
        if let Some((clip_mid, clip_side)) = &mut self.clip {
            if clip_mid.len() + mid.len() > MAX_CLIP_FRAMES {
                if self.error.is_none() {
                    self.error = Some(anyhow::anyhow!(
                        "longer than the {MAX_CLIP_FRAMES} samples --frames holds in memory to apply \
                         librosa's whole-clip floor (use --live for bounded memory)"
                    ));
                }
                return;
            }
            clip_mid.extend_from_slice(mid);
            clip_side.extend_from_slice(side);
            return;
        }
        let Self {
            analyzer,
            summarizer,
            windows,
            frames_out,
            rows,
            error,
            ..
        } = self;
        analyzer.process(mid, Some(side), |f| {
            on_frame(f, summarizer, windows, *frames_out, rows, error);
        });
    }

    /// Completes the clip; returns the whole-length figures and the samples analysed.
    fn finish(&mut self) -> (Totals, u64) {
        let Self {
            analyzer,
            summarizer,
            windows,
            frames_out,
            rows,
            error,
            clip,
        } = self;
        let total_samples = match clip.take() {
            Some((mid, side)) => {
                for f in &analyzer.analyze_clip(&mid, Some(&side)) {
                    on_frame(f, summarizer, windows, *frames_out, rows, error);
                }
                mid.len() as u64
            }
            None => {
                analyzer.finish(|f| on_frame(f, summarizer, windows, *frames_out, rows, error));
                analyzer.samples_in()
            }
        };
        let totals = summarizer.finish(total_samples, &mut |w| {
            windows.push(*w);
            if !*frames_out {
                write_row(rows, error, w);
            }
        });
        (totals, total_samples)
    }
}

fn on_frame<W: Write>(
    f: &FrameResult,
    summarizer: &mut WindowSummarizer,
    windows: &mut Vec<WindowRow>,
    frames_out: bool,
    rows: &mut Option<&mut RowWriter<W>>,
    error: &mut Option<anyhow::Error>,
) {
    let row = FrameRow::from_engine(f);
    if frames_out {
        write_row(rows, error, &row);
    }
    summarizer.push(f.index, row, &mut |w| {
        windows.push(*w);
        if !frames_out {
            write_row(rows, error, w);
        }
    });
}

fn write_row<W: Write, T: serde::Serialize>(
    rows: &mut Option<&mut RowWriter<W>>,
    error: &mut Option<anyhow::Error>,
    row: &T,
) {
    if error.is_some() {
        return;
    }
    if let Some(rows) = rows
        && let Err(err) = rows.write(row)
    {
        *error = Some(err);
    }
}

/// Analyses one file, writing its rows (frames or windows, per `options.frames`) to `rows` as
/// they come, and calling `progress(seconds)` with the seconds of audio decoded.
pub fn analyse_file<W: Write>(
    path: &Path,
    options: &AnalyzeOptions,
    rows: Option<&mut RowWriter<W>>,
    progress: &mut impl FnMut(f64),
) -> Result<FileReport> {
    let mut source = Source::open(path)?;
    let info = source.info().clone();
    // Rates outside the engine's range are resampled to the nearest end of it.
    let (lo_hz, hi_hz) = weft_engine::analyzer::SAMPLE_RATE_RANGE_HZ;
    let rate_hz = options
        .resample_hz
        .unwrap_or_else(|| info.sample_rate_hz.clamp(lo_hz as u32, hi_hz as u32));
    let framing = options
        .framing
        .unwrap_or_else(|| FrameConfig::for_sample_rate(f64::from(rate_hz)));
    // `with_timbre` checks the descriptor settings too, so `Analyzer::new` cannot refuse them.
    let settings = AnalysisSettings::new(f64::from(rate_hz), framing)
        .and_then(|s| s.with_timbre(s.timbre))
        .with_context(|| {
            format!(
                "cannot analyse at {rate_hz} Hz with {}-sample frames",
                framing.frame_len
            )
        })?;
    let window_len = (options.window_s * f64::from(rate_hz)).round() as u64;
    if window_len < framing.hop_len as u64 {
        bail!(
            "a window of {} s is shorter than the hop of {} samples at {rate_hz} Hz",
            options.window_s,
            framing.hop_len
        );
    }
    let mut resampler = if rate_hz == info.sample_rate_hz {
        None
    } else {
        Some(StreamResampler::new(info.sample_rate_hz, rate_hz)?)
    };
    let mut pipeline = Pipeline {
        analyzer: Analyzer::new(settings),
        summarizer: WindowSummarizer::new(window_len, framing.hop_len as u64, f64::from(rate_hz)),
        windows: Vec::new(),
        frames_out: options.frames != FramesMode::Off,
        rows,
        error: None,
        clip: (options.frames == FramesMode::WholeClip).then(|| (Vec::new(), Vec::new())),
    };
    let source_rate = f64::from(info.sample_rate_hz);
    while let Some((mid, side)) = source.next_block()? {
        progress(mid.len() as f64 / source_rate);
        match &mut resampler {
            Some(r) => r.process(mid, side, &mut |m, s| pipeline.feed(m, s))?,
            None => pipeline.feed(mid, side),
        }
        if let Some(err) = pipeline.error.take() {
            return Err(err);
        }
    }
    if let Some(r) = &mut resampler {
        r.finish(&mut |m, s| pipeline.feed(m, s))?;
    }
    if let Some(err) = pipeline.error.take() {
        return Err(err);
    }
    let (totals, total_samples) = pipeline.finish();
    if let Some(err) = pipeline.error.take() {
        return Err(err.context("cannot write the rows"));
    }
    let duration_s = total_samples as f64 / f64::from(rate_hz);
    Ok(FileReport {
        path: path.to_owned(),
        source: info,
        analysis_rate_hz: rate_hz,
        framing,
        window_s: options.window_s,
        duration_s,
        windows: pipeline.windows,
        totals,
        rows_file: None,
        plot_file: None,
    })
}

/// Expands folders (recursively, audio extensions only, hidden entries skipped, sorted) and keeps
/// files as given. Folders without audio are reported in the second list.
pub fn collect_inputs(paths: &[PathBuf]) -> (Vec<PathBuf>, Vec<(PathBuf, String)>) {
    let mut files = Vec::new();
    let mut problems = Vec::new();
    for path in paths {
        if path.is_dir() {
            let before = files.len();
            if let Err(err) = walk(path, &mut files) {
                problems.push((path.clone(), format!("cannot read the folder: {err}")));
            } else if files.len() == before {
                problems.push((path.clone(), "no audio files in this folder".to_owned()));
            }
        } else {
            files.push(path.clone());
        }
    }
    (files, problems)
}

fn walk(dir: &Path, files: &mut Vec<PathBuf>) -> std::io::Result<()> {
    let mut entries: Vec<_> = std::fs::read_dir(dir)?
        .filter_map(|e| e.ok())
        .filter(|e| !e.file_name().to_string_lossy().starts_with('.'))
        .collect();
    entries.sort_by_key(|e| e.file_name());
    for entry in entries {
        let path = entry.path();
        let kind = entry.file_type()?;
        if kind.is_dir() {
            walk(&path, files)?;
        } else if path
            .extension()
            .and_then(|e| e.to_str())
            .is_some_and(|e| AUDIO_EXTENSIONS.contains(&e.to_ascii_lowercase().as_str()))
        {
            files.push(path);
        }
    }
    Ok(())
}

/// Output names for a batch: each file's name, with `-2`, `-3`, … added to repeats so that two
/// `take.wav` from different folders do not overwrite each other.
pub fn output_names(files: &[PathBuf]) -> Vec<String> {
    let mut seen = std::collections::HashMap::<String, usize>::new();
    files
        .iter()
        .map(|f| {
            let name = f
                .file_name()
                .map_or_else(|| "audio".to_owned(), |n| n.to_string_lossy().into_owned());
            let count = seen.entry(name.clone()).or_insert(0);
            *count += 1;
            if *count == 1 {
                name
            } else {
                format!("{name}-{count}")
            }
        })
        .collect()
}

/// Where a batch writes.
#[derive(Debug, Clone)]
pub struct BatchOutput {
    /// Folder for rows files (and per-file plots).
    pub out_dir: Option<PathBuf>,
    /// Format of rows files.
    pub row_format: RowFormat,
    /// One plot per file into `out_dir`.
    pub plots: Option<PlotFormat>,
    /// Hide the progress bar.
    pub quiet: bool,
    /// Worker threads.
    pub threads: usize,
}

/// The outcome of a batch.
pub struct BatchResult {
    /// One entry per file, in input order.
    pub results: Vec<(PathBuf, Result<FileReport, String>)>,
    /// Seconds of audio analysed (successful files).
    pub audio_s: f64,
    /// Wall-clock seconds the batch took.
    pub elapsed_s: f64,
    /// Worker threads used.
    pub threads: usize,
}

/// Analyses `files` in parallel, writing each file's rows and plot into the output folder, and
/// printing one line per failure (file and reason) on standard error as it happens.
pub fn run_batch(
    files: &[PathBuf],
    options: &AnalyzeOptions,
    output: &BatchOutput,
) -> Result<BatchResult> {
    let start = Instant::now();
    let names = output_names(files);
    let bar = if output.quiet {
        ProgressBar::hidden()
    } else {
        ProgressBar::with_draw_target(Some(files.len() as u64), ProgressDrawTarget::stderr())
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{elapsed_precise} [{bar:32.cyan/blue}] {pos}/{len} files · {msg}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    bar.set_message("0:00 of audio");
    let audio_us = AtomicU64::new(0);
    let threads = output.threads.max(1);
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .context("cannot start the worker threads")?;
    let results: Vec<(PathBuf, Result<FileReport, String>)> = pool.install(|| {
        files
            .par_iter()
            .zip(names.par_iter())
            .map(|(path, name)| {
                let mut pending_s = 0.0;
                let mut progress = |s: f64| {
                    pending_s += s;
                    if pending_s >= 1.0 {
                        let us = (pending_s * 1e6) as u64;
                        pending_s = 0.0;
                        let total = audio_us.fetch_add(us, Ordering::Relaxed) + us;
                        bar.set_message(format!("{} of audio", plot::clock(total as f64 / 1e6)));
                    }
                };
                let result = analyse_guarded(|| {
                    analyse_to_outputs(path, name, options, output, &mut progress)
                });
                bar.inc(1);
                let result = result.map_err(|err| {
                    let reason = format!("{err:#}");
                    bar.suspend(|| eprintln!("weft: {}: {reason}", path.display()));
                    reason
                });
                (path.clone(), result)
            })
            .collect()
    });
    bar.finish_and_clear();
    let audio_s = results
        .iter()
        .filter_map(|(_, r)| r.as_ref().ok())
        .fold(0.0, |sum, r| sum + r.duration_s);
    Ok(BatchResult {
        results,
        audio_s,
        elapsed_s: start.elapsed().as_secs_f64(),
        threads: threads.min(files.len().max(1)),
    })
}

thread_local! {
    /// Set while a worker analyses a file, so the panic hook stays quiet: the panic becomes that
    /// file's one failure line instead.
    static IN_FILE: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

/// Installs a panic hook that leaves panics inside [`analyse_guarded`] to be reported as the
/// file's failure (and reports any other panic as usual).
pub fn install_panic_hook() {
    let default = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        if !IN_FILE.with(std::cell::Cell::get) {
            default(info);
        }
    }));
}

/// Runs one file's analysis so that a panic in a decoder (or in Weft) fails that file alone,
/// with its message, and the batch goes on.
fn analyse_guarded(run: impl FnOnce() -> Result<FileReport>) -> Result<FileReport> {
    IN_FILE.with(|f| f.set(true));
    let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(run));
    IN_FILE.with(|f| f.set(false));
    outcome.unwrap_or_else(|payload| {
        let message = payload
            .downcast_ref::<&str>()
            .map(|s| (*s).to_owned())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "no message".to_owned());
        bail!("internal error while analysing (please report it): {message}")
    })
}

fn analyse_to_outputs(
    path: &Path,
    name: &str,
    options: &AnalyzeOptions,
    output: &BatchOutput,
    progress: &mut impl FnMut(f64),
) -> Result<FileReport> {
    let Some(dir) = &output.out_dir else {
        return analyse_file::<std::io::Sink>(path, options, None, progress);
    };
    let kind = if options.frames == FramesMode::Off {
        "timeline"
    } else {
        "frames"
    };
    let dest = dir.join(format!("{name}.{kind}.{}", output.row_format.extension()));
    let mut writer = RowWriter::new(AtomicFile::create(&dest)?, output.row_format);
    let mut report = analyse_file(path, options, Some(&mut writer), progress)?;
    writer.into_inner()?.commit()?;
    report.rows_file = Some(dest);
    if let Some(format) = output.plots {
        let plot_dest = dir.join(format!("{name}.plot.{}", format.extension()));
        plot::write_plot(
            &plot_dest,
            &[PlotPanel {
                title: name.to_owned(),
                duration_s: report.duration_s,
                windows: &report.windows,
            }],
        )
        .context("the timeline was written but the plot failed")?;
        report.plot_file = Some(plot_dest);
    }
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_panic_fails_one_file_with_its_message() {
        install_panic_hook();
        let result = analyse_guarded(|| panic!("decoder fell over"));
        let message = format!("{:#}", result.expect_err("the panic is an error"));
        assert!(message.contains("decoder fell over"), "{message}");
        // The next file is analysed normally on the same thread.
        assert!(analyse_guarded(|| bail!("ordinary failure")).is_err());
        assert!(!IN_FILE.with(std::cell::Cell::get));
    }

    #[test]
    fn repeated_names_get_numbered() {
        let files = [
            PathBuf::from("a/take.wav"),
            PathBuf::from("b/take.wav"),
            PathBuf::from("take.flac"),
            PathBuf::from("c/take.wav"),
        ];
        assert_eq!(
            output_names(&files),
            ["take.wav", "take.wav-2", "take.flac", "take.wav-3"]
        );
    }
}
