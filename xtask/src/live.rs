//! The standalone program on a live input, and the dummy JACK session used when there is none.

use crate::{build_standalone, run_checked, setup, signal};
use anyhow::{Context, Result, bail};
use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::thread::sleep;
use std::time::{Duration, Instant};

/// The demo signal played when the machine has no audio input.
pub const DEMO_WAV: &str = "target/demo/weft-demo-signal.wav";

/// A child process that receives SIGINT, then SIGKILL, when dropped.
pub struct Guarded {
    name: &'static str,
    child: Child,
}

impl Guarded {
    /// Starts `cmd` as a guarded child.
    pub fn spawn(name: &'static str, cmd: &mut Command) -> Result<Self> {
        let child = cmd
            .spawn()
            .with_context(|| format!("could not start {name} ({cmd:?})"))?;
        Ok(Self { name, child })
    }

    /// Whether the process still runs.
    pub fn alive(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    /// Sends SIGINT and waits up to `grace` for a clean exit, then kills.
    pub fn stop(&mut self, grace: Duration) {
        if !self.alive() {
            return;
        }
        let _ = Command::new("kill")
            .args(["-INT", &self.child.id().to_string()])
            .status();
        let start = Instant::now();
        while start.elapsed() < grace {
            if !self.alive() {
                return;
            }
            sleep(Duration::from_millis(50));
        }
        eprintln!("xtask: {} did not stop in time; killing it", self.name);
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// Waits for the process to end by itself.
    pub fn wait(&mut self) -> Result<std::process::ExitStatus> {
        Ok(self.child.wait()?)
    }
}

impl Drop for Guarded {
    fn drop(&mut self) {
        self.stop(Duration::from_secs(3));
    }
}

/// Whether a JACK server answers.
pub fn jack_running() -> bool {
    Command::new("jack_wait")
        .arg("-c")
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).contains("running"))
        .unwrap_or(false)
}

/// Starts a JACK server on the dummy driver (no audio hardware needed) and waits until it answers.
pub fn start_dummy_jack(sample_rate_hz: u32) -> Result<Guarded> {
    let mut jackd = Guarded::spawn(
        "jackd",
        Command::new("jackd")
            .args(["--no-realtime", "-d", "dummy", "-r"])
            .arg(sample_rate_hz.to_string())
            .args(["-p", "512"])
            .stdout(Stdio::null())
            .stderr(Stdio::null()),
    )?;
    let start = Instant::now();
    while !jack_running() {
        if !jackd.alive() || start.elapsed() > Duration::from_secs(15) {
            bail!("the dummy JACK server did not start (is another one running?)");
        }
        sleep(Duration::from_millis(100));
    }
    Ok(jackd)
}

/// JACK ports whose names start with `prefix`.
pub fn jack_ports(prefix: &str) -> Vec<String> {
    Command::new("jack_lsp")
        .output()
        .map(|o| {
            String::from_utf8_lossy(&o.stdout)
                .lines()
                .filter(|l| l.starts_with(prefix))
                .map(str::to_owned)
                .collect()
        })
        .unwrap_or_default()
}

/// Waits until Weft's audio input ports exist and returns them in order.
pub fn weft_inputs(timeout: Duration) -> Result<Vec<String>> {
    let start = Instant::now();
    loop {
        // nice-plug's standalone names its JACK client after the plugin, in lower case.
        let ports: Vec<String> = jack_ports("")
            .into_iter()
            .filter(|p| {
                let lower = p.to_lowercase();
                lower.starts_with("weft:") && lower.contains(":input_")
            })
            .collect();
        if !ports.is_empty() {
            return Ok(ports);
        }
        if start.elapsed() > timeout {
            bail!("Weft's JACK input ports did not appear within {timeout:?}");
        }
        sleep(Duration::from_millis(100));
    }
}

/// Plays `wav` with jack-play and connects it to `inputs`.
pub fn play_into(wav: &Path, inputs: &[String]) -> Result<Guarded> {
    play_from(wav, 0.0, inputs)
}

/// Plays `wav` from `start_s` seconds on (jack-play resamples to the server's rate) and
/// connects its outputs to `inputs` (a mono file feeds every input).
pub fn play_from(wav: &Path, start_s: f64, inputs: &[String]) -> Result<Guarded> {
    let spec = hound::WavReader::open(wav)
        .with_context(|| format!("cannot read {}", wav.display()))?
        .spec();
    let channels = usize::from(spec.channels.max(1));
    let seek = (start_s.max(0.0) * f64::from(spec.sample_rate)).round() as u64;
    let before = jack_ports("jack-play");
    let player = Guarded::spawn(
        "jack-play",
        Command::new("jack-play")
            .args(["-i", &seek.to_string()])
            .arg(wav)
            .stdout(Stdio::null())
            .stderr(Stdio::null()),
    )?;
    let start = Instant::now();
    let outs = loop {
        let outs: Vec<String> = jack_ports("jack-play")
            .into_iter()
            .filter(|p| !before.contains(p))
            .collect();
        if outs.len() >= channels.min(2) {
            break outs;
        }
        if start.elapsed() > Duration::from_secs(10) {
            bail!("jack-play's ports did not appear");
        }
        sleep(Duration::from_millis(50));
    };
    for (i, input) in inputs.iter().enumerate() {
        let out = &outs[i.min(outs.len() - 1)];
        run_checked(Command::new("jack_connect").args([out, input]))?;
    }
    Ok(player)
}

/// Starts the standalone on JACK, on `display` if given, writing its final snapshot to
/// `snapshot_dir` if given.
pub fn start_standalone(
    binary: &Path,
    snapshot_dir: Option<&Path>,
    display: Option<&str>,
    env: &[(&str, String)],
) -> Result<Guarded> {
    let mut cmd = Command::new(binary);
    cmd.args(["--backend", "jack"]);
    for (name, value) in env {
        cmd.env(name, value);
    }
    if let Some(dir) = snapshot_dir {
        std::fs::create_dir_all(dir)?;
        cmd.env("WEFT_SNAPSHOT_DIR", dir);
    }
    if let Some(display) = display {
        cmd.env("DISPLAY", display);
    }
    // A JACK server that has just started can refuse its first clients for a moment: retry.
    for attempt in 1..=5 {
        let mut app = Guarded::spawn("weft-standalone", &mut cmd)?;
        sleep(Duration::from_secs(2));
        if app.alive() {
            return Ok(app);
        }
        eprintln!("xtask: the standalone program exited at start (attempt {attempt} of 5)");
    }
    bail!("the standalone program would not start on JACK")
}

/// `cargo xtask live`: the panel on the live input, or on the demo signal when there is none.
pub fn run() -> Result<()> {
    setup::run(false)?;
    let binary = build_standalone(true)?;
    if std::env::var_os("DISPLAY").is_none() {
        println!(
            "live: no display here, so the panel is rendered to a picture instead (cargo xtask shot)."
        );
        return crate::shot::run(&crate::shot::Options::default());
    }
    if jack_running() {
        println!("live: a JACK server runs: connecting Weft to system:capture_1 and _2");
        return run_checked(Command::new(&binary).args([
            "--backend",
            "jack",
            "--connect-jack-inputs",
            "system:capture_1,system:capture_2",
        ]));
    }
    println!(
        "live: no JACK server runs, so Weft listens to its demo signal through a dummy JACK \
         server.\n      To use a real input, start JACK on your interface first, or run {} \
         --backend alsa --input-device default.",
        binary.display()
    );
    signal::write_demo_wav(Path::new(DEMO_WAV), 120.0)?;
    let _jackd = start_dummy_jack(48_000)?;
    let mut app = start_standalone(&binary, None, None, &[])?;
    let inputs = weft_inputs(Duration::from_secs(30))?;
    while app.alive() {
        let mut player = play_into(Path::new(DEMO_WAV), &inputs)?;
        while player.alive() && app.alive() {
            sleep(Duration::from_millis(200));
        }
    }
    let status = app.wait()?;
    println!("live: the standalone program ended ({status})");
    Ok(())
}
