//! `cargo xtask soak [--short]`: the plugin in the test host for hours (`tests/tests/soak.rs`,
//! an ignored test so that `cargo xtask test` never runs it).
//!
//! Full: 2 hours of varied audio at offline pace and 10 minutes at real-time pace. `--short`
//! (the CI form): 5 minutes and 20 seconds. Builds the debug bundle first (nice-plug's
//! `assert_process_allocs` is on in debug builds, so an allocation on the audio thread aborts
//! the soak), then prints the test's report: RSS at the start and the end, threads before and
//! after, samples analysed and dropped.

use crate::{bundle, run_checked};
use anyhow::Result;
use std::process::Command;

/// Seconds at offline pace and at real-time pace, full and short.
const FULL_S: (u32, u32) = (7_200, 600);
const SHORT_S: (u32, u32) = (300, 20);

/// Runs the soak.
pub fn run(args: &[String]) -> Result<()> {
    let short = args.iter().any(|a| a == "--short");
    let (offline_s, realtime_s) = if short { SHORT_S } else { FULL_S };
    bundle(&["weft".to_owned()])?;
    println!("xtask: soak, {offline_s} s offline pace and {realtime_s} s real-time pace");
    run_checked(
        Command::new(env!("CARGO"))
            .args([
                "test",
                "-p",
                "weft-tests",
                "--test",
                "soak",
                "--",
                "--ignored",
                "--nocapture",
                "--test-threads",
                "1",
            ])
            .env("WEFT_SOAK_OFFLINE_S", offline_s.to_string())
            .env("WEFT_SOAK_REALTIME_S", realtime_s.to_string()),
    )
}
