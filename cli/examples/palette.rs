//! Temporary driver for `weft palette …` until the command is wired into the `weft` binary.
#![allow(missing_docs)]
#![allow(dead_code)]

#[path = "../src/decode.rs"]
mod decode;
#[path = "../src/palette.rs"]
mod palette;
#[path = "../src/resample.rs"]
mod resample;

use clap::Parser;

#[derive(Parser)]
struct Cli {
    #[command(flatten)]
    args: palette::PaletteArgs,
}

fn main() -> anyhow::Result<()> {
    palette::run(Cli::parse().args)
}
