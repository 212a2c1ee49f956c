//! Training data: the feature schema, a dense feature matrix and labelled windows grouped by track.

use super::errors::StyleError;
use rand::SeedableRng;
use rand::rngs::SmallRng;
use rand::seq::SliceRandom;
use serde::{Deserialize, Serialize};
use std::collections::{BTreeMap, HashSet};

/// The named, versioned list of window features a style model reads.
///
/// Written by whoever builds the window features (the `windows` module) and stored in every style
/// model file: a model is refused when the caller's schema differs in any field (see
/// [`crate::style::StyleModel::check_schema`]).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FeatureSchema {
    /// Name of the feature layout, e.g. `"weft-window"`.
    pub name: String,
    /// Version of the feature layout; bump it whenever a feature's meaning changes.
    pub version: u32,
    /// Identity of the palette the family-share features come from (name and version), empty
    /// when the schema has no share features. Models trained with another palette are refused.
    pub palette: String,
    /// One name per feature, in column order (e.g. `"share_driven_guitar_mean"`,
    /// `"centroid_hz_sd"`). The reasons report these names.
    pub features: Vec<String>,
}

impl FeatureSchema {
    /// A schema with unique, non-empty feature names.
    ///
    /// # Errors
    /// [`StyleError::Empty`] without features, [`StyleError::BadName`] for an empty or repeated
    /// name.
    pub fn new(
        name: impl Into<String>,
        version: u32,
        palette: impl Into<String>,
        features: Vec<String>,
    ) -> Result<Self, StyleError> {
        let schema = Self {
            name: name.into(),
            version,
            palette: palette.into(),
            features,
        };
        schema.validate()?;
        Ok(schema)
    }

    /// Checks the rules of [`FeatureSchema::new`] (used after deserialising).
    ///
    /// # Errors
    /// As [`FeatureSchema::new`].
    pub fn validate(&self) -> Result<(), StyleError> {
        if self.features.is_empty() {
            return Err(StyleError::Empty { what: "features" });
        }
        check_names("feature", &self.features)
    }

    /// Number of features.
    #[must_use]
    pub fn len(&self) -> usize {
        self.features.len()
    }

    /// Whether the schema has no features (never true for a validated schema).
    #[must_use]
    pub fn is_empty(&self) -> bool {
        self.features.is_empty()
    }

    /// A one-line description for messages: `weft-window v1, palette "default v1", 80 features`.
    #[must_use]
    pub fn describe(&self) -> String {
        let palette = if self.palette.is_empty() {
            "no palette".to_owned()
        } else {
            format!("palette {:?}", self.palette)
        };
        format!(
            "{} v{}, {}, {} features",
            self.name,
            self.version,
            palette,
            self.features.len()
        )
    }
}

/// Checks that names are non-empty and unique.
pub(crate) fn check_names(what: &'static str, names: &[String]) -> Result<(), StyleError> {
    let mut seen = HashSet::with_capacity(names.len());
    for name in names {
        if name.trim().is_empty() || !seen.insert(name.as_str()) {
            return Err(StyleError::BadName {
                what,
                name: name.clone(),
            });
        }
    }
    Ok(())
}

/// A dense matrix of window features, one row per window, stored row-major.
#[derive(Debug, Clone, PartialEq)]
pub struct FeatureMatrix {
    n_features: usize,
    values: Vec<f64>,
}

impl FeatureMatrix {
    /// A matrix from row-major values with `n_features` columns.
    ///
    /// # Errors
    /// [`StyleError::Empty`] for zero columns, [`StyleError::LengthMismatch`] when the values do
    /// not fill whole rows, [`StyleError::NonFinite`] for NaN or infinity.
    pub fn new(n_features: usize, values: Vec<f64>) -> Result<Self, StyleError> {
        if n_features == 0 {
            return Err(StyleError::Empty { what: "features" });
        }
        if !values.len().is_multiple_of(n_features) {
            return Err(StyleError::LengthMismatch {
                what: "feature values (whole rows)",
                expected: values.len() / n_features * n_features + n_features,
                actual: values.len(),
            });
        }
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            return Err(StyleError::NonFinite {
                window: i / n_features,
                feature: i % n_features,
                value: values[i],
            });
        }
        Ok(Self { n_features, values })
    }

    /// A matrix from rows of equal length.
    ///
    /// # Errors
    /// As [`FeatureMatrix::new`], and [`StyleError::LengthMismatch`] for a row of another length.
    pub fn from_rows<R: AsRef<[f64]>>(rows: &[R]) -> Result<Self, StyleError> {
        let n_features = rows.first().map_or(0, |r| r.as_ref().len());
        let mut values = Vec::with_capacity(n_features * rows.len());
        for row in rows {
            let row = row.as_ref();
            if row.len() != n_features {
                return Err(StyleError::LengthMismatch {
                    what: "feature row",
                    expected: n_features,
                    actual: row.len(),
                });
            }
            values.extend_from_slice(row);
        }
        Self::new(n_features, values)
    }

    /// Number of rows (windows).
    #[must_use]
    pub fn n_rows(&self) -> usize {
        self.values.len() / self.n_features
    }

    /// Number of columns (features).
    #[must_use]
    pub fn n_features(&self) -> usize {
        self.n_features
    }

    /// One row.
    ///
    /// # Panics
    /// If `i >= n_rows()`.
    #[must_use]
    pub fn row(&self, i: usize) -> &[f64] {
        &self.values[i * self.n_features..(i + 1) * self.n_features]
    }

    /// All values, row-major.
    #[must_use]
    pub fn values(&self) -> &[f64] {
        &self.values
    }

    /// The rows listed, in that order, as a new matrix.
    ///
    /// # Panics
    /// If an index is out of range.
    #[must_use]
    pub fn select_rows(&self, rows: &[usize]) -> Self {
        let mut values = Vec::with_capacity(rows.len() * self.n_features);
        for &r in rows {
            values.extend_from_slice(self.row(r));
        }
        Self {
            n_features: self.n_features,
            values,
        }
    }

    /// Mutable access to the values (same shape), for in-place transforms inside the crate.
    pub(crate) fn values_mut(&mut self) -> &mut [f64] {
        &mut self.values
    }
}

/// Labelled windows: features, a class per window, the track each window comes from and
/// optionally a group per window (artist, album) for grouped cross-validation.
///
/// Every window of a track has the same label and group; windows of one track are never split
/// between training and test folds (see [`crate::evaluation::default_folds`]).
#[derive(Debug, Clone, PartialEq)]
pub struct LabelledWindows {
    schema: FeatureSchema,
    classes: Vec<String>,
    features: FeatureMatrix,
    labels: Vec<usize>,
    tracks: Vec<usize>,
    groups: Option<Vec<usize>>,
}

impl LabelledWindows {
    /// Checks and bundles labelled windows.
    ///
    /// `labels[i]` indexes `classes`; `tracks[i]` and `groups[i]` are arbitrary ids.
    ///
    /// # Errors
    /// [`StyleError`] when lengths disagree, a label is out of range, a class has no window,
    /// there are fewer than two classes, names are empty or repeated, or a track mixes labels or
    /// groups.
    pub fn new(
        schema: FeatureSchema,
        classes: Vec<String>,
        features: FeatureMatrix,
        labels: Vec<usize>,
        tracks: Vec<usize>,
        groups: Option<Vec<usize>>,
    ) -> Result<Self, StyleError> {
        schema.validate()?;
        if classes.len() < 2 {
            return Err(StyleError::TooFewClasses {
                classes: classes.len(),
            });
        }
        check_names("class", &classes)?;
        if features.n_features() != schema.len() {
            return Err(StyleError::LengthMismatch {
                what: "features per window (schema)",
                expected: schema.len(),
                actual: features.n_features(),
            });
        }
        let n = features.n_rows();
        if n == 0 {
            return Err(StyleError::Empty { what: "windows" });
        }
        for (what, len) in [("labels", labels.len()), ("tracks", tracks.len())] {
            if len != n {
                return Err(StyleError::LengthMismatch {
                    what,
                    expected: n,
                    actual: len,
                });
            }
        }
        if let Some(g) = &groups
            && g.len() != n
        {
            return Err(StyleError::LengthMismatch {
                what: "groups",
                expected: n,
                actual: g.len(),
            });
        }
        let mut counts = vec![0_usize; classes.len()];
        for (window, &label) in labels.iter().enumerate() {
            if label >= classes.len() {
                return Err(StyleError::LabelOutOfRange {
                    window,
                    label,
                    classes: classes.len(),
                });
            }
            counts[label] += 1;
        }
        if let Some(c) = counts.iter().position(|&c| c == 0) {
            return Err(StyleError::EmptyClass {
                class: classes[c].clone(),
            });
        }
        // One label and one group per track.
        let mut first_of_track: BTreeMap<usize, usize> = BTreeMap::new();
        for (window, &track) in tracks.iter().enumerate() {
            let first = *first_of_track.entry(track).or_insert(window);
            if labels[first] != labels[window] {
                return Err(StyleError::InconsistentTrack {
                    track,
                    what: "labels",
                    first_window: first,
                    other_window: window,
                });
            }
            if let Some(g) = &groups
                && g[first] != g[window]
            {
                return Err(StyleError::InconsistentTrack {
                    track,
                    what: "groups",
                    first_window: first,
                    other_window: window,
                });
            }
        }
        Ok(Self {
            schema,
            classes,
            features,
            labels,
            tracks,
            groups,
        })
    }

    /// The feature schema.
    #[must_use]
    pub fn schema(&self) -> &FeatureSchema {
        &self.schema
    }

    /// Class (category) names; labels index this list.
    #[must_use]
    pub fn classes(&self) -> &[String] {
        &self.classes
    }

    /// The features, one row per window.
    #[must_use]
    pub fn features(&self) -> &FeatureMatrix {
        &self.features
    }

    /// Class index of each window.
    #[must_use]
    pub fn labels(&self) -> &[usize] {
        &self.labels
    }

    /// Track id of each window.
    #[must_use]
    pub fn tracks(&self) -> &[usize] {
        &self.tracks
    }

    /// Group id of each window (artist, album), when given.
    #[must_use]
    pub fn groups(&self) -> Option<&[usize]> {
        self.groups.as_deref()
    }

    /// The unit cross-validation keeps together: the groups when given, else the tracks.
    #[must_use]
    pub fn cv_groups(&self) -> &[usize] {
        self.groups.as_deref().unwrap_or(&self.tracks)
    }

    /// Number of windows.
    #[must_use]
    pub fn n_windows(&self) -> usize {
        self.labels.len()
    }

    /// Number of distinct tracks.
    #[must_use]
    pub fn n_tracks(&self) -> usize {
        self.tracks.iter().collect::<HashSet<_>>().len()
    }

    /// Windows per class.
    #[must_use]
    pub fn windows_per_class(&self) -> Vec<usize> {
        let mut counts = vec![0; self.classes.len()];
        for &l in &self.labels {
            counts[l] += 1;
        }
        counts
    }

    /// Tracks per class.
    #[must_use]
    pub fn tracks_per_class(&self) -> Vec<usize> {
        let mut seen = HashSet::new();
        let mut counts = vec![0; self.classes.len()];
        for (&t, &l) in self.tracks.iter().zip(&self.labels) {
            if seen.insert(t) {
                counts[l] += 1;
            }
        }
        counts
    }

    /// Rows of the mean feature values of each class (raw units), `classes × features`.
    #[must_use]
    pub fn class_means(&self) -> Vec<Vec<f64>> {
        let f = self.features.n_features();
        let mut sums = vec![vec![0.0; f]; self.classes.len()];
        let counts = self.windows_per_class();
        for (i, &l) in self.labels.iter().enumerate() {
            for (s, &v) in sums[l].iter_mut().zip(self.features.row(i)) {
                *s += v;
            }
        }
        for (row, &n) in sums.iter_mut().zip(&counts) {
            for s in row.iter_mut() {
                *s /= n as f64;
            }
        }
        sums
    }

    /// A balanced subset: every class keeps the same number of tracks (that of the class with
    /// the fewest), drawn at random with `seed`; all windows of a kept track are kept.
    ///
    /// This is the small-set protocol of equal-sized classes (common practice in music
    /// classification), an alternative to class weights.
    ///
    /// # Errors
    /// Never in practice (the subset keeps every class); errors of [`LabelledWindows::new`] are
    /// passed on.
    pub fn balanced_by_tracks(&self, seed: u64) -> Result<Self, StyleError> {
        let mut tracks_of_class: Vec<Vec<usize>> = vec![Vec::new(); self.classes.len()];
        let mut seen = HashSet::new();
        for (&t, &l) in self.tracks.iter().zip(&self.labels) {
            if seen.insert(t) {
                tracks_of_class[l].push(t);
            }
        }
        let keep_per_class = tracks_of_class.iter().map(Vec::len).min().unwrap_or(0);
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut kept = HashSet::new();
        for tracks in &mut tracks_of_class {
            tracks.sort_unstable();
            tracks.shuffle(&mut rng);
            kept.extend(tracks.iter().take(keep_per_class).copied());
        }
        let rows: Vec<usize> = (0..self.n_windows())
            .filter(|&i| kept.contains(&self.tracks[i]))
            .collect();
        self.subset(&rows)
    }

    /// The windows listed, as a new set with the same schema and classes.
    ///
    /// # Errors
    /// [`StyleError::EmptyClass`] when the subset loses a class, [`StyleError::Empty`] when it
    /// is empty.
    ///
    /// # Panics
    /// If an index is out of range.
    pub fn subset(&self, rows: &[usize]) -> Result<Self, StyleError> {
        Self::new(
            self.schema.clone(),
            self.classes.clone(),
            self.features.select_rows(rows),
            rows.iter().map(|&r| self.labels[r]).collect(),
            rows.iter().map(|&r| self.tracks[r]).collect(),
            self.groups
                .as_ref()
                .map(|g| rows.iter().map(|&r| g[r]).collect()),
        )
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn schema(n: usize) -> FeatureSchema {
        FeatureSchema::new("test", 1, "", (0..n).map(|i| format!("f{i}")).collect())
            .expect("valid schema")
    }

    #[test]
    fn schema_refuses_repeated_and_empty_names() {
        let repeated = FeatureSchema::new("s", 1, "", vec!["a".into(), "a".into()]);
        assert!(matches!(repeated, Err(StyleError::BadName { .. })));
        let empty = FeatureSchema::new("s", 1, "", vec![" ".into()]);
        assert!(matches!(empty, Err(StyleError::BadName { .. })));
        assert!(matches!(
            FeatureSchema::new("s", 1, "", vec![]),
            Err(StyleError::Empty { .. })
        ));
    }

    #[test]
    fn matrix_refuses_non_finite_and_ragged_rows() {
        let nan = FeatureMatrix::new(2, vec![0.0, 1.0, f64::NAN, 2.0]);
        assert_eq!(
            nan.err().map(|e| matches!(
                e,
                StyleError::NonFinite {
                    window: 1,
                    feature: 0,
                    ..
                }
            )),
            Some(true)
        );
        assert!(FeatureMatrix::new(3, vec![0.0; 4]).is_err());
        assert!(FeatureMatrix::from_rows(&[vec![1.0, 2.0], vec![1.0]]).is_err());
    }

    #[test]
    fn windows_refuse_a_track_with_two_labels_or_groups() {
        let x = FeatureMatrix::from_rows(&[[0.0], [1.0], [2.0]]).expect("matrix");
        let classes = vec!["a".to_owned(), "b".to_owned()];
        let mixed = LabelledWindows::new(
            schema(1),
            classes.clone(),
            x.clone(),
            vec![0, 1, 1],
            vec![7, 7, 8],
            None,
        );
        assert!(matches!(
            mixed,
            Err(StyleError::InconsistentTrack { track: 7, .. })
        ));
        let groups = LabelledWindows::new(
            schema(1),
            classes,
            x,
            vec![0, 0, 1],
            vec![7, 7, 8],
            Some(vec![1, 2, 3]),
        );
        assert!(matches!(
            groups,
            Err(StyleError::InconsistentTrack { what: "groups", .. })
        ));
    }

    #[test]
    fn balanced_subset_keeps_equal_tracks_per_class() {
        // Class 0: 5 tracks of 2 windows; class 1: 2 tracks of 3 windows.
        let mut labels = Vec::new();
        let mut tracks = Vec::new();
        for t in 0..5 {
            labels.extend([0, 0]);
            tracks.extend([t, t]);
        }
        for t in 5..7 {
            labels.extend([1, 1, 1]);
            tracks.extend([t, t, t]);
        }
        let n = labels.len();
        let x = FeatureMatrix::new(1, (0..n).map(|i| i as f64).collect()).expect("matrix");
        let data = LabelledWindows::new(
            schema(1),
            vec!["a".into(), "b".into()],
            x,
            labels,
            tracks,
            None,
        )
        .expect("valid");
        let seed = 11;
        let balanced = data.balanced_by_tracks(seed).expect("balanced");
        assert_eq!(balanced.tracks_per_class(), vec![2, 2], "seed {seed}");
        assert_eq!(balanced.windows_per_class(), vec![4, 6], "seed {seed}");
    }
}
