//! Rendering scores to per-family stems with a SoundFont (rustysynth 1.3.8), and placing
//! recorded clips.
//!
//! The engine does no file I/O: the SoundFont arrives as any `Read` (or bytes) and clips as
//! sample buffers the caller decoded.

use super::SceneError;
use super::composer::{Part, PartSound, Score};
use rustysynth::{SoundFont, Synthesizer, SynthesizerSettings};
use std::io::Read;
use std::sync::Arc;

/// The MIDI channel used for pitched parts.
const MELODIC_CHANNEL: i32 = 0;
/// The General MIDI percussion channel (channel 10, 0-based 9).
const PERCUSSION_CHANNEL: i32 = 9;
/// Fade applied to both ends of a clip excerpt, seconds (common practice against clicks).
const CLIP_FADE_S: f64 = 0.01;

/// Recorded clips per family, at the renderer's sample rate.
#[derive(Debug, Clone, Default)]
pub struct ClipBank {
    clips: Vec<Vec<Vec<f32>>>,
}

impl ClipBank {
    /// An empty bank for `families` families.
    pub fn new(families: usize) -> Self {
        Self {
            clips: vec![Vec::new(); families],
        }
    }

    /// Adds a clip (mono samples at the renderer's rate) to `family`'s clips; ignored for
    /// an empty clip or an unknown family.
    pub fn add(&mut self, family: usize, samples: Vec<f32>) {
        if let Some(c) = self.clips.get_mut(family)
            && !samples.is_empty()
        {
            c.push(samples);
        }
    }

    /// How many clips each family has.
    pub fn counts(&self) -> Vec<usize> {
        self.clips.iter().map(Vec::len).collect()
    }

    /// The clips of `family`.
    pub fn family(&self, family: usize) -> &[Vec<f32>] {
        self.clips.get(family).map_or(&[], Vec::as_slice)
    }
}

/// Places the clip excerpts of a [`PartSound::Clips`] part into a signal of `duration_s` at
/// `sample_rate_hz` (clips must be at that rate), with short fades at both ends of each
/// excerpt. Needs no SoundFont.
pub fn place_clips(
    part: &Part,
    duration_s: f64,
    sample_rate_hz: u32,
    clips: &ClipBank,
) -> Vec<f32> {
    let sr = f64::from(sample_rate_hz);
    let n = (duration_s * sr).round().max(0.0) as usize;
    let mut out = vec![0.0_f32; n];
    let bank = clips.family(part.family);
    for e in &part.clips {
        let Some(clip) = bank.get(e.clip) else {
            continue;
        };
        let len = ((e.len_s * sr) as usize).min(clip.len());
        if len == 0 {
            continue;
        }
        let offset = ((clip.len() - len) as f64 * e.offset_frac.clamp(0.0, 1.0)) as usize;
        let start = (e.start_s * sr) as usize;
        let fade = ((CLIP_FADE_S * sr) as usize).max(1).min(len / 2 + 1);
        for i in 0..len {
            let Some(o) = out.get_mut(start + i) else {
                break;
            };
            let ramp = (i.min(len - 1 - i) as f32 / fade as f32).min(1.0);
            *o += e.gain * ramp * clip[offset + i];
        }
    }
    out
}

/// Renders parts of a [`Score`] from one SoundFont.
#[derive(Clone)]
pub struct SoundFontRenderer {
    font: Arc<SoundFont>,
    sample_rate_hz: u32,
}

impl std::fmt::Debug for SoundFontRenderer {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("SoundFontRenderer")
            .field("sample_rate_hz", &self.sample_rate_hz)
            .finish_non_exhaustive()
    }
}

impl SoundFontRenderer {
    /// Loads an SF2 SoundFont from `reader` for rendering at `sample_rate_hz`
    /// (16 000–192 000 Hz, rustysynth's range).
    pub fn new(reader: &mut impl Read, sample_rate_hz: u32) -> Result<Self, SceneError> {
        if !(16_000..=192_000).contains(&sample_rate_hz) {
            return Err(SceneError::SampleRate { sample_rate_hz });
        }
        let font = SoundFont::new(reader).map_err(|e| SceneError::SoundFont {
            reason: e.to_string(),
        })?;
        Ok(Self {
            font: Arc::new(font),
            sample_rate_hz,
        })
    }

    /// The rendering sample rate, Hz.
    pub fn sample_rate_hz(&self) -> u32 {
        self.sample_rate_hz
    }

    /// The SoundFont's name, as its INFO chunk gives it.
    pub fn soundfont_name(&self) -> String {
        self.font.get_info().get_bank_name().to_owned()
    }

    /// Renders one part, dry (no reverb or chorus), as a mono signal of the score's length:
    /// the mean of rustysynth's left and right outputs.
    pub fn render_part(
        &self,
        part: &Part,
        duration_s: f64,
        clips: &ClipBank,
    ) -> Result<Vec<f32>, SceneError> {
        let sr = f64::from(self.sample_rate_hz);
        let n = (duration_s * sr).round().max(0.0) as usize;
        if part.sound == PartSound::Clips {
            return Ok(place_clips(part, duration_s, self.sample_rate_hz, clips));
        }
        let mut settings = SynthesizerSettings::new(self.sample_rate_hz as i32);
        settings.enable_reverb_and_chorus = false;
        settings.maximum_polyphony = 128;
        let mut synth = Synthesizer::new(&self.font, &settings).map_err(|e| SceneError::Synth {
            reason: e.to_string(),
        })?;
        let channel = match part.sound {
            PartSound::Program(p) => {
                synth.process_midi_message(MELODIC_CHANNEL, 0xC0, i32::from(p), 0);
                MELODIC_CHANNEL
            }
            PartSound::Kit(k) => {
                synth.process_midi_message(PERCUSSION_CHANNEL, 0xC0, i32::from(k), 0);
                PERCUSSION_CHANNEL
            }
            PartSound::Clips => MELODIC_CHANNEL,
        };
        // (sample, is_on, key, velocity); offs sort before ons at the same sample.
        let mut events: Vec<(usize, bool, i32, i32)> = Vec::with_capacity(part.notes.len() * 2);
        for e in &part.notes {
            events.push((
                (e.start_s * sr) as usize,
                true,
                i32::from(e.key),
                i32::from(e.velocity),
            ));
            events.push(((e.end_s * sr) as usize, false, i32::from(e.key), 0));
        }
        events.sort_by_key(|&(t, on, k, _)| (t, on, k));
        let mut left = vec![0.0_f32; n];
        let mut right = vec![0.0_f32; n];
        let mut at = 0;
        for (t, on, key, velocity) in events {
            let t = t.min(n);
            if t > at {
                synth.render(&mut left[at..t], &mut right[at..t]);
                at = t;
            }
            if on {
                synth.note_on(channel, key, velocity);
            } else {
                synth.note_off(channel, key);
            }
        }
        if n > at {
            synth.render(&mut left[at..n], &mut right[at..n]);
        }
        Ok(left
            .iter()
            .zip(&right)
            .map(|(l, r)| 0.5 * (l + r))
            .collect())
    }

    /// Renders every part of `score` and sums them per family: `stems[f]` is family `f`'s
    /// stem (`None` when the score has no part for it). `families` is the number of families.
    pub fn render_stems(
        &self,
        score: &Score,
        families: usize,
        clips: &ClipBank,
    ) -> Result<Vec<Option<Vec<f32>>>, SceneError> {
        let mut stems: Vec<Option<Vec<f32>>> = vec![None; families];
        for part in &score.parts {
            let x = self.render_part(part, score.duration_s, clips)?;
            let Some(slot) = stems.get_mut(part.family) else {
                continue;
            };
            match slot {
                Some(s) => s.iter_mut().zip(&x).for_each(|(a, b)| *a += b),
                None => *slot = Some(x),
            }
        }
        Ok(stems)
    }
}
