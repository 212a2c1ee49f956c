//! The soak: hours of varied audio through the built plugin in a real CLAP host (see
//! `weft_tests`), in this process, so its memory and threads can be read.
//!
//! - **offline pace**: [`OFFLINE_ENV`] seconds of varied audio (music-like tones, noise,
//!   silence, a full-scale square, NaN bursts), in activations of [`SET_S`] seconds at changing
//!   sample rates, block sizes and layouts, rendered as fast as the plugin allows: every sample
//!   analysed, none dropped;
//! - **real-time pace**: [`REALTIME_ENV`] seconds in realtime mode, one block per block period:
//!   no sample dropped;
//! - resident memory (`VmRSS` in `/proc/self/status`) at the start and the end, and the thread
//!   count (`/proc/self/task`) before and after.
//!
//! Ignored in normal runs: `cargo xtask soak` runs it in full (2 h offline, 10 min real time),
//! `cargo xtask soak --short` in its CI form (5 min, 20 s).

use std::f64::consts::TAU;
use std::time::{Duration, Instant};
use weft_tests::{Settings, Snapshot, WeftPlugin, describe};

/// Seconds of audio at offline pace (default: 2 hours).
const OFFLINE_ENV: &str = "WEFT_SOAK_OFFLINE_S";
/// Seconds of audio at real-time pace (default: 10 minutes).
const REALTIME_ENV: &str = "WEFT_SOAK_REALTIME_S";
/// Audio per offline activation, seconds.
const SET_S: f64 = 120.0;
/// Seconds per kind of audio before the generator changes it.
const SEGMENT_S: f64 = 7.0;
/// Largest resident-memory growth accepted from the start to the end, MiB (allocator slack;
/// a leak of one analysis per activation or of audio would be far larger over hours).
const MAX_RSS_GROWTH_MIB: f64 = 32.0;
/// Seed of the generator; printed in every failure.
const SEED: u64 = 0x50A4_0008;

fn seconds_from_env(name: &str, default_s: f64) -> f64 {
    match std::env::var(name) {
        Ok(text) => text
            .trim()
            .parse::<f64>()
            .ok()
            .filter(|s| s.is_finite() && *s >= 0.0)
            .unwrap_or_else(|| panic!("{name}={text:?} is not a number of seconds")),
        Err(_) => default_s,
    }
}

/// Resident memory of this process, MiB (`VmRSS` in `/proc/self/status`, Linux).
fn rss_mib() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status")
        .unwrap_or_else(|err| panic!("cannot read /proc/self/status: {err}"));
    let kib: f64 = status
        .lines()
        .find_map(|l| l.strip_prefix("VmRSS:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap_or_else(|| panic!("no VmRSS in /proc/self/status"));
    kib / 1024.0
}

/// Threads of this process (entries of `/proc/self/task`).
fn thread_count() -> usize {
    std::fs::read_dir("/proc/self/task")
        .unwrap_or_else(|err| panic!("cannot list /proc/self/task: {err}"))
        .count()
}

/// Varied audio, generated block by block: each [`SEGMENT_S`] a new kind, seeded.
struct Generator {
    rate_hz: f64,
    n: u64,
    kind: u64,
    state: u64,
    freqs: [f64; 3],
}

impl Generator {
    fn new(rate_hz: f64, seed: u64) -> Self {
        Self {
            rate_hz,
            n: 0,
            kind: 0,
            state: seed | 1,
            freqs: [110.0, 220.0, 330.0],
        }
    }

    /// xorshift64 (G. Marsaglia, "Xorshift RNGs", 2003), in −1..1.
    fn noise(&mut self) -> f64 {
        self.state ^= self.state << 13;
        self.state ^= self.state >> 7;
        self.state ^= self.state << 17;
        (self.state >> 11) as f64 / (1u64 << 52) as f64 - 1.0
    }

    fn sample(&mut self) -> (f32, f32) {
        let segment = (SEGMENT_S * self.rate_hz) as u64;
        if self.n.is_multiple_of(segment) {
            self.kind = self.state % 6;
            let root = 55.0 * 2f64.powf((self.noise() + 1.0) * 2.0);
            self.freqs = [root, root * 1.5, root * 2.52];
        }
        let t = self.n as f64 / self.rate_hz;
        self.n += 1;
        let (l, r) = match self.kind {
            // Music-like: a chord with harmonics and a noise hit every half second.
            0 | 1 => {
                let mut s = 0.0;
                for (i, f) in self.freqs.iter().enumerate() {
                    s += 0.2 / (i + 1) as f64 * (TAU * f * t).sin();
                }
                let hit = (t * 2.0).fract();
                let n = 0.2 * self.noise() * (-hit * 30.0).exp();
                (s + n, s - n)
            }
            2 => (0.3 * self.noise(), 0.3 * self.noise()),
            3 => (0.0, 0.0),
            4 => {
                let v = if (t * self.freqs[0]).fract() < 0.5 {
                    1.0
                } else {
                    -1.0
                };
                (v, -v)
            }
            // Mostly quiet tone with bursts of NaN (a broken upstream plugin).
            _ => {
                let v = 0.05 * (TAU * self.freqs[1] * t).sin();
                if (t * 3.0).fract() < 0.01 {
                    (f64::NAN, v)
                } else {
                    (v, v)
                }
            }
        };
        (l as f32, r as f32)
    }
}

/// The host side of one activation.
struct Run {
    plugin: WeftPlugin,
    settings: Settings,
    audio: Generator,
    inputs: Vec<Vec<f32>>,
    outputs: Vec<Vec<f32>>,
    processed: u64,
}

impl Run {
    fn start(mut plugin: WeftPlugin, settings: Settings, seed: u64) -> Self {
        plugin.activate(settings).unwrap_or_else(|err| {
            panic!(
                "{settings:?}: activation failed: {} (seed {seed:#x})",
                describe(&err)
            )
        });
        let make = || vec![vec![0.0_f32; settings.max_block as usize]; settings.channels as usize];
        Self {
            plugin,
            settings,
            audio: Generator::new(settings.sample_rate_hz, seed),
            inputs: make(),
            outputs: make(),
            processed: 0,
        }
    }

    fn block(&mut self, len: usize) {
        for i in 0..len {
            let (l, r) = self.audio.sample();
            self.inputs[0][i] = l;
            if let Some(right) = self.inputs.get_mut(1) {
                right[i] = r;
            }
        }
        let mut inputs: Vec<&mut [f32]> = self.inputs.iter_mut().map(|b| &mut b[..len]).collect();
        let mut outputs: Vec<&mut [f32]> = self.outputs.iter_mut().map(|b| &mut b[..len]).collect();
        let settings = self.settings;
        self.plugin
            .process(&mut inputs, &mut outputs)
            .unwrap_or_else(|err| panic!("{settings:?}: process failed: {}", describe(&err)));
        self.processed += len as u64;
    }

    fn stop(mut self) -> (WeftPlugin, Snapshot, u64) {
        let settings = self.settings;
        let s = self
            .plugin
            .deactivate()
            .unwrap_or_else(|err| panic!("{settings:?}: deactivation failed: {}", describe(&err)));
        (self.plugin, s, self.processed)
    }
}

fn check_accounting(s: &Snapshot, settings: Settings, processed: u64, what: &str) {
    assert_eq!(
        s.samples_dropped, 0,
        "[{what}] {settings:?} dropped samples: {s:?} (seed {SEED:#x})"
    );
    assert_eq!(
        s.samples_analysed, processed,
        "[{what}] {settings:?} did not analyse every sample: {s:?} (seed {SEED:#x})"
    );
    for v in [s.rms_db, s.peak_db, s.rms_smoothed_db, s.peak_hold_db] {
        assert!(v.is_finite(), "[{what}] {settings:?}: {s:?}");
    }
}

#[test]
#[ignore = "hours long: run by `cargo xtask soak` (or `--short`)"]
fn soak() {
    let offline_s = seconds_from_env(OFFLINE_ENV, 7_200.0);
    let realtime_s = seconds_from_env(REALTIME_ENV, 600.0);
    let threads_before = thread_count();
    let mut plugin = WeftPlugin::new()
        .unwrap_or_else(|err| panic!("cannot create the plugin: {}", describe(&err)));
    // A first activation loads everything that lives once per process before RSS is read.
    let warm = Settings {
        sample_rate_hz: 48_000.0,
        max_block: 512,
        channels: 2,
        offline: true,
    };
    let mut run = Run::start(plugin, warm, SEED);
    run.block(512);
    let (back, _, _) = run.stop();
    plugin = back;
    let rss_start = rss_mib();
    println!(
        "soak: {offline_s} s offline, {realtime_s} s real time; RSS at start {rss_start:.1} MiB, \
         {threads_before} threads before the plugin"
    );

    let start = Instant::now();
    let mut done_s = 0.0;
    let mut set = 0_u64;
    let mut offline_samples = 0_u64;
    while done_s < offline_s {
        let settings = Settings {
            sample_rate_hz: [48_000.0, 44_100.0, 96_000.0, 22_050.0][set as usize % 4],
            max_block: [512, 64, 4_096, 1_000][(set as usize / 2) % 4],
            channels: [2, 1][(set as usize / 3) % 2],
            offline: true,
        };
        let seconds = SET_S.min(offline_s - done_s);
        let total = (seconds * settings.sample_rate_hz) as u64;
        let mut run = Run::start(plugin, settings, SEED ^ set);
        let block = settings.max_block as u64;
        while run.processed < total {
            // Hosts shorten blocks at loop points: every seventh block is shorter.
            let len = if run.processed / block % 7 == 6 {
                block / 3 + 1
            } else {
                block
            };
            run.block(len.min(total - run.processed) as usize);
        }
        let (back, s, processed) = run.stop();
        plugin = back;
        check_accounting(&s, settings, processed, &format!("offline set {set}"));
        offline_samples += processed;
        done_s += seconds;
        set += 1;
        println!(
            "soak: offline {done_s:.0}/{offline_s} s ({set} activations), RSS {:.1} MiB, {:.0} s \
             elapsed",
            rss_mib(),
            start.elapsed().as_secs_f64()
        );
    }
    let rss_offline = rss_mib();

    let settings = Settings {
        sample_rate_hz: 48_000.0,
        max_block: 256,
        channels: 2,
        offline: false,
    };
    let realtime_start = Instant::now();
    let mut run = Run::start(plugin, settings, SEED ^ 0xEA1);
    let period = Duration::from_secs_f64(f64::from(settings.max_block) / settings.sample_rate_hz);
    let blocks = (realtime_s / period.as_secs_f64()).round() as u32;
    let mut late = 0_u32;
    for b in 0..blocks {
        run.block(settings.max_block as usize);
        let next = realtime_start + period * (b + 1);
        match next.checked_duration_since(Instant::now()) {
            Some(wait) => std::thread::sleep(wait),
            None => late += 1,
        }
    }
    let (back, s, processed) = run.stop();
    plugin = back;
    check_accounting(&s, settings, processed, "real time");
    drop(plugin);
    let rss_end = rss_mib();
    let threads_after = thread_count();
    println!(
        "soak: {offline_samples} samples offline in {set} activations, {processed} in real time \
         ({late} of {blocks} blocks issued late by the host), none dropped; RSS {rss_start:.1} MiB \
         at start, {rss_offline:.1} MiB after the offline part, {rss_end:.1} MiB at the end; \
         threads {threads_before} before, {threads_after} after; {:.0} s",
        start.elapsed().as_secs_f64()
    );
    assert!(
        rss_end - rss_start <= MAX_RSS_GROWTH_MIB,
        "resident memory grew from {rss_start:.1} to {rss_end:.1} MiB"
    );
    assert_eq!(
        threads_after, threads_before,
        "threads before the plugin: {threads_before}, after: {threads_after}"
    );
}
