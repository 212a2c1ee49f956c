//! `cargo xtask test`: everything CI runs, in order, with one count at the end.
//!
//! 1. setup (installs what is missing);
//! 2. the debug plugin bundle (nice-plug's `assert_process_allocs` is on in debug builds, so an
//!    allocation on the audio thread aborts the host tests);
//! 3. every cargo test in the workspace, the CLAP host grid and the VST3 scan among them;
//! 4. the panel screenshots of every view (with the demo scene and its style model);
//! 5. the soak in its short form (`cargo xtask soak --short`).

use crate::{bundle, setup, shot, soak};
use anyhow::{Context, Result, bail};
use std::io::{BufRead, BufReader};
use std::process::{Command, Stdio};

/// Totals parsed from cargo's `test result:` lines.
#[derive(Debug, Default, Clone, Copy, PartialEq, Eq)]
pub struct Counts {
    /// Tests that passed.
    pub passed: u64,
    /// Tests that failed.
    pub failed: u64,
    /// Tests marked `#[ignore]`.
    pub ignored: u64,
}

impl Counts {
    /// Adds the numbers of one `test result: ok. 3 passed; 0 failed; 1 ignored; …` line.
    pub fn add_line(&mut self, line: &str) {
        let Some(rest) = line.trim().strip_prefix("test result:") else {
            return;
        };
        for part in rest.split(';') {
            let words: Vec<&str> = part.split_whitespace().collect();
            let n = |w: &str| w.trim_end_matches('.').parse::<u64>().ok();
            for pair in words.windows(2) {
                match (n(pair[0]), pair[1]) {
                    (Some(v), "passed") => self.passed += v,
                    (Some(v), "failed") => self.failed += v,
                    (Some(v), "ignored") => self.ignored += v,
                    _ => {}
                }
            }
        }
    }
}

/// Runs the whole test suite.
pub fn run() -> Result<()> {
    setup::run(false)?;
    bundle(&["weft".to_owned()])?;
    let mut counts = cargo_tests()?;
    println!(
        "xtask: cargo tests: {} passed, {} failed, {} ignored",
        counts.passed, counts.failed, counts.ignored
    );
    let shot_ok = match shot::run(&shot::Options::default()) {
        Ok(()) => true,
        Err(err) => {
            eprintln!("xtask: the panel screenshot check failed: {err:#}");
            false
        }
    };
    if shot_ok {
        counts.passed += 1;
    } else {
        counts.failed += 1;
    }
    // The soak in its short form (the full one is `cargo xtask soak`).
    match soak::run(&["--short".to_owned()]) {
        Ok(()) => counts.passed += 1,
        Err(err) => {
            eprintln!("xtask: the short soak failed: {err:#}");
            counts.failed += 1;
        }
    }
    // The closing line CI reads.
    println!("tests: {} passed, {} failed", counts.passed, counts.failed);
    if counts.failed > 0 {
        bail!("{} test(s) failed", counts.failed);
    }
    if counts.passed == 0 {
        bail!("no test ran");
    }
    Ok(())
}

fn cargo_tests() -> Result<Counts> {
    let mut child = Command::new(env!("CARGO"))
        .args(["test", "--workspace", "--no-fail-fast"])
        .stdout(Stdio::piped())
        .spawn()
        .context("could not start cargo test")?;
    let mut counts = Counts::default();
    let stdout = child.stdout.take().context("cargo test has no output")?;
    for line in BufReader::new(stdout).lines() {
        let line = line?;
        println!("{line}");
        counts.add_line(&line);
    }
    let status = child.wait()?;
    if !status.success() && counts.failed == 0 {
        // A build failure or a crashed test binary (an abort in the host tests) reports no count.
        counts.failed += 1;
        eprintln!("xtask: cargo test failed without a failing test count ({status})");
    }
    Ok(counts)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_add_up_over_lines() {
        let mut c = Counts::default();
        c.add_line("test result: ok. 12 passed; 0 failed; 1 ignored; 0 measured; 0 filtered out; finished in 0.01s");
        c.add_line(
            "test result: FAILED. 3 passed; 2 failed; 0 ignored; 0 measured; 0 filtered out",
        );
        c.add_line("running 5 tests");
        assert_eq!(
            c,
            Counts {
                passed: 15,
                failed: 2,
                ignored: 1
            }
        );
    }
}
