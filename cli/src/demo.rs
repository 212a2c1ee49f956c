//! `weft demo`: the Lantern Hall scene of ARCHITECTURE.md, end to end, on invented data.
//!
//! 1. Composes N pieces of each of the venue's three set styles (parlour, dockside, neon) with
//!    the engine's seeded composer, varying tempo, key, which of the style's families play,
//!    an occasional guest family and every family's gain, renders them from the General MIDI
//!    SoundFont and writes them as WAV files under `DIR/pieces/<style>/`.
//! 2. Trains the *dockside* category against the other two styles exactly as `weft style train
//!    --target dockside --model auto` does, and prints the cross-validation table.
//! 3. Renders a short set (a parlour piece, a dockside piece, and a dockside piece that drifts
//!    towards neon halfway), estimates the closeness to dockside of every window with its three
//!    reasons, and writes `DIR/report.md`, `DIR/closeness.png` and the style model
//!    `DIR/dockside.weftstyle`.
//!
//! Everything it makes is invented demo data and says so.

use crate::analyze::{self, AnalyzeOptions, StyleWindow};
use crate::palette::DEFAULT_SOUNDFONT;
use crate::report::AtomicFile;
use crate::style::{self, MODEL_EXTENSION, Track, TrainJson, TrainSettings, Trained, TrainingSet};
use anyhow::{Context, Result, anyhow, bail};
use clap::Args;
use plotters::prelude::*;
use rayon::prelude::*;
use serde::Serialize;
use std::fmt::Write as _;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::Instant;
use weft_engine::evaluation::DEFAULT_FOLDS;
use weft_engine::palette::Palette;
use weft_engine::scene::{
    ClipBank, Composer, Mix, SceneRng, SoundFontRenderer, general_midi_voicings,
    lantern_hall_families,
};
use weft_engine::style::{Estimate, EstimateScratch, ModelKind, Push, StyleModel};
use weft_engine::windows::{self, WindowSpec};

/// The venue's set styles, in the order pieces are made.
pub const STYLES: [&str; 3] = ["parlour", "dockside", "neon"];
/// The category the demo trains.
pub const CATEGORY: &str = "dockside";
/// Rate the pieces are rendered and written at, Hz (CD rate: what a live input typically runs
/// at, so the demo's model suits a live session).
pub const RENDER_RATE_HZ: u32 = 44_100;
/// Chance that a family of the style sits a piece out.
const SIT_OUT_CHANCE: f64 = 0.3;
/// Fewest families a piece keeps.
const MIN_FAMILIES: usize = 3;
/// Chance that a piece gets a guest family from outside its style.
const GUEST_CHANCE: f64 = 0.4;
/// Gains of the style's families, dB.
const GAIN_RANGE_DB: (f64, f64) = (-9.0, 3.0);
/// Gains of a guest family, dB.
const GUEST_GAIN_RANGE_DB: (f64, f64) = (-15.0, -3.0);
/// Top of the plot's y axis: closeness ends at 100 %, the strip above holds the piece names.
const LABEL_STRIP_TOP: f64 = 110.0;
/// Length of the crossfade of the drifting piece, seconds.
const DRIFT_FADE_S: f64 = 6.0;

/// `weft demo`.
#[derive(Args, Debug)]
pub struct DemoArgs {
    /// Folder to build the scene in (created if missing; earlier demo files are overwritten).
    #[arg(long, value_name = "DIR", default_value = "lantern-hall-demo")]
    pub dir: PathBuf,

    /// End with one JSON object (category, model, cross-validation, tracks, report path) on
    /// standard output instead of the tables.
    #[arg(long)]
    pub json: bool,

    /// Pieces per style.
    #[arg(long, value_name = "N", default_value_t = 12)]
    pub pieces: usize,

    /// Seed of the whole scene (compositions, mixes, training).
    #[arg(long, default_value_t = 1)]
    pub seed: u64,

    /// The General MIDI SoundFont (SF2) to render with.
    #[arg(long, value_name = "FILE", default_value = DEFAULT_SOUNDFONT)]
    pub soundfont: PathBuf,

    /// Shortest piece, seconds (pieces last 1–1.5 times this).
    #[arg(long, value_name = "SECONDS", default_value_t = 30.0, hide = true)]
    pub piece_s: f64,

    /// Worker threads (default: one per core).
    #[arg(long, short = 'j', value_name = "N")]
    pub jobs: Option<usize>,
}

/// One composed piece.
#[derive(Debug, Clone)]
struct PieceSpec {
    style: &'static str,
    seed: u64,
    /// Voicing indices and their gains, dB.
    families: Vec<usize>,
    gains_db: Vec<f64>,
    /// Index into `families` of the guest, if any.
    guest: Option<usize>,
    duration_s: f64,
}

/// A part of the set, seconds from its start.
#[derive(Debug, Clone)]
struct Span {
    title: String,
    start_s: f64,
    end_s: f64,
}

/// What the demo reports about the set.
#[derive(Debug, Clone, Serialize)]
struct SetPiece {
    title: String,
    start_s: f64,
    end_s: f64,
    /// Mean closeness to dockside of the windows centred in the piece, 0–1.
    mean_closeness: f64,
}

/// One window of the set.
#[derive(Debug, Clone, Serialize)]
struct SetWindow {
    start_s: f64,
    end_s: f64,
    closeness: f64,
    reasons: Vec<String>,
}

/// The closing JSON object of `weft demo --json`.
#[derive(Debug, Serialize)]
struct DemoJson {
    category: &'static str,
    model: String,
    cv_balanced_error_mean: f64,
    cv_balanced_error_sd: f64,
    tracks: usize,
    report: PathBuf,
    plot: PathBuf,
    model_file: PathBuf,
    pieces_per_style: usize,
    seed: u64,
    set: Vec<SetPiece>,
    train: TrainJson,
    seconds: Timings,
}

#[derive(Debug, Clone, Copy, Serialize)]
struct Timings {
    render: f64,
    analysis: f64,
    cross_validation: f64,
    set: f64,
    total: f64,
}

fn say(json: bool, line: &str) {
    if !json {
        eprintln!("{line}");
    }
}

/// Runs `weft demo`.
///
/// # Errors
/// A missing SoundFont (with the setup command), an unwritable folder, or a failed step.
pub fn run(a: &DemoArgs) -> Result<()> {
    let start = Instant::now();
    if a.pieces < 2 {
        bail!(style::UsageError("--pieces must be at least 2".to_owned()));
    }
    if !(a.piece_s.is_finite() && a.piece_s >= 8.0) {
        bail!(style::UsageError(
            "pieces must last at least 8 seconds".to_owned()
        ));
    }
    let renderer = load_renderer(&a.soundfont)?;
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(
            a.jobs
                .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
                .max(1),
        )
        .build()
        .context("cannot start the worker threads")?;
    let voicings = general_midi_voicings();
    let composer = Composer::new(voicings.clone(), vec![], 0.0);
    let n_families = voicings.len();

    // 1. Pieces.
    let specs: Vec<PieceSpec> = STYLES
        .iter()
        .enumerate()
        .flat_map(|(s, style)| (0..a.pieces).map(move |i| (s, *style, i)))
        .map(|(s, style, i)| piece_spec(a.seed, s, style, i, a.piece_s))
        .collect::<Result<_>>()?;
    say(
        a.json,
        &format!(
            "Lantern Hall demo (invented data) in {}: composing and rendering {} pieces ({} per style)…",
            a.dir.display(),
            specs.len(),
            a.pieces
        ),
    );
    let render_start = Instant::now();
    let piece_paths: Vec<PathBuf> = specs
        .iter()
        .enumerate()
        .map(|(n, p)| {
            a.dir.join("pieces").join(p.style).join(format!(
                "{}-{:02}.wav",
                p.style,
                n % a.pieces + 1
            ))
        })
        .collect();
    for style in STYLES {
        std::fs::create_dir_all(a.dir.join("pieces").join(style))
            .with_context(|| format!("cannot create {}", a.dir.display()))?;
    }
    pool.install(|| {
        specs
            .par_iter()
            .zip(piece_paths.par_iter())
            .map(|(spec, path)| {
                let signal = render_piece(&renderer, &composer, spec, n_families)?;
                write_wav(path, &signal)
            })
            .collect::<Result<Vec<()>>>()
    })?;
    let render_s = render_start.elapsed().as_secs_f64();
    say(
        a.json,
        &format!(
            "rendered {:.0} s of music in {render_s:.1} s",
            specs.iter().map(|p| p.duration_s).sum::<f64>()
        ),
    );

    // 2. Training.
    let palette = Arc::new(Palette::default_palette());
    let schema = windows::schema(WindowSpec::default(), &palette)?;
    let tracks: Vec<Track> = specs
        .iter()
        .zip(&piece_paths)
        .map(|(s, p)| Track {
            path: p.clone(),
            label: s.style.to_owned(),
            group: None,
        })
        .collect();
    let classes = style::classes_for(&tracks, Some(CATEGORY))?;
    say(a.json, "analysing the pieces…");
    let set = style::build_set(&tracks, &classes, &palette, &schema, a.jobs, !a.json, 2)?;
    let min_tracks = set.data.tracks_per_class().into_iter().min().unwrap_or(2);
    let folds = DEFAULT_FOLDS.min(min_tracks).max(2);
    say(a.json, "cross-validating forest, svm and logistic…");
    let cv_start = Instant::now();
    let trained = style::cross_validate_and_fit(
        &set.data,
        &TrainSettings {
            kinds: ModelKind::ALL.to_vec(),
            folds,
            seed: a.seed,
            quiet: a.json,
        },
    )?;
    let cv_s = cv_start.elapsed().as_secs_f64();
    let model_file = a.dir.join(format!("{CATEGORY}.{MODEL_EXTENSION}"));
    trained
        .model
        .save(&model_file)
        .with_context(|| format!("cannot write {}", model_file.display()))?;
    let cv_table = style::cv_text(&set, &trained);
    if !a.json {
        let mut out = std::io::stdout().lock();
        write!(out, "{cv_table}")?;
        writeln!(
            out,
            "\nwrote {} ({} model)",
            model_file.display(),
            trained.model.kind()
        )?;
    }

    // 3. The set.
    say(a.json, "rendering and analysing the demo set…");
    let set_start = Instant::now();
    let (set_path, set_pieces) = render_set(a, &renderer, &composer, n_families, &pool)?;
    let options = AnalyzeOptions::for_style(Arc::clone(&palette), WindowSpec::default());
    let report = analyze::analyse_file::<std::io::Sink>(&set_path, &options, None, &mut |_| {})?;
    let set_windows = estimate_set(&trained.model, &report.style_windows)?;
    let set_summary: Vec<SetPiece> = set_pieces
        .into_iter()
        .map(|span| {
            let inside: Vec<f64> = set_windows
                .iter()
                .filter(|w| {
                    let c = 0.5 * (w.start_s + w.end_s);
                    c >= span.start_s && c < span.end_s
                })
                .map(|w| w.closeness)
                .collect();
            SetPiece {
                mean_closeness: inside.iter().sum::<f64>() / inside.len().max(1) as f64,
                title: span.title,
                start_s: span.start_s,
                end_s: span.end_s,
            }
        })
        .collect();
    let plot_file = a.dir.join("closeness.png");
    draw_closeness(&plot_file, &set_windows, &set_summary, report.duration_s)?;
    let set_s = set_start.elapsed().as_secs_f64();
    let timings = Timings {
        render: render_s,
        analysis: set.analysis_s,
        cross_validation: cv_s,
        set: set_s,
        total: start.elapsed().as_secs_f64(),
    };
    let report_file = a.dir.join("report.md");
    let text = report_markdown(&ReportInput {
        args: a,
        specs: &specs,
        voicings: &voicings,
        renderer_name: renderer.soundfont_name(),
        set: &set,
        trained: &trained,
        cv_table: &cv_table,
        set_pieces: &set_summary,
        set_windows: &set_windows,
        set_path: &set_path,
        model_file: &model_file,
        timings,
    });
    let mut file = AtomicFile::create(&report_file)?;
    file.write_all(text.as_bytes())?;
    file.commit()?;

    let kept = &trained.cvs[trained.kept].figures;
    if a.json {
        let json = DemoJson {
            category: CATEGORY,
            model: kept.model.name().to_owned(),
            cv_balanced_error_mean: kept.window_balanced_error.mean,
            cv_balanced_error_sd: kept.window_balanced_error.sd,
            tracks: set.data.n_tracks(),
            report: report_file.clone(),
            plot: plot_file,
            model_file: model_file.clone(),
            pieces_per_style: a.pieces,
            seed: a.seed,
            set: set_summary,
            train: TrainJson::of(&set, &trained, Some(CATEGORY.to_owned()), &model_file),
            seconds: timings,
        };
        writeln!(
            std::io::stdout().lock(),
            "{}",
            serde_json::to_string(&json)?
        )?;
    } else {
        let mut out = std::io::stdout().lock();
        writeln!(
            out,
            "\nThe demo set (closeness to {CATEGORY}, mean over each piece's windows):"
        )?;
        for p in &set_summary {
            writeln!(
                out,
                "  {:>6} – {:>6}  {:>6.1} %  {}",
                crate::plot::clock(p.start_s),
                crate::plot::clock(p.end_s),
                100.0 * p.mean_closeness,
                p.title
            )?;
        }
        writeln!(
            out,
            "\nwrote {} and {} ({:.0} s in all)",
            report_file.display(),
            a.dir.join("closeness.png").display(),
            timings.total
        )?;
    }
    std::io::stdout().flush()?;
    Ok(())
}

fn load_renderer(path: &Path) -> Result<SoundFontRenderer> {
    let file = std::fs::File::open(path).with_context(|| {
        format!(
            "cannot open the SoundFont {} (run `cargo xtask setup`, which installs fluid-soundfont-gm, or give --soundfont FILE)",
            path.display()
        )
    })?;
    SoundFontRenderer::new(&mut std::io::BufReader::new(file), RENDER_RATE_HZ)
        .with_context(|| format!("cannot load the SoundFont {}", path.display()))
}

/// Voicing index of a family name.
fn family_index(name: &str) -> Result<usize> {
    general_midi_voicings()
        .iter()
        .position(|v| v.family == name)
        .ok_or_else(|| anyhow!("no General MIDI voicing for family {name:?}"))
}

/// The spec of piece `i` of style `style` (number `s`): the style's families, some sitting
/// out, maybe a guest, random gains and length. Deterministic in `seed`.
fn piece_spec(
    seed: u64,
    s: usize,
    style: &'static str,
    i: usize,
    piece_s: f64,
) -> Result<PieceSpec> {
    let piece_seed = seed
        .wrapping_mul(0x9E37_79B9_7F4A_7C15)
        .wrapping_add((s as u64) << 32 | i as u64);
    let mut rng = SceneRng::derive(piece_seed, 0xD3);
    let names = lantern_hall_families(style).ok_or_else(|| anyhow!("unknown style {style}"))?;
    let core: Vec<usize> = names
        .iter()
        .map(|n| family_index(n))
        .collect::<Result<_>>()?;
    let mut families: Vec<usize> = core
        .iter()
        .copied()
        .filter(|_| !rng.chance(SIT_OUT_CHANCE))
        .collect();
    let mut missing: Vec<usize> = core
        .iter()
        .copied()
        .filter(|f| !families.contains(f))
        .collect();
    rng.shuffle(&mut missing);
    while families.len() < MIN_FAMILIES.min(core.len()) {
        let Some(f) = missing.pop() else { break };
        families.push(f);
    }
    let mut gains_db: Vec<f64> = families
        .iter()
        .map(|_| rng.uniform(GAIN_RANGE_DB.0, GAIN_RANGE_DB.1))
        .collect();
    let mut guest = None;
    if rng.chance(GUEST_CHANCE) {
        let n = general_midi_voicings().len();
        let outside: Vec<usize> = (0..n).filter(|f| !core.contains(f)).collect();
        if !outside.is_empty() {
            guest = Some(families.len());
            families.push(outside[rng.index(outside.len())]);
            gains_db.push(rng.uniform(GUEST_GAIN_RANGE_DB.0, GUEST_GAIN_RANGE_DB.1));
        }
    }
    Ok(PieceSpec {
        style,
        seed: piece_seed,
        families,
        gains_db,
        guest,
        duration_s: rng.uniform(piece_s, 1.5 * piece_s),
    })
}

/// Composes and renders a piece; returns the mix.
fn render_piece(
    renderer: &SoundFontRenderer,
    composer: &Composer,
    spec: &PieceSpec,
    n_families: usize,
) -> Result<Vec<f32>> {
    let score = composer.compose(spec.seed, &spec.families, spec.duration_s);
    let stems = renderer.render_stems(&score, n_families, &ClipBank::new(n_families))?;
    let mut members = Vec::new();
    let mut gains = Vec::new();
    for (f, g) in spec.families.iter().zip(&spec.gains_db) {
        if let Some(Some(stem)) = stems.get(*f) {
            members.push((*f, stem.as_slice()));
            gains.push(*g);
        }
    }
    Ok(Mix::new(&members, &gains, RENDER_RATE_HZ).signal)
}

/// Writes a mono 16-bit WAV with hound (the mix peaks at or below 0.9, so nothing clips).
fn write_wav(path: &Path, signal: &[f32]) -> Result<()> {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: RENDER_RATE_HZ,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut w = hound::WavWriter::create(path, spec)
        .with_context(|| format!("cannot write {}", path.display()))?;
    for &x in signal {
        let v = (x.clamp(-1.0, 1.0) * 32767.0).round() as i16;
        w.write_sample(v)
            .with_context(|| format!("cannot write {}", path.display()))?;
    }
    w.finalize()
        .with_context(|| format!("cannot finish {}", path.display()))
}

/// Renders the demo set: a parlour piece, a dockside piece, and a dockside piece crossfading
/// into a neon piece halfway. Returns its path and the spans of the parts (the drifting piece
/// in two halves).
fn render_set(
    a: &DemoArgs,
    renderer: &SoundFontRenderer,
    composer: &Composer,
    n_families: usize,
    pool: &rayon::ThreadPool,
) -> Result<(PathBuf, Vec<Span>)> {
    // Seeds beyond those of the training pieces: the set is music the model has not heard.
    let set_seed = a.seed.wrapping_add(0x5E7);
    let len = a.piece_s;
    let spec = |s: usize, style: &'static str, i: usize, dur: f64| -> Result<PieceSpec> {
        let mut p = piece_spec(set_seed, s, style, 1000 + i, len)?;
        p.duration_s = dur;
        Ok(p)
    };
    let parlour = spec(0, "parlour", 0, len)?;
    let dockside = spec(1, "dockside", 1, len)?;
    let drift_len = 1.5 * len;
    let drift_from = spec(1, "dockside", 2, drift_len)?;
    let mut drift_to = spec(2, "neon", 3, drift_len)?;
    // The same tempo and key as the dockside half, so the drift is one piece changing style.
    drift_to.seed = drift_from.seed;
    let specs = [parlour, dockside, drift_from, drift_to];
    let signals: Vec<Vec<f32>> = pool.install(|| {
        specs
            .par_iter()
            .map(|s| render_piece(renderer, composer, s, n_families))
            .collect::<Result<_>>()
    })?;
    let rate = f64::from(RENDER_RATE_HZ);
    let mut out: Vec<f32> = Vec::new();
    let mut spans = Vec::new();
    let mut push = |out: &mut Vec<f32>, title: &str, x: &[f32]| {
        let s0 = out.len() as f64 / rate;
        out.extend_from_slice(x);
        spans.push(Span {
            title: title.to_owned(),
            start_s: s0,
            end_s: out.len() as f64 / rate,
        });
    };
    push(&mut out, "parlour", &signals[0]);
    push(&mut out, "dockside", &signals[1]);
    // Crossfade (equal power) from dockside to neon around the middle.
    let (from, to) = (&signals[2], &signals[3]);
    let n = from.len().min(to.len());
    let mid = n / 2;
    let half_fade = (DRIFT_FADE_S * rate / 2.0) as usize;
    let drift: Vec<f32> = (0..n)
        .map(|i| {
            let t = if i + half_fade <= mid {
                0.0
            } else if i >= mid + half_fade {
                1.0
            } else {
                (i + half_fade - mid) as f64 / (2 * half_fade).max(1) as f64
            };
            let g_to = (t * std::f64::consts::FRAC_PI_2).sin() as f32;
            let g_from = (t * std::f64::consts::FRAC_PI_2).cos() as f32;
            g_from * from[i] + g_to * to[i]
        })
        .collect();
    push(&mut out, "drifting: dockside half", &drift[..mid]);
    push(&mut out, "drifting: neon half", &drift[mid..]);
    let peak = out.iter().fold(0.0_f32, |m, v| m.max(v.abs()));
    if peak > 0.95 {
        out.iter_mut().for_each(|v| *v *= 0.95 / peak);
    }
    let dir = a.dir.join("set");
    std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let path = dir.join("lantern-hall-set.wav");
    write_wav(&path, &out)?;
    Ok((path, spans))
}

/// Closeness to the model's first class (the category) and three phrased reasons per window.
fn estimate_set(model: &StyleModel, windows: &[StyleWindow]) -> Result<Vec<SetWindow>> {
    let mut scratch = EstimateScratch::new(model);
    let mut estimate = Estimate::new(model, 3);
    let mut out = Vec::with_capacity(windows.len());
    for w in windows {
        model.estimate_into(&w.features, 0, &mut scratch, &mut estimate)?;
        let reasons = estimate
            .reasons()
            .iter()
            .map(|r| {
                let sign = match r.push() {
                    Push::Raises => "+",
                    Push::Lowers => "−",
                };
                format!(
                    "{sign} {}",
                    windows::phrase(model.feature_name(r.feature), r.relation_to_category())
                )
            })
            .collect();
        out.push(SetWindow {
            start_s: w.start_s,
            end_s: w.end_s,
            closeness: estimate.closeness()[0],
            reasons,
        });
    }
    Ok(out)
}

/// Closeness over the set: one line, a 50 % guide, the pieces' boundaries.
fn draw_closeness(
    dest: &Path,
    windows: &[SetWindow],
    pieces: &[SetPiece],
    duration_s: f64,
) -> Result<()> {
    let file = AtomicFile::create(dest)?;
    let temp = file.temp_path().to_owned();
    {
        let root = BitMapBackend::new(&temp, (1200, 420)).into_drawing_area();
        root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!("Lantern Hall demo set (invented data): closeness to {CATEGORY}"),
                ("sans-serif", 22),
            )
            .margin(14)
            .x_label_area_size(40)
            .y_label_area_size(60)
            .build_cartesian_2d(0.0..duration_s.max(1.0), 0.0..LABEL_STRIP_TOP)
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .configure_mesh()
            .x_desc("time (s)")
            .y_desc("closeness (%)")
            .y_label_formatter(&|v| {
                if *v <= 100.0 {
                    format!("{v:.0}")
                } else {
                    String::new()
                }
            })
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .draw_series(std::iter::once(Rectangle::new(
                [(0.0, 100.0), (duration_s.max(1.0), LABEL_STRIP_TOP)],
                WHITE.filled(),
            )))
            .map_err(|e| anyhow!("{e}"))?;
        // One tint per style, so the drifting piece's halves read as dockside and neon.
        let tint = |title: &str| {
            if title.contains("parlour") {
                RGBColor(246, 238, 224)
            } else if title.contains("neon") {
                RGBColor(240, 230, 246)
            } else {
                RGBColor(226, 238, 248)
            }
        };
        for p in pieces {
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(p.start_s, 0.0), (p.end_s, 100.0)],
                    tint(&p.title).filled(),
                )))
                .map_err(|e| anyhow!("{e}"))?;
            if p.start_s > 0.0 {
                chart
                    .draw_series(LineSeries::new(
                        [(p.start_s, 0.0), (p.start_s, 100.0)],
                        RGBColor(120, 120, 120).stroke_width(1),
                    ))
                    .map_err(|e| anyhow!("{e}"))?;
            }
            chart
                .draw_series(std::iter::once(Text::new(
                    p.title.clone(),
                    (p.start_s + 0.5, LABEL_STRIP_TOP - 2.0),
                    ("sans-serif", 14).into_font(),
                )))
                .map_err(|e| anyhow!("{e}"))?;
        }
        chart
            .draw_series(LineSeries::new(
                [(0.0, 50.0), (duration_s, 50.0)],
                RGBColor(170, 170, 170).stroke_width(1),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .draw_series(LineSeries::new(
                windows
                    .iter()
                    .map(|w| (0.5 * (w.start_s + w.end_s), 100.0 * w.closeness)),
                RGBColor(31, 78, 140).stroke_width(2),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        root.present().map_err(|e| anyhow!("{e}"))?;
    }
    file.commit()
        .with_context(|| format!("cannot finish {}", dest.display()))
}

struct ReportInput<'a> {
    args: &'a DemoArgs,
    specs: &'a [PieceSpec],
    voicings: &'a [weft_engine::scene::FamilyVoicing],
    renderer_name: String,
    set: &'a TrainingSet,
    trained: &'a Trained,
    cv_table: &'a str,
    set_pieces: &'a [SetPiece],
    set_windows: &'a [SetWindow],
    set_path: &'a Path,
    model_file: &'a Path,
    timings: Timings,
}

fn relative<'p>(base: &Path, p: &'p Path) -> std::borrow::Cow<'p, str> {
    p.strip_prefix(base).unwrap_or(p).to_string_lossy()
}

fn report_markdown(r: &ReportInput<'_>) -> String {
    let a = r.args;
    let mut s = String::new();
    let _ = writeln!(s, "# Lantern Hall demo — invented data\n");
    let _ = writeln!(
        s,
        "> **Everything here is invented demo data.** Lantern Hall, its house band and its sets are \
         fictional (Weft's demo scenario); the pieces were composed by a seeded program and rendered \
         from the General MIDI SoundFont \"{}\". Nothing here describes real music or real people.\n",
        r.renderer_name
    );
    let _ = writeln!(s, "## The scene\n");
    let _ = writeln!(
        s,
        "The venue's band plays three kinds of sets. {} pieces of each were composed (seed {}), \
         {:.0}–{:.0} s long, with random tempo and key, each of the style's families sitting a piece \
         out with probability {:.0} % (at least {MIN_FAMILIES} play), a guest family from outside the \
         style in {:.0} % of the pieces, and gains of {:.0} to {:+.0} dB ({:.0} to {:.0} dB for guests).\n",
        a.pieces,
        a.seed,
        a.piece_s,
        1.5 * a.piece_s,
        100.0 * SIT_OUT_CHANCE,
        100.0 * GUEST_CHANCE,
        GAIN_RANGE_DB.0,
        GAIN_RANGE_DB.1,
        GUEST_GAIN_RANGE_DB.0,
        GUEST_GAIN_RANGE_DB.1
    );
    let _ = writeln!(
        s,
        "| style | families | pieces | with a guest | mean length |"
    );
    let _ = writeln!(s, "|---|---|---|---|---|");
    for style in STYLES {
        let of: Vec<&PieceSpec> = r.specs.iter().filter(|p| p.style == style).collect();
        let _ = writeln!(
            s,
            "| {style} | {} | {} | {} | {:.0} s |",
            lantern_hall_families(style).unwrap_or(&[]).join(", "),
            of.len(),
            of.iter().filter(|p| p.guest.is_some()).count(),
            of.iter().map(|p| p.duration_s).sum::<f64>() / of.len().max(1) as f64
        );
    }
    let _ = writeln!(s, "\nEach piece, as rendered:\n");
    let _ = writeln!(s, "| piece | length | families (gain dB; * guest) |");
    let _ = writeln!(s, "|---|---|---|");
    let mut counter = std::collections::HashMap::new();
    for p in r.specs {
        let n = counter.entry(p.style).or_insert(0);
        *n += 1;
        let fams: Vec<String> = p
            .families
            .iter()
            .zip(&p.gains_db)
            .enumerate()
            .map(|(i, (f, g))| {
                format!(
                    "{}{} ({g:+.0})",
                    r.voicings.get(*f).map_or("?", |v| v.family.as_str()),
                    if p.guest == Some(i) { "*" } else { "" }
                )
            })
            .collect();
        let _ = writeln!(
            s,
            "| {}-{:02} | {:.0} s | {} |",
            p.style,
            n,
            p.duration_s,
            fams.join(", ")
        );
    }
    let kept = &r.trained.cvs[r.trained.kept].figures;
    let _ = writeln!(
        s,
        "\n## The category: *{CATEGORY}* against the other sets\n"
    );
    let _ = writeln!(
        s,
        "Trained as `weft style train --target {CATEGORY} --model auto` does: 3-s windows every 1 s \
         (mean and standard deviation of level, timbre descriptors and family shares from the built-in \
         palette), {} tracks, {} windows; each model cross-validated over {} stratified folds grouped by \
         track. Kept: **{}**, window balanced error **{:.1} % ± {:.1} %** (mean ± sd over folds; the goal \
         is ≤ 5 %).\n",
        r.set.data.n_tracks(),
        r.set.data.n_windows(),
        kept.folds,
        kept.model.name(),
        100.0 * kept.window_balanced_error.mean,
        100.0 * kept.window_balanced_error.sd
    );
    let _ = writeln!(s, "```text\n{}```\n", r.cv_table);
    let _ = writeln!(
        s,
        "Style model: `{}` (the closeness is a Platt sigmoid fitted on the cross-validated scores).\n",
        relative(&a.dir, r.model_file)
    );
    let _ = writeln!(s, "## The set\n");
    let _ = writeln!(
        s,
        "`{}`: three pieces the model was not trained on, back to back; the last one drifts from \
         dockside to neon halfway (a {DRIFT_FADE_S:.0}-s crossfade).\n\n![closeness over the set](closeness.png)\n",
        relative(&a.dir, r.set_path)
    );
    let _ = writeln!(s, "| from | to | piece | mean closeness to {CATEGORY} |");
    let _ = writeln!(s, "|---|---|---|---|");
    for p in r.set_pieces {
        let _ = writeln!(
            s,
            "| {} | {} | {} | {:.1} % |",
            crate::plot::clock(p.start_s),
            crate::plot::clock(p.end_s),
            p.title,
            100.0 * p.mean_closeness
        );
    }
    let _ = writeln!(
        s,
        "\nEvery window (3 s, one per second), with the three features that move its closeness most \
         (+ raises it, − lowers it):\n"
    );
    let _ = writeln!(s, "| window | closeness | reasons |");
    let _ = writeln!(s, "|---|---|---|");
    for w in r.set_windows {
        let _ = writeln!(
            s,
            "| {}–{} | {:.0} % | {} |",
            crate::plot::clock(w.start_s),
            crate::plot::clock(w.end_s),
            100.0 * w.closeness,
            w.reasons.join("; ")
        );
    }
    let t = r.timings;
    let _ = writeln!(
        s,
        "\n## How long it took\n\nrendering {:.1} s, analysis {:.1} s, cross-validation and fit {:.1} s, \
         the set {:.1} s; {:.1} s in all. One window's closeness with three reasons: {:.1} µs.",
        t.render, t.analysis, t.cross_validation, t.set, t.total, r.trained.inference_us_per_window
    );
    s
}
