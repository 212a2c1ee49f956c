//! Plots of timelines (plotters 0.3): SVG or PNG, one panel per file.
//!
//! A panel shows time on the x axis in minutes:seconds and, today, the level layer: each window's
//! RMS (energy mean) and sample peak in dBFS, drawn as steps over the window they summarise, with a
//! legend. Other layers are drawn by their own function on the same chart, so the share timeline
//! (stacked areas per section or family on a 0–100 % axis) and the closeness line slot in next to
//! [`draw_level_layer`] without changing the panel layout.

use crate::report::AtomicFile;
use crate::timeline::WindowRow;
use anyhow::{Context, Result, anyhow, bail};
use plotters::coord::Shift;
use plotters::coord::ranged1d::{DefaultFormatting, KeyPointHint};
use plotters::coord::types::RangedCoordf64;
use plotters::prelude::*;
use std::path::Path;

/// Pixel width of a plot.
const WIDTH_PX: u32 = 1200;
/// Pixel height of one file's panel.
const PANEL_HEIGHT_PX: u32 = 360;
/// The most panels one overview holds; later files are listed as left out.
pub const MAX_OVERVIEW_PANELS: usize = 48;
/// The lowest level a panel's axis reaches, dBFS.
const AXIS_FLOOR_DBFS: f64 = -120.0;

/// RMS line colour (a dark blue).
const RMS_COLOUR: RGBColor = RGBColor(31, 78, 140);
/// Peak line colour (an orange that stays readable on white and in grey print).
const PEAK_COLOUR: RGBColor = RGBColor(222, 110, 20);

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

/// One file's timeline to draw.
pub struct PlotPanel<'a> {
    /// The title (the file's name).
    pub title: String,
    /// The file's length, seconds.
    pub duration_s: f64,
    /// The windows.
    pub windows: &'a [WindowRow],
}

/// Draws one panel per entry (at most [`MAX_OVERVIEW_PANELS`]) into `dest`, written atomically.
pub fn write_plot(dest: &Path, panels: &[PlotPanel<'_>]) -> Result<()> {
    let format = PlotFormat::from_path(dest)
        .ok_or_else(|| anyhow!("{}: a plot must end in .svg or .png", dest.display()))?;
    if panels.is_empty() {
        bail!("nothing to plot");
    }
    let panels = &panels[..panels.len().min(MAX_OVERVIEW_PANELS)];
    let height = PANEL_HEIGHT_PX * panels.len() as u32;
    let file = AtomicFile::create(dest)?;
    let temp = file.temp_path().to_owned();
    match format {
        PlotFormat::Svg => {
            let root = SVGBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw_panels(&root, panels)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
        PlotFormat::Png => {
            let root = BitMapBackend::new(&temp, (WIDTH_PX, height)).into_drawing_area();
            draw_panels(&root, panels)?;
            root.present().map_err(|e| anyhow!("{e}"))?;
        }
    }
    file.commit()
        .with_context(|| format!("cannot finish {}", dest.display()))
}

fn draw_panels<DB: DrawingBackend>(
    root: &DrawingArea<DB, Shift>,
    panels: &[PlotPanel<'_>],
) -> Result<()> {
    root.fill(&WHITE).map_err(|e| anyhow!("{e}"))?;
    let areas = root.split_evenly((panels.len(), 1));
    for (area, panel) in areas.iter().zip(panels) {
        draw_panel(area, panel)?;
    }
    Ok(())
}

fn draw_panel<DB: DrawingBackend>(
    area: &DrawingArea<DB, Shift>,
    panel: &PlotPanel<'_>,
) -> Result<()> {
    let duration_s = panel.duration_s.max(1e-3);
    let (lo_db, hi_db) = level_axis(panel.windows);
    let caption = format!("{} — level ({})", panel.title, clock(duration_s));
    let mut chart = ChartBuilder::on(area)
        .caption(caption, ("sans-serif", 20))
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
