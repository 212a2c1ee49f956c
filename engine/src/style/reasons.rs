//! Reasons: the features that move one window's closeness most, signed.
//!
//! Every model's decision score for a class splits exactly into a bias plus one contribution
//! per feature:
//! - linear SVM and logistic regression: `w_j · z_j`, the weight times the standardised
//!   deviation of the feature from its training mean (`bias` = intercept, the score of a window
//!   at the training mean);
//! - random forest: Saabas's tree-path contributions (`bias` = mean root class fraction), see
//!   [`super::forest::RandomForest::contributions_into`].
//!
//! Closeness's log-odds are affine in the score (Platt), so `push_log_odds = slope ·
//! contribution` splits the closeness's log-odds exactly:
//! `log-odds(closeness) = base_log_odds + Σ_j push_j`. A reason is one of the features with the
//! largest `|push|`; the sign says whether it raises or lowers the closeness.
//!
//! Phrasing for musicians is left to the caller: a [`Reason`] carries the feature index (its
//! name is [`crate::style::StyleModel::feature_name`]), the push and the window's value beside the
//! category's and the training mean, so "more driven guitar than the category" reads off
//! [`Reason::relation_to_category`] and the feature name.

use serde::{Deserialize, Serialize};

/// Reasons reported per estimate by default (the issue asks for three).
pub const DEFAULT_REASONS: usize = 3;

/// Most reasons one estimate can hold (the fixed capacity of [`crate::style::Estimate`]).
pub const MAX_REASONS: usize = 16;

/// One feature's effect on a window's closeness to a class.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Reason {
    /// Feature index in the schema.
    pub feature: usize,
    /// Change of the closeness's natural log-odds due to this feature (positive raises the
    /// closeness).
    pub push_log_odds: f64,
    /// The window's value of the feature, in the feature's unit.
    pub value: f64,
    /// Mean of the feature over the category's training windows, same unit.
    pub category_mean: f64,
    /// Mean of the feature over all training windows, same unit.
    pub training_mean: f64,
}

/// Which way a reason moves the closeness.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Push {
    /// The feature makes the window closer to the category.
    Raises,
    /// The feature takes the window away from the category.
    Lowers,
}

/// Where the window's value lies against the category's mean.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Relation {
    /// More than the category ("more driven guitar than the category", "brighter").
    Above,
    /// Less than the category ("less low end", "darker").
    Below,
    /// Exactly the category's mean.
    Level,
}

impl Reason {
    /// Whether the feature raises or lowers the closeness.
    #[must_use]
    pub fn push(&self) -> Push {
        if self.push_log_odds >= 0.0 {
            Push::Raises
        } else {
            Push::Lowers
        }
    }

    /// The window's value against the category's mean.
    #[must_use]
    pub fn relation_to_category(&self) -> Relation {
        if self.value > self.category_mean {
            Relation::Above
        } else if self.value < self.category_mean {
            Relation::Below
        } else {
            Relation::Level
        }
    }

    /// Approximate change of closeness (0–1) due to this feature alone, at closeness
    /// `closeness`: the push times the sigmoid's slope `p(1 − p)` (first-order; exact for small
    /// pushes).
    #[must_use]
    pub fn approximate_closeness_change(&self, closeness: f64) -> f64 {
        self.push_log_odds * closeness * (1.0 - closeness)
    }
}

/// Writes to `out` the `count` features with the largest `|push|` (largest first; ties keep the
/// lower feature index), without allocating when `out` has capacity for `count`.
pub(crate) fn select_top(
    push: &[f64],
    count: usize,
    value: &[f64],
    category_mean: &[f64],
    training_mean: &[f64],
    out: &mut Vec<Reason>,
) {
    out.clear();
    let count = count.min(push.len()).min(MAX_REASONS);
    for (feature, &p) in push.iter().enumerate() {
        if out.len() == count && out.last().is_none_or(|r| r.push_log_odds.abs() >= p.abs()) {
            continue;
        }
        let reason = Reason {
            feature,
            push_log_odds: p,
            value: value[feature],
            category_mean: category_mean[feature],
            training_mean: training_mean[feature],
        };
        let at = out
            .iter()
            .position(|r| r.push_log_odds.abs() < p.abs())
            .unwrap_or(out.len());
        if out.len() == count {
            out.pop();
        }
        out.insert(at, reason);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn keeps_the_largest_pushes_in_order() {
        let push = [0.1, -2.0, 0.5, 3.0, -0.5, 0.0];
        let zeros = [0.0; 6];
        let mut out = Vec::with_capacity(MAX_REASONS);
        select_top(&push, 3, &push, &zeros, &zeros, &mut out);
        let features: Vec<usize> = out.iter().map(|r| r.feature).collect();
        assert_eq!(features, vec![3, 1, 2], "ties keep the lower index");
        assert_eq!(out[1].push(), Push::Lowers);
        assert_eq!(out[0].push(), Push::Raises);
        assert_eq!(out[0].relation_to_category(), Relation::Above);
        select_top(&push, 10, &push, &zeros, &zeros, &mut out);
        assert_eq!(out.len(), 6);
        assert!(
            out.windows(2)
                .all(|w| w[0].push_log_odds.abs() >= w[1].push_log_odds.abs())
        );
    }
}
