//! Plots of timelines (plotters 0.3): SVG or PNG, one panel per file.
//!
//! A panel shows time on the x axis in minutes:seconds. With family shares (the default) its top
//! chart is the share timeline: each window's mean shares as stacked areas on a 0–100 % axis, per
//! section (default) or per family, in the palette's order from the bottom up with the
//! unexplained share on top, and — with a style model — the closeness to the category as a black
//! line over it (with a dashed 50 % guide); a legend with the names sits to its right. Below it
//! (or alone, without shares) is the level chart: each window's RMS (energy mean) and sample
//! peak in dBFS, drawn as steps over the window they summarise.
//!
//! Colours: Paul Tol's "muted" qualitative scheme (Paul Tol, "Colour Schemes", SRON technical
//! note SRON/EPS/TN/09-002, 2021; hex values from memory), designed to stay distinguishable
//! under the common colour-vision deficiencies, one colour per section in the palette's order,
//! and its pale grey for the unexplained share. Per family, the families of a section share the
//! section's hue in alternating lighter and darker shades, so sections stay recognisable.

use crate::analyze::FileReport;
use crate::report::AtomicFile;
use crate::timeline::{ShareNames, WindowRow};
use anyhow::{Context, Result, anyhow, bail};
use plotters::coord::Shift;
use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint};
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;
use std::path::Path;

/// Pixel width of a plot.
const WIDTH_PX: u32 = 1200;
/// Pixel height of one file's panel without shares (the level chart alone).
pub const PANEL_HEIGHT_PX: u32 = 360;
/// Pixel height of one file's panel with shares (share chart above, level chart below).
pub const SHARES_PANEL_HEIGHT_PX: u32 = 560;
/// Pixel height of the level chart under a share chart.
const LEVEL_STRIP_PX: u32 = 190;
/// Pixel width of the legend to the right of a share chart.
const LEGEND_WIDTH_PX: u32 = 230;
/// The most panels one overview holds; later files are listed as left out.
pub const MAX_OVERVIEW_PANELS: usize = 48;
/// The lowest level a panel's axis reaches, dBFS.
const AXIS_FLOOR_DBFS: f64 = -120.0;

/// RMS line colour (a dark blue).
const RMS_COLOUR: RGBColor = RGBColor(31, 78, 140);
/// Peak line colour (an orange that stays readable on white and in grey print).
const PEAK_COLOUR: RGBColor = RGBColor(222, 110, 20);

/// Paul Tol's muted qualitative scheme, in his order (rose, indigo, sand, green, cyan, wine,
/// teal, olive, purple); see the module documentation for the source.
const TOL_MUTED: [RGBColor; 9] = [
    RGBColor(0xCC, 0x66, 0x77),
    RGBColor(0x33, 0x22, 0x88),
    RGBColor(0xDD, 0xCC, 0x77),
    RGBColor(0x11, 0x77, 0x33),
    RGBColor(0x88, 0xCC, 0xEE),
    RGBColor(0x88, 0x22, 0x55),
    RGBColor(0x44, 0xAA, 0x99),
    RGBColor(0x99, 0x99, 0x33),
    RGBColor(0xAA, 0x44, 0x99),
];
/// The scheme's pale grey (Tol's colour for "bad data"): the unexplained share.
const UNEXPLAINED_COLOUR: RGBColor = RGBColor(0xDD, 0xDD, 0xDD);
/// Bars of Weft's own figures in check plots (Tol's muted indigo).
pub const PRODUCT_COLOUR: RGBColor = TOL_MUTED[1];
/// Bars of a baseline in check plots (a grey darker than the unexplained share's).
pub const BASELINE_COLOUR: RGBColor = RGBColor(0xBB, 0xBB, 0xBB);
/// The closeness line.
const CLOSENESS_COLOUR: RGBColor = RGBColor(0, 0, 0);

/// How the share timeline is stacked.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, clap::ValueEnum)]
pub enum PlotBy {
    /// One area per section (drums, bass, keys, …).
    #[default]
    Section,
    /// One area per family.
    Family,
}

/// The stacked layers of a share chart: names and colours, bottom first, and which layer each
/// family adds to.
#[derive(Debug, Clone, PartialEq)]
pub struct ShareLayout {
    /// Layer names, bottom first (the unexplained share is drawn on top of them).
    pub names: Vec<String>,
    /// Layer colours.
    pub colours: Vec<RGBColor>,
    /// Layer of each family.
    pub layer_of: Vec<usize>,
}

impl ShareLayout {
    /// The layers for `names`' palette.
    pub fn new(names: &ShareNames, by: PlotBy) -> Self {
        let section_colour = |s: usize| {
            let base = TOL_MUTED[s % TOL_MUTED.len()];
            // More sections than colours: later rounds lighter.
            shade(base, 0.35 * (s / TOL_MUTED.len()) as f64)
        };
        match by {
            PlotBy::Section => Self {
                names: names.sections.clone(),
                colours: (0..names.sections.len()).map(section_colour).collect(),
                layer_of: names.section_of.clone(),
            },
            PlotBy::Family => {
                let mut seen = vec![0usize; names.sections.len()];
                let colours = names
                    .section_of
                    .iter()
                    .map(|&s| {
                        let k = seen.get(s).copied().unwrap_or(0);
                        if let Some(c) = seen.get_mut(s) {
                            *c += 1;
                        }
                        // Base, lighter, darker, lighter still, darker still, …
                        let step = (k.div_ceil(2)) as f64 * 0.3;
                        let amount = if k % 2 == 1 { step } else { -step };
                        shade(section_colour(s), amount.clamp(-0.6, 0.7))
                    })
                    .collect();
                Self {
                    names: names.families.clone(),
                    colours,
                    layer_of: (0..names.len()).collect(),
                }
            }
        }
    }
}

/// Mixes `c` towards white (`amount` > 0) or black (`amount` < 0) by `|amount|` (0–1).
fn shade(c: RGBColor, amount: f64) -> RGBColor {
    let mix = |v: u8| {
        let v = f64::from(v);
        let out = if amount >= 0.0 {
            v + (255.0 - v) * amount
        } else {
            v * (1.0 + amount)
        };
        out.round().clamp(0.0, 255.0) as u8
    };
    RGBColor(mix(c.0), mix(c.1), mix(c.2))
}

/// The image formats a plot can be written in, chosen by the file's extension.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum PlotFormat {
    /// Scalable vector graphics.
    Svg,
    /// Portable network graphics.
    Png,
}

impl PlotFormat {
    /// The format named by `path`'s extension, if it is one.
    pub fn from_path(path: &Path) -> Option<Self> {
        match path.extension()?.to_str()?.to_ascii_lowercase().as_str() {
            "svg" => Some(Self::Svg),
            "png" => Some(Self::Png),
            _ => None,
        }
    }

    /// The file name extension.
    pub fn extension(self) -> &'static str {
        match self {
            Self::Svg => "svg",
            Self::Png => "png",
        }
    }
}

/// The closeness line of a panel.
pub struct ClosenessLine<'a> {
    /// The category's name.
    pub category: &'a str,
    /// (centre of each style window, seconds; closeness 0–1), in time order.
    pub points: Vec<(f64, f64)>,
}

/// One file's timeline to draw.
pub struct PlotPanel<'a> {
    /// The title (the file's name).
    pub title: String,
    /// The file's length, seconds.
    pub duration_s: f64,
    /// The windows.
    pub windows: &'a [WindowRow],
    /// The closeness over time, with a style model.
    pub closeness: Option<ClosenessLine<'a>>,
}

impl<'a> PlotPanel<'a> {
    /// The panel of one file's report, titled `title`; `category` names the style model's
    /// category when the report has closeness.
    pub fn of(title: String, report: &'a FileReport, category: Option<&'a str>) -> Self {
        let closeness = category
            .filter(|_| !report.style_estimates.is_empty())
            .map(|category| ClosenessLine {
                category,
                points: report
                    .style_estimates
                    .iter()
                    .map(|e| (e.centre_s(), e.closeness))
                    .collect(),
            });
        Self {
            title,
            duration_s: report.duration_s,
            windows: &report.windows,
            closeness,
        }
    }

    fn share_names(&self) -> Option<&ShareNames> {
        self.windows
            .first()
            .and_then(|w| w.shares.as_ref())
            .map(|s| s.names.as_ref())
    }
}

/// Draws one panel per entry (at most [`MAX_OVERVIEW_PANELS`]) into `dest`, written atomically,
/// stacking shares as `by` says.
pub fn write_plot(dest: &Path, panels: &[PlotPanel<'_>], by: PlotBy) -> Result<()> {
    let format = PlotFormat::from_path(dest)
        .ok_or_else(|| anyhow!("{}: a plot must end in .svg or .png", dest.display()))?;
    if panels.is_empty() {
        bail!("nothing to plot");
    }
    let panels = &panels[..panels.len().min(MAX_OVERVIEW_PANELS)];
    let heights: Vec<u32> = panels
        .iter()
        .map(|p| {
            if p.share_names().is_some() {
                SHARES_PANEL_HEIGHT_PX
            } else {
                PANEL_HEIGHT_PX
            }
        })
        .collect();
    let height = heights.iter().sum::<u32>();
    let file = AtomicFile::create(dest)?;
    let temp = file.temp_path().to_owned();
    match format {
        PlotFormat::Svg => {
            let root = SVGBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw_panels(&root, panels, &heights, by)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
        PlotFormat::Png => {
            let root = BitMapBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw_panels(&root, panels, &heights, by)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
    }
    file.commit()
        .with_context(|| format!("cannot finish {}", dest.display()))
}

fn draw_panels<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    panels: &[PlotPanel<'_>],
    heights: &[u32],
    by: PlotBy,
) -> Result<()> {
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let mut rest = root.clone();
    for (panel, &h) in panels.iter().zip(heights) {
        let (area, below) = rest.split_vertically(h);
        match panel.share_names() {
            Some(names) => {
                let layout = ShareLayout::new(names, by);
                let (shares_area, level_area) = area.split_vertically(h - LEVEL_STRIP_PX);
                draw_share_chart(&shares_area, panel, &layout)?;
                // The level chart lines up with the share chart, its legend in the same column.
                let (level_area, legend_area) =
                    level_area.split_horizontally(WIDTH_PX.saturating_sub(LEGEND_WIDTH_PX));
                draw_level_chart(&level_area, panel, None)?;
                draw_legend(
                    &legend_area,
                    12,
                    &[
                        (
                            "RMS per window (dBFS)".to_owned(),
                            LegendMark::Line(RMS_COLOUR),
                        ),
                        (
                            "peak per window (dBFS)".to_owned(),
                            LegendMark::Line(PEAK_COLOUR),
                        ),
                    ],
                )?;
            }
            None => {
                let caption = format!("{} — level ({})", panel.title, clock(panel.duration_s));
                draw_level_chart(&area, panel, Some(caption))?;
            }
        }
        rest = below;
    }
    Ok(())
}

/// The share timeline with the closeness over it, and its legend on the right.
fn draw_share_chart<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    panel: &PlotPanel<'_>,
    layout: &ShareLayout,
) -> Result<()> {
    let duration_s = panel.duration_s.max(1e-3);
    let (width, _) = area.dim_in_pixel();
    let (chart_area, legend_area) = area.split_horizontally(width.saturating_sub(LEGEND_WIDTH_PX));
    let caption = match &panel.closeness {
        Some(c) => format!(
            "{} — instrument mix and closeness to {} ({})",
            panel.title,
            c.category,
            clock(duration_s)
        ),
        None => format!("{} — instrument mix ({})", panel.title, clock(duration_s)),
    };
    let mut chart = ChartBuilder::on(&chart_area)
        .caption(caption, ("sans-serif", 20))
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(ClockAxis::new(duration_s), 0.0..100.0)
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .configure_mesh()
        .x_desc("time (m:ss)")
        .y_desc("share of energy (%)")
        .x_label_formatter(&|t| clock(*t))
        .y_label_formatter(&|v| format!("{v:.0}"))
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.12))
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    // Cumulative tops per window: layers bottom first, then the unexplained share.
    let n_layers = layout.names.len();
    let tops: Vec<Vec<f64>> = panel
        .windows
        .iter()
        .map(|w| {
            let mut layer = vec![0.0; n_layers + 1];
            if let Some(s) = &w.shares {
                for (f, &l) in layout.layer_of.iter().enumerate() {
                    if let Some(v) = layer.get_mut(l) {
                        *v += f64::from(s.get(f));
                    }
                }
            }
            layer[n_layers] = f64::from(w.unexplained.unwrap_or(0.0));
            let mut sum = 0.0;
            layer
                .iter()
                .map(|v| {
                    sum += v * 100.0;
                    sum.min(100.0)
                })
                .collect()
        })
        .collect();
    let colour_of = |l: usize| {
        if l == n_layers {
            UNEXPLAINED_COLOUR
        } else {
            layout.colours[l]
        }
    };
    for l in 0..=n_layers {
        // Steps over each window: the upper edge forwards, the lower edge backwards.
        let mut outline: Vec<(f64, f64)> = Vec::with_capacity(4 * panel.windows.len());
        for (w, top) in panel.windows.iter().zip(&tops) {
            outline.push((w.start_s, top[l]));
            outline.push((w.end_s, top[l]));
        }
        for (w, top) in panel.windows.iter().zip(&tops).rev() {
            let bottom = if l == 0 { 0.0 } else { top[l - 1] };
            outline.push((w.end_s, bottom));
            outline.push((w.start_s, bottom));
        }
        chart
            .draw_series(std::iter::once(Polygon::new(
                outline,
                colour_of(l).filled(),
            )))
            .map_err(|e| anyhow!("{e}"))?;
    }
    if let Some(c) = &panel.closeness {
        chart
            .draw_series(DashedLineSeries::new(
                [(0.0, 50.0), (duration_s, 50.0)],
                6,
                4,
                BLACK.mix(0.45).stroke_width(1),
            ))
            .map_err(|e| anyhow!("{e}"))?;
        let points: Vec<(f64, f64)> = c.points.iter().map(|&(t, v)| (t, 100.0 * v)).collect();
        // White under black, so the line reads over any colour.
        chart
            .draw_series(LineSeries::new(points.clone(), WHITE.stroke_width(5)))
            .map_err(|e| anyhow!("{e}"))?;
        chart
            .draw_series(LineSeries::new(points, CLOSENESS_COLOUR.stroke_width(2)))
            .map_err(|e| anyhow!("{e}"))?;
    }
    // The legend: top of the stack first, as the eye meets it.
    let mut entries: Vec<(String, LegendMark)> = Vec::new();
    if let Some(c) = &panel.closeness {
        entries.push((
            format!("closeness to {} (%)", c.category),
            LegendMark::Line(CLOSENESS_COLOUR),
        ));
    }
    entries.push((
        "unexplained".to_owned(),
        LegendMark::Area(UNEXPLAINED_COLOUR),
    ));
    for l in (0..n_layers).rev() {
        entries.push((layout.names[l].clone(), LegendMark::Area(layout.colours[l])));
    }
    draw_legend(&legend_area, 44, &entries)
}

/// How a legend entry is marked.
#[derive(Clone, Copy)]
enum LegendMark {
    /// A filled square (an area).
    Area(RGBColor),
    /// A short line.
    Line(RGBColor),
}

/// A legend column: one entry per line from `top_px` down.
fn draw_legend<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    top_px: i32,
    entries: &[(String, LegendMark)],
) -> Result<()> {
    let font = ("sans-serif", 14).into_font();
    let line_px = 19;
    for (i, (name, mark)) in entries.iter().enumerate() {
        let y = top_px + i as i32 * line_px;
        match mark {
            LegendMark::Area(c) => area
                .draw(&Rectangle::new([(8, y), (26, y + 13)], c.filled()))
                .map_err(|e| anyhow!("{e}"))?,
            LegendMark::Line(c) => area
                .draw(&PathElement::new(
                    vec![(6, y + 7), (28, y + 7)],
                    c.stroke_width(3),
                ))
                .map_err(|e| anyhow!("{e}"))?,
        }
        area.draw(&Text::new(name.clone(), (34, y), font.clone()))
            .map_err(|e| anyhow!("{e}"))?;
    }
    Ok(())
}

/// The level chart: `caption` on top when the panel is the level chart alone.
fn draw_level_chart<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    panel: &PlotPanel<'_>,
    caption: Option<String>,
) -> Result<()> {
    let duration_s = panel.duration_s.max(1e-3);
    let (lo_db, hi_db) = level_axis(panel.windows);
    let mut builder = ChartBuilder::on(area);
    let alone = caption.is_some();
    if let Some(caption) = caption {
        builder.caption(caption, ("sans-serif", 20));
    }
    let mut chart = builder
        .margin(12)
        .x_label_area_size(40)
        .y_label_area_size(60)
        .build_cartesian_2d(ClockAxis::new(duration_s), lo_db..hi_db)
        .map_err(|e| anyhow!("{e}"))?;
    chart
        .configure_mesh()
        .x_desc("time (m:ss)")
        .y_desc("level (dBFS)")
        .x_label_formatter(&|t| clock(*t))
        .y_label_formatter(&|db| format!("{db:.0}"))
        .light_line_style(WHITE.mix(0.0))
        .bold_line_style(BLACK.mix(0.12))
        .label_style(("sans-serif", 14))
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    draw_level_layer(&mut chart, panel.windows, lo_db)?;
    if !alone {
        // Under a share chart the legend sits in the legend column instead.
        return Ok(());
    }
    chart
        .configure_series_labels()
        .position(SeriesLabelPosition::LowerRight)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK.mix(0.4))
        .label_font(("sans-serif", 14))
        .draw()
        .map_err(|e| anyhow!("{e}"))?;
    Ok(())
}

/// The level layer: RMS and peak per window, as steps, with their legend entries.
fn draw_level_layer<DB: DrawingBackend>(
    chart: &mut ChartContext<'_, DB, Cartesian2d<ClockAxis, RangedCoordf64>>,
    windows: &[WindowRow],
    floor_db: f64,
) -> Result<()> {
    let steps = |value: fn(&WindowRow) -> f32| -> Vec<(f64, f64)> {
        windows
            .iter()
            .flat_map(|w| {
                let v = f64::from(value(w)).max(floor_db);
                [(w.start_s, v), (w.end_s, v)]
            })
            .collect()
    };
    chart
        .draw_series(LineSeries::new(
            steps(|w| w.level.peak_dbfs),
            PEAK_COLOUR.stroke_width(1),
        ))
        .map_err(|e| anyhow!("{e}"))?
        .label("peak per window (dBFS)")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], PEAK_COLOUR.stroke_width(2)));
    chart
        .draw_series(LineSeries::new(
            steps(|w| w.level.rms_dbfs),
            RMS_COLOUR.stroke_width(2),
        ))
        .map_err(|e| anyhow!("{e}"))?
        .label("RMS per window (dBFS)")
        .legend(|(x, y)| PathElement::new(vec![(x, y), (x + 20, y)], RMS_COLOUR.stroke_width(3)));
    Ok(())
}

/// The level axis: from 6 dB under the quietest non-silent window (in steps of 10 dB, not below
/// [`AXIS_FLOOR_DBFS`]) to 3 dB over the highest peak or 0 dBFS, whichever is higher.
fn level_axis(windows: &[WindowRow]) -> (f64, f64) {
    let audible = windows
        .iter()
        .map(|w| f64::from(w.level.rms_dbfs))
        .filter(|&db| db > f64::from(weft_engine::SILENCE_FLOOR_DB));
    let quietest = audible.fold(f64::INFINITY, f64::min);
    let lo = if quietest.is_finite() {
        (((quietest - 6.0) / 10.0).floor() * 10.0).max(AXIS_FLOOR_DBFS)
    } else {
        AXIS_FLOOR_DBFS
    };
    let loudest = windows
        .iter()
        .map(|w| f64::from(w.level.peak_dbfs))
        .fold(0.0_f64, f64::max);
    (lo, loudest.ceil() + 3.0)
}

/// A time axis in seconds whose ticks fall on clock-friendly steps (see [`tick_step_s`]).
struct ClockAxis {
    end_s: f64,
    step_s: f64,
}

impl ClockAxis {
    fn new(end_s: f64) -> Self {
        Self {
            end_s,
            step_s: tick_step_s(end_s),
        }
    }
}

impl Ranged for ClockAxis {
    type FormatOption = DefaultFormatting;
    type ValueType = f64;

    fn map(&self, value: &f64, limit: (i32, i32)) -> i32 {
        let fraction = value / self.end_s;
        limit.0 + (f64::from(limit.1 - limit.0) * fraction).round() as i32
    }

    fn key_points<Hint: KeyPointHint>(&self, _hint: Hint) -> Vec<f64> {
        (0..)
            .map(|i| f64::from(i) * self.step_s)
            .take_while(|&t| t <= self.end_s + 1e-9)
            .collect()
    }

    fn range(&self) -> std::ops::Range<f64> {
        0.0..self.end_s
    }
}

/// The smallest clock-friendly tick spacing (seconds) that gives at most 12 intervals (so 5–13
/// ticks, since neighbouring spacings differ by at most 2.5×).
fn tick_step_s(duration_s: f64) -> f64 {
    const STEPS_S: [f64; 16] = [
        0.1, 0.2, 0.5, 1.0, 2.0, 5.0, 10.0, 15.0, 30.0, 60.0, 120.0, 300.0, 600.0, 900.0, 1800.0,
        3600.0,
    ];
    STEPS_S
        .into_iter()
        .find(|&step| duration_s / step <= 12.0)
        .unwrap_or(7200.0)
}

/// Formats seconds as `m:ss` (or `h:mm:ss` from one hour, `m:ss.s` under ten seconds).
pub fn clock(t_s: f64) -> String {
    let t = t_s.max(0.0);
    if t < 10.0 && t.fract().abs() > 1e-9 {
        return format!("0:{t:04.1}");
    }
    let total = t.round() as u64;
    let (h, m, s) = (total / 3600, (total / 60) % 60, total % 60);
    if h > 0 {
        format!("{h}:{m:02}:{s:02}")
    } else {
        format!("{m}:{s:02}")
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clock_reads_minutes_and_seconds() {
        assert_eq!(clock(0.0), "0:00");
        assert_eq!(clock(75.0), "1:15");
        assert_eq!(clock(2.5), "0:02.5");
        assert_eq!(clock(3.0 * 3600.0 + 61.0), "3:01:01");
    }

    #[test]
    fn ticks_number_five_to_thirteen() {
        for duration_s in [0.5, 3.0, 59.0, 180.0, 1234.0, 3.0 * 3600.0] {
            let n = (duration_s / tick_step_s(duration_s)).floor() + 1.0;
            assert!((5.0..=13.0).contains(&n), "{duration_s}: {n} ticks");
        }
    }
}
