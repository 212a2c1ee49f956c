//! Errors of the style models, one enum per concern: bad training data or settings
//! ([`StyleError`]), a window that cannot be estimated ([`EstimateError`]) and a style model file
//! that cannot be read, written or trusted ([`ModelFileError`]).

use std::path::PathBuf;
use thiserror::Error;

/// Training data or model settings that cannot produce a model.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum StyleError {
    /// There is nothing to train on.
    #[error("no {what} given")]
    Empty {
        /// What is missing ("windows", "features", "classes", …).
        what: &'static str,
    },
    /// Two inputs that must have the same length do not.
    #[error("{what}: expected {expected} values, got {actual}")]
    LengthMismatch {
        /// Which input is the wrong length.
        what: &'static str,
        /// Required length.
        expected: usize,
        /// Given length.
        actual: usize,
    },
    /// A feature value is NaN or infinite.
    #[error("feature {feature} of window {window} is not a finite number ({value})")]
    NonFinite {
        /// Window (row) index.
        window: usize,
        /// Feature (column) index.
        feature: usize,
        /// The offending value.
        value: f64,
    },
    /// A label names no class.
    #[error("window {window} has label {label}, but there are only {classes} classes")]
    LabelOutOfRange {
        /// Window index.
        window: usize,
        /// The label given.
        label: usize,
        /// Number of classes.
        classes: usize,
    },
    /// Fewer than two classes, or a class without any window.
    #[error("class {class:?} has no windows; every class needs at least one")]
    EmptyClass {
        /// Name of the empty class.
        class: String,
    },
    /// A model needs at least two classes.
    #[error("a style model needs at least 2 classes, got {classes}")]
    TooFewClasses {
        /// Number of classes given.
        classes: usize,
    },
    /// The windows of one track carry different labels or groups.
    #[error("track {track} mixes {what}: windows {first_window} and {other_window} differ")]
    InconsistentTrack {
        /// Track id.
        track: usize,
        /// "labels" or "groups".
        what: &'static str,
        /// First window of the track.
        first_window: usize,
        /// A window that disagrees with it.
        other_window: usize,
    },
    /// Two feature or class names are the same, or a name is empty.
    #[error("{what} name {name:?} is empty or used twice")]
    BadName {
        /// "feature" or "class".
        what: &'static str,
        /// The offending name.
        name: String,
    },
    /// A setting is out of its range.
    #[error("setting {name} = {value} is invalid: {reason}")]
    InvalidSetting {
        /// Setting name.
        name: &'static str,
        /// The value given, printed.
        value: String,
        /// The rule it breaks.
        reason: &'static str,
    },
    /// A cross-validation result handed to [`crate::style::StyleModel::fit`] does not belong to
    /// the data or the settings.
    #[error("the cross-validation does not match the training: {reason}")]
    CrossValidationMismatch {
        /// What differs.
        reason: String,
    },
}

/// A window that cannot be estimated by a style model.
#[derive(Debug, Error, Clone, Copy, PartialEq)]
pub enum EstimateError {
    /// The window has the wrong number of features for the model's schema.
    #[error("the window has {actual} features, the style model expects {expected}")]
    WrongFeatureCount {
        /// Features in the model's schema.
        expected: usize,
        /// Features given.
        actual: usize,
    },
    /// A feature value is NaN or infinite.
    #[error("feature {feature} of the window is not a finite number ({value})")]
    NonFinite {
        /// Feature index.
        feature: usize,
        /// The offending value.
        value: f64,
    },
    /// The class asked for reasons does not exist.
    #[error("class {class} does not exist: the model has {classes} classes")]
    NoSuchClass {
        /// Class index asked for.
        class: usize,
        /// Number of classes.
        classes: usize,
    },
    /// The scratch space or output was made for a different model.
    #[error(
        "scratch or estimate was made for a model with {made_for} features and classes, not {model}"
    )]
    WrongScratch {
        /// Features + classes the scratch was made for.
        made_for: usize,
        /// Features + classes of this model.
        model: usize,
    },
}

/// A style model file that cannot be written, read or trusted.
#[derive(Debug, Error)]
pub enum ModelFileError {
    /// Reading or writing the file failed.
    #[error("cannot {action} style model file {path}")]
    Io {
        /// "read" or "write".
        action: &'static str,
        /// The file.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// The text is not valid JSON or does not have the expected structure.
    #[error("style model file is not valid: {source}")]
    Json {
        /// The cause, with line and column.
        #[from]
        source: serde_json::Error,
    },
    /// The file is some other kind of JSON.
    #[error("not a Weft style model file (format {found:?}, expected {expected:?})")]
    WrongFormat {
        /// The `format` field found.
        found: String,
        /// The `format` field expected.
        expected: &'static str,
    },
    /// The file was written by a newer or older, incompatible Weft.
    #[error(
        "style model file format version {found} is not supported (this Weft reads version {supported})"
    )]
    UnsupportedVersion {
        /// Version in the file.
        found: u32,
        /// Version this build reads.
        supported: u32,
    },
    /// The model was trained on other window features (another schema or palette).
    #[error(
        "style model was trained on features {model_schema}, but this analysis produces {expected_schema}; retrain the style model with this palette and schema"
    )]
    SchemaMismatch {
        /// Schema the model was trained on, described.
        model_schema: String,
        /// Schema the caller produces, described.
        expected_schema: String,
    },
    /// A number that must be finite is not.
    #[error("{field} holds a non-finite number")]
    NonFinite {
        /// Where.
        field: String,
    },
    /// A size exceeds what a style model may have (protection against hostile files).
    #[error("{what} is {actual}, more than the limit of {limit}")]
    Limit {
        /// What is too large.
        what: &'static str,
        /// The limit.
        limit: usize,
        /// The size found.
        actual: usize,
    },
    /// The content is inconsistent (sizes disagree, a tree is malformed, …).
    #[error("style model file is inconsistent: {reason}")]
    Invalid {
        /// What is wrong.
        reason: String,
    },
    /// The model's own data cannot be written (for example it holds a non-finite number).
    #[error("style model cannot be saved: {reason}")]
    Unsavable {
        /// Why.
        reason: String,
    },
}
