//! A small `palette check` of the built-in palette on a fixed seed: held-out mixes rendered from
//! the General MIDI SoundFont (FluidR3_GM, Debian `fluid-soundfont-gm`) with exact ground truth,
//! scored against the bounds the palette reaches (see the constants: the goals are
//! 25 % / 15 % / F1 0.85; the measured gap is reported in the palette note).

use weft_engine::palette::{CheckPlan, Palette, check_palette};
use weft_engine::scene::{ClipBank, Composer, SoundFontRenderer, general_midi_voicings};
use weft_engine::shares::SharesMode;

const SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";
const SEED: u64 = 11;

/// Bounds asserted on this small check: what the built-in palette reached on this seed when it
/// was made (19.4 %, 16.2 %, F1 0.83: worse here in energy than the palette before, 18.7 %,
/// 15.0 %, 0.81, but better in the mean of seeds 1–6 of 60 mixes in every figure, so we read the
/// rise on these 39 windows as noise; before those, 21.1 %, 17.7 %, 0.79, then 22.0 %, 17.6 %,
/// 0.78, then 28.8 %, 24.4 %, 0.68, then 29.3 %, 25.1 %, 0.69, then 30.1 %, 26.1 %,
/// 0.71, then 33.3 %, 29.0 %, 0.68 and 41.1 %, 36.4 %, 0.49)
/// with a margin of about 6–7 points. The goals (25 %, 15 %, 0.85) are met on this small
/// seed for the families only; over seeds 1–6 of 60 mixes they are not (see the palette note).
/// Regenerating the palette must not make these figures worse.
const MAX_TV_PCT: f64 = 26.0;
const MAX_SECTION_TV_PCT: f64 = 22.0;
const MIN_PRESENCE_F1: f64 = 0.76;

#[test]
fn small_fixed_seed_check_meets_the_measured_bounds() {
    let file = std::fs::File::open(SOUNDFONT)
        .unwrap_or_else(|e| panic!("{SOUNDFONT} is missing ({e}): run cargo xtask setup"));
    let renderer = SoundFontRenderer::new(&mut std::io::BufReader::new(file), 48_000)
        .expect("the SoundFont loads");
    let palette = Palette::default_palette();
    let composer = Composer::new(general_midi_voicings(), vec![], 0.0);
    let plan = CheckPlan {
        mixes: 10,
        mix_s: 4.0,
        seed: SEED,
        threads: 2,
        ..CheckPlan::default()
    };
    let r = check_palette(
        &palette,
        Some(&renderer),
        &composer,
        &ClipBank::new(16),
        &plan,
        SharesMode::TwoStage,
    )
    .expect("check runs");
    let j = r.to_json();
    println!("seed {SEED}: {j}");
    assert!(
        r.windows >= 30,
        "seed {SEED}: only {} windows scored",
        r.windows
    );
    // The product must beat both baselines, at both levels.
    assert!(
        r.family.tv_pct < r.family.uniform_tv_pct,
        "seed {SEED}: {j}"
    );
    assert!(r.family.tv_pct < r.family.nmf_tv_pct, "seed {SEED}: {j}");
    assert!(
        r.section.tv_pct < r.section.uniform_tv_pct,
        "seed {SEED}: {j}"
    );
    assert!(r.family.tv_pct <= MAX_TV_PCT, "seed {SEED}: {j}");
    assert!(r.section.tv_pct <= MAX_SECTION_TV_PCT, "seed {SEED}: {j}");
    assert!(r.family.f1 >= MIN_PRESENCE_F1, "seed {SEED}: {j}");
    assert!(r.unexplained_mean < 0.15, "seed {SEED}: {j}");
    for key in [
        "tv_pct",
        "section_tv_pct",
        "present_mae_pp",
        "presence_f1",
        "baseline_uniform_tv_pct",
        "baseline_nmf_tv_pct",
        "unexplained_mean",
        "realtime_factor",
        "per_family",
    ] {
        assert!(j.get(key).is_some(), "missing key {key}");
    }
    assert_eq!(j["per_family"].as_object().map(|o| o.len()), Some(16));
    // Where a lone family's energy goes: what it keeps and what others take add up to no more
    // than the whole.
    assert!(
        !r.alone.is_empty(),
        "seed {SEED}: no family ever played alone: {j}"
    );
    for a in &r.alone {
        let taken: f64 = a.taken_by.iter().map(|(_, p)| p).sum();
        assert!(a.windows > 0 && a.truth_pct >= 90.0, "{a:?}");
        assert!((0.0..=100.0).contains(&a.kept_pct), "{a:?}");
        // Shares are f32: their sum may pass 1 by a few units in the last place.
        assert!(a.kept_pct + taken <= 100.0 + 1e-4, "{a:?}");
        assert!(j["alone"][a.name.as_str()]["kept_pct"].is_number(), "{j}");
    }
    // The groups by how many families sound split the windows: their counts add up, and their
    // window-weighted energy misattributed is the whole check's.
    let windows: usize = r.by_density.iter().map(|d| d.windows).sum();
    assert_eq!(windows, r.windows, "{j}");
    let weighted: f64 = r
        .by_density
        .iter()
        .map(|d| d.tv_pct * d.windows as f64)
        .sum::<f64>()
        / r.windows as f64;
    assert!((weighted - r.family.tv_pct).abs() < 1e-6, "{j}");
    assert_eq!(
        j["by_density"].as_array().map(Vec::len),
        Some(r.by_density.len())
    );
    assert!((0.0..=100.0).contains(&r.family.borderline_pct), "{j}");
}
