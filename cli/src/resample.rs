//! Streaming sample-rate conversion of the analysis signal (`--sample-rate`), with rubato 5.1's
//! synchronous FFT resampler (`rubato::Fft`, fixed input chunks).
//!
//! The output lines up with the input: the resampler's start-up delay is dropped and the output
//! holds exactly ⌈n · to/from⌉ frames for n input frames, as rubato's own whole-clip
//! `process_all` does; but here the clip arrives in blocks and leaves in blocks, so memory stays at
//! one chunk whatever the file's length.

use rubato::audioadapter_buffers::direct::SequentialSliceOfVecs;
use rubato::{Fft, FixedSync, Indexing, Resampler as _};
use thiserror::Error;

/// Input frames per resampler call (rubato's suggested starting point, common practice).
const CHUNK_FRAMES: usize = 1024;

/// Why a resampler could not be built or run.
#[derive(Debug, Error)]
pub enum ResampleError {
    /// rubato refused the rates.
    #[error("cannot resample from {from_hz} Hz to {to_hz} Hz")]
    Construction {
        /// Input rate, Hz.
        from_hz: u32,
        /// Output rate, Hz.
        to_hz: u32,
        /// rubato's reason.
        #[source]
        source: rubato::ResamplerConstructionError,
    },
    /// rubato failed while processing.
    #[error("resampling failed")]
    Process(#[from] rubato::ResampleError),
    /// rubato's buffer adapter refused a size (a bug here, reported rather than hidden).
    #[error("resampler buffer size mismatch")]
    Size(#[from] rubato::audioadapter_buffers::SizeError),
}

/// Converts mid and side from one rate to another, block by block.
pub struct StreamResampler {
    inner: Fft<f32>,
    from_hz: u32,
    to_hz: u32,
    /// Input chunk being filled, one vector per channel (mid, side).
    input: Vec<Vec<f32>>,
    filled: usize,
    output: Vec<Vec<f32>>,
    /// Start-up delay frames still to drop.
    to_trim: usize,
    frames_in: u64,
    frames_out: u64,
}

impl StreamResampler {
    /// A resampler from `from_hz` to `to_hz`.
    pub fn new(from_hz: u32, to_hz: u32) -> Result<Self, ResampleError> {
        let inner = Fft::<f32>::new(
            from_hz as usize,
            to_hz as usize,
            CHUNK_FRAMES,
            2,
            FixedSync::Input,
        )
        .map_err(|source| ResampleError::Construction {
            from_hz,
            to_hz,
            source,
        })?;
        let chunk = inner.input_frames_next();
        let out_max = inner.output_frames_max();
        let to_trim = inner.output_delay();
        Ok(Self {
            inner,
            from_hz,
            to_hz,
            input: vec![vec![0.0; chunk]; 2],
            filled: 0,
            output: vec![vec![0.0; out_max]; 2],
            to_trim,
            frames_in: 0,
            frames_out: 0,
        })
    }

    /// Feeds a block and hands every resampled block to `sink(mid, side)`.
    pub fn process(
        &mut self,
        mid: &[f32],
        side: &[f32],
        sink: &mut impl FnMut(&[f32], &[f32]),
    ) -> Result<(), ResampleError> {
        let mut i = 0;
        self.frames_in += mid.len() as u64;
        while i < mid.len() {
            let chunk = self.input[0].len();
            let take = (chunk - self.filled).min(mid.len() - i);
            self.input[0][self.filled..self.filled + take].copy_from_slice(&mid[i..i + take]);
            self.input[1][self.filled..self.filled + take].copy_from_slice(&side[i..i + take]);
            self.filled += take;
            i += take;
            if self.filled == chunk {
                self.run(None, None, sink)?;
                self.filled = 0;
            }
        }
        Ok(())
    }

    /// Flushes the last partial chunk and the resampler's delay line, so the output holds
    /// ⌈n · to/from⌉ frames in all.
    pub fn finish(&mut self, sink: &mut impl FnMut(&[f32], &[f32])) -> Result<(), ResampleError> {
        let expected =
            (self.frames_in as u128 * u128::from(self.to_hz)).div_ceil(u128::from(self.from_hz));
        let expected = expected as u64;
        if self.filled > 0 {
            let filled = self.filled;
            self.run(Some(filled), Some(expected), sink)?;
            self.filled = 0;
        }
        while self.frames_out < expected {
            self.run(Some(0), Some(expected), sink)?;
        }
        Ok(())
    }

    fn run(
        &mut self,
        partial_len: Option<usize>,
        limit: Option<u64>,
        sink: &mut impl FnMut(&[f32], &[f32]),
    ) -> Result<(), ResampleError> {
        let chunk = self.input[0].len();
        let out_len = self.output[0].len();
        let input = SequentialSliceOfVecs::new(&self.input, 2, chunk)?;
        let mut output = SequentialSliceOfVecs::new_mut(&mut self.output, 2, out_len)?;
        let indexing = Indexing {
            partial_len,
            ..Indexing::new()
        };
        let (_, written) = self
            .inner
            .process_into_buffer(&input, &mut output, Some(&indexing))?;
        let skip = self.to_trim.min(written);
        self.to_trim -= skip;
        let mut end = written;
        if let Some(limit) = limit {
            let room = limit.saturating_sub(self.frames_out) as usize;
            end = end.min(skip + room);
        }
        if end > skip {
            sink(&self.output[0][skip..end], &self.output[1][skip..end]);
            self.frames_out += (end - skip) as u64;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sine(freq_hz: f64, rate_hz: f64, n: usize) -> Vec<f32> {
        (0..n)
            .map(|i| (0.5 * (std::f64::consts::TAU * freq_hz * i as f64 / rate_hz).sin()) as f32)
            .collect()
    }

    /// A 1 kHz sine resampled from 44.1 to 22.05 kHz (and up to 48 kHz) is the same sine at the
    /// new rate: closed form, sample by sample away from the edges, and the length is exact.
    #[test]
    fn sine_survives_resampling_in_any_block_size() {
        for (from, to) in [(44_100_u32, 22_050_u32), (44_100, 48_000), (8_000, 16_000)] {
            let n = from as usize + 123;
            let x = sine(1000.0, f64::from(from), n);
            for block in [1, 100, 1024, 4099] {
                let mut r = StreamResampler::new(from, to).expect("rates");
                let mut mid = Vec::new();
                let mut side = Vec::new();
                let mut sink = |m: &[f32], s: &[f32]| {
                    mid.extend_from_slice(m);
                    side.extend_from_slice(s);
                };
                for b in x.chunks(block) {
                    r.process(b, b, &mut sink).expect("process");
                }
                r.finish(&mut sink).expect("finish");
                let expected_len = (n as u64 * u64::from(to)).div_ceil(u64::from(from)) as usize;
                assert_eq!(mid.len(), expected_len, "{from}->{to} block {block}");
                assert_eq!(mid, side);
                let y = sine(1000.0, f64::from(to), expected_len);
                let edge = to as usize / 50;
                for i in edge..expected_len - edge {
                    assert!(
                        (mid[i] - y[i]).abs() < 2e-3,
                        "{from}->{to} block {block} at {i}: {} vs {}",
                        mid[i],
                        y[i]
                    );
                }
            }
        }
    }
}
