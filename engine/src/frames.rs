//! The streaming framer: any block size in, hop-aligned frames out.
//!
//! Frames are centred the way librosa 0.11.0 centres them with `center=True`: the stream is
//! preceded by `frame_len / 2` zeros, so frame `k` is centred on sample `k * hop_len` of the
//! input. A live stream and a whole file therefore produce the same frames, frame for frame, and
//! feeding [`Framer::tail_len`] more zeros (as [`crate::Analyzer::finish`] does) completes
//! librosa's padding for a whole clip. Results never depend on how the input was split into
//! blocks.

use thiserror::Error;

/// The longest frame the framer accepts, in samples (2^16: about 0.34 s at 192 kHz).
pub const MAX_FRAME_LEN: usize = 1 << 16;

/// Frame and hop lengths, in samples.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FrameConfig {
    /// Samples per frame.
    pub frame_len: usize,
    /// Samples between the starts of consecutive frames.
    pub hop_len: usize,
}

/// Why a framing configuration was refused.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Error)]
pub enum FramingError {
    /// The frame length is zero or above [`MAX_FRAME_LEN`].
    #[error("frame length {frame_len} samples is outside 2..={max}", max = MAX_FRAME_LEN)]
    FrameLength {
        /// The refused frame length, in samples.
        frame_len: usize,
    },
    /// The hop is zero or longer than the frame.
    #[error("hop length {hop_len} samples must be between 1 and the frame length {frame_len}")]
    HopLength {
        /// The refused hop length, in samples.
        hop_len: usize,
        /// The frame length it was checked against, in samples.
        frame_len: usize,
    },
}

impl FrameConfig {
    /// Checks that `frame_len` is in `2..=MAX_FRAME_LEN` and `hop_len` in `1..=frame_len`.
    pub fn new(frame_len: usize, hop_len: usize) -> Result<Self, FramingError> {
        if !(2..=MAX_FRAME_LEN).contains(&frame_len) {
            return Err(FramingError::FrameLength { frame_len });
        }
        if hop_len == 0 || hop_len > frame_len {
            return Err(FramingError::HopLength { hop_len, frame_len });
        }
        Ok(Self { frame_len, hop_len })
    }

    /// Frame and hop lengths given in seconds at `sample_rate_hz`, each rounded to the nearest
    /// sample and checked like [`FrameConfig::new`] (a duration that is not finite or rounds to
    /// no sample reads as a length of 0 and is refused).
    pub fn from_seconds(
        frame_s: f64,
        hop_s: f64,
        sample_rate_hz: f64,
    ) -> Result<Self, FramingError> {
        let samples = |s: f64| {
            let n = (s * sample_rate_hz).round();
            if n.is_finite() && n >= 0.0 && n <= MAX_FRAME_LEN as f64 {
                n as usize
            } else if n.is_finite() && n > 0.0 {
                MAX_FRAME_LEN + 1
            } else {
                0
            }
        };
        Self::new(samples(frame_s), samples(hop_s))
    }

    /// Which samples of centred frame `index` hold the signal rather than centre padding:
    /// frame `k` covers signal samples `k·hop − frame_len/2 ..` (so its first
    /// `frame_len/2 − k·hop` samples are padding while that is positive), and, once the signal's
    /// length `signal_len` is known (a finished clip), the samples past its end are padding too.
    pub fn signal_range(&self, index: u64, signal_len: Option<u64>) -> std::ops::Range<usize> {
        let n = self.frame_len as i128;
        let first = i128::from(index) * self.hop_len as i128 - n / 2;
        let start = (-first).clamp(0, n);
        let end = signal_len.map_or(n, |len| (i128::from(len) - first).clamp(start, n));
        start as usize..end as usize
    }

    /// The framing used by default at `sample_rate_hz`: 2048-sample frames (4096 at 88.2 kHz and
    /// above, 8192 at 176.4 kHz and above, so a frame stays near 43 ms) with a quarter-frame hop,
    /// as librosa 0.11.0's `stft` defaults (n_fft 2048, hop n_fft/4) at 44.1 and 48 kHz.
    pub fn for_sample_rate(sample_rate_hz: f64) -> Self {
        let frame_len = if sample_rate_hz >= 176_400.0 {
            8192
        } else if sample_rate_hz >= 88_200.0 {
            4096
        } else {
            2048
        };
        Self {
            frame_len,
            hop_len: frame_len / 4,
        }
    }
}

/// Cuts a stream into overlapping frames without allocating after construction.
///
/// Feed it with [`Framer::feed`] until it reports a frame, read the frame with
/// [`Framer::frame`], then call [`Framer::advance`].
#[derive(Debug, Clone)]
pub struct Framer {
    config: FrameConfig,
    /// The current frame being filled; `filled` samples of it are valid.
    buf: Vec<f32>,
    filled: usize,
}

impl Framer {
    /// A framer whose first frame is centred on the first input sample.
    pub fn new(config: FrameConfig) -> Self {
        let mut framer = Self {
            config,
            buf: vec![0.0; config.frame_len],
            filled: 0,
        };
        framer.reset();
        framer
    }

    /// The framing this framer was built with.
    pub fn config(&self) -> FrameConfig {
        self.config
    }

    /// Forgets all input, as if newly constructed.
    pub fn reset(&mut self) {
        self.buf.fill(0.0);
        self.filled = self.config.frame_len / 2;
    }

    /// Copies samples from `input` until a frame is complete or the input is used up. Returns how
    /// many samples were taken and whether a frame is now ready.
    pub fn feed(&mut self, input: &[f32]) -> (usize, bool) {
        let want = self.config.frame_len - self.filled;
        let take = want.min(input.len());
        self.buf[self.filled..self.filled + take].copy_from_slice(&input[..take]);
        self.filled += take;
        (take, self.filled == self.config.frame_len)
    }

    /// Like [`Framer::feed`] with up to `count` zeros.
    pub fn feed_zeros(&mut self, count: usize) -> (usize, bool) {
        let take = (self.config.frame_len - self.filled).min(count);
        self.buf[self.filled..self.filled + take].fill(0.0);
        self.filled += take;
        (take, self.filled == self.config.frame_len)
    }

    /// Whether a complete frame is waiting to be read.
    pub fn ready(&self) -> bool {
        self.filled == self.config.frame_len
    }

    /// The complete frame (only meaningful while [`Framer::ready`] is true).
    pub fn frame(&self) -> &[f32] {
        &self.buf
    }

    /// Drops the oldest `hop_len` samples of a complete frame, making room for the next one.
    pub fn advance(&mut self) {
        let hop = self.config.hop_len;
        self.buf.copy_within(hop.., 0);
        self.filled = self.config.frame_len - hop;
    }

    /// How many zeros [`Framer::feed`] must still receive after the end of a whole clip to complete
    /// librosa's centre padding (`frame_len / 2` in all).
    pub fn tail_len(&self) -> usize {
        self.config.frame_len / 2
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn frames_of(input: &[f32], config: FrameConfig, block: usize) -> Vec<Vec<f32>> {
        let mut framer = Framer::new(config);
        let mut out = Vec::new();
        let zeros = vec![0.0; framer.tail_len()];
        for chunk in input.chunks(block).chain(std::iter::once(&zeros[..])) {
            let mut i = 0;
            while i < chunk.len() {
                let (used, ready) = framer.feed(&chunk[i..]);
                i += used;
                if ready {
                    out.push(framer.frame().to_vec());
                    framer.advance();
                }
            }
        }
        out
    }

    #[test]
    fn frames_are_centred_like_librosa() {
        // librosa 0.11.0 util.frame over the zero-padded signal (center=True, pad_mode="constant"):
        // n_frames = 1 + len // hop, frame k covers padded[k*hop .. k*hop + n].
        let config = FrameConfig::new(8, 2).expect("valid");
        let input: Vec<f32> = (1..=11).map(|v| v as f32).collect();
        let frames = frames_of(&input, config, 3);
        assert_eq!(frames.len(), 1 + input.len() / 2);
        let mut padded = vec![0.0; 4];
        padded.extend_from_slice(&input);
        padded.extend_from_slice(&[0.0; 4]);
        for (k, frame) in frames.iter().enumerate() {
            assert_eq!(frame.as_slice(), &padded[k * 2..k * 2 + 8], "frame {k}");
        }
    }

    #[test]
    fn block_size_never_changes_frames() {
        let config = FrameConfig::new(64, 16).expect("valid");
        let input: Vec<f32> = (0..1000).map(|v| (v as f32 * 0.37).sin()).collect();
        let reference = frames_of(&input, config, input.len());
        for block in [1, 2, 3, 15, 16, 17, 63, 64, 65, 333, 999] {
            assert_eq!(frames_of(&input, config, block), reference, "block {block}");
        }
    }

    #[test]
    fn framing_from_seconds_rounds_to_samples_at_any_rate() {
        // 46.4 ms / 11.6 ms: librosa's 2048/512 at 44.1 kHz, about 371/93 samples at 8 kHz.
        let c = FrameConfig::from_seconds(2048.0 / 44_100.0, 512.0 / 44_100.0, 44_100.0);
        assert_eq!(c, FrameConfig::new(2048, 512));
        let c = FrameConfig::from_seconds(0.046, 0.0116, 8_000.0).expect("valid");
        assert_eq!((c.frame_len, c.hop_len), (368, 93));
        let c = FrameConfig::from_seconds(0.02, 0.01, 384_000.0).expect("valid");
        assert_eq!((c.frame_len, c.hop_len), (7680, 3840));
        assert_eq!(
            FrameConfig::from_seconds(f64::NAN, 0.01, 48_000.0),
            Err(FramingError::FrameLength { frame_len: 0 })
        );
        assert!(FrameConfig::from_seconds(1.0, 0.01, 384_000.0).is_err());
    }

    #[test]
    fn signal_range_excludes_centre_padding() {
        let config = FrameConfig::new(8, 2).expect("valid");
        // Frame 0 is centred on sample 0: its first 4 samples are padding.
        assert_eq!(config.signal_range(0, None), 4..8);
        assert_eq!(config.signal_range(1, None), 2..8);
        assert_eq!(config.signal_range(2, None), 0..8);
        assert_eq!(config.signal_range(9, None), 0..8);
        // An 11-sample clip: frame 5 covers samples 6..14, of which 6..11 exist.
        assert_eq!(config.signal_range(5, Some(11)), 0..5);
        // A 1-sample clip: frame 0 covers samples −4..4.
        assert_eq!(config.signal_range(0, Some(1)), 4..5);
        assert_eq!(config.signal_range(0, Some(0)), 4..4);
    }

    #[test]
    fn bad_configs_are_refused_with_their_values() {
        assert_eq!(
            FrameConfig::new(0, 1),
            Err(FramingError::FrameLength { frame_len: 0 })
        );
        assert_eq!(
            FrameConfig::new(16, 17),
            Err(FramingError::HopLength {
                hop_len: 17,
                frame_len: 16
            })
        );
        assert!(FrameConfig::new(MAX_FRAME_LEN + 1, 4).is_err());
    }
}
