//! `weft palette show`: what a palette file holds (its families and sections, the analysis it
//! was built for, its presence model, and how it was made), as a table or as JSON. The first
//! thing to read before trusting a palette that someone else built.

use crate::analyze::read_palette_file;
use anyhow::Result;
use clap::Args;
use serde::Serialize;
use std::borrow::Cow;
use std::path::PathBuf;
use weft_engine::palette::{FORMAT_VERSION, MAGIC, Palette};
use weft_engine::shares::presence::PresenceModel;

/// `weft palette show`.
#[derive(Args, Debug)]
pub struct ShowArgs {
    /// The palette file (default: the built-in palette).
    pub palette: Option<PathBuf>,
    /// Print one JSON object instead of tables.
    #[arg(long)]
    pub json: bool,
}

/// What `show` reports about one family.
#[derive(Debug, Serialize)]
struct FamilyView {
    name: String,
    section: String,
    atoms: usize,
    /// The presence model's decision threshold on the family's probability.
    #[serde(skip_serializing_if = "Option::is_none")]
    threshold: Option<f32>,
    /// Boosted trees that change the family's logit (the rest hold only zeros).
    #[serde(skip_serializing_if = "Option::is_none")]
    trees_in_use: Option<usize>,
}

/// What `show` reports about the presence model.
#[derive(Debug, Serialize)]
struct PresenceView {
    schema: String,
    features: usize,
    hidden_units: usize,
    #[serde(skip_serializing_if = "Option::is_none")]
    trees_per_family: Option<usize>,
    #[serde(skip_serializing_if = "Option::is_none")]
    tree_depth: Option<usize>,
    #[serde(skip_serializing_if = "Option::is_none")]
    share_network_hidden_units: Option<usize>,
    #[serde(skip_serializing_if = "Option::is_none")]
    share_network_exponent: Option<f32>,
    #[serde(skip_serializing_if = "Option::is_none")]
    share_network_admit: Option<f32>,
}

/// Everything `show` reports.
#[derive(Debug, Serialize)]
struct PaletteView {
    name: String,
    /// The file it was read from; `None` for the built-in palette.
    file: Option<String>,
    bytes: usize,
    format_version: u32,
    weft_version: String,
    source: String,
    seed: u64,
    notes: Vec<String>,
    bands: usize,
    fmin_hz: f64,
    fmax_hz: f64,
    column_ms: f64,
    stacked_columns: usize,
    beta: f64,
    updates_per_column: usize,
    presence_context_s: f64,
    unexplained_tolerance: f64,
    sections: Vec<String>,
    families: Vec<FamilyView>,
    presence: Option<PresenceView>,
    /// Whether split atoms divide the amount stage's energy.
    split_atoms: bool,
}

/// Trees of `family` with at least one leaf that is not zero: a family whose held-back
/// mixes stopped improving early keeps its later trees as zeros.
fn trees_in_use(model: &PresenceModel, family: usize) -> Option<usize> {
    let t = model.trees.as_ref()?;
    let leaves = 1usize << t.depth;
    let per_family = t.trees * leaves;
    let own = t.leaf.get(family * per_family..(family + 1) * per_family)?;
    Some(
        own.chunks_exact(leaves)
            .filter(|tree| tree.iter().any(|&v| v != 0.0))
            .count(),
    )
}

/// The report on `palette`, read from `bytes` (of `file`, or built in).
fn view(palette: &Palette, file: Option<String>, bytes: &[u8]) -> PaletteView {
    let model = palette.presence();
    let spec = palette.analysis();
    let prov = palette.provenance();
    let counts = palette.atom_counts();
    let families = palette
        .families()
        .iter()
        .enumerate()
        .map(|(f, fam)| FamilyView {
            name: fam.name.clone(),
            section: palette.sections()[fam.section].clone(),
            atoms: counts[f],
            threshold: model.and_then(|m| m.thresholds.get(f).copied()),
            trees_in_use: model.and_then(|m| trees_in_use(m, f)),
        })
        .collect();
    let presence = model.map(|m| PresenceView {
        schema: m.schema.clone(),
        features: m.features,
        hidden_units: m.hidden,
        trees_per_family: m.trees.as_ref().map(|t| t.trees),
        tree_depth: m.trees.as_ref().map(|t| t.depth),
        share_network_hidden_units: m.shares.as_ref().map(|s| s.hidden),
        share_network_exponent: m.shares.as_ref().map(|s| s.exponent),
        share_network_admit: m.shares.as_ref().and_then(|s| s.admit),
    });
    PaletteView {
        name: palette.name().to_owned(),
        file,
        bytes: bytes.len(),
        // The file was validated, so its version field (after the magic) is there.
        format_version: bytes
            .get(MAGIC.len()..MAGIC.len() + 4)
            .and_then(|b| b.try_into().ok())
            .map_or(FORMAT_VERSION, u32::from_le_bytes),
        weft_version: prov.weft_version.clone(),
        source: prov.source.clone(),
        seed: prov.seed,
        notes: prov.notes.clone(),
        bands: spec.bands,
        fmin_hz: spec.fmin_hz,
        fmax_hz: spec.fmax_hz,
        column_ms: spec.column_s * 1000.0,
        stacked_columns: spec.stack,
        beta: spec.beta,
        updates_per_column: spec.iterations,
        presence_context_s: spec.presence_context_s,
        unexplained_tolerance: spec.unexplained_tolerance,
        sections: palette.sections().to_vec(),
        families,
        presence,
        split_atoms: palette.split_atoms().is_some(),
    }
}

/// The report as text: a heading, how it was made, the analysis, the families by section,
/// the presence model.
fn render_text(v: &PaletteView) -> String {
    use std::fmt::Write as _;
    let mut s = String::new();
    let whence = v.file.as_deref().unwrap_or("built into weft");
    let _ = writeln!(
        s,
        "palette \"{}\" ({whence}; format {}, {} bytes)",
        v.name, v.format_version, v.bytes
    );
    let _ = writeln!(
        s,
        "made by weft {} from {}; seed {}",
        v.weft_version, v.source, v.seed
    );
    for n in &v.notes {
        let _ = writeln!(s, "  {n}");
    }
    let _ = writeln!(
        s,
        "\nanalysis: {} mel bands {:.0}-{:.0} Hz, columns of {:.0} ms, {} stacked per atom, \
         β = {}, {} updates per column;\n          presence judged over {} s; \
         a fit may miss {:.1} % of a column before the rest counts as unexplained",
        v.bands,
        v.fmin_hz,
        v.fmax_hz,
        v.column_ms,
        v.stacked_columns,
        v.beta,
        v.updates_per_column,
        v.presence_context_s,
        100.0 * v.unexplained_tolerance
    );
    let _ = writeln!(
        s,
        "\n{} families in {} sections:",
        v.families.len(),
        v.sections.len()
    );
    let width = v
        .families
        .iter()
        .map(|f| f.name.chars().count())
        .max()
        .unwrap_or(6)
        .max(6);
    let swidth = v
        .sections
        .iter()
        .map(|x| x.chars().count())
        .max()
        .unwrap_or(7)
        .max(7);
    let _ = write!(s, "  {:swidth$}  {:width$}  atoms", "section", "family");
    if v.presence.is_some() {
        s.push_str("  threshold");
    }
    if v.families.iter().any(|f| f.trees_in_use.is_some()) {
        s.push_str("  trees used");
    }
    s.push('\n');
    for section in &v.sections {
        for (k, f) in v
            .families
            .iter()
            .filter(|f| f.section == *section)
            .enumerate()
        {
            let shown = if k == 0 { section.as_str() } else { "" };
            let _ = write!(s, "  {shown:swidth$}  {:width$}  {:5}", f.name, f.atoms);
            if let Some(t) = f.threshold {
                let _ = write!(s, "  {t:9.3}");
            }
            if let Some(t) = f.trees_in_use {
                let _ = write!(s, "  {t:10}");
            }
            s.push('\n');
        }
    }
    match &v.presence {
        None => {
            s.push_str("\nno presence model: every family takes part in every fit (NMF alone)\n")
        }
        Some(p) => {
            let _ = write!(
                s,
                "\npresence model: {} features ({}), ",
                p.features, p.schema
            );
            if p.hidden_units == 0 {
                s.push_str("logistic regression");
            } else {
                let _ = write!(s, "{} hidden units", p.hidden_units);
            }
            if let (Some(t), Some(d)) = (p.trees_per_family, p.tree_depth) {
                let _ = write!(s, "; {t} boosted trees of depth {d} per family");
            }
            s.push('\n');
            match (p.share_network_hidden_units, p.share_network_exponent) {
                (Some(h), Some(e)) => {
                    let _ = write!(
                        s,
                        "direct share network: {h} hidden units, blend exponent {e}"
                    );
                    match p.share_network_admit {
                        Some(a) => {
                            let _ = writeln!(s, ", admits a family from a share of {a}");
                        }
                        None => s.push_str(", admits no family\n"),
                    }
                }
                _ => s.push_str("no direct share network\n"),
            }
        }
    }
    s.push_str(if v.split_atoms {
        "split atoms divide each column's energy among the present families\n"
    } else {
        "no split atoms: the atoms' own parts of the fit divide each column's energy\n"
    });
    s
}

/// Runs `weft palette show`.
pub fn run(a: &ShowArgs) -> Result<()> {
    let (palette, file, bytes) = match &a.palette {
        Some(p) => {
            let (palette, bytes) = read_palette_file(p)?;
            (palette, Some(p.display().to_string()), Cow::Owned(bytes))
        }
        None => (
            Palette::default_palette(),
            None,
            Cow::Borrowed(Palette::default_palette_bytes()),
        ),
    };
    let v = view(&palette, file, &bytes);
    if a.json {
        println!("{}", serde_json::to_string_pretty(&v)?);
    } else {
        print!("{}", render_text(&v));
    }
    Ok(())
}
