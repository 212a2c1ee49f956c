//! End-to-end tests of `weft analyze`: the built binary, run on files generated here.
//!
//! These live in the `weft` crate (not in `weft-tests`) because Cargo builds the binary before
//! running a crate's integration tests and hands its path over in `CARGO_BIN_EXE_weft`, so a test
//! can never run a stale or missing binary, whatever the profile or target folder.
//!
//! References, each independent of the code under test:
//! - the engine (`weft_engine::Analyzer`) run directly on the samples, with the window summary
//!   computed here from its definition (energy mean of frame RMS, maximum peak, frames whose
//!   centres fall in the window; family shares averaged over the window's frames with a signal);
//! - hound 3.5 reads the WAV files written here;
//! - FFmpeg 5.1 (Debian's `ffmpeg`, installed by `cargo xtask setup`) encodes FLAC, AIFF, ALAC,
//!   MP3, Ogg Vorbis and AAC (M4A and ADTS), and decodes them again to float WAV: the CLI's timeline of the encoded
//!   file must equal the engine's output on FFmpeg's decoding of it;
//! - GNU time 1.9 (`/usr/bin/time -f %M`) measures the peak memory of the process.

mod common;
use common::{path_str, text, weft};
use rand::{Rng, SeedableRng, rngs::SmallRng};
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use weft_engine::palette::Palette;
use weft_engine::shares::{Shares, SharesSettings};
use weft_engine::timbre::Descriptors;
use weft_engine::windows::slug;
use weft_engine::{AnalysisSettings, Analyzer, FrameConfig, FrameResult};

const SETUP_HINT: &str = "run `cargo xtask setup` (it installs ffmpeg and time)";

/// Runs FFmpeg quietly; a missing FFmpeg fails the test with the setup command.
fn ffmpeg(args: &[&str]) {
    let status = Command::new("ffmpeg")
        .args(["-y", "-nostdin", "-loglevel", "error"])
        .args(args)
        .status()
        .unwrap_or_else(|e| panic!("ffmpeg is not available ({e}): {SETUP_HINT}"));
    assert!(status.success(), "ffmpeg {args:?} failed");
}

/// A seeded test signal, interleaved, within ±0.9: two tones under a slow level swell plus noise,
/// with different content per channel (so the side signal is not zero).
fn test_signal(seed: u64, rate_hz: u32, channels: usize, seconds: f64) -> Vec<f32> {
    let mut rng = SmallRng::seed_from_u64(seed);
    let n = (seconds * f64::from(rate_hz)).round() as usize;
    let tau = std::f64::consts::TAU;
    let mut out = Vec::with_capacity(n * channels);
    for i in 0..n {
        let t = i as f64 / f64::from(rate_hz);
        let swell = 0.15 + 0.35 * (0.5 + 0.5 * (tau * t / 2.7).sin());
        let a = (tau * 440.0 * t).sin() + 0.5 * (tau * 1250.0 * t + 0.3).sin();
        let b = (tau * 330.0 * t).sin();
        for c in 0..channels {
            let noise = rng.gen_range(-0.05..0.05);
            let x = match c {
                0 => swell * 0.6 * a,
                1 => swell * (0.3 * a - 0.4 * b),
                _ => swell * 0.5 * ((c as f64) * 0.7 * tau * t).sin() * b,
            };
            out.push((x + noise) as f32);
        }
    }
    out
}

/// Writes interleaved samples as a WAV with hound.
fn write_wav(path: &Path, samples: &[f32], channels: usize, rate_hz: u32, bits: u16, float: bool) {
    let spec = hound::WavSpec {
        channels: channels as u16,
        sample_rate: rate_hz,
        bits_per_sample: bits,
        sample_format: if float {
            hound::SampleFormat::Float
        } else {
            hound::SampleFormat::Int
        },
    };
    let mut w = hound::WavWriter::create(path, spec).expect("create wav");
    let full = f64::from((1u32 << (bits - 1)) - 1);
    for &x in samples {
        if float {
            w.write_sample(x).expect("write");
        } else {
            w.write_sample((f64::from(x) * full).round() as i32)
                .expect("write");
        }
    }
    w.finalize().expect("finalize");
}

/// hound's reading of a WAV: interleaved samples scaled to ±1 (÷ 2^(bits−1) for integers),
/// channels, rate.
fn read_wav(path: &Path) -> (Vec<f32>, usize, u32) {
    let mut r = hound::WavReader::open(path).expect("hound opens the file");
    let spec = r.spec();
    let samples = match spec.sample_format {
        hound::SampleFormat::Float => r.samples::<f32>().map(|s| s.expect("sample")).collect(),
        hound::SampleFormat::Int => {
            let scale = 1.0 / f64::from(1u32 << (spec.bits_per_sample - 1));
            r.samples::<i32>()
                .map(|s| (f64::from(s.expect("sample")) * scale) as f32)
                .collect()
        }
    };
    (samples, usize::from(spec.channels), spec.sample_rate)
}

/// One frame as the engine reports it.
#[derive(Debug, Clone, Copy)]
struct RefFrame {
    t: f64,
    rms_dbfs: f32,
    peak_dbfs: f32,
    descriptors: Descriptors,
}

impl RefFrame {
    fn of(f: &FrameResult) -> Self {
        Self {
            t: f.time_s,
            rms_dbfs: f.level.rms_db,
            peak_dbfs: f.level.peak_db,
            descriptors: f.descriptors,
        }
    }
}

/// One window computed here from the engine's frames.
#[derive(Debug, Clone)]
struct RefWindow {
    start_s: f64,
    end_s: f64,
    frames: usize,
    rms_dbfs: f64,
    rms_max_dbfs: f64,
    peak_dbfs: f64,
    /// Mean and population standard deviation of descriptors, by CSV column name.
    descriptors: HashMap<String, f64>,
}

/// The window statistics of the descriptors, named as the CSV names them, computed here in
/// f64 from the engine's frames.
fn descriptor_stats(frames: &[RefFrame]) -> HashMap<String, f64> {
    let mut values: Vec<(String, Vec<f64>)> = Vec::new();
    let mut add = |name: String, get: &dyn Fn(&Descriptors) -> f32| {
        values.push((
            name,
            frames
                .iter()
                .map(|f| f64::from(get(&f.descriptors)))
                .collect(),
        ));
    };
    add("centroid_hz".into(), &|d| d.centroid_hz);
    add("bandwidth_hz".into(), &|d| d.bandwidth_hz);
    add("rolloff_hz".into(), &|d| d.rolloff_hz);
    add("rolloff_custom_hz".into(), &|d| d.rolloff_custom_hz);
    add("flatness".into(), &|d| d.flatness);
    add("flux_db".into(), &|d| d.flux_db);
    add("zero_crossings_per_sample".into(), &|d| {
        d.zero_crossings_per_sample
    });
    add("rms".into(), &|d| d.rms);
    for i in 0..20 {
        add(format!("mfcc_{}", i + 1), &move |d| d.mfcc[i]);
    }
    for i in 0..7 {
        add(format!("contrast_db_{}", i + 1), &move |d| d.contrast_db[i]);
    }
    let mut stats = HashMap::new();
    for (name, v) in values {
        let n = v.len() as f64;
        let mean = v.iter().sum::<f64>() / n;
        let sd = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n).sqrt();
        // Array columns carry the statistic before the index: mfcc_mean_3.
        let (mean_name, sd_name) = match name.rsplit_once('_') {
            Some((base, index)) if index.chars().all(|c| c.is_ascii_digit()) => {
                (format!("{base}_mean_{index}"), format!("{base}_sd_{index}"))
            }
            _ => (format!("{name}_mean"), format!("{name}_sd")),
        };
        stats.insert(mean_name, mean);
        stats.insert(sd_name, sd);
    }
    stats
}

/// Runs the engine directly on interleaved samples (mid = mean of the channels, side = half the
/// difference of the first two, as the CLI documents), streamed block by block (the live
/// convention) or, with `whole_clip`, through `Analyzer::analyze_clip` (librosa's whole-clip
/// floor), and summarises windows of `window_s`.
fn engine_reference(
    samples: &[f32],
    channels: usize,
    rate_hz: u32,
    framing: Option<FrameConfig>,
    window_s: f64,
    whole_clip: bool,
) -> (Vec<RefFrame>, Vec<RefWindow>) {
    let (mid, side) = mid_side(samples, channels);
    let n = mid.len();
    let framing = framing.unwrap_or_else(|| FrameConfig::for_sample_rate(f64::from(rate_hz)));
    let settings = AnalysisSettings::new(f64::from(rate_hz), framing).expect("valid settings");
    let mut analyzer = Analyzer::new(settings);
    let mut frames = Vec::new();
    if whole_clip {
        frames = analyzer
            .analyze_clip(&mid, Some(&side))
            .iter()
            .map(RefFrame::of)
            .collect();
    } else {
        for (m, s) in mid.chunks(4096).zip(side.chunks(4096)) {
            analyzer.process(m, Some(s), |f| frames.push(RefFrame::of(f)));
        }
        analyzer.finish(|f| frames.push(RefFrame::of(f)));
    }
    // Frame k is centred on sample k·hop; window w holds centres in [w·L, (w+1)·L); the clip has
    // ⌈n / L⌉ windows, so a centre on the very end joins the last one.
    let window_len = (window_s * f64::from(rate_hz)).round() as usize;
    let count = n.div_ceil(window_len).max(1);
    let mut groups: Vec<Vec<RefFrame>> = vec![Vec::new(); count];
    for (k, f) in frames.iter().enumerate() {
        groups[(k * framing.hop_len / window_len).min(count - 1)].push(*f);
    }
    let windows = groups
        .iter()
        .enumerate()
        .map(|(w, g)| {
            let power: f64 = g
                .iter()
                .map(|f| 10f64.powf(f64::from(f.rms_dbfs) / 10.0))
                .sum::<f64>()
                / g.len() as f64;
            RefWindow {
                start_s: (w * window_len) as f64 / f64::from(rate_hz),
                end_s: (((w + 1) * window_len).min(n)) as f64 / f64::from(rate_hz),
                frames: g.len(),
                rms_dbfs: (10.0 * power.log10()).max(-160.0),
                rms_max_dbfs: g
                    .iter()
                    .map(|f| f64::from(f.rms_dbfs))
                    .fold(f64::MIN, f64::max),
                peak_dbfs: g
                    .iter()
                    .map(|f| f64::from(f.peak_dbfs))
                    .fold(f64::MIN, f64::max),
                descriptors: descriptor_stats(g),
            }
        })
        .collect();
    (frames, windows)
}

/// Mid (mean of the channels) and side (half the difference of the first two), as the CLI
/// documents its analysis signal.
fn mid_side(samples: &[f32], channels: usize) -> (Vec<f32>, Vec<f32>) {
    let n = samples.len() / channels;
    let (mut mid, mut side) = (Vec::with_capacity(n), Vec::with_capacity(n));
    for f in samples.chunks_exact(channels) {
        match channels {
            1 => {
                mid.push(f[0]);
                side.push(0.0);
            }
            2 => {
                mid.push(0.5 * (f[0] + f[1]));
                side.push(0.5 * (f[0] - f[1]));
            }
            _ => {
                mid.push(f.iter().sum::<f32>() * (1.0 / channels as f32));
                side.push(0.5 * (f[0] - f[1]));
            }
        }
    }
    (mid, side)
}

/// One window's shares as the engine gives them: the mean share per family, the mean
/// unexplained share, and the frames with a signal they average.
type ShareWindow = (Vec<f64>, f64, usize);

/// The engine with the built-in palette, streamed (the live convention, default framing):
/// every frame's raw shares, and per window of `window_s` the mean share of each family and of
/// the unexplained part over the frames with a signal, and the count of those frames.
fn engine_shares(
    samples: &[f32],
    channels: usize,
    rate_hz: u32,
    window_s: f64,
) -> (Vec<Shares>, Vec<ShareWindow>) {
    let (mid, side) = mid_side(samples, channels);
    let palette = Palette::default_palette();
    let settings = AnalysisSettings::for_sample_rate(f64::from(rate_hz)).expect("settings");
    let mut analyzer =
        Analyzer::with_palette(settings, &palette, SharesSettings::default()).expect("analyzer");
    let mut frames = Vec::new();
    for (m, s) in mid.chunks(4096).zip(side.chunks(4096)) {
        analyzer.process(m, Some(s), |f| frames.push(f.shares.raw));
    }
    analyzer.finish(|f| frames.push(f.shares.raw));
    let window_len = (window_s * f64::from(rate_hz)).round() as usize;
    let count = mid.len().div_ceil(window_len).max(1);
    let families = palette.families().len();
    let mut windows = vec![(vec![0.0; families], 0.0, 0usize); count];
    for (k, s) in frames.iter().enumerate() {
        let w = &mut windows[(k * settings.framing.hop_len / window_len).min(count - 1)];
        if s.signal {
            for (acc, v) in w.0.iter_mut().zip(&s.share[..families]) {
                *acc += f64::from(*v);
            }
            w.1 += f64::from(s.unexplained);
            w.2 += 1;
        }
    }
    for w in &mut windows {
        let n = w.2.max(1) as f64;
        w.0.iter_mut().for_each(|v| *v /= n);
        w.1 /= n;
    }
    (frames, windows)
}

/// A CSV file: its header and its rows by column name.
fn read_csv(path: &Path) -> (Vec<String>, Vec<HashMap<String, f64>>) {
    let body = std::fs::read_to_string(path)
        .unwrap_or_else(|e| panic!("cannot read {}: {e}", path.display()));
    parse_csv(&body)
}

fn parse_csv(body: &str) -> (Vec<String>, Vec<HashMap<String, f64>>) {
    let mut lines = body.lines();
    let header: Vec<String> = lines
        .next()
        .expect("a header row")
        .split(',')
        .map(str::to_owned)
        .collect();
    let rows = lines
        .map(|l| {
            header
                .iter()
                .cloned()
                .zip(l.split(',').map(|v| v.parse::<f64>().expect("a number")))
                .collect()
        })
        .collect();
    (header, rows)
}

/// Which descriptor statistics a comparison checks.
#[derive(Clone, Copy, PartialEq)]
enum DescriptorCheck {
    /// Every statistic, to f32 rounding: the CLI and the reference saw the same samples.
    All,
    /// The magnitude-weighted ones (centroid, bandwidth, RMS means) to 1e-3 relative: two
    /// decoders of a lossy stream differ by float rounding, which moves descriptors of the
    /// near-empty bands above a codec's low-pass (flatness, MFCCs of dB floors) far more.
    Robust,
}

/// The CLI's timeline equals the engine's windows: same windows, same frame counts, levels
/// within `tol_db`, descriptor statistics per `check`.
fn assert_timeline_matches(
    label: &str,
    rows: &[HashMap<String, f64>],
    reference: &[RefWindow],
    tol_db: f64,
    check: DescriptorCheck,
) {
    assert_eq!(rows.len(), reference.len(), "{label}: window count");
    for (i, (row, r)) in rows.iter().zip(reference).enumerate() {
        assert!(
            (row["start_s"] - r.start_s).abs() < 1e-9,
            "{label} window {i}: start"
        );
        assert!(
            (row["end_s"] - r.end_s).abs() < 1e-9,
            "{label} window {i}: end"
        );
        assert_eq!(
            row["frames"] as usize, r.frames,
            "{label} window {i}: frames"
        );
        for (name, want) in [
            ("rms_dbfs", r.rms_dbfs),
            ("rms_max_dbfs", r.rms_max_dbfs),
            ("peak_dbfs", r.peak_dbfs),
        ] {
            assert!(
                (row[name] - want).abs() <= tol_db,
                "{label} window {i}: {name} {} vs engine {want}",
                row[name]
            );
        }
        // Descriptor statistics: f32 output of the same sums, so within f32 rounding of the
        // value (and of the larger of the mean and the sd for a standard deviation, which is a
        // difference of squares).
        assert_eq!(r.descriptors.len(), 2 * (8 + 20 + 7));
        for (name, want) in &r.descriptors {
            let got = row
                .get(name)
                .unwrap_or_else(|| panic!("{label}: no column {name}"));
            if check == DescriptorCheck::Robust {
                if ["centroid_hz_mean", "bandwidth_hz_mean", "rms_mean"].contains(&name.as_str()) {
                    assert!(
                        (got - want).abs() <= 1e-3 * want.abs(),
                        "{label} window {i}: {name} {got} vs engine {want}"
                    );
                }
                continue;
            }
            let scale = if let Some(base) = name.strip_suffix("_sd") {
                want.abs().max(r.descriptors[&format!("{base}_mean")].abs())
            } else if let Some((base, index)) = name.split_once("_sd_") {
                want.abs()
                    .max(r.descriptors[&format!("{base}_mean_{index}")].abs())
            } else {
                want.abs()
            };
            assert!(
                (got - want).abs() <= 1e-4 * scale.max(1e-3),
                "{label} window {i}: {name} {got} vs engine {want}"
            );
        }
    }
}

const TIMELINE_HEADER_START: &str =
    "start_s,end_s,frames,rms_dbfs,rms_max_dbfs,peak_dbfs,share_kick,share_snare,";

#[test]
fn wav_timelines_equal_the_engine_on_hounds_samples() {
    let seed = 0xC11_0001;
    let dir = tempfile::tempdir().expect("tempdir");
    let input = dir.path().join("in");
    let out = dir.path().join("out");
    std::fs::create_dir(&input).expect("mkdir");
    // (name, channels, rate, bits, float)
    let cases: [(&str, usize, u32, u16, bool); 5] = [
        ("s16-stereo-44k1.wav", 2, 44_100, 16, false),
        ("s24-mono-96k.wav", 1, 96_000, 24, false),
        ("f32-stereo-48k.wav", 2, 48_000, 32, true),
        ("s16-six-22k05.wav", 6, 22_050, 16, false),
        ("s24-stereo-8k.wav", 2, 8_000, 24, false),
    ];
    for (i, &(name, channels, rate, bits, float)) in cases.iter().enumerate() {
        let x = test_signal(seed + i as u64, rate, channels, 3.3);
        write_wav(&input.join(name), &x, channels, rate, bits, float);
    }
    let o = weft(&[
        "analyze",
        path_str(&input),
        "--out",
        path_str(&out),
        "--window",
        "0.5",
        "-q",
    ]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "seed {seed:#x}: {}",
        text(&o.stderr)
    );
    for &(name, _, _, _, _) in &cases {
        let (samples, channels, rate) = read_wav(&input.join(name));
        let (_, reference) = engine_reference(&samples, channels, rate, None, 0.5, false);
        let (header, rows) = read_csv(&out.join(format!("{name}.timeline.csv")));
        assert!(
            header.join(",").starts_with(TIMELINE_HEADER_START),
            "{header:?}"
        );
        // 6 level columns, a share per family, unexplained and signal frames, then mean and sd
        // of 8 scalar descriptors, 20 MFCCs and 7 contrast bands.
        let families = Palette::default_palette().families().len();
        assert_eq!(header.len(), 6 + families + 2 + 2 * (8 + 20 + 7));
        assert_timeline_matches(
            &format!("seed {seed:#x} {name}"),
            &rows,
            &reference,
            1e-3,
            DescriptorCheck::All,
        );
    }
    // The table names every file.
    let table = text(&o.stdout);
    for &(name, _, _, _, _) in &cases {
        assert!(table.contains(name), "{table}");
    }
}

#[test]
fn family_shares_in_timelines_and_frames_equal_the_engine() {
    let seed = 0xC11_0007;
    let dir = tempfile::tempdir().expect("tempdir");
    let wav = dir.path().join("swell.wav");
    let out = dir.path().join("out");
    let rate = 22_050;
    // 2 s of the test signal, 1.5 s of digital silence, 1.5 s of it again: windows with and
    // without signal.
    let mut x = test_signal(seed, rate, 2, 2.0);
    x.extend(std::iter::repeat_n(0.0, 2 * 33_075));
    x.extend(test_signal(seed + 1, rate, 2, 1.5));
    write_wav(&wav, &x, 2, rate, 32, true);
    let (samples, channels, _) = read_wav(&wav);
    let (frame_shares, reference) = engine_shares(&samples, channels, rate, 0.5);
    let palette = Palette::default_palette();
    let columns: Vec<String> = palette
        .families()
        .iter()
        .map(|f| format!("share_{}", slug(&f.name)))
        .collect();

    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--out",
        path_str(&out),
        "--window",
        "0.5",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let (header, rows) = read_csv(&out.join("swell.wav.timeline.csv"));
    for c in columns
        .iter()
        .chain(["unexplained".to_owned(), "signal_frames".to_owned()].iter())
    {
        assert!(header.contains(c), "no column {c} in {header:?}");
    }
    assert_eq!(rows.len(), reference.len());
    let mut silent = 0;
    for (i, (row, (shares, unexplained, signal))) in rows.iter().zip(&reference).enumerate() {
        let label = format!("seed {seed:#x} window {i}");
        assert_eq!(row["signal_frames"] as usize, *signal, "{label}");
        for (c, want) in columns.iter().zip(shares) {
            assert!(
                (row[c] - want).abs() < 1e-6,
                "{label}: {c} {} vs {want}",
                row[c]
            );
        }
        assert!((row["unexplained"] - unexplained).abs() < 1e-6, "{label}");
        let total: f64 = columns.iter().map(|c| row[c]).sum::<f64>() + row["unexplained"];
        if *signal > 0 {
            // Shares and unexplained sum to one (ARCHITECTURE.md's definition of a share).
            assert!((total - 1.0).abs() < 1e-5, "{label}: sum {total}");
        } else {
            assert_eq!(total, 0.0, "{label}: a window without signal reads 0");
            silent += 1;
        }
    }
    assert!(
        silent > 0,
        "seed {seed:#x}: the silent stretch gives a window without signal"
    );
    // The table names the file's dominant families: the three highest mean shares over the
    // frames with a signal, from the engine's frames.
    let families = palette.families().len();
    let mut mean = vec![0.0; families];
    let signal: Vec<&Shares> = frame_shares.iter().filter(|s| s.signal).collect();
    for s in &signal {
        for (m, v) in mean.iter_mut().zip(&s.share[..families]) {
            *m += f64::from(*v) / signal.len() as f64;
        }
    }
    let top = (0..families)
        .max_by(|&a, &b| mean[a].total_cmp(&mean[b]))
        .expect("families");
    let table = text(&o.stdout);
    let expected = format!(
        "{} {:.0} %",
        palette.families()[top].name,
        100.0 * mean[top]
    );
    assert!(
        table.contains("dominant families") && table.contains(&expected),
        "seed {seed:#x}: {expected:?} not in\n{table}"
    );

    // JSON lines: the same values under `shares` with `share_<slug>` keys.
    let o = weft(&["analyze", path_str(&wav), "--window", "0.5", "--json", "-q"]);
    assert_eq!(o.status.code(), Some(0));
    let first: serde_json::Value =
        serde_json::from_str(text(&o.stdout).lines().next().expect("a line")).expect("JSON");
    let w1 = &first["windows"][1];
    for (c, want) in columns.iter().zip(&reference[1].0) {
        let got = w1["shares"][c].as_f64().expect("a share");
        assert!((got - want).abs() < 1e-6, "{c}");
    }
    assert_eq!(
        first["totals"]["shares"].as_object().expect("totals").len(),
        families
    );

    // --frames: every frame's raw shares, keyed by family name, and its unexplained share.
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--frames",
        "--live",
        "--json",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    assert_eq!(lines.len(), frame_shares.len());
    for (k, (line, s)) in lines.iter().zip(&frame_shares).enumerate() {
        for (f, family) in palette.families().iter().enumerate() {
            let got = line["shares"][&family.name].as_f64().expect("share") as f32;
            assert_eq!(got, s.share[f], "seed {seed:#x} frame {k} {}", family.name);
        }
        assert_eq!(
            line["unexplained"].as_f64().expect("unexplained") as f32,
            s.unexplained
        );
    }
    // The same frames as CSV name the shares `share_<slug>`.
    let o = weft(&["analyze", path_str(&wav), "--frames", "--live", "-q"]);
    let (header, rows) = parse_csv(&text(&o.stdout));
    assert!(
        header.contains(&"share_toms_hand_percussion".to_owned()),
        "{header:?}"
    );
    assert_eq!(rows[40]["share_bass"] as f32, frame_shares[40].share[4]);
    assert_eq!(palette.families()[4].name, "bass");

    // --no-shares leaves them out.
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--no-shares",
        "--out",
        path_str(&out),
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0));
    let (header, _) = read_csv(&out.join("swell.wav.timeline.csv"));
    assert!(
        !header
            .iter()
            .any(|h| h.starts_with("share_") || h == "unexplained")
    );
}

#[test]
fn encoded_formats_equal_the_engine_on_ffmpegs_decoding() {
    let seed = 0xC11_0002;
    let dir = tempfile::tempdir().expect("tempdir");
    let d = dir.path();
    let source = d.join("source.wav");
    let rate = 44_100;
    let seconds = 4.3;
    write_wav(
        &source,
        &test_signal(seed, rate, 2, seconds),
        2,
        rate,
        16,
        false,
    );
    // (encoded file, FFmpeg encoder arguments, FFmpeg decoder arguments before -i)
    let cases: [(&str, &[&str], &[&str]); 7] = [
        ("clip.flac", &[], &[]),
        ("clip.aiff", &[], &[]),
        ("clip-alac.m4a", &["-c:a", "alac"], &[]),
        ("clip.mp3", &["-c:a", "libmp3lame", "-b:a", "192k"], &[]),
        ("clip.ogg", &["-c:a", "libvorbis", "-q:a", "5"], &[]),
        // Symphonia 0.6 reads no MP4 edit list, so it keeps the AAC encoder's priming; FFmpeg is
        // told to keep it too, so both decode the same samples.
        (
            "clip.m4a",
            &["-c:a", "aac", "-b:a", "192k"],
            &["-ignore_editlist", "1"],
        ),
        ("clip.aac", &["-c:a", "aac", "-b:a", "192k"], &[]),
    ];
    let out = d.join("out");
    let mut files = Vec::new();
    for (name, encode, _) in &cases {
        let mut args = vec!["-i", path_str(&source)];
        args.extend_from_slice(encode);
        let dest = d.join(name);
        args.push(path_str(&dest));
        ffmpeg(&args);
        files.push(dest);
    }
    let mut args = vec!["analyze", "--out", path_str(&out), "--window", "0.5", "-q"];
    args.extend(files.iter().map(|f| path_str(f)));
    let o = weft(&args);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    for (name, _, decode) in &cases {
        let decoded = d.join(format!("{name}.decoded.wav"));
        let mut args: Vec<&str> = decode.to_vec();
        let encoded = d.join(name);
        args.extend([
            "-i",
            path_str(&encoded),
            "-c:a",
            "pcm_f32le",
            path_str(&decoded),
        ]);
        ffmpeg(&args);
        let (samples, channels, rate) = read_wav(&decoded);
        let (_, reference) = engine_reference(&samples, channels, rate, None, 0.5, false);
        let (_, rows) = read_csv(&out.join(format!("{name}.timeline.csv")));
        // Two independent decoders of the same stream agree to float rounding; 1e-3 dB is far
        // below what any codec or level error would move. FLAC, AIFF and ALAC are lossless:
        // everything equal.
        let check = if name.ends_with(".flac") || name.ends_with(".aiff") || name.contains("alac") {
            DescriptorCheck::All
        } else {
            DescriptorCheck::Robust
        };
        assert_timeline_matches(
            &format!("seed {seed:#x} {name}"),
            &rows,
            &reference,
            1e-3,
            check,
        );
        let end_s = rows.last().expect("a window")["end_s"];
        assert!(
            (seconds..seconds + 0.1).contains(&end_s),
            "{name}: decoded length {end_s} s for a {seconds} s source"
        );
    }
}

#[test]
fn bad_files_each_get_one_line_and_the_batch_goes_on() {
    let seed = 0xC11_0003;
    let dir = tempfile::tempdir().expect("tempdir");
    let d = dir.path().join("batch");
    let out = dir.path().join("out");
    std::fs::create_dir(&d).expect("mkdir");
    let good = test_signal(seed, 44_100, 2, 2.0);
    write_wav(&d.join("good.wav"), &good, 2, 44_100, 16, false);
    // Zero-length file.
    std::fs::write(d.join("empty.wav"), b"").expect("write");
    // Text under an audio name.
    std::fs::write(d.join("notes.wav"), b"set list: parlour, dockside, neon\n").expect("write");
    // Seeded random bytes under an audio name.
    let mut rng = SmallRng::seed_from_u64(seed);
    let junk: Vec<u8> = (0..100_000).map(|_| rng.r#gen()).collect();
    std::fs::write(d.join("junk.mp3"), &junk).expect("write");
    // A WAV cut to half its declared length.
    write_wav(&d.join("whole.tmp"), &good, 2, 44_100, 16, false);
    let bytes = std::fs::read(d.join("whole.tmp")).expect("read");
    std::fs::remove_file(d.join("whole.tmp")).expect("rm");
    std::fs::write(d.join("cut.wav"), &bytes[..bytes.len() / 2]).expect("write");
    // A WAV cut inside its header.
    std::fs::write(d.join("stub.wav"), &bytes[..30]).expect("write");
    // A valid WAV with no samples.
    write_wav(&d.join("silent-header.wav"), &[], 1, 44_100, 16, false);
    // Float WAVs holding NaN and +∞ after 1.5 s of good audio.
    let mut poisoned = good.clone();
    poisoned[2 * 66_150] = f32::NAN;
    write_wav(&d.join("nan.wav"), &poisoned, 2, 44_100, 32, true);
    poisoned[2 * 66_150] = 0.0;
    poisoned[2 * 66_150 + 1] = f32::INFINITY;
    write_wav(&d.join("inf.wav"), &poisoned, 2, 44_100, 32, true);
    // A FLAC cut in half, and Opus (which Symphonia 0.6 does not decode), by FFmpeg.
    let flac = dir.path().join("whole.flac");
    ffmpeg(&["-i", path_str(&d.join("good.wav")), path_str(&flac)]);
    let flac_bytes = std::fs::read(&flac).expect("read");
    std::fs::write(d.join("cut.flac"), &flac_bytes[..flac_bytes.len() / 2]).expect("write");
    ffmpeg(&[
        "-i",
        path_str(&d.join("good.wav")),
        "-c:a",
        "libopus",
        path_str(&d.join("opus.ogg")),
    ]);
    // A link to nowhere (unreadable).
    std::os::unix::fs::symlink(dir.path().join("nowhere.wav"), d.join("gone.wav"))
        .expect("symlink");

    let missing = dir.path().join("missing.flac");
    let o = weft(&[
        "analyze",
        path_str(&d),
        path_str(&missing),
        "--out",
        path_str(&out),
        "--json",
    ]);
    let stderr = text(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{stderr}");
    assert!(!stderr.contains("panicked"), "{stderr}");
    let expectations: [(&str, &str); 12] = [
        ("empty.wav", "the file is empty"),
        ("notes.wav", "not an audio file"),
        ("junk.mp3", "not an audio file"),
        ("cut.wav", "truncated"),
        ("stub.wav", "ends inside its header"),
        ("silent-header.wav", "no audio samples"),
        ("nan.wav", "is NaN, not a finite number"),
        ("inf.wav", "is inf, not a finite number"),
        ("cut.flac", "truncated"),
        ("opus.ogg", "unsupported audio (Opus codec)"),
        ("gone.wav", "cannot open the file"),
        ("missing.flac", "cannot open the file"),
    ];
    for (name, reason) in expectations {
        let lines: Vec<&str> = stderr
            .lines()
            .filter(|l| l.contains(&format!("{name}:")))
            .collect();
        assert_eq!(lines.len(), 1, "{name}: expected one line in\n{stderr}");
        assert!(
            lines[0].contains(reason),
            "{name}: {:?} lacks {reason:?}",
            lines[0]
        );
    }
    // NaN and ∞ are located in time.
    assert!(
        stderr.contains("nan.wav: sample at 1.500000 s (channel 0)"),
        "{stderr}"
    );
    assert!(
        stderr.contains("inf.wav: sample at 1.500000 s (channel 1)"),
        "{stderr}"
    );
    // Only the good file left a timeline; nothing partial remains.
    let mut written: Vec<String> = std::fs::read_dir(&out)
        .expect("out dir")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    written.sort();
    assert_eq!(written, ["good.wav.timeline.jsonl"]);
    // The JSON lines report the same: 1 ok, 12 failed.
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    let ok = lines.iter().filter(|v| v["ok"] == true).count();
    let failed = lines.iter().filter(|v| v["ok"] == false).count();
    assert_eq!((ok, failed), (1, 12));
    let batch = &lines.last().expect("batch line")["batch"];
    assert_eq!(batch["failed"], 12);
    assert_eq!(batch["files"], 13);
}

#[test]
fn frames_json_follows_the_framing_options() {
    let seed = 0xC11_0004;
    let dir = tempfile::tempdir().expect("tempdir");
    let wav = dir.path().join("clip.wav");
    let rate = 44_100;
    let x = test_signal(seed, rate, 2, 1.7);
    write_wav(&wav, &x, 2, rate, 24, false);
    let (samples, channels, _) = read_wav(&wav);
    let n = samples.len() / channels;

    // --frame-size/--hop-size: one JSON object per frame, `t` at the frame centre, level and
    // descriptors equal to the engine's whole-clip analysis with the same framing (the path that
    // equals librosa 0.11.0).
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--frames",
        "--json",
        "--frame-size",
        "1024",
        "--hop-size",
        "256",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let framing = FrameConfig::new(1024, 256).expect("framing");
    let (reference, _) = engine_reference(&samples, channels, rate, Some(framing), 1.0, true);
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    assert_eq!(lines.len(), 1 + n / 256, "librosa center=True frame count");
    assert_eq!(lines.len(), reference.len());
    for (k, (line, r)) in lines.iter().zip(&reference).enumerate() {
        let t = line["t"].as_f64().expect("t");
        assert!(
            (t - (k * 256) as f64 / f64::from(rate)).abs() < 1e-12,
            "frame {k}: t {t}"
        );
        assert!((t - r.t).abs() < 1e-12);
        let rms = line["level"]["rms_dbfs"].as_f64().expect("rms");
        let peak = line["level"]["peak_dbfs"].as_f64().expect("peak");
        assert_eq!(rms as f32, r.rms_dbfs, "seed {seed:#x} frame {k}");
        assert_eq!(peak as f32, r.peak_dbfs, "seed {seed:#x} frame {k}");
        assert_eq!(
            line["descriptors"],
            as_json(&r.descriptors),
            "seed {seed:#x} frame {k}"
        );
    }
    assert!(
        lines[5]["descriptors"]["centroid_hz"]
            .as_f64()
            .expect("centroid")
            > 0.0
    );
    assert_eq!(
        lines[5]["descriptors"]["mfcc"]
            .as_array()
            .expect("mfcc")
            .len(),
        20
    );

    // --live: streamed frames with the live convention, equal to the engine's `process`.
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--frames",
        "--live",
        "--json",
        "--frame-size",
        "1024",
        "--hop-size",
        "256",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let (live, _) = engine_reference(&samples, channels, rate, Some(framing), 1.0, false);
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    assert_eq!(lines.len(), live.len());
    for (k, (line, r)) in lines.iter().zip(&live).enumerate() {
        assert_eq!(
            line["descriptors"],
            as_json(&r.descriptors),
            "seed {seed:#x} live frame {k}"
        );
    }

    // Without --json: CSV with units in the header, same frames.
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--frames",
        "--frame-size",
        "1024",
        "--hop-size",
        "256",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0));
    let (header, rows) = parse_csv(&text(&o.stdout));
    assert!(
        header
            .join(",")
            .starts_with("t_s,rms_dbfs,peak_dbfs,mel_power_1,"),
        "{header:?}"
    );
    assert!(header.contains(&"mfcc_20".to_owned()) && header.contains(&"centroid_hz".to_owned()));
    assert_eq!(rows.len(), reference.len());
    assert_eq!(rows[7]["rms_dbfs"] as f32, reference[7].rms_dbfs);

    // --sample-rate: resampled first (rubato), then framed at the new rate with its defaults.
    // A steady 0.5-amplitude 1 kHz sine keeps its RMS (−9.03 dBFS, closed form 20·log10(0.5/√2)).
    let sine_path = dir.path().join("sine.wav");
    let sine: Vec<f32> = (0..rate as usize * 2)
        .map(|i| (0.5 * (std::f64::consts::TAU * 1000.0 * i as f64 / f64::from(rate)).sin()) as f32)
        .collect();
    write_wav(&sine_path, &sine, 1, rate, 32, true);
    let o = weft(&[
        "analyze",
        path_str(&sine_path),
        "--frames",
        "--json",
        "--sample-rate",
        "22050",
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    let resampled = sine.len() / 2;
    assert_eq!(
        lines.len(),
        1 + resampled / 512,
        "frames at 22050 Hz, hop 512"
    );
    let t1 = lines[1]["t"].as_f64().expect("t");
    assert!((t1 - 512.0 / 22_050.0).abs() < 1e-12);
    let expected_rms = 20.0 * (0.5 / 2f64.sqrt()).log10();
    for line in &lines[8..lines.len() - 8] {
        let rms = line["level"]["rms_dbfs"].as_f64().expect("rms");
        assert!(
            (rms - expected_rms).abs() < 0.02,
            "resampled sine RMS {rms}"
        );
    }
}

#[test]
fn rates_outside_the_engine_range_are_resampled_to_its_edge() {
    let dir = tempfile::tempdir().expect("tempdir");
    let wav = dir.path().join("phone.wav");
    // 3 s of a 0.5-amplitude 440 Hz sine at 4 kHz.
    let x: Vec<f32> = (0..12_000)
        .map(|i| (0.5 * (std::f64::consts::TAU * 440.0 * f64::from(i) / 4_000.0).sin()) as f32)
        .collect();
    write_wav(&wav, &x, 1, 4_000, 16, false);
    let o = weft(&["analyze", path_str(&wav), "--json", "-q"]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let first: serde_json::Value =
        serde_json::from_str(text(&o.stdout).lines().next().expect("a line")).expect("JSON");
    assert_eq!(first["source"]["sample_rate_hz"], 4_000);
    assert_eq!(first["analysis"]["sample_rate_hz"], 8_000);
    assert!((first["duration_s"].as_f64().expect("duration") - 3.0).abs() < 1e-9);
    // The sine keeps its level through the resampler: RMS 20·log10(0.5/√2) = −9.03 dBFS in the
    // middle window (the outer ones hold frames that reach into the centre padding).
    let rms = first["windows"][1]["level"]["rms_dbfs"]
        .as_f64()
        .expect("rms");
    assert!((rms + 9.031).abs() < 0.05, "{rms}");
}

#[test]
fn usage_errors_exit_with_two() {
    let dir = tempfile::tempdir().expect("tempdir");
    let wav = dir.path().join("a.wav");
    write_wav(&wav, &test_signal(5, 8_000, 1, 0.5), 1, 8_000, 16, false);
    let w = path_str(&wav);
    for args in [
        vec!["analyze", w, w, "--frames"],
        vec!["analyze", w, "--plot", "levels.gif"],
        vec!["analyze", w, "--hop-size", "128"],
        vec!["analyze", w, "--window", "0"],
        vec!["analyze", w, "--frame-size", "1"],
        vec!["analyze", w, "--frame-size", "256", "--hop-size", "512"],
        vec!["analyze", w, "--sample-rate", "100"],
        vec!["analyze", w, "--plots", "png"],
        vec!["analyze"],
        vec!["analyse-typo", w],
    ] {
        let o = weft(&args);
        assert_eq!(o.status.code(), Some(2), "{args:?}: {}", text(&o.stderr));
        assert!(!text(&o.stderr).is_empty(), "{args:?} says why");
    }
    // And a clean run exits 0.
    assert_eq!(weft(&["analyze", w, "-q"]).status.code(), Some(0));
}

/// The engine's descriptors as JSON text parses back (serde_json writes each f32 in its
/// shortest round-trip form, as the CLI's output does).
fn as_json(d: &Descriptors) -> serde_json::Value {
    serde_json::from_str(&serde_json::to_string(d).expect("serialise")).expect("parse")
}

/// Width and height from a PNG's IHDR chunk (PNG specification, ISO/IEC 15948 §11.2.2).
fn png_size(bytes: &[u8]) -> (u32, u32) {
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "PNG signature");
    assert_eq!(&bytes[12..16], b"IHDR");
    let be = |i: usize| u32::from_be_bytes([bytes[i], bytes[i + 1], bytes[i + 2], bytes[i + 3]]);
    (be(16), be(20))
}

#[test]
fn plots_are_written_per_file_and_as_an_overview() {
    let dir = tempfile::tempdir().expect("tempdir");
    let input = dir.path().join("set");
    std::fs::create_dir(&input).expect("mkdir");
    for (i, name) in ["parlour.wav", "dockside.wav", "neon.wav"]
        .iter()
        .enumerate()
    {
        write_wav(
            &input.join(name),
            &test_signal(60 + i as u64, 22_050, 2, 3.0 + i as f64),
            2,
            22_050,
            16,
            false,
        );
    }
    let out = dir.path().join("out");
    let overview = dir.path().join("overview.png");
    let o = weft(&[
        "analyze",
        path_str(&input),
        "--out",
        path_str(&out),
        "--plots",
        "svg",
        "--plot",
        path_str(&overview),
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    // The overview: one 560-pixel panel (instrument mix over level) per file.
    assert_eq!(
        png_size(&std::fs::read(&overview).expect("png")),
        (1200, 3 * 560)
    );
    // One SVG per file with its title, the legends (every section of the palette, the
    // unexplained share, both level lines) and minutes:seconds tick labels.
    let svg = std::fs::read_to_string(out.join("neon.wav.plot.svg")).expect("svg");
    assert!(svg.starts_with("<svg"), "an SVG document");
    let palette = Palette::default_palette();
    for needle in [
        "neon.wav — instrument mix",
        "share of energy (%)",
        "unexplained",
        "RMS per window (dBFS)",
        "peak per window (dBFS)",
        "time (m:ss)",
        "\n0:05\n",
    ]
    .into_iter()
    .chain(palette.sections().iter().map(String::as_str))
    {
        assert!(svg.contains(needle), "the plot lacks {needle:?}");
    }
    assert!(
        !svg.contains("driven guitar"),
        "sections, not families, by default"
    );
    // Per family with --plot-by family; the level chart alone with --no-shares.
    let by_family = dir.path().join("families.svg");
    let level_only = dir.path().join("level.png");
    for (dest, extra) in [
        (&by_family, "--plot-by=family"),
        (&level_only, "--no-shares"),
    ] {
        let o = weft(&[
            "analyze",
            path_str(&input.join("neon.wav")),
            "--plot",
            path_str(dest),
            extra,
            "-q",
        ]);
        assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    }
    let svg = std::fs::read_to_string(&by_family).expect("svg");
    for family in palette.families() {
        // SVG text escapes '&' (toms & hand percussion).
        let escaped = family.name.replace('&', "&amp;");
        assert!(svg.contains(&escaped), "the legend lacks {}", family.name);
    }
    assert_eq!(
        png_size(&std::fs::read(&level_only).expect("png")),
        (1200, 360)
    );
    // A single file's --plot is that file's plot, SVG by extension.
    let single = dir.path().join("one.svg");
    let o = weft(&[
        "analyze",
        path_str(&input.join("parlour.wav")),
        "--plot",
        path_str(&single),
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0));
    let svg = std::fs::read_to_string(&single).expect("svg");
    assert!(svg.contains("parlour.wav") && !svg.contains("neon.wav"));
    // No partial files anywhere.
    for entry in std::fs::read_dir(dir.path())
        .expect("dir")
        .chain(std::fs::read_dir(&out).expect("out"))
    {
        let name = entry
            .expect("entry")
            .file_name()
            .to_string_lossy()
            .into_owned();
        assert!(!name.contains(".partial-"), "left behind: {name}");
    }
}

/// Peak resident memory of one `weft analyze` run, KiB, measured by GNU time.
fn peak_rss_kib(args: &[&str]) -> u64 {
    let o = Command::new("/usr/bin/time")
        .args(["-f", "%M"])
        .arg(env!("CARGO_BIN_EXE_weft"))
        .args(args)
        .output()
        .unwrap_or_else(|e| panic!("GNU time is not available ({e}): {SETUP_HINT}"));
    assert!(o.status.success(), "{}", text(&o.stderr));
    let stderr = text(&o.stderr);
    stderr
        .lines()
        .last()
        .and_then(|l| l.trim().parse().ok())
        .unwrap_or_else(|| panic!("no peak memory figure in {stderr:?}"))
}

/// A canonical 44-byte WAV header for 16-bit mono PCM (Microsoft RIFF WAVE, `fmt ` chunk of 16
/// bytes) announcing `frames` frames.
fn wav_header(rate_hz: u32, frames: u64) -> Vec<u8> {
    let data_bytes = u32::try_from(frames * 2).expect("fits a WAV");
    let mut h = Vec::with_capacity(44);
    h.extend_from_slice(b"RIFF");
    h.extend_from_slice(&(36 + data_bytes).to_le_bytes());
    h.extend_from_slice(b"WAVEfmt ");
    h.extend_from_slice(&16u32.to_le_bytes());
    h.extend_from_slice(&1u16.to_le_bytes()); // PCM
    h.extend_from_slice(&1u16.to_le_bytes()); // mono
    h.extend_from_slice(&rate_hz.to_le_bytes());
    h.extend_from_slice(&(rate_hz * 2).to_le_bytes());
    h.extend_from_slice(&2u16.to_le_bytes());
    h.extend_from_slice(&16u16.to_le_bytes());
    h.extend_from_slice(b"data");
    h.extend_from_slice(&data_bytes.to_le_bytes());
    h
}

#[test]
fn a_three_hour_file_stays_within_bounded_memory() {
    // Three hours at 8 kHz mono (173 MB; the file is sparse, its audio silent): held whole as
    // mid and side it would take 691 MB. Streaming keeps the peak near that of a 10 s file.
    let dir = tempfile::tempdir().expect("tempdir");
    let rate = 8_000;
    let make = |name: &str, seconds: u64| -> PathBuf {
        let path = dir.path().join(name);
        let header = wav_header(rate, seconds * u64::from(rate));
        std::fs::write(&path, &header).expect("write");
        let f = std::fs::OpenOptions::new()
            .write(true)
            .open(&path)
            .expect("open");
        f.set_len(header.len() as u64 + seconds * u64::from(rate) * 2)
            .expect("extend");
        path
    };
    let long = make("three-hours.wav", 3 * 3600);
    let short = make("ten-seconds.wav", 10);
    let out = dir.path().join("out");
    let short_kib = peak_rss_kib(&["analyze", path_str(&short), "--out", path_str(&out), "-q"]);
    let long_kib = peak_rss_kib(&["analyze", path_str(&long), "--out", path_str(&out), "-q"]);
    assert!(
        long_kib < short_kib + 32 * 1024,
        "peak memory {long_kib} KiB for 3 h vs {short_kib} KiB for 10 s"
    );
    let (_, rows) = read_csv(&out.join("three-hours.wav.timeline.csv"));
    assert_eq!(rows.len(), 3 * 3600, "one window per second");
    assert!((rows.last().expect("rows")["end_s"] - 10_800.0).abs() < 1e-9);
}
