//! The presence stage: which families are sounding, decided by shallow multi-label classifiers
//! over ~0.75 s of context.
//!
//! **Features** (schema [`PRESENCE_SCHEMA`]), all ratios or spreads of logarithms, so a gain
//! change of the input changes none of them:
//! - per family, over the context: its energy share under the full dictionary (NMF alone),
//!   the square root of that share, and its largest share in any single column (`3 F` values);
//! - per atom, the square root of its share of the context's energy under the full
//!   dictionary (`A` values: which notes and timbres of a family the fit used tells apart a
//!   family that sounds from one that only absorbs leaked energy);
//! - the spectral shape: log10 of each of [`COARSE_BANDS`] groups of bands' share of the
//!   context's energy;
//! - the movement: the standard deviation over the context of log10 of the energy in each
//!   group (onsets, tremolo, decays);
//! - the mean share the full dictionary leaves unexplained, and the mean spectral flatness of
//!   the columns (geometric over arithmetic mean of the band energies; N. S. Jayant and P. Noll,
//!   *Digital Coding of Waveforms*, 1984), tonal versus noisy;
//! - the mean and standard deviation over the context of each column's fine-resolution values
//!   ([`super::fine`]: flatness and crest per half octave at FFT resolution, the cepstral
//!   envelope and the cepstral peak), which the mel bands blur away. This group is what
//!   [`PRESENCE_SCHEMA_V2`] adds to [`PRESENCE_SCHEMA_V1`];
//! - per family, how its part of the full-dictionary fit moves over the context (`3 F`
//!   values, what [`PRESENCE_SCHEMA`] adds to [`PRESENCE_SCHEMA_V2`]): the standard deviation
//!   over the columns of its share of each column; its share at the onsets (each column's
//!   share weighted by the column's rise in energy over the one before, the half-wave
//!   rectified difference of spectral flux, J. P. Bello et al., IEEE Trans. Speech and Audio
//!   Processing 13(5), 2005); and the mean absolute change of log10 of its energy from one
//!   column to the next. A struck or plucked family carries its share at the onsets and then
//!   decays; a family that only absorbs energy leaked from another follows that other's
//!   course instead.
//!
//! **Model**: one hidden layer (ReLU) shared by all families and one sigmoid output per family
//! (a multi-layer perceptron, D. E. Rumelhart, G. E. Hinton and R. J. Williams, Nature 1986),
//! or no hidden layer, which is per-family logistic regression. Trained with Adam (D. P.
//! Kingma and J. Ba, ICLR 2015) on class-balanced binary cross-entropy, the step size decaying
//! along a half cosine; each family's decision threshold maximises F_β
//! ([`DEFAULT_THRESHOLD_BETA`]) on the last fifth of the training rows (whole mixes the fit never
//! saw). Several networks fitted from different starts can be averaged (an ensemble, T. G.
//! Dietterich, *Ensemble Methods in Machine Learning*, 2000): their mean logit is itself one
//! network with all their hidden units, so the palette stores and runs it as one.
//!
//! **Boosted trees** (optional, [`super::trees`]): per family, gradient-boosted regression
//! trees over the raw features; when the model carries them, each family's logit is the mean of
//! the network's and the trees', and the thresholds are chosen on that mean.
//!
//! **Direct share network** (optional, [`ShareNetwork`]): a second network over the same
//! standardised features whose softmax output estimates each family's share of the energy
//! itself, fitted to the exact shares of the same training mixes (cross-entropy with soft
//! targets). The amount stage's shares are weighed by it (see the estimator). On its own it
//! misattributes more energy than the two stages; blended, it holds down families that the
//! presence stage admitted but that it does not hear.

use super::fine::FINE_VALUES;
use super::nmf::dot;
#[cfg(target_arch = "x86_64")]
use super::nmf::simd_dots;
use super::trees::{BoostedTrees, TreeTraining, train_trees};
use crate::scene::SceneRng;
use ndarray::linalg::general_mat_mul;
use ndarray::{Array2, ArrayView1, ArrayView2, ArrayViewMut2, Axis, Slice};
use serde::{Deserialize, Serialize};

/// The name of the feature schema below, which new presence models are trained on.
pub const PRESENCE_SCHEMA: &str = "presence-v3";
/// The schema before it: the same features without the per-family movement ones (a prefix of
/// [`PRESENCE_SCHEMA`]'s vector). Palettes trained on it still load and run.
pub const PRESENCE_SCHEMA_V2: &str = "presence-v2";
/// The first schema: [`PRESENCE_SCHEMA_V2`] without the fine-resolution features (a prefix of
/// it). Palettes trained on it still load and run.
pub const PRESENCE_SCHEMA_V1: &str = "presence-v1";
/// Per-family movement values of [`PRESENCE_SCHEMA`] (standard deviation of the share, share
/// at the onsets, mean absolute change of the log energy).
pub const MOVEMENT_VALUES: usize = 3;
/// Groups of bands for the spectral-shape and movement features.
pub const COARSE_BANDS: usize = 32;
/// The largest hidden layer a palette may carry.
pub const MAX_HIDDEN: usize = 512;

/// Number of presence features for `families` families with `atoms` atoms in all
/// ([`PRESENCE_SCHEMA`]).
pub fn feature_count(families: usize, atoms: usize) -> usize {
    feature_count_v2(families, atoms) + MOVEMENT_VALUES * families
}

/// Number of presence features of [`PRESENCE_SCHEMA_V2`].
pub fn feature_count_v2(families: usize, atoms: usize) -> usize {
    feature_count_v1(families, atoms) + 2 * FINE_VALUES
}

/// Number of presence features of `schema` for `families` families with `atoms` atoms in all,
/// or `None` for a schema this version does not know.
pub fn schema_feature_count(schema: &str, families: usize, atoms: usize) -> Option<usize> {
    match schema {
        PRESENCE_SCHEMA => Some(feature_count(families, atoms)),
        PRESENCE_SCHEMA_V2 => Some(feature_count_v2(families, atoms)),
        PRESENCE_SCHEMA_V1 => Some(feature_count_v1(families, atoms)),
        _ => None,
    }
}

/// Number of presence features of [`PRESENCE_SCHEMA_V1`].
pub fn feature_count_v1(families: usize, atoms: usize) -> usize {
    3 * families + atoms + 2 * COARSE_BANDS + 2
}

/// A trained presence model (stored in the palette).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PresenceModel {
    /// The feature schema, [`PRESENCE_SCHEMA`].
    pub schema: String,
    /// Number of input features.
    pub features: usize,
    /// Mean of each feature over the training rows (standardisation).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub mean: Vec<f32>,
    /// Standard deviation of each feature over the training rows (1 where it was 0).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub scale: Vec<f32>,
    /// Hidden units (0: logistic regression on the features).
    pub hidden: usize,
    /// Hidden weights, `hidden × features`, row-major.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub w1: Vec<f32>,
    /// Hidden biases.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub b1: Vec<f32>,
    /// Output weights, `families × inputs` where inputs is `hidden` (or `features`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub w2: Vec<f32>,
    /// Output biases, one per family.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub b2: Vec<f32>,
    /// Decision threshold on each family's probability.
    pub thresholds: Vec<f32>,
    /// The direct share network over the same standardised features, if trained.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub shares: Option<ShareNetwork>,
    /// Boosted trees over the raw features, if trained: each family's logit is then the mean
    /// of the network's and the trees'.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trees: Option<BoostedTrees>,
}

/// A network that estimates each family's share of the energy directly from the presence
/// features: one hidden layer (ReLU) and a softmax output, fitted to the exact shares of the
/// training mixes on cross-entropy. The estimator multiplies the amount stage's family
/// energies by its output raised to [`ShareNetwork::exponent`] (a weighted geometric blend
/// of the two estimates, renormalised), so a family the presence stage admitted but whose
/// sound the network does not hear is held down. Where the network gives a family at least
/// [`ShareNetwork::admit`], the family takes part in the amount stage even when the presence
/// stage left it out (the network recovers misses the presence thresholds make).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ShareNetwork {
    /// Hidden units (1..=[`MAX_HIDDEN`]).
    pub hidden: usize,
    /// Hidden weights, `hidden × features`, row-major.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub w1: Vec<f32>,
    /// Hidden biases.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub b1: Vec<f32>,
    /// Output weights, `families × hidden`, row-major.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub w2: Vec<f32>,
    /// Output biases, one per family.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub b2: Vec<f32>,
    /// Exponent of the network's shares in the blend (0: no effect).
    pub exponent: f32,
    /// Share (0 < admit ≤ 1) from which the network admits a family to the amount stage that
    /// the presence stage left out; `None` (palettes written before it existed): never.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub admit: Option<f32>,
}

impl PresenceModel {
    /// Number of families the model decides.
    pub fn families(&self) -> usize {
        self.b2.len()
    }

    /// Inputs of the output layer.
    fn inputs(&self) -> usize {
        if self.hidden == 0 {
            self.features
        } else {
            self.hidden
        }
    }

    /// The weight arrays a palette file keeps in its binary section (everything but the
    /// thresholds), in file order: mean, scale, w1, b1, w2, b2, then the direct share
    /// network's w1, b1, w2, b2, then the boosted trees' arrays.
    pub(crate) fn weight_arrays_mut(&mut self) -> Vec<&mut Vec<f32>> {
        let mut v = vec![
            &mut self.mean,
            &mut self.scale,
            &mut self.w1,
            &mut self.b1,
            &mut self.w2,
            &mut self.b2,
        ];
        if let Some(n) = &mut self.shares {
            v.extend([&mut n.w1, &mut n.b1, &mut n.w2, &mut n.b2]);
        }
        if let Some(t) = &mut self.trees {
            v.extend(t.arrays_mut());
        }
        v
    }

    /// The lengths the arrays of [`PresenceModel::weight_arrays_mut`] must have for
    /// `families` families, from the shape fields alone (saturating, for untrusted headers).
    pub(crate) fn weight_lengths(&self, families: usize) -> Vec<usize> {
        let (d, h) = (self.features, self.hidden);
        let inputs = if h == 0 { d } else { h };
        let mut v = vec![
            d,
            d,
            h.saturating_mul(d),
            h,
            families.saturating_mul(inputs),
            families,
        ];
        if let Some(n) = &self.shares {
            let hs = n.hidden;
            v.extend([
                hs.saturating_mul(d),
                hs,
                families.saturating_mul(hs),
                families,
            ]);
        }
        if let Some(t) = &self.trees {
            v.extend(t.lengths(families));
        }
        v
    }

    /// Checks the shapes and values; `Err` names the first problem.
    pub fn check(&self, families: usize, atoms: usize) -> Result<(), String> {
        let Some(expected) = schema_feature_count(&self.schema, families, atoms) else {
            return Err(format!(
                "presence schema '{}' is none of '{PRESENCE_SCHEMA}', '{PRESENCE_SCHEMA_V2}' and '{PRESENCE_SCHEMA_V1}'",
                self.schema
            ));
        };
        if self.features != expected {
            return Err(format!(
                "{} presence features for {families} families and {atoms} atoms; expected {expected}",
                self.features,
            ));
        }
        if self.hidden > MAX_HIDDEN {
            return Err(format!(
                "{} hidden units; at most {MAX_HIDDEN}",
                self.hidden
            ));
        }
        let expect = [
            ("mean", self.mean.len(), self.features),
            ("scale", self.scale.len(), self.features),
            ("w1", self.w1.len(), self.hidden * self.features),
            ("b1", self.b1.len(), self.hidden),
            ("w2", self.w2.len(), families * self.inputs()),
            ("b2", self.b2.len(), families),
            ("thresholds", self.thresholds.len(), families),
        ];
        for (name, got, want) in expect {
            if got != want {
                return Err(format!("presence {name} has {got} values; expected {want}"));
            }
        }
        let all = [
            &self.mean,
            &self.scale,
            &self.w1,
            &self.b1,
            &self.w2,
            &self.b2,
            &self.thresholds,
        ];
        if all.iter().any(|v| v.iter().any(|x| !x.is_finite())) {
            return Err("presence model holds a value that is not finite".into());
        }
        if self.scale.iter().any(|&s| s <= 0.0) {
            return Err("presence scale holds a value that is not positive".into());
        }
        if self.thresholds.iter().any(|t| !(0.0..=1.0).contains(t)) {
            return Err("presence threshold outside 0..=1".into());
        }
        if let Some(net) = &self.shares {
            net.check(self.features, families)?;
        }
        if let Some(trees) = &self.trees {
            trees.check(self.features, families)?;
        }
        Ok(())
    }

    /// Scratch values [`PresenceModel::predict_into`] and [`PresenceModel::shares_into`] need
    /// per row (for `n` rows at once, `n` times as many).
    pub fn scratch_len(&self) -> usize {
        let direct = self.shares.as_ref().map_or(0, |n| n.hidden);
        // The standardised row, the hidden layer, and the trees' logit.
        self.features + self.hidden.max(direct) + 1
    }

    /// The direct share network's estimate of each family's share (summing to 1) into `out`;
    /// false (and `out` untouched) when the model has no such network. `scratch` as for
    /// [`PresenceModel::predict_into`]. Does not allocate.
    pub fn shares_into(&self, x: &[f32], scratch: &mut [f32], out: &mut [f32]) -> bool {
        self.shares_many(x, x.len(), scratch, out, out.len())
    }

    /// [`PresenceModel::shares_into`] for every row of `xs` (rows of `stride` values): row
    /// `r`'s shares go to `out[r * out_stride..]`; `scratch` holds at least
    /// [`PresenceModel::scratch_len`] values per row. The same values, bit for bit, as one call
    /// per row, but each weight is read from memory once for all the rows. Does not allocate.
    pub fn shares_many(
        &self,
        xs: &[f32],
        stride: usize,
        scratch: &mut [f32],
        out: &mut [f32],
        out_stride: usize,
    ) -> bool {
        let Some(net) = &self.shares else {
            return false;
        };
        let n = xs.len() / stride;
        let (zs, rest) = scratch.split_at_mut(n * self.features);
        self.standardise_rows(xs, stride, zs);
        let hs = &mut rest[..n * net.hidden];
        affine(&net.w1, &net.b1, zs, hs, net.hidden, true);
        affine(&net.w2, &net.b2, hs, out, out_stride, false);
        for o in out.chunks_mut(out_stride).take(n) {
            softmax(&mut o[..net.b2.len()]);
        }
        true
    }

    /// Standardises the first `features` values of every row of `xs` into the rows of `zs`.
    fn standardise_rows(&self, xs: &[f32], stride: usize, zs: &mut [f32]) {
        let d = self.features;
        for (x, z) in xs.chunks_exact(stride).zip(zs.chunks_exact_mut(d)) {
            for i in 0..d {
                z[i] = (x[i] - self.mean[i]) / self.scale[i];
            }
        }
    }

    /// Probabilities that each family is present, into `out` (one per family), using
    /// `scratch` (at least [`PresenceModel::scratch_len`] values). `x` is a
    /// [`PRESENCE_SCHEMA`] vector, of which a model of an earlier schema reads the prefix it
    /// knows. Does not allocate.
    pub fn predict_into(&self, x: &[f32], scratch: &mut [f32], out: &mut [f32]) {
        self.predict_many(x, x.len(), scratch, out, out.len());
    }

    /// [`PresenceModel::predict_into`] for every row of `xs` (rows of `stride` values): row
    /// `r`'s probabilities go to `out[r * out_stride..]`; `scratch` holds at least
    /// [`PresenceModel::scratch_len`] values per row. The same values, bit for bit, as one call
    /// per row, but each weight and tree is read from memory once for all the rows, not once
    /// per row. Does not allocate.
    pub fn predict_many(
        &self,
        xs: &[f32],
        stride: usize,
        scratch: &mut [f32],
        out: &mut [f32],
        out_stride: usize,
    ) {
        let n = xs.len() / stride;
        let (zs, rest) = scratch.split_at_mut(n * self.features);
        self.standardise_rows(xs, stride, zs);
        let (inputs, rest): (&[f32], &mut [f32]) = if self.hidden == 0 {
            (zs, rest)
        } else {
            let (hs, rest) = rest.split_at_mut(n * self.hidden);
            affine(&self.w1, &self.b1, zs, hs, self.hidden, true);
            (hs, rest)
        };
        affine(&self.w2, &self.b2, inputs, out, out_stride, false);
        let families = self.b2.len();
        match &self.trees {
            Some(t) => {
                let logits = &mut rest[..n];
                for f in 0..families {
                    t.logits_into(f, xs, stride, logits);
                    for (o, &l) in out.chunks_mut(out_stride).zip(logits.iter()) {
                        o[f] = sigmoid(0.5 * (o[f] + l));
                    }
                }
            }
            None => {
                for o in out.chunks_mut(out_stride).take(n) {
                    o[..families].iter_mut().for_each(|a| *a = sigmoid(*a));
                }
            }
        }
    }
}

impl ShareNetwork {
    /// Whether the network's share `r` admits a family on its own.
    pub fn admits(&self, r: f32) -> bool {
        self.admit.is_some_and(|a| r >= a)
    }

    /// Checks the shapes and values against `features` inputs and `families` outputs.
    fn check(&self, features: usize, families: usize) -> Result<(), String> {
        if !(1..=MAX_HIDDEN).contains(&self.hidden) {
            return Err(format!(
                "share network has {} hidden units; expected 1..={MAX_HIDDEN}",
                self.hidden
            ));
        }
        let expect = [
            ("w1", self.w1.len(), self.hidden * features),
            ("b1", self.b1.len(), self.hidden),
            ("w2", self.w2.len(), families * self.hidden),
            ("b2", self.b2.len(), families),
        ];
        for (name, got, want) in expect {
            if got != want {
                return Err(format!(
                    "share network {name} has {got} values; expected {want}"
                ));
            }
        }
        let all = [&self.w1, &self.b1, &self.w2, &self.b2];
        if all.iter().any(|v| v.iter().any(|x| !x.is_finite())) {
            return Err("share network holds a value that is not finite".into());
        }
        if !(self.exponent.is_finite() && (0.0..=MAX_SHARE_EXPONENT).contains(&self.exponent)) {
            return Err(format!(
                "share network exponent {} is outside 0..={MAX_SHARE_EXPONENT}",
                self.exponent
            ));
        }
        if let Some(a) = self.admit
            && !(a > 0.0 && a <= 1.0)
        {
            return Err(format!(
                "share network admit {a} is outside 0 (excluded) ..= 1"
            ));
        }
        Ok(())
    }
}

/// The largest exponent a share network may carry.
pub const MAX_SHARE_EXPONENT: f32 = 4.0;

/// One layer of a network for every row `x` of `xs` (rows of `w.len() / b.len()` values):
/// `o[j] = b[j] + w[j]·x`, then `max(0, ·)` with `relu`, into the row `o` of `outs` that
/// starts at `r * out_stride`; `w` row-major `b.len() × x.len()`. Does not allocate.
///
/// The layers' multiply-adds were the largest cost of the presence stage (one sum per weight:
/// 0.7 M per column for the built-in palette's networks). Four weight rows at a time are
/// applied to every input row before the next four, so the weights cross the memory bus once
/// per call, not once per input row. On CPUs with AVX2 and FMA, or AVX-512 (x86-64-v3 or -v4,
/// detected at run time), the four sums run in fused multiply-adds, each `x` value loaded once
/// for the four ([`Affine`]); elsewhere one [`dot`] per sum. The two round differently, in the
/// last bits; the number of rows never changes a row's result.
fn affine(w: &[f32], b: &[f32], xs: &[f32], outs: &mut [f32], out_stride: usize, relu: bool) {
    let d = w.len() / b.len().max(1);
    debug_assert_eq!(w.len(), b.len() * d);
    debug_assert!(b.len() <= out_stride && xs.len().is_multiple_of(d.max(1)));
    #[cfg(target_arch = "x86_64")]
    if let arch @ (pulp::Arch::V3(_) | pulp::Arch::V4(_)) = pulp::Arch::new() {
        arch.dispatch(Affine {
            w,
            b,
            xs,
            outs,
            out_stride,
            relu,
        });
        return;
    }
    affine_portable(w, b, xs, outs, out_stride, relu);
}

/// [`affine`] in portable code.
fn affine_portable(
    w: &[f32],
    b: &[f32],
    xs: &[f32],
    outs: &mut [f32],
    out_stride: usize,
    relu: bool,
) {
    let d = w.len() / b.len().max(1);
    for (x, o) in xs.chunks_exact(d).zip(outs.chunks_mut(out_stride)) {
        for (j, o) in o[..b.len()].iter_mut().enumerate() {
            let v = b[j] + dot(&w[j * d..(j + 1) * d], x);
            *o = if relu { v.max(0.0) } else { v };
        }
    }
}

/// [`affine`] in explicit SIMD, generic over the instruction set (`pulp`): four weight rows
/// at a time, two accumulators per row (eight independent fused multiply-add chains, enough
/// to hide their latency), then the weight rows left over one at a time.
#[cfg(target_arch = "x86_64")]
struct Affine<'a> {
    w: &'a [f32],
    b: &'a [f32],
    xs: &'a [f32],
    outs: &'a mut [f32],
    out_stride: usize,
    relu: bool,
}

#[cfg(target_arch = "x86_64")]
impl pulp::WithSimd for Affine<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, simd: S) {
        let Affine {
            w,
            b,
            xs,
            outs,
            out_stride,
            relu,
        } = self;
        let d = w.len() / b.len().max(1);
        let finish = |v: f32| if relu { v.max(0.0) } else { v };
        let row = |j: usize| S::as_simd_f32s(&w[j * d..(j + 1) * d]);
        let mut j = 0;
        while j + 4 <= b.len() {
            let wv: [_; 4] = std::array::from_fn(|k| row(j + k));
            for (x, o) in xs.chunks_exact(d).zip(outs.chunks_mut(out_stride)) {
                let s = simd_dots(simd, wv, S::as_simd_f32s(x));
                for k in 0..4 {
                    o[j + k] = finish(b[j + k] + s[k]);
                }
            }
            j += 4;
        }
        for j in j..b.len() {
            let wv = [row(j)];
            for (x, o) in xs.chunks_exact(d).zip(outs.chunks_mut(out_stride)) {
                o[j] = finish(b[j] + simd_dots(simd, wv, S::as_simd_f32s(x))[0]);
            }
        }
    }
}

/// Logits to probabilities in place (max-shifted, so no logit overflows).
fn softmax(v: &mut [f32]) {
    let m = v.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let mut sum = 0.0;
    for x in v.iter_mut() {
        *x = (*x - m).exp();
        sum += *x;
    }
    if sum > 0.0 && sum.is_finite() {
        v.iter_mut().for_each(|x| *x /= sum);
    }
}

fn sigmoid(a: f32) -> f32 {
    1.0 / (1.0 + (-a.clamp(-40.0, 40.0)).exp())
}

/// The default [`PresenceTraining::threshold_beta`]: precision weighs four times as much as
/// recall. Chosen by measurement on the built-in palette's model (`weft palette check --mixes
/// 60`, seeds 1, 2, 3, energy misattributed per family): F1 thresholds (β = 1) 40.7, 45.0,
/// 43.1 %; β = 0.5 37.8, 44.1, 41.9 %. False alarms cost more than misses: on seed 1, the
/// model's decisions without their false alarms misattributed 18.3 % of the energy, without
/// their misses 31.9 %. The built-in palette's later ensemble of four networks measured best
/// at β = 0.7 (see `cargo xtask palette`); the default stays with the lighter models it was
/// measured on.
pub const DEFAULT_THRESHOLD_BETA: f32 = 0.5;

/// How a presence model is trained.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct PresenceTraining {
    /// Hidden units (0: logistic regression).
    pub hidden: usize,
    /// Passes over the training rows.
    pub epochs: usize,
    /// Rows per Adam step.
    pub batch: usize,
    /// Adam step size.
    pub learning_rate: f32,
    /// L2 penalty on the weights.
    pub l2: f32,
    /// Seed of the initial weights, the shuffles and the threshold split.
    pub seed: u64,
    /// β of the F-score each family's decision threshold maximises on the held-back rows (C. J.
    /// van Rijsbergen, *Information Retrieval*, 1979:
    /// `F_β = (1 + β²) tp / ((1 + β²) tp + β² fn + fp)`). Below 1 it favours precision, which
    /// the shares need: a family judged present by mistake takes energy from the others, while
    /// a missed one leaves its energy to be shared among the present families.
    pub threshold_beta: f32,
    /// Networks fitted from different starts whose logits are averaged (1: one network).
    pub members: usize,
    /// Threads the members are fitted on (results do not depend on it).
    pub threads: usize,
    /// The direct share network trained beside the presence model (none by default).
    pub shares: ShareTraining,
    /// Boosted trees trained beside the network (none by default).
    pub trees: TreeTraining,
}

/// How a direct share network ([`ShareNetwork`]) is trained: Adam on the cross-entropy of
/// its softmax against the exact shares, the step size decaying as for the presence model.
/// The defaults were chosen by measurement on the built-in palette's training rows (see
/// `cargo xtask palette`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ShareTraining {
    /// Hidden units (0: no share network).
    pub hidden: usize,
    /// Passes over the training rows.
    pub epochs: usize,
    /// Rows per Adam step.
    pub batch: usize,
    /// Adam step size.
    pub learning_rate: f32,
    /// L2 penalty on the weights.
    pub l2: f32,
    /// [`ShareNetwork::exponent`] of the trained network.
    pub exponent: f32,
    /// [`ShareNetwork::admit`] of the trained network (0: none).
    pub admit: f32,
}

impl Default for ShareTraining {
    fn default() -> Self {
        Self {
            hidden: 0,
            epochs: 8,
            batch: 256,
            learning_rate: 1e-3,
            l2: 1e-3,
            exponent: 0.5,
            admit: DEFAULT_SHARE_ADMIT,
        }
    }
}

/// The default [`ShareNetwork::admit`]: chosen by measurement on the built-in palette (`weft
/// palette check --mixes 60`, energy misattributed per family; see `cargo xtask palette`).
pub const DEFAULT_SHARE_ADMIT: f32 = 0.25;

impl Default for PresenceTraining {
    fn default() -> Self {
        // Chosen by measurement on held-out mixes (see the palette note): on the 1 500
        // training mixes `weft palette learn` renders by default, logistic regression
        // generalised as well as hidden layers of 16–128 units, which overfit them. With many
        // more mixes a hidden layer wins: the built-in palette uses 64 units on 24 000 mixes
        // (`cargo xtask palette`).
        Self {
            hidden: 0,
            epochs: 20,
            batch: 128,
            learning_rate: 2e-3,
            l2: 1e-2,
            seed: 1,
            threshold_beta: DEFAULT_THRESHOLD_BETA,
            members: 1,
            threads: 1,
            shares: ShareTraining::default(),
            trees: TreeTraining::default(),
        }
    }
}

/// Trains a presence model on `rows` (row-major, `n × features`) with labels `labels`
/// (row-major, `n × families`). With `opts.members` above 1, that many networks are fitted from
/// different starts and shuffles (on up to `opts.threads` threads; the result does not depend
/// on the number) and stored as one network whose hidden layer holds all of theirs and whose
/// output averages their logits. Allocates; for palettes, not live use.
pub fn train_presence(
    rows: &[f32],
    features: usize,
    labels: &[bool],
    families: usize,
    opts: &PresenceTraining,
) -> PresenceModel {
    train_presence_reporting(rows, features, labels, families, opts, &|_, _, _| {})
}

/// What [`train_presence_reporting`] tells of the networks' epochs.
pub const EPOCH_STEPS: &str = "presence epochs";
/// What [`train_presence_reporting`] tells of the boosted trees.
pub const TREE_STEPS: &str = "boosted trees";

/// [`train_presence`], telling `report(what, done, total)` after each epoch of each member how
/// many epochs of all members are done (`what` is [`EPOCH_STEPS`]; from the thread that fitted
/// it), then after each boosted tree how many trees of all families are done ([`TREE_STEPS`];
/// a family that stops early has its remaining trees told at the end). The two take different
/// times per step, so they are counted apart. The result is the same as without reports.
pub fn train_presence_reporting(
    rows: &[f32],
    features: usize,
    labels: &[bool],
    families: usize,
    opts: &PresenceTraining,
    report: &(dyn Fn(&str, usize, usize) + Sync),
) -> PresenceModel {
    let n = rows.len().checked_div(features).unwrap_or(0);
    let (mean, scale) = standardisation(rows, features, n);
    let z = standardised(rows, &mean, &scale);
    // Hold back the last fifth of the rows for the thresholds: rows arrive mix by mix, so these
    // come from mixes the fit never saw (a random split would tune on the fit's own mixes).
    let held = n / 5;
    let order: Vec<usize> = (0..n).collect();
    let (fit, tune) = order.split_at(n - held);
    let members = opts.members.max(1);
    let hidden = if opts.hidden == 0 {
        0
    } else {
        opts.hidden.min(MAX_HIDDEN / members).max(1)
    };
    // Class balance: positives weighted by (negatives / positives) per family, capped.
    let pos_weight: Vec<f32> = (0..families)
        .map(|f| {
            let pos = fit
                .iter()
                .filter(|&&i| labels[i * families + f])
                .count()
                .max(1) as f32;
            let neg = (fit.len() as f32 - pos).max(1.0);
            (neg / pos).clamp(0.2, 20.0).sqrt()
        })
        .collect();
    let data = FitData {
        z: &z,
        features,
        targets: Targets::Presence {
            labels,
            pos_weight: &pos_weight,
        },
        families,
        fit,
    };
    let schedule = Schedule {
        hidden,
        epochs: opts.epochs,
        batch: opts.batch,
        learning_rate: opts.learning_rate,
        l2: opts.l2,
        seed: opts.seed,
        stream: PRESENCE_STREAM,
    };
    // A logistic regression is convex: members would all reach the same weights.
    let members = if hidden == 0 { 1 } else { members };
    let epoch_report = |done: usize, total: usize| report(EPOCH_STEPS, done, total);
    let epochs = EpochCount::new(members * opts.epochs, &epoch_report);
    let threads = opts.threads.clamp(1, members);
    let mut fitted: Vec<Option<Params>> = vec![None; members];
    std::thread::scope(|scope| {
        let chunks: Vec<&mut [Option<Params>]> =
            fitted.chunks_mut(members.div_ceil(threads)).collect();
        let mut first = 0;
        for chunk in chunks {
            let data = &data;
            let epochs = &epochs;
            let start = first;
            first += chunk.len();
            scope.spawn(move || {
                for (j, slot) in chunk.iter_mut().enumerate() {
                    *slot = Some(fit_member(data, &schedule, start + j, epochs));
                }
            });
        }
    });
    let params = merge_members(
        fitted.into_iter().flatten().collect(),
        features,
        hidden,
        families,
    );
    let hidden = hidden * members;
    let tree_report = |done: usize, total: usize| report(TREE_STEPS, done, total);
    let tree_count = EpochCount::new(families * opts.trees.trees, &tree_report);
    let trees = train_trees(
        rows,
        features,
        labels,
        families,
        fit,
        tune,
        &pos_weight,
        &opts.trees,
        SceneRng::derive(opts.seed, TREE_STREAM).next_u64(),
        opts.threads,
        &|| tree_count.epoch_done(),
    );
    tree_count.finish();
    // Thresholds: maximise F_β on the held-back rows (0.5 when there are none).
    let b2 = f64::from(opts.threshold_beta.clamp(0.05, 20.0)).powi(2);
    let mut hbuf = vec![0.0_f32; hidden];
    let mut out = vec![0.0_f32; families];
    let mut probs = vec![0.0_f32; held * families];
    for (r, &i) in tune.iter().enumerate() {
        forward(
            &params,
            &z[i * features..(i + 1) * features],
            features,
            hidden,
            &mut hbuf,
            &mut out,
        );
        let x = &rows[i * features..(i + 1) * features];
        for (f, (p, &a)) in probs[r * families..(r + 1) * families]
            .iter_mut()
            .zip(&out)
            .enumerate()
        {
            *p = sigmoid(match &trees {
                Some(t) => 0.5 * (a + t.logit(f, x)),
                None => a,
            });
        }
    }
    let thresholds = (0..families)
        .map(|f| {
            let mut best = (0.5_f32, -1.0_f64);
            for step in 1..20 {
                let t = step as f32 * 0.05;
                let (mut tp, mut fp, mut fneg) = (0usize, 0usize, 0usize);
                for (r, &i) in tune.iter().enumerate() {
                    let y = labels[i * families + f];
                    let p = probs[r * families + f] >= t;
                    match (p, y) {
                        (true, true) => tp += 1,
                        (true, false) => fp += 1,
                        (false, true) => fneg += 1,
                        _ => {}
                    }
                }
                let score = if tp == 0 {
                    0.0
                } else {
                    (1.0 + b2) * tp as f64 / ((1.0 + b2) * tp as f64 + b2 * fneg as f64 + fp as f64)
                };
                if score > best.1 {
                    best = (t, score);
                }
            }
            best.0
        })
        .collect();
    PresenceModel {
        schema: PRESENCE_SCHEMA.to_owned(),
        features,
        mean,
        scale,
        hidden,
        w1: params.w1,
        b1: params.b1,
        w2: params.w2,
        b2: params.b2,
        thresholds,
        shares: None,
        trees,
    }
}

/// Trains a direct share network ([`ShareNetwork`]) for `model` on the same rows it was
/// trained on (`rows`, `n × features`) with each row's exact family shares (`shares`,
/// `n × families`, each row summing to 1), standardised as `model` standardises them. It fits
/// on the first four fifths of the rows and returns, beside the network, the energy it
/// misattributes on the last fifth (whole mixes it never saw; total variation distance, %).
/// `None` when `opts.shares.hidden` is 0 or there are no rows. Allocates; for palettes.
pub fn train_share_network(
    rows: &[f32],
    shares: &[f32],
    model: &PresenceModel,
    opts: &PresenceTraining,
) -> Option<(ShareNetwork, f64)> {
    train_share_network_reporting(rows, shares, model, opts, &|_, _| {})
}

/// [`train_share_network`], telling `report(done, total)` after each epoch how many are done.
pub fn train_share_network_reporting(
    rows: &[f32],
    shares: &[f32],
    model: &PresenceModel,
    opts: &PresenceTraining,
    report: &(dyn Fn(usize, usize) + Sync),
) -> Option<(ShareNetwork, f64)> {
    let t = opts.shares;
    let features = model.features;
    let families = model.families();
    let n = rows.len().checked_div(features).unwrap_or(0);
    if t.hidden == 0 || n == 0 || shares.len() != n * families {
        return None;
    }
    let z = standardised(rows, &model.mean, &model.scale);
    let held = n / 5;
    let order: Vec<usize> = (0..n).collect();
    let (fit, tune) = order.split_at(n - held);
    let hidden = t.hidden.min(MAX_HIDDEN);
    let data = FitData {
        z: &z,
        features,
        targets: Targets::Shares(shares),
        families,
        fit,
    };
    let schedule = Schedule {
        hidden,
        epochs: t.epochs,
        batch: t.batch,
        learning_rate: t.learning_rate,
        l2: t.l2,
        seed: opts.seed,
        stream: SHARE_STREAM,
    };
    let p = fit_member(&data, &schedule, 0, &EpochCount::new(t.epochs, report));
    let mut hbuf = vec![0.0_f32; hidden];
    let mut out = vec![0.0_f32; families];
    let mut tv = 0.0;
    for &i in tune {
        forward(
            &p,
            &z[i * features..(i + 1) * features],
            features,
            hidden,
            &mut hbuf,
            &mut out,
        );
        softmax(&mut out);
        let truth = &shares[i * families..(i + 1) * families];
        tv += 0.5
            * out
                .iter()
                .zip(truth)
                .map(|(a, b)| f64::from((a - b).abs()))
                .sum::<f64>();
    }
    let tv_pct = 100.0 * tv / tune.len().max(1) as f64;
    let net = ShareNetwork {
        hidden,
        w1: p.w1,
        b1: p.b1,
        w2: p.w2,
        b2: p.b2,
        exponent: t.exponent.clamp(0.0, MAX_SHARE_EXPONENT),
        admit: (t.admit > 0.0).then(|| t.admit.min(1.0)),
    };
    Some((net, tv_pct))
}

/// Mean and standard deviation of each of `features` columns of `rows` (1 where it is 0).
fn standardisation(rows: &[f32], features: usize, n: usize) -> (Vec<f32>, Vec<f32>) {
    let mut mean = vec![0.0_f32; features];
    let mut scale = vec![1.0_f32; features];
    if n > 0 {
        for j in 0..features {
            let m = (0..n)
                .map(|i| f64::from(rows[i * features + j]))
                .sum::<f64>()
                / n as f64;
            let v = (0..n)
                .map(|i| (f64::from(rows[i * features + j]) - m).powi(2))
                .sum::<f64>()
                / n as f64;
            mean[j] = m as f32;
            scale[j] = if v.sqrt() > 1e-9 {
                v.sqrt() as f32
            } else {
                1.0
            };
        }
    }
    (mean, scale)
}

/// `rows` standardised with `mean` and `scale` (row-major, as `rows`).
fn standardised(rows: &[f32], mean: &[f32], scale: &[f32]) -> Vec<f32> {
    let d = mean.len();
    rows.iter()
        .enumerate()
        .map(|(i, &v)| (v - mean[i % d]) / scale[i % d])
        .collect()
}

/// Seed streams of the networks' initial weights and shuffles (member `m` adds `1000 m`).
const PRESENCE_STREAM: u64 = 31;
const SHARE_STREAM: u64 = 7919;
const TREE_STREAM: u64 = 104_729;

/// What a network is fitted to, per row and family.
#[derive(Clone, Copy)]
enum Targets<'a> {
    /// Presence labels: sigmoid outputs on cross-entropy, positives weighted per family.
    Presence {
        labels: &'a [bool],
        pos_weight: &'a [f32],
    },
    /// Exact shares (each row sums to 1): a softmax output on cross-entropy.
    Shares(&'a [f32]),
}

impl Targets<'_> {
    /// Turns row `i`'s logits `out` into the loss gradients with respect to them.
    fn gradient(&self, i: usize, out: &mut [f32]) {
        let families = out.len();
        match *self {
            Targets::Presence { labels, pos_weight } => {
                for (f, o) in out.iter_mut().enumerate() {
                    let y = labels[i * families + f];
                    let wgt = if y { pos_weight[f] } else { 1.0 };
                    *o = wgt * (sigmoid(*o) - if y { 1.0 } else { 0.0 });
                }
            }
            Targets::Shares(shares) => {
                softmax(out);
                for (o, &s) in out
                    .iter_mut()
                    .zip(&shares[i * families..(i + 1) * families])
                {
                    *o -= s;
                }
            }
        }
    }
}

/// What every member of a network is fitted on.
struct FitData<'a> {
    /// Standardised rows, `n × features`.
    z: &'a [f32],
    features: usize,
    targets: Targets<'a>,
    families: usize,
    /// The rows fitted on (the rest are held back).
    fit: &'a [usize],
}

/// The shape and step schedule of one fit.
#[derive(Clone, Copy)]
struct Schedule {
    /// Hidden units (0: none).
    hidden: usize,
    epochs: usize,
    batch: usize,
    learning_rate: f32,
    l2: f32,
    seed: u64,
    /// The seed stream of member 0.
    stream: u64,
}

/// Epochs done over all members of a fit, told to a caller's report after each one.
struct EpochCount<'a> {
    done: std::sync::atomic::AtomicUsize,
    total: usize,
    report: &'a (dyn Fn(usize, usize) + Sync),
}

impl<'a> EpochCount<'a> {
    fn new(total: usize, report: &'a (dyn Fn(usize, usize) + Sync)) -> Self {
        Self {
            done: std::sync::atomic::AtomicUsize::new(0),
            total,
            report,
        }
    }

    fn epoch_done(&self) {
        let done = self.done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
        (self.report)(done, self.total);
    }

    /// Tells the whole count done, if steps that stop early (trees) left it short.
    fn finish(&self) {
        let done = self
            .done
            .swap(self.total, std::sync::atomic::Ordering::Relaxed);
        if done < self.total {
            (self.report)(self.total, self.total);
        }
    }
}

/// Fits member `member` of a network: its own initial weights and shuffles, drawn from
/// `schedule.seed` (member 0 of a presence model from the stream a single network has always
/// used). Tells `epochs` after each epoch.
fn fit_member(data: &FitData, schedule: &Schedule, member: usize, epochs: &EpochCount) -> Params {
    let FitData {
        features,
        families,
        fit,
        ..
    } = *data;
    let hidden = schedule.hidden;
    let mut rng = SceneRng::derive(schedule.seed, schedule.stream + 1000 * member as u64);
    let inputs = if hidden == 0 { features } else { hidden };
    let he = |fan_in: usize, rng: &mut SceneRng| {
        (rng.normal() * (2.0 / fan_in.max(1) as f64).sqrt()) as f32
    };
    let mut params = Params {
        w1: (0..hidden * features)
            .map(|_| he(features, &mut rng))
            .collect(),
        b1: vec![0.0; hidden],
        w2: (0..families * inputs)
            .map(|_| 0.5 * he(inputs, &mut rng))
            .collect(),
        b2: vec![0.0; families],
    };
    let mut adam = Adam::new(&params);
    let mut fit = fit.to_vec();
    let mut grads = params.zeros_like();
    let batch_rows = schedule.batch.max(1);
    let mut scratch = BatchScratch::new(batch_rows, features, hidden, families);
    for epoch in 0..schedule.epochs {
        // Cosine decay of the step size over the epochs, down to a twentieth (I. Loshchilov and
        // F. Hutter, "SGDR", ICLR 2017, without restarts): the last epochs settle instead of
        // wandering at full step.
        let t = epoch as f32 / schedule.epochs.max(1) as f32;
        let lr = schedule.learning_rate
            * (FINAL_STEP_FRACTION
                + (1.0 - FINAL_STEP_FRACTION) * 0.5 * (1.0 + (std::f32::consts::PI * t).cos()));
        rng.shuffle(&mut fit);
        for batch in fit.chunks(batch_rows) {
            batch_gradients(data, &params, hidden, batch, &mut scratch, &mut grads);
            let inv = 1.0 / batch.len() as f32;
            grads.scale_add_l2(inv, schedule.l2, &params);
            adam.step(&mut params, &grads, lr);
        }
        epochs.epoch_done();
    }
    params
}

/// The matrices of one batch, allocated once per fit.
struct BatchScratch {
    /// Standardised rows, `batch × features`.
    x: Array2<f32>,
    /// Hidden activations, `batch × hidden`.
    h: Array2<f32>,
    /// Logits, then their gradients, `batch × families`.
    g: Array2<f32>,
    /// Gradients of the hidden activations, `batch × hidden`.
    dh: Array2<f32>,
}

impl BatchScratch {
    fn new(batch: usize, features: usize, hidden: usize, families: usize) -> Self {
        Self {
            x: Array2::zeros((batch, features)),
            h: Array2::zeros((batch, hidden)),
            g: Array2::zeros((batch, families)),
            dh: Array2::zeros((batch, hidden)),
        }
    }
}

/// The summed loss gradients of the rows `batch` into `grads`, as matrix products over the
/// whole batch (the same sums as row by row, in another order).
fn batch_gradients(
    data: &FitData,
    p: &Params,
    hidden: usize,
    batch: &[usize],
    s: &mut BatchScratch,
    grads: &mut Params,
) {
    let (d, families, b) = (data.features, data.families, batch.len());
    let mut x = s.x.slice_axis_mut(Axis(0), Slice::from(..b));
    for (mut row, &i) in x.rows_mut().into_iter().zip(batch) {
        row.assign(&ArrayView1::from(&data.z[i * d..(i + 1) * d]));
    }
    let x = s.x.slice_axis(Axis(0), Slice::from(..b));
    let mut h = s.h.slice_axis_mut(Axis(0), Slice::from(..b));
    if hidden > 0 {
        let w1 = ArrayView2::from_shape((hidden, d), &p.w1).expect("w1 is hidden × features");
        general_mat_mul(1.0, &x, &w1.t(), 0.0, &mut h);
        for mut row in h.rows_mut() {
            for (v, &bias) in row.iter_mut().zip(&p.b1) {
                *v = (*v + bias).max(0.0);
            }
        }
    }
    let inputs = if hidden == 0 { x } else { h.view() };
    let n_in = inputs.ncols();
    let w2 = ArrayView2::from_shape((families, n_in), &p.w2).expect("w2 is families × inputs");
    let mut g = s.g.slice_axis_mut(Axis(0), Slice::from(..b));
    general_mat_mul(1.0, &inputs, &w2.t(), 0.0, &mut g);
    for (r, mut row) in g.rows_mut().into_iter().enumerate() {
        let out = row.as_slice_mut().expect("rows are contiguous");
        for (o, &bias) in out.iter_mut().zip(&p.b2) {
            *o += bias;
        }
        data.targets.gradient(batch[r], out);
    }
    for (gb, col) in grads.b2.iter_mut().zip(g.columns()) {
        *gb = col.sum();
    }
    let mut gw2 = ArrayViewMut2::from_shape((families, n_in), &mut grads.w2)
        .expect("w2 is families × inputs");
    general_mat_mul(1.0, &g.t(), &inputs, 0.0, &mut gw2);
    if hidden > 0 {
        let mut dh = s.dh.slice_axis_mut(Axis(0), Slice::from(..b));
        general_mat_mul(1.0, &g, &w2, 0.0, &mut dh);
        dh.zip_mut_with(&h, |d, &hv| {
            if hv <= 0.0 {
                *d = 0.0;
            }
        });
        for (gb, col) in grads.b1.iter_mut().zip(dh.columns()) {
            *gb = col.sum();
        }
        let mut gw1 =
            ArrayViewMut2::from_shape((hidden, d), &mut grads.w1).expect("w1 is hidden × features");
        general_mat_mul(1.0, &dh.t(), &x, 0.0, &mut gw1);
    }
}

/// The step size of the last epoch as a fraction of [`PresenceTraining::learning_rate`].
const FINAL_STEP_FRACTION: f32 = 0.05;

/// One network equal to the members' average logit: their hidden layers side by side, each
/// member's output weights divided by the number of members, the output biases averaged. A
/// single member is returned as it is.
fn merge_members(members: Vec<Params>, features: usize, hidden: usize, families: usize) -> Params {
    if members.len() == 1 {
        return members.into_iter().next().expect("one member");
    }
    let k = members.len();
    let inv = 1.0 / k as f32;
    let total = hidden * k;
    let mut merged = Params {
        w1: Vec::with_capacity(total * features),
        b1: Vec::with_capacity(total),
        w2: vec![0.0; families * total],
        b2: vec![0.0; families],
    };
    for (m, p) in members.iter().enumerate() {
        merged.w1.extend_from_slice(&p.w1);
        merged.b1.extend_from_slice(&p.b1);
        for f in 0..families {
            let from = &p.w2[f * hidden..(f + 1) * hidden];
            let to = &mut merged.w2[f * total + m * hidden..f * total + (m + 1) * hidden];
            for (t, &w) in to.iter_mut().zip(from) {
                *t = w * inv;
            }
            merged.b2[f] += p.b2[f] * inv;
        }
    }
    merged
}

/// The network's logits for the standardised row `x` into `out`.
fn forward(p: &Params, x: &[f32], d: usize, hidden: usize, hbuf: &mut [f32], out: &mut [f32]) {
    let inputs: &[f32] = if hidden == 0 {
        x
    } else {
        affine(
            &p.w1[..hidden * d],
            &p.b1[..hidden],
            x,
            &mut hbuf[..hidden],
            hidden,
            true,
        );
        hbuf
    };
    affine(&p.w2, &p.b2, inputs, out, out.len(), false);
}

#[derive(Clone)]
struct Params {
    w1: Vec<f32>,
    b1: Vec<f32>,
    w2: Vec<f32>,
    b2: Vec<f32>,
}

impl Params {
    fn zeros_like(&self) -> Self {
        Self {
            w1: vec![0.0; self.w1.len()],
            b1: vec![0.0; self.b1.len()],
            w2: vec![0.0; self.w2.len()],
            b2: vec![0.0; self.b2.len()],
        }
    }
    fn scale_add_l2(&mut self, k: f32, l2: f32, p: &Self) {
        for (g, w) in self.w1.iter_mut().zip(&p.w1) {
            *g = *g * k + l2 * w;
        }
        for (g, w) in self.w2.iter_mut().zip(&p.w2) {
            *g = *g * k + l2 * w;
        }
        self.b1.iter_mut().for_each(|g| *g *= k);
        self.b2.iter_mut().for_each(|g| *g *= k);
    }
}

struct Adam {
    m: Params,
    v: Params,
    t: i32,
}

impl Adam {
    fn new(p: &Params) -> Self {
        Self {
            m: p.zeros_like(),
            v: p.zeros_like(),
            t: 0,
        }
    }
    fn step(&mut self, p: &mut Params, g: &Params, lr: f32) {
        // Kingma & Ba 2015, Algorithm 1, with β1 = 0.9, β2 = 0.999, ε = 1e-8.
        self.t += 1;
        let (b1, b2, eps) = (0.9_f32, 0.999_f32, 1e-8_f32);
        let c1 = 1.0 - b1.powi(self.t);
        let c2 = 1.0 - b2.powi(self.t);
        let groups = [
            (&mut p.w1, &g.w1, &mut self.m.w1, &mut self.v.w1),
            (&mut p.b1, &g.b1, &mut self.m.b1, &mut self.v.b1),
            (&mut p.w2, &g.w2, &mut self.m.w2, &mut self.v.w2),
            (&mut p.b2, &g.b2, &mut self.m.b2, &mut self.v.b2),
        ];
        for (w, g, m, v) in groups {
            for i in 0..w.len() {
                m[i] = b1 * m[i] + (1.0 - b1) * g[i];
                v[i] = b2 * v[i] + (1.0 - b2) * g[i] * g[i];
                w[i] -= lr * (m[i] / c1) / ((v[i] / c2).sqrt() + eps);
            }
        }
    }
}

/// The presence features of the last few columns: a ring of per-column statistics and the
/// feature vector built from it. Allocates only in [`PresenceContext::new`].
#[derive(Debug, Clone)]
pub struct PresenceContext {
    families: usize,
    atoms: usize,
    /// Per column: atom energies (full dictionary), `len × atoms`.
    atom: Vec<f32>,
    len: usize,
    filled: usize,
    next: usize,
    /// Per column: family energies (full dictionary), `len × families`.
    fam: Vec<f32>,
    /// Per column: total energy of the stacked vector the families were fitted on.
    energy: Vec<f32>,
    /// Per column: energy of the newest column alone.
    col_energy: Vec<f32>,
    /// Per column: unexplained energy.
    residual: Vec<f32>,
    /// Per column: energy of each coarse band group, `len × COARSE_BANDS`.
    coarse: Vec<f32>,
    /// Per column: spectral flatness of the column's bands.
    flatness: Vec<f32>,
    /// Per column: the fine-resolution values ([`super::fine`]), `len × FINE_VALUES`.
    fine: Vec<f32>,
    features: Vec<f32>,
}

impl PresenceContext {
    /// A context of `len` columns for `families` families with `atoms` atoms in all.
    pub fn new(families: usize, atoms: usize, len: usize) -> Self {
        let len = len.max(1);
        Self {
            families,
            atoms,
            atom: vec![0.0; len * atoms],
            len,
            filled: 0,
            next: 0,
            fam: vec![0.0; len * families],
            energy: vec![0.0; len],
            col_energy: vec![0.0; len],
            residual: vec![0.0; len],
            coarse: vec![0.0; len * COARSE_BANDS],
            flatness: vec![0.0; len],
            fine: vec![0.0; len * FINE_VALUES],
            features: vec![0.0; feature_count(families, atoms)],
        }
    }

    /// Columns the context holds when full.
    pub fn len(&self) -> usize {
        self.len
    }

    /// Whether no column has been pushed since the start or the last reset.
    pub fn is_empty(&self) -> bool {
        self.filled == 0
    }

    /// Forgets all columns.
    pub fn reset(&mut self) {
        self.filled = 0;
        self.next = 0;
    }

    /// Adds one column: its band energies `column`, the energy of the stacked vector it ends,
    /// the energy each atom and each family explains there under the full dictionary, the
    /// energy left unexplained and the column's fine-resolution values. Does not allocate.
    pub fn push(
        &mut self,
        column: &[f32],
        stacked_energy: f32,
        atom_energy: &[f32],
        family_energy: &[f32],
        residual: f32,
        fine: &[f32; FINE_VALUES],
    ) {
        let i = self.next;
        self.fine[i * FINE_VALUES..(i + 1) * FINE_VALUES].copy_from_slice(fine);
        self.atom[i * self.atoms..(i + 1) * self.atoms].copy_from_slice(atom_energy);
        self.energy[i] = stacked_energy;
        self.col_energy[i] = column.iter().sum();
        self.residual[i] = residual;
        self.fam[i * self.families..(i + 1) * self.families].copy_from_slice(family_energy);
        let bands = column.len();
        for g in 0..COARSE_BANDS {
            let (a, b) = (g * bands / COARSE_BANDS, (g + 1) * bands / COARSE_BANDS);
            self.coarse[i * COARSE_BANDS + g] = column[a..b.max(a)].iter().sum();
        }
        let mean = self.col_energy[i] / bands.max(1) as f32;
        self.flatness[i] = if mean > 0.0 {
            let floor = 1e-6 * mean;
            let log_mean =
                column.iter().map(|&v| (v + floor).ln()).sum::<f32>() / bands.max(1) as f32;
            (log_mean.exp() / mean).clamp(0.0, 1.0)
        } else {
            0.0
        };
        self.next = (i + 1) % self.len;
        self.filled = (self.filled + 1).min(self.len);
    }

    /// Computes the feature vector of the columns held (see the module docs). Does not
    /// allocate.
    pub fn features(&mut self) -> &[f32] {
        let f = self.families;
        let n = self.filled.max(1);
        let total: f32 = self.energy[..n].iter().sum::<f32>().max(f32::MIN_POSITIVE);
        let x = &mut self.features;
        for k in 0..f {
            let mut sum = 0.0_f32;
            let mut peak = 0.0_f32;
            for c in 0..n {
                let e = self.fam[c * f + k];
                sum += e;
                if self.energy[c] > 0.0 {
                    peak = peak.max(e / self.energy[c]);
                }
            }
            let share = (sum / total).clamp(0.0, 1.0);
            x[k] = share;
            x[f + k] = share.sqrt();
            x[2 * f + k] = peak.clamp(0.0, 1.0);
        }
        let o = 3 * f;
        for k in 0..self.atoms {
            let s: f32 = (0..n).map(|c| self.atom[c * self.atoms + k]).sum();
            x[o + k] = (s / total).clamp(0.0, 1.0).sqrt();
        }
        let o = o + self.atoms;
        let col_total: f32 = self.col_energy[..n]
            .iter()
            .sum::<f32>()
            .max(f32::MIN_POSITIVE);
        for g in 0..COARSE_BANDS {
            let s: f32 = (0..n).map(|c| self.coarse[c * COARSE_BANDS + g]).sum();
            x[o + g] = (s / col_total + 1e-7).log10();
        }
        let o = o + COARSE_BANDS;
        let mean_e = col_total / n as f32;
        for g in 0..COARSE_BANDS {
            let mut m = 0.0_f32;
            let mut m2 = 0.0_f32;
            for c in 0..n {
                let e = self.coarse[c * COARSE_BANDS + g];
                let l = (e + 1e-6 * mean_e + f32::MIN_POSITIVE).log10();
                m += l;
                m2 += l * l;
            }
            let m = m / n as f32;
            x[o + g] = (m2 / n as f32 - m * m).max(0.0).sqrt();
        }
        let o = o + COARSE_BANDS;
        let r: f32 = self.residual[..n].iter().sum();
        x[o] = (r / total).clamp(0.0, 1.0);
        let fl: f32 = (0..n).map(|c| self.flatness[c] * self.col_energy[c]).sum();
        x[o + 1] = (fl / col_total).clamp(0.0, 1.0);
        // Fine-resolution values: mean and standard deviation over the columns that held a
        // signal.
        let o = o + 2;
        let voiced = (0..n).filter(|&c| self.col_energy[c] > 0.0).count().max(1) as f32;
        for k in 0..FINE_VALUES {
            let (mut m, mut m2) = (0.0_f32, 0.0_f32);
            for c in (0..n).filter(|&c| self.col_energy[c] > 0.0) {
                let v = self.fine[c * FINE_VALUES + k];
                m += v;
                m2 += v * v;
            }
            let m = m / voiced;
            x[o + k] = m;
            x[o + FINE_VALUES + k] = (m2 / voiced - m * m).max(0.0).sqrt();
        }
        let o = o + 2 * FINE_VALUES;
        // Taken out and put back (no allocation) so `movement` can read the ring.
        let mut x = std::mem::take(&mut self.features);
        self.movement(&mut x[o..o + MOVEMENT_VALUES * f], total / n as f32);
        self.features = x;
        &self.features
    }

    /// The per-family movement values (see the module docs) into `out` (`3 F` values: the
    /// standard deviations, then the shares at the onsets, then the mean log changes);
    /// `mean_energy` is the mean stacked energy of the columns, the scale of the floor that
    /// keeps the logarithms finite (so no gain changes them).
    fn movement(&self, out: &mut [f32], mean_energy: f32) {
        let f = self.families;
        let n = self.filled.max(1);
        // The ring's columns oldest first.
        let start = if self.filled < self.len { 0 } else { self.next };
        let at = |j: usize| (start + j) % self.len;
        let floor = 1e-3 * mean_energy + f32::MIN_POSITIVE;
        let mut rise_total = 0.0_f32;
        for j in 1..n {
            rise_total += (self.col_energy[at(j)] - self.col_energy[at(j - 1)]).max(0.0);
        }
        for k in 0..f {
            let (mut m, mut m2, mut onset, mut change) = (0.0_f32, 0.0_f32, 0.0_f32, 0.0_f32);
            for j in 0..n {
                let c = at(j);
                let e = self.fam[c * f + k];
                let s = if self.energy[c] > 0.0 {
                    (e / self.energy[c]).clamp(0.0, 1.0)
                } else {
                    0.0
                };
                m += s;
                m2 += s * s;
                if j > 0 {
                    let p = at(j - 1);
                    onset += (self.col_energy[c] - self.col_energy[p]).max(0.0) * s;
                    let before = self.fam[p * f + k];
                    change += ((e + floor) / (before + floor)).log10().abs();
                }
            }
            let mean = m / n as f32;
            out[k] = (m2 / n as f32 - mean * mean).max(0.0).sqrt();
            out[f + k] = if rise_total > 0.0 {
                (onset / rise_total).clamp(0.0, 1.0)
            } else {
                mean
            };
            out[2 * f + k] = change / (n - 1).max(1) as f32;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn all_schemas_load_and_an_older_model_reads_the_prefix_it_knows() {
        let (families, atoms) = (3, 12);
        let model = |schema: &str, features: usize| PresenceModel {
            schema: schema.to_owned(),
            features,
            mean: vec![0.0; features],
            scale: vec![1.0; features],
            hidden: 0,
            w1: vec![],
            b1: vec![],
            // Family f weighs feature f only.
            w2: (0..families * features)
                .map(|i| {
                    if i % features == i / features {
                        1.0
                    } else {
                        0.0
                    }
                })
                .collect(),
            b2: vec![0.0; families],
            thresholds: vec![0.5; families],
            shares: None,
            trees: None,
        };
        let v1 = model(PRESENCE_SCHEMA_V1, feature_count_v1(families, atoms));
        let v2 = model(PRESENCE_SCHEMA_V2, feature_count_v2(families, atoms));
        let v3 = model(PRESENCE_SCHEMA, feature_count(families, atoms));
        for m in [&v1, &v2, &v3] {
            assert_eq!(m.check(families, atoms), Ok(()), "{}", m.schema);
        }
        assert!(feature_count_v1(3, 12) < feature_count_v2(3, 12));
        assert_eq!(feature_count(3, 12), feature_count_v2(3, 12) + 3 * 3);
        for (schema, features) in [
            (PRESENCE_SCHEMA_V1, feature_count(families, atoms)),
            (PRESENCE_SCHEMA_V2, feature_count_v1(families, atoms)),
            (PRESENCE_SCHEMA, feature_count_v2(families, atoms)),
        ] {
            let wrong = model(schema, features).check(families, atoms);
            assert!(
                matches!(&wrong, Err(e) if e.contains("expected")),
                "{schema}: {wrong:?}"
            );
        }
        let unknown = model("presence-v0", feature_count_v1(families, atoms));
        let unknown = unknown.check(families, atoms);
        assert!(
            matches!(&unknown, Err(e) if e.contains("presence-v0")),
            "{unknown:?}"
        );
        // An older model given a full vector reads only its prefix: the values after it
        // change nothing.
        for (m, known) in [
            (&v1, feature_count_v1(families, atoms)),
            (&v2, feature_count_v2(families, atoms)),
        ] {
            let mut x = vec![0.0_f32; feature_count(families, atoms)];
            x[..3].copy_from_slice(&[2.0, -2.0, 0.0]);
            let mut scratch = vec![0.0; x.len()];
            let mut a = [0.0_f32; 3];
            m.predict_into(&x, &mut scratch, &mut a);
            x[known..].fill(50.0);
            let mut b = [0.0_f32; 3];
            m.predict_into(&x, &mut scratch, &mut b);
            assert_eq!(a, b, "{}", m.schema);
            assert!(
                a[0] > 0.85 && a[1] < 0.15 && (a[2] - 0.5).abs() < 1e-6,
                "{a:?}"
            );
        }
    }

    /// Pushes columns whose family energies are `fam[c]` (two families, no residual) and
    /// returns the movement values.
    fn movement_of(fam: &[[f32; 2]], len: usize) -> Vec<f32> {
        let (families, atoms) = (2, 2);
        let mut ctx = PresenceContext::new(families, atoms, len);
        for e in fam {
            let total = e[0] + e[1];
            ctx.push(&[total], total, e, e, 0.0, &[0.0; FINE_VALUES]);
        }
        let x = ctx.features();
        x[feature_count_v2(families, atoms)..].to_vec()
    }

    #[test]
    fn movement_values_tell_a_struck_family_from_a_steady_one() {
        // Family 0 strikes twice and decays by half per column; family 1 holds steady.
        let mut cols = Vec::new();
        for _ in 0..2 {
            for j in 0..6 {
                cols.push([8.0 * 0.5_f32.powi(j), 1.0]);
            }
        }
        let m = movement_of(&cols, 12);
        let (sd, onset, change) = (&m[0..2], &m[2..4], &m[4..6]);
        // The struck family's share moves, the steady one's moves as much the other way
        // (two families), and the onsets carry the struck family.
        assert!((sd[0] - sd[1]).abs() < 1e-5 && sd[0] > 0.2, "{sd:?}");
        assert!(onset[0] > 0.85 && onset[1] < 0.15, "{onset:?}");
        // Its energy changes by log10(2) per column in the decays and rises 5 times that at
        // the second strike: (10 · 0.301 + 1.505) / 11.
        let expect = (10.0 * 2f32.log10() + 5.0 * 2f32.log10()) / 11.0;
        assert!((change[0] - expect).abs() < 0.01, "{change:?} vs {expect}");
        assert!(change[1] < 1e-6, "{change:?}");
        // A gain change of the whole input changes nothing.
        let loud: Vec<[f32; 2]> = cols.iter().map(|c| [c[0] * 100.0, c[1] * 100.0]).collect();
        let m_loud = movement_of(&loud, 12);
        for (a, b) in m.iter().zip(&m_loud) {
            assert!((a - b).abs() < 1e-4, "{m:?} vs {m_loud:?}");
        }
        // The ring keeps the columns in time order once it wraps: a ring of 5 that saw all 12
        // columns holds the last 5 (starting mid-ring), as a fresh ring fed only those does.
        let wrapped = movement_of(&cols, 5);
        let fresh = movement_of(&cols[7..], 5);
        for (a, b) in wrapped.iter().zip(&fresh) {
            assert!((a - b).abs() < 1e-6, "{wrapped:?} vs {fresh:?}");
        }
        // No rise in energy at all: the onset share falls back to the mean share.
        let flat = movement_of(&[[1.0, 3.0]; 5], 5);
        assert!(
            (flat[2] - 0.25).abs() < 1e-6 && (flat[3] - 0.75).abs() < 1e-6,
            "{flat:?}"
        );
    }

    /// The summed loss gradients of `batch`, one row at a time: the chain rule written out
    /// (independent of the matrix products it checks).
    fn row_by_row_gradients(data: &FitData, p: &Params, hidden: usize, batch: &[usize]) -> Params {
        let (d, families) = (data.features, data.families);
        let mut grads = p.zeros_like();
        let mut hbuf = vec![0.0_f32; hidden];
        let mut out = vec![0.0_f32; families];
        for &i in batch {
            let x = &data.z[i * d..(i + 1) * d];
            forward(p, x, d, hidden, &mut hbuf, &mut out);
            data.targets.gradient(i, &mut out);
            let inp: &[f32] = if hidden == 0 { x } else { &hbuf };
            let n_in = inp.len();
            let mut dh = vec![0.0_f32; hidden];
            for (f, &g) in out.iter().enumerate() {
                grads.b2[f] += g;
                let w2 = &p.w2[f * n_in..(f + 1) * n_in];
                for (k, gw) in grads.w2[f * n_in..(f + 1) * n_in].iter_mut().enumerate() {
                    *gw += g * inp[k];
                }
                for (j, dj) in dh.iter_mut().enumerate() {
                    *dj += g * w2[j];
                }
            }
            for (j, &dj) in dh.iter().enumerate().filter(|&(j, _)| hbuf[j] > 0.0) {
                grads.b1[j] += dj;
                for (k, gw) in grads.w1[j * d..(j + 1) * d].iter_mut().enumerate() {
                    *gw += dj * x[k];
                }
            }
        }
        grads
    }

    #[test]
    fn batch_gradients_are_the_sums_of_the_rows_gradients() {
        let (n, d, families) = (50, 7, 3);
        let mut rng = SceneRng::new(13);
        let z: Vec<f32> = (0..n * d).map(|_| rng.normal() as f32).collect();
        let labels: Vec<bool> = (0..n * families).map(|_| rng.unit() < 0.4).collect();
        let pos_weight = [1.5, 0.7, 2.0];
        let (_, shares) = share_rows(3, n);
        let fit: Vec<usize> = (0..n).collect();
        // Rows out of order, and a batch shorter than the scratch (the last batch of an epoch).
        let batch = [7, 3, 41, 0, 19, 22, 5, 48, 30, 11, 2];
        for hidden in [0, 5] {
            for targets in [
                Targets::Presence {
                    labels: &labels,
                    pos_weight: &pos_weight,
                },
                Targets::Shares(&shares),
            ] {
                let data = FitData {
                    z: &z,
                    features: d,
                    targets,
                    families,
                    fit: &fit,
                };
                let inputs = if hidden == 0 { d } else { hidden };
                let mut draw = |len: usize| (0..len).map(|_| rng.normal() as f32).collect();
                let p = Params {
                    w1: draw(hidden * d),
                    b1: draw(hidden),
                    w2: draw(families * inputs),
                    b2: draw(families),
                };
                let mut scratch = BatchScratch::new(16, d, hidden, families);
                let mut grads = p.zeros_like();
                // Stale values in the buffers must not leak into the sums.
                grads.w2.fill(9.0);
                scratch.h.fill(3.0);
                batch_gradients(&data, &p, hidden, &batch, &mut scratch, &mut grads);
                let want = row_by_row_gradients(&data, &p, hidden, &batch);
                assert!(want.w2.iter().any(|&g| g.abs() > 0.1), "a real gradient");
                for (name, a, b) in [
                    ("w1", &grads.w1, &want.w1),
                    ("b1", &grads.b1, &want.b1),
                    ("w2", &grads.w2, &want.w2),
                    ("b2", &grads.b2, &want.b2),
                ] {
                    assert_eq!(a.len(), b.len(), "{name}");
                    for (x, y) in a.iter().zip(b) {
                        assert!(
                            (x - y).abs() <= 1e-4 * (1.0 + y.abs()),
                            "hidden {hidden} {name}: {x} vs {y}"
                        );
                    }
                }
            }
        }
    }

    /// `n` rows of two uniform features (seed `seed`) and two families: family 0 present when
    /// feature 0 > 0.5, family 1 when the two features are on the same side of 0.5 (XOR-like:
    /// only a hidden layer can learn it well).
    fn xor_rows(seed: u64, n: usize) -> (Vec<f32>, Vec<bool>) {
        let mut rng = SceneRng::new(seed);
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        for _ in 0..n {
            let (a, b) = (rng.unit() as f32, rng.unit() as f32);
            rows.extend([a, b]);
            labels.extend([a > 0.5, (a > 0.5) == (b > 0.5)]);
        }
        (rows, labels)
    }

    #[test]
    fn separable_labels_are_learned_by_both_model_shapes() {
        // The XOR-like family needs the hidden layer.
        let (n, d) = (2000, 2);
        let (rows, labels) = xor_rows(5, n);
        for hidden in [0, 16] {
            let opts = PresenceTraining {
                hidden,
                epochs: 80,
                batch: 32,
                learning_rate: 1e-2,
                l2: 0.0,
                seed: 2,
                threshold_beta: 1.0,
                ..PresenceTraining::default()
            };
            let m = train_presence(&rows, d, &labels, 2, &opts);
            let mut scratch = vec![0.0; 32];
            let mut out = [0.0_f32; 2];
            let mut correct = [0usize; 2];
            for i in 0..n {
                m.predict_into(&rows[i * d..(i + 1) * d], &mut scratch, &mut out);
                for f in 0..2 {
                    if (out[f] >= m.thresholds[f]) == labels[i * 2 + f] {
                        correct[f] += 1;
                    }
                }
            }
            let acc0 = correct[0] as f64 / n as f64;
            let acc1 = correct[1] as f64 / n as f64;
            assert!(acc0 > 0.95, "seed 5/2 hidden {hidden}: {acc0}");
            if hidden > 0 {
                assert!(acc1 > 0.9, "seed 5/2 hidden {hidden}: {acc1}");
            } else {
                // A linear model cannot do better than ~3/4 on the XOR-like family.
                assert!(acc1 < 0.85, "seed 5/2 hidden 0: {acc1}");
            }
        }
    }

    /// `n` rows of two uniform features (seed `seed`) and the shares of three families: a
    /// softmax of `(4a, 4b, 2 − 4|a − b|)`, which a hidden layer can learn.
    fn share_rows(seed: u64, n: usize) -> (Vec<f32>, Vec<f32>) {
        let mut rng = SceneRng::new(seed);
        let mut rows = Vec::new();
        let mut shares = Vec::new();
        for _ in 0..n {
            let (a, b) = (rng.unit() as f32, rng.unit() as f32);
            rows.extend([a, b]);
            let mut s = [4.0 * a, 4.0 * b, 2.0 - 4.0 * (a - b).abs()];
            softmax(&mut s);
            shares.extend(s);
        }
        (rows, shares)
    }

    #[test]
    fn a_layer_sums_like_its_plain_form_at_every_size() {
        // Weight rows around the group of four, lengths around the SIMD widths (8 and 16
        // lanes) and the built-in palette's 662 features, one to three input rows written
        // into wider output rows; seeded values of both signs.
        let mut rng = SceneRng::new(31);
        for rows in [1, 3, 4, 5, 8, 11, 16] {
            for d in [1, 5, 8, 9, 16, 31, 33, 662] {
                let w: Vec<f32> = (0..rows * d).map(|_| rng.unit() as f32 - 0.5).collect();
                let b: Vec<f32> = (0..rows).map(|_| rng.unit() as f32 - 0.5).collect();
                for inputs in [1, 3] {
                    let xs: Vec<f32> = (0..inputs * d)
                        .map(|_| 2.0 * rng.unit() as f32 - 1.0)
                        .collect();
                    let stride = rows + 2;
                    for relu in [false, true] {
                        let mut got = vec![f32::NAN; inputs * stride];
                        let mut plain = vec![f32::NAN; inputs * stride];
                        affine(&w, &b, &xs, &mut got, stride, relu);
                        affine_portable(&w, &b, &xs, &mut plain, stride, relu);
                        for (r, x) in xs.chunks_exact(d).enumerate() {
                            for j in 0..rows {
                                // The exact sum in f64; rounding is relative to Σ|w·x|.
                                let row = &w[j * d..(j + 1) * d];
                                let terms = row.iter().zip(x).map(|(&a, &c)| f64::from(a * c));
                                let exact = f64::from(b[j])
                                    + row
                                        .iter()
                                        .zip(x)
                                        .map(|(&a, &c)| f64::from(a) * f64::from(c))
                                        .sum::<f64>();
                                let exact = if relu { exact.max(0.0) } else { exact };
                                let scale = 1.0 + terms.map(f64::abs).sum::<f64>();
                                for (name, v) in [("simd", &got), ("portable", &plain)] {
                                    let v = v[r * stride + j];
                                    let err = (f64::from(v) - exact).abs() / scale;
                                    assert!(err < 1e-6, "{name} rows {rows} d {d} {r}/{j}: {err}");
                                    assert!(!relu || v >= 0.0);
                                }
                            }
                            // The padding of each output row is left alone.
                            assert!(
                                got[r * stride + rows..(r + 1) * stride]
                                    .iter()
                                    .all(|v| v.is_nan())
                            );
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn rows_taken_together_give_the_single_row_values_bit_for_bit() {
        // A model with a hidden layer, boosted trees and a direct share network, on rows of
        // 2 features padded to a longer stride (as the estimator's rows are).
        let (n, d, families, stride) = (1500, 2, 3, 5);
        let (rows, shares) = share_rows(12, n);
        let labels: Vec<bool> = shares.iter().map(|&s| s >= 0.2).collect();
        let opts = PresenceTraining {
            hidden: 6,
            epochs: 3,
            seed: 5,
            shares: ShareTraining {
                hidden: 7,
                epochs: 3,
                ..ShareTraining::default()
            },
            trees: TreeTraining {
                trees: 11,
                depth: 3,
                ..TreeTraining::default()
            },
            ..PresenceTraining::default()
        };
        let mut model = train_presence(&rows, d, &labels, families, &opts);
        let (net, _) = train_share_network(&rows, &shares, &model, &opts).expect("trained");
        model.shares = Some(net);
        assert!(model.trees.is_some() && model.hidden == 6);
        let xs: Vec<f32> = rows[..2 * 40]
            .chunks_exact(d)
            .flat_map(|r| [r[0], r[1], 9.0, -9.0, 0.5])
            .collect();
        // One row at a time, as the live estimator computes them.
        let mut scratch = vec![f32::NAN; 40 * model.scratch_len()];
        let mut want_p = Vec::new();
        let mut want_s = Vec::new();
        for x in xs.chunks_exact(stride) {
            let mut o = [f32::NAN; 3];
            model.predict_into(x, &mut scratch, &mut o);
            want_p.extend(o);
            assert!(model.shares_into(x, &mut scratch, &mut o));
            want_s.extend(o);
        }
        let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        // Output rows wider than the families, as the estimator's are.
        let out_stride = 4;
        for batch in [2, 7, 8, 9, 16, 17, 40] {
            let mut got_p = Vec::new();
            let mut got_s = Vec::new();
            for chunk in xs.chunks(batch * stride) {
                let rows_here = chunk.len() / stride;
                let mut out = vec![f32::NAN; rows_here * out_stride];
                model.predict_many(chunk, stride, &mut scratch, &mut out, out_stride);
                got_p.extend(out.chunks(out_stride).flat_map(|o| o[..families].to_vec()));
                assert!(model.shares_many(chunk, stride, &mut scratch, &mut out, out_stride));
                got_s.extend(out.chunks(out_stride).flat_map(|o| o[..families].to_vec()));
            }
            assert_eq!(bits(&got_p), bits(&want_p), "presence, batch {batch}");
            assert_eq!(bits(&got_s), bits(&want_s), "shares, batch {batch}");
        }
        // And the values are probabilities and shares.
        assert!(want_p.iter().all(|p| (0.0..=1.0).contains(p)));
        for s in want_s.chunks(families) {
            assert!((s.iter().sum::<f32>() - 1.0).abs() < 1e-5);
        }
    }

    #[test]
    fn a_share_network_learns_shares_and_its_shapes_are_checked() {
        let (n, d, families) = (3000, 2, 3);
        let (rows, shares) = share_rows(9, n);
        let labels: Vec<bool> = shares.iter().map(|&s| s >= 0.05).collect();
        let opts = PresenceTraining {
            hidden: 4,
            epochs: 5,
            seed: 4,
            shares: ShareTraining {
                hidden: 16,
                epochs: 60,
                batch: 32,
                learning_rate: 1e-2,
                l2: 0.0,
                exponent: 0.75,
                admit: 0.3,
            },
            ..PresenceTraining::default()
        };
        let mut model = train_presence(&rows, d, &labels, families, &opts);
        assert!(model.shares.is_none(), "trained only on request");
        let (net, held_tv) = train_share_network(&rows, &shares, &model, &opts).expect("trained");
        assert_eq!((net.hidden, net.exponent, net.admit), (16, 0.75, Some(0.3)));
        assert!(net.admits(0.3) && !net.admits(0.29));
        // The uniform guess misattributes about 20 % of these shares; the network, on rows it
        // never saw, far less.
        let uniform: f64 = shares
            .chunks(families)
            .map(|s| {
                0.5 * s
                    .iter()
                    .map(|&v| f64::from((v - 1.0 / 3.0).abs()))
                    .sum::<f64>()
            })
            .sum::<f64>()
            / n as f64;
        assert!(uniform > 0.15, "{uniform}");
        assert!(
            held_tv < 0.25 * 100.0 * uniform,
            "{held_tv} % vs uniform {uniform}"
        );
        assert_eq!(net.check(d, families), Ok(()));
        model.shares = Some(net);
        // The estimate sums to 1 and follows the truth on fresh rows.
        let (fresh, truth) = share_rows(10, 200);
        let mut scratch = vec![0.0; model.scratch_len()];
        let mut out = [0.0_f32; 3];
        let mut tv = 0.0;
        for i in 0..200 {
            assert!(model.shares_into(&fresh[i * d..(i + 1) * d], &mut scratch, &mut out));
            assert!((out.iter().sum::<f32>() - 1.0).abs() < 1e-5);
            tv += 0.5
                * out
                    .iter()
                    .zip(&truth[i * 3..i * 3 + 3])
                    .map(|(a, b)| (a - b).abs())
                    .sum::<f32>();
        }
        assert!(tv / 200.0 < 0.05, "{}", tv / 200.0);
        // Shapes and values are checked.
        let bad = |f: &dyn Fn(&mut ShareNetwork)| {
            let mut m = model.clone();
            let net = m.shares.as_mut().expect("net");
            f(net);
            net.check(d, families).expect_err("refused")
        };
        assert!(
            bad(&|n| {
                n.w2.pop();
            })
            .contains("w2")
        );
        assert!(bad(&|n| n.exponent = 5.0).contains("exponent"));
        for a in [0.0, -0.1, 1.5, f32::NAN] {
            assert!(bad(&|n| n.admit = Some(a)).contains("admit"), "{a}");
        }
        assert!(bad(&|n| n.b1[0] = f32::NAN).contains("not finite"));
        assert!(bad(&|n| n.hidden = MAX_HIDDEN + 1).contains("hidden"));
        // A model without the network (every palette written before it) reads as before.
        let json = serde_json::to_string(&PresenceModel {
            shares: None,
            ..model.clone()
        })
        .expect("json");
        assert!(!json.contains("shares"));
        let back: PresenceModel = serde_json::from_str(&json).expect("loads");
        assert!(back.shares.is_none() && !back.shares_into(&fresh[..2], &mut scratch, &mut out));
        let back: PresenceModel =
            serde_json::from_str(&serde_json::to_string(&model).expect("json")).expect("loads");
        assert_eq!(back, model);
        // A network written before `admit` existed reads as one that never admits.
        let mut old = model.clone();
        old.shares.as_mut().expect("net").admit = None;
        let json = serde_json::to_string(&old).expect("json");
        assert!(json.contains("\"exponent\"") && !json.contains("admit"));
        let back: PresenceModel = serde_json::from_str(&json).expect("loads");
        let net = back.shares.as_ref().expect("net");
        assert!(net.admit.is_none() && !net.admits(1.0));
        // Trained with admit 0, a network never admits.
        let none = ShareTraining {
            admit: 0.0,
            ..opts.shares
        };
        let (net, _) = train_share_network(
            &rows,
            &shares,
            &model,
            &PresenceTraining {
                shares: none,
                ..opts
            },
        )
        .expect("trained");
        assert_eq!(net.admit, None);
    }

    #[test]
    fn members_average_their_logits_and_threads_change_nothing() {
        // Two hand-made members (3 features, 2 hidden units, 2 families): the merged network's
        // logit is the mean of theirs on any input.
        let (d, h, f) = (3, 2, 2);
        let member = |k: f32| Params {
            w1: (0..h * d).map(|i| k * (i as f32 - 2.5)).collect(),
            b1: vec![0.1 * k, -0.2],
            w2: (0..f * h).map(|i| 0.2 * (k + i as f32)).collect(),
            b2: vec![k, -k],
        };
        let (a, b) = (member(1.0), member(-0.5));
        let merged = merge_members(vec![a.clone(), b.clone()], d, h, f);
        let logit = |p: &Params, hidden: usize, x: &[f32]| {
            let mut hbuf = vec![0.0; hidden];
            let mut out = vec![0.0; f];
            forward(p, x, d, hidden, &mut hbuf, &mut out);
            out
        };
        for x in [[0.3, -0.5, 0.4], [0.5, 0.25, -0.25], [-0.6, 0.0, 0.7]] {
            let (la, lb, lm) = (
                logit(&a, h, &x),
                logit(&b, h, &x),
                logit(&merged, 2 * h, &x),
            );
            for k in 0..f {
                let mean = 0.5 * (la[k] + lb[k]);
                assert!((lm[k] - mean).abs() < 1e-4, "{x:?}: {} vs {mean}", lm[k]);
            }
        }
        // Trained: three members learn the XOR-like family, the hidden layer holds all of
        // theirs, member 0 is the network a single-member training fits, and the number of
        // threads changes nothing.
        let n = 1500;
        let (rows, labels) = xor_rows(7, n);
        let opts = |members: usize, threads: usize| PresenceTraining {
            hidden: 8,
            epochs: 40,
            batch: 32,
            learning_rate: 1e-2,
            l2: 0.0,
            seed: 3,
            threshold_beta: 1.0,
            members,
            threads,
            shares: ShareTraining::default(),
            trees: TreeTraining::default(),
        };
        let one = train_presence(&rows, 2, &labels, 2, &opts(1, 1));
        let three = train_presence(&rows, 2, &labels, 2, &opts(3, 1));
        assert_eq!(three, train_presence(&rows, 2, &labels, 2, &opts(3, 2)));
        assert_eq!(three.hidden, 24);
        assert_eq!(&three.w1[..8 * 2], &one.w1[..]);
        assert_ne!(&three.w1[8 * 2..16 * 2], &one.w1[..], "members start apart");
        let mut scratch = vec![0.0; 32];
        let mut out = [0.0_f32; 2];
        let correct = (0..n)
            .filter(|&i| {
                three.predict_into(&rows[i * 2..(i + 1) * 2], &mut scratch, &mut out);
                (out[1] >= three.thresholds[1]) == labels[i * 2 + 1]
            })
            .count();
        assert!(
            correct as f64 / n as f64 > 0.9,
            "seed 7/3: {correct} of {n}"
        );
    }

    #[test]
    fn training_reports_every_epoch_of_every_member_and_changes_nothing() {
        use std::sync::Mutex;
        let n = 600;
        let (rows, labels) = xor_rows(11, n);
        let mut opts = PresenceTraining {
            hidden: 4,
            epochs: 5,
            batch: 32,
            learning_rate: 1e-2,
            l2: 0.0,
            seed: 5,
            threshold_beta: 1.0,
            members: 3,
            threads: 2,
            shares: ShareTraining::default(),
            trees: TreeTraining::default(),
        };
        let told = Mutex::new(Vec::new());
        let report =
            |done: usize, total: usize| told.lock().expect("not poisoned").push((done, total));
        let steps = Mutex::new(Vec::new());
        let report_steps = |what: &str, done: usize, total: usize| {
            steps
                .lock()
                .expect("not poisoned")
                .push((what.to_owned(), done, total));
        };
        let reported = train_presence_reporting(&rows, 2, &labels, 2, &opts, &report_steps);
        assert_eq!(reported, train_presence(&rows, 2, &labels, 2, &opts));
        let mut got = std::mem::take(&mut *steps.lock().expect("not poisoned"));
        got.sort_unstable();
        let want: Vec<(String, usize, usize)> =
            (1..=15).map(|d| (EPOCH_STEPS.to_owned(), d, 15)).collect();
        assert_eq!(got, want, "3 members × 5 epochs, each told once");
        // The share network: one fit, its own epochs.
        opts.shares = ShareTraining {
            hidden: 4,
            epochs: 3,
            ..ShareTraining::default()
        };
        let shares: Vec<f32> = labels
            .chunks(2)
            .flat_map(|l| if l[0] { [0.8, 0.2] } else { [0.3, 0.7] })
            .collect();
        let net = train_share_network_reporting(&rows, &shares, &reported, &opts, &report);
        assert_eq!(net, train_share_network(&rows, &shares, &reported, &opts));
        let got = std::mem::take(&mut *told.lock().expect("not poisoned"));
        assert_eq!(got, vec![(1, 3), (2, 3), (3, 3)]);
        // Boosted trees are counted on their own, after the 15 epochs: 2 families × 4 trees.
        opts.trees = TreeTraining {
            trees: 4,
            depth: 2,
            patience: 100,
            ..TreeTraining::default()
        };
        let with_trees = train_presence_reporting(&rows, 2, &labels, 2, &opts, &report_steps);
        assert_eq!(with_trees.trees.as_ref().map(|t| t.trees), Some(4));
        let got = std::mem::take(&mut *steps.lock().expect("not poisoned"));
        let (mut epochs, trees): (Vec<_>, Vec<_>) = got
            .into_iter()
            .partition(|(what, _, _)| what == EPOCH_STEPS);
        epochs.sort_unstable();
        let want: Vec<(String, usize, usize)> =
            (1..=15).map(|d| (EPOCH_STEPS.to_owned(), d, 15)).collect();
        assert_eq!(epochs, want, "15 epochs, each told once");
        // One thread per family may finish its trees in any order; each count is told once.
        let mut trees = trees;
        trees.sort_unstable();
        let want: Vec<(String, usize, usize)> =
            (1..=8).map(|d| (TREE_STEPS.to_owned(), d, 8)).collect();
        assert_eq!(trees, want, "2 families × 4 trees, each told once");
    }
}
