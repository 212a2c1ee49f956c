//! The mix and style readouts through a real CLAP host (clack-host 0.2.0): a style model chosen
//! in saved plugin state is loaded by the analysis and its closeness and reasons reach the
//! snapshot; a model file that has vanished since the session was saved is reported in words and
//! nothing else is lost (the mix still comes, the audio still passes bit-exact).

use std::path::{Path, PathBuf};
use weft_engine::evaluation;
use weft_engine::palette::Palette;
use weft_engine::style::{FeatureMatrix, LabelledWindows, ModelKind, ModelParams, StyleModel};
use weft_engine::windows::{self, WindowSpec};
use weft_tests::{Settings, Snapshot, WeftPlugin, state_format};

const RATE_HZ: u32 = 48_000;
const BLOCK: usize = 512;

/// Seeded material: "bright" is noise over a high tone, "dark" a low tone.
fn clip(bright: bool, seed: u64, seconds: f64) -> Vec<f32> {
    let mut state = seed | 1;
    let sr = f64::from(RATE_HZ);
    (0..(sr * seconds) as usize)
        .map(|i| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            let noise = (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
            let t = i as f64 / sr;
            if bright {
                0.4 * noise + (0.1 * (std::f64::consts::TAU * 3_000.0 * t).sin()) as f32
            } else {
                (0.4 * (std::f64::consts::TAU * 110.0 * t).sin()) as f32 + 0.01 * noise
            }
        })
        .collect()
}

/// Trains "bright" vs "rest" on the engine's own windows (what `weft style train` does) and
/// saves it.
fn train(path: &Path) {
    let palette = Palette::default_palette();
    let spec = WindowSpec::default();
    let (mut rows, mut labels, mut tracks) = (Vec::new(), Vec::new(), Vec::new());
    for track in 0..8 {
        let bright = track % 2 == 0;
        let x = clip(bright, 40 + track as u64, 5.0);
        for w in windows::clip_windows(&palette, spec, f64::from(RATE_HZ), &x).expect("windows") {
            rows.push(w.features);
            labels.push(usize::from(!bright));
            tracks.push(track);
        }
    }
    let data = LabelledWindows::new(
        windows::schema(spec, &palette).expect("schema"),
        vec!["bright".into(), "rest".into()],
        FeatureMatrix::from_rows(&rows).expect("rows"),
        labels,
        tracks,
        None,
    )
    .expect("data");
    let plan = evaluation::default_folds(&data, 4).expect("folds");
    let params = ModelParams::default_for(ModelKind::Logistic, 11);
    let cv = evaluation::cross_validate(&data, &params, &plan, &mut |_, _| {}).expect("cv");
    StyleModel::fit(&data, &cv)
        .expect("fit")
        .save(path)
        .expect("save");
}

/// Saved state with the panel's persisted settings replaced (nice-plug stores a persisted
/// field as a JSON string under `fields`).
fn with_panel(bytes: &[u8], panel: &serde_json::Value) -> Vec<u8> {
    let mut json = state_format::decode(bytes).expect("saved state decodes");
    assert!(
        json["fields"]["panel"].is_string(),
        "no persisted panel settings in {json}"
    );
    json["fields"]["panel"] = serde_json::Value::String(panel.to_string());
    state_format::encode(&json)
}

/// A plugin whose saved state names `style_path`, run offline over `signal` (stereo copies);
/// returns the snapshot, after checking the audio passed through bit-exact.
fn run_with_style(style_path: &Path, signal: &[f32]) -> Snapshot {
    let mut plugin = WeftPlugin::new().expect("plugin");
    let state = plugin.save_state().expect("save");
    let state = with_panel(
        &state,
        &serde_json::json!({ "style_path": style_path.display().to_string() }),
    );
    let mut plugin = WeftPlugin::new().expect("plugin");
    plugin.load_state(&state).expect("state accepted");
    plugin
        .activate(Settings {
            sample_rate_hz: f64::from(RATE_HZ),
            max_block: BLOCK as u32,
            channels: 2,
            offline: true,
        })
        .expect("activate");
    let mut outputs = vec![vec![0.0_f32; BLOCK]; 2];
    for block in signal.chunks(BLOCK) {
        let mut inputs = vec![block.to_vec(), block.to_vec()];
        for o in &mut outputs {
            o.resize(block.len(), 0.0);
            o.fill(f32::NAN);
        }
        plugin.process(&mut inputs, &mut outputs).expect("process");
        for o in &outputs {
            assert!(
                o.iter().zip(block).all(|(a, b)| a.to_bits() == b.to_bits()),
                "audio changed"
            );
        }
    }
    plugin.deactivate().expect("deactivate")
}

fn temp_dir(name: &str) -> PathBuf {
    let dir = std::env::temp_dir().join(format!("weft-{name}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).expect("temp dir");
    dir
}

#[test]
fn a_style_model_in_saved_state_gives_closeness_and_reasons() {
    let dir = temp_dir("host-style");
    let model = dir.join("bright.weftstyle");
    train(&model);
    let signal = clip(true, 777, 7.0);
    let snap = run_with_style(&model, &signal);
    assert_eq!(snap.samples_analysed, signal.len() as u64);
    assert_eq!(snap.style_problem, None);
    let style = &snap.style;
    assert_eq!(style["category"], "bright", "{style}");
    assert!(style["windows"].as_u64().unwrap_or(0) >= 4, "{style}");
    let closeness = style["closeness"].as_f64().expect("closeness");
    assert!(closeness > 0.5, "bright material reads {closeness}");
    assert_eq!(
        style["reasons"].as_array().map(Vec::len),
        Some(3),
        "{style}"
    );
    let shares = snap.mix["shares"].as_object().expect("shares");
    assert_eq!(shares.len(), 16, "the default palette's families");
    let total: f64 = shares
        .values()
        .filter_map(serde_json::Value::as_f64)
        .sum::<f64>()
        + snap.mix["unexplained"].as_f64().unwrap_or(0.0);
    assert!((total - 1.0).abs() < 1e-3, "shares sum to {total}");
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn a_vanished_model_file_is_reported_and_nothing_else_is_lost() {
    let dir = temp_dir("host-vanished");
    let signal = clip(false, 5, 3.0);
    let snap = run_with_style(&dir.join("moved-away.weftstyle"), &signal);
    let problem = snap.style_problem.as_deref().unwrap_or("");
    assert!(
        problem.contains("moved-away.weftstyle") && problem.contains("no longer there"),
        "{problem}"
    );
    assert!(snap.style.is_null());
    assert_eq!(snap.samples_analysed, signal.len() as u64);
    assert!(
        snap.mix["updates"].as_u64().unwrap_or(0) > 10,
        "{}",
        snap.mix
    );
    let _ = std::fs::remove_dir_all(&dir);
}
