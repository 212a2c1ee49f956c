//! `cargo xtask shot`: the panel rendered under Xvfb, fed with the test signal, saved as a PNG.
//!
//! The standalone program runs on a dummy JACK server with the demo signal playing into it. After
//! a few seconds the screen is captured, and the snapshot the analysis thread dumps every second is
//! checked along with the picture: the panel must have analysed the signal, dropped nothing, and
//! the picture must not be blank.

use crate::live::{Guarded, play_into, start_dummy_jack, start_standalone, weft_inputs};
use crate::{build_standalone, run_checked, signal};
use anyhow::{Context, Result, bail};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::thread::sleep;
use std::time::Duration;

/// What `shot` writes and how long it lets the panel run.
#[derive(Debug, Clone)]
pub struct Options {
    /// The PNG to write.
    pub out: PathBuf,
    /// Seconds of signal before the capture.
    pub seconds: f64,
}

impl Default for Options {
    fn default() -> Self {
        Self {
            out: PathBuf::from("shots/panel.png"),
            seconds: 6.0,
        }
    }
}

impl Options {
    /// Parses `--out FILE` and `--seconds S`.
    pub fn parse(args: &[String]) -> Result<Self> {
        let mut options = Self::default();
        let mut it = args.iter();
        while let Some(arg) = it.next() {
            match arg.as_str() {
                "--out" => options.out = it.next().context("--out needs a file name")?.into(),
                "--seconds" => {
                    options.seconds = it
                        .next()
                        .context("--seconds needs a number")?
                        .parse()
                        .context("--seconds needs a number")?;
                }
                other => bail!("shot: unknown option '{other}' (use --out FILE, --seconds S)"),
            }
        }
        Ok(options)
    }
}

const DISPLAY: &str = ":97";
const SCREEN: &str = "1024x640x24";

/// Renders the panel and checks what it showed.
pub fn run(options: &Options) -> Result<()> {
    let binary = build_standalone(false)?;
    signal::write_demo_wav(Path::new(crate::live::DEMO_WAV), 30.0)?;
    let snapshot_dir = PathBuf::from("target/shot-snapshot");
    let _ = std::fs::remove_dir_all(&snapshot_dir);

    let _xvfb = Guarded::spawn(
        "Xvfb",
        Command::new("Xvfb")
            .args([DISPLAY, "-screen", "0", SCREEN, "-nolisten", "tcp"])
            .stdout(Stdio::null())
            .stderr(Stdio::null()),
    )?;
    sleep(Duration::from_millis(800));
    let _jackd = start_dummy_jack(48_000)?;
    let mut app = start_standalone(&binary, Some(&snapshot_dir), Some(DISPLAY))?;
    let inputs = weft_inputs(Duration::from_secs(60))?;
    let _player = play_into(Path::new(crate::live::DEMO_WAV), &inputs)?;
    sleep(Duration::from_secs_f64(options.seconds));
    if let Some(dir) = options.out.parent() {
        std::fs::create_dir_all(dir)?;
    }
    run_checked(
        Command::new("import")
            .env("DISPLAY", DISPLAY)
            .args(["-window", "root", "-crop"])
            .arg(format!("{}x{}+0+0", PANEL_SIZE.0, PANEL_SIZE.1))
            .arg(&options.out),
    )?;
    // The panel keeps its window open through SIGINT; its snapshot dump is rewritten every second,
    // so wait one more second for a current one, then stop it.
    sleep(Duration::from_millis(1200));
    app.stop(Duration::from_secs(1));
    check_picture(&options.out)?;
    check_snapshot(&snapshot_dir)?;
    println!("shot: wrote {}", options.out.display());
    Ok(())
}

/// The panel's logical size (the standalone opens it at scale 1; `weft_plugin::PANEL_SIZE`).
const PANEL_SIZE: (u32, u32) = (720, 480);

/// Fails when the picture is one flat colour (nothing was drawn).
fn check_picture(png: &Path) -> Result<()> {
    let out = Command::new("convert")
        .arg(png)
        .args(["-format", "%[fx:standard_deviation]", "info:"])
        .output()
        .context("ImageMagick's convert is missing (cargo xtask setup)")?;
    let text = String::from_utf8_lossy(&out.stdout);
    let sd: f64 = text
        .trim()
        .parse()
        .with_context(|| format!("unexpected answer from convert: {text:?}"))?;
    if sd < 0.02 {
        bail!(
            "{} looks blank (pixel standard deviation {sd:.4})",
            png.display()
        );
    }
    println!("shot: picture has detail (pixel standard deviation {sd:.3})");
    Ok(())
}

/// Fails unless the panel's analysis heard the signal and dropped nothing.
fn check_snapshot(dir: &Path) -> Result<()> {
    let entry = std::fs::read_dir(dir)
        .with_context(|| format!("no snapshot folder {}", dir.display()))?
        .filter_map(Result::ok)
        .find(|e| e.file_name().to_string_lossy().ends_with(".json"))
        .context("the standalone wrote no snapshot")?;
    let text = std::fs::read_to_string(entry.path())?;
    let json: serde_json::Value = serde_json::from_str(&text)
        .with_context(|| format!("{} is not JSON", entry.path().display()))?;
    let field = |name: &str| -> Result<f64> {
        json[name]
            .as_f64()
            .with_context(|| format!("snapshot field {name} is missing or not a number"))
    };
    let analysed = field("samples_analysed")?;
    let dropped = field("samples_dropped")?;
    let peak_hold = field("peak_hold_db")?;
    println!(
        "shot: the panel analysed {analysed} samples, dropped {dropped}, peak hold {peak_hold:.1} dBFS"
    );
    if analysed < 48_000.0 {
        bail!("the panel analysed less than a second of the test signal");
    }
    if dropped > 0.0 {
        bail!("the panel dropped {dropped} samples at real-time pace");
    }
    // The demo signal peaks between −20 and about −10 dBFS.
    if !(-21.0..=-8.0).contains(&peak_hold) {
        bail!("the panel's peak hold {peak_hold} dBFS does not match the test signal");
    }
    Ok(())
}
