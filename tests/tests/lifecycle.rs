//! The built plugin's lifecycle in a real CLAP host (see `weft_tests`):
//!
//! - sample rate, block size and channel layout change between activations of one instance, and
//!   each activation measures its own signal exactly;
//! - 1 000 deactivate/activate cycles: every one accounts for its samples, and no thread is left
//!   behind;
//! - 16 instances in one process, processing interleaved block by block: each reads its own
//!   signal, none drops, and all their threads end with them.
//!
//! Needs the bundle: run `cargo xtask bundle weft` first (the tests fail, never skip, without it).

use std::collections::BTreeMap;
use std::f64::consts::TAU;
use std::sync::{Mutex, MutexGuard, PoisonError};
use std::time::Instant;
use weft_tests::{Settings, Snapshot, WeftPlugin, describe};

/// Tolerance of the level readings against the closed form, dB (as the host grid's).
const LEVEL_TOLERANCE_DB: f64 = 0.05;
/// Activation cycles of the loop test.
const CYCLES: usize = 1_000;

fn new_plugin() -> WeftPlugin {
    WeftPlugin::new().unwrap_or_else(|err| panic!("cannot create the plugin: {}", describe(&err)))
}

/// The tests of this file, whose harness threads carry their names.
const TEST_NAMES: [&str; 3] = [
    "sample_rate_block_size_and_layout_change_between_activations",
    "a_thousand_activations_account_for_every_sample_and_leave_no_thread",
    "sixteen_instances_interleaved_each_read_their_own_signal",
];

/// Serialises the tests of this file: each counts the process's threads.
static ONE_AT_A_TIME: Mutex<()> = Mutex::new(());

fn one_at_a_time() -> MutexGuard<'static, ()> {
    ONE_AT_A_TIME.lock().unwrap_or_else(PoisonError::into_inner)
}

/// Threads of this process (Linux: entries of `/proc/self/task`) other than the test harness's
/// (named after the tests, truncated to 15 bytes by the kernel), which come and go on their own:
/// thread id → name.
fn threads() -> BTreeMap<String, String> {
    let tasks = std::fs::read_dir("/proc/self/task")
        .unwrap_or_else(|err| panic!("cannot list /proc/self/task: {err}"));
    tasks
        .flatten()
        .filter_map(|task| {
            let comm = std::fs::read_to_string(task.path().join("comm")).unwrap_or_default();
            let comm = comm.trim_end().to_owned();
            let harness = !comm.is_empty() && TEST_NAMES.iter().any(|t| t.starts_with(&comm));
            (!harness).then(|| (task.file_name().to_string_lossy().into_owned(), comm))
        })
        .collect()
}

/// Threads in `after` that were not in `before` (a thread left behind), as "id name" lines. A
/// thread that existed before and has ended since is not a leak: another test's or the
/// runtime's.
fn left_behind(before: &BTreeMap<String, String>, after: &BTreeMap<String, String>) -> Vec<String> {
    after
        .iter()
        .filter(|(id, _)| !before.contains_key(*id))
        .map(|(id, name)| format!("{id} {name}"))
        .collect()
}

/// The analysis thread's name (`plugin/src/analysis.rs`).
const ANALYSIS_THREAD: &str = "weft-analysis";

/// Threads of this process named `name`.
fn named_threads(name: &str) -> usize {
    let tasks = std::fs::read_dir("/proc/self/task")
        .unwrap_or_else(|err| panic!("cannot list /proc/self/task: {err}"));
    tasks
        .flatten()
        .filter(|task| {
            std::fs::read_to_string(task.path().join("comm")).is_ok_and(|c| c.trim_end() == name)
        })
        .count()
}

/// One activation of a new instance, so that what the plugin creates once per process (the
/// library, nice-plug's background worker thread) exists before threads are counted.
fn warm_up() -> WeftPlugin {
    let warm = Settings {
        sample_rate_hz: 48_000.0,
        max_block: 64,
        channels: 2,
        offline: true,
    };
    let (plugin, _, _) = Running::start(new_plugin(), warm, "warm-up").stop("warm-up");
    plugin
}

/// Sine sample `n` at `rate_hz`.
fn sine(amplitude: f64, freq_hz: f64, rate_hz: f64, n: usize) -> f32 {
    (amplitude * (TAU * freq_hz * n as f64 / rate_hz).sin()) as f32
}

/// The frequency with exactly `periods` periods in 2048 samples at `rate_hz`, Hz: a whole
/// number of periods in every analysis frame (2048, 4096 or 8192 samples, `FrameConfig::
/// for_sample_rate` in `engine/src/frames.rs`).
fn bin_hz(periods: usize, rate_hz: f64) -> f64 {
    periods as f64 * rate_hz / 2048.0
}

/// RMS of a sine of peak `amplitude`, dBFS: A/√2 (closed form).
fn sine_rms_db(amplitude: f64) -> f64 {
    20.0 * (amplitude / std::f64::consts::SQRT_2).log10()
}

/// An active instance with its buffers and the frames it has processed.
struct Running {
    plugin: WeftPlugin,
    settings: Settings,
    inputs: Vec<Vec<f32>>,
    outputs: Vec<Vec<f32>>,
    processed: usize,
}

impl Running {
    fn start(mut plugin: WeftPlugin, settings: Settings, what: &str) -> Self {
        plugin
            .activate(settings)
            .unwrap_or_else(|err| panic!("[{what}] activation failed: {}", describe(&err)));
        let make = || vec![vec![0.0_f32; settings.max_block as usize]; settings.channels as usize];
        Self {
            plugin,
            settings,
            inputs: make(),
            outputs: make(),
            processed: 0,
        }
    }

    /// Processes `len` frames of a sine on every channel and checks the pass-through.
    fn sine_block(&mut self, len: usize, amplitude: f64, freq_hz: f64, what: &str) {
        let rate = self.settings.sample_rate_hz;
        for input in &mut self.inputs {
            for (i, x) in input[..len].iter_mut().enumerate() {
                *x = sine(amplitude, freq_hz, rate, self.processed + i);
            }
        }
        for output in &mut self.outputs {
            output[..len].fill(f32::NAN);
        }
        let mut inputs: Vec<&mut [f32]> = self.inputs.iter_mut().map(|b| &mut b[..len]).collect();
        let mut outputs: Vec<&mut [f32]> = self.outputs.iter_mut().map(|b| &mut b[..len]).collect();
        self.plugin
            .process(&mut inputs, &mut outputs)
            .unwrap_or_else(|err| panic!("[{what}] process failed: {}", describe(&err)));
        for (input, output) in self.inputs.iter().zip(&self.outputs) {
            let same = input[..len]
                .iter()
                .zip(&output[..len])
                .all(|(a, b)| a.to_bits() == b.to_bits());
            assert!(same, "[{what}] the audio did not pass through unchanged");
        }
        self.processed += len;
    }

    /// Processes `total` frames of a sine in blocks of the maximum size.
    fn sine_for(&mut self, total: usize, amplitude: f64, freq_hz: f64, what: &str) {
        let block = self.settings.max_block as usize;
        let mut done = 0;
        while done < total {
            let len = block.min(total - done);
            self.sine_block(len, amplitude, freq_hz, what);
            done += len;
        }
    }

    fn stop(mut self, what: &str) -> (WeftPlugin, Snapshot, usize) {
        let snapshot = self
            .plugin
            .deactivate()
            .unwrap_or_else(|err| panic!("[{what}] deactivation failed: {}", describe(&err)));
        (self.plugin, snapshot, self.processed)
    }
}

/// The snapshot of an offline run of a sine: every sample analysed, none dropped, the level of
/// the sine, and every reading a number.
fn assert_offline_sine(
    s: &Snapshot,
    settings: Settings,
    processed: usize,
    amplitude: f64,
    what: &str,
) {
    assert!(s.offline, "[{what}] reported realtime: {s:?}");
    assert_eq!(
        s.sample_rate_hz, settings.sample_rate_hz as f32,
        "[{what}] {s:?}"
    );
    assert_eq!(s.channels, settings.channels, "[{what}] {s:?}");
    assert_eq!(
        s.samples_dropped, 0,
        "[{what}] offline must not drop: {s:?}"
    );
    assert_eq!(
        s.samples_analysed, processed as u64,
        "[{what}] offline must analyse every sample: {s:?}"
    );
    let expected = sine_rms_db(amplitude);
    assert!(
        (f64::from(s.rms_db) - expected).abs() <= LEVEL_TOLERANCE_DB,
        "[{what}] RMS {} dBFS, expected {expected:.3} (a sine of peak {amplitude}): {s:?}",
        s.rms_db
    );
    for v in [s.rms_db, s.peak_db, s.rms_smoothed_db, s.peak_hold_db] {
        assert!(v.is_finite(), "[{what}] {s:?}");
    }
}

#[test]
fn sample_rate_block_size_and_layout_change_between_activations() {
    let _serial = one_at_a_time();
    let start = Instant::now();
    // Each step differs from the one before in rate, block size or channels; amplitudes differ
    // too, so a reading left over from the previous activation cannot pass.
    let steps: [(f64, u32, u32, f64); 8] = [
        (44_100.0, 512, 2, 0.5),
        (96_000.0, 64, 1, 0.25),
        (48_000.0, 4_096, 2, 0.125),
        (192_000.0, 333, 2, 0.7),
        (8_000.0, 1, 1, 0.3),
        (48_000.0, 16_384, 1, 0.05),
        (22_050.0, 128, 2, 0.9),
        (44_100.0, 512, 2, 0.2),
    ];
    let mut plugin = new_plugin();
    for (i, &(rate, block, channels, amplitude)) in steps.iter().enumerate() {
        let settings = Settings {
            sample_rate_hz: rate,
            max_block: block,
            channels,
            offline: true,
        };
        let what = format!("step {i}: {rate} Hz, block {block}, {channels} ch");
        let mut running = Running::start(plugin, settings, &what);
        // 0.6 s (at least 4 blocks) of a sine with a whole number of periods in every analysis
        // frame (frames are multiples of 2048 samples), so each frame's RMS is the closed form.
        let total = ((0.6 * rate) as usize).max(4 * block as usize);
        running.sine_for(total, amplitude, bin_hz(46, rate), &what);
        let (back, snapshot, processed) = running.stop(&what);
        plugin = back;
        assert_offline_sine(&snapshot, settings, processed, amplitude, &what);
    }
    println!(
        "{} activations with changed rate, block and layout: each analysed all its samples at \
         its own rate and read its own sine's level; {:.1} s",
        steps.len(),
        start.elapsed().as_secs_f64()
    );
}

#[test]
fn a_thousand_activations_account_for_every_sample_and_leave_no_thread() {
    let _serial = one_at_a_time();
    let start = Instant::now();
    let mut plugin = warm_up();
    let threads_before = threads();
    let mut samples = 0_u64;
    for cycle in 0..CYCLES {
        // Alternate rate, block, layout and render mode, with a few samples per activation.
        let settings = Settings {
            sample_rate_hz: [44_100.0, 48_000.0, 96_000.0][cycle % 3],
            max_block: [64, 256][cycle % 2],
            channels: [2, 1][(cycle / 2) % 2],
            offline: cycle % 5 != 0,
        };
        let what = format!("cycle {cycle}, {settings:?}");
        let mut running = Running::start(plugin, settings, &what);
        let frames = 3 * settings.max_block as usize - cycle % 7;
        running.sine_for(frames, 0.25, 440.0, &what);
        let (back, s, processed) = running.stop(&what);
        plugin = back;
        assert_eq!(
            s.samples_analysed + s.samples_dropped,
            processed as u64,
            "[{what}] analysed + dropped must equal processed: {s:?}"
        );
        if settings.offline {
            assert_eq!(s.samples_dropped, 0, "[{what}] offline dropped: {s:?}");
        }
        assert_eq!(s.sample_rate_hz, settings.sample_rate_hz as f32, "[{what}]");
        assert!(
            !s.active,
            "[{what}] the final snapshot says the analysis still runs"
        );
        samples += processed as u64;
    }
    let threads_after = threads();
    let left = left_behind(&threads_before, &threads_after);
    assert!(
        left.is_empty(),
        "threads left behind by the {CYCLES} activations: {left:?}"
    );
    let threads_before = threads_before.len();
    println!(
        "{CYCLES} activations ({samples} frames): every sample accounted for, no thread \
         left behind ({threads_before} before); {:.1} s",
        start.elapsed().as_secs_f64()
    );
}

#[test]
fn sixteen_instances_interleaved_each_read_their_own_signal() {
    let _serial = one_at_a_time();
    const INSTANCES: usize = 16;
    let start = Instant::now();
    warm_up();
    let threads_before = threads();
    let mut running: Vec<(Running, f64, f64)> = (0..INSTANCES)
        .map(|i| {
            // Distinct block sizes give distinct snapshot names (see `SnapshotClaim`).
            let settings = Settings {
                sample_rate_hz: [44_100.0, 48_000.0][i % 2],
                max_block: 256 + 16 * i as u32,
                channels: [2, 1][(i / 2) % 2],
                offline: true,
            };
            // Amplitudes 1 dB apart: a mixed-up signal reads far outside the tolerance.
            let amplitude = 0.5 * 10f64.powf(-(i as f64) / 20.0);
            let freq_hz = bin_hz(10 + 3 * i, settings.sample_rate_hz);
            let what = format!("instance {i}");
            (
                Running::start(new_plugin(), settings, &what),
                amplitude,
                freq_hz,
            )
        })
        .collect();
    // A new thread carries its parent's name until it names itself: wait for the names.
    let deadline = Instant::now() + std::time::Duration::from_secs(5);
    let mut analysis_threads = named_threads(ANALYSIS_THREAD);
    while analysis_threads < INSTANCES && Instant::now() < deadline {
        std::thread::sleep(std::time::Duration::from_millis(10));
        analysis_threads = named_threads(ANALYSIS_THREAD);
    }
    assert_eq!(
        analysis_threads, INSTANCES,
        "{INSTANCES} active instances should each run one analysis thread"
    );
    let threads_active = threads().len();
    // One second of audio each, one block per instance in turn.
    let mut round = 0;
    loop {
        let mut more = false;
        for (i, (r, amplitude, freq_hz)) in running.iter_mut().enumerate() {
            let total = r.settings.sample_rate_hz as usize;
            if r.processed < total {
                let len = (r.settings.max_block as usize).min(total - r.processed);
                r.sine_block(
                    len,
                    *amplitude,
                    *freq_hz,
                    &format!("instance {i}, round {round}"),
                );
                more = true;
            }
        }
        if !more {
            break;
        }
        round += 1;
    }
    for (i, (r, amplitude, _)) in running.into_iter().enumerate() {
        let settings = r.settings;
        let what = format!("instance {i}, {settings:?}");
        let (_plugin, s, processed) = r.stop(&what);
        assert_offline_sine(&s, settings, processed, amplitude, &what);
    }
    let threads_after = threads();
    let left = left_behind(&threads_before, &threads_after);
    assert!(
        left.is_empty(),
        "threads left behind by the instances: {left:?}"
    );
    let (threads_before, threads_after) = (threads_before.len(), threads_after.len());
    println!(
        "{INSTANCES} instances, {round} interleaved rounds: each analysed its own sine at its own \
         level, none dropped; threads {threads_before} → {threads_active} → {threads_after}; \
         {:.1} s",
        start.elapsed().as_secs_f64()
    );
}
