//! Standardisation of window features, stored with every style model.
//!
//! Semantics of scikit-learn 1.9.1's `StandardScaler` (with mean, with std): `z = (x − mean) /
//! scale`, `scale` the population standard deviation (ddof = 0), and `scale = 1` for a feature
//! whose variance is indistinguishable from rounding error (scikit-learn's
//! `_is_constant_feature`: `var ≤ n·ε·var + (n·mean·ε)²`).

use super::data::FeatureMatrix;
use serde::{Deserialize, Serialize};

/// Per-feature mean and scale learned from training windows.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Standardizer {
    /// Training mean of each feature, in the feature's own unit.
    pub(crate) mean: Vec<f64>,
    /// Training standard deviation of each feature (1 for constant features), same unit.
    pub(crate) scale: Vec<f64>,
}

impl Standardizer {
    /// Learns mean and scale from the rows of `x`.
    ///
    /// Two-pass mean and variance (exact for the small sets used here).
    #[must_use]
    pub fn fit(x: &FeatureMatrix) -> Self {
        let n = x.n_rows();
        let f = x.n_features();
        let mut mean = vec![0.0; f];
        for i in 0..n {
            for (m, &v) in mean.iter_mut().zip(x.row(i)) {
                *m += v;
            }
        }
        let n_f = n.max(1) as f64;
        for m in &mut mean {
            *m /= n_f;
        }
        let mut var = vec![0.0; f];
        for i in 0..n {
            for ((s, &v), &m) in var.iter_mut().zip(x.row(i)).zip(&mean) {
                *s += (v - m) * (v - m);
            }
        }
        let eps = f64::EPSILON;
        let scale = var
            .iter()
            .zip(&mean)
            .map(|(&s, &m)| {
                let v = s / n_f;
                // scikit-learn 1.9.1 preprocessing._data._is_constant_feature.
                let upper_bound = n_f * eps * v + (n_f * m * eps).powi(2);
                if v <= upper_bound { 1.0 } else { v.sqrt() }
            })
            .collect();
        Self { mean, scale }
    }

    /// Training mean of each feature.
    #[must_use]
    pub fn mean(&self) -> &[f64] {
        &self.mean
    }

    /// Scale (standard deviation) of each feature.
    #[must_use]
    pub fn scale(&self) -> &[f64] {
        &self.scale
    }

    /// Number of features.
    #[must_use]
    pub fn n_features(&self) -> usize {
        self.mean.len()
    }

    /// Standardises one row into `out` (no allocation).
    ///
    /// # Panics
    /// If the lengths differ from [`Standardizer::n_features`].
    pub fn transform_row_into(&self, row: &[f64], out: &mut [f64]) {
        assert_eq!(row.len(), self.mean.len(), "row length");
        assert_eq!(out.len(), self.mean.len(), "output length");
        for (((o, &v), &m), &s) in out.iter_mut().zip(row).zip(&self.mean).zip(&self.scale) {
            *o = (v - m) / s;
        }
    }

    /// Standardises every row of `x` (allocates the result).
    ///
    /// # Panics
    /// If `x` has another number of features.
    #[must_use]
    pub fn transform(&self, x: &FeatureMatrix) -> FeatureMatrix {
        let mut out = x.clone();
        let f = self.mean.len();
        assert_eq!(x.n_features(), f, "feature count");
        for row in out.values_mut().chunks_exact_mut(f) {
            for ((v, &m), &s) in row.iter_mut().zip(&self.mean).zip(&self.scale) {
                *v = (*v - m) / s;
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::SmallRng;
    use rand::{Rng, SeedableRng};

    #[test]
    fn standardised_columns_have_zero_mean_and_unit_sd() {
        let seed = 3;
        let mut rng = SmallRng::seed_from_u64(seed);
        let rows: Vec<[f64; 3]> = (0..200)
            .map(|_| {
                [
                    rng.gen_range(-1.0..1.0) * 5.0 + 100.0,
                    rng.gen_range(0.0..1e-3),
                    7.0,
                ]
            })
            .collect();
        let x = FeatureMatrix::from_rows(&rows).expect("matrix");
        let s = Standardizer::fit(&x);
        let z = s.transform(&x);
        for j in 0..2 {
            let col: Vec<f64> = (0..z.n_rows()).map(|i| z.row(i)[j]).collect();
            let mean = col.iter().sum::<f64>() / col.len() as f64;
            let var = col.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / col.len() as f64;
            assert!(mean.abs() < 1e-12, "seed {seed} feature {j}: mean {mean}");
            assert!(
                (var - 1.0).abs() < 1e-12,
                "seed {seed} feature {j}: var {var}"
            );
        }
        // A constant feature keeps scale 1 (scikit-learn's convention) and maps to 0.
        assert_eq!(s.scale()[2], 1.0);
        assert!((0..z.n_rows()).all(|i| z.row(i)[2] == 0.0));
    }

    #[test]
    fn row_transform_equals_matrix_transform() {
        let x = FeatureMatrix::from_rows(&[[1.0, 2.0], [3.0, 5.0], [4.0, -1.0]]).expect("m");
        let s = Standardizer::fit(&x);
        let z = s.transform(&x);
        let mut out = [0.0; 2];
        for i in 0..3 {
            s.transform_row_into(x.row(i), &mut out);
            assert_eq!(out.as_slice(), z.row(i));
        }
    }
}
