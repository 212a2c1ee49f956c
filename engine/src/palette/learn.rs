//! Learning a family's atoms from its audio: the audio goes through exactly the path shares are
//! estimated on (framer → windowed FFT → palette bands → columns → stacks), and the stacks of
//! its audible moments are factorised by KL NMF.

use super::AnalysisSpec;
use crate::bands::BandsError;
use crate::frames::{FrameConfig, Framer};
use crate::shares::ColumnStream;
use crate::shares::nmf::learn_dictionary;
use crate::spectrum::Spectrum;

/// How atoms are learned.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LearnSettings {
    /// Atoms per family.
    pub atoms: usize,
    /// NMF rounds.
    pub iterations: usize,
    /// The most columns used per family (drawn evenly when there are more).
    pub max_columns: usize,
    /// Columns quieter than this, in dB below the family's loudest column, are left out.
    pub floor_db: f64,
    /// Seed of the initialisation.
    pub seed: u64,
}

impl Default for LearnSettings {
    fn default() -> Self {
        Self {
            atoms: 24,
            iterations: 150,
            max_columns: 3000,
            floor_db: 50.0,
            seed: 1,
        }
    }
}

/// The stacked columns of a whole mono signal, row-major (`n × spec.dims()`), computed with the
/// same framing, spectrum and bands as the live estimator at `sample_rate_hz`. Allocates.
pub fn stacked_columns(
    signal: &[f32],
    sample_rate_hz: f64,
    spec: &AnalysisSpec,
) -> Result<Vec<f32>, BandsError> {
    let framing = FrameConfig::for_sample_rate(sample_rate_hz);
    let mut framer = Framer::new(framing);
    let mut spectrum = Spectrum::new(framing.frame_len);
    let mut columns = ColumnStream::new(spec, sample_rate_hz, framing.frame_len, framing.hop_len)?;
    let mut out = Vec::new();
    let mut i = 0;
    let take = |framer: &mut Framer,
                spectrum: &mut Spectrum,
                columns: &mut ColumnStream,
                out: &mut Vec<f32>| {
        spectrum.process(framer.frame());
        if columns.push_power(spectrum.power()) && columns.columns_done() >= spec.stack as u64 {
            out.extend_from_slice(columns.stacked());
        }
        framer.advance();
    };
    while i < signal.len() {
        let (used, ready) = framer.feed(&signal[i..]);
        i += used;
        if ready {
            take(&mut framer, &mut spectrum, &mut columns, &mut out);
        }
    }
    let mut left = framer.tail_len();
    while left > 0 {
        let (used, ready) = framer.feed_zeros(left);
        left -= used;
        if ready {
            take(&mut framer, &mut spectrum, &mut columns, &mut out);
        }
    }
    Ok(out)
}

/// Learns one family's atoms from its stacked columns (row-major, `n × dims`): drops columns
/// quieter than `settings.floor_db` below the loudest, keeps at most `settings.max_columns`
/// evenly spaced ones, and factorises them. Returns `settings.atoms × dims` values (atoms
/// normalised to sum 1), or `None` when no column is loud enough.
pub fn learn_family_atoms(
    columns: &[f32],
    dims: usize,
    settings: &LearnSettings,
) -> Option<Vec<f32>> {
    if dims == 0 {
        return None;
    }
    let energies: Vec<f32> = columns.chunks_exact(dims).map(|c| c.iter().sum()).collect();
    let loudest = energies.iter().copied().fold(0.0_f32, f32::max);
    if loudest <= 0.0 || !loudest.is_finite() {
        return None;
    }
    let floor = loudest * 10f32.powf(-(settings.floor_db as f32) / 10.0);
    let kept: Vec<usize> = (0..energies.len())
        .filter(|&i| energies[i] > floor)
        .collect();
    if kept.is_empty() {
        return None;
    }
    let step = (kept.len() as f64 / settings.max_columns.max(1) as f64).max(1.0);
    let mut data = Vec::new();
    let mut x = 0.0;
    while (x as usize) < kept.len() {
        let c = kept[x as usize];
        // Each column is scaled to unit energy so quiet notes shape the atoms as much as loud
        // ones (dynamics change timbre, and every dynamic should be describable).
        let e = energies[c];
        data.extend(columns[c * dims..(c + 1) * dims].iter().map(|v| v / e));
        x += step;
    }
    Some(learn_dictionary(
        &data,
        dims,
        settings.atoms,
        settings.iterations,
        settings.seed,
    ))
}
