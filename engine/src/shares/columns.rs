//! From power spectra to the columns the palette's atoms describe: band energies on the
//! palette's mel layout, averaged over a few hops into one *column*, and the last few columns
//! stacked into one vector (the context an atom spans).
//!
//! Used identically when atoms are learned and when shares are estimated, so both see the same
//! numbers.

use crate::bands::{BandLayout, BandNorm, BandsError, Filterbank, MelScale};
use crate::palette::AnalysisSpec;

/// Power spectra in, stacked band-energy columns out. Allocates only in [`ColumnStream::new`].
#[derive(Debug, Clone)]
pub struct ColumnStream {
    fb: Filterbank,
    bands: usize,
    stack: usize,
    hops_per_column: usize,
    hop_s: f64,
    mel: Vec<f32>,
    acc: Vec<f32>,
    count: usize,
    stacked: Vec<f32>,
    columns_done: u64,
}

impl ColumnStream {
    /// Builds the palette's band layout for frames of `n_fft` samples with hops of `hop_len`
    /// samples at `sample_rate_hz`.
    ///
    /// Bands above the Nyquist frequency (a palette made at 48 kHz read at 22.05 kHz) stay in
    /// place and read zero: the filterbank is built for a multiple of the rate whose bins fall
    /// on the same frequencies, so the bands mean the same Hz at every rate.
    pub fn new(
        spec: &AnalysisSpec,
        sample_rate_hz: f64,
        n_fft: usize,
        hop_len: usize,
    ) -> Result<Self, BandsError> {
        let nyquist_hz = sample_rate_hz / 2.0;
        let factor = if spec.fmax_hz > nyquist_hz {
            (spec.fmax_hz / nyquist_hz).ceil().max(1.0) as usize
        } else {
            1
        };
        let layout = BandLayout::Mel {
            bands: spec.bands,
            fmin_hz: spec.fmin_hz,
            fmax_hz: Some(spec.fmax_hz),
            scale: MelScale::Slaney,
            norm: BandNorm::Peak,
        };
        let fb = Filterbank::new(&layout, sample_rate_hz * factor as f64, n_fft * factor)?;
        let hop_s = hop_len as f64 / sample_rate_hz;
        let hops_per_column = ((spec.column_s / hop_s).round() as usize).max(1);
        Ok(Self {
            fb,
            bands: spec.bands,
            stack: spec.stack,
            hops_per_column,
            hop_s,
            mel: vec![0.0; spec.bands],
            acc: vec![0.0; spec.bands],
            count: 0,
            stacked: vec![0.0; spec.bands * spec.stack],
            columns_done: 0,
        })
    }

    /// Hops per column at this rate.
    pub fn hops_per_column(&self) -> usize {
        self.hops_per_column
    }

    /// Time between columns, seconds.
    pub fn column_period_s(&self) -> f64 {
        self.hops_per_column as f64 * self.hop_s
    }

    /// Values per stacked vector, `bands × stack`.
    pub fn dims(&self) -> usize {
        self.bands * self.stack
    }

    /// Forgets all input.
    pub fn reset(&mut self) {
        self.acc.fill(0.0);
        self.count = 0;
        self.stacked.fill(0.0);
        self.columns_done = 0;
    }

    /// Adds one frame's one-sided power spectrum (`n_fft / 2 + 1` bins, as
    /// [`crate::spectrum::Spectrum::power`]); returns `true` when a column was completed, and
    /// then [`ColumnStream::stacked`] holds the last `stack` columns, oldest first. Does not
    /// allocate.
    pub fn push_power(&mut self, power: &[f32]) -> bool {
        for (b, m) in self.mel.iter_mut().enumerate() {
            let (start, w) = self.fb.row(b);
            let end = (start + w.len()).min(power.len());
            let mut s = 0.0_f32;
            if start < end {
                for (x, p) in w.iter().zip(&power[start..end]) {
                    s += x * p;
                }
            }
            *m = s;
        }
        for (a, &m) in self.acc.iter_mut().zip(&self.mel) {
            *a += m;
        }
        self.count += 1;
        if self.count < self.hops_per_column {
            return false;
        }
        let inv = 1.0 / self.count as f32;
        let bands = self.bands;
        self.stacked.copy_within(bands.., 0);
        let n = self.stacked.len();
        for (s, a) in self.stacked[n - bands..]
            .iter_mut()
            .zip(self.acc.iter_mut())
        {
            *s = *a * inv;
            *a = 0.0;
        }
        self.count = 0;
        self.columns_done += 1;
        true
    }

    /// The last `stack` columns, oldest first (`bands × stack` values).
    pub fn stacked(&self) -> &[f32] {
        &self.stacked
    }

    /// The newest column (`bands` values).
    pub fn newest(&self) -> &[f32] {
        &self.stacked[self.stacked.len() - self.bands..]
    }

    /// Columns completed since the start.
    pub fn columns_done(&self) -> u64 {
        self.columns_done
    }

    /// Centre of the stacked span of the newest column, seconds from the start of the signal
    /// (frames are centred on `k · hop`, as in [`crate::frames`]).
    pub fn stacked_centre_s(&self) -> f64 {
        let p = self.hops_per_column as f64;
        let c = self.columns_done as f64 - 1.0;
        let centre_col = c - (self.stack as f64 - 1.0) / 2.0;
        ((centre_col * p + (p - 1.0) / 2.0) * self.hop_s).max(0.0)
    }

    /// Centre of the newest column, seconds.
    pub fn newest_centre_s(&self) -> f64 {
        let p = self.hops_per_column as f64;
        let c = self.columns_done as f64 - 1.0;
        ((c * p + (p - 1.0) / 2.0) * self.hop_s).max(0.0)
    }
}
