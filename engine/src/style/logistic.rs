//! L2-regularised logistic regression, one-vs-rest.
//!
//! Each binary problem (class vs the rest) minimises scikit-learn 1.9.1's `LogisticRegression`
//! objective with `C = 1`, an unpenalised intercept and sample weights `sᵢ`:
//!
//! `Σᵢ sᵢ · log(1 + exp(−yᵢ (w·zᵢ + b))) + ‖w‖² / (2C)`,
//!
//! by Newton's method with a Cholesky solve and an Armijo backtracking line search (Nocedal &
//! Wright, "Numerical Optimization", 2nd ed., Algorithm 3.1 with Newton directions), the method
//! of scikit-learn's `newton-cholesky` solver. Iterations stop when the largest gradient entry of
//! the objective divided by `Σ sᵢ` falls below the tolerance.
//!
//! Several classes are fitted one-vs-rest (scikit-learn's `OneVsRestClassifier`), not
//! multinomially: each category then has its own linear log-odds, which makes closeness and
//! reasons per category exact and lets several categories be trained at once. With two classes
//! both formulations are the same model.

use super::classifier::{ClassWeight, LinearModel, binary_weights};
use super::data::FeatureMatrix;
use super::errors::StyleError;
use serde::{Deserialize, Serialize};

/// Intercept given to a class with no training window (a log-odds of −20, a probability of
/// 2·10⁻⁹): the class is never chosen.
pub const ABSENT_CLASS_LOG_ODDS: f64 = -20.0;

/// Settings of [`fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LogisticParams {
    /// Inverse regularisation strength `C` (default 1, scikit-learn's).
    pub c: f64,
    /// Class weights (sample weights per side of each binary problem).
    pub class_weight: ClassWeight,
    /// Stop when `max |∇| / Σ sᵢ` is below this (default 1e-8; Newton reaches it in a few
    /// iterations, closer to the optimum than scikit-learn's default lbfgs `tol = 1e-4`).
    pub tolerance: f64,
    /// Maximum Newton iterations per binary problem (default 100, scikit-learn's `max_iter`).
    pub max_iterations: usize,
}

impl Default for LogisticParams {
    fn default() -> Self {
        Self {
            c: 1.0,
            class_weight: ClassWeight::Uniform,
            tolerance: 1e-8,
            max_iterations: 100,
        }
    }
}

impl LogisticParams {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`StyleError::InvalidSetting`] for a non-positive `C` or tolerance, or zero iterations.
    pub fn validate(&self) -> Result<(), StyleError> {
        super::classifier::validate_linear(self.c, self.tolerance, self.max_iterations)
    }
}

/// Trains one-vs-rest logistic regression on standardised rows `z`.
///
/// # Errors
/// [`StyleError`] for invalid settings or sizes.
pub fn fit(
    z: &FeatureMatrix,
    y: &[usize],
    n_classes: usize,
    params: &LogisticParams,
) -> Result<LinearModel, StyleError> {
    params.validate()?;
    super::classifier::check_labels(z, y)?;
    let outputs = LinearModel::outputs_for(n_classes);
    let mut weights = Vec::with_capacity(outputs);
    let mut intercepts = Vec::with_capacity(outputs);
    let mut targets = vec![0.0; y.len()];
    let mut sample_weights = vec![0.0; y.len()];
    for k in 0..outputs {
        let positive_class = if n_classes == 2 { 1 } else { k };
        let n_pos = y.iter().filter(|&&l| l == positive_class).count();
        let n_neg = y.len() - n_pos;
        if n_pos == 0 || n_neg == 0 {
            // Unbounded optimum (the intercept runs off to ±∞): a constant score instead.
            weights.push(vec![0.0; z.n_features()]);
            intercepts.push(if n_pos == 0 {
                ABSENT_CLASS_LOG_ODDS
            } else {
                -ABSENT_CLASS_LOG_ODDS
            });
            continue;
        }
        let (w_pos, w_neg) = binary_weights(params.class_weight, n_pos, n_neg);
        for ((t, s), &label) in targets.iter_mut().zip(&mut sample_weights).zip(y) {
            let positive = label == positive_class;
            *t = if positive { 1.0 } else { 0.0 };
            *s = if positive { w_pos } else { w_neg };
        }
        let (w, b) = solve(
            z,
            &targets,
            &sample_weights,
            params.c,
            params.tolerance,
            params.max_iterations,
        );
        weights.push(w);
        intercepts.push(b);
    }
    Ok(LinearModel {
        n_classes,
        weights,
        intercepts,
    })
}

/// `log(1 + exp(u))` without overflow.
fn softplus(u: f64) -> f64 {
    u.max(0.0) + (-u.abs()).exp().ln_1p()
}

/// `1 / (1 + exp(−u))` without overflow.
pub(crate) fn sigmoid(u: f64) -> f64 {
    if u >= 0.0 {
        1.0 / (1.0 + (-u).exp())
    } else {
        let e = u.exp();
        e / (1.0 + e)
    }
}

/// Objective divided by `Σ sᵢ` at `(w, b)`.
fn objective(z: &FeatureMatrix, t: &[f64], s: &[f64], lambda: f64, theta: &[f64]) -> f64 {
    let d = z.n_features();
    let (w, b) = (&theta[..d], theta[d]);
    let mut loss = 0.0;
    for (i, (&ti, &si)) in t.iter().zip(s).enumerate() {
        let m = w.iter().zip(z.row(i)).map(|(a, v)| a * v).sum::<f64>() + b;
        // −[t log σ(m) + (1 − t) log(1 − σ(m))] = softplus(m) − t·m.
        loss += si * (softplus(m) - ti * m);
    }
    let total: f64 = s.iter().sum();
    loss / total + 0.5 * lambda * w.iter().map(|v| v * v).sum::<f64>()
}

/// Solves one binary problem; returns the weights and the intercept.
pub(crate) fn solve(
    z: &FeatureMatrix,
    t: &[f64],
    s: &[f64],
    c: f64,
    tolerance: f64,
    max_iterations: usize,
) -> (Vec<f64>, f64) {
    let d = z.n_features();
    let p = d + 1;
    let total: f64 = s.iter().sum();
    // Penalty per unit of normalised loss.
    let lambda = 1.0 / (c * total);
    let mut theta = vec![0.0; p];
    let mut grad = vec![0.0; p];
    let mut hess = vec![0.0; p * p];
    let mut step = vec![0.0; p];
    let mut trial = vec![0.0; p];
    let mut f = objective(z, t, s, lambda, &theta);
    for _ in 0..max_iterations {
        grad.fill(0.0);
        hess.fill(0.0);
        for (i, (&ti, &si)) in t.iter().zip(s).enumerate() {
            let x = z.row(i);
            let m = theta[..d].iter().zip(x).map(|(a, v)| a * v).sum::<f64>() + theta[d];
            let prob = sigmoid(m);
            let r = si * (prob - ti) / total;
            let h = si * prob * (1.0 - prob) / total;
            for a in 0..p {
                let xa = if a < d { x[a] } else { 1.0 };
                grad[a] += r * xa;
                let row = &mut hess[a * p..a * p + a + 1];
                for (bi, hv) in row.iter_mut().enumerate() {
                    let xb = if bi < d { x[bi] } else { 1.0 };
                    *hv += h * xa * xb;
                }
            }
        }
        for a in 0..d {
            grad[a] += lambda * theta[a];
            hess[a * p + a] += lambda;
        }
        if grad.iter().fold(0.0_f64, |m, g| m.max(g.abs())) <= tolerance {
            break;
        }
        // Mirror the lower triangle.
        for a in 0..p {
            for bi in 0..a {
                hess[bi * p + a] = hess[a * p + bi];
            }
        }
        for (st, g) in step.iter_mut().zip(&grad) {
            *st = -g;
        }
        if !cholesky_solve(&mut hess, p, &mut step) {
            // Not positive definite in floating point: fall back to steepest descent.
            for (st, g) in step.iter_mut().zip(&grad) {
                *st = -g;
            }
        }
        let slope: f64 = step.iter().zip(&grad).map(|(a, g)| a * g).sum();
        let mut alpha = 1.0;
        let mut accepted = false;
        for _ in 0..60 {
            for ((tr, th), st) in trial.iter_mut().zip(&theta).zip(&step) {
                *tr = th + alpha * st;
            }
            let f_new = objective(z, t, s, lambda, &trial);
            if f_new <= f + 1e-4 * alpha * slope {
                theta.copy_from_slice(&trial);
                f = f_new;
                accepted = true;
                break;
            }
            alpha *= 0.5;
        }
        if !accepted {
            break; // no decrease possible in floating point: at the optimum
        }
    }
    let b = theta[d];
    theta.truncate(d);
    (theta, b)
}

/// Solves `A x = rhs` in place for a symmetric positive definite `A` (`n × n`, row-major,
/// overwritten by its Cholesky factor); returns false if `A` is not positive definite.
fn cholesky_solve(a: &mut [f64], n: usize, rhs: &mut [f64]) -> bool {
    for j in 0..n {
        let mut diag = a[j * n + j];
        for k in 0..j {
            diag -= a[j * n + k] * a[j * n + k];
        }
        if !(diag > 0.0 && diag.is_finite()) {
            return false;
        }
        let l = diag.sqrt();
        a[j * n + j] = l;
        for i in j + 1..n {
            let mut v = a[i * n + j];
            for k in 0..j {
                v -= a[i * n + k] * a[j * n + k];
            }
            a[i * n + j] = v / l;
        }
    }
    for i in 0..n {
        let mut v = rhs[i];
        for k in 0..i {
            v -= a[i * n + k] * rhs[k];
        }
        rhs[i] = v / a[i * n + i];
    }
    for i in (0..n).rev() {
        let mut v = rhs[i];
        for k in i + 1..n {
            v -= a[k * n + i] * rhs[k];
        }
        rhs[i] = v / a[i * n + i];
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::rngs::SmallRng;
    use rand::{Rng, SeedableRng};

    #[test]
    fn solution_has_zero_gradient_and_unpenalised_intercept_balances_the_labels() {
        let seed = 12;
        let mut rng = SmallRng::seed_from_u64(seed);
        let n = 400;
        let mut values = Vec::new();
        let mut t = Vec::new();
        for _ in 0..n {
            let a: f64 = rng.gen_range(-2.0..2.0);
            let b: f64 = rng.gen_range(-2.0..2.0);
            values.extend([a, b]);
            // Labels drawn from a known logistic model: P(1) = σ(1.5a − b + 0.5).
            t.push(if rng.gen_range(0.0..1.0) < sigmoid(1.5 * a - b + 0.5) {
                1.0
            } else {
                0.0
            });
        }
        let z = FeatureMatrix::new(2, values).expect("matrix");
        let s = vec![1.0; n];
        let (w, b) = solve(&z, &t, &s, 1.0, 1e-12, 100);
        // Stationarity of an unpenalised intercept: Σ (pᵢ − tᵢ) = 0 (a closed-form property
        // of the logistic likelihood).
        let mut residual = 0.0;
        let mut gw = [w[0] / 1.0, w[1] / 1.0];
        for (i, &ti) in t.iter().enumerate() {
            let x = z.row(i);
            let r = sigmoid(w[0] * x[0] + w[1] * x[1] + b) - ti;
            residual += r;
            gw[0] += r * x[0];
            gw[1] += r * x[1];
        }
        assert!(residual.abs() < 1e-8, "seed {seed}: {residual}");
        assert!(gw.iter().all(|g| g.abs() < 1e-8), "seed {seed}: {gw:?}");
        // 400 draws recover the generating coefficients roughly (2 standard errors ≈ 0.3).
        assert!(
            (w[0] - 1.5).abs() < 0.45 && (w[1] + 1.0).abs() < 0.45,
            "seed {seed}: {w:?}"
        );
    }

    #[test]
    fn separable_data_stays_finite_thanks_to_the_penalty() {
        let z = FeatureMatrix::new(1, vec![-2.0, -1.0, 1.0, 2.0]).expect("matrix");
        let (w, b) = solve(&z, &[0.0, 0.0, 1.0, 1.0], &[1.0; 4], 1.0, 1e-12, 100);
        assert!(
            w[0].is_finite() && w[0] > 0.0 && b.abs() < 1e-9,
            "{w:?} {b}"
        );
    }

    #[test]
    fn a_class_without_windows_gets_a_constant_low_score() {
        let z = FeatureMatrix::new(1, vec![0.0, 1.0, 2.0, 3.0]).expect("matrix");
        let model = fit(&z, &[0, 0, 1, 1], 3, &LogisticParams::default()).expect("fit");
        assert_eq!(model.intercepts[2], ABSENT_CLASS_LOG_ODDS);
        assert_eq!(model.weights[2], vec![0.0]);
    }

    #[test]
    fn cholesky_solves_a_known_system() {
        // [[4, 2], [2, 3]] x = [2, 1] → x = [0.5, 0].
        let mut a = vec![4.0, 2.0, 2.0, 3.0];
        let mut rhs = vec![2.0, 1.0];
        assert!(cholesky_solve(&mut a, 2, &mut rhs));
        assert!((rhs[0] - 0.5).abs() < 1e-15 && rhs[1].abs() < 1e-15);
        let mut singular = vec![1.0, 1.0, 1.0, 1.0];
        assert!(!cholesky_solve(&mut singular, 2, &mut [1.0, 1.0]));
    }
}
