//! The analysis thread: drains the ring into the engine's [`Analyzer`] and publishes snapshots.
//!
//! Started by `activate()`, stopped and joined by `deactivate()`. It owns everything it works on;
//! the only shared state is the ring, the drop counter, the response-time parameter (an atomic
//! read) and the snapshot triple buffer.

use crate::ring::AnalysisSide;
use crate::snapshot::{LEVEL_HISTORY_CELL_S, LEVEL_HISTORY_LEN, Snapshot};
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

/// Turns frame results into the snapshot's level fields.
struct LevelState {
    snapshot: Snapshot,
    smoothed_power: f64,
    cell_power: f64,
    cell_frames: u32,
    frames_per_cell: u32,
    hop_s: f64,
}

impl LevelState {
    fn frame(&mut self, f: &FrameResult, response_ms: f32) {
        let s = &mut self.snapshot;
        s.frames = f.index + 1;
        s.rms_db = f.level.rms_db;
        s.peak_db = f.level.peak_db;
        s.peak_hold_db = s.peak_hold_db.max(f.level.peak_db);
        let power = 10f64.powf(f64::from(f.level.rms_db) / 10.0);
        // One-pole smoothing of power with time constant `response_ms` (common practice for meters).
        let tau_s = f64::from(response_ms.max(1.0)) / 1000.0;
        let a = (-self.hop_s / tau_s).exp();
        self.smoothed_power = a * self.smoothed_power + (1.0 - a) * power;
        s.rms_smoothed_db = amplitude_to_db(self.smoothed_power.sqrt());
        self.cell_power += power;
        self.cell_frames += 1;
        if self.cell_frames >= self.frames_per_cell {
            let mean = self.cell_power / f64::from(self.cell_frames);
            if s.level_history_len == LEVEL_HISTORY_LEN {
                s.level_history_db.copy_within(1.., 0);
                s.level_history_len -= 1;
            }
            s.level_history_db[s.level_history_len] = amplitude_to_db(mean.sqrt());
            s.level_history_len += 1;
            self.cell_power = 0.0;
            self.cell_frames = 0;
        }
    }
}

fn run(mut job: AnalysisJob, stop: &AtomicBool) -> triple_buffer::Input<Snapshot> {
    let settings = job.analyzer.settings();
    let hop_s = settings.framing.hop_len as f64 / settings.sample_rate_hz;
    let mut state = LevelState {
        snapshot: Snapshot {
            active: true,
            offline: job.offline,
            sample_rate_hz: settings.sample_rate_hz as f32,
            channels: job.channels,
            ..Snapshot::default()
        },
        smoothed_power: 0.0,
        cell_power: 0.0,
        cell_frames: 0,
        frames_per_cell: ((LEVEL_HISTORY_CELL_S / hop_s).round() as u32).max(1),
        hop_s,
    };
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
