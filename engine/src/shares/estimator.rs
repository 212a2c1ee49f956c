//! The shares estimator: per-frame power spectra in, each family's share of the energy (plus
//! *unexplained*) out, once per column (≥ 10 Hz), in two stages — presence, then amount.
//!
//! Per column:
//! 1. the last `stack` columns are stacked into `v`;
//! 2. *NMF alone*: activations of the whole dictionary for `v` (warm-started from the previous
//!    column, or from scratch at an onset, `ONSET_RISE_FRACTION`, so no fit carries history
//!    past the next onset; updates stop early at `SOLVE_TOLERANCE`), which give each family's
//!    energy `e_f = Σ_{k∈f} h_k` (atoms sum to 1);
//! 3. *presence*: the palette's presence model reads ~0.75 s of those statistics and decides
//!    which families sound; a direct share network, when the palette carries one, also admits
//!    any family to which it gives at least its `admit` share;
//! 4. *amount*: activations again, with only the present families' atoms (started from step 2's);
//!    when the palette carries a direct share network (see [`super::presence::ShareNetwork`]),
//!    each present family's energy `e_f` is then weighed by that network's share estimate
//!    `r_f` as `e_f · r_f^γ`, rescaled to the same sum (a geometric blend of two estimates);
//! 5. *unexplained* `u` = the part of the column's energy the reconstruction misses beyond the
//!    palette's tolerance, `max(r − τ, 0) / (1 − τ)` with `r = Σ_d max(v_d − (Wh)_d, 0) / Σ_d v_d`;
//!    each family's share is `(1 − u) · e_f / Σ_g e_g`, so the shares and *unexplained* sum to 1;
//! 6. smoothing: an energy-weighted exponential average with the response time
//!    (`s̄ = EMA(E·s) / EMA(E)`, `E` the column energy), which is unchanged by any gain.
//!
//! Step 2 of a column needs the column before (its fit starts from that one's), so it runs as
//! each column completes; steps 3–6 need only the column's own step 2, so completed columns
//! wait in a batch (at most [`MAX_BATCH`]) until [`SharesEstimator::flush`]: the presence
//! model then reads its weights and trees once for the whole batch instead of once per column,
//! which costs less, and gives the same values bit for bit.
//!
//! The same code runs live and offline: the plugin's analysis thread feeds frames as they come
//! (a batch holds the column or two of one block), the command-line tool feeds a whole file in
//! long blocks, and neither allocates per frame.

use super::columns::ColumnStream;
use super::fine::{FINE_VALUES, FineSpectrum};
use super::nmf::{ActivationSolver, Dictionary, SolveSettings, Start};
use super::presence::{PresenceContext, PresenceModel};
use crate::bands::BandsError;
use crate::frames::FrameConfig;
use crate::palette::{MAX_FAMILIES, MAX_SECTIONS, Palette};
use thiserror::Error;

/// Columns quieter than this level (dBFS, RMS over the bands' range) are "no signal".
pub const NO_SIGNAL_DB: f64 = -100.0;
/// The default response time of the smoothing, ms.
pub const DEFAULT_RESPONSE_MS: f64 = 300.0;
/// The longest response time accepted, ms.
pub const MAX_RESPONSE_MS: f64 = 60_000.0;
/// A column is an *onset* when more than this fraction of its band energy is new: the
/// half-wave rectified rise over the previous column (spectral flux, J. P. Bello et al., "A
/// tutorial on onset detection in music signals", IEEE Trans. Speech and Audio Processing
/// 13(5), 2005), over the column's energy. The fit restarts from scratch there (chosen by
/// measurement with `weft palette check --seed 1 --mixes 60`: 0.35 restarted on 22 % of the
/// columns and misattributed 0.7 pp more energy than none; 0.5 restarted on 14 % and 0.9 pp
/// less; 0.65 on 10 %, 0.9 pp less, but missed the kicks of the poison test's music).
pub const ONSET_RISE_FRACTION: f32 = 0.5;
/// [`SolveSettings::tolerance`] of the activation solves: updates stop once one moves less than
/// this share of the column's energy. Measured with `weft palette check --seed 1 --mixes 60`
/// (with onset restarts): 0.003 → 25 updates per solve on average, energy misattributed
/// 50.9 %; 0.005 → about 20, 51.2 %; 0.01 → 15, 51.8 %, presence F1 down 0.01 (30 updates
/// always, no restarts: 51.6 %).
pub const SOLVE_TOLERANCE: f32 = 0.005;

/// Columns the estimator holds between their first stage and the rest (see
/// [`SharesEstimator::push_power`]): enough that the presence model's weights and trees, read
/// once per batch, cost little per column; 1.6 s of audio at the default 50 ms columns.
pub const MAX_BATCH: usize = 32;

/// Why a shares estimator could not be built.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum SharesError {
    /// The palette's band layout cannot be built at this rate and frame length.
    #[error("the palette's bands cannot be built here")]
    Bands(#[from] BandsError),
    /// The response time is negative, not finite or above [`MAX_RESPONSE_MS`].
    #[error("response time {response_ms} ms is outside 0..={max} ms", max = MAX_RESPONSE_MS)]
    ResponseTime {
        /// The refused value, ms.
        response_ms: f64,
    },
    /// The sample rate is not positive and finite.
    #[error("sample rate {sample_rate_hz} Hz is not positive and finite")]
    SampleRate {
        /// The refused rate, Hz.
        sample_rate_hz: f64,
    },
}

/// Which stages run.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub enum SharesMode {
    /// Presence, then amount over the present families (the palette's presence model; NMF
    /// alone when the palette has none).
    #[default]
    TwoStage,
    /// The whole dictionary, no presence stage (a baseline).
    NmfAlone,
    /// Amount over the families set with [`SharesEstimator::set_known_presence`], weighed by
    /// the palette's direct share network as in [`SharesMode::TwoStage`] (which admits no
    /// family here): the ceiling of the amount stage, measured against ground truth.
    KnownPresence,
}

/// Settings of a shares estimator.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SharesSettings {
    /// Response time of the smoothing, ms (0: none).
    pub response_ms: f64,
    /// Which stages run.
    pub mode: SharesMode,
}

impl Default for SharesSettings {
    fn default() -> Self {
        Self {
            response_ms: DEFAULT_RESPONSE_MS,
            mode: SharesMode::TwoStage,
        }
    }
}

/// Family shares at one moment. `share[..families]` and `unexplained` sum to 1 when `signal`;
/// with no signal they are all 0.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Shares {
    /// Whether there was a signal to share out (false: silence, below [`NO_SIGNAL_DB`]).
    pub signal: bool,
    /// Number of families in use.
    pub families: usize,
    /// Each family's share of the energy, 0–1.
    pub share: [f32; MAX_FAMILIES],
    /// The share the palette cannot explain, 0–1.
    pub unexplained: f32,
}

impl Default for Shares {
    fn default() -> Self {
        Self {
            signal: false,
            families: 0,
            share: [0.0; MAX_FAMILIES],
            unexplained: 0.0,
        }
    }
}

impl Shares {
    /// Sums family shares into sections: `out[s]` = Σ shares of families whose section is `s`
    /// (`section_of[f]`). Does not allocate.
    pub fn section_shares(&self, section_of: &[usize], out: &mut [f32]) {
        out.fill(0.0);
        for (f, &s) in section_of.iter().enumerate().take(self.families) {
            if let Some(o) = out.get_mut(s) {
                *o += self.share[f];
            }
        }
    }
}

/// What one column produced.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct SharesUpdate {
    /// Centre of the span the column's stack covers, seconds since the start.
    pub time_s: f64,
    /// Energy of the stacked column (the palette's band energies, arbitrary but fixed units).
    pub energy: f32,
    /// This column's shares, unsmoothed.
    pub raw: Shares,
    /// The shares smoothed with the response time (what a meter shows).
    pub smoothed: Shares,
    /// This column's shares from NMF alone (the whole dictionary).
    pub nmf_alone: Shares,
    /// Probability that each family is present (the presence model's output; 1 for present
    /// families when the palette has no model).
    pub presence: [f32; MAX_FAMILIES],
    /// Families the amount stage used.
    pub present: [bool; MAX_FAMILIES],
}

/// Turns frames' power spectra into family shares. Allocates only in [`SharesEstimator::new`].
#[derive(Debug, Clone)]
pub struct SharesEstimator {
    columns: ColumnStream,
    dict: Dictionary,
    solver: ActivationSolver,
    families: usize,
    family_of_atom: Vec<usize>,
    section_of: [usize; MAX_FAMILIES],
    sections: usize,
    tolerance: f32,
    model: Option<PresenceModel>,
    context: PresenceContext,
    fine: FineSpectrum,
    fine_values: [f32; FINE_VALUES],
    mode: SharesMode,
    known: [bool; MAX_FAMILIES],
    silence_energy: f32,
    alpha: f64,
    response_ms: f64,
    h_full: Vec<f32>,
    h_amount: Vec<f32>,
    all_active: Vec<bool>,
    active: Vec<bool>,
    fam_energy: Vec<f32>,
    ema_num: [f64; MAX_FAMILIES],
    ema_unexplained: f64,
    ema_den: f64,
    update: SharesUpdate,
    prev_column: Vec<f32>,
    cold_starts: u64,
    solved_columns: u64,
    batch: Batch,
    /// The palette's split atoms (empty without them): they divide the amount stage's column
    /// among the families ([`super::split`]).
    split: Vec<f32>,
    split_scratch: Vec<f32>,
}

/// Columns past their first stage (NMF alone), waiting for presence and amount. The first
/// stage of a column needs the one before (its fit starts from the last), so it runs as each
/// column completes; the rest of a column needs only that column's first stage, so it waits
/// until [`SharesEstimator::flush`] decides presence for all waiting columns at once.
#[derive(Debug, Clone)]
struct Batch {
    columns: Vec<Waiting>,
    /// Columns with a signal, each with a row in the arrays below.
    rows: usize,
    /// Stacked band energies per row.
    stacked: Vec<f32>,
    /// First-stage activations per row.
    h_full: Vec<f32>,
    /// Presence features per row (only when a presence model will read them).
    features: Vec<f32>,
    feature_len: usize,
    /// Presence probabilities and the share network's estimate per row, [`MAX_FAMILIES`]
    /// apart.
    presence: Vec<f32>,
    direct: Vec<f32>,
    scratch: Vec<f32>,
}

/// A column whose presence and amount stages wait.
#[derive(Debug, Clone, Copy)]
struct Waiting {
    time_s: f64,
    /// The stacked column's energy.
    total: f32,
    nmf_alone: Shares,
    /// Its row in [`Batch`]; `None` for a column with no signal.
    row: Option<usize>,
}

impl SharesEstimator {
    /// An estimator for `palette` on frames of `framing` at `sample_rate_hz` (the frames'
    /// power spectra, as [`crate::spectrum::Spectrum::power`] gives them).
    pub fn new(
        palette: &Palette,
        settings: SharesSettings,
        sample_rate_hz: f64,
        framing: FrameConfig,
    ) -> Result<Self, SharesError> {
        if !(sample_rate_hz.is_finite() && sample_rate_hz > 0.0) {
            return Err(SharesError::SampleRate { sample_rate_hz });
        }
        let spec = palette.analysis();
        let columns = ColumnStream::new(spec, sample_rate_hz, framing.frame_len, framing.hop_len)?;
        let dims = spec.dims();
        let dict = Dictionary::new(dims, palette.atoms().to_vec());
        let families = palette.families().len();
        let mut family_of_atom = Vec::with_capacity(dict.atoms());
        for (f, &c) in palette.atom_counts().iter().enumerate() {
            family_of_atom.extend(std::iter::repeat_n(f, c));
        }
        let mut section_of = [0usize; MAX_FAMILIES];
        for (f, fam) in palette.families().iter().enumerate() {
            section_of[f] = fam.section;
        }
        let context_len = (spec.presence_context_s / columns.column_period_s())
            .round()
            .max(1.0) as usize;
        let model = palette.presence().cloned();
        let scratch_len = model.as_ref().map_or(0, PresenceModel::scratch_len);
        let mut context = PresenceContext::new(families, dict.atoms(), context_len);
        let feature_len = if model.is_some() {
            context.features().len()
        } else {
            0
        };
        // One-sided Hann-windowed power of a sine of RMS σ sums to 0.1875·n²·σ² (Parseval with
        // the Hann window's mean square 3/8, half of it on the positive side).
        let n = framing.frame_len as f64;
        let silence_energy = (0.1875 * n * n * 10f64.powf(NO_SIGNAL_DB / 10.0)) as f32;
        let atoms = dict.atoms();
        let mut est = Self {
            solver: ActivationSolver::new(
                &dict,
                spec.beta as f32,
                SolveSettings {
                    max_iterations: spec.iterations,
                    tolerance: SOLVE_TOLERANCE,
                },
            ),
            columns,
            dict,
            families,
            family_of_atom,
            section_of,
            sections: palette.sections().len().min(MAX_SECTIONS),
            tolerance: spec.unexplained_tolerance as f32,
            context,
            fine: FineSpectrum::new(framing.frame_len / 2 + 1, sample_rate_hz),
            fine_values: [0.0; FINE_VALUES],
            model,
            mode: settings.mode,
            known: [false; MAX_FAMILIES],
            silence_energy,
            alpha: 0.0,
            response_ms: 0.0,
            h_full: vec![0.0; atoms],
            h_amount: vec![0.0; atoms],
            all_active: vec![true; atoms],
            active: vec![false; atoms],
            fam_energy: vec![0.0; families],
            ema_num: [0.0; MAX_FAMILIES],
            ema_unexplained: 0.0,
            ema_den: 0.0,
            update: SharesUpdate::default(),
            prev_column: vec![0.0; spec.bands],
            cold_starts: 0,
            solved_columns: 0,
            split: palette
                .split_atoms()
                .map(<[f32]>::to_vec)
                .unwrap_or_default(),
            split_scratch: vec![0.0; dims],
            batch: Batch {
                columns: Vec::with_capacity(MAX_BATCH),
                rows: 0,
                stacked: vec![0.0; MAX_BATCH * dims],
                h_full: vec![0.0; MAX_BATCH * atoms],
                features: vec![0.0; MAX_BATCH * feature_len],
                feature_len,
                presence: vec![0.0; MAX_BATCH * MAX_FAMILIES],
                direct: vec![0.0; MAX_BATCH * MAX_FAMILIES],
                scratch: vec![0.0; MAX_BATCH * scratch_len],
            },
        };
        est.set_response_ms(settings.response_ms)?;
        Ok(est)
    }

    /// Changes the response time (ms) without losing state.
    pub fn set_response_ms(&mut self, response_ms: f64) -> Result<(), SharesError> {
        if !(response_ms.is_finite() && (0.0..=MAX_RESPONSE_MS).contains(&response_ms)) {
            return Err(SharesError::ResponseTime { response_ms });
        }
        self.response_ms = response_ms;
        let period_s = self.columns.column_period_s();
        self.alpha = if response_ms <= 0.0 {
            0.0
        } else {
            (-period_s / (response_ms / 1000.0)).exp()
        };
        Ok(())
    }

    /// The response time, ms.
    pub fn response_ms(&self) -> f64 {
        self.response_ms
    }

    /// Updates per second at this rate (one per column).
    pub fn update_rate_hz(&self) -> f64 {
        1.0 / self.columns.column_period_s()
    }

    /// Number of families.
    pub fn families(&self) -> usize {
        self.families
    }

    /// Section index of each family (first [`SharesEstimator::families`] entries).
    pub fn section_of(&self) -> &[usize] {
        &self.section_of[..self.families]
    }

    /// Number of sections.
    pub fn sections(&self) -> usize {
        self.sections
    }

    /// For [`SharesMode::KnownPresence`]: which families the amount stage may use.
    pub fn set_known_presence(&mut self, present: &[bool]) {
        self.known = [false; MAX_FAMILIES];
        for (k, &p) in self.known.iter_mut().zip(present) {
            *k = p;
        }
    }

    /// Forgets all input (keeps palette and settings).
    pub fn reset(&mut self) {
        self.columns.reset();
        self.context.reset();
        self.fine.reset();
        self.h_full.fill(0.0);
        self.h_amount.fill(0.0);
        self.ema_num = [0.0; MAX_FAMILIES];
        self.ema_unexplained = 0.0;
        self.ema_den = 0.0;
        self.update = SharesUpdate::default();
        self.prev_column.fill(0.0);
        self.batch.columns.clear();
        self.batch.rows = 0;
    }

    /// Mean multiplicative updates per activation solve so far (both stages; at most the
    /// palette's `iterations`, fewer where the fit settled early).
    pub fn mean_iterations(&self) -> f64 {
        self.solver.mean_iterations()
    }

    /// Fraction of the columns with a signal whose fit started from scratch (onsets, see
    /// `ONSET_RISE_FRACTION`), 0–1.
    pub fn cold_start_fraction(&self) -> f64 {
        if self.solved_columns == 0 {
            0.0
        } else {
            self.cold_starts as f64 / self.solved_columns as f64
        }
    }

    /// Whether the newest column is an onset (see `ONSET_RISE_FRACTION`); remembers it as the
    /// previous column for the next call.
    fn onset(&mut self) -> bool {
        let newest = self.columns.newest();
        let mut rise = 0.0_f32;
        let mut energy = 0.0_f32;
        for (p, &c) in self.prev_column.iter_mut().zip(newest) {
            rise += (c - *p).max(0.0);
            energy += c;
            // A band that was not finite counts as silent, so the next column starts afresh.
            *p = if c.is_finite() { c } else { 0.0 };
        }
        !(rise.is_finite() && energy.is_finite()) || rise > ONSET_RISE_FRACTION * energy
    }

    /// The presence features of the current context (schema
    /// [`super::presence::PRESENCE_SCHEMA`]); for training presence models. Does not allocate.
    pub fn presence_features(&mut self) -> &[f32] {
        self.context.features()
    }

    /// Time the presence context spans, seconds.
    pub fn presence_context_s(&self) -> f64 {
        self.context.len() as f64 * self.columns.column_period_s()
    }

    /// Time between updates, seconds.
    pub fn column_period_s(&self) -> f64 {
        self.columns.column_period_s()
    }

    /// The last update.
    pub fn last(&self) -> &SharesUpdate {
        &self.update
    }

    /// Feeds one frame's one-sided power spectrum; returns the update when a column completed.
    /// Does not allocate. The same as [`SharesEstimator::push_power`] followed by
    /// [`SharesEstimator::flush`] (a batch of one column).
    pub fn process_power(&mut self, power: &[f32]) -> Option<&SharesUpdate> {
        if !self.push_power(power) {
            return None;
        }
        self.flush(|_| {});
        Some(&self.update)
    }

    /// Feeds one frame's one-sided power spectrum; returns whether a column completed. A
    /// completed column's update waits for [`SharesEstimator::flush`], which a caller must
    /// call once [`SharesEstimator::is_full`] (and whenever it wants the updates so far).
    /// Results do not depend on when it flushes. Does not allocate.
    pub fn push_power(&mut self, power: &[f32]) -> bool {
        self.fine.add(power);
        if !self.columns.push_power(power) {
            return false;
        }
        if self.is_full() {
            // A caller that forgot to flush loses these updates, never the estimator's state.
            debug_assert!(false, "push_power on a full batch");
            self.flush(|_| {});
        }
        self.fine.finish_column(&mut self.fine_values);
        self.first_stage();
        true
    }

    /// Columns waiting for [`SharesEstimator::flush`].
    pub fn waiting(&self) -> usize {
        self.batch.columns.len()
    }

    /// Whether [`MAX_BATCH`] columns wait: flush before the next column completes.
    pub fn is_full(&self) -> bool {
        self.batch.columns.len() >= MAX_BATCH
    }

    /// Frames (hops) per column, so a caller can size what it holds back while columns wait.
    pub fn hops_per_column(&self) -> usize {
        self.columns.hops_per_column()
    }

    /// Completes the waiting columns in order: presence for all of them at once, then each
    /// one's amount and smoothing; calls `on_update` for each (afterwards
    /// [`SharesEstimator::last`] is the newest). Does not allocate.
    pub fn flush(&mut self, mut on_update: impl FnMut(&SharesUpdate)) {
        let rows = self.batch.rows;
        let fl = self.batch.feature_len;
        let mut use_direct = false;
        if rows > 0
            && let Some(model) = &self.model
        {
            let b = &mut self.batch;
            let xs = &b.features[..rows * fl];
            let direct = &mut b.direct[..rows * MAX_FAMILIES];
            match self.mode {
                SharesMode::TwoStage => {
                    let presence = &mut b.presence[..rows * MAX_FAMILIES];
                    model.predict_many(xs, fl, &mut b.scratch, presence, MAX_FAMILIES);
                    use_direct = model.shares_many(xs, fl, &mut b.scratch, direct, MAX_FAMILIES);
                }
                SharesMode::KnownPresence => {
                    use_direct = model.shares_many(xs, fl, &mut b.scratch, direct, MAX_FAMILIES);
                }
                SharesMode::NmfAlone => {}
            }
        }
        for i in 0..self.batch.columns.len() {
            let column = self.batch.columns[i];
            match column.row {
                Some(row) => self.second_stage(&column, row, use_direct),
                None => {
                    self.update = SharesUpdate {
                        time_s: column.time_s,
                        ..SharesUpdate::default()
                    };
                }
            }
            on_update(&self.update);
        }
        self.batch.columns.clear();
        self.batch.rows = 0;
    }

    /// The amount stage's activations and stacked column of the last column completed on its
    /// own ([`super::SharesTracker::process_each`]), as the split atoms are fitted on.
    pub fn amount_fit(&self) -> (&[f32], &[f32]) {
        let dims = self.dict.dims();
        (&self.h_amount, &self.batch.stacked[..dims])
    }

    fn family_energies(&mut self, from_amount: bool) -> f32 {
        self.fam_energy.fill(0.0);
        let h = if from_amount {
            &self.h_amount
        } else {
            &self.h_full
        };
        for (&hk, &f) in h.iter().zip(&self.family_of_atom) {
            self.fam_energy[f] += hk;
        }
        self.fam_energy.iter().sum()
    }

    /// Divides the amount stage's `explained` energy of batch row `row` among the families by
    /// the split atoms instead of by the palette atoms' own parts of the reconstruction.
    fn split_explained(&mut self, row: usize, explained: f32) {
        let dims = self.dict.dims();
        super::split::split_column(
            &self.split,
            dims,
            &self.family_of_atom,
            &self.batch.stacked[row * dims..(row + 1) * dims],
            &self.h_amount,
            &mut self.split_scratch,
            &mut self.fam_energy,
        );
        let s: f32 = self.fam_energy.iter().sum();
        if s.is_finite() && s > 0.0 {
            let k = explained / s;
            self.fam_energy.iter_mut().for_each(|e| *e *= k);
        } else {
            self.family_energies(true);
        }
    }

    /// Positive residual of the last solve as a fraction of `total`.
    fn residual_fraction(&self, v: &[f32], total: f32) -> f32 {
        let r: f32 = v
            .iter()
            .zip(self.solver.model())
            .map(|(&x, &l)| (x - l).max(0.0))
            .sum();
        (r / total).clamp(0.0, 1.0)
    }

    /// Weighs the amount stage's family energies by the direct share network's estimate raised
    /// to its exponent (a weighted geometric blend of the two), keeping their sum, which
    /// it returns. Where the network gives every present family nothing, the energies stay.
    fn blend_direct(&mut self, direct: &[f32; MAX_FAMILIES], explained: f32) -> f32 {
        let exponent = self
            .model
            .as_ref()
            .and_then(|m| m.shares.as_ref())
            .map_or(0.0, |n| n.exponent);
        let mut sum = 0.0_f32;
        for (e, &r) in self.fam_energy.iter_mut().zip(direct) {
            *e *= r.max(0.0).powf(exponent);
            sum += *e;
        }
        if sum > 0.0 && sum.is_finite() {
            let k = explained / sum;
            self.fam_energy.iter_mut().for_each(|e| *e *= k);
            explained
        } else {
            self.family_energies(true)
        }
    }

    fn shares_from(&self, explained_sum: f32, residual: f32) -> Shares {
        let tol = self.tolerance;
        let u = ((residual - tol).max(0.0) / (1.0 - tol)).clamp(0.0, 1.0);
        let mut s = Shares {
            signal: true,
            families: self.families,
            ..Shares::default()
        };
        if explained_sum > 0.0 {
            for f in 0..self.families {
                s.share[f] = (1.0 - u) * self.fam_energy[f] / explained_sum;
            }
            s.unexplained = u;
        } else {
            s.unexplained = 1.0;
        }
        s
    }

    /// The newest column's first stage (NMF alone) and presence features, kept in the batch.
    fn first_stage(&mut self) {
        let onset = self.onset();
        let time_s = self.columns.stacked_centre_s();
        let total: f32 = self.columns.stacked().iter().sum();
        let stack = self.columns.dims() / self.columns.newest().len().max(1);
        if !(total.is_finite() && total > self.silence_energy * stack as f32) {
            self.fam_energy.fill(0.0);
            self.h_full.fill(0.0);
            self.context.push(
                self.columns.newest(),
                0.0,
                &self.h_full,
                &self.fam_energy,
                0.0,
                &self.fine_values,
            );
            self.batch.columns.push(Waiting {
                time_s,
                total: 0.0,
                nmf_alone: Shares::default(),
                row: None,
            });
            return;
        }
        // A column that starts a new sound starts from scratch, so the fit keeps nothing of
        // what came before it; the others start from the previous column's fit.
        let start = if onset {
            self.cold_starts += 1;
            Start::Cold
        } else {
            Start::Warm
        };
        self.solved_columns += 1;
        self.solver.solve(
            &self.dict,
            self.columns.stacked(),
            &mut self.h_full,
            &self.all_active,
            start,
        );
        let residual_full = self.residual_fraction(self.columns.stacked(), total);
        let explained = self.family_energies(false);
        let nmf_alone = self.shares_from(explained, residual_full);
        self.context.push(
            self.columns.newest(),
            total,
            &self.h_full,
            &self.fam_energy,
            residual_full * total,
            &self.fine_values,
        );
        let row = self.batch.rows;
        let b = &mut self.batch;
        let (dims, atoms) = (self.dict.dims(), self.h_full.len());
        b.stacked[row * dims..(row + 1) * dims].copy_from_slice(self.columns.stacked());
        b.h_full[row * atoms..(row + 1) * atoms].copy_from_slice(&self.h_full);
        if self.mode != SharesMode::NmfAlone && b.feature_len > 0 {
            let fl = b.feature_len;
            b.features[row * fl..(row + 1) * fl].copy_from_slice(self.context.features());
        }
        b.rows += 1;
        b.columns.push(Waiting {
            time_s,
            total,
            nmf_alone,
            row: Some(row),
        });
    }

    /// Presence decisions, amount and smoothing of a waiting column with a signal (its
    /// presence model outputs already in the batch), into [`SharesEstimator::last`].
    fn second_stage(&mut self, column: &Waiting, row: usize, use_direct: bool) {
        let total = column.total;
        let at = row * MAX_FAMILIES;
        let mut presence = [0.0_f32; MAX_FAMILIES];
        let mut present = [false; MAX_FAMILIES];
        let mut direct = [0.0_f32; MAX_FAMILIES];
        direct.copy_from_slice(&self.batch.direct[at..at + MAX_FAMILIES]);
        let use_model = self.mode == SharesMode::TwoStage && self.model.is_some();
        match (self.mode, &self.model) {
            (SharesMode::TwoStage, Some(model)) => {
                presence[..self.families]
                    .copy_from_slice(&self.batch.presence[at..at + self.families]);
                let net = model.shares.as_ref().filter(|_| use_direct);
                let mut any = false;
                for f in 0..self.families {
                    present[f] = presence[f] >= model.thresholds[f]
                        || net.is_some_and(|n| n.admits(direct[f]));
                    any |= present[f];
                }
                if !any {
                    let best = (0..self.families)
                        .max_by(|&a, &b| presence[a].total_cmp(&presence[b]))
                        .unwrap_or(0);
                    present[best] = true;
                }
            }
            (SharesMode::KnownPresence, _) => {
                present[..self.families].copy_from_slice(&self.known[..self.families]);
                for f in 0..self.families {
                    presence[f] = if present[f] { 1.0 } else { 0.0 };
                }
            }
            _ => {
                present[..self.families].fill(true);
                presence[..self.families].fill(1.0);
            }
        }
        // Stage 2: amount over the present families.
        let raw = if use_model || self.mode == SharesMode::KnownPresence {
            for (a, &f) in self.active.iter_mut().zip(&self.family_of_atom) {
                *a = present[f];
            }
            let atoms = self.h_amount.len();
            self.h_amount
                .copy_from_slice(&self.batch.h_full[row * atoms..(row + 1) * atoms]);
            let dims = self.dict.dims();
            let stacked = &self.batch.stacked[row * dims..(row + 1) * dims];
            self.solver.solve(
                &self.dict,
                stacked,
                &mut self.h_amount,
                &self.active,
                Start::Warm,
            );
            let residual = self.residual_fraction(stacked, total);
            let mut explained = self.family_energies(true);
            if !self.split.is_empty() {
                self.split_explained(row, explained);
            }
            if use_direct {
                explained = self.blend_direct(&direct, explained);
            }
            self.shares_from(explained, residual)
        } else {
            column.nmf_alone
        };
        // Smoothing, weighted by energy.
        let a = self.alpha;
        let e = f64::from(total);
        self.ema_den = a * self.ema_den + (1.0 - a) * e;
        for f in 0..self.families {
            self.ema_num[f] = a * self.ema_num[f] + (1.0 - a) * e * f64::from(raw.share[f]);
        }
        self.ema_unexplained =
            a * self.ema_unexplained + (1.0 - a) * e * f64::from(raw.unexplained);
        let mut smoothed = raw;
        if self.ema_den > 0.0 {
            let mut sum = self.ema_unexplained / self.ema_den;
            for f in 0..self.families {
                sum += self.ema_num[f] / self.ema_den;
            }
            let k = if sum > 0.0 { 1.0 / sum } else { 1.0 };
            for f in 0..self.families {
                smoothed.share[f] = (self.ema_num[f] / self.ema_den * k) as f32;
            }
            smoothed.unexplained = (self.ema_unexplained / self.ema_den * k) as f32;
        }
        self.update = SharesUpdate {
            time_s: column.time_s,
            energy: total,
            raw,
            smoothed,
            nmf_alone: column.nmf_alone,
            presence,
            present,
        };
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::palette::{
        AnalysisSpec, Family, LearnSettings, Provenance, learn_family_atoms, stacked_columns,
    };
    use crate::scene::{Mix, SceneRng};
    use crate::shares::check::presence_rows;
    use crate::shares::presence::{
        PresenceTraining, ShareTraining, feature_count, train_presence, train_share_network,
    };
    use crate::shares::tracker::SharesTracker;
    use crate::shares::trees::TreeTraining;
    use std::f64::consts::TAU;

    const SR: f64 = 48_000.0;

    /// Three synthetic families: harmonic tones, noise bursts, decaying clicks (seeded).
    fn family_signal(family: usize, seed: u64, seconds: f64) -> Vec<f32> {
        let mut rng = SceneRng::new(seed);
        let n = (seconds * SR) as usize;
        let mut x = vec![0.0_f32; n];
        match family {
            0 => {
                let note = (0.25 * SR) as usize;
                for start in (0..n).step_by(note) {
                    let f0 = 110.0 * 2f64.powf(rng.uniform(0.0, 3.0));
                    let end = (start + note).min(n);
                    for (j, s) in x[start..end].iter_mut().enumerate() {
                        let t = j as f64 / SR;
                        let v: f64 = (1..6)
                            .map(|h| (TAU * f0 * h as f64 * t).sin() / h as f64)
                            .sum();
                        *s = (0.2 * v) as f32;
                    }
                }
            }
            1 => {
                for (i, v) in x.iter_mut().enumerate() {
                    let env = 0.5 + 0.5 * (TAU * 3.0 * i as f64 / SR).sin();
                    *v = (0.3 * env * rng.normal()) as f32;
                }
            }
            _ => {
                let every = (0.125 * SR) as usize;
                for start in (0..n).step_by(every) {
                    let f = rng.uniform(60.0, 120.0);
                    let end = (start + every).min(n);
                    for (j, s) in x[start..end].iter_mut().enumerate() {
                        let t = j as f64 / SR;
                        *s = (0.8 * (-t * 30.0).exp() * (TAU * f * t).sin()) as f32;
                    }
                }
            }
        }
        x
    }

    fn synthetic_palette(with_presence: bool) -> Palette {
        let analysis = AnalysisSpec {
            bands: 32,
            ..AnalysisSpec::DEFAULT
        };
        let learn = LearnSettings {
            atoms: 4,
            iterations: 60,
            ..LearnSettings::default()
        };
        let mut atoms = Vec::new();
        for f in 0..3 {
            let cols = stacked_columns(&family_signal(f, 10 + f as u64, 4.0), SR, &analysis)
                .expect("bands");
            atoms.extend(learn_family_atoms(&cols, analysis.dims(), &learn).expect("material"));
        }
        let families = ["tone", "noise", "click"]
            .iter()
            .enumerate()
            .map(|(i, n)| Family {
                name: (*n).into(),
                section: i.min(1),
            })
            .collect();
        let palette = Palette::new(
            "synthetic".into(),
            families,
            vec!["pitched".into(), "unpitched".into()],
            analysis,
            vec![4, 4, 4],
            atoms,
            None,
            Provenance::default(),
        )
        .expect("valid");
        if !with_presence {
            return palette;
        }
        let mut rows = Vec::new();
        let mut labels = Vec::new();
        let mut shares = Vec::new();
        let mut rng = SceneRng::new(99);
        for m in 0..12u64 {
            let stems: Vec<(usize, Vec<f32>)> = (0..3)
                .filter(|_| rng.chance(0.6))
                .map(|f| (f, family_signal(f, 100 + m * 3 + f as u64, 2.0)))
                .collect();
            if stems.is_empty() {
                continue;
            }
            let members: Vec<(usize, &[f32])> =
                stems.iter().map(|(f, s)| (*f, s.as_slice())).collect();
            let gains: Vec<f64> = members.iter().map(|_| rng.uniform(-20.0, 0.0)).collect();
            let mix = Mix::new(&members, &gains, SR as u32);
            presence_rows(&palette, &mix, &mut rows, &mut labels, &mut shares).expect("rows");
        }
        let opts = PresenceTraining {
            hidden: 8,
            epochs: 20,
            shares: ShareTraining {
                hidden: 8,
                epochs: 20,
                batch: 32,
                ..ShareTraining::default()
            },
            // Enough trees that a batch walks them by groups of rows (see `logits_into`).
            trees: TreeTraining {
                trees: 10,
                depth: 3,
                ..TreeTraining::default()
            },
            ..PresenceTraining::default()
        };
        let mut model = train_presence(&rows, feature_count(3, 12), &labels, 3, &opts);
        assert!(model.trees.as_ref().is_some_and(|t| t.trees > 0));
        model.shares = train_share_network(&rows, &shares, &model, &opts).map(|(net, _)| net);
        assert!(model.shares.is_some());
        palette.with_presence(Some(model)).expect("valid")
    }

    fn test_mix() -> Vec<f32> {
        let a = family_signal(0, 500, 3.0);
        let b = family_signal(1, 501, 3.0);
        let c = family_signal(2, 502, 3.0);
        a.iter()
            .zip(&b)
            .zip(&c)
            .map(|((x, y), z)| x + 0.3 * y + 0.5 * z)
            .collect()
    }

    fn run(palette: &Palette, x: &[f32], block: usize) -> Vec<SharesUpdate> {
        let mut t = SharesTracker::new(palette, SharesSettings::default(), SR).expect("tracker");
        let mut out = Vec::new();
        for b in x.chunks(block) {
            t.process(b, |u| out.push(*u));
        }
        t.finish(|u| out.push(*u));
        out
    }

    #[test]
    fn shares_sum_to_one_and_silence_is_no_signal() {
        for presence in [false, true] {
            let p = synthetic_palette(presence);
            let mut x = test_mix();
            x.extend(std::iter::repeat_n(0.0, SR as usize));
            let updates = run(&p, &x, 4096);
            assert!(
                updates.len() as f64 >= 10.0 * 4.0,
                "≥ 10 updates per second"
            );
            for u in &updates {
                for s in [&u.raw, &u.smoothed, &u.nmf_alone] {
                    assert!(s.share.iter().all(|v| v.is_finite()) && s.unexplained.is_finite());
                    let sum: f32 = s.share[..3].iter().sum::<f32>() + s.unexplained;
                    if s.signal {
                        assert!((sum - 1.0).abs() < 1e-4, "{sum} at {} s", u.time_s);
                    } else {
                        assert_eq!(sum, 0.0);
                    }
                }
            }
            // The last half second is silence (past the stack and the padding): no signal.
            let tail: Vec<_> = updates.iter().filter(|u| u.time_s > 3.5).collect();
            assert!(!tail.is_empty() && tail.iter().all(|u| !u.raw.signal && !u.smoothed.signal));
            // The middle has a signal, and every family of the mix gets a share.
            let mid = updates.iter().find(|u| u.time_s > 1.5).expect("update");
            assert!(mid.raw.signal);
        }
    }

    #[test]
    fn a_gain_change_of_20_db_moves_no_share_by_1_pp() {
        for presence in [false, true] {
            let p = synthetic_palette(presence);
            let x = test_mix();
            let reference = run(&p, &x, 1024);
            for gain in [10.0_f32, 0.1] {
                let y: Vec<f32> = x.iter().map(|v| v * gain).collect();
                let other = run(&p, &y, 1024);
                assert_eq!(reference.len(), other.len());
                for (a, b) in reference.iter().zip(&other) {
                    assert_eq!(a.raw.signal, b.raw.signal);
                    for f in 0..3 {
                        for (s, t) in [(&a.smoothed, &b.smoothed), (&a.raw, &b.raw)] {
                            let d = (s.share[f] - t.share[f]).abs();
                            assert!(
                                d <= 0.01,
                                "presence {presence}, gain {gain}, family {f}, {} s: {d}",
                                a.time_s
                            );
                        }
                    }
                }
            }
        }
    }

    #[test]
    fn the_direct_share_network_weighs_the_amount_stage() {
        let p = synthetic_palette(true);
        let x = test_mix();
        // Only the blend: the network admits no family here (see the next test).
        let with_exponent = |e: Option<f32>| {
            let mut model = p.presence().expect("model").clone();
            match e {
                Some(e) => {
                    let net = model.shares.as_mut().expect("net");
                    net.exponent = e;
                    net.admit = None;
                }
                None => model.shares = None,
            }
            p.clone().with_presence(Some(model)).expect("valid")
        };
        // Exponent 0 is no network at all; a larger one moves the shares, which still sum to 1.
        let none = run(&with_exponent(None), &x, 1024);
        assert_eq!(run(&with_exponent(Some(0.0)), &x, 1024), none);
        let strong = run(&with_exponent(Some(2.0)), &x, 1024);
        let moved = none
            .iter()
            .zip(&strong)
            .map(|(a, b)| {
                (0..3)
                    .map(|f| (a.raw.share[f] - b.raw.share[f]).abs())
                    .sum::<f32>()
            })
            .fold(0.0_f32, f32::max);
        assert!(moved > 0.01, "{moved}");
        for u in strong.iter().filter(|u| u.raw.signal) {
            let sum = u.raw.share[..3].iter().sum::<f32>() + u.raw.unexplained;
            assert!((sum - 1.0).abs() < 1e-4, "{sum}");
            // The amount stage's present families bound the blend: none other gains a share.
            for f in 0..3 {
                assert!(u.present[f] || u.raw.share[f] == 0.0);
            }
        }
    }

    #[test]
    fn known_presence_keeps_the_given_families_and_the_network_s_blend() {
        let p = synthetic_palette(true);
        let x = test_mix();
        let with_exponent = |e: f32| {
            let mut model = p.presence().expect("model").clone();
            let net = model.shares.as_mut().expect("net");
            net.exponent = e;
            // An admission nearly any share passes: known presence must not use it.
            net.admit = Some(1e-6);
            p.clone().with_presence(Some(model)).expect("valid")
        };
        let known = |palette: &Palette| {
            let settings = SharesSettings {
                response_ms: 0.0,
                mode: SharesMode::KnownPresence,
            };
            let mut t = SharesTracker::new(palette, settings, SR).expect("tracker");
            t.estimator_mut().set_known_presence(&[true, false, true]);
            let mut out = Vec::new();
            t.process(&x, |u| out.push(*u));
            t.finish(|u| out.push(*u));
            out
        };
        let plain = known(&with_exponent(0.0));
        let blended = known(&with_exponent(2.0));
        assert_eq!(plain.len(), blended.len());
        let mut moved = 0.0_f32;
        for (a, b) in plain.iter().zip(&blended).filter(|(a, _)| a.raw.signal) {
            for u in [a, b] {
                assert_eq!(u.present[..3], [true, false, true]);
                assert_eq!(u.raw.share[1], 0.0);
                let sum = u.raw.share[..3].iter().sum::<f32>() + u.raw.unexplained;
                assert!((sum - 1.0).abs() < 1e-4, "{sum}");
            }
            moved = moved.max((a.raw.share[0] - b.raw.share[0]).abs());
        }
        assert!(moved > 0.01, "the blend changed nothing: {moved}");
    }

    #[test]
    fn the_direct_share_network_admits_families_the_presence_stage_left_out() {
        let p = synthetic_palette(true);
        let x = test_mix();
        // Thresholds no probability reaches: the presence stage keeps only its likeliest family.
        let with_admit = |admit: Option<f32>| {
            let mut model = p.presence().expect("model").clone();
            model.thresholds.fill(1.0);
            let net = model.shares.as_mut().expect("net");
            net.exponent = 0.0;
            net.admit = admit;
            p.clone().with_presence(Some(model)).expect("valid")
        };
        let present = |u: &SharesUpdate| u.present[..3].iter().filter(|&&b| b).count();
        let never = run(&with_admit(None), &x, 1024);
        let signal: Vec<&SharesUpdate> = never.iter().filter(|u| u.raw.signal).collect();
        assert!(signal.len() > 10);
        assert!(signal.iter().all(|u| present(u) == 1));
        // The test mix holds all three families: an admitting network lets more of them in.
        let admitting = run(&with_admit(Some(0.05)), &x, 1024);
        let more = admitting
            .iter()
            .filter(|u| u.raw.signal && present(u) >= 2)
            .count();
        assert!(more > signal.len() / 2, "{more} of {}", signal.len());
        for u in admitting.iter().filter(|u| u.raw.signal) {
            let sum = u.raw.share[..3].iter().sum::<f32>() + u.raw.unexplained;
            assert!((sum - 1.0).abs() < 1e-4, "{sum}");
            for f in 0..3 {
                assert!(u.present[f] || u.raw.share[f] == 0.0);
            }
        }
        // The block size still changes nothing.
        assert_eq!(run(&with_admit(Some(0.05)), &x, 333), admitting);
    }

    #[test]
    fn block_size_never_changes_results() {
        let p = synthetic_palette(true);
        let x = test_mix();
        let reference = run(&p, &x, x.len());
        for block in [1, 64, 333, 512, 4096, 16384] {
            assert_eq!(run(&p, &x, block), reference, "block {block}");
        }
    }

    #[test]
    fn processing_does_not_allocate() {
        let p = synthetic_palette(true);
        let x = test_mix();
        let mut t = SharesTracker::new(&p, SharesSettings::default(), SR).expect("tracker");
        let mut n = 0;
        assert_no_alloc::assert_no_alloc(|| {
            for b in x.chunks(480) {
                t.process(b, |_| n += 1);
            }
        });
        assert!(n > 0);
    }

    /// The synthetic palette with split atoms fitted on the columns of a few mixes of its
    /// families, and the energy its atoms and its split atoms misattribute on those columns.
    fn split_palette() -> (Palette, f64, f64) {
        use crate::shares::split::{SplitColumns, fit_split_atoms, split_columns, split_tv_pct};
        let p = synthetic_palette(true);
        let dims = p.analysis().dims();
        let mut cols = SplitColumns::new(dims, 12, 3);
        let mut rng = SceneRng::new(41);
        for m in 0..6u64 {
            let stems: Vec<(usize, Vec<f32>)> = (0..3)
                .map(|f| (f, family_signal(f, 300 + m * 3 + f as u64, 2.0)))
                .collect();
            let members: Vec<(usize, &[f32])> =
                stems.iter().map(|(f, s)| (*f, s.as_slice())).collect();
            let gains: Vec<f64> = members.iter().map(|_| rng.uniform(-12.0, 0.0)).collect();
            let mix = Mix::new(&members, &gains, SR as u32);
            cols.extend(&split_columns(&p, &mix).expect("columns"));
        }
        assert!(cols.len() > 100, "{} columns", cols.len());
        let family_of_atom: Vec<usize> = (0..12).map(|k| k / 4).collect();
        let mut w = p.atoms().to_vec();
        for atom in w.chunks_exact_mut(dims) {
            let s: f32 = atom.iter().sum();
            atom.iter_mut().for_each(|v| *v /= s);
        }
        let r = fit_split_atoms(&w, &family_of_atom, &cols, 40, 2, |_, _| {});
        let before = split_tv_pct(&w, &family_of_atom, &cols);
        let after = split_tv_pct(&r, &family_of_atom, &cols);
        (p.with_split_atoms(Some(r)).expect("valid"), before, after)
    }

    #[test]
    fn split_atoms_divide_the_amount_stage_and_keep_its_invariants() {
        let (q, before, after) = split_palette();
        assert!(after < before, "{before} % → {after} %");
        let p = synthetic_palette(true);
        let x = test_mix();
        let reference = run(&q, &x, x.len());
        for block in [1, 333, 4096] {
            assert_eq!(run(&q, &x, block), reference, "block {block}");
        }
        let plain = run(&p, &x, x.len());
        assert_eq!(plain.len(), reference.len());
        let mut moved = 0.0_f32;
        for (a, b) in plain.iter().zip(&reference) {
            // The first stage, the presence decisions and the unexplained part are the
            // palette atoms' alone; only the division among the present families changes.
            assert_eq!(a.nmf_alone, b.nmf_alone);
            assert_eq!(a.present, b.present);
            assert_eq!(a.raw.unexplained, b.raw.unexplained);
            let sum = b.raw.share[..3].iter().sum::<f32>() + b.raw.unexplained;
            assert!(!b.raw.signal || (sum - 1.0).abs() < 1e-4, "{sum}");
            for f in 0..3 {
                assert!(b.present[f] || b.raw.share[f] == 0.0);
                moved = moved.max((a.raw.share[f] - b.raw.share[f]).abs());
            }
        }
        assert!(moved > 1e-3, "the split atoms changed no share ({moved})");
        // Scale: the division is the same at any level.
        for db in [-20.0_f32, 20.0] {
            let g = 10f32.powf(db / 20.0);
            let y: Vec<f32> = x.iter().map(|v| v * g).collect();
            for (a, b) in run(&q, &y, 4096).iter().zip(&reference) {
                for f in 0..3 {
                    let d = (a.smoothed.share[f] - b.smoothed.share[f]).abs();
                    assert!(
                        d <= 0.01,
                        "{db} dB moved family {f} by {d} at {} s",
                        a.time_s
                    );
                }
            }
        }
        let mut t = SharesTracker::new(&q, SharesSettings::default(), SR).expect("tracker");
        let mut n = 0;
        assert_no_alloc::assert_no_alloc(|| {
            for b in x.chunks(480) {
                t.process(b, |_| n += 1);
            }
        });
        assert!(n > 0);
    }

    #[test]
    fn response_time_is_validated_and_smooths() {
        let p = synthetic_palette(false);
        let framing = FrameConfig::for_sample_rate(SR);
        for bad in [-1.0, f64::NAN, MAX_RESPONSE_MS * 2.0] {
            let s = SharesSettings {
                response_ms: bad,
                ..SharesSettings::default()
            };
            assert!(matches!(
                SharesEstimator::new(&p, s, SR, framing),
                Err(SharesError::ResponseTime { .. })
            ));
        }
        // With a response time, the smoothed shares move less from column to column than the
        // raw ones.
        let updates = run(&p, &test_mix(), 4096);
        let jitter = |f: fn(&SharesUpdate) -> f32| -> f32 {
            updates
                .windows(2)
                .map(|w| (f(&w[1]) - f(&w[0])).abs())
                .sum()
        };
        assert!(jitter(|u| u.smoothed.share[0]) < 0.5 * jitter(|u| u.raw.share[0]));
    }
}
