//! Weft's timbre descriptors against librosa 0.11.0 on the same samples.
//!
//! The signals (a 440 Hz sine with seeded noise, a 100 Hz–10 kHz chirp, white and pink noise, a
//! clipped square wave, silence, a DC offset, and three notes rendered from the General MIDI
//! SoundFont with rustysynth) are made here at 22 050, 44 100 and 48 000 Hz, written as float32
//! WAV files, and `tests/python/timbre_reference.py` computes librosa's features on them, once for
//! the whole test binary. Each test compares one descriptor, on every signal, for:
//!
//! - the offline path ([`Analyzer::analyze_clip`]) against librosa's functions with their
//!   defaults (including `power_to_db`'s whole-clip `top_db=80` floor);
//! - the live path ([`Analyzer::process`] in odd-sized blocks, then [`Analyzer::finish`]) against
//!   the same librosa functions fed with `power_to_db(..., top_db=None)`.
//!
//! Tolerances: relative 1e-4 (absolute 1e-6 near zero) where librosa computes in float64 (on its
//! float32 spectrogram), float32 precision where librosa computes in float32 (stated per check).
//! Needs the Python reference tools: `cargo xtask setup` (the tests fail, never skip, without).

use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use serde::Deserialize;
use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::{Arc, OnceLock};
use weft_engine::timbre::{N_CONTRAST, N_MELS, N_MFCC};
use weft_engine::{AnalysisSettings, Analyzer, FrameConfig, FrameResult, TimbreOptions};

/// Seed of every random generator here; printed in failure messages.
const SEED: u64 = 0x7157_BE55_0003;
/// Sample rates of the grid, Hz.
const RATES: [u32; 3] = [22_050, 44_100, 48_000];
/// Length of each synthetic signal, seconds.
const DURATION_S: f64 = 2.0;
/// The General MIDI SoundFont (Debian `fluid-soundfont-gm`, installed by `cargo xtask setup`).
const SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";
/// Block size of the live runs (odd on purpose, so frames straddle blocks).
const LIVE_BLOCK: usize = 777;
/// The custom roll-off fraction checked (Weft's default).
const ROLLOFF_CUSTOM: f64 = 0.95;
/// float32 machine epsilon, as f64.
const EPS32: f64 = f32::EPSILON as f64;

/// One signal at one rate and framing.
struct Case {
    name: String,
    sr: u32,
    framing: FrameConfig,
    samples: Vec<f32>,
}

/// librosa's features for one case: name → rows × frames.
#[derive(Deserialize)]
struct Reference {
    frames: usize,
    #[serde(flatten)]
    features: HashMap<String, serde_json::Value>,
}

#[derive(Deserialize)]
struct FilterReference {
    sr: u32,
    n_fft: usize,
    slaney: Vec<Vec<f64>>,
    htk: Vec<Vec<f64>>,
}

#[derive(Deserialize)]
struct ReferenceFile {
    librosa_version: String,
    entries: HashMap<String, Reference>,
    filters: Vec<FilterReference>,
}

/// Everything the tests compare: the cases, librosa's results, Weft's offline and live frames.
struct Fixture {
    cases: Vec<Case>,
    reference: ReferenceFile,
    offline: Vec<Vec<FrameResult>>,
    live: Vec<Vec<FrameResult>>,
}

fn fixture() -> &'static Fixture {
    static FIXTURE: OnceLock<Fixture> = OnceLock::new();
    FIXTURE.get_or_init(build_fixture)
}

fn workspace_root() -> PathBuf {
    let here = Path::new(env!("CARGO_MANIFEST_DIR"));
    here.parent().unwrap_or(here).to_path_buf()
}

fn build_fixture() -> Fixture {
    let cases = cases();
    let dir = std::env::temp_dir().join(format!("weft-timbre-librosa-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("create a temporary folder");
    let mut entries = Vec::new();
    for case in &cases {
        let path = dir.join(format!("{}.wav", case.name));
        write_wav(&path, case.sr, &case.samples);
        entries.push(serde_json::json!({
            "name": case.name,
            "path": path,
            "sr": case.sr,
            "n_fft": case.framing.frame_len,
            "hop": case.framing.hop_len,
            "rolloff_custom": ROLLOFF_CUSTOM,
        }));
    }
    let filters: Vec<_> = RATES
        .iter()
        .map(|&sr| serde_json::json!({"sr": sr, "n_fft": 2048}))
        .collect();
    let manifest = dir.join("manifest.json");
    std::fs::write(
        &manifest,
        serde_json::json!({"entries": entries, "filters": filters}).to_string(),
    )
    .expect("write the manifest");
    let out = dir.join("librosa.json");
    let root = workspace_root();
    let python = root.join(".venv/bin/python");
    assert!(
        python.is_file(),
        "no Python reference tools at {}: run cargo xtask setup",
        python.display()
    );
    let status = Command::new(&python)
        .arg(root.join("tests/python/timbre_reference.py"))
        .arg("reference")
        .arg(&manifest)
        .arg(&out)
        .status()
        .expect("run tests/python/timbre_reference.py (run cargo xtask setup)");
    assert!(status.success(), "timbre_reference.py failed: {status}");
    let text = std::fs::read_to_string(&out).expect("read librosa's results");
    let reference: ReferenceFile = serde_json::from_str(&text).expect("parse librosa's results");
    let _ = std::fs::remove_dir_all(&dir);
    assert_eq!(reference.librosa_version, "0.11.0", "pinned librosa");

    let mut offline = Vec::new();
    let mut live = Vec::new();
    for case in &cases {
        let settings = AnalysisSettings::new(f64::from(case.sr), case.framing)
            .and_then(|s| {
                s.with_timbre(TimbreOptions {
                    rolloff_custom_fraction: ROLLOFF_CUSTOM,
                    ..TimbreOptions::default()
                })
            })
            .expect("valid settings");
        let mut analyzer = Analyzer::new(settings);
        offline.push(analyzer.analyze_clip(&case.samples, None));
        let mut frames = Vec::new();
        for block in case.samples.chunks(LIVE_BLOCK) {
            analyzer.process(block, None, |f| frames.push(*f));
        }
        analyzer.finish(|f| frames.push(*f));
        live.push(frames);
    }
    Fixture {
        cases,
        reference,
        offline,
        live,
    }
}

fn write_wav(path: &Path, sr: u32, samples: &[f32]) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: sr,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).expect("create a WAV file");
    for &s in samples {
        w.write_sample(s).expect("write a sample");
    }
    w.finalize().expect("finish the WAV file");
}

// ---------------------------------------------------------------------------------------------
// Signals
// ---------------------------------------------------------------------------------------------

fn cases() -> Vec<Case> {
    let font = soundfont();
    let mut cases = Vec::new();
    for (i, &sr) in RATES.iter().enumerate() {
        let framing = FrameConfig::for_sample_rate(f64::from(sr));
        let mut rng = SmallRng::seed_from_u64(SEED + i as u64);
        let n = (DURATION_S * f64::from(sr)) as usize;
        let mut add = |name: &str, samples: Vec<f32>| {
            cases.push(Case {
                name: format!("{name}-{sr}"),
                sr,
                framing,
                samples,
            })
        };
        add("sine440-noise", sine_noise(sr, n, &mut rng));
        add("chirp", chirp(sr, n));
        add("white", gaussian(n, 0.2, &mut rng));
        add("pink", pink(n, &mut rng));
        add("clipped-square", clipped_square(sr, n));
        add("silence", vec![0.0; n]);
        add("dc", vec![0.25; n]);
        // Piano C4, violin A4, alto sax D4 (General MIDI programs 0, 40, 65).
        for (program, key) in [(0, 60), (40, 69), (65, 62)] {
            add(
                &format!("note-p{program}-k{key}"),
                render_note(&font, sr, program, key),
            );
        }
    }
    // Another framing (odd hop, so librosa's onset shift is 2 frames, not 3), at 44.1 kHz.
    let framing = FrameConfig::new(1024, 300).expect("valid framing");
    let mut rng = SmallRng::seed_from_u64(SEED + 99);
    let n = (DURATION_S * 44_100.0) as usize;
    for (name, samples) in [
        ("white-1024-300", gaussian(n, 0.2, &mut rng)),
        ("note-p0-k60-1024-300", render_note(&font, 44_100, 0, 60)),
        ("chirp-1024-300", chirp(44_100, n)),
    ] {
        cases.push(Case {
            name: name.to_owned(),
            sr: 44_100,
            framing,
            samples,
        });
    }
    cases
}

/// Standard normal samples by the Box–Muller transform, scaled by `sigma`.
fn gaussian(n: usize, sigma: f64, rng: &mut SmallRng) -> Vec<f32> {
    (0..n)
        .map(|_| {
            let u1: f64 = rng.gen_range(f64::EPSILON..1.0);
            let u2: f64 = rng.r#gen();
            (sigma * (-2.0 * u1.ln()).sqrt() * (std::f64::consts::TAU * u2).cos()) as f32
        })
        .collect()
}

fn sine_noise(sr: u32, n: usize, rng: &mut SmallRng) -> Vec<f32> {
    let noise = gaussian(n, 0.05, rng);
    (0..n)
        .map(|i| {
            let s = 0.5 * (std::f64::consts::TAU * 440.0 * i as f64 / f64::from(sr)).sin();
            (s + f64::from(noise[i])) as f32
        })
        .collect()
}

/// Exponential sweep from 100 Hz to 10 kHz over the signal, amplitude 0.5.
fn chirp(sr: u32, n: usize) -> Vec<f32> {
    let (f0, f1) = (100.0_f64, 10_000.0_f64);
    let t_total = n as f64 / f64::from(sr);
    let k = (f1 / f0).ln() / t_total;
    (0..n)
        .map(|i| {
            let t = i as f64 / f64::from(sr);
            let phase = std::f64::consts::TAU * f0 * ((k * t).exp() - 1.0) / k;
            (0.5 * phase.sin()) as f32
        })
        .collect()
}

/// Pink (1/f) noise by the Voss–McCartney method: 16 white rows, row `r` redrawn every 2^r
/// samples, summed (M. Gardner, "White and brown music, fractal curves and one-over-f
/// fluctuations", Scientific American, April 1978).
fn pink(n: usize, rng: &mut SmallRng) -> Vec<f32> {
    let mut rows = [0.0_f64; 16];
    for r in &mut rows {
        *r = rng.gen_range(-1.0..1.0);
    }
    (0..n)
        .map(|i| {
            if i > 0 {
                let r = (i.trailing_zeros() as usize).min(rows.len() - 1);
                rows[r] = rng.gen_range(-1.0..1.0);
            }
            (0.05 * rows.iter().sum::<f64>()) as f32
        })
        .collect()
}

/// A band-limited 220 Hz square wave (odd harmonics below Nyquist, Fourier series
/// `4/π · Σ sin(2π(2k+1)ft) / (2k+1)`, amplitude 0.9), hard-clipped at ±0.7.
fn clipped_square(sr: u32, n: usize) -> Vec<f32> {
    let f = 220.0;
    let harmonics: Vec<f64> = (0..)
        .map(|k| f64::from(2 * k + 1))
        .take_while(|h| h * f < f64::from(sr) / 2.0)
        .collect();
    (0..n)
        .map(|i| {
            let t = i as f64 / f64::from(sr);
            let s: f64 = harmonics
                .iter()
                .map(|h| (std::f64::consts::TAU * h * f * t).sin() / h)
                .sum();
            (0.9 * 4.0 / std::f64::consts::PI * s).clamp(-0.7, 0.7) as f32
        })
        .collect()
}

fn soundfont() -> Arc<rustysynth::SoundFont> {
    let mut file = std::fs::File::open(SOUNDFONT)
        .unwrap_or_else(|e| panic!("{SOUNDFONT}: {e} (run cargo xtask setup)"));
    Arc::new(rustysynth::SoundFont::new(&mut file).expect("a valid SoundFont"))
}

/// One dry note (1.5 s held, 0.5 s release) of General MIDI `program`, mono (mean of the
/// synthesizer's two channels, as librosa 0.11.0 `to_mono` averages them).
fn render_note(font: &Arc<rustysynth::SoundFont>, sr: u32, program: i32, key: i32) -> Vec<f32> {
    let mut settings = rustysynth::SynthesizerSettings::new(sr as i32);
    settings.enable_reverb_and_chorus = false;
    let mut synth = rustysynth::Synthesizer::new(font, &settings).expect("a synthesizer");
    synth.process_midi_message(0, 0xC0, program, 0);
    synth.note_on(0, key, 100);
    let held = (1.5 * f64::from(sr)) as usize;
    let total = (DURATION_S * f64::from(sr)) as usize;
    let (mut left, mut right) = (vec![0.0; total], vec![0.0; total]);
    synth.render(&mut left[..held], &mut right[..held]);
    synth.note_off(0, key);
    synth.render(&mut left[held..], &mut right[held..]);
    left.iter()
        .zip(&right)
        .map(|(l, r)| 0.5 * (l + r))
        .collect()
}

// ---------------------------------------------------------------------------------------------
// Comparison
// ---------------------------------------------------------------------------------------------

/// How the allowed difference is scaled.
#[derive(Clone, Copy)]
enum Scale {
    /// `|ours − ref| ≤ rel·|ref| + abs`, element by element.
    Element,
    /// `|ours − ref| ≤ rel·‖ref frame‖₂ + abs`: for a float32 transform whose rounding error
    /// scales with the whole input vector (librosa's float32 DCT).
    FrameNorm,
}

/// One descriptor's check: which librosa output, how Weft's value is read, the tolerance.
struct Check {
    /// Key in librosa's results.
    key: &'static str,
    /// What librosa computes, named with its version.
    source: &'static str,
    rel: f64,
    abs: f64,
    scale: Scale,
    /// Weft's value of row `r` of one frame.
    ours: fn(&FrameResult, usize) -> f64,
}

fn rows_of(value: &serde_json::Value) -> Vec<Vec<f64>> {
    serde_json::from_value(value.clone()).expect("rows × frames of numbers")
}

/// Compares one check on every case (offline or live results); prints the largest deviations
/// and panics listing every case out of tolerance.
fn run(check: &Check, live: bool) {
    let fx = fixture();
    let results = if live { &fx.live } else { &fx.offline };
    let mut failures = Vec::new();
    let (mut worst_abs, mut worst_rel) = (0.0_f64, 0.0_f64);
    let (mut worst_abs_at, mut worst_rel_at) = (String::new(), String::new());
    for (case, frames) in fx.cases.iter().zip(results) {
        let reference = &fx.reference.entries[&case.name];
        assert_eq!(
            frames.len(),
            reference.frames,
            "{}: frame count vs librosa 0.11.0",
            case.name
        );
        let rows = rows_of(&reference.features[check.key]);
        for t in 0..reference.frames {
            let norm = rows.iter().map(|r| r[t] * r[t]).sum::<f64>().sqrt();
            for (r, row) in rows.iter().enumerate() {
                let want = row[t];
                let got = (check.ours)(&frames[t], r);
                let diff = (got - want).abs();
                let scale = match check.scale {
                    Scale::Element => want.abs(),
                    Scale::FrameNorm => norm,
                };
                let allowed = check.rel * scale + check.abs;
                let at = format!(
                    "{} frame {t} row {r}: weft {got}, librosa {want}",
                    case.name
                );
                // NaN fails too.
                if diff.is_nan() || diff > allowed {
                    failures.push(format!("{at} (|Δ| {diff:.3e} > {allowed:.3e})"));
                }
                if diff > worst_abs {
                    worst_abs = diff;
                    worst_abs_at.clone_from(&at);
                }
                if scale > check.abs / check.rel {
                    let rel = diff / scale;
                    if rel > worst_rel {
                        worst_rel = rel;
                        worst_rel_at = at;
                    }
                }
            }
        }
    }
    let path = if live { "live" } else { "offline" };
    println!(
        "{path} {} vs {}: max |Δ| {worst_abs:.3e} ({worst_abs_at}); max relative {worst_rel:.3e} \
         ({worst_rel_at})",
        check.key, check.source
    );
    assert!(
        failures.is_empty(),
        "{path} {} differs from {} (seed {SEED:#x}) in {} values, first: {:#?}",
        check.key,
        check.source,
        failures.len(),
        &failures[..failures.len().min(8)]
    );
}

fn f(v: f32) -> f64 {
    f64::from(v)
}

// ---------------------------------------------------------------------------------------------
// Checks
// ---------------------------------------------------------------------------------------------

#[test]
fn mel_power_equals_librosa_melspectrogram() {
    // float32 in librosa (float32 power × float32 filterbank): 2^6 ε32 relative, plus a floor
    // far below any audible band energy for bins that are zero up to rounding.
    run(
        &Check {
            key: "mel",
            source: "librosa 0.11.0 feature.melspectrogram",
            rel: 64.0 * EPS32,
            abs: 1e-12,
            scale: Scale::Element,
            ours: |fr, r| f(fr.descriptors.mel_power[r]),
        },
        false,
    );
}

#[test]
fn mfcc_equals_librosa_mfcc() {
    // float32 in librosa (float32 dB, scipy float32 DCT): rounding scales with the frame's
    // whole dB vector, 2^6 ε32 of its norm.
    let check = |key, source| Check {
        key,
        source,
        rel: 64.0 * EPS32,
        abs: 1e-6,
        scale: Scale::FrameNorm,
        ours: |fr, r| f(fr.descriptors.mfcc[r]),
    };
    run(&check("mfcc", "librosa 0.11.0 feature.mfcc"), false);
    run(
        &check(
            "mfcc_live",
            "librosa 0.11.0 feature.mfcc(S=power_to_db(melspectrogram, top_db=None))",
        ),
        true,
    );
}

#[test]
fn centroid_equals_librosa_spectral_centroid() {
    // float64 in librosa.
    run(
        &Check {
            key: "centroid",
            source: "librosa 0.11.0 feature.spectral_centroid",
            rel: 1e-4,
            abs: 1e-6,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.centroid_hz),
        },
        false,
    );
}

#[test]
fn bandwidth_equals_librosa_spectral_bandwidth() {
    // float64 in librosa.
    run(
        &Check {
            key: "bandwidth",
            source: "librosa 0.11.0 feature.spectral_bandwidth (p=2)",
            rel: 1e-4,
            abs: 1e-6,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.bandwidth_hz),
        },
        false,
    );
}

#[test]
fn rolloff_equals_librosa_spectral_rolloff() {
    // A bin frequency: equal, up to float32 storage.
    run(
        &Check {
            key: "rolloff",
            source: "librosa 0.11.0 feature.spectral_rolloff (roll_percent=0.85)",
            rel: 1e-4,
            abs: 1e-6,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.rolloff_hz),
        },
        false,
    );
    run(
        &Check {
            key: "rolloff_custom",
            source: "librosa 0.11.0 feature.spectral_rolloff (roll_percent=0.95)",
            rel: 1e-4,
            abs: 1e-6,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.rolloff_custom_hz),
        },
        false,
    );
}

#[test]
fn flatness_equals_librosa_spectral_flatness() {
    // float32 in librosa (log, mean and exp of float32 powers): 2^8 ε32 relative (the mean of
    // ~1000 float32 logarithms of magnitude up to ~25 carries a few 1e-6 of absolute error).
    run(
        &Check {
            key: "flatness",
            source: "librosa 0.11.0 feature.spectral_flatness",
            rel: 256.0 * EPS32,
            abs: 1e-9,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.flatness),
        },
        false,
    );
}

#[test]
fn contrast_equals_librosa_spectral_contrast() {
    // float64 in librosa (dB of float32 band means).
    assert_eq!(N_CONTRAST, 7, "librosa's n_bands=6 gives 7 rows");
    let check = |key, source| Check {
        key,
        source,
        rel: 1e-4,
        abs: 1e-6,
        scale: Scale::Element,
        ours: |fr, r| f(fr.descriptors.contrast_db[r]),
    };
    run(
        &check("contrast", "librosa 0.11.0 feature.spectral_contrast"),
        false,
    );
    run(
        &check(
            "contrast_live",
            "librosa 0.11.0 spectral_contrast peak and valley, power_to_db(top_db=None)",
        ),
        true,
    );
}

#[test]
fn valleys_equal_librosa_spectral_contrast_valleys() {
    // The valley array librosa 0.11.0 spectral_contrast passes to power_to_db (float64).
    let check = |key, source| Check {
        key,
        source,
        rel: 1e-4,
        abs: 1e-6,
        scale: Scale::Element,
        ours: |fr, r| f(fr.descriptors.valley_db[r]),
    };
    run(
        &check(
            "valley",
            "librosa 0.11.0 spectral_contrast valley, power_to_db (top_db=80)",
        ),
        false,
    );
    run(
        &check(
            "valley_live",
            "librosa 0.11.0 spectral_contrast valley, power_to_db(top_db=None)",
        ),
        true,
    );
}

#[test]
fn flux_equals_librosa_onset_strength() {
    // float32 in librosa (differences of float32 dB values near ±100 dB, whose rounding is
    // ~2^−17 dB): 2^6 ε32 relative plus 1e-5 dB.
    let check = |key, source| Check {
        key,
        source,
        rel: 64.0 * EPS32,
        abs: 1e-5,
        scale: Scale::Element,
        ours: |fr, _| f(fr.descriptors.flux_db),
    };
    run(&check("flux", "librosa 0.11.0 onset.onset_strength"), false);
    run(
        &check(
            "flux_live",
            "librosa 0.11.0 onset.onset_strength(S=power_to_db(mel, top_db=None))",
        ),
        true,
    );
}

#[test]
fn zero_crossing_rate_equals_librosa() {
    // A count divided by the frame length: equal up to float32 storage.
    run(
        &Check {
            key: "zcr",
            source: "librosa 0.11.0 feature.zero_crossing_rate",
            rel: 1e-6,
            abs: 1e-9,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.zero_crossings_per_sample),
        },
        false,
    );
}

#[test]
fn rms_equals_librosa_rms() {
    // float32 in librosa (mean of float32 squares over the frame): 2^6 ε32 relative.
    run(
        &Check {
            key: "rms",
            source: "librosa 0.11.0 feature.rms",
            rel: 64.0 * EPS32,
            abs: 1e-12,
            scale: Scale::Element,
            ours: |fr, _| f(fr.descriptors.rms),
        },
        false,
    );
}

#[test]
fn live_equals_offline_where_no_floor_applies() {
    // The live and offline paths differ only in the whole-clip floor: fields it never touches
    // are identical, frame for frame.
    let fx = fixture();
    for ((case, off), live) in fx.cases.iter().zip(&fx.offline).zip(&fx.live) {
        assert_eq!(off.len(), live.len(), "{}", case.name);
        for (a, b) in off.iter().zip(live) {
            let (a, b) = (&a.descriptors, &b.descriptors);
            assert_eq!(a.mel_power, b.mel_power, "{}", case.name);
            assert_eq!(a.centroid_hz, b.centroid_hz, "{}", case.name);
            assert_eq!(a.flatness, b.flatness, "{}", case.name);
            assert_eq!(a.rms, b.rms, "{}", case.name);
        }
    }
}

#[test]
fn mel_filterbanks_equal_librosa_filters_mel() {
    // librosa 0.11.0 filters.mel stores float32 weights; Weft rounds the same float64 values.
    use weft_engine::bands::{BandLayout, BandNorm, Filterbank, MelScale};
    let fx = fixture();
    assert!(!fx.reference.filters.is_empty());
    for spec in &fx.reference.filters {
        for (scale, want) in [(MelScale::Slaney, &spec.slaney), (MelScale::Htk, &spec.htk)] {
            let layout = BandLayout::Mel {
                bands: N_MELS,
                fmin_hz: 0.0,
                fmax_hz: None,
                scale,
                norm: BandNorm::Slaney,
            };
            let fb = Filterbank::new(&layout, f64::from(spec.sr), spec.n_fft).expect("valid");
            let got = fb.to_dense();
            assert_eq!(got.len(), want.len());
            for (b, (g, w)) in got.iter().zip(want).enumerate() {
                for (k, (&g, &w)) in g.iter().zip(w).enumerate() {
                    assert!(
                        (f64::from(g) - w).abs() <= 4.0 * EPS32 * w.abs(),
                        "{scale:?} {} Hz band {b} bin {k}: weft {g}, librosa 0.11.0 filters.mel {w}",
                        spec.sr
                    );
                }
            }
        }
    }
    assert_eq!(N_MFCC, 20, "librosa 0.11.0 feature.mfcc n_mfcc default");
}
