//! A seeded composer: short pieces for any set of families, in the roles a band gives them
//! (kick pattern, back-beat, cymbals, bass line, comped chords, lines, pads), over one
//! chord progression, plus note studies that walk each family's range and dynamics.
//!
//! Same seed, same families, same duration: the same score, on every machine.

use super::rng::SceneRng;
use super::voicing::{FamilyVoicing, Role, VoiceSource};

/// One MIDI note of a part.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NoteEvent {
    /// Note-on time, seconds from the start of the piece.
    pub start_s: f64,
    /// Note-off time, seconds.
    pub end_s: f64,
    /// MIDI key.
    pub key: u8,
    /// MIDI velocity, 1–127.
    pub velocity: u8,
}

/// One excerpt of a recorded clip placed in a part.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct ClipEvent {
    /// Where the excerpt starts in the piece, seconds.
    pub start_s: f64,
    /// Which clip of the family's bank.
    pub clip: usize,
    /// Where the excerpt starts inside the clip, as a fraction 0–1 of the room left after the
    /// excerpt (so it always fits).
    pub offset_frac: f64,
    /// Length of the excerpt, seconds.
    pub len_s: f64,
    /// Linear gain of the excerpt.
    pub gain: f32,
}

/// How a part is sounded.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PartSound {
    /// A General MIDI program (0-based) on a melodic channel.
    Program(u8),
    /// A drum kit on the percussion channel.
    Kit(u8),
    /// Excerpts of the family's recorded clips.
    Clips,
}

/// The notes (or clip excerpts) one family plays in a piece.
#[derive(Debug, Clone, PartialEq)]
pub struct Part {
    /// Index of the family in the voicing list the score was composed from.
    pub family: usize,
    /// How the part is sounded.
    pub sound: PartSound,
    /// MIDI notes (for programs and kits).
    pub notes: Vec<NoteEvent>,
    /// Clip excerpts (for [`PartSound::Clips`]).
    pub clips: Vec<ClipEvent>,
}

/// A composed piece.
#[derive(Debug, Clone, PartialEq)]
pub struct Score {
    /// Length, seconds (notes are cut there; release tails are rendered up to it).
    pub duration_s: f64,
    /// Tempo, beats per minute.
    pub tempo_bpm: f64,
    /// One or more parts per family.
    pub parts: Vec<Part>,
}

/// Composes pieces from a list of family voicings.
#[derive(Debug, Clone)]
pub struct Composer {
    voicings: Vec<FamilyVoicing>,
    clips_per_family: Vec<usize>,
    clip_probability: f64,
}

const MAJOR: [i32; 7] = [0, 2, 4, 5, 7, 9, 11];
const MINOR: [i32; 7] = [0, 2, 3, 5, 7, 8, 10];
const PROGRESSIONS: [[usize; 4]; 6] = [
    [0, 4, 5, 3],
    [0, 5, 3, 4],
    [5, 3, 0, 4],
    [0, 3, 4, 0],
    [1, 4, 0, 0],
    [0, 3, 5, 4],
];

/// The harmony and pulse shared by every part of a piece.
struct Frame {
    beat_s: f64,
    bars: usize,
    root: i32,
    scale: [i32; 7],
    progression: [usize; 4],
}

impl Frame {
    fn chord_degrees(&self, bar: usize) -> usize {
        self.progression[bar % 4]
    }

    /// Pitch class of scale degree `d` (any non-negative integer).
    fn pc(&self, d: usize) -> i32 {
        (self.root + self.scale[d % 7]).rem_euclid(12)
    }

    /// Whether MIDI key `key` is in the scale.
    fn in_scale(&self, key: i32) -> bool {
        let pc = (key - self.root).rem_euclid(12);
        self.scale.contains(&pc)
    }
}

/// The key of pitch class `pc` nearest to `target` inside `lo..=hi` (or nearest to the range).
fn place(pc: i32, target: i32, lo: i32, hi: i32) -> i32 {
    let mut best = target;
    let mut best_d = i32::MAX;
    for octave in -1..11 {
        let k = pc + 12 * octave;
        let outside = if k < lo {
            lo - k
        } else if k > hi {
            k - hi
        } else {
            0
        };
        let d = 100 * outside + (k - target).abs();
        if d < best_d {
            best_d = d;
            best = k;
        }
    }
    best.clamp(0, 127)
}

impl Composer {
    /// A composer over `voicings`; `clips_per_family[i]` says how many recorded clips family
    /// `i` has (0: none), and `clip_probability` how often a family that has both programs and
    /// clips is sounded by its clips.
    pub fn new(
        voicings: Vec<FamilyVoicing>,
        clips_per_family: Vec<usize>,
        clip_probability: f64,
    ) -> Self {
        let mut clips_per_family = clips_per_family;
        clips_per_family.resize(voicings.len(), 0);
        Self {
            voicings,
            clips_per_family,
            clip_probability,
        }
    }

    /// The voicings this composer plays.
    pub fn voicings(&self) -> &[FamilyVoicing] {
        &self.voicings
    }

    /// Composes `duration_s` seconds for the families at `families` (indices into the
    /// voicings). Deterministic in `seed`.
    pub fn compose(&self, seed: u64, families: &[usize], duration_s: f64) -> Score {
        let mut rng = SceneRng::derive(seed, 1);
        let tempo_bpm = rng.uniform(72.0, 150.0);
        let beat_s = 60.0 / tempo_bpm;
        let bars = (duration_s / (4.0 * beat_s)).ceil() as usize + 1;
        let frame = Frame {
            beat_s,
            bars,
            root: rng.int(0, 11) as i32,
            scale: if rng.chance(0.5) { MAJOR } else { MINOR },
            progression: PROGRESSIONS[rng.index(PROGRESSIONS.len())],
        };
        let mut parts = Vec::new();
        for (n, &family) in families.iter().enumerate() {
            let Some(v) = self.voicings.get(family) else {
                continue;
            };
            let mut prng = SceneRng::derive(seed, 100 + n as u64);
            let clips = self.clips_per_family[family];
            let use_clips = clips > 0
                && (matches!(v.source, VoiceSource::Clips) || prng.chance(self.clip_probability));
            if use_clips {
                parts.push(Part {
                    family,
                    sound: PartSound::Clips,
                    notes: Vec::new(),
                    clips: clip_part(&mut prng, clips, duration_s),
                });
                continue;
            }
            let sound = match &v.source {
                VoiceSource::Programs(p) if !p.is_empty() => {
                    PartSound::Program(p[prng.index(p.len())])
                }
                VoiceSource::Drums { kits, .. } if !kits.is_empty() => {
                    PartSound::Kit(kits[prng.index(kits.len())])
                }
                _ => continue,
            };
            let role = v.roles[prng
                .index(v.roles.len().max(1))
                .min(v.roles.len().saturating_sub(1))];
            let level = prng.uniform(f64::from(v.velocities.0) + 10.0, f64::from(v.velocities.1));
            let mut notes = match role {
                Role::Kick | Role::Backbeat | Role::Cymbal | Role::HandPercussion => {
                    drum_part(&mut prng, &frame, v, role, level)
                }
                Role::Bass => bass_part(&mut prng, &frame, v, level),
                Role::Chords => chord_part(&mut prng, &frame, v, level, false),
                Role::Pad => chord_part(&mut prng, &frame, v, level, true),
                Role::Line => line_part(&mut prng, &frame, v, level),
            };
            notes.retain(|e| e.start_s < duration_s);
            for e in &mut notes {
                e.end_s = e.end_s.min(duration_s);
            }
            parts.push(Part {
                family,
                sound,
                notes,
                clips: Vec::new(),
            });
        }
        Score {
            duration_s,
            tempo_bpm,
            parts,
        }
    }

    /// A note study of family `family`: every `key_step`-th key of its range (every key of a
    /// drum family) at each of `velocities`, for every program or kit of the family, one note
    /// at a time (`note_s` on, `gap_s` off). The material its atoms are learned from.
    /// Returns `None` for a family voiced only by clips.
    pub fn study(
        &self,
        family: usize,
        key_step: usize,
        velocities: &[u8],
        note_s: f64,
        gap_s: f64,
    ) -> Option<Score> {
        let v = self.voicings.get(family)?;
        let mut parts = Vec::new();
        let mut t = 0.0;
        let key_step = key_step.max(1);
        let sounds: Vec<(PartSound, Vec<u8>)> = match &v.source {
            VoiceSource::Programs(p) => {
                let keys: Vec<u8> = (v.keys.0..=v.keys.1).step_by(key_step).collect();
                p.iter()
                    .map(|&p| (PartSound::Program(p), keys.clone()))
                    .collect()
            }
            VoiceSource::Drums { kits, keys } => kits
                .iter()
                .map(|&k| (PartSound::Kit(k), keys.clone()))
                .collect(),
            VoiceSource::Clips => return None,
        };
        for (sound, keys) in sounds {
            let mut notes = Vec::new();
            for &key in &keys {
                for &velocity in velocities {
                    notes.push(NoteEvent {
                        start_s: t,
                        end_s: t + note_s,
                        key,
                        velocity: velocity.clamp(1, 127),
                    });
                    t += note_s + gap_s;
                }
            }
            parts.push(Part {
                family,
                sound,
                notes,
                clips: Vec::new(),
            });
        }
        Some(Score {
            duration_s: t,
            tempo_bpm: 120.0,
            parts,
        })
    }
}

fn vel(rng: &mut SceneRng, level: f64, spread: f64) -> u8 {
    (level + spread * (rng.unit() * 2.0 - 1.0))
        .round()
        .clamp(1.0, 127.0) as u8
}

fn drum_part(
    rng: &mut SceneRng,
    frame: &Frame,
    v: &FamilyVoicing,
    role: Role,
    level: f64,
) -> Vec<NoteEvent> {
    let keys: &[u8] = match &v.source {
        VoiceSource::Drums { keys, .. } => keys,
        _ => &[],
    };
    if keys.is_empty() {
        return Vec::new();
    }
    let step_s = frame.beat_s / 4.0;
    let mut out = Vec::new();
    let hit = |out: &mut Vec<NoteEvent>, bar: usize, step: usize, key: u8, velocity: u8| {
        let start_s = (bar * 16 + step) as f64 * step_s;
        out.push(NoteEvent {
            start_s,
            end_s: start_s + 0.2,
            key,
            velocity,
        });
    };
    match role {
        Role::Kick => {
            let key = keys[rng.index(keys.len())];
            let four = rng.chance(0.4);
            for bar in 0..frame.bars {
                for step in 0..16 {
                    let on = if four {
                        step % 4 == 0
                    } else {
                        step == 0
                            || step == 8
                            || ([3, 6, 10, 14].contains(&step) && rng.chance(0.25))
                    };
                    if on {
                        let v = vel(rng, level, 10.0);
                        hit(&mut out, bar, step, key, v);
                    }
                }
            }
        }
        Role::Backbeat => {
            let key = keys[rng.index(keys.len())];
            for bar in 0..frame.bars {
                for step in 0..16 {
                    if step == 4 || step == 12 {
                        let v = vel(rng, level, 10.0);
                        hit(&mut out, bar, step, key, v);
                    } else if step % 2 == 1 && rng.chance(0.08) {
                        let v = vel(rng, level * 0.45, 8.0);
                        hit(&mut out, bar, step, key, v);
                    }
                }
            }
        }
        Role::Cymbal => {
            let key = keys[rng.index(keys.len())];
            let every = [1, 2, 2, 4][rng.index(4)];
            let crash = keys[rng.index(keys.len())];
            for bar in 0..frame.bars {
                if bar % 4 == 0 && rng.chance(0.5) {
                    let v = vel(rng, level, 8.0);
                    hit(&mut out, bar, 0, crash, v);
                }
                for step in (0..16).step_by(every) {
                    let accent = if step % 4 == 0 { 1.0 } else { 0.8 };
                    let v = vel(rng, level * accent, 10.0);
                    hit(&mut out, bar, step, key, v);
                }
            }
        }
        _ => {
            let mut chosen: Vec<u8> = keys.to_vec();
            rng.shuffle(&mut chosen);
            chosen.truncate(rng.int(1, 3) as usize);
            let density = rng.uniform(0.15, 0.45);
            for bar in 0..frame.bars {
                for step in 0..16 {
                    if rng.chance(density) {
                        let key = chosen[rng.index(chosen.len())];
                        let v = vel(rng, level, 15.0);
                        hit(&mut out, bar, step, key, v);
                    }
                }
            }
        }
    }
    out
}

fn bass_part(rng: &mut SceneRng, frame: &Frame, v: &FamilyVoicing, level: f64) -> Vec<NoteEvent> {
    let (lo, hi) = (i32::from(v.keys.0), i32::from(v.keys.1));
    let target = lo + rng.int(3, 12) as i32;
    let per_bar = [2usize, 4, 4, 8][rng.index(4)];
    let len_beats = 4.0 / per_bar as f64;
    let mut out = Vec::new();
    for bar in 0..frame.bars {
        let d = frame.chord_degrees(bar);
        for i in 0..per_bar {
            let degree = if i > 0 && rng.chance(0.25) { d + 4 } else { d };
            let key = place(frame.pc(degree), target, lo, hi);
            let start_s = (bar as f64 * 4.0 + i as f64 * len_beats) * frame.beat_s;
            let legato = rng.uniform(0.6, 0.95);
            out.push(NoteEvent {
                start_s,
                end_s: start_s + len_beats * frame.beat_s * legato,
                key: key as u8,
                velocity: vel(rng, level, 12.0),
            });
        }
    }
    out
}

fn chord_part(
    rng: &mut SceneRng,
    frame: &Frame,
    v: &FamilyVoicing,
    level: f64,
    pad: bool,
) -> Vec<NoteEvent> {
    let (lo, hi) = (i32::from(v.keys.0), i32::from(v.keys.1));
    let target = rng.int(i64::from(lo) + 5, i64::from(hi.max(lo + 6)) - 5) as i32;
    let voices = rng.int(2, 4) as usize;
    let hits_per_bar: usize = if pad { 1 } else { [1, 2, 4][rng.index(3)] };
    let mut out = Vec::new();
    let bars_per_chord = if pad && rng.chance(0.5) { 2 } else { 1 };
    let mut bar = 0;
    while bar < frame.bars {
        let d = frame.chord_degrees(bar / bars_per_chord);
        let span_beats = 4.0 * bars_per_chord as f64 / hits_per_bar as f64;
        for h in 0..hits_per_bar {
            let start_s = (bar as f64 * 4.0 + h as f64 * span_beats) * frame.beat_s;
            let legato = if pad { 1.0 } else { rng.uniform(0.5, 0.95) };
            for i in 0..voices {
                let key = place(frame.pc(d + 2 * i), target + 4 * i as i32 - 4, lo, hi);
                out.push(NoteEvent {
                    start_s,
                    end_s: start_s + span_beats * frame.beat_s * legato,
                    key: key as u8,
                    velocity: vel(rng, level, 10.0),
                });
            }
        }
        bar += bars_per_chord;
    }
    out
}

fn line_part(rng: &mut SceneRng, frame: &Frame, v: &FamilyVoicing, level: f64) -> Vec<NoteEvent> {
    let (lo, hi) = (i32::from(v.keys.0), i32::from(v.keys.1));
    let mut key = rng.int(i64::from(lo) + 3, i64::from(hi.max(lo + 4)) - 3) as i32;
    let mut t_beats = 0.0;
    let total_beats = frame.bars as f64 * 4.0;
    let mut out = Vec::new();
    while t_beats < total_beats {
        let len = [0.5, 0.5, 1.0, 1.0, 1.5, 2.0, 3.0][rng.index(7)];
        if rng.chance(0.15) {
            t_beats += len;
            continue;
        }
        // Stepwise walk in the scale, pulled back into range.
        let mut step = rng.int(-3, 3) as i32;
        if key + step < lo || key + step > hi {
            step = -step;
        }
        key = (key + step).clamp(lo, hi);
        while !frame.in_scale(key) && key < hi {
            key += 1;
        }
        let start_s = t_beats * frame.beat_s;
        out.push(NoteEvent {
            start_s,
            end_s: start_s + len * frame.beat_s * rng.uniform(0.7, 1.0),
            key: key as u8,
            velocity: vel(rng, level, 14.0),
        });
        t_beats += len;
    }
    out
}

fn clip_part(rng: &mut SceneRng, clips: usize, duration_s: f64) -> Vec<ClipEvent> {
    let mut out = Vec::new();
    let mut t = rng.uniform(0.0, 0.5);
    let occupancy = rng.uniform(0.6, 1.0);
    while t < duration_s {
        let len_s = rng.uniform(1.0, 4.0);
        out.push(ClipEvent {
            start_s: t,
            clip: rng.index(clips),
            offset_frac: rng.unit(),
            len_s,
            gain: 10f32.powf(rng.uniform(-6.0, 0.0) as f32 / 20.0),
        });
        t += len_s + len_s * (1.0 - occupancy) / occupancy;
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::scene::voicing::general_midi_voicings;

    #[test]
    fn same_seed_same_score_and_notes_stay_in_range() {
        let c = Composer::new(general_midi_voicings(), vec![], 0.0);
        let fams: Vec<usize> = (0..16).collect();
        let a = c.compose(42, &fams, 8.0);
        assert_eq!(a, c.compose(42, &fams, 8.0));
        assert_ne!(a, c.compose(43, &fams, 8.0));
        assert_eq!(a.parts.len(), 16);
        for p in &a.parts {
            let v = &c.voicings()[p.family];
            assert!(!p.notes.is_empty(), "{} has no notes", v.family);
            for n in &p.notes {
                assert!(n.start_s >= 0.0 && n.start_s < 8.0 && n.end_s <= 8.0);
                assert!((1..=127).contains(&n.velocity));
                if let PartSound::Program(_) = p.sound {
                    assert!(
                        (v.keys.0..=v.keys.1).contains(&n.key),
                        "{}: {}",
                        v.family,
                        n.key
                    );
                }
            }
        }
    }

    #[test]
    fn study_walks_range_and_velocities() {
        let c = Composer::new(general_midi_voicings(), vec![], 0.0);
        let s = c
            .study(4, 3, &[40, 80, 120], 0.5, 0.2)
            .expect("bass has programs");
        // 8 bass programs, keys 28..=55 every 3rd (10 keys), 3 velocities.
        assert_eq!(s.parts.len(), 8);
        assert!(s.parts.iter().all(|p| p.notes.len() == 30));
        let last = s.parts.last().and_then(|p| p.notes.last()).expect("notes");
        assert!((s.duration_s - (last.end_s + 0.2)).abs() < 1e-9);
    }
}
