//! What the three model types share: their settings ([`ModelParams`]), class weights, the
//! linear model representation of the SVM and logistic regression, and one enum that trains,
//! scores and decomposes any of them.
//!
//! Every model produces one *decision score* per class for a standardised window:
//! - forest: the class probability;
//! - linear SVM and logistic regression: the one-vs-rest linear score `w_k·z + b_k` (margin or
//!   log-odds); with two classes a single `w·z + b` is fitted for class 1 and class 0 scores its
//!   negative (scikit-learn's binary convention).
//!
//! The decision is the class with the highest score (scikit-learn's `predict`); closeness is a
//! Platt sigmoid of the score (see [`super::calibration`]).

use super::data::FeatureMatrix;
use super::errors::{ModelFileError, StyleError};
use super::forest::{ForestParams, RandomForest};
use super::linear_svm::{self, SvmParams};
use super::logistic::{self, LogisticParams};
use serde::{Deserialize, Serialize};
use std::fmt;
use std::str::FromStr;

/// How classes are weighted during training.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ClassWeight {
    /// Every window counts once.
    #[default]
    Uniform,
    /// Windows weighted by `n / (classes · n_class)` so every class weighs the same in total
    /// (scikit-learn 1.9.1's `class_weight="balanced"`). For the one-vs-rest linear models the
    /// weights are computed per binary problem (class vs rest), as scikit-learn's
    /// `OneVsRestClassifier` does around an estimator with `class_weight="balanced"`.
    Balanced,
}

/// Per-class weights over the labels `y` (classes absent from `y` get weight 1; they have no
/// window to weigh).
///
/// # Errors
/// [`StyleError::LabelOutOfRange`] for a label `>= n_classes`.
pub(crate) fn class_weights(
    cw: ClassWeight,
    y: &[usize],
    n_classes: usize,
) -> Result<Vec<f64>, StyleError> {
    let mut counts = vec![0_usize; n_classes];
    for (window, &label) in y.iter().enumerate() {
        if label >= n_classes {
            return Err(StyleError::LabelOutOfRange {
                window,
                label,
                classes: n_classes,
            });
        }
        counts[label] += 1;
    }
    Ok(match cw {
        ClassWeight::Uniform => vec![1.0; n_classes],
        ClassWeight::Balanced => {
            let present = counts.iter().filter(|&&c| c > 0).count() as f64;
            let n = y.len() as f64;
            counts
                .iter()
                .map(|&c| if c > 0 { n / (present * c as f64) } else { 1.0 })
                .collect()
        }
    })
}

/// Weights of the positive and negative side of one binary problem.
pub(crate) fn binary_weights(cw: ClassWeight, n_positive: usize, n_negative: usize) -> (f64, f64) {
    match cw {
        ClassWeight::Uniform => (1.0, 1.0),
        ClassWeight::Balanced => {
            let n = (n_positive + n_negative) as f64;
            let w = |c: usize| if c > 0 { n / (2.0 * c as f64) } else { 1.0 };
            (w(n_positive), w(n_negative))
        }
    }
}

/// The three model types.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ModelKind {
    /// Random forest ([`RandomForest`]).
    Forest,
    /// Linear support vector machine (liblinear's L2-regularised squared hinge).
    LinearSvm,
    /// L2-regularised logistic regression.
    Logistic,
}

impl ModelKind {
    /// All kinds, in the order `--model auto` tries them.
    pub const ALL: [Self; 3] = [Self::Forest, Self::LinearSvm, Self::Logistic];

    /// The name used on the command line and in files: `forest`, `svm`, `logistic`.
    #[must_use]
    pub fn name(self) -> &'static str {
        match self {
            Self::Forest => "forest",
            Self::LinearSvm => "svm",
            Self::Logistic => "logistic",
        }
    }
}

impl fmt::Display for ModelKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl FromStr for ModelKind {
    type Err = StyleError;
    fn from_str(s: &str) -> Result<Self, Self::Err> {
        match s {
            "forest" | "rf" | "random_forest" => Ok(Self::Forest),
            "svm" | "linear_svm" => Ok(Self::LinearSvm),
            "logistic" | "logreg" => Ok(Self::Logistic),
            other => Err(StyleError::InvalidSetting {
                name: "model",
                value: other.to_owned(),
                reason: "expected forest, svm or logistic",
            }),
        }
    }
}

/// Settings of one model type.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ModelParams {
    /// Random forest.
    Forest(ForestParams),
    /// Linear SVM, one-vs-rest.
    LinearSvm(SvmParams),
    /// Logistic regression, one-vs-rest.
    Logistic(LogisticParams),
}

impl ModelParams {
    /// The default settings of a kind, seeded with `seed` (the linear SVM's visiting order and
    /// the forest's draws; logistic regression is deterministic).
    #[must_use]
    pub fn default_for(kind: ModelKind, seed: u64) -> Self {
        match kind {
            ModelKind::Forest => Self::Forest(ForestParams {
                seed,
                ..ForestParams::default()
            }),
            ModelKind::LinearSvm => Self::LinearSvm(SvmParams {
                seed,
                ..SvmParams::default()
            }),
            ModelKind::Logistic => Self::Logistic(LogisticParams::default()),
        }
    }

    /// The model kind.
    #[must_use]
    pub fn kind(&self) -> ModelKind {
        match self {
            Self::Forest(_) => ModelKind::Forest,
            Self::LinearSvm(_) => ModelKind::LinearSvm,
            Self::Logistic(_) => ModelKind::Logistic,
        }
    }

    /// The same settings with another class weighting.
    #[must_use]
    pub fn with_class_weight(mut self, cw: ClassWeight) -> Self {
        match &mut self {
            Self::Forest(p) => p.class_weight = cw,
            Self::LinearSvm(p) => p.class_weight = cw,
            Self::Logistic(p) => p.class_weight = cw,
        }
        self
    }

    /// Checks the settings.
    ///
    /// # Errors
    /// [`StyleError::InvalidSetting`] for an out-of-range value.
    pub fn validate(&self) -> Result<(), StyleError> {
        match self {
            Self::Forest(p) => p.validate(),
            Self::LinearSvm(p) => p.validate(),
            Self::Logistic(p) => p.validate(),
        }
    }
}

/// A linear one-vs-rest model over standardised features: one weight row and intercept per
/// output (one output for two classes, one per class otherwise).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LinearModel {
    pub(crate) n_classes: usize,
    /// `outputs × features`, in score units per standardised unit.
    pub(crate) weights: Vec<Vec<f64>>,
    /// One per output, score units.
    pub(crate) intercepts: Vec<f64>,
}

/// Checks the settings the linear models share: a positive `C` and tolerance, at least one
/// iteration.
pub(super) fn validate_linear(
    c: f64,
    tolerance: f64,
    max_iterations: usize,
) -> Result<(), StyleError> {
    if !(c.is_finite() && c > 0.0) {
        return Err(StyleError::InvalidSetting {
            name: "c",
            value: c.to_string(),
            reason: "must be a positive number",
        });
    }
    if !(tolerance.is_finite() && tolerance > 0.0) {
        return Err(StyleError::InvalidSetting {
            name: "tolerance",
            value: tolerance.to_string(),
            reason: "must be a positive number",
        });
    }
    if max_iterations == 0 {
        return Err(StyleError::InvalidSetting {
            name: "max_iterations",
            value: "0".into(),
            reason: "must be at least 1",
        });
    }
    Ok(())
}

/// Checks that there is one label per row and at least one row.
pub(super) fn check_labels(z: &FeatureMatrix, y: &[usize]) -> Result<(), StyleError> {
    if y.len() != z.n_rows() || y.is_empty() {
        return Err(StyleError::LengthMismatch {
            what: "labels",
            expected: z.n_rows(),
            actual: y.len(),
        });
    }
    Ok(())
}

impl LinearModel {
    /// Number of outputs for `n_classes` classes.
    pub(crate) fn outputs_for(n_classes: usize) -> usize {
        if n_classes == 2 { 1 } else { n_classes }
    }

    /// Weight rows, `outputs × features` (one row for two classes: class 1's).
    #[must_use]
    pub fn weights(&self) -> &[Vec<f64>] {
        &self.weights
    }

    /// Intercepts, one per output.
    #[must_use]
    pub fn intercepts(&self) -> &[f64] {
        &self.intercepts
    }

    fn scores_into(&self, z: &[f64], out: &mut [f64]) {
        let dot = |k: usize| -> f64 {
            self.weights[k]
                .iter()
                .zip(z)
                .map(|(w, v)| w * v)
                .sum::<f64>()
                + self.intercepts[k]
        };
        if self.n_classes == 2 {
            let s = dot(0);
            out[0] = -s;
            out[1] = s;
        } else {
            for (k, o) in out.iter_mut().enumerate() {
                *o = dot(k);
            }
        }
    }

    /// Exact decomposition of class `class`'s score: `w_j·z_j` per feature (z is the
    /// standardised deviation from the training mean) plus the intercept as bias.
    fn contributions_into(&self, z: &[f64], class: usize, out: &mut [f64]) -> f64 {
        let (row, sign) = if self.n_classes == 2 {
            (0, if class == 1 { 1.0 } else { -1.0 })
        } else {
            (class, 1.0)
        };
        for ((o, &w), &v) in out.iter_mut().zip(&self.weights[row]).zip(z) {
            *o = sign * w * v;
        }
        sign * self.intercepts[row]
    }

    /// Checks sizes and finiteness after reading a file.
    pub(crate) fn validate(
        &self,
        n_features: usize,
        n_classes: usize,
    ) -> Result<(), ModelFileError> {
        let outputs = Self::outputs_for(n_classes);
        if self.n_classes != n_classes
            || self.weights.len() != outputs
            || self.intercepts.len() != outputs
            || self.weights.iter().any(|w| w.len() != n_features)
        {
            return Err(ModelFileError::Invalid {
                reason: format!(
                    "linear model must have {outputs} rows of {n_features} weights and {outputs} intercepts for {n_classes} classes"
                ),
            });
        }
        if self
            .weights
            .iter()
            .flatten()
            .chain(&self.intercepts)
            .any(|v| !v.is_finite())
        {
            return Err(ModelFileError::NonFinite {
                field: "linear model weights".into(),
            });
        }
        Ok(())
    }
}

/// Any trained model.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Classifier {
    Forest(RandomForest),
    LinearSvm(LinearModel),
    Logistic(LinearModel),
}

impl Classifier {
    /// Trains on standardised rows `z` with labels `y` in `0..n_classes`.
    pub(crate) fn fit(
        params: &ModelParams,
        z: &FeatureMatrix,
        y: &[usize],
        n_classes: usize,
    ) -> Result<Self, StyleError> {
        params.validate()?;
        if y.len() != z.n_rows() {
            return Err(StyleError::LengthMismatch {
                what: "labels",
                expected: z.n_rows(),
                actual: y.len(),
            });
        }
        Ok(match params {
            ModelParams::Forest(p) => Self::Forest(RandomForest::fit(
                z.values(),
                z.n_features(),
                y,
                n_classes,
                p,
            )?),
            ModelParams::LinearSvm(p) => Self::LinearSvm(linear_svm::fit(z, y, n_classes, p)?),
            ModelParams::Logistic(p) => Self::Logistic(logistic::fit(z, y, n_classes, p)?),
        })
    }

    pub(crate) fn kind(&self) -> ModelKind {
        match self {
            Self::Forest(_) => ModelKind::Forest,
            Self::LinearSvm(_) => ModelKind::LinearSvm,
            Self::Logistic(_) => ModelKind::Logistic,
        }
    }

    /// Decision scores of one standardised row (`z32` is scratch for the forest's `f32` copy).
    pub(crate) fn scores_into(&self, z: &[f64], z32: &mut [f32], out: &mut [f64]) {
        match self {
            Self::Forest(f) => {
                to_f32(z, z32);
                f.predict_proba_into(z32, out);
            }
            Self::LinearSvm(m) | Self::Logistic(m) => m.scores_into(z, out),
        }
    }

    /// Decision scores of one standardised row plus the decomposition of class `class`'s score
    /// into per-feature contributions (written to `contributions`) and a returned bias:
    /// Saabas's path contributions for the forest (one walk down each tree for both), `w_j·z_j`
    /// for linear models.
    pub(crate) fn scores_with_contributions_into(
        &self,
        z: &[f64],
        z32: &mut [f32],
        class: usize,
        scores: &mut [f64],
        contributions: &mut [f64],
    ) -> f64 {
        match self {
            Self::Forest(f) => {
                to_f32(z, z32);
                f.predict_with_contributions_into(z32, class, scores, contributions)
            }
            Self::LinearSvm(m) | Self::Logistic(m) => {
                m.scores_into(z, scores);
                m.contributions_into(z, class, contributions)
            }
        }
    }

    /// Scores of every row of `z`, row-major `rows × classes` (allocates).
    pub(crate) fn scores(&self, z: &FeatureMatrix, n_classes: usize) -> Vec<f64> {
        let mut out = vec![0.0; z.n_rows() * n_classes];
        let mut z32 = vec![0.0_f32; z.n_features()];
        for (i, o) in out.chunks_exact_mut(n_classes).enumerate() {
            self.scores_into(z.row(i), &mut z32, o);
        }
        out
    }
}

fn to_f32(z: &[f64], out: &mut [f32]) {
    for (o, &v) in out.iter_mut().zip(z) {
        #[allow(
            clippy::cast_possible_truncation,
            reason = "trees compare features in f32, as scikit-learn does"
        )]
        let v32 = v as f32;
        *o = v32;
    }
}

/// Index of the largest value (the first on ties, as numpy's `argmax`).
pub(crate) fn argmax(values: &[f64]) -> usize {
    let mut best = 0;
    for (i, &v) in values.iter().enumerate() {
        if v > values[best] {
            best = i;
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn balanced_weights_equalise_class_totals() {
        let y = [0, 0, 0, 1, 2, 2];
        let w = class_weights(ClassWeight::Balanced, &y, 3).expect("weights");
        // scikit-learn's formula n / (classes · count): 6/(3·3), 6/(3·1), 6/(3·2).
        assert_eq!(w, vec![6.0 / 9.0, 2.0, 1.0]);
        let totals: Vec<f64> = (0..3)
            .map(|c| y.iter().filter(|&&l| l == c).count() as f64 * w[c])
            .collect();
        assert!(totals.iter().all(|t| (t - 2.0).abs() < 1e-12));
        assert_eq!(
            binary_weights(ClassWeight::Balanced, 1, 3),
            (2.0, 4.0 / 6.0)
        );
        assert!(class_weights(ClassWeight::Uniform, &[3], 2).is_err());
    }

    #[test]
    fn model_kind_names_round_trip() {
        for kind in ModelKind::ALL {
            assert_eq!(kind.name().parse::<ModelKind>().ok(), Some(kind));
        }
        assert!("tree".parse::<ModelKind>().is_err());
    }

    #[test]
    fn binary_linear_scores_are_antisymmetric_and_decompose_exactly() {
        let m = LinearModel {
            n_classes: 2,
            weights: vec![vec![0.5, -2.0]],
            intercepts: vec![0.25],
        };
        let z = [1.0, 0.5];
        let mut s = [0.0; 2];
        m.scores_into(&z, &mut s);
        assert_eq!(s, [0.25, -0.25]);
        let mut c = [0.0; 2];
        for (class, score) in s.iter().enumerate() {
            let bias = m.contributions_into(&z, class, &mut c);
            assert!((bias + c[0] + c[1] - score).abs() < 1e-15);
        }
        assert_eq!(argmax(&[1.0, 3.0, 3.0]), 1);
    }
}
