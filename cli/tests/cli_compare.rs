//! End-to-end tests of `weft compare` and `weft analyze --style`: the built binary against a
//! style model trained here through the engine's API directly (`weft_engine::style::StyleModel::fit`
//! on windows the engine's `Analyzer` and `Windower` computed from seeded synthetic files).
//!
//! References, independent of the command-line code under test:
//! - the engine run directly on hound's reading of the same files: its style windows, and the
//!   model's `StyleModel::estimate` on each, give the closeness the CLI must report;
//! - the model's own training records (`StyleModel::class_mean`, `Standardizer::scale`) give the
//!   category's typical range the CLI must compare the file with.

mod common;
use common::{path_str, text, weft};
use rand::{Rng, SeedableRng, rngs::SmallRng};
use std::path::{Path, PathBuf};
use std::process::Output;
use std::sync::OnceLock;
use weft_engine::evaluation::{cross_validate, default_folds};
use weft_engine::palette::Palette;
use weft_engine::style::{FeatureMatrix, LabelledWindows, ModelKind, ModelParams, StyleModel};
use weft_engine::windows::{WindowSpec, clip_windows, schema};

const RATE_HZ: u32 = 22_050;

/// The two kinds of track: "bright" (hiss bursts on a beat over a high tone) and "low" (a soft
/// low tone with a slow swell), each varied by the seed.
fn track(seed: u64, bright: bool, seconds: f64) -> Vec<f32> {
    let mut rng = SmallRng::seed_from_u64(seed);
    let tau = std::f64::consts::TAU;
    let pitch = 1.0 + rng.gen_range(-0.1..0.1);
    let beat_s = rng.gen_range(0.35..0.5);
    let n = (seconds * f64::from(RATE_HZ)) as usize;
    (0..n)
        .map(|i| {
            let t = i as f64 / f64::from(RATE_HZ);
            let x = if bright {
                let phase = t % beat_s;
                let burst = (-phase * 25.0).exp() * rng.gen_range(-0.5..0.5);
                0.15 * (tau * 2_600.0 * pitch * t).sin() + burst
            } else {
                let swell = 0.6 + 0.4 * (tau * t / 3.0).sin();
                0.4 * swell * (tau * 110.0 * pitch * t).sin()
                    + 0.1 * (tau * 220.0 * pitch * t).sin()
                    + rng.gen_range(-0.003..0.003)
            };
            x as f32
        })
        .collect()
}

fn write_mono_wav(path: &Path, x: &[f32]) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: RATE_HZ,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).expect("create wav");
    for &s in x {
        w.write_sample(s).expect("write");
    }
    w.finalize().expect("finalize");
}

fn read_mono_wav(path: &Path) -> Vec<f32> {
    hound::WavReader::open(path)
        .expect("hound opens the file")
        .samples::<f32>()
        .map(|s| s.expect("sample"))
        .collect()
}

/// The engine's style windows of a mono file, as the CLI documents its pipeline: mid = the
/// samples, side = 0, streamed with the default framing at the file's rate and the built-in
/// palette; (start_s, end_s, features).
fn engine_windows(x: &[f32], spec: WindowSpec) -> Vec<(f64, f64, Vec<f64>)> {
    clip_windows(&Palette::default_palette(), spec, f64::from(RATE_HZ), x)
        .expect("windows")
        .into_iter()
        .map(|w| (w.start_s, w.end_s, w.features))
        .collect()
}

/// The seed of the trained model (shared by the tests: training is the slow part).
const MODEL_SEED: u64 = 0xC03A_0000;

/// "bright" vs "rest", trained once on 4 + 4 tracks of [`MODEL_SEED`] (logistic regression,
/// 4 grouped folds) on the default windows.
fn model() -> &'static StyleModel {
    static MODEL: OnceLock<StyleModel> = OnceLock::new();
    MODEL.get_or_init(|| train(MODEL_SEED, WindowSpec::default()))
}

fn train(seed: u64, spec: WindowSpec) -> StyleModel {
    let palette = Palette::default_palette();
    let (mut rows, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
    for k in 0..8u64 {
        let bright = k % 2 == 0;
        let x = track(seed + k, bright, 6.0);
        for (_, _, f) in engine_windows(&x, spec) {
            rows.push(f);
            labels.push(usize::from(!bright));
            tracks.push(k as usize);
        }
    }
    let data = LabelledWindows::new(
        schema(spec, &palette).expect("schema"),
        vec!["bright".into(), "rest".into()],
        FeatureMatrix::from_rows(&rows).expect("matrix"),
        labels,
        tracks,
        None,
    )
    .expect("windows");
    let plan = default_folds(&data, 4).expect("folds");
    let params = ModelParams::default_for(ModelKind::Logistic, seed);
    let cv = cross_validate(&data, &params, &plan, &mut |_, _| {}).expect("cv");
    StyleModel::fit(&data, &cv).expect("fit")
}

struct Fixture {
    _dir: tempfile::TempDir,
    dir: PathBuf,
    model_path: PathBuf,
    model: StyleModel,
    bright: PathBuf,
    low: PathBuf,
}

fn fixture(seed: u64) -> Fixture {
    let tmp = tempfile::tempdir().expect("tempdir");
    let dir = tmp.path().to_owned();
    let model = model().clone();
    let model_path = dir.join("bright.weftstyle");
    model.save(&model_path).expect("save");
    // Held-out tracks of each kind (seeds not trained on).
    let bright = dir.join("held-out-bright.wav");
    let low = dir.join("held-out-low.wav");
    write_mono_wav(&bright, &track(seed + 100, true, 12.5));
    write_mono_wav(&low, &track(seed + 101, false, 12.5));
    Fixture {
        _dir: tmp,
        dir,
        model_path,
        model,
        bright,
        low,
    }
}

fn json_of(o: &Output) -> serde_json::Value {
    serde_json::from_str(text(&o.stdout).trim()).expect("one JSON object")
}

#[test]
fn compare_reports_the_engines_closeness_reasons_and_ranges() {
    let seed = MODEL_SEED;
    let f = fixture(seed);
    let category = f.model.class_index("bright").expect("class");
    let mut means = Vec::new();
    for file in [&f.bright, &f.low] {
        let o = weft(&[
            "compare",
            path_str(file),
            "--style",
            path_str(&f.model_path),
            "--json",
            "--step",
            "5",
        ]);
        assert_eq!(
            o.status.code(),
            Some(0),
            "seed {seed:#x}: {}",
            text(&o.stderr)
        );
        let v = json_of(&o);
        assert_eq!(
            v["category"], "bright",
            "the default skips the catch-all 'rest'"
        );
        // The engine directly: style windows of hound's reading, estimated by the model.
        let windows = engine_windows(&read_mono_wav(file), WindowSpec::default());
        let closeness: Vec<f64> = windows
            .iter()
            .map(|(_, _, w)| f.model.estimate(w, category).expect("estimate").closeness()[category])
            .collect();
        let mean = closeness.iter().sum::<f64>() / closeness.len() as f64;
        let above = closeness.iter().filter(|&&c| c > 0.5).count() as f64 / closeness.len() as f64;
        let got = v["closeness"]["mean"].as_f64().expect("mean");
        assert!(
            (got - mean).abs() < 1e-9,
            "seed {seed:#x}: {got} vs engine {mean}"
        );
        assert_eq!(v["closeness"]["windows"], closeness.len());
        assert!((v["closeness"]["above_half"].as_f64().expect("above") - above).abs() < 1e-12);
        // The timeline: 12.5 s in 5-s rows, each the mean of the windows centred in it.
        let timeline = v["timeline"].as_array().expect("timeline");
        assert_eq!(timeline.len(), 3);
        for (i, step) in timeline.iter().enumerate() {
            let lo = 5.0 * i as f64;
            let inside: Vec<f64> = windows
                .iter()
                .zip(&closeness)
                .filter(|((s, e, _), _)| (lo..lo + 5.0).contains(&(0.5 * (s + e))))
                .map(|(_, c)| *c)
                .collect();
            match step["closeness"].as_f64() {
                Some(c) => {
                    assert!((0.0..=1.0).contains(&c));
                    let want = inside.iter().sum::<f64>() / inside.len() as f64;
                    assert!((c - want).abs() < 1e-9, "row {i}: {c} vs {want}");
                }
                None => assert!(inside.is_empty(), "row {i}"),
            }
        }
        // Reasons: present, phrased, ranked by total push, in the right direction.
        let lowering = v["lowering"].as_array().expect("lowering");
        let raising = v["raising"].as_array().expect("raising");
        assert!(!lowering.is_empty() || !raising.is_empty(), "no reasons");
        for r in lowering {
            assert!(r["mean_push_log_odds"].as_f64().expect("push") < 0.0);
            assert!(!r["phrase"].as_str().expect("phrase").is_empty());
        }
        for r in raising {
            assert!(r["mean_push_log_odds"].as_f64().expect("push") > 0.0);
        }
        for list in [lowering, raising] {
            let totals: Vec<f64> = list
                .iter()
                .map(|r| r["total_push_log_odds"].as_f64().expect("total").abs())
                .collect();
            assert!(totals.windows(2).all(|w| w[0] >= w[1]), "{totals:?}");
        }
        // Outside the typical range: recomputed from the model's class mean and scale.
        let class_mean = f.model.class_mean(category).expect("mean");
        let scale = f.model.scaler().scale();
        for o in v["outside"].as_array().expect("outside") {
            let name = o["feature"].as_str().expect("feature");
            let j = f
                .model
                .schema()
                .features
                .iter()
                .position(|n| n == name)
                .expect("a schema feature");
            let file_mean =
                windows.iter().map(|(_, _, w)| w[j]).sum::<f64>() / windows.len() as f64;
            let z = (file_mean - class_mean[j]) / scale[j];
            assert!(z.abs() > 1.0, "{name}: {z}");
            let got = o["distance_sd"].as_f64().expect("z");
            assert!(
                (got - z).abs() < 1e-6 * z.abs().max(1.0),
                "{name}: {got} vs {z}"
            );
        }
        means.push((mean, v["outside"].as_array().expect("outside").len()));
    }
    // The model separates the held-out kinds, and the low track is the one outside the range.
    assert!(
        means[0].0 > 0.5 && means[1].0 < 0.5,
        "seed {seed:#x}: bright {} vs low {}",
        means[0].0,
        means[1].0
    );
    assert!(
        means[1].1 > 0,
        "the low track sits outside the bright category somewhere"
    );

    // The text report says the same in words, and the plot shows the closeness.
    let plot = f.dir.join("compare.svg");
    let o = weft(&[
        "compare",
        path_str(&f.low),
        "--style",
        path_str(&f.model_path),
        "--plot",
        path_str(&plot),
    ]);
    assert_eq!(o.status.code(), Some(0), "{}", text(&o.stderr));
    let report = text(&o.stdout);
    for needle in [
        "against the category \"bright\"",
        "Closeness over time",
        "What takes it away from the category",
        "Outside the category's typical range",
        "than the category",
    ] {
        assert!(report.contains(needle), "{needle:?} missing in\n{report}");
    }
    let svg = std::fs::read_to_string(&plot).expect("svg");
    assert!(svg.contains("closeness to bright (%)") && svg.contains("unexplained"));
}

#[test]
fn analyze_with_a_style_model_gives_each_row_the_nearest_windows_closeness() {
    let seed = MODEL_SEED + 1;
    let f = fixture(seed);
    let category = f.model.class_index("bright").expect("class");
    let input = f.dir.join("set");
    std::fs::create_dir(&input).expect("mkdir");
    std::fs::copy(&f.bright, input.join("a-bright.wav")).expect("copy");
    std::fs::copy(&f.low, input.join("b-low.wav")).expect("copy");
    // Half-second rows: several rows per style window, and rows before the first one's centre.
    let o = weft(&[
        "analyze",
        path_str(&input),
        "--style",
        path_str(&f.model_path),
        "--window",
        "0.5",
        "--json",
        "-q",
    ]);
    assert_eq!(
        o.status.code(),
        Some(0),
        "seed {seed:#x}: {}",
        text(&o.stderr)
    );
    let lines: Vec<serde_json::Value> = text(&o.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).expect("JSON line"))
        .collect();
    assert_eq!(lines.len(), 3, "two files and the batch line");
    for (line, file) in lines.iter().zip(["a-bright.wav", "b-low.wav"]) {
        let windows = engine_windows(&read_mono_wav(&input.join(file)), WindowSpec::default());
        let estimates: Vec<(f64, f64)> = windows
            .iter()
            .map(|(s, e, w)| {
                let c = f.model.estimate(w, category).expect("estimate").closeness()[category];
                (0.5 * (s + e), c)
            })
            .collect();
        let style = &line["style"];
        assert_eq!(style["category"], "bright");
        let listed = style["style_windows"].as_array().expect("style windows");
        assert_eq!(listed.len(), estimates.len(), "{file}");
        for (l, (_, c)) in listed.iter().zip(&estimates) {
            assert!((l["closeness"].as_f64().expect("c") - c).abs() < 1e-9);
        }
        // Each row: the style window whose centre is nearest the row's centre (earlier on a tie).
        for row in line["windows"].as_array().expect("rows") {
            let centre = 0.5
                * (row["start_s"].as_f64().expect("start") + row["end_s"].as_f64().expect("end"));
            let mut best = 0;
            for (i, (c, _)) in estimates.iter().enumerate() {
                if (c - centre).abs() < (estimates[best].0 - centre).abs() {
                    best = i;
                }
            }
            let got = row["closeness"].as_f64().expect("closeness");
            assert!((0.0..=1.0).contains(&got));
            assert!(
                (got - estimates[best].1).abs() < 1e-6,
                "{file} row at {centre}: {got} vs {}",
                estimates[best].1
            );
        }
    }
    // The table shows the closeness columns.
    let o = weft(&[
        "analyze",
        path_str(&input),
        "--style",
        path_str(&f.model_path),
        "-q",
    ]);
    assert_eq!(o.status.code(), Some(0));
    let table = text(&o.stdout);
    assert!(
        table.contains("closeness mean") && table.contains("time > 50 %"),
        "{table}"
    );
}

#[test]
fn unusable_models_are_refused_with_exit_three() {
    let seed = 0xC03A_0003;
    let tmp = tempfile::tempdir().expect("tempdir");
    let dir = tmp.path();
    let wav = dir.join("clip.wav");
    write_mono_wav(&wav, &track(seed, true, 4.0));
    // A model whose schema says 5-s windows: another schema than the 3-s windows Weft
    // estimates on (the file is otherwise valid).
    let json = model().to_json().expect("json");
    let three = weft_engine::windows::schema(WindowSpec::default(), &Palette::default_palette())
        .expect("schema")
        .name;
    let five = weft_engine::windows::schema(
        WindowSpec {
            window_s: 5.0,
            hop_s: 1.0,
        },
        &Palette::default_palette(),
    )
    .expect("schema")
    .name;
    assert_ne!(three, five);
    let other = dir.join("five-seconds.weftstyle");
    std::fs::write(
        &other,
        json.replacen(&format!("\"{three}\""), &format!("\"{five}\""), 1),
    )
    .expect("write");
    assert!(StyleModel::load(&other).is_ok(), "a valid model file");
    let junk = dir.join("junk.weftstyle");
    std::fs::write(&junk, b"{\"format\": \"something else\"}").expect("write");
    let missing = dir.join("missing.weftstyle");
    for (model, reason) in [
        (&other, "trained on features"),
        (&junk, "not a Weft style model file"),
        (&missing, "cannot read style model file"),
    ] {
        for args in [
            vec!["compare", path_str(&wav), "--style", path_str(model)],
            vec!["analyze", path_str(&wav), "--style", path_str(model), "-q"],
        ] {
            let o = weft(&args);
            let stderr = text(&o.stderr);
            assert_eq!(o.status.code(), Some(3), "{args:?}: {stderr}");
            assert!(
                stderr.contains(path_str(model)) && stderr.contains(reason),
                "{args:?}: {stderr:?} lacks the file or {reason:?}"
            );
            assert!(o.stdout.is_empty(), "{args:?}: nothing analysed");
        }
    }
    // A category the model does not know, and options that would change its features.
    let model = dir.join("ok.weftstyle");
    self::model().save(&model).expect("save");
    let o = weft(&[
        "compare",
        path_str(&wav),
        "--style",
        path_str(&model),
        "--category",
        "neon",
    ]);
    assert_eq!(o.status.code(), Some(3));
    assert!(text(&o.stderr).contains("no category \"neon\" (it knows bright, rest)"));
    let o = weft(&[
        "analyze",
        path_str(&wav),
        "--style",
        path_str(&model),
        "--sample-rate",
        "44100",
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", text(&o.stderr));
    // An unreadable audio file is exit 1, named.
    let o = weft(&[
        "compare",
        path_str(&dir.join("nowhere.wav")),
        "--style",
        path_str(&model),
    ]);
    assert_eq!(o.status.code(), Some(1));
    assert!(text(&o.stderr).contains("nowhere.wav"));
}
