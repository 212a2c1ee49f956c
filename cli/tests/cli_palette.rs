//! `weft palette` options that are refused before any work starts.

mod common;
use common::{text, weft};

/// Runs `weft palette learn` on a folder that does not exist with `extra` options; returns
/// whether it succeeded and its error output.
fn learn_nowhere(extra: &[&str]) -> (bool, String) {
    let mut args = vec![
        "palette",
        "learn",
        "/nonexistent/folders",
        "--out",
        "/nonexistent/x.weftpal",
    ];
    args.extend_from_slice(extra);
    let o = weft(&args);
    (o.status.success(), text(&o.stderr))
}

#[test]
fn presence_ensembles_wider_than_a_palette_holds_are_refused_first() {
    // The folder does not exist: the option error must come before it is looked at.
    let (ok, err) = learn_nowhere(&["--hidden", "128", "--members", "5"]);
    assert!(!ok);
    assert!(
        err.contains("640 hidden units") && err.contains("at most 512"),
        "{err}"
    );
    let (ok, err) = learn_nowhere(&["--hidden", &usize::MAX.to_string(), "--members", "2"]);
    assert!(!ok);
    assert!(err.contains("at most 512"), "{err}");
    let (ok, err) = learn_nowhere(&["--members", "0"]);
    assert!(!ok);
    assert!(err.contains("from 1 to 16"), "{err}");
    // Within the limit the options pass and the missing folder is what is reported.
    let (ok, err) = learn_nowhere(&["--hidden", "64", "--members", "4"]);
    assert!(!ok);
    assert!(err.contains("/nonexistent/folders"), "{err}");
}

#[test]
fn direct_share_network_options_are_refused_first_when_out_of_range() {
    let (ok, err) = learn_nowhere(&["--share-hidden", "513"]);
    assert!(!ok);
    assert!(err.contains("from 0 to 512"), "{err}");
    for bad in ["-0.5", "4.5", "NaN"] {
        let (ok, err) = learn_nowhere(&[&format!("--share-exponent={bad}")]);
        assert!(!ok);
        assert!(err.contains("from 0 to 4"), "{bad}: {err}");
    }
    for bad in ["-0.1", "1.5", "NaN", "lots"] {
        let (ok, err) = learn_nowhere(&[&format!("--share-admit={bad}")]);
        assert!(!ok);
        assert!(err.contains("from 0 to 1"), "{bad}: {err}");
    }
    let (ok, err) = learn_nowhere(&[
        "--share-hidden",
        "32",
        "--share-exponent",
        "1",
        "--share-admit",
        "0.3",
    ]);
    assert!(!ok);
    assert!(err.contains("/nonexistent/folders"), "{err}");
}

#[test]
fn analysis_settings_a_palette_cannot_hold_are_refused_first() {
    // Limits of the palette format (weft_engine::palette::MAX_ATOMS_PER_FAMILY, MAX_STACK).
    for (args, want) in [
        (
            ["--atoms", "65"],
            "--atoms 65: a palette holds 1 to 64 atoms per family",
        ),
        (["--atoms", "0"], "--atoms 0: a palette holds 1 to 64"),
        (["--stack", "12"], "--stack: value 12 is out of range"),
        (["--bands", "4"], "--bands: value 4 is out of range"),
        (["--tolerance", "1"], "--tolerance: value 1 is out of range"),
    ] {
        let (ok, err) = learn_nowhere(&args);
        assert!(!ok);
        assert!(err.contains(want), "{args:?}: {err}");
        assert!(!err.contains("/nonexistent/folders"), "{args:?}: {err}");
    }
    let (ok, err) = learn_nowhere(&["--atoms", "64", "--stack", "9"]);
    assert!(!ok);
    assert!(err.contains("/nonexistent/folders"), "{err}");
}
