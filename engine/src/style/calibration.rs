//! Closeness: decision scores turned into calibrated probabilities by Platt scaling.
//!
//! Platt (1999), "Probabilistic outputs for support vector machines and comparisons to
//! regularized likelihood methods": `closeness = 1 / (1 + exp(A·s + B))`, `A, B` fitted by
//! maximum likelihood on *cross-validated* scores (each window scored by a model that did not
//! see its track or group) against the smoothed targets `(N₊ + 1)/(N₊ + 2)` and `1/(N₋ + 2)`.
//! The fit is the Newton method with backtracking of Lin, Lin & Weng (2007), "A note on Platt's
//! probabilistic outputs for support vector machines", Machine Learning 68, Algorithm 1 — the
//! same objective as scikit-learn 1.9.1's `_sigmoid_calibration`, which the reference test
//! compares against.
//!
//! Why Platt and not isotonic regression: a category is defined by a few dozen tracks, so the
//! calibration set is a few hundred to a few thousand windows that are strongly correlated
//! within a track. Isotonic regression has one free step per distinct score and overfits such
//! sets (scikit-learn's user guide advises against it below about 1000 calibration samples);
//! Platt's two parameters cannot, the map stays monotone and smooth (no plateaus that freeze the
//! live readout), and it is affine in the score before the sigmoid, so the score decompositions
//! used for reasons carry over exactly to the closeness's log-odds.
//!
//! With two classes one sigmoid is fitted to class 1's score and class 0's closeness is its
//! complement; with more, one sigmoid per class (one-vs-rest), so closeness to each category is
//! its own probability and they need not sum to one.

use super::errors::{ModelFileError, StyleError};
use super::logistic::sigmoid;
use serde::{Deserialize, Serialize};

/// One fitted sigmoid: `closeness = σ(slope·score + offset)` (Platt's `A = −slope`,
/// `B = −offset`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PlattScaling {
    /// Log-odds of closeness per unit of score.
    pub slope: f64,
    /// Log-odds of closeness at score 0.
    pub offset: f64,
}

impl PlattScaling {
    /// Fits the sigmoid to `scores` with `positive[i]` telling whether window `i` belongs to
    /// the class (Lin, Lin & Weng 2007, Algorithm 1: at most 100 Newton iterations, stop when
    /// both gradient entries are below 1e-5, ridge 1e-12, step at least 1e-10).
    ///
    /// # Errors
    /// [`StyleError::LengthMismatch`] or [`StyleError::Empty`] for bad input sizes,
    /// [`StyleError::NonFinite`] for a non-finite score.
    pub fn fit(scores: &[f64], positive: &[bool]) -> Result<Self, StyleError> {
        if scores.len() != positive.len() {
            return Err(StyleError::LengthMismatch {
                what: "calibration labels",
                expected: scores.len(),
                actual: positive.len(),
            });
        }
        if scores.is_empty() {
            return Err(StyleError::Empty {
                what: "calibration scores",
            });
        }
        if let Some(i) = scores.iter().position(|s| !s.is_finite()) {
            return Err(StyleError::NonFinite {
                window: i,
                feature: 0,
                value: scores[i],
            });
        }
        let prior1 = positive.iter().filter(|&&p| p).count() as f64;
        let prior0 = scores.len() as f64 - prior1;
        let hi = (prior1 + 1.0) / (prior1 + 2.0);
        let lo = 1.0 / (prior0 + 2.0);
        let target: Vec<f64> = positive.iter().map(|&p| if p { hi } else { lo }).collect();
        const MAX_ITER: usize = 100;
        const MIN_STEP: f64 = 1e-10;
        const SIGMA: f64 = 1e-12;
        const EPS: f64 = 1e-5;
        let mut a = 0.0;
        let mut b = ((prior0 + 1.0) / (prior1 + 1.0)).ln();
        let value = |a: f64, b: f64| -> f64 {
            scores
                .iter()
                .zip(&target)
                .map(|(&f, &t)| {
                    let fab = f * a + b;
                    if fab >= 0.0 {
                        t * fab + (-fab).exp().ln_1p()
                    } else {
                        (t - 1.0) * fab + fab.exp().ln_1p()
                    }
                })
                .sum()
        };
        let mut fval = value(a, b);
        for _ in 0..MAX_ITER {
            let (mut h11, mut h22, mut h21, mut g1, mut g2) = (SIGMA, SIGMA, 0.0, 0.0, 0.0);
            for (&f, &t) in scores.iter().zip(&target) {
                let fab = f * a + b;
                // p = 1/(1 + exp(fab)), q = 1 − p, both without overflow.
                let (p, q) = if fab >= 0.0 {
                    let e = (-fab).exp();
                    (e / (1.0 + e), 1.0 / (1.0 + e))
                } else {
                    let e = fab.exp();
                    (1.0 / (1.0 + e), e / (1.0 + e))
                };
                let d2 = p * q;
                h11 += f * f * d2;
                h22 += d2;
                h21 += f * d2;
                let d1 = t - p;
                g1 += f * d1;
                g2 += d1;
            }
            if g1.abs() < EPS && g2.abs() < EPS {
                break;
            }
            let det = h11 * h22 - h21 * h21;
            let da = -(h22 * g1 - h21 * g2) / det;
            let db = -(-h21 * g1 + h11 * g2) / det;
            let gd = g1 * da + g2 * db;
            let mut step = 1.0;
            while step >= MIN_STEP {
                let (na, nb) = (a + step * da, b + step * db);
                let nf = value(na, nb);
                if nf < fval + 1e-4 * step * gd {
                    a = na;
                    b = nb;
                    fval = nf;
                    break;
                }
                step /= 2.0;
            }
            if step < MIN_STEP {
                break; // line search failed: as close as floating point allows
            }
        }
        Ok(Self {
            slope: -a,
            offset: -b,
        })
    }

    /// Log-odds of closeness for `score`.
    #[must_use]
    pub fn log_odds(&self, score: f64) -> f64 {
        self.slope * score + self.offset
    }

    /// Closeness (0–1) for `score`.
    #[must_use]
    pub fn closeness(&self, score: f64) -> f64 {
        sigmoid(self.log_odds(score))
    }
}

/// The sigmoids of a model: one for two classes (class 1's score), one per class otherwise.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Calibration {
    /// Method name stored in files; always `"platt"`.
    pub(crate) method: String,
    pub(crate) sigmoids: Vec<PlattScaling>,
}

/// Method name written to model files.
pub const CALIBRATION_METHOD: &str = "platt";

impl Calibration {
    /// Number of sigmoids for `n_classes` classes.
    pub(crate) fn sigmoids_for(n_classes: usize) -> usize {
        if n_classes == 2 { 1 } else { n_classes }
    }

    /// Fits the sigmoids to row-major scores (`windows × classes`) and labels.
    ///
    /// # Errors
    /// As [`PlattScaling::fit`].
    pub fn fit(scores: &[f64], labels: &[usize], n_classes: usize) -> Result<Self, StyleError> {
        if scores.len() != labels.len() * n_classes {
            return Err(StyleError::LengthMismatch {
                what: "calibration scores",
                expected: labels.len() * n_classes,
                actual: scores.len(),
            });
        }
        let mut sigmoids = Vec::with_capacity(Self::sigmoids_for(n_classes));
        let mut column = Vec::with_capacity(labels.len());
        let mut positive = Vec::with_capacity(labels.len());
        for k in 0..Self::sigmoids_for(n_classes) {
            let class = if n_classes == 2 { 1 } else { k };
            column.clear();
            positive.clear();
            for (row, &label) in scores.chunks_exact(n_classes).zip(labels) {
                column.push(row[class]);
                positive.push(label == class);
            }
            sigmoids.push(PlattScaling::fit(&column, &positive)?);
        }
        Ok(Self {
            method: CALIBRATION_METHOD.to_owned(),
            sigmoids,
        })
    }

    /// The sigmoids.
    #[must_use]
    pub fn sigmoids(&self) -> &[PlattScaling] {
        &self.sigmoids
    }

    /// How class `class`'s closeness log-odds follow the scores: `(score class, slope,
    /// offset)` with `log-odds = slope · scores[score class] + offset`.
    pub(crate) fn log_odds_map(&self, n_classes: usize, class: usize) -> (usize, f64, f64) {
        if n_classes == 2 {
            let s = self.sigmoids[0];
            if class == 1 {
                (1, s.slope, s.offset)
            } else {
                (1, -s.slope, -s.offset)
            }
        } else {
            let s = self.sigmoids[class];
            (class, s.slope, s.offset)
        }
    }

    /// Closeness per class from one window's scores (no allocation).
    pub(crate) fn closeness_into(&self, scores: &[f64], out: &mut [f64]) {
        let n_classes = scores.len();
        for (class, o) in out.iter_mut().enumerate() {
            let (k, slope, offset) = self.log_odds_map(n_classes, class);
            *o = sigmoid(slope * scores[k] + offset);
        }
    }

    /// Checks the method, sizes and finiteness after reading a file.
    pub(crate) fn validate(&self, n_classes: usize) -> Result<(), ModelFileError> {
        if self.method != CALIBRATION_METHOD {
            return Err(ModelFileError::Invalid {
                reason: format!("unknown calibration method {:?}", self.method),
            });
        }
        if self.sigmoids.len() != Self::sigmoids_for(n_classes) {
            return Err(ModelFileError::Invalid {
                reason: format!(
                    "{} calibration sigmoids for {n_classes} classes",
                    self.sigmoids.len()
                ),
            });
        }
        if self
            .sigmoids
            .iter()
            .any(|s| !s.slope.is_finite() || !s.offset.is_finite())
        {
            return Err(ModelFileError::NonFinite {
                field: "calibration".into(),
            });
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::SmallRng;
    use rand::{Rng, SeedableRng};

    #[test]
    fn recovers_a_known_sigmoid() {
        // Labels drawn with P(1 | s) = σ(2s − 0.5): with 20 000 windows the maximum-likelihood
        // estimate is within a few hundredths (standard errors ≈ 0.03) of the truth; the
        // target smoothing moves it by O(1/n).
        let seed = 41;
        let mut rng = SmallRng::seed_from_u64(seed);
        let scores: Vec<f64> = (0..20_000).map(|_| rng.gen_range(-3.0..3.0)).collect();
        let positive: Vec<bool> = scores
            .iter()
            .map(|&s| rng.gen_range(0.0..1.0) < sigmoid(2.0 * s - 0.5))
            .collect();
        let p = PlattScaling::fit(&scores, &positive).expect("fit");
        assert!((p.slope - 2.0).abs() < 0.12, "seed {seed}: {p:?}");
        assert!((p.offset + 0.5).abs() < 0.1, "seed {seed}: {p:?}");
    }

    #[test]
    fn is_monotone_and_binary_complements_sum_to_one() {
        let scores = [-2.0, -1.0, -0.5, 0.2, 1.0, 3.0, 0.1, -0.1];
        let labels = [0, 0, 1, 0, 1, 1, 1, 0];
        let flat: Vec<f64> = scores.iter().flat_map(|&s| [-s, s]).collect();
        let cal = Calibration::fit(&flat, &labels, 2).expect("fit");
        assert_eq!(cal.sigmoids.len(), 1);
        assert!(cal.sigmoids[0].slope > 0.0, "scores rise with class 1");
        let mut out = [0.0; 2];
        cal.closeness_into(&[-0.7, 0.7], &mut out);
        assert!((out[0] + out[1] - 1.0).abs() < 1e-15);
        // All windows of one class: the smoothed targets keep the fit finite.
        let one_sided = PlattScaling::fit(&[0.1, 0.5, 0.9], &[false; 3]).expect("fit");
        assert!(one_sided.slope.is_finite() && one_sided.offset.is_finite());
        assert!(one_sided.closeness(0.5) < 0.5);
    }
}
