//! Weft's style models and evaluation against scikit-learn 1.9.1.
//!
//! `tests/python/style_reference.py` (run once per test binary) exports scikit-learn's bundled
//! wine and breast_cancer datasets, the fold indices of 10-fold `StratifiedKFold` (unshuffled),
//! scikit-learn's balanced accuracy on each fold for `RandomForestClassifier(n_estimators=200,
//! random_state=0)`, `make_pipeline(StandardScaler(), LinearSVC())` and
//! `make_pipeline(StandardScaler(), LogisticRegression())` (plus its one-vs-rest form), and
//! exact optima, a root split, grouped folds and a Platt fit for the finer checks below.
//!
//! Tolerances: balanced accuracy within 1.5 percentage points of scikit-learn's (the issue's
//! bound; the forest's random draws differ from scikit-learn's, the linear models solve the
//! same convex problems); fold indices exactly; optima to 1e-6 (SVM) and 1e-9 (logistic)
//! relative to the largest coefficient (both sides solved to ≥ 1e-10 optimality).
//!
//! Needs the Python reference tools: `cargo xtask setup` (the tests fail, never skip, without).

use serde::Deserialize;
use std::collections::HashMap;
use std::path::Path;
use std::process::Command;
use std::sync::OnceLock;
use weft_engine::evaluation::{
    FoldPlan, balanced_accuracy, cross_validate, stratified_group_k_fold, stratified_k_fold,
};
use weft_engine::style::{
    FeatureMatrix, FeatureSchema, ForestParams, LabelledWindows, LogisticParams, MaxFeatures,
    ModelParams, PlattScaling, RandomForest, Standardizer, SvmParams, linear_svm, logistic,
};

/// Seed of the Weft forest (scikit-learn's side uses `random_state=0`) and of the SVM's visiting
/// order; printed in failure messages.
const SEED: u64 = 0;
/// Largest allowed gap between Weft's and scikit-learn's mean balanced accuracy (the issue's
/// bound: 1.5 percentage points).
const PARITY_PP: f64 = 1.5;

#[derive(Deserialize)]
struct Reference {
    sklearn_version: String,
    datasets: Vec<Dataset>,
    group_folds: GroupFolds,
    platt: Platt,
}

#[derive(Deserialize)]
struct Dataset {
    name: String,
    source: String,
    features: Vec<String>,
    x: Vec<Vec<f64>>,
    y: Vec<usize>,
    test_folds: Vec<Vec<usize>>,
    models: HashMap<String, SkModel>,
    scaler_mean: Vec<f64>,
    scaler_scale: Vec<f64>,
    svm_optimum: Vec<LinearRow>,
    logistic_optimum: Vec<LinearRow>,
    tree_root: TreeRoot,
}

#[derive(Deserialize)]
struct SkModel {
    fold_balanced_accuracy: Vec<f64>,
    mean_balanced_accuracy: f64,
    fold_predictions: Vec<Vec<usize>>,
}

#[derive(Deserialize)]
struct LinearRow {
    weights: Vec<f64>,
    intercept: f64,
}

#[derive(Deserialize)]
struct TreeRoot {
    feature: usize,
    threshold: f64,
}

#[derive(Deserialize)]
struct GroupFolds {
    labels: Vec<usize>,
    groups: Vec<usize>,
    folds: usize,
    test_folds: Vec<Vec<usize>>,
}

#[derive(Deserialize)]
struct Platt {
    scores: Vec<f64>,
    labels: Vec<usize>,
    a: f64,
    b: f64,
}

/// The reference figures, computed once per test binary.
fn reference() -> &'static Reference {
    static REFERENCE: OnceLock<Reference> = OnceLock::new();
    REFERENCE.get_or_init(|| {
        let root = Path::new(env!("CARGO_MANIFEST_DIR"))
            .parent()
            .expect("workspace root");
        let python = root.join(".venv/bin/python");
        assert!(
            python.exists(),
            "no Python reference tools at {}: run cargo xtask setup",
            python.display()
        );
        let output = Command::new(&python)
            .arg(root.join("tests/python/style_reference.py"))
            .output()
            .expect("run tests/python/style_reference.py (run cargo xtask setup)");
        assert!(
            output.status.success(),
            "style_reference.py failed (run cargo xtask setup): {}",
            String::from_utf8_lossy(&output.stderr)
        );
        let reference: Reference = serde_json::from_slice(&output.stdout).expect("reference JSON");
        assert_eq!(reference.sklearn_version, "1.9.1", "pinned scikit-learn");
        reference
    })
}

fn dataset(name: &str) -> &'static Dataset {
    reference()
        .datasets
        .iter()
        .find(|d| d.name == name)
        .expect("dataset in the reference")
}

fn n_classes(d: &Dataset) -> usize {
    d.y.iter().max().map_or(0, |m| m + 1)
}

fn matrix(d: &Dataset) -> FeatureMatrix {
    FeatureMatrix::from_rows(&d.x).expect("finite reference data")
}

/// The dataset as labelled windows, each sample its own track.
fn windows(d: &Dataset) -> LabelledWindows {
    let schema =
        FeatureSchema::new(&d.source, 1, "", d.features.clone()).expect("reference feature names");
    LabelledWindows::new(
        schema,
        (0..n_classes(d)).map(|c| format!("class {c}")).collect(),
        matrix(d),
        d.y.clone(),
        (0..d.y.len()).collect(),
        None,
    )
    .expect("reference windows")
}

#[test]
fn stratified_k_fold_matches_scikit_learn_fold_indices() {
    for d in &reference().datasets {
        let folds = stratified_k_fold(&d.y, d.test_folds.len()).expect("folds");
        for (f, (ours, theirs)) in folds.iter().zip(&d.test_folds).enumerate() {
            // Source: scikit-learn 1.9.1 StratifiedKFold(n_splits=10, shuffle=False).
            assert_eq!(&ours.test, theirs, "{} fold {f}", d.source);
        }
    }
}

#[test]
fn stratified_group_k_fold_matches_scikit_learn_fold_indices() {
    let g = &reference().group_folds;
    let folds = stratified_group_k_fold(&g.labels, &g.groups, g.folds, None).expect("folds");
    for (f, (ours, theirs)) in folds.iter().zip(&g.test_folds).enumerate() {
        // Source: scikit-learn 1.9.1 StratifiedGroupKFold(n_splits=5, shuffle=False).
        assert_eq!(&ours.test, theirs, "fold {f}");
    }
}

#[test]
fn balanced_accuracy_matches_scikit_learn_on_its_own_predictions() {
    for d in &reference().datasets {
        for (model, sk) in &d.models {
            for (f, (test, predicted)) in d.test_folds.iter().zip(&sk.fold_predictions).enumerate()
            {
                let truth: Vec<usize> = test.iter().map(|&i| d.y[i]).collect();
                let ours = balanced_accuracy(&truth, predicted, n_classes(d));
                // Source: scikit-learn 1.9.1 balanced_accuracy_score.
                let theirs = sk.fold_balanced_accuracy[f];
                assert!(
                    (ours - theirs).abs() < 1e-12,
                    "{} {model} fold {f}: {ours} vs {theirs}",
                    d.source
                );
            }
        }
    }
}

#[test]
fn standardisation_matches_standard_scaler() {
    for d in &reference().datasets {
        let s = Standardizer::fit(&matrix(d));
        for j in 0..d.features.len() {
            // Source: scikit-learn 1.9.1 StandardScaler mean_ and scale_.
            let (m, sk_m) = (s.mean()[j], d.scaler_mean[j]);
            let (sd, sk_sd) = (s.scale()[j], d.scaler_scale[j]);
            assert!(
                (m - sk_m).abs() <= 1e-12 * sk_m.abs().max(1.0),
                "{} mean {j}: {m} vs {sk_m}",
                d.source
            );
            assert!(
                (sd - sk_sd).abs() <= 1e-12 * sk_sd,
                "{} scale {j}: {sd} vs {sk_sd}",
                d.source
            );
        }
    }
}

/// Largest gap between our rows and the reference's, relative to the reference's largest entry.
fn relative_gap(ours_w: &[Vec<f64>], ours_b: &[f64], theirs: &[LinearRow]) -> f64 {
    assert_eq!(ours_w.len(), theirs.len(), "binary problems");
    let scale = theirs
        .iter()
        .flat_map(|r| r.weights.iter().chain([&r.intercept]))
        .fold(0.0_f64, |m, v| m.max(v.abs()));
    let mut gap = 0.0_f64;
    for ((w, b), r) in ours_w.iter().zip(ours_b).zip(theirs) {
        for (a, c) in w
            .iter()
            .chain([b])
            .zip(r.weights.iter().chain([&r.intercept]))
        {
            gap = gap.max((a - c).abs());
        }
    }
    gap / scale
}

#[test]
fn linear_svm_reaches_liblinears_optimum() {
    for d in &reference().datasets {
        let x = matrix(d);
        let z = Standardizer::fit(&x).transform(&x);
        let params = SvmParams {
            tolerance: 1e-10,
            max_iterations: 1_000_000,
            seed: SEED,
            ..SvmParams::default()
        };
        let model = linear_svm::fit(&z, &d.y, n_classes(d), &params).expect("fit");
        // Source: scikit-learn 1.9.1 LinearSVC(tol=1e-12, dual=False) coef_ and intercept_, one
        // binary problem per class (class 1 vs 0 for two classes).
        let gap = relative_gap(model.weights(), model.intercepts(), &d.svm_optimum);
        println!(
            "optimum | {:<14} | linear SVM | relative gap {gap:.1e}",
            d.name
        );
        // Both sides solved to ≥ 1e-10 optimality (dual coordinate descent here, liblinear's
        // primal Newton there): 1e-6 leaves room for their different stopping points.
        assert!(gap < 1e-6, "{} seed {SEED}: relative gap {gap}", d.source);
    }
}

#[test]
fn logistic_regression_reaches_scikit_learns_optimum() {
    for d in &reference().datasets {
        let x = matrix(d);
        let z = Standardizer::fit(&x).transform(&x);
        let params = LogisticParams {
            tolerance: 1e-12,
            ..LogisticParams::default()
        };
        let model = logistic::fit(&z, &d.y, n_classes(d), &params).expect("fit");
        // Source: scikit-learn 1.9.1 LogisticRegression(solver="newton-cholesky", tol=1e-12)
        // coef_ and intercept_ per binary problem (one-vs-rest).
        let gap = relative_gap(model.weights(), model.intercepts(), &d.logistic_optimum);
        println!(
            "optimum | {:<14} | logistic   | relative gap {gap:.1e}",
            d.name
        );
        // The same Newton method on both sides to 1e-12: agreement to rounding.
        assert!(gap < 1e-9, "{}: relative gap {gap}", d.source);
    }
}

#[test]
fn platt_scaling_matches_scikit_learns_sigmoid_calibration() {
    let p = &reference().platt;
    let positive: Vec<bool> = p.labels.iter().map(|&l| l == 1).collect();
    let ours = PlattScaling::fit(&p.scores, &positive).expect("fit");
    println!(
        "platt | slope {:.6} vs {:.6} | offset {:.6} vs {:.6}",
        ours.slope, -p.a, ours.offset, -p.b
    );
    // Source: scikit-learn 1.9.1 calibration._sigmoid_calibration (a, b) with
    // P = 1/(1 + exp(a·s + b)); ours is σ(slope·s + offset), so slope = −a, offset = −b.
    // Both minimise the same smoothed log-loss; scikit-learn stops its L-BFGS at its default
    // tolerances, hence 1e-4.
    assert!(
        (ours.slope + p.a).abs() < 1e-4,
        "slope {} vs −a = {}",
        ours.slope,
        -p.a
    );
    assert!(
        (ours.offset + p.b).abs() < 1e-4,
        "offset {} vs −b = {}",
        ours.offset,
        -p.b
    );
}

#[test]
fn forest_tree_root_split_matches_a_decision_tree() {
    for d in &reference().datasets {
        // One tree on all windows and all features is a plain decision tree.
        let params = ForestParams {
            n_trees: 1,
            bootstrap: false,
            max_features: MaxFeatures::All,
            seed: SEED,
            threads: 1,
            ..ForestParams::default()
        };
        let x = matrix(d);
        let forest = RandomForest::fit(x.values(), x.n_features(), &d.y, n_classes(d), &params)
            .expect("fit");
        let (feature, threshold) = forest.root_split(0).expect("a split");
        // Source: scikit-learn 1.9.1 DecisionTreeClassifier(random_state=0).tree_ feature[0] and
        // threshold[0] (a midpoint of float32 values, computed in float64; ours in float32).
        let sk = &d.tree_root;
        assert_eq!(feature, sk.feature, "{}", d.source);
        let gap = (f64::from(threshold) - sk.threshold).abs();
        assert!(
            gap <= f64::from(f32::EPSILON) * sk.threshold.abs(),
            "{}: {threshold} vs {}",
            d.source,
            sk.threshold
        );
    }
}

/// Weft's mean per-fold balanced accuracy on the reference folds.
fn weft_balanced_accuracy(d: &Dataset, params: &ModelParams) -> f64 {
    let data = windows(d);
    let plan = FoldPlan::from_test_sets(d.y.len(), &d.test_folds).expect("reference folds");
    let cv = cross_validate(&data, params, &plan, &mut |_, _| {}).expect("cross-validation");
    1.0 - cv.figures.window_balanced_error.mean
}

/// Checks and prints one parity row.
fn parity(d: &Dataset, sk_name: &str, weft: f64, what: &str) {
    let sk = d.models[sk_name].mean_balanced_accuracy;
    let gap_pp = (weft - sk) * 100.0;
    println!(
        "parity | {:<14} | {:<12} | Weft {:.4} | scikit-learn {:.4} ({sk_name}) | {gap_pp:+.2} pp",
        d.name, what, weft, sk
    );
    assert!(
        gap_pp.abs() <= PARITY_PP,
        "{} {what}: Weft {weft:.4} vs scikit-learn {sk:.4} ({sk_name}), seed {SEED}",
        d.source
    );
}

#[test]
fn random_forest_balanced_accuracy_matches_scikit_learn() {
    for name in ["wine", "breast_cancer"] {
        let d = dataset(name);
        let params = ModelParams::Forest(ForestParams {
            seed: SEED,
            ..ForestParams::default()
        });
        // Source: scikit-learn 1.9.1 RandomForestClassifier(n_estimators=200, random_state=0),
        // same 10 StratifiedKFold folds.
        parity(
            d,
            "forest",
            weft_balanced_accuracy(d, &params),
            "forest(200)",
        );
    }
}

#[test]
fn linear_svm_balanced_accuracy_matches_scikit_learn() {
    for name in ["wine", "breast_cancer"] {
        let d = dataset(name);
        let params = ModelParams::LinearSvm(SvmParams {
            seed: SEED,
            ..SvmParams::default()
        });
        // Source: scikit-learn 1.9.1 make_pipeline(StandardScaler(), LinearSVC()).
        parity(
            d,
            "linear_svm",
            weft_balanced_accuracy(d, &params),
            "linear SVM",
        );
    }
}

#[test]
fn logistic_regression_balanced_accuracy_matches_scikit_learn() {
    for name in ["wine", "breast_cancer"] {
        let d = dataset(name);
        let params = ModelParams::Logistic(LogisticParams::default());
        let weft = weft_balanced_accuracy(d, &params);
        // Source: scikit-learn 1.9.1 make_pipeline(StandardScaler(), LogisticRegression())
        // (multinomial for wine's 3 classes, where Weft is one-vs-rest) …
        parity(d, "logistic", weft, "logistic");
        // … and make_pipeline(StandardScaler(), OneVsRestClassifier(LogisticRegression())),
        // the same formulation as Weft's.
        parity(d, "logistic_ovr", weft, "logistic");
    }
}
