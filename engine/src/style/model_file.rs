//! The style model file: versioned JSON, strictly validated on reading.
//!
//! Layout (format version 1), one JSON object:
//!
//! | field | content |
//! |---|---|
//! | `format` | `"weft-style-model"` |
//! | `format_version` | `1` |
//! | `schema` | [`FeatureSchema`]: name, version, palette, feature names |
//! | `classes` | category names; labels and per-class arrays follow this order |
//! | `scaler` | `mean` and `scale` per feature (standardisation) |
//! | `class_means` | mean raw feature values per class (for reasons) |
//! | `params` | training settings ([`ModelParams`]) |
//! | `model` | `kind` and either `forest` (trees as parallel arrays) or `linear` (weights, intercepts) |
//! | `calibration` | `method: "platt"` and one `{slope, offset}` per sigmoid |
//! | `summary` | [`TrainingSummary`]: tracks, windows, CV figures, date, Weft version |
//!
//! Reading refuses: another `format`, another `format_version`, unknown fields, a schema other
//! than the caller's ([`ModelFileError::SchemaMismatch`]), non-finite numbers, inconsistent
//! sizes, malformed trees, and anything beyond the `MAX_*` limits below
//! ([`ModelFileError::Limit`]), checked before the content is trusted.

use super::calibration::Calibration;
use super::classifier::{Classifier, LinearModel, ModelKind, ModelParams};
use super::data::{FeatureSchema, check_names};
use super::errors::ModelFileError;
use super::forest::{ForestFile, ForestLimits, RandomForest};
use super::model::{StyleModel, TrainingSummary};
use super::scaling::Standardizer;
use serde::{Deserialize, Serialize};
use std::io::Read;
use std::path::Path;

/// The `format` field of every style model file.
pub const FORMAT: &str = "weft-style-model";
/// The file format version this build writes and reads.
pub const FORMAT_VERSION: u32 = 1;
/// Largest file read, bytes (a 200-tree forest on ~10 000 windows is tens of MB).
pub const MAX_FILE_BYTES: usize = 256 * 1024 * 1024;
/// Most features a model may read.
pub const MAX_FEATURES: usize = 4096;
/// Most classes a model may have.
pub const MAX_CLASSES: usize = 256;
/// Most trees in a forest.
pub const MAX_TREES: usize = 10_000;
/// Most nodes over all trees of a forest.
pub const MAX_NODES: usize = 20_000_000;
/// Longest name (feature, class, schema, palette), bytes.
pub const MAX_NAME_BYTES: usize = 256;

/// The file, version 1.
#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct FileV1 {
    format: String,
    format_version: u32,
    schema: FeatureSchema,
    classes: Vec<String>,
    scaler: Standardizer,
    class_means: Vec<Vec<f64>>,
    params: ModelParams,
    model: ModelSection,
    calibration: Calibration,
    summary: TrainingSummary,
}

/// The classifier: its kind and the matching section.
#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct ModelSection {
    kind: ModelKind,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    forest: Option<ForestFile>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    linear: Option<LinearModel>,
}

/// The fields read first, to give a clear message for another kind of file or version.
#[derive(Deserialize)]
struct Header {
    format: Option<String>,
    format_version: Option<u32>,
}

impl StyleModel {
    /// The model as JSON text.
    ///
    /// # Errors
    /// [`ModelFileError::Unsavable`] when a number is not finite (JSON cannot hold it).
    pub fn to_json(&self) -> Result<String, ModelFileError> {
        let (forest, linear) = match &self.classifier {
            Classifier::Forest(f) => (Some(f.to_file()), None),
            Classifier::LinearSvm(m) | Classifier::Logistic(m) => (None, Some(m.clone())),
        };
        let file = FileV1 {
            format: FORMAT.to_owned(),
            format_version: FORMAT_VERSION,
            schema: self.schema.clone(),
            classes: self.classes.clone(),
            scaler: self.scaler.clone(),
            class_means: self.class_means.clone(),
            params: self.params.clone(),
            model: ModelSection {
                kind: self.classifier.kind(),
                forest,
                linear,
            },
            calibration: self.calibration.clone(),
            summary: self.summary.clone(),
        };
        // Refuse what could not be read back (serde_json writes NaN as null).
        validate(&file).map_err(|e| ModelFileError::Unsavable {
            reason: e.to_string(),
        })?;
        serde_json::to_string(&file).map_err(|e| ModelFileError::Unsavable {
            reason: e.to_string(),
        })
    }

    /// Writes the model to `path` (through a temporary file renamed into place).
    ///
    /// # Errors
    /// [`ModelFileError::Io`] or [`ModelFileError::Unsavable`].
    pub fn save(&self, path: &Path) -> Result<(), ModelFileError> {
        let text = self.to_json()?;
        let mut tmp = path.as_os_str().to_owned();
        tmp.push(".tmp");
        let tmp = std::path::PathBuf::from(tmp);
        let io = |source| ModelFileError::Io {
            action: "write",
            path: path.to_path_buf(),
            source,
        };
        std::fs::write(&tmp, text).map_err(io)?;
        std::fs::rename(&tmp, path).map_err(io)
    }

    /// Reads a model from JSON text, validating everything (see the module documentation).
    ///
    /// # Errors
    /// [`ModelFileError`] naming what is wrong.
    pub fn from_json(text: &str) -> Result<Self, ModelFileError> {
        if text.len() > MAX_FILE_BYTES {
            return Err(ModelFileError::Limit {
                what: "style model file size (bytes)",
                limit: MAX_FILE_BYTES,
                actual: text.len(),
            });
        }
        let header: Header = serde_json::from_str(text)?;
        let format = header.format.unwrap_or_default();
        if format != FORMAT {
            return Err(ModelFileError::WrongFormat {
                found: format,
                expected: FORMAT,
            });
        }
        match header.format_version {
            Some(FORMAT_VERSION) => {}
            found => {
                return Err(ModelFileError::UnsupportedVersion {
                    found: found.unwrap_or(0),
                    supported: FORMAT_VERSION,
                });
            }
        }
        let file: FileV1 = serde_json::from_str(text)?;
        validate(&file)?;
        let n_features = file.schema.len();
        let n_classes = file.classes.len();
        let classifier = match (file.model.kind, file.model.forest, file.model.linear) {
            (ModelKind::Forest, Some(forest), None) => {
                if forest.n_features != n_features || forest.n_classes != n_classes {
                    return Err(ModelFileError::Invalid {
                        reason: format!(
                            "forest reads {} features and {} classes; the file declares {n_features} and {n_classes}",
                            forest.n_features, forest.n_classes
                        ),
                    });
                }
                Classifier::Forest(RandomForest::from_file(
                    forest,
                    &ForestLimits {
                        max_trees: MAX_TREES,
                        max_nodes: MAX_NODES,
                    },
                )?)
            }
            (kind @ (ModelKind::LinearSvm | ModelKind::Logistic), None, Some(linear)) => {
                linear.validate(n_features, n_classes)?;
                if kind == ModelKind::LinearSvm {
                    Classifier::LinearSvm(linear)
                } else {
                    Classifier::Logistic(linear)
                }
            }
            (kind, _, _) => {
                return Err(ModelFileError::Invalid {
                    reason: format!("model section of kind {kind} must hold exactly its own data"),
                });
            }
        };
        if file.params.kind() != classifier.kind() {
            return Err(ModelFileError::Invalid {
                reason: format!(
                    "settings are for a {} model, the model is a {}",
                    file.params.kind(),
                    classifier.kind()
                ),
            });
        }
        Ok(Self {
            schema: file.schema,
            classes: file.classes,
            scaler: file.scaler,
            class_means: file.class_means,
            params: file.params,
            classifier,
            calibration: file.calibration,
            summary: file.summary,
        })
    }

    /// Reads a model file (see [`StyleModel::from_json`]); callers that will feed it windows
    /// use [`StyleModel::load_for_schema`].
    ///
    /// # Errors
    /// [`ModelFileError::Io`], [`ModelFileError::Limit`] for a file larger than
    /// [`MAX_FILE_BYTES`], and the errors of [`StyleModel::from_json`].
    pub fn load(path: &Path) -> Result<Self, ModelFileError> {
        let io = |source| ModelFileError::Io {
            action: "read",
            path: path.to_path_buf(),
            source,
        };
        let file = std::fs::File::open(path).map_err(io)?;
        let size = file.metadata().map_err(io)?.len();
        if size > MAX_FILE_BYTES as u64 {
            return Err(ModelFileError::Limit {
                what: "style model file size (bytes)",
                limit: MAX_FILE_BYTES,
                actual: usize::try_from(size).unwrap_or(usize::MAX),
            });
        }
        let mut text = String::new();
        // The file may grow between the size check and the read: read one byte past the limit.
        file.take(MAX_FILE_BYTES as u64 + 1)
            .read_to_string(&mut text)
            .map_err(io)?;
        Self::from_json(&text)
    }

    /// Reads a model file and refuses it unless it was trained on `expected`'s features.
    ///
    /// # Errors
    /// As [`StyleModel::load`], and [`ModelFileError::SchemaMismatch`] naming both schemas.
    pub fn load_for_schema(path: &Path, expected: &FeatureSchema) -> Result<Self, ModelFileError> {
        let model = Self::load(path)?;
        model.check_schema(expected)?;
        Ok(model)
    }
}

/// Checks limits, sizes and finiteness of everything but the classifier's own arrays (checked
/// by [`RandomForest::from_file`] and [`LinearModel::validate`]).
fn validate(file: &FileV1) -> Result<(), ModelFileError> {
    let limit = |what, limit, actual| {
        if actual > limit {
            Err(ModelFileError::Limit {
                what,
                limit,
                actual,
            })
        } else {
            Ok(())
        }
    };
    let invalid = |reason: String| ModelFileError::Invalid { reason };
    let f = file.schema.len();
    let k = file.classes.len();
    limit("number of features", MAX_FEATURES, f)?;
    limit("number of classes", MAX_CLASSES, k)?;
    let longest = file
        .schema
        .features
        .iter()
        .chain(&file.classes)
        .chain([&file.schema.name, &file.schema.palette])
        .map(String::len)
        .max()
        .unwrap_or(0);
    limit("length of a name (bytes)", MAX_NAME_BYTES, longest)?;
    file.schema
        .validate()
        .map_err(|e| invalid(format!("schema: {e}")))?;
    if k < 2 {
        return Err(invalid(format!(
            "{k} classes; a style model needs at least 2"
        )));
    }
    check_names("class", &file.classes).map_err(|e| invalid(e.to_string()))?;
    if file.scaler.mean.len() != f || file.scaler.scale.len() != f {
        return Err(invalid(format!("scaler must have {f} means and scales")));
    }
    if file.scaler.mean.iter().any(|v| !v.is_finite()) {
        return Err(ModelFileError::NonFinite {
            field: "scaler mean".into(),
        });
    }
    if file
        .scaler
        .scale
        .iter()
        .any(|v| !(v.is_finite() && *v > 0.0))
    {
        return Err(invalid("scaler scales must be positive and finite".into()));
    }
    if file.class_means.len() != k || file.class_means.iter().any(|m| m.len() != f) {
        return Err(invalid(format!("class means must be {k} rows of {f}")));
    }
    if file.class_means.iter().flatten().any(|v| !v.is_finite()) {
        return Err(ModelFileError::NonFinite {
            field: "class means".into(),
        });
    }
    file.params
        .validate()
        .map_err(|e| invalid(format!("settings: {e}")))?;
    file.calibration.validate(k)?;
    let s = &file.summary;
    if s.tracks_per_class.len() != k || s.windows_per_class.len() != k {
        return Err(invalid(format!("training summary must count {k} classes")));
    }
    Ok(())
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;
    use crate::evaluation::{cross_validate, default_folds};
    use crate::style::{FeatureMatrix, ForestParams, LabelledWindows, StyleError};
    use rand::rngs::SmallRng;
    use rand::{Rng, SeedableRng};

    /// `classes` classes of 6 tracks × 4 windows over 5 features, with the class shifting
    /// the first two features.
    pub(crate) fn windows(seed: u64, classes: usize) -> LabelledWindows {
        let mut rng = SmallRng::seed_from_u64(seed);
        let f = 5;
        let (mut values, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
        for t in 0..6 * classes {
            let class = t % classes;
            for _ in 0..4 {
                for j in 0..f {
                    let shift = if j < 2 {
                        class as f64 * (1.0 + j as f64)
                    } else {
                        0.0
                    };
                    values.push(100.0 * j as f64 + shift + rng.gen_range(-0.8..0.8));
                }
                labels.push(class);
                tracks.push(t);
            }
        }
        LabelledWindows::new(
            FeatureSchema::new(
                "weft-window",
                1,
                "default v1",
                (0..f).map(|j| format!("feature_{j}")).collect(),
            )
            .expect("schema"),
            (0..classes).map(|c| format!("class {c}")).collect(),
            FeatureMatrix::new(f, values).expect("matrix"),
            labels,
            tracks,
            None,
        )
        .expect("windows")
    }

    pub(crate) fn trained(
        seed: u64,
        classes: usize,
        kind: ModelKind,
    ) -> (StyleModel, LabelledWindows) {
        let data = windows(seed, classes);
        let params = match ModelParams::default_for(kind, seed) {
            ModelParams::Forest(p) => ModelParams::Forest(ForestParams { n_trees: 20, ..p }),
            other => other,
        };
        let plan = default_folds(&data, 3).expect("folds");
        let cv = cross_validate(&data, &params, &plan, &mut |_, _| {}).expect("cv");
        (StyleModel::fit(&data, &cv).expect("fit"), data)
    }

    #[test]
    fn every_model_type_round_trips_with_identical_estimates() {
        let seed = 3;
        for classes in [2, 3] {
            for kind in ModelKind::ALL {
                let (model, data) = trained(seed, classes, kind);
                let json = model.to_json().expect("save");
                let back = StyleModel::from_json(&json).expect("load");
                assert_eq!(back, model, "{kind} {classes} classes");
                for i in 0..data.n_windows() {
                    let a = model.estimate(data.features().row(i), 0).expect("estimate");
                    let b = back.estimate(data.features().row(i), 0).expect("estimate");
                    assert_eq!(a, b, "{kind} {classes} classes, window {i}");
                }
                // And through a file.
                let path = std::env::temp_dir().join(format!(
                    "weft-style-roundtrip-{}-{kind}-{classes}.json",
                    std::process::id()
                ));
                model.save(&path).expect("save");
                let loaded = StyleModel::load_for_schema(&path, data.schema()).expect("load");
                let _ = std::fs::remove_file(&path);
                assert_eq!(loaded, model);
            }
        }
    }

    fn edit(json: &str, f: impl FnOnce(&mut serde_json::Value)) -> String {
        let mut v: serde_json::Value = serde_json::from_str(json).expect("json");
        f(&mut v);
        v.to_string()
    }

    #[test]
    fn refuses_wrong_format_version_and_schema() {
        let (model, data) = trained(5, 2, ModelKind::Logistic);
        let json = model.to_json().expect("save");
        let other_version = edit(&json, |v| v["format_version"] = 2.into());
        assert!(matches!(
            StyleModel::from_json(&other_version),
            Err(ModelFileError::UnsupportedVersion {
                found: 2,
                supported: 1
            })
        ));
        let other_format = edit(&json, |v| v["format"] = "weft-palette".into());
        assert!(matches!(
            StyleModel::from_json(&other_format),
            Err(ModelFileError::WrongFormat { .. })
        ));
        let unknown_field = edit(&json, |v| v["extra"] = 1.into());
        assert!(matches!(
            StyleModel::from_json(&unknown_field),
            Err(ModelFileError::Json { .. })
        ));

        let mut other = data.schema().clone();
        other.palette = "studio v2".into();
        let err = model.check_schema(&other).expect_err("another palette");
        let message = err.to_string();
        assert!(
            message.contains("palette \"default v1\"") && message.contains("palette \"studio v2\""),
            "{message}"
        );
        let mut renamed = data.schema().clone();
        renamed.features[3] = "centroid_hz_mean".into();
        let message = model
            .check_schema(&renamed)
            .expect_err("other feature")
            .to_string();
        assert!(
            message.contains("feature_3") && message.contains("centroid_hz_mean"),
            "{message}"
        );
    }

    #[test]
    fn refuses_inconsistent_or_non_finite_content() {
        let (model, _) = trained(6, 3, ModelKind::LinearSvm);
        let json = model.to_json().expect("save");
        let short_scale = edit(&json, |v| {
            v["scaler"]["scale"].as_array_mut().expect("array").pop();
        });
        assert!(matches!(
            StyleModel::from_json(&short_scale),
            Err(ModelFileError::Invalid { .. })
        ));
        let zero_scale = edit(&json, |v| v["scaler"]["scale"][0] = 0.0.into());
        assert!(matches!(
            StyleModel::from_json(&zero_scale),
            Err(ModelFileError::Invalid { .. })
        ));
        let null_weight = edit(&json, |v| {
            v["model"]["linear"]["weights"][0][0] = serde_json::Value::Null
        });
        assert!(StyleModel::from_json(&null_weight).is_err());
        let huge = json.replacen("\"offset\":", "\"offset\":1e999,\"x\":", 1);
        assert!(matches!(
            StyleModel::from_json(&huge),
            Err(ModelFileError::Json { .. })
        ));
        let wrong_kind = edit(&json, |v| v["model"]["kind"] = "forest".into());
        assert!(matches!(
            StyleModel::from_json(&wrong_kind),
            Err(ModelFileError::Invalid { .. })
        ));

        // A model with a non-finite number is not written (JSON cannot hold it).
        let mut broken = model.clone();
        broken.class_means[0][0] = f64::NAN;
        assert!(matches!(
            broken.to_json(),
            Err(ModelFileError::Unsavable { .. })
        ));
    }

    #[test]
    fn enforces_size_limits_on_hostile_files() {
        let (model, _) = trained(7, 2, ModelKind::Logistic);
        let json = model.to_json().expect("save");
        let many_features = edit(&json, |v| {
            v["schema"]["features"] = (0..MAX_FEATURES + 1).map(|i| format!("f{i}")).collect();
        });
        assert!(matches!(
            StyleModel::from_json(&many_features),
            Err(ModelFileError::Limit {
                what: "number of features",
                ..
            })
        ));
        let long_name = edit(&json, |v| {
            v["classes"][0] = "x".repeat(MAX_NAME_BYTES + 1).into()
        });
        assert!(matches!(
            StyleModel::from_json(&long_name),
            Err(ModelFileError::Limit { .. })
        ));
        let padded = format!("{json}{}", " ".repeat(MAX_FILE_BYTES));
        assert!(matches!(
            StyleModel::from_json(&padded),
            Err(ModelFileError::Limit {
                what: "style model file size (bytes)",
                ..
            })
        ));
    }

    #[test]
    fn fit_refuses_a_cross_validation_of_other_data() {
        let seed = 8;
        let (_, data) = trained(seed, 2, ModelKind::Logistic);
        let other = windows(seed, 3);
        let params = ModelParams::default_for(ModelKind::Logistic, seed);
        let cv = cross_validate(
            &other,
            &params,
            &default_folds(&other, 3).expect("folds"),
            &mut |_, _| {},
        )
        .expect("cv");
        assert!(matches!(
            StyleModel::fit(&data, &cv),
            Err(StyleError::CrossValidationMismatch { .. })
        ));
    }
}
