//! `weft palette` options that are refused before any work starts.

mod common;
use common::{text, weft};

#[test]
fn presence_ensembles_wider_than_a_palette_holds_are_refused_first() {
    // The folder does not exist: the option error must come before it is looked at.
    let o = weft(&[
        "palette",
        "learn",
        "/nonexistent/folders",
        "--out",
        "/nonexistent/x.weftpal",
        "--hidden",
        "128",
        "--members",
        "3",
    ]);
    let err = text(&o.stderr);
    assert!(!o.status.success());
    assert!(
        err.contains("384 hidden units") && err.contains("at most 256"),
        "{err}"
    );
    let o = weft(&[
        "palette",
        "learn",
        "/nonexistent/folders",
        "--out",
        "/nonexistent/x.weftpal",
        "--members",
        "0",
    ]);
    let err = text(&o.stderr);
    assert!(!o.status.success());
    assert!(err.contains("from 1 to 16"), "{err}");
    // Within the limit the options pass and the missing folder is what is reported.
    let o = weft(&[
        "palette",
        "learn",
        "/nonexistent/folders",
        "--out",
        "/nonexistent/x.weftpal",
        "--hidden",
        "64",
        "--members",
        "4",
    ]);
    let err = text(&o.stderr);
    assert!(!o.status.success());
    assert!(err.contains("/nonexistent/folders"), "{err}");
}
