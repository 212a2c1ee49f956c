//! Scenes with exact ground truth: a seeded composer, a SoundFont renderer for per-family
//! stems, and mixes whose true family shares are known from the stems' energies.
//!
//! Used to learn palettes (note studies and training mixes), to check them (`weft palette
//! check` renders held-out mixes) and for the Lantern Hall demo (see [`lantern_hall_families`]).
//!
//! ```no_run
//! # fn demo(sf2: &[u8]) -> Result<(), weft_engine::scene::SceneError> {
//! use weft_engine::scene::{ClipBank, Composer, Mix, SoundFontRenderer, general_midi_voicings};
//! let renderer = SoundFontRenderer::new(&mut &sf2[..], 48_000)?;
//! let composer = Composer::new(general_midi_voicings(), vec![], 0.0);
//! let score = composer.compose(7, &[0, 4, 5], 6.0);
//! let stems = renderer.render_stems(&score, 16, &ClipBank::new(16))?;
//! let members: Vec<(usize, &[f32])> = stems
//!     .iter()
//!     .enumerate()
//!     .filter_map(|(f, s)| s.as_deref().map(|s| (f, s)))
//!     .collect();
//! let mix = Mix::new(&members, &[0.0, -6.0, -12.0], 48_000);
//! let truth = mix.truth_between(0.0, 1.0, 16);
//! # let _ = truth; Ok(()) }
//! ```

mod composer;
mod mix;
mod render;
mod rng;
mod voicing;

pub use composer::{ClipEvent, Composer, NoteEvent, Part, PartSound, Score};
pub use mix::{ENERGY_BLOCK_S, MIX_PEAK_LIMIT, Mix, MixSpec, STEM_REFERENCE_RMS};
pub use render::{ClipBank, SoundFontRenderer, place_clips};
pub use rng::SceneRng;
pub use voicing::{FamilyVoicing, Role, VoiceSource, general_midi_voicings};

use thiserror::Error;

/// Why a scene could not be rendered.
#[derive(Debug, Clone, PartialEq, Eq, Error)]
pub enum SceneError {
    /// The SoundFont could not be read (rustysynth's reason; SF3 files are refused).
    #[error("the SoundFont could not be read: {reason}")]
    SoundFont {
        /// rustysynth's message.
        reason: String,
    },
    /// The rendering sample rate is outside rustysynth's 16 000–192 000 Hz.
    #[error("rendering sample rate {sample_rate_hz} Hz is outside 16000..=192000 Hz")]
    SampleRate {
        /// The refused rate, Hz.
        sample_rate_hz: u32,
    },
    /// The synthesiser refused its settings.
    #[error("the synthesiser could not start: {reason}")]
    Synth {
        /// rustysynth's message.
        reason: String,
    },
}

/// The families of the three Lantern Hall set styles (ARCHITECTURE.md's demo scenario), by the
/// default palette's family names: `parlour`, `dockside` and `neon`. `None` for another name.
pub fn lantern_hall_families(style: &str) -> Option<&'static [&'static str]> {
    match style {
        "parlour" => Some(&["piano", "bowed strings", "reeds & flutes", "voice"]),
        "dockside" => Some(&["kick", "snare", "cymbals", "bass", "driven guitar", "brass"]),
        "neon" => Some(&["synth pad", "synth lead", "kick", "bass", "voice"]),
        _ => None,
    }
}
