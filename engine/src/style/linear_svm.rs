//! Linear support vector machine as liblinear trains it (what scikit-learn 1.9.1's `LinearSVC`
//! wraps): L2-regularised squared hinge loss,
//!
//! `min_w ½‖w̃‖² + Σᵢ Cᵢ · max(0, 1 − yᵢ w̃·x̃ᵢ)²`,
//!
//! with the intercept learned as the weight of a constant feature of value 1 (liblinear's
//! `intercept_scaling = 1`; the intercept is regularised like the other weights, as in
//! `LinearSVC`). Solved by dual coordinate descent with shrinking: Hsieh, Chang, Lin, Keerthi &
//! Sundararajan (2008), "A dual coordinate descent method for large-scale linear SVM", ICML,
//! Algorithm 1 and §3.2 (liblinear's `solve_l2r_l1l2_svc`). Several classes are trained
//! one-vs-rest; `Cᵢ = C · weight of i's side`.
//!
//! scikit-learn's default `dual="auto"` picks liblinear's primal Newton solver when there are
//! more windows than features; both reach the same unique optimum (the objective is strictly
//! convex), which the reference test checks against `LinearSVC`'s coefficients.

use super::classifier::{ClassWeight, LinearModel, binary_weights};
use super::data::FeatureMatrix;
use super::errors::StyleError;
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use serde::{Deserialize, Serialize};

/// Settings of [`fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SvmParams {
    /// Regularisation `C` (default 1, `LinearSVC`'s); larger fits the training windows harder.
    pub c: f64,
    /// Class weights (multiply `C` per side).
    pub class_weight: ClassWeight,
    /// Stopping tolerance on the spread of the projected gradient (default 1e-4, the `tol`
    /// scikit-learn passes to liblinear).
    pub tolerance: f64,
    /// Maximum passes over the windows per binary problem (default 1000, `LinearSVC`'s).
    pub max_iterations: usize,
    /// Seed of the random visiting order.
    pub seed: u64,
}

impl Default for SvmParams {
    fn default() -> Self {
        Self {
            c: 1.0,
            class_weight: ClassWeight::Uniform,
            tolerance: 1e-4,
            max_iterations: 1000,
            seed: 0,
        }
    }
}

impl SvmParams {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`StyleError::InvalidSetting`] for a non-positive `C` or tolerance, or zero iterations.
    pub fn validate(&self) -> Result<(), StyleError> {
        super::classifier::validate_linear(self.c, self.tolerance, self.max_iterations)
    }
}

/// Trains a one-vs-rest linear SVM on standardised rows `z`.
///
/// # Errors
/// [`StyleError`] for invalid settings or sizes.
pub fn fit(
    z: &FeatureMatrix,
    y: &[usize],
    n_classes: usize,
    params: &SvmParams,
) -> Result<LinearModel, StyleError> {
    params.validate()?;
    super::classifier::check_labels(z, y)?;
    let outputs = LinearModel::outputs_for(n_classes);
    let mut weights = Vec::with_capacity(outputs);
    let mut intercepts = Vec::with_capacity(outputs);
    let mut rng = SmallRng::seed_from_u64(params.seed);
    let mut signs = vec![0.0; y.len()];
    for k in 0..outputs {
        let positive_class = if n_classes == 2 { 1 } else { k };
        let mut n_pos = 0;
        for (s, &label) in signs.iter_mut().zip(y) {
            if label == positive_class {
                *s = 1.0;
                n_pos += 1;
            } else {
                *s = -1.0;
            }
        }
        let (w_pos, w_neg) = binary_weights(params.class_weight, n_pos, y.len() - n_pos);
        let solution = solve(
            z,
            &signs,
            params.c * w_pos,
            params.c * w_neg,
            params.tolerance,
            params.max_iterations,
            &mut rng,
        );
        weights.push(solution.w);
        intercepts.push(solution.b);
    }
    Ok(LinearModel {
        n_classes,
        weights,
        intercepts,
    })
}

/// A solved binary problem.
pub(crate) struct Solution {
    pub(crate) w: Vec<f64>,
    pub(crate) b: f64,
}

/// liblinear's `solve_l2r_l1l2_svc` for the squared hinge (`U = ∞`, `Dᵢᵢ = 1/(2Cᵢ)`), with
/// the bias as a constant feature of value 1.
pub(crate) fn solve(
    z: &FeatureMatrix,
    y: &[f64],
    c_pos: f64,
    c_neg: f64,
    eps: f64,
    max_iterations: usize,
    rng: &mut SmallRng,
) -> Solution {
    let l = y.len();
    let d = z.n_features();
    let mut w = vec![0.0; d];
    let mut b = 0.0;
    let mut alpha = vec![0.0; l];
    let diag: Vec<f64> = y
        .iter()
        .map(|&s| 0.5 / if s > 0.0 { c_pos } else { c_neg })
        .collect();
    let qd: Vec<f64> = (0..l)
        .map(|i| diag[i] + z.row(i).iter().map(|v| v * v).sum::<f64>() + 1.0)
        .collect();
    let mut index: Vec<usize> = (0..l).collect();
    let mut active = l;
    let mut pg_max_old = f64::INFINITY;
    let mut iterations = 0;
    while iterations < max_iterations {
        let mut pg_max_new = f64::NEG_INFINITY;
        let mut pg_min_new = f64::INFINITY;
        for i in 0..active {
            let j = rng.gen_range(i..active);
            index.swap(i, j);
        }
        let mut s = 0;
        while s < active {
            let i = index[s];
            let x = z.row(i);
            let yi = y[i];
            let g = yi * (w.iter().zip(x).map(|(a, v)| a * v).sum::<f64>() + b) - 1.0
                + alpha[i] * diag[i];
            let mut pg = 0.0;
            if alpha[i] == 0.0 {
                if g > pg_max_old {
                    // Shrink: this window is very likely to stay at α = 0.
                    active -= 1;
                    index.swap(s, active);
                    continue;
                } else if g < 0.0 {
                    pg = g;
                }
            } else {
                pg = g;
            }
            pg_max_new = pg_max_new.max(pg);
            pg_min_new = pg_min_new.min(pg);
            if pg.abs() > 1.0e-12 {
                let old = alpha[i];
                alpha[i] = (alpha[i] - g / qd[i]).max(0.0);
                let delta = (alpha[i] - old) * yi;
                for (a, v) in w.iter_mut().zip(x) {
                    *a += delta * v;
                }
                b += delta;
            }
            s += 1;
        }
        iterations += 1;
        if pg_max_new - pg_min_new <= eps {
            if active == l {
                break;
            }
            // Converged on the shrunk set: check all windows once more.
            active = l;
            pg_max_old = f64::INFINITY;
            continue;
        }
        pg_max_old = pg_max_new;
        if pg_max_old <= 0.0 {
            pg_max_old = f64::INFINITY;
        }
    }
    Solution { w, b }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Overlapping two-class data in 4 dimensions.
    fn data(seed: u64, n: usize) -> (FeatureMatrix, Vec<f64>) {
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut values = Vec::new();
        let mut y = Vec::new();
        for i in 0..n {
            let s = if i % 3 == 0 { 1.0 } else { -1.0 };
            y.push(s);
            values.push(0.7 * s + rng.gen_range(-1.0..1.0));
            values.push(-0.3 * s + rng.gen_range(-1.0..1.0));
            values.push(rng.gen_range(-1.0..1.0));
            values.push(rng.gen_range(-2.0..2.0));
        }
        (FeatureMatrix::new(4, values).expect("matrix"), y)
    }

    /// Gradient of the primal objective ½‖w̃‖² + Σ Cᵢ max(0, 1 − yᵢ w̃·x̃ᵢ)² (Hsieh et al. 2008,
    /// eq. 2 with the squared hinge), which vanishes at the optimum.
    fn primal_gradient(z: &FeatureMatrix, y: &[f64], c: (f64, f64), s: &Solution) -> Vec<f64> {
        let d = z.n_features();
        let mut g: Vec<f64> = s.w.iter().copied().chain([s.b]).collect();
        for (i, &yi) in y.iter().enumerate() {
            let x = z.row(i);
            let m = yi * (s.w.iter().zip(x).map(|(a, v)| a * v).sum::<f64>() + s.b);
            let ci = if yi > 0.0 { c.0 } else { c.1 };
            let slack = (1.0 - m).max(0.0);
            for j in 0..d {
                g[j] -= 2.0 * ci * slack * yi * x[j];
            }
            g[d] -= 2.0 * ci * slack * yi;
        }
        g
    }

    #[test]
    fn dual_solution_satisfies_the_primal_optimality_condition() {
        for (seed, c) in [(1_u64, (1.0, 1.0)), (2, (0.1, 0.1)), (3, (4.0, 0.5))] {
            let (z, y) = data(seed, 300);
            let mut rng = SmallRng::seed_from_u64(seed);
            let s = solve(&z, &y, c.0, c.1, 1e-9, 100_000, &mut rng);
            let g = primal_gradient(&z, &y, c, &s);
            let scale = s.w.iter().fold(s.b.abs(), |m, v| m.max(v.abs()));
            let worst = g.iter().fold(0.0_f64, |m, v| m.max(v.abs()));
            assert!(
                worst < 1e-6 * scale.max(1.0),
                "seed {seed} C {c:?}: gradient {g:?}"
            );
        }
    }

    #[test]
    fn visiting_order_does_not_change_the_optimum() {
        let seed = 9;
        let (z, y) = data(seed, 200);
        let a = solve(
            &z,
            &y,
            1.0,
            1.0,
            1e-10,
            100_000,
            &mut SmallRng::seed_from_u64(1),
        );
        let b = solve(
            &z,
            &y,
            1.0,
            1.0,
            1e-10,
            100_000,
            &mut SmallRng::seed_from_u64(2),
        );
        for (u, v) in a.w.iter().chain([&a.b]).zip(b.w.iter().chain([&b.b])) {
            assert!((u - v).abs() < 1e-6, "seed {seed}: {u} vs {v}");
        }
    }

    #[test]
    fn one_vs_rest_predicts_three_separated_classes() {
        let seed = 4;
        let mut rng = SmallRng::seed_from_u64(seed);
        let centres = [[3.0, 0.0], [-3.0, 0.0], [0.0, 3.0]];
        let mut values = Vec::new();
        let mut y = Vec::new();
        for i in 0..150 {
            let k = i % 3;
            y.push(k);
            values.push(centres[k][0] + rng.gen_range(-1.0..1.0));
            values.push(centres[k][1] + rng.gen_range(-1.0..1.0));
        }
        let z = FeatureMatrix::new(2, values).expect("matrix");
        let model = fit(
            &z,
            &y,
            3,
            &SvmParams {
                seed,
                ..SvmParams::default()
            },
        )
        .expect("fit");
        assert_eq!(model.weights.len(), 3);
        let mut correct = 0;
        for (i, &label) in y.iter().enumerate() {
            let s: Vec<f64> = (0..3)
                .map(|k| {
                    model.weights[k]
                        .iter()
                        .zip(z.row(i))
                        .map(|(w, v)| w * v)
                        .sum::<f64>()
                        + model.intercepts[k]
                })
                .collect();
            correct += usize::from(super::super::classifier::argmax(&s) == label);
        }
        assert_eq!(correct, 150, "seed {seed}");
    }
}
