//! Palettes: a set of instrument *families* grouped in *sections*, each family with spectral
//! *atoms* on a band layout, plus the *presence model* that decides which families sound, the
//! analysis settings the atoms were made with, and where it all came from.
//!
//! A palette is a file ([`Palette::to_bytes`], [`Palette::from_bytes`], format in
//! [`format`](self::format)); the default palette of the 16 families and 8 sections of the
//! vocabulary is built in ([`Palette::default_palette`]), made by `cargo xtask palette` from the
//! General MIDI SoundFont FluidR3_GM and sung vowels from espeak-ng.

mod build;
mod errors;
mod format;
mod learn;

pub use build::{
    BuildError, BuildPlan, CheckPlan, SplitTraining, build_palette, check_palette, fit_split,
    render_mix,
};
pub use errors::PaletteError;
pub use format::{FORMAT_VERSION, MAGIC, MAX_FILE_BYTES, MAX_HEADER_BYTES};
pub use learn::{LearnSettings, learn_family_atoms, stacked_columns};

use crate::shares::PresenceModel;
use serde::{Deserialize, Serialize};

/// The most families a palette may hold.
pub const MAX_FAMILIES: usize = 32;
/// The most sections a palette may hold.
pub const MAX_SECTIONS: usize = 16;
/// The most atoms one family may hold.
pub const MAX_ATOMS_PER_FAMILY: usize = 64;
/// The most bands a palette's layout may have.
pub const MAX_PALETTE_BANDS: usize = 256;
/// The most columns an atom may stack.
pub const MAX_STACK: usize = 9;
/// The longest family, section or palette name, bytes.
pub const MAX_NAME_BYTES: usize = 64;

/// The default palette's families (vocabulary order) and the section each belongs to.
pub const DEFAULT_FAMILIES: [(&str, &str); 16] = [
    ("kick", "drums"),
    ("snare", "drums"),
    ("cymbals", "drums"),
    ("toms & hand percussion", "drums"),
    ("bass", "bass"),
    ("piano", "keys"),
    ("organ", "keys"),
    ("clean guitar", "guitars"),
    ("driven guitar", "guitars"),
    ("bowed strings", "strings"),
    ("brass", "winds"),
    ("reeds & flutes", "winds"),
    ("voice", "voice"),
    ("synth lead", "synths"),
    ("synth pad", "synths"),
    ("mallets", "keys"),
];

/// The default palette's sections, in display order.
pub const DEFAULT_SECTIONS: [&str; 8] = [
    "drums", "bass", "keys", "guitars", "strings", "winds", "voice", "synths",
];

/// The palette file built in (see `cargo xtask palette`).
const DEFAULT_PALETTE_BYTES: &[u8] = include_bytes!("default.weftpal");

/// One instrument family.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
pub struct Family {
    /// Its name ("driven guitar").
    pub name: String,
    /// Index of its section in [`Palette::sections`].
    pub section: usize,
}

/// How audio is turned into the columns the atoms describe. Fixed per palette: atoms only mean
/// something under the settings they were learned with.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct AnalysisSpec {
    /// Mel bands (Slaney scale, peak-normalised triangles so band energies add up to the
    /// spectrum's energy).
    pub bands: usize,
    /// Lowest band edge, Hz.
    pub fmin_hz: f64,
    /// Highest band edge, Hz.
    pub fmax_hz: f64,
    /// Time each column averages, seconds (rounded to whole hops at the running rate); one
    /// share update per column.
    pub column_s: f64,
    /// Columns stacked into one atom (the context an atom spans is `stack × column_s`).
    pub stack: usize,
    /// β of the β-divergence the activations minimise (1: Kullback–Leibler).
    pub beta: f64,
    /// Multiplicative updates per column.
    pub iterations: usize,
    /// Context the presence features summarise, seconds.
    pub presence_context_s: f64,
    /// Fraction of a column's energy that the reconstruction may miss before the rest counts as
    /// *unexplained* (fits are never exact, even for a family the palette knows).
    pub unexplained_tolerance: f64,
}

impl AnalysisSpec {
    /// The settings the default palette uses (chosen by measurement; see the palette note in
    /// `cargo xtask palette`).
    pub const DEFAULT: Self = Self {
        bands: 64,
        fmin_hz: 30.0,
        fmax_hz: 16_000.0,
        column_s: 0.05,
        stack: 3,
        beta: 1.0,
        // 20 updates at most: on 40 held-out mixes (`weft palette check --seed 1 --mixes 40`)
        // the amount stage with true presence scored 12.66 % against 12.63 % at 30, and ran
        // about 20 % faster.
        iterations: 20,
        presence_context_s: 0.75,
        unexplained_tolerance: 0.15,
    };

    /// Values per atom.
    pub fn dims(&self) -> usize {
        self.bands * self.stack
    }

    /// Checks every setting against the palette's rules; `Err` names the first field out of
    /// range.
    pub fn check(&self) -> Result<(), PaletteError> {
        let bad = |field: &'static str, value: f64| {
            Err(PaletteError::Invalid {
                field,
                reason: format!("value {value} is out of range"),
            })
        };
        if !(8..=MAX_PALETTE_BANDS).contains(&self.bands) {
            return bad("analysis.bands", self.bands as f64);
        }
        if !(self.fmin_hz.is_finite() && self.fmin_hz >= 0.0 && self.fmin_hz < 1000.0) {
            return bad("analysis.fmin_hz", self.fmin_hz);
        }
        if !(self.fmax_hz.is_finite()
            && self.fmax_hz > self.fmin_hz + 1000.0
            && self.fmax_hz <= 48_000.0)
        {
            return bad("analysis.fmax_hz", self.fmax_hz);
        }
        if !(self.column_s.is_finite() && (0.005..=0.1).contains(&self.column_s)) {
            return bad("analysis.column_s", self.column_s);
        }
        if !(1..=MAX_STACK).contains(&self.stack) {
            return bad("analysis.stack", self.stack as f64);
        }
        if !(self.beta.is_finite() && (0.0..=2.0).contains(&self.beta)) {
            return bad("analysis.beta", self.beta);
        }
        if !(1..=500).contains(&self.iterations) {
            return bad("analysis.iterations", self.iterations as f64);
        }
        if !(self.presence_context_s.is_finite() && (0.1..=5.0).contains(&self.presence_context_s))
        {
            return bad("analysis.presence_context_s", self.presence_context_s);
        }
        if !(self.unexplained_tolerance.is_finite()
            && (0.0..1.0).contains(&self.unexplained_tolerance))
        {
            return bad("analysis.unexplained_tolerance", self.unexplained_tolerance);
        }
        Ok(())
    }
}

/// Where a palette came from.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize, Default)]
pub struct Provenance {
    /// The Weft version that made it.
    pub weft_version: String,
    /// What it was made from ("soundfont:Fluid R3 GM; voice:espeak-ng 1.51", "folders").
    pub source: String,
    /// The seed of every random choice made while building it.
    pub seed: u64,
    /// Free notes (settings, counts of notes and mixes rendered).
    pub notes: Vec<String>,
}

/// A palette: families, sections, atoms, presence model, provenance. Built only through
/// [`Palette::new`] or [`Palette::from_bytes`], which validate everything.
#[derive(Debug, Clone, PartialEq)]
pub struct Palette {
    name: String,
    families: Vec<Family>,
    sections: Vec<String>,
    analysis: AnalysisSpec,
    atom_counts: Vec<usize>,
    atoms: Vec<f32>,
    presence: Option<PresenceModel>,
    /// Split atoms (same shape as `atoms`), if fitted.
    split_atoms: Option<Vec<f32>>,
    provenance: Provenance,
}

impl Palette {
    /// Checks and assembles a palette. `atoms` holds every family's atoms in family order,
    /// atom-major, `analysis.dims()` values each; `atom_counts[f]` atoms for family `f`.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        name: String,
        families: Vec<Family>,
        sections: Vec<String>,
        analysis: AnalysisSpec,
        atom_counts: Vec<usize>,
        atoms: Vec<f32>,
        presence: Option<PresenceModel>,
        provenance: Provenance,
    ) -> Result<Self, PaletteError> {
        let p = Self {
            name,
            families,
            sections,
            analysis,
            atom_counts,
            atoms,
            presence,
            split_atoms: None,
            provenance,
        };
        p.check()?;
        Ok(p)
    }

    /// The built-in palette (16 families, 8 sections).
    ///
    /// # Panics
    /// Never in a released build: a test reads the embedded file.
    #[allow(clippy::expect_used)]
    pub fn default_palette() -> Self {
        Self::from_bytes(DEFAULT_PALETTE_BYTES).expect("the built-in palette is valid")
    }

    /// The built-in palette file's bytes.
    pub fn default_palette_bytes() -> &'static [u8] {
        DEFAULT_PALETTE_BYTES
    }

    fn check(&self) -> Result<(), PaletteError> {
        check_name("name", &self.name)?;
        let nf = self.families.len();
        if nf == 0 || nf > MAX_FAMILIES {
            return Err(PaletteError::Limit {
                what: "families",
                value: nf as u64,
                max: MAX_FAMILIES as u64,
            });
        }
        let ns = self.sections.len();
        if ns == 0 || ns > MAX_SECTIONS {
            return Err(PaletteError::Limit {
                what: "sections",
                value: ns as u64,
                max: MAX_SECTIONS as u64,
            });
        }
        for (i, s) in self.sections.iter().enumerate() {
            check_name("sections", s)?;
            if self.sections[..i].contains(s) {
                return Err(PaletteError::Invalid {
                    field: "sections",
                    reason: format!("section '{s}' appears twice"),
                });
            }
        }
        for (i, f) in self.families.iter().enumerate() {
            check_name("families", &f.name)?;
            if self.families[..i].iter().any(|g| g.name == f.name) {
                return Err(PaletteError::Invalid {
                    field: "families",
                    reason: format!("family '{}' appears twice", f.name),
                });
            }
            if f.section >= ns {
                return Err(PaletteError::Invalid {
                    field: "families",
                    reason: format!("family '{}' names section {} of {ns}", f.name, f.section),
                });
            }
        }
        self.analysis.check()?;
        if self.atom_counts.len() != nf {
            return Err(PaletteError::Invalid {
                field: "atom_counts",
                reason: format!("{} counts for {nf} families", self.atom_counts.len()),
            });
        }
        for (f, &c) in self.atom_counts.iter().enumerate() {
            if c == 0 || c > MAX_ATOMS_PER_FAMILY {
                return Err(PaletteError::Limit {
                    what: "atoms per family",
                    value: c as u64,
                    max: MAX_ATOMS_PER_FAMILY as u64,
                })
                .map_err(|e| e.in_family(&self.families[f].name));
            }
        }
        let dims = self.analysis.dims();
        let want = self.atom_counts.iter().sum::<usize>() * dims;
        if self.atoms.len() != want {
            return Err(PaletteError::Invalid {
                field: "atoms",
                reason: format!(
                    "{} values; the counts and layout need {want}",
                    self.atoms.len()
                ),
            });
        }
        for (k, atom) in self.atoms.chunks_exact(dims).enumerate() {
            if atom.iter().any(|v| !v.is_finite() || *v < 0.0) {
                return Err(PaletteError::Invalid {
                    field: "atoms",
                    reason: format!("atom {k} holds a negative or non-finite value"),
                });
            }
            if atom.iter().sum::<f32>() <= 0.0 {
                return Err(PaletteError::Invalid {
                    field: "atoms",
                    reason: format!("atom {k} is all zeros"),
                });
            }
        }
        if let Some(r) = &self.split_atoms {
            check_split_atoms(r, self.atoms.len(), dims)?;
        }
        if let Some(p) = &self.presence {
            p.check(nf, self.atom_counts.iter().sum())
                .map_err(|reason| PaletteError::Invalid {
                    field: "presence",
                    reason,
                })?;
        }
        Ok(())
    }

    /// The palette's name.
    pub fn name(&self) -> &str {
        &self.name
    }

    /// Its families, in order.
    pub fn families(&self) -> &[Family] {
        &self.families
    }

    /// Its sections, in display order.
    pub fn sections(&self) -> &[String] {
        &self.sections
    }

    /// The analysis settings its atoms were learned with.
    pub fn analysis(&self) -> &AnalysisSpec {
        &self.analysis
    }

    /// Atoms per family.
    pub fn atom_counts(&self) -> &[usize] {
        &self.atom_counts
    }

    /// Every atom, family by family, atom-major (`analysis().dims()` values each).
    pub fn atoms(&self) -> &[f32] {
        &self.atoms
    }

    /// The presence model, if it has one (without one, shares come from NMF alone).
    pub fn presence(&self) -> Option<&PresenceModel> {
        self.presence.as_ref()
    }

    /// The split atoms, if it has them: the same shape as [`Palette::atoms`], they divide the
    /// amount stage's column among the families ([`crate::shares::split`]).
    pub fn split_atoms(&self) -> Option<&[f32]> {
        self.split_atoms.as_deref()
    }

    /// Where it came from.
    pub fn provenance(&self) -> &Provenance {
        &self.provenance
    }

    /// Index of the family called `name`.
    pub fn family_index(&self, name: &str) -> Option<usize> {
        self.families.iter().position(|f| f.name == name)
    }

    /// A copy with another presence model (checked).
    pub fn with_presence(mut self, presence: Option<PresenceModel>) -> Result<Self, PaletteError> {
        self.presence = presence;
        self.check()?;
        Ok(self)
    }

    /// A copy with other split atoms, or none (checked).
    pub fn with_split_atoms(mut self, split: Option<Vec<f32>>) -> Result<Self, PaletteError> {
        self.split_atoms = split;
        self.check()?;
        Ok(self)
    }

    /// A copy with another *unexplained* tolerance (checked).
    pub fn with_unexplained_tolerance(mut self, tolerance: f64) -> Result<Self, PaletteError> {
        self.analysis.unexplained_tolerance = tolerance;
        self.check()?;
        Ok(self)
    }

    /// A copy with other provenance notes.
    pub fn with_provenance(mut self, provenance: Provenance) -> Self {
        self.provenance = provenance;
        self
    }
}

/// Split atoms must match the atoms' shape, hold finite non-negative values and no atom of
/// zeros.
fn check_split_atoms(r: &[f32], values: usize, dims: usize) -> Result<(), PaletteError> {
    let invalid = |reason: String| PaletteError::Invalid {
        field: "split atoms",
        reason,
    };
    if r.len() != values {
        return Err(invalid(format!(
            "{} values; the atoms hold {values}",
            r.len()
        )));
    }
    for (k, atom) in r.chunks_exact(dims).enumerate() {
        if atom.iter().any(|v| !v.is_finite() || *v < 0.0) {
            return Err(invalid(format!(
                "split atom {k} holds a negative or non-finite value"
            )));
        }
        if atom.iter().sum::<f32>() <= 0.0 {
            return Err(invalid(format!("split atom {k} is all zeros")));
        }
    }
    Ok(())
}

fn check_name(field: &'static str, name: &str) -> Result<(), PaletteError> {
    if name.trim().is_empty() || name.len() > MAX_NAME_BYTES || name.chars().any(char::is_control) {
        return Err(PaletteError::Invalid {
            field,
            reason: format!(
                "name '{}' is empty, longer than {MAX_NAME_BYTES} bytes or holds control characters",
                name.escape_debug()
            ),
        });
    }
    Ok(())
}
