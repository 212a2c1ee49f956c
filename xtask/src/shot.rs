//! `cargo xtask shot`: every view of the panel rendered under Xvfb, fed with Lantern Hall demo
//! music (`weft demo`, invented data) and the *dockside* style model trained on it, saved as PNGs
//! in `shots/`.
//!
//! The standalone program runs on a dummy JACK server with the audio playing into it, once per
//! view. After a few seconds the screen is captured, and what the analysis thread and the panel
//! dump every second is checked along with the picture: the panel must have analysed the audio,
//! dropped nothing, shown family shares (and the style estimate when a model is given), and the
//! picture must not be blank. The last view starts with ten minutes of invented history and
//! reports the panel's frame time with the history full.

use crate::live::{Guarded, play_from, start_dummy_jack, start_standalone, weft_inputs};
use crate::{build_standalone, run_checked};
use anyhow::{Context, Result, bail};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::thread::sleep;
use std::time::Duration;

/// What `shot` plays, writes and how long it lets the panel run.
#[derive(Debug, Clone)]
pub struct Options {
    /// The folder the PNGs go to.
    pub out_dir: PathBuf,
    /// Seconds of audio before each capture.
    pub seconds: f64,
    /// The audio to play in every view (WAV); `None`: the demo scene's music per view.
    pub audio: Option<PathBuf>,
    /// A style model for the panel to load; `None`: the demo scene's (when the scene is used).
    pub model: Option<PathBuf>,
}

/// Where the shots' demo scene is built (`weft demo --pieces 4`).
const SCENE_DIR: &str = "target/shot-demo";

/// What a view plays: a file of the demo scene and where in it to start.
#[derive(Clone, Copy)]
enum Play {
    /// The first dockside piece.
    Dockside,
    /// The demo set from this second on.
    Set(f64),
}

impl Default for Options {
    fn default() -> Self {
        Self {
            out_dir: PathBuf::from("shots"),
            seconds: 7.0,
            audio: None,
            model: None,
        }
    }
}

impl Options {
    /// Parses `--out DIR`, `--seconds S`, `--audio WAV`, `--model FILE`.
    pub fn parse(args: &[String]) -> Result<Self> {
        let mut options = Self::default();
        let mut it = args.iter();
        while let Some(arg) = it.next() {
            let mut value = |what: &str| -> Result<String> {
                it.next()
                    .cloned()
                    .with_context(|| format!("{arg} needs {what}"))
            };
            match arg.as_str() {
                "--out" => options.out_dir = value("a folder")?.into(),
                "--seconds" => {
                    options.seconds = value("a number")?
                        .parse()
                        .context("--seconds needs a number")?;
                }
                "--audio" => options.audio = Some(value("a WAV file")?.into()),
                "--model" => options.model = Some(value("a style model file")?.into()),
                other => bail!(
                    "shot: unknown option '{other}' (use --out DIR, --seconds S, --audio WAV, --model FILE)"
                ),
            }
        }
        Ok(options)
    }
}

const DISPLAY: &str = ":97";
const SCREEN: &str = "1280x800x24";

/// One view to capture.
struct View {
    /// What the picture shows, for the log.
    what: &'static str,
    /// File name in the output folder.
    file: &'static str,
    /// `WEFT_PANEL_VIEW` for the panel (see `weft_plugin::panel::PANEL_VIEW_ENV`).
    panel_view: &'static str,
    /// Start with ten minutes of invented history and report the frame time.
    full_history: bool,
    /// The scene's audio for this view.
    play: Play,
    /// Make every panel frame take this long (ms): the analysis must not notice.
    slow_panel_ms: u32,
}

const VIEWS: [View; 5] = [
    View {
        what: "overview: mix by section, style, level and timbre, history by section",
        file: "panel.png",
        panel_view: "",
        full_history: false,
        play: Play::Dockside,
        slow_panel_ms: 0,
    },
    View {
        what: "every section open to its families, history stacked by family",
        file: "panel-families.png",
        panel_view: "families,family-history",
        full_history: false,
        play: Play::Set(0.0),
        slow_panel_ms: 0,
    },
    View {
        what: "files and set log open, a set log recording",
        file: "panel-setup.png",
        panel_view: "setup,record",
        full_history: false,
        play: Play::Set(0.0),
        slow_panel_ms: 0,
    },
    View {
        what: "ten minutes of history (frame-time measurement)",
        file: "panel-full-history.png",
        panel_view: "",
        full_history: true,
        play: Play::Set(0.0),
        slow_panel_ms: 0,
    },
    View {
        what: "a deliberately slow panel (250 ms per frame): the analysis keeps pace, drops nothing",
        file: "panel-slow.png",
        panel_view: "",
        full_history: false,
        play: Play::Dockside,
        slow_panel_ms: 250,
    },
];

/// Renders every view and checks what each showed.
pub fn run(options: &Options) -> Result<()> {
    let binary = build_standalone(false)?;
    let scene = match &options.audio {
        Some(_) => None,
        None => Some(demo_scene()?),
    };
    let model = options
        .model
        .clone()
        .or_else(|| scene.as_ref().map(|s| s.model.clone()));
    std::fs::create_dir_all(&options.out_dir)?;
    let _xvfb = Guarded::spawn(
        "Xvfb",
        Command::new("Xvfb")
            .args([DISPLAY, "-screen", "0", SCREEN, "-nolisten", "tcp"])
            .stdout(Stdio::null())
            .stderr(Stdio::null()),
    )?;
    sleep(Duration::from_millis(800));
    let _jackd = start_dummy_jack(48_000)?;
    let log_dir = PathBuf::from("target/shot-set-logs");
    let _ = std::fs::remove_dir_all(&log_dir);
    for (i, view) in VIEWS.iter().enumerate() {
        let snapshot_dir = PathBuf::from(format!("target/shot-snapshot-{i}"));
        let _ = std::fs::remove_dir_all(&snapshot_dir);
        let mut env = vec![
            ("WEFT_PANEL_VIEW", view.panel_view.to_owned()),
            ("WEFT_SET_LOG_DIR", log_dir.display().to_string()),
        ];
        if let Some(model) = &model {
            env.push(("WEFT_STYLE_MODEL", model.display().to_string()));
        }
        if view.full_history {
            env.push(("WEFT_TEST_PREFILL_HISTORY", "1".to_owned()));
        }
        if view.slow_panel_ms > 0 {
            env.push(("WEFT_TEST_PANEL_DELAY_MS", view.slow_panel_ms.to_string()));
        }
        let mut app = start_standalone(&binary, Some(&snapshot_dir), Some(DISPLAY), &env)?;
        let inputs = weft_inputs(Duration::from_secs(60))?;
        let (audio, start_s) = match (&options.audio, &scene) {
            (Some(audio), _) => (audio.clone(), 0.0),
            (None, Some(scene)) => match view.play {
                Play::Dockside => (scene.dockside.clone(), 0.0),
                Play::Set(s) => (scene.set.clone(), s),
            },
            (None, None) => bail!("no audio to play"),
        };
        let mut player = play_from(&audio, start_s, &inputs)?;
        sleep(Duration::from_secs_f64(options.seconds));
        let out = options.out_dir.join(view.file);
        run_checked(
            Command::new("import")
                .env("DISPLAY", DISPLAY)
                .args(["-window", "root", "-crop"])
                .arg(format!("{}x{}+0+0", PANEL_SIZE.0, PANEL_SIZE.1))
                .arg(&out),
        )?;
        // The dumps are rewritten every second: wait for current ones, then stop.
        sleep(Duration::from_millis(1200));
        app.stop(Duration::from_secs(1));
        player.stop(Duration::from_secs(1));
        check_picture(&out)?;
        check_snapshot(&snapshot_dir, model.is_some(), options.seconds)?;
        let timing = check_panel(&snapshot_dir, view)?;
        println!("shot: wrote {} ({}){timing}", out.display(), view.what);
    }
    check_set_log(&log_dir)?;
    Ok(())
}

/// The demo scene's files the shots use.
struct Scene {
    set: PathBuf,
    dockside: PathBuf,
    model: PathBuf,
}

/// Builds the Lantern Hall demo scene with four pieces per style (invented music, seeded), or
/// reuses one built before.
fn demo_scene() -> Result<Scene> {
    let dir = PathBuf::from(SCENE_DIR);
    let scene = Scene {
        set: dir.join("set/lantern-hall-set.wav"),
        dockside: dir.join("pieces/dockside/dockside-01.wav"),
        model: dir.join("dockside.weftstyle"),
    };
    if scene.set.exists() && scene.dockside.exists() && scene.model.exists() {
        return Ok(scene);
    }
    println!("shot: building the Lantern Hall demo scene in {SCENE_DIR} (weft demo --pieces 4)");
    run_checked(Command::new("cargo").args(["build", "-q", "-p", "weft"]))?;
    let out = Command::new("target/debug/weft")
        .args(["demo", "--pieces", "4", "--json", "--dir", SCENE_DIR])
        .stdout(Stdio::piped())
        .output()
        .context("cannot run weft demo")?;
    if !out.status.success() {
        bail!(
            "weft demo failed: {}",
            String::from_utf8_lossy(&out.stderr).trim()
        );
    }
    for file in [&scene.set, &scene.dockside, &scene.model] {
        if !file.exists() {
            bail!("weft demo did not write {}", file.display());
        }
    }
    Ok(scene)
}

/// The panel's logical size (the standalone opens it at scale 1; `weft_plugin::PANEL_SIZE`).
const PANEL_SIZE: (u32, u32) = (1000, 740);

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
    Ok(())
}

fn read_json(path: &Path) -> Result<serde_json::Value> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("cannot read {}", path.display()))?;
    serde_json::from_str(&text).with_context(|| format!("{} is not JSON", path.display()))
}

/// Fails unless the analysis heard the audio, dropped nothing, shared it out among families,
/// and (with a model) estimated the style.
fn check_snapshot(dir: &Path, with_model: bool, seconds: f64) -> Result<()> {
    let entry = std::fs::read_dir(dir)
        .with_context(|| format!("no snapshot folder {}", dir.display()))?
        .filter_map(Result::ok)
        .find(|e| {
            // Not a `.json.part` left by a dump the stop interrupted (the dump renames into place).
            let name = e.file_name().to_string_lossy().into_owned();
            name.starts_with("weft-snapshot-") && name.ends_with(".json")
        })
        .context("the standalone wrote no snapshot")?;
    let json = read_json(&entry.path())?;
    let number = |v: &serde_json::Value, name: &str| -> Result<f64> {
        v.as_f64()
            .with_context(|| format!("snapshot field {name} is missing or not a number"))
    };
    let analysed = number(&json["samples_analysed"], "samples_analysed")?;
    let dropped = number(&json["samples_dropped"], "samples_dropped")?;
    let updates = number(&json["mix"]["updates"], "mix.updates")?;
    // JACK runs the plugin from activation on, so at least the seconds the view played (at
    // 48 kHz) must have been analysed: an analysis that fell behind would show here or in drops.
    if analysed < 0.9 * seconds * 48_000.0 {
        bail!("the analysis fell behind: {analysed} samples after {seconds} s");
    }
    if dropped > 0.0 {
        bail!("the panel dropped {dropped} samples at real-time pace");
    }
    if updates < 10.0 || json["mix"]["signal"] != serde_json::Value::Bool(true) {
        bail!("the panel showed no family shares ({updates} updates)");
    }
    if with_model {
        if let Some(problem) = json["style_problem"].as_str() {
            bail!("the style model was refused: {problem}");
        }
        let windows = number(&json["style"]["windows"], "style.windows")?;
        if windows < 1.0 {
            bail!("the panel made no style estimate");
        }
    }
    Ok(())
}

/// Reads the panel's own dump; for the full-history view, reports its frame time.
fn check_panel(dir: &Path, view: &View) -> Result<String> {
    let json = read_json(&dir.join("weft-panel.json"))?;
    let frames = json["frames"].as_f64().unwrap_or(0.0);
    // A slow panel draws about four frames a second.
    let least = if view.slow_panel_ms > 0 { 3.0 } else { 10.0 };
    if frames < least {
        bail!("the panel drew only {frames} frames");
    }
    if view.panel_view.contains("record") && json["recording"] != serde_json::Value::Bool(true) {
        bail!("the set log did not start");
    }
    if view.full_history {
        let cells = json["history_cells"].as_f64().unwrap_or(0.0);
        if cells < 1000.0 {
            bail!("the history was not full ({cells} cells)");
        }
        return Ok(format!(
            "; panel frame time with {cells} history cells: mean {:.2} ms, 95th percentile {:.2} ms, max {:.2} ms over {frames} frames",
            json["mean_ms"].as_f64().unwrap_or(f64::NAN),
            json["p95_ms"].as_f64().unwrap_or(f64::NAN),
            json["max_ms"].as_f64().unwrap_or(f64::NAN),
        ));
    }
    Ok(String::new())
}

/// The recording view's set log must hold rows.
fn check_set_log(dir: &Path) -> Result<()> {
    let log = std::fs::read_dir(dir)
        .with_context(|| format!("no set log folder {}", dir.display()))?
        .filter_map(Result::ok)
        .find(|e| e.file_name().to_string_lossy().ends_with(".csv"))
        .context("no set log was written")?;
    let text = std::fs::read_to_string(log.path())?;
    let rows = text.lines().count().saturating_sub(1);
    if rows < 4 {
        bail!(
            "the set log {} holds only {rows} rows",
            log.path().display()
        );
    }
    println!("shot: set log {} holds {rows} rows", log.path().display());
    Ok(())
}
