//! What every input to Weft's file loaders must satisfy, shared by the fuzz targets
//! (`fuzz_targets/`) and the regression replay (`engine/tests/fuzz_regressions.rs`, which
//! compiles this file with `#[path]`, so it depends on nothing but `weft_engine` and `std`).
//!
//! A loader returns `Ok` or `Err` and never panics; what it accepts must also be usable:
//! - a palette writes back to bytes that read back equal, and an analyzer built with it turns
//!   a short noise burst into shares that are numbers in 0–1 and sum to 1 (or all 0 without a
//!   signal);
//! - a style model saves back to JSON that loads equal, and estimates realistic windows (its
//!   scaler's mean, each class's mean) with closeness in 0–1 and reasons that are numbers.
//!
//! Each check panics with the broken rule; it returns whether the loader accepted the input.

#![forbid(unsafe_code)]

use weft_engine::palette::Palette;
use weft_engine::shares::SharesSettings;
use weft_engine::style::StyleModel;
use weft_engine::{AnalysisSettings, Analyzer};

/// The rate accepted palettes are tried at, Hz (a low rate keeps each run short).
pub const PALETTE_TRY_RATE_HZ: f64 = 16_000.0;
/// Samples of noise fed to an analyzer built with an accepted palette (0.4 s at
/// [`PALETTE_TRY_RATE_HZ`]: several share columns).
pub const PALETTE_TRY_SAMPLES: usize = 6_400;
/// Largest error allowed on the sum of shares and *unexplained* (f32 sums of ≤ 33 terms).
pub const SHARES_SUM_TOLERANCE: f32 = 1e-3;

/// Checks one palette file input (see the crate documentation). Returns whether it loaded.
///
/// # Panics
/// When a rule is broken (that is the finding).
pub fn check_palette_input(data: &[u8]) -> bool {
    let Ok(palette) = Palette::from_bytes(data) else {
        return false;
    };
    let bytes = palette.to_bytes();
    match Palette::from_bytes(&bytes) {
        Ok(again) => assert!(again == palette, "an accepted palette reads back different"),
        Err(err) => panic!("an accepted palette does not read back: {err}"),
    }
    let Ok(settings) = AnalysisSettings::for_sample_rate(PALETTE_TRY_RATE_HZ) else {
        panic!("{PALETTE_TRY_RATE_HZ} Hz must be a valid analysis rate");
    };
    // A palette whose bands cannot be built at this rate may be refused here, with a reason.
    let Ok(mut analyzer) = Analyzer::with_palette(settings, &palette, SharesSettings::default())
    else {
        return true;
    };
    // xorshift64 noise (G. Marsaglia, "Xorshift RNGs", 2003), fixed seed.
    let mut state = 0x9E37_79B9_7F4A_7C15_u64;
    let noise: Vec<f32> = (0..PALETTE_TRY_SAMPLES)
        .map(|_| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5
        })
        .collect();
    analyzer.process(&noise, None, |f| {
        for s in [&f.shares.raw, &f.shares.smoothed] {
            let mut total = 0.0_f32;
            for &v in s.share[..s.families].iter().chain([&s.unexplained]) {
                assert!(
                    v.is_finite() && (0.0..=1.0 + SHARES_SUM_TOLERANCE).contains(&v),
                    "share {v} out of 0–1: {s:?}"
                );
                total += v;
            }
            let want = if s.signal { 1.0 } else { 0.0 };
            assert!(
                (total - want).abs() <= SHARES_SUM_TOLERANCE,
                "shares sum to {total}, expected {want}: {s:?}"
            );
        }
    });
    true
}

/// Checks one style model file input (see the crate documentation). Returns whether it loaded.
///
/// # Panics
/// When a rule is broken (that is the finding).
pub fn check_style_model_input(data: &[u8]) -> bool {
    let Ok(text) = std::str::from_utf8(data) else {
        return false;
    };
    let Ok(model) = StyleModel::from_json(text) else {
        return false;
    };
    let json = match model.to_json() {
        Ok(json) => json,
        Err(err) => panic!("an accepted model cannot be saved: {err}"),
    };
    match StyleModel::from_json(&json) {
        Ok(again) => assert!(again == model, "an accepted model reads back different"),
        Err(err) => panic!("an accepted model does not read back: {err}"),
    }
    let mut windows = vec![model.scaler().mean().to_vec()];
    for class in 0..model.n_classes() {
        if let Some(mean) = model.class_mean(class) {
            windows.push(mean.to_vec());
        }
    }
    for window in &windows {
        for class in 0..model.n_classes() {
            let estimate = match model.estimate(window, class) {
                Ok(estimate) => estimate,
                Err(err) => panic!("an accepted model refuses a finite window: {err}"),
            };
            for &c in estimate.closeness() {
                assert!((0.0..=1.0).contains(&c), "closeness {c} out of 0–1");
            }
            assert!(estimate.predicted() < model.n_classes());
            assert!(!estimate.base_log_odds().is_nan(), "base log-odds is NaN");
            for reason in estimate.reasons() {
                assert!(reason.feature < model.n_features(), "{reason:?}");
                assert!(!reason.push_log_odds.is_nan(), "{reason:?}");
            }
        }
    }
    true
}
