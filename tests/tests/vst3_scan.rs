//! Loads the built `Weft.vst3` in a headless VST3 scanner from another project (Ardour 7's
//! `ardour-vst3-scanner`, Debian package `ardour`) and checks what it reports: the plugin's
//! name, its category and its stereo main buses.

use std::path::PathBuf;
use std::process::Command;

const SCANNER: &str = "/usr/lib/ardour7/ardour-vst3-scanner";

fn bundle() -> PathBuf {
    std::env::var_os("WEFT_VST3_BUNDLE").map_or_else(
        || PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../target/bundled/Weft.vst3"),
        PathBuf::from,
    )
}

#[test]
fn ardour_scanner_lists_weft_with_its_buses() {
    let bundle = bundle();
    assert!(
        bundle.is_dir(),
        "{} is missing: run `cargo xtask bundle weft` first",
        bundle.display()
    );
    assert!(
        std::path::Path::new(SCANNER).exists(),
        "{SCANNER} is missing: run `cargo xtask setup` (package ardour)"
    );
    // Keep the scanner's cache out of the user's home.
    let home = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("vst3-scan-home");
    std::fs::create_dir_all(&home).expect("temp home");
    let out = Command::new(SCANNER)
        .env("LD_LIBRARY_PATH", "/usr/lib/ardour7")
        .env("HOME", &home)
        .args(["-f", "-v"])
        .arg(&bundle)
        .output()
        .expect("the scanner runs");
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(out.status.success(), "scanner failed:\n{text}");
    println!("{text}");
    assert!(text.contains("Found Plugin: Weft"), "{text}");
    assert!(text.contains(r#"name="Weft""#), "{text}");
    assert!(text.contains(r#"category="Fx|Analyzer""#), "{text}");
    assert!(
        text.contains(r#"n_inputs="2" n_outputs="2""#),
        "expected a stereo main input and output:\n{text}"
    );
    assert!(text.contains(r#"n_midi_inputs="0""#), "{text}");
}
