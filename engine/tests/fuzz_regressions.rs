//! Hostile files through the two file loaders, in a normal test run:
//!
//! - every input in the fuzzing regression corpus, `tests/corpus/palette_load/` and
//!   `tests/corpus/style_model_load/` (inputs the fuzzers found or that mark a limit);
//! - seeded damage of valid files: the built-in palette, a small palette with a presence model
//!   and boosted trees, and a style model of each kind written by the engine — cut at many
//!   places, bit-flipped, and (for the JSON) with numbers swapped for hostile ones.
//!
//! Each input goes through the same rules as the fuzz targets (`fuzz/src/lib.rs`, compiled
//! here): `Ok` or `Err`, never a panic, and what loads must be usable.
//!
//! With `WEFT_FUZZ_SEED_DIR` set, the valid files are also written there as the fuzzers' seed
//! corpus (`<dir>/palette_load/`, `<dir>/style_model_load/`; see `fuzz/README.md`).

#[allow(dead_code)]
#[path = "../../fuzz/src/lib.rs"]
mod loader_checks;

use loader_checks::{check_palette_input, check_style_model_input};
use rand::rngs::SmallRng;
use rand::{Rng, SeedableRng};
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::{Path, PathBuf};
use weft_engine::evaluation::{cross_validate, default_folds};
use weft_engine::palette::{AnalysisSpec, Family, Palette, Provenance};
use weft_engine::shares::presence::feature_count;
use weft_engine::shares::trees::TreeTraining;
use weft_engine::shares::{PresenceTraining, train_presence};
use weft_engine::style::{
    FeatureMatrix, FeatureSchema, ForestParams, LabelledWindows, ModelKind, ModelParams, StyleModel,
};

/// Seed of every random choice here; printed with every failure.
const SEED: u64 = 0xF022_5EED_0008;
/// Where the fuzzers' seed corpus is written when set.
const SEED_DIR_ENV: &str = "WEFT_FUZZ_SEED_DIR";
/// Random cut points per valid file (besides every cut in the first [`CUT_ALL_BELOW`] bytes).
const RANDOM_CUTS: usize = 200;
/// Every prefix shorter than this is tried.
const CUT_ALL_BELOW: usize = 64;
/// Single bit flips per valid file.
const BIT_FLIPS: usize = 600;
/// JSON files with a few numbers replaced, per style model.
const NUMBER_SWAPS: usize = 300;
/// Numbers a hostile or damaged model file may hold instead of the real ones.
const HOSTILE_NUMBERS: [&str; 12] = [
    "0",
    "-0",
    "-1",
    "1e308",
    "-1e308",
    "1e-320",
    "4294967296",
    "18446744073709551615",
    "-9223372036854775808",
    "0.5",
    "1000000000",
    "2.5e-300",
];

/// Which loader an input is for.
#[derive(Debug, Clone, Copy)]
enum Target {
    Palette,
    StyleModel,
}

impl Target {
    fn corpus_name(self) -> &'static str {
        match self {
            Self::Palette => "palette_load",
            Self::StyleModel => "style_model_load",
        }
    }

    /// Runs the fuzz target's rules on one input; a panic becomes a failure naming the input.
    fn check(self, data: &[u8], what: &str) -> bool {
        let run = || match self {
            Self::Palette => check_palette_input(data),
            Self::StyleModel => check_style_model_input(data),
        };
        match catch_unwind(AssertUnwindSafe(run)) {
            Ok(accepted) => accepted,
            Err(payload) => {
                let message = payload
                    .downcast_ref::<String>()
                    .map(String::as_str)
                    .or_else(|| payload.downcast_ref::<&str>().copied())
                    .unwrap_or("(no message)");
                panic!(
                    "{} input '{what}' ({} bytes) broke a rule: {message} (seed {SEED:#x})",
                    self.corpus_name(),
                    data.len()
                );
            }
        }
    }
}

fn corpus_dir(target: Target) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/corpus")
        .join(target.corpus_name())
}

/// Every file of a corpus folder, sorted by name. The folder must exist and hold files.
fn corpus(target: Target) -> Vec<(String, Vec<u8>)> {
    let dir = corpus_dir(target);
    let entries = std::fs::read_dir(&dir)
        .unwrap_or_else(|err| panic!("cannot read the corpus {}: {err}", dir.display()));
    let mut files: Vec<(String, Vec<u8>)> = entries
        .map(|entry| {
            let path = entry
                .unwrap_or_else(|err| panic!("{}: {err}", dir.display()))
                .path();
            let bytes = std::fs::read(&path)
                .unwrap_or_else(|err| panic!("cannot read {}: {err}", path.display()));
            (path.display().to_string(), bytes)
        })
        .collect();
    files.sort();
    assert!(!files.is_empty(), "the corpus {} is empty", dir.display());
    files
}

/// Writes a valid file into the fuzzers' seed corpus when [`SEED_DIR_ENV`] is set.
fn write_seed(target: Target, name: &str, bytes: &[u8]) {
    let Some(dir) = std::env::var_os(SEED_DIR_ENV) else {
        return;
    };
    let dir = PathBuf::from(dir).join(target.corpus_name());
    std::fs::create_dir_all(&dir).unwrap_or_else(|err| panic!("{}: {err}", dir.display()));
    let path = dir.join(name);
    std::fs::write(&path, bytes).unwrap_or_else(|err| panic!("{}: {err}", path.display()));
}

/// How many damaged inputs were tried and how many still loaded.
#[derive(Debug, Default)]
struct Tally {
    tried: usize,
    accepted: usize,
}

impl Tally {
    fn check(&mut self, target: Target, data: &[u8], what: &str) {
        self.tried += 1;
        self.accepted += usize::from(target.check(data, what));
    }
}

/// Cuts and bit flips of one valid file.
fn damage(target: Target, name: &str, valid: &[u8], rng: &mut SmallRng, tally: &mut Tally) {
    assert!(
        target.check(valid, name),
        "the valid file '{name}' was refused (seed {SEED:#x})"
    );
    for cut in 0..CUT_ALL_BELOW.min(valid.len()) {
        tally.check(target, &valid[..cut], &format!("{name} cut at {cut}"));
    }
    for _ in 0..RANDOM_CUTS {
        let cut = rng.gen_range(0..valid.len());
        let accepted = target.check(&valid[..cut], &format!("{name} cut at {cut}"));
        assert!(
            !accepted,
            "'{name}' cut at {cut} of {} bytes still loaded (seed {SEED:#x})",
            valid.len()
        );
        tally.tried += 1;
    }
    let mut flipped = valid.to_vec();
    for _ in 0..BIT_FLIPS {
        let at = rng.gen_range(0..flipped.len());
        let bit = 1_u8 << rng.gen_range(0..8);
        flipped[at] ^= bit;
        tally.check(
            target,
            &flipped,
            &format!("{name} with bit {bit:#04x} of byte {at} flipped"),
        );
        flipped[at] ^= bit;
    }
}

/// A small palette (2 families, 16 bands, 2 stacked columns) with a presence model, boosted
/// trees and split atoms: cheap to load, so the fuzzer mutates a whole valid file rather than a truncated large
/// one.
fn small_palette(seed: u64) -> Palette {
    let mut rng = SmallRng::seed_from_u64(seed);
    let analysis = AnalysisSpec {
        bands: 16,
        stack: 2,
        ..AnalysisSpec::DEFAULT
    };
    let counts = vec![2, 3];
    let atoms: Vec<f32> = (0..5 * analysis.dims())
        .map(|_| rng.gen_range(0.01_f32..1.0))
        .collect();
    let d = feature_count(2, 5);
    let rows: Vec<f32> = (0..40 * d).map(|_| rng.gen_range(0.0_f32..1.0)).collect();
    let labels: Vec<bool> = (0..80).map(|i| i % 3 == 0).collect();
    let presence = train_presence(
        &rows,
        d,
        &labels,
        2,
        &PresenceTraining {
            hidden: 4,
            epochs: 2,
            seed,
            // A few boosted trees, so damage reaches their arrays and shapes too.
            trees: TreeTraining {
                trees: 3,
                depth: 2,
                patience: 100,
                ..TreeTraining::default()
            },
            ..PresenceTraining::default()
        },
    );
    Palette::new(
        "fuzz seed".into(),
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
        Some(presence),
        Provenance {
            weft_version: "0".into(),
            source: "fuzz seed".into(),
            seed,
            notes: vec![],
        },
    )
    .and_then(|p| {
        // Split atoms too, so damage reaches the last section of the file.
        let split: Vec<f32> = p
            .atoms()
            .iter()
            .map(|v| v * rng.gen_range(0.5_f32..1.5))
            .collect();
        p.with_split_atoms(Some(split))
    })
    .unwrap_or_else(|err| panic!("the small palette is valid: {err} (seed {seed:#x})"))
}

/// A style model of `kind` trained on `classes` classes of seeded windows over 4 features (as
/// `weft style train` writes it).
fn style_model_json(kind: ModelKind, classes: usize, seed: u64) -> String {
    let mut rng = SmallRng::seed_from_u64(seed);
    let f = 4;
    let (mut values, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
    for t in 0..6 * classes {
        let class = t % classes;
        for _ in 0..4 {
            for j in 0..f {
                let shift = if j < 2 { class as f64 } else { 0.0 };
                values.push(10.0 * j as f64 + shift + rng.gen_range(-0.8..0.8));
            }
            labels.push(class);
            tracks.push(t);
        }
    }
    let data = LabelledWindows::new(
        FeatureSchema::new(
            "weft-window",
            1,
            "default v1",
            (0..f).map(|j| format!("feature_{j}")).collect(),
        )
        .unwrap_or_else(|err| panic!("schema: {err}")),
        (0..classes).map(|c| format!("class {c}")).collect(),
        FeatureMatrix::new(f, values).unwrap_or_else(|err| panic!("matrix: {err}")),
        labels,
        tracks,
        None,
    )
    .unwrap_or_else(|err| panic!("windows: {err}"));
    let params = match ModelParams::default_for(kind, seed) {
        ModelParams::Forest(p) => ModelParams::Forest(ForestParams {
            n_trees: 5,
            threads: 1,
            ..p
        }),
        other => other,
    };
    let plan = default_folds(&data, 3).unwrap_or_else(|err| panic!("folds: {err}"));
    let cv = cross_validate(&data, &params, &plan, &mut |_, _| {})
        .unwrap_or_else(|err| panic!("cross-validation: {err}"));
    let model = StyleModel::fit(&data, &cv).unwrap_or_else(|err| panic!("fit: {err}"));
    model.to_json().unwrap_or_else(|err| panic!("save: {err}"))
}

/// Byte ranges of the JSON number tokens in `text`.
fn number_spans(text: &str) -> Vec<(usize, usize)> {
    let bytes = text.as_bytes();
    let mut spans = Vec::new();
    let mut in_string = false;
    let mut i = 0;
    while i < bytes.len() {
        let b = bytes[i];
        if in_string {
            match b {
                b'\\' => i += 1,
                b'"' => in_string = false,
                _ => {}
            }
            i += 1;
            continue;
        }
        if b == b'"' {
            in_string = true;
            i += 1;
        } else if b == b'-' || b.is_ascii_digit() {
            let start = i;
            while i < bytes.len()
                && matches!(bytes[i], b'0'..=b'9' | b'-' | b'+' | b'.' | b'e' | b'E')
            {
                i += 1;
            }
            spans.push((start, i));
        } else {
            i += 1;
        }
    }
    spans
}

#[test]
fn the_palette_corpus_replays_without_a_panic() {
    let files = corpus(Target::Palette);
    let mut accepted = 0;
    for (name, bytes) in &files {
        accepted += usize::from(Target::Palette.check(bytes, name));
    }
    println!(
        "palette corpus: {} inputs replayed, {accepted} loaded, none panicked",
        files.len()
    );
}

#[test]
fn the_style_model_corpus_replays_without_a_panic() {
    let files = corpus(Target::StyleModel);
    let mut accepted = 0;
    for (name, bytes) in &files {
        accepted += usize::from(Target::StyleModel.check(bytes, name));
    }
    println!(
        "style model corpus: {} inputs replayed, {accepted} loaded, none panicked",
        files.len()
    );
}

#[test]
fn damaged_palettes_are_refused_or_usable() {
    let mut rng = SmallRng::seed_from_u64(SEED);
    let mut tally = Tally::default();
    let built_in = Palette::default_palette_bytes();
    write_seed(Target::Palette, "built-in.weftpal", built_in);
    damage(
        Target::Palette,
        "built-in palette",
        built_in,
        &mut rng,
        &mut tally,
    );
    let small = small_palette(SEED).to_bytes();
    write_seed(Target::Palette, "small.weftpal", &small);
    damage(
        Target::Palette,
        "small palette",
        &small,
        &mut rng,
        &mut tally,
    );
    // Bit flips inside atom values keep many files loadable: the rules for what loads ran too.
    assert!(
        tally.accepted > 0,
        "no damaged palette loaded: the usability rules never ran (seed {SEED:#x})"
    );
    println!(
        "damaged palettes: {} tried, {} loaded and were usable, none panicked",
        tally.tried, tally.accepted
    );
}

#[test]
fn damaged_style_models_are_refused_or_usable() {
    let mut rng = SmallRng::seed_from_u64(SEED ^ 0x5717E);
    let mut tally = Tally::default();
    let mut swapped = Tally::default();
    for (kind, classes) in [
        (ModelKind::Forest, 3),
        (ModelKind::LinearSvm, 2),
        (ModelKind::Logistic, 3),
    ] {
        let json = style_model_json(kind, classes, SEED);
        let name = format!("{kind} model, {classes} classes");
        write_seed(
            Target::StyleModel,
            &format!("{kind}-{classes}.json"),
            json.as_bytes(),
        );
        damage(
            Target::StyleModel,
            &name,
            json.as_bytes(),
            &mut rng,
            &mut tally,
        );
        let spans = number_spans(&json);
        assert!(
            spans.len() > 20,
            "{name}: only {} numbers found",
            spans.len()
        );
        for _ in 0..NUMBER_SWAPS {
            let mut text = json.clone();
            let mut picks: Vec<(usize, usize)> = (0..rng.gen_range(1..=3))
                .map(|_| spans[rng.gen_range(0..spans.len())])
                .collect();
            // Replace from the end so earlier spans keep their offsets.
            picks.sort_unstable();
            picks.dedup();
            let mut what = Vec::new();
            for &(start, end) in picks.iter().rev() {
                let number = HOSTILE_NUMBERS[rng.gen_range(0..HOSTILE_NUMBERS.len())];
                what.push(format!("{} at byte {start} → {number}", &json[start..end]));
                text.replace_range(start..end, number);
            }
            swapped.check(
                Target::StyleModel,
                text.as_bytes(),
                &format!("{name} with {}", what.join(", ")),
            );
        }
    }
    assert!(
        tally.accepted + swapped.accepted > 0,
        "no damaged model loaded: the usability rules never ran (seed {SEED:#x})"
    );
    println!(
        "damaged style models: {} cut or flipped ({} loaded), {} with hostile numbers ({} \
         loaded), all refused or usable",
        tally.tried, tally.accepted, swapped.tried, swapped.accepted
    );
}
