//! A starved analysis thread, through the built plugin in a real CLAP host (see `weft_tests`).
//!
//! The plugin's test hook `WEFT_TEST_ANALYSIS_DELAY_US` (read at every activation,
//! `plugin/src/analysis.rs`) makes its analysis thread pause after every chunk it drains. With it:
//!
//! - in realtime mode the audio thread keeps its timing: its `process()` calls take no longer
//!   than without the pause (a ratio, measured in the same run), because it drops instead of
//!   waiting; the drops are counted and analysed + dropped = processed;
//! - once the host's flood stops, the analysis catches up (analysed + dropped = processed while
//!   the plugin is still active), and at real-time pace afterwards nothing more is dropped.
//!
//! One test in this file, its own process: it changes the environment between activations,
//! which is sound only while no other thread of the process reads it.
//!
//! Needs the bundle: run `cargo xtask bundle weft` first (the tests fail, never skip, without it).

use std::time::{Duration, Instant};
use weft_tests::{Settings, Snapshot, WeftPlugin, describe, snapshot_dir};

/// The plugin's test hook (`plugin/src/analysis.rs`, `SLOW_ANALYSIS_ENV`).
const SLOW_ANALYSIS_ENV: &str = "WEFT_TEST_ANALYSIS_DELAY_US";
/// A pause that starves the analysis: after every 4096-sample chunk, 0.2 s, so it can take at
/// most ≈ 20 k samples/s, under half of 48 kHz.
const STARVED_DELAY_US: u64 = 200_000;
/// A moderate pause: the analysis is slower than a flooding host but far faster than real time
/// (≤ 4096 samples per 2 ms + the analysis itself).
const MODERATE_DELAY_US: u64 = 2_000;
/// Blocks of each flood.
const FLOOD_BLOCKS: usize = 3_000;
/// The host's settings: realtime, 48 kHz stereo, blocks of 512.
const SETTINGS: Settings = Settings {
    sample_rate_hz: 48_000.0,
    max_block: 512,
    channels: 2,
    offline: false,
};
/// How much slower the audio thread's calls may get when the analysis is starved (a high
/// percentile of the call time, starved ÷ unstarved, same run). A plugin that waited for the
/// analysis would take ≥ the 0.2 s pause per call once the ring is full: thousands of times.
const MAX_SLOWDOWN: f64 = 5.0;
/// The percentile compared: the worst 0.5 % of calls are scheduler preemptions on a shared
/// 2-core machine, not the plugin.
const PERCENTILE: f64 = 0.995;
/// Seed of the test signal; printed on failure.
const SEED: u64 = 0x57A2_0008;

#[allow(unsafe_code)]
fn set_delay(us: u64) {
    // SAFETY: called only between activations (no analysis thread runs) from this file's only
    // test, so no other thread of this process reads the environment meanwhile.
    unsafe { std::env::set_var(SLOW_ANALYSIS_ENV, us.to_string()) };
}

/// The host side of one activation: the plugin, its buffers and what it has processed.
struct Host {
    plugin: WeftPlugin,
    inputs: Vec<Vec<f32>>,
    outputs: Vec<Vec<f32>>,
    processed: u64,
    state: u64,
}

impl Host {
    fn new() -> Self {
        let plugin = WeftPlugin::new()
            .unwrap_or_else(|err| panic!("cannot create the plugin: {}", describe(&err)));
        let make = || vec![vec![0.0_f32; SETTINGS.max_block as usize]; 2];
        Self {
            plugin,
            inputs: make(),
            outputs: make(),
            processed: 0,
            state: SEED,
        }
    }

    fn activate(&mut self, delay_us: u64) {
        set_delay(delay_us);
        self.processed = 0;
        self.plugin
            .activate(SETTINGS)
            .unwrap_or_else(|err| panic!("activation failed: {}", describe(&err)));
    }

    /// One block of seeded noise; returns the call's duration.
    fn block(&mut self) -> Duration {
        for input in &mut self.inputs {
            for x in input.iter_mut() {
                // xorshift64 (G. Marsaglia, "Xorshift RNGs", 2003).
                self.state ^= self.state << 13;
                self.state ^= self.state >> 7;
                self.state ^= self.state << 17;
                *x = (self.state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
            }
        }
        let mut inputs: Vec<&mut [f32]> = self.inputs.iter_mut().map(|b| &mut b[..]).collect();
        let mut outputs: Vec<&mut [f32]> = self.outputs.iter_mut().map(|b| &mut b[..]).collect();
        let start = Instant::now();
        self.plugin
            .process(&mut inputs, &mut outputs)
            .unwrap_or_else(|err| panic!("process failed: {} (seed {SEED:#x})", describe(&err)));
        let took = start.elapsed();
        assert!(
            self.inputs[0] == self.outputs[0] && self.inputs[1] == self.outputs[1],
            "the audio did not pass through (seed {SEED:#x})"
        );
        self.processed += u64::from(SETTINGS.max_block);
        took
    }

    /// Blocks as fast as the host can; returns the call durations, sorted.
    fn flood(&mut self, blocks: usize) -> Vec<Duration> {
        let mut times: Vec<Duration> = (0..blocks).map(|_| self.block()).collect();
        times.sort_unstable();
        times
    }

    /// Blocks at real-time pace for `seconds`.
    fn real_time(&mut self, seconds: f64) {
        let period =
            Duration::from_secs_f64(f64::from(SETTINGS.max_block) / SETTINGS.sample_rate_hz);
        let start = Instant::now();
        let blocks = (seconds / period.as_secs_f64()).round() as u32;
        for b in 0..blocks {
            self.block();
            let next = start + period * (b + 1);
            if let Some(wait) = next.checked_duration_since(Instant::now()) {
                std::thread::sleep(wait);
            }
        }
    }

    /// The snapshot the running analysis last dumped (it rewrites it every second).
    fn running_snapshot(&self) -> Option<Snapshot> {
        let dir = snapshot_dir().ok()?;
        let text = std::fs::read_to_string(dir.join(SETTINGS.snapshot_file_name())).ok()?;
        serde_json::from_str(&text).ok()
    }

    fn deactivate(&mut self) -> Snapshot {
        self.plugin
            .deactivate()
            .unwrap_or_else(|err| panic!("deactivation failed: {}", describe(&err)))
    }
}

fn percentile(sorted: &[Duration]) -> Duration {
    let i = ((sorted.len() as f64 * PERCENTILE) as usize).min(sorted.len() - 1);
    sorted[i]
}

#[test]
fn a_starved_analysis_never_slows_the_audio_thread_and_catches_up() {
    let start = Instant::now();
    let mut host = Host::new();

    // 1. Unstarved: the reference call times.
    host.activate(0);
    let free = host.flood(FLOOD_BLOCKS);
    let s = host.deactivate();
    assert_eq!(
        s.samples_analysed + s.samples_dropped,
        host.processed,
        "unstarved: analysed + dropped must equal processed: {s:?}"
    );

    // 2. Starved: the audio thread drops instead of waiting, and counts every sample.
    host.activate(STARVED_DELAY_US);
    let starved = host.flood(FLOOD_BLOCKS);
    let s = host.deactivate();
    assert!(
        s.samples_dropped > 0,
        "a starved analysis must make the ring overflow: {s:?}"
    );
    assert_eq!(
        s.samples_analysed + s.samples_dropped,
        host.processed,
        "starved: analysed + dropped must equal processed: {s:?}"
    );
    let (p_free, p_starved) = (percentile(&free), percentile(&starved));
    let ratio = p_starved.as_secs_f64() / p_free.as_secs_f64().max(1e-9);
    println!(
        "audio thread, {FLOOD_BLOCKS} blocks of {}: {:.1}th percentile call {:?} unstarved, {:?} \
         starved (ratio {ratio:.2}); max {:?} and {:?}; starved run dropped {} of {} samples",
        SETTINGS.max_block,
        PERCENTILE * 100.0,
        p_free,
        p_starved,
        free[free.len() - 1],
        starved[starved.len() - 1],
        s.samples_dropped,
        host.processed
    );
    assert!(
        ratio <= MAX_SLOWDOWN,
        "the audio thread's calls got {ratio:.1}× slower with a starved analysis \
         ({p_free:?} → {p_starved:?} at the {PERCENTILE} quantile)"
    );

    // 3. Moderately slow: flood (drops), pause until the analysis has caught up, then real-time
    //    pace drops nothing more.
    host.activate(MODERATE_DELAY_US);
    host.flood(FLOOD_BLOCKS);
    let flooded = host.processed;
    let deadline = Instant::now() + Duration::from_secs(60);
    let caught_up = loop {
        std::thread::sleep(Duration::from_millis(200));
        match host.running_snapshot() {
            Some(s) if s.samples_analysed + s.samples_dropped == flooded => break s,
            _ if Instant::now() > deadline => {
                panic!(
                    "the analysis did not catch up within 60 s of the flood: {:?}",
                    host.running_snapshot()
                )
            }
            _ => {}
        }
    };
    assert!(caught_up.active, "{caught_up:?}");
    host.real_time(3.0);
    let s = host.deactivate();
    assert_eq!(
        s.samples_analysed + s.samples_dropped,
        host.processed,
        "moderate: analysed + dropped must equal processed: {s:?}"
    );
    assert_eq!(
        s.samples_dropped, caught_up.samples_dropped,
        "after catching up, 3 s at real-time pace dropped more: {caught_up:?} → {s:?}"
    );
    println!(
        "moderately slow analysis: the flood of {flooded} samples dropped {}; caught up while \
         active; 3 s at real-time pace dropped none ({} samples in all); {:.1} s",
        caught_up.samples_dropped,
        host.processed,
        start.elapsed().as_secs_f64()
    );
}
