//! `weft palette` options that are refused before any work starts, and the check's plot.

mod common;
use common::{path_str, text, weft};

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
fn tree_and_row_options_are_refused_first_when_out_of_range() {
    for (option, bad, want) in [
        ("--trees", "2001", "from 0 to 2000"),
        ("--trees", "-1", "from 0 to 2000"),
        ("--tree-depth", "0", "from 1 to 10"),
        ("--tree-depth", "11", "from 1 to 10"),
        ("--row-stride", "0", "from 1 to 100"),
        ("--row-stride", "many", "from 1 to 100"),
    ] {
        let (ok, err) = learn_nowhere(&[&format!("{option}={bad}")]);
        assert!(!ok);
        assert!(err.contains(want), "{option} {bad}: {err}");
    }
    let (ok, err) = learn_nowhere(&["--trees", "300", "--tree-depth", "6", "--row-stride", "3"]);
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

#[test]
fn a_check_plot_of_another_format_is_refused_first() {
    let dir = tempfile::tempdir().expect("temp dir");
    let out = dir.path().join("figures.txt");
    // A palette that does not exist: the plot's name must be refused before it is read.
    let o = weft(&[
        "palette",
        "check",
        "--palette",
        "/nonexistent/p.weftpal",
        "--plot",
        path_str(&out),
    ]);
    let err = text(&o.stderr);
    assert!(!o.status.success());
    assert!(
        err.contains("--plot") && err.contains(".svg or .png"),
        "{err}"
    );
    assert!(!out.exists());
}

#[test]
fn a_check_draws_its_figures_per_family_and_by_how_many_families_sound() {
    // Held-out mixes from the General MIDI SoundFont (FluidR3_GM, Debian fluid-soundfont-gm).
    let dir = tempfile::tempdir().expect("temp dir");
    let out = dir.path().join("figures.svg");
    let o = weft(&[
        "palette",
        "check",
        "--mixes",
        "3",
        "--mix-seconds",
        "3",
        "--seed",
        "5",
        "--plot",
        path_str(&out),
    ]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let stdout = text(&o.stdout);
    assert!(
        stdout.contains("by how many families truly sound"),
        "{stdout}"
    );
    assert!(stdout.contains("presence mistakes:"), "{stdout}");
    let svg = std::fs::read_to_string(&out).expect("the plot is written");
    for label in [
        "presence F1 per family",
        "share error where the family sounds",
        "by how many families sound",
        "two stages",
        "NMF alone",
        "built-in palette, seed 5",
        // The built-in palette's first and last families.
        "kick",
        "mallets",
    ] {
        assert!(svg.contains(label), "{label} missing from the plot");
    }
}

/// A small palette of the fuzz corpus, with a presence network and boosted trees.
fn corpus_palette(name: &str) -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("../tests/corpus/palette_load")
        .join(name)
}

#[test]
fn show_reports_what_the_palette_file_holds() {
    use weft_engine::palette::Palette;
    let path = corpus_palette("valid-small-trees.weftpal");
    let bytes = std::fs::read(&path).expect("corpus palette");
    let palette = Palette::from_bytes(&bytes).expect("a valid palette");
    let o = weft(&["palette", "show", path_str(&path), "--json"]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    assert_eq!(v["name"], palette.name());
    assert_eq!(v["bytes"], bytes.len());
    assert_eq!(v["format_version"], 2);
    assert_eq!(v["seed"], palette.provenance().seed);
    assert_eq!(v["bands"], palette.analysis().bands);
    let families = v["families"].as_array().expect("families");
    assert_eq!(families.len(), palette.families().len());
    let model = palette.presence().expect("the corpus palette has a model");
    let trees = model.trees.as_ref().expect("and trees");
    let leaves = 1 << trees.depth;
    for (f, (shown, fam)) in families.iter().zip(palette.families()).enumerate() {
        assert_eq!(shown["name"], fam.name.as_str());
        assert_eq!(shown["section"], palette.sections()[fam.section].as_str());
        assert_eq!(shown["atoms"], palette.atom_counts()[f]);
        let t = shown["threshold"].as_f64().expect("threshold");
        assert!((t - f64::from(model.thresholds[f])).abs() < 1e-6);
        // Trees whose leaves are not all zero, counted here from the file's arrays.
        let own = &trees.leaf[f * trees.trees * leaves..(f + 1) * trees.trees * leaves];
        let used = own
            .chunks(leaves)
            .filter(|l| l.iter().any(|&x| x != 0.0))
            .count();
        assert_eq!(shown["trees_in_use"], used, "{}", fam.name);
    }
    assert_eq!(v["presence"]["features"], model.features);
    assert_eq!(v["presence"]["trees_per_family"], trees.trees);
    assert_eq!(v["presence"]["tree_depth"], trees.depth);
    assert!(v["presence"]["share_network_hidden_units"].is_null());
    assert_eq!(v["split_atoms"], false);

    // The table says the same in words, each family under its section.
    let o = weft(&["palette", "show", path_str(&path)]);
    assert!(o.status.success());
    let out = text(&o.stdout);
    assert!(out.contains("2 families in 2 sections"), "{out}");
    assert!(out.contains("boosted trees of depth 2"), "{out}");
    assert!(out.contains("no direct share network"), "{out}");
    assert!(out.contains("no split atoms"), "{out}");
    for fam in palette.families() {
        let line = out
            .lines()
            .find(|l| l.split_whitespace().any(|w| w == fam.name))
            .unwrap_or_else(|| panic!("{} missing: {out}", fam.name));
        assert!(line.contains(&palette.sections()[fam.section]), "{line}");
    }

    // A palette of the first format says so.
    let old = corpus_palette("valid-small.weftpal");
    let o = weft(&["palette", "show", path_str(&old), "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    assert_eq!(v["format_version"], 1);

    // One with split atoms (format 3) says that too.
    let split = corpus_palette("valid-small-split.weftpal");
    let o = weft(&["palette", "show", path_str(&split), "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    assert_eq!(v["format_version"], 3);
    assert_eq!(v["split_atoms"], true);
    let o = weft(&["palette", "show", path_str(&split)]);
    assert!(
        text(&o.stdout).contains("split atoms divide each column's energy"),
        "{}",
        text(&o.stdout)
    );
}

#[test]
fn show_describes_the_built_in_palette_and_refuses_what_is_not_a_palette() {
    let o = weft(&["palette", "show", "--json"]);
    assert!(o.status.success(), "{}", text(&o.stderr));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    let builtin = weft_engine::palette::Palette::default_palette();
    assert!(v["file"].is_null());
    assert_eq!(v["families"].as_array().map(Vec::len), Some(16));
    assert_eq!(v["sections"].as_array().map(Vec::len), Some(8));
    assert_eq!(
        v["presence"]["features"],
        builtin
            .presence()
            .expect("the built-in palette has a model")
            .features
    );
    assert_eq!(v["split_atoms"], builtin.split_atoms().is_some());
    assert_eq!(
        v["format_version"],
        weft_engine::palette::FORMAT_VERSION,
        "the built-in palette is written in the current format"
    );
    // Not a palette: a clear error on stderr, nothing on stdout, exit status 1.
    let dir = tempfile::tempdir().expect("temp dir");
    let junk = dir.path().join("junk.weftpal");
    std::fs::write(&junk, b"RIFF....WAVEfmt ").expect("write");
    let o = weft(&["palette", "show", path_str(&junk)]);
    assert_eq!(o.status.code(), Some(1));
    assert!(o.stdout.is_empty());
    let err = text(&o.stderr);
    assert!(
        err.contains("junk.weftpal") && err.contains("not a usable palette"),
        "{err}"
    );
}

#[test]
fn split_atom_options_are_refused_first_when_they_cannot_work() {
    let base = corpus_palette("valid-small-trees.weftpal");
    for (args, want) in [
        (
            vec!["--split-only", path_str(&base)],
            "--split-only needs --split-mixes above 0",
        ),
        (
            vec!["--split-mixes", "10", "--mixes", "0"],
            "split atoms need a presence model",
        ),
        (vec!["--split-seconds", "0.5"], "a mix lasts 1 to 60 s"),
        (vec!["--split-updates", "0"], "from 1 to 1000"),
    ] {
        let (ok, err) = learn_nowhere(&args);
        assert!(!ok);
        assert!(err.contains(want), "{args:?}: {err}");
        assert!(!err.contains("/nonexistent/folders"), "{args:?}: {err}");
    }
    // `render --split-only` checks the palette it reuses before loading the SoundFont.
    let render = |extra: &[&str]| {
        let mut args = vec![
            "palette",
            "render",
            "--soundfont",
            "/nonexistent/gm.sf2",
            "--out",
            "/nonexistent/x.weftpal",
            "--split-mixes",
            "2",
        ];
        args.extend_from_slice(extra);
        let o = weft(&args);
        assert!(!o.status.success());
        text(&o.stderr)
    };
    let err = render(&["--split-only", path_str(&base)]);
    assert!(
        err.contains("its families (low, high) are not the ones this build makes"),
        "{err}"
    );
    let builtin = builtin_palette_file();
    let err = render(&["--split-only", path_str(&builtin), "--seed", "2"]);
    assert!(
        err.contains("it was built with seed 1, this build uses --seed 2"),
        "{err}"
    );
    let err = render(&["--split-only", path_str(&builtin)]);
    assert!(err.contains("/nonexistent/gm.sf2"), "{err}");
}

/// The built-in palette's file in the source tree.
fn builtin_palette_file() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../engine/src/palette/default.weftpal")
}

#[test]
fn split_only_fits_the_split_atoms_and_keeps_everything_else() {
    use weft_engine::palette::Palette;
    let dir = tempfile::tempdir().expect("temp dir");
    let out = dir.path().join("split.weftpal");
    let builtin = builtin_palette_file();
    let o = weft(&[
        "palette",
        "render",
        "--split-only",
        path_str(&builtin),
        "--split-mixes",
        "30",
        "--split-seconds",
        "2",
        "--split-updates",
        "20",
        "--threads",
        "2",
        "--out",
        path_str(&out),
    ]);
    let err = text(&o.stderr);
    assert!(o.status.success(), "{err}");
    assert!(err.contains("split atom updates: 20 of 20"), "{err}");
    let base = Palette::from_bytes(&std::fs::read(&builtin).expect("built-in")).expect("valid");
    let made = Palette::from_bytes(&std::fs::read(&out).expect("written")).expect("valid");
    assert_eq!(made.atoms(), base.atoms());
    assert_eq!(made.presence(), base.presence());
    assert_eq!(made.analysis(), base.analysis());
    let note = made
        .provenance()
        .notes
        .iter()
        .filter(|n| n.starts_with("split atoms:"))
        .collect::<Vec<_>>();
    assert_eq!(note.len(), 1, "{:?}", made.provenance().notes);
    assert!(
        note[0].starts_with("split atoms: fitted on 30 mixes of 2 s, 20 updates"),
        "{}",
        note[0]
    );
    // Kept only when they divide the held-back mixes' columns better, which the build reports.
    let line = err
        .lines()
        .find(|l| l.starts_with("split atoms"))
        .unwrap_or_else(|| panic!("no verdict: {err}"));
    let numbers: Vec<f64> = line
        .split(|c: char| !(c.is_ascii_digit() || c == '.'))
        .filter_map(|w| w.parse().ok())
        .collect();
    match made.split_atoms() {
        Some(r) => {
            assert!(numbers[1] < numbers[0], "{line}");
            assert_eq!(r.len(), base.atoms().len());
            assert!(!note[0].contains("left out"));
        }
        None => {
            assert!(line.starts_with("split atoms left out"), "{line}");
            assert!(numbers[0] >= numbers[1], "{line}");
            assert!(note[0].ends_with("left out: no gain shown on held-back mixes"));
        }
    }
    // `show` says which it is.
    let o = weft(&["palette", "show", path_str(&out), "--json"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("JSON");
    assert_eq!(v["split_atoms"], made.split_atoms().is_some());
    assert_eq!(v["format_version"], 3);
}
