//! `weft`: Weft's command-line tool for whole files and folders.
//!
//! This first version reads WAV files and prints each file's level timeline summary, using the
//! same engine as the plugin. Decoding of every common format, folders, timelines and plots come
//! with the command-line issue.

#![forbid(unsafe_code)]

use anyhow::{Context, Result, bail};
use clap::{Parser, Subcommand};
use std::path::{Path, PathBuf};
use weft_engine::{AnalysisSettings, Analyzer, SILENCE_FLOOR_DB};

/// Shows what an arrangement is made of: files in, reports out.
#[derive(Parser)]
#[command(version, about)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Analyse WAV files and print a summary per file.
    Analyze {
        /// The files to analyse.
        #[arg(required = true)]
        files: Vec<PathBuf>,
    },
}

/// What one file's analysis found.
struct Summary {
    seconds: f64,
    frames: u64,
    peak_db: f32,
    loudest_rms_db: f32,
    mean_rms_db: f32,
}

fn main() -> std::process::ExitCode {
    let cli = Cli::parse();
    match cli.command {
        Command::Analyze { files } => {
            let mut failed = 0;
            for file in &files {
                match analyse(file) {
                    Ok(s) => println!(
                        "{}: {:.2} s, {} frames, peak {:.1} dBFS, loudest frame RMS {:.1} dBFS, mean RMS {:.1} dBFS",
                        file.display(),
                        s.seconds,
                        s.frames,
                        s.peak_db,
                        s.loudest_rms_db,
                        s.mean_rms_db
                    ),
                    Err(err) => {
                        failed += 1;
                        eprintln!("{}: {err:#}", file.display());
                    }
                }
            }
            if failed > 0 {
                std::process::ExitCode::from(1)
            } else {
                std::process::ExitCode::SUCCESS
            }
        }
    }
}

/// Reads a WAV file as mid and side signals.
fn read_wav(path: &Path) -> Result<(u32, Vec<f32>, Vec<f32>)> {
    let mut reader = hound::WavReader::open(path).context("not a readable WAV file")?;
    let spec = reader.spec();
    let channels = usize::from(spec.channels);
    if channels == 0 {
        bail!("the file declares no channels");
    }
    let samples: Vec<f32> = match spec.sample_format {
        hound::SampleFormat::Float => reader
            .samples::<f32>()
            .collect::<Result<_, _>>()
            .context("the file is truncated or damaged")?,
        hound::SampleFormat::Int => {
            if !(1..=32).contains(&spec.bits_per_sample) {
                bail!("unsupported sample size of {} bits", spec.bits_per_sample);
            }
            let scale = 1.0 / f64::from(1u32 << (spec.bits_per_sample - 1));
            reader
                .samples::<i32>()
                .map(|s| s.map(|v| (f64::from(v) * scale) as f32))
                .collect::<Result<_, _>>()
                .context("the file is truncated or damaged")?
        }
    };
    let frames = samples.len() / channels;
    let mut mid = Vec::with_capacity(frames);
    let mut side = Vec::with_capacity(frames);
    for frame in samples.chunks_exact(channels) {
        let (l, r) = (frame[0], frame[channels.min(2) - 1]);
        mid.push(0.5 * (l + r));
        side.push(0.5 * (l - r));
    }
    Ok((spec.sample_rate, mid, side))
}

fn analyse(path: &Path) -> Result<Summary> {
    let (rate, mid, side) = read_wav(path)?;
    let settings = AnalysisSettings::for_sample_rate(f64::from(rate))?;
    let mut analyzer = Analyzer::new(settings);
    let mut summary = Summary {
        seconds: mid.len() as f64 / f64::from(rate),
        frames: 0,
        peak_db: SILENCE_FLOOR_DB,
        loudest_rms_db: SILENCE_FLOOR_DB,
        mean_rms_db: SILENCE_FLOOR_DB,
    };
    let mut power = 0.0_f64;
    let mut on_frame = |f: &weft_engine::FrameResult| {
        summary.frames += 1;
        summary.peak_db = summary.peak_db.max(f.level.peak_db);
        summary.loudest_rms_db = summary.loudest_rms_db.max(f.level.rms_db);
        power += 10f64.powf(f64::from(f.level.rms_db) / 10.0);
    };
    analyzer.process(&mid, Some(&side), &mut on_frame);
    analyzer.finish(&mut on_frame);
    if summary.frames > 0 {
        summary.mean_rms_db =
            weft_engine::level::amplitude_to_db((power / summary.frames as f64).sqrt());
    }
    Ok(summary)
}
