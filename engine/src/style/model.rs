//! The trained style model: schema, scaling, classifier, calibration and training summary, and
//! the estimate of one window (closeness per class and reasons).

use super::calibration::Calibration;
use super::classifier::{Classifier, ModelKind, ModelParams, argmax};
use super::data::{FeatureMatrix, FeatureSchema, LabelledWindows};
use super::errors::{EstimateError, ModelFileError, StyleError};
use super::reasons::{DEFAULT_REASONS, MAX_REASONS, Reason, select_top};
use super::scaling::Standardizer;
use crate::evaluation::{CrossValidation, CvFigures};
use serde::{Deserialize, Serialize};

/// What a style model records about its training.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct TrainingSummary {
    /// Tracks trained on.
    pub tracks: usize,
    /// Windows trained on.
    pub windows: usize,
    /// Tracks per class, in class order.
    pub tracks_per_class: Vec<usize>,
    /// Windows per class, in class order.
    pub windows_per_class: Vec<usize>,
    /// Cross-validation figures of these settings on these windows.
    pub cv: CvFigures,
    /// When the model was trained, UTC, ISO 8601 (`2025-01-31T12:00:00Z`).
    pub trained_utc: String,
    /// Version of Weft that trained it.
    pub weft_version: String,
}

/// A trained style model (see the module documentation of [`crate::style`] for the workflow).
#[derive(Debug, Clone, PartialEq)]
pub struct StyleModel {
    pub(crate) schema: FeatureSchema,
    pub(crate) classes: Vec<String>,
    pub(crate) scaler: Standardizer,
    /// Mean raw feature values per class, `classes × features`.
    pub(crate) class_means: Vec<Vec<f64>>,
    pub(crate) params: ModelParams,
    pub(crate) classifier: Classifier,
    pub(crate) calibration: Calibration,
    pub(crate) summary: TrainingSummary,
}

impl StyleModel {
    /// Fits the final model on all windows of `data`, with the settings of `cv`, and calibrates
    /// its closeness with Platt sigmoids fitted on `cv`'s cross-validated scores.
    ///
    /// `cv` must come from [`crate::evaluation::cross_validate`] on the same `data`.
    ///
    /// # Errors
    /// [`StyleError::CrossValidationMismatch`] when `cv` belongs to other data, and training
    /// errors.
    pub fn fit(data: &LabelledWindows, cv: &CrossValidation) -> Result<Self, StyleError> {
        let k = data.classes().len();
        if cv.classes != data.classes() || cv.oof_scores.len() != data.n_windows() * k {
            return Err(StyleError::CrossValidationMismatch {
                reason: format!(
                    "it covers {} scores of classes {:?}; the data has {} windows of classes {:?}",
                    cv.oof_scores.len(),
                    cv.classes,
                    data.n_windows(),
                    data.classes()
                ),
            });
        }
        let scaler = Standardizer::fit(data.features());
        let z = scaler.transform(data.features());
        let classifier = Classifier::fit(&cv.params, &z, data.labels(), k)?;
        let calibration = Calibration::fit(&cv.oof_scores, data.labels(), k)?;
        Ok(Self {
            schema: data.schema().clone(),
            classes: data.classes().to_vec(),
            scaler,
            class_means: data.class_means(),
            params: cv.params.clone(),
            classifier,
            calibration,
            summary: TrainingSummary {
                tracks: data.n_tracks(),
                windows: data.n_windows(),
                tracks_per_class: data.tracks_per_class(),
                windows_per_class: data.windows_per_class(),
                cv: cv.figures.clone(),
                trained_utc: utc_now_iso8601(),
                weft_version: env!("CARGO_PKG_VERSION").to_owned(),
            },
        })
    }

    /// The feature schema the model reads.
    #[must_use]
    pub fn schema(&self) -> &FeatureSchema {
        &self.schema
    }

    /// Refuses a caller whose windows follow another schema or palette.
    ///
    /// # Errors
    /// [`ModelFileError::SchemaMismatch`] naming both schemas.
    pub fn check_schema(&self, expected: &FeatureSchema) -> Result<(), ModelFileError> {
        if &self.schema == expected {
            Ok(())
        } else {
            let mut model_schema = self.schema.describe();
            let mut expected_schema = expected.describe();
            if model_schema == expected_schema {
                // Same name, version and palette: say which feature differs.
                if let Some((a, b)) = self
                    .schema
                    .features
                    .iter()
                    .zip(&expected.features)
                    .find(|(a, b)| a != b)
                {
                    model_schema.push_str(&format!(" (has {a:?})"));
                    expected_schema.push_str(&format!(" (has {b:?})"));
                }
            }
            Err(ModelFileError::SchemaMismatch {
                model_schema,
                expected_schema,
            })
        }
    }

    /// Class (category) names.
    #[must_use]
    pub fn classes(&self) -> &[String] {
        &self.classes
    }

    /// Index of a class by name.
    #[must_use]
    pub fn class_index(&self, name: &str) -> Option<usize> {
        self.classes.iter().position(|c| c == name)
    }

    /// The model type.
    #[must_use]
    pub fn kind(&self) -> ModelKind {
        self.classifier.kind()
    }

    /// The training settings.
    #[must_use]
    pub fn params(&self) -> &ModelParams {
        &self.params
    }

    /// The training summary (sizes, cross-validation figures, date, version).
    #[must_use]
    pub fn summary(&self) -> &TrainingSummary {
        &self.summary
    }

    /// The standardisation learned from the training windows.
    #[must_use]
    pub fn scaler(&self) -> &Standardizer {
        &self.scaler
    }

    /// The closeness calibration.
    #[must_use]
    pub fn calibration(&self) -> &Calibration {
        &self.calibration
    }

    /// Name of feature `index` (for reasons), or `"?"` out of range.
    #[must_use]
    pub fn feature_name(&self, index: usize) -> &str {
        self.schema.features.get(index).map_or("?", String::as_str)
    }

    /// Mean raw value of each feature over class `class`'s training windows.
    #[must_use]
    pub fn class_mean(&self, class: usize) -> Option<&[f64]> {
        self.class_means.get(class).map(Vec::as_slice)
    }

    /// Number of features.
    #[must_use]
    pub fn n_features(&self) -> usize {
        self.schema.len()
    }

    /// Number of classes.
    #[must_use]
    pub fn n_classes(&self) -> usize {
        self.classes.len()
    }

    /// Decision scores of standardised rows (allocates; used by evaluation).
    pub(crate) fn scores_of(&self, windows: &FeatureMatrix) -> Vec<f64> {
        self.classifier
            .scores(&self.scaler.transform(windows), self.classes.len())
    }

    /// Estimates one window with [`DEFAULT_REASONS`] reasons for class `reasons_for`
    /// (allocates; live code uses [`StyleModel::estimate_into`]).
    ///
    /// # Errors
    /// [`EstimateError`] for a window of the wrong length, a non-finite value or an unknown
    /// class.
    pub fn estimate(&self, window: &[f64], reasons_for: usize) -> Result<Estimate, EstimateError> {
        let mut scratch = EstimateScratch::new(self);
        let mut out = Estimate::new(self, DEFAULT_REASONS);
        self.estimate_into(window, reasons_for, &mut scratch, &mut out)?;
        Ok(out)
    }

    /// Estimates one window into `out` without allocating: closeness to every class, the
    /// model's decision, and `out`'s number of reasons for class `reasons_for`.
    ///
    /// `scratch` and `out` must be made for this model ([`EstimateScratch::new`],
    /// [`Estimate::new`]). Cost: one walk down each tree (or one dot product per class), the
    /// reasons' decomposition gathered on the way.
    ///
    /// # Errors
    /// [`EstimateError`] for a window of the wrong length, a non-finite value, an unknown class
    /// or scratch made for another model.
    pub fn estimate_into(
        &self,
        window: &[f64],
        reasons_for: usize,
        scratch: &mut EstimateScratch,
        out: &mut Estimate,
    ) -> Result<(), EstimateError> {
        let f = self.n_features();
        let k = self.n_classes();
        if window.len() != f {
            return Err(EstimateError::WrongFeatureCount {
                expected: f,
                actual: window.len(),
            });
        }
        if let Some(feature) = window.iter().position(|v| !v.is_finite()) {
            return Err(EstimateError::NonFinite {
                feature,
                value: window[feature],
            });
        }
        if reasons_for >= k {
            return Err(EstimateError::NoSuchClass {
                class: reasons_for,
                classes: k,
            });
        }
        if scratch.z.len() != f || out.closeness.len() != k || scratch.classes != k {
            return Err(EstimateError::WrongScratch {
                made_for: scratch.z.len() + out.closeness.len(),
                model: f + k,
            });
        }
        self.scaler.transform_row_into(window, &mut scratch.z);
        let (score_class, slope, offset) = self.calibration.log_odds_map(k, reasons_for);
        let bias = self.classifier.scores_with_contributions_into(
            &scratch.z,
            &mut scratch.z32,
            score_class,
            &mut out.scores,
            &mut scratch.push,
        );
        self.calibration
            .closeness_into(&out.scores, &mut out.closeness);
        out.predicted = argmax(&out.scores);
        for p in &mut scratch.push {
            *p *= slope;
        }
        out.base_log_odds = slope * bias + offset;
        out.reasons_for = reasons_for;
        select_top(
            &scratch.push,
            out.reason_count,
            window,
            &self.class_means[reasons_for],
            &self.scaler.mean,
            &mut out.reasons,
        );
        Ok(())
    }

    /// Estimates a whole track: closeness per class is the mean of its windows' closeness; the
    /// decision is the class with the highest mean score (soft voting), as in cross-validation.
    ///
    /// # Errors
    /// As [`StyleModel::estimate_into`]; [`EstimateError::WrongFeatureCount`] with `actual = 0`
    /// for a track without windows.
    pub fn estimate_track(&self, windows: &FeatureMatrix) -> Result<TrackEstimate, EstimateError> {
        let k = self.n_classes();
        if windows.n_rows() == 0 || windows.n_features() != self.n_features() {
            return Err(EstimateError::WrongFeatureCount {
                expected: self.n_features(),
                actual: if windows.n_rows() == 0 {
                    0
                } else {
                    windows.n_features()
                },
            });
        }
        let mut scratch = EstimateScratch::new(self);
        let mut one = Estimate::new(self, 0);
        let mut closeness = vec![0.0; k];
        let mut scores = vec![0.0; k];
        for i in 0..windows.n_rows() {
            self.estimate_into(windows.row(i), 0, &mut scratch, &mut one)?;
            for (c, v) in closeness.iter_mut().zip(&one.closeness) {
                *c += v;
            }
            for (s, v) in scores.iter_mut().zip(&one.scores) {
                *s += v;
            }
        }
        let n = windows.n_rows() as f64;
        for c in &mut closeness {
            *c /= n;
        }
        Ok(TrackEstimate {
            predicted: argmax(&scores),
            closeness,
            windows: windows.n_rows(),
        })
    }
}

/// Buffers for [`StyleModel::estimate_into`], made once per model.
#[derive(Debug, Clone)]
pub struct EstimateScratch {
    z: Vec<f64>,
    z32: Vec<f32>,
    push: Vec<f64>,
    classes: usize,
}

impl EstimateScratch {
    /// Buffers sized for `model` (allocates).
    #[must_use]
    pub fn new(model: &StyleModel) -> Self {
        let f = model.n_features();
        Self {
            z: vec![0.0; f],
            z32: vec![0.0; f],
            push: vec![0.0; f],
            classes: model.n_classes(),
        }
    }
}

/// The estimate of one window.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    closeness: Vec<f64>,
    scores: Vec<f64>,
    predicted: usize,
    reasons_for: usize,
    base_log_odds: f64,
    reason_count: usize,
    reasons: Vec<Reason>,
}

impl Estimate {
    /// An empty estimate for `model` holding up to `reasons` reasons (capped at
    /// [`MAX_REASONS`]; allocates once).
    #[must_use]
    pub fn new(model: &StyleModel, reasons: usize) -> Self {
        let k = model.n_classes();
        Self {
            closeness: vec![0.0; k],
            scores: vec![0.0; k],
            predicted: 0,
            reasons_for: 0,
            base_log_odds: 0.0,
            reason_count: reasons.min(MAX_REASONS),
            reasons: Vec::with_capacity(MAX_REASONS),
        }
    }

    /// Closeness to each class, 0–1 (calibrated probability; with more than two classes each
    /// is its own one-vs-rest probability and they need not sum to 1).
    #[must_use]
    pub fn closeness(&self) -> &[f64] {
        &self.closeness
    }

    /// The model's decision scores per class (probability for the forest, margin or log-odds
    /// for the linear models).
    #[must_use]
    pub fn scores(&self) -> &[f64] {
        &self.scores
    }

    /// The class the model decides for (highest score), as evaluated in cross-validation.
    #[must_use]
    pub fn predicted(&self) -> usize {
        self.predicted
    }

    /// The class the reasons explain.
    #[must_use]
    pub fn reasons_for(&self) -> usize {
        self.reasons_for
    }

    /// Log-odds of closeness to [`Estimate::reasons_for`] at the reference point (the training
    /// mean for linear models, the mean root fraction for the forest):
    /// `base + Σ all pushes = log-odds of the closeness`.
    #[must_use]
    pub fn base_log_odds(&self) -> f64 {
        self.base_log_odds
    }

    /// The features that move the closeness most, largest `|push|` first.
    #[must_use]
    pub fn reasons(&self) -> &[Reason] {
        &self.reasons
    }
}

/// The estimate of a whole track.
#[derive(Debug, Clone, PartialEq)]
pub struct TrackEstimate {
    /// Mean closeness of the track's windows per class, 0–1.
    pub closeness: Vec<f64>,
    /// Class with the highest mean score.
    pub predicted: usize,
    /// Number of windows.
    pub windows: usize,
}

/// Now as `YYYY-MM-DDThh:mm:ssZ`, from the system clock (1970 if the clock is earlier).
fn utc_now_iso8601() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map_or(0, |d| d.as_secs());
    iso8601_from_unix(secs)
}

/// Unix seconds as an ISO 8601 UTC time. Days to civil date by Howard Hinnant's
/// `civil_from_days` ("chrono-Compatible Low-Level Date Algorithms", 2013).
pub(crate) fn iso8601_from_unix(secs: u64) -> String {
    let days = secs / 86_400;
    let rem = secs % 86_400;
    let z = days as i64 + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn iso_dates_match_known_instants() {
        // Known instants (from the POSIX definition of the epoch and a leap day).
        assert_eq!(iso8601_from_unix(0), "1970-01-01T00:00:00Z");
        assert_eq!(iso8601_from_unix(951_782_400), "2000-02-29T00:00:00Z");
        assert_eq!(iso8601_from_unix(1_700_000_000), "2023-11-14T22:13:20Z");
    }
}

#[cfg(test)]
mod estimate_tests {
    use super::*;
    use crate::style::model_file::tests::trained;
    use crate::style::{Push, Relation};

    #[test]
    fn reasons_decompose_the_closeness_log_odds_exactly() {
        let seed = 11;
        for classes in [2, 3] {
            for kind in ModelKind::ALL {
                let (model, data) = trained(seed, classes, kind);
                let mut scratch = EstimateScratch::new(&model);
                let mut full = Estimate::new(&model, MAX_REASONS);
                for i in (0..data.n_windows()).step_by(5) {
                    for class in 0..classes {
                        model
                            .estimate_into(data.features().row(i), class, &mut scratch, &mut full)
                            .expect("estimate");
                        // With as many reasons as features, base + Σ push = log-odds exactly.
                        let p = full.closeness()[class];
                        let log_odds = (p / (1.0 - p)).ln();
                        let total: f64 = full.base_log_odds()
                            + full.reasons().iter().map(|r| r.push_log_odds).sum::<f64>();
                        assert!(
                            (total - log_odds).abs() < 1e-6 * log_odds.abs().max(1.0),
                            "{kind}, {classes} classes, window {i}, class {class}: {total} vs {log_odds}"
                        );
                        assert!(
                            full.reasons()
                                .windows(2)
                                .all(|w| w[0].push_log_odds.abs() >= w[1].push_log_odds.abs())
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn the_shifted_features_are_the_reasons() {
        // Class 1 differs from class 0 in features 0 and 1 only: for a typical class-1 window
        // of a linear model, both raise its closeness to class 1 and lie above class 0's mean.
        let seed = 12;
        let (model, _) = trained(seed, 2, ModelKind::Logistic);
        let mut window: Vec<f64> = model.class_mean(1).expect("class").to_vec();
        window[0] += 0.5;
        let e = model.estimate(&window, 1).expect("estimate");
        let top: Vec<usize> = e.reasons().iter().take(2).map(|r| r.feature).collect();
        assert!(
            top.contains(&0) && top.contains(&1),
            "seed {seed}: {:?}",
            e.reasons()
        );
        assert!(e.reasons()[..2].iter().all(|r| r.push() == Push::Raises));
        for r in &e.reasons()[..2] {
            let expected = if r.feature == 0 {
                Relation::Above
            } else {
                Relation::Level
            };
            assert_eq!(r.relation_to_category(), expected, "feature {}", r.feature);
        }
        assert!(e.closeness()[1] > 0.9, "seed {seed}: {:?}", e.closeness());
        assert!((e.closeness()[0] + e.closeness()[1] - 1.0).abs() < 1e-12);
        assert_eq!(
            model.feature_name(e.reasons()[0].feature),
            format!("feature_{}", e.reasons()[0].feature)
        );
    }

    #[test]
    fn estimating_a_window_does_not_allocate() {
        let seed = 13;
        for kind in ModelKind::ALL {
            let (model, data) = trained(seed, 3, kind);
            let mut scratch = EstimateScratch::new(&model);
            let mut out = Estimate::new(&model, 3);
            let window = data.features().row(4).to_vec();
            assert_no_alloc::assert_no_alloc(|| {
                for class in 0..3 {
                    model
                        .estimate_into(&window, class, &mut scratch, &mut out)
                        .expect("estimate");
                }
            });
            assert_eq!(out.reasons().len(), 3);
        }
    }

    #[test]
    fn refuses_bad_windows() {
        let (model, data) = trained(14, 2, ModelKind::LinearSvm);
        assert!(matches!(
            model.estimate(&[1.0], 0),
            Err(EstimateError::WrongFeatureCount {
                expected: 5,
                actual: 1
            })
        ));
        let mut w = data.features().row(0).to_vec();
        w[2] = f64::INFINITY;
        assert!(matches!(
            model.estimate(&w, 0),
            Err(EstimateError::NonFinite { feature: 2, .. })
        ));
        assert!(matches!(
            model.estimate(data.features().row(0), 2),
            Err(EstimateError::NoSuchClass {
                class: 2,
                classes: 2
            })
        ));
        let track = model
            .estimate_track(&data.features().select_rows(&[0, 1, 2, 3]))
            .expect("track");
        assert_eq!(track.windows, 4);
        assert_eq!(track.predicted, data.labels()[0]);
    }
}
