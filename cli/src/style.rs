//! `weft style train | check`: define a category from labelled tracks, say how reliable the
//! definition is, and check a saved style model on other tracks.
//!
//! Tracks come from one folder per category (`--category NAME=DIR`, or `DIR…` whose sub-folders
//! are the categories) or from a CSV manifest (`path,label[,group]`). Every track is analysed in
//! parallel by the same pipeline as `weft analyze` (the engine's `Analyzer` and `Windower`, see
//! `weft_engine::windows`), cross-validated by the engine (`weft_engine::evaluation`), and the
//! kept model is fitted on every track and written as a style model file
//! (`weft_engine::style::model_file`).

use crate::analyze::{self, AnalyzeOptions, StyleWindow};
use anyhow::{Context, Result, anyhow, bail};
use clap::{Args, Subcommand, ValueEnum};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use rayon::prelude::*;
use serde::Serialize;
use std::collections::HashMap;
use std::io::{IsTerminal, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Instant;
use weft_engine::evaluation::{
    self, CalibrationTable, CheckReport, Confusion, CrossValidation, DEFAULT_FOLDS, Grouping,
};
use weft_engine::palette::Palette;
use weft_engine::style::{
    ClassWeight, Estimate, EstimateScratch, FeatureMatrix, FeatureSchema, LabelledWindows,
    ModelFileError, ModelKind, ModelParams, StyleModel,
};
use weft_engine::windows::{self, WindowSpec};

/// Prefix of the "rest" class of a one-category model: `--target dockside` trains
/// `dockside` against `not dockside`.
pub const REST_PREFIX: &str = "not ";

/// The extension `weft demo` gives style model files.
pub const MODEL_EXTENSION: &str = "weftstyle";

const EXIT_CODES: &str = "Exit status:
  0  done (files that could not be analysed are named on standard error and left out)
  1  failure: too few tracks, unreadable input, a failed step
  2  usage error
  3  the palette or style model file cannot be used (unreadable, invalid, or trained on another
     palette or schema), as for `weft analyze --style`";

/// Train and check style models.
#[derive(Args, Debug)]
pub struct StyleArgs {
    /// What to do.
    #[command(subcommand)]
    pub command: StyleCommand,
}

/// The style commands.
#[derive(Subcommand, Debug)]
pub enum StyleCommand {
    /// Learn a category from labelled tracks: cross-validation per model, then the style model.
    #[command(after_help = EXIT_CODES)]
    Train(TrainArgs),
    /// Evaluate a saved style model on other labelled tracks.
    #[command(after_help = EXIT_CODES)]
    Check(CheckArgs),
}

/// Where labelled tracks come from (any combination).
#[derive(Args, Debug, Clone, Default)]
pub struct LabelSource {
    /// A category and its folder of tracks (searched recursively for audio files); repeat for
    /// each category.
    #[arg(long = "category", value_name = "NAME=DIR", value_parser = parse_category)]
    pub categories: Vec<(String, PathBuf)>,

    /// A CSV manifest with columns path,label[,group] (a header row is optional; relative paths
    /// are relative to the manifest). A group (artist, album) is never split between
    /// cross-validation's training and test folds.
    #[arg(long, value_name = "FILE")]
    pub manifest: Option<PathBuf>,
}

/// Which model types `train` tries.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ModelChoice {
    /// Random forest (200 trees).
    Forest,
    /// Linear support vector machine.
    Svm,
    /// Logistic regression.
    Logistic,
    /// All three; keep the one with the lowest cross-validated balanced error.
    Auto,
}

impl ModelChoice {
    fn kinds(self) -> Vec<ModelKind> {
        match self {
            Self::Forest => vec![ModelKind::Forest],
            Self::Svm => vec![ModelKind::LinearSvm],
            Self::Logistic => vec![ModelKind::Logistic],
            Self::Auto => ModelKind::ALL.to_vec(),
        }
    }
}

/// `weft style train`.
#[derive(Args, Debug)]
pub struct TrainArgs {
    /// Folders whose sub-folders are the categories (a track's category is the name of the
    /// sub-folder it sits in).
    #[arg(value_name = "DIR")]
    pub dirs: Vec<PathBuf>,

    #[command(flatten)]
    pub source: LabelSource,

    /// Train this one category against all the others (one model, "CATEGORY" vs
    /// "not CATEGORY"). Without it every category is learned at once (one-vs-rest).
    #[arg(long, value_name = "CATEGORY")]
    pub target: Option<String>,

    /// Model type; auto cross-validates all three and keeps the lowest balanced error.
    #[arg(long, value_enum, default_value_t = ModelChoice::Auto)]
    pub model: ModelChoice,

    /// Cross-validation folds (stratified; grouped by group when the manifest gives groups,
    /// else by track).
    #[arg(long, value_name = "K", default_value_t = DEFAULT_FOLDS)]
    pub folds: usize,

    /// Keep the same number of tracks in every category (drawn with --seed), instead of
    /// weighting the categories.
    #[arg(long)]
    pub balance: bool,

    /// Seed of every random choice (forest, SVM order, --balance).
    #[arg(long, default_value_t = 0)]
    pub seed: u64,

    /// Palette file for the family shares (default: the built-in palette). A style model only
    /// works with the palette it was trained with.
    #[arg(long, value_name = "FILE")]
    pub palette: Option<PathBuf>,

    /// Where to write the style model.
    #[arg(long, value_name = "MODEL")]
    pub out: PathBuf,

    /// Print one JSON object (cross-validation per model, the kept model, sizes) instead of
    /// the tables.
    #[arg(long)]
    pub json: bool,

    /// Worker threads for the analysis (default: one per core).
    #[arg(long, short = 'j', value_name = "N")]
    pub jobs: Option<usize>,

    /// Also write the training windows' features as CSV (track, path, label, group, features):
    /// the benchmark script reads them.
    #[arg(long, value_name = "CSV", hide = true)]
    pub export_features: Option<PathBuf>,

    /// Train on windows written earlier by --export-features instead of analysing audio (for the
    /// benchmark script: one analysis, many timed fits). Labels are taken as written.
    #[arg(long, value_name = "CSV", hide = true, conflicts_with_all = ["dirs", "manifest", "categories", "target", "balance", "export_features"])]
    pub features_from: Option<PathBuf>,
}

/// `weft style check`.
#[derive(Args, Debug)]
pub struct CheckArgs {
    /// The style model file.
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Folders whose sub-folders are the categories.
    #[arg(value_name = "DIR")]
    pub dirs: Vec<PathBuf>,

    #[command(flatten)]
    pub source: LabelSource,

    /// The palette the model was trained with (default: the built-in palette).
    #[arg(long, value_name = "FILE")]
    pub palette: Option<PathBuf>,

    /// Print one JSON object instead of the tables.
    #[arg(long)]
    pub json: bool,

    /// Worker threads for the analysis (default: one per core).
    #[arg(long, short = 'j', value_name = "N")]
    pub jobs: Option<usize>,
}

fn parse_category(s: &str) -> Result<(String, PathBuf), String> {
    let (name, dir) = s
        .split_once('=')
        .ok_or_else(|| format!("expected NAME=DIR, got {s:?}"))?;
    let name = name.trim();
    if name.is_empty() || dir.is_empty() {
        return Err(format!("expected NAME=DIR, got {s:?}"));
    }
    Ok((name.to_owned(), PathBuf::from(dir)))
}

/// A usage problem (exit status 2) as opposed to a failure (exit status 1).
#[derive(Debug)]
pub struct UsageError(pub String);

impl std::fmt::Display for UsageError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for UsageError {}

/// Runs `weft style …`; returns the process exit code.
pub fn run(args: StyleArgs) -> u8 {
    let result = match args.command {
        StyleCommand::Train(a) => train_command(&a),
        StyleCommand::Check(a) => check_command(&a),
    };
    match result {
        Ok(()) => 0,
        // A closed pipe (`weft style check … | head`) is not a failure.
        Err(err)
            if err.chain().any(|e| {
                e.downcast_ref::<std::io::Error>()
                    .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe)
            }) =>
        {
            0
        }
        Err(err) => {
            // Reading a palette or model failed (writing one is an ordinary failure).
            let unusable = err.chain().any(|e| {
                e.is::<weft_engine::palette::PaletteError>()
                    || e.downcast_ref::<ModelFileError>().is_some_and(|m| {
                        !matches!(
                            m,
                            ModelFileError::Unsavable { .. }
                                | ModelFileError::Io {
                                    action: "write",
                                    ..
                                }
                        )
                    })
            });
            if let Some(usage) = err.downcast_ref::<UsageError>() {
                eprintln!("weft: usage error: {usage}");
                2
            } else if unusable {
                eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
                3
            } else {
                eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
                1
            }
        }
    }
}

/// One labelled track.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Track {
    /// The audio file.
    pub path: PathBuf,
    /// Its category.
    pub label: String,
    /// Its group (artist, album), if given.
    pub group: Option<String>,
}

/// Collects labelled tracks from folders, `--category` pairs and a manifest. Folders without
/// audio, and files outside a category folder, are named on standard error.
///
/// # Errors
/// An unreadable folder or manifest, a malformed manifest row, or a file given two labels.
pub fn collect_tracks(dirs: &[PathBuf], source: &LabelSource) -> Result<Vec<Track>> {
    let mut tracks = Vec::new();
    for dir in dirs {
        if !dir.is_dir() {
            bail!(UsageError(format!(
                "{} is not a folder (give a folder whose sub-folders are the categories, or --category NAME=DIR)",
                dir.display()
            )));
        }
        let mut subdirs: Vec<PathBuf> = std::fs::read_dir(dir)
            .with_context(|| format!("cannot read the folder {}", dir.display()))?
            .filter_map(|e| e.ok())
            .filter(|e| !e.file_name().to_string_lossy().starts_with('.'))
            .map(|e| e.path())
            .filter(|p| p.is_dir())
            .collect();
        subdirs.sort();
        if subdirs.is_empty() {
            bail!(UsageError(format!(
                "{} has no sub-folders: its sub-folders name the categories",
                dir.display()
            )));
        }
        for sub in subdirs {
            let label = sub
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            add_folder(&mut tracks, &label, &sub);
        }
    }
    for (name, dir) in &source.categories {
        add_folder(&mut tracks, name, dir);
    }
    if let Some(manifest) = &source.manifest {
        tracks.extend(read_manifest(manifest)?);
    }
    // One label per file.
    let mut seen: HashMap<&Path, &str> = HashMap::new();
    for t in &tracks {
        if let Some(other) = seen.insert(&t.path, &t.label)
            && other != t.label
        {
            bail!(
                "{} is labelled both {other:?} and {:?}",
                t.path.display(),
                t.label
            );
        }
    }
    let mut unique = Vec::with_capacity(tracks.len());
    let mut kept: std::collections::HashSet<PathBuf> = std::collections::HashSet::new();
    for t in tracks {
        if kept.insert(t.path.clone()) {
            unique.push(t);
        }
    }
    Ok(unique)
}

fn add_folder(tracks: &mut Vec<Track>, label: &str, dir: &Path) {
    let (files, problems) = analyze::collect_inputs(&[dir.to_path_buf()]);
    for (path, reason) in problems {
        eprintln!("weft: {}: {reason}", path.display());
    }
    tracks.extend(files.into_iter().map(|path| Track {
        path,
        label: label.to_owned(),
        group: None,
    }));
}

/// Reads a CSV manifest: `path,label[,group]` per row (RFC 4180 quoting), an optional header
/// row starting with `path`, blank lines ignored, relative paths relative to the manifest.
///
/// # Errors
/// An unreadable file or a row without a path and a label (named by line number).
pub fn read_manifest(manifest: &Path) -> Result<Vec<Track>> {
    let text = std::fs::read_to_string(manifest)
        .with_context(|| format!("cannot read the manifest {}", manifest.display()))?;
    let base = manifest.parent().unwrap_or_else(|| Path::new(""));
    let mut tracks = Vec::new();
    for (n, row) in csv_rows(&text).into_iter().enumerate() {
        let (line, fields) = row;
        if fields.iter().all(|f| f.trim().is_empty()) {
            continue;
        }
        if n == 0 && fields[0].trim().eq_ignore_ascii_case("path") {
            continue;
        }
        let get = |i: usize| fields.get(i).map_or("", |s| s.trim());
        let (path, label, group) = (get(0), get(1), get(2));
        if path.is_empty() || label.is_empty() || fields.len() > 3 {
            bail!(
                "{} line {line}: expected path,label[,group], got {} field(s)",
                manifest.display(),
                fields.len()
            );
        }
        let path = PathBuf::from(path);
        tracks.push(Track {
            path: if path.is_absolute() {
                path
            } else {
                base.join(path)
            },
            label: label.to_owned(),
            group: (!group.is_empty()).then(|| group.to_owned()),
        });
    }
    Ok(tracks)
}

/// Splits CSV text into rows of fields (RFC 4180: double quotes around a field, `""` for a
/// quote inside one, line breaks inside quotes kept), each with its first line number.
fn csv_rows(text: &str) -> Vec<(usize, Vec<String>)> {
    let mut rows = Vec::new();
    let mut fields = Vec::new();
    let mut field = String::new();
    let mut quoted = false;
    let mut line = 1;
    let mut row_line = 1;
    let mut chars = text.chars().peekable();
    while let Some(c) = chars.next() {
        match (quoted, c) {
            (true, '"') => {
                if chars.peek() == Some(&'"') {
                    chars.next();
                    field.push('"');
                } else {
                    quoted = false;
                }
            }
            (true, c) => {
                if c == '\n' {
                    line += 1;
                }
                field.push(c);
            }
            (false, '"') if field.is_empty() => quoted = true,
            (false, ',') => fields.push(std::mem::take(&mut field)),
            (false, '\r') => {}
            (false, '\n') => {
                fields.push(std::mem::take(&mut field));
                rows.push((row_line, std::mem::take(&mut fields)));
                line += 1;
                row_line = line;
            }
            (false, c) => field.push(c),
        }
    }
    if !field.is_empty() || !fields.is_empty() {
        fields.push(field);
        rows.push((row_line, fields));
    }
    rows
}

/// One analysed track's windows and length.
pub struct AnalysedTrack {
    /// Style windows.
    pub windows: Vec<StyleWindow>,
    /// Seconds of audio.
    pub duration_s: f64,
}

/// Analyses `files` in parallel into style windows, with a progress bar (files and audio time)
/// on standard error when `show_bar` and standard error is a terminal. A file that fails is
/// named on standard error with its reason and comes back as `Err(reason)`.
///
/// # Errors
/// Only when the worker threads cannot start.
pub fn analyse_tracks(
    files: &[PathBuf],
    palette: &Arc<Palette>,
    spec: WindowSpec,
    jobs: Option<usize>,
    show_bar: bool,
) -> Result<Vec<Result<AnalysedTrack, String>>> {
    let bar = if show_bar && std::io::stderr().is_terminal() {
        ProgressBar::with_draw_target(Some(files.len() as u64), ProgressDrawTarget::stderr())
    } else {
        ProgressBar::hidden()
    };
    bar.set_style(
        ProgressStyle::with_template(
            "{elapsed_precise} [{bar:32.cyan/blue}] {pos}/{len} tracks · {msg}",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    bar.set_message("0:00 of audio");
    let options = AnalyzeOptions::for_style(Arc::clone(palette), spec);
    let threads = jobs
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
        .max(1);
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .context("cannot start the worker threads")?;
    let audio_us = AtomicU64::new(0);
    let results = pool.install(|| {
        files
            .par_iter()
            .map(|path| {
                let mut pending_s = 0.0;
                let mut progress = |s: f64| {
                    pending_s += s;
                    if pending_s >= 1.0 {
                        let us = (pending_s * 1e6) as u64;
                        pending_s = 0.0;
                        let total = audio_us.fetch_add(us, Ordering::Relaxed) + us;
                        bar.set_message(format!(
                            "{} of audio",
                            crate::plot::clock(total as f64 / 1e6)
                        ));
                    }
                };
                let outcome = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                    analyze::analyse_file::<std::io::Sink>(path, &options, None, &mut progress)
                }));
                bar.inc(1);
                let result = match outcome {
                    Ok(Ok(report)) if report.style_windows.is_empty() => {
                        Err("too short for one window".to_owned())
                    }
                    Ok(Ok(report)) => Ok(AnalysedTrack {
                        windows: report.style_windows,
                        duration_s: report.duration_s,
                    }),
                    Ok(Err(err)) => Err(weft_engine::error_chain(err.as_ref())),
                    Err(_) => Err("internal error while analysing (please report it)".to_owned()),
                };
                if let Err(reason) = &result {
                    bar.suspend(|| {
                        eprintln!("weft: {}: {reason}; left out", path.display());
                    });
                }
                result
            })
            .collect()
    });
    bar.finish_and_clear();
    Ok(results)
}

/// Labelled windows built from analysed tracks, and what was left out.
pub struct TrainingSet {
    /// The windows.
    pub data: LabelledWindows,
    /// The tracks kept, in track-id order.
    pub tracks: Vec<Track>,
    /// Each kept track's windows, in track-id order.
    pub track_windows: Vec<Vec<StyleWindow>>,
    /// Files left out and why.
    pub skipped: Vec<Skipped>,
    /// Seconds of audio analysed.
    pub audio_s: f64,
    /// Wall-clock seconds the analysis took.
    pub analysis_s: f64,
}

/// A file left out.
#[derive(Debug, Clone, Serialize)]
pub struct Skipped {
    /// The file.
    pub path: PathBuf,
    /// Why.
    pub reason: String,
}

/// The class of each category name: with a target, `[target, "not target"]`; otherwise the
/// categories in order of first appearance.
///
/// # Errors
/// A target that is no category, or fewer than two categories.
pub fn classes_for(tracks: &[Track], target: Option<&str>) -> Result<Vec<String>> {
    let mut categories: Vec<String> = Vec::new();
    for t in tracks {
        if !categories.contains(&t.label) {
            categories.push(t.label.clone());
        }
    }
    if let Some(target) = target {
        if !categories.iter().any(|c| c == target) {
            bail!(UsageError(format!(
                "--target {target:?} is not one of the categories {categories:?}"
            )));
        }
        if categories.len() < 2 {
            bail!(
                "--target {target:?}: there are no tracks of any other category to train against"
            );
        }
        return Ok(vec![target.to_owned(), format!("{REST_PREFIX}{target}")]);
    }
    if categories.len() < 2 {
        bail!(
            "a style model needs at least 2 categories; found {categories:?} (use --target with more folders)"
        );
    }
    Ok(categories)
}

/// The class a category falls in, for `classes` as [`classes_for`] makes them (or as a model
/// stores them): its own name, or the rest class of a one-category model.
#[must_use]
pub fn class_of(classes: &[String], category: &str) -> Option<usize> {
    if let Some(i) = classes.iter().position(|c| c == category) {
        return Some(i);
    }
    if classes.len() == 2 && classes[1] == format!("{REST_PREFIX}{}", classes[0]) {
        return Some(1);
    }
    None
}

/// Analyses `tracks` and bundles their windows with `classes` (see [`class_of`]).
///
/// # Errors
/// A category with fewer than `min_tracks` analysed tracks, or data the engine refuses.
pub fn build_set(
    tracks: &[Track],
    classes: &[String],
    palette: &Arc<Palette>,
    schema: &FeatureSchema,
    jobs: Option<usize>,
    show_bar: bool,
    min_tracks: usize,
) -> Result<TrainingSet> {
    let start = Instant::now();
    let mut labels_of = Vec::with_capacity(tracks.len());
    for t in tracks {
        labels_of.push(class_of(classes, &t.label).ok_or_else(|| {
            anyhow!(
                "{}: category {:?} is not one of {classes:?}",
                t.path.display(),
                t.label
            )
        })?);
    }
    let files: Vec<PathBuf> = tracks.iter().map(|t| t.path.clone()).collect();
    let analysed = analyse_tracks(&files, palette, WindowSpec::default(), jobs, show_bar)?;
    let mut skipped = Vec::new();
    let mut kept = Vec::new();
    let mut track_windows = Vec::new();
    let (mut rows, mut labels, mut track_ids, mut group_names) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let mut audio_s = 0.0;
    for ((track, result), &label) in tracks.iter().zip(analysed).zip(&labels_of) {
        match result {
            Err(reason) => skipped.push(Skipped {
                path: track.path.clone(),
                reason,
            }),
            Ok(a) => {
                let id = kept.len();
                audio_s += a.duration_s;
                for w in &a.windows {
                    rows.push(w.features.clone());
                    labels.push(label);
                    track_ids.push(id);
                    group_names.push(track.group.clone());
                }
                kept.push(track.clone());
                track_windows.push(a.windows);
            }
        }
    }
    let mut per_class = vec![0_usize; classes.len()];
    for t in &kept {
        if let Some(c) = class_of(classes, &t.label) {
            per_class[c] += 1;
        }
    }
    for (class, &n) in classes.iter().zip(&per_class) {
        if n < min_tracks {
            bail!(
                "category {class:?} has {n} track(s) that could be analysed; at least {min_tracks} are needed"
            );
        }
    }
    // Groups: the manifest's names; a track without one is its own group.
    let groups = if group_names.iter().any(Option::is_some) {
        let mut ids: HashMap<String, usize> = HashMap::new();
        let n_tracks = kept.len();
        Some(
            group_names
                .iter()
                .zip(&track_ids)
                .map(|(g, &t)| match g {
                    Some(name) => {
                        let next = n_tracks + ids.len();
                        *ids.entry(name.clone()).or_insert(next)
                    }
                    None => t,
                })
                .collect(),
        )
    } else {
        None
    };
    let data = LabelledWindows::new(
        schema.clone(),
        classes.to_vec(),
        FeatureMatrix::from_rows(&rows).context("the analysis produced unusable windows")?,
        labels,
        track_ids,
        groups,
    )
    .context("the windows cannot be trained on")?;
    Ok(TrainingSet {
        data,
        tracks: kept,
        track_windows,
        skipped,
        audio_s,
        analysis_s: start.elapsed().as_secs_f64(),
    })
}

/// Settings of one training run.
#[derive(Debug, Clone)]
pub struct TrainSettings {
    /// Model types to cross-validate.
    pub kinds: Vec<ModelKind>,
    /// Folds.
    pub folds: usize,
    /// Seed.
    pub seed: u64,
    /// Hide progress lines.
    pub quiet: bool,
}

/// The outcome of cross-validating and fitting.
pub struct Trained {
    /// One cross-validation per model type tried, in the order tried.
    pub cvs: Vec<CrossValidation>,
    /// Seconds each cross-validation took.
    pub cv_s: Vec<f64>,
    /// Index of the kept one in `cvs`.
    pub kept: usize,
    /// The fitted model.
    pub model: StyleModel,
    /// Seconds the final fit took (training on every window, with calibration).
    pub fit_s: f64,
    /// Mean time of one window's estimate (closeness and three reasons), microseconds.
    pub inference_us_per_window: f64,
}

/// Cross-validates every model type of `settings` on `data` (categories weighted equally),
/// keeps the lowest window balanced error and fits it on everything.
///
/// # Errors
/// Too many folds for the tracks or groups, or training errors.
pub fn cross_validate_and_fit(data: &LabelledWindows, settings: &TrainSettings) -> Result<Trained> {
    let plan = evaluation::default_folds(data, settings.folds).map_err(|e| {
        anyhow!(UsageError(format!(
            "{e} (choose fewer folds with --folds, or give more tracks)"
        )))
    })?;
    let mut cvs = Vec::new();
    let mut cv_s = Vec::new();
    for &kind in &settings.kinds {
        let start = Instant::now();
        let params =
            ModelParams::default_for(kind, settings.seed).with_class_weight(ClassWeight::Balanced);
        let cv = evaluation::cross_validate(data, &params, &plan, &mut |done, total| {
            if !settings.quiet && std::io::stderr().is_terminal() {
                eprint!("\rcross-validating {kind}: fold {done}/{total}   ");
                if done == total {
                    eprint!("\r{:50}\r", "");
                }
            }
        })
        .with_context(|| format!("cross-validating the {kind} model failed"))?;
        cv_s.push(start.elapsed().as_secs_f64());
        cvs.push(cv);
    }
    let kept = evaluation::best_by_balanced_error(&cvs).unwrap_or(0);
    let start = Instant::now();
    let model = StyleModel::fit(data, &cvs[kept]).context("fitting the final model failed")?;
    let fit_s = start.elapsed().as_secs_f64();
    let inference_us_per_window = time_inference(&model, data.features(), 0)?;
    Ok(Trained {
        cvs,
        cv_s,
        kept,
        model,
        fit_s,
        inference_us_per_window,
    })
}

/// Mean microseconds of one [`StyleModel::estimate_into`] with three reasons for class
/// `class`, over the windows of `x` repeated for at least 0.2 s (reported, not asserted).
fn time_inference(model: &StyleModel, x: &FeatureMatrix, class: usize) -> Result<f64> {
    let mut scratch = EstimateScratch::new(model);
    let mut estimate = Estimate::new(model, 3);
    let start = Instant::now();
    let mut count = 0_u64;
    while count == 0 || start.elapsed().as_secs_f64() < 0.2 {
        for i in 0..x.n_rows() {
            model
                .estimate_into(x.row(i), class, &mut scratch, &mut estimate)
                .context("estimating a training window failed")?;
            count += 1;
        }
    }
    Ok(start.elapsed().as_secs_f64() * 1e6 / count as f64)
}

/// One model's cross-validation figures, as `--json` prints them.
#[derive(Debug, Serialize)]
pub struct ModelFigures {
    /// Model type.
    pub model: String,
    /// Per-window balanced error over folds, mean, 0–1.
    pub cv_balanced_error_mean: f64,
    /// Its standard deviation over folds.
    pub cv_balanced_error_sd: f64,
    /// Per-track balanced error over folds, mean, 0–1.
    pub cv_track_balanced_error_mean: f64,
    /// Its standard deviation over folds.
    pub cv_track_balanced_error_sd: f64,
    /// Window confusion counts (rows: truth, columns: decision), class order.
    pub window_confusion: Vec<Vec<u64>>,
    /// Track confusion counts.
    pub track_confusion: Vec<Vec<u64>>,
    /// Seconds the cross-validation took.
    pub cv_s: f64,
}

/// The figures `weft style train --json` prints (and `weft demo` embeds).
#[derive(Debug, Serialize)]
pub struct TrainJson {
    /// The category a one-category model recognises (`--target`), else null.
    pub category: Option<String>,
    /// Class names.
    pub classes: Vec<String>,
    /// The kept model type.
    pub model: String,
    /// Its per-window balanced error, mean over folds, 0–1.
    pub cv_balanced_error_mean: f64,
    /// Its standard deviation over folds.
    pub cv_balanced_error_sd: f64,
    /// Folds.
    pub folds: usize,
    /// What the folds keep together.
    pub grouping: Grouping,
    /// Every model tried.
    pub models: Vec<ModelFigures>,
    /// Reliability of the kept model's cross-fitted closeness, per class.
    pub calibration: Vec<CalibrationTable>,
    /// Tracks trained on.
    pub tracks: usize,
    /// Windows trained on.
    pub windows: usize,
    /// Tracks per class.
    pub tracks_per_class: Vec<usize>,
    /// Windows per class.
    pub windows_per_class: Vec<usize>,
    /// Files left out.
    pub skipped: Vec<Skipped>,
    /// The style model file written.
    pub model_file: PathBuf,
    /// Seconds of audio analysed.
    pub audio_s: f64,
    /// Seconds the analysis took.
    pub analysis_s: f64,
    /// Seconds the kept model's final fit took.
    pub fit_s: f64,
    /// Mean time of one window's estimate with three reasons, microseconds.
    pub inference_us_per_window: f64,
}

impl TrainJson {
    /// The figures of a training run.
    pub fn of(
        set: &TrainingSet,
        trained: &Trained,
        category: Option<String>,
        model_file: &Path,
    ) -> Self {
        let kept = &trained.cvs[trained.kept].figures;
        Self {
            category,
            classes: set.data.classes().to_vec(),
            model: kept.model.name().to_owned(),
            cv_balanced_error_mean: kept.window_balanced_error.mean,
            cv_balanced_error_sd: kept.window_balanced_error.sd,
            folds: kept.folds,
            grouping: kept.grouping,
            models: trained
                .cvs
                .iter()
                .zip(&trained.cv_s)
                .map(|(cv, &s)| ModelFigures {
                    model: cv.figures.model.name().to_owned(),
                    cv_balanced_error_mean: cv.figures.window_balanced_error.mean,
                    cv_balanced_error_sd: cv.figures.window_balanced_error.sd,
                    cv_track_balanced_error_mean: cv.figures.track_balanced_error.mean,
                    cv_track_balanced_error_sd: cv.figures.track_balanced_error.sd,
                    window_confusion: cv.figures.window_confusion.counts.clone(),
                    track_confusion: cv.figures.track_confusion.counts.clone(),
                    cv_s: s,
                })
                .collect(),
            calibration: kept.calibration.clone(),
            tracks: set.data.n_tracks(),
            windows: set.data.n_windows(),
            tracks_per_class: set.data.tracks_per_class(),
            windows_per_class: set.data.windows_per_class(),
            skipped: set.skipped.clone(),
            model_file: model_file.to_owned(),
            audio_s: set.audio_s,
            analysis_s: set.analysis_s,
            fit_s: trained.fit_s,
            inference_us_per_window: trained.inference_us_per_window,
        }
    }
}

fn pct(x: f64) -> String {
    format!("{:.1} %", 100.0 * x)
}

/// The cross-validation tables of a training run, as text.
#[must_use]
pub fn cv_text(set: &TrainingSet, trained: &Trained) -> String {
    let data = &set.data;
    let classes = data.classes();
    let mut s = String::new();
    let first = &trained.cvs[trained.kept].figures;
    let grouping = match first.grouping {
        Grouping::Groups => {
            "grouped by the manifest's groups (a group never spans training and test)"
        }
        Grouping::Tracks => "grouped by track (a track's windows never span training and test)",
        Grouping::Given => "given folds",
    };
    s.push_str(&format!(
        "Cross-validation: {} stratified folds, {grouping}; categories weighted equally\n",
        first.folds
    ));
    s.push_str(&format!(
        "  {:<10} {:>28} {:>28}\n",
        "model", "balanced error (windows)", "balanced error (tracks)"
    ));
    for (i, cv) in trained.cvs.iter().enumerate() {
        let f = &cv.figures;
        s.push_str(&format!(
            "  {:<10} {:>28} {:>28}{}\n",
            f.model.name(),
            format!(
                "{} ± {}",
                pct(f.window_balanced_error.mean),
                pct(f.window_balanced_error.sd)
            ),
            format!(
                "{} ± {}",
                pct(f.track_balanced_error.mean),
                pct(f.track_balanced_error.sd)
            ),
            if i == trained.kept { "   ← kept" } else { "" }
        ));
    }
    s.push_str("  (mean ± sd over folds)\n\nTracks and windows per category:\n");
    let width = classes.iter().map(String::len).max().unwrap_or(8).max(8);
    for ((c, t), w) in classes
        .iter()
        .zip(data.tracks_per_class())
        .zip(data.windows_per_class())
    {
        s.push_str(&format!("  {c:<width$} {t:>5} tracks {w:>7} windows\n"));
    }
    for cv in &trained.cvs {
        let f = &cv.figures;
        s.push_str(&format!(
            "\nConfusion, {} (rows: truth; columns: decision)\n",
            f.model.name()
        ));
        s.push_str(&confusion_text(
            classes,
            &f.window_confusion,
            &f.track_confusion,
        ));
    }
    for table in &first.calibration {
        if classes.len() == 2 && table.class != 0 {
            continue;
        }
        s.push('\n');
        s.push_str(&calibration_text(&classes[table.class], table));
    }
    s
}

/// Window and track confusion tables side by side.
#[must_use]
pub fn confusion_text(classes: &[String], windows: &Confusion, tracks: &Confusion) -> String {
    let width = classes.iter().map(String::len).max().unwrap_or(8).max(8);
    let mut s = format!("  {:<width$}", "windows:");
    for c in classes {
        s.push_str(&format!(" {c:>width$}"));
    }
    s.push_str("   | tracks:");
    for c in classes {
        s.push_str(&format!(" {c:>width$}"));
    }
    s.push('\n');
    for (i, c) in classes.iter().enumerate() {
        s.push_str(&format!("  {c:<width$}"));
        for v in &windows.counts[i] {
            s.push_str(&format!(" {v:>width$}"));
        }
        s.push_str("   |        ");
        for v in &tracks.counts[i] {
            s.push_str(&format!(" {v:>width$}"));
        }
        s.push('\n');
    }
    s
}

/// A reliability table of closeness to one class.
#[must_use]
pub fn calibration_text(class: &str, table: &CalibrationTable) -> String {
    let mut s = format!(
        "Closeness to {class}: Platt sigmoid fitted on cross-validated scores; reliability \
         cross-fitted (each fold's sigmoid fitted on the other folds)\n  {:<12} {:>8} {:>16} {:>18}\n",
        "closeness", "windows", "mean closeness", "share in category"
    );
    for b in &table.bins {
        s.push_str(&format!(
            "  {:<12} {:>8} {:>16} {:>18}\n",
            format!("{:.0}–{:.0} %", 100.0 * b.lower, 100.0 * b.upper),
            b.windows,
            pct(b.mean_closeness),
            pct(b.observed_frequency)
        ));
    }
    s.push_str(&format!(
        "  Brier score {:.4}, expected calibration error {}\n",
        table.brier,
        pct(table.expected_calibration_error)
    ));
    s
}

/// Writes the training windows as CSV: `track,path,label,group,<feature names>`.
fn export_features(dest: &Path, set: &TrainingSet) -> Result<()> {
    let mut out = std::io::BufWriter::new(
        std::fs::File::create(dest).with_context(|| format!("cannot write {}", dest.display()))?,
    );
    let quote = |s: &str| format!("\"{}\"", s.replace('"', "\"\""));
    write!(out, "track,path,label,group")?;
    for f in &set.data.schema().features {
        write!(out, ",{}", quote(f))?;
    }
    writeln!(out)?;
    let x = set.data.features();
    let classes = set.data.classes();
    for i in 0..set.data.n_windows() {
        let t = set.data.tracks()[i];
        let group = set.data.cv_groups()[i];
        write!(
            out,
            "{t},{},{},{group}",
            quote(&set.tracks[t].path.to_string_lossy()),
            quote(&classes[set.data.labels()[i]])
        )?;
        for v in x.row(i) {
            write!(out, ",{v:?}")?;
        }
        writeln!(out)?;
    }
    out.flush()
        .with_context(|| format!("cannot write {}", dest.display()))
}

/// Reads windows written by [`export_features`]; the header's feature names must be `schema`'s.
fn import_features(src: &Path, schema: &FeatureSchema) -> Result<TrainingSet> {
    let text =
        std::fs::read_to_string(src).with_context(|| format!("cannot read {}", src.display()))?;
    let rows = csv_rows(&text);
    let Some(((_, header), body)) = rows.split_first() else {
        bail!("{} is empty", src.display());
    };
    if header.len() < 4 || header[4..] != schema.features[..] {
        bail!(
            "{}: the columns are not track,path,label,group and the features of {}",
            src.display(),
            schema.describe()
        );
    }
    let (mut values, mut labels, mut track_ids, mut groups) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    let mut classes: Vec<String> = Vec::new();
    let mut tracks: Vec<Track> = Vec::new();
    for (line, fields) in body {
        if fields.len() != header.len() {
            bail!(
                "{} line {line}: {} fields, expected {}",
                src.display(),
                fields.len(),
                header.len()
            );
        }
        let int = |i: usize| -> Result<usize> {
            fields[i].parse().with_context(|| {
                format!(
                    "{} line {line}: {:?} is not a whole number",
                    src.display(),
                    fields[i]
                )
            })
        };
        let (track, group) = (int(0)?, int(3)?);
        let label = fields[2].clone();
        let class = classes.iter().position(|c| *c == label).unwrap_or_else(|| {
            classes.push(label.clone());
            classes.len() - 1
        });
        while tracks.len() <= track {
            tracks.push(Track {
                path: PathBuf::new(),
                label: String::new(),
                group: None,
            });
        }
        tracks[track] = Track {
            path: PathBuf::from(&fields[1]),
            label,
            group: Some(group.to_string()),
        };
        for v in &fields[4..] {
            values.push(v.parse::<f64>().with_context(|| {
                format!("{} line {line}: {v:?} is not a number", src.display())
            })?);
        }
        labels.push(class);
        track_ids.push(track);
        groups.push(group);
    }
    let n_tracks = tracks.len();
    let data = LabelledWindows::new(
        schema.clone(),
        classes,
        FeatureMatrix::new(schema.len(), values)?,
        labels,
        track_ids,
        Some(groups),
    )
    .with_context(|| format!("{} cannot be trained on", src.display()))?;
    Ok(TrainingSet {
        data,
        tracks,
        track_windows: vec![Vec::new(); n_tracks],
        skipped: Vec::new(),
        audio_s: 0.0,
        analysis_s: 0.0,
    })
}

fn train_command(a: &TrainArgs) -> Result<()> {
    if a.folds < 2 {
        bail!(UsageError("--folds must be at least 2".to_owned()));
    }
    if a.jobs == Some(0) {
        bail!(UsageError("--jobs must be at least 1".to_owned()));
    }
    let no_tracks =
        a.dirs.is_empty() && a.source.categories.is_empty() && a.source.manifest.is_none();
    if no_tracks && a.features_from.is_none() {
        bail!(UsageError(
            "give labelled tracks: DIR… (sub-folders are categories), --category NAME=DIR, or --manifest FILE"
                .to_owned()
        ));
    }
    let palette = analyze::load_palette(a.palette.as_deref())?;
    let schema = windows::schema(WindowSpec::default(), &palette)?;
    let mut set = if let Some(csv) = &a.features_from {
        import_features(csv, &schema)?
    } else {
        let tracks = collect_tracks(&a.dirs, &a.source)?;
        if tracks.is_empty() {
            bail!("no audio files found");
        }
        let classes = classes_for(&tracks, a.target.as_deref())?;
        build_set(&tracks, &classes, &palette, &schema, a.jobs, !a.json, 2)?
    };
    if a.balance {
        set.data = set
            .data
            .balanced_by_tracks(a.seed)
            .context("balancing the categories failed")?;
        if !a.json {
            eprintln!(
                "balanced: {} tracks per category (seed {})",
                set.data.tracks_per_class().first().copied().unwrap_or(0),
                a.seed
            );
        }
    }
    if let Some(dest) = &a.export_features {
        export_features(dest, &set)?;
    }
    let trained = cross_validate_and_fit(
        &set.data,
        &TrainSettings {
            kinds: a.model.kinds(),
            folds: a.folds,
            seed: a.seed,
            quiet: a.json,
        },
    )?;
    trained
        .model
        .save(&a.out)
        .with_context(|| format!("cannot write the style model {}", a.out.display()))?;
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    if a.json {
        let figures = TrainJson::of(&set, &trained, a.target.clone(), &a.out);
        writeln!(out, "{}", serde_json::to_string(&figures)?)?;
    } else {
        write!(out, "{}", cv_text(&set, &trained))?;
        writeln!(
            out,
            "\nwrote {} ({} model; {} tracks, {} windows; {} of audio analysed in {:.1} s{})",
            a.out.display(),
            trained.model.kind(),
            set.data.n_tracks(),
            set.data.n_windows(),
            crate::plot::clock(set.audio_s),
            set.analysis_s,
            if set.skipped.is_empty() {
                String::new()
            } else {
                format!("; {} file(s) left out", set.skipped.len())
            }
        )?;
    }
    out.flush()?;
    Ok(())
}

/// One checked track.
#[derive(Debug, Serialize)]
struct CheckedTrack {
    path: PathBuf,
    category: String,
    truth: String,
    decision: String,
    /// Mean closeness of the track's windows to each model class, 0–1.
    closeness: Vec<f64>,
    windows: usize,
}

#[derive(Debug, Serialize)]
struct CheckJson<'a> {
    model_file: &'a Path,
    model: String,
    classes: &'a [String],
    tracks: Vec<CheckedTrack>,
    report: &'a CheckReport,
    skipped: &'a [Skipped],
}

fn check_command(a: &CheckArgs) -> Result<()> {
    if a.jobs == Some(0) {
        bail!(UsageError("--jobs must be at least 1".to_owned()));
    }
    if a.dirs.is_empty() && a.source.categories.is_empty() && a.source.manifest.is_none() {
        bail!(UsageError(
            "give labelled tracks: DIR… (sub-folders are categories), --category NAME=DIR, or --manifest FILE"
                .to_owned()
        ));
    }
    let palette = analyze::load_palette(a.palette.as_deref())?;
    let schema = windows::schema(WindowSpec::default(), &palette)?;
    // Refuse a model of another palette or schema before analysing anything.
    let model = StyleModel::load_for_schema(&a.model, &schema)
        .with_context(|| format!("{} cannot be used", a.model.display()))?;
    let tracks = collect_tracks(&a.dirs, &a.source)?;
    if tracks.is_empty() {
        bail!("no audio files found");
    }
    let model_classes = model.classes().to_vec();
    // The data's classes: the model classes its categories fall in, in model order.
    let mut present = vec![false; model_classes.len()];
    for t in &tracks {
        let c = class_of(&model_classes, &t.label).ok_or_else(|| {
            anyhow!(
                "{}: category {:?} is not one of the model's categories {model_classes:?}",
                t.path.display(),
                t.label
            )
        })?;
        present[c] = true;
    }
    let data_classes: Vec<String> = model_classes
        .iter()
        .zip(&present)
        .filter(|(_, p)| **p)
        .map(|(c, _)| c.clone())
        .collect();
    // Balanced error needs tracks of two classes at least (one class alone says nothing of
    // the other side of the decision).
    if data_classes.len() < 2 {
        bail!(
            "the tracks fall in one category ({:?}); checking needs tracks of at least two of the model's categories {model_classes:?}",
            data_classes
        );
    }
    let set = build_set(
        &tracks,
        &data_classes,
        &palette,
        &schema,
        a.jobs,
        !a.json,
        1,
    )?;
    let report = evaluation::check_model(&model, &set.data)?;
    let mut checked = Vec::with_capacity(set.tracks.len());
    for (track, windows) in set.tracks.iter().zip(&set.track_windows) {
        let rows: Vec<&[f64]> = windows.iter().map(|w| w.features.as_slice()).collect();
        let estimate = model.estimate_track(&FeatureMatrix::from_rows(&rows)?)?;
        let truth = class_of(&model_classes, &track.label).unwrap_or(0);
        checked.push(CheckedTrack {
            path: track.path.clone(),
            category: track.label.clone(),
            truth: model_classes[truth].clone(),
            decision: model_classes[estimate.predicted].clone(),
            closeness: estimate.closeness,
            windows: estimate.windows,
        });
    }
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    if a.json {
        let json = CheckJson {
            model_file: &a.model,
            model: model.kind().name().to_owned(),
            classes: &model_classes,
            tracks: checked,
            report: &report,
            skipped: &set.skipped,
        };
        writeln!(out, "{}", serde_json::to_string(&json)?)?;
    } else {
        writeln!(
            out,
            "{} model of {:?} (trained {} on {} tracks; cross-validated balanced error {} ± {})\n",
            model.kind(),
            model_classes,
            model.summary().trained_utc,
            model.summary().tracks,
            pct(model.summary().cv.window_balanced_error.mean),
            pct(model.summary().cv.window_balanced_error.sd)
        )?;
        let width = model_classes
            .iter()
            .map(String::len)
            .max()
            .unwrap_or(8)
            .max(8);
        write!(
            out,
            "  {:<8} {:<width$} {:<width$}",
            "", "truth", "decision"
        )?;
        for c in &model_classes {
            write!(out, " {:>width$}", format!("{c} %"))?;
        }
        writeln!(out, "  track")?;
        for t in &checked {
            let mark = if t.truth == t.decision { "ok" } else { "MISS" };
            write!(
                out,
                "  {mark:<8} {:<width$} {:<width$}",
                t.truth, t.decision
            )?;
            for c in &t.closeness {
                write!(out, " {:>width$.1}", 100.0 * c)?;
            }
            writeln!(out, "  {}", t.path.display())?;
        }
        writeln!(
            out,
            "\nBalanced error: windows {}, tracks {} ({} tracks, {} windows)",
            pct(report.window_balanced_error),
            pct(report.track_balanced_error),
            report.tracks,
            report.windows
        )?;
        writeln!(out, "Confusion (rows: truth; columns: decision)")?;
        write!(
            out,
            "{}",
            confusion_text(
                &model_classes,
                &report.window_confusion,
                &report.track_confusion
            )
        )?;
        for table in &report.calibration {
            if model_classes.len() == 2 && table.class != 0 {
                continue;
            }
            writeln!(out)?;
            write!(
                out,
                "{}",
                calibration_text(&model_classes[table.class], table).replace(
                    "reliability cross-fitted (each fold's sigmoid fitted on the other folds)",
                    "reliability on these tracks"
                )
            )?;
        }
        if !set.skipped.is_empty() {
            writeln!(out, "\n{} file(s) left out", set.skipped.len())?;
        }
    }
    out.flush()?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_rows_follow_rfc_4180_quoting() {
        let rows =
            csv_rows("path,label\n\"a, b.wav\",dock\r\n\"say \"\"hi\"\".wav\",neon,x\nlast,one");
        assert_eq!(rows.len(), 4);
        assert_eq!(rows[1], (2, vec!["a, b.wav".to_owned(), "dock".to_owned()]));
        assert_eq!(
            rows[2].1,
            vec![
                "say \"hi\".wav".to_owned(),
                "neon".to_owned(),
                "x".to_owned()
            ]
        );
        assert_eq!(rows[3], (4, vec!["last".to_owned(), "one".to_owned()]));
    }

    #[test]
    fn the_rest_class_takes_every_other_category() {
        let classes = vec!["dockside".to_owned(), "not dockside".to_owned()];
        assert_eq!(class_of(&classes, "dockside"), Some(0));
        assert_eq!(class_of(&classes, "neon"), Some(1));
        let multi = vec!["a".to_owned(), "b".to_owned()];
        assert_eq!(class_of(&multi, "c"), None);
    }
}
