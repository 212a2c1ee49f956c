//! `weft palette learn | render | check`: build palettes from recordings or from a SoundFont,
//! and measure them on held-out mixes against exact ground truth. (`show` lives in
//! [`crate::palette_show`].)

use crate::decode::Source;
use crate::resample::StreamResampler;
use anyhow::{Context, Result, bail};
use clap::{Args, Subcommand, ValueEnum};
use std::path::{Path, PathBuf};
use std::process::Command;
use weft_engine::palette::{
    AnalysisSpec, BuildPlan, CheckPlan, DEFAULT_FAMILIES, DEFAULT_SECTIONS, Family, LearnSettings,
    MAX_ATOMS_PER_FAMILY, Palette, PaletteError, Provenance, SplitTraining, build_palette,
    check_palette, fit_split,
};
use weft_engine::scene::{
    ClipBank, Composer, FamilyVoicing, Role, SoundFontRenderer, VoiceSource, general_midi_voicings,
};
use weft_engine::shares::check::CheckReport;
use weft_engine::shares::presence::{MAX_HIDDEN, MAX_SHARE_EXPONENT};
use weft_engine::shares::trees::{MAX_DEPTH, MAX_TREES, TreeTraining};
use weft_engine::shares::{PresenceTraining, ShareTraining, SharesMode};

/// The SoundFont Debian's `fluid-soundfont-gm` installs.
pub const DEFAULT_SOUNDFONT: &str = "/usr/share/sounds/sf2/FluidR3_GM.sf2";

/// Build palettes and measure them.
#[derive(Args, Debug)]
pub struct PaletteArgs {
    #[command(subcommand)]
    /// What to do.
    pub command: PaletteCommand,
}

/// The palette commands.
#[derive(Subcommand, Debug)]
pub enum PaletteCommand {
    /// Learn a palette from recordings: one folder per family (any common audio format).
    Learn(LearnArgs),
    /// Build a palette from a General MIDI SoundFont (and sung vowels from espeak-ng).
    Render(RenderArgs),
    /// Measure a palette on held-out mixes rendered with exact ground truth.
    Check(CheckArgs),
    /// Show what a palette holds: families, sections, analysis, presence model, provenance.
    Show(crate::palette_show::ShowArgs),
}

/// Where the voice family's vowels come from.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum VoiceSourceArg {
    /// espeak-ng sung syllables at several pitches and voices, plus the SoundFont's choir
    /// programs (needs the `espeak-ng` package).
    Espeak,
    /// Only the SoundFont's choir programs.
    Soundfont,
}

/// Which stages a check runs.
#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
pub enum ModeArg {
    /// Presence, then amount (the product).
    TwoStage,
    /// NMF alone (the baseline, also reported by two-stage).
    Nmf,
    /// Amount over the truly present families, with the share network's blend (the ceiling
    /// of the amount stage).
    KnownPresence,
}

/// Settings shared by `learn` and `render`.
#[derive(Args, Debug, Clone)]
pub struct BuildOptions {
    /// Seed of every random choice.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Training mixes for the presence model.
    #[arg(long, default_value_t = BuildPlan::default().training_mixes)]
    pub mixes: usize,
    /// Length of each training mix, seconds.
    #[arg(long, default_value_t = BuildPlan::default().mix_s)]
    pub mix_seconds: f64,
    /// Keep every Nth presence row of each training mix (1: all). A mix's rows sound alike:
    /// more mixes with fewer rows each teach more in the same memory.
    #[arg(long, default_value_t = BuildPlan::default().row_stride, value_parser = parse_row_stride)]
    pub row_stride: usize,
    /// Atoms per family.
    #[arg(long, default_value_t = LearnSettings::default().atoms)]
    pub atoms: usize,
    /// Mel bands.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.bands)]
    pub bands: usize,
    /// Columns stacked per atom.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.stack)]
    pub stack: usize,
    /// Seconds per column.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.column_s)]
    pub column_seconds: f64,
    /// β of the divergence.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.beta)]
    pub beta: f64,
    /// Multiplicative updates per column.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.iterations)]
    pub iterations: usize,
    /// Fraction of a column the fit may miss before the rest is *unexplained*.
    #[arg(long, default_value_t = AnalysisSpec::DEFAULT.unexplained_tolerance)]
    pub tolerance: f64,
    /// Hidden units of the presence model (0: logistic regression).
    #[arg(long, default_value_t = PresenceTraining::default().hidden)]
    pub hidden: usize,
    /// Training epochs of the presence model.
    #[arg(long, default_value_t = PresenceTraining::default().epochs)]
    pub epochs: usize,
    /// Networks in the presence model, fitted from different starts, whose logits are
    /// averaged (their hidden units together at most 512).
    #[arg(long, default_value_t = PresenceTraining::default().members, value_parser = parse_members)]
    pub members: usize,
    /// L2 penalty of the presence model.
    #[arg(long, default_value_t = PresenceTraining::default().l2)]
    pub l2: f32,
    /// β of the F-score the presence model's per-family thresholds maximise; below 1 favours
    /// precision (a family judged present by mistake takes energy from the others).
    #[arg(long, default_value_t = PresenceTraining::default().threshold_beta, value_parser = parse_beta)]
    pub presence_beta: f32,
    /// Hidden units of the direct share network, trained beside the presence model on the
    /// same mixes to estimate each family's share; its estimate then weighs the amount
    /// stage's shares (0: no such network).
    #[arg(long, default_value_t = ShareTraining::default().hidden, value_parser = parse_share_hidden)]
    pub share_hidden: usize,
    /// Exponent of the direct share network's estimate when it weighs the amount stage's
    /// shares (0: no effect; 1: a plain product).
    #[arg(long, default_value_t = ShareTraining::default().exponent, value_parser = parse_share_exponent)]
    pub share_exponent: f32,
    /// Share from which the direct share network admits a family to the amount stage that
    /// the presence stage left out (0: never).
    #[arg(long, default_value_t = ShareTraining::default().admit, value_parser = parse_share_admit)]
    pub share_admit: f32,
    /// Boosted trees per family trained beside the presence network, whose logit is averaged
    /// with the network's (0: none). Fewer are kept when held-back mixes stop improving.
    #[arg(long, default_value_t = TreeTraining::default().trees, value_parser = parse_trees)]
    pub trees: usize,
    /// Depth of each boosted tree.
    #[arg(long, default_value_t = TreeTraining::default().depth, value_parser = parse_tree_depth)]
    pub tree_depth: usize,
    /// Rendered mixes to fit split atoms on, as the build's last step (0: none). Split atoms
    /// are a second set of atoms, fitted so that the amount stage divides each column's energy
    /// among the families as the mixes' stems did. They need a presence model.
    #[arg(long, default_value_t = SplitTraining::default().mixes)]
    pub split_mixes: usize,
    /// Length of each split-atom mix, seconds.
    #[arg(long, default_value_t = SplitTraining::default().mix_s)]
    pub split_seconds: f64,
    /// Multiplicative updates of the split atoms.
    #[arg(long, default_value_t = SplitTraining::default().updates, value_parser = parse_split_updates)]
    pub split_updates: usize,
    /// Take the atoms, presence model and tolerance from this palette, built by the same
    /// command with the same seed, and only fit its split atoms (needs --split-mixes): hours of
    /// presence training are not repeated.
    #[arg(long, value_name = "PALETTE")]
    pub split_only: Option<PathBuf>,
    /// Worker threads (default: all cores).
    #[arg(long)]
    pub threads: Option<usize>,
}

/// `weft palette learn`.
#[derive(Args, Debug)]
pub struct LearnArgs {
    /// A folder holding one folder per family (the folder's name is the family's name), each
    /// with ≥ 10 s of recordings of that family alone.
    pub folder: PathBuf,
    /// The palette file to write.
    #[arg(long, short)]
    pub out: PathBuf,
    /// The palette's name.
    #[arg(long, default_value = "my palette")]
    pub name: String,
    /// A family's section, as FAMILY=SECTION (default: the default palette's section for a
    /// family of that name, else a section named after the family).
    #[arg(long = "section", value_parser = parse_pair)]
    pub sections: Vec<(String, String)>,
    #[command(flatten)]
    /// Build settings.
    pub build: BuildOptions,
}

/// `weft palette render`.
#[derive(Args, Debug)]
pub struct RenderArgs {
    /// The SF2 SoundFont.
    #[arg(long, default_value = DEFAULT_SOUNDFONT)]
    pub soundfont: PathBuf,
    /// The palette file to write.
    #[arg(long, short)]
    pub out: PathBuf,
    /// Where the voice family's vowels come from.
    #[arg(long, value_enum, default_value = "espeak")]
    pub voice: VoiceSourceArg,
    #[command(flatten)]
    /// Build settings.
    pub build: BuildOptions,
}

/// `weft palette check`.
#[derive(Args, Debug)]
pub struct CheckArgs {
    /// The palette to check (default: the built-in palette).
    #[arg(long)]
    pub palette: Option<PathBuf>,
    /// The SF2 SoundFont the held-out mixes are rendered with.
    #[arg(long, default_value = DEFAULT_SOUNDFONT)]
    pub soundfont: PathBuf,
    /// A folder of one folder per family with recordings the palette never saw (for palettes
    /// learned from recordings, and for families no SoundFont voices).
    #[arg(long)]
    pub folders: Option<PathBuf>,
    /// Where the voice family's vowels come from (held-out voices, pitches and syllables).
    #[arg(long, value_enum, default_value = "espeak")]
    pub voice: VoiceSourceArg,
    /// Seed of the held-out mixes (drawn from a stream no palette build uses).
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Number of held-out mixes.
    #[arg(long, default_value_t = 60)]
    pub mixes: usize,
    /// Length of each mix, seconds.
    #[arg(long, default_value_t = 8.0)]
    pub mix_seconds: f64,
    /// Which stages run.
    #[arg(long, value_enum, default_value = "two-stage")]
    pub mode: ModeArg,
    /// Print one JSON object instead of tables.
    #[arg(long)]
    pub json: bool,
    /// Also draw the figures per family and by how many families sound (.svg or .png).
    #[arg(long, value_name = "FILE")]
    pub plot: Option<PathBuf>,
    /// Worker threads (default: all cores; the realtime factor is per thread).
    #[arg(long)]
    pub threads: Option<usize>,
}

fn parse_beta(s: &str) -> Result<f32, String> {
    match s.parse::<f32>() {
        Ok(b) if b.is_finite() && (0.05..=20.0).contains(&b) => Ok(b),
        _ => Err(format!("'{s}' is not a number from 0.05 to 20")),
    }
}

/// `s` as a whole number from `lo` to `hi`, or an error naming the range.
fn whole_number(s: &str, lo: usize, hi: usize) -> Result<usize, String> {
    match s.parse::<usize>() {
        Ok(n) if (lo..=hi).contains(&n) => Ok(n),
        _ => Err(format!("'{s}' is not a whole number from {lo} to {hi}")),
    }
}

fn parse_share_hidden(s: &str) -> Result<usize, String> {
    whole_number(s, 0, MAX_HIDDEN)
}

fn parse_share_exponent(s: &str) -> Result<f32, String> {
    match s.parse::<f32>() {
        Ok(e) if e.is_finite() && (0.0..=MAX_SHARE_EXPONENT).contains(&e) => Ok(e),
        _ => Err(format!(
            "'{s}' is not a number from 0 to {MAX_SHARE_EXPONENT}"
        )),
    }
}

fn parse_share_admit(s: &str) -> Result<f32, String> {
    match s.parse::<f32>() {
        Ok(a) if (0.0..=1.0).contains(&a) => Ok(a),
        _ => Err(format!("'{s}' is not a number from 0 to 1")),
    }
}

fn parse_row_stride(s: &str) -> Result<usize, String> {
    whole_number(s, 1, 100)
}

fn parse_trees(s: &str) -> Result<usize, String> {
    whole_number(s, 0, MAX_TREES)
}

fn parse_tree_depth(s: &str) -> Result<usize, String> {
    whole_number(s, 1, MAX_DEPTH)
}

fn parse_members(s: &str) -> Result<usize, String> {
    whole_number(s, 1, 16)
}

fn parse_split_updates(s: &str) -> Result<usize, String> {
    whole_number(s, 1, 1000)
}

fn parse_pair(s: &str) -> Result<(String, String), String> {
    s.split_once('=')
        .map(|(a, b)| (a.trim().to_owned(), b.trim().to_owned()))
        .filter(|(a, b)| !a.is_empty() && !b.is_empty())
        .ok_or_else(|| format!("expected FAMILY=SECTION, got '{s}'"))
}

/// Runs a palette command.
pub fn run(args: PaletteArgs) -> Result<()> {
    match args.command {
        PaletteCommand::Learn(a) => learn(&a),
        PaletteCommand::Render(a) => render(&a),
        PaletteCommand::Show(a) => crate::palette_show::run(&a),
        PaletteCommand::Check(a) => {
            if let Some(p) = &a.plot
                && crate::plot::PlotFormat::from_path(p).is_none()
            {
                bail!("--plot {}: a plot must end in .svg or .png", p.display());
            }
            let report = check(&a)?;
            if let Some(p) = &a.plot {
                let title = match &a.palette {
                    Some(f) => f
                        .file_name()
                        .map_or_else(|| f.display().to_string(), |n| n.to_string_lossy().into()),
                    None => "built-in palette".to_owned(),
                };
                crate::check_plot::write_check_plot(
                    p,
                    &report,
                    &format!("{title}, seed {}", a.seed),
                )?;
                eprintln!("plot written to {}", p.display());
            }
            if a.json {
                let mut v = report.to_json();
                if let Some(o) = v.as_object_mut() {
                    o.insert("seed".into(), a.seed.into());
                    o.insert("mix_seconds".into(), a.mix_seconds.into());
                }
                println!("{v}");
            } else {
                print_report(&report);
            }
            Ok(())
        }
    }
}

const RENDER_RATE_HZ: u32 = 48_000;

fn threads(t: Option<usize>) -> usize {
    t.unwrap_or_else(|| std::thread::available_parallelism().map_or(2, usize::from))
        .max(1)
}

fn plan_from(o: &BuildOptions) -> Result<BuildPlan> {
    let width = o.hidden.saturating_mul(o.members);
    if width > MAX_HIDDEN {
        bail!(
            "--hidden {} with --members {} makes {width} hidden units; a palette holds at most {MAX_HIDDEN}",
            o.hidden,
            o.members,
        );
    }
    let analysis = AnalysisSpec {
        bands: o.bands,
        stack: o.stack,
        column_s: o.column_seconds,
        beta: o.beta,
        iterations: o.iterations,
        unexplained_tolerance: o.tolerance,
        ..AnalysisSpec::DEFAULT
    };
    if let Err(err) = analysis.check() {
        let option = |field: &str| match field {
            "analysis.bands" => "--bands",
            "analysis.stack" => "--stack",
            "analysis.column_s" => "--column-seconds",
            "analysis.beta" => "--beta",
            "analysis.iterations" => "--iterations",
            "analysis.unexplained_tolerance" => "--tolerance",
            _ => "an analysis option",
        };
        match err {
            PaletteError::Invalid { field, reason } => bail!("{}: {reason}", option(field)),
            other => return Err(other.into()),
        }
    }
    if o.split_mixes > 0 && o.mixes == 0 {
        bail!(
            "--split-mixes {}: split atoms need a presence model (--mixes above 0)",
            o.split_mixes
        );
    }
    if o.split_only.is_some() && o.split_mixes == 0 {
        bail!("--split-only needs --split-mixes above 0");
    }
    if !(o.split_seconds.is_finite() && (1.0..=60.0).contains(&o.split_seconds)) {
        bail!("--split-seconds {}: a mix lasts 1 to 60 s", o.split_seconds);
    }
    if !(1..=MAX_ATOMS_PER_FAMILY).contains(&o.atoms) {
        bail!(
            "--atoms {}: a palette holds 1 to {MAX_ATOMS_PER_FAMILY} atoms per family",
            o.atoms
        );
    }
    Ok(BuildPlan {
        sample_rate_hz: RENDER_RATE_HZ,
        analysis,
        learn: LearnSettings {
            atoms: o.atoms,
            ..LearnSettings::default()
        },
        training_mixes: o.mixes,
        mix_s: o.mix_seconds,
        row_stride: o.row_stride,
        presence: PresenceTraining {
            hidden: o.hidden,
            epochs: o.epochs,
            members: o.members,
            l2: o.l2,
            threshold_beta: o.presence_beta,
            shares: ShareTraining {
                hidden: o.share_hidden,
                exponent: o.share_exponent,
                admit: o.share_admit,
                ..ShareTraining::default()
            },
            trees: TreeTraining {
                trees: o.trees,
                depth: o.tree_depth,
                ..TreeTraining::default()
            },
            ..PresenceTraining::default()
        },
        split: SplitTraining {
            mixes: o.split_mixes,
            mix_s: o.split_seconds,
            updates: o.split_updates,
        },
        seed: o.seed,
        threads: threads(o.threads),
        ..BuildPlan::default()
    })
}

fn progress(msg: &str) {
    eprintln!("{msg}");
}

fn load_soundfont(path: &Path) -> Result<SoundFontRenderer> {
    let mut file = std::io::BufReader::new(
        std::fs::File::open(path)
            .with_context(|| format!("cannot open the SoundFont {}", path.display()))?,
    );
    SoundFontRenderer::new(&mut file, RENDER_RATE_HZ)
        .with_context(|| format!("cannot load the SoundFont {}", path.display()))
}

fn default_families() -> (Vec<Family>, Vec<String>) {
    let sections: Vec<String> = DEFAULT_SECTIONS.iter().map(|s| (*s).to_owned()).collect();
    let families = DEFAULT_FAMILIES
        .iter()
        .map(|(name, section)| Family {
            name: (*name).to_owned(),
            section: DEFAULT_SECTIONS
                .iter()
                .position(|s| s == section)
                .unwrap_or(0),
        })
        .collect();
    (families, sections)
}

/// Which espeak-ng voices, pitches and syllables make a set of sung vowels. Palettes are built
/// from the first set; checks use the second, which shares none of its voices, pitches or
/// syllables.
const ESPEAK_SETS: [(&[&str], &[u32], &[&str]); 2] = [
    (
        &["en+m1", "en+m3", "en+m5", "en+f1", "en+f3", "en+f5"],
        &[20, 50, 80],
        &[
            "laa laa laa laa",
            "aah ooh aah",
            "maa mee moo maa",
            "oh yeah oh yeah",
            "hold me close my love",
        ],
    ),
    (
        &["en+m2", "en+m4", "en+f2", "en+f4", "en-us+m6"],
        &[35, 65, 95],
        &[
            "doo bee doo bee",
            "ooh aah ooh",
            "la dee da dee",
            "nah nah nah nah",
            "sing along with me now",
        ],
    ),
];

/// Renders sung syllables with espeak-ng (slow, at several voices and pitches) and returns
/// them at the render rate.
fn espeak_clips(set: usize) -> Result<Vec<Vec<f32>>> {
    let (voices, pitches, texts) = ESPEAK_SETS[set.min(1)];
    let dir = std::env::temp_dir().join(format!("weft-espeak-{}-{set}", std::process::id()));
    std::fs::create_dir_all(&dir).with_context(|| format!("cannot create {}", dir.display()))?;
    let mut clips = Vec::new();
    let mut n = 0;
    for voice in voices {
        for pitch in pitches {
            for text in texts {
                let path = dir.join(format!("{n}.wav"));
                n += 1;
                let status = Command::new("espeak-ng")
                    .args(["-v", voice, "-p", &pitch.to_string(), "-s", "90", "-w"])
                    .arg(&path)
                    .arg(text)
                    .status()
                    .context("cannot run espeak-ng (install it: cargo xtask setup)")?;
                if !status.success() {
                    bail!("espeak-ng failed for voice {voice} ({status})");
                }
                clips.push(load_mono(&path)?);
            }
        }
    }
    let _ = std::fs::remove_dir_all(&dir);
    Ok(clips)
}

/// Decodes a file (any common format) to mono at the render rate.
fn load_mono(path: &Path) -> Result<Vec<f32>> {
    let mut source =
        Source::open(path).with_context(|| format!("cannot read {}", path.display()))?;
    let rate = source.info().sample_rate_hz;
    let mut mid = Vec::new();
    let mut side = Vec::new();
    while let Some((m, s)) = source
        .next_block()
        .with_context(|| format!("cannot decode {}", path.display()))?
    {
        mid.extend_from_slice(m);
        side.extend_from_slice(s);
    }
    if rate == RENDER_RATE_HZ {
        return Ok(mid);
    }
    let mut rs = StreamResampler::new(rate, RENDER_RATE_HZ)?;
    let mut out =
        Vec::with_capacity(mid.len() * RENDER_RATE_HZ as usize / rate.max(1) as usize + 16);
    let mut sink = |m: &[f32], _: &[f32]| out.extend_from_slice(m);
    rs.process(&mid, &side, &mut sink)?;
    rs.finish(&mut sink)?;
    Ok(out)
}

/// Reads `folder/<family>/*` into a clip bank; returns the family names (sorted) and clips.
fn read_folders(folder: &Path) -> Result<(Vec<String>, ClipBank)> {
    let mut names = Vec::new();
    for entry in
        std::fs::read_dir(folder).with_context(|| format!("cannot read {}", folder.display()))?
    {
        let entry = entry?;
        if entry.file_type()?.is_dir() {
            names.push(entry.file_name().to_string_lossy().into_owned());
        }
    }
    names.sort();
    if names.is_empty() {
        bail!("{} holds no family folders", folder.display());
    }
    let mut bank = ClipBank::new(names.len());
    for (f, name) in names.iter().enumerate() {
        let mut files: Vec<PathBuf> = std::fs::read_dir(folder.join(name))?
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.is_file())
            .collect();
        files.sort();
        let mut total_s = 0.0;
        for file in files {
            match load_mono(&file) {
                Ok(x) => {
                    total_s += x.len() as f64 / f64::from(RENDER_RATE_HZ);
                    bank.add(f, x);
                }
                Err(e) => eprintln!(
                    "skipping {}: {}",
                    file.display(),
                    weft_engine::error_chain(e.as_ref())
                ),
            }
        }
        if total_s < 10.0 {
            bail!("family '{name}' has {total_s:.1} s of audio; at least 10 s are needed");
        }
        eprintln!("  {name}: {total_s:.1} s of recordings");
    }
    Ok((names, bank))
}

fn clip_voicing(name: &str) -> FamilyVoicing {
    FamilyVoicing {
        family: name.to_owned(),
        source: VoiceSource::Clips,
        keys: (0, 127),
        velocities: (1, 127),
        roles: vec![Role::Line],
    }
}

fn learn(a: &LearnArgs) -> Result<()> {
    // Options first: a refused option costs no work.
    let plan = plan_from(&a.build)?;
    let (names, bank) = read_folders(&a.folder)?;
    let mut sections: Vec<String> = Vec::new();
    let mut families = Vec::new();
    for name in &names {
        let section = a
            .sections
            .iter()
            .find(|(f, _)| f == name)
            .map(|(_, s)| s.clone())
            .or_else(|| {
                DEFAULT_FAMILIES
                    .iter()
                    .find(|(f, _)| f == name)
                    .map(|(_, s)| (*s).to_owned())
            })
            .unwrap_or_else(|| name.clone());
        let idx = match sections.iter().position(|s| *s == section) {
            Some(i) => i,
            None => {
                sections.push(section);
                sections.len() - 1
            }
        };
        families.push(Family {
            name: name.clone(),
            section: idx,
        });
    }
    let base = reused_palette(&a.build, &plan, &families)?;
    let voicings: Vec<FamilyVoicing> = names.iter().map(|n| clip_voicing(n)).collect();
    let composer = Composer::new(voicings, bank.counts(), 1.0);
    let provenance = Provenance {
        weft_version: env!("CARGO_PKG_VERSION").to_owned(),
        source: format!("folders: {}", names.join(", ")),
        seed: plan.seed,
        notes: training_notes(&plan),
    };
    let palette = match base {
        Some(base) => fit_split(base, None, &composer, &bank, &plan, &progress)?,
        None => build_palette(
            &a.name, families, sections, None, &composer, &bank, &plan, provenance, &progress,
        )?,
    };
    write_palette(&with_split_note(palette, &plan), &a.out)
}

/// The palette of `--split-only`, if given: it must hold these families and have been built
/// with this seed, and it must have a presence model.
fn reused_palette(
    options: &BuildOptions,
    plan: &BuildPlan,
    families: &[Family],
) -> Result<Option<Palette>> {
    let Some(path) = options.split_only.as_deref() else {
        return Ok(None);
    };
    let palette = crate::analyze::load_palette(Some(path))?;
    let names = |f: &[Family]| f.iter().map(|x| x.name.clone()).collect::<Vec<_>>();
    if names(palette.families()) != names(families) {
        bail!(
            "--split-only {}: its families ({}) are not the ones this build makes ({})",
            path.display(),
            names(palette.families()).join(", "),
            names(families).join(", ")
        );
    }
    if palette.provenance().seed != plan.seed {
        bail!(
            "--split-only {}: it was built with seed {}, this build uses --seed {}",
            path.display(),
            palette.provenance().seed,
            plan.seed
        );
    }
    if palette.presence().is_none() {
        bail!(
            "--split-only {}: it has no presence model, so no amount stage to split",
            path.display()
        );
    }
    Ok(Some(std::sync::Arc::unwrap_or_clone(palette)))
}

/// `palette` with a provenance note on its split atoms in place of any earlier one.
fn with_split_note(palette: Palette, plan: &BuildPlan) -> Palette {
    let s = plan.split;
    if s.mixes == 0 {
        return palette;
    }
    let mut provenance = palette.provenance().clone();
    provenance.notes.retain(|n| !n.starts_with(SPLIT_NOTE));
    let fitted = format!(
        "{SPLIT_NOTE} fitted on {} mixes of {} s, {} updates",
        s.mixes, s.mix_s, s.updates
    );
    provenance.notes.push(if palette.split_atoms().is_some() {
        fitted
    } else {
        format!("{fitted}; left out: no gain shown on held-back mixes")
    });
    palette.with_provenance(provenance)
}

/// How the provenance note on split atoms begins.
const SPLIT_NOTE: &str = "split atoms:";

/// The provenance notes on how the presence stage was trained (what `weft palette show`
/// prints): the mixes, the rows kept, the networks, the trees and the share network.
fn training_notes(plan: &BuildPlan) -> Vec<String> {
    let p = &plan.presence;
    if plan.training_mixes == 0 {
        return vec!["no presence model (no training mixes)".to_owned()];
    }
    let rows = if plan.row_stride <= 1 {
        "every presence row kept".to_owned()
    } else {
        format!("one presence row in {} kept", plan.row_stride)
    };
    let shape = if p.hidden == 0 {
        "logistic regression".to_owned()
    } else {
        format!("{} network(s) of {} hidden units", p.members, p.hidden)
    };
    let mut model = format!(
        "presence model: {shape}, {} epochs, thresholds chosen for F-beta with beta {}",
        p.epochs, p.threshold_beta
    );
    if p.trees.trees > 0 {
        model += &format!(
            "; up to {} boosted trees of depth {} per family",
            p.trees.trees, p.trees.depth
        );
    }
    let shares = if p.shares.hidden == 0 {
        "no direct share network".to_owned()
    } else {
        format!(
            "direct share network: {} hidden units, exponent {}, admit {}",
            p.shares.hidden, p.shares.exponent, p.shares.admit
        )
    };
    vec![
        format!(
            "{} training mixes of {} s, 1-{} families at {} to {} dB; {rows}",
            plan.training_mixes,
            plan.mix_s,
            plan.max_families,
            plan.gain_range_db.0,
            plan.gain_range_db.1
        ),
        model,
        shares,
    ]
}

fn write_palette(palette: &Palette, out: &Path) -> Result<()> {
    let bytes = palette.to_bytes();
    std::fs::write(out, &bytes).with_context(|| format!("cannot write {}", out.display()))?;
    eprintln!(
        "wrote {} ({} bytes: {} families, {} atoms)",
        out.display(),
        bytes.len(),
        palette.families().len(),
        palette.atom_counts().iter().sum::<usize>()
    );
    Ok(())
}

/// The default families' voicings and the voice clips of set `set` (0: building, 1: checking).
fn soundfont_scene(
    voice: VoiceSourceArg,
    set: usize,
) -> Result<(Vec<FamilyVoicing>, ClipBank, String)> {
    let voicings = general_midi_voicings();
    let mut bank = ClipBank::new(voicings.len());
    let mut source = String::from("choir programs 52-54");
    if voice == VoiceSourceArg::Espeak {
        let clips = espeak_clips(set)?;
        let voice_family = voicings
            .iter()
            .position(|v| v.family == "voice")
            .unwrap_or(12);
        let version = Command::new("espeak-ng")
            .arg("--version")
            .output()
            .map(|o| {
                // "eSpeak NG text-to-speech: 1.51  Data at: /usr/lib/…": the version, not
                // where its data lies on the machine that built the palette.
                let text = String::from_utf8_lossy(&o.stdout);
                let version = text.split("Data at").next().unwrap_or_default();
                version.trim().to_owned()
            })
            .unwrap_or_default();
        source = format!(
            "{} espeak-ng clips ({version}) and choir programs 52-54",
            clips.len()
        );
        for c in clips {
            bank.add(voice_family, c);
        }
    }
    Ok((voicings, bank, source))
}

fn render(a: &RenderArgs) -> Result<()> {
    let plan = plan_from(&a.build)?;
    let (families, sections) = default_families();
    let base = reused_palette(&a.build, &plan, &families)?;
    let renderer = load_soundfont(&a.soundfont)?;
    let (voicings, bank, voice_source) = soundfont_scene(a.voice, 0)?;
    let composer = Composer::new(voicings, bank.counts(), 0.6);
    let provenance = Provenance {
        weft_version: env!("CARGO_PKG_VERSION").to_owned(),
        source: format!(
            "soundfont: {}; voice: {voice_source}",
            renderer.soundfont_name()
        ),
        seed: plan.seed,
        notes: std::iter::once(format!(
            "note studies every {} keys at velocities {:?}; {} atoms per family",
            plan.study_key_step, plan.study_velocities, plan.learn.atoms
        ))
        .chain(training_notes(&plan))
        .collect(),
    };
    let palette = match base {
        Some(base) => fit_split(base, Some(&renderer), &composer, &bank, &plan, &progress)?,
        None => build_palette(
            "Weft default",
            families,
            sections,
            Some(&renderer),
            &composer,
            &bank,
            &plan,
            provenance,
            &progress,
        )?,
    };
    write_palette(&with_split_note(palette, &plan), &a.out)
}

/// Runs `weft palette check` and returns its report.
pub fn check(a: &CheckArgs) -> Result<CheckReport> {
    let palette = crate::analyze::load_palette(a.palette.as_deref())?;
    let gm = general_midi_voicings();
    // Voicings aligned with the palette's families: recordings first, then the SoundFont.
    let (folder_names, folder_bank) = match &a.folders {
        Some(f) => {
            let (n, b) = read_folders(f)?;
            (n, Some(b))
        }
        None => (Vec::new(), None),
    };
    let nf = palette.families().len();
    let mut voicings = Vec::new();
    let mut bank = ClipBank::new(nf);
    let mut needs_soundfont = false;
    let espeak = if a.voice == VoiceSourceArg::Espeak
        && palette.family_index("voice").is_some()
        && folder_bank.is_none()
    {
        Some(espeak_clips(1)?)
    } else {
        None
    };
    for (f, fam) in palette.families().iter().enumerate() {
        if let (Some(i), Some(b)) = (
            folder_names.iter().position(|n| *n == fam.name),
            &folder_bank,
        ) {
            for c in b.family(i) {
                bank.add(f, c.clone());
            }
            voicings.push(clip_voicing(&fam.name));
        } else if let Some(v) = gm.iter().find(|v| v.family == fam.name) {
            needs_soundfont = true;
            if fam.name == "voice"
                && let Some(clips) = &espeak
            {
                for c in clips {
                    bank.add(f, c.clone());
                }
            }
            voicings.push(v.clone());
        } else {
            bail!(
                "family '{}' has neither recordings (--folders) nor a General MIDI voicing",
                fam.name
            );
        }
    }
    let renderer = if needs_soundfont {
        Some(load_soundfont(&a.soundfont)?)
    } else {
        None
    };
    let composer = Composer::new(
        voicings,
        bank.counts(),
        if a.folders.is_some() { 1.0 } else { 0.6 },
    );
    let plan = CheckPlan {
        sample_rate_hz: RENDER_RATE_HZ,
        mixes: a.mixes,
        mix_s: a.mix_seconds,
        seed: a.seed,
        threads: threads(a.threads),
        ..CheckPlan::default()
    };
    let mode = match a.mode {
        ModeArg::TwoStage => SharesMode::TwoStage,
        ModeArg::Nmf => SharesMode::NmfAlone,
        ModeArg::KnownPresence => SharesMode::KnownPresence,
    };
    Ok(check_palette(
        &palette,
        renderer.as_ref(),
        &composer,
        &bank,
        &plan,
        mode,
    )?)
}

fn print_level(title: &str, l: &weft_engine::shares::check::LevelScore) {
    println!(
        "{title:<24} {:>7} {:>7} {:>7} {:>5} {:>5} {:>5} {:>8} {:>6}",
        "windows", "TV %", "MAE pp", "P", "R", "F1", "NMF MAE", "NMF F1"
    );
    for g in &l.groups {
        println!(
            "{:<24} {:>7} {:>7.1} {:>7.1} {:>5.2} {:>5.2} {:>5.2} {:>8.1} {:>6.2}",
            g.name,
            g.windows_present,
            g.tv_pct,
            g.mae_pp,
            g.precision,
            g.recall,
            g.f1,
            g.nmf_mae_pp,
            g.nmf_f1
        );
    }
    println!(
        "{:<24} {:>7} {:>7.1} {:>7.1} {:>5.2} {:>5.2} {:>5.2} {:>8.1} {:>6.2}",
        "all",
        "",
        l.tv_pct,
        l.present_mae_pp,
        l.precision,
        l.recall,
        l.f1,
        l.nmf_present_mae_pp,
        l.nmf_f1
    );
    println!(
        "energy misattributed: {:.1} % (NMF alone {:.1} %, uniform {:.1} %)",
        l.tv_pct, l.nmf_tv_pct, l.uniform_tv_pct
    );
    let b = weft_engine::shares::check::BORDERLINE_FACTOR;
    let mark = 100.0 * weft_engine::shares::check::PRESENT_SHARE;
    println!(
        "presence mistakes: {} ({:.0} % of them borderline: truly between {:.1} and {:.0} %)\n",
        l.mistakes,
        l.borderline_pct,
        mark / b,
        mark * b
    );
}

/// The figures by how many families sound at once.
fn print_density(r: &CheckReport) {
    if r.by_density.is_empty() {
        return;
    }
    println!("by how many families truly sound in the window");
    println!(
        "{:<24} {:>7} {:>7} {:>9} {:>5} {:>7}",
        "families sounding", "windows", "TV %", "section %", "F1", "NMF %"
    );
    for d in &r.by_density {
        let label = if d.families_present == weft_engine::shares::check::MAX_DENSITY {
            format!("{} or more", d.families_present)
        } else {
            d.families_present.to_string()
        };
        println!(
            "{:<24} {:>7} {:>7.1} {:>9.1} {:>5.2} {:>7.1}",
            label, d.windows, d.tv_pct, d.section_tv_pct, d.f1, d.nmf_tv_pct
        );
    }
    println!();
}

/// Where each family's energy goes when it plays alone.
fn print_alone(r: &CheckReport) {
    if r.alone.is_empty() {
        return;
    }
    println!(
        "where a family's energy goes when it plays alone (windows where it holds >= {:.0} %)",
        100.0 * weft_engine::shares::check::ALONE_SHARE
    );
    println!(
        "{:<24} {:>7} {:>7} {:>7} {:>7}  given instead to (two stages)",
        "family", "windows", "truth %", "kept %", "NMF %"
    );
    for s in &r.alone {
        let takers: Vec<String> = s
            .taken_by
            .iter()
            .map(|(name, pct)| format!("{name} {pct:.0} %"))
            .collect();
        println!(
            "{:<24} {:>7} {:>7.1} {:>7.1} {:>7.1}  {}",
            s.name,
            s.windows,
            s.truth_pct,
            s.kept_pct,
            s.nmf_kept_pct,
            takers.join(", ")
        );
    }
    println!();
}

fn print_report(r: &CheckReport) {
    println!("{} held-out mixes, {} windows of 1 s\n", r.mixes, r.windows);
    print_level("family", &r.family);
    print_level("section", &r.section);
    print_alone(r);
    print_density(r);
    println!("mean unexplained share: {:.3}", r.unexplained_mean);
    println!(
        "realtime factor: {:.0}x (both stages and the NMF-alone baseline, one thread: {:.2} % of one core)",
        r.realtime_factor,
        100.0 / r.realtime_factor.max(1e-9)
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_build_s_notes_name_the_rows_the_networks_and_the_trees() {
        let mut plan = BuildPlan {
            training_mixes: 384_000,
            row_stride: 2,
            ..BuildPlan::default()
        };
        plan.presence.members = 4;
        plan.presence.hidden = 128;
        plan.presence.trees.trees = 300;
        plan.presence.trees.depth = 6;
        plan.presence.shares.hidden = 512;
        let notes = training_notes(&plan).join("\n");
        for part in [
            "384000 training mixes",
            "one presence row in 2 kept",
            "4 network(s) of 128 hidden units",
            "up to 300 boosted trees of depth 6",
            "direct share network: 512 hidden units",
        ] {
            assert!(notes.contains(part), "{part}: {notes}");
        }
        plan.row_stride = 1;
        plan.presence.trees.trees = 0;
        plan.presence.shares.hidden = 0;
        plan.presence.hidden = 0;
        let notes = training_notes(&plan).join("\n");
        assert!(
            notes.contains("presence model: logistic regression"),
            "{notes}"
        );
        assert!(notes.contains("every presence row kept"), "{notes}");
        assert!(!notes.contains("boosted"), "{notes}");
        assert!(notes.contains("no direct share network"), "{notes}");
        plan.training_mixes = 0;
        assert_eq!(
            training_notes(&plan),
            ["no presence model (no training mixes)"]
        );
    }
}
