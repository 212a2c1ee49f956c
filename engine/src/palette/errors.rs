//! Why a palette was refused.

use thiserror::Error;

/// Why a palette file or palette could not be used.
#[derive(Debug, Error)]
pub enum PaletteError {
    /// The file does not start with the palette magic bytes.
    #[error("not a Weft palette file (it does not start with the palette signature)")]
    NotAPalette,
    /// The file's format version is not one this Weft reads.
    #[error(
        "palette format version {found} is not supported (this Weft reads versions 1 to {supported})"
    )]
    Version {
        /// The version the file declares.
        found: u32,
        /// The newest version this build reads.
        supported: u32,
    },
    /// The file ends before the sizes it declares.
    #[error("the palette file is truncated: {what} needs {needed} bytes, {available} are left")]
    Truncated {
        /// What was being read.
        what: &'static str,
        /// Bytes needed.
        needed: u64,
        /// Bytes left.
        available: u64,
    },
    /// A size or count is beyond what Weft accepts (a hostile or damaged file).
    #[error("{what} is {value}, above the limit of {max}")]
    Limit {
        /// What was counted.
        what: &'static str,
        /// The value found.
        value: u64,
        /// The largest accepted value.
        max: u64,
    },
    /// The header is not valid JSON of the palette schema.
    #[error("the palette header is not valid: {source}")]
    Header {
        /// The JSON parser's reason.
        #[source]
        source: serde_json::Error,
    },
    /// A field holds a value that breaks the palette's rules.
    #[error("palette field '{field}' is invalid: {reason}")]
    Invalid {
        /// The field.
        field: &'static str,
        /// What is wrong.
        reason: String,
    },
    /// Bytes follow the atoms.
    #[error("{extra} unexpected bytes follow the palette's atoms")]
    TrailingBytes {
        /// How many.
        extra: u64,
    },
    /// A problem inside one family.
    #[error("family '{family}': {source}")]
    InFamily {
        /// The family's name.
        family: String,
        /// The problem.
        #[source]
        source: Box<PaletteError>,
    },
}

impl PaletteError {
    /// Wraps the error with the family it concerns.
    pub fn in_family(self, family: &str) -> Self {
        Self::InFamily {
            family: family.to_owned(),
            source: Box::new(self),
        }
    }
}
