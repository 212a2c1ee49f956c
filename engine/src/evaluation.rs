//! How reliable a style definition is: cross-validation folds, balanced accuracy, confusion
//! counts, mean ± sd over folds, and calibration tables.
//!
//! - [`stratified_k_fold`]: scikit-learn 1.9.1's `StratifiedKFold(shuffle=False)` fold
//!   assignment, index for index (checked against it in `tests/tests/style_sklearn.rs`).
//! - [`stratified_group_k_fold`]: scikit-learn 1.9.1's `StratifiedGroupKFold` greedy
//!   assignment (a group never spans training and test; folds keep the class proportions as
//!   well as whole groups allow), also checked index for index.
//! - [`default_folds`]: what training uses — grouped by the user's groups (artist, album) when
//!   given, else by track, so windows of one track never sit on both sides.
//! - [`cross_validate`]: trains on each fold's training windows, scores its test windows, and
//!   reports window-level and track-level balanced error per fold (mean ± sd), pooled confusion
//!   counts, and a reliability table of the calibrated closeness, *cross-fitted*: the Platt
//!   sigmoid applied to fold `f`'s scores is fitted on the other folds' scores only, so the
//!   table does not flatter the calibration.
//! - [`check_model`]: a saved model on other labelled windows (`weft style check`).

use crate::style::{
    Calibration, Classifier, EstimateError, LabelledWindows, ModelFileError, ModelKind,
    ModelParams, Standardizer, StyleError, StyleModel,
};
use rand::SeedableRng;
use rand::rngs::SmallRng;
use rand::seq::SliceRandom;
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use thiserror::Error;

/// Default number of folds (the default; common practice for small sets).
pub const DEFAULT_FOLDS: usize = 10;

/// Bins of the calibration tables (equal width on 0–1, as scikit-learn's
/// `calibration_curve(strategy="uniform", n_bins=10)`).
pub const CALIBRATION_BINS: usize = 10;

/// Why an evaluation cannot run.
#[derive(Debug, Error)]
pub enum EvaluationError {
    /// Fewer than two folds.
    #[error("{folds} folds: cross-validation needs at least 2")]
    TooFewFolds {
        /// Folds asked for.
        folds: usize,
    },
    /// More folds than windows or groups.
    #[error("cannot make {folds} folds from {units} {what}")]
    TooFewUnits {
        /// Folds asked for.
        folds: usize,
        /// Units available.
        units: usize,
        /// "windows", "groups" or "tracks".
        what: &'static str,
    },
    /// Every class is smaller than the number of folds (scikit-learn raises the same).
    #[error("{folds} folds but the largest class has only {largest} {what}")]
    ClassesTooSmall {
        /// Folds asked for.
        folds: usize,
        /// Size of the largest class.
        largest: usize,
        /// "windows" or "groups".
        what: &'static str,
    },
    /// Folds handed in do not partition the windows, or let a track span training and test.
    #[error("fold {fold}: {reason}")]
    BadFold {
        /// Fold index.
        fold: usize,
        /// What is wrong.
        reason: String,
    },
    /// Labels and groups differ in length.
    #[error("{what}: expected {expected} values, got {actual}")]
    LengthMismatch {
        /// Which input.
        what: &'static str,
        /// Required length.
        expected: usize,
        /// Given length.
        actual: usize,
    },
    /// A class of the checked data is not one of the model's.
    #[error("class {class:?} is not a class of the style model (it knows {known:?})")]
    UnknownClass {
        /// The data's class name.
        class: String,
        /// The model's classes.
        known: Vec<String>,
    },
    /// Training a fold failed.
    #[error("training a fold failed")]
    Training(#[from] StyleError),
    /// The checked data does not fit the model.
    #[error("the style model does not accept these windows")]
    Model(#[from] ModelFileError),
    /// A window could not be estimated.
    #[error("a window could not be estimated")]
    Estimate(#[from] EstimateError),
}

/// One cross-validation split: window indices, both ascending.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Fold {
    /// Windows trained on.
    pub train: Vec<usize>,
    /// Windows tested on.
    pub test: Vec<usize>,
}

/// What the folds keep together.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Grouping {
    /// The user's groups (artist, album): a group never spans training and test.
    Groups,
    /// Tracks: a track's windows never span training and test.
    Tracks,
    /// Folds given by the caller (e.g. a reference's fold indices).
    Given,
}

/// Folds and what they keep together.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FoldPlan {
    /// The splits.
    pub folds: Vec<Fold>,
    /// What they keep together.
    pub grouping: Grouping,
}

impl FoldPlan {
    /// Folds from test sets that partition `0..n` (each window tested exactly once); the
    /// training set of a fold is every other window.
    ///
    /// # Errors
    /// [`EvaluationError::BadFold`] when the test sets do not partition the windows.
    pub fn from_test_sets(n: usize, test_sets: &[Vec<usize>]) -> Result<Self, EvaluationError> {
        let mut fold_of = vec![usize::MAX; n];
        for (f, test) in test_sets.iter().enumerate() {
            for &i in test {
                if i >= n || fold_of[i] != usize::MAX {
                    return Err(EvaluationError::BadFold {
                        fold: f,
                        reason: format!("window {i} is out of range or tested twice"),
                    });
                }
                fold_of[i] = f;
            }
        }
        if let Some(i) = fold_of.iter().position(|&f| f == usize::MAX) {
            return Err(EvaluationError::BadFold {
                fold: 0,
                reason: format!("window {i} is never tested"),
            });
        }
        if test_sets.len() < 2 {
            return Err(EvaluationError::TooFewFolds {
                folds: test_sets.len(),
            });
        }
        Ok(Self {
            folds: folds_from_assignment(&fold_of, test_sets.len()),
            grouping: Grouping::Given,
        })
    }
}

/// Folds from a fold index per window.
fn folds_from_assignment(fold_of: &[usize], folds: usize) -> Vec<Fold> {
    (0..folds)
        .map(|f| {
            let (test, train) = (0..fold_of.len()).partition(|&i| fold_of[i] == f);
            Fold { train, test }
        })
        .collect()
}

/// scikit-learn 1.9.1's `StratifiedKFold(n_splits=folds, shuffle=False)`: classes are numbered
/// by first appearance, each fold's share of every class comes from a round robin over the
/// sorted labels, and each class's windows are assigned to folds in blocks, in window order.
///
/// # Errors
/// [`EvaluationError`] for fewer than 2 folds, more folds than windows, or when every class is
/// smaller than the number of folds.
pub fn stratified_k_fold(labels: &[usize], folds: usize) -> Result<Vec<Fold>, EvaluationError> {
    if folds < 2 {
        return Err(EvaluationError::TooFewFolds { folds });
    }
    if folds > labels.len() {
        return Err(EvaluationError::TooFewUnits {
            folds,
            units: labels.len(),
            what: "windows",
        });
    }
    // Encode classes by order of first appearance.
    let mut code: BTreeMap<usize, usize> = BTreeMap::new();
    let encoded: Vec<usize> = labels
        .iter()
        .map(|l| {
            let next = code.len();
            *code.entry(*l).or_insert(next)
        })
        .collect();
    let n_classes = code.len();
    let mut counts = vec![0_usize; n_classes];
    for &e in &encoded {
        counts[e] += 1;
    }
    let largest = counts.iter().copied().max().unwrap_or(0);
    if largest < folds {
        return Err(EvaluationError::ClassesTooSmall {
            folds,
            largest,
            what: "windows",
        });
    }
    let mut sorted = encoded.clone();
    sorted.sort_unstable();
    // allocation[f][c]: windows of class c in fold f (round robin over the sorted labels).
    let mut allocation = vec![vec![0_usize; n_classes]; folds];
    for (i, &c) in sorted.iter().enumerate() {
        allocation[i % folds][c] += 1;
    }
    let mut fold_of = vec![0_usize; labels.len()];
    for c in 0..n_classes {
        let blocks = allocation
            .iter()
            .enumerate()
            .flat_map(|(f, counts)| std::iter::repeat_n(f, counts[c]));
        let windows = (0..labels.len()).filter(|&i| encoded[i] == c);
        for (i, f) in windows.zip(blocks) {
            fold_of[i] = f;
        }
    }
    Ok(folds_from_assignment(&fold_of, folds))
}

/// scikit-learn 1.9.1's `StratifiedGroupKFold`: groups (sorted by id, shuffled first when
/// `shuffle_seed` is given) are taken in order of decreasing standard deviation of their class
/// counts, and each goes to the fold that keeps the class proportions most even across folds
/// (mean over classes of the standard deviation over folds of the fold's share of the class;
/// ties within `numpy.isclose` go to the fold with fewer windows, then the first).
///
/// The shuffle uses this crate's generator, so shuffled folds differ from scikit-learn's; the
/// unshuffled ones (the default) match it index for index.
///
/// # Errors
/// [`EvaluationError`] for fewer than 2 folds, more folds than groups, every class smaller than
/// the number of folds, or lengths that differ.
pub fn stratified_group_k_fold(
    labels: &[usize],
    groups: &[usize],
    folds: usize,
    shuffle_seed: Option<u64>,
) -> Result<Vec<Fold>, EvaluationError> {
    if folds < 2 {
        return Err(EvaluationError::TooFewFolds { folds });
    }
    if groups.len() != labels.len() {
        return Err(EvaluationError::LengthMismatch {
            what: "groups",
            expected: labels.len(),
            actual: groups.len(),
        });
    }
    // Classes and groups numbered in sorted order (numpy.unique).
    let class_code: BTreeMap<usize, usize> = unique_sorted(labels);
    let group_code: BTreeMap<usize, usize> = unique_sorted(groups);
    let n_classes = class_code.len();
    let n_groups = group_code.len();
    let mut class_counts = vec![0.0_f64; n_classes];
    for l in labels {
        class_counts[class_code[l]] += 1.0;
    }
    let largest = class_counts.iter().fold(0.0_f64, |m, &c| m.max(c));
    if largest < folds as f64 {
        return Err(EvaluationError::ClassesTooSmall {
            folds,
            largest: largest as usize,
            what: "windows",
        });
    }
    if folds > n_groups {
        return Err(EvaluationError::TooFewUnits {
            folds,
            units: n_groups,
            what: "groups",
        });
    }
    let mut per_group = vec![vec![0.0_f64; n_classes]; n_groups];
    for (l, g) in labels.iter().zip(groups) {
        per_group[group_code[g]][class_code[l]] += 1.0;
    }
    let mut order: Vec<usize> = (0..n_groups).collect();
    if let Some(seed) = shuffle_seed {
        order.shuffle(&mut SmallRng::seed_from_u64(seed));
    }
    let spread: Vec<f64> = per_group.iter().map(|c| population_sd(c)).collect();
    // Stable sort by decreasing spread (numpy.argsort(-std, kind="stable")).
    order.sort_by(|&a, &b| spread[b].total_cmp(&spread[a]));
    let mut per_fold = vec![vec![0.0_f64; n_classes]; folds];
    let mut fold_of_group = vec![0_usize; n_groups];
    let mut shares = vec![0.0_f64; folds];
    for &g in &order {
        let counts = &per_group[g];
        let mut best = 0;
        let mut min_eval = f64::INFINITY;
        let mut min_windows = f64::INFINITY;
        for candidate in 0..folds {
            let mut eval = 0.0;
            for c in 0..n_classes {
                for (f, share) in shares.iter_mut().enumerate() {
                    let extra = if f == candidate { counts[c] } else { 0.0 };
                    *share = (per_fold[f][c] + extra) / class_counts[c];
                }
                eval += population_sd(&shares);
            }
            eval /= n_classes as f64;
            let windows: f64 = per_fold[candidate].iter().sum();
            // numpy.isclose(a, b): |a − b| ≤ 1e-8 + 1e-5·|b|.
            let close = (eval - min_eval).abs() <= 1e-8 + 1e-5 * min_eval.abs();
            if eval < min_eval || (close && windows < min_windows) {
                min_eval = eval;
                min_windows = windows;
                best = candidate;
            }
        }
        for (a, c) in per_fold[best].iter_mut().zip(counts) {
            *a += c;
        }
        fold_of_group[g] = best;
    }
    let fold_of: Vec<usize> = groups
        .iter()
        .map(|g| fold_of_group[group_code[g]])
        .collect();
    Ok(folds_from_assignment(&fold_of, folds))
}

fn unique_sorted(values: &[usize]) -> BTreeMap<usize, usize> {
    let mut map: BTreeMap<usize, usize> = values.iter().map(|&v| (v, 0)).collect();
    for (i, code) in map.values_mut().enumerate() {
        *code = i;
    }
    map
}

/// Population standard deviation (numpy's `std`, ddof = 0).
fn population_sd(values: &[f64]) -> f64 {
    let n = values.len() as f64;
    let mean = values.iter().sum::<f64>() / n;
    (values.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / n).sqrt()
}

/// The folds training uses: [`stratified_group_k_fold`] (unshuffled) over the groups when
/// `data` has them, else over its tracks.
///
/// # Errors
/// As [`stratified_group_k_fold`]: in particular more folds than groups or tracks.
pub fn default_folds(data: &LabelledWindows, folds: usize) -> Result<FoldPlan, EvaluationError> {
    let grouping = if data.groups().is_some() {
        Grouping::Groups
    } else {
        Grouping::Tracks
    };
    let plan = stratified_group_k_fold(data.labels(), data.cv_groups(), folds, None).map_err(
        |e| match e {
            EvaluationError::TooFewUnits { folds, units, .. } => EvaluationError::TooFewUnits {
                folds,
                units,
                what: if grouping == Grouping::Groups {
                    "groups"
                } else {
                    "tracks"
                },
            },
            other => other,
        },
    )?;
    Ok(FoldPlan {
        folds: plan,
        grouping,
    })
}

/// Balanced accuracy: the mean over classes present in `truth` of the recall (scikit-learn
/// 1.9.1's `balanced_accuracy_score`, `adjusted=False`; Brodersen et al. 2010). Returns 0 for
/// empty input.
///
/// # Panics
/// If the lengths differ or a label is `>= n_classes`.
#[must_use]
pub fn balanced_accuracy(truth: &[usize], predicted: &[usize], n_classes: usize) -> f64 {
    Confusion::from_predictions(truth, predicted, n_classes).balanced_accuracy()
}

/// Confusion counts: `counts[truth][predicted]`.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Confusion {
    /// Rows: true class; columns: predicted class.
    pub counts: Vec<Vec<u64>>,
}

impl Confusion {
    /// All zeros for `n_classes` classes.
    #[must_use]
    pub fn new(n_classes: usize) -> Self {
        Self {
            counts: vec![vec![0; n_classes]; n_classes],
        }
    }

    /// Counts of paired labels.
    ///
    /// # Panics
    /// If the lengths differ or a label is `>= n_classes`.
    #[must_use]
    pub fn from_predictions(truth: &[usize], predicted: &[usize], n_classes: usize) -> Self {
        assert_eq!(truth.len(), predicted.len(), "paired labels");
        let mut c = Self::new(n_classes);
        for (&t, &p) in truth.iter().zip(predicted) {
            c.counts[t][p] += 1;
        }
        c
    }

    /// Adds another table of the same size.
    pub fn add(&mut self, other: &Self) {
        for (row, other_row) in self.counts.iter_mut().zip(&other.counts) {
            for (a, b) in row.iter_mut().zip(other_row) {
                *a += b;
            }
        }
    }

    /// Recall of class `class` (correct ÷ true), `None` without true windows.
    #[must_use]
    pub fn recall(&self, class: usize) -> Option<f64> {
        let row = &self.counts[class];
        let total: u64 = row.iter().sum();
        (total > 0).then(|| row[class] as f64 / total as f64)
    }

    /// Mean recall over classes with true windows (0 when there are none).
    #[must_use]
    pub fn balanced_accuracy(&self) -> f64 {
        let recalls: Vec<f64> = (0..self.counts.len())
            .filter_map(|c| self.recall(c))
            .collect();
        if recalls.is_empty() {
            0.0
        } else {
            recalls.iter().sum::<f64>() / recalls.len() as f64
        }
    }

    /// `1 − balanced accuracy`.
    #[must_use]
    pub fn balanced_error(&self) -> f64 {
        1.0 - self.balanced_accuracy()
    }

    /// Total count.
    #[must_use]
    pub fn total(&self) -> u64 {
        self.counts.iter().flatten().sum()
    }
}

/// Mean and standard deviation over folds (population sd, numpy's default `std()` as
/// scikit-learn's examples report `scores.mean()` and `scores.std()`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MeanSd {
    /// Mean.
    pub mean: f64,
    /// Standard deviation (ddof = 0).
    pub sd: f64,
}

impl MeanSd {
    /// Of a list of values (zeros when empty).
    #[must_use]
    pub fn of(values: &[f64]) -> Self {
        if values.is_empty() {
            return Self { mean: 0.0, sd: 0.0 };
        }
        let mean = values.iter().sum::<f64>() / values.len() as f64;
        Self {
            mean,
            sd: population_sd(values),
        }
    }
}

/// One bin of a calibration table.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CalibrationBin {
    /// Lower edge of predicted closeness, 0–1.
    pub lower: f64,
    /// Upper edge (exclusive except for the last bin).
    pub upper: f64,
    /// Windows whose closeness falls in the bin.
    pub windows: usize,
    /// Their mean closeness, 0–1.
    pub mean_closeness: f64,
    /// Fraction of them that belong to the class, 0–1.
    pub observed_frequency: f64,
}

/// Reliability of the closeness to one class: predicted closeness in bins against the observed
/// frequency of the class (a reliability diagram as a table; empty bins are left out, as
/// scikit-learn's `calibration_curve` does).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CalibrationTable {
    /// The class.
    pub class: usize,
    /// Non-empty bins, in increasing closeness.
    pub bins: Vec<CalibrationBin>,
    /// Brier score: mean of (closeness − membership)², lower is better (Brier 1950).
    pub brier: f64,
    /// Expected calibration error: Σ bins (windows ÷ total)·|observed − mean closeness|
    /// (Naeini, Cooper & Hauskrecht 2015).
    pub expected_calibration_error: f64,
}

/// A calibration table of `closeness[i]` against `member[i]` in `bins` equal-width bins.
///
/// # Panics
/// If the lengths differ or `bins` is 0.
#[must_use]
pub fn calibration_table(
    class: usize,
    closeness: &[f64],
    member: &[bool],
    bins: usize,
) -> CalibrationTable {
    assert_eq!(closeness.len(), member.len(), "paired values");
    assert!(bins > 0, "at least one bin");
    let mut count = vec![0_usize; bins];
    let mut sum_p = vec![0.0; bins];
    let mut sum_y = vec![0.0; bins];
    let mut brier = 0.0;
    for (&p, &m) in closeness.iter().zip(member) {
        let y = if m { 1.0 } else { 0.0 };
        #[allow(
            clippy::cast_possible_truncation,
            clippy::cast_sign_loss,
            reason = "p is in 0–1, so p·bins is a small non-negative number"
        )]
        let b = ((p * bins as f64) as usize).min(bins - 1);
        count[b] += 1;
        sum_p[b] += p;
        sum_y[b] += y;
        brier += (p - y) * (p - y);
    }
    let n = closeness.len().max(1) as f64;
    let mut table = Vec::new();
    let mut ece = 0.0;
    for b in 0..bins {
        if count[b] == 0 {
            continue;
        }
        let c = count[b] as f64;
        let bin = CalibrationBin {
            lower: b as f64 / bins as f64,
            upper: (b + 1) as f64 / bins as f64,
            windows: count[b],
            mean_closeness: sum_p[b] / c,
            observed_frequency: sum_y[b] / c,
        };
        ece += c / n * (bin.observed_frequency - bin.mean_closeness).abs();
        table.push(bin);
    }
    CalibrationTable {
        class,
        bins: table,
        brier: brier / n,
        expected_calibration_error: ece,
    }
}

/// Figures of one fold.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FoldFigures {
    /// Test windows.
    pub test_windows: usize,
    /// Test tracks.
    pub test_tracks: usize,
    /// Balanced error over the fold's test windows, 0–1.
    pub window_balanced_error: f64,
    /// Balanced error over the fold's test tracks (track decision = highest mean window
    /// score), 0–1.
    pub track_balanced_error: f64,
}

/// The figures a cross-validation reports (stored in the model file's training summary and
/// printed by `weft style train`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CvFigures {
    /// Model type.
    pub model: ModelKind,
    /// Number of folds.
    pub folds: usize,
    /// What the folds keep together.
    pub grouping: Grouping,
    /// Per-window balanced error over folds, mean ± sd, 0–1.
    pub window_balanced_error: MeanSd,
    /// Per-track balanced error over folds, mean ± sd, 0–1.
    pub track_balanced_error: MeanSd,
    /// Confusion counts of all test windows (rows: truth, columns: decision).
    pub window_confusion: Confusion,
    /// Confusion counts of all test tracks.
    pub track_confusion: Confusion,
    /// Each fold's figures.
    pub per_fold: Vec<FoldFigures>,
    /// Reliability of the cross-fitted closeness, one table per class.
    pub calibration: Vec<CalibrationTable>,
}

impl CvFigures {
    /// Whether every number is finite (a condition for saving).
    #[must_use]
    pub fn is_finite(&self) -> bool {
        let mean_sd = [self.window_balanced_error, self.track_balanced_error];
        mean_sd
            .iter()
            .all(|m| m.mean.is_finite() && m.sd.is_finite())
            && self
                .per_fold
                .iter()
                .all(|f| f.window_balanced_error.is_finite() && f.track_balanced_error.is_finite())
            && self.calibration.iter().all(|t| {
                t.brier.is_finite()
                    && t.expected_calibration_error.is_finite()
                    && t.bins
                        .iter()
                        .all(|b| b.mean_closeness.is_finite() && b.observed_frequency.is_finite())
            })
    }
}

/// The result of [`cross_validate`]: figures plus the cross-validated scores that
/// [`StyleModel::fit`] calibrates on.
#[derive(Debug, Clone, PartialEq)]
pub struct CrossValidation {
    /// Settings every fold was trained with.
    pub params: ModelParams,
    /// Class names.
    pub classes: Vec<String>,
    /// The figures.
    pub figures: CvFigures,
    /// Each window's decision scores from the fold that tested it, `windows × classes`.
    pub oof_scores: Vec<f64>,
    /// Each window's cross-fitted closeness (Platt fitted on the other folds' scores),
    /// `windows × classes`.
    pub oof_closeness: Vec<f64>,
    /// The fold that tested each window.
    pub fold_of_window: Vec<usize>,
}

/// Cross-validates `params` on `data` over `plan`'s folds; `progress(done, total)` is called
/// after each fold.
///
/// Each fold standardises with its own training windows, trains, and scores its test windows.
/// Window decisions are the highest score; a track's decision is the highest mean score of its
/// test windows.
///
/// # Errors
/// [`EvaluationError::BadFold`] when the folds do not partition the windows or a track spans
/// training and test; training errors.
pub fn cross_validate(
    data: &LabelledWindows,
    params: &ModelParams,
    plan: &FoldPlan,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<CrossValidation, EvaluationError> {
    params.validate()?;
    let n = data.n_windows();
    let k = data.classes().len();
    let labels = data.labels();
    let tracks = data.tracks();
    let n_folds = plan.folds.len();
    if n_folds < 2 {
        return Err(EvaluationError::TooFewFolds { folds: n_folds });
    }
    let mut fold_of_window = vec![usize::MAX; n];
    for (f, fold) in plan.folds.iter().enumerate() {
        for &i in &fold.test {
            if i >= n || fold_of_window[i] != usize::MAX {
                return Err(EvaluationError::BadFold {
                    fold: f,
                    reason: format!("window {i} is out of range or tested twice"),
                });
            }
            fold_of_window[i] = f;
        }
    }
    if let Some(i) = fold_of_window.iter().position(|&f| f == usize::MAX) {
        return Err(EvaluationError::BadFold {
            fold: 0,
            reason: format!("window {i} is never tested"),
        });
    }
    for (f, fold) in plan.folds.iter().enumerate() {
        if let Some(&i) = fold
            .train
            .iter()
            .find(|&&i| i >= n || fold_of_window[i] == f)
        {
            return Err(EvaluationError::BadFold {
                fold: f,
                reason: format!("window {i} is both trained and tested"),
            });
        }
        // A track must not be seen in training and tested.
        let test_tracks: std::collections::HashSet<usize> =
            fold.test.iter().map(|&i| tracks[i]).collect();
        if let Some(&i) = fold
            .train
            .iter()
            .find(|&&i| test_tracks.contains(&tracks[i]))
        {
            return Err(EvaluationError::BadFold {
                fold: f,
                reason: format!("track {} spans training and test", tracks[i]),
            });
        }
    }

    let mut oof_scores = vec![0.0; n * k];
    let mut window_confusion = Confusion::new(k);
    let mut track_confusion = Confusion::new(k);
    let mut per_fold = Vec::with_capacity(n_folds);
    for (f, fold) in plan.folds.iter().enumerate() {
        let train_x = data.features().select_rows(&fold.train);
        let train_y: Vec<usize> = fold.train.iter().map(|&i| labels[i]).collect();
        let scaler = Standardizer::fit(&train_x);
        let classifier = Classifier::fit(params, &scaler.transform(&train_x), &train_y, k)?;
        let test_x = scaler.transform(&data.features().select_rows(&fold.test));
        let scores = classifier.scores(&test_x, k);
        let mut truth = Vec::with_capacity(fold.test.len());
        let mut decided = Vec::with_capacity(fold.test.len());
        // Track → (sum of scores, label).
        let mut by_track: BTreeMap<usize, (Vec<f64>, usize)> = BTreeMap::new();
        for (row, &i) in scores.chunks_exact(k).zip(&fold.test) {
            oof_scores[i * k..(i + 1) * k].copy_from_slice(row);
            truth.push(labels[i]);
            decided.push(crate::style::argmax(row));
            let entry = by_track
                .entry(tracks[i])
                .or_insert_with(|| (vec![0.0; k], labels[i]));
            for (s, v) in entry.0.iter_mut().zip(row) {
                *s += v;
            }
        }
        let windows = Confusion::from_predictions(&truth, &decided, k);
        let track_truth: Vec<usize> = by_track.values().map(|(_, l)| *l).collect();
        let track_decided: Vec<usize> = by_track
            .values()
            .map(|(s, _)| crate::style::argmax(s))
            .collect();
        let track_table = Confusion::from_predictions(&track_truth, &track_decided, k);
        per_fold.push(FoldFigures {
            test_windows: fold.test.len(),
            test_tracks: by_track.len(),
            window_balanced_error: windows.balanced_error(),
            track_balanced_error: track_table.balanced_error(),
        });
        window_confusion.add(&windows);
        track_confusion.add(&track_table);
        progress(f + 1, n_folds);
    }

    // Cross-fitted closeness: fold f's scores through sigmoids fitted on the other folds.
    let mut oof_closeness = vec![0.0; n * k];
    for f in 0..n_folds {
        let others: Vec<usize> = (0..n).filter(|&i| fold_of_window[i] != f).collect();
        let scores: Vec<f64> = others
            .iter()
            .flat_map(|&i| oof_scores[i * k..(i + 1) * k].iter().copied())
            .collect();
        let other_labels: Vec<usize> = others.iter().map(|&i| labels[i]).collect();
        let calibration = Calibration::fit(&scores, &other_labels, k)?;
        for i in (0..n).filter(|&i| fold_of_window[i] == f) {
            calibration.closeness_into(
                &oof_scores[i * k..(i + 1) * k],
                &mut oof_closeness[i * k..(i + 1) * k],
            );
        }
    }
    let calibration = (0..k)
        .map(|c| {
            let closeness: Vec<f64> = (0..n).map(|i| oof_closeness[i * k + c]).collect();
            let member: Vec<bool> = labels.iter().map(|&l| l == c).collect();
            calibration_table(c, &closeness, &member, CALIBRATION_BINS)
        })
        .collect();

    let window_errors: Vec<f64> = per_fold.iter().map(|f| f.window_balanced_error).collect();
    let track_errors: Vec<f64> = per_fold.iter().map(|f| f.track_balanced_error).collect();
    Ok(CrossValidation {
        params: params.clone(),
        classes: data.classes().to_vec(),
        figures: CvFigures {
            model: params.kind(),
            folds: n_folds,
            grouping: plan.grouping,
            window_balanced_error: MeanSd::of(&window_errors),
            track_balanced_error: MeanSd::of(&track_errors),
            window_confusion,
            track_confusion,
            per_fold,
            calibration,
        },
        oof_scores,
        oof_closeness,
        fold_of_window,
    })
}

/// Index of the result with the lowest mean per-window balanced error (the first on ties):
/// `--model auto`'s choice. Windows, not tracks, because closeness is shown per window.
#[must_use]
pub fn best_by_balanced_error(results: &[CrossValidation]) -> Option<usize> {
    let mut best: Option<usize> = None;
    for (i, r) in results.iter().enumerate() {
        let e = r.figures.window_balanced_error.mean;
        if best.is_none_or(|b| e < results[b].figures.window_balanced_error.mean) {
            best = Some(i);
        }
    }
    best
}

/// How a saved model does on other labelled windows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CheckReport {
    /// Windows checked.
    pub windows: usize,
    /// Tracks checked.
    pub tracks: usize,
    /// Balanced error over windows (classes present in the data), 0–1.
    pub window_balanced_error: f64,
    /// Balanced error over tracks, 0–1.
    pub track_balanced_error: f64,
    /// Window confusion counts, in the model's class order.
    pub window_confusion: Confusion,
    /// Track confusion counts, in the model's class order.
    pub track_confusion: Confusion,
    /// Reliability of the model's closeness on these windows, per model class present.
    pub calibration: Vec<CalibrationTable>,
}

/// Evaluates a saved model on labelled windows whose class names are among the model's.
///
/// # Errors
/// [`EvaluationError::Model`] for another schema, [`EvaluationError::UnknownClass`] for a class
/// the model does not know.
pub fn check_model(
    model: &StyleModel,
    data: &LabelledWindows,
) -> Result<CheckReport, EvaluationError> {
    model.check_schema(data.schema())?;
    let k = model.n_classes();
    let mut to_model = Vec::with_capacity(data.classes().len());
    for name in data.classes() {
        to_model.push(
            model
                .class_index(name)
                .ok_or_else(|| EvaluationError::UnknownClass {
                    class: name.clone(),
                    known: model.classes().to_vec(),
                })?,
        );
    }
    let scores = model.scores_of(data.features());
    let truth: Vec<usize> = data.labels().iter().map(|&l| to_model[l]).collect();
    let decided: Vec<usize> = scores.chunks_exact(k).map(crate::style::argmax).collect();
    let window_confusion = Confusion::from_predictions(&truth, &decided, k);
    let mut closeness = vec![0.0; scores.len()];
    for (s, c) in scores.chunks_exact(k).zip(closeness.chunks_exact_mut(k)) {
        model.calibration.closeness_into(s, c);
    }
    let mut by_track: BTreeMap<usize, (Vec<f64>, usize)> = BTreeMap::new();
    for ((row, &t), &label) in scores.chunks_exact(k).zip(data.tracks()).zip(&truth) {
        let entry = by_track.entry(t).or_insert_with(|| (vec![0.0; k], label));
        for (s, v) in entry.0.iter_mut().zip(row) {
            *s += v;
        }
    }
    let track_truth: Vec<usize> = by_track.values().map(|(_, l)| *l).collect();
    let track_decided: Vec<usize> = by_track
        .values()
        .map(|(s, _)| crate::style::argmax(s))
        .collect();
    let track_confusion = Confusion::from_predictions(&track_truth, &track_decided, k);
    let calibration = (0..k)
        .filter(|c| to_model.contains(c))
        .map(|c| {
            let p: Vec<f64> = closeness.chunks_exact(k).map(|r| r[c]).collect();
            let member: Vec<bool> = truth.iter().map(|&l| l == c).collect();
            calibration_table(c, &p, &member, CALIBRATION_BINS)
        })
        .collect();
    Ok(CheckReport {
        windows: data.n_windows(),
        tracks: by_track.len(),
        window_balanced_error: window_confusion.balanced_error(),
        track_balanced_error: track_confusion.balanced_error(),
        window_confusion,
        track_confusion,
        calibration,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::style::{FeatureMatrix, FeatureSchema, ForestParams};
    use rand::Rng;

    fn schema(n: usize) -> FeatureSchema {
        FeatureSchema::new("test", 1, "", (0..n).map(|i| format!("f{i}")).collect())
            .expect("schema")
    }

    #[test]
    fn stratified_folds_partition_and_keep_class_shares() {
        // 3 classes of 25, 14 and 6 windows, interleaved; 5 folds.
        let labels: Vec<usize> = (0..45)
            .map(|i| {
                if i % 3 == 0 && i < 18 {
                    2
                } else if i % 2 == 0 {
                    0
                } else {
                    1
                }
            })
            .collect();
        let folds = stratified_k_fold(&labels, 5).expect("folds");
        let mut tested = vec![0; labels.len()];
        for fold in &folds {
            for &i in &fold.test {
                tested[i] += 1;
            }
            assert_eq!(fold.train.len() + fold.test.len(), labels.len());
            for c in 0..3 {
                let total = labels.iter().filter(|&&l| l == c).count();
                let in_test = fold.test.iter().filter(|&&i| labels[i] == c).count();
                // Round robin: each fold holds ⌊n_c/5⌋ or ⌈n_c/5⌉ windows of class c… within one.
                assert!(
                    in_test.abs_diff(total / 5) <= 1,
                    "class {c}: {in_test} of {total}"
                );
            }
        }
        assert!(tested.iter().all(|&t| t == 1));
        assert!(matches!(
            stratified_k_fold(&labels, 1),
            Err(EvaluationError::TooFewFolds { .. })
        ));
        assert!(matches!(
            stratified_k_fold(&[0, 0, 1, 1], 3),
            Err(EvaluationError::ClassesTooSmall { .. })
        ));
    }

    #[test]
    fn group_folds_never_split_a_group() {
        let seed = 44;
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut labels = Vec::new();
        let mut groups = Vec::new();
        for g in 0..30 {
            let class = g % 3;
            for _ in 0..rng.gen_range(1..6) {
                labels.push(class);
                groups.push(g * 7 + 3);
            }
        }
        for shuffle in [None, Some(seed)] {
            let folds = stratified_group_k_fold(&labels, &groups, 5, shuffle).expect("folds");
            for fold in &folds {
                let test_groups: std::collections::HashSet<usize> =
                    fold.test.iter().map(|&i| groups[i]).collect();
                assert!(
                    fold.train
                        .iter()
                        .all(|&i| !test_groups.contains(&groups[i])),
                    "seed {seed} shuffle {shuffle:?}"
                );
                assert!(!fold.test.is_empty());
            }
            let tested: usize = folds.iter().map(|f| f.test.len()).sum();
            assert_eq!(tested, labels.len());
        }
        assert!(matches!(
            stratified_group_k_fold(&labels, &groups, 31, None),
            Err(EvaluationError::TooFewUnits { .. })
        ));
    }

    #[test]
    fn balanced_accuracy_is_the_mean_recall() {
        // Recalls 3/4 and 1/2: balanced accuracy 0.625 (Brodersen et al. 2010, eq. 1).
        let truth = [0, 0, 0, 0, 1, 1];
        let predicted = [0, 0, 0, 1, 1, 0];
        assert_eq!(balanced_accuracy(&truth, &predicted, 2), 0.625);
        let c = Confusion::from_predictions(&truth, &predicted, 3);
        assert_eq!(c.counts, vec![vec![3, 1, 0], vec![1, 1, 0], vec![0, 0, 0]]);
        assert_eq!(c.recall(2), None, "a class without windows has no recall");
        assert_eq!(c.total(), 6);
        let m = MeanSd::of(&[0.1, 0.3]);
        assert!((m.mean - 0.2).abs() < 1e-15 && (m.sd - 0.1).abs() < 1e-15);
    }

    #[test]
    fn calibration_table_of_perfectly_calibrated_values() {
        // Closeness 0.25 for 400 windows of which 100 are members, 0.85 for 200 of which 170:
        // each bin's observed frequency equals its closeness, so ECE = 0.
        let mut p = vec![0.25; 400];
        p.extend(vec![0.85; 200]);
        let member: Vec<bool> = (0..600)
            .map(|i| if i < 400 { i < 100 } else { i < 570 })
            .collect();
        let t = calibration_table(1, &p, &member, 10);
        assert_eq!(t.bins.len(), 2);
        assert_eq!((t.bins[0].lower, t.bins[0].windows), (0.2, 400));
        assert!((t.bins[1].observed_frequency - 0.85).abs() < 1e-12);
        assert!(t.expected_calibration_error < 1e-12);
        // Brier = mean p(1 − p) for calibrated constant bins: (400·0.1875 + 200·0.1275)/600.
        assert!((t.brier - (400.0 * 0.1875 + 200.0 * 0.1275) / 600.0).abs() < 1e-12);
    }

    /// Windows whose label follows their group only: each group has a random label and a
    /// random feature signature, so the features identify the group but say nothing about the
    /// label of an unseen group.
    fn group_only_data(seed: u64, n_groups: usize, per_group: usize, f: usize) -> LabelledWindows {
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut group_labels: Vec<usize> = (0..n_groups).map(|g| g % 2).collect();
        group_labels.shuffle(&mut rng);
        let centres: Vec<Vec<f64>> = (0..n_groups)
            .map(|_| (0..f).map(|_| rng.gen_range(-3.0..3.0)).collect())
            .collect();
        let mut values = Vec::new();
        let (mut labels, mut tracks) = (Vec::new(), Vec::new());
        // Interleaved order (one window of every group, then the next…), so that splitting by
        // window puts a group's windows on both sides.
        for _ in 0..per_group {
            for (g, &label) in group_labels.iter().enumerate() {
                values.extend(centres[g].iter().map(|c| c + rng.gen_range(-0.1..0.1)));
                labels.push(label);
                tracks.push(g);
            }
        }
        LabelledWindows::new(
            schema(f),
            vec!["a".into(), "b".into()],
            FeatureMatrix::new(f, values).expect("matrix"),
            labels,
            tracks,
            None,
        )
        .expect("windows")
    }

    #[test]
    fn grouped_cross_validation_leaks_nothing() {
        // 120 groups of 4 windows. Labels are independent of everything a model can learn
        // about an unseen group, so grouped CV must find chance (balanced accuracy 0.5). Test
        // windows of one group share label and features, so at worst a whole group is right or
        // wrong together: the balanced accuracy is a mean over G = 120 group outcomes, sd ≤
        // 0.5/√G = 0.046; 4 sd (0.18) bounds it with a false-alarm probability ≈ 6e-5.
        let seed = 2024;
        let data = group_only_data(seed, 120, 4, 6);
        let params = ModelParams::Forest(ForestParams {
            n_trees: 30,
            seed,
            ..ForestParams::default()
        });
        let bound = 4.0 * 0.5 / (120.0_f64).sqrt();
        let grouped = default_folds(&data, 5).expect("folds");
        assert_eq!(grouped.grouping, Grouping::Tracks);
        let cv = cross_validate(&data, &params, &grouped, &mut |_, _| {}).expect("cv");
        let pooled = 1.0 - cv.figures.window_confusion.balanced_error();
        assert!(
            (pooled - 0.5).abs() <= bound,
            "seed {seed}: grouped balanced accuracy {pooled}"
        );

        // Plain stratified folds over the windows (scikit-learn's StratifiedKFold, ignoring
        // tracks) put a test window's siblings in training, and the forest recognises the
        // group: optimistic.
        let labels = data.labels().to_vec();
        let by_window = stratified_k_fold(&labels, 5).expect("folds");
        let loose = LabelledWindows::new(
            data.schema().clone(),
            data.classes().to_vec(),
            data.features().clone(),
            labels,
            (0..data.n_windows()).collect(),
            None,
        )
        .expect("windows");
        let plan = FoldPlan {
            folds: by_window,
            grouping: Grouping::Given,
        };
        let leaky = cross_validate(&loose, &params, &plan, &mut |_, _| {}).expect("cv");
        let optimistic = 1.0 - leaky.figures.window_confusion.balanced_error();
        assert!(
            optimistic > 0.5 + bound,
            "seed {seed}: window-split balanced accuracy {optimistic}"
        );

        // And cross_validate refuses folds that split a track.
        assert!(matches!(
            cross_validate(&data, &params, &plan, &mut |_, _| {}),
            Err(EvaluationError::BadFold { .. })
        ));
    }

    #[test]
    fn cross_validation_reports_consistent_figures() {
        let seed = 77;
        let mut rng = SmallRng::seed_from_u64(seed);
        // 3 classes, 8 tracks each of 5 windows, class-dependent means.
        let (mut values, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
        for t in 0..24 {
            let class = t % 3;
            for _ in 0..5 {
                values.push(class as f64 + rng.gen_range(-0.7..0.7));
                values.push(rng.gen_range(-1.0..1.0));
                labels.push(class);
                tracks.push(t);
            }
        }
        let data = LabelledWindows::new(
            schema(2),
            vec!["a".into(), "b".into(), "c".into()],
            FeatureMatrix::new(2, values).expect("matrix"),
            labels,
            tracks,
            None,
        )
        .expect("windows");
        let plan = default_folds(&data, 4).expect("folds");
        let mut calls = Vec::new();
        for kind in ModelKind::ALL {
            let params = ModelParams::default_for(kind, seed);
            let cv =
                cross_validate(&data, &params, &plan, &mut |d, t| calls.push((d, t))).expect("cv");
            let fig = &cv.figures;
            assert_eq!(fig.window_confusion.total(), 120);
            assert_eq!(fig.track_confusion.total(), 24);
            assert_eq!(
                fig.per_fold.iter().map(|f| f.test_windows).sum::<usize>(),
                120
            );
            assert!(fig.is_finite());
            assert_eq!(fig.calibration.len(), 3);
            // Classes one unit apart with ±0.7 noise: far better than chance (1/3).
            assert!(
                fig.window_balanced_error.mean < 0.35,
                "{kind} seed {seed}: {fig:?}"
            );
            assert!(cv.oof_closeness.iter().all(|p| (0.0..=1.0).contains(p)));
        }
        assert_eq!(calls.len(), 12);
        assert_eq!(calls.last(), Some(&(4, 4)));
    }
}
