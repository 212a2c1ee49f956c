//! Machine setup: system packages, the General MIDI SoundFont and the Python reference tools.
//!
//! Idempotent: it installs only what is missing and says what it did.

use crate::run_checked;
use anyhow::{Context, Result, bail};
use std::path::Path;
use std::process::Command;

/// Debian/Ubuntu packages and why Weft needs each group.
pub const APT_PACKAGES: &[(&str, &[&str])] = &[
    (
        "building the standalone program (ALSA and JACK headers)",
        &["pkg-config", "libasound2-dev", "libjack-jackd2-dev"],
    ),
    (
        "running the panel without a display, and screenshots",
        &[
            "xvfb",
            "xauth",
            "libgl1-mesa-dri",
            "libegl1",
            "libegl-mesa0",
            "libx11-xcb1",
            "libxkbcommon-x11-0",
            "imagemagick",
        ],
    ),
    (
        "live input without audio hardware (a dummy JACK server and a file player)",
        &["jackd2", "jack-tools"],
    ),
    (
        "the General MIDI SoundFont (FluidR3_GM, MIT licence) for palettes and the demo",
        &["fluid-soundfont-gm"],
    ),
    (
        "sung vowels for the default palette's voice family (espeak-ng speech synthesiser)",
        &["espeak-ng"],
    ),
    (
        "loading the VST3 bundle in a headless scanner (ardour-vst3-scanner)",
        &["ardour"],
    ),
    (
        "the command-line tool's tests and plots (FFmpeg encodes test files, GNU time measures memory, fonts and fontconfig for plot text)",
        &["ffmpeg", "time", "fonts-dejavu-core", "libfontconfig1-dev"],
    ),
];

/// The SoundFont that `fluid-soundfont-gm` installs.
pub const SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";
/// The Python virtual environment with the reference tools.
pub const VENV: &str = ".venv";
/// The pinned reference tools.
pub const REQUIREMENTS: &str = "tests/python/requirements.txt";

fn installed(package: &str) -> bool {
    Command::new("dpkg-query")
        .args(["-W", "-f=${Status}", package])
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).contains("install ok installed"))
        .unwrap_or(false)
}

fn is_root() -> bool {
    Command::new("id")
        .arg("-u")
        .output()
        .map(|o| String::from_utf8_lossy(&o.stdout).trim() == "0")
        .unwrap_or(false)
}

fn apt(args: &[&str]) -> Result<()> {
    let mut cmd = if is_root() {
        Command::new("apt-get")
    } else {
        let mut c = Command::new("sudo");
        c.arg("apt-get");
        c
    };
    cmd.env("DEBIAN_FRONTEND", "noninteractive").args(args);
    run_checked(&mut cmd)
}

/// Installs what is missing (or, with `check_only`, fails listing it). Returns the lines it
/// reported.
pub fn run(check_only: bool) -> Result<Vec<String>> {
    let mut report = Vec::new();
    let mut missing = Vec::new();
    for (why, packages) in APT_PACKAGES {
        let lacking: Vec<&str> = packages.iter().copied().filter(|p| !installed(p)).collect();
        if lacking.is_empty() {
            report.push(format!("ok      {why}"));
        } else {
            report.push(format!("missing {why}: {}", lacking.join(" ")));
            missing.extend(lacking);
        }
    }
    let venv_python = Path::new(VENV).join("bin/python");
    let venv_ok = venv_python.exists() && requirements_met(&venv_python);
    report.push(if venv_ok {
        format!("ok      Python reference tools in {VENV}")
    } else {
        format!("missing Python reference tools in {VENV} ({REQUIREMENTS})")
    });
    for line in &report {
        println!("setup: {line}");
    }
    if check_only {
        if !missing.is_empty() || !venv_ok {
            bail!("this machine lacks what is listed above; run `cargo xtask setup`");
        }
        return Ok(report);
    }
    if !missing.is_empty() {
        println!("setup: installing {}", missing.join(" "));
        apt(&["update", "-q"])?;
        let mut args = vec!["install", "-y", "-q", "--no-install-recommends"];
        args.extend(missing.iter().copied());
        apt(&args)?;
        report.push(format!("installed {}", missing.join(" ")));
    }
    if !Path::new(SOUNDFONT).exists() {
        bail!("{SOUNDFONT} is missing although fluid-soundfont-gm is installed");
    }
    if !venv_ok {
        make_venv()?;
        report.push(format!("created {VENV} with {REQUIREMENTS}"));
    }
    println!("setup: done");
    Ok(report)
}

fn requirements_met(python: &Path) -> bool {
    // `pip check`-like test of the pins that matter: import and compare versions.
    let probe = "import librosa, sklearn, numpy, scipy, soundfile, pyloudnorm; \
                 assert librosa.__version__ == '0.11.0', librosa.__version__; \
                 assert sklearn.__version__ == '1.9.1', sklearn.__version__";
    Command::new(python)
        .args(["-c", probe])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false)
}

fn make_venv() -> Result<()> {
    println!("setup: creating {VENV} (Python reference tools, about a minute)");
    let made = Command::new("python3")
        .args(["-m", "venv", VENV])
        .status()
        .context("python3 is not installed")?;
    if !made.success() {
        // Debian's own python3 needs python3-venv for `-m venv`.
        apt(&[
            "install",
            "-y",
            "-q",
            "--no-install-recommends",
            "python3-venv",
        ])?;
        run_checked(Command::new("python3").args(["-m", "venv", "--clear", VENV]))?;
    }
    let pip = Path::new(VENV).join("bin/pip");
    run_checked(Command::new(&pip).args(["install", "-q", "--upgrade", "pip"]))?;
    run_checked(Command::new(&pip).args(["install", "-q", "-r", REQUIREMENTS]))?;
    if !requirements_met(&Path::new(VENV).join("bin/python")) {
        bail!("{VENV} was created but the pinned reference tools do not import");
    }
    Ok(())
}
