//! `weft`: Weft's command-line tool for whole files and folders.
//!
//! `weft analyze FILE|DIR…` decodes every common audio format, runs the same engine as the plugin
//! over each file (family shares from the built-in palette or `--palette`, descriptors, and the
//! closeness to a style model's category with `--style`), and writes per-window timelines (or
//! per-frame rows), a summary table or JSON, and plots. `weft compare FILE --style MODEL` says how
//! close one file sits to a category over time, why, and what lies outside the category's range.
//! See `weft analyze --help`, `weft compare --help` and the README's "Command line" section.
//!
//! Exit status of `analyze` and `compare`: 0 when every file was analysed, 1 when one or more
//! files failed (each is named on standard error with its reason, and the others are still
//! analysed), 2 for a usage error, 3 when the palette or style model file cannot be used.

#![forbid(unsafe_code)]

mod analyze;
mod check_plot;
mod compare;
mod decode;
mod demo;
mod palette;
mod palette_show;
mod plot;
mod report;
mod resample;
mod style;
mod summary;
mod timeline;

use analyze::{AnalyzeOptions, BatchOutput, FramesMode};
use anyhow::{Context, Result};
use clap::{Args, Parser, Subcommand};
use plot::{PlotBy, PlotFormat, PlotPanel};
use report::{RowFormat, RowWriter};
use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;
use weft_engine::{AnalysisSettings, FrameConfig};

const EXIT_CODES: &str = "Exit status:
  0  every file was analysed
  1  one or more files failed (each is named on standard error with the reason; the others were analysed)
  2  usage error (bad option or option combination)
  3  the palette or style model file cannot be used (unreadable, invalid, or trained on other
     features; analyze and compare)";

/// Shows what an arrangement is made of: audio files and folders in, timelines, summaries and
/// plots out.
#[derive(Parser)]
#[command(version, about, after_help = EXIT_CODES)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Analyse audio files and folders: a summary table, timelines, plots.
    #[command(after_help = EXIT_CODES)]
    Analyze(AnalyzeArgs),
    /// Build instrument palettes from recordings or a SoundFont, and measure them.
    Palette(palette::PaletteArgs),
    /// Compare one file with a style model's category: closeness over time, the strongest
    /// reasons, and what sits outside the category's typical range.
    #[command(after_help = compare::EXIT_CODES)]
    Compare(compare::CompareArgs),
    /// Train style models (categories) from labelled tracks and check them on others.
    Style(style::StyleArgs),
    /// Build the Lantern Hall demo scene (invented data): pieces, a trained category, a set.
    Demo(demo::DemoArgs),
}

#[derive(Args)]
struct AnalyzeArgs {
    /// Audio files (any format Weft decodes: WAV, AIFF, FLAC, MP3, Ogg Vorbis, AAC/M4A, ALAC, …;
    /// rates below 8 kHz or above 384 kHz are resampled to the nearest of the two) and folders
    /// (searched recursively for audio files by extension).
    #[arg(required = true, value_name = "FILE|DIR")]
    paths: Vec<PathBuf>,

    /// Length of a timeline window, seconds.
    #[arg(long, value_name = "SECONDS", default_value_t = 1.0)]
    window: f64,

    /// Write one timeline per file into this folder (created if missing), named
    /// `<file name>.timeline.csv` (or `.frames.csv` with --frames).
    #[arg(long, value_name = "DIR")]
    out: Option<PathBuf>,

    /// Format of the rows: CSV with a header row (units in the column names) or JSON lines.
    /// Default: csv, or jsonl with --json.
    #[arg(long, value_enum, value_name = "FORMAT")]
    format: Option<RowFormat>,

    /// Machine output: one JSON object per file (with its windows) and a closing batch object,
    /// as JSON lines on standard output, instead of the table.
    #[arg(long)]
    json: bool,

    /// Per-frame rows (time, level, every descriptor) instead of per-window rows, equal to
    /// librosa 0.11.0's features: the whole file is held in memory (up to about 23 minutes at
    /// 48 kHz) to apply librosa's whole-clip dB floor. With one file and no --out they go to
    /// standard output (JSON lines with --json, else CSV); the table then goes to standard error.
    #[arg(long)]
    frames: bool,

    /// With --frames: stream the frames with the live convention instead (MFCC, flux and
    /// contrast without the whole-clip floor, as the plugin computes them; bounded memory).
    #[arg(long, requires = "frames")]
    live: bool,

    /// Frame length, samples at the analysis rate (default: 2048 below 88.2 kHz, 4096 below
    /// 176.4 kHz, else 8192).
    #[arg(long, value_name = "N")]
    frame_size: Option<usize>,

    /// Hop between frames, samples at the analysis rate (default: a quarter frame).
    #[arg(long, value_name = "N", requires = "frame_size")]
    hop_size: Option<usize>,

    /// Resample every file to this rate before analysis, Hz (e.g. 22050 to line frames up with
    /// librosa's defaults).
    #[arg(long, value_name = "HZ")]
    sample_rate: Option<u32>,

    /// Write a plot (.svg or .png): one file's timeline (the instrument mix as stacked areas,
    /// the closeness over it with --style, the level below), or an overview with one panel per
    /// file for several files.
    #[arg(long, value_name = "FILE.svg|FILE.png")]
    plot: Option<PathBuf>,

    /// With --out: also write one plot per file into that folder in this format.
    #[arg(long, value_enum, value_name = "FORMAT", requires = "out")]
    plots: Option<PlotFormat>,

    /// Worker threads (default: one per core).
    #[arg(long, short = 'j', value_name = "N")]
    jobs: Option<usize>,

    /// Palette file for the family shares (default: the built-in palette).
    #[arg(long, value_name = "FILE", conflicts_with = "no_shares")]
    palette: Option<PathBuf>,

    /// Leave out the family shares (level and descriptors only; faster).
    #[arg(long)]
    no_shares: bool,

    /// Style model file: adds the closeness to its category per window, in the summary and in
    /// the plot. Needs the default framing (no --frame-size, --hop-size, --sample-rate, --frames).
    #[arg(long, value_name = "MODEL", conflicts_with = "no_shares")]
    style: Option<PathBuf>,

    /// With --style: the category to measure closeness to (default: the model's category, its
    /// first class that is not a catch-all such as "rest").
    #[arg(long, value_name = "NAME", requires = "style")]
    category: Option<String>,

    /// How plots stack the shares: one area per section or per family.
    #[arg(long, value_enum, value_name = "BY", default_value_t = PlotBy::Section)]
    plot_by: PlotBy,

    /// No progress bar and no closing throughput line.
    #[arg(long, short = 'q')]
    quiet: bool,
}

/// A usage problem found after parsing (exit status 2).
struct Usage(String);

fn main() -> ExitCode {
    analyze::install_panic_hook();
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(err) => {
            // clap exits 2 on usage errors and 0 for --help and --version.
            err.exit();
        }
    };
    match cli.command {
        Command::Style(args) => ExitCode::from(style::run(args)),
        Command::Demo(args) => match demo::run(&args) {
            Ok(()) => ExitCode::SUCCESS,
            // A closed pipe (`weft demo | head`) is not a failure.
            Err(err)
                if err.chain().any(|e| {
                    e.downcast_ref::<std::io::Error>()
                        .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe)
                }) =>
            {
                ExitCode::SUCCESS
            }
            Err(err) => {
                if let Some(u) = err.downcast_ref::<style::UsageError>() {
                    eprintln!("weft: usage error: {u}");
                    ExitCode::from(2)
                } else {
                    eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
                    ExitCode::from(1)
                }
            }
        },
        Command::Palette(args) => match palette::run(args) {
            Ok(()) => ExitCode::SUCCESS,
            Err(err) => {
                eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
                ExitCode::from(1)
            }
        },
        Command::Analyze(args) => report_failure(analyze(args)),
        Command::Compare(args) => report_failure(compare::run(&args)),
    }
}

/// Why `analyze` or `compare` stopped, with its exit status.
enum Failure {
    /// Exit 2.
    Usage(Usage),
    /// A palette or style model that cannot be used: exit 3.
    Model(anyhow::Error),
    /// Anything else: exit 1.
    Other(anyhow::Error),
}

fn report_failure(outcome: Result<ExitCode, Failure>) -> ExitCode {
    match outcome {
        Ok(code) => code,
        Err(Failure::Usage(Usage(message))) => {
            eprintln!("weft: usage error: {message}");
            ExitCode::from(2)
        }
        Err(Failure::Model(err)) => {
            eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
            ExitCode::from(3)
        }
        Err(Failure::Other(err)) => {
            eprintln!("weft: {}", weft_engine::error_chain(err.as_ref()));
            ExitCode::from(1)
        }
    }
}

impl From<anyhow::Error> for Failure {
    fn from(err: anyhow::Error) -> Self {
        Self::Other(err)
    }
}

fn usage(message: impl Into<String>) -> Failure {
    Failure::Usage(Usage(message.into()))
}

fn analyze(args: AnalyzeArgs) -> Result<ExitCode, Failure> {
    if !(args.window.is_finite() && args.window > 0.0) {
        return Err(usage(format!(
            "--window must be a positive number of seconds, not {}",
            args.window
        )));
    }
    let framing = match args.frame_size {
        Some(frame) => Some(
            FrameConfig::new(frame, args.hop_size.unwrap_or((frame / 4).max(1)))
                .map_err(|e| usage(format!("--frame-size/--hop-size: {e}")))?,
        ),
        None => None,
    };
    if let Some(rate) = args.sample_rate {
        AnalysisSettings::for_sample_rate(f64::from(rate))
            .map_err(|e| usage(format!("--sample-rate: {e}")))?;
    }
    if let Some(plot) = &args.plot
        && PlotFormat::from_path(plot).is_none()
    {
        return Err(usage(format!(
            "--plot {}: the name must end in .svg or .png",
            plot.display()
        )));
    }
    if args.style.is_some() {
        let clash = [
            (args.frames, "--frames"),
            (args.frame_size.is_some(), "--frame-size"),
            (args.sample_rate.is_some(), "--sample-rate"),
        ];
        if let Some((_, option)) = clash.iter().find(|(set, _)| *set) {
            return Err(usage(format!(
                "--style cannot be combined with {option}: style models read windows of the default framing"
            )));
        }
    }
    let palette = if args.no_shares {
        None
    } else {
        Some(analyze::load_palette(args.palette.as_deref()).map_err(Failure::Model)?)
    };
    let style = match (&args.style, &palette) {
        (Some(path), Some(palette)) => Some(std::sync::Arc::new(
            analyze::StyleTarget::load(path, palette, args.category.as_deref())
                .map_err(Failure::Model)?,
        )),
        _ => None,
    };
    let jobs = match args.jobs {
        Some(0) => return Err(usage("--jobs must be at least 1")),
        Some(n) => n,
        None => std::thread::available_parallelism().map_or(1, |n| n.get()),
    };
    let (files, problems) = analyze::collect_inputs(&args.paths);
    let frames_to_stdout = args.frames && args.out.is_none();
    if frames_to_stdout && files.len() + problems.len() > 1 {
        return Err(usage(
            "--frames with several files needs --out DIR (one rows file per audio file)",
        ));
    }
    for (path, reason) in &problems {
        eprintln!("weft: {}: {reason}", path.display());
    }
    if let Some(dir) = &args.out {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("cannot create the output folder {}", dir.display()))?;
    }
    let row_format = args.format.unwrap_or(if args.json {
        RowFormat::Jsonl
    } else {
        RowFormat::Csv
    });
    let options = AnalyzeOptions {
        window_s: args.window,
        framing,
        resample_hz: args.sample_rate,
        frames: match (args.frames, args.live) {
            (false, _) => FramesMode::Off,
            (true, false) => FramesMode::WholeClip,
            (true, true) => FramesMode::Live,
        },
        palette,
        style_windows: None,
        style: style.clone(),
    };
    let output = BatchOutput {
        out_dir: args.out.clone(),
        row_format,
        plots: args.plots,
        plot_by: args.plot_by,
        quiet: args.quiet,
        threads: jobs,
    };

    let batch = if frames_to_stdout && files.len() == 1 {
        single_file_frames_to_stdout(&files[0], &options, row_format)?
    } else {
        analyze::run_batch(&files, &options, &output)?
    };

    let mut plot_failed = false;
    let category = style.as_deref().map(analyze::StyleTarget::category_name);
    if let Some(dest) = &args.plot {
        let panels: Vec<PlotPanel<'_>> = batch
            .results
            .iter()
            .filter_map(|(path, r)| r.as_ref().ok().map(|r| (path, r)))
            .map(|(path, r)| {
                let title = path.file_name().map_or_else(
                    || path.display().to_string(),
                    |n| n.to_string_lossy().into_owned(),
                );
                PlotPanel::of(title, r, category)
            })
            .collect();
        if panels.is_empty() {
            eprintln!(
                "weft: {}: no file was analysed, so nothing was plotted",
                dest.display()
            );
            plot_failed = true;
        } else {
            if panels.len() > plot::MAX_OVERVIEW_PANELS {
                eprintln!(
                    "weft: {}: the overview shows the first {} of {} files (use --out DIR --plots png for one plot per file)",
                    dest.display(),
                    plot::MAX_OVERVIEW_PANELS,
                    panels.len()
                );
            }
            if let Err(err) = plot::write_plot(dest, &panels, args.plot_by) {
                eprintln!("weft: {}: the plot failed: {err:#}", dest.display());
                plot_failed = true;
            }
        }
    }

    let figures = summary::BatchJson::of(&batch);
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let write_result = (|| -> Result<()> {
        if args.json && !frames_to_stdout {
            for line in summary::json_lines(&batch, style.as_deref())? {
                writeln!(out, "{line}")?;
            }
            writeln!(
                out,
                "{}",
                serde_json::to_string(&serde_json::json!({ "batch": &figures }))?
            )?;
        } else if frames_to_stdout {
            if !args.quiet {
                eprint!("{}", summary::table(&batch));
            }
        } else {
            write!(out, "{}", summary::table(&batch))?;
        }
        out.flush()?;
        Ok(())
    })();
    if let Err(err) = write_result {
        // A closed pipe (`weft … | head`) is not a failure of the analysis.
        let broken_pipe = err
            .downcast_ref::<std::io::Error>()
            .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe);
        if !broken_pipe {
            return Err(err.into());
        }
    }
    if !args.quiet {
        eprintln!("weft: {}", figures.line());
    }
    let failed = figures.failed > 0 || !problems.is_empty() || plot_failed || files.is_empty();
    Ok(if failed {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    })
}

/// `--frames` for one file without `--out`: rows stream to standard output as they are made.
fn single_file_frames_to_stdout(
    file: &std::path::Path,
    options: &AnalyzeOptions,
    format: RowFormat,
) -> Result<analyze::BatchResult> {
    let start = std::time::Instant::now();
    let stdout = std::io::stdout();
    let mut writer = RowWriter::new(std::io::BufWriter::new(stdout.lock()), format);
    let result = analyze::analyse_file(file, options, Some(&mut writer), &mut |_| {});
    let flushed = writer.into_inner().map(|_| ());
    let result = result.and_then(|r| flushed.map(|()| r));
    if let Err(err) = &result {
        let closed = err.chain().any(|e| {
            e.downcast_ref::<std::io::Error>()
                .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe)
        });
        if closed {
            // The reader stopped listening (`weft … --frames | head`): stop quietly, as command-
            // line filters do. Nothing was written to a file, so nothing is left behind.
            std::process::exit(0);
        }
    }
    let result = result.map_err(|err| {
        let reason = format!("{err:#}");
        eprintln!("weft: {}: {reason}", file.display());
        reason
    });
    let audio_s = result.as_ref().map_or(0.0, |r| r.duration_s);
    Ok(analyze::BatchResult {
        results: vec![(file.to_owned(), result)],
        audio_s,
        elapsed_s: start.elapsed().as_secs_f64(),
        threads: 1,
    })
}
