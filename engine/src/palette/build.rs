//! Building palettes end to end — from a SoundFont (`weft palette render`, `cargo xtask
//! palette`) or from recordings (`weft palette learn`) — and checking them on held-out mixes
//! (`weft palette check`). The engine does no file I/O: the caller hands in a loaded
//! [`SoundFontRenderer`] and decoded clips.
//!
//! Work is spread over `threads` threads (scoped, std only); results do not depend on the
//! number of threads.

use super::{
    AnalysisSpec, Family, LearnSettings, MAX_ATOMS_PER_FAMILY, Palette, PaletteError, Provenance,
};
use super::{learn_family_atoms, stacked_columns};
use crate::parallel::parallel;
use crate::scene::{ClipBank, Composer, Mix, MixSpec, SceneError, SceneRng, SoundFontRenderer};
use crate::shares::check::{CheckReport, MixRecord, column_residuals, evaluate_mix, presence_rows};
use crate::shares::presence::{
    feature_count, train_presence_reporting, train_share_network_reporting,
};
use crate::shares::split::{SplitColumns, fit_split_atoms, split_columns, split_tv_pct};
use crate::shares::{PresenceTraining, SharesError, SharesMode};
use thiserror::Error;

/// Why a palette could not be built or checked.
#[derive(Debug, Error)]
pub enum BuildError {
    /// Rendering failed.
    #[error("rendering failed")]
    Scene(#[from] SceneError),
    /// The palette's analysis could not run.
    #[error("analysis failed")]
    Shares(#[from] SharesError),
    /// The result is not a valid palette.
    #[error("the palette is not valid")]
    Palette(#[from] PaletteError),
    /// A family has no audible material to learn from.
    #[error("family '{family}' has no audible material to learn atoms from")]
    NoMaterial {
        /// The family.
        family: String,
    },
    /// A mix needs the SoundFont but none was given.
    #[error("family '{family}' is voiced by the SoundFont, but no SoundFont was given")]
    NoSoundFont {
        /// The family.
        family: String,
    },
}

/// Everything that decides how a palette is built.
#[derive(Debug, Clone, PartialEq)]
pub struct BuildPlan {
    /// Rendering and analysis sample rate, Hz.
    pub sample_rate_hz: u32,
    /// The palette's analysis settings.
    pub analysis: AnalysisSpec,
    /// Atom learning.
    pub learn: LearnSettings,
    /// Note studies: every `study_key_step`-th key.
    pub study_key_step: usize,
    /// Note studies: velocities played.
    pub study_velocities: Vec<u8>,
    /// Note studies: note length and gap, seconds.
    pub study_note_s: (f64, f64),
    /// Training mixes for the presence model (0: no presence model).
    pub training_mixes: usize,
    /// Length of each mix, seconds.
    pub mix_s: f64,
    /// Presence rows kept from each training mix: every `row_stride`-th (1: all), starting
    /// from a different one in each mix. The rows of one mix overlap in time and sound alike,
    /// so more mixes with fewer rows each teach the models more in the same memory.
    pub row_stride: usize,
    /// Most families in a mix.
    pub max_families: usize,
    /// Range of family gains, dB.
    pub gain_range_db: (f64, f64),
    /// How often a family with clips is sounded by them.
    pub clip_probability: f64,
    /// Presence-model training.
    pub presence: PresenceTraining,
    /// Split-atom fitting, the build's last step (needs a presence model).
    pub split: SplitTraining,
    /// Seed of every random choice.
    pub seed: u64,
    /// Worker threads.
    pub threads: usize,
}

impl Default for BuildPlan {
    fn default() -> Self {
        Self {
            sample_rate_hz: 48_000,
            analysis: AnalysisSpec::DEFAULT,
            learn: LearnSettings::default(),
            study_key_step: 2,
            study_velocities: vec![40, 75, 110],
            study_note_s: (0.6, 0.25),
            training_mixes: 1500,
            mix_s: 3.0,
            row_stride: 1,
            max_families: 5,
            gain_range_db: (-24.0, 0.0),
            clip_probability: 0.6,
            presence: PresenceTraining::default(),
            split: SplitTraining::default(),
            seed: 1,
            threads: 2,
        }
    }
}

/// How split atoms are fitted ([`crate::shares::split`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct SplitTraining {
    /// Rendered mixes whose columns they are fitted on (0: no split atoms). Every tenth is held
    /// back to judge them.
    pub mixes: usize,
    /// Length of each mix, seconds.
    pub mix_s: f64,
    /// Multiplicative updates.
    pub updates: usize,
}

impl Default for SplitTraining {
    fn default() -> Self {
        Self {
            mixes: 0,
            mix_s: 4.0,
            updates: 150,
        }
    }
}

/// How held-out mixes are drawn for a check.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckPlan {
    /// Rendering sample rate, Hz.
    pub sample_rate_hz: u32,
    /// Number of mixes.
    pub mixes: usize,
    /// Length of each mix, seconds.
    pub mix_s: f64,
    /// Scoring window, seconds.
    pub window_s: f64,
    /// Most families in a mix.
    pub max_families: usize,
    /// Range of family gains, dB.
    pub gain_range_db: (f64, f64),
    /// How often a family with clips is sounded by them.
    pub clip_probability: f64,
    /// Seed (mixes are drawn from a stream no palette build uses).
    pub seed: u64,
    /// Worker threads.
    pub threads: usize,
}

impl Default for CheckPlan {
    fn default() -> Self {
        Self {
            sample_rate_hz: 48_000,
            mixes: 60,
            mix_s: 8.0,
            window_s: 1.0,
            max_families: 5,
            gain_range_db: (-24.0, 0.0),
            clip_probability: 0.6,
            seed: 1,
            threads: 2,
        }
    }
}

/// Training mixes the unexplained tolerance is calibrated on.
const CALIBRATION_MIXES: usize = 40;
/// The energy-weighted quantile of the residual both stages leave on the palette's own material,
/// taken as the tolerance.
const TOLERANCE_QUANTILE: f64 = 0.9;

/// Energy-weighted quantile `q` of (weight, value) pairs (0 for none).
fn weighted_quantile(pairs: &mut [(f64, f64)], q: f64) -> f64 {
    pairs.sort_by(|a, b| a.1.total_cmp(&b.1));
    let total: f64 = pairs.iter().map(|p| p.0).sum();
    let mut acc = 0.0;
    for &(w, v) in pairs.iter() {
        acc += w;
        if acc >= q * total {
            return v;
        }
    }
    pairs.last().map_or(0.0, |p| p.1)
}

/// Seed streams, so training and checking mixes never coincide whatever seeds are given.
const TRAIN_STREAM: u64 = 0x7261_696E;
const CHECK_STREAM: u64 = 0x6368_6563;
const SPLIT_STREAM: u64 = 0x7265_636E;

/// Tells `progress` "`what`: `done` of `total` (p %)" when `done` reaches each tenth of `total`
/// (every step of a step of fewer than ten), so long steps show how far they are without
/// flooding the output.
fn tell_tenths(progress: &(dyn Fn(&str) + Sync), what: &str, done: usize, total: usize) {
    if done >= 1 && (total < 10 || done * 10 / total != (done - 1) * 10 / total) {
        progress(&format!(
            "  {what}: {done} of {total} ({} %)",
            done * 100 / total
        ));
    }
}

/// Keeps every `stride`-th row (from row `offset % stride` on) of `arrays` (each with its
/// values per row) and of `labels` (`per_label` per row), in place, and frees the room the
/// others took.
fn keep_every(
    stride: usize,
    offset: usize,
    arrays: [(&mut Vec<f32>, usize); 2],
    labels: &mut Vec<bool>,
    per_label: usize,
) {
    let stride = stride.max(1);
    let first = offset % stride;
    fn keep<T: Copy>(v: &mut Vec<T>, width: usize, first: usize, stride: usize) {
        let rows = v.len() / width.max(1);
        let mut out = 0;
        for r in (first..rows).step_by(stride) {
            v.copy_within(r * width..(r + 1) * width, out * width);
            out += 1;
        }
        v.truncate(out * width);
        // Hundreds of thousands of mixes wait in memory until all are rendered: keep only
        // what they hold.
        v.shrink_to_fit();
    }
    for (v, width) in arrays {
        keep(v, width, first, stride);
    }
    keep(labels, per_label, first, stride);
}

/// One training mix's presence rows: features, labels and exact shares (see
/// [`presence_rows`]).
type MixRows = (Vec<f32>, Vec<bool>, Vec<f32>);

/// Renders one random mix of `candidates` families.
#[allow(clippy::too_many_arguments)]
pub fn render_mix(
    renderer: Option<&SoundFontRenderer>,
    composer: &Composer,
    clips: &ClipBank,
    seed: u64,
    candidates: &[usize],
    max_families: usize,
    gain_range_db: (f64, f64),
    mix_s: f64,
    sample_rate_hz: u32,
) -> Result<Mix, BuildError> {
    let spec = MixSpec::random(seed, candidates, max_families, gain_range_db);
    let score = composer.compose(seed, &spec.families, mix_s);
    let n = (mix_s * f64::from(sample_rate_hz)).round() as usize;
    let mut stems: Vec<(usize, Vec<f32>)> = Vec::new();
    for part in &score.parts {
        let x = match renderer {
            Some(r) => r.render_part(part, mix_s, clips)?,
            None if part.sound == crate::scene::PartSound::Clips => {
                // Clips need no SoundFont: place them with a renderer-free path.
                crate::scene::place_clips(part, mix_s, sample_rate_hz, clips)
            }
            None => {
                return Err(BuildError::NoSoundFont {
                    family: composer.voicings()[part.family].family.clone(),
                });
            }
        };
        match stems.iter_mut().find(|(f, _)| *f == part.family) {
            Some((_, s)) => s.iter_mut().zip(&x).for_each(|(a, b)| *a += b),
            None => stems.push((part.family, x)),
        }
    }
    let gains: Vec<f64> = stems
        .iter()
        .map(|(f, _)| {
            spec.families
                .iter()
                .position(|g| g == f)
                .map_or(0.0, |i| spec.gains_db[i])
        })
        .collect();
    for (_, s) in &mut stems {
        s.resize(n, 0.0);
    }
    let members: Vec<(usize, &[f32])> = stems.iter().map(|(f, s)| (*f, s.as_slice())).collect();
    Ok(Mix::new(&members, &gains, sample_rate_hz))
}

/// Where the mixes of a build or a check come from: the scene, which families may sound and
/// how many at what gains.
struct MixSource<'a> {
    renderer: Option<&'a SoundFontRenderer>,
    composer: &'a Composer,
    clips: &'a ClipBank,
    candidates: Vec<usize>,
    max_families: usize,
    gain_range_db: (f64, f64),
    sample_rate_hz: u32,
}

impl<'a> MixSource<'a> {
    /// A build's mixes: any of its `families`, as `plan` says.
    fn of_build(
        renderer: Option<&'a SoundFontRenderer>,
        composer: &'a Composer,
        clips: &'a ClipBank,
        plan: &BuildPlan,
        families: usize,
    ) -> Self {
        Self {
            renderer,
            composer,
            clips,
            candidates: (0..families).collect(),
            max_families: plan.max_families,
            gain_range_db: plan.gain_range_db,
            sample_rate_hz: plan.sample_rate_hz,
        }
    }

    /// Mix `i` of the seed stream `stream`, `mix_s` seconds long.
    fn mix(&self, stream: u64, i: usize, mix_s: f64) -> Result<Mix, BuildError> {
        let seed = SceneRng::derive(stream, i as u64).next_u64();
        render_mix(
            self.renderer,
            self.composer,
            self.clips,
            seed,
            &self.candidates,
            self.max_families,
            self.gain_range_db,
            mix_s,
            self.sample_rate_hz,
        )
    }
}

/// The material each family's atoms are learned from: its note study rendered from the
/// SoundFont (when it has programs) followed by all its clips.
fn family_material(
    renderer: Option<&SoundFontRenderer>,
    composer: &Composer,
    clips: &ClipBank,
    family: usize,
    plan: &BuildPlan,
) -> Result<Vec<f32>, BuildError> {
    let mut signal = Vec::new();
    if let Some(r) = renderer
        && let Some(study) = composer.study(
            family,
            plan.study_key_step,
            &plan.study_velocities,
            plan.study_note_s.0,
            plan.study_note_s.1,
        )
    {
        for part in &study.parts {
            let x = r.render_part(part, study.duration_s, clips)?;
            if signal.is_empty() {
                signal = x;
            } else {
                signal.iter_mut().zip(&x).for_each(|(a, b)| *a += b);
            }
        }
    }
    for clip in clips.family(family) {
        signal.extend_from_slice(clip);
        signal.extend(std::iter::repeat_n(
            0.0,
            (0.2 * f64::from(plan.sample_rate_hz)) as usize,
        ));
    }
    Ok(signal)
}

/// Builds a palette: learns every family's atoms from its material (note studies from the
/// SoundFont and/or clips), then renders `plan.training_mixes` mixes and trains the presence
/// model on them. `families[f]` is voiced by `composer.voicings()[f]`. `progress` is told what
/// is happening.
#[allow(clippy::too_many_arguments)] // Each input is a distinct concern; a struct would only rename them.
pub fn build_palette(
    name: &str,
    families: Vec<Family>,
    sections: Vec<String>,
    renderer: Option<&SoundFontRenderer>,
    composer: &Composer,
    clips: &ClipBank,
    plan: &BuildPlan,
    provenance: Provenance,
    progress: &(dyn Fn(&str) + Sync),
) -> Result<Palette, BuildError> {
    let nf = families.len();
    let spec = plan.analysis;
    // Settings a palette cannot hold are refused before any rendering.
    spec.check()?;
    if plan.learn.atoms == 0 {
        return Err(PaletteError::Invalid {
            field: "atoms",
            reason: "a family needs at least one atom".into(),
        }
        .into());
    }
    if plan.learn.atoms > MAX_ATOMS_PER_FAMILY {
        return Err(PaletteError::Limit {
            what: "atoms per family",
            value: plan.learn.atoms as u64,
            max: MAX_ATOMS_PER_FAMILY as u64,
        }
        .into());
    }
    let dims = spec.dims();
    let sr = f64::from(plan.sample_rate_hz);
    progress(&format!("learning atoms of {nf} families"));
    let learned = parallel(nf, plan.threads, |f| -> Result<Vec<f32>, BuildError> {
        let material = family_material(renderer, composer, clips, f, plan)?;
        let columns = stacked_columns(&material, sr, &spec).map_err(SharesError::from)?;
        let mut learn = plan.learn;
        learn.seed = SceneRng::derive(plan.seed, 1000 + f as u64).next_u64();
        let atoms =
            learn_family_atoms(&columns, dims, &learn).ok_or_else(|| BuildError::NoMaterial {
                family: families[f].name.clone(),
            })?;
        progress(&format!(
            "  {}: {:.0} s of material, {} columns",
            families[f].name,
            material.len() as f64 / sr,
            columns.len() / dims
        ));
        Ok(atoms)
    });
    let mut atoms = Vec::new();
    let mut counts = Vec::new();
    for a in learned {
        let a = a?;
        counts.push(a.len() / dims);
        atoms.extend(a);
    }
    let palette = Palette::new(
        name.to_owned(),
        families,
        sections,
        spec,
        counts,
        atoms,
        None,
        provenance,
    )?;
    if plan.training_mixes == 0 {
        return Ok(palette);
    }
    progress(&format!(
        "rendering {} training mixes for the presence model",
        plan.training_mixes
    ));
    let source = MixSource::of_build(renderer, composer, clips, plan, nf);
    let features = feature_count(nf, palette.atom_counts().iter().sum());
    // Training mix `i`, the same for the presence rows and the tolerance calibration.
    let training_mix = |i: usize| source.mix(plan.seed ^ TRAIN_STREAM, i, plan.mix_s);
    let rendered = std::sync::atomic::AtomicUsize::new(0);
    let rows = parallel(
        plan.training_mixes,
        plan.threads,
        |i| -> Result<MixRows, BuildError> {
            let mix = training_mix(i)?;
            let mut rows = Vec::new();
            let mut labels = Vec::new();
            let mut shares = Vec::new();
            presence_rows(&palette, &mix, &mut rows, &mut labels, &mut shares)?;
            keep_every(
                plan.row_stride,
                i,
                [(&mut rows, features), (&mut shares, nf)],
                &mut labels,
                nf,
            );
            let done = rendered.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            tell_tenths(
                progress,
                "training mixes rendered",
                done,
                plan.training_mixes,
            );
            Ok((rows, labels, shares))
        },
    );
    let mut x = Vec::new();
    let mut y = Vec::new();
    let mut truth = Vec::new();
    for r in rows {
        let (a, b, c) = r?;
        x.extend(a);
        y.extend(b);
        truth.extend(c);
    }
    progress(&format!(
        "training the presence model on {} rows ({} features, {} × {} hidden units{})",
        x.len() / features,
        features,
        plan.presence.members.max(1),
        plan.presence.hidden,
        match plan.presence.trees.trees {
            0 => String::new(),
            t => format!(
                ", up to {t} boosted trees of depth {} per family",
                plan.presence.trees.depth
            ),
        }
    ));
    let mut training = plan.presence;
    training.seed = SceneRng::derive(plan.seed, 77).next_u64();
    training.threads = plan.threads;
    let steps = |what: &str, done, total| tell_tenths(progress, what, done, total);
    let mut model = train_presence_reporting(&x, features, &y, nf, &training, &steps);
    if training.shares.hidden > 0 {
        progress(&format!(
            "training the direct share network ({} hidden units)",
            training.shares.hidden
        ));
        let epochs = |done, total| tell_tenths(progress, "share network epochs", done, total);
        if let Some((net, tv_pct)) =
            train_share_network_reporting(&x, &truth, &model, &training, &epochs)
        {
            progress(&format!(
                "direct share network: {tv_pct:.1} % of the energy misattributed on held-back training mixes"
            ));
            model.shares = Some(net);
        }
    }
    let palette = palette.with_presence(Some(model))?;
    // Calibrate the unexplained tolerance: the energy-weighted quantile TOLERANCE_QUANTILE of
    // the residual both stages leave on mixes of the palette's own families — the last
    // training mixes, whose rows only set the presence thresholds.
    let calib = palette.clone().with_unexplained_tolerance(0.0)?;
    let n = plan.training_mixes.min(CALIBRATION_MIXES);
    let residuals = parallel(
        n,
        plan.threads,
        |i| -> Result<Vec<(f64, f64)>, BuildError> {
            let mix = training_mix(plan.training_mixes - 1 - i)?;
            Ok(column_residuals(&calib, &mix, SharesMode::TwoStage)?)
        },
    );
    let mut all = Vec::new();
    for r in residuals {
        all.extend(r?);
    }
    let tolerance = weighted_quantile(&mut all, TOLERANCE_QUANTILE).clamp(0.0, 0.9);
    progress(&format!(
        "unexplained tolerance: {tolerance:.3} (quantile {TOLERANCE_QUANTILE} of {} columns)",
        all.len()
    ));
    let palette = palette.with_unexplained_tolerance(tolerance)?;
    if plan.split.mixes == 0 {
        return Ok(palette);
    }
    fit_split(palette, renderer, composer, clips, plan, progress)
}

/// Fits `palette`'s split atoms on `plan.split.mixes` rendered mixes (of the palette's
/// families, drawn from a stream of their own) and returns it with them; everything else is
/// kept. The same as the last step of [`build_palette`] with this plan, so a built palette can
/// gain split atoms without being rebuilt. If they do not divide the held-back mixes' columns
/// better than the palette's atoms, the palette is returned without them, and `progress` says
/// so.
pub fn fit_split(
    palette: Palette,
    renderer: Option<&SoundFontRenderer>,
    composer: &Composer,
    clips: &ClipBank,
    plan: &BuildPlan,
    progress: &(dyn Fn(&str) + Sync),
) -> Result<Palette, BuildError> {
    let split = plan.split;
    if palette.presence().is_none() {
        return Err(PaletteError::Invalid {
            field: "split atoms",
            reason: "a palette without a presence model has no amount stage to split".into(),
        }
        .into());
    }
    let nf = palette.families().len();
    let source = MixSource::of_build(renderer, composer, clips, plan, nf);
    progress(&format!(
        "rendering {} mixes of {} s for the split atoms",
        split.mixes, split.mix_s
    ));
    let rendered = std::sync::atomic::AtomicUsize::new(0);
    let parts = parallel(
        split.mixes,
        plan.threads,
        |i| -> Result<SplitColumns, BuildError> {
            let mix = source.mix(plan.seed ^ SPLIT_STREAM, i, split.mix_s)?;
            let columns = split_columns(&palette, &mix)?;
            let done = rendered.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
            tell_tenths(progress, "split mixes rendered", done, split.mixes);
            Ok(columns)
        },
    );
    let dims = palette.analysis().dims();
    let atoms = palette.atom_counts().iter().sum();
    let mut train = SplitColumns::new(dims, atoms, nf);
    let mut held = SplitColumns::new(dims, atoms, nf);
    for (i, p) in parts.into_iter().enumerate() {
        let p = p?;
        if i % 10 == 9 {
            held.extend(&p);
        } else {
            train.extend(&p);
        }
    }
    if held.is_empty() || train.is_empty() {
        progress(&format!(
            "split atoms left out: {} mixes gave {} columns to fit and {} held back to judge by; more mixes are needed",
            split.mixes,
            train.len(),
            held.len()
        ));
        return Ok(palette.with_split_atoms(None)?);
    }
    let mut family_of_atom = Vec::with_capacity(atoms);
    for (f, &c) in palette.atom_counts().iter().enumerate() {
        family_of_atom.extend(std::iter::repeat_n(f, c));
    }
    // The palette atoms as the amount stage uses them (each summing to 1): where the fit starts.
    let mut w = palette.atoms().to_vec();
    for atom in w.chunks_exact_mut(dims) {
        let s: f32 = atom.iter().sum();
        atom.iter_mut().for_each(|v| *v /= s);
    }
    progress(&format!(
        "fitting the split atoms on {} columns ({} held back), {} updates",
        train.len(),
        held.len(),
        split.updates
    ));
    let r = fit_split_atoms(
        &w,
        &family_of_atom,
        &train,
        split.updates,
        plan.threads,
        |i, _| {
            tell_tenths(progress, "split atom updates", i + 1, split.updates);
        },
    );
    let before = split_tv_pct(&w, &family_of_atom, &held);
    let after = split_tv_pct(&r, &family_of_atom, &held);
    if after >= before {
        progress(&format!(
            "split atoms left out: on the held-back columns they misattribute {after:.2} % of the explained energy, the palette's atoms {before:.2} %"
        ));
        return Ok(palette.with_split_atoms(None)?);
    }
    progress(&format!(
        "split atoms: {before:.2} → {after:.2} % of the explained energy misattributed on {} held-back columns",
        held.len()
    ));
    Ok(palette.with_split_atoms(Some(r))?)
}

/// Renders `plan.mixes` held-out mixes of the palette's families and scores the palette on
/// them (two stages, and the baselines). Families are matched to voicings by name; families
/// with no voicing are left out of the mixes.
pub fn check_palette(
    palette: &Palette,
    renderer: Option<&SoundFontRenderer>,
    composer: &Composer,
    clips: &ClipBank,
    plan: &CheckPlan,
    mode: SharesMode,
) -> Result<CheckReport, BuildError> {
    let source = MixSource {
        renderer,
        composer,
        clips,
        candidates: (0..palette.families().len())
            .filter(|&f| f < composer.voicings().len())
            .collect(),
        max_families: plan.max_families,
        gain_range_db: plan.gain_range_db,
        sample_rate_hz: plan.sample_rate_hz,
    };
    let records = parallel(
        plan.mixes,
        plan.threads,
        |i| -> Result<MixRecord, BuildError> {
            let mix = source.mix(plan.seed ^ CHECK_STREAM, i, plan.mix_s)?;
            Ok(evaluate_mix(palette, &mix, plan.window_s, mode)?)
        },
    );
    let records: Result<Vec<MixRecord>, BuildError> = records.into_iter().collect();
    Ok(CheckReport::new(palette, &records?))
}

#[cfg(test)]
mod tests {
    use super::{keep_every, tell_tenths};

    #[test]
    fn every_nth_row_is_kept_from_an_offset_with_its_labels_and_shares_and_no_more_room() {
        // 7 rows of 3 features (row r holds r, r + 0.1, r + 0.2), 2 shares and 2 labels.
        let rows = |n: usize| -> Vec<f32> {
            (0..n)
                .flat_map(|r| [r as f32, r as f32 + 0.1, r as f32 + 0.2])
                .collect()
        };
        let shares =
            |n: usize| -> Vec<f32> { (0..n).flat_map(|r| [r as f32, -(r as f32)]).collect() };
        let labels =
            |n: usize| -> Vec<bool> { (0..n).flat_map(|r| [r % 2 == 0, r % 3 == 0]).collect() };
        for (stride, offset, kept) in [
            (1, 5, vec![0, 1, 2, 3, 4, 5, 6]),
            (3, 0, vec![0, 3, 6]),
            (3, 4, vec![1, 4]),
            (10, 2, vec![2]),
        ] {
            let (mut x, mut s, mut y) = (rows(7), shares(7), labels(7));
            x.reserve(100);
            keep_every(stride, offset, [(&mut x, 3), (&mut s, 2)], &mut y, 2);
            // The room of the rows left out (and any spare room) is given back.
            assert_eq!(x.capacity(), x.len(), "stride {stride}, offset {offset}");
            let want_x: Vec<f32> = kept
                .iter()
                .flat_map(|&r| rows(7)[3 * r..3 * r + 3].to_vec())
                .collect();
            let want_s: Vec<f32> = kept
                .iter()
                .flat_map(|&r| shares(7)[2 * r..2 * r + 2].to_vec())
                .collect();
            let want_y: Vec<bool> = kept
                .iter()
                .flat_map(|&r| labels(7)[2 * r..2 * r + 2].to_vec())
                .collect();
            assert_eq!(
                (x, s, y),
                (want_x, want_s, want_y),
                "stride {stride}, offset {offset}"
            );
        }
    }
    use std::sync::Mutex;

    /// The lines `tell_tenths` writes over a step of `total`.
    fn told(total: usize) -> Vec<String> {
        let lines = Mutex::new(Vec::new());
        let progress = |s: &str| lines.lock().expect("not poisoned").push(s.to_owned());
        for done in 1..=total {
            tell_tenths(&progress, "mixes", done, total);
        }
        lines.into_inner().expect("not poisoned")
    }

    #[test]
    fn long_steps_are_told_once_per_tenth() {
        let lines = told(25);
        assert_eq!(lines.len(), 10, "{lines:?}");
        assert_eq!(lines[0], "  mixes: 3 of 25 (12 %)");
        assert_eq!(lines[9], "  mixes: 25 of 25 (100 %)");
        // A step of fewer than ten is told at every step.
        let lines = told(4);
        assert_eq!(lines.len(), 4, "{lines:?}");
        assert_eq!(lines[1], "  mixes: 2 of 4 (50 %)");
    }
}
