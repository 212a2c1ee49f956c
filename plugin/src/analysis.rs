//! The analysis thread: drains the ring into the engine's [`Analyzer`] and publishes snapshots.
//!
//! Started by `activate()`, stopped and joined by `deactivate()`. It owns everything it works on
//! (the analyzer with its palette, the style model, the set log); the shared state is the ring,
//! the drop counter, the response-time parameter (an atomic read), the panel's [`Controls`]
//! (read with `try_read`, never waited for) and the two triple buffers it publishes into
//! (the snapshot, and the mix history twice a second).

use crate::controls::Controls;
use crate::ring::AnalysisSide;
use crate::setlog::{LogRow, SetLog};
use crate::snapshot::{
    HistoryCell, LEVEL_HISTORY_CELL_S, LEVEL_HISTORY_LEN, LogReading, MIX_HISTORY_CELL_S,
    MixHistory, MixReading, ReasonReading, SNAPSHOT_REASONS, Snapshot, StyleLabels, StyleReading,
    TrendCell,
};
use nice_plug::prelude::Param;
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::Duration;
use weft_engine::level::amplitude_to_db;
use weft_engine::palette::{MAX_FAMILIES, Palette};
use weft_engine::shares::{MAX_RESPONSE_MS, SharesSettings};
use weft_engine::style::{Estimate, EstimateScratch, StyleModel};
use weft_engine::windows::{self, WindowSpec, Windower};
use weft_engine::{AnalysisSettings, Analyzer, FrameResult};

/// Samples moved from the ring to the analyzer per step.
const DRAIN_CHUNK: usize = 4096;
/// How long the thread sleeps when the ring is empty (live playback only), ms.
const IDLE_SLEEP_MS: u64 = 4;
/// How often a running analysis rewrites its snapshot dump, seconds (when dumps are asked for).
pub const DUMP_EVERY_S: f64 = 1.0;
/// Environment variable naming a folder where each run's snapshot is written as JSON, every
/// [`DUMP_EVERY_S`] seconds and when the analysis stops (for test hosts and screenshots; read in
/// `activate()`).
pub const SNAPSHOT_DIR_ENV: &str = "WEFT_SNAPSHOT_DIR";
/// Environment variable for tests of a starved analysis: a pause, µs, the analysis thread takes
/// after every chunk it drains (read in `activate()`; absent or unreadable: no pause). It slows
/// only the analysis thread, never the audio thread.
pub const SLOW_ANALYSIS_ENV: &str = "WEFT_TEST_ANALYSIS_DELAY_US";
/// The longest pause [`SLOW_ANALYSIS_ENV`] may ask for, µs.
pub const MAX_SLOW_ANALYSIS_US: u64 = 1_000_000;

/// Environment variable for frame-time measurements: `1` fills the mix history with ten
/// minutes of invented cells when the analysis starts, so the panel draws a full history at
/// once (read in `activate()`).
pub const PREFILL_HISTORY_ENV: &str = "WEFT_TEST_PREFILL_HISTORY";

/// Ten minutes of invented history cells (slowly turning shares, a closeness wave), for
/// [`PREFILL_HISTORY_ENV`].
fn prefill(history: &mut MixHistory, families: usize) {
    for i in 0..history.cells.len() {
        let t = i as f32 * 0.01;
        let mut cell = HistoryCell {
            signal: true,
            rms_db: -20.0,
            closeness: 0.5 + 0.4 * (t * 0.7).sin(),
            unexplained: 0.1,
            ..HistoryCell::default()
        };
        let mut total = 0.0;
        for (f, share) in cell.shares.iter_mut().enumerate().take(families) {
            *share = 1.0 + (t + f as f32).sin();
            total += *share;
        }
        for share in cell.shares.iter_mut().take(families) {
            *share *= 0.9 / total.max(1e-6);
        }
        history.push(cell);
    }
}

/// The pause [`SLOW_ANALYSIS_ENV`] asks for.
pub fn slow_analysis_from_env() -> Option<Duration> {
    let us: u64 = std::env::var(SLOW_ANALYSIS_ENV).ok()?.trim().parse().ok()?;
    (us > 0).then(|| Duration::from_micros(us.min(MAX_SLOW_ANALYSIS_US)))
}

/// What a running analysis needs, handed over at activation.
pub struct AnalysisJob {
    /// The reading half of the ring.
    pub input: AnalysisSide,
    /// Sample rate and framing (checked).
    pub settings: AnalysisSettings,
    /// Where snapshots go.
    pub publish: triple_buffer::Input<Snapshot>,
    /// Where the mix history goes (twice a second).
    pub history: triple_buffer::Input<MixHistory>,
    /// Main input channels.
    pub channels: u32,
    /// Whether the host renders offline.
    pub offline: bool,
    /// The response time of the smoothed readings, ms (read live from the parameter).
    pub response_ms: Arc<nice_plug::prelude::FloatParam>,
    /// What the panel asks for: files to load, the set log.
    pub controls: Arc<Controls>,
    /// Where to write the final snapshot, if anywhere.
    pub dump_to: Option<PathBuf>,
    /// A pause after every drained chunk (tests of a starved analysis, [`SLOW_ANALYSIS_ENV`]).
    pub slow: Option<Duration>,
    /// Start with a full invented history ([`PREFILL_HISTORY_ENV`]).
    pub prefill_history: bool,
}

/// The analysis thread's result when it stops: the publishers, for the next activation.
pub struct Publishers {
    /// The snapshot publisher.
    pub snapshot: triple_buffer::Input<Snapshot>,
    /// The mix history publisher.
    pub history: triple_buffer::Input<MixHistory>,
}

/// A running analysis thread.
pub struct AnalysisThread {
    stop: Arc<AtomicBool>,
    handle: JoinHandle<Publishers>,
}

impl AnalysisThread {
    /// Starts the thread.
    pub fn start(job: AnalysisJob) -> std::io::Result<Self> {
        let stop = Arc::new(AtomicBool::new(false));
        let thread_stop = stop.clone();
        let handle = std::thread::Builder::new()
            .name("weft-analysis".into())
            .spawn(move || run(job, &thread_stop))?;
        Ok(Self { stop, handle })
    }

    /// Asks the thread to finish what is in the ring, waits for it, and returns the
    /// publishers for the next run. `None` if the thread panicked.
    pub fn stop(self) -> Option<Publishers> {
        self.stop.store(true, Ordering::Release);
        self.handle.thread().unpark();
        self.handle.join().ok()
    }
}

/// A one-pole smoother (common practice for meters): `y += (1 − a)(x − y)` per frame with
/// `a = exp(−hop / τ)`.
#[derive(Default)]
struct OnePole(f64);

impl OnePole {
    fn step(&mut self, x: f64, a: f64) -> f64 {
        self.0 = a * self.0 + (1.0 - a) * x;
        self.0
    }
}

/// Sums for one history cell.
#[derive(Default)]
struct CellSums {
    frames: u32,
    power: f64,
    centroid_power: f64,
    rolloff_power: f64,
    flatness: f64,
    flux_db: f64,
}

/// Sums for one cell of the mix history.
#[derive(Default)]
struct MixCellSums {
    frames: u32,
    power: f64,
    shares: [f64; MAX_FAMILIES],
    unexplained: f64,
    signal: bool,
    closeness: f64,
    estimates: u32,
}

/// A loaded style model and what estimating with it needs, all allocated at load time.
struct LiveStyle {
    model: StyleModel,
    windower: Windower,
    scratch: EstimateScratch,
    estimate: Estimate,
    category: usize,
}

/// The class a one-vs-rest model is about: the first whose name does not read as "the rest".
fn category_of(classes: &[String]) -> usize {
    let is_rest = |c: &str| {
        let c = c.trim().to_lowercase();
        matches!(c.as_str(), "rest" | "other" | "others" | "the rest")
            || c.starts_with("not ")
            || c.starts_with("non-")
    };
    classes.iter().position(|c| !is_rest(c)).unwrap_or(0)
}

/// Reads a palette file (size-limited by the format), or says why not.
fn load_palette(path: &str) -> Result<Palette, String> {
    let meta = std::fs::metadata(path).map_err(|e| {
        format!("palette file {path} cannot be read ({e}); using the built-in palette")
    })?;
    if meta.len() > weft_engine::palette::MAX_FILE_BYTES {
        return Err(format!(
            "palette file {path} is too large ({} bytes); using the built-in palette",
            meta.len()
        ));
    }
    let bytes = std::fs::read(path).map_err(|e| {
        format!("palette file {path} cannot be read ({e}); using the built-in palette")
    })?;
    Palette::from_bytes(&bytes).map_err(|e| {
        format!(
            "palette file {path} was refused: {}; using the built-in palette",
            chain(&e)
        )
    })
}

/// An error and its sources, in one line, each said once.
fn chain(err: &dyn std::error::Error) -> String {
    weft_engine::error_chain(err)
}

/// Loads a style model for `palette`'s windows, or says why not.
fn load_style(
    path: &str,
    palette: &Palette,
    settings: AnalysisSettings,
) -> Result<LiveStyle, String> {
    let spec = WindowSpec::default();
    if !std::path::Path::new(path).exists() {
        return Err(format!(
            "style model file {path} is no longer there; load it again or choose another"
        ));
    }
    let schema = windows::schema(spec, palette).map_err(|e| chain(&e))?;
    let model = StyleModel::load_for_schema(std::path::Path::new(path), &schema)
        .map_err(|e| format!("style model {path} was refused: {}", chain(&e)))?;
    let windower = Windower::new(spec, settings.sample_rate_hz, settings.framing, palette)
        .map_err(|e| chain(&e))?;
    let category = category_of(model.classes());
    Ok(LiveStyle {
        scratch: EstimateScratch::new(&model),
        estimate: Estimate::new(&model, SNAPSHOT_REASONS),
        windower,
        category,
        model,
    })
}

fn style_labels(path: &str, st: &LiveStyle) -> StyleLabels {
    let m = &st.model;
    let cv = &m.summary().cv;
    StyleLabels {
        path: path.to_owned(),
        classes: m.classes().to_vec(),
        category: st.category,
        features: (0..m.n_features())
            .map(|i| m.feature_name(i).to_owned())
            .collect(),
        model: m.kind().to_string(),
        cv_balanced_error: (cv.track_balanced_error.mean, cv.track_balanced_error.sd),
        tracks: m.summary().tracks,
    }
}

/// Turns frame results into the snapshot's fields and the mix history.
struct FrameState {
    snapshot: Snapshot,
    power: OnePole,
    /// Power-weighted smoothing: numerators (value × power) over the smoothed power.
    centroid_power: OnePole,
    bandwidth_power: OnePole,
    rolloff_power: OnePole,
    flatness: OnePole,
    flux_db: OnePole,
    zcr: OnePole,
    cell: CellSums,
    frames_per_cell: u32,
    mix_cell: MixCellSums,
    frames_per_mix_cell: u32,
    history: MixHistory,
    /// Whether a history cell completed since the last publish.
    history_changed: bool,
    style: Option<LiveStyle>,
    log: Option<SetLog>,
    /// Cells logged since the set log started (its audio time, also when rendering offline).
    log_cells: u64,
    hop_s: f64,
}

impl FrameState {
    fn new(snapshot: Snapshot, hop_s: f64) -> Self {
        Self {
            snapshot,
            power: OnePole::default(),
            centroid_power: OnePole::default(),
            bandwidth_power: OnePole::default(),
            rolloff_power: OnePole::default(),
            flatness: OnePole::default(),
            flux_db: OnePole::default(),
            zcr: OnePole::default(),
            cell: CellSums::default(),
            frames_per_cell: ((LEVEL_HISTORY_CELL_S / hop_s).round() as u32).max(1),
            mix_cell: MixCellSums::default(),
            frames_per_mix_cell: ((MIX_HISTORY_CELL_S / hop_s).round() as u32).max(1),
            history: MixHistory::default(),
            history_changed: false,
            style: None,
            log: None,
            log_cells: 0,
            hop_s,
        }
    }

    fn frame(&mut self, f: &FrameResult, response_ms: f32) {
        let power = 10f64.powf(f64::from(f.level.rms_db) / 10.0);
        self.level_and_timbre(f, power, response_ms);
        self.mix(f, power);
        self.style(f);
        self.mix_history(f, power);
    }

    fn level_and_timbre(&mut self, f: &FrameResult, power: f64, response_ms: f32) {
        let s = &mut self.snapshot;
        let d = &f.descriptors;
        s.frames = f.index + 1;
        s.rms_db = f.level.rms_db;
        s.peak_db = f.level.peak_db;
        s.peak_hold_db = s.peak_hold_db.max(f.level.peak_db);
        let tau_s = f64::from(response_ms.max(1.0)) / 1000.0;
        let a = (-self.hop_s / tau_s).exp();
        let smoothed = self.power.step(power, a);
        s.rms_smoothed_db = amplitude_to_db(smoothed.sqrt());
        let weighted = |pole: &mut OnePole, value: f32| -> f32 {
            let num = pole.step(f64::from(value) * power, a);
            if smoothed > 0.0 {
                (num / smoothed) as f32
            } else {
                0.0
            }
        };
        s.timbre.centroid_hz = weighted(&mut self.centroid_power, d.centroid_hz);
        s.timbre.bandwidth_hz = weighted(&mut self.bandwidth_power, d.bandwidth_hz);
        s.timbre.rolloff_hz = weighted(&mut self.rolloff_power, d.rolloff_hz);
        s.timbre.flatness = self.flatness.step(f64::from(d.flatness), a) as f32;
        s.timbre.flux_db = self.flux_db.step(f64::from(d.flux_db), a) as f32;
        s.timbre.zero_crossings_per_sample =
            self.zcr.step(f64::from(d.zero_crossings_per_sample), a) as f32;

        let c = &mut self.cell;
        c.frames += 1;
        c.power += power;
        c.centroid_power += f64::from(d.centroid_hz) * power;
        c.rolloff_power += f64::from(d.rolloff_hz) * power;
        c.flatness += f64::from(d.flatness);
        c.flux_db += f64::from(d.flux_db);
        if c.frames >= self.frames_per_cell {
            let n = f64::from(c.frames);
            let by_power = |sum: f64| {
                if c.power > 0.0 {
                    (sum / c.power) as f32
                } else {
                    0.0
                }
            };
            let cell = TrendCell {
                rms_db: amplitude_to_db((c.power / n).sqrt()),
                centroid_hz: by_power(c.centroid_power),
                rolloff_hz: by_power(c.rolloff_power),
                flatness: (c.flatness / n) as f32,
                flux_db: (c.flux_db / n) as f32,
            };
            if s.history_len == LEVEL_HISTORY_LEN {
                s.history.copy_within(1.., 0);
                s.history_len -= 1;
            }
            s.history[s.history_len] = cell;
            s.history_len += 1;
            self.cell = CellSums::default();
        }
    }

    fn mix(&mut self, f: &FrameResult, power: f64) {
        if f.shares.updated {
            let mix = &mut self.snapshot.mix;
            mix.updates += 1;
            mix.shares = f.shares.smoothed;
            mix.shares
                .section_shares(&self.snapshot.labels.section_of, &mut mix.sections);
        }
        let raw = &f.shares.raw;
        let c = &mut self.mix_cell;
        if raw.signal {
            c.signal = true;
            for (sum, &share) in c.shares.iter_mut().zip(&raw.share[..raw.families]) {
                *sum += f64::from(share) * power;
            }
            c.unexplained += f64::from(raw.unexplained) * power;
        }
        c.power += power;
    }

    fn style(&mut self, f: &FrameResult) {
        let Some(st) = &mut self.style else {
            return;
        };
        let Some(window) = st.windower.push(f) else {
            return;
        };
        if st
            .model
            .estimate_into(
                window.features,
                st.category,
                &mut st.scratch,
                &mut st.estimate,
            )
            .is_err()
        {
            return;
        }
        let out = &mut self.snapshot.style;
        out.windows += 1;
        out.classes = st.estimate.closeness().len().min(out.closeness.len());
        for (o, &c) in out.closeness.iter_mut().zip(st.estimate.closeness()) {
            *o = c as f32;
        }
        out.reasons = [None; SNAPSHOT_REASONS];
        for (o, r) in out.reasons.iter_mut().zip(st.estimate.reasons()) {
            *o = Some(ReasonReading {
                feature: r.feature,
                push_log_odds: r.push_log_odds as f32,
                relation: r.relation_to_category(),
            });
        }
        let c = &mut self.mix_cell;
        c.closeness += st.estimate.closeness()[st.category];
        c.estimates += 1;
    }

    fn mix_history(&mut self, _f: &FrameResult, _power: f64) {
        self.mix_cell.frames += 1;
        if self.mix_cell.frames < self.frames_per_mix_cell {
            return;
        }
        let c = std::mem::take(&mut self.mix_cell);
        let mut cell = HistoryCell {
            signal: c.signal,
            rms_db: amplitude_to_db((c.power / f64::from(c.frames)).sqrt()),
            ..HistoryCell::default()
        };
        if c.power > 0.0 && c.signal {
            for (o, &sum) in cell.shares.iter_mut().zip(&c.shares) {
                *o = (sum / c.power) as f32;
            }
            cell.unexplained = (c.unexplained / c.power) as f32;
        }
        // Windows come once a second and cells twice: a cell without a new estimate holds
        // the last one (while a model is loaded).
        if c.estimates > 0 {
            cell.closeness = (c.closeness / f64::from(c.estimates)) as f32;
        } else if self.style.is_some() && self.snapshot.style.windows > 0 {
            let last = self
                .history
                .cells()
                .last()
                .map_or(f32::NAN, |h| h.closeness);
            cell.closeness = last;
        }
        self.history.push(cell);
        self.history_changed = true;
        if let Some(log) = &self.log {
            self.log_cells += 1;
            let t = &self.snapshot.timbre;
            let unix_s = std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(0.0, |d| d.as_secs_f64());
            log.push(LogRow {
                time_s: self.log_cells as f64 * f64::from(self.frames_per_mix_cell) * self.hop_s,
                unix_s,
                rms_dbfs: cell.rms_db,
                centroid_hz: t.centroid_hz,
                rolloff_hz: t.rolloff_hz,
                flatness: t.flatness,
                flux_db: t.flux_db,
                shares: cell.shares,
                unexplained: cell.unexplained,
                closeness: cell.closeness,
            });
            self.snapshot.log.rows = log.rows();
        }
    }
}

/// What is loaded now, to compare with what the panel asks for.
struct Loaded {
    palette_path: Option<String>,
    style_path: Option<String>,
    palette: Palette,
}

/// How often the thread looks at the panel's requests, seconds.
const CONTROL_EVERY_S: f64 = 0.25;

/// Brings the analysis in line with the panel's settings: loads a changed palette (a new
/// analyzer) or style model, starts or stops the set log. Allocation is fine here: this is
/// the analysis thread, never the audio thread.
fn apply_controls(
    job: &AnalysisJob,
    loaded: &mut Option<Loaded>,
    analyzer: &mut Analyzer,
    state: &mut FrameState,
    response_ms: f64,
) {
    let Some(wanted) = job.controls.try_settings() else {
        return;
    };
    let mut labels = (*state.snapshot.labels).clone();
    let mut changed = false;
    let palette_changed = loaded
        .as_ref()
        .is_none_or(|l| l.palette_path != wanted.palette_path);
    if palette_changed {
        let (palette, problem) = match &wanted.palette_path {
            Some(path) => match load_palette(path) {
                Ok(p) => (p, None),
                Err(problem) => (Palette::default_palette(), Some(problem)),
            },
            None => (Palette::default_palette(), None),
        };
        let shares = SharesSettings {
            response_ms: response_ms.clamp(0.0, MAX_RESPONSE_MS),
            ..SharesSettings::default()
        };
        match Analyzer::with_palette(job.settings, &palette, shares) {
            Ok(a) => {
                *analyzer = a;
                labels.palette = if problem.is_none() && wanted.palette_path.is_some() {
                    palette.name().to_owned()
                } else {
                    format!("{} (built-in)", palette.name())
                };
                labels.palette_path = wanted.palette_path.clone().filter(|_| problem.is_none());
                labels.families = palette.families().iter().map(|f| f.name.clone()).collect();
                labels.section_of = palette.families().iter().map(|f| f.section).collect();
                labels.sections = palette.sections().to_vec();
                labels.palette_problem = problem;
            }
            Err(e) => {
                labels.palette_problem = Some(format!(
                    "palette cannot be used at {} Hz: {}",
                    job.settings.sample_rate_hz,
                    chain(&e)
                ));
            }
        }
        state.snapshot.mix = MixReading::default();
        state.history = MixHistory::default();
        state.mix_cell = MixCellSums::default();
        state.history_changed = true;
        *loaded = Some(Loaded {
            palette_path: wanted.palette_path.clone(),
            style_path: None,
            palette,
        });
        changed = true;
    }
    let Some(l) = loaded.as_mut() else {
        return;
    };
    if palette_changed || l.style_path != wanted.style_path {
        state.style = None;
        state.snapshot.style = StyleReading::default();
        labels.style = None;
        labels.style_problem = None;
        if let Some(path) = &wanted.style_path {
            match load_style(path, &l.palette, job.settings) {
                Ok(st) => {
                    labels.style = Some(style_labels(path, &st));
                    state.style = Some(st);
                }
                Err(problem) => labels.style_problem = Some(problem),
            }
        }
        l.style_path = wanted.style_path.clone();
        changed = true;
    }
    let recording = job.controls.recording();
    if recording && state.log.is_none() && labels.log_problem.is_none() {
        let folder = wanted
            .log_folder
            .clone()
            .or_else(|| std::env::var("HOME").ok())
            .unwrap_or_else(|| ".".to_owned());
        match SetLog::start(std::path::Path::new(&folder), &labels.families) {
            Ok(log) => {
                labels.log_file = Some(log.path().display().to_string());
                state.log = Some(log);
                state.log_cells = 0;
                state.snapshot.log = LogReading {
                    recording: true,
                    rows: 0,
                };
            }
            Err(e) => {
                labels.log_problem = Some(format!("cannot write a set log in {folder}: {e}"));
            }
        }
        changed = true;
    } else if !recording && (state.log.is_some() || labels.log_problem.is_some()) {
        if let Some(log) = state.log.take() {
            state.snapshot.log.rows = log.rows();
            log.stop();
        }
        state.snapshot.log.recording = false;
        labels.log_problem = None;
        changed = true;
    }
    if let Some(log) = &state.log
        && log.failed()
    {
        labels.log_problem = Some(format!(
            "writing {} failed (disk full or file removed?); the log stopped",
            log.path().display()
        ));
        state.log = None;
        state.snapshot.log.recording = false;
        changed = true;
    }
    if changed {
        let labels = Arc::new(labels);
        state.snapshot.labels = labels.clone();
        state.history.labels = labels;
        state.history_changed = true;
    }
}

fn run(mut job: AnalysisJob, stop: &AtomicBool) -> Publishers {
    let settings = job.settings;
    let hop_s = settings.framing.hop_len as f64 / settings.sample_rate_hz;
    let mut state = FrameState::new(
        Snapshot {
            active: true,
            offline: job.offline,
            sample_rate_hz: settings.sample_rate_hz as f32,
            channels: job.channels,
            ..Snapshot::default()
        },
        hop_s,
    );
    let mut analyzer = Analyzer::new(settings);
    let mut loaded = None;
    let current_response = |job: &AnalysisJob| {
        // State loaded from a file sets the value without a range check (nice-plug 0.4.2),
        // so hold it to the parameter's range (and step) before it reaches the meters.
        job.response_ms
            .preview_plain(job.response_ms.preview_normalized(job.response_ms.value()))
    };
    let mut response_ms = current_response(&job);
    apply_controls(
        &job,
        &mut loaded,
        &mut analyzer,
        &mut state,
        f64::from(response_ms),
    );
    if job.prefill_history {
        prefill(&mut state.history, state.snapshot.labels.families.len());
    }
    let mut mid = vec![0.0_f32; DRAIN_CHUNK];
    let mut side = vec![0.0_f32; DRAIN_CHUNK];
    job.publish.write(state.snapshot.clone());
    publish_history(&mut job, &mut state);
    let mut last_dump = std::time::Instant::now();
    let mut last_control = std::time::Instant::now();
    loop {
        // Read the stop flag before draining, so everything pushed before the stop is analysed.
        let stopping = stop.load(Ordering::Acquire);
        let mut moved = 0;
        loop {
            let n = job.input.consumer.slots().min(DRAIN_CHUNK);
            if n == 0 {
                break;
            }
            let Ok(chunk) = job.input.consumer.read_chunk(n) else {
                break;
            };
            let (a, b) = chunk.as_slices();
            for (i, pair) in a.iter().chain(b).enumerate() {
                mid[i] = pair[0];
                side[i] = pair[1];
            }
            chunk.commit_all();
            let now_ms = current_response(&job);
            if now_ms != response_ms {
                response_ms = now_ms;
                if let Some(est) = analyzer.shares_estimator_mut() {
                    let _ = est.set_response_ms(f64::from(now_ms).clamp(0.0, MAX_RESPONSE_MS));
                }
            }
            analyzer.process(&mid[..n], Some(&side[..n]), |f| state.frame(f, response_ms));
            moved += n;
            if state.history_changed {
                publish_history(&mut job, &mut state);
            }
            if let Some(pause) = job.slow {
                std::thread::sleep(pause);
            }
        }
        if last_control.elapsed().as_secs_f64() >= CONTROL_EVERY_S {
            apply_controls(
                &job,
                &mut loaded,
                &mut analyzer,
                &mut state,
                f64::from(response_ms),
            );
            last_control = std::time::Instant::now();
            if state.history_changed {
                publish_history(&mut job, &mut state);
            }
        }
        if moved > 0
            || stopping
            // New labels (a file loaded) are published even while no audio arrives.
            || !Arc::ptr_eq(&state.snapshot.labels, &job.publish.input_buffer().labels)
        {
            state.snapshot.samples_analysed = analyzer.samples_in();
            state.snapshot.samples_dropped = job.input.dropped.load(Ordering::Relaxed);
            publish_snapshot(&mut job.publish, &state.snapshot);
        }
        if stopping {
            break;
        }
        if let Some(path) = &job.dump_to
            && last_dump.elapsed().as_secs_f64() >= DUMP_EVERY_S
        {
            dump(&state.snapshot, path);
            last_dump = std::time::Instant::now();
        }
        if moved == 0 {
            // Offline the audio thread may be waiting for room: look again sooner.
            let idle = if job.offline { 1 } else { IDLE_SLEEP_MS };
            std::thread::park_timeout(Duration::from_millis(idle));
        }
    }
    if let Some(log) = state.log.take() {
        state.snapshot.log.rows = log.rows();
        log.stop();
    }
    state.snapshot.log.recording = false;
    state.snapshot.active = false;
    if let Some(path) = &job.dump_to {
        dump(&state.snapshot, path);
    }
    publish_snapshot(&mut job.publish, &state.snapshot);
    publish_history(&mut job, &mut state);
    Publishers {
        snapshot: job.publish,
        history: job.history,
    }
}

/// Publishes a snapshot by copying into the triple buffer's free slot (no allocation: the
/// labels are shared by `Arc`).
fn publish_snapshot(publish: &mut triple_buffer::Input<Snapshot>, snapshot: &Snapshot) {
    publish.input_buffer_mut().clone_from(snapshot);
    publish.publish();
}

fn publish_history(job: &mut AnalysisJob, state: &mut FrameState) {
    job.history.input_buffer_mut().copy_from(&state.history);
    job.history.publish();
    state.history_changed = false;
}

/// Writes the snapshot as JSON, atomically (a temporary file renamed into place), so a reader
/// never sees half a file. Best effort, off the audio path: a failed dump only loses the dump.
fn dump(snapshot: &Snapshot, path: &std::path::Path) {
    let Ok(text) = serde_json::to_string_pretty(&snapshot.to_json()) else {
        return;
    };
    let tmp = path.with_extension("json.part");
    if std::fs::write(&tmp, text).is_ok() {
        let _ = std::fs::rename(&tmp, path);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::WeftParams;
    use crate::controls::PanelSettings;
    use std::sync::RwLock;
    use std::time::Instant;
    use weft_engine::evaluation;
    use weft_engine::style::{FeatureMatrix, LabelledWindows, ModelKind, ModelParams};

    const SR: f64 = 48_000.0;

    /// Seeded test material: "bright" tracks are noise over a high tone, "dark" tracks a low
    /// tone with a little noise.
    fn clip(bright: bool, seed: u64, seconds: f64) -> Vec<f32> {
        let mut state = seed | 1;
        (0..(SR * seconds) as usize)
            .map(|i| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let noise = (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
                let t = i as f64 / SR;
                if bright {
                    0.4 * noise + (0.1 * (std::f64::consts::TAU * 3_000.0 * t).sin()) as f32
                } else {
                    (0.4 * (std::f64::consts::TAU * 110.0 * t).sin()) as f32 + 0.01 * noise
                }
            })
            .collect()
    }

    fn settings() -> AnalysisSettings {
        AnalysisSettings::for_sample_rate(SR).expect("valid rate")
    }

    /// Trains a small logistic "bright" vs "rest" model on the engine's windows and saves it.
    fn train_model(path: &std::path::Path) {
        let palette = Palette::default_palette();
        let spec = WindowSpec::default();
        let (mut rows, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
        for track in 0..8 {
            let bright = track % 2 == 0;
            let x = clip(bright, 100 + track as u64, 5.0);
            for w in windows::clip_windows(&palette, spec, SR, &x).expect("windows") {
                rows.push(w.features);
                labels.push(usize::from(!bright));
                tracks.push(track);
            }
        }
        let schema = windows::schema(spec, &palette).expect("schema");
        let data = LabelledWindows::new(
            schema,
            vec!["bright".into(), "rest".into()],
            FeatureMatrix::from_rows(&rows).expect("rows"),
            labels,
            tracks,
            None,
        )
        .expect("data");
        let plan = evaluation::default_folds(&data, 4).expect("folds");
        let params = ModelParams::default_for(ModelKind::Logistic, 7);
        let cv = evaluation::cross_validate(&data, &params, &plan, &mut |_, _| {}).expect("cv");
        StyleModel::fit(&data, &cv)
            .expect("fit")
            .save(path)
            .expect("save");
    }

    struct Run {
        thread: AnalysisThread,
        audio: crate::ring::AudioSide,
        feed: triple_buffer::Output<Snapshot>,
        history: triple_buffer::Output<MixHistory>,
    }

    fn start(controls: Arc<Controls>, offline: bool, capacity: usize) -> Run {
        let (audio, input) = crate::ring::ring(capacity);
        let (publish, feed) = triple_buffer::triple_buffer(&Snapshot::default());
        let (history_in, history) = triple_buffer::triple_buffer(&MixHistory::default());
        let job = AnalysisJob {
            input,
            settings: settings(),
            publish,
            history: history_in,
            channels: 1,
            offline,
            response_ms: WeftParams::default().response_ms.clone(),
            controls,
            dump_to: None,
            slow: None,
            prefill_history: false,
        };
        Run {
            thread: AnalysisThread::start(job).expect("thread"),
            audio,
            feed,
            history,
        }
    }

    fn temp_dir(name: &str) -> std::path::PathBuf {
        let dir = std::env::temp_dir().join(format!("weft-{name}-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&dir);
        std::fs::create_dir_all(&dir).expect("temp dir");
        dir
    }

    #[test]
    fn live_style_closeness_reasons_history_and_set_log() {
        let dir = temp_dir("live-style");
        let model = dir.join("bright.weftstyle");
        train_model(&model);
        let controls = Arc::new(Controls::new(Arc::new(RwLock::new(PanelSettings {
            style_path: Some(model.display().to_string()),
            log_folder: Some(dir.display().to_string()),
            ..PanelSettings::default()
        }))));
        controls.set_recording(true);
        let mut run = start(controls.clone(), true, 1 << 16);
        let mut x = clip(true, 999, 8.0);
        for block in x.chunks_mut(512) {
            run.audio.push_block(&[block], true);
        }
        let mut publishers = run.thread.stop().expect("thread ended cleanly");
        publishers.history.publish();
        let snap = run.feed.read().clone();
        assert_eq!(snap.samples_analysed, x.len() as u64);
        let labels = snap.labels.clone();
        let st = labels.style.as_ref().expect("model loaded");
        assert_eq!(st.classes[st.category], "bright");
        assert!(labels.style_problem.is_none(), "{:?}", labels.style_problem);
        // 8 s of audio: the first window after 3 s, then one a second.
        assert!(snap.style.windows >= 5, "{} windows", snap.style.windows);
        let closeness = snap.style.closeness[st.category];
        assert!(closeness > 0.5, "bright material reads {closeness}");
        assert!(snap.style.reasons.iter().flatten().count() == SNAPSHOT_REASONS);
        for r in snap.style.reasons.iter().flatten() {
            assert!(r.feature < st.features.len());
        }
        // The mix: shares of the default palette, summing to 1 with the unexplained part.
        assert!(snap.mix.updates > 50 && snap.mix.shares.signal);
        let total: f32 = snap.mix.shares.share[..snap.mix.shares.families]
            .iter()
            .sum::<f32>()
            + snap.mix.shares.unexplained;
        assert!((total - 1.0).abs() < 1e-3, "{total}");
        let history = run.history.read();
        assert!((14..=17).contains(&history.len), "{} cells", history.len);
        assert!(
            history
                .cells()
                .iter()
                .rev()
                .take(5)
                .all(|c| c.closeness.is_finite())
        );
        // The set log: closed with the analysis, one row per history cell, closeness filled
        // once estimates exist.
        let log = labels.log_file.as_ref().expect("a log was written");
        let text = std::fs::read_to_string(log).expect("log readable");
        let lines: Vec<&str> = text.lines().collect();
        assert_eq!(lines.len() - 1, history.len, "one row per cell");
        assert!(lines[0].starts_with("time_s,unix_s,rms_dbfs"));
        assert!(lines[0].contains(",share_driven_guitar,"));
        let last: f64 = lines[lines.len() - 1]
            .rsplit(',')
            .next()
            .and_then(|v| v.parse().ok())
            .expect("closeness in the last row");
        assert!((0.0..=1.0).contains(&last));
        // Audio time, not wall time: the offline run took far less than 8 s.
        let t_last: f64 = lines[lines.len() - 1]
            .split(',')
            .next()
            .and_then(|v| v.parse().ok())
            .expect("time in the last row");
        let expected = (lines.len() - 1) as f64 * MIX_HISTORY_CELL_S;
        assert!(
            (t_last - expected).abs() < 0.05 * expected,
            "{t_last} vs {expected}"
        );
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn a_vanished_model_file_is_reported_and_nothing_else_is_lost() {
        let dir = temp_dir("vanished");
        let controls = Arc::new(Controls::new(Arc::new(RwLock::new(PanelSettings {
            style_path: Some(dir.join("gone.weftstyle").display().to_string()),
            palette_path: Some(dir.join("not-a-palette.weftpal").display().to_string()),
            ..PanelSettings::default()
        }))));
        std::fs::write(dir.join("not-a-palette.weftpal"), b"not a palette").expect("write");
        let mut run = start(controls, true, 1 << 16);
        let mut x = clip(false, 5, 2.0);
        for block in x.chunks_mut(1000) {
            run.audio.push_block(&[block], true);
        }
        run.thread.stop().expect("thread ended cleanly");
        let snap = run.feed.read().clone();
        let problem = snap.labels.style_problem.as_deref().unwrap_or("");
        assert!(problem.contains("no longer there"), "{problem}");
        let problem = snap.labels.palette_problem.as_deref().unwrap_or("");
        assert!(
            problem.contains("refused") && problem.contains("built-in"),
            "{problem}"
        );
        // The built-in palette took over: shares still come.
        assert!(snap.mix.updates > 10 && snap.labels.families.len() == 16);
        assert_eq!(snap.samples_analysed, x.len() as u64);
        let _ = std::fs::remove_dir_all(&dir);
    }

    #[test]
    fn a_panel_holding_its_settings_never_stalls_the_analysis() {
        // A deliberately slow panel: it holds the settings' write lock (as during an edit) for
        // the whole run. The analysis only ever try_reads them, so it keeps draining.
        let controls = Arc::new(Controls::default());
        let mut run = start(controls.clone(), false, 1 << 18);
        let guard = controls.settings.write().expect("lock");
        let mut x = clip(true, 3, 4.0);
        for block in x.chunks_mut(512) {
            run.audio.push_block(&[block], false);
        }
        let deadline = Instant::now() + Duration::from_secs(60);
        let mut analysed = 0;
        while Instant::now() < deadline {
            analysed = run.feed.read().samples_analysed;
            if analysed == x.len() as u64 {
                break;
            }
            std::thread::sleep(Duration::from_millis(5));
        }
        assert_eq!(
            analysed,
            x.len() as u64,
            "analysis stalled behind the panel"
        );
        assert_eq!(run.audio.dropped(), 0);
        drop(guard);
        run.thread.stop().expect("thread ended cleanly");
    }

    #[test]
    fn palette_and_style_model_swap_during_playback() {
        let dir = temp_dir("hot-swap");
        let model = dir.join("bright.weftstyle");
        train_model(&model);
        // The built-in palette's content, from a file: the model stays valid after the swap.
        let palette_file = dir.join("copy.weftpal");
        std::fs::write(&palette_file, Palette::default_palette().to_bytes()).expect("write");
        let controls = Arc::new(Controls::default());
        let mut run = start(controls.clone(), true, 1 << 16);
        let push = |run: &mut Run, seconds: f64, seed: u64| {
            let mut x = clip(true, seed, seconds);
            for block in x.chunks_mut(512) {
                run.audio.push_block(&[block], true);
            }
        };
        let settle = || std::thread::sleep(Duration::from_secs_f64(3.0 * CONTROL_EVERY_S));
        push(&mut run, 2.0, 1);
        settle();
        assert!(run.feed.read().labels.style.is_none());
        controls.update(|s| s.style_path = Some(model.display().to_string()));
        settle();
        push(&mut run, 5.0, 2);
        settle();
        let snap = run.feed.read().clone();
        assert!(
            snap.labels.style.is_some(),
            "{:?}",
            snap.labels.style_problem
        );
        let windows_before = snap.style.windows;
        assert!(windows_before >= 2, "{windows_before} windows");
        controls.update(|s| s.palette_path = Some(palette_file.display().to_string()));
        settle();
        push(&mut run, 5.0, 3);
        settle();
        let snap = run.feed.read().clone();
        assert_eq!(snap.labels.palette_path.as_deref(), palette_file.to_str());
        assert!(snap.labels.palette_problem.is_none());
        assert!(
            snap.labels.style.is_some(),
            "{:?}",
            snap.labels.style_problem
        );
        assert!(
            snap.style.windows >= 2,
            "estimates go on after the palette swap"
        );
        assert!(snap.mix.updates > 20);
        controls.update(|s| s.style_path = None);
        settle();
        push(&mut run, 1.0, 4);
        run.thread.stop().expect("thread ended cleanly");
        let snap = run.feed.read().clone();
        assert!(snap.labels.style.is_none() && snap.labels.style_problem.is_none());
        assert_eq!(snap.samples_dropped, 0);
        let _ = std::fs::remove_dir_all(&dir);
    }
}
