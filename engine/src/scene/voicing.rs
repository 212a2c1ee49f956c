//! How a family is played: which General MIDI programs (or drum-kit keys) voice it, over which
//! keys and velocities, and in which musical roles the composer uses it.
//!
//! Program and key numbers are those of the General MIDI 1 sound set (MIDI Manufacturers
//! Association, *General MIDI System Level 1*, 1991: programs 1–128 listed here 0-based, and the
//! percussion key map on channel 10, keys 35–81). Drum kits are the GS/GM2 kit numbers that
//! FluidR3_GM carries in bank 128 (0 standard, 8 room, 16 power, 24 electronic, 25 TR-808,
//! 32 jazz, 40 brush; from the SoundFont's preset list).

/// What sounds a family.
#[derive(Debug, Clone, PartialEq)]
pub enum VoiceSource {
    /// Pitched General MIDI programs (bank 0), 0-based.
    Programs(Vec<u8>),
    /// Drum-kit keys on the percussion channel, played with one of `kits`.
    Drums {
        /// Kit numbers (program changes on the percussion channel).
        kits: Vec<u8>,
        /// The percussion keys of this family.
        keys: Vec<u8>,
    },
    /// Recorded clips supplied by the caller (for example sung vowels, or a user's own
    /// recordings); the composer places excerpts of them.
    Clips,
}

/// The part a family plays in a composed piece.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    /// Kick-drum pattern: beats, with some syncopation.
    Kick,
    /// Back-beat: beats 2 and 4 with ghost notes.
    Backbeat,
    /// Time-keeping cymbals: eighths or quarters, crashes at phrase starts.
    Cymbal,
    /// Scattered hand percussion and tom fills.
    HandPercussion,
    /// A bass line on chord roots and fifths.
    Bass,
    /// Chords comped on beats.
    Chords,
    /// A melodic line (stepwise, with rests).
    Line,
    /// Long held chords.
    Pad,
}

/// One family's voicing.
#[derive(Debug, Clone, PartialEq)]
pub struct FamilyVoicing {
    /// The family's name, as in the palette.
    pub family: String,
    /// What sounds it.
    pub source: VoiceSource,
    /// Lowest and highest MIDI key of pitched parts.
    pub keys: (u8, u8),
    /// Softest and loudest MIDI velocity.
    pub velocities: (u8, u8),
    /// The roles it may take in a piece (one is drawn per piece).
    pub roles: Vec<Role>,
}

fn programs(family: &str, p: &[u8], keys: (u8, u8), roles: &[Role]) -> FamilyVoicing {
    FamilyVoicing {
        family: family.to_owned(),
        source: VoiceSource::Programs(p.to_vec()),
        keys,
        velocities: (35, 127),
        roles: roles.to_vec(),
    }
}

fn drums(family: &str, keys: &[u8], role: Role) -> FamilyVoicing {
    FamilyVoicing {
        family: family.to_owned(),
        source: VoiceSource::Drums {
            kits: vec![0, 8, 16, 24, 25, 32, 40],
            keys: keys.to_vec(),
        },
        keys: (35, 81),
        velocities: (35, 127),
        roles: vec![role],
    }
}

/// The General MIDI voicing of the default palette's 16 families (names as in
/// [`crate::palette::DEFAULT_FAMILIES`]). Ranges follow the instruments' usual written ranges
/// (common practice), clipped to where the SoundFont's samples sound natural.
///
/// *voice* is voiced by the choir programs (52 Choir Aahs, 53 Voice Oohs, 54 Synth Voice) here;
/// callers that have recorded or synthesised vowels add them as clips (see
/// [`crate::scene::ClipBank`]).
pub fn general_midi_voicings() -> Vec<FamilyVoicing> {
    use Role::{Bass, Chords, Line, Pad};
    vec![
        drums("kick", &[35, 36], Role::Kick),
        drums("snare", &[37, 38, 40], Role::Backbeat),
        drums(
            "cymbals",
            &[42, 44, 46, 49, 51, 52, 53, 55, 57, 59],
            Role::Cymbal,
        ),
        drums(
            "toms & hand percussion",
            &[
                41, 43, 45, 47, 48, 50, 39, 54, 56, 60, 61, 62, 63, 64, 65, 66, 69, 70, 75, 76, 77,
            ],
            Role::HandPercussion,
        ),
        programs("bass", &[32, 33, 34, 35, 36, 37, 38, 39], (28, 55), &[Bass]),
        programs(
            "piano",
            &[0, 1, 2, 3, 4, 5, 6, 7],
            (33, 96),
            &[Chords, Line],
        ),
        programs("organ", &[16, 17, 18, 19, 20], (36, 84), &[Chords, Pad]),
        programs(
            "clean guitar",
            &[24, 25, 26, 27, 28],
            (40, 79),
            &[Chords, Line],
        ),
        programs("driven guitar", &[29, 30], (40, 79), &[Chords, Line]),
        programs(
            "bowed strings",
            &[40, 41, 42, 43, 44, 48, 49, 110],
            (36, 96),
            &[Line, Pad],
        ),
        programs(
            "brass",
            &[56, 57, 58, 59, 60, 61, 62, 63],
            (40, 82),
            &[Line, Chords],
        ),
        programs(
            "reeds & flutes",
            &[64, 65, 66, 67, 68, 69, 70, 71, 72, 73, 74, 75, 21, 22],
            (48, 96),
            &[Line],
        ),
        programs("voice", &[52, 53, 54], (48, 79), &[Line, Pad]),
        programs(
            "synth lead",
            &[80, 81, 82, 83, 84, 85, 86, 87],
            (48, 91),
            &[Line],
        ),
        programs(
            "synth pad",
            &[88, 89, 90, 91, 92, 93, 94, 95, 50, 51],
            (40, 84),
            &[Pad, Chords],
        ),
        programs(
            "mallets",
            &[8, 9, 10, 11, 12, 13, 14, 15, 108],
            (53, 96),
            &[Line, Chords],
        ),
    ]
}
