//! β-divergence NMF with multiplicative updates: activations of a fixed dictionary for one
//! column (the live step), and dictionary learning (for palettes).
//!
//! Updates are those of C. Févotte and J. Idier, "Algorithms for nonnegative matrix
//! factorization with the β-divergence", Neural Computation 23(9), 2011, eq. (4.1)–(4.2)
//! without the exponent γ(β) (which is 1 for β in [1, 2], the range used here):
//!
//! `h_k ← h_k · Σ_d w_dk v_d λ_d^(β−2) / Σ_d w_dk λ_d^(β−1)`, with `λ = W h`.
//!
//! β = 1 is the generalised Kullback–Leibler divergence (D. D. Lee and H. S. Seung, NIPS 2000),
//! β = 2 the Euclidean distance, β = 0 Itakura–Saito. Supervised use of a fixed dictionary
//! follows P. Smaragdis and J. C. Brown, WASPAA 2003, and its real-time, warm-started form
//! A. Dessein, A. Cont and G. Lemaitre, ISMIR 2010.
//!
//! Every quantity is relative to the column's own energy, so scaling the input by any gain
//! scales the activations by the same gain and nothing else (the shares do not move).

use crate::scene::SceneRng;

/// Activations below this fraction of the column's mean activation are raised to it before
/// iterating, so an atom switched back on is not stuck at zero (multiplicative updates never
/// leave zero).
const REVIVE_FRACTION: f32 = 1e-3;
/// Floor of the model `λ`, relative to the column's mean value, against division by zero.
const LAMBDA_FLOOR: f32 = 1e-9;

/// A dictionary of atoms, atom-major (`w[k * dims + d]`), each atom summing to 1.
#[derive(Debug, Clone, PartialEq)]
pub struct Dictionary {
    dims: usize,
    w: Vec<f32>,
}

impl Dictionary {
    /// Wraps atom-major data of `atoms × dims` values, normalising every atom to sum 1 (an atom
    /// of zeros stays zero and never activates).
    ///
    /// # Panics
    /// If `w.len()` is not a multiple of `dims` or `dims == 0`.
    pub fn new(dims: usize, mut w: Vec<f32>) -> Self {
        assert!(dims > 0 && w.len().is_multiple_of(dims), "dictionary shape");
        for atom in w.chunks_exact_mut(dims) {
            let s: f32 = atom.iter().sum();
            if s > 0.0 {
                atom.iter_mut().for_each(|v| *v /= s);
            }
        }
        Self { dims, w }
    }

    /// Values per atom.
    pub fn dims(&self) -> usize {
        self.dims
    }

    /// Number of atoms.
    pub fn atoms(&self) -> usize {
        self.w.len() / self.dims
    }

    /// Atom `k`.
    pub fn atom(&self, k: usize) -> &[f32] {
        &self.w[k * self.dims..(k + 1) * self.dims]
    }
}

/// Where [`ActivationSolver::solve`] starts from.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Start {
    /// From the activations passed in (the previous column's), rescaled to this column's
    /// energy: few updates reach a good fit while the sound holds still.
    Warm,
    /// From equal activations of every allowed atom (this column's energy shared out evenly):
    /// the result depends on this column alone, so nothing of the past survives it.
    Cold,
}

/// How [`ActivationSolver::solve`] iterates.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SolveSettings {
    /// Multiplicative updates at most.
    pub max_iterations: usize,
    /// Stop early once one update moves the activations by less than this fraction of the
    /// column's energy (`Σ_k |Δh_k| / Σ_d v_d`, i.e. a move of shares, 0–1; 0 runs
    /// `max_iterations` always). With β = 1 the activations always sum to the column's energy
    /// after an update (unit-sum atoms), so this is the share of the energy that changed atom.
    pub tolerance: f32,
}

/// Solves for the activations of one column against a fixed [`Dictionary`]; holds its scratch
/// so [`ActivationSolver::solve`] never allocates.
#[derive(Debug, Clone)]
pub struct ActivationSolver {
    beta: f32,
    settings: SolveSettings,
    lambda: Vec<f32>,
    ratio: Vec<f32>,
    denom: Vec<f32>,
    /// Indices of the allowed atoms of the current solve (capacity: every atom).
    order: Vec<usize>,
    solves: u64,
    updates: u64,
    /// The widest of AVX-512 and AVX2 + FMA this CPU has (detected once, at construction);
    /// `None` on older CPUs, which take the portable code.
    #[cfg(target_arch = "x86_64")]
    simd: Option<pulp::Arch>,
}

impl ActivationSolver {
    /// A solver for `dict` with divergence `beta` (0–2). Allocates its scratch here only.
    pub fn new(dict: &Dictionary, beta: f32, settings: SolveSettings) -> Self {
        Self {
            beta,
            settings,
            lambda: vec![0.0; dict.dims],
            ratio: vec![0.0; dict.dims],
            denom: vec![0.0; dict.dims],
            order: Vec::with_capacity(dict.atoms()),
            solves: 0,
            updates: 0,
            #[cfg(target_arch = "x86_64")]
            simd: match pulp::Arch::new() {
                pulp::Arch::Scalar => None,
                arch => Some(arch),
            },
        }
    }

    /// Takes the portable code even where the CPU has SIMD (for tests comparing the two).
    #[cfg(test)]
    fn use_portable_code(&mut self) {
        #[cfg(target_arch = "x86_64")]
        {
            self.simd = None;
        }
    }

    /// The model `W h` of the last [`ActivationSolver::solve`].
    pub fn model(&self) -> &[f32] {
        &self.lambda
    }

    /// Mean multiplicative updates per solve since construction (early stopping makes it fall
    /// below [`SolveSettings::max_iterations`]); 0 before the first solve.
    pub fn mean_iterations(&self) -> f64 {
        if self.solves == 0 {
            0.0
        } else {
            self.updates as f64 / self.solves as f64
        }
    }

    /// Updates `h` (one activation per atom; with [`Start::Warm`] the values passed in, the
    /// previous column's, are the start) for column `v`, using only atoms with `active[k]`
    /// (the others are set to 0). Leaves the model `W h` in [`ActivationSolver::model`]. Does
    /// not allocate.
    ///
    /// # Panics
    /// If the lengths of `v`, `h` or `active` do not match the dictionary.
    pub fn solve(
        &mut self,
        dict: &Dictionary,
        v: &[f32],
        h: &mut [f32],
        active: &[bool],
        start: Start,
    ) {
        let dims = dict.dims;
        assert_eq!(v.len(), dims);
        assert_eq!(h.len(), dict.atoms());
        assert_eq!(active.len(), dict.atoms());
        let total: f32 = v.iter().sum();
        self.order.clear();
        self.order.extend(
            active
                .iter()
                .enumerate()
                .filter(|(_, a)| **a)
                .map(|(k, _)| k),
        );
        let n_active = self.order.len();
        if total <= 0.0 || !total.is_finite() || n_active == 0 {
            h.iter_mut().for_each(|x| *x = 0.0);
            self.lambda.iter_mut().for_each(|x| *x = 0.0);
            return;
        }
        let mean_h = total / n_active as f32;
        let floor = LAMBDA_FLOOR * total / dims as f32;
        for (x, &a) in h.iter_mut().zip(active) {
            *x = match (a, start) {
                (false, _) => 0.0,
                (true, Start::Cold) => mean_h,
                (true, Start::Warm) if x.is_finite() => x.max(REVIVE_FRACTION * mean_h),
                (true, Start::Warm) => mean_h,
            };
        }
        // Rescale the start to this column's energy (atoms sum to 1, so Σ W h = Σ h).
        let sum_h: f32 = h.iter().sum();
        if sum_h > 0.0 {
            let k = total / sum_h;
            h.iter_mut().for_each(|x| *x *= k);
        }
        self.solves += 1;
        let SolveSettings {
            max_iterations,
            tolerance,
        } = self.settings;
        let stop = tolerance * total;
        let beta = self.beta;
        if (beta - 1.0).abs() < 1e-6 {
            self.reconstruct(dict, h, floor);
            for _ in 0..max_iterations {
                self.updates += 1;
                if self.kl_update(dict, v, h, floor) < stop {
                    break;
                }
            }
        } else {
            for _ in 0..max_iterations {
                self.reconstruct(dict, h, floor);
                for (((r, d), &x), &l) in self
                    .ratio
                    .iter_mut()
                    .zip(self.denom.iter_mut())
                    .zip(v)
                    .zip(&self.lambda)
                {
                    let lb1 = l.powf(beta - 1.0);
                    *d = lb1;
                    *r = x * lb1 / l;
                }
                let mut change = 0.0_f32;
                for &k in &self.order {
                    let atom = dict.atom(k);
                    let den = dot(atom, &self.denom);
                    if h[k] > 0.0 && den > 0.0 {
                        let next = h[k] * dot(atom, &self.ratio) / den;
                        change += (next - h[k]).abs();
                        h[k] = next;
                    }
                }
                self.updates += 1;
                if change < stop {
                    break;
                }
            }
            self.reconstruct(dict, h, floor);
        }
    }

    /// One KL update (β = 1) from the model in `lambda`, leaving the new model there; returns
    /// `Σ_k |Δh_k|`. One pass over the dictionary: for four atoms at a time, the numerators
    /// `Σ_d w_dk v_d/λ_d` (unit-sum atoms: the denominators are 1), then their part of the next
    /// model while the atoms are in cache. On CPUs with AVX-512 or AVX2 and FMA (x86-64-v4 or
    /// -v3, detected at run time) the pass runs in 16- or 8-lane fused multiply-adds
    /// ([`KlPass`]); elsewhere in the portable form below, which the compiler vectorises for
    /// SSE2.
    fn kl_update(&mut self, dict: &Dictionary, v: &[f32], h: &mut [f32], floor: f32) -> f32 {
        for (r, (&x, l)) in self.ratio.iter_mut().zip(v.iter().zip(&mut self.lambda)) {
            *r = x / *l;
            *l = 0.0;
        }
        #[cfg(target_arch = "x86_64")]
        let change = match self.simd {
            Some(arch) => arch.dispatch(KlPass {
                dict,
                order: &self.order,
                ratio: &self.ratio,
                h,
                lambda: &mut self.lambda,
            }),
            None => self.kl_pass_portable(dict, h),
        };
        #[cfg(not(target_arch = "x86_64"))]
        let change = self.kl_pass_portable(dict, h);
        self.lambda.iter_mut().for_each(|l| *l = l.max(floor));
        change
    }

    /// The pass of [`ActivationSolver::kl_update`] in portable code.
    fn kl_pass_portable(&mut self, dict: &Dictionary, h: &mut [f32]) -> f32 {
        let mut change = 0.0_f32;
        let mut quads = self.order.chunks_exact(4);
        for q in &mut quads {
            let w = [
                dict.atom(q[0]),
                dict.atom(q[1]),
                dict.atom(q[2]),
                dict.atom(q[3]),
            ];
            let num = dot4(w, &self.ratio);
            let mut a = [0.0_f32; 4];
            for j in 0..4 {
                let old = h[q[j]];
                a[j] = old * num[j];
                change += (a[j] - old).abs();
                h[q[j]] = a[j];
            }
            axpy4(&mut self.lambda, a, w);
        }
        for &k in quads.remainder() {
            let atom = dict.atom(k);
            let old = h[k];
            let next = old * dot(atom, &self.ratio);
            change += (next - old).abs();
            h[k] = next;
            for (l, &w) in self.lambda.iter_mut().zip(atom) {
                *l += next * w;
            }
        }
        change
    }

    fn reconstruct(&mut self, dict: &Dictionary, h: &[f32], floor: f32) {
        self.lambda.iter_mut().for_each(|x| *x = 0.0);
        #[cfg(target_arch = "x86_64")]
        if let Some(arch) = self.simd {
            arch.dispatch(Reconstruct {
                dict,
                order: &self.order,
                h,
                lambda: &mut self.lambda,
            });
            self.lambda.iter_mut().for_each(|l| *l = l.max(floor));
            return;
        }
        for &k in &self.order {
            let hk = h[k];
            if hk > 0.0 {
                for (l, &w) in self.lambda.iter_mut().zip(dict.atom(k)) {
                    *l += hk * w;
                }
            }
        }
        self.lambda.iter_mut().for_each(|l| *l = l.max(floor));
    }
}

/// Lanes of the partial sums in [`dot4`]: two SSE registers per atom, eight for four atoms, so
/// the sums stay in registers on baseline x86-64.
const LANES4: usize = 8;

/// Four dot products against one vector in one pass (each `b` value loaded once).
#[inline]
fn dot4(w: [&[f32]; 4], b: &[f32]) -> [f32; 4] {
    let mut s = [[0.0_f32; LANES4]; 4];
    let n = b.len();
    let whole = n - n % LANES4;
    let (w0, w1, w2, w3) = (&w[0][..n], &w[1][..n], &w[2][..n], &w[3][..n]);
    for ((((y, x0), x1), x2), x3) in b[..whole]
        .chunks_exact(LANES4)
        .zip(w0.chunks_exact(LANES4))
        .zip(w1.chunks_exact(LANES4))
        .zip(w2.chunks_exact(LANES4))
        .zip(w3.chunks_exact(LANES4))
    {
        for j in 0..LANES4 {
            s[0][j] += x0[j] * y[j];
            s[1][j] += x1[j] * y[j];
            s[2][j] += x2[j] * y[j];
            s[3][j] += x3[j] * y[j];
        }
    }
    let mut out = [0.0_f32; 4];
    for (a, (o, sa)) in out.iter_mut().zip(&s).enumerate() {
        *o = sa.iter().sum::<f32>();
        for d in whole..n {
            *o += w[a][d] * b[d];
        }
    }
    out
}

/// `y += Σ_j a_j · w_j` over four vectors in one pass (each `y` value loaded and stored once).
#[inline]
fn axpy4(y: &mut [f32], a: [f32; 4], w: [&[f32]; 4]) {
    let n = y.len();
    let (w0, w1, w2, w3) = (&w[0][..n], &w[1][..n], &w[2][..n], &w[3][..n]);
    for ((((l, &x0), &x1), &x2), &x3) in y.iter_mut().zip(w0).zip(w1).zip(w2).zip(w3) {
        *l += a[0] * x0 + a[1] * x1 + a[2] * x2 + a[3] * x3;
    }
}

/// The pass of [`ActivationSolver::kl_update`] in explicit SIMD, generic over the instruction
/// set (`pulp`): for four atoms at a time, two accumulators per atom (eight independent
/// fused multiply-add chains, enough to hide their latency), then `λ += Σ_j a_j w_j` while the
/// four atoms are in cache. `lambda` holds zeros on entry.
#[cfg(target_arch = "x86_64")]
struct KlPass<'a> {
    dict: &'a Dictionary,
    order: &'a [usize],
    ratio: &'a [f32],
    h: &'a mut [f32],
    lambda: &'a mut [f32],
}

#[cfg(target_arch = "x86_64")]
impl pulp::WithSimd for KlPass<'_> {
    type Output = f32;

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, simd: S) -> f32 {
        let KlPass {
            dict,
            order,
            ratio,
            h,
            lambda,
        } = self;
        let (rv, rt) = S::as_simd_f32s(ratio);
        let zero = simd.splat_f32s(0.0);
        let mut change = 0.0_f32;
        let mut quads = order.chunks_exact(4);
        for q in &mut quads {
            let w = [
                S::as_simd_f32s(dict.atom(q[0])),
                S::as_simd_f32s(dict.atom(q[1])),
                S::as_simd_f32s(dict.atom(q[2])),
                S::as_simd_f32s(dict.atom(q[3])),
            ];
            let nums = simd_dots(simd, w, (rv, rt));
            let mut a = [0.0_f32; 4];
            for j in 0..4 {
                let num = nums[j];
                let old = h[q[j]];
                a[j] = old * num;
                change += (a[j] - old).abs();
                h[q[j]] = a[j];
            }
            let s = [
                simd.splat_f32s(a[0]),
                simd.splat_f32s(a[1]),
                simd.splat_f32s(a[2]),
                simd.splat_f32s(a[3]),
            ];
            let (lv, lt) = S::as_mut_simd_f32s(lambda);
            for (i, l) in lv.iter_mut().enumerate() {
                let mut x = simd.mul_add_e_f32s(s[0], w[0].0[i], *l);
                x = simd.mul_add_e_f32s(s[1], w[1].0[i], x);
                x = simd.mul_add_e_f32s(s[2], w[2].0[i], x);
                *l = simd.mul_add_e_f32s(s[3], w[3].0[i], x);
            }
            for (d, l) in lt.iter_mut().enumerate() {
                *l += a[0] * w[0].1[d] + a[1] * w[1].1[d] + a[2] * w[2].1[d] + a[3] * w[3].1[d];
            }
        }
        for &k in quads.remainder() {
            let (wv, wt) = S::as_simd_f32s(dict.atom(k));
            let mut acc = zero;
            for (x, r) in wv.iter().zip(rv) {
                acc = simd.mul_add_e_f32s(*x, *r, acc);
            }
            let mut num = simd.reduce_sum_f32s(acc);
            for (&x, &r) in wt.iter().zip(rt) {
                num += x * r;
            }
            let old = h[k];
            let next = old * num;
            change += (next - old).abs();
            h[k] = next;
            let sn = simd.splat_f32s(next);
            let (lv, lt) = S::as_mut_simd_f32s(lambda);
            for (l, x) in lv.iter_mut().zip(wv) {
                *l = simd.mul_add_e_f32s(sn, *x, *l);
            }
            for (l, &x) in lt.iter_mut().zip(wt) {
                *l += next * x;
            }
        }
        change
    }
}

/// The dot products of `N` vectors `w[k]` with one vector `x`, all split by `pulp` into SIMD
/// lanes and a tail: two accumulators per vector (for `N = 4`, eight independent fused
/// multiply-add chains, enough to hide their latency), each `x` value loaded once for all.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
pub(crate) fn simd_dots<S: pulp::Simd, const N: usize>(
    simd: S,
    w: [(&[S::f32s], &[f32]); N],
    x: (&[S::f32s], &[f32]),
) -> [f32; N] {
    let (xv, xt) = x;
    let n = xv.len();
    let zero = simd.splat_f32s(0.0);
    let mut acc = [[zero; 2]; N];
    let mut i = 0;
    while i + 2 <= n {
        for (a, (r, _)) in acc.iter_mut().zip(&w) {
            a[0] = simd.mul_add_e_f32s(r[i], xv[i], a[0]);
            a[1] = simd.mul_add_e_f32s(r[i + 1], xv[i + 1], a[1]);
        }
        i += 2;
    }
    if i < n {
        for (a, (r, _)) in acc.iter_mut().zip(&w) {
            a[0] = simd.mul_add_e_f32s(r[i], xv[i], a[0]);
        }
    }
    std::array::from_fn(|k| {
        let mut sum = simd.reduce_sum_f32s(simd.add_f32s(acc[k][0], acc[k][1]));
        for (&a, &c) in w[k].1.iter().zip(xt) {
            sum += a * c;
        }
        sum
    })
}

/// `λ = Σ_k h_k w_k` over the allowed atoms in explicit SIMD (see [`KlPass`]); `lambda`
/// holds zeros on entry.
#[cfg(target_arch = "x86_64")]
struct Reconstruct<'a> {
    dict: &'a Dictionary,
    order: &'a [usize],
    h: &'a [f32],
    lambda: &'a mut [f32],
}

#[cfg(target_arch = "x86_64")]
impl pulp::WithSimd for Reconstruct<'_> {
    type Output = ();

    #[inline(always)]
    fn with_simd<S: pulp::Simd>(self, simd: S) {
        let (lv, lt) = S::as_mut_simd_f32s(self.lambda);
        for &k in self.order {
            let hk = self.h[k];
            if hk > 0.0 {
                let (wv, wt) = S::as_simd_f32s(self.dict.atom(k));
                let s = simd.splat_f32s(hk);
                for (l, x) in lv.iter_mut().zip(wv) {
                    *l = simd.mul_add_e_f32s(s, *x, *l);
                }
                for (l, &x) in lt.iter_mut().zip(wt) {
                    *l += hk * x;
                }
            }
        }
    }
}

/// Dot product of two slices of the same length.
#[inline]
pub(crate) fn dot(a: &[f32], b: &[f32]) -> f32 {
    // Sixteen partial sums: several vector registers of independent sums, so the loop is not
    // bound by one add chain's latency (the compiler vectorises without reassociating a sum).
    const LANES: usize = 16;
    let mut s = [0.0_f32; LANES];
    let mut ac = a.chunks_exact(LANES);
    let mut bc = b.chunks_exact(LANES);
    for (x, y) in (&mut ac).zip(&mut bc) {
        for j in 0..LANES {
            s[j] += x[j] * y[j];
        }
    }
    let mut t = s.iter().sum::<f32>();
    for (x, y) in ac.remainder().iter().zip(bc.remainder()) {
        t += x * y;
    }
    t
}

/// Learns `atoms` atoms from `columns` (row-major, `n × dims`) by KL NMF (β = 1, Lee & Seung
/// 2000 multiplicative updates of both factors) in `iterations` rounds; initialised from
/// randomly drawn columns (seeded) plus a little noise. Returns the atoms atom-major, each
/// normalised to sum 1. Allocates; for palettes, not live use.
pub fn learn_dictionary(
    columns: &[f32],
    dims: usize,
    atoms: usize,
    iterations: usize,
    seed: u64,
) -> Vec<f32> {
    let n = columns.len().checked_div(dims).unwrap_or(0);
    if n == 0 || atoms == 0 {
        return vec![0.0; atoms * dims];
    }
    let mut rng = SceneRng::derive(seed, 7);
    let mean: f32 = columns.iter().sum::<f32>() / columns.len() as f32;
    let mut w = vec![0.0_f32; atoms * dims];
    for k in 0..atoms {
        let c = rng.index(n);
        for d in 0..dims {
            w[k * dims + d] = columns[c * dims + d] + mean * (0.01 + 0.1 * rng.unit() as f32);
        }
    }
    normalise_atoms(&mut w, dims);
    let mut h = vec![0.0_f32; n * atoms];
    for c in 0..n {
        let total: f32 = columns[c * dims..(c + 1) * dims].iter().sum();
        for k in 0..atoms {
            h[c * atoms + k] = total / atoms as f32;
        }
    }
    let mut lambda = vec![0.0_f32; dims];
    let mut ratio = vec![0.0_f32; n * dims];
    let floor = 1e-12 * mean.max(1e-30);
    for _ in 0..iterations {
        // λ and v/λ for every column.
        for c in 0..n {
            lambda.iter_mut().for_each(|x| *x = 0.0);
            for k in 0..atoms {
                let hk = h[c * atoms + k];
                if hk > 0.0 {
                    for (l, &wv) in lambda.iter_mut().zip(&w[k * dims..(k + 1) * dims]) {
                        *l += hk * wv;
                    }
                }
            }
            for d in 0..dims {
                ratio[c * dims + d] = columns[c * dims + d] / lambda[d].max(floor);
            }
        }
        // H update (atoms sum to 1).
        for c in 0..n {
            let r = &ratio[c * dims..(c + 1) * dims];
            for k in 0..atoms {
                h[c * atoms + k] *= dot(&w[k * dims..(k + 1) * dims], r);
            }
        }
        // Recompute the ratio with the new H, then the W update: w_dk ← w_dk Σ_c h_kc r_dc / Σ_c h_kc.
        for c in 0..n {
            lambda.iter_mut().for_each(|x| *x = 0.0);
            for k in 0..atoms {
                let hk = h[c * atoms + k];
                if hk > 0.0 {
                    for (l, &wv) in lambda.iter_mut().zip(&w[k * dims..(k + 1) * dims]) {
                        *l += hk * wv;
                    }
                }
            }
            for d in 0..dims {
                ratio[c * dims + d] = columns[c * dims + d] / lambda[d].max(floor);
            }
        }
        let mut num = vec![0.0_f32; atoms * dims];
        let mut hsum = vec![0.0_f32; atoms];
        for c in 0..n {
            let r = &ratio[c * dims..(c + 1) * dims];
            for k in 0..atoms {
                let hk = h[c * atoms + k];
                if hk > 0.0 {
                    hsum[k] += hk;
                    for (acc, &rv) in num[k * dims..(k + 1) * dims].iter_mut().zip(r) {
                        *acc += hk * rv;
                    }
                }
            }
        }
        for k in 0..atoms {
            if hsum[k] > 0.0 {
                for d in 0..dims {
                    w[k * dims + d] *= num[k * dims + d] / hsum[k];
                }
            }
        }
        // Keep atoms summing to 1 and move their scale into H, which leaves W H unchanged.
        for k in 0..atoms {
            let s: f32 = w[k * dims..(k + 1) * dims].iter().sum();
            if s > 0.0 {
                w[k * dims..(k + 1) * dims].iter_mut().for_each(|x| *x /= s);
                for c in 0..n {
                    h[c * atoms + k] *= s;
                }
            }
        }
    }
    w
}

fn normalise_atoms(w: &mut [f32], dims: usize) {
    for atom in w.chunks_exact_mut(dims) {
        let s: f32 = atom.iter().sum();
        if s > 0.0 {
            atom.iter_mut().for_each(|v| *v /= s);
        }
    }
}

/// The generalised Kullback–Leibler divergence `Σ v ln(v/λ) − v + λ` (β = 1), for tests and
/// diagnostics.
pub fn kl_divergence(v: &[f32], lambda: &[f32]) -> f64 {
    v.iter()
        .zip(lambda)
        .map(|(&x, &l)| {
            let (x, l) = (f64::from(x), f64::from(l).max(1e-30));
            if x > 0.0 { x * (x / l).ln() - x + l } else { l }
        })
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn settings(max_iterations: usize, tolerance: f32) -> SolveSettings {
        SolveSettings {
            max_iterations,
            tolerance,
        }
    }

    /// A seeded dictionary and column larger than four atoms and not a multiple of the lanes,
    /// so the four-at-a-time update and its remainders both run.
    fn random_problem(seed: u64, atoms: usize, dims: usize) -> (Dictionary, Vec<f32>) {
        let mut rng = SceneRng::new(seed);
        let w = (0..atoms * dims).map(|_| rng.unit() as f32).collect();
        let v = (0..dims).map(|_| 0.1 + rng.unit() as f32).collect();
        (Dictionary::new(dims, w), v)
    }

    #[test]
    fn the_fused_kl_update_matches_the_textbook_one() {
        // Reference: the plain two-pass update (λ = W h, then h_k ← h_k Σ_d w_dk v_d/λ_d) in
        // f64, against the solver's fused four-atom f32 pass, with some atoms switched off;
        // both the run-time SIMD pass (where this CPU has one) and the portable pass, with
        // lengths that leave an odd number of vectors and a scalar tail.
        for (seed, dims, portable) in [
            (1_u64, 37, false),
            (2, 53, false),
            (3, 37, true),
            (4, 53, true),
        ] {
            let (dict, v) = random_problem(seed, 23, dims);
            let active: Vec<bool> = (0..23).map(|k| k % 5 != 2).collect();
            let mut s = ActivationSolver::new(&dict, 1.0, settings(7, 0.0));
            if portable {
                s.use_portable_code();
            }
            let mut h = vec![0.0; 23];
            s.solve(&dict, &v, &mut h, &active, Start::Cold);
            let n_active = active.iter().filter(|&&a| a).count() as f64;
            let total: f64 = v.iter().map(|&x| f64::from(x)).sum();
            let mut r: Vec<f64> = active
                .iter()
                .map(|&a| if a { total / n_active } else { 0.0 })
                .collect();
            for _ in 0..7 {
                let mut lambda = vec![0.0_f64; dims];
                for (k, &rk) in r.iter().enumerate() {
                    for (l, &w) in lambda.iter_mut().zip(dict.atom(k)) {
                        *l += rk * f64::from(w);
                    }
                }
                for (k, rk) in r.iter_mut().enumerate() {
                    let num: f64 = dict
                        .atom(k)
                        .iter()
                        .zip(&v)
                        .zip(&lambda)
                        .map(|((&w, &x), &l)| f64::from(w) * f64::from(x) / l)
                        .sum();
                    *rk *= num;
                }
            }
            for (k, (&a, &b)) in h.iter().zip(&r).enumerate() {
                assert!(
                    (f64::from(a) - b).abs() <= 1e-4 * total,
                    "seed {seed}, atom {k}: {a} vs {b}"
                );
            }
            assert_eq!(s.mean_iterations(), 7.0, "seed {seed}");
        }
    }

    #[test]
    fn early_stopping_stops_early_and_lands_near_the_full_run() {
        let seed = 4;
        let (dict, v) = random_problem(seed, 9, 20);
        let total: f32 = v.iter().sum();
        let mut full = ActivationSolver::new(&dict, 1.0, settings(3000, 0.0));
        let mut h_full = vec![0.0; 9];
        full.solve(&dict, &v, &mut h_full, &[true; 9], Start::Cold);
        let mut early = ActivationSolver::new(&dict, 1.0, settings(3000, 1e-4));
        let mut h = vec![0.0; 9];
        early.solve(&dict, &v, &mut h, &[true; 9], Start::Cold);
        assert!(
            early.mean_iterations() < 3000.0,
            "seed {seed}: never stopped"
        );
        // KL objective: the early stop is within a small fraction of the converged fit's.
        let (a, b) = (
            kl_divergence(&v, early.model()),
            kl_divergence(&v, full.model()),
        );
        assert!(
            a >= b - 1e-6 && a - b <= 1e-3 * f64::from(total),
            "seed {seed}: {a} vs {b}"
        );
    }

    #[test]
    fn a_cold_start_forgets_the_activations_passed_in() {
        let seed = 5;
        let (dict, v) = random_problem(seed, 11, 16);
        let mut s = ActivationSolver::new(&dict, 1.0, settings(30, 0.0));
        let mut a = vec![0.0; 11];
        s.solve(&dict, &v, &mut a, &[true; 11], Start::Cold);
        let mut b: Vec<f32> = (0..11).map(|k| (k * k) as f32).collect();
        s.solve(&dict, &v, &mut b, &[true; 11], Start::Cold);
        assert_eq!(a, b, "seed {seed}");
        let mut c: Vec<f32> = (0..11).map(|k| (k * k) as f32).collect();
        s.solve(&dict, &v, &mut c, &[true; 11], Start::Warm);
        assert_ne!(
            a, c,
            "seed {seed}: a warm start should differ after 30 updates"
        );
    }

    fn toy_dictionary() -> Dictionary {
        // Three atoms over 6 values, overlapping.
        Dictionary::new(
            6,
            vec![
                4.0, 2.0, 1.0, 0.0, 0.0, 0.0, //
                0.0, 1.0, 3.0, 3.0, 1.0, 0.0, //
                0.0, 0.0, 0.0, 1.0, 2.0, 5.0,
            ],
        )
    }

    #[test]
    fn exact_mixture_is_recovered_for_kl_and_euclid() {
        let dict = toy_dictionary();
        let truth = [2.0_f32, 0.5, 1.25];
        let mut v = vec![0.0_f32; 6];
        for (k, &t) in truth.iter().enumerate() {
            for (x, &w) in v.iter_mut().zip(dict.atom(k)) {
                *x += t * w;
            }
        }
        for beta in [1.0, 1.5, 2.0] {
            let mut s = ActivationSolver::new(&dict, beta, settings(2000, 0.0));
            let mut h = vec![0.0; 3];
            s.solve(&dict, &v, &mut h, &[true; 3], Start::Warm);
            for (a, b) in h.iter().zip(&truth) {
                assert!((a - b).abs() < 1e-3, "β={beta}: {h:?}");
            }
        }
    }

    #[test]
    fn kl_updates_preserve_the_column_sum_and_scale_with_gain() {
        // Closed form: at a KL fixed point with unit-sum atoms, Σ h = Σ v.
        let dict = toy_dictionary();
        let v = [1.0_f32, 3.0, 0.5, 2.0, 0.1, 4.0];
        let mut s = ActivationSolver::new(&dict, 1.0, settings(500, 0.0));
        let mut h = vec![0.0; 3];
        s.solve(&dict, &v, &mut h, &[true; 3], Start::Cold);
        let sh: f32 = h.iter().sum();
        assert!((sh - v.iter().sum::<f32>()).abs() < 1e-3, "{sh}");
        let loud: Vec<f32> = v.iter().map(|x| x * 100.0).collect();
        let mut h2 = vec![0.0; 3];
        s.solve(&dict, &loud, &mut h2, &[true; 3], Start::Cold);
        for (a, b) in h.iter().zip(&h2) {
            assert!(
                (a * 100.0 - b).abs() <= 1e-3 * b.abs().max(1.0),
                "{h:?} {h2:?}"
            );
        }
    }

    #[test]
    fn inactive_atoms_stay_silent_and_silence_gives_zeros() {
        let dict = toy_dictionary();
        let v = [1.0_f32, 1.0, 1.0, 1.0, 1.0, 1.0];
        let mut s = ActivationSolver::new(&dict, 1.0, settings(50, 0.0));
        let mut h = vec![1.0; 3];
        s.solve(&dict, &v, &mut h, &[true, false, true], Start::Warm);
        assert_eq!(h[1], 0.0);
        s.solve(&dict, &[0.0; 6], &mut h, &[true; 3], Start::Warm);
        assert!(h.iter().all(|&x| x == 0.0));
    }

    #[test]
    fn learning_finds_planted_atoms() {
        // Columns built from two planted atoms with seeded random activations: after learning,
        // each planted atom has a learned atom within a small L1 distance.
        let planted = [[0.5_f32, 0.3, 0.2, 0.0, 0.0], [0.0, 0.0, 0.1, 0.4, 0.5]];
        let mut rng = SceneRng::new(11);
        let mut cols = Vec::new();
        for _ in 0..200 {
            let (a, b) = (rng.unit() as f32, rng.unit() as f32);
            for (p, q) in planted[0].iter().zip(&planted[1]) {
                cols.push(a * p + b * q);
            }
        }
        let w = learn_dictionary(&cols, 5, 2, 500, 3);
        for p in &planted {
            let best = w
                .chunks(5)
                .map(|a| a.iter().zip(p).map(|(x, y)| (x - y).abs()).sum::<f32>())
                .fold(f32::MAX, f32::min);
            assert!(best < 0.05, "seed 11/3: {best} {w:?}");
        }
    }
}
