//! What every end-to-end test of the `weft` binary needs: running it and reading its output.

#![allow(dead_code)] // each test file uses its own subset

use std::path::Path;
use std::process::{Command, Output};

/// Runs the built `weft` binary with `args`.
pub fn weft(args: &[&str]) -> Output {
    Command::new(env!("CARGO_BIN_EXE_weft"))
        .args(args)
        .output()
        .expect("the weft binary runs")
}

/// Output bytes as text.
pub fn text(bytes: &[u8]) -> String {
    String::from_utf8_lossy(bytes).into_owned()
}

/// A temporary path as a command-line argument.
pub fn path_str(p: &Path) -> &str {
    p.to_str().expect("temporary paths are UTF-8")
}
