//! Style models: shallow classifiers over window features that say how close the music is to a
//! user's category (*closeness*, a calibrated probability) and why (*reasons*).
//!
//! Three model types, written here because the Rust ML crates measured in PLATFORM.md lack
//! probabilities, class weights or a working serialisation, or draw features per tree:
//! - [`forest`]: random forest as scikit-learn 1.9.1's `RandomForestClassifier` (200 trees by
//!   default, trained in parallel, deterministic for a seed);
//! - [`linear_svm`]: liblinear's L2-regularised squared-hinge SVM (`LinearSVC`), one-vs-rest;
//! - [`logistic`]: L2-regularised logistic regression (`LogisticRegression`'s objective),
//!   one-vs-rest.
//!
//! All read standardised features ([`scaling`]); closeness is a Platt sigmoid fitted on
//! cross-validated scores ([`calibration`]); reasons decompose the closeness's log-odds per
//! feature ([`reasons`]); [`model_file`] is the versioned, validated JSON file.
//!
//! # Workflow (what `weft style train`, `check` and the live readout do)
//!
//! ```
//! use weft_engine::evaluation::{self, DEFAULT_FOLDS};
//! use weft_engine::style::{
//!     Estimate, EstimateScratch, FeatureMatrix, FeatureSchema, LabelledWindows, ModelKind,
//!     ModelParams, StyleModel,
//! };
//!
//! # fn main() -> Result<(), Box<dyn std::error::Error>> {
//! // Window features from the `windows` module; here 2 invented features, 12 tracks of 3 windows.
//! let schema = FeatureSchema::new("example", 1, "", vec!["brightness".into(), "low_end".into()])?;
//! let (mut rows, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
//! for track in 0..12 {
//!     let class = track % 2; // 0 = dockside, 1 = rest
//!     for w in 0..3 {
//!         let jitter = (track * 3 + w) as f64 * 0.01;
//!         rows.push(vec![class as f64 + jitter, 1.0 - class as f64 + jitter]);
//!         labels.push(class);
//!         tracks.push(track);
//!     }
//! }
//! let data = LabelledWindows::new(
//!     schema.clone(),
//!     vec!["dockside".into(), "rest".into()],
//!     FeatureMatrix::from_rows(&rows)?,
//!     labels,
//!     tracks,
//!     None, // or Some(group per window): artist or album
//! )?;
//!
//! // Cross-validate (grouped by track here; by group when groups are given) …
//! let plan = evaluation::default_folds(&data, 4.min(DEFAULT_FOLDS))?;
//! let params = ModelParams::default_for(ModelKind::Logistic, 7);
//! let cv = evaluation::cross_validate(&data, &params, &plan, &mut |_done, _total| {})?;
//! println!("balanced error {:.3} ± {:.3}", cv.figures.window_balanced_error.mean,
//!          cv.figures.window_balanced_error.sd);
//!
//! // … fit on everything, calibrated on the cross-validated scores, and save.
//! let model = StyleModel::fit(&data, &cv)?;
//! let json = model.to_json()?; // or model.save(path)
//!
//! // Live: load once (refusing another schema), then estimate each window without allocating.
//! let model = StyleModel::from_json(&json)?;
//! model.check_schema(&schema)?; // StyleModel::load_for_schema does both from a path
//! let dockside = model.class_index("dockside").ok_or("no such category")?;
//! let mut scratch = EstimateScratch::new(&model);
//! let mut estimate = Estimate::new(&model, 3);
//! model.estimate_into(&[0.1, 0.9], dockside, &mut scratch, &mut estimate)?;
//! assert!(estimate.closeness()[dockside] > 0.5);
//! for reason in estimate.reasons() {
//!     let _ = (model.feature_name(reason.feature), reason.push(), reason.relation_to_category());
//! }
//! # Ok(())
//! # }
//! ```

pub mod calibration;
pub mod classifier;
pub mod data;
pub mod errors;
pub mod forest;
pub mod linear_svm;
pub mod logistic;
pub mod model;
pub mod model_file;
pub mod reasons;
pub mod scaling;

pub use calibration::{Calibration, PlattScaling};
pub use classifier::{ClassWeight, LinearModel, ModelKind, ModelParams};
pub(crate) use classifier::{Classifier, argmax};
pub use data::{FeatureMatrix, FeatureSchema, LabelledWindows};
pub use errors::{EstimateError, ModelFileError, StyleError};
pub use forest::{ForestParams, MaxFeatures, RandomForest};
pub use linear_svm::SvmParams;
pub use logistic::LogisticParams;
pub use model::{Estimate, EstimateScratch, StyleModel, TrackEstimate, TrainingSummary};
pub use reasons::{DEFAULT_REASONS, MAX_REASONS, Push, Reason, Relation};
pub use scaling::Standardizer;
