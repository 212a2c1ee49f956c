//! Style model costs on a synthetic set shaped like the demo scene: 1000 windows × 80 features
//! from 36 tracks of three styles (invented data: class means, per-track offsets and window
//! noise, seeded).
//!
//! - `style_forest_train`: random forest, 200 trees, all threads and one thread;
//! - `style_estimate`: one window's closeness and three reasons, per model type (goal: ≤ 100 µs);
//! - then, under `cargo bench` only, the same forest training timed against scikit-learn 1.9.1's
//!   `RandomForestClassifier(n_estimators=200)` on the same data (`tests/python/style_bench.py`,
//!   run here with the project's venv), printed as ratios (goal: Weft ≤ scikit-learn).
//!
//! `cargo bench -p weft-engine --bench style`

// criterion's macros generate undocumented items.
#![allow(missing_docs)]

use criterion::{Criterion, black_box, criterion_group};
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use std::path::Path;
use std::process::Command;
use std::time::Instant;
use weft_engine::evaluation::{cross_validate, default_folds};
use weft_engine::style::{
    Estimate, EstimateScratch, FeatureMatrix, FeatureSchema, ForestParams, LabelledWindows,
    ModelKind, ModelParams, RandomForest, StyleModel,
};

/// Seed of the synthetic set and of the forest.
const SEED: u64 = 0x57_11E5;
const WINDOWS: usize = 1000;
const FEATURES: usize = 80;
const TRACKS: usize = 36;
const CLASSES: usize = 3;
const TREES: usize = 200;

/// The synthetic set: class means on 30 of the 80 features, a per-track offset (tracks of one
/// style differ), and window-to-window noise.
fn demo_like() -> LabelledWindows {
    let mut rng = SmallRng::seed_from_u64(SEED);
    let class_means: Vec<Vec<f64>> = (0..CLASSES)
        .map(|_| {
            (0..FEATURES)
                .map(|j| {
                    if j < 30 {
                        rng.gen_range(-1.0..1.0)
                    } else {
                        0.0
                    }
                })
                .collect()
        })
        .collect();
    let track_offsets: Vec<Vec<f64>> = (0..TRACKS)
        .map(|_| (0..FEATURES).map(|_| rng.gen_range(-0.6..0.6)).collect())
        .collect();
    let (mut values, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
    for w in 0..WINDOWS {
        let track = w * TRACKS / WINDOWS;
        let class = track % CLASSES;
        for j in 0..FEATURES {
            let noise: f64 = rng.gen_range(-1.0..1.0) + rng.gen_range(-1.0..1.0);
            values.push(class_means[class][j] + track_offsets[track][j] + noise);
        }
        labels.push(class);
        tracks.push(track);
    }
    let schema = FeatureSchema::new(
        "bench-window",
        1,
        "invented",
        (0..FEATURES).map(|j| format!("feature_{j}")).collect(),
    )
    .expect("schema");
    LabelledWindows::new(
        schema,
        vec!["parlour".into(), "dockside".into(), "neon".into()],
        FeatureMatrix::new(FEATURES, values).expect("matrix"),
        labels,
        tracks,
        None,
    )
    .expect("windows")
}

fn forest_params(threads: usize) -> ForestParams {
    ForestParams {
        n_trees: TREES,
        seed: SEED,
        threads,
        ..ForestParams::default()
    }
}

fn bench(c: &mut Criterion) {
    let data = demo_like();
    let x = data.features();
    let mut group = c.benchmark_group("style_forest_train_1000x80");
    group.sample_size(10);
    for (name, threads) in [("all_threads", 0), ("one_thread", 1)] {
        group.bench_function(name, |b| {
            b.iter(|| {
                RandomForest::fit(
                    black_box(x.values()),
                    FEATURES,
                    data.labels(),
                    CLASSES,
                    &forest_params(threads),
                )
                .expect("fit")
            })
        });
    }
    group.finish();

    let plan = default_folds(&data, 3).expect("folds");
    let mut group = c.benchmark_group("style_estimate_per_window");
    for kind in ModelKind::ALL {
        let params = match ModelParams::default_for(kind, SEED) {
            ModelParams::Forest(p) => ModelParams::Forest(ForestParams {
                n_trees: TREES,
                ..p
            }),
            other => other,
        };
        let cv = cross_validate(&data, &params, &plan, &mut |_, _| {}).expect("cv");
        let model = StyleModel::fit(&data, &cv).expect("fit");
        let mut scratch = EstimateScratch::new(&model);
        let mut out = Estimate::new(&model, 3);
        let mut i = 0;
        group.bench_function(kind.name(), |b| {
            b.iter(|| {
                i = (i + 1) % WINDOWS;
                model
                    .estimate_into(black_box(x.row(i)), 1, &mut scratch, &mut out)
                    .expect("estimate");
                black_box(out.closeness()[1])
            })
        });
    }
    group.finish();
}

/// Median of `runs` timings of `f`, seconds.
fn median_s(runs: usize, mut f: impl FnMut()) -> f64 {
    let mut t: Vec<f64> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            f();
            start.elapsed().as_secs_f64()
        })
        .collect();
    t.sort_by(f64::total_cmp);
    t[runs / 2]
}

/// Times Weft's and scikit-learn's forest training on the same data in this run.
fn compare_with_scikit_learn() {
    let data = demo_like();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("workspace root");
    let python = root.join(".venv/bin/python");
    assert!(
        python.exists(),
        "no Python reference tools at {}: run cargo xtask setup",
        python.display()
    );
    let path = Path::new(env!("CARGO_TARGET_TMPDIR")).join("style_bench_windows.json");
    let rows: Vec<&[f64]> = (0..WINDOWS).map(|i| data.features().row(i)).collect();
    let json = serde_json::json!({ "x": rows, "y": data.labels(), "trees": TREES, "runs": 5 });
    std::fs::write(&path, json.to_string()).expect("write bench data");
    let output = Command::new(&python)
        .arg(root.join("tests/python/style_bench.py"))
        .arg(&path)
        .output()
        .expect("run tests/python/style_bench.py");
    assert!(
        output.status.success(),
        "style_bench.py failed: {}",
        String::from_utf8_lossy(&output.stderr)
    );
    let sk: serde_json::Value = serde_json::from_slice(&output.stdout).expect("bench JSON");
    let sk_fit = |key: &str| sk[key].as_f64().expect("timing");
    let x = data.features();
    let ours = |threads| {
        median_s(5, || {
            black_box(
                RandomForest::fit(
                    x.values(),
                    FEATURES,
                    data.labels(),
                    CLASSES,
                    &forest_params(threads),
                )
                .expect("fit"),
            );
        })
    };
    let (all, one) = (ours(0), ours(1));
    let (sk_one, sk_all) = (sk_fit("fit_s_n_jobs_1"), sk_fit("fit_s_n_jobs_all"));
    println!(
        "\nRF({TREES}) training on {WINDOWS} × {FEATURES} (median of 5, same data, this run):"
    );
    println!("  Weft, all threads:   {all:.3} s");
    println!("  Weft, one thread:    {one:.3} s");
    println!("  scikit-learn 1.9.1, n_jobs=None (its default, 1 thread): {sk_one:.3} s");
    println!("  scikit-learn 1.9.1, n_jobs=-1 (all threads):            {sk_all:.3} s");
    println!(
        "  ratio Weft(all) / scikit-learn(default): {:.2}",
        all / sk_one
    );
    println!(
        "  ratio Weft(all) / scikit-learn(n_jobs=-1): {:.2}",
        all / sk_all
    );
    println!("  ratio Weft(1) / scikit-learn(1): {:.2}", one / sk_one);
    println!(
        "  scikit-learn predict_proba: {:.1} µs per window in a batch of {WINDOWS}, {:.1} µs for one window alone",
        sk_fit("predict_batch_s_per_window") * 1e6,
        sk_fit("predict_single_s") * 1e6
    );
}

criterion_group!(benches, bench);

fn main() {
    benches();
    Criterion::default().configure_from_args().final_summary();
    // `cargo test --benches` runs the benchmarks once as tests; the comparison is for
    // `cargo bench` only.
    if std::env::args().any(|a| a == "--bench") {
        compare_with_scikit_learn();
    }
}
