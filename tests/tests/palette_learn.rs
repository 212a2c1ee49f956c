//! Learning a palette from recordings (what `weft palette learn` does after decoding the
//! folders): three "recorded" families — a church organ, a choir singer and a fingered bass,
//! rendered from the General MIDI SoundFont (FluidR3_GM) as stand-ins for a user's own ≥ 10 s
//! recordings — are learned, then detected in held-out mixes built from other recordings
//! (other notes, seeds and velocities) of the same instruments.

use weft_engine::palette::{
    BuildPlan, CheckPlan, Family, LearnSettings, Palette, Provenance, SplitTraining, build_palette,
    check_palette, fit_split,
};
use weft_engine::scene::{ClipBank, Composer, FamilyVoicing, Role, SoundFontRenderer, VoiceSource};
use weft_engine::shares::check::CheckReport;
use weft_engine::shares::trees::TreeTraining;
use weft_engine::shares::{PresenceTraining, SharesMode};

const SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";
const SR: u32 = 48_000;

fn instrument(name: &str, program: u8, keys: (u8, u8), role: Role) -> FamilyVoicing {
    FamilyVoicing {
        family: name.into(),
        source: VoiceSource::Programs(vec![program]),
        keys,
        velocities: (50, 120),
        roles: vec![role],
    }
}

/// `count` recordings of `seconds` each, of every instrument, from seeds starting at `seed`.
fn recordings(renderer: &SoundFontRenderer, seed: u64, count: u64, seconds: f64) -> ClipBank {
    let instruments = vec![
        instrument("my organ", 19, (48, 84), Role::Chords),
        instrument("my singer", 52, (50, 74), Role::Line),
        instrument("my bass", 33, (28, 52), Role::Bass),
    ];
    let composer = Composer::new(instruments, vec![], 0.0);
    let mut bank = ClipBank::new(3);
    for f in 0..3 {
        for k in 0..count {
            let score = composer.compose(seed + 100 * f as u64 + k, &[f], seconds);
            let stems = renderer
                .render_stems(&score, 3, &ClipBank::new(3))
                .expect("renders");
            if let Some(stem) = stems[f].clone() {
                bank.add(f, stem);
            }
        }
    }
    bank
}

fn clip_voicing(name: &str) -> FamilyVoicing {
    FamilyVoicing {
        family: name.into(),
        source: VoiceSource::Clips,
        keys: (0, 127),
        velocities: (1, 127),
        roles: vec![Role::Line],
    }
}

/// The three families' recordings to learn from and to check with, and their voicings.
struct Scene {
    train: ClipBank,
    held_out: ClipBank,
    voicings: Vec<FamilyVoicing>,
}

fn scene() -> Scene {
    let file = std::fs::File::open(SOUNDFONT)
        .unwrap_or_else(|e| panic!("{SOUNDFONT} is missing ({e}): run cargo xtask setup"));
    let renderer = SoundFontRenderer::new(&mut std::io::BufReader::new(file), SR).expect("loads");
    // 2 × 6 s = 12 s of recordings per family to learn from; other recordings to check with.
    Scene {
        train: recordings(&renderer, 1, 2, 6.0),
        held_out: recordings(&renderer, 5000, 2, 6.0),
        voicings: NAMES.iter().map(|n| clip_voicing(n)).collect(),
    }
}

const NAMES: [&str; 3] = ["my organ", "my singer", "my bass"];

/// Learns the three families from the scene's recordings with `plan`.
fn learn(scene: &Scene, plan: &BuildPlan) -> Palette {
    let families = NAMES
        .iter()
        .enumerate()
        .map(|(i, n)| Family {
            name: (*n).into(),
            section: i,
        })
        .collect();
    let sections = vec!["keys".into(), "voice".into(), "bass".into()];
    build_palette(
        "mine",
        families,
        sections,
        None,
        &Composer::new(scene.voicings.clone(), scene.train.counts(), 1.0),
        &scene.train,
        plan,
        Provenance::default(),
        &|_| {},
    )
    .expect("learns")
}

/// Checks `palette` on held-out mixes of the scene's other recordings.
fn check(scene: &Scene, palette: &Palette) -> CheckReport {
    let check = CheckPlan {
        mixes: 10,
        mix_s: 4.0,
        max_families: 3,
        seed: 9,
        ..CheckPlan::default()
    };
    check_palette(
        palette,
        None,
        &Composer::new(scene.voicings.clone(), scene.held_out.counts(), 1.0),
        &scene.held_out,
        &check,
        SharesMode::TwoStage,
    )
    .expect("checks")
}

/// Learns the three families with `plan` and checks the palette on held-out recordings.
fn learn_and_check(plan: &BuildPlan) -> (Palette, CheckReport) {
    let scene = scene();
    let palette = learn(&scene, plan);
    let r = check(&scene, &palette);
    (palette, r)
}

fn plan(presence: PresenceTraining, row_stride: usize) -> BuildPlan {
    BuildPlan {
        learn: LearnSettings {
            atoms: 8,
            iterations: 80,
            ..LearnSettings::default()
        },
        training_mixes: 60,
        mix_s: 3.0,
        row_stride,
        max_families: 3,
        presence,
        seed: 3,
        ..BuildPlan::default()
    }
}

#[test]
fn own_recordings_are_learned_and_detected() {
    let (_, r) = learn_and_check(&plan(PresenceTraining::default(), 1));
    let j = r.to_json();
    println!("seeds 1/5000/3/9: {j}");
    // Bounds: what this test reached when written (worst recall 0.71, F1 0.85, 39 % energy
    // misattributed, uniform guess 56 %) with a margin of about 0.1 / 7 points.
    for g in &r.family.groups {
        assert!(
            g.windows_present > 0,
            "{}: never present in the check",
            g.name
        );
        assert!(
            g.recall >= 0.6,
            "{}: detected in too few windows: {j}",
            g.name
        );
    }
    assert!(r.family.f1 >= 0.75, "{j}");
    assert!(r.family.tv_pct < r.family.uniform_tv_pct, "{j}");
    assert!(r.family.tv_pct <= 46.0, "{j}");
}

#[test]
fn boosted_trees_and_every_second_row_still_detect_own_recordings() {
    let presence = PresenceTraining {
        trees: TreeTraining {
            trees: 40,
            depth: 3,
            ..TreeTraining::default()
        },
        ..PresenceTraining::default()
    };
    let (palette, r) = learn_and_check(&plan(presence, 2));
    let j = r.to_json();
    println!("seeds 1/5000/3/9, trees, every second row: {j}");
    let trees = palette
        .presence()
        .and_then(|m| m.trees.as_ref())
        .expect("the palette carries its trees");
    assert!(
        (1..=40).contains(&trees.trees) && trees.depth == 3,
        "{trees:?}"
    );
    // Bounds: those of the test above (the same recordings, half the rows).
    assert!(r.family.f1 >= 0.75, "{j}");
    assert!(r.family.tv_pct <= 46.0, "{j}");
}

#[test]
fn split_atoms_are_the_build_s_last_step_and_leave_presence_alone() {
    let scene = scene();
    let without = plan(PresenceTraining::default(), 1);
    let with = BuildPlan {
        split: SplitTraining {
            mixes: 200,
            mix_s: 3.0,
            updates: 150,
        },
        ..without.clone()
    };
    let plain = learn(&scene, &without);
    let built = learn(&scene, &with);
    // The build's last step is the same fit that `--split-only` runs on the plain palette.
    let composer = Composer::new(scene.voicings.clone(), scene.train.counts(), 1.0);
    let told = std::sync::Mutex::new(Vec::new());
    let tell = |m: &str| told.lock().expect("lock").push(m.to_owned());
    let refitted =
        fit_split(plain.clone(), None, &composer, &scene.train, &with, &tell).expect("fits");
    let verdict = told
        .into_inner()
        .expect("lock")
        .into_iter()
        .find(|m| m.starts_with("split atoms"))
        .expect("a verdict");
    println!("{verdict}");
    assert_eq!(built, refitted);
    assert_eq!(built.atoms(), plain.atoms());
    assert_eq!(built.presence(), plain.presence());
    let r0 = check(&scene, &plain);
    let r1 = check(&scene, &built);
    println!(
        "seeds 1/5000/3/9, split atoms {}: energy misattributed {:.2} → {:.2} %, F1 {:.3} → {:.3}",
        if built.split_atoms().is_some() {
            "kept"
        } else {
            "left out"
        },
        r0.family.tv_pct,
        r1.family.tv_pct,
        r0.family.f1,
        r1.family.f1
    );
    // Kept: they divided the held-back mixes' columns better, and on the held-out recordings
    // (other notes and seeds) they misattribute less energy than the palette without them
    // (38.97 → 38.69 % when written; presence F1 0.836 → 0.846, which the check judges from
    // the estimated shares).
    assert!(built.split_atoms().is_some(), "{verdict}");
    assert!(verdict.starts_with("split atoms: "), "{verdict}");
    assert!(r1.family.tv_pct < r0.family.tv_pct, "{}", r1.to_json());
}
