//! Weft as a CLAP and VST3 plugin and as a standalone program.
//!
//! Three threads, three jobs:
//! - the **audio thread** (`process()`) passes audio through untouched and pushes a mid/side
//!   analysis signal into a lock-free ring ([`ring`]);
//! - the **analysis thread** ([`analysis`]) drains the ring into the engine and publishes a
//!   [`Snapshot`] through a triple buffer;
//! - the **panel** ([`panel`]) reads the newest snapshot each frame and draws it.

#![deny(unsafe_code)]

pub mod analysis;
pub mod controls;
pub mod panel;
pub mod ring;
pub mod setlog;
pub mod snapshot;

use analysis::{AnalysisJob, AnalysisThread, SNAPSHOT_DIR_ENV};
use controls::{Controls, PanelSettings};
use nice_plug::prelude::*;
use nice_plug_egui::EguiEditorState;
use ring::AudioSide;
use snapshot::MixHistory;
pub use snapshot::Snapshot;
use std::num::NonZeroU32;
use std::sync::{Arc, RwLock};
use weft_engine::AnalysisSettings;

/// The panel's size when first opened, logical pixels.
pub const PANEL_SIZE: (u32, u32) = (1000, 740);

/// Weft's parameters and persisted settings.
#[derive(Params)]
pub struct WeftParams {
    /// How fast the smoothed readings follow the music, ms (level, timbre and the mix).
    #[id = "response_ms"]
    pub response_ms: Arc<FloatParam>,
    /// The panel's files, set-log folder, history span and hold, saved with the session.
    #[persist = "panel"]
    pub panel: Arc<RwLock<PanelSettings>>,
}

impl Default for WeftParams {
    fn default() -> Self {
        Self {
            response_ms: Arc::new(
                FloatParam::new(
                    "Response time",
                    300.0,
                    FloatRange::Skewed {
                        min: 20.0,
                        max: 5000.0,
                        factor: FloatRange::skew_factor(-2.0),
                    },
                )
                .with_unit(" ms")
                .with_step_size(1.0),
            ),
            panel: Arc::new(RwLock::new(PanelSettings::from_env())),
        }
    }
}

/// The plugin instance.
pub struct Weft {
    params: Arc<WeftParams>,
    editor_state: Arc<EguiEditorState>,
    /// The audio thread's end of the ring, present while active.
    audio: Option<AudioSide>,
    /// Whether `process()` may wait for the analysis (offline rendering).
    offline: bool,
    thread: Option<AnalysisThread>,
    /// The snapshot publisher while no analysis thread holds it.
    publish: Option<triple_buffer::Input<Snapshot>>,
    /// The snapshot reader, handed to the panel when it is created.
    panel_feed: Option<triple_buffer::Output<Snapshot>>,
    /// The mix history publisher while no analysis thread holds it.
    history_publish: Option<triple_buffer::Input<MixHistory>>,
    /// The mix history reader, handed to the panel.
    history_feed: Option<triple_buffer::Output<MixHistory>>,
    /// What the panel asks of the analysis.
    controls: Arc<Controls>,
}

impl Default for Weft {
    fn default() -> Self {
        let (publish, panel_feed) = triple_buffer::triple_buffer(&Snapshot::default());
        let (history_publish, history_feed) = triple_buffer::triple_buffer(&MixHistory::default());
        let params = Arc::new(WeftParams::default());
        let controls = Arc::new(Controls::new(params.panel.clone()));
        Self {
            params,
            editor_state: EguiEditorState::from_size(
                nice_plug::editor::dpi::LogicalSize::new(PANEL_SIZE.0, PANEL_SIZE.1),
                1.0,
            ),
            audio: None,
            offline: false,
            thread: None,
            publish: Some(publish),
            panel_feed: Some(panel_feed),
            history_publish: Some(history_publish),
            history_feed: Some(history_feed),
            controls,
        }
    }
}

impl Weft {
    fn stop_analysis(&mut self) {
        self.audio = None;
        if let Some(thread) = self.thread.take() {
            match thread.stop() {
                Some(p) => {
                    self.publish = Some(p.snapshot);
                    self.history_publish = Some(p.history);
                }
                None => nice_error!("the analysis thread stopped abnormally"),
            }
        }
    }
}

impl Drop for Weft {
    fn drop(&mut self) {
        self.stop_analysis();
    }
}

impl Plugin for Weft {
    const NAME: &'static str = "Weft";
    const VENDOR: &'static str = "Weft developers";
    const URL: &'static str = "https://example.invalid/weft";
    const EMAIL: &'static str = "weft@example.invalid";
    const VERSION: &'static str = env!("CARGO_PKG_VERSION");

    const AUDIO_IO_LAYOUTS: &'static [AudioIOLayout] = &[
        AudioIOLayout {
            main_input_channels: NonZeroU32::new(2),
            main_output_channels: NonZeroU32::new(2),
            ..AudioIOLayout::const_default()
        },
        AudioIOLayout {
            main_input_channels: NonZeroU32::new(1),
            main_output_channels: NonZeroU32::new(1),
            ..AudioIOLayout::const_default()
        },
    ];

    type Editor = nice_plug_egui::EguiEditor<panel::Panel>;
    type SysExMessage = ();
    type BackgroundTask = ();

    fn params(&self) -> Arc<dyn Params> {
        self.params.clone()
    }

    fn editor(&mut self, _async_executor: AsyncExecutor<Self>) -> Option<Self::Editor> {
        let feed = self.panel_feed.take()?;
        let history = self.history_feed.take()?;
        panel::editor(
            self.editor_state.clone(),
            self.params.clone(),
            self.controls.clone(),
            feed,
            history,
        )
    }

    fn activate(
        &mut self,
        audio_io_layout: &AudioIOLayout,
        buffer_config: &BufferConfig,
        _context: &mut impl ActivateContext<Self>,
    ) -> bool {
        self.stop_analysis();
        let Ok(settings) = AnalysisSettings::for_sample_rate(f64::from(buffer_config.sample_rate))
        else {
            nice_error!("unsupported sample rate {} Hz", buffer_config.sample_rate);
            return false;
        };
        let (Some(publish), Some(history)) = (self.publish.take(), self.history_publish.take())
        else {
            nice_error!("the snapshot publishers were lost");
            return false;
        };
        let channels = audio_io_layout
            .main_input_channels
            .map_or(0, NonZeroU32::get);
        let capacity = ring::capacity_for(buffer_config.sample_rate, buffer_config.max_buffer_size);
        let (audio, input) = ring::ring(capacity);
        self.offline = buffer_config.process_mode == ProcessMode::Offline;
        let dump_to = std::env::var_os(SNAPSHOT_DIR_ENV).map(|dir| {
            std::path::PathBuf::from(dir).join(format!(
                "weft-snapshot-{}hz-{}ch-{}.json",
                buffer_config.sample_rate, channels, buffer_config.max_buffer_size
            ))
        });
        let job = AnalysisJob {
            input,
            settings,
            publish,
            history,
            controls: self.controls.clone(),
            channels,
            offline: self.offline,
            response_ms: self.params.response_ms.clone(),
            dump_to,
            slow: analysis::slow_analysis_from_env(),
            prefill_history: std::env::var(analysis::PREFILL_HISTORY_ENV).is_ok_and(|v| v == "1"),
        };
        match AnalysisThread::start(job) {
            Ok(thread) => {
                self.thread = Some(thread);
                self.audio = Some(audio);
                true
            }
            Err(err) => {
                // The job (and the publisher in it) is gone with the failed spawn: rebuild it.
                nice_error!("could not start the analysis thread: {err}");
                let (publish, _) = triple_buffer::triple_buffer(&Snapshot::default());
                self.publish = Some(publish);
                let (history, _) = triple_buffer::triple_buffer(&MixHistory::default());
                self.history_publish = Some(history);
                false
            }
        }
    }

    fn process(
        &mut self,
        buffer: &mut Buffer,
        _aux: &mut AuxiliaryBuffers,
        _context: &mut impl ProcessContext<Self>,
    ) -> ProcessStatus {
        // The audio is already in the output buffers and is never written to.
        if let Some(audio) = &mut self.audio {
            audio.push_block(buffer.as_slice_immutable(), self.offline);
        }
        ProcessStatus::Normal
    }

    fn deactivate(&mut self) {
        self.stop_analysis();
    }
}

impl ClapPlugin for Weft {
    const CLAP_ID: &'static str = "org.weft.monitor";
    const CLAP_DESCRIPTION: Option<&'static str> =
        Some("Shows what an arrangement is made of while it plays");
    const CLAP_MANUAL_URL: Option<&'static str> = None;
    const CLAP_SUPPORT_URL: Option<&'static str> = None;
    const CLAP_FEATURES: &'static [ClapFeature] = &[
        ClapFeature::AudioEffect,
        ClapFeature::Analyzer,
        ClapFeature::Stereo,
        ClapFeature::Mono,
    ];
}

impl Vst3Plugin for Weft {
    const VST3_CLASS_ID: [u8; 16] = *b"WeftMixMonitor01";
    const VST3_SUBCATEGORIES: &'static [Vst3SubCategory] =
        &[Vst3SubCategory::Fx, Vst3SubCategory::Analyzer];
}

#[allow(unsafe_code)]
mod export {
    use super::Weft;
    nice_plug::nice_export_clap!(Weft);
    nice_plug::nice_export_vst3!(Weft);
}
