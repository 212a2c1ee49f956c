//! Decoding: an audio file in, the engine's analysis signal (mid and side) out, one packet at a
//! time.
//!
//! Every format and codec Symphonia 0.6 reads is accepted (WAV with integer or float samples,
//! AIFF, CAF, FLAC, ALAC, MP3, Ogg Vorbis, AAC-LC in MP4/M4A or ADTS, MKV/WebM), at any sample rate
//! and channel count. Nothing is held beyond one decoded packet, so memory does not grow with the
//! file's length.
//!
//! Channels become the two signals the engine expects (see `weft_engine::level`):
//! mid = the mean of all channels, side = half the difference of the first two channels (zero for
//! mono). For stereo that is mid = (L+R)/2, side = (L−R)/2, the same as the plugin's ring.
//!
//! A file is refused, with the reason, when it cannot be opened, is empty, is not audio, uses a
//! codec Symphonia does not decode, is damaged or truncated, changes its sample rate or channel
//! count midway, or holds a sample that is not a finite number (NaN or ±∞ in a float file).

use std::fs::File;
use std::path::Path;
use symphonia::core::codecs::audio::{AudioCodecId, AudioDecoder, AudioDecoderOptions};
use symphonia::core::errors::Error as SymphoniaError;
use symphonia::core::formats::probe::Hint;
use symphonia::core::formats::{FormatOptions, FormatReader, TrackType};
use symphonia::core::io::{MediaSourceStream, MediaSourceStreamOptions};
use symphonia::core::meta::MetadataOptions;
use thiserror::Error;

/// The longest packet accepted, in frames per channel (about 22 s at 48 kHz). Real codecs use a
/// few thousand at most; a larger packet is a hostile or broken file and is refused rather than
/// buffered.
pub const MAX_PACKET_FRAMES: usize = 1 << 20;

/// How far a decoded stream may fall short of the length its header announces before it counts
/// as truncated, in frames. Lossy decoders trim encoder delay and padding, so the count can
/// differ from the header by part of a packet (common practice: one codec frame of slack).
const LENGTH_SLACK_FRAMES: u64 = 4096;

/// Why a file could not be decoded. Each reason completes the sentence "FILE: …".
#[derive(Debug, Error)]
pub enum DecodeError {
    /// The file could not be opened or its size read.
    #[error("cannot open the file")]
    Open {
        /// What the operating system said.
        #[source]
        source: std::io::Error,
    },
    /// The file has no bytes.
    #[error("the file is empty (0 bytes)")]
    Empty,
    /// No format reader recognised the file.
    #[error("not an audio file in a format Weft reads")]
    NotAudio {
        /// What the format probe said.
        #[source]
        source: SymphoniaError,
    },
    /// The file ends before its header does.
    #[error("the file ends inside its header (truncated, or not audio)")]
    HeaderCut,
    /// The container holds no audio track.
    #[error("the file holds no audio track")]
    NoAudioTrack,
    /// The audio track uses a codec or feature that cannot be decoded.
    #[error("unsupported audio ({what})")]
    Unsupported {
        /// The codec or feature, as far as it is known.
        what: String,
    },
    /// The stream ended before any sample.
    #[error("the file holds no audio samples")]
    NoSamples,
    /// The stream ended well before the length its header announces.
    #[error(
        "truncated: the audio stops after {decoded_s:.3} s of the {declared_s:.3} s its header announces"
    )]
    Truncated {
        /// Seconds decoded.
        decoded_s: f64,
        /// Seconds the header announces.
        declared_s: f64,
    },
    /// Reading failed partway (a truncated file or an I/O error).
    #[error("read failed after {at_s:.3} s of audio (truncated or unreadable)")]
    Read {
        /// Seconds decoded before the failure.
        at_s: f64,
        /// The underlying error.
        #[source]
        source: SymphoniaError,
    },
    /// The audio data is malformed.
    #[error("damaged audio data after {at_s:.3} s")]
    Damaged {
        /// Seconds decoded before the damage.
        at_s: f64,
        /// What the demuxer or decoder said.
        #[source]
        source: SymphoniaError,
    },
    /// The stream changes its sample rate or channel count.
    #[error(
        "the stream changes from {from_hz} Hz × {from_channels} ch to {to_hz} Hz × {to_channels} ch after {at_s:.3} s"
    )]
    FormatChange {
        /// Seconds decoded before the change.
        at_s: f64,
        /// Sample rate before, Hz.
        from_hz: u32,
        /// Channels before.
        from_channels: usize,
        /// Sample rate after, Hz.
        to_hz: u32,
        /// Channels after.
        to_channels: usize,
    },
    /// A packet is larger than [`MAX_PACKET_FRAMES`].
    #[error("a packet of {frames} frames exceeds the limit of {MAX_PACKET_FRAMES}")]
    PacketTooLarge {
        /// Frames in the packet.
        frames: usize,
    },
    /// A sample is NaN or infinite.
    #[error("sample at {at_s:.6} s (channel {channel}) is {value}, not a finite number")]
    NonFinite {
        /// Time of the sample, seconds.
        at_s: f64,
        /// Channel index, from 0.
        channel: usize,
        /// The sample's value.
        value: f32,
    },
}

/// What the file declares about its audio.
#[derive(Debug, Clone, PartialEq)]
pub struct SourceInfo {
    /// Sample rate, Hz.
    pub sample_rate_hz: u32,
    /// Channels.
    pub channels: usize,
    /// The container, as Symphonia names it (e.g. "wave", "flac", "isomp4").
    pub container: String,
    /// The codec, as Symphonia names it (e.g. "pcm_s16le", "mp3", "aac").
    pub codec: String,
    /// Frames per channel the header announces, when it does.
    pub declared_frames: Option<u64>,
}

/// One decoded block: mid and side samples, equally long.
pub type Block<'a> = (&'a [f32], &'a [f32]);

/// A file being decoded, packet by packet.
pub struct Source {
    format: Box<dyn FormatReader>,
    decoder: Box<dyn AudioDecoder>,
    track_id: u32,
    info: SourceInfo,
    interleaved: Vec<f32>,
    mid: Vec<f32>,
    side: Vec<f32>,
    /// A block decoded but not yet handed out (the first one, decoded by `open`).
    pending: bool,
    frames_out: u64,
    finished: bool,
}

impl Source {
    /// Opens and probes a file, and decodes its first packet (so the sample rate and channel
    /// count are known even when the container does not state them).
    pub fn open(path: &Path) -> Result<Self, DecodeError> {
        let file = File::open(path).map_err(|source| DecodeError::Open { source })?;
        let len = file
            .metadata()
            .map_err(|source| DecodeError::Open { source })?
            .len();
        if len == 0 {
            return Err(DecodeError::Empty);
        }
        let mss = MediaSourceStream::new(Box::new(file), MediaSourceStreamOptions::default());
        let mut hint = Hint::new();
        if let Some(ext) = path.extension().and_then(|e| e.to_str()) {
            hint.with_extension(ext);
        }
        let format = symphonia::default::get_probe()
            .probe(
                &hint,
                mss,
                FormatOptions::default(),
                MetadataOptions::default(),
            )
            .map_err(|source| match source {
                SymphoniaError::IoError(err) if err.kind() == std::io::ErrorKind::UnexpectedEof => {
                    DecodeError::HeaderCut
                }
                SymphoniaError::IoError(_) | SymphoniaError::Unsupported(_) => {
                    DecodeError::NotAudio { source }
                }
                other => DecodeError::Damaged {
                    at_s: 0.0,
                    source: other,
                },
            })?;
        let track = format
            .default_track(TrackType::Audio)
            .ok_or(DecodeError::NoAudioTrack)?;
        let params = track
            .codec_params
            .as_ref()
            .and_then(|p| p.audio())
            .ok_or(DecodeError::NoAudioTrack)?;
        let decoder = symphonia::default::get_codecs()
            .make_audio_decoder(params, &AudioDecoderOptions::default())
            .map_err(|_| DecodeError::Unsupported {
                what: format!("{} codec", codec_name(params.codec)),
            })?;
        let info = SourceInfo {
            sample_rate_hz: params.sample_rate.unwrap_or(0),
            channels: params.channels.as_ref().map_or(0, |c| c.count()),
            container: format.format_info().short_name.to_owned(),
            codec: decoder.codec_info().short_name.to_owned(),
            declared_frames: track.num_frames,
        };
        let track_id = track.id;
        let mut source = Self {
            format,
            decoder,
            track_id,
            info,
            interleaved: Vec::new(),
            mid: Vec::new(),
            side: Vec::new(),
            pending: false,
            frames_out: 0,
            finished: false,
        };
        source.pending = source.decode_next(true)?;
        if !source.pending {
            return Err(DecodeError::NoSamples);
        }
        Ok(source)
    }

    /// What the file declares (sample rate and channels as decoded).
    pub fn info(&self) -> &SourceInfo {
        &self.info
    }

    /// Frames per channel handed out so far.
    #[cfg(test)]
    pub fn frames_out(&self) -> u64 {
        self.frames_out
    }

    /// The next block of mid and side samples (equal lengths, never empty), or `None` at the end
    /// of the stream. The slices are valid until the next call.
    pub fn next_block(&mut self) -> Result<Option<Block<'_>>, DecodeError> {
        if !self.pending && !self.decode_next(false)? {
            return Ok(None);
        }
        self.pending = false;
        self.frames_out += self.mid.len() as u64;
        Ok(Some((&self.mid, &self.side)))
    }

    /// The capacity of the buffers the decoded audio passes through, in samples: the memory this
    /// source holds for audio, whatever the file's length.
    #[cfg(test)]
    pub fn buffered_capacity(&self) -> usize {
        self.interleaved.capacity() + self.mid.capacity() + self.side.capacity()
    }

    fn at_s(&self) -> f64 {
        if self.info.sample_rate_hz == 0 {
            0.0
        } else {
            self.frames_out as f64 / f64::from(self.info.sample_rate_hz)
        }
    }

    /// Decodes packets until one yields samples, into `self.mid`/`self.side`. Returns false at the
    /// end of the stream.
    fn decode_next(&mut self, first: bool) -> Result<bool, DecodeError> {
        if self.finished {
            return Ok(false);
        }
        loop {
            let packet = match self.format.next_packet() {
                Ok(Some(packet)) => packet,
                Ok(None) => return self.end_of_stream(),
                Err(SymphoniaError::IoError(err))
                    if err.kind() == std::io::ErrorKind::UnexpectedEof =>
                {
                    // Some readers signal the end of a stream this way; a header that announced
                    // more is checked in `end_of_stream`.
                    return self.end_of_stream();
                }
                Err(source @ SymphoniaError::IoError(_)) => {
                    return Err(DecodeError::Read {
                        at_s: self.at_s(),
                        source,
                    });
                }
                Err(SymphoniaError::Unsupported(what)) => {
                    return Err(DecodeError::Unsupported {
                        what: what.to_owned(),
                    });
                }
                Err(source) => {
                    return Err(DecodeError::Damaged {
                        at_s: self.at_s(),
                        source,
                    });
                }
            };
            if packet.track_id != self.track_id {
                continue;
            }
            let at_s = self.at_s();
            let buf = match self.decoder.decode(&packet) {
                Ok(buf) => buf,
                Err(SymphoniaError::Unsupported(what)) => {
                    return Err(DecodeError::Unsupported {
                        what: what.to_owned(),
                    });
                }
                Err(source @ SymphoniaError::IoError(_)) => {
                    return Err(DecodeError::Read { at_s, source });
                }
                Err(source) => return Err(DecodeError::Damaged { at_s, source }),
            };
            let frames = buf.frames();
            if frames == 0 {
                continue;
            }
            if frames > MAX_PACKET_FRAMES {
                return Err(DecodeError::PacketTooLarge { frames });
            }
            let rate = buf.spec().rate();
            let channels = buf.spec().channels().count();
            if first && self.frames_out == 0 && self.mid.is_empty() {
                self.info.sample_rate_hz = rate;
                self.info.channels = channels;
            } else if rate != self.info.sample_rate_hz || channels != self.info.channels {
                return Err(DecodeError::FormatChange {
                    at_s,
                    from_hz: self.info.sample_rate_hz,
                    from_channels: self.info.channels,
                    to_hz: rate,
                    to_channels: channels,
                });
            }
            if channels == 0 {
                return Err(DecodeError::Unsupported {
                    what: "a stream with no channels".to_owned(),
                });
            }
            buf.copy_to_vec_interleaved::<f32>(&mut self.interleaved);
            self.split(at_s)?;
            return Ok(true);
        }
    }

    fn end_of_stream(&mut self) -> Result<bool, DecodeError> {
        self.finished = true;
        if let Some(declared) = self.info.declared_frames {
            let decoded = self.frames_out
                + if self.pending {
                    self.mid.len() as u64
                } else {
                    0
                };
            if decoded > 0 && decoded + LENGTH_SLACK_FRAMES < declared {
                let rate = f64::from(self.info.sample_rate_hz.max(1));
                return Err(DecodeError::Truncated {
                    decoded_s: decoded as f64 / rate,
                    declared_s: declared as f64 / rate,
                });
            }
        }
        Ok(false)
    }

    /// Turns the interleaved packet into mid and side, refusing non-finite samples.
    fn split(&mut self, at_s: f64) -> Result<(), DecodeError> {
        let channels = self.info.channels;
        let rate = f64::from(self.info.sample_rate_hz.max(1));
        if let Some(i) = self.interleaved.iter().position(|v| !v.is_finite()) {
            return Err(DecodeError::NonFinite {
                at_s: at_s + (i / channels) as f64 / rate,
                channel: i % channels,
                value: self.interleaved[i],
            });
        }
        self.mid.clear();
        self.side.clear();
        match channels {
            1 => {
                self.mid.extend_from_slice(&self.interleaved);
                self.side.resize(self.mid.len(), 0.0);
            }
            2 => {
                // Halve before adding: finite samples near ±f32::MAX must not overflow to ±∞.
                for pair in self.interleaved.chunks_exact(2) {
                    self.mid.push(0.5 * pair[0] + 0.5 * pair[1]);
                    self.side.push(0.5 * pair[0] - 0.5 * pair[1]);
                }
            }
            n => {
                let scale = 1.0 / n as f64;
                for frame in self.interleaved.chunks_exact(n) {
                    let sum: f64 = frame.iter().map(|&x| f64::from(x)).sum();
                    self.mid.push((sum * scale) as f32);
                    self.side.push(0.5 * frame[0] - 0.5 * frame[1]);
                }
            }
        }
        Ok(())
    }
}

/// A readable name for codecs Symphonia recognises but may not decode.
fn codec_name(id: AudioCodecId) -> String {
    use symphonia::core::codecs::audio::well_known::*;
    let known = [
        (CODEC_ID_OPUS, "Opus"),
        (CODEC_ID_SPEEX, "Speex"),
        (CODEC_ID_MUSEPACK, "Musepack"),
        (CODEC_ID_AC3, "AC-3"),
        (CODEC_ID_EAC3, "E-AC-3"),
        (CODEC_ID_AC4, "AC-4"),
        (CODEC_ID_DCA, "DTS"),
        (CODEC_ID_WMA, "WMA"),
        (CODEC_ID_WAVPACK, "WavPack"),
        (CODEC_ID_MONKEYS_AUDIO, "Monkey's Audio"),
        (CODEC_ID_TTA, "TTA"),
        (CODEC_ID_TRUEHD, "TrueHD"),
        (CODEC_ID_ATRAC3, "ATRAC3"),
    ];
    known
        .iter()
        .find(|(known_id, _)| *known_id == id)
        .map_or_else(|| format!("codec id {id}"), |(_, name)| (*name).to_owned())
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng, rngs::SmallRng};

    /// Decodes a whole file into interleaved samples, as the decoder produced them before the
    /// mid/side split.
    fn decode_all(path: &Path) -> (SourceInfo, Vec<f32>) {
        let mut source = Source::open(path).expect("decodes");
        let info = source.info().clone();
        let mut out = Vec::new();
        while source.next_block().expect("block").is_some() {
            out.extend_from_slice(&source.interleaved);
        }
        (info, out)
    }

    fn write_wav(path: &Path, spec: hound::WavSpec, samples: &[f64]) {
        let mut w = hound::WavWriter::create(path, spec).expect("create");
        for &x in samples {
            match (spec.sample_format, spec.bits_per_sample) {
                (hound::SampleFormat::Float, _) => w.write_sample(x as f32).expect("write"),
                (hound::SampleFormat::Int, 16) => {
                    w.write_sample((x * 32767.0).round() as i16).expect("write")
                }
                (hound::SampleFormat::Int, bits) => {
                    let full = f64::from((1u32 << (bits - 1)) - 1);
                    w.write_sample((x * full).round() as i32).expect("write")
                }
            }
        }
        w.finalize().expect("finalize");
    }

    /// hound 3.5 (an independent WAV reader) reads the same samples, scaled to ±1 the way
    /// integer PCM is conventionally scaled (÷ 2^(bits−1)).
    fn read_with_hound(path: &Path) -> Vec<f32> {
        let mut r = hound::WavReader::open(path).expect("hound opens");
        let spec = r.spec();
        match spec.sample_format {
            hound::SampleFormat::Float => r.samples::<f32>().map(|s| s.expect("s")).collect(),
            hound::SampleFormat::Int => {
                let scale = 1.0 / f64::from(1u32 << (spec.bits_per_sample - 1));
                r.samples::<i32>()
                    .map(|s| (f64::from(s.expect("s")) * scale) as f32)
                    .collect()
            }
        }
    }

    #[test]
    fn decoded_wav_equals_hounds_reading_sample_for_sample() {
        let seed = 0x5eed_0001_u64;
        let dir = tempfile::tempdir().expect("tempdir");
        let mut rng = SmallRng::seed_from_u64(seed);
        for (bits, format) in [
            (16, hound::SampleFormat::Int),
            (24, hound::SampleFormat::Int),
            (32, hound::SampleFormat::Float),
        ] {
            for channels in [1_u16, 2] {
                for rate in [8_000_u32, 44_100, 96_000] {
                    let spec = hound::WavSpec {
                        channels,
                        sample_rate: rate,
                        bits_per_sample: bits,
                        sample_format: format,
                    };
                    // 0.3 s of seeded noise (odd length, so packets end mid-way).
                    let n = (rate as usize * 3 / 10 + 7) * usize::from(channels);
                    let x: Vec<f64> = (0..n).map(|_| rng.gen_range(-0.99..0.99)).collect();
                    let path = dir.path().join(format!("n{bits}-{channels}-{rate}.wav"));
                    write_wav(&path, spec, &x);
                    let (info, ours) = decode_all(&path);
                    let reference = read_with_hound(&path);
                    assert_eq!(info.sample_rate_hz, rate);
                    assert_eq!(info.channels, usize::from(channels));
                    assert_eq!(ours.len(), reference.len(), "seed {seed:#x} {path:?}");
                    for (i, (a, b)) in ours.iter().zip(&reference).enumerate() {
                        assert_eq!(
                            a.to_bits(),
                            b.to_bits(),
                            "seed {seed:#x} {path:?} sample {i}: {a} vs {b}"
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn many_channels_average_into_mid_and_pair_into_side() {
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("six.wav");
        let spec = hound::WavSpec {
            channels: 6,
            sample_rate: 48_000,
            bits_per_sample: 32,
            sample_format: hound::SampleFormat::Float,
        };
        // Channel c holds the constant (c + 1) / 8 on every frame.
        let frames = 1000;
        let x: Vec<f64> = (0..frames * 6)
            .map(|i| ((i % 6) + 1) as f64 / 8.0)
            .collect();
        write_wav(&path, spec, &x);
        let mut source = Source::open(&path).expect("decodes");
        let mut n = 0;
        while let Some((mid, side)) = source.next_block().expect("block") {
            for (&m, &s) in mid.iter().zip(side) {
                assert!((m - 21.0 / 48.0).abs() < 1e-6, "mid {m}");
                assert!((s - (-1.0 / 16.0)).abs() < 1e-7, "side {s}");
                n += 1;
            }
        }
        assert_eq!(n, frames);
    }

    #[test]
    fn buffers_stay_bounded_on_a_long_file() {
        // 10 minutes of 8 kHz mono: if decoding accumulated, the buffers would hold 4.8 M
        // samples; streaming keeps them at one packet.
        let dir = tempfile::tempdir().expect("tempdir");
        let path = dir.path().join("long.wav");
        let spec = hound::WavSpec {
            channels: 1,
            sample_rate: 8_000,
            bits_per_sample: 16,
            sample_format: hound::SampleFormat::Int,
        };
        let mut w = hound::WavWriter::create(&path, spec).expect("create");
        for i in 0..8_000 * 600 {
            w.write_sample(((i % 200) as i16 - 100) * 100)
                .expect("write");
        }
        w.finalize().expect("finalize");
        let mut source = Source::open(&path).expect("decodes");
        let mut max_capacity = 0;
        while source.next_block().expect("block").is_some() {
            max_capacity = max_capacity.max(source.buffered_capacity());
        }
        assert_eq!(source.frames_out(), 8_000 * 600);
        assert!(max_capacity <= 3 * 65_536, "buffers grew to {max_capacity}");
    }

    /// Replays the decode fuzz target's regression corpus (`tests/corpus/decode`, found by
    /// cargo-fuzz / libFuzzer): every file either fails with an error or decodes to finite
    /// samples, never a panic and never ±∞ from finite input.
    #[test]
    fn the_fuzz_regression_corpus_decodes_to_finite_samples_or_an_error() {
        let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/corpus/decode");
        let mut files = 0;
        for entry in std::fs::read_dir(&dir).expect("the corpus folder exists") {
            let path = entry.expect("readable entry").path();
            files += 1;
            let Ok(mut source) = Source::open(&path) else {
                continue;
            };
            while let Ok(Some((mid, side))) = source.next_block() {
                assert!(
                    mid.iter().chain(side.iter()).all(|v| v.is_finite()),
                    "{} decoded to a non-finite sample",
                    path.display()
                );
            }
        }
        assert!(files > 0, "no corpus files in {}", dir.display());
    }
}
