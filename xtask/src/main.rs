//! Project tasks, run as `cargo xtask <task>`:
//!
//! - `bundle weft [--release]`: builds `target/bundled/Weft.clap` and `Weft.vst3`;
//! - `setup [--check]`: installs what a fresh Debian/Ubuntu machine lacks (system packages, the
//!   General MIDI SoundFont, the Python reference tools) and says what it did;
//! - `test`: setup, bundle, every test, the VST3 scan and the panel screenshot check;
//! - `live`: the standalone program on the default audio input, or on a demo signal through a
//!   dummy JACK server when the machine has no audio input;
//! - `shot [--out DIR]`: renders every panel view under Xvfb, fed with audio, into PNGs.

#![forbid(unsafe_code)]

mod bench_cli;
mod bench_timbre;
mod live;
mod palette;
mod setup;
mod shot;
mod signal;
mod soak;
mod testrun;

use anyhow::{Context, Result, bail};
use std::path::{Path, PathBuf};
use std::process::Command;

const USAGE: &str = "\
usage: cargo xtask <task>

  bundle weft [--release]   build target/bundled/Weft.clap and Weft.vst3
  setup [--check]           install what this machine lacks (--check: only report)
  test                      set up, bundle, and run every test
  live                      run the standalone panel on the default input (or a demo signal)
  shot [--out DIR]          render every panel view under Xvfb into PNGs (default shots/)
  bench-timbre              time the timbre descriptors against librosa on a 3-minute file
  bench-cli                 realtime factor of `weft analyze` on a folder of 20 3-minute files
  palette [--split-only] [--check]
                            regenerate the built-in palette from FluidR3_GM and espeak-ng
                            (--split-only: fit only its split atoms)
  soak [--short]            the plugin in the test host: 2 h offline + 10 min real time
                            (--short: 5 min + 20 s, the CI form)
";

fn main() -> Result<()> {
    let root = workspace_root()?;
    std::env::set_current_dir(&root)
        .with_context(|| format!("cannot enter the workspace at {}", root.display()))?;
    let mut args = std::env::args().skip(1);
    let task = args.next().unwrap_or_default();
    let rest: Vec<String> = args.collect();
    match task.as_str() {
        "bundle" => bundle(&rest),
        "setup" => setup::run(rest.iter().any(|a| a == "--check")).map(|_| ()),
        "test" => testrun::run(),
        "live" => live::run(),
        "shot" => shot::run(&shot::Options::parse(&rest)?),
        "bench-timbre" => bench_timbre::run(),
        "bench-cli" => bench_cli::run(),
        "palette" => palette::run(&rest),
        "soak" => soak::run(&rest),
        "" | "help" | "--help" | "-h" => {
            print!("{USAGE}");
            Ok(())
        }
        other => bail!("unknown task '{other}'\n\n{USAGE}"),
    }
}

/// The workspace root: the parent of this crate's folder.
pub fn workspace_root() -> Result<PathBuf> {
    let here = Path::new(env!("CARGO_MANIFEST_DIR"));
    here.parent()
        .map(Path::to_path_buf)
        .context("the xtask crate has no parent folder")
}

/// Runs nice-plug's bundler, accepting `weft` as the name of the plugin package.
pub fn bundle(args: &[String]) -> Result<()> {
    let args: Vec<String> = args
        .iter()
        .map(|a| {
            if a == "weft" {
                "weft-plugin".to_owned()
            } else {
                a.clone()
            }
        })
        .collect();
    let mut full = vec!["bundle".to_owned()];
    full.extend(args);
    nice_plug_xtask::main_with_args("cargo xtask", full)
}

/// Runs a command, failing with its name when it cannot start or exits non-zero.
pub fn run_checked(cmd: &mut Command) -> Result<()> {
    let shown = format!("{cmd:?}");
    let status = cmd
        .status()
        .with_context(|| format!("could not start {shown}"))?;
    if !status.success() {
        bail!("{shown} failed ({status})");
    }
    Ok(())
}

/// Builds the standalone program (debug unless `release`) and returns its path.
pub fn build_standalone(release: bool) -> Result<PathBuf> {
    let mut cmd = Command::new(env!("CARGO"));
    cmd.args([
        "build",
        "-p",
        "weft-plugin",
        "--features",
        "standalone",
        "--bin",
        "weft-standalone",
    ]);
    if release {
        cmd.arg("--release");
    }
    run_checked(&mut cmd)?;
    let profile = if release { "release" } else { "debug" };
    Ok(PathBuf::from("target")
        .join(profile)
        .join("weft-standalone"))
}
