//! End-to-end tests of `weft style train | check` and `weft demo`: the built binary, run on
//! folders generated here.
//!
//! The categories are seeded synthetic signals that differ audibly (high partials with noise
//! bursts against low partials under a slow tremolo), so a working pipeline must tell them
//! apart; the expected figures are properties (the kept model is the one with the lowest
//! cross-validated error, counts add up, the model file reads back with the engine), never
//! numbers copied from an earlier run. References: hound 3.5 writes the WAV files and reads
//! the demo's; `weft_engine::style::StyleModel::load` reads the model files.

mod common;
use common::{text, weft};
use rand::{Rng, SeedableRng, rngs::SmallRng};
use serde_json::Value;
use std::path::{Path, PathBuf};
use std::process::Output;
use weft_engine::palette::Palette;
use weft_engine::style::StyleModel;

const RATE_HZ: u32 = 22_050;
const TRACK_S: f64 = 5.0;

fn s(p: &Path) -> &str {
    p.to_str().expect("temporary paths are UTF-8")
}

/// The last line of standard output as JSON.
fn last_json(out: &Output) -> Value {
    let stdout = text(&out.stdout);
    let line = stdout.lines().last().unwrap_or_default();
    serde_json::from_str(line).unwrap_or_else(|e| {
        panic!(
            "stdout does not end with a JSON object ({e}):\n{stdout}\nstderr:\n{}",
            text(&out.stderr)
        )
    })
}

/// A seeded track of category `bright` (partials at 2–6 kHz and noise bursts) or `dark`
/// (partials at 60–250 Hz under a slow tremolo).
fn track(category: &str, seed: u64) -> Vec<f32> {
    let mut rng = SmallRng::seed_from_u64(seed);
    let tau = std::f64::consts::TAU;
    let bright = category == "bright";
    let (lo, hi) = if bright {
        (2000.0, 6000.0)
    } else {
        (60.0, 250.0)
    };
    let partials: Vec<(f64, f64)> = (0..3)
        .map(|_| (rng.gen_range(lo..hi), rng.gen_range(0.1..0.3)))
        .collect();
    let burst_hz = rng.gen_range(3.0..6.0);
    let tremolo_hz = rng.gen_range(0.5..2.0);
    let n = (TRACK_S * f64::from(RATE_HZ)) as usize;
    (0..n)
        .map(|i| {
            let t = i as f64 / f64::from(RATE_HZ);
            let tone: f64 = partials.iter().map(|(f, a)| a * (tau * f * t).sin()).sum();
            let x = if bright {
                let burst = ((t * burst_hz).fract() < 0.2) as u8 as f64;
                tone + burst * rng.gen_range(-0.3..0.3)
            } else {
                tone * (0.6 + 0.4 * (tau * tremolo_hz * t).sin()) + rng.gen_range(-0.01..0.01)
            };
            (0.8 * x).clamp(-1.0, 1.0) as f32
        })
        .collect()
}

fn write_wav(path: &Path, samples: &[f32]) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: RATE_HZ,
        bits_per_sample: 16,
        sample_format: hound::SampleFormat::Int,
    };
    let mut w = hound::WavWriter::create(path, spec).expect("create wav");
    for &x in samples {
        w.write_sample((x * 32767.0).round() as i16).expect("write");
    }
    w.finalize().expect("finish wav");
}

/// `root/<category>/<category>-<i>.wav` for `per_category` tracks each, seeds from `seed`.
fn make_folders(root: &Path, per_category: usize, seed: u64) -> Vec<PathBuf> {
    let mut files = Vec::new();
    for (c, category) in ["bright", "dark"].iter().enumerate() {
        let dir = root.join(category);
        std::fs::create_dir_all(&dir).expect("mkdir");
        for i in 0..per_category {
            let path = dir.join(format!("{category}-{i}.wav"));
            write_wav(&path, &track(category, seed + 100 * c as u64 + i as u64));
            files.push(path);
        }
    }
    files
}

fn number(v: &Value, key: &str) -> f64 {
    v[key]
        .as_f64()
        .unwrap_or_else(|| panic!("{key} is not a number in {v}"))
}

#[test]
fn train_cross_validates_every_model_writes_the_file_and_check_reads_it() {
    let seed = 11;
    let dir = tempfile::tempdir().expect("tempdir");
    let train_dir = dir.path().join("train");
    make_folders(&train_dir, 4, seed);
    let model = dir.path().join("bright.weftstyle");
    let csv = dir.path().join("features.csv");
    let out = weft(&[
        "style",
        "train",
        s(&train_dir),
        "--target",
        "bright",
        "--folds",
        "4",
        "--seed",
        "3",
        "--json",
        "--out",
        s(&model),
        "--export-features",
        s(&csv),
    ]);
    assert!(
        out.status.success(),
        "seed {seed}: {}\n{}",
        text(&out.stderr),
        text(&out.stdout)
    );
    let json = last_json(&out);
    let models = json["models"].as_array().expect("models");
    let names: Vec<&str> = models.iter().filter_map(|m| m["model"].as_str()).collect();
    assert_eq!(names, ["forest", "svm", "logistic"], "auto tries all three");
    for m in models {
        let (mean, sd) = (
            number(m, "cv_balanced_error_mean"),
            number(m, "cv_balanced_error_sd"),
        );
        assert!((0.0..=1.0).contains(&mean) && sd >= 0.0, "{m}");
        // Confusion counts cover every window once.
        let total: u64 = m["window_confusion"]
            .as_array()
            .expect("confusion")
            .iter()
            .flat_map(|r| r.as_array().expect("row").iter())
            .map(|v| v.as_u64().expect("count"))
            .sum();
        assert_eq!(total, json["windows"].as_u64().expect("windows"));
    }
    // auto keeps the lowest mean window balanced error, and reports its figures.
    let best = models
        .iter()
        .min_by(|a, b| {
            number(a, "cv_balanced_error_mean").total_cmp(&number(b, "cv_balanced_error_mean"))
        })
        .expect("a model");
    assert_eq!(json["model"], best["model"]);
    assert_eq!(
        number(&json, "cv_balanced_error_mean"),
        number(best, "cv_balanced_error_mean")
    );
    // The categories differ audibly: a working pipeline separates them.
    assert!(
        number(&json, "cv_balanced_error_mean") <= 0.25,
        "seed {seed}: {json}"
    );
    assert_eq!(json["category"], "bright");
    assert_eq!(json["classes"], serde_json::json!(["bright", "not bright"]));
    assert_eq!(json["tracks"], 8);
    assert_eq!(json["tracks_per_class"], serde_json::json!([4, 4]));
    let windows = json["windows"].as_u64().expect("windows");
    // 5-s tracks, 3-s windows every second: 3 windows each (give or take a frame).
    assert!((8 * 2..=8 * 4).contains(&windows), "{windows} windows");

    // The file reads back with the engine and describes this training.
    let saved = StyleModel::load(&model).expect("the model file loads");
    assert_eq!(saved.classes(), ["bright", "not bright"]);
    assert_eq!(saved.summary().tracks, 8);
    assert_eq!(saved.summary().windows as u64, windows);
    assert_eq!(Some(saved.kind().name()), json["model"].as_str());

    // The exported features: a header and one row per window, as many columns as the schema.
    let exported = std::fs::read_to_string(&csv).expect("features written");
    let mut lines = exported.lines();
    let header = lines.next().expect("header");
    assert!(header.starts_with("track,path,label,group,"));
    assert_eq!(header.split(',').count(), 4 + saved.n_features());
    assert_eq!(lines.count() as u64, windows);

    // Check on held-out tracks (other seeds), named by --category.
    let held = dir.path().join("held");
    make_folders(&held, 2, seed + 5000);
    let out = weft(&[
        "style",
        "check",
        s(&model),
        "--category",
        &format!("bright={}", s(&held.join("bright"))),
        "--category",
        &format!("dark={}", s(&held.join("dark"))),
        "--json",
    ]);
    assert!(out.status.success(), "seed {seed}: {}", text(&out.stderr));
    let check = last_json(&out);
    let tracks = check["tracks"].as_array().expect("tracks");
    assert_eq!(tracks.len(), 4);
    for t in tracks {
        let expected = if t["category"] == "bright" {
            "bright"
        } else {
            "not bright"
        };
        assert_eq!(t["truth"], expected, "{t}");
    }
    let report = &check["report"];
    assert_eq!(report["tracks"], 4);
    assert!(
        number(report, "track_balanced_error") <= 0.25,
        "seed {seed}: {report}"
    );

    // The text table names every track and the balanced error.
    let out = weft(&["style", "check", s(&model), s(&held)]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    let table = text(&out.stdout);
    assert!(table.contains("Balanced error"), "{table}");
    assert!(table.contains("bright-1.wav") && table.contains("dark-0.wav"));
}

#[test]
fn a_model_of_another_palette_is_refused_with_the_reason() {
    let seed = 23;
    let dir = tempfile::tempdir().expect("tempdir");
    let train_dir = dir.path().join("train");
    make_folders(&train_dir, 2, seed);
    // The built-in palette under another name: the same atoms, another identity.
    let p = Palette::default_palette();
    let other = Palette::new(
        "Lantern Hall house palette".to_owned(),
        p.families().to_vec(),
        p.sections().to_vec(),
        *p.analysis(),
        p.atom_counts().to_vec(),
        p.atoms().to_vec(),
        p.presence().cloned(),
        p.provenance().clone(),
    )
    .expect("a valid palette");
    let palette_file = dir.path().join("house.palette");
    std::fs::write(&palette_file, other.to_bytes()).expect("write palette");
    let model = dir.path().join("m.weftstyle");
    let out = weft(&[
        "style",
        "train",
        s(&train_dir),
        "--palette",
        s(&palette_file),
        "--model",
        "logistic",
        "--folds",
        "2",
        "--out",
        s(&model),
    ]);
    assert!(out.status.success(), "seed {seed}: {}", text(&out.stderr));
    assert!(text(&out.stdout).contains("logistic"));

    // Checked with the built-in palette: refused before any analysis, with both palettes named
    // and exit status 3 (a style model that cannot be used, as for `weft analyze --style`).
    let out = weft(&["style", "check", s(&model), s(&train_dir)]);
    assert_eq!(out.status.code(), Some(3), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(err.contains("retrain the style model"), "{err}");
    assert!(err.contains("Lantern Hall house palette"), "{err}");
    assert!(err.contains(Palette::default_palette().name()), "{err}");
    assert!(text(&out.stdout).is_empty());

    // With the palette it was trained with, it is accepted.
    let out = weft(&[
        "style",
        "check",
        s(&model),
        s(&train_dir),
        "--palette",
        s(&palette_file),
        "--json",
    ]);
    assert!(out.status.success(), "{}", text(&out.stderr));
    assert_eq!(last_json(&out)["report"]["tracks"], 4);
}

#[test]
fn bad_files_are_left_out_with_one_line_each_and_thin_categories_are_refused() {
    let seed = 37;
    let dir = tempfile::tempdir().expect("tempdir");
    let root = dir.path().join("set");
    let files = make_folders(&root, 3, seed);
    let broken = root.join("bright").join("broken.wav");
    std::fs::write(&broken, b"RIFF\x10\x00\x00\x00WAVEnot really audio").expect("write");

    // A manifest with groups, relative paths, a header and a quoted path.
    let manifest = root.join("manifest.csv");
    let mut rows = String::from("path,label,group\n");
    for (i, f) in files.iter().enumerate() {
        let rel = f.strip_prefix(&root).expect("inside");
        let label = if i < 3 { "bright" } else { "dark" };
        rows.push_str(&format!("\"{}\",{label},band-{}\n", s(rel), i % 3));
    }
    rows.push_str("bright/broken.wav,bright,band-0\n");
    std::fs::write(&manifest, rows).expect("manifest");
    let model = dir.path().join("m.weftstyle");
    let out = weft(&[
        "style",
        "train",
        "--manifest",
        s(&manifest),
        "--model",
        "forest",
        "--folds",
        "3",
        "--json",
        "--out",
        s(&model),
    ]);
    assert!(out.status.success(), "seed {seed}: {}", text(&out.stderr));
    let err = text(&out.stderr);
    let lines: Vec<&str> = err.lines().filter(|l| l.contains("broken.wav")).collect();
    assert_eq!(lines.len(), 1, "one line for the broken file:\n{err}");
    assert!(lines[0].contains("left out"), "{err}");
    let json = last_json(&out);
    assert_eq!(json["skipped"].as_array().map(Vec::len), Some(1));
    assert_eq!(json["tracks"], 6);
    assert_eq!(json["grouping"], "groups", "the manifest's groups are used");
    assert_eq!(json["classes"], serde_json::json!(["bright", "dark"]));
    assert!(model.is_file());

    // One good track left in a category: an error, exit status 1.
    let thin = dir.path().join("thin");
    std::fs::create_dir_all(thin.join("bright")).expect("mkdir");
    std::fs::create_dir_all(thin.join("dark")).expect("mkdir");
    std::fs::copy(&files[0], thin.join("bright").join("a.wav")).expect("copy");
    std::fs::copy(&broken, thin.join("bright").join("b.wav")).expect("copy");
    std::fs::copy(&files[3], thin.join("dark").join("c.wav")).expect("copy");
    std::fs::copy(&files[4], thin.join("dark").join("d.wav")).expect("copy");
    let out = weft(&[
        "style",
        "train",
        s(&thin),
        "--folds",
        "2",
        "--out",
        s(&dir.path().join("x.weftstyle")),
    ]);
    assert_eq!(out.status.code(), Some(1), "{}", text(&out.stderr));
    let err = text(&out.stderr);
    assert!(err.contains("\"bright\" has 1 track(s)"), "{err}");
    assert!(!dir.path().join("x.weftstyle").exists());

    // Usage errors: exit status 2.
    let out = weft(&["style", "train", s(&root), "--folds", "1", "--out", "y"]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
    let out = weft(&["style", "train", s(&root), "--target", "nope", "--out", "y"]);
    assert_eq!(out.status.code(), Some(2), "{}", text(&out.stderr));
}

#[test]
fn a_small_demo_ends_with_sane_json() {
    let dir = tempfile::tempdir().expect("tempdir");
    let demo = dir.path().join("lantern");
    let seed = "5";
    let out = weft(&[
        "demo",
        "--pieces",
        "3",
        "--json",
        "--dir",
        s(&demo),
        "--seed",
        seed,
        "--piece-s",
        "8",
    ]);
    assert!(
        out.status.success(),
        "seed {seed}: {} (a missing SoundFont: run `cargo xtask setup`)",
        text(&out.stderr)
    );
    let json = last_json(&out);
    assert_eq!(json["category"], "dockside");
    assert_eq!(json["tracks"], 9);
    let model_name = json["model"].as_str().expect("model");
    assert!(["forest", "svm", "logistic"].contains(&model_name));
    let (mean, sd) = (
        number(&json, "cv_balanced_error_mean"),
        number(&json, "cv_balanced_error_sd"),
    );
    assert!((0.0..=1.0).contains(&mean) && sd >= 0.0, "{json}");
    let best = json["train"]["models"]
        .as_array()
        .expect("models")
        .iter()
        .map(|m| number(m, "cv_balanced_error_mean"))
        .fold(f64::INFINITY, f64::min);
    assert_eq!(mean, best, "auto keeps the lowest error");

    let report = PathBuf::from(json["report"].as_str().expect("report"));
    let md = std::fs::read_to_string(&report).expect("the report exists");
    assert!(
        md.contains("invented"),
        "the report says the data is invented"
    );
    assert!(md.contains("closeness.png"));
    let png = std::fs::read(demo.join("closeness.png")).expect("the plot exists");
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n");
    let model = StyleModel::load(&demo.join("dockside.weftstyle")).expect("model loads");
    assert_eq!(model.classes(), ["dockside", "not dockside"]);
    assert_eq!(model.summary().tracks, 9);

    // Three WAV files per style, readable by hound, 8–12 s long.
    for style in ["parlour", "dockside", "neon"] {
        let wavs: Vec<PathBuf> = std::fs::read_dir(demo.join("pieces").join(style))
            .expect("style folder")
            .filter_map(|e| e.ok().map(|e| e.path()))
            .collect();
        assert_eq!(wavs.len(), 3, "{style}");
        for w in wavs {
            let r = hound::WavReader::open(&w).expect("hound reads it");
            let seconds = f64::from(r.duration()) / f64::from(r.spec().sample_rate);
            assert!(
                (7.9..=12.1).contains(&seconds),
                "{}: {seconds} s",
                w.display()
            );
        }
    }

    // The set (music the model was not trained on): the dockside piece is closer to dockside
    // than the parlour piece …
    let set = json["set"].as_array().expect("set");
    let closeness = |title: &str| {
        set.iter()
            .find(|p| p["title"] == title)
            .map(|p| number(p, "mean_closeness"))
            .unwrap_or_else(|| panic!("no {title} in {json}"))
    };
    assert!(
        closeness("dockside") > closeness("parlour"),
        "seed {seed}: {json}"
    );
    // … and the drifting piece moves away from dockside once neon takes over.
    assert!(
        closeness("drifting: dockside half") > closeness("drifting: neon half"),
        "seed {seed}: {json}"
    );
}
