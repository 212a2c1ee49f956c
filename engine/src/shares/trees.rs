//! Gradient-boosted trees for the presence stage: per family, a sum of small regression trees
//! over the raw presence features whose logit the presence model averages with its network's.
//!
//! The method is gradient boosting (J. H. Friedman, "Greedy function approximation: a gradient
//! boosting machine", Annals of Statistics 29(5), 2001) on the logistic loss with second-order
//! leaf values and split gains (T. Chen and C. Guestrin, "XGBoost: a scalable tree boosting
//! system", KDD 2016, eq. 5–7: leaf `−G/(H + λ)`, gain `G_L²/(H_L + λ) + G_R²/(H_R + λ) −
//! G²/(H + λ)`), split candidates taken from per-feature quantiles of the training rows
//! (histograms, as in G. Ke et al., "LightGBM", NeurIPS 2017), each tree on a random part of the
//! rows and of the features (stochastic gradient boosting, Friedman, Computational Statistics &
//! Data Analysis 38(4), 2002). Trees are grown level by level to a fixed depth, so every tree has
//! the same shape (`2^depth − 1` splits, `2^depth` leaves, breadth first): the palette stores
//! them as plain arrays and checking one needs no walk of the nodes. A node with no useful split
//! sends every row left.
//!
//! Why trees beside the network: on the built-in palette's training rows (24 000 mixes of
//! 1.5 s, seed 1) a boosted-tree model (LightGBM 4.7.0, 63 leaves) decided presence per row with
//! F1 0.703 against the network's 0.694 on held-out mixes of seeds 1–3, and the mean of the two
//! models' logits reached 0.724 where each alone reached 0.701 and 0.711 (best thresholds for
//! each): the two make different mistakes.

use crate::parallel::parallel;
use crate::scene::SceneRng;
use serde::{Deserialize, Serialize};

/// The most trees per family a palette may carry.
pub const MAX_TREES: usize = 2000;
/// The deepest tree a palette may carry.
pub const MAX_DEPTH: usize = 10;
/// Trees [`BoostedTrees::logit`] walks side by side.
const WALK_TOGETHER: usize = 8;
/// Split candidates per feature (quantiles of the training rows).
const BINS: usize = 64;
/// Rows the split candidates are taken from (evenly spaced over the training rows).
const QUANTILE_ROWS: usize = 50_000;

/// One tree's split pairs (breadth first) and leaves.
#[derive(Debug, Clone, Copy)]
struct TreeView<'a> {
    nodes: &'a [(u32, f32)],
    leaves: &'a [f32],
}

/// Per family, `trees` regression trees of depth `depth` whose leaf values add up, with the
/// family's base, to the logit that the family sounds.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct BoostedTrees {
    /// Trees per family (1..=[`MAX_TREES`]).
    pub trees: usize,
    /// Depth of every tree (1..=[`MAX_DEPTH`]).
    pub depth: usize,
    /// Starting logit of each family.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub base: Vec<f32>,
    /// Feature each split reads (whole numbers), `families × trees × (2^depth − 1)`, breadth
    /// first.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub split_feature: Vec<f32>,
    /// A row goes left when its feature is below this value.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub split_value: Vec<f32>,
    /// Leaf values, `families × trees × 2^depth`.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub leaf: Vec<f32>,
    /// `split_feature` and `split_value` side by side, one pair per split: what
    /// [`BoostedTrees::logit`] reads, so that a split costs one memory access, not two. Made by
    /// [`BoostedTrees::pack`]; [`BoostedTrees::check`] refuses trees whose pairs are missing or
    /// stale.
    #[serde(skip)]
    nodes: Vec<(u32, f32)>,
}

impl BoostedTrees {
    fn splits_per_tree(&self) -> usize {
        (1usize << self.depth.min(MAX_DEPTH)) - 1
    }

    /// The logit that family `family` sounds for the raw feature vector `x`. Does not
    /// allocate.
    ///
    /// Trees are walked [`WALK_TOGETHER`] at a time, level by level: the nodes of one tree
    /// depend on each other, but those of different trees do not, so the processor can wait
    /// for several of them at once. The leaves are still added in tree order.
    pub fn logit(&self, family: usize, x: &[f32]) -> f32 {
        let mut logit = [0.0];
        self.logits_into(family, x, x.len(), &mut logit);
        logit[0]
    }

    /// [`BoostedTrees::logit`] of family `family` for every row of `rows` (rows of `stride`
    /// values, as many as `logits` holds), into `logits`: the same values, bit for bit, as
    /// one call per row. Does not allocate.
    ///
    /// [`WALK_TOGETHER`] trees at a time are walked for every row before the next trees: the
    /// first row waits for their nodes from memory (for all of them at once), the other rows
    /// find them in cache. Each row's leaves are added in tree order.
    pub fn logits_into(&self, family: usize, rows: &[f32], stride: usize, logits: &mut [f32]) {
        let row = |r: usize| &rows[r * stride..(r + 1) * stride];
        logits.fill(self.base[family]);
        let first = family * self.trees;
        let mut t = 0;
        while t + WALK_TOGETHER <= self.trees {
            let trees: [TreeView<'_>; WALK_TOGETHER] =
                std::array::from_fn(|k| self.tree(first + t + k));
            for (r, l) in logits.iter_mut().enumerate() {
                for leaf in self.walk(trees, row(r)) {
                    *l += leaf;
                }
            }
            t += WALK_TOGETHER;
        }
        for t in t..self.trees {
            let tree = [self.tree(first + t)];
            for (r, l) in logits.iter_mut().enumerate() {
                *l += self.walk(tree, row(r))[0];
            }
        }
    }

    /// The leaf values that row `x` reaches in the `N` trees `trees`, walked side by side.
    fn walk<const N: usize>(&self, trees: [TreeView<'_>; N], x: &[f32]) -> [f32; N] {
        let mut at = [0_usize; N];
        for _ in 0..self.depth {
            for (k, i) in at.iter_mut().enumerate() {
                let (feature, value) = trees[k].nodes[*i];
                // `check` keeps every feature below `x.len()`; a miss goes left.
                let right = x.get(feature as usize).is_some_and(|&v| v >= value);
                *i = 2 * *i + 1 + usize::from(right);
            }
        }
        std::array::from_fn(|k| trees[k].leaves[at[k] - trees[k].nodes.len()])
    }

    /// Tree `t` (counted over all families): its split pairs and its leaves.
    fn tree(&self, t: usize) -> TreeView<'_> {
        let s = self.splits_per_tree();
        TreeView {
            nodes: &self.nodes[t * s..(t + 1) * s],
            leaves: &self.leaf[t * (s + 1)..(t + 1) * (s + 1)],
        }
    }

    /// Makes the pairs [`BoostedTrees::logit`] reads from `split_feature` and `split_value`;
    /// call it after changing either.
    pub fn pack(&mut self) {
        self.nodes = self
            .split_feature
            .iter()
            .zip(&self.split_value)
            .map(|(&f, &v)| (f as u32, v))
            .collect();
    }

    /// The lengths [`BoostedTrees::arrays_mut`]'s arrays must have for `families` families,
    /// from the shape fields alone (saturating, for untrusted headers).
    pub(crate) fn lengths(&self, families: usize) -> [usize; 4] {
        let depth = self.depth.min(MAX_DEPTH);
        let trees = families.saturating_mul(self.trees);
        [
            families,
            trees.saturating_mul((1 << depth) - 1),
            trees.saturating_mul((1 << depth) - 1),
            trees.saturating_mul(1 << depth),
        ]
    }

    /// The arrays a palette keeps in its binary section, in file order. The pairs
    /// [`BoostedTrees::logit`] reads are dropped: call [`BoostedTrees::pack`] after.
    pub(crate) fn arrays_mut(&mut self) -> [&mut Vec<f32>; 4] {
        self.nodes.clear();
        [
            &mut self.base,
            &mut self.split_feature,
            &mut self.split_value,
            &mut self.leaf,
        ]
    }

    /// Checks the shapes and values for `features` features and `families` families; `Err`
    /// names the first problem.
    pub fn check(&self, features: usize, families: usize) -> Result<(), String> {
        if !(1..=MAX_TREES).contains(&self.trees) {
            return Err(format!(
                "{} boosted trees per family; 1 to {MAX_TREES}",
                self.trees
            ));
        }
        if !(1..=MAX_DEPTH).contains(&self.depth) {
            return Err(format!(
                "boosted trees of depth {}; 1 to {MAX_DEPTH}",
                self.depth
            ));
        }
        let names = ["base", "split_feature", "split_value", "leaf"];
        let got = [
            self.base.len(),
            self.split_feature.len(),
            self.split_value.len(),
            self.leaf.len(),
        ];
        for ((name, got), want) in names.iter().zip(got).zip(self.lengths(families)) {
            if got != want {
                return Err(format!(
                    "boosted trees' {name} has {got} values; expected {want}"
                ));
            }
        }
        if [&self.base, &self.split_value, &self.leaf]
            .iter()
            .any(|v| v.iter().any(|x| !x.is_finite()))
        {
            return Err("boosted trees hold a value that is not finite".into());
        }
        if self
            .split_feature
            .iter()
            .any(|&f| !(f >= 0.0 && f.fract() == 0.0 && (f as usize) < features))
        {
            return Err(format!(
                "a boosted tree splits on a feature that is not one of the {features}"
            ));
        }
        if self.nodes.len() != self.split_feature.len()
            || self
                .nodes
                .iter()
                .zip(self.split_feature.iter().zip(&self.split_value))
                .any(|(&(f, v), (&sf, &sv))| f as f32 != sf || v.to_bits() != sv.to_bits())
        {
            return Err("boosted trees were changed without being packed again".into());
        }
        Ok(())
    }
}

/// How boosted trees are trained.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TreeTraining {
    /// Trees per family at most (0: no trees); fewer when the held-back rows stop improving.
    pub trees: usize,
    /// Depth of every tree.
    pub depth: usize,
    /// Shrinkage of each tree's leaf values.
    pub learning_rate: f32,
    /// L2 penalty λ on the leaf values.
    pub l2: f32,
    /// Least summed second derivative (weighted rows, near the end of the fit) in a child.
    pub min_hessian: f32,
    /// Fraction of the fit rows each tree sees.
    pub row_fraction: f32,
    /// Fit rows each tree sees at most, whatever `row_fraction` asks: the histograms cost
    /// in proportion to them, so a build of millions of rows stays as quick per tree as one
    /// of a few hundred thousand.
    pub max_rows_per_tree: usize,
    /// Fraction of the features each tree may split on.
    pub feature_fraction: f32,
    /// Trees without a better loss on the held-back rows after which a family stops.
    pub patience: usize,
}

impl Default for TreeTraining {
    fn default() -> Self {
        Self {
            trees: 0,
            depth: 6,
            learning_rate: 0.1,
            l2: 1.0,
            min_hessian: 1.0,
            row_fraction: 0.5,
            max_rows_per_tree: 150_000,
            feature_fraction: 0.3,
            patience: 30,
        }
    }
}

/// The rows' features as bin numbers (row-major, one byte each) and each feature's cuts: bin
/// `b` holds the values below `cuts[b]` and at or above `cuts[b − 1]`.
struct Binned {
    bins: Vec<u8>,
    cuts: Vec<Vec<f32>>,
}

fn bin_rows(rows: &[f32], features: usize, fit: &[usize]) -> Binned {
    let n = rows.len() / features.max(1);
    let step = (fit.len() / QUANTILE_ROWS).max(1);
    let sample: Vec<usize> = fit.iter().step_by(step).copied().collect();
    let mut cuts = Vec::with_capacity(features);
    let mut values = Vec::with_capacity(sample.len());
    for f in 0..features {
        values.clear();
        values.extend(sample.iter().map(|&i| rows[i * features + f]));
        values.sort_by(f32::total_cmp);
        let mut c: Vec<f32> = (1..BINS)
            .map(|q| values[(q * values.len() / BINS).min(values.len().saturating_sub(1))])
            .collect();
        c.dedup();
        // The lowest value is no cut: nothing lies below it.
        if c.first() == values.first() {
            c.remove(0);
        }
        cuts.push(c);
    }
    let mut bins = vec![0_u8; n * features];
    for i in 0..n {
        for f in 0..features {
            let x = rows[i * features + f];
            bins[i * features + f] = cuts[f].partition_point(|&c| c <= x) as u8;
        }
    }
    Binned { bins, cuts }
}

/// Trains boosted trees on `rows` (`n × features`, raw) for `labels` (`n × families`) on the
/// rows `fit`, stopping each family when its weighted log loss on the rows `tune` has not
/// improved for `opts.patience` trees (and keeping the trees up to its best). Positives weigh
/// `pos_weight[f]`, as in the network's fit, so the two models' logits are on one scale.
/// Families are fitted on up to `threads` threads; the result does not depend on the number.
/// `tick` is called after each tree of each family. Allocates; for palettes.
#[allow(clippy::too_many_arguments)]
pub fn train_trees(
    rows: &[f32],
    features: usize,
    labels: &[bool],
    families: usize,
    fit: &[usize],
    tune: &[usize],
    pos_weight: &[f32],
    opts: &TreeTraining,
    seed: u64,
    threads: usize,
    tick: &(dyn Fn() + Sync),
) -> Option<BoostedTrees> {
    if opts.trees == 0 || fit.is_empty() || features == 0 {
        return None;
    }
    let depth = opts.depth.clamp(1, MAX_DEPTH);
    let binned = bin_rows(rows, features, fit);
    let fitted = parallel(families, threads, |f| {
        FamilyJob {
            binned: &binned,
            features,
            labels,
            families,
            family: f,
            fit,
            tune,
            weight: pos_weight[f],
            depth,
            opts,
            seed: SceneRng::derive(seed, 1000 + f as u64).next_u64(),
        }
        .run(tick)
    });
    // Every family keeps as many trees as the one that went furthest; the others are padded
    // with trees that add nothing, so all share one shape.
    let count = fitted
        .iter()
        .map(|t| t.trees.len())
        .max()
        .unwrap_or(0)
        .max(1);
    let s = (1usize << depth) - 1;
    let mut out = BoostedTrees {
        trees: count,
        depth,
        base: Vec::with_capacity(families),
        split_feature: Vec::with_capacity(families * count * s),
        split_value: Vec::with_capacity(families * count * s),
        leaf: Vec::with_capacity(families * count * (s + 1)),
        nodes: Vec::new(),
    };
    for fam in &fitted {
        out.base.push(fam.base);
        for t in 0..count {
            match fam.trees.get(t) {
                Some(tree) => {
                    for node in &tree.splits {
                        out.split_feature.push(node.0 as f32);
                        out.split_value
                            .push(binned.cuts[node.0].get(node.1).copied().unwrap_or(f32::MAX));
                    }
                    out.leaf.extend_from_slice(&tree.leaves);
                }
                None => {
                    out.split_feature.extend(std::iter::repeat_n(0.0, s));
                    out.split_value.extend(std::iter::repeat_n(f32::MAX, s));
                    out.leaf.extend(std::iter::repeat_n(0.0, s + 1));
                }
            }
        }
    }
    out.pack();
    Some(out)
}

/// One fitted tree: per split its feature and bin (a bin past the feature's cuts: no split,
/// every row left), then its leaf values.
#[derive(Clone)]
struct Tree {
    splits: Vec<(usize, usize)>,
    leaves: Vec<f32>,
}

#[derive(Clone)]
struct FamilyTrees {
    base: f32,
    trees: Vec<Tree>,
}

struct FamilyJob<'a> {
    binned: &'a Binned,
    features: usize,
    labels: &'a [bool],
    families: usize,
    family: usize,
    fit: &'a [usize],
    tune: &'a [usize],
    weight: f32,
    depth: usize,
    opts: &'a TreeTraining,
    seed: u64,
}

impl FamilyJob<'_> {
    fn label(&self, i: usize) -> bool {
        self.labels[i * self.families + self.family]
    }

    fn row_weight(&self, i: usize) -> f32 {
        if self.label(i) { self.weight } else { 1.0 }
    }

    /// The leaf a row's bins reach.
    fn leaf_of(&self, tree: &Tree, i: usize) -> usize {
        let bins = &self.binned.bins[i * self.features..(i + 1) * self.features];
        let mut node = 0;
        for _ in 0..self.depth {
            let (f, b) = tree.splits[node];
            node = 2 * node + 1 + usize::from(usize::from(bins[f]) > b);
        }
        node - tree.splits.len()
    }

    fn tune_loss(&self, margin: &[f32]) -> f64 {
        let mut loss = 0.0;
        for (&i, &m) in self.tune.iter().zip(margin) {
            let w = f64::from(self.row_weight(i));
            // log(1 + e^−m) for a positive, log(1 + e^m) for a negative, computed stably.
            let z = if self.label(i) { -m } else { m };
            let z = f64::from(z);
            loss += w * (z.max(0.0) + (-z.abs()).exp().ln_1p());
        }
        loss
    }

    fn run(&self, tell: &dyn Fn()) -> FamilyTrees {
        let o = self.opts;
        let (mut pos, mut all) = (0.0_f64, 0.0_f64);
        for &i in self.fit {
            let w = f64::from(self.row_weight(i));
            all += w;
            if self.label(i) {
                pos += w;
            }
        }
        let p0 = (pos / all.max(f64::MIN_POSITIVE)).clamp(1e-4, 1.0 - 1e-4);
        let base = (p0 / (1.0 - p0)).ln() as f32;
        let mut margin = vec![base; self.fit.len()];
        let mut tune_margin = vec![base; self.tune.len()];
        let mut rng = SceneRng::new(self.seed);
        let mut trees: Vec<Tree> = Vec::new();
        let mut best = (self.tune_loss(&tune_margin), 0_usize);
        let chosen_count =
            ((self.features as f32 * o.feature_fraction).ceil() as usize).clamp(1, self.features);
        let mut order: Vec<usize> = (0..self.features).collect();
        let mut g = vec![0.0_f32; self.fit.len()];
        let mut h = vec![0.0_f32; self.fit.len()];
        let mut sampled: Vec<usize> = Vec::with_capacity(self.fit.len());
        let fraction = f64::from(o.row_fraction)
            .min(o.max_rows_per_tree as f64 / self.fit.len().max(1) as f64);
        for _ in 0..o.trees {
            for (r, &i) in self.fit.iter().enumerate() {
                let p = 1.0 / (1.0 + (-margin[r]).exp());
                let w = self.row_weight(i);
                g[r] = w * (p - f32::from(u8::from(self.label(i))));
                h[r] = (w * p * (1.0 - p)).max(1e-6);
            }
            sampled.clear();
            sampled.extend((0..self.fit.len()).filter(|_| rng.chance(fraction)));
            rng.shuffle(&mut order);
            let mut chosen = order[..chosen_count].to_vec();
            chosen.sort_unstable();
            let tree = self.grow(&sampled, &chosen, &g, &h);
            for (r, &i) in self.fit.iter().enumerate() {
                margin[r] += tree.leaves[self.leaf_of(&tree, i)];
            }
            for (r, &i) in self.tune.iter().enumerate() {
                tune_margin[r] += tree.leaves[self.leaf_of(&tree, i)];
            }
            trees.push(tree);
            tell();
            if self.tune.is_empty() {
                continue;
            }
            let loss = self.tune_loss(&tune_margin);
            if loss < best.0 {
                best = (loss, trees.len());
            } else if trees.len() - best.1 >= o.patience.max(1) {
                break;
            }
        }
        if !self.tune.is_empty() {
            trees.truncate(best.1.max(1));
        }
        FamilyTrees { base, trees }
    }

    /// Grows one tree level by level on the fit rows `sampled` (indices into `self.fit`),
    /// splitting only on the features `chosen`.
    fn grow(&self, sampled: &[usize], chosen: &[usize], g: &[f32], h: &[f32]) -> Tree {
        let o = self.opts;
        let nc = chosen.len();
        let lambda = f64::from(o.l2);
        let mut node_of = vec![0_u32; sampled.len()];
        let mut splits: Vec<(usize, usize)> = Vec::new();
        // Histograms of the current level's nodes: (sum of g, sum of h) per chosen feature and
        // bin.
        let mut hist = vec![(0.0_f64, 0.0_f64); nc * BINS];
        let mut level_hist: Vec<Vec<(f64, f64)>>;
        let add_rows = |hist: &mut [(f64, f64)], which: &dyn Fn(usize) -> bool| {
            for (s, &r) in sampled.iter().enumerate() {
                if !which(s) {
                    continue;
                }
                let i = self.fit[r];
                let bins = &self.binned.bins[i * self.features..(i + 1) * self.features];
                let (gr, hr) = (f64::from(g[r]), f64::from(h[r]));
                for (j, &f) in chosen.iter().enumerate() {
                    let cell = &mut hist[j * BINS + usize::from(bins[f])];
                    cell.0 += gr;
                    cell.1 += hr;
                }
            }
        };
        add_rows(&mut hist, &|_| true);
        level_hist = vec![hist];
        for level in 0..self.depth {
            let nodes = 1usize << level;
            let mut level_splits: Vec<(usize, usize)> = Vec::with_capacity(nodes);
            for hist in level_hist.iter().take(nodes) {
                let (gt, ht) = hist[..BINS]
                    .iter()
                    .fold((0.0, 0.0), |a, c| (a.0 + c.0, a.1 + c.1));
                let parent = gt * gt / (ht + lambda);
                let mut best = (0.0_f64, usize::MAX, usize::MAX);
                for (j, &f) in chosen.iter().enumerate() {
                    let cuts = self.binned.cuts[f].len();
                    let (mut gl, mut hl) = (0.0, 0.0);
                    for b in 0..cuts {
                        let c = hist[j * BINS + b];
                        gl += c.0;
                        hl += c.1;
                        let (gr, hr) = (gt - gl, ht - hl);
                        if hl < f64::from(o.min_hessian) || hr < f64::from(o.min_hessian) {
                            continue;
                        }
                        let gain = gl * gl / (hl + lambda) + gr * gr / (hr + lambda) - parent;
                        if gain > best.0 {
                            best = (gain, f, b);
                        }
                    }
                }
                // No split: every row goes left (bin numbers never exceed BINS − 1).
                let split = if best.1 == usize::MAX {
                    (0, BINS)
                } else {
                    (best.1, best.2)
                };
                splits.push(split);
                level_splits.push(split);
            }
            // Route the rows and build the next level's histograms: the left children's from
            // their rows, the right ones' as the parent's less the left one's.
            for (s, &r) in sampled.iter().enumerate() {
                let k = node_of[s] as usize;
                let (f, b) = level_splits[k];
                let i = self.fit[r];
                let right = usize::from(self.binned.bins[i * self.features + f]) > b;
                node_of[s] = (2 * k + usize::from(right)) as u32;
            }
            if level + 1 == self.depth {
                break;
            }
            let mut next = Vec::with_capacity(2 * nodes);
            for (k, parent) in level_hist.iter().enumerate() {
                let mut left = vec![(0.0_f64, 0.0_f64); nc * BINS];
                let target = (2 * k) as u32;
                add_rows(&mut left, &|s| node_of[s] == target);
                let right: Vec<(f64, f64)> = parent
                    .iter()
                    .zip(&left)
                    .map(|(p, l)| (p.0 - l.0, p.1 - l.1))
                    .collect();
                next.push(left);
                next.push(right);
            }
            level_hist = next;
        }
        // Leaf values from the rows that reached each leaf.
        let leaves_n = 1usize << self.depth;
        let mut sums = vec![(0.0_f64, 0.0_f64); leaves_n];
        for (s, &r) in sampled.iter().enumerate() {
            let leaf = node_of[s] as usize;
            sums[leaf].0 += f64::from(g[r]);
            sums[leaf].1 += f64::from(h[r]);
        }
        let leaves = sums
            .iter()
            .map(|&(gs, hs)| (-gs / (hs + lambda) * f64::from(o.learning_rate)) as f32)
            .collect();
        Tree { splits, leaves }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `n` rows of three uniform features (seed `seed`; the third is noise) and two families:
    /// family 0 present when the first two features lie on the same side of 0.5 (an
    /// interaction no single split finds), family 1 when the second is above 0.3.
    fn rows(seed: u64, n: usize) -> (Vec<f32>, Vec<bool>) {
        let mut rng = SceneRng::new(seed);
        let (mut x, mut y) = (Vec::new(), Vec::new());
        for _ in 0..n {
            let (a, b, c) = (rng.unit() as f32, rng.unit() as f32, rng.unit() as f32);
            x.extend([a, b, c]);
            y.extend([(a > 0.5) == (b > 0.5), b > 0.3]);
        }
        (x, y)
    }

    fn train(x: &[f32], y: &[bool], opts: &TreeTraining, threads: usize) -> BoostedTrees {
        let n = y.len() / 2;
        let order: Vec<usize> = (0..n).collect();
        let (fit, tune) = order.split_at(n - n / 5);
        train_trees(x, 3, y, 2, fit, tune, &[1.0, 1.0], opts, 9, threads, &|| {}).expect("trees")
    }

    #[test]
    fn trees_learn_an_interaction_and_threads_change_nothing() {
        let (x, y) = rows(1, 3000);
        let opts = TreeTraining {
            trees: 60,
            depth: 3,
            feature_fraction: 1.0,
            ..TreeTraining::default()
        };
        let one = train(&x, &y, &opts, 1);
        assert_eq!(one, train(&x, &y, &opts, 2), "one thread or two");
        one.check(3, 2).expect("valid shapes");
        // Scored on fresh rows through the stored split values (training routed by bins).
        let (tx, ty) = rows(2, 2000);
        for f in 0..2 {
            let right = (0..2000)
                .filter(|&i| (one.logit(f, &tx[3 * i..3 * i + 3]) > 0.0) == ty[2 * i + f])
                .count();
            assert!(right > 1900, "family {f}: {right} of 2000 right");
        }
        // A cap of 300 rows per tree (an eighth of the 2 400 fit rows) grows other trees that
        // still learn both families.
        let capped = train(
            &x,
            &y,
            &TreeTraining {
                max_rows_per_tree: 300,
                ..opts
            },
            1,
        );
        assert_ne!(capped, one, "the cap must change which rows the trees see");
        for f in 0..2 {
            let right = (0..2000)
                .filter(|&i| (capped.logit(f, &tx[3 * i..3 * i + 3]) > 0.0) == ty[2 * i + f])
                .count();
            assert!(right > 1800, "capped, family {f}: {right} of 2000 right");
        }
    }

    #[test]
    fn walking_trees_side_by_side_gives_the_plain_walk_bit_for_bit() {
        // 13 random trees over 5 features for 2 families (one group of eight and a remainder
        // of five), at depths from 1 to 7.
        let mut rng = SceneRng::new(21);
        let (families, trees, features) = (2, 13, 5);
        for depth in [1, 2, 3, 4, 6, 7] {
            let s = (1 << depth) - 1;
            let mut m = BoostedTrees {
                trees,
                depth,
                base: vec![-0.3, 0.2],
                split_feature: (0..families * trees * s)
                    .map(|_| (rng.unit() * features as f64).floor() as f32)
                    .collect(),
                split_value: (0..families * trees * s)
                    .map(|_| rng.unit() as f32)
                    .collect(),
                leaf: (0..families * trees * (s + 1))
                    .map(|_| rng.unit() as f32 - 0.5)
                    .collect(),
                nodes: Vec::new(),
            };
            assert!(m.check(features, families).is_err(), "not packed yet");
            m.pack();
            m.check(features, families).expect("valid shapes");
            // 200 rows, also walked together in batches of every size from 1 to 19 (below,
            // at and beyond a group of eight, with remainders).
            let xs: Vec<f32> = (0..200 * features).map(|_| rng.unit() as f32).collect();
            let mut plains = vec![Vec::new(); families];
            for x in xs.chunks_exact(features) {
                for (f, plain_f) in plains.iter_mut().enumerate() {
                    let mut plain = m.base[f];
                    for t in 0..trees {
                        let tree = f * trees + t;
                        let mut i = 0;
                        for _ in 0..depth {
                            let node = tree * s + i;
                            let right = x[m.split_feature[node] as usize] >= m.split_value[node];
                            i = 2 * i + 1 + usize::from(right);
                        }
                        plain += m.leaf[tree * (s + 1) + i - s];
                    }
                    let got = m.logit(f, x);
                    assert_eq!(got.to_bits(), plain.to_bits(), "depth {depth}, family {f}");
                    plain_f.push(plain);
                }
            }
            for batch in 1..20 {
                for (f, plain) in plains.iter().enumerate() {
                    let mut got = vec![f32::NAN; plain.len()];
                    for (rows, out) in xs.chunks(batch * features).zip(got.chunks_mut(batch)) {
                        m.logits_into(f, rows, features, out);
                    }
                    let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&got), bits(plain), "depth {depth}, batch {batch}");
                }
            }
        }
    }

    #[test]
    fn trees_stop_where_the_held_back_rows_stop_improving() {
        // Labels that no feature predicts: the held-back loss cannot keep falling.
        let (x, _) = rows(3, 2000);
        let mut rng = SceneRng::new(4);
        let y: Vec<bool> = (0..4000).map(|_| rng.chance(0.3)).collect();
        let opts = TreeTraining {
            trees: 200,
            patience: 10,
            ..TreeTraining::default()
        };
        let trees = train(&x, &y, &opts, 1);
        assert!(trees.trees < 60, "{} trees kept", trees.trees);
        // The base alone is the log-odds of the fit rows' positive rate.
        let rate = (0..1600).filter(|&i| y[2 * i]).count() as f32 / 1600.0;
        let want = (rate / (1.0 - rate)).ln();
        assert!(
            (trees.base[0] - want).abs() < 0.05,
            "{} vs {want}",
            trees.base[0]
        );
    }

    #[test]
    fn check_names_what_is_wrong() {
        let (x, y) = rows(5, 500);
        let opts = TreeTraining {
            trees: 5,
            depth: 2,
            ..TreeTraining::default()
        };
        let good = train(&x, &y, &opts, 1);
        assert_eq!(good.check(3, 2), Ok(()));
        type Damage = Box<dyn Fn(&mut BoostedTrees)>;
        let cases: [(&str, Damage); 6] = [
            ("leaf", Box::new(|t| t.leaf.push(0.0))),
            // A valid change that `logit` would not see until packed again.
            ("packed", Box::new(|t| t.split_value[0] += 1.0)),
            ("feature", Box::new(|t| t.split_feature[0] = 3.0)),
            ("feature", Box::new(|t| t.split_feature[0] = 0.5)),
            ("finite", Box::new(|t| t.split_value[1] = f32::NAN)),
            ("depth", Box::new(|t| t.depth = MAX_DEPTH + 1)),
        ];
        for (word, damage) in cases {
            let mut t = good.clone();
            damage(&mut t);
            let err = t.check(3, 2).expect_err("damaged trees are refused");
            assert!(err.contains(word), "'{err}' should name {word}");
        }
    }
}
