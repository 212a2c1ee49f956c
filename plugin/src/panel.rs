//! The panel: reads the newest [`Snapshot`] each frame and draws it.
//!
//! It never blocks the analysis: the snapshot arrives through a triple buffer, and the only other
//! shared object is the parameter set. Display scaling (dB to pixels, counts to time) happens here.

use crate::snapshot::{LEVEL_HISTORY_CELL_S, LEVEL_HISTORY_LEN};
use crate::{Snapshot, WeftParams};
use egui::{Color32, CornerRadius, RichText, Sense, Stroke, Vec2, pos2, vec2};
use nice_plug::context::gui::GuiContext;
use nice_plug_egui::widgets::ParamSlider;
use nice_plug_egui::{EguiEditor, EguiEditorState, EguiNiceSettings, NiceEguiApp, RepaintNotifier};
use std::sync::Arc;
use std::time::Duration;

/// The meter's scale, dBFS.
const METER_RANGE_DB: (f32, f32) = (-72.0, 0.0);

/// Colours chosen for contrast on a dark background; meaning never rests on colour alone (every
/// reading has a label and a number).
mod colours {
    use egui::Color32;
    pub const BACKGROUND: Color32 = Color32::from_rgb(0x16, 0x1a, 0x21);
    pub const CARD: Color32 = Color32::from_rgb(0x20, 0x26, 0x30);
    pub const TEXT: Color32 = Color32::from_rgb(0xe8, 0xe6, 0xe1);
    pub const MUTED: Color32 = Color32::from_rgb(0x8d, 0x96, 0xa3);
    pub const LEVEL: Color32 = Color32::from_rgb(0x4f, 0xc3, 0xb5);
    pub const PEAK: Color32 = Color32::from_rgb(0xf2, 0xb1, 0x34);
    pub const WARN: Color32 = Color32::from_rgb(0xef, 0x6f, 0x5e);
    pub const TRACK: Color32 = Color32::from_rgb(0x2c, 0x34, 0x40);
}

/// The egui app behind the editor window.
pub struct Panel {
    params: Arc<WeftParams>,
    feed: triple_buffer::Output<Snapshot>,
    gui: Option<GuiContext>,
}

/// Builds the editor. The repaint notifier is not needed: the panel asks for a repaint every
/// frame while the analysis runs.
pub fn editor(
    state: Arc<EguiEditorState>,
    params: Arc<WeftParams>,
    feed: triple_buffer::Output<Snapshot>,
) -> Option<EguiEditor<Panel>> {
    let settings = EguiNiceSettings::new()
        .with_tile("Weft")
        .with_repaint_poll_interval(Duration::from_millis(16));
    nice_plug_egui::create_egui_editor(
        state,
        RepaintNotifier::new(),
        settings,
        Panel {
            params,
            feed,
            gui: None,
        },
    )
}

impl NiceEguiApp for Panel {
    fn build(
        &mut self,
        egui_ctx: egui::Context,
        nice_gui_ctx: GuiContext,
        _frame: &mut nice_plug_egui::Frame,
    ) -> Result<(), nice_plug_egui::baseview::HandlerError> {
        let mut visuals = egui::Visuals::dark();
        visuals.panel_fill = colours::BACKGROUND;
        visuals.override_text_color = Some(colours::TEXT);
        egui_ctx.set_visuals(visuals);
        self.gui = Some(nice_gui_ctx);
        Ok(())
    }

    fn ui(&mut self, ui: &mut egui::Ui, _frame: &mut nice_plug_egui::Frame) {
        let snap = *self.feed.read();
        ui.ctx().request_repaint_after(Duration::from_millis(33));
        egui::Frame::new()
            .fill(colours::BACKGROUND)
            .inner_margin(12.0)
            .show(ui, |ui| {
                ui.set_min_size(ui.available_size());
                header(ui, &snap);
                ui.add_space(8.0);
                card(ui, "Level", |ui| level_view(ui, &snap));
                ui.add_space(8.0);
                ui.columns(3, |cols| {
                    card(&mut cols[0], "Instrument mix", |ui| {
                        later(ui, "Family shares appear here once a palette is loaded.")
                    });
                    card(&mut cols[1], "Timbre", |ui| timbre_view(ui, &snap));
                    card(&mut cols[2], "Style", |ui| {
                        later(
                            ui,
                            "Closeness to a category appears here once a style model is loaded.",
                        )
                    });
                });
                ui.add_space(8.0);
                if let Some(gui) = &self.gui {
                    let setter = gui.param_setter();
                    ui.horizontal(|ui| {
                        ui.label(RichText::new("Response time").color(colours::MUTED));
                        ui.add(ParamSlider::for_param(&*self.params.response_ms, &setter));
                    });
                }
            });
    }
}

fn header(ui: &mut egui::Ui, snap: &Snapshot) {
    ui.horizontal(|ui| {
        ui.label(RichText::new("Weft").size(22.0).strong());
        ui.add_space(12.0);
        let status = if !snap.active {
            "waiting for audio".to_owned()
        } else {
            let channels = if snap.channels == 1 { "mono" } else { "stereo" };
            let mode = if snap.offline {
                "offline render"
            } else {
                "live"
            };
            format!(
                "{:.1} kHz · {channels} · {mode}",
                snap.sample_rate_hz / 1000.0
            )
        };
        ui.label(RichText::new(status).color(colours::MUTED));
        ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
            let dropped = RichText::new(format!("dropped {}", snap.samples_dropped));
            ui.label(if snap.samples_dropped > 0 {
                dropped.color(colours::WARN).strong()
            } else {
                dropped.color(colours::MUTED)
            });
            ui.add_space(12.0);
            let seconds = if snap.sample_rate_hz > 0.0 {
                snap.samples_analysed as f64 / f64::from(snap.sample_rate_hz)
            } else {
                0.0
            };
            ui.label(
                RichText::new(format!(
                    "analysed {} samples ({})",
                    snap.samples_analysed,
                    clock(seconds)
                ))
                .color(colours::MUTED),
            );
        });
    });
}

fn card(ui: &mut egui::Ui, title: &str, body: impl FnOnce(&mut egui::Ui)) {
    egui::Frame::new()
        .fill(colours::CARD)
        .corner_radius(CornerRadius::same(6))
        .inner_margin(10.0)
        .show(ui, |ui| {
            ui.set_width(ui.available_width());
            ui.label(RichText::new(title).size(15.0).strong());
            ui.add_space(4.0);
            body(ui);
        });
}

fn later(ui: &mut egui::Ui, text: &str) {
    ui.add_sized(
        vec2(ui.available_width(), 60.0),
        egui::Label::new(RichText::new(text).color(colours::MUTED)).wrap(),
    );
}

fn db_to_unit(db: f32) -> f32 {
    let (lo, hi) = METER_RANGE_DB;
    ((db - lo) / (hi - lo)).clamp(0.0, 1.0)
}

fn level_view(ui: &mut egui::Ui, snap: &Snapshot) {
    ui.horizontal(|ui| {
        reading(ui, "RMS", snap.rms_smoothed_db, colours::LEVEL);
        reading(ui, "Peak", snap.peak_db, colours::PEAK);
        reading(ui, "Peak hold", snap.peak_hold_db, colours::PEAK);
    });
    // The meter: a bar for the smoothed RMS, a tick for the peak, a scale every 12 dB.
    let (rect, _) = ui.allocate_exact_size(vec2(ui.available_width(), 22.0), Sense::hover());
    let painter = ui.painter_at(rect);
    painter.rect_filled(rect, CornerRadius::same(3), colours::TRACK);
    let mut bar = rect;
    bar.set_width(rect.width() * db_to_unit(snap.rms_smoothed_db));
    painter.rect_filled(bar, CornerRadius::same(3), colours::LEVEL);
    let x = rect.left() + rect.width() * db_to_unit(snap.peak_db);
    painter.line_segment(
        [pos2(x, rect.top()), pos2(x, rect.bottom())],
        Stroke::new(3.0, colours::PEAK),
    );
    let (lo, hi) = METER_RANGE_DB;
    let scale = ui
        .allocate_exact_size(vec2(ui.available_width(), 14.0), Sense::hover())
        .0;
    let mut db = lo;
    while db <= hi {
        let x = scale.left() + scale.width() * db_to_unit(db);
        let align = if db == lo {
            egui::Align2::LEFT_TOP
        } else if db == hi {
            egui::Align2::RIGHT_TOP
        } else {
            egui::Align2::CENTER_TOP
        };
        ui.painter().text(
            pos2(x, scale.top()),
            align,
            format!("{db:.0}"),
            egui::FontId::proportional(11.0),
            colours::MUTED,
        );
        db += 12.0;
    }
    ui.add_space(6.0);
    level_trace(ui, snap);
}

fn reading(ui: &mut egui::Ui, name: &str, db: f32, colour: Color32) {
    ui.label(RichText::new(name).color(colours::MUTED));
    let text = if db <= METER_RANGE_DB.0 - 40.0 {
        "silent".to_owned()
    } else {
        format!("{db:.1} dBFS")
    };
    ui.label(RichText::new(text).color(colour).size(18.0).monospace());
    ui.add_space(14.0);
}

/// The last ten seconds of RMS level as a line, newest at the right.
fn level_trace(ui: &mut egui::Ui, snap: &Snapshot) {
    let history: Vec<f32> = snap.history().iter().map(|c| c.rms_db).collect();
    let history = &history[..];
    let size = Vec2::new(ui.available_width(), 70.0);
    let (rect, _) = ui.allocate_exact_size(size, Sense::hover());
    let painter = ui.painter_at(rect);
    painter.rect_filled(rect, CornerRadius::same(3), colours::TRACK);
    let span_s = LEVEL_HISTORY_LEN as f64 * LEVEL_HISTORY_CELL_S;
    painter.text(
        rect.left_top() + vec2(4.0, 2.0),
        egui::Align2::LEFT_TOP,
        format!("RMS, last {span_s:.0} s"),
        egui::FontId::proportional(11.0),
        colours::MUTED,
    );
    if history.len() < 2 {
        return;
    }
    let step = rect.width() / (LEVEL_HISTORY_LEN - 1) as f32;
    let start = LEVEL_HISTORY_LEN - history.len();
    let points: Vec<_> = history
        .iter()
        .enumerate()
        .map(|(i, &db)| {
            pos2(
                rect.left() + (start + i) as f32 * step,
                rect.bottom() - rect.height() * db_to_unit(db),
            )
        })
        .collect();
    painter.add(egui::Shape::line(points, Stroke::new(2.0, colours::LEVEL)));
}

/// Seconds as m:ss.s.
fn clock(seconds: f64) -> String {
    let minutes = (seconds / 60.0).floor();
    format!("{}:{:04.1}", minutes as u64, seconds - minutes * 60.0)
}

/// Frequencies as "850 Hz" or "2.35 kHz".
fn hz(value: f32) -> String {
    if value >= 1000.0 {
        format!("{:.2} kHz", value / 1000.0)
    } else {
        format!("{value:.0} Hz")
    }
}

/// Reads one value out of a history cell.
type Pick = fn(&crate::snapshot::TrendCell) -> f32;

/// Compact timbre readouts, each with a short trend line over the history span.
fn timbre_view(ui: &mut egui::Ui, snap: &Snapshot) {
    let t = &snap.timbre;
    let history = snap.history();
    let rows: [(&str, String, Pick); 4] = [
        ("Centroid", hz(t.centroid_hz), |c| c.centroid_hz),
        ("Roll-off", hz(t.rolloff_hz), |c| c.rolloff_hz),
        ("Flatness", format!("{:.3}", t.flatness), |c| c.flatness),
        ("Flux", format!("{:.2} dB", t.flux_db), |c| c.flux_db),
    ];
    egui::Grid::new("timbre")
        .num_columns(3)
        .spacing([8.0, 4.0])
        .show(ui, |ui| {
            for (name, value, pick) in rows {
                ui.label(RichText::new(name).color(colours::MUTED));
                ui.label(RichText::new(value).monospace());
                let values: Vec<f32> = history.iter().map(pick).collect();
                sparkline(ui, &values);
                ui.end_row();
            }
        });
}

/// A small trend line scaled to its own range (newest at the right).
fn sparkline(ui: &mut egui::Ui, values: &[f32]) {
    let (rect, _) = ui.allocate_exact_size(vec2(70.0, 16.0), Sense::hover());
    if values.len() < 2 {
        return;
    }
    let (lo, hi) = values
        .iter()
        .fold((f32::MAX, f32::MIN), |(lo, hi), &v| (lo.min(v), hi.max(v)));
    let span = (hi - lo).max(1e-6);
    let step = rect.width() / (LEVEL_HISTORY_LEN - 1) as f32;
    let start = LEVEL_HISTORY_LEN - values.len();
    let points: Vec<_> = values
        .iter()
        .enumerate()
        .map(|(i, &v)| {
            pos2(
                rect.left() + (start + i) as f32 * step,
                rect.bottom() - rect.height() * (v - lo) / span,
            )
        })
        .collect();
    ui.painter()
        .add(egui::Shape::line(points, Stroke::new(1.5, colours::LEVEL)));
}
