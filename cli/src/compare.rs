//! `weft compare FILE --style MODEL`: how close one file sits to a style model's category, over
//! time and why, in plain words.
//!
//! Three parts, computed from the engine's style windows of the file (3 s every 1 s, the windows
//! the model was trained on) and the model's own records:
//! - **closeness over time**: the mean closeness of the style windows centred in each `--step`
//!   seconds (default 10 s), as a bar per row;
//! - **the strongest reasons**: every window's reasons (the features that move its closeness
//!   most, `StyleModel::estimate_into`, three per window) tallied per feature and direction; a
//!   feature's strength is the sum of its pushes (log-odds of the closeness) over the windows
//!   where it is a reason, so both how often and how strongly count; each is phrased with
//!   `weft_engine::windows::phrase` on the side of the category's mean the window's value lies
//!   in most often — except a reason that raises the closeness while the value lies within one
//!   training standard deviation of the category's mean in most of those windows, which reads
//!   "… as in the category";
//! - **outside the category's typical range**: the file's mean of each family share, the
//!   unexplained share, the scalar descriptors and the contrast bands (MFCCs are left out: they
//!   have no plain-word reading), against the mean of the category's training windows
//!   (`StyleModel::class_mean`). "Outside" means more than one training standard deviation away
//!   (the scaler's per-feature standard deviation over all training windows) — a common-practice
//!   rule of thumb for "unusual", not a statistical test.

use crate::analyze::{self, AnalyzeOptions, FileReport, FramesMode, StyleTarget};
use crate::plot::{self, PlotBy, PlotFormat, PlotPanel};
use crate::{Failure, usage};
use anyhow::Result;
use clap::Args;
use serde::Serialize;
use std::fmt::Write as _;
use std::io::Write as _;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use weft_engine::style::{Push, Relation};
use weft_engine::windows::phrase;

/// `weft compare`'s exit statuses.
pub const EXIT_CODES: &str = "Exit status:
  0  the file was compared
  1  the file could not be analysed (named on standard error with the reason), or the plot failed
  2  usage error (bad option or option combination)
  3  the palette or style model file cannot be used (unreadable, invalid, or trained on other
     features: the message names the file and why)";

/// Arguments of `weft compare`.
#[derive(Args)]
pub struct CompareArgs {
    /// The audio file (any format `weft analyze` reads).
    #[arg(value_name = "FILE")]
    file: PathBuf,

    /// The style model file (from `weft style train`).
    #[arg(long, value_name = "MODEL")]
    style: PathBuf,

    /// The palette the model was trained with (default: the built-in palette).
    #[arg(long, value_name = "FILE")]
    palette: Option<PathBuf>,

    /// The category to compare with (default: the model's category, its first class that is not
    /// a catch-all such as "rest").
    #[arg(long, value_name = "NAME")]
    category: Option<String>,

    /// Seconds per row of the closeness timeline.
    #[arg(long, value_name = "SECONDS", default_value_t = 10.0)]
    step: f64,

    /// Reasons listed in each direction.
    #[arg(long, value_name = "N", default_value_t = 3)]
    reasons: usize,

    /// Machine output: one JSON object on standard output.
    #[arg(long)]
    json: bool,

    /// Also write a plot (.svg or .png): the instrument mix with the closeness over it.
    #[arg(long, value_name = "FILE.svg|FILE.png")]
    plot: Option<PathBuf>,

    /// How the plot stacks the shares.
    #[arg(long, value_enum, value_name = "BY", default_value_t = PlotBy::Section)]
    plot_by: PlotBy,
}

/// One row of the closeness timeline.
#[derive(Debug, Clone, Serialize)]
pub struct Step {
    /// Start, seconds.
    pub start_s: f64,
    /// End, seconds.
    pub end_s: f64,
    /// Mean closeness of the style windows centred in the row, 0–1 (`null`: none).
    pub closeness: Option<f64>,
}

/// One feature's tally as a reason in one direction.
#[derive(Debug, Clone, Serialize)]
pub struct ReasonTally {
    /// The feature's name in the model's schema.
    pub feature: String,
    /// In words.
    pub phrase: String,
    /// Fraction of the style windows where it is a reason in this direction, 0–1.
    pub windows_fraction: f64,
    /// Mean push where it is, log-odds of the closeness (negative lowers it).
    pub mean_push_log_odds: f64,
    /// Sum of those pushes: how the reasons are ranked.
    pub total_push_log_odds: f64,
}

/// A feature whose file mean lies outside the category's typical range.
#[derive(Debug, Clone, Serialize)]
pub struct OutsideRange {
    /// The feature's name in the model's schema.
    pub feature: String,
    /// In words.
    pub phrase: String,
    /// Mean of the file's style windows, in the feature's unit.
    pub file_mean: f64,
    /// Mean of the category's training windows, same unit.
    pub category_mean: f64,
    /// Standard deviation over all training windows, same unit.
    pub training_sd: f64,
    /// (file − category) / sd.
    pub distance_sd: f64,
}

/// Everything `weft compare` reports.
#[derive(Debug, Clone, Serialize)]
pub struct Comparison {
    /// The audio file.
    pub file: String,
    /// The model file.
    pub model: String,
    /// The category compared with.
    pub category: String,
    /// The model's classes.
    pub classes: Vec<String>,
    /// Length of the file, seconds.
    pub duration_s: f64,
    /// Mean closeness, time above 50 %, windows.
    pub closeness: analyze::ClosenessSummary,
    /// The closeness timeline.
    pub timeline: Vec<Step>,
    /// Reasons that take the file away from the category, strongest first.
    pub lowering: Vec<ReasonTally>,
    /// Reasons that bring it closer, strongest first.
    pub raising: Vec<ReasonTally>,
    /// What sits outside the category's typical range, furthest first.
    pub outside: Vec<OutsideRange>,
}

/// Runs `weft compare`.
pub fn run(args: &CompareArgs) -> Result<ExitCode, Failure> {
    if !(args.step.is_finite() && args.step > 0.0) {
        return Err(usage(format!(
            "--step must be a positive number of seconds, not {}",
            args.step
        )));
    }
    if let Some(plot) = &args.plot
        && PlotFormat::from_path(plot).is_none()
    {
        return Err(usage(format!(
            "--plot {}: the name must end in .svg or .png",
            plot.display()
        )));
    }
    let palette = analyze::load_palette(args.palette.as_deref()).map_err(Failure::Model)?;
    let target = Arc::new(
        StyleTarget::load(&args.style, &palette, args.category.as_deref())
            .map_err(Failure::Model)?,
    );
    let options = AnalyzeOptions {
        window_s: 1.0,
        framing: None,
        resample_hz: None,
        frames: FramesMode::Off,
        palette: Some(palette),
        style_windows: None,
        style: Some(Arc::clone(&target)),
    };
    let report = match analyze::analyse_guarded(|| {
        analyze::analyse_file::<std::io::Sink>(&args.file, &options, None, &mut |_| {})
    }) {
        Ok(r) => r,
        Err(err) => {
            eprintln!(
                "weft: {}: {}",
                args.file.display(),
                weft_engine::error_chain(err.as_ref())
            );
            return Ok(ExitCode::from(1));
        }
    };
    let comparison = compare(&report, &target, args.step, args.reasons)?;
    let mut failed = false;
    if let Some(dest) = &args.plot {
        let title = args.file.file_name().map_or_else(
            || args.file.display().to_string(),
            |n| n.to_string_lossy().into_owned(),
        );
        let panel = PlotPanel::of(title, &report, Some(target.category_name()));
        if let Err(err) = plot::write_plot(dest, &[panel], args.plot_by) {
            eprintln!("weft: {}: the plot failed: {err:#}", dest.display());
            failed = true;
        }
    }
    let text = if args.json {
        serde_json::to_string(&comparison).map_err(anyhow::Error::from)? + "\n"
    } else {
        render(&comparison)
    };
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    if let Err(err) = out.write_all(text.as_bytes()).and_then(|()| out.flush())
        && err.kind() != std::io::ErrorKind::BrokenPipe
    {
        return Err(Failure::Other(err.into()));
    }
    Ok(if failed {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    })
}

/// The comparison of an analysed file (with style estimates) with `target`'s category.
pub fn compare(
    report: &FileReport,
    target: &StyleTarget,
    step_s: f64,
    reasons: usize,
) -> Result<Comparison> {
    let model = &target.model;
    let estimates = &report.style_estimates;
    let closeness = report
        .closeness_summary()
        .ok_or_else(|| anyhow::anyhow!("the file gave no style window to estimate"))?;

    let steps = (report.duration_s / step_s).ceil().max(1.0) as usize;
    let timeline = (0..steps)
        .map(|i| {
            let (start_s, end_s) = (
                i as f64 * step_s,
                ((i + 1) as f64 * step_s).min(report.duration_s),
            );
            let inside: Vec<f64> = estimates
                .iter()
                .filter(|e| {
                    let c = e.centre_s();
                    c >= start_s && (c < start_s + step_s)
                })
                .map(|e| e.closeness)
                .collect();
            Step {
                start_s,
                end_s: end_s.max(start_s),
                closeness: (!inside.is_empty())
                    .then(|| inside.iter().sum::<f64>() / inside.len() as f64),
            }
        })
        .collect();

    // Reasons: tally per feature and direction.
    let n_features = model.n_features();
    #[derive(Clone, Default)]
    struct Tally {
        windows: usize,
        push: f64,
        above: usize,
        below: usize,
        /// Windows whose value lies within one training sd of the category's mean.
        near: usize,
    }
    let sd = model.scaler().scale();
    let mut lower = vec![Tally::default(); n_features];
    let mut raise = vec![Tally::default(); n_features];
    for e in estimates {
        for r in &e.reasons {
            let t = match r.push() {
                Push::Lowers => &mut lower[r.feature],
                Push::Raises => &mut raise[r.feature],
            };
            t.windows += 1;
            t.push += r.push_log_odds;
            if (r.value - r.category_mean).abs() <= sd.get(r.feature).copied().unwrap_or(0.0) {
                t.near += 1;
            }
            match r.relation_to_category() {
                Relation::Above => t.above += 1,
                Relation::Below => t.below += 1,
                Relation::Level => {}
            }
        }
    }
    let n_windows = estimates.len().max(1) as f64;
    let family_words = family_words(&report.windows);
    let ranked = |tallies: &[Tally], direction: Push| -> Vec<ReasonTally> {
        let mut order: Vec<usize> = (0..tallies.len())
            .filter(|&f| tallies[f].windows > 0)
            .collect();
        order.sort_by(|&a, &b| tallies[b].push.abs().total_cmp(&tallies[a].push.abs()));
        order
            .into_iter()
            .take(reasons)
            .map(|f| {
                let t = &tallies[f];
                let name = model.feature_name(f);
                let relation = if direction == Push::Raises && 2 * t.near >= t.windows {
                    Relation::Level
                } else if t.above >= t.below {
                    Relation::Above
                } else {
                    Relation::Below
                };
                ReasonTally {
                    feature: name.to_owned(),
                    phrase: in_words(name, relation, &family_words),
                    windows_fraction: t.windows as f64 / n_windows,
                    mean_push_log_odds: t.push / t.windows as f64,
                    total_push_log_odds: t.push,
                }
            })
            .collect()
    };
    let lowering = ranked(&lower, Push::Lowers);
    let raising = ranked(&raise, Push::Raises);

    // Outside the typical range.
    let category_mean = model
        .class_mean(target.category)
        .ok_or_else(|| anyhow::anyhow!("the model has no mean for its category"))?;
    let mut outside = Vec::new();
    for (j, name) in model.schema().features.iter().enumerate() {
        if !compared_feature(name) {
            continue;
        }
        let file_mean = report
            .style_windows
            .iter()
            .map(|w| w.features.get(j).copied().unwrap_or(0.0))
            .sum::<f64>()
            / report.style_windows.len().max(1) as f64;
        let (c, s) = (category_mean[j], sd[j]);
        let distance_sd = (file_mean - c) / s;
        if distance_sd.abs() > 1.0 {
            let relation = if distance_sd > 0.0 {
                Relation::Above
            } else {
                Relation::Below
            };
            outside.push(OutsideRange {
                feature: name.clone(),
                phrase: in_words(name, relation, &family_words),
                file_mean,
                category_mean: c,
                training_sd: s,
                distance_sd,
            });
        }
    }
    outside.sort_by(|a, b| b.distance_sd.abs().total_cmp(&a.distance_sd.abs()));

    Ok(Comparison {
        file: report.path.display().to_string(),
        model: target.path.display().to_string(),
        category: target.category_name().to_owned(),
        classes: model.classes().to_vec(),
        duration_s: report.duration_s,
        closeness,
        timeline,
        lowering,
        raising,
        outside,
    })
}

/// (words `phrase` uses for a family's slug, the family's own name) for every family of the
/// palette the rows were analysed with: `phrase` spells `share_toms_hand_percussion` as "toms hand
/// percussion", the palette says "toms & hand percussion".
fn family_words(rows: &[crate::timeline::WindowRow]) -> Vec<(String, String)> {
    rows.first()
        .and_then(|w| w.shares.as_ref())
        .map(|s| {
            s.names
                .columns
                .iter()
                .zip(&s.names.families)
                .filter_map(|(column, family)| {
                    let words = column.strip_prefix("share_")?.replace('_', " ");
                    (words != *family).then(|| (words, family.clone()))
                })
                .collect()
        })
        .unwrap_or_default()
}

/// `phrase`, with family names as the palette spells them; "as in the category" reads the value
/// without its statistic ("top end as in the category", "top end varies as in the category").
fn in_words(feature: &str, relation: Relation, family_words: &[(String, String)]) -> String {
    let text = match (relation, feature.rsplit_once('_')) {
        (Relation::Level, Some((value, "mean"))) => phrase(value, Relation::Level),
        (Relation::Level, Some((value, "sd"))) => {
            let level = phrase(value, Relation::Level);
            match level.strip_suffix(" as in the category") {
                Some(what) => format!("{what} varies as in the category"),
                None => level,
            }
        }
        _ => phrase(feature, relation),
    };
    let Some(slug) = feature
        .strip_prefix("share_")
        .and_then(|f| f.rsplit_once('_'))
        .map(|(f, _)| f.replace('_', " "))
    else {
        return text;
    };
    match family_words.iter().find(|(words, _)| *words == slug) {
        Some((words, family)) => text.replace(words.as_str(), family),
        None => text,
    }
}

/// Whether a feature is compared with the category's range: the window means of family shares,
/// the unexplained share, the scalar descriptors and the contrast bands.
fn compared_feature(name: &str) -> bool {
    let Some(value) = name.strip_suffix("_mean") else {
        return false;
    };
    value.starts_with("share_")
        || value.starts_with("contrast_db_")
        || matches!(
            value,
            "unexplained"
                | "level_rms_dbfs"
                | "centroid_hz"
                | "bandwidth_hz"
                | "rolloff_hz"
                | "flatness"
                | "flux_db"
                | "zero_crossings_per_sample"
        )
}

/// A feature value in its unit, for people.
fn with_unit(feature: &str, v: f64) -> String {
    let value = feature.strip_suffix("_mean").unwrap_or(feature);
    if value.starts_with("share_") || value == "unexplained" {
        format!("{:.0} %", 100.0 * v)
    } else if value.ends_with("_hz") {
        format!("{v:.0} Hz")
    } else if value.ends_with("_dbfs") {
        format!("{v:.1} dBFS")
    } else if value.contains("_db") {
        format!("{v:.1} dB")
    } else {
        format!("{v:.3}")
    }
}

/// A bar of `width` characters for a value 0–1.
fn bar(v: f64, width: usize) -> String {
    let filled = (v.clamp(0.0, 1.0) * width as f64).round() as usize;
    "█".repeat(filled) + &"░".repeat(width - filled)
}

/// The comparison as text for a terminal.
pub fn render(c: &Comparison) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{} against the category \"{}\" ({}), {}",
        c.file,
        c.category,
        c.model,
        plot::clock(c.duration_s)
    );
    let _ = writeln!(
        s,
        "closeness {:.0} % on average; above 50 % for {:.0} % of the time ({} windows of 3 s)",
        100.0 * c.closeness.mean,
        100.0 * c.closeness.above_half,
        c.closeness.windows
    );
    let _ = writeln!(s, "\nCloseness over time");
    for step in &c.timeline {
        let span = format!("{}–{}", plot::clock(step.start_s), plot::clock(step.end_s));
        match step.closeness {
            Some(v) => {
                let _ = writeln!(s, "  {span:>13}  {}  {:>3.0} %", bar(v, 20), 100.0 * v);
            }
            None => {
                let _ = writeln!(s, "  {span:>13}  {:20}     –", "");
            }
        }
    }
    let mut reasons = |title: &str, verb: &str, list: &[ReasonTally]| {
        let _ = writeln!(s, "\n{title}");
        if list.is_empty() {
            let _ = writeln!(s, "  (none)");
        }
        for (i, r) in list.iter().enumerate() {
            let _ = writeln!(
                s,
                "  {}. {} — {verb} the closeness in {:.0} % of the windows (by {:.2} log-odds on average)",
                i + 1,
                r.phrase,
                100.0 * r.windows_fraction,
                r.mean_push_log_odds.abs()
            );
        }
    };
    reasons(
        "What takes it away from the category",
        "lowers",
        &c.lowering,
    );
    reasons("What brings it closer", "raises", &c.raising);
    let _ = writeln!(
        s,
        "\nOutside the category's typical range (more than one training standard deviation from the category's mean)"
    );
    if c.outside.is_empty() {
        let _ = writeln!(
            s,
            "  nothing: every family share and descriptor sits within it"
        );
    }
    for o in &c.outside {
        let _ = writeln!(
            s,
            "  - {}: {} here, typically {} (± {})",
            o.phrase,
            with_unit(&o.feature, o.file_mean),
            with_unit(&o.feature, o.category_mean),
            with_unit(&o.feature, o.training_sd)
        );
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bars_and_units_read_plainly() {
        assert_eq!(bar(0.5, 4), "██░░");
        assert_eq!(bar(1.2, 3), "███");
        assert_eq!(with_unit("share_bass_mean", 0.314), "31 %");
        assert_eq!(with_unit("centroid_hz_mean", 1234.4), "1234 Hz");
        assert_eq!(with_unit("level_rms_dbfs_mean", -18.04), "-18.0 dBFS");
        assert_eq!(with_unit("contrast_db_3_mean", 21.25), "21.2 dB");
        assert!(compared_feature("share_kick_mean") && compared_feature("flatness_mean"));
        assert!(!compared_feature("mfcc_3_mean") && !compared_feature("share_kick_sd"));
        let words = [(
            "toms hand percussion".to_owned(),
            "toms & hand percussion".to_owned(),
        )];
        assert_eq!(
            in_words("share_toms_hand_percussion_mean", Relation::Above, &words),
            "more toms & hand percussion than the category"
        );
        assert_eq!(
            in_words("rolloff_hz_mean", Relation::Level, &words),
            "top end as in the category"
        );
        assert_eq!(
            in_words("centroid_hz_sd", Relation::Level, &words),
            "brightness varies as in the category"
        );
    }
}
