//! The editor opened and closed while the plugin processes, in a real CLAP host (see
//! `weft_tests`): one instance, activated in realtime mode, gets a sine from a host audio
//! thread at real-time pace while the host's main thread opens the panel embedded in an X11
//! window, lets it draw, and closes it again, [`CYCLES`] times. Checked:
//!
//! - every `process()` call returns a continue status and its output equals its input bit for
//!   bit (the plugin never writes audio), and the debug bundle's `assert_process_allocs` would
//!   have aborted the process on any allocation in `process()` while the editor came and went;
//! - every open embeds exactly one viewable window in the host's parent, which draws (a pixel
//!   of it stops showing the parent's fill), and every close removes it; the plugin never
//!   reports its editor lost (CLAP `gui.closed`);
//! - the panel's own frame log (`weft-panel.json`, `plugin/src/panel.rs`) counts frames and saw
//!   the analysis' updates;
//! - the analysis consumed every sample (analysed = processed, nothing dropped) and its final
//!   level reading is the sine's closed form;
//! - the process's threads after the cycles are the threads after the first cycle (the first
//!   open may create what lives once per process), once threads that are exiting have gone (see
//!   [`settled_threads`]), so nothing leaks per open.
//!
//! **Display.** The test needs an X server and never skips without one: it starts its own
//! `Xvfb` on the first free display in [`DISPLAYS`] (`-nolisten tcp`), waits for its socket,
//! and runs this test binary again as a child process with `DISPLAY` pointing there and
//! [`CHILD_ENV`] set; the child does the work above. The plugin's windowing (baseview) opens
//! the display named by `DISPLAY`, and setting an environment variable in a multithreaded test
//! process is unsound, so the variable is given to a fresh process instead. The child also keeps
//! a crash (an abort from an allocation on the audio thread) from taking the harness down: the
//! parent reports how the child ended. A guard kills Xvfb when the parent test ends, passing or
//! failing. Xvfb comes from `cargo xtask setup` (package `xvfb`).
//!
//! Needs the bundle: run `cargo xtask bundle weft` first (the test fails, never skips, without
//! it).

use clack_host::prelude::ProcessStatus;
use std::f64::consts::TAU;
use std::io::Read;
use std::ops::RangeInclusive;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, ExitStatus, Stdio};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::{Duration, Instant};
use weft_tests::{
    DetachedAudio, HostError, ParentWindow, Settings, WeftPlugin, describe, snapshot_dir,
    workspace_root,
};

/// This file's test; the child runs exactly it.
const TEST_NAME: &str = "editor_opened_and_closed_while_processing";
/// Set in the child's environment: run the cycles instead of starting a display.
const CHILD_ENV: &str = "WEFT_EDITOR_TEST_CHILD";
/// Display numbers tried for Xvfb (high, to stay clear of desktops and `cargo xtask shot`'s
/// `:97`).
const DISPLAYS: RangeInclusive<u32> = 120..=140;
/// Xvfb's screen: big enough for the panel.
const XVFB_SCREEN: &str = "1280x800x24";
/// How long Xvfb may take to create its socket.
const XVFB_START_TIMEOUT: Duration = Duration::from_secs(15);
/// How long Xvfb may take to stop after SIGTERM.
const XVFB_STOP_TIMEOUT: Duration = Duration::from_secs(5);
/// How long the child may run before it counts as hung (it takes seconds).
const CHILD_TIMEOUT: Duration = Duration::from_secs(300);
/// Open/close cycles after the first (warm-up) one.
const CYCLES: usize = 50;
/// How long each cycle keeps the editor open at least (the panel repaints every 16 ms).
const OPEN_FOR: Duration = Duration::from_millis(120);
/// How long an open editor may take to draw its first frame (a cold Mesa software renderer on
/// a busy 2-core machine is slow the first time).
const DRAW_TIMEOUT: Duration = Duration::from_secs(20);
/// How long a closed editor's window may take to leave the parent.
const CLOSE_TIMEOUT: Duration = Duration::from_secs(5);
/// The host's settings: realtime (a realtime host paces at real time), 48 kHz stereo, 512.
const SETTINGS: Settings = Settings {
    sample_rate_hz: 48_000.0,
    max_block: 512,
    channels: 2,
    offline: false,
};
/// How long the thread list must stay unchanged to count as settled.
const THREADS_QUIET: Duration = Duration::from_millis(300);
/// The longest wait for the thread list to settle.
const THREADS_SETTLE_TIMEOUT: Duration = Duration::from_secs(5);
/// Peak of the test sine.
const AMPLITUDE: f64 = 0.5;
/// Periods of the sine per 2048 samples: a whole number in every analysis frame (frames are
/// multiples of 2048 samples, `FrameConfig::for_sample_rate` in `engine/src/frames.rs`), so
/// each frame's RMS is the closed form.
const PERIODS_PER_2048: f64 = 46.0;
/// Tolerance of the level reading against the closed form, dB (as the host grid's).
const LEVEL_TOLERANCE_DB: f64 = 0.05;

/// The value, or a panic naming `what` failed and why.
fn or_panic<T>(result: Result<T, HostError>, what: &str) -> T {
    result.unwrap_or_else(|err| panic!("[{what}] {}", describe(&err)))
}

#[test]
fn editor_opened_and_closed_while_processing() {
    if std::env::var_os(CHILD_ENV).is_some() {
        child_cycles();
        return;
    }
    let start = Instant::now();
    let xvfb = Xvfb::start();
    let exe =
        std::env::current_exe().unwrap_or_else(|err| panic!("cannot find this test binary: {err}"));
    let mut command = Command::new(exe);
    command
        .args([TEST_NAME, "--exact", "--nocapture", "--test-threads=1"])
        .env("DISPLAY", xvfb.display_name())
        .env(CHILD_ENV, "1");
    let (status, stdout, stderr) = run_with_timeout(&mut command, CHILD_TIMEOUT);
    println!("--- child stdout ---\n{stdout}--- child stderr ---\n{stderr}--- end of child ---");
    let how = match status {
        None => format!(
            "hung: killed after {} s",
            CHILD_TIMEOUT.as_secs_f64().round()
        ),
        Some(status) => describe_exit(status),
    };
    assert!(
        status.is_some_and(|s| s.success()),
        "the child process on {} {how}; its output is above",
        xvfb.display_name()
    );
    // A green child that ran no test (a renamed test, a wrong filter) must not pass.
    assert!(
        stdout.contains("test result: ok. 1 passed"),
        "the child did not run exactly one passing test; its output is above"
    );
    println!(
        "editor test on Xvfb {}: {:.1} s including Xvfb and the child",
        xvfb.display_name(),
        start.elapsed().as_secs_f64()
    );
}

/// How a process ended, in words.
fn describe_exit(status: ExitStatus) -> String {
    use std::os::unix::process::ExitStatusExt;
    match (status.code(), status.signal()) {
        (Some(code), _) => format!("exited with code {code}"),
        (None, Some(6)) => "was aborted (SIGABRT): a debug build of the plugin aborts on any \
                            allocation in process() (assert_process_allocs), and a Rust panic \
                            across the plugin's C ABI aborts too"
            .to_owned(),
        (None, Some(signal)) => format!("was killed by signal {signal}"),
        (None, None) => "ended in an unknown way".to_owned(),
    }
}

/// Runs `command` with its output captured; `None` for the status if it ran longer than
/// `timeout` (it is then killed).
fn run_with_timeout(
    command: &mut Command,
    timeout: Duration,
) -> (Option<ExitStatus>, String, String) {
    let mut child = command
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|err| panic!("cannot start the child test process: {err}"));
    let reader = |pipe: Option<Box<dyn Read + Send>>| {
        std::thread::spawn(move || {
            let mut text = String::new();
            if let Some(mut pipe) = pipe {
                let mut bytes = Vec::new();
                let _ = pipe.read_to_end(&mut bytes);
                text = String::from_utf8_lossy(&bytes).into_owned();
            }
            text
        })
    };
    let out = reader(
        child
            .stdout
            .take()
            .map(|p| Box::new(p) as Box<dyn Read + Send>),
    );
    let err = reader(
        child
            .stderr
            .take()
            .map(|p| Box::new(p) as Box<dyn Read + Send>),
    );
    let deadline = Instant::now() + timeout;
    let status = loop {
        match child.try_wait() {
            Ok(Some(status)) => break Some(status),
            Ok(None) if Instant::now() < deadline => std::thread::sleep(Duration::from_millis(50)),
            _ => {
                let _ = child.kill();
                let _ = child.wait();
                break None;
            }
        }
    };
    let stdout = out.join().unwrap_or_default();
    let stderr = err.join().unwrap_or_default();
    (status, stdout, stderr)
}

/// An Xvfb server this test started; killed on drop.
struct Xvfb {
    child: Child,
    display: u32,
}

impl Xvfb {
    /// Starts Xvfb on the first free display of [`DISPLAYS`]; panics (never skips) if it
    /// cannot.
    fn start() -> Self {
        let log_dir = workspace_root().join("target/weft-tests");
        let _ = std::fs::create_dir_all(&log_dir);
        let mut tried = Vec::new();
        for display in DISPLAYS {
            let socket = socket_path(display);
            if lock_holder_alive(display) {
                continue;
            }
            let log_path = log_dir.join(format!("xvfb-{display}.log"));
            let log = std::fs::File::create(&log_path)
                .unwrap_or_else(|err| panic!("cannot create {}: {err}", log_path.display()));
            let spawned = Command::new("Xvfb")
                .args([
                    &format!(":{display}"),
                    "-screen",
                    "0",
                    XVFB_SCREEN,
                    "-nolisten",
                    "tcp",
                ])
                .stdin(Stdio::null())
                .stdout(Stdio::null())
                .stderr(log)
                .spawn();
            let child = match spawned {
                Ok(child) => child,
                Err(err) if err.kind() == std::io::ErrorKind::NotFound => panic!(
                    "Xvfb is not installed, and this test needs a display of its own: run \
                     `cargo xtask setup` (it installs the `xvfb` package)"
                ),
                Err(err) => panic!("cannot start Xvfb: {err}"),
            };
            let mut server = Self { child, display };
            match server.wait_for_socket(&socket) {
                Ok(()) => return server,
                Err(why) => {
                    let log = std::fs::read_to_string(&log_path).unwrap_or_default();
                    tried.push(format!(":{display}: {why}; Xvfb said: {}", log.trim()));
                    // Dropping `server` kills it if it still runs.
                }
            }
        }
        panic!(
            "could not start Xvfb on any display in :{}..=:{} (in use, or failing): {tried:#?}",
            DISPLAYS.start(),
            DISPLAYS.end()
        );
    }

    fn wait_for_socket(&mut self, socket: &Path) -> Result<(), String> {
        let deadline = Instant::now() + XVFB_START_TIMEOUT;
        while Instant::now() < deadline {
            if let Ok(Some(status)) = self.child.try_wait() {
                return Err(format!("it exited ({status})"));
            }
            if socket.exists() {
                return Ok(());
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        Err(format!(
            "no socket {} after {} s",
            socket.display(),
            XVFB_START_TIMEOUT.as_secs()
        ))
    }

    fn display_name(&self) -> String {
        format!(":{}", self.display)
    }
}

impl Drop for Xvfb {
    /// SIGTERM first: Xvfb then removes its lock file and socket. SIGKILL (and removing them
    /// here) only if it does not stop in time, so no run leaves a display number taken.
    fn drop(&mut self) {
        if matches!(self.child.try_wait(), Ok(Some(_))) {
            return;
        }
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .status();
        let deadline = Instant::now() + XVFB_STOP_TIMEOUT;
        while Instant::now() < deadline {
            if matches!(self.child.try_wait(), Ok(Some(_))) {
                return;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
        if std::fs::read_to_string(lock_path(self.display))
            .is_ok_and(|pid| pid.trim() == self.child.id().to_string())
        {
            let _ = std::fs::remove_file(lock_path(self.display));
            let _ = std::fs::remove_file(socket_path(self.display));
        }
    }
}

/// The X server's socket for `display`.
fn socket_path(display: u32) -> PathBuf {
    PathBuf::from(format!("/tmp/.X11-unix/X{display}"))
}

/// The X server's lock file for `display`: the server's process id, as text.
fn lock_path(display: u32) -> PathBuf {
    PathBuf::from(format!("/tmp/.X{display}-lock"))
}

/// Whether a running process holds `display`'s lock. A lock left by a dead server does not
/// count: Xvfb replaces such a lock itself.
fn lock_holder_alive(display: u32) -> bool {
    let Ok(text) = std::fs::read_to_string(lock_path(display)) else {
        // No lock, or one we cannot read (another user's): only the former is free.
        return lock_path(display).exists();
    };
    text.trim().parse::<u32>().map_or(true, |pid| {
        Path::new("/proc").join(pid.to_string()).exists()
    })
}

/// The names of this process's threads once none has come or gone for [`THREADS_QUIET`] (at
/// most [`THREADS_SETTLE_TIMEOUT`]). A thread that a closed editor joined can stay listed in
/// `/proc/self/task` for a moment while the kernel finishes its exit (seen here: up to six
/// for tens of ms after `gui.destroy` returned); a leaked thread stays for good. In the child
/// only this test runs, so the harness adds none meanwhile.
fn settled_threads() -> Vec<String> {
    let deadline = Instant::now() + THREADS_SETTLE_TIMEOUT;
    let mut names = thread_names();
    let mut unchanged_since = Instant::now();
    while Instant::now() < deadline {
        std::thread::sleep(Duration::from_millis(10));
        let now = thread_names();
        if now != names {
            names = now;
            unchanged_since = Instant::now();
        } else if unchanged_since.elapsed() >= THREADS_QUIET {
            break;
        }
    }
    names
}

/// The names of this process's threads (Linux: `/proc/self/task/*/comm`), sorted.
fn thread_names() -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir("/proc/self/task")
        .unwrap_or_else(|err| panic!("cannot list /proc/self/task: {err}"))
        .flatten()
        .map(|task| {
            std::fs::read_to_string(task.path().join("comm"))
                .unwrap_or_default()
                .trim_end()
                .to_owned()
        })
        .collect();
    names.sort();
    names
}

/// Sine sample `n`.
fn sine(n: u64) -> f32 {
    let rate = SETTINGS.sample_rate_hz;
    let freq_hz = PERIODS_PER_2048 * rate / 2048.0;
    (AMPLITUDE * (TAU * freq_hz * n as f64 / rate).sin()) as f32
}

/// What the audio thread saw.
struct AudioReport {
    /// Blocks processed.
    blocks: u64,
    /// Frames processed.
    frames: u64,
    /// The longest `process()` call.
    longest_call: Duration,
    /// The first thing that went wrong, if anything did.
    failure: Option<String>,
}

/// The host's audio thread: blocks of the sine at real-time pace until `stop`, each checked
/// for `Continue` and bit-exact pass-through. Sets `failed` and returns at the first problem.
fn audio_thread(audio: &mut DetachedAudio, stop: &AtomicBool, failed: &AtomicBool) -> AudioReport {
    let block = SETTINGS.max_block as usize;
    let channels = SETTINGS.channels as usize;
    let mut inputs = vec![vec![0.0_f32; block]; channels];
    let mut outputs = vec![vec![0.0_f32; block]; channels];
    let mut report = AudioReport {
        blocks: 0,
        frames: 0,
        longest_call: Duration::ZERO,
        failure: None,
    };
    let start = Instant::now();
    while !stop.load(Ordering::SeqCst) {
        // Real-time pace: block k starts no earlier than k blocks' duration after the start.
        let due = start + Duration::from_secs_f64(report.frames as f64 / SETTINGS.sample_rate_hz);
        if let Some(wait) = due.checked_duration_since(Instant::now()) {
            std::thread::sleep(wait);
        }
        for input in &mut inputs {
            for (i, x) in input.iter_mut().enumerate() {
                *x = sine(report.frames + i as u64);
            }
        }
        for output in &mut outputs {
            output.fill(f32::NAN);
        }
        let called = Instant::now();
        let status = audio.process(&mut inputs, &mut outputs);
        report.longest_call = report.longest_call.max(called.elapsed());
        let problem = match status {
            Err(err) => Some(format!("process() failed: {}", describe(&err))),
            // Weft returns nice-plug's `ProcessStatus::Normal`, which nice-plug 0.4.2's CLAP
            // wrapper (`wrapper.rs`, `process`) reports as CONTINUE_IF_NOT_QUIET: on a
            // non-silent input both mean "keep calling me".
            Ok(ProcessStatus::Continue | ProcessStatus::ContinueIfNotQuiet) => None,
            Ok(other) => Some(format!("process() returned {other:?}, not a continue")),
        }
        .or_else(|| {
            let same = inputs
                .iter()
                .zip(&outputs)
                .all(|(i, o)| i.iter().zip(o).all(|(a, b)| a.to_bits() == b.to_bits()));
            (!same).then(|| "the audio did not pass through unchanged".to_owned())
        });
        if let Some(problem) = problem {
            report.failure = Some(format!("block {}: {problem}", report.blocks));
            failed.store(true, Ordering::SeqCst);
            break;
        }
        report.blocks += 1;
        report.frames += block as u64;
    }
    report
}

/// One open/close cycle; returns how long the editor took to draw. Panics with `what` on any
/// failure.
fn cycle(plugin: &mut WeftPlugin, parent: &ParentWindow, what: &str) -> Duration {
    let opened = Instant::now();
    let size = plugin
        .open_editor(parent)
        .unwrap_or_else(|err| panic!("[{what}] opening the editor failed: {}", describe(&err)));
    assert!(
        size.width_px > 0 && size.height_px > 0,
        "[{what}] editor size {size:?}"
    );
    let probes = [
        (2, 2),
        (
            i16::try_from(size.width_px / 2).unwrap_or(i16::MAX),
            i16::try_from(size.height_px / 2).unwrap_or(i16::MAX),
        ),
    ];
    let mut drawn_after = None;
    loop {
        plugin.pump_main_thread();
        if let Some(asked) = plugin.take_resize_request() {
            or_panic(parent.resize(asked.width_px, asked.height_px), what);
        }
        let children = or_panic(parent.children(), what);
        assert_eq!(
            children.len(),
            1,
            "[{what}] the open editor should be one window inside the parent: {children:?}"
        );
        let editor = children[0];
        if drawn_after.is_none() && or_panic(parent.is_viewable(editor), what) {
            let mut drawn = true;
            for &(x, y) in &probes {
                drawn &= or_panic(parent.pixel_rgb(editor, x, y), what) != ParentWindow::FILL_RGB;
            }
            if drawn {
                drawn_after = Some(opened.elapsed());
            }
        }
        let elapsed = opened.elapsed();
        if drawn_after.is_some() && elapsed >= OPEN_FOR {
            break;
        }
        assert!(
            elapsed < DRAW_TIMEOUT,
            "[{what}] the editor did not draw within {} s (its pixels at {probes:?} still show \
             the parent's fill {:?}; viewable: {:?})",
            DRAW_TIMEOUT.as_secs(),
            ParentWindow::FILL_RGB,
            parent.is_viewable(editor)
        );
        std::thread::sleep(Duration::from_millis(4));
    }
    plugin
        .close_editor()
        .unwrap_or_else(|err| panic!("[{what}] closing the editor failed: {}", describe(&err)));
    let closed = Instant::now();
    loop {
        let children = or_panic(parent.children(), what);
        if children.is_empty() {
            break;
        }
        assert!(
            closed.elapsed() < CLOSE_TIMEOUT,
            "[{what}] the closed editor's windows stay in the parent: {children:?}"
        );
        std::thread::sleep(Duration::from_millis(5));
    }
    drawn_after.unwrap_or_default()
}

/// The child's work (see the file's doc comment).
fn child_cycles() {
    let display = std::env::var("DISPLAY").unwrap_or_default();
    assert!(
        !display.is_empty(),
        "the child needs DISPLAY (the parent test sets it)"
    );
    let start = Instant::now();
    let parent = ParentWindow::open(None, 800, 600).unwrap_or_else(|err| {
        panic!(
            "cannot open a parent window on {display}: {}",
            describe(&err)
        )
    });
    let panel_log = snapshot_dir()
        .unwrap_or_else(|err| panic!("no snapshot folder: {}", describe(&err)))
        .join("weft-panel.json");
    let _ = std::fs::remove_file(&panel_log);
    let mut plugin = WeftPlugin::new()
        .unwrap_or_else(|err| panic!("cannot create the plugin: {}", describe(&err)));
    plugin
        .activate(SETTINGS)
        .unwrap_or_else(|err| panic!("activation failed: {}", describe(&err)));
    let mut audio = plugin
        .detach_audio()
        .unwrap_or_else(|err| panic!("cannot detach the audio processor: {}", describe(&err)));
    let stop = AtomicBool::new(false);
    let failed = AtomicBool::new(false);
    let mut draw_times = Vec::with_capacity(CYCLES + 1);
    let (report, threads_before, threads_first, threads_last) = std::thread::scope(|scope| {
        let audio_thread = std::thread::Builder::new()
            .name("host-audio".into())
            .spawn_scoped(scope, || audio_thread(&mut audio, &stop, &failed))
            .unwrap_or_else(|err| panic!("cannot start the audio thread: {err}"));
        // Stops the audio thread however this closure ends, so the scope can join it.
        struct StopOnDrop<'a>(&'a AtomicBool);
        impl Drop for StopOnDrop<'_> {
            fn drop(&mut self) {
                self.0.store(true, Ordering::SeqCst);
            }
        }
        let stopper = StopOnDrop(&stop);
        let threads_before = settled_threads().len();
        // The first cycle creates what exists once per process (the renderer, the panel's
        // state); threads are counted after it.
        draw_times.push(cycle(&mut plugin, &parent, "cycle 0 (first)"));
        let threads_first = settled_threads();
        for i in 1..=CYCLES {
            if failed.load(Ordering::SeqCst) {
                break;
            }
            draw_times.push(cycle(&mut plugin, &parent, &format!("cycle {i}")));
        }
        let threads_last = settled_threads();
        drop(stopper);
        let report = audio_thread
            .join()
            .unwrap_or_else(|_| panic!("the audio thread panicked"));
        (report, threads_before, threads_first, threads_last)
    });
    if let Some(failure) = &report.failure {
        panic!("audio thread: {failure}");
    }
    plugin
        .attach_audio(audio)
        .unwrap_or_else(|err| panic!("cannot attach the audio processor: {}", describe(&err)));
    let snapshot = plugin
        .deactivate()
        .unwrap_or_else(|err| panic!("deactivation failed: {}", describe(&err)));
    assert_eq!(
        plugin.editor_closed_by_plugin(),
        0,
        "the plugin reported its editor closed or lost (CLAP gui.closed)"
    );
    assert_eq!(
        threads_last, threads_first,
        "threads after the first open/close and after {CYCLES} more (settled)"
    );
    // The analysis saw every sample of the sine and reads its level.
    let s = &snapshot;
    assert!(!s.offline, "reported offline: {s:?}");
    assert!(
        !s.active,
        "the final snapshot says the analysis still runs: {s:?}"
    );
    assert_eq!(s.sample_rate_hz, SETTINGS.sample_rate_hz as f32, "{s:?}");
    assert_eq!(s.channels, SETTINGS.channels, "{s:?}");
    assert_eq!(s.samples_dropped, 0, "dropped at real-time pace: {s:?}");
    assert_eq!(
        s.samples_analysed, report.frames,
        "analysed ≠ processed ({} blocks): {s:?}",
        report.blocks
    );
    // RMS of a sine of peak A is A/√2 (closed form).
    let expected_db = 20.0 * (AMPLITUDE / std::f64::consts::SQRT_2).log10();
    assert!(
        (f64::from(s.rms_db) - expected_db).abs() <= LEVEL_TOLERANCE_DB,
        "RMS {} dBFS, expected {expected_db:.3}: {s:?}",
        s.rms_db
    );
    // The panel's own account of its frames (written at most once a second while it draws).
    let text = std::fs::read_to_string(&panel_log).unwrap_or_else(|err| {
        panic!(
            "the panel wrote no frame log at {}: {err}",
            panel_log.display()
        )
    });
    let log: serde_json::Value = serde_json::from_str(&text)
        .unwrap_or_else(|err| panic!("bad panel frame log {text}: {err}"));
    let frames = log["frames"].as_u64().unwrap_or(0);
    let mix_updates = log["mix_updates"].as_u64().unwrap_or(0);
    assert!(frames > 0, "the panel counted no frames: {log}");
    assert!(
        mix_updates > 0,
        "the panel never saw an analysis update: {log}"
    );
    let mut sorted = draw_times.clone();
    sorted.sort();
    let median = sorted[sorted.len() / 2];
    let slowest = sorted[sorted.len() - 1];
    println!(
        "{} open/close cycles while processing: {} blocks ({:.1} s of audio) bit-exact, none \
         dropped, RMS {:.3} dBFS (closed form {expected_db:.3}); first frame drawn after {:.0} ms \
         (median), {:.0} ms (slowest); longest process() call {:.2} ms; threads: \
         {threads_before} before the first open, {} after the first cycle and after the last; panel frame log: {frames} frames, \
         mean {:.2} ms, p95 {:.2} ms; {:.1} s",
        draw_times.len(),
        report.blocks,
        report.frames as f64 / SETTINGS.sample_rate_hz,
        s.rms_db,
        median.as_secs_f64() * 1e3,
        slowest.as_secs_f64() * 1e3,
        report.longest_call.as_secs_f64() * 1e3,
        threads_last.len(),
        log["mean_ms"].as_f64().unwrap_or(f64::NAN),
        log["p95_ms"].as_f64().unwrap_or(f64::NAN),
        start.elapsed().as_secs_f64()
    );
}
