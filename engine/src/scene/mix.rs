//! Mixes of stems at chosen gains, and their ground-truth shares.
//!
//! Dry stems do not add up energy-exactly (the cross terms of the sum do not cancel), so the
//! ground truth is defined on stem energies, as the vocabulary says: a family's ground-truth
//! share in a window is its stem's energy there over the sum of all stems' energies.

use super::rng::SceneRng;

/// The RMS every stem is brought to before its gain is applied (−20 dBFS; common practice as a
/// working level with headroom).
pub const STEM_REFERENCE_RMS: f64 = 0.1;
/// The highest sample peak a mix is allowed; louder mixes are scaled down as a whole.
pub const MIX_PEAK_LIMIT: f32 = 0.9;

/// Which families a mix holds and at which gains.
#[derive(Debug, Clone, PartialEq)]
pub struct MixSpec {
    /// Family indices, distinct.
    pub families: Vec<usize>,
    /// Gain of each family after level matching, dB (same order as `families`).
    pub gains_db: Vec<f64>,
}

impl MixSpec {
    /// Draws 1…`max_families` distinct families out of `candidates` and a gain for each,
    /// uniform in `gain_range_db`.
    pub fn random(
        seed: u64,
        candidates: &[usize],
        max_families: usize,
        gain_range_db: (f64, f64),
    ) -> Self {
        let mut rng = SceneRng::derive(seed, 2);
        let mut pool = candidates.to_vec();
        rng.shuffle(&mut pool);
        let n = rng.int(1, max_families.min(pool.len()).max(1) as i64) as usize;
        pool.truncate(n);
        let gains_db = pool
            .iter()
            .map(|_| rng.uniform(gain_range_db.0, gain_range_db.1))
            .collect();
        Self {
            families: pool,
            gains_db,
        }
    }
}

/// The span over which stem energies are kept, seconds (ground truth can be asked for any
/// span made of these blocks).
pub const ENERGY_BLOCK_S: f64 = 0.01;

/// A mix and the energies of its scaled stems, block by block.
#[derive(Debug, Clone, PartialEq)]
pub struct Mix {
    /// Sample rate, Hz.
    pub sample_rate_hz: u32,
    /// The mixed signal.
    pub signal: Vec<f32>,
    /// Family index of each member stem.
    pub families: Vec<usize>,
    /// Length of an energy block, samples.
    pub block_len: usize,
    /// `block_energy[m][b]`: energy (sum of squares) of member `m`'s scaled stem in block `b`.
    pub block_energy: Vec<Vec<f64>>,
}

impl Mix {
    /// Mixes `stems` (family index, samples) with `gains_db`, each stem first brought to
    /// [`STEM_REFERENCE_RMS`]; the whole mix is then scaled so its peak stays at or below
    /// [`MIX_PEAK_LIMIT`] (which changes no share). Silent stems are left out.
    pub fn new(stems: &[(usize, &[f32])], gains_db: &[f64], sample_rate_hz: u32) -> Self {
        let n = stems.iter().map(|(_, s)| s.len()).max().unwrap_or(0);
        let mut scaled: Vec<(usize, Vec<f32>)> = Vec::new();
        for (i, (family, s)) in stems.iter().enumerate() {
            let energy: f64 = s.iter().map(|&v| f64::from(v) * f64::from(v)).sum();
            if energy <= 0.0 || s.is_empty() {
                continue;
            }
            let rms = (energy / s.len() as f64).sqrt();
            let gain = STEM_REFERENCE_RMS / rms
                * 10f64.powf(gains_db.get(i).copied().unwrap_or(0.0) / 20.0);
            scaled.push((
                *family,
                s.iter().map(|&v| (f64::from(v) * gain) as f32).collect(),
            ));
        }
        let mut signal = vec![0.0_f32; n];
        for (_, s) in &scaled {
            signal.iter_mut().zip(s).for_each(|(a, b)| *a += b);
        }
        let peak = signal.iter().fold(0.0_f32, |m, v| m.max(v.abs()));
        if peak > MIX_PEAK_LIMIT {
            let k = MIX_PEAK_LIMIT / peak;
            signal.iter_mut().for_each(|v| *v *= k);
            for (_, s) in &mut scaled {
                s.iter_mut().for_each(|v| *v *= k);
            }
        }
        let block_len = ((ENERGY_BLOCK_S * f64::from(sample_rate_hz)).round() as usize).max(1);
        let block_energy = scaled
            .iter()
            .map(|(_, s)| {
                s.chunks(block_len)
                    .map(|c| c.iter().map(|&v| f64::from(v) * f64::from(v)).sum())
                    .collect()
            })
            .collect();
        Self {
            sample_rate_hz,
            signal,
            families: scaled.iter().map(|(f, _)| *f).collect(),
            block_len,
            block_energy,
        }
    }

    /// Length, seconds.
    pub fn duration_s(&self) -> f64 {
        self.signal.len() as f64 / f64::from(self.sample_rate_hz)
    }

    /// Energy of each family's scaled stem between `t0_s` and `t1_s` (whole energy blocks),
    /// over `families` families (0 for families not in the mix).
    pub fn energy_between(&self, t0_s: f64, t1_s: f64, families: usize) -> Vec<f64> {
        let block_s = self.block_len as f64 / f64::from(self.sample_rate_hz);
        let a = (t0_s / block_s).round().max(0.0) as usize;
        let b = (t1_s / block_s).round().max(0.0) as usize;
        let mut out = vec![0.0; families];
        for (m, &f) in self.families.iter().enumerate() {
            let e = &self.block_energy[m];
            let (a, b) = (a.min(e.len()), b.min(e.len()));
            if let Some(o) = out.get_mut(f) {
                *o += e[a..b].iter().sum::<f64>();
            }
        }
        out
    }

    /// Ground-truth shares between `t0_s` and `t1_s` over `families` families, or `None` when
    /// the stems hold no energy there.
    pub fn truth_between(&self, t0_s: f64, t1_s: f64, families: usize) -> Option<Vec<f64>> {
        let mut e = self.energy_between(t0_s, t1_s, families);
        let total: f64 = e.iter().sum();
        if total <= 0.0 || !total.is_finite() {
            return None;
        }
        e.iter_mut().for_each(|v| *v /= total);
        Some(e)
    }
}
