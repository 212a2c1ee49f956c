//! `cargo xtask bench-cli`: the throughput of `weft analyze` on a folder of 20 three-minute
//! files (issue 6's goal: at least [`GOAL`]× real time per core for the full pipeline).
//!
//! 1. Makes the folder `target/weft-bench/cli-folder/` once and reuses it while its manifest
//!    (`target/weft-bench/cli-folder.json`: generator version, seed, every file's name and size)
//!    matches: 20 pieces of 3 minutes composed by the engine's seeded composer in the three
//!    Lantern Hall set styles (drums, bass lines, chords, lines and pads from FluidR3_GM), each
//!    with a quiet passage; at 48 kHz and 44.1 kHz, mono and stereo, as 16-bit, 24-bit and float
//!    WAV and as FLAC (encoded with ffmpeg), so decoding is part of what is measured.
//! 2. Builds the release `weft` and runs `weft analyze --json --jobs 1` on the folder (decoding,
//!    level, descriptors, shares with the built-in palette, windows, summary), then the same with
//!    `--no-shares` (descriptors only), then with one job per core, then the full one-job run
//!    again. Each run's audio seconds come from weft's closing batch object; its wall time is
//!    measured around the whole process and its CPU time (user + system) from this process's
//!    waited-for children in `/proc/self/stat`, because the machine is shared: the CPU figure
//!    does not count time spent waiting for other people's work.
//! 3. Prints a table and ends with `goal: ≥ 200× (met|not met)` and
//!    `realtime_per_core: <audio s / CPU s>` of the better full one-job run.

use crate::run_checked;
use crate::setup::SOUNDFONT;
use anyhow::{Context, Result, bail};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Instant;
use weft_engine::scene::{
    ClipBank, Composer, Mix, SceneRng, SoundFontRenderer, general_midi_voicings,
    lantern_hall_families,
};

/// Where the files are made.
const FOLDER: &str = "target/weft-bench/cli-folder";
/// What was made there (outside the folder, so `weft analyze` never sees it).
const MANIFEST: &str = "target/weft-bench/cli-folder.json";
/// Bump when the files' recipe changes, so old folders are made again.
const GENERATOR_VERSION: u64 = 1;
/// Seed of every piece (piece `i` derives its own stream from it).
const SEED: u64 = 6;
/// Number of files.
const FILES: usize = 20;
/// Length of every file, seconds.
const DURATION_S: u32 = 180;
/// The set styles the pieces cycle through (ARCHITECTURE.md's demo scenario).
const STYLES: [&str; 3] = ["parlour", "dockside", "neon"];
/// Gains of a piece's families, dB (the demo's range).
const GAIN_RANGE_DB: (f64, f64) = (-9.0, 3.0);
/// Gain of the quiet passage, dB.
const QUIET_GAIN_DB: f64 = -40.0;
/// Length of the quiet passage, seconds (drawn in this range).
const QUIET_RANGE_S: (f64, f64) = (8.0, 20.0);
/// Fade into and out of the quiet passage, seconds.
const QUIET_FADE_S: f64 = 0.5;
/// Furthest a stereo file's family is panned from the centre (−1 left … 1 right).
const MAX_PAN: f64 = 0.7;
/// The goal of issue 6: full pipeline, audio seconds per CPU second of one job.
const GOAL: f64 = 200.0;

/// How a file is stored.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Format {
    Wav16,
    Wav24,
    WavFloat,
    Flac16,
    Flac24,
}

impl Format {
    fn name(self) -> &'static str {
        match self {
            Self::Wav16 => "wav16",
            Self::Wav24 => "wav24",
            Self::WavFloat => "wavf32",
            Self::Flac16 => "flac16",
            Self::Flac24 => "flac24",
        }
    }

    fn extension(self) -> &'static str {
        match self {
            Self::Flac16 | Self::Flac24 => "flac",
            _ => "wav",
        }
    }
}

/// One file of the folder.
#[derive(Debug, Clone)]
struct FileSpec {
    index: usize,
    style: &'static str,
    sample_rate_hz: u32,
    channels: u16,
    format: Format,
}

impl FileSpec {
    /// File `index` of the folder: styles in turn, odd files at 44.1 kHz, every fourth file
    /// (from the second) stereo, and the formats in a cycle of ten with two FLAC files in it.
    fn new(index: usize) -> Self {
        const FORMATS: [Format; 10] = [
            Format::Wav16,
            Format::Wav24,
            Format::WavFloat,
            Format::Wav16,
            Format::Flac16,
            Format::Wav24,
            Format::WavFloat,
            Format::Wav16,
            Format::Wav24,
            Format::Flac24,
        ];
        Self {
            index,
            style: STYLES[index % STYLES.len()],
            sample_rate_hz: if index.is_multiple_of(2) {
                48_000
            } else {
                44_100
            },
            channels: if index % 4 == 1 { 2 } else { 1 },
            format: FORMATS[index % FORMATS.len()],
        }
    }

    fn file_name(&self) -> String {
        format!(
            "{:02}-{}-{}k-{}ch-{}.{}",
            self.index + 1,
            self.style,
            self.sample_rate_hz / 1000,
            self.channels,
            self.format.name(),
            self.format.extension()
        )
    }

    fn seed(&self) -> u64 {
        SEED.wrapping_mul(0x9E37_79B9_7F4A_7C15)
            .wrapping_add(self.index as u64)
    }
}

/// Runs the benchmark.
pub fn run() -> Result<()> {
    let specs: Vec<FileSpec> = (0..FILES).map(FileSpec::new).collect();
    let folder = Path::new(FOLDER);
    prepare_folder(folder, &specs)?;

    run_checked(Command::new(env!("CARGO")).args(["build", "--release", "-q", "-p", "weft"]))?;
    let weft = PathBuf::from("target/release/weft");
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let ticks_per_s = clock_ticks_per_s()?;
    println!(
        "bench-cli: {FILES} files × {DURATION_S} s in {FOLDER} (seed {SEED}), {cores} cores, \
         weft {}",
        weft.display()
    );

    let mut runs = Vec::new();
    for (label, jobs, shares) in [
        ("full", 1, true),
        ("no shares", 1, false),
        ("full", cores, true),
        // The full one-job run again, so a burst of load from others during one of them
        // cannot decide the headline (the better is kept; common practice on shared machines).
        ("full, again", 1, true),
    ] {
        let r = run_weft(&weft, folder, label, jobs, shares, ticks_per_s)?;
        println!(
            "  {label} --jobs {jobs}: {:.1} s of audio in {:.2} s wall, {:.2} s CPU (weft's own \
             figure: {:.0}× real time)",
            r.audio_s,
            r.wall_s,
            r.cpu_s,
            r.audio_s / r.weft_elapsed_s
        );
        runs.push(r);
    }

    println!();
    println!(
        "{:<12} {:>4} {:>8} {:>8} {:>8} {:>10} {:>10} {:>12} {:>12}",
        "run",
        "jobs",
        "audio s",
        "wall s",
        "CPU s",
        "cores used",
        "× (wall)",
        "× per core",
        "× per CPU s"
    );
    for r in &runs {
        println!(
            "{:<12} {:>4} {:>8.1} {:>8.2} {:>8.2} {:>10.2} {:>10.0} {:>12.0} {:>12.0}",
            r.label,
            r.jobs,
            r.audio_s,
            r.wall_s,
            r.cpu_s,
            r.cpu_s / r.wall_s,
            r.audio_s / r.wall_s,
            r.audio_s / (r.wall_s * r.jobs as f64),
            r.audio_s / r.cpu_s
        );
    }
    println!(
        "(cores used = CPU s / wall s, below the jobs when others' work holds cores; × per core \
         = audio s / (wall s × jobs); × per CPU s = audio s / (user + system s))"
    );
    let full = runs
        .iter()
        .filter(|r| r.shares && r.jobs == 1)
        .min_by(|a, b| a.cpu_s.total_cmp(&b.cpu_s))
        .context("no full one-job run")?;
    if let Some(plain) = runs.iter().find(|r| !r.shares) {
        let shares_s = full.cpu_s - plain.cpu_s;
        println!(
            "shares with the built-in palette: {shares_s:.2} CPU s of {:.2} ({:.0} %); \
             decoding, level and descriptors: {:.2} CPU s",
            full.cpu_s,
            100.0 * shares_s / full.cpu_s,
            plain.cpu_s
        );
    }
    let per_core = full.audio_s / full.cpu_s;
    println!(
        "goal: ≥ {GOAL:.0}× ({})",
        if per_core >= GOAL { "met" } else { "not met" }
    );
    println!("realtime_per_core: {per_core:.1}");
    Ok(())
}

/// One run of `weft analyze`.
struct RunResult {
    label: &'static str,
    jobs: usize,
    shares: bool,
    audio_s: f64,
    weft_elapsed_s: f64,
    wall_s: f64,
    cpu_s: f64,
}

/// Runs `weft analyze --json` on `folder` and measures it.
fn run_weft(
    weft: &Path,
    folder: &Path,
    label: &'static str,
    jobs: usize,
    shares: bool,
    ticks_per_s: f64,
) -> Result<RunResult> {
    let mut cmd = Command::new(weft);
    cmd.args(["analyze", "--json", "--jobs", &jobs.to_string()]);
    if !shares {
        cmd.arg("--no-shares");
    }
    cmd.arg(folder);
    let before = children_cpu_ticks()?;
    let start = Instant::now();
    let output = cmd
        .output()
        .with_context(|| format!("could not start {}", weft.display()))?;
    let wall_s = start.elapsed().as_secs_f64();
    let cpu_s = (children_cpu_ticks()? - before) as f64 / ticks_per_s;
    if !output.status.success() {
        bail!(
            "{cmd:?} failed ({}): {}",
            output.status,
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let batch = parse_batch(&String::from_utf8_lossy(&output.stdout))?;
    if batch.files != FILES as u64 || batch.failed != 0 {
        bail!(
            "weft analysed {} files with {} failures, expected {FILES} and none: {}",
            batch.files,
            batch.failed,
            String::from_utf8_lossy(&output.stderr)
        );
    }
    let expected_s = f64::from(DURATION_S) * FILES as f64;
    if (batch.audio_s - expected_s).abs() > 1.0 {
        bail!(
            "weft counted {} s of audio, expected {expected_s}",
            batch.audio_s
        );
    }
    Ok(RunResult {
        label,
        jobs,
        shares,
        audio_s: batch.audio_s,
        weft_elapsed_s: batch.elapsed_s,
        wall_s,
        cpu_s,
    })
}

/// `weft analyze --json`'s closing batch object.
#[derive(Debug, PartialEq)]
struct Batch {
    audio_s: f64,
    elapsed_s: f64,
    files: u64,
    failed: u64,
}

/// Finds the last `{"batch": {...}}` line of `weft analyze --json`'s standard output.
fn parse_batch(stdout: &str) -> Result<Batch> {
    let line = stdout
        .lines()
        .rev()
        .find(|l| l.starts_with("{\"batch\""))
        .context("weft printed no closing batch object")?;
    let v: serde_json::Value =
        serde_json::from_str(line).context("weft's batch line is not JSON")?;
    let b = &v["batch"];
    let number = |key: &str| {
        b[key]
            .as_f64()
            .with_context(|| format!("no number '{key}' in weft's batch object: {line}"))
    };
    let count = |key: &str| {
        b[key]
            .as_u64()
            .with_context(|| format!("no count '{key}' in weft's batch object: {line}"))
    };
    Ok(Batch {
        audio_s: number("audio_s")?,
        elapsed_s: number("elapsed_s")?,
        files: count("files")?,
        failed: count("failed")?,
    })
}

/// User + system CPU time of this process's waited-for children (and theirs), clock ticks.
fn children_cpu_ticks() -> Result<u64> {
    let stat = std::fs::read_to_string("/proc/self/stat").context("cannot read /proc/self/stat")?;
    parse_children_ticks(&stat)
}

/// `cutime + cstime` from a `/proc/<pid>/stat` line: fields 16 and 17 (proc(5), Linux man-pages
/// 6.x), counted after the command name, which is in parentheses and may hold spaces and
/// parentheses itself (so the fields start after the *last* `)`).
fn parse_children_ticks(stat: &str) -> Result<u64> {
    let after = stat
        .rfind(')')
        .map(|i| &stat[i + 1..])
        .context("no command name in /proc/self/stat")?;
    // After the name, the first field is field 3 (state).
    let fields: Vec<&str> = after.split_whitespace().collect();
    let field = |n: usize| -> Result<u64> {
        fields
            .get(n - 3)
            .with_context(|| format!("/proc/self/stat has no field {n}"))?
            .parse::<u64>()
            .with_context(|| format!("/proc/self/stat field {n} is not a count"))
    };
    Ok(field(16)? + field(17)?)
}

/// The clock ticks per second that `/proc` counts in (`getconf CLK_TCK`).
fn clock_ticks_per_s() -> Result<f64> {
    let out = Command::new("getconf")
        .arg("CLK_TCK")
        .output()
        .context("could not run getconf CLK_TCK")?;
    let text = String::from_utf8_lossy(&out.stdout);
    let ticks: f64 = text
        .trim()
        .parse()
        .with_context(|| format!("getconf CLK_TCK printed {text:?}"))?;
    if !(out.status.success() && ticks > 0.0) {
        bail!("getconf CLK_TCK failed ({}): {text:?}", out.status);
    }
    Ok(ticks)
}

/// Reuses the folder when the manifest matches it; makes it again otherwise.
fn prepare_folder(folder: &Path, specs: &[FileSpec]) -> Result<()> {
    if folder_matches(folder, specs) {
        println!(
            "bench-cli: reusing {} (its manifest matches)",
            folder.display()
        );
        return Ok(());
    }
    if !Path::new(SOUNDFONT).exists() {
        bail!("{SOUNDFONT} is missing: run `cargo xtask setup`");
    }
    if folder.exists() {
        std::fs::remove_dir_all(folder)
            .with_context(|| format!("cannot clear {}", folder.display()))?;
    }
    let _ = std::fs::remove_file(MANIFEST);
    std::fs::create_dir_all(folder)
        .with_context(|| format!("cannot create {}", folder.display()))?;
    let start = Instant::now();
    println!(
        "bench-cli: composing and rendering {} files of {DURATION_S} s into {} (once; later runs \
         reuse them)…",
        specs.len(),
        folder.display()
    );
    let load = |rate: u32| -> Result<SoundFontRenderer> {
        let file =
            std::fs::File::open(SOUNDFONT).with_context(|| format!("cannot open {SOUNDFONT}"))?;
        SoundFontRenderer::new(&mut std::io::BufReader::new(file), rate)
            .with_context(|| format!("cannot load {SOUNDFONT}"))
    };
    let renderers = [load(48_000)?, load(44_100)?];
    let voicings = general_midi_voicings();
    let composer = Composer::new(voicings.clone(), vec![], 0.0);
    // Workers take the next file from a shared counter; the first error stops the others.
    let next = AtomicUsize::new(0);
    let failure: Mutex<Option<anyhow::Error>> = Mutex::new(None);
    let workers = std::thread::available_parallelism().map_or(1, |n| n.get());
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| {
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    let Some(spec) = specs.get(i) else { break };
                    if failure.lock().map_or(true, |f| f.is_some()) {
                        break;
                    }
                    let renderer = if spec.sample_rate_hz == 48_000 {
                        &renderers[0]
                    } else {
                        &renderers[1]
                    };
                    let made = render_file(spec, renderer, &composer)
                        .and_then(|channels| write_file(folder, spec, &channels));
                    if let Err(e) = made {
                        if let Ok(mut f) = failure.lock() {
                            f.get_or_insert(e);
                        }
                        break;
                    }
                }
            });
        }
    });
    if let Some(e) = failure
        .into_inner()
        .map_err(|_| anyhow::anyhow!("a rendering thread panicked"))?
    {
        return Err(e);
    }
    let mut files = Vec::new();
    for spec in specs {
        let name = spec.file_name();
        let bytes = std::fs::metadata(folder.join(&name))
            .with_context(|| format!("{name} was not written"))?
            .len();
        files.push(serde_json::json!({ "name": name, "bytes": bytes }));
    }
    let manifest = serde_json::json!({
        "generator_version": GENERATOR_VERSION,
        "seed": SEED,
        "files": files,
    });
    std::fs::write(MANIFEST, serde_json::to_string_pretty(&manifest)?)
        .with_context(|| format!("cannot write {MANIFEST}"))?;
    println!(
        "bench-cli: made {} files in {:.0} s",
        specs.len(),
        start.elapsed().as_secs_f64()
    );
    Ok(())
}

/// Whether the folder holds exactly the files its manifest lists, at the listed sizes, made by
/// this generator with this seed.
fn folder_matches(folder: &Path, specs: &[FileSpec]) -> bool {
    let Ok(text) = std::fs::read_to_string(MANIFEST) else {
        return false;
    };
    let Ok(manifest) = serde_json::from_str::<serde_json::Value>(&text) else {
        return false;
    };
    if manifest["generator_version"].as_u64() != Some(GENERATOR_VERSION)
        || manifest["seed"].as_u64() != Some(SEED)
    {
        return false;
    }
    let Some(files) = manifest["files"].as_array() else {
        return false;
    };
    let Ok(entries) = std::fs::read_dir(folder) else {
        return false;
    };
    if entries.count() != specs.len() || files.len() != specs.len() {
        return false;
    }
    specs.iter().zip(files).all(|(spec, listed)| {
        let name = spec.file_name();
        listed["name"].as_str() == Some(name.as_str())
            && std::fs::metadata(folder.join(&name)).is_ok_and(|m| {
                m.is_file() && listed["bytes"].as_u64() == Some(m.len()) && m.len() > 0
            })
    })
}

/// Composes and renders one piece: the channels, each exactly [`DURATION_S`] long.
fn render_file(
    spec: &FileSpec,
    renderer: &SoundFontRenderer,
    composer: &Composer,
) -> Result<Vec<Vec<f32>>> {
    let voicings = composer.voicings();
    let names =
        lantern_hall_families(spec.style).with_context(|| format!("no style {}", spec.style))?;
    let families: Vec<usize> = names
        .iter()
        .map(|n| {
            voicings
                .iter()
                .position(|v| v.family == *n)
                .with_context(|| format!("no General MIDI voicing for {n:?}"))
        })
        .collect::<Result<_>>()?;
    let mut rng = SceneRng::derive(spec.seed(), 0xBE);
    let gains_db: Vec<f64> = families
        .iter()
        .map(|_| rng.uniform(GAIN_RANGE_DB.0, GAIN_RANGE_DB.1))
        .collect();
    let duration_s = f64::from(DURATION_S);
    let score = composer.compose(spec.seed(), &families, duration_s);
    let stems = renderer
        .render_stems(&score, voicings.len(), &ClipBank::new(voicings.len()))
        .with_context(|| format!("cannot render {}", spec.file_name()))?;
    let mut members = Vec::new();
    let mut gains = Vec::new();
    for (f, g) in families.iter().zip(&gains_db) {
        if let Some(Some(stem)) = stems.get(*f) {
            members.push((*f, stem.as_slice()));
            gains.push(*g);
        }
    }
    let rate = spec.sample_rate_hz;
    let mut channels = if spec.channels == 1 {
        vec![Mix::new(&members, &gains, rate).signal]
    } else {
        // Each family panned with the equal-power law (cos/sin of the pan angle, 0 dB at the
        // centre); each side is mixed (and peak-limited) on its own.
        let pans: Vec<f64> = members
            .iter()
            .map(|_| rng.uniform(-MAX_PAN, MAX_PAN))
            .collect();
        let side = |law: fn(f64) -> f64| -> Vec<f64> {
            gains
                .iter()
                .zip(&pans)
                .map(|(g, p)| {
                    let angle = (p + 1.0) * std::f64::consts::FRAC_PI_4;
                    g + 20.0 * (law(angle) * std::f64::consts::SQRT_2).log10()
                })
                .collect()
        };
        vec![
            Mix::new(&members, &side(f64::cos), rate).signal,
            Mix::new(&members, &side(f64::sin), rate).signal,
        ]
    };
    let n = (DURATION_S * rate) as usize;
    let quiet_s = rng.uniform(QUIET_RANGE_S.0, QUIET_RANGE_S.1);
    let quiet_start_s = rng.uniform(20.0, duration_s - 20.0 - quiet_s);
    let floor = 10f64.powf(QUIET_GAIN_DB / 20.0);
    for ch in &mut channels {
        ch.resize(n, 0.0);
        for (i, x) in ch.iter_mut().enumerate() {
            let t = i as f64 / f64::from(rate);
            let into = ((t - quiet_start_s) / QUIET_FADE_S).clamp(0.0, 1.0);
            let out = ((quiet_start_s + quiet_s - t) / QUIET_FADE_S).clamp(0.0, 1.0);
            let depth = into.min(out);
            *x = (f64::from(*x) * (1.0 - depth * (1.0 - floor))) as f32;
        }
    }
    Ok(channels)
}

/// Writes one file in its format (FLAC through a temporary WAV and ffmpeg).
fn write_file(folder: &Path, spec: &FileSpec, channels: &[Vec<f32>]) -> Result<()> {
    let path = folder.join(spec.file_name());
    match spec.format {
        Format::Wav16 | Format::Wav24 | Format::WavFloat => {
            write_wav(&path, spec.format, spec.sample_rate_hz, channels)
        }
        Format::Flac16 | Format::Flac24 => {
            let wav_format = if spec.format == Format::Flac16 {
                Format::Wav16
            } else {
                Format::Wav24
            };
            // Outside the folder, so a stray temporary file is never analysed.
            let tmp = folder.with_file_name(format!("{}.tmp.wav", spec.file_name()));
            write_wav(&tmp, wav_format, spec.sample_rate_hz, channels)?;
            let encoded = run_checked(
                Command::new("ffmpeg")
                    .args(["-nostdin", "-loglevel", "error", "-y", "-i"])
                    .arg(&tmp)
                    .args(["-c:a", "flac"])
                    .arg(&path),
            );
            let _ = std::fs::remove_file(&tmp);
            encoded.context("ffmpeg could not encode FLAC (run `cargo xtask setup`)")
        }
    }
}

/// Writes a WAV with hound: 16- or 24-bit integer (rounded, clipped) or 32-bit float.
fn write_wav(path: &Path, format: Format, rate: u32, channels: &[Vec<f32>]) -> Result<()> {
    let (bits, sample_format) = match format {
        Format::Wav16 | Format::Flac16 => (16, hound::SampleFormat::Int),
        Format::Wav24 | Format::Flac24 => (24, hound::SampleFormat::Int),
        Format::WavFloat => (32, hound::SampleFormat::Float),
    };
    let spec = hound::WavSpec {
        channels: channels.len() as u16,
        sample_rate: rate,
        bits_per_sample: bits,
        sample_format,
    };
    let mut w = hound::WavWriter::create(path, spec)
        .with_context(|| format!("cannot write {}", path.display()))?;
    let n = channels.iter().map(Vec::len).min().unwrap_or(0);
    let full_scale = f64::from((1_i32 << (bits - 1)) - 1);
    for i in 0..n {
        for ch in channels {
            let x = ch[i];
            if sample_format == hound::SampleFormat::Float {
                w.write_sample(x)?;
            } else {
                let q = (f64::from(x) * full_scale)
                    .round()
                    .clamp(-full_scale - 1.0, full_scale);
                w.write_sample(q as i32)?;
            }
        }
    }
    w.finalize()
        .with_context(|| format!("cannot finish {}", path.display()))?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn batch_is_the_last_batch_line() {
        // The shape of `weft analyze --json`'s output: file objects, then the batch object.
        let out = "{\"file\":\"a.wav\",\"windows\":[]}\n\
                   {\"batch\":{\"audio_s\":3600.0,\"elapsed_s\":12.5,\"failed\":0,\"files\":20,\
                   \"realtime_factor\":288.0,\"threads\":1}}\n";
        let b = parse_batch(out).expect("a batch line");
        assert_eq!(
            b,
            Batch {
                audio_s: 3600.0,
                elapsed_s: 12.5,
                files: 20,
                failed: 0
            }
        );
    }

    #[test]
    fn missing_or_incomplete_batch_is_an_error() {
        assert!(parse_batch("{\"file\":\"a.wav\"}\n").is_err());
        assert!(parse_batch("{\"batch\":{\"audio_s\":1.0}}\n").is_err());
    }

    #[test]
    fn children_ticks_are_fields_16_and_17_after_the_last_parenthesis() {
        // A command name with a space and a ')' inside, as proc(5) warns can happen; fields 3…
        // are numbered from the state letter. cutime = 1600, cstime = 1700.
        let stat = "4242 (we ird) name) S 1 4242 4242 0 -1 4194304 100 0 0 0 1400 1500 1600 \
                    1700 20 0 1 0 12345 1000000 200 18446744073709551615";
        assert_eq!(parse_children_ticks(stat).expect("parsed"), 3300);
    }

    #[test]
    fn children_ticks_of_this_process_grow_after_waiting_for_a_busy_child() {
        let before = children_cpu_ticks().expect("own stat");
        // A child that burns about 0.1 s of CPU (the shell's loop), then is waited for.
        let status = Command::new("sh")
            .args(["-c", "i=0; while [ $i -lt 100000 ]; do i=$((i+1)); done"])
            .status()
            .expect("sh runs");
        assert!(status.success());
        let after = children_cpu_ticks().expect("own stat");
        assert!(
            after > before,
            "children's CPU ticks did not grow: {before} -> {after}"
        );
    }
}
