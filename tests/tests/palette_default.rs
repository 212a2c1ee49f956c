//! The built-in palette on mixes rendered from the General MIDI SoundFont (FluidR3_GM, Debian
//! `fluid-soundfont-gm`): the invariants of live shares hold on real instrument sounds.

use weft_engine::palette::{Palette, render_mix};
use weft_engine::scene::{ClipBank, Composer, Mix, SoundFontRenderer, general_midi_voicings};
use weft_engine::shares::{DEFAULT_SHARE_ADMIT, SharesSettings, SharesTracker, SharesUpdate};

#[global_allocator]
static ALLOCATOR: assert_no_alloc::AllocDisabler = assert_no_alloc::AllocDisabler;

const SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";
const SR: u32 = 48_000;

fn renderer() -> SoundFontRenderer {
    let file = std::fs::File::open(SOUNDFONT)
        .unwrap_or_else(|e| panic!("{SOUNDFONT} is missing ({e}): run cargo xtask setup"));
    SoundFontRenderer::new(&mut std::io::BufReader::new(file), SR).expect("the SoundFont loads")
}

fn mix(seed: u64) -> Mix {
    let composer = Composer::new(general_midi_voicings(), vec![], 0.0);
    let all: Vec<usize> = (0..16).collect();
    render_mix(
        Some(&renderer()),
        &composer,
        &ClipBank::new(16),
        seed,
        &all,
        5,
        (-24.0, 0.0),
        4.0,
        SR,
    )
    .unwrap_or_else(|e| panic!("seed {seed}: {e}"))
}

fn run(palette: &Palette, x: &[f32], block: usize) -> Vec<SharesUpdate> {
    let mut t =
        SharesTracker::new(palette, SharesSettings::default(), f64::from(SR)).expect("tracker");
    let mut out = Vec::new();
    for b in x.chunks(block) {
        t.process(b, |u| out.push(*u));
    }
    t.finish(|u| out.push(*u));
    out
}

#[test]
fn invariants_hold_on_rendered_mixes() {
    let palette = Palette::default_palette();
    let net = palette.presence().and_then(|m| m.shares.as_ref());
    assert!(
        net.is_some_and(|n| n.admit == Some(DEFAULT_SHARE_ADMIT)),
        "the built-in palette carries a direct share network that admits families at the \
         default share (cargo xtask palette)"
    );
    let nf = palette.families().len();
    for seed in [3_u64, 4] {
        let m = mix(seed);
        let mut x = m.signal.clone();
        x.extend(std::iter::repeat_n(0.0, SR as usize));
        let reference = run(&palette, &x, 512);
        assert!(
            reference.len() >= 10 * 5,
            "seed {seed}: fewer than 10 updates per second"
        );
        for u in &reference {
            let s = &u.smoothed;
            assert!(
                s.share.iter().all(|v| v.is_finite()) && s.unexplained.is_finite(),
                "seed {seed}"
            );
            let sum: f32 = s.share[..nf].iter().sum::<f32>() + s.unexplained;
            if s.signal {
                assert!(
                    (sum - 1.0).abs() < 1e-4,
                    "seed {seed}: shares sum to {sum} at {} s",
                    u.time_s
                );
            } else {
                assert_eq!(sum, 0.0, "seed {seed}");
            }
        }
        let last = reference.last().expect("updates");
        assert!(
            !last.raw.signal && !last.smoothed.signal,
            "seed {seed}: silence must be no signal"
        );
        // Block size never changes anything.
        for block in [1, 333, 4096] {
            assert_eq!(
                run(&palette, &x, block),
                reference,
                "seed {seed}, block {block}"
            );
        }
        // ±20 dB on the whole input moves no share by more than 1 pp. "No signal" is an
        // absolute level (−100 dBFS), so where a decay crosses it the two runs may differ:
        // shares are compared where both have a signal, and such crossings must stay rare.
        for gain in [10.0_f32, 0.1] {
            let y: Vec<f32> = x.iter().map(|v| v * gain).collect();
            let other = run(&palette, &y, 512);
            assert_eq!(other.len(), reference.len());
            let mut crossings = 0;
            for (a, b) in reference.iter().zip(&other) {
                if a.smoothed.signal != b.smoothed.signal {
                    crossings += 1;
                    continue;
                }
                for f in 0..nf {
                    let d = (a.smoothed.share[f] - b.smoothed.share[f]).abs();
                    assert!(
                        d <= 0.01,
                        "seed {seed}, gain {gain}, family {f}, {} s: {d}",
                        a.time_s
                    );
                }
            }
            assert!(
                crossings * 50 <= reference.len(),
                "seed {seed}, gain {gain}: {crossings} crossings"
            );
        }
    }
}

#[test]
fn live_processing_does_not_allocate() {
    let palette = Palette::default_palette();
    let m = mix(5);
    let mut t =
        SharesTracker::new(&palette, SharesSettings::default(), f64::from(SR)).expect("tracker");
    let mut n = 0;
    assert_no_alloc::assert_no_alloc(|| {
        for b in m.signal.chunks(256) {
            t.process(b, |_| n += 1);
        }
    });
    assert!(n > 0);
}
