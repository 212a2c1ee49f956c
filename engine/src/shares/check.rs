//! Measuring shares against exact ground truth: per-window estimates of a rendered mix, the
//! figures of the issue (energy misattributed, error over present families, presence
//! precision/recall/F1, two baselines, realtime factor), and the rows presence models learn
//! from.
//!
//! Definitions (vocabulary of ARCHITECTURE.md):
//! - a window's estimate is the energy-weighted mean of the unsmoothed column shares whose
//!   stacks are centred inside it; its truth is each stem's energy over the sum of the stems'
//!   energies there ([`Mix::truth_between`]);
//! - **energy misattributed** = total variation distance `0.5 · Σ |est − truth|` over the
//!   families and *unexplained* (whose truth is 0), in %;
//! - a family is **present** in a window when it holds ≥ [`PRESENT_SHARE`] of the energy — for
//!   the truth and for the estimate alike;
//! - **baselines**: *uniform* gives every family `1 / F`; *NMF alone* is the whole dictionary
//!   with no presence stage (computed in the same run).

use super::estimator::{Shares, SharesError, SharesMode, SharesSettings};
use super::tracker::SharesTracker;
use crate::palette::Palette;
use crate::scene::Mix;
use serde::Serialize;
use std::time::Instant;

/// The share from which a family counts as present (vocabulary: ≥ 5 % of the energy).
pub const PRESENT_SHARE: f64 = 0.05;
/// A family *plays alone* in a window when it holds at least this share of the energy (for the
/// table of where a lone family's energy goes).
pub const ALONE_SHARE: f64 = 0.9;
/// Families listed as taking a lone family's energy: at most this many…
const ALONE_TAKERS: usize = 3;
/// …each with at least this mean share.
const ALONE_TAKER_MIN: f64 = 0.01;
/// A presence mistake is *borderline* when the true share lies within a factor of this of
/// [`PRESENT_SHARE`] (2.5–10 %): a small error of the amount moves it across the mark.
pub const BORDERLINE_FACTOR: f64 = 2.0;
/// Windows are grouped by how many families truly sound in them, from 1 to this many (the
/// last group holds this many or more).
pub const MAX_DENSITY: usize = 5;
/// Windows whose mix is quieter than this (dBFS RMS) are not scored.
pub const QUIET_WINDOW_DB: f64 = -60.0;

/// One scored window.
#[derive(Debug, Clone, PartialEq)]
pub struct WindowRecord {
    /// True shares per family.
    pub truth: Vec<f64>,
    /// Estimated shares per family (two stages).
    pub est: Vec<f64>,
    /// Estimated *unexplained* share.
    pub est_unexplained: f64,
    /// NMF-alone shares per family.
    pub nmf: Vec<f64>,
    /// NMF-alone *unexplained* share.
    pub nmf_unexplained: f64,
}

/// The scored windows of one mix and the time its analysis took.
#[derive(Debug, Clone, PartialEq)]
pub struct MixRecord {
    /// Scored windows.
    pub windows: Vec<WindowRecord>,
    /// Length of the mix, seconds.
    pub audio_s: f64,
    /// Wall-clock time of the analysis (both stages and the NMF-alone baseline), seconds.
    pub analysis_s: f64,
}

fn accumulate(acc: &mut [f64], acc_u: &mut f64, s: &Shares, weight: f64) {
    for (a, &v) in acc.iter_mut().zip(&s.share) {
        *a += weight * f64::from(v);
    }
    *acc_u += weight * f64::from(s.unexplained);
}

/// Runs `palette` over `mix` (with `mode`, unsmoothed) and scores every `window_s` window.
pub fn evaluate_mix(
    palette: &Palette,
    mix: &Mix,
    window_s: f64,
    mode: SharesMode,
) -> Result<MixRecord, SharesError> {
    let nf = palette.families().len();
    let settings = SharesSettings {
        response_ms: 0.0,
        mode,
    };
    let sr = f64::from(mix.sample_rate_hz);
    let mut tracker = SharesTracker::new(palette, settings, sr)?;
    let windows = (mix.duration_s() / window_s).ceil() as usize;
    let mut est = vec![vec![0.0; nf]; windows];
    let mut est_u = vec![0.0; windows];
    let mut nmf = vec![vec![0.0; nf]; windows];
    let mut nmf_u = vec![0.0; windows];
    let mut weight = vec![0.0; windows];
    let start = Instant::now();
    let mut on = |u: &super::SharesUpdate| {
        if !u.raw.signal {
            return;
        }
        let w = (u.time_s / window_s) as usize;
        if w < windows {
            let e = f64::from(u.energy);
            accumulate(&mut est[w], &mut est_u[w], &u.raw, e);
            accumulate(&mut nmf[w], &mut nmf_u[w], &u.nmf_alone, e);
            weight[w] += e;
        }
    };
    if mode == SharesMode::KnownPresence {
        feed_known_presence(&mut tracker, mix, window_s, nf, &mut on);
    } else {
        tracker.process(&mix.signal, &mut on);
    }
    tracker.finish(&mut on);
    let analysis_s = start.elapsed().as_secs_f64();
    let mut records = Vec::new();
    let quiet = 10f64.powf(QUIET_WINDOW_DB / 10.0);
    for w in 0..windows {
        let (t0, t1) = (
            w as f64 * window_s,
            ((w + 1) as f64 * window_s).min(mix.duration_s()),
        );
        if t1 - t0 < 0.5 * window_s || weight[w] <= 0.0 {
            continue;
        }
        let (a, b) = (
            (t0 * sr) as usize,
            ((t1 * sr) as usize).min(mix.signal.len()),
        );
        let ms = mix.signal[a..b]
            .iter()
            .map(|&v| f64::from(v) * f64::from(v))
            .sum::<f64>()
            / (b - a).max(1) as f64;
        if ms < quiet {
            continue;
        }
        let Some(truth) = mix.truth_between(t0, t1, nf) else {
            continue;
        };
        let k = 1.0 / weight[w];
        records.push(WindowRecord {
            truth,
            est: est[w].iter().map(|v| v * k).collect(),
            est_unexplained: est_u[w] * k,
            nmf: nmf[w].iter().map(|v| v * k).collect(),
            nmf_unexplained: nmf_u[w] * k,
        });
    }
    Ok(MixRecord {
        windows: records,
        audio_s: mix.duration_s(),
        analysis_s,
    })
}

/// Feeds `mix` to a tracker in [`SharesMode::KnownPresence`], telling it before every 0.1 s
/// which families hold ≥ [`PRESENT_SHARE`] of the current `window_s` window.
fn feed_known_presence(
    tracker: &mut SharesTracker,
    mix: &Mix,
    window_s: f64,
    nf: usize,
    on: &mut impl FnMut(&super::SharesUpdate),
) {
    let sr = f64::from(mix.sample_rate_hz);
    let block = ((0.1 * sr) as usize).max(1);
    let mut at = 0;
    while at < mix.signal.len() {
        let end = (at + block).min(mix.signal.len());
        let w = (at as f64 / sr / window_s) as usize;
        if let Some(truth) = mix.truth_between(w as f64 * window_s, (w + 1) as f64 * window_s, nf) {
            let present: Vec<bool> = truth.iter().map(|&s| s >= PRESENT_SHARE).collect();
            tracker.estimator_mut().set_known_presence(&present);
        }
        tracker.process(&mix.signal[at..end], &mut *on);
        at = end;
    }
}

/// The unexplained share of every column of `mix` as (column energy, unexplained share) pairs,
/// with the shares estimated in `mode` (with [`SharesMode::KnownPresence`] the amount stage is
/// given the families truly present). With a palette whose tolerance is 0 that share is the raw
/// residual fraction: palettes calibrate their tolerance from it.
pub fn column_residuals(
    palette: &Palette,
    mix: &Mix,
    mode: SharesMode,
) -> Result<Vec<(f64, f64)>, SharesError> {
    let settings = SharesSettings {
        response_ms: 0.0,
        mode,
    };
    let mut tracker = SharesTracker::new(palette, settings, f64::from(mix.sample_rate_hz))?;
    let mut out = Vec::new();
    let mut on = |u: &super::SharesUpdate| {
        if u.raw.signal {
            out.push((f64::from(u.energy), f64::from(u.raw.unexplained)));
        }
    };
    if mode == SharesMode::KnownPresence {
        feed_known_presence(&mut tracker, mix, 1.0, palette.families().len(), &mut on);
    } else {
        tracker.process(&mix.signal, &mut on);
    }
    Ok(out)
}

/// Presence-training rows of one mix: the presence features after every column (the palette's
/// presence model is not used) and, per family, its share of the stems' energy over the span
/// the features summarise and whether that share is ≥ [`PRESENT_SHARE`]. Rows are appended to
/// `rows` (row-major), `labels` and `shares` (row-major, one per family); returns the number
/// of rows added.
pub fn presence_rows(
    palette: &Palette,
    mix: &Mix,
    rows: &mut Vec<f32>,
    labels: &mut Vec<bool>,
    shares: &mut Vec<f32>,
) -> Result<usize, SharesError> {
    let nf = palette.families().len();
    let settings = SharesSettings {
        response_ms: 0.0,
        mode: SharesMode::NmfAlone,
    };
    let mut tracker = SharesTracker::new(palette, settings, f64::from(mix.sample_rate_hz))?;
    let context_s = tracker.estimator().presence_context_s();
    let period_s = tracker.estimator().column_period_s();
    let mut added = 0;
    let mut on = |e: &mut super::SharesEstimator| {
        let u = *e.last();
        if !u.raw.signal {
            return;
        }
        // The newest column ends half a stack after the stack's centre.
        let stack = palette.analysis().stack as f64;
        let end_s = u.time_s + stack * period_s / 2.0;
        if end_s < context_s {
            return;
        }
        let Some(truth) = mix.truth_between(end_s - context_s, end_s, nf) else {
            return;
        };
        rows.extend_from_slice(e.presence_features());
        labels.extend(truth.iter().map(|&s| s >= PRESENT_SHARE));
        shares.extend(truth.iter().map(|&s| s as f32));
        added += 1;
    };
    tracker.process_each(&mix.signal, &mut on);
    Ok(added)
}

/// Figures for one family or section.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct GroupScore {
    /// Its name.
    pub name: String,
    /// Windows where it is truly present.
    pub windows_present: usize,
    /// Mean energy misattributed over the windows where it is truly present, %.
    pub tv_pct: f64,
    /// Mean absolute share error over the windows where it is truly present, percentage points.
    pub mae_pp: f64,
    /// Presence precision.
    pub precision: f64,
    /// Presence recall.
    pub recall: f64,
    /// Presence F1.
    pub f1: f64,
    /// NMF alone: mean absolute share error where present, pp.
    pub nmf_mae_pp: f64,
    /// NMF alone: presence F1.
    pub nmf_f1: f64,
}

/// Figures at one level (families or sections).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LevelScore {
    /// Mean energy misattributed per window, %.
    pub tv_pct: f64,
    /// Mean absolute error over the groups truly present, pp.
    pub present_mae_pp: f64,
    /// Presence precision, pooled over groups and windows.
    pub precision: f64,
    /// Presence recall, pooled.
    pub recall: f64,
    /// Presence F1, pooled.
    pub f1: f64,
    /// Uniform baseline: energy misattributed, %.
    pub uniform_tv_pct: f64,
    /// NMF alone: energy misattributed, %.
    pub nmf_tv_pct: f64,
    /// NMF alone: mean absolute error over the groups present, pp.
    pub nmf_present_mae_pp: f64,
    /// NMF alone: presence F1.
    pub nmf_f1: f64,
    /// Presence mistakes (false or missed), pooled.
    pub mistakes: usize,
    /// Of those, the share that is *borderline* ([`BORDERLINE_FACTOR`]), %.
    pub borderline_pct: f64,
    /// Per group.
    pub groups: Vec<GroupScore>,
}

/// Figures over the windows in which the same number of families truly sound (≥
/// [`PRESENT_SHARE`] each): how the estimate holds up as the arrangement thickens.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct DensityScore {
    /// Families truly present in these windows ([`MAX_DENSITY`]: that many or more).
    pub families_present: usize,
    /// Windows scored.
    pub windows: usize,
    /// Energy misattributed per family, %.
    pub tv_pct: f64,
    /// Energy misattributed per section, %.
    pub section_tv_pct: f64,
    /// Presence F1 of the families.
    pub f1: f64,
    /// NMF alone: energy misattributed per family, %.
    pub nmf_tv_pct: f64,
}

/// Where one family's energy goes when it plays alone: the mean estimate over the windows
/// where it holds ≥ [`ALONE_SHARE`] of the energy (a row of a confusion matrix of shares).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AloneScore {
    /// The family.
    pub name: String,
    /// Windows where it plays alone.
    pub windows: usize,
    /// Its true share there, mean, %.
    pub truth_pct: f64,
    /// The share the two stages give it there, mean, %.
    pub kept_pct: f64,
    /// The share NMF alone gives it there, mean, %.
    pub nmf_kept_pct: f64,
    /// The mean *unexplained* share there (two stages), %.
    pub unexplained_pct: f64,
    /// The other families the two stages give most of its energy to (mean share, %), largest
    /// first: at most three, each ≥ 1 %.
    pub taken_by: Vec<(String, f64)>,
}

/// The whole check.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CheckReport {
    /// Mixes scored.
    pub mixes: usize,
    /// Windows scored.
    pub windows: usize,
    /// Family level.
    pub family: LevelScore,
    /// Section level.
    pub section: LevelScore,
    /// Where each family's energy goes when it plays alone (families that never do are left
    /// out).
    pub alone: Vec<AloneScore>,
    /// By how many families truly sound in a window (groups with no windows are left out).
    pub by_density: Vec<DensityScore>,
    /// Mean estimated *unexplained* share.
    pub unexplained_mean: f64,
    /// Seconds of audio per second of analysis (both stages and the NMF-alone baseline, one
    /// thread).
    pub realtime_factor: f64,
}

#[derive(Default, Clone, Copy)]
struct Counts {
    tp: usize,
    fp: usize,
    fneg: usize,
}

impl Counts {
    fn add(&mut self, est: bool, truth: bool) {
        match (est, truth) {
            (true, true) => self.tp += 1,
            (true, false) => self.fp += 1,
            (false, true) => self.fneg += 1,
            _ => {}
        }
    }
    fn prf(&self) -> (f64, f64, f64) {
        let p = if self.tp + self.fp == 0 {
            0.0
        } else {
            self.tp as f64 / (self.tp + self.fp) as f64
        };
        let r = if self.tp + self.fneg == 0 {
            0.0
        } else {
            self.tp as f64 / (self.tp + self.fneg) as f64
        };
        let f = if self.tp == 0 {
            0.0
        } else {
            2.0 * self.tp as f64 / (2 * self.tp + self.fp + self.fneg) as f64
        };
        (p, r, f)
    }
}

fn tv(est: &[f64], u: f64, truth: &[f64]) -> f64 {
    0.5 * (est
        .iter()
        .zip(truth)
        .map(|(a, b)| (a - b).abs())
        .sum::<f64>()
        + u.abs())
}

/// Sums family values into groups.
fn group(values: &[f64], group_of: &[usize], groups: usize) -> Vec<f64> {
    let mut out = vec![0.0; groups];
    for (v, &g) in values.iter().zip(group_of) {
        out[g] += v;
    }
    out
}

fn level(records: &[&WindowRecord], names: &[String], group_of: &[usize]) -> LevelScore {
    let g = names.len();
    let nf = group_of.len();
    let uniform_fam = vec![1.0 / nf as f64; nf];
    let uniform = group(&uniform_fam, group_of, g);
    let mut sum_tv = 0.0;
    let mut sum_u = 0.0;
    let mut sum_n = 0.0;
    let mut mae = (0.0, 0usize);
    let mut nmf_mae = (0.0, 0usize);
    let mut counts = Counts::default();
    let mut nmf_counts = Counts::default();
    let mut borderline = 0usize;
    let (low, high) = (
        PRESENT_SHARE / BORDERLINE_FACTOR,
        PRESENT_SHARE * BORDERLINE_FACTOR,
    );
    let mut per: Vec<(f64, f64, f64, usize, Counts, Counts)> =
        vec![(0.0, 0.0, 0.0, 0, Counts::default(), Counts::default()); g];
    for r in records {
        let truth = group(&r.truth, group_of, g);
        let est = group(&r.est, group_of, g);
        let nmf = group(&r.nmf, group_of, g);
        let d = tv(&est, r.est_unexplained, &truth);
        sum_tv += d;
        sum_u += tv(&uniform, 0.0, &truth);
        sum_n += tv(&nmf, r.nmf_unexplained, &truth);
        for k in 0..g {
            let present = truth[k] >= PRESENT_SHARE;
            counts.add(est[k] >= PRESENT_SHARE, present);
            if (est[k] >= PRESENT_SHARE) != present && (low..high).contains(&truth[k]) {
                borderline += 1;
            }
            nmf_counts.add(nmf[k] >= PRESENT_SHARE, present);
            per[k].4.add(est[k] >= PRESENT_SHARE, present);
            per[k].5.add(nmf[k] >= PRESENT_SHARE, present);
            if present {
                let e = (est[k] - truth[k]).abs();
                let n = (nmf[k] - truth[k]).abs();
                mae.0 += e;
                mae.1 += 1;
                nmf_mae.0 += n;
                nmf_mae.1 += 1;
                per[k].0 += d;
                per[k].1 += e;
                per[k].2 += n;
                per[k].3 += 1;
            }
        }
    }
    let n = records.len().max(1) as f64;
    let (precision, recall, f1) = counts.prf();
    let groups = names
        .iter()
        .zip(&per)
        .map(|(name, p)| {
            let m = p.3.max(1) as f64;
            let (precision, recall, f1) = p.4.prf();
            GroupScore {
                name: name.clone(),
                windows_present: p.3,
                tv_pct: 100.0 * p.0 / m,
                mae_pp: 100.0 * p.1 / m,
                precision,
                recall,
                f1,
                nmf_mae_pp: 100.0 * p.2 / m,
                nmf_f1: p.5.prf().2,
            }
        })
        .collect();
    LevelScore {
        tv_pct: 100.0 * sum_tv / n,
        present_mae_pp: 100.0 * mae.0 / mae.1.max(1) as f64,
        precision,
        recall,
        f1,
        uniform_tv_pct: 100.0 * sum_u / n,
        nmf_tv_pct: 100.0 * sum_n / n,
        nmf_present_mae_pp: 100.0 * nmf_mae.0 / nmf_mae.1.max(1) as f64,
        nmf_f1: nmf_counts.prf().2,
        mistakes: counts.fp + counts.fneg,
        borderline_pct: 100.0 * borderline as f64 / (counts.fp + counts.fneg).max(1) as f64,
        groups,
    }
}

/// Where each family's energy goes in the windows where it plays alone.
fn alone_scores(records: &[&WindowRecord], names: &[String]) -> Vec<AloneScore> {
    let nf = names.len();
    let mut out = Vec::new();
    for f in 0..nf {
        let alone: Vec<&&WindowRecord> = records
            .iter()
            .filter(|r| r.truth.get(f).is_some_and(|&t| t >= ALONE_SHARE))
            .collect();
        if alone.is_empty() {
            continue;
        }
        let n = alone.len() as f64;
        let mean = |get: &dyn Fn(&WindowRecord) -> f64| {
            100.0 * alone.iter().map(|r| get(r)).sum::<f64>() / n
        };
        let mut takers: Vec<(String, f64)> = (0..nf)
            .filter(|&g| g != f)
            .map(|g| (names[g].clone(), mean(&|r| r.est[g])))
            .filter(|(_, pct)| *pct >= 100.0 * ALONE_TAKER_MIN)
            .collect();
        takers.sort_by(|a, b| b.1.total_cmp(&a.1));
        takers.truncate(ALONE_TAKERS);
        out.push(AloneScore {
            name: names[f].clone(),
            windows: alone.len(),
            truth_pct: mean(&|r| r.truth[f]),
            kept_pct: mean(&|r| r.est[f]),
            nmf_kept_pct: mean(&|r| r.nmf[f]),
            unexplained_pct: mean(&|r| r.est_unexplained),
            taken_by: takers,
        });
    }
    out
}

/// The figures per number of families truly present ([`DensityScore`]).
fn density_scores(
    records: &[&WindowRecord],
    fam_names: &[String],
    sections: &[String],
    section_of: &[usize],
) -> Vec<DensityScore> {
    let identity: Vec<usize> = (0..fam_names.len()).collect();
    (1..=MAX_DENSITY)
        .filter_map(|d| {
            let these: Vec<&WindowRecord> = records
                .iter()
                .copied()
                .filter(|r| {
                    let n = r.truth.iter().filter(|&&t| t >= PRESENT_SHARE).count();
                    n.clamp(1, MAX_DENSITY) == d
                })
                .collect();
            if these.is_empty() {
                return None;
            }
            let fam = level(&these, fam_names, &identity);
            let sec = level(&these, sections, section_of);
            Some(DensityScore {
                families_present: d,
                windows: these.len(),
                tv_pct: fam.tv_pct,
                section_tv_pct: sec.tv_pct,
                f1: fam.f1,
                nmf_tv_pct: fam.nmf_tv_pct,
            })
        })
        .collect()
}

impl CheckReport {
    /// Scores the records of every mix against `palette`'s families and sections.
    pub fn new(palette: &Palette, mixes: &[MixRecord]) -> Self {
        let records: Vec<&WindowRecord> = mixes.iter().flat_map(|m| &m.windows).collect();
        let fam_names: Vec<String> = palette.families().iter().map(|f| f.name.clone()).collect();
        let identity: Vec<usize> = (0..fam_names.len()).collect();
        let section_of: Vec<usize> = palette.families().iter().map(|f| f.section).collect();
        let audio: f64 = mixes.iter().map(|m| m.audio_s).sum();
        let time: f64 = mixes.iter().map(|m| m.analysis_s).sum();
        Self {
            mixes: mixes.len(),
            windows: records.len(),
            family: level(&records, &fam_names, &identity),
            section: level(&records, palette.sections(), &section_of),
            alone: alone_scores(&records, &fam_names),
            by_density: density_scores(&records, &fam_names, palette.sections(), &section_of),
            unexplained_mean: records.iter().map(|r| r.est_unexplained).sum::<f64>()
                / records.len().max(1) as f64,
            realtime_factor: if time > 0.0 { audio / time } else { 0.0 },
        }
    }

    /// The report as one JSON object with the keys `weft palette check --json` promises:
    /// `tv_pct`, `section_tv_pct`, `present_mae_pp`, `presence_f1`, `baseline_uniform_tv_pct`,
    /// `baseline_nmf_tv_pct`, `unexplained_mean`, `realtime_factor`, `per_family` (name →
    /// {`tv_pct`, `mae_pp`, `f1`, …}), plus the section-level and baseline details.
    pub fn to_json(&self) -> serde_json::Value {
        let groups = |l: &LevelScore| {
            let mut m = serde_json::Map::new();
            for g in &l.groups {
                m.insert(
                    g.name.clone(),
                    serde_json::json!({
                        "tv_pct": g.tv_pct,
                        "mae_pp": g.mae_pp,
                        "f1": g.f1,
                        "precision": g.precision,
                        "recall": g.recall,
                        "windows_present": g.windows_present,
                        "nmf_mae_pp": g.nmf_mae_pp,
                        "nmf_f1": g.nmf_f1,
                    }),
                );
            }
            serde_json::Value::Object(m)
        };
        serde_json::json!({
            "mixes": self.mixes,
            "windows": self.windows,
            "tv_pct": self.family.tv_pct,
            "section_tv_pct": self.section.tv_pct,
            "present_mae_pp": self.family.present_mae_pp,
            "section_present_mae_pp": self.section.present_mae_pp,
            "presence_precision": self.family.precision,
            "presence_recall": self.family.recall,
            "presence_f1": self.family.f1,
            "section_presence_f1": self.section.f1,
            "baseline_uniform_tv_pct": self.family.uniform_tv_pct,
            "baseline_uniform_section_tv_pct": self.section.uniform_tv_pct,
            "baseline_nmf_tv_pct": self.family.nmf_tv_pct,
            "baseline_nmf_section_tv_pct": self.section.nmf_tv_pct,
            "baseline_nmf_present_mae_pp": self.family.nmf_present_mae_pp,
            "baseline_nmf_presence_f1": self.family.nmf_f1,
            "unexplained_mean": self.unexplained_mean,
            "realtime_factor": self.realtime_factor,
            "per_family": groups(&self.family),
            "per_section": groups(&self.section),
            "presence_mistakes": self.family.mistakes,
            "presence_borderline_pct": self.family.borderline_pct,
            "by_density": self.by_density.iter().map(|d| serde_json::json!({
                "families_present": d.families_present,
                "windows": d.windows,
                "tv_pct": d.tv_pct,
                "section_tv_pct": d.section_tv_pct,
                "f1": d.f1,
                "nmf_tv_pct": d.nmf_tv_pct,
            })).collect::<Vec<_>>(),
            "alone": self.alone.iter().map(|s| (s.name.clone(), serde_json::json!({
                "windows": s.windows,
                "truth_pct": s.truth_pct,
                "kept_pct": s.kept_pct,
                "nmf_kept_pct": s.nmf_kept_pct,
                "unexplained_pct": s.unexplained_pct,
                "taken_by": s.taken_by.iter().map(|(n, p)| serde_json::json!({"family": n, "pct": p})).collect::<Vec<_>>(),
            }))).collect::<serde_json::Map<_, _>>(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn window(truth: [f64; 3], est: [f64; 3], u: f64, nmf: [f64; 3]) -> WindowRecord {
        WindowRecord {
            truth: truth.to_vec(),
            est: est.to_vec(),
            est_unexplained: u,
            nmf: nmf.to_vec(),
            nmf_unexplained: 0.0,
        }
    }

    #[test]
    fn a_lone_family_s_energy_is_traced_to_the_families_that_took_it() {
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let w = [
            window([0.95, 0.05, 0.0], [0.7, 0.2, 0.05], 0.05, [0.3, 0.4, 0.3]),
            window([1.0, 0.0, 0.0], [0.9, 0.0, 0.1], 0.0, [0.5, 0.5, 0.0]),
            // Not alone: b holds half.
            window([0.5, 0.5, 0.0], [0.0, 1.0, 0.0], 0.0, [0.0, 1.0, 0.0]),
            // c alone, all its energy kept; b gets 0.5 % (below the listing floor).
            window([0.0, 0.0, 1.0], [0.0, 0.005, 0.995], 0.0, [0.0, 0.0, 1.0]),
        ];
        let records: Vec<&WindowRecord> = w.iter().collect();
        let s = alone_scores(&records, &names);
        assert_eq!(s.len(), 2, "b never plays alone");
        let a = &s[0];
        assert_eq!((a.name.as_str(), a.windows), ("a", 2));
        let close = |x: f64, y: f64| (x - y).abs() < 1e-9;
        assert!(close(a.truth_pct, 97.5), "{}", a.truth_pct);
        assert!(close(a.kept_pct, 80.0), "{}", a.kept_pct);
        assert!(close(a.nmf_kept_pct, 40.0), "{}", a.nmf_kept_pct);
        assert!(close(a.unexplained_pct, 2.5), "{}", a.unexplained_pct);
        let takers: Vec<&str> = a.taken_by.iter().map(|(n, _)| n.as_str()).collect();
        assert_eq!(takers, ["b", "c"], "largest first");
        assert!(close(a.taken_by[0].1, 10.0) && close(a.taken_by[1].1, 7.5));
        let c = &s[1];
        assert_eq!((c.name.as_str(), c.windows), ("c", 1));
        assert!(c.taken_by.is_empty(), "0.5 % is below the 1 % floor");
    }

    /// A window whose NMF-alone estimate is the truth itself.
    fn record(truth: [f64; 6], est: [f64; 6]) -> WindowRecord {
        WindowRecord {
            truth: truth.to_vec(),
            est: est.to_vec(),
            est_unexplained: 0.0,
            nmf: truth.to_vec(),
            nmf_unexplained: 0.0,
        }
    }

    #[test]
    fn windows_are_grouped_by_how_many_families_sound_and_borderline_mistakes_are_told() {
        let names: Vec<String> = (0..6).map(|i| format!("f{i}")).collect();
        let sections: Vec<String> = ["low", "high"].iter().map(|s| s.to_string()).collect();
        let section_of = [0, 0, 0, 1, 1, 1];
        let sixth = 1.0 / 6.0;
        let w = [
            // One family, exact.
            record(
                [1.0, 0.0, 0.0, 0.0, 0.0, 0.0],
                [1.0, 0.0, 0.0, 0.0, 0.0, 0.0],
            ),
            // One family, a fifth given to f1 (same section): a false presence far from the mark.
            record(
                [1.0, 0.0, 0.0, 0.0, 0.0, 0.0],
                [0.8, 0.2, 0.0, 0.0, 0.0, 0.0],
            ),
            // Two families; f3 truly holds 4 % (absent) and is given 6 %: borderline.
            record(
                [0.48, 0.48, 0.0, 0.04, 0.0, 0.0],
                [0.46, 0.48, 0.0, 0.06, 0.0, 0.0],
            ),
            // Six families: counted with five.
            record([sixth; 6], [sixth; 6]),
        ];
        let records: Vec<&WindowRecord> = w.iter().collect();
        let d = density_scores(&records, &names, &sections, &section_of);
        let got: Vec<(usize, usize)> = d.iter().map(|d| (d.families_present, d.windows)).collect();
        assert_eq!(
            got,
            [(1, 2), (2, 1), (MAX_DENSITY, 1)],
            "empty groups left out"
        );
        let close = |x: f64, y: f64| (x - y).abs() < 1e-9;
        // Family level: (0 + 20) / 2 %; the section level does not see f0 → f1.
        assert!(close(d[0].tv_pct, 10.0) && close(d[0].section_tv_pct, 0.0));
        // TP 2, FP 1: F1 = 4 / 5.
        assert!(close(d[0].f1, 0.8), "{}", d[0].f1);
        // 0.5 · (0.02 + 0.02) at both levels.
        assert!(close(d[1].tv_pct, 2.0) && close(d[1].section_tv_pct, 2.0));
        assert!(close(d[2].tv_pct, 0.0) && close(d[2].f1, 1.0));
        assert!(d.iter().all(|d| close(d.nmf_tv_pct, 0.0)));
        let identity: Vec<usize> = (0..6).collect();
        let fam = level(&records, &names, &identity);
        assert_eq!(fam.mistakes, 2);
        assert!(close(fam.borderline_pct, 50.0), "{}", fam.borderline_pct);
    }
}
