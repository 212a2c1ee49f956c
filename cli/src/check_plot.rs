//! The plot of `weft palette check --plot` (plotters 0.3, SVG or PNG by extension): where a
//! palette is weak, at a glance.
//!
//! Top left, per family, the presence F1; top right, per family, the mean absolute error of the
//! share over the windows where the family truly sounds (percentage points); both as pairs of
//! bars, the two stages beside NMF alone. Below, the energy misattributed per family level by
//! how many families truly sound in the window, the two stages beside NMF alone. The caption
//! holds the overall figures. Colours: Paul Tol's muted indigo for the two stages and his pale
//! grey for the baseline (see [`crate::plot`]).

use crate::plot::{BASELINE_COLOUR, PRODUCT_COLOUR, PlotFormat};
use crate::report::AtomicFile;
use anyhow::{Context, Result, anyhow};
use plotters::coord::Shift;
use plotters::prelude::*;
use std::path::Path;
use weft_engine::shares::check::{CheckReport, MAX_DENSITY};

/// Pixel width of the plot.
const WIDTH_PX: u32 = 1200;
/// Pixel height of one family's row in the per-family charts.
const ROW_PX: u32 = 30;
/// Pixel height of the chart by number of families.
const DENSITY_PX: u32 = 320;
/// Pixel height of the caption and the legend above the charts.
const HEAD_PX: u32 = 70;

/// Writes the plot of `report` to `dest` (atomically), titled `title`.
pub fn write_check_plot(dest: &Path, report: &CheckReport, title: &str) -> Result<()> {
    let format = PlotFormat::from_path(dest)
        .ok_or_else(|| anyhow!("{}: a plot must end in .svg or .png", dest.display()))?;
    let families = report.family.groups.len() as u32;
    let height = HEAD_PX + families * ROW_PX + 90 + DENSITY_PX;
    let file = AtomicFile::create(dest)?;
    let temp = file.temp_path().to_owned();
    match format {
        PlotFormat::Svg => {
            let root = SVGBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw(&root, report, title)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
        PlotFormat::Png => {
            let root = BitMapBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw(&root, report, title)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
    }
    file.commit()
        .with_context(|| format!("cannot finish {}", dest.display()))
}

fn draw<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    r: &CheckReport,
    title: &str,
) -> Result<()> {
    let err = |e: DrawingAreaErrorKind<DB::ErrorType>| anyhow!("{e}");
    root.fill(&WHITE).map_err(err)?;
    let (head, rest) = root.split_vertically(HEAD_PX);
    let caption = format!(
        "{title}: {} mixes, {} windows — energy misattributed {:.1} % per family, {:.1} % per \
         section, presence F1 {:.2}",
        r.mixes, r.windows, r.family.tv_pct, r.section.tv_pct, r.family.f1
    );
    head.draw(&Text::new(caption, (14, 10), ("sans-serif", 19)))
        .map_err(err)?;
    let baseline = format!(
        "NMF alone: {:.1} %, {:.1} %, F1 {:.2}; uniform: {:.1} %, {:.1} %",
        r.family.nmf_tv_pct,
        r.section.nmf_tv_pct,
        r.family.nmf_f1,
        r.family.uniform_tv_pct,
        r.section.uniform_tv_pct
    );
    head.draw(&Text::new(baseline, (14, 38), ("sans-serif", 15)))
        .map_err(err)?;
    // Legend, top right.
    for (k, (label, colour)) in [
        ("two stages", PRODUCT_COLOUR),
        ("NMF alone", BASELINE_COLOUR),
    ]
    .into_iter()
    .enumerate()
    {
        let x = WIDTH_PX as i32 - 300 + 150 * k as i32;
        head.draw(&Rectangle::new([(x, 40), (x + 18, 54)], colour.filled()))
            .map_err(err)?;
        head.draw(&Text::new(label, (x + 24, 40), ("sans-serif", 15)))
            .map_err(err)?;
    }
    let families = r.family.groups.len() as u32;
    let (top, bottom) = rest.split_vertically(families * ROW_PX + 90);
    let (left, right) = top.split_horizontally(WIDTH_PX / 2);
    let names: Vec<&str> = r.family.groups.iter().map(|g| g.name.as_str()).collect();
    let f1: Vec<(f64, f64)> = r.family.groups.iter().map(|g| (g.f1, g.nmf_f1)).collect();
    family_bars(&left, "presence F1 per family", &names, &f1, 1.0).map_err(err)?;
    let mae: Vec<(f64, f64)> = r
        .family
        .groups
        .iter()
        .map(|g| (g.mae_pp, g.nmf_mae_pp))
        .collect();
    let top_mae = mae
        .iter()
        .map(|&(a, b)| a.max(b))
        .fold(10.0_f64, f64::max)
        .min(100.0);
    family_bars(
        &right,
        "share error where the family sounds (pp)",
        &names,
        &mae,
        (top_mae * 1.1).min(100.0),
    )
    .map_err(err)?;
    density_bars(&bottom, r).map_err(err)?;
    Ok(())
}

/// Pairs of horizontal bars, one row per name (first at the top), on an x axis of `0..x_max`.
fn family_bars<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    caption: &str,
    names: &[&str],
    values: &[(f64, f64)],
    x_max: f64,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    let n = names.len();
    // Row i sits at y = n − 1 − i, so the palette's order reads from the top.
    let y_of = |i: usize| (n - 1 - i) as f64;
    let mut chart = ChartBuilder::on(area)
        .caption(caption, ("sans-serif", 17))
        .margin(10)
        .x_label_area_size(30)
        .y_label_area_size(170)
        .build_cartesian_2d(0.0..x_max, -0.5..(n as f64 - 0.5))?;
    chart
        .configure_mesh()
        .y_labels(n)
        .y_label_formatter(&|y| {
            let k = y.round();
            if (y - k).abs() < 1e-6 && k >= 0.0 && (k as usize) < n {
                names[n - 1 - k as usize].to_owned()
            } else {
                String::new()
            }
        })
        .disable_y_mesh()
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.12))
        .label_style(("sans-serif", 14))
        .draw()?;
    chart.draw_series(values.iter().enumerate().flat_map(|(i, &(ours, base))| {
        let y = y_of(i);
        [
            Rectangle::new(
                [(0.0, y), (ours.clamp(0.0, x_max), y + 0.38)],
                PRODUCT_COLOUR.filled(),
            ),
            Rectangle::new(
                [(0.0, y - 0.38), (base.clamp(0.0, x_max), y)],
                BASELINE_COLOUR.filled(),
            ),
        ]
    }))?;
    Ok(())
}

/// Energy misattributed by how many families truly sound, as pairs of vertical bars.
fn density_bars<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    r: &CheckReport,
) -> Result<(), DrawingAreaErrorKind<DB::ErrorType>> {
    let label = |d: usize| {
        if d == MAX_DENSITY {
            format!("{d} or more")
        } else {
            d.to_string()
        }
    };
    let mut chart = ChartBuilder::on(area)
        .caption(
            "energy misattributed per family level, by how many families sound (%)",
            ("sans-serif", 17),
        )
        .margin(10)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(0.5..(MAX_DENSITY as f64 + 0.5), 0.0..100.0)?;
    chart
        .configure_mesh()
        .x_labels(MAX_DENSITY)
        .x_label_formatter(&|x| {
            let k = x.round();
            let windows = r
                .by_density
                .iter()
                .find(|d| d.families_present as f64 == k)
                .map_or(0, |d| d.windows);
            if (x - k).abs() < 1e-6 && k >= 1.0 {
                format!("{} ({windows} windows)", label(k as usize))
            } else {
                String::new()
            }
        })
        .x_desc("families truly sounding in the window")
        .disable_x_mesh()
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.12))
        .label_style(("sans-serif", 14))
        .draw()?;
    chart.draw_series(r.by_density.iter().flat_map(|d| {
        let x = d.families_present as f64;
        [
            Rectangle::new(
                [(x - 0.3, 0.0), (x, d.tv_pct.clamp(0.0, 100.0))],
                PRODUCT_COLOUR.filled(),
            ),
            Rectangle::new(
                [(x, 0.0), (x + 0.3, d.nmf_tv_pct.clamp(0.0, 100.0))],
                BASELINE_COLOUR.filled(),
            ),
        ]
    }))?;
    Ok(())
}
