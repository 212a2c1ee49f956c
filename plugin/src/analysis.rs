//! The analysis thread: drains the ring into the engine's [`Analyzer`] and publishes snapshots.
//!
//! Started by `activate()`, stopped and joined by `deactivate()`. It owns everything it works on;
//! the only shared state is the ring, the drop counter, the response-time parameter (an atomic
//! read) and the snapshot triple buffer.

use crate::ring::AnalysisSide;
use crate::snapshot::{LEVEL_HISTORY_CELL_S, LEVEL_HISTORY_LEN, Snapshot, TrendCell};
use nice_plug::prelude::Param;
use std::path::PathBuf;
use std::sync::Arc;
use std::sync::atomic::{AtomicBool, Ordering};
use std::thread::JoinHandle;
use std::time::Duration;
use weft_engine::level::amplitude_to_db;
use weft_engine::{Analyzer, FrameResult};

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

/// The pause [`SLOW_ANALYSIS_ENV`] asks for.
pub fn slow_analysis_from_env() -> Option<Duration> {
    let us: u64 = std::env::var(SLOW_ANALYSIS_ENV).ok()?.trim().parse().ok()?;
    (us > 0).then(|| Duration::from_micros(us.min(MAX_SLOW_ANALYSIS_US)))
}

/// What a running analysis needs, handed over at activation.
pub struct AnalysisJob {
    /// The reading half of the ring.
    pub input: AnalysisSide,
    /// The engine, already built for this sample rate.
    pub analyzer: Analyzer,
    /// Where snapshots go.
    pub publish: triple_buffer::Input<Snapshot>,
    /// Main input channels.
    pub channels: u32,
    /// Whether the host renders offline.
    pub offline: bool,
    /// The level meter's response time, ms (read live from the parameter).
    pub response_ms: Arc<nice_plug::prelude::FloatParam>,
    /// Where to write the final snapshot, if anywhere.
    pub dump_to: Option<PathBuf>,
    /// A pause after every drained chunk (tests of a starved analysis, [`SLOW_ANALYSIS_ENV`]).
    pub slow: Option<Duration>,
}

/// A running analysis thread.
pub struct AnalysisThread {
    stop: Arc<AtomicBool>,
    handle: JoinHandle<triple_buffer::Input<Snapshot>>,
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

    /// Asks the thread to finish what is in the ring, waits for it, and returns the snapshot
    /// publisher for the next run. `None` if the thread panicked.
    pub fn stop(self) -> Option<triple_buffer::Input<Snapshot>> {
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

/// Turns frame results into the snapshot's level and timbre fields.
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
            hop_s,
        }
    }

    fn frame(&mut self, f: &FrameResult, response_ms: f32) {
        let s = &mut self.snapshot;
        let d = &f.descriptors;
        s.frames = f.index + 1;
        s.rms_db = f.level.rms_db;
        s.peak_db = f.level.peak_db;
        s.peak_hold_db = s.peak_hold_db.max(f.level.peak_db);
        let power = 10f64.powf(f64::from(f.level.rms_db) / 10.0);
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
}

fn run(mut job: AnalysisJob, stop: &AtomicBool) -> triple_buffer::Input<Snapshot> {
    let settings = job.analyzer.settings();
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
    let mut mid = vec![0.0_f32; DRAIN_CHUNK];
    let mut side = vec![0.0_f32; DRAIN_CHUNK];
    job.publish.write(state.snapshot);
    let mut last_dump = std::time::Instant::now();
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
            // State loaded from a file sets the value without a range check (nice-plug 0.4.2),
            // so hold it to the parameter's range (and step) before it reaches the meter.
            let response_ms = job
                .response_ms
                .preview_plain(job.response_ms.preview_normalized(job.response_ms.value()));
            job.analyzer
                .process(&mid[..n], Some(&side[..n]), |f| state.frame(f, response_ms));
            moved += n;
            if let Some(pause) = job.slow {
                std::thread::sleep(pause);
            }
        }
        if moved > 0 || stopping {
            state.snapshot.samples_analysed = job.analyzer.samples_in();
            state.snapshot.samples_dropped = job.input.dropped.load(Ordering::Relaxed);
            job.publish.write(state.snapshot);
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
    state.snapshot.active = false;
    if let Some(path) = &job.dump_to {
        dump(&state.snapshot, path);
    }
    job.publish.write(state.snapshot);
    job.publish
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
