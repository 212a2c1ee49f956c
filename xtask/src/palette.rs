//! `cargo xtask palette`: regenerates the built-in palette, `engine/src/palette/default.weftpal`,
//! from the General MIDI SoundFont FluidR3_GM (Debian `fluid-soundfont-gm`) and sung vowels from
//! espeak-ng, with a fixed seed, so the same machine setup always produces the same file.
//!
//! With `--split-only` it keeps the current file's atoms and presence model and fits only the
//! split atoms (minutes instead of hours). With `--check` it then runs a held-out `weft palette check` on the new file and prints the
//! table.

use crate::run_checked;
use crate::setup::SOUNDFONT;
use anyhow::{Context, Result, bail};
use std::path::Path;
use std::process::Command;

/// Where the built-in palette lives (embedded by `include_bytes!`).
pub const DEFAULT_PALETTE: &str = "engine/src/palette/default.weftpal";
/// The seed of the built-in palette.
pub const SEED: &str = "1";

/// How the built-in palette's presence model is trained, chosen by measurement on held-out
/// mixes (`weft palette check --seed 1 --mixes 60`, energy misattributed per family): more and
/// shorter training mixes and one hidden layer of 64 units beat logistic regression on 1 500
/// mixes of 3 s (50.6 %): 4 000 × 3 s 45.1 %, 8 000 × 3 s 41.5 %, 16 000 × 1.5 s 40.6 %; 128
/// hidden units were no better than 64 (43.0 % at 8 000 × 3 s). With the fine-resolution
/// presence features (schema presence-v2) and thresholds that favour precision (F_β, β = 0.5,
/// the default) the same training reached 33.5 % (seeds 2 and 3: 36.2 %, 34.8 %; mean of seeds
/// 1–6 33.8 %). A cosine-decaying step size brought the mean of seeds 1–6 to 32.1 %, an ensemble
/// of four such networks (256 hidden units in all) to 31.2 %. The ensemble's thresholds favour
/// precision less than the default: β = 0.35 / 0.5 / 0.7 / 0.85 / 1 gave 33.4 / 32.6 / 32.2 /
/// 33.0 / 34.3 % (mean of seeds 1–3), and β = 0.7 a mean of 30.9 % over seeds 1–6 (per section
/// 27.4 → 26.8 %). Twice the training mixes (48 000) brought seeds 1–3 from 32.2 to 30.7 %
/// (per section 28.1 → 26.7 %), and a direct share network of 256 hidden units weighing the
/// amount stage (exponent 0.5; 0.5 beat 1 and 2 in a numpy trial on the same features) to
/// 29.0 % (per section 25.5 %); over seeds 1–6, 30.9 → 28.1 % (per section 26.8 → 24.8 %).
/// Letting the share network admit a family the presence stage left out, from a share of 0.25
/// (0.1 / 0.15 / 0.2 / 0.25 / 0.3 gave 28.3 / 27.5 / 27.2 / 27.3 / 27.6 %, mean of seeds 1–3;
/// on seeds 4–6, not used to choose it, 27.1 → 25.1 %), brought seeds 1–6 to 26.2 % (per
/// section 23.0 %); twice the training mixes again (96 000; 82 min on 2 cores) to 25.1 % (per
/// section 22.0 %, F1 0.74; without the admit rule 27.7 %). Fitting the networks on whole
/// batches as matrix products made training about ten times faster, so twice the training mixes
/// once more (192 000; 37 min on 2 cores, 13.8 GB of memory at most) cost less time than 96 000
/// had, and brought seeds 1–6 to 24.5 % (per section 21.6 %, F1 0.74). Twice the hidden units
/// on that data (four networks of 128 for presence, 512 for shares; 47 min) brought them to
/// 23.8 % (per section 20.9 %, F1 0.74; every seed improved). The per-family movement features
/// (schema presence-v3: each family's share spread, share at the onsets and log-energy change
/// over the context) gave 27.9 → 27.3 % over seeds 1–6 in a build of 24 000 mixes (per section
/// 24.5 → 24.0 %), and on this training 23.5 → 23.2 % over seeds 1–12 (per section 20.6 →
/// 20.4 %, F1 0.745 → 0.750; 9 of 12 seeds better; 51 min). The mixes' length was checked
/// again on that schema, in builds of the same audio (24 000 × 1.5 s, 2 × 128 presence units, a
/// 256-unit share network): 12 000 × 3 s gave 28.2 % and 36 000 × 1 s 28.0 %, against 27.3 %
/// (mean of seeds 1–6), so the mixes stay 1.5 s long. The rows of one mix sound alike: the
/// same small build on 72 000 mixes keeping every third row (`--row-stride 3`: as many rows and
/// the same training time) gave 25.4 % (per section 24.0 → 22.4 %, F1 0.711 → 0.731, every seed
/// better), and with boosted trees beside the network (`--trees 300 --tree-depth 6`) 24.4 % (per
/// section 21.4 %, F1 0.744, every seed better than without them; analysis about 1.6 times
/// slower). On 24 000 mixes the trees alone gave 26.8 %. At this scale, with the same 2.44 M
/// rows drawn from twice the mixes (384 000, every second row) and 300 trees of depth 6 per
/// family (each tree sees at most 150 000 rows; no family stopped early), seeds 1–6 went from
/// 23.65 to 23.04 % (per section 20.87 → 20.56 %, F1 0.746 → 0.767; every seed better per
/// family and in F1, five of six per section) and `weft analyze` takes about 1.3 times the CPU
/// time. 116 min on 2 cores, shared with other work (render 51, networks 20, trees 33, share
/// network 9); 14.3 GB resident during the trees (sampled, not a measured peak). A third as
/// many rows per mix (`--row-stride 3`) did better on small builds but needs 576 000 mixes for
/// the same rows; it was not tried at this scale.
/// `weft palette learn` keeps the lighter defaults, which a user's own folders can afford.
const PRESENCE_TRAINING: [&str; 24] = [
    "--mixes",
    "384000",
    "--row-stride",
    "2",
    "--trees",
    "300",
    "--tree-depth",
    "6",
    "--mix-seconds",
    "1.5",
    "--hidden",
    "128",
    "--members",
    "4",
    "--epochs",
    "30",
    "--presence-beta",
    "0.7",
    "--share-hidden",
    "512",
    "--share-exponent",
    "0.5",
    "--share-admit",
    "0.25",
];

/// How the built-in palette's split atoms are fitted (`crate::shares::split` in the engine has
/// the measurements): on 16 000 mixes of 4 s, 300 updates, seeds 1–6 went from 23.04 to 22.44 %
/// (per section 20.56 → 20.01 %, F1 0.767 → 0.767); 8 000 mixes and 150 updates gave 22.55 %,
/// 4 000 mixes and 100 updates 22.68 %. `--split-only` takes about 25 min on 2 cores (rendering
/// and solving the mixes, then the updates) and 7.8 GB of memory at most.
/// With `--split-only` the task keeps the palette file's atoms and presence model and fits only
/// these, which the full build would fit the same way as its last step.
const SPLIT_TRAINING: [&str; 6] = [
    "--split-mixes",
    "16000",
    "--split-seconds",
    "4",
    "--split-updates",
    "300",
];

/// Runs the task.
pub fn run(args: &[String]) -> Result<()> {
    if !Path::new(SOUNDFONT).exists() {
        bail!("{SOUNDFONT} is missing: run `cargo xtask setup`");
    }
    let tmp = format!("{DEFAULT_PALETTE}.new");
    let mut cmd = Command::new(env!("CARGO"));
    cmd.args([
        "run",
        "--release",
        "-q",
        "-p",
        "weft",
        "--",
        "palette",
        "render",
    ])
    .args([
        "--soundfont",
        SOUNDFONT,
        "--voice",
        "espeak",
        "--seed",
        SEED,
    ])
    .args(PRESENCE_TRAINING)
    .args(SPLIT_TRAINING)
    .args(["--out", &tmp]);
    if args.iter().any(|a| a == "--split-only") {
        cmd.args(["--split-only", DEFAULT_PALETTE]);
    }
    run_checked(&mut cmd)?;
    std::fs::rename(&tmp, DEFAULT_PALETTE)
        .with_context(|| format!("cannot replace {DEFAULT_PALETTE}"))?;
    let size = std::fs::metadata(DEFAULT_PALETTE)?.len();
    println!("palette: wrote {DEFAULT_PALETTE} ({size} bytes)");
    if args.iter().any(|a| a == "--check") {
        let mut cmd = Command::new(env!("CARGO"));
        cmd.args([
            "run",
            "--release",
            "-q",
            "-p",
            "weft",
            "--",
            "palette",
            "check",
        ])
        .args([
            "--palette",
            DEFAULT_PALETTE,
            "--soundfont",
            SOUNDFONT,
            "--seed",
            SEED,
        ]);
        run_checked(&mut cmd)?;
    }
    Ok(())
}
