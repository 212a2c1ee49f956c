//! `weft analyze`: one file through decoder, optional resampler, the engine's [`Analyzer`] and
//! the window summary ([`analyse_file`]); many files in parallel with a progress bar
//! ([`run_batch`]).

use crate::decode::{Source, SourceInfo};
use crate::plot::{self, PlotBy, PlotFormat, PlotPanel};
use crate::report::{AtomicFile, RowFormat, RowWriter};
use crate::resample::StreamResampler;
use crate::timeline::{
    ClosenessAssigner, FrameOut, FrameRow, ShareNames, Totals, WindowRow, WindowSummarizer,
};
use anyhow::{Context, Result, anyhow, bail};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rayon::prelude::*;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Instant;
use weft_engine::palette::Palette;
use weft_engine::shares::SharesSettings;
use weft_engine::style::{Estimate, EstimateScratch, Reason, StyleModel};
use weft_engine::windows::{WindowSpec, Windower};
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
    /// The palette for family shares; `None`: no shares.
    pub palette: Option<Arc<Palette>>,
    /// Also collect style windows (the engine's [`Windower`], needs a palette) of this spec.
    pub style_windows: Option<WindowSpec>,
    /// Estimate every style window with this model (needs `style_windows` of the model's spec):
    /// closeness per style window, and per timeline row.
    pub style: Option<Arc<StyleTarget>>,
}

impl AnalyzeOptions {
    /// What style training and estimation need: the built-in framing at the file's rate, the
    /// palette's shares and style windows of `spec`, no rows.
    pub fn for_style(palette: Arc<Palette>, spec: WindowSpec) -> Self {
        Self {
            window_s: spec.window_s,
            framing: None,
            resample_hz: None,
            frames: FramesMode::Off,
            palette: Some(palette),
            style_windows: Some(spec),
            style: None,
        }
    }
}

/// Reads a palette file, or the built-in palette without one.
pub fn load_palette(path: Option<&Path>) -> Result<Arc<Palette>> {
    Ok(Arc::new(match path {
        Some(p) => read_palette_file(p)?.0,
        None => Palette::default_palette(),
    }))
}

/// Reads and validates the palette file at `p`; returns it with the file's bytes.
pub fn read_palette_file(p: &Path) -> Result<(Palette, Vec<u8>)> {
    let bytes = std::fs::read(p)
        .with_context(|| format!("palette {}: cannot read the file", p.display()))?;
    let palette = Palette::from_bytes(&bytes)
        .with_context(|| format!("palette {}: not a usable palette", p.display()))?;
    Ok((palette, bytes))
}

/// A style model ready to estimate windows, and the category its closeness is for.
#[derive(Debug)]
pub struct StyleTarget {
    /// The model file.
    pub path: PathBuf,
    /// The model.
    pub model: StyleModel,
    /// Index of the category in the model's classes.
    pub category: usize,
    /// The window spec the model reads (the engine's default, 3 s every 1 s).
    pub spec: WindowSpec,
}

impl StyleTarget {
    /// Loads `path` for windows of `palette` (refusing a model trained on another schema or
    /// palette) and picks the category: `category` by name, or else the model's first class
    /// that is not a catch-all (named "rest", "other", or starting with "not " or "non-"),
    /// or else its first class.
    pub fn load(path: &Path, palette: &Palette, category: Option<&str>) -> Result<Self> {
        let spec = WindowSpec::default();
        let schema = weft_engine::windows::schema(spec, palette)
            .context("the palette's family names do not make a window schema")?;
        let model = StyleModel::load_for_schema(path, &schema)
            .with_context(|| format!("style model {} cannot be used", path.display()))?;
        let category = match category {
            Some(name) => model.class_index(name).ok_or_else(|| {
                anyhow!(
                    "style model {} has no category {name:?} (it knows {})",
                    path.display(),
                    model.classes().join(", ")
                )
            })?,
            None => default_category(model.classes()),
        };
        Ok(Self {
            path: path.to_owned(),
            model,
            category,
            spec,
        })
    }

    /// The category's name.
    pub fn category_name(&self) -> &str {
        self.model
            .classes()
            .get(self.category)
            .map_or("?", String::as_str)
    }
}

/// The first class that is not a catch-all ("rest", "other", "not …", "non-…"), else the first.
pub fn default_category(classes: &[String]) -> usize {
    let catch_all = |c: &str| {
        let c = c.to_lowercase();
        c == "rest"
            || c == "other"
            || c == "others"
            || c.starts_with("not ")
            || c.starts_with("non-")
    };
    classes.iter().position(|c| !catch_all(c)).unwrap_or(0)
}

/// One style window's estimate.
#[derive(Debug, Clone, PartialEq)]
pub struct StyleEstimate {
    /// Centre time of the window's first frame, seconds.
    pub start_s: f64,
    /// Centre time of its last frame, seconds.
    pub end_s: f64,
    /// Closeness to the category, 0–1.
    pub closeness: f64,
    /// The features that move the closeness most (largest push first).
    pub reasons: Vec<Reason>,
}

impl StyleEstimate {
    /// Centre of the window, seconds.
    pub fn centre_s(&self) -> f64 {
        0.5 * (self.start_s + self.end_s)
    }
}

/// A file's closeness in brief.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct ClosenessSummary {
    /// Mean closeness of the style windows, 0–1.
    pub mean: f64,
    /// Fraction of the style windows with closeness above 0.5: the share of the time the music
    /// sits closer to the category than not (windows start every second, so each stands for
    /// one second of the file).
    pub above_half: f64,
    /// Style windows estimated.
    pub windows: usize,
}

/// One style window of a file: the engine's window features (see `weft_engine::windows`).
pub use weft_engine::windows::OwnedWindow as StyleWindow;

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
    /// Style windows (empty unless asked for).
    pub style_windows: Vec<StyleWindow>,
    /// The style model's estimate of every style window (empty without a style model).
    pub style_estimates: Vec<StyleEstimate>,
    /// Whole-length figures.
    pub totals: Totals,
    /// The rows file written, if any.
    pub rows_file: Option<PathBuf>,
    /// The plot written for this file, if any.
    pub plot_file: Option<PathBuf>,
}

impl FileReport {
    /// Mean closeness and time above 50 %, with a style model.
    pub fn closeness_summary(&self) -> Option<ClosenessSummary> {
        let n = self.style_estimates.len();
        (n > 0).then(|| ClosenessSummary {
            mean: self
                .style_estimates
                .iter()
                .map(|e| e.closeness)
                .sum::<f64>()
                / n as f64,
            above_half: self
                .style_estimates
                .iter()
                .filter(|e| e.closeness > 0.5)
                .count() as f64
                / n as f64,
            windows: n,
        })
    }
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
    style: Option<StyleState>,
    out: Outputs<'w, W>,
    /// The whole clip, for [`FramesMode::WholeClip`].
    clip: Option<(Vec<f32>, Vec<f32>)>,
    /// Decoded mid and side samples gathered until there are [`FEED_SAMPLES`] of them.
    gathered: (Vec<f32>, Vec<f32>),
}

/// Samples handed to the analyzer at once (2^16: 1.4 s at 48 kHz, about 27 columns of the
/// built-in palette). Decoders give a few thousand samples at a time; the shares estimator
/// decides the presence of all the columns of one block together, reading its model's
/// weights once for all of them (see `SharesEstimator::flush`), so larger blocks cost less.
/// The results do not depend on it.
const FEED_SAMPLES: usize = 1 << 16;

/// Style windows, and their estimates when a model is given.
struct StyleState {
    windower: Windower,
    windows: Vec<StyleWindow>,
    scoring: Option<Scoring>,
}

struct Scoring {
    target: Arc<StyleTarget>,
    scratch: EstimateScratch,
    estimate: Estimate,
    estimates: Vec<StyleEstimate>,
}

impl StyleState {
    fn push<W: Write>(&mut self, f: &FrameResult, out: &mut Outputs<'_, W>) {
        if let Some(w) = self.windower.push(f).map(StyleWindow::from) {
            self.add(w, out);
        }
    }

    fn finish<W: Write>(&mut self, out: &mut Outputs<'_, W>) {
        if let Some(w) = self.windower.finish().map(StyleWindow::from) {
            self.add(w, out);
        }
    }

    fn add<W: Write>(&mut self, w: StyleWindow, out: &mut Outputs<'_, W>) {
        if let Some(s) = &mut self.scoring {
            let t = &s.target;
            match t
                .model
                .estimate_into(&w.features, t.category, &mut s.scratch, &mut s.estimate)
            {
                Ok(()) => {
                    let closeness = s.estimate.closeness()[t.category];
                    let e = StyleEstimate {
                        start_s: w.start_s,
                        end_s: w.end_s,
                        closeness,
                        reasons: s.estimate.reasons().to_vec(),
                    };
                    out.estimate(e.centre_s(), closeness as f32);
                    s.estimates.push(e);
                }
                Err(err) => out.fail(anyhow::Error::new(err).context(format!(
                    "the style model cannot estimate the window at {:.1} s",
                    w.start_s
                ))),
            }
        }
        self.windows.push(w);
    }
}

/// Where rows go: the report's timeline, the rows file, and the closeness of each row.
struct Outputs<'w, W: Write> {
    windows: Vec<WindowRow>,
    assigner: Option<ClosenessAssigner>,
    frames_out: bool,
    share_names: Option<Arc<ShareNames>>,
    rows: Option<&'w mut RowWriter<W>>,
    error: Option<anyhow::Error>,
}

impl<W: Write> Outputs<'_, W> {
    fn fail(&mut self, err: anyhow::Error) {
        if self.error.is_none() {
            self.error = Some(err);
        }
    }

    fn frame(&mut self, row: &FrameRow) {
        if self.frames_out {
            let out = FrameOut {
                row,
                names: self.share_names.as_ref(),
            };
            write_row(&mut self.rows, &mut self.error, &out);
        }
    }

    /// A window from the summarizer (closeness still to be assigned, with a style model).
    fn window(&mut self, w: &WindowRow) {
        let Self {
            windows,
            assigner,
            frames_out,
            rows,
            error,
            ..
        } = self;
        let mut commit = |r: &WindowRow| {
            windows.push(r.clone());
            if !*frames_out {
                write_row(rows, error, r);
            }
        };
        match assigner {
            Some(a) => a.push_row(w.clone(), &mut commit),
            None => commit(w),
        }
    }

    fn estimate(&mut self, centre_s: f64, closeness: f32) {
        let Self {
            windows,
            assigner,
            frames_out,
            rows,
            error,
            ..
        } = self;
        if let Some(a) = assigner {
            a.push_estimate(centre_s, closeness, &mut |r: &WindowRow| {
                windows.push(r.clone());
                if !*frames_out {
                    write_row(rows, error, r);
                }
            });
        }
    }

    fn finish(&mut self) {
        let Self {
            windows,
            assigner,
            frames_out,
            rows,
            error,
            ..
        } = self;
        if let Some(a) = assigner {
            a.finish(&mut |r: &WindowRow| {
                windows.push(r.clone());
                if !*frames_out {
                    write_row(rows, error, r);
                }
            });
        }
    }
}

impl<W: Write> Pipeline<'_, W> {
    fn feed(&mut self, mid: &[f32], side: &[f32]) {
        if let Some((clip_mid, clip_side)) = &mut self.clip {
            if clip_mid.len() + mid.len() > MAX_CLIP_FRAMES {
                self.out.fail(anyhow::anyhow!(
                    "longer than the {MAX_CLIP_FRAMES} samples --frames holds in memory to apply \
                     librosa's whole-clip floor (use --live for bounded memory)"
                ));
                return;
            }
            clip_mid.extend_from_slice(mid);
            clip_side.extend_from_slice(side);
            return;
        }
        self.gathered.0.extend_from_slice(mid);
        self.gathered.1.extend_from_slice(side);
        if self.gathered.0.len() >= FEED_SAMPLES {
            self.analyze_gathered();
        }
    }

    /// Hands the gathered samples to the analyzer.
    fn analyze_gathered(&mut self) {
        let Self {
            analyzer,
            summarizer,
            style,
            out,
            gathered: (mid, side),
            ..
        } = self;
        analyzer.process(mid, Some(side), |f| on_frame(f, summarizer, style, out));
        mid.clear();
        side.clear();
    }

    /// Completes the clip; returns the whole-length figures and the samples analysed.
    fn finish(&mut self) -> (Totals, u64) {
        self.analyze_gathered();
        let Self {
            analyzer,
            summarizer,
            style,
            out,
            clip,
            ..
        } = self;
        let total_samples = match clip.take() {
            Some((mid, side)) => {
                for f in &analyzer.analyze_clip(&mid, Some(&side)) {
                    on_frame(f, summarizer, style, out);
                }
                mid.len() as u64
            }
            None => {
                analyzer.finish(|f| on_frame(f, summarizer, style, out));
                analyzer.samples_in()
            }
        };
        if let Some(style) = style {
            style.finish(out);
        }
        let totals = summarizer.finish(total_samples, &mut |w| out.window(w));
        out.finish();
        (totals, total_samples)
    }
}

fn on_frame<W: Write>(
    f: &FrameResult,
    summarizer: &mut WindowSummarizer,
    style: &mut Option<StyleState>,
    out: &mut Outputs<'_, W>,
) {
    if let Some(style) = style {
        style.push(f, out);
    }
    let row = FrameRow::from_engine(f, out.share_names.is_some());
    out.frame(&row);
    summarizer.push(f.index, row, &mut |w| out.window(w));
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
    let analyzer = match &options.palette {
        Some(palette) => Analyzer::with_palette(settings, palette, SharesSettings::default())
            .with_context(|| format!("the palette cannot be used at {rate_hz} Hz"))?,
        None => Analyzer::new(settings),
    };
    let style_spec = options
        .style
        .as_ref()
        .map(|t| t.spec)
        .or(options.style_windows);
    let style = match (style_spec, &options.palette) {
        (Some(spec), Some(palette)) => Some(StyleState {
            windower: Windower::new(spec, f64::from(rate_hz), framing, palette)?,
            windows: Vec::new(),
            scoring: options.style.as_ref().map(|t| Scoring {
                target: Arc::clone(t),
                scratch: EstimateScratch::new(&t.model),
                estimate: Estimate::new(&t.model, weft_engine::style::DEFAULT_REASONS),
                estimates: Vec::new(),
            }),
        }),
        (Some(_), None) => bail!("style windows need a palette"),
        (None, _) => None,
    };
    let share_names = options
        .palette
        .as_ref()
        .map(|p| Arc::new(ShareNames::of(p)));
    let mut pipeline = Pipeline {
        analyzer,
        summarizer: WindowSummarizer::new(
            window_len,
            framing.hop_len as u64,
            f64::from(rate_hz),
            share_names.clone(),
        ),
        out: Outputs {
            windows: Vec::new(),
            assigner: options.style.is_some().then(ClosenessAssigner::new),
            frames_out: options.frames != FramesMode::Off,
            share_names,
            rows,
            error: None,
        },
        style,
        clip: (options.frames == FramesMode::WholeClip).then(|| (Vec::new(), Vec::new())),
        gathered: (
            Vec::with_capacity(FEED_SAMPLES),
            Vec::with_capacity(FEED_SAMPLES),
        ),
    };
    let source_rate = f64::from(info.sample_rate_hz);
    while let Some((mid, side)) = source.next_block()? {
        progress(mid.len() as f64 / source_rate);
        match &mut resampler {
            Some(r) => r.process(mid, side, &mut |m, s| pipeline.feed(m, s))?,
            None => pipeline.feed(mid, side),
        }
        if let Some(err) = pipeline.out.error.take() {
            return Err(err);
        }
    }
    if let Some(r) = &mut resampler {
        r.finish(&mut |m, s| pipeline.feed(m, s))?;
    }
    if let Some(err) = pipeline.out.error.take() {
        return Err(err);
    }
    let (totals, total_samples) = pipeline.finish();
    if let Some(err) = pipeline.out.error.take() {
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
        windows: pipeline.out.windows,
        style_estimates: pipeline
            .style
            .as_mut()
            .and_then(|s| s.scoring.take())
            .map(|s| s.estimates)
            .unwrap_or_default(),
        style_windows: pipeline.style.map(|s| s.windows).unwrap_or_default(),
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
    /// How plots stack the shares.
    pub plot_by: PlotBy,
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
                    let reason = weft_engine::error_chain(err.as_ref());
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
pub fn analyse_guarded(run: impl FnOnce() -> Result<FileReport>) -> Result<FileReport> {
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
        let category = options.style.as_ref().map(|t| t.category_name());
        plot::write_plot(
            &plot_dest,
            &[PlotPanel::of(name.to_owned(), &report, category)],
            output.plot_by,
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
