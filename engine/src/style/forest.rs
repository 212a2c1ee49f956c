//! Random forest classifier with the defaults of scikit-learn 1.9.1's `RandomForestClassifier`.
//!
//! Breiman (2001), "Random Forests", Machine Learning 45: each tree is grown on a bootstrap
//! sample (drawn with replacement, as many draws as windows; the draw counts become sample
//! weights, as in scikit-learn), with the Gini criterion, splitting until every leaf is pure or
//! holds one distinct window (no depth limit, `min_samples_leaf = 1`). At every split a fresh
//! random subset of `max_features` features (default `⌊√F⌋`, at least 1) is searched; features
//! that are constant in the node do not count towards that budget (scikit-learn's
//! `BestSplitter`). Thresholds lie halfway between consecutive distinct values. The forest's
//! probability for a class is the mean over trees of the leaf's weighted class fraction.
//!
//! Features are compared in `f32`, as scikit-learn's trees do (`DTYPE = float32`); thresholds
//! are stored in `f32` and always lie in `[lower, upper)` of the two values they separate, so a
//! training value is routed the same way at training and at prediction.
//!
//! Trees are grown in parallel with [`std::thread::scope`]; tree `t` draws from its own
//! generator seeded with the `t`-th number of a generator seeded with [`ForestParams::seed`], so
//! a forest is identical for a given seed whatever the number of threads.

use super::classifier::{ClassWeight, class_weights};
use super::errors::{ModelFileError, StyleError};
use rand::rngs::SmallRng;
use rand::{Rng, RngCore, SeedableRng};
use serde::{Deserialize, Serialize};
use std::sync::atomic::{AtomicUsize, Ordering};

/// Default number of trees (the default; scikit-learn's is 100).
pub const DEFAULT_TREES: usize = 200;

/// How many features each split searches.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum MaxFeatures {
    /// `max(1, ⌊√F⌋)`, scikit-learn's `"sqrt"` (its default for classifiers).
    Sqrt,
    /// All `F` features (a bagged decision tree ensemble).
    All,
    /// A fixed count, capped at `F`.
    Count(usize),
}

impl MaxFeatures {
    /// The count for `n_features` features.
    #[must_use]
    pub fn resolve(self, n_features: usize) -> usize {
        match self {
            // Truncation is scikit-learn's `int(np.sqrt(n_features))`.
            #[allow(
                clippy::cast_possible_truncation,
                clippy::cast_sign_loss,
                reason = "a square root of a feature count is small and positive"
            )]
            Self::Sqrt => ((n_features as f64).sqrt() as usize).max(1),
            Self::All => n_features,
            Self::Count(k) => k.clamp(1, n_features.max(1)),
        }
    }
}

/// Settings of [`RandomForest::fit`].
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ForestParams {
    /// Number of trees (default [`DEFAULT_TREES`]).
    pub n_trees: usize,
    /// Features searched per split (default [`MaxFeatures::Sqrt`]).
    pub max_features: MaxFeatures,
    /// Grow each tree on a bootstrap sample (default true); false uses every window once.
    pub bootstrap: bool,
    /// Class weights (default uniform; balanced is scikit-learn's `class_weight="balanced"`).
    pub class_weight: ClassWeight,
    /// Seed of every random draw.
    pub seed: u64,
    /// Worker threads; 0 means [`std::thread::available_parallelism`]. Does not change the
    /// result, so it is not stored in model files.
    #[serde(skip)]
    pub threads: usize,
}

impl Default for ForestParams {
    fn default() -> Self {
        Self {
            n_trees: DEFAULT_TREES,
            max_features: MaxFeatures::Sqrt,
            bootstrap: true,
            class_weight: ClassWeight::Uniform,
            seed: 0,
            threads: 0,
        }
    }
}

impl ForestParams {
    /// Checks the settings.
    ///
    /// # Errors
    /// [`StyleError::InvalidSetting`] for zero trees or a zero feature count.
    pub fn validate(&self) -> Result<(), StyleError> {
        if self.n_trees == 0 || self.n_trees > super::model_file::MAX_TREES {
            return Err(StyleError::InvalidSetting {
                name: "n_trees",
                value: self.n_trees.to_string(),
                reason: "must be between 1 and MAX_TREES",
            });
        }
        if self.max_features == MaxFeatures::Count(0) {
            return Err(StyleError::InvalidSetting {
                name: "max_features",
                value: "0".into(),
                reason: "must be at least 1",
            });
        }
        Ok(())
    }
}

/// Marks a leaf: no node has the root (index 0) as a child.
const LEAF: u32 = 0;

/// One node; a leaf has `left == LEAF`.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Node {
    feature: u32,
    threshold: f32,
    left: u32,
    right: u32,
}

/// One fully grown tree, nodes in depth-first pre-order (children after their parent).
#[derive(Debug, Clone, PartialEq)]
struct Tree {
    nodes: Vec<Node>,
    /// Weighted class fractions of every node, `nodes × classes` (internal nodes too, for the
    /// per-prediction contributions).
    values: Vec<f32>,
}

impl Tree {
    /// Index of the leaf `row` falls into.
    #[inline]
    fn leaf(&self, row: &[f32]) -> usize {
        let mut i = 0;
        loop {
            let n = self.nodes[i];
            if n.left == LEAF {
                return i;
            }
            i = if row[n.feature as usize] <= n.threshold {
                n.left
            } else {
                n.right
            } as usize;
        }
    }
}

impl Tree {
    /// Walks this tree for `row`, crediting each change of `class`'s fraction along the path to
    /// the split feature (Saabas 2014) in `contributions`. Returns the leaf's node index and the
    /// root's class fraction. `k` is the number of classes.
    fn walk_with_contributions(
        &self,
        row: &[f32],
        class: usize,
        k: usize,
        contributions: &mut [f64],
    ) -> (usize, f64) {
        let root = f64::from(self.values[class]);
        let mut value = root;
        let mut i = 0;
        loop {
            let n = self.nodes[i];
            if n.left == LEAF {
                return (i, root);
            }
            i = if row[n.feature as usize] <= n.threshold {
                n.left
            } else {
                n.right
            } as usize;
            let child = f64::from(self.values[i * k + class]);
            contributions[n.feature as usize] += child - value;
            value = child;
        }
    }
}

/// A trained random forest over standardised features.
#[derive(Debug, Clone, PartialEq)]
pub struct RandomForest {
    n_features: usize,
    n_classes: usize,
    trees: Vec<Tree>,
}

/// Column-major `f32` copy of the training features.
struct Columns {
    n_rows: usize,
    values: Vec<f32>,
}

impl Columns {
    #[inline]
    fn column(&self, f: usize) -> &[f32] {
        &self.values[f * self.n_rows..(f + 1) * self.n_rows]
    }
}

/// Maps an `f32` to a `u32` with the same order (IEEE 754 total order for non-NaN values).
#[inline]
fn ordered_bits(v: f32) -> u32 {
    let b = v.to_bits();
    if b & 0x8000_0000 != 0 {
        !b
    } else {
        b | 0x8000_0000
    }
}

/// Inverse of [`ordered_bits`].
#[inline]
fn from_ordered_bits(o: u32) -> f32 {
    f32::from_bits(if o & 0x8000_0000 != 0 {
        o ^ 0x8000_0000
    } else {
        !o
    })
}

/// The split threshold between two distinct values: their midpoint, or `lower` when the
/// midpoint rounds to `upper` (scikit-learn's rule), so that `lower ≤ t < upper`.
#[inline]
fn midpoint(lower: f32, upper: f32) -> f32 {
    let t = lower / 2.0 + upper / 2.0;
    if t >= lower && t < upper { t } else { lower }
}

/// Per-thread buffers for growing trees.
struct Builder<'a> {
    x: &'a Columns,
    y: &'a [usize],
    class_weight: &'a [f64],
    n_classes: usize,
    max_features: usize,
    bootstrap: bool,
    counts: Vec<u32>,
    weights: Vec<f64>,
    samples: Vec<u32>,
    keys: Vec<u64>,
    features: Vec<u32>,
    totals: Vec<f64>,
    left: Vec<f64>,
    stack: Vec<Pending>,
}

/// A node waiting to be grown: its samples `samples[start..end]` and where to link it.
struct Pending {
    start: usize,
    end: usize,
    parent: Option<(usize, bool)>,
}

/// The best split found in a node.
struct Split {
    feature: usize,
    threshold: f32,
    proxy: f64,
}

impl<'a> Builder<'a> {
    fn new(
        x: &'a Columns,
        y: &'a [usize],
        class_weight: &'a [f64],
        n_classes: usize,
        max_features: usize,
        bootstrap: bool,
    ) -> Self {
        let n = x.n_rows;
        let n_features = x.values.len() / n.max(1);
        Self {
            x,
            y,
            class_weight,
            n_classes,
            max_features,
            bootstrap,
            counts: vec![0; n],
            weights: vec![0.0; n],
            samples: Vec::with_capacity(n),
            keys: Vec::with_capacity(n),
            features: (0..n_features as u32).collect(),
            totals: vec![0.0; n_classes],
            left: vec![0.0; n_classes],
            stack: Vec::new(),
        }
    }

    fn grow(&mut self, rng: &mut SmallRng) -> Tree {
        let n = self.x.n_rows;
        self.counts.fill(0);
        if self.bootstrap {
            // scikit-learn's `_generate_sample_indices`: n draws with replacement.
            for _ in 0..n {
                self.counts[rng.gen_range(0..n)] += 1;
            }
        } else {
            self.counts.fill(1);
        }
        // The feature order is permuted in place by the draws: start every tree from the same
        // order, so a tree does not depend on the trees grown before it on this thread.
        for (i, f) in self.features.iter_mut().enumerate() {
            *f = i as u32;
        }
        self.samples.clear();
        for i in 0..n {
            let c = self.counts[i];
            self.weights[i] = f64::from(c) * self.class_weight[self.y[i]];
            if c > 0 {
                self.samples.push(i as u32);
            }
        }
        let k = self.n_classes;
        let mut nodes: Vec<Node> = Vec::new();
        let mut values: Vec<f32> = Vec::new();
        self.stack.clear();
        self.stack.push(Pending {
            start: 0,
            end: self.samples.len(),
            parent: None,
        });
        while let Some(p) = self.stack.pop() {
            let idx = nodes.len();
            let idx32 = idx as u32;
            if let Some((parent, is_left)) = p.parent {
                if is_left {
                    nodes[parent].left = idx32;
                } else {
                    nodes[parent].right = idx32;
                }
            }
            self.totals.fill(0.0);
            for &s in &self.samples[p.start..p.end] {
                self.totals[self.y[s as usize]] += self.weights[s as usize];
            }
            let total: f64 = self.totals.iter().sum();
            values.extend(self.totals.iter().map(|&t| (t / total) as f32));
            nodes.push(Node {
                feature: 0,
                threshold: 0.0,
                left: LEAF,
                right: LEAF,
            });
            let classes_present = self.totals.iter().filter(|&&t| t > 0.0).count();
            if p.end - p.start < 2 || classes_present <= 1 {
                continue;
            }
            let Some(split) = self.best_split(p.start, p.end, total, rng) else {
                continue;
            };
            let mid = self.partition(p.start, p.end, split.feature, split.threshold);
            nodes[idx].feature = split.feature as u32;
            nodes[idx].threshold = split.threshold;
            // Right pushed first so the left child is grown next: depth-first pre-order.
            self.stack.push(Pending {
                start: mid,
                end: p.end,
                parent: Some((idx, false)),
            });
            self.stack.push(Pending {
                start: p.start,
                end: mid,
                parent: Some((idx, true)),
            });
        }
        debug_assert_eq!(values.len(), nodes.len() * k);
        Tree { nodes, values }
    }

    /// The split of `samples[start..end]` with the lowest weighted Gini impurity of the
    /// children among `max_features` randomly drawn non-constant features.
    fn best_split(
        &mut self,
        start: usize,
        end: usize,
        total: f64,
        rng: &mut SmallRng,
    ) -> Option<Split> {
        let n_features = self.features.len();
        let mut best: Option<Split> = None;
        let mut visited = 0;
        for i in 0..n_features {
            if visited >= self.max_features {
                break;
            }
            // Partial Fisher–Yates: a uniform draw without replacement.
            let j = rng.gen_range(i..n_features);
            self.features.swap(i, j);
            let f = self.features[i] as usize;
            let column = self.x.column(f);
            self.keys.clear();
            let mut lo = f32::INFINITY;
            let mut hi = f32::NEG_INFINITY;
            for &s in &self.samples[start..end] {
                let v = column[s as usize];
                lo = lo.min(v);
                hi = hi.max(v);
                self.keys
                    .push((u64::from(ordered_bits(v)) << 32) | u64::from(s));
            }
            if hi <= lo {
                continue; // constant in this node: does not count
            }
            visited += 1;
            self.keys.sort_unstable();
            self.left.fill(0.0);
            let mut left_total = 0.0;
            let m = self.keys.len();
            for p in 0..m - 1 {
                let s = (self.keys[p] & 0xFFFF_FFFF) as usize;
                let w = self.weights[s];
                self.left[self.y[s]] += w;
                left_total += w;
                let v = from_ordered_bits((self.keys[p] >> 32) as u32);
                let next = from_ordered_bits((self.keys[p + 1] >> 32) as u32);
                if next <= v {
                    continue;
                }
                let right_total = total - left_total;
                let mut left_sq = 0.0;
                let mut right_sq = 0.0;
                for (&l, &t) in self.left.iter().zip(&self.totals) {
                    left_sq += l * l;
                    right_sq += (t - l) * (t - l);
                }
                // Maximising Σ w_Lc²/W_L + Σ w_Rc²/W_R minimises W_L·Gini_L + W_R·Gini_R
                // (scikit-learn's Gini `proxy_impurity_improvement`).
                let proxy = left_sq / left_total + right_sq / right_total;
                if best.as_ref().is_none_or(|b| proxy > b.proxy) {
                    best = Some(Split {
                        feature: f,
                        threshold: midpoint(v, next),
                        proxy,
                    });
                }
            }
        }
        best
    }

    /// Moves samples with `x ≤ threshold` to the front; returns the first index of the rest.
    fn partition(&mut self, start: usize, end: usize, feature: usize, threshold: f32) -> usize {
        let column = self.x.column(feature);
        let mut i = start;
        let mut j = end;
        while i < j {
            if column[self.samples[i] as usize] <= threshold {
                i += 1;
            } else {
                j -= 1;
                self.samples.swap(i, j);
            }
        }
        i
    }
}

impl RandomForest {
    /// Grows a forest on standardised rows `x` (row-major, `n_features` columns) with class
    /// labels `y` in `0..n_classes`.
    ///
    /// # Errors
    /// [`StyleError`] for invalid settings or inconsistent input sizes.
    pub fn fit(
        x: &[f64],
        n_features: usize,
        y: &[usize],
        n_classes: usize,
        params: &ForestParams,
    ) -> Result<Self, StyleError> {
        params.validate()?;
        let n = y.len();
        if n == 0 || n_features == 0 {
            return Err(StyleError::Empty { what: "windows" });
        }
        if x.len() != n * n_features {
            return Err(StyleError::LengthMismatch {
                what: "forest training values",
                expected: n * n_features,
                actual: x.len(),
            });
        }
        if n > u32::MAX as usize {
            return Err(StyleError::InvalidSetting {
                name: "windows",
                value: n.to_string(),
                reason: "a forest trains on at most 2^32 - 1 windows",
            });
        }
        let cw = class_weights(params.class_weight, y, n_classes)?;
        // Column-major f32 copy: the split search reads one feature of many windows.
        let mut values = vec![0.0_f32; n * n_features];
        for (i, row) in x.chunks_exact(n_features).enumerate() {
            for (f, &v) in row.iter().enumerate() {
                #[allow(
                    clippy::cast_possible_truncation,
                    reason = "trees compare features in f32, as scikit-learn does"
                )]
                let v32 = v as f32;
                values[f * n + i] = v32;
            }
        }
        let columns = Columns { n_rows: n, values };
        let max_features = params.max_features.resolve(n_features);
        let mut seeder = SmallRng::seed_from_u64(params.seed);
        let seeds: Vec<u64> = (0..params.n_trees).map(|_| seeder.next_u64()).collect();
        let threads = if params.threads == 0 {
            std::thread::available_parallelism().map_or(1, std::num::NonZero::get)
        } else {
            params.threads
        }
        .min(params.n_trees);
        let next = AtomicUsize::new(0);
        let mut grown: Vec<(usize, Tree)> = Vec::with_capacity(params.n_trees);
        std::thread::scope(|scope| {
            let workers: Vec<_> = (0..threads)
                .map(|_| {
                    scope.spawn(|| {
                        let mut builder = Builder::new(
                            &columns,
                            y,
                            &cw,
                            n_classes,
                            max_features,
                            params.bootstrap,
                        );
                        let mut out = Vec::new();
                        loop {
                            let t = next.fetch_add(1, Ordering::Relaxed);
                            if t >= seeds.len() {
                                break;
                            }
                            let mut rng = SmallRng::seed_from_u64(seeds[t]);
                            out.push((t, builder.grow(&mut rng)));
                        }
                        out
                    })
                })
                .collect();
            for worker in workers {
                match worker.join() {
                    Ok(trees) => grown.extend(trees),
                    Err(panic) => std::panic::resume_unwind(panic),
                }
            }
        });
        grown.sort_unstable_by_key(|(t, _)| *t);
        Ok(Self {
            n_features,
            n_classes,
            trees: grown.into_iter().map(|(_, tree)| tree).collect(),
        })
    }

    /// Number of features the forest reads.
    #[must_use]
    pub fn n_features(&self) -> usize {
        self.n_features
    }

    /// Number of classes.
    #[must_use]
    pub fn n_classes(&self) -> usize {
        self.n_classes
    }

    /// Number of trees.
    #[must_use]
    pub fn n_trees(&self) -> usize {
        self.trees.len()
    }

    /// Total number of nodes over all trees.
    #[must_use]
    pub fn n_nodes(&self) -> usize {
        self.trees.iter().map(|t| t.nodes.len()).sum()
    }

    /// The root split of tree `tree`: `(feature, threshold)`; `None` for a tree that is a single
    /// leaf or an index out of range (for inspection and tests).
    #[must_use]
    pub fn root_split(&self, tree: usize) -> Option<(usize, f32)> {
        let root = self.trees.get(tree)?.nodes.first()?;
        (root.left != LEAF).then_some((root.feature as usize, root.threshold))
    }

    /// Class probabilities of one standardised row (as `f32`), written to `out` (no allocation):
    /// the mean over trees of the leaf's class fractions.
    ///
    /// # Panics
    /// If `row` or `out` has the wrong length.
    pub fn predict_proba_into(&self, row: &[f32], out: &mut [f64]) {
        assert_eq!(row.len(), self.n_features, "row length");
        assert_eq!(out.len(), self.n_classes, "output length");
        out.fill(0.0);
        let k = self.n_classes;
        for tree in &self.trees {
            let leaf = tree.leaf(row);
            for (o, &v) in out.iter_mut().zip(&tree.values[leaf * k..(leaf + 1) * k]) {
                *o += f64::from(v);
            }
        }
        let n = self.trees.len() as f64;
        for o in out.iter_mut() {
            *o /= n;
        }
    }

    /// Per-prediction decomposition of class `class`'s probability into a bias (the mean root
    /// fraction) and one contribution per feature, written to `contributions` (no allocation).
    ///
    /// Saabas's tree-path decomposition (A. Saabas, "Interpreting random forests", 2014; the
    /// `treeinterpreter` package): along the path of each tree, the change of the node's class
    /// fraction from parent to child is credited to the parent's split feature; the forest's
    /// values are the means over trees. `bias + Σ contributions` equals the forest's probability.
    /// Returns `(bias, probability)`.
    ///
    /// # Panics
    /// If a length is wrong or `class >= n_classes`.
    pub fn contributions_into(
        &self,
        row: &[f32],
        class: usize,
        contributions: &mut [f64],
    ) -> (f64, f64) {
        assert_eq!(row.len(), self.n_features, "row length");
        assert_eq!(contributions.len(), self.n_features, "contributions length");
        assert!(class < self.n_classes, "class index");
        contributions.fill(0.0);
        let k = self.n_classes;
        let mut bias = 0.0;
        let mut probability = 0.0;
        for tree in &self.trees {
            let (leaf, root) = tree.walk_with_contributions(row, class, k, contributions);
            bias += root;
            probability += f64::from(tree.values[leaf * k + class]);
        }
        let n = self.trees.len() as f64;
        for c in contributions.iter_mut() {
            *c /= n;
        }
        (bias / n, probability / n)
    }

    /// [`RandomForest::predict_proba_into`] and [`RandomForest::contributions_into`] in one
    /// walk down each tree (what a live estimate needs); returns the bias.
    ///
    /// # Panics
    /// If a length is wrong or `class >= n_classes`.
    pub fn predict_with_contributions_into(
        &self,
        row: &[f32],
        class: usize,
        proba: &mut [f64],
        contributions: &mut [f64],
    ) -> f64 {
        assert_eq!(row.len(), self.n_features, "row length");
        assert_eq!(proba.len(), self.n_classes, "output length");
        assert_eq!(contributions.len(), self.n_features, "contributions length");
        assert!(class < self.n_classes, "class index");
        proba.fill(0.0);
        contributions.fill(0.0);
        let k = self.n_classes;
        let mut bias = 0.0;
        for tree in &self.trees {
            let (i, root) = tree.walk_with_contributions(row, class, k, contributions);
            bias += root;
            for (p, &v) in proba.iter_mut().zip(&tree.values[i * k..(i + 1) * k]) {
                *p += f64::from(v);
            }
        }
        let n = self.trees.len() as f64;
        for v in proba.iter_mut().chain(contributions.iter_mut()) {
            *v /= n;
        }
        bias / n
    }

    /// The forest as plain arrays for the model file.
    pub(crate) fn to_file(&self) -> ForestFile {
        ForestFile {
            n_features: self.n_features,
            n_classes: self.n_classes,
            trees: self
                .trees
                .iter()
                .map(|t| TreeFile {
                    feature: t.nodes.iter().map(|n| n.feature).collect(),
                    threshold: t.nodes.iter().map(|n| n.threshold).collect(),
                    left: t.nodes.iter().map(|n| n.left).collect(),
                    right: t.nodes.iter().map(|n| n.right).collect(),
                    value: t.values.clone(),
                })
                .collect(),
        }
    }

    /// Rebuilds a forest from the model file, checking that every tree is a well-formed tree
    /// (children after their parent, each node reached once), that features and sizes are in
    /// range and that every number is finite.
    pub(crate) fn from_file(
        file: ForestFile,
        limits: &ForestLimits,
    ) -> Result<Self, ModelFileError> {
        let invalid = |reason: String| ModelFileError::Invalid { reason };
        let k = file.n_classes;
        if k < 2 || file.n_features == 0 {
            return Err(invalid(format!(
                "forest has {} classes and {} features",
                k, file.n_features
            )));
        }
        if file.trees.is_empty() {
            return Err(invalid("forest has no trees".into()));
        }
        if file.trees.len() > limits.max_trees {
            return Err(ModelFileError::Limit {
                what: "number of trees",
                limit: limits.max_trees,
                actual: file.trees.len(),
            });
        }
        let total_nodes: usize = file.trees.iter().map(|t| t.feature.len()).sum();
        if total_nodes > limits.max_nodes {
            return Err(ModelFileError::Limit {
                what: "number of tree nodes",
                limit: limits.max_nodes,
                actual: total_nodes,
            });
        }
        let mut trees = Vec::with_capacity(file.trees.len());
        for (t, tree) in file.trees.into_iter().enumerate() {
            let n = tree.feature.len();
            if n == 0
                || tree.threshold.len() != n
                || tree.left.len() != n
                || tree.right.len() != n
                || tree.value.len() != n * k
            {
                return Err(invalid(format!("tree {t}: arrays of different lengths")));
            }
            let mut parents = vec![0_u8; n];
            let mut nodes = Vec::with_capacity(n);
            for i in 0..n {
                let (f, th, l, r) = (
                    tree.feature[i],
                    tree.threshold[i],
                    tree.left[i],
                    tree.right[i],
                );
                if l != LEAF {
                    let (lu, ru) = (l as usize, r as usize);
                    if lu <= i || ru <= i || lu >= n || ru >= n || lu == ru {
                        return Err(invalid(format!("tree {t}: node {i} has bad children")));
                    }
                    if f as usize >= file.n_features {
                        return Err(invalid(format!(
                            "tree {t}: node {i} splits on feature {f}, the schema has {}",
                            file.n_features
                        )));
                    }
                    if !th.is_finite() {
                        return Err(ModelFileError::NonFinite {
                            field: format!("tree {t} node {i} threshold"),
                        });
                    }
                    parents[lu] += 1;
                    parents[ru] += 1;
                    if parents[lu] > 1 || parents[ru] > 1 {
                        return Err(invalid(format!("tree {t}: a node has two parents")));
                    }
                } else if r != LEAF {
                    return Err(invalid(format!("tree {t}: leaf {i} has a right child")));
                }
                nodes.push(Node {
                    feature: f,
                    threshold: th,
                    left: l,
                    right: r,
                });
            }
            if parents.iter().skip(1).any(|&p| p != 1) {
                return Err(invalid(format!("tree {t}: a node is unreachable")));
            }
            for (i, fractions) in tree.value.chunks_exact(k).enumerate() {
                let sum: f32 = fractions.iter().sum();
                if fractions
                    .iter()
                    .any(|v| !v.is_finite() || *v < 0.0 || *v > 1.0)
                    || (sum - 1.0).abs() > 1e-3
                {
                    return Err(invalid(format!(
                        "tree {t}: node {i} class fractions are not a distribution"
                    )));
                }
            }
            trees.push(Tree {
                nodes,
                values: tree.value,
            });
        }
        Ok(Self {
            n_features: file.n_features,
            n_classes: k,
            trees,
        })
    }
}

/// Size limits applied when reading a forest from a file.
pub(crate) struct ForestLimits {
    pub(crate) max_trees: usize,
    pub(crate) max_nodes: usize,
}

/// A forest in the model file: one record of parallel arrays per tree.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct ForestFile {
    pub(crate) n_features: usize,
    pub(crate) n_classes: usize,
    pub(crate) trees: Vec<TreeFile>,
}

/// A tree in the model file: split feature, threshold and children per node (children `0`
/// for leaves) and the class fractions of every node (`nodes × classes`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub(crate) struct TreeFile {
    pub(crate) feature: Vec<u32>,
    pub(crate) threshold: Vec<f32>,
    pub(crate) left: Vec<u32>,
    pub(crate) right: Vec<u32>,
    pub(crate) value: Vec<f32>,
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Two noisy blobs per class in `f` dimensions; the first `informative` features carry
    /// the class, the rest are noise.
    fn blobs(
        seed: u64,
        n: usize,
        f: usize,
        informative: usize,
        spread: f64,
    ) -> (Vec<f64>, Vec<usize>) {
        let mut rng = SmallRng::seed_from_u64(seed);
        let mut x = Vec::with_capacity(n * f);
        let mut y = Vec::with_capacity(n);
        for i in 0..n {
            let class = i % 2;
            y.push(class);
            for j in 0..f {
                let centre = if j < informative {
                    class as f64 * 2.0 - 1.0
                } else {
                    0.0
                };
                x.push(
                    centre + spread * (rng.gen_range(-1.0..1.0_f64) + rng.gen_range(-1.0..1.0_f64)),
                );
            }
        }
        (x, y)
    }

    fn to_f32(row: &[f64]) -> Vec<f32> {
        row.iter().map(|&v| v as f32).collect()
    }

    fn small(seed: u64, n_trees: usize) -> ForestParams {
        ForestParams {
            n_trees,
            seed,
            ..ForestParams::default()
        }
    }

    #[test]
    fn same_forest_whatever_the_thread_count() {
        let seed = 21;
        let (x, y) = blobs(seed, 120, 6, 2, 1.0);
        let one = RandomForest::fit(
            &x,
            6,
            &y,
            2,
            &ForestParams {
                threads: 1,
                ..small(seed, 16)
            },
        )
        .expect("fit");
        let three = RandomForest::fit(
            &x,
            6,
            &y,
            2,
            &ForestParams {
                threads: 3,
                ..small(seed, 16)
            },
        )
        .expect("fit");
        assert!(
            one == three,
            "seed {seed}: 1 and 3 threads grew different forests"
        );
        let other = RandomForest::fit(&x, 6, &y, 2, &small(seed + 1, 16)).expect("fit");
        assert!(
            one != other,
            "seed {seed}: another seed must grow other trees"
        );
    }

    #[test]
    fn probabilities_are_distributions_and_separate_clear_classes() {
        let seed = 5;
        let (x, y) = blobs(seed, 200, 5, 3, 0.3);
        let forest = RandomForest::fit(&x, 5, &y, 2, &small(seed, 25)).expect("fit");
        let (tx, ty) = blobs(seed + 100, 100, 5, 3, 0.3);
        let mut p = [0.0; 2];
        let mut correct = 0;
        for (row, &label) in tx.chunks_exact(5).zip(&ty) {
            forest.predict_proba_into(&to_f32(row), &mut p);
            assert!((p[0] + p[1] - 1.0).abs() < 1e-6 && p.iter().all(|v| (0.0..=1.0).contains(v)));
            correct += usize::from((p[1] > p[0]) == (label == 1));
        }
        // Centres 2 apart on 3 features, noise within ±0.6: the classes do not overlap.
        assert_eq!(correct, 100, "seed {seed}");
    }

    #[test]
    fn one_unbootstrapped_tree_on_all_features_reproduces_its_training_labels() {
        // A fully grown tree isolates every distinct point (leaves are pure).
        let seed = 8;
        let (x, y) = blobs(seed, 150, 4, 1, 2.0);
        let params = ForestParams {
            n_trees: 1,
            bootstrap: false,
            max_features: MaxFeatures::All,
            ..small(seed, 1)
        };
        let forest = RandomForest::fit(&x, 4, &y, 2, &params).expect("fit");
        let mut p = [0.0; 2];
        for (row, &label) in x.chunks_exact(4).zip(&y) {
            forest.predict_proba_into(&to_f32(row), &mut p);
            assert_eq!(p[label], 1.0, "seed {seed}");
        }
    }

    #[test]
    fn features_are_drawn_per_split_not_per_tree() {
        // One feature per split out of 12: a single deep tree still uses many features.
        let seed = 13;
        let (x, y) = blobs(seed, 300, 12, 12, 3.0);
        let params = ForestParams {
            n_trees: 1,
            max_features: MaxFeatures::Count(1),
            ..small(seed, 1)
        };
        let forest = RandomForest::fit(&x, 12, &y, 2, &params).expect("fit");
        let mut used: Vec<u32> = forest.trees[0]
            .nodes
            .iter()
            .filter(|n| n.left != LEAF)
            .map(|n| n.feature)
            .collect();
        used.sort_unstable();
        used.dedup();
        assert!(used.len() >= 10, "seed {seed}: features used {used:?}");
    }

    #[test]
    fn constant_features_are_never_split_on() {
        let seed = 17;
        let (mut x, y) = blobs(seed, 100, 3, 2, 1.0);
        for row in x.chunks_exact_mut(3) {
            row[2] = 4.0;
        }
        let forest = RandomForest::fit(&x, 3, &y, 2, &small(seed, 20)).expect("fit");
        for tree in &forest.trees {
            assert!(
                tree.nodes.iter().all(|n| n.left == LEAF || n.feature != 2),
                "seed {seed}"
            );
        }
    }

    #[test]
    fn path_contributions_sum_to_the_probability() {
        let seed = 29;
        let (x, y3) = {
            let (x, y) = blobs(seed, 150, 5, 2, 1.5);
            let y3: Vec<usize> = y
                .iter()
                .enumerate()
                .map(|(i, &c)| if i % 5 == 0 { 2 } else { c })
                .collect();
            (x, y3)
        };
        let forest = RandomForest::fit(&x, 5, &y3, 3, &small(seed, 30)).expect("fit");
        let mut p = [0.0; 3];
        let mut c = [0.0; 5];
        for row in x.chunks_exact(5).take(20) {
            let r = to_f32(row);
            forest.predict_proba_into(&r, &mut p);
            for class in 0..3 {
                let (bias, prob) = forest.contributions_into(&r, class, &mut c);
                assert!((prob - p[class]).abs() < 1e-9, "seed {seed}");
                assert!(
                    (bias + c.iter().sum::<f64>() - p[class]).abs() < 1e-9,
                    "seed {seed}"
                );
                let mut p2 = [0.0; 3];
                let mut c2 = [0.0; 5];
                let bias2 = forest.predict_with_contributions_into(&r, class, &mut p2, &mut c2);
                assert_eq!(
                    (bias2, p2, c2),
                    (bias, p, c),
                    "seed {seed}: one walk equals two"
                );
            }
        }
    }

    #[test]
    fn leaf_fractions_follow_the_class_weights() {
        // One binary feature; identical windows with different labels end in one impure leaf.
        // x = 0: 50 of class 0 and 10 of class 1; x = 1: 30 and 10. Balanced weights are
        // n/(2·n_c) = 100/160 and 100/40 (scikit-learn's formula), so the x = 1 leaf's class-1
        // fraction is 10·2.5 / (10·2.5 + 30·0.625) = 4/7, against 10/40 unweighted.
        let mut x = Vec::new();
        let mut y = Vec::new();
        for (value, zeros, ones) in [(0.0, 50, 10), (1.0, 30, 10)] {
            for i in 0..zeros + ones {
                x.push(value);
                y.push(usize::from(i >= zeros));
            }
        }
        let fraction = |cw: ClassWeight| {
            let params = ForestParams {
                n_trees: 1,
                bootstrap: false,
                max_features: MaxFeatures::All,
                class_weight: cw,
                ..small(1, 1)
            };
            let forest = RandomForest::fit(&x, 1, &y, 2, &params).expect("fit");
            let mut p = [0.0; 2];
            forest.predict_proba_into(&[1.0], &mut p);
            p[1]
        };
        assert!((fraction(ClassWeight::Uniform) - 0.25).abs() < 1e-6);
        assert!((fraction(ClassWeight::Balanced) - 4.0 / 7.0).abs() < 1e-6);
    }

    #[test]
    fn file_round_trip_and_malformed_trees() {
        let seed = 2;
        let (x, y) = blobs(seed, 60, 3, 2, 1.0);
        let forest = RandomForest::fit(&x, 3, &y, 2, &small(seed, 4)).expect("fit");
        let limits = ForestLimits {
            max_trees: 10,
            max_nodes: 10_000,
        };
        let back = RandomForest::from_file(forest.to_file(), &limits).expect("valid");
        assert_eq!(back, forest);

        let mut cyclic = forest.to_file();
        let tree = &mut cyclic.trees[0];
        let internal = tree.left.iter().position(|&l| l != LEAF).expect("a split");
        tree.left[internal] = internal as u32; // points at itself
        assert!(matches!(
            RandomForest::from_file(cyclic, &limits),
            Err(ModelFileError::Invalid { .. })
        ));

        let mut far = forest.to_file();
        let tree = &mut far.trees[0];
        let internal = tree.left.iter().position(|&l| l != LEAF).expect("a split");
        tree.feature[internal] = 3;
        assert!(matches!(
            RandomForest::from_file(far, &limits),
            Err(ModelFileError::Invalid { .. })
        ));

        let tight = ForestLimits {
            max_trees: 3,
            max_nodes: 10_000,
        };
        assert!(matches!(
            RandomForest::from_file(forest.to_file(), &tight),
            Err(ModelFileError::Limit {
                limit: 3,
                actual: 4,
                ..
            })
        ));
    }

    #[test]
    fn ordered_bits_preserve_order() {
        let values = [-1e30_f32, -2.5, -0.0, 0.0, 1e-40, 1.0, 3.5e20];
        for w in values.windows(2) {
            assert!(ordered_bits(w[0]) <= ordered_bits(w[1]));
            assert_eq!(
                from_ordered_bits(ordered_bits(w[0])).to_bits(),
                w[0].to_bits()
            );
        }
        assert_eq!(midpoint(1.0, f32::from_bits(1.0_f32.to_bits() + 1)), 1.0);
        assert_eq!(midpoint(1.0, 2.0), 1.5);
    }
}
