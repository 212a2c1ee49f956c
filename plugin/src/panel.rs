//! The panel: reads the newest [`Snapshot`] and [`MixHistory`] each frame and draws them.
//!
//! It never blocks the analysis: both arrive through triple buffers, and the panel's requests
//! (files to load, the set log, the history span, hold) go into [`Controls`], which the analysis
//! thread reads with `try_read` only. Display scaling (dB to pixels, counts to time) happens here.
//!
//! Layout (our own): a status line; the instrument mix (sections that open to their families,
//! the unexplained share apart) beside the style card and a compact level and timbre card; the
//! history strip across the bottom; files and the set log behind a button. Every colour has a
//! label beside it: sections are told apart by position and name, not colour alone.

use crate::controls::{Controls, HISTORY_SPANS_S};
use crate::snapshot::{LEVEL_HISTORY_LEN, Labels, MIX_HISTORY_CELL_S, MixHistory};
use crate::{Snapshot, WeftParams};
use egui::{Color32, CornerRadius, RichText, Sense, Stroke, pos2, vec2};
use nice_plug::context::gui::GuiContext;
use nice_plug_egui::resizable_window::ResizableWindow;
use nice_plug_egui::widgets::ParamSlider;
use nice_plug_egui::{EguiEditor, EguiEditorState, EguiNiceSettings, NiceEguiApp, RepaintNotifier};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::{Duration, Instant};
use weft_engine::palette::MAX_SECTIONS;
use weft_engine::windows::phrase;

/// The meter's scale, dBFS.
const METER_RANGE_DB: (f32, f32) = (-72.0, 0.0);
/// Height of the instrument mix's list, logical pixels (it scrolls beyond).
const MIX_VIEW_HEIGHT: f32 = 400.0;
/// Shares below this are drawn dimmed as absent.
const ABSENT_SHARE: f32 = 0.005;
/// Environment variable for tests of a slow panel: a pause, ms, in every frame.
pub const SLOW_PANEL_ENV: &str = "WEFT_TEST_PANEL_DELAY_MS";
/// Environment variable for screenshots: `setup` opens the files and set-log area, `families`
/// opens every section, `family-history` stacks the history by family, `record` starts a set
/// log when the panel opens (comma-separated).
pub const PANEL_VIEW_ENV: &str = "WEFT_PANEL_VIEW";

/// Colours chosen for contrast on a dark background; meaning never rests on colour alone (every
/// reading has a label and a number).
mod colours {
    use egui::Color32;
    pub const BACKGROUND: Color32 = Color32::from_rgb(0x16, 0x1a, 0x21);
    pub const CARD: Color32 = Color32::from_rgb(0x20, 0x26, 0x30);
    pub const TEXT: Color32 = Color32::from_rgb(0xe8, 0xe6, 0xe1);
    pub const MUTED: Color32 = Color32::from_rgb(0x8d, 0x96, 0xa3);
    pub const DIM: Color32 = Color32::from_rgb(0x5a, 0x62, 0x6e);
    pub const LEVEL: Color32 = Color32::from_rgb(0x4f, 0xc3, 0xb5);
    pub const PEAK: Color32 = Color32::from_rgb(0xf2, 0xb1, 0x34);
    pub const WARN: Color32 = Color32::from_rgb(0xef, 0x6f, 0x5e);
    pub const TRACK: Color32 = Color32::from_rgb(0x2c, 0x34, 0x40);
    pub const UNEXPLAINED: Color32 = Color32::from_rgb(0x6b, 0x6f, 0x76);
    pub const CLOSENESS: Color32 = Color32::from_rgb(0xf5, 0xf3, 0xee);
    /// Section colours: the eight of Okabe & Ito's colour-universal-design set (2008), black
    /// swapped for a light grey so it shows on the dark background.
    pub const SECTIONS: [Color32; 8] = [
        Color32::from_rgb(0xe6, 0x9f, 0x00),
        Color32::from_rgb(0x56, 0xb4, 0xe9),
        Color32::from_rgb(0x00, 0x9e, 0x73),
        Color32::from_rgb(0xf0, 0xe4, 0x42),
        Color32::from_rgb(0x00, 0x72, 0xb2),
        Color32::from_rgb(0xd5, 0x5e, 0x00),
        Color32::from_rgb(0xcc, 0x79, 0xa7),
        Color32::from_rgb(0xc8, 0xc8, 0xc8),
    ];
}

/// Colour of section `s` (cycling for palettes with more than eight sections).
fn section_colour(s: usize) -> Color32 {
    colours::SECTIONS[s % colours::SECTIONS.len()]
}

/// A family's colour: its section's, lighter or darker by its place in the section, so
/// families of one section stay together in the history strip.
fn family_colour(labels: &Labels, f: usize) -> Color32 {
    let s = labels.section_of.get(f).copied().unwrap_or(0);
    let rank = labels.section_of[..f.min(labels.section_of.len())]
        .iter()
        .filter(|&&x| x == s)
        .count();
    let base = section_colour(s);
    let k = [1.0, 0.72, 1.2, 0.55, 1.35][rank % 5];
    let scale = |c: u8| (f32::from(c) * k).clamp(0.0, 255.0) as u8;
    Color32::from_rgb(scale(base.r()), scale(base.g()), scale(base.b()))
}

/// Time spent in [`Panel::ui`], for the frame-time measurement.
#[derive(Default)]
struct FrameTiming {
    frames: u64,
    total_s: f64,
    max_s: f64,
    window: Vec<f64>,
    last_write: Option<Instant>,
}

impl FrameTiming {
    fn add(&mut self, seconds: f64) {
        self.frames += 1;
        self.total_s += seconds;
        self.max_s = self.max_s.max(seconds);
        if self.window.len() >= 4096 {
            self.window.clear();
        }
        self.window.push(seconds);
    }

    /// Writes `weft-panel.json` into the snapshot folder once a second (test hosts and
    /// screenshots only: nothing is written unless that folder is set).
    fn dump(&mut self, dir: Option<&PathBuf>, snap: &Snapshot, history: &MixHistory) {
        let Some(dir) = dir else { return };
        if self
            .last_write
            .is_some_and(|t| t.elapsed() < Duration::from_secs(1))
        {
            return;
        }
        self.last_write = Some(Instant::now());
        let mut sorted = self.window.clone();
        sorted.sort_by(f64::total_cmp);
        let p95 = sorted
            .get((sorted.len() as f64 * 0.95) as usize)
            .copied()
            .unwrap_or(0.0);
        let json = serde_json::json!({
            "frames": self.frames,
            "mean_ms": if self.frames > 0 { 1e3 * self.total_s / self.frames as f64 } else { 0.0 },
            "p95_ms": 1e3 * p95,
            "max_ms": 1e3 * self.max_s,
            "history_cells": history.len,
            "mix_updates": snap.mix.updates,
            "style_windows": snap.style.windows,
            "style_loaded": snap.labels.style.is_some(),
            "recording": snap.log.recording,
        });
        let path = dir.join("weft-panel.json");
        let tmp = dir.join("weft-panel.json.part");
        if std::fs::write(&tmp, json.to_string()).is_ok() {
            let _ = std::fs::rename(&tmp, &path);
        }
    }
}

/// The egui app behind the editor window.
pub struct Panel {
    params: Arc<WeftParams>,
    controls: Arc<Controls>,
    feed: triple_buffer::Output<Snapshot>,
    history_feed: triple_buffer::Output<MixHistory>,
    snap: Snapshot,
    history: MixHistory,
    open_sections: [bool; MAX_SECTIONS],
    history_by_family: bool,
    show_setup: bool,
    palette_entry: String,
    style_entry: String,
    folder_entry: String,
    timing: FrameTiming,
    dump_dir: Option<PathBuf>,
    slow: Option<Duration>,
    gui: Option<GuiContext>,
}

/// Builds the editor. The repaint notifier is not needed: the panel asks for a repaint every
/// frame while the analysis runs.
pub fn editor(
    state: Arc<EguiEditorState>,
    params: Arc<WeftParams>,
    controls: Arc<Controls>,
    feed: triple_buffer::Output<Snapshot>,
    history_feed: triple_buffer::Output<MixHistory>,
) -> Option<EguiEditor<Panel>> {
    let settings = EguiNiceSettings::new()
        .with_tile("Weft")
        .with_repaint_poll_interval(Duration::from_millis(16));
    let view = std::env::var(PANEL_VIEW_ENV).unwrap_or_default();
    let wants = |name: &str| view.split(',').any(|v| v.trim() == name);
    let current = controls.try_settings().unwrap_or_default();
    if wants("record") {
        controls.set_recording(true);
    }
    let panel = Panel {
        params,
        feed,
        history_feed,
        snap: Snapshot::default(),
        history: MixHistory::default(),
        open_sections: [wants("families"); MAX_SECTIONS],
        history_by_family: wants("family-history"),
        show_setup: wants("setup"),
        palette_entry: current.palette_path.clone().unwrap_or_default(),
        style_entry: current.style_path.clone().unwrap_or_default(),
        folder_entry: current.log_folder.clone().unwrap_or_default(),
        controls,
        timing: FrameTiming::default(),
        dump_dir: std::env::var_os(crate::analysis::SNAPSHOT_DIR_ENV).map(PathBuf::from),
        slow: std::env::var(SLOW_PANEL_ENV)
            .ok()
            .and_then(|v| v.trim().parse::<u64>().ok())
            .filter(|&ms| ms > 0)
            .map(|ms| Duration::from_millis(ms.min(1000))),
        gui: None,
    };
    nice_plug_egui::create_egui_editor(state, RepaintNotifier::new(), settings, panel)
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
        let started = Instant::now();
        let settings = self.controls.try_settings().unwrap_or_default();
        if !settings.hold {
            self.snap.clone_from(self.feed.read());
            if self.history_feed.update() {
                self.history.copy_from(self.history_feed.output_buffer());
            }
        }
        ui.ctx().request_repaint_after(Duration::from_millis(16));
        ResizableWindow::new("weft-panel")
            .min_size(vec2(760.0, 520.0))
            .show(ui, |ui| {
                egui::Frame::new()
                    .fill(colours::BACKGROUND)
                    .inner_margin(10.0)
                    .show(ui, |ui| {
                        ui.set_min_size(ui.available_size());
                        self.header(ui, settings.hold);
                        ui.add_space(6.0);
                        if self.show_setup {
                            card(ui, "Files and set log", |ui| self.setup_view(ui));
                            ui.add_space(6.0);
                        }
                        ui.columns(2, |cols| {
                            card(&mut cols[0], "Instrument mix", |ui| {
                                // A fixed height keeps the layout still when sections open.
                                egui::ScrollArea::vertical()
                                    .id_salt("mix")
                                    .max_height(MIX_VIEW_HEIGHT)
                                    .show(ui, |ui| self.mix_view(ui));
                            });
                            card(&mut cols[1], "Style", |ui| {
                                style_view(ui, &self.snap, &self.history, settings.history_span_s);
                            });
                            cols[1].add_space(6.0);
                            card(&mut cols[1], "Level and timbre", |ui| {
                                level_view(ui, &self.snap);
                                ui.add_space(4.0);
                                timbre_view(ui, &self.snap);
                            });
                        });
                        ui.add_space(6.0);
                        card(ui, "History", |ui| {
                            self.history_view(ui, settings.history_span_s, settings.hold)
                        });
                    });
            });
        if let Some(pause) = self.slow {
            std::thread::sleep(pause);
        }
        self.timing.add(started.elapsed().as_secs_f64());
        self.timing
            .dump(self.dump_dir.as_ref(), &self.snap, &self.history);
    }
}

impl Panel {
    fn header(&mut self, ui: &mut egui::Ui, hold: bool) {
        let snap = &self.snap;
        ui.horizontal(|ui| {
            ui.label(RichText::new("Weft").size(22.0).strong());
            ui.add_space(10.0);
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
            ui.add_space(8.0);
            ui.label(
                RichText::new(format!("palette: {}", snap.labels.palette)).color(colours::MUTED),
            );
            if hold {
                ui.add_space(8.0);
                ui.label(
                    RichText::new(" HELD ")
                        .background_color(colours::PEAK)
                        .color(Color32::BLACK)
                        .strong(),
                );
            }
            if snap.log.recording {
                ui.add_space(8.0);
                let (dot, _) = ui.allocate_exact_size(vec2(12.0, 12.0), Sense::hover());
                ui.painter().circle_filled(dot.center(), 6.0, colours::WARN);
                ui.label(
                    RichText::new(format!("REC {} rows", snap.log.rows))
                        .color(colours::WARN)
                        .strong(),
                );
            }
            ui.with_layout(egui::Layout::right_to_left(egui::Align::Center), |ui| {
                let label = if self.show_setup {
                    "Hide files and log"
                } else {
                    "Files and log"
                };
                if ui.button(label).clicked() {
                    self.show_setup = !self.show_setup;
                }
                ui.add_space(8.0);
                let dropped = RichText::new(format!("dropped {}", snap.samples_dropped));
                ui.label(if snap.samples_dropped > 0 {
                    dropped.color(colours::WARN).strong()
                } else {
                    dropped.color(colours::MUTED)
                });
                ui.add_space(8.0);
                let seconds = if snap.sample_rate_hz > 0.0 {
                    snap.samples_analysed as f64 / f64::from(snap.sample_rate_hz)
                } else {
                    0.0
                };
                ui.label(
                    RichText::new(format!("analysed {}", clock(seconds))).color(colours::MUTED),
                );
            });
        });
        for problem in [
            &snap.labels.palette_problem,
            &snap.labels.style_problem,
            &snap.labels.log_problem,
        ]
        .into_iter()
        .flatten()
        {
            ui.label(RichText::new(format!("Problem: {problem}")).color(colours::WARN));
        }
    }

    /// Sections that open to their families, in the palette's order (stable), the unexplained
    /// share apart below them.
    fn mix_view(&mut self, ui: &mut egui::Ui) {
        let snap = &self.snap;
        let labels = &snap.labels;
        let mix = &snap.mix;
        if labels.families.is_empty() {
            later(ui, "Loading the palette…");
            return;
        }
        let state = if mix.updates == 0 {
            "waiting for the first shares"
        } else if !mix.shares.signal {
            "silence"
        } else {
            ""
        };
        if !state.is_empty() {
            ui.label(RichText::new(state).color(colours::MUTED));
        }
        let name_w = 150.0;
        let pct_w = 52.0;
        for (s, section) in labels.sections.iter().enumerate().take(MAX_SECTIONS) {
            let value = mix.sections[s];
            let open = self.open_sections[s];
            let clicked = share_row(
                ui,
                section,
                value,
                section_colour(s),
                name_w,
                pct_w,
                15.0,
                Some(open),
            );
            if clicked {
                self.open_sections[s] = !open;
            }
            if open {
                for (f, name) in labels.families.iter().enumerate() {
                    if labels.section_of.get(f) != Some(&s) {
                        continue;
                    }
                    let share = if f < mix.shares.families {
                        mix.shares.share[f]
                    } else {
                        0.0
                    };
                    share_row(
                        ui,
                        &format!("   {name}"),
                        share,
                        family_colour(labels, f),
                        name_w,
                        pct_w,
                        12.5,
                        None,
                    );
                }
            }
        }
        ui.add_space(4.0);
        ui.separator();
        share_row(
            ui,
            "unexplained",
            mix.shares.unexplained,
            colours::UNEXPLAINED,
            name_w,
            pct_w,
            14.0,
            None,
        );
        ui.label(
            RichText::new("Share of the mix's energy. Click a section to open its families.")
                .size(11.0)
                .color(colours::MUTED),
        );
    }

    fn history_view(&mut self, ui: &mut egui::Ui, span_s: u32, hold: bool) {
        ui.horizontal(|ui| {
            ui.label(RichText::new("Span").color(colours::MUTED));
            for span in HISTORY_SPANS_S {
                let text = if span < 60 {
                    format!("{span} s")
                } else {
                    format!("{} min", span / 60)
                };
                if ui.selectable_label(span == span_s, text).clicked() {
                    self.controls.update(|s| s.history_span_s = span);
                }
            }
            ui.add_space(12.0);
            let stack = if self.history_by_family {
                "by family"
            } else {
                "by section"
            };
            if ui.button(format!("Stack: {stack}")).clicked() {
                self.history_by_family = !self.history_by_family;
            }
            ui.add_space(12.0);
            let hold_text = if hold {
                "Release (resume live)"
            } else {
                "Hold"
            };
            if ui.button(hold_text).clicked() {
                self.controls.update(|s| s.hold = !hold);
            }
        });
        history_strip(ui, &self.history, span_s, self.history_by_family);
    }

    fn setup_view(&mut self, ui: &mut egui::Ui) {
        let settings = self.controls.try_settings().unwrap_or_default();
        egui::Grid::new("files")
            .num_columns(3)
            .spacing([8.0, 6.0])
            .show(ui, |ui| {
                ui.label("Palette file");
                ui.add(
                    egui::TextEdit::singleline(&mut self.palette_entry)
                        .hint_text("built-in palette")
                        .desired_width(420.0),
                );
                ui.horizontal(|ui| {
                    if ui.button("Load").clicked() {
                        let path = self.palette_entry.trim().to_owned();
                        self.controls.update(|s| {
                            if path.is_empty() {
                                s.palette_path = None;
                            } else {
                                s.remember(&path);
                                s.palette_path = Some(path);
                            }
                        });
                    }
                    if ui.button("Built-in").clicked() {
                        self.palette_entry.clear();
                        self.controls.update(|s| s.palette_path = None);
                    }
                });
                ui.end_row();

                ui.label("Style model");
                ui.add(
                    egui::TextEdit::singleline(&mut self.style_entry)
                        .hint_text("path of a style model file")
                        .desired_width(420.0),
                );
                ui.horizontal(|ui| {
                    if ui.button("Load").clicked() {
                        let path = self.style_entry.trim().to_owned();
                        self.controls.update(|s| {
                            if path.is_empty() {
                                s.style_path = None;
                            } else {
                                s.remember(&path);
                                s.style_path = Some(path);
                            }
                        });
                    }
                    if ui.button("None").clicked() {
                        self.style_entry.clear();
                        self.controls.update(|s| s.style_path = None);
                    }
                });
                ui.end_row();

                ui.label("Recent");
                let mut chosen = None;
                egui::ComboBox::from_id_salt("recent")
                    .selected_text(if settings.recent.is_empty() {
                        "no recent files"
                    } else {
                        "choose a recent file"
                    })
                    .width(420.0)
                    .show_ui(ui, |ui| {
                        for path in &settings.recent {
                            if ui.selectable_label(false, path).clicked() {
                                chosen = Some(path.clone());
                            }
                        }
                    });
                if let Some(path) = chosen {
                    if path.ends_with(".weftpal") {
                        self.palette_entry = path;
                    } else {
                        self.style_entry = path;
                    }
                }
                ui.label(RichText::new("fills the entry; press Load").color(colours::MUTED));
                ui.end_row();

                ui.label("Set log folder");
                ui.add(
                    egui::TextEdit::singleline(&mut self.folder_entry)
                        .hint_text("home folder")
                        .desired_width(420.0),
                );
                ui.horizontal(|ui| {
                    let recording = self.controls.recording();
                    let text = if recording {
                        "Stop set log"
                    } else {
                        "Record set log"
                    };
                    if ui.button(text).clicked() {
                        let folder = self.folder_entry.trim().to_owned();
                        self.controls.update(|s| {
                            s.log_folder = (!folder.is_empty()).then_some(folder);
                        });
                        self.controls.set_recording(!recording);
                    }
                });
                ui.end_row();
            });
        if let Some(file) = &self.snap.labels.log_file {
            let state = if self.snap.log.recording {
                "writing"
            } else {
                "last log"
            };
            ui.label(
                RichText::new(format!("{state}: {file} ({} rows)", self.snap.log.rows))
                    .color(colours::MUTED),
            );
        }
        if let Some(gui) = &self.gui {
            let setter = gui.param_setter();
            ui.horizontal(|ui| {
                ui.label(RichText::new("Response time").color(colours::MUTED));
                ui.add(ParamSlider::for_param(&*self.params.response_ms, &setter));
            });
        }
    }
}

/// One labelled share bar; `opener` draws a section's open/closed mark (a triangle pointing
/// right or down). Returns whether the row's name or mark was clicked.
#[allow(clippy::too_many_arguments)]
fn share_row(
    ui: &mut egui::Ui,
    name: &str,
    share: f32,
    colour: Color32,
    name_w: f32,
    pct_w: f32,
    size: f32,
    opener: Option<bool>,
) -> bool {
    let absent = share < ABSENT_SHARE;
    let text_colour = if absent { colours::DIM } else { colours::TEXT };
    let mut clicked = false;
    ui.horizontal(|ui| {
        let (mark, mark_response) = ui.allocate_exact_size(vec2(14.0, size + 6.0), Sense::click());
        if let Some(open) = opener {
            let c = mark.center();
            let r = 4.5;
            let points = if open {
                vec![
                    pos2(c.x - r, c.y - r * 0.6),
                    pos2(c.x + r, c.y - r * 0.6),
                    pos2(c.x, c.y + r * 0.8),
                ]
            } else {
                vec![
                    pos2(c.x - r * 0.6, c.y - r),
                    pos2(c.x + r * 0.8, c.y),
                    pos2(c.x - r * 0.6, c.y + r),
                ]
            };
            ui.painter().add(egui::Shape::convex_polygon(
                points,
                colours::MUTED,
                Stroke::NONE,
            ));
        }
        let sense = if opener.is_some() {
            Sense::click()
        } else {
            Sense::hover()
        };
        let label = egui::Label::new(RichText::new(name).size(size).color(text_colour))
            .truncate()
            .sense(sense);
        let response = ui
            .allocate_ui_with_layout(
                vec2(name_w, size + 6.0),
                egui::Layout::left_to_right(egui::Align::Center),
                |ui| {
                    ui.set_min_width(name_w);
                    ui.add(label)
                },
            )
            .inner;
        clicked = opener.is_some() && (response.clicked() || mark_response.clicked());
        let bar_w = (ui.available_width() - pct_w - 8.0).max(20.0);
        let (rect, _) = ui.allocate_exact_size(vec2(bar_w, size), Sense::hover());
        let painter = ui.painter_at(rect);
        painter.rect_filled(rect, CornerRadius::same(2), colours::TRACK);
        let mut bar = rect;
        bar.set_width(rect.width() * share.clamp(0.0, 1.0));
        let fill = if absent { colours::DIM } else { colour };
        painter.rect_filled(bar, CornerRadius::same(2), fill);
        ui.add_sized(
            vec2(pct_w, size + 6.0),
            egui::Label::new(
                RichText::new(format!("{:>3.0} %", 100.0 * share))
                    .size(size)
                    .monospace()
                    .color(text_colour),
            ),
        );
    });
    clicked
}

/// The shares over the chosen span as stacked areas (sections or families bottom-up in palette
/// order, unexplained on top), the closeness as a line over them, a time axis, and a legend.
/// Drawn as one mesh, so ten minutes of history cost a few thousand quads.
fn history_strip(ui: &mut egui::Ui, history: &MixHistory, span_s: u32, by_family: bool) {
    let labels = &history.labels;
    let height = 78.0;
    let (rect, _) = ui.allocate_exact_size(vec2(ui.available_width(), height), Sense::hover());
    let painter = ui.painter_at(rect);
    painter.rect_filled(rect, CornerRadius::same(3), colours::TRACK);
    let span_cells = (f64::from(span_s) / MIX_HISTORY_CELL_S).round() as usize;
    let cells = history.cells();
    let shown = &cells[cells.len().saturating_sub(span_cells)..];
    let cell_w = rect.width() / span_cells.max(1) as f32;
    let x0 = rect.right() - shown.len() as f32 * cell_w;
    let sections = labels.sections.len().min(MAX_SECTIONS);
    let families = labels.families.len();
    let mut mesh = egui::Mesh::default();
    let mut layer_values = [0.0_f32; weft_engine::palette::MAX_FAMILIES + 1];
    let mut layer_colours = [Color32::BLACK; weft_engine::palette::MAX_FAMILIES + 1];
    for (i, cell) in shown.iter().enumerate() {
        if !cell.signal {
            continue;
        }
        let n = if by_family {
            for f in 0..families {
                layer_values[f] = cell.shares[f];
                layer_colours[f] = family_colour(labels, f);
            }
            families
        } else {
            layer_values[..sections].fill(0.0);
            for f in 0..families {
                if let Some(&s) = labels.section_of.get(f)
                    && s < sections
                {
                    layer_values[s] += cell.shares[f];
                }
            }
            for (s, c) in layer_colours.iter_mut().enumerate().take(sections) {
                *c = section_colour(s);
            }
            sections
        };
        layer_values[n] = cell.unexplained;
        layer_colours[n] = colours::UNEXPLAINED;
        let x = x0 + i as f32 * cell_w;
        let mut y = rect.bottom();
        for (&v, &c) in layer_values[..=n].iter().zip(&layer_colours[..=n]) {
            let h = v.clamp(0.0, 1.0) * rect.height();
            if h > 0.05 {
                let r = egui::Rect::from_min_max(pos2(x, y - h), pos2(x + cell_w + 0.5, y));
                mesh.add_colored_rect(r, c);
            }
            y -= h;
        }
    }
    painter.add(egui::Shape::mesh(mesh));
    // Closeness over the shares: a light line with a dark edge, gaps where there was none.
    let mut run: Vec<egui::Pos2> = Vec::new();
    let flush = |run: &mut Vec<egui::Pos2>| {
        if run.len() >= 2 {
            painter.add(egui::Shape::line(
                run.clone(),
                Stroke::new(4.0, colours::BACKGROUND),
            ));
            painter.add(egui::Shape::line(
                std::mem::take(run),
                Stroke::new(2.0, colours::CLOSENESS),
            ));
        }
        run.clear();
    };
    for (i, cell) in shown.iter().enumerate() {
        if cell.closeness.is_finite() {
            let x = x0 + (i as f32 + 0.5) * cell_w;
            run.push(pos2(
                x,
                rect.bottom() - cell.closeness.clamp(0.0, 1.0) * rect.height(),
            ));
        } else {
            flush(&mut run);
        }
    }
    flush(&mut run);
    // Time axis: six ticks over the span, labelled m:ss before now.
    let axis = ui
        .allocate_exact_size(vec2(ui.available_width(), 14.0), Sense::hover())
        .0;
    for k in 0..=6 {
        let before_s = f64::from(span_s) * f64::from(6 - k) / 6.0;
        let x = axis.left() + axis.width() * k as f32 / 6.0;
        let text = if k == 6 {
            "now".to_owned()
        } else {
            format!(
                "−{}:{:02}",
                (before_s / 60.0).floor() as u64,
                before_s as u64 % 60
            )
        };
        let align = match k {
            0 => egui::Align2::LEFT_TOP,
            6 => egui::Align2::RIGHT_TOP,
            _ => egui::Align2::CENTER_TOP,
        };
        ui.painter().text(
            pos2(x, axis.top()),
            align,
            text,
            egui::FontId::proportional(11.0),
            colours::MUTED,
        );
    }
    // Legend: names beside swatches, in stacking order (bottom first).
    ui.horizontal_wrapped(|ui| {
        let swatch = |ui: &mut egui::Ui, colour: Color32, name: &str| {
            let (r, _) = ui.allocate_exact_size(vec2(10.0, 10.0), Sense::hover());
            ui.painter().rect_filled(r, CornerRadius::same(2), colour);
            ui.label(RichText::new(name).size(11.0).color(colours::MUTED));
            ui.add_space(4.0);
        };
        if by_family {
            for (f, name) in labels.families.iter().enumerate() {
                swatch(ui, family_colour(labels, f), name);
            }
        } else {
            for (s, name) in labels.sections.iter().enumerate().take(MAX_SECTIONS) {
                swatch(ui, section_colour(s), name);
            }
        }
        swatch(ui, colours::UNEXPLAINED, "unexplained");
        if labels.style.is_some() {
            swatch(ui, colours::CLOSENESS, "closeness (line, 0–100 %)");
        }
    });
}

/// The category, its closeness as a large number and a meter, its trend over the history span
/// and the three strongest reasons in words; a clear state without a model.
fn style_view(ui: &mut egui::Ui, snap: &Snapshot, history: &MixHistory, span_s: u32) {
    let Some(st) = &snap.labels.style else {
        let text = match &snap.labels.style_problem {
            Some(p) => format!("No style model in use: {p}"),
            None => "No style model loaded. Open “Files and log” to load one; train one with \
                     `weft style train`."
                .to_owned(),
        };
        later(ui, &text);
        return;
    };
    let category = st.classes.get(st.category).map_or("?", String::as_str);
    ui.horizontal(|ui| {
        ui.label(RichText::new(category).size(20.0).strong());
        ui.label(
            RichText::new(format!(
                "{} · {} tracks · CV balanced error {:.1} % ± {:.1}",
                st.model,
                st.tracks,
                100.0 * st.cv_balanced_error.0,
                100.0 * st.cv_balanced_error.1
            ))
            .size(11.0)
            .color(colours::MUTED),
        );
    });
    if snap.style.windows == 0 {
        later(
            ui,
            "Listening: the first estimate comes after one window (3 s) of audio.",
        );
        return;
    }
    let closeness = snap
        .style
        .closeness
        .get(st.category)
        .copied()
        .unwrap_or(0.0);
    ui.horizontal(|ui| {
        ui.label(
            RichText::new(format!("{:.0} %", 100.0 * closeness))
                .size(40.0)
                .strong()
                .monospace(),
        );
        ui.label(RichText::new("closeness").color(colours::MUTED));
    });
    let (rect, _) = ui.allocate_exact_size(vec2(ui.available_width(), 14.0), Sense::hover());
    let painter = ui.painter_at(rect);
    painter.rect_filled(rect, CornerRadius::same(3), colours::TRACK);
    let mut bar = rect;
    bar.set_width(rect.width() * closeness.clamp(0.0, 1.0));
    painter.rect_filled(bar, CornerRadius::same(3), colours::CLOSENESS);
    let mid = rect.left() + rect.width() * 0.5;
    painter.line_segment(
        [pos2(mid, rect.top() - 2.0), pos2(mid, rect.bottom() + 2.0)],
        Stroke::new(1.5, colours::PEAK),
    );
    // Trend over the history span.
    let span_cells = (f64::from(span_s) / MIX_HISTORY_CELL_S).round() as usize;
    let cells = history.cells();
    let shown = &cells[cells.len().saturating_sub(span_cells)..];
    let (trend, _) = ui.allocate_exact_size(vec2(ui.available_width(), 28.0), Sense::hover());
    let step = trend.width() / span_cells.max(1) as f32;
    let x0 = trend.right() - shown.len() as f32 * step;
    let points: Vec<_> = shown
        .iter()
        .enumerate()
        .filter(|(_, c)| c.closeness.is_finite())
        .map(|(i, c)| {
            pos2(
                x0 + i as f32 * step,
                trend.bottom() - c.closeness * trend.height(),
            )
        })
        .collect();
    if points.len() >= 2 {
        ui.painter().add(egui::Shape::line(
            points,
            Stroke::new(1.5, colours::CLOSENESS),
        ));
    }
    ui.label(
        RichText::new(format!("closeness over the last {}", span_words(span_s)))
            .size(11.0)
            .color(colours::MUTED),
    );
    ui.add_space(4.0);
    for r in snap.style.reasons.iter().flatten() {
        let name = st.features.get(r.feature).map_or("?", String::as_str);
        let closer = r.push_log_odds >= 0.0;
        let words = phrase(name, r.relation);
        ui.horizontal(|ui| {
            // An up or down triangle, then the word: the direction never rests on colour.
            let (mark, _) = ui.allocate_exact_size(vec2(14.0, 16.0), Sense::hover());
            let c = mark.center();
            let points = if closer {
                vec![
                    pos2(c.x, c.y - 5.0),
                    pos2(c.x + 5.0, c.y + 4.0),
                    pos2(c.x - 5.0, c.y + 4.0),
                ]
            } else {
                vec![
                    pos2(c.x - 5.0, c.y - 4.0),
                    pos2(c.x + 5.0, c.y - 4.0),
                    pos2(c.x, c.y + 5.0),
                ]
            };
            let colour = if closer {
                colours::LEVEL
            } else {
                colours::PEAK
            };
            ui.painter()
                .add(egui::Shape::convex_polygon(points, colour, Stroke::NONE));
            let verb = if closer { "closer:" } else { "further:" };
            ui.label(RichText::new(format!("{verb} {words}")).size(14.0));
        });
    }
    if snap.style.reasons[0].is_none() {
        ui.label(RichText::new("no reasons yet").color(colours::MUTED));
    }
}

fn span_words(span_s: u32) -> String {
    if span_s < 60 {
        format!("{span_s} s")
    } else {
        format!("{} min", span_s / 60)
    }
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
        vec2(ui.available_width(), 48.0),
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
        reading(ui, "Hold", snap.peak_hold_db, colours::PEAK);
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
}

fn reading(ui: &mut egui::Ui, name: &str, db: f32, colour: Color32) {
    ui.label(RichText::new(name).color(colours::MUTED));
    let text = if db <= METER_RANGE_DB.0 - 40.0 {
        "silent".to_owned()
    } else {
        format!("{db:.1} dBFS")
    };
    ui.label(RichText::new(text).color(colour).size(15.0).monospace());
    ui.add_space(8.0);
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
    let rows: [(&str, String, Pick); 5] = [
        (
            "Level",
            format!(
                "{:.1} dBFS",
                snap.rms_smoothed_db.max(METER_RANGE_DB.0 - 40.0)
            ),
            |c| c.rms_db,
        ),
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
    let span_s = LEVEL_HISTORY_LEN as f64 * crate::snapshot::LEVEL_HISTORY_CELL_S;
    ui.label(
        RichText::new(format!("trend lines: the last {span_s:.0} s"))
            .size(11.0)
            .color(colours::MUTED),
    );
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
