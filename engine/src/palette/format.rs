//! The palette file: a small binary container with a JSON header.
//!
//! | bytes | content |
//! |---|---|
//! | 8 | magic `WEFTPAL\0` |
//! | 4 | format version, u32 little-endian ([`FORMAT_VERSION`]) |
//! | 4 | header length `n`, u32 little-endian, at most [`MAX_HEADER_BYTES`] |
//! | n | header, UTF-8 JSON: name, families, sections, analysis, atom counts, presence model (its shapes, thresholds and settings), provenance |
//! | 8 | number of atom values `m`, u64 little-endian (must equal Σ counts × bands × stack) |
//! | 4·m | atom values, f32 little-endian, family by family, atom by atom |
//! | 8 | number of weight values `w`, u64 little-endian (must equal what the presence model's shapes need; 0 without one) |
//! | 4·w | the presence model's weights, f32 little-endian: mean, scale, w1, b1, w2, b2, then the direct share network's w1, b1, w2, b2, then the boosted trees' base, split features, split values and leaves |
//! | 8 | number of split atom values `s`, u64 little-endian (0, or `m`: one value per atom value) |
//! | 4·s | the split atoms, f32 little-endian, in the atoms' order |
//!
//! Nothing may follow. Every size is checked against the bytes left and against a limit before
//! anything is allocated, so a hostile file costs at most its own size.
//!
//! Version 1 files, whose headers carried the weights as JSON numbers and which end after the
//! atoms, still load. Version 2 keeps the weights in binary: the same values in about a third of
//! the bytes, and the header no longer grows with the networks, so its limit does not bound
//! them. Version 2 files end after the weights (no split atoms) and still load.

use super::{AnalysisSpec, Family, Palette, PaletteError, Provenance};
use crate::shares::PresenceModel;
use serde::{Deserialize, Serialize};

/// The first eight bytes of every palette file.
pub const MAGIC: &[u8; 8] = b"WEFTPAL\0";
/// The format version this build writes; it reads this one and every earlier one.
pub const FORMAT_VERSION: u32 = 3;
/// The largest header accepted, bytes.
pub const MAX_HEADER_BYTES: u64 = 8 << 20;
/// The largest palette file accepted, bytes.
pub const MAX_FILE_BYTES: u64 = 64 << 20;

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct Header {
    name: String,
    families: Vec<Family>,
    sections: Vec<String>,
    analysis: AnalysisSpec,
    atom_counts: Vec<usize>,
    presence: Option<PresenceModel>,
    provenance: Provenance,
}

struct Reader<'a> {
    bytes: &'a [u8],
    at: usize,
}

impl<'a> Reader<'a> {
    fn take(&mut self, n: u64, what: &'static str) -> Result<&'a [u8], PaletteError> {
        let left = (self.bytes.len() - self.at) as u64;
        if n > left {
            return Err(PaletteError::Truncated {
                what,
                needed: n,
                available: left,
            });
        }
        let n = n as usize;
        let s = &self.bytes[self.at..self.at + n];
        self.at += n;
        Ok(s)
    }

    /// A u64 count and that many f32 values, the count bounded by the bytes left before
    /// anything is allocated.
    fn values(
        &mut self,
        count_what: &'static str,
        limit_what: &'static str,
        what: &'static str,
    ) -> Result<Vec<f32>, PaletteError> {
        let count = u64::from_le_bytes(self.array::<8>(count_what)?);
        let max_values = (MAX_FILE_BYTES / 4)
            .min((self.bytes.len() as u64).saturating_sub(self.at as u64) / 4 + 1);
        if count > max_values {
            return Err(PaletteError::Limit {
                what: limit_what,
                value: count,
                max: max_values,
            });
        }
        let raw = self.take(count * 4, what)?;
        Ok(raw
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
            .collect())
    }

    fn array<const N: usize>(&mut self, what: &'static str) -> Result<[u8; N], PaletteError> {
        let s = self.take(N as u64, what)?;
        let mut a = [0u8; N];
        a.copy_from_slice(s);
        Ok(a)
    }
}

/// Reads a version 2 file's weight section into the header's presence model, whose shapes say
/// how many values each array takes (its families: one per threshold; whether they match the
/// palette's is for [`Palette::new`] to check, with the other rules).
fn read_weights(r: &mut Reader<'_>, header: &mut Header) -> Result<(), PaletteError> {
    let weights = r.values("weight count", "weight values", "weights")?;
    let invalid = |reason: String| PaletteError::Invalid {
        field: "presence",
        reason,
    };
    let Some(model) = &mut header.presence else {
        return if weights.is_empty() {
            Ok(())
        } else {
            Err(invalid(format!(
                "the file holds {} weight values but no presence model",
                weights.len()
            )))
        };
    };
    let lengths = model.weight_lengths(model.thresholds.len());
    let needed = lengths.iter().fold(0usize, |a, &l| a.saturating_add(l));
    if needed != weights.len() {
        return Err(invalid(format!(
            "the file holds {} weight values; the model's shapes need {needed}",
            weights.len()
        )));
    }
    let mut at = 0;
    for (array, len) in model.weight_arrays_mut().into_iter().zip(lengths) {
        if !array.is_empty() {
            return Err(invalid(
                "weights in the header (format version 2 keeps them in the binary section)".into(),
            ));
        }
        array.extend_from_slice(&weights[at..at + len]);
        at += len;
    }
    if let Some(t) = &mut model.trees {
        t.pack();
    }
    Ok(())
}

impl Palette {
    /// Encodes the palette as a palette file.
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut presence = self.presence.clone();
        let mut weights = Vec::new();
        if let Some(m) = &mut presence {
            for a in m.weight_arrays_mut() {
                weights.append(a);
            }
        }
        let header = Header {
            name: self.name.clone(),
            families: self.families.clone(),
            sections: self.sections.clone(),
            analysis: self.analysis,
            atom_counts: self.atom_counts.clone(),
            presence,
            provenance: self.provenance.clone(),
        };
        // Serialising plain data with string keys cannot fail.
        let json = serde_json::to_vec(&header).unwrap_or_default();
        let split = self.split_atoms.as_deref().unwrap_or_default();
        let values = self.atoms.len() + weights.len() + split.len();
        let mut out = Vec::with_capacity(40 + json.len() + 4 * values);
        out.extend_from_slice(MAGIC);
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&(json.len() as u32).to_le_bytes());
        out.extend_from_slice(&json);
        out.extend_from_slice(&(self.atoms.len() as u64).to_le_bytes());
        for v in &self.atoms {
            out.extend_from_slice(&v.to_le_bytes());
        }
        out.extend_from_slice(&(weights.len() as u64).to_le_bytes());
        for v in &weights {
            out.extend_from_slice(&v.to_le_bytes());
        }
        out.extend_from_slice(&(split.len() as u64).to_le_bytes());
        for v in split {
            out.extend_from_slice(&v.to_le_bytes());
        }
        out
    }

    /// Decodes and validates a palette file.
    pub fn from_bytes(bytes: &[u8]) -> Result<Self, PaletteError> {
        if bytes.len() as u64 > MAX_FILE_BYTES {
            return Err(PaletteError::Limit {
                what: "palette file size (bytes)",
                value: bytes.len() as u64,
                max: MAX_FILE_BYTES,
            });
        }
        let mut r = Reader { bytes, at: 0 };
        if bytes.len() < MAGIC.len() || &r.array::<8>("magic")? != MAGIC {
            return Err(PaletteError::NotAPalette);
        }
        let version = u32::from_le_bytes(r.array::<4>("version")?);
        if !(1..=FORMAT_VERSION).contains(&version) {
            return Err(PaletteError::Version {
                found: version,
                supported: FORMAT_VERSION,
            });
        }
        let header_len = u64::from(u32::from_le_bytes(r.array::<4>("header length")?));
        if header_len > MAX_HEADER_BYTES {
            return Err(PaletteError::Limit {
                what: "palette header size (bytes)",
                value: header_len,
                max: MAX_HEADER_BYTES,
            });
        }
        let json = r.take(header_len, "header")?;
        let mut header: Header =
            serde_json::from_slice(json).map_err(|source| PaletteError::Header { source })?;
        let atoms = r.values("atom count", "atom values", "atoms")?;
        if version >= 2 {
            read_weights(&mut r, &mut header)?;
        }
        let split = if version >= 3 {
            Some(r.values("split atom count", "split atom values", "split atoms")?)
                .filter(|s| !s.is_empty())
        } else {
            None
        };
        let extra = (bytes.len() - r.at) as u64;
        if extra > 0 {
            return Err(PaletteError::TrailingBytes { extra });
        }
        Palette::new(
            header.name,
            header.families,
            header.sections,
            header.analysis,
            header.atom_counts,
            atoms,
            header.presence,
            header.provenance,
        )?
        .with_split_atoms(split)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::palette::{AnalysisSpec, MAX_FAMILIES};
    use crate::scene::SceneRng;
    use crate::shares::presence::{PresenceTraining, feature_count, train_presence};

    fn small(seed: u64, with_presence: bool) -> Palette {
        let mut rng = SceneRng::new(seed);
        let analysis = AnalysisSpec {
            bands: 16,
            stack: 2,
            ..AnalysisSpec::DEFAULT
        };
        let counts = vec![2, 3];
        let atoms: Vec<f32> = (0..5 * analysis.dims())
            .map(|_| rng.unit() as f32 + 0.01)
            .collect();
        let presence = with_presence.then(|| {
            let d = feature_count(2, 5);
            let rows: Vec<f32> = (0..40 * d).map(|_| rng.unit() as f32).collect();
            let labels: Vec<bool> = (0..80).map(|i| i % 3 == 0).collect();
            let opts = PresenceTraining {
                hidden: 4,
                epochs: 2,
                ..PresenceTraining::default()
            };
            train_presence(&rows, d, &labels, 2, &opts)
        });
        Palette::new(
            "test".into(),
            vec![
                Family {
                    name: "low".into(),
                    section: 0,
                },
                Family {
                    name: "high".into(),
                    section: 1,
                },
            ],
            vec!["a".into(), "b".into()],
            analysis,
            counts,
            atoms,
            presence,
            Provenance {
                weft_version: "0".into(),
                source: "unit test".into(),
                seed,
                notes: vec![],
            },
        )
        .expect("valid")
    }

    #[test]
    fn round_trip_is_exact() {
        for presence in [false, true] {
            let p = small(3, presence);
            let bytes = p.to_bytes();
            let q = Palette::from_bytes(&bytes).expect("reads back");
            assert_eq!(p, q);
            assert_eq!(bytes, q.to_bytes());
        }
    }

    #[test]
    fn boosted_trees_travel_in_the_binary_section() {
        let mut rng = SceneRng::new(8);
        let d = feature_count(2, 5);
        let rows: Vec<f32> = (0..60 * d).map(|_| rng.unit() as f32).collect();
        let labels: Vec<bool> = (0..120).map(|i| i % 3 == 0).collect();
        let opts = PresenceTraining {
            hidden: 4,
            epochs: 2,
            trees: crate::shares::trees::TreeTraining {
                trees: 3,
                depth: 2,
                patience: 100,
                ..Default::default()
            },
            ..PresenceTraining::default()
        };
        let model = train_presence(&rows, d, &labels, 2, &opts);
        let trees = model.trees.clone().expect("trees trained");
        // Random labels: the held-back rows may keep fewer than 3.
        let count = trees.trees;
        assert!((1..=3).contains(&count), "{count} trees");
        let p = small(3, false).with_presence(Some(model)).expect("valid");
        let bytes = p.to_bytes();
        let q = Palette::from_bytes(&bytes).expect("reads back");
        assert_eq!(q.presence().and_then(|m| m.trees.as_ref()), Some(&trees));
        assert_eq!(bytes, q.to_bytes());
        // The header keeps the shapes only; the values are binary.
        let header = String::from_utf8_lossy(&bytes[16..bytes.len().min(4096)]).into_owned();
        let shape = format!("\"trees\":{{\"trees\":{count},\"depth\":2}}");
        assert!(header.contains(&shape), "{header}");
        // A damaged tree is refused with its reason.
        let mut bad = q.presence().cloned().expect("model");
        if let Some(t) = &mut bad.trees {
            t.split_feature[0] = 1e6;
        }
        let err = small(3, false)
            .with_presence(Some(bad))
            .expect_err("refused")
            .to_string();
        assert!(err.contains("feature"), "{err}");
    }

    #[test]
    fn damaged_files_are_refused_with_reasons() {
        let good = small(4, true).to_bytes();
        assert!(matches!(
            Palette::from_bytes(b"RIFF1234"),
            Err(PaletteError::NotAPalette)
        ));
        assert!(matches!(
            Palette::from_bytes(&[]),
            Err(PaletteError::NotAPalette)
        ));
        let mut v = good.clone();
        v[8] = 9;
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Version {
                found: 9,
                supported: FORMAT_VERSION
            })
        ));
        for cut in [10, 20, good.len() - 1] {
            assert!(
                matches!(
                    Palette::from_bytes(&good[..cut]),
                    Err(PaletteError::Truncated { .. })
                ),
                "cut at {cut}"
            );
        }
        let mut v = good.clone();
        v.push(0);
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::TrailingBytes { extra: 1 })
        ));
        // A hostile header length is refused before anything is allocated.
        let mut v = good.clone();
        v[12..16].copy_from_slice(&u32::MAX.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Limit { .. })
        ));
        // A hostile atom count too.
        let header_len = u32::from_le_bytes([good[12], good[13], good[14], good[15]]) as usize;
        let mut v = good.clone();
        v[16 + header_len..24 + header_len].copy_from_slice(&u64::MAX.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Limit { .. })
        ));
        // A NaN atom value.
        let mut v = good.clone();
        let at = 24 + header_len;
        v[at..at + 4].copy_from_slice(&f32::NAN.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Invalid { field: "atoms", .. })
        ));
    }

    /// The layout of format version 1: the weights inside the header as JSON numbers, nothing
    /// after the atoms.
    fn to_bytes_v1(p: &Palette) -> Vec<u8> {
        let header = Header {
            name: p.name.clone(),
            families: p.families.clone(),
            sections: p.sections.clone(),
            analysis: p.analysis,
            atom_counts: p.atom_counts.clone(),
            presence: p.presence.clone(),
            provenance: p.provenance.clone(),
        };
        let json = serde_json::to_vec(&header).expect("json");
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&1u32.to_le_bytes());
        out.extend_from_slice(&(json.len() as u32).to_le_bytes());
        out.extend_from_slice(&json);
        out.extend_from_slice(&(p.atoms.len() as u64).to_le_bytes());
        for v in &p.atoms {
            out.extend_from_slice(&v.to_le_bytes());
        }
        out
    }

    /// Where a file's weight section starts (after the header and the atoms).
    fn weights_at(bytes: &[u8]) -> usize {
        let header_len = u32::from_le_bytes([bytes[12], bytes[13], bytes[14], bytes[15]]) as usize;
        let at = 16 + header_len;
        let atoms = u64::from_le_bytes(bytes[at..at + 8].try_into().expect("8 bytes")) as usize;
        at + 8 + 4 * atoms
    }

    #[test]
    fn version_1_files_still_load_and_version_2_keeps_the_weights_in_binary() {
        let p = small(6, true);
        let model = p.presence().expect("model");
        let v1 = to_bytes_v1(&p);
        assert_eq!(Palette::from_bytes(&v1).expect("a version 1 file loads"), p);
        let v2 = p.to_bytes();
        assert_eq!(u32::from_le_bytes([v2[8], v2[9], v2[10], v2[11]]), 3);
        // The header names the shapes but holds no weight array.
        let header_len = u32::from_le_bytes([v2[12], v2[13], v2[14], v2[15]]) as usize;
        let header: serde_json::Value =
            serde_json::from_slice(&v2[16..16 + header_len]).expect("json");
        for key in ["mean", "scale", "w1", "b1", "w2", "b2"] {
            assert!(header["presence"].get(key).is_none(), "{key} in the header");
        }
        assert_eq!(header["presence"]["hidden"], model.hidden);
        let at = weights_at(&v2);
        let count = u64::from_le_bytes(v2[at..at + 8].try_into().expect("8 bytes")) as usize;
        let expected = model.mean.len()
            + model.scale.len()
            + model.w1.len()
            + model.b1.len()
            + model.w2.len()
            + model.b2.len();
        assert_eq!(count, expected);
        // Then an empty split-atom section.
        assert_eq!(v2.len(), at + 8 + 4 * count + 8);
        // The first weight is the first feature's mean, bit for bit.
        assert_eq!(
            f32::from_le_bytes(v2[at + 8..at + 12].try_into().expect("4 bytes")).to_bits(),
            model.mean[0].to_bits()
        );
        assert!(v2.len() < v1.len(), "{} >= {}", v2.len(), v1.len());
        // Without a presence model the weight section is empty.
        let bare = small(6, false).to_bytes();
        let at = weights_at(&bare);
        assert_eq!(bare.len(), at + 16);
        assert_eq!(
            u64::from_le_bytes(bare[at..at + 8].try_into().expect("8")),
            0
        );
    }

    /// `p` with split atoms: its own atoms, each value scaled by a seeded factor.
    fn with_split(p: Palette, seed: u64) -> Palette {
        let mut rng = SceneRng::new(seed);
        let r: Vec<f32> = p
            .atoms()
            .iter()
            .map(|v| v * (0.5 + rng.unit() as f32))
            .collect();
        p.with_split_atoms(Some(r)).expect("valid split atoms")
    }

    #[test]
    fn split_atoms_travel_last_and_version_2_files_still_load() {
        let p = with_split(small(9, true), 1);
        let bytes = p.to_bytes();
        assert_eq!(
            u32::from_le_bytes([bytes[8], bytes[9], bytes[10], bytes[11]]),
            3
        );
        let q = Palette::from_bytes(&bytes).expect("reads back");
        assert_eq!(q.split_atoms(), p.split_atoms());
        assert_eq!(q, p);
        let r = p.split_atoms().expect("split atoms");
        let at = bytes.len() - 4 * r.len();
        assert_eq!(
            u64::from_le_bytes(bytes[at - 8..at].try_into().expect("8 bytes")),
            r.len() as u64
        );
        assert_eq!(
            f32::from_le_bytes(bytes[at..at + 4].try_into().expect("4 bytes")).to_bits(),
            r[0].to_bits()
        );
        // Without split atoms the section is an empty count; a version 2 file (no section at
        // all) reads as the same palette.
        let bare = small(9, true);
        let v3 = bare.to_bytes();
        assert_eq!(
            u64::from_le_bytes(v3[v3.len() - 8..].try_into().expect("8")),
            0
        );
        let mut v2 = v3[..v3.len() - 8].to_vec();
        v2[8..12].copy_from_slice(&2u32.to_le_bytes());
        assert_eq!(
            Palette::from_bytes(&v2).expect("a version 2 file loads"),
            bare
        );
        // A version 2 file carrying a split section has a trailing part.
        let mut v2_with = bytes.clone();
        v2_with[8..12].copy_from_slice(&2u32.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v2_with),
            Err(PaletteError::TrailingBytes { .. })
        ));
    }

    #[test]
    fn damaged_split_atoms_are_refused_with_reasons() {
        let p = with_split(small(10, true), 2);
        let good = p.to_bytes();
        let n = p.split_atoms().expect("split").len();
        let at = good.len() - 4 * n;
        let reason = |bytes: &[u8]| match Palette::from_bytes(bytes) {
            Err(PaletteError::Invalid { field, reason }) => format!("{field}: {reason}"),
            other => panic!("expected an invalid field, got {other:?}"),
        };
        // One value fewer than the atoms hold (the count and the file agree).
        let mut short = good[..good.len() - 4].to_vec();
        short[at - 8..at].copy_from_slice(&(n as u64 - 1).to_le_bytes());
        assert!(
            reason(&short).starts_with(&format!("split atoms: {} values", n - 1)),
            "{}",
            reason(&short)
        );
        // A negative value, and a NaN.
        for bad in [-1.0_f32, f32::NAN] {
            let mut v = good.clone();
            v[at + 4 * 5..at + 4 * 6].copy_from_slice(&bad.to_le_bytes());
            assert!(
                reason(&v).contains("split atom 0 holds a negative or non-finite value"),
                "{}",
                reason(&v)
            );
        }
        // A split atom of zeros.
        let dims = p.analysis().dims();
        let mut zeros = good.clone();
        let second = at + 4 * dims;
        zeros[second..second + 4 * dims].fill(0);
        assert!(
            reason(&zeros).contains("split atom 1 is all zeros"),
            "{}",
            reason(&zeros)
        );
        // A count beyond the bytes left, and a file cut inside the values.
        let mut huge = good.clone();
        huge[at - 8..at].copy_from_slice(&u64::MAX.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&huge),
            Err(PaletteError::Limit { .. })
        ));
        assert!(matches!(
            Palette::from_bytes(&good[..good.len() - 2]),
            Err(PaletteError::Truncated { .. })
        ));
        // The same rules hold for split atoms handed in directly.
        let wrong = small(10, true).with_split_atoms(Some(vec![1.0; 3]));
        assert!(matches!(
            wrong,
            Err(PaletteError::Invalid {
                field: "split atoms",
                ..
            })
        ));
    }

    #[test]
    fn damaged_weight_sections_are_refused_with_reasons() {
        let good = small(7, true).to_bytes();
        let at = weights_at(&good);
        let count = u64::from_le_bytes(good[at..at + 8].try_into().expect("8 bytes"));
        // One value fewer than the shapes need (and the file cut to match, the empty split-atom
        // section kept).
        let mut v = [&good[..good.len() - 12], &good[good.len() - 8..]].concat();
        v[at..at + 8].copy_from_slice(&(count - 1).to_le_bytes());
        match Palette::from_bytes(&v) {
            Err(PaletteError::Invalid {
                field: "presence",
                reason,
            }) => assert!(reason.contains("need"), "{reason}"),
            other => panic!("{other:?}"),
        }
        // A hostile count is a limit, before anything is allocated.
        let mut v = good.clone();
        v[at..at + 8].copy_from_slice(&u64::MAX.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Limit {
                what: "weight values",
                ..
            })
        ));
        // Weights but no model.
        let mut bare = small(7, false).to_bytes();
        let at_bare = weights_at(&bare);
        bare.truncate(at_bare);
        bare.extend_from_slice(&1u64.to_le_bytes());
        bare.extend_from_slice(&0f32.to_le_bytes());
        bare.extend_from_slice(&0u64.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&bare),
            Err(PaletteError::Invalid {
                field: "presence",
                ..
            })
        ));
        // A NaN weight is found by the model's own checks.
        let mut v = good.clone();
        v[at + 8..at + 12].copy_from_slice(&f32::NAN.to_le_bytes());
        assert!(matches!(
            Palette::from_bytes(&v),
            Err(PaletteError::Invalid {
                field: "presence",
                ..
            })
        ));
        // A version 2 header that also carries weights is refused: one place for each value.
        let r = with_header_edit(|h| h["presence"]["b2"] = serde_json::json!([0.0, 0.0]));
        match r {
            Err(PaletteError::Invalid {
                field: "presence",
                reason,
            }) => assert!(reason.contains("binary section"), "{reason}"),
            other => panic!("{other:?}"),
        }
    }

    fn with_header_edit(edit: impl Fn(&mut serde_json::Value)) -> Result<Palette, PaletteError> {
        let good = small(5, true).to_bytes();
        let header_len = u32::from_le_bytes([good[12], good[13], good[14], good[15]]) as usize;
        let mut header: serde_json::Value =
            serde_json::from_slice(&good[16..16 + header_len]).expect("json");
        edit(&mut header);
        let json = serde_json::to_vec(&header).expect("json");
        let mut v = good[..12].to_vec();
        v.extend_from_slice(&(json.len() as u32).to_le_bytes());
        v.extend_from_slice(&json);
        v.extend_from_slice(&good[16 + header_len..]);
        Palette::from_bytes(&v)
    }

    #[test]
    fn invalid_headers_are_refused_naming_the_field() {
        assert!(with_header_edit(|_| {}).is_ok());
        type Edit = Box<dyn Fn(&mut serde_json::Value)>;
        let cases: Vec<(&str, Edit)> = vec![
            (
                "families",
                Box::new(|h| h["families"][1]["name"] = "low".into()),
            ),
            (
                "families",
                Box::new(|h| h["families"][1]["section"] = 7.into()),
            ),
            ("sections", Box::new(|h| h["sections"][1] = "a".into())),
            ("name", Box::new(|h| h["name"] = "".into())),
            (
                "analysis.stack",
                Box::new(|h| h["analysis"]["stack"] = 50.into()),
            ),
            (
                "analysis.beta",
                Box::new(|h| h["analysis"]["beta"] = 3.0.into()),
            ),
            ("atoms", Box::new(|h| h["atom_counts"][0] = 3.into())),
            (
                "presence",
                Box::new(|h| h["presence"]["schema"] = "other".into()),
            ),
            (
                "presence",
                Box::new(|h| h["presence"]["thresholds"][0] = 2.0.into()),
            ),
        ];
        for (field, edit) in cases {
            match with_header_edit(edit) {
                Err(PaletteError::Invalid { field: f, .. }) => assert_eq!(f, field),
                other => panic!("{field}: {other:?}"),
            }
        }
        // Unknown fields and wrong types are refused by the schema.
        assert!(matches!(
            with_header_edit(|h| h["extra"] = 1.into()),
            Err(PaletteError::Header { .. })
        ));
        assert!(matches!(
            with_header_edit(|h| h["families"] = "x".into()),
            Err(PaletteError::Header { .. })
        ));
        // Too many families is a limit.
        let r = with_header_edit(|h| {
            let f = h["families"][0].clone();
            h["families"] = serde_json::Value::Array(vec![f; MAX_FAMILIES + 1]);
        });
        assert!(
            matches!(
                r,
                Err(PaletteError::Limit {
                    what: "families",
                    ..
                })
            ),
            "{r:?}"
        );
    }

    #[test]
    fn the_built_in_palette_is_valid_and_names_the_vocabulary() {
        let p = Palette::default_palette();
        let names: Vec<&str> = p.families().iter().map(|f| f.name.as_str()).collect();
        let want: Vec<&str> = crate::palette::DEFAULT_FAMILIES
            .iter()
            .map(|f| f.0)
            .collect();
        assert_eq!(names, want);
        assert_eq!(p.sections(), crate::palette::DEFAULT_SECTIONS);
        for (f, (_, section)) in p.families().iter().zip(crate::palette::DEFAULT_FAMILIES) {
            assert_eq!(p.sections()[f.section], section, "{}", f.name);
        }
        assert!(p.presence().is_some());
    }
}
