//! Windows: the feature vectors style models learn from and estimate on.
//!
//! A window summarises the analysis frames of the last [`WindowSpec::window_s`] seconds (default
//! 3 s) and a new window starts every [`WindowSpec::hop_s`] seconds (default 1 s). Each frame
//! contributes [`frame_value_names`] — its level, timbre descriptors and family shares — and a
//! window holds each value's mean and population standard deviation (ddof = 0, numpy's default)
//! over its frames: the features named by [`schema`].
//!
//! The same [`Windower`] runs live (the plugin's analysis thread pushes every frame as it comes)
//! and offline (the command-line tool pushes a file's frames, then [`Windower::finish`]), so a
//! model trained on files sees exactly what it will see live. Frames come from
//! [`crate::Analyzer::process`] (the live dB convention); the offline librosa-equal path
//! (`analyze_clip`) is for reference tests, not for windows.
//!
//! Feature names carry their unit and statistic, e.g. `centroid_hz_mean`, `share_bass_sd`;
//! [`phrase`] turns a feature and its side of the category into words for a musician.

use crate::analyzer::{AnalysisSettings, Analyzer, FrameResult, SettingsError};
use crate::frames::FrameConfig;
use crate::palette::Palette;
use crate::shares::{SharesError, SharesSettings};
use crate::style::{FeatureSchema, Relation, StyleError};
use crate::timbre::{N_CONTRAST, N_MFCC};
use thiserror::Error;

/// Name of the window feature layout written into every schema.
pub const SCHEMA_NAME: &str = "weft-window";
/// Version of the layout; bump it whenever a feature's meaning changes.
pub const SCHEMA_VERSION: u32 = 1;
/// Default window length, seconds.
pub const DEFAULT_WINDOW_S: f64 = 3.0;
/// Default time between window starts, seconds.
pub const DEFAULT_HOP_S: f64 = 1.0;
/// Accepted window lengths, seconds.
pub const WINDOW_S_RANGE: (f64, f64) = (0.5, 60.0);

/// The descriptors summarised per frame, in order, with their units in the names.
const DESCRIPTOR_NAMES: [&str; 7] = [
    "level_rms_dbfs",
    "centroid_hz",
    "bandwidth_hz",
    "rolloff_hz",
    "flatness",
    "flux_db",
    "zero_crossings_per_sample",
];

/// Window length and hop.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowSpec {
    /// Window length, seconds.
    pub window_s: f64,
    /// Time between window starts, seconds (at most the window length).
    pub hop_s: f64,
}

impl Default for WindowSpec {
    fn default() -> Self {
        Self {
            window_s: DEFAULT_WINDOW_S,
            hop_s: DEFAULT_HOP_S,
        }
    }
}

/// Why windows could not be set up.
#[derive(Debug, Clone, PartialEq, Error)]
pub enum WindowError {
    /// The window length is outside [`WINDOW_S_RANGE`] or the hop is not in `(0, window]`.
    #[error(
        "window {window_s} s / hop {hop_s} s: the window must be 0.5–60 s and the hop between 0 and the window"
    )]
    Spec {
        /// Requested window length, seconds.
        window_s: f64,
        /// Requested hop, seconds.
        hop_s: f64,
    },
    /// The schema could not be built (e.g. two families with the same name).
    #[error("the palette's family names do not make a valid schema")]
    Schema(#[from] StyleError),
    /// The analysis cannot run at this sample rate.
    #[error("the analysis cannot run at this sample rate")]
    Settings(#[from] SettingsError),
    /// The palette cannot be used at this sample rate.
    #[error("the palette cannot be used at this sample rate")]
    Shares(#[from] SharesError),
}

impl WindowSpec {
    /// Checks the lengths.
    ///
    /// # Errors
    /// [`WindowError::Spec`] when out of range.
    pub fn validate(self) -> Result<Self, WindowError> {
        let (lo, hi) = WINDOW_S_RANGE;
        let ok = (lo..=hi).contains(&self.window_s)
            && self.hop_s.is_finite()
            && self.hop_s > 0.0
            && self.hop_s <= self.window_s;
        if ok {
            Ok(self)
        } else {
            Err(WindowError::Spec {
                window_s: self.window_s,
                hop_s: self.hop_s,
            })
        }
    }
}

/// A family name as it appears in feature names: lowercase ASCII letters and digits, other runs
/// of characters turned into one `_` ("toms & hand percussion" → `toms_hand_percussion`).
#[must_use]
pub fn slug(name: &str) -> String {
    let mut out = String::with_capacity(name.len());
    for c in name.chars() {
        if c.is_ascii_alphanumeric() {
            out.push(c.to_ascii_lowercase());
        } else if !out.is_empty() && !out.ends_with('_') {
            out.push('_');
        }
    }
    while out.ends_with('_') {
        out.pop();
    }
    out
}

/// The values each frame contributes, in order: the level and descriptors, the MFCCs
/// (`mfcc_1` …), the spectral contrast bands (`contrast_db_1` … lowest band first), each
/// family's share (`share_<slug>`) and `unexplained`.
#[must_use]
pub fn frame_value_names(palette: &Palette) -> Vec<String> {
    let mut names: Vec<String> = DESCRIPTOR_NAMES.iter().map(|s| (*s).to_owned()).collect();
    names.extend((1..=N_MFCC).map(|i| format!("mfcc_{i}")));
    names.extend((1..=N_CONTRAST).map(|i| format!("contrast_db_{i}")));
    names.extend(
        palette
            .families()
            .iter()
            .map(|f| format!("share_{}", slug(&f.name))),
    );
    names.push("unexplained".to_owned());
    names
}

/// The palette's identity as schemas record it: its name and a hash (64-bit FNV-1a) of its
/// families, sections and atoms, so a palette relearned under the same name is told apart.
#[must_use]
pub fn palette_identity(palette: &Palette) -> String {
    let mut h: u64 = 0xcbf2_9ce4_8422_2325;
    let mut eat = |bytes: &[u8]| {
        for &b in bytes {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0000_0100_0000_01b3);
        }
    };
    for f in palette.families() {
        eat(f.name.as_bytes());
        eat(&(f.section as u64).to_le_bytes());
    }
    for s in palette.sections() {
        eat(s.as_bytes());
    }
    for a in palette.atoms() {
        eat(&a.to_bits().to_le_bytes());
    }
    format!("{} #{h:016x}", palette.name())
}

/// The window feature schema for `spec` and `palette`: every frame value's `_mean` and `_sd`
/// (all means first, then all standard deviations). The schema's name records the window
/// length and hop, so a model trained on other windows is refused.
///
/// # Errors
/// [`WindowError`] for a bad spec or palette names that collide after [`slug`].
pub fn schema(spec: WindowSpec, palette: &Palette) -> Result<FeatureSchema, WindowError> {
    let spec = spec.validate()?;
    let values = frame_value_names(palette);
    let mut features: Vec<String> = values.iter().map(|v| format!("{v}_mean")).collect();
    features.extend(values.iter().map(|v| format!("{v}_sd")));
    Ok(FeatureSchema::new(
        format!("{SCHEMA_NAME} {}s/{}s", spec.window_s, spec.hop_s),
        SCHEMA_VERSION,
        palette_identity(palette),
        features,
    )?)
}

/// One window's features.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct WindowStats<'a> {
    /// Centre time of the window's first frame, seconds.
    pub start_s: f64,
    /// Centre time of its last frame, seconds.
    pub end_s: f64,
    /// Frames summarised.
    pub frames: usize,
    /// The features, in [`schema`] order.
    pub features: &'a [f64],
}

/// Turns frames into overlapping windows of features. Allocates only in [`Windower::new`].
#[derive(Debug, Clone)]
pub struct Windower {
    spec: WindowSpec,
    hop_s: f64,
    window_frames: usize,
    hop_frames: usize,
    families: usize,
    n_values: usize,
    /// The last `window_frames` frames' values, `window_frames × n_values`, as a ring.
    ring: Vec<f32>,
    times: Vec<f64>,
    /// Next ring row to write.
    pos: usize,
    /// Rows holding frames.
    filled: usize,
    /// Frames since the last window.
    since: usize,
    emitted: u64,
    features: Vec<f64>,
}

impl Windower {
    /// Windows of `spec` over frames of `framing` at `sample_rate_hz`, with the share values of
    /// `palette` (the analyzer's palette). The window and hop are rounded to whole frames.
    ///
    /// # Errors
    /// [`WindowError::Spec`] for a bad spec.
    pub fn new(
        spec: WindowSpec,
        sample_rate_hz: f64,
        framing: FrameConfig,
        palette: &Palette,
    ) -> Result<Self, WindowError> {
        let spec = spec.validate()?;
        let hop_s = framing.hop_len as f64 / sample_rate_hz;
        let window_frames = ((spec.window_s / hop_s).round() as usize).max(1);
        let hop_frames = ((spec.hop_s / hop_s).round() as usize).clamp(1, window_frames);
        let families = palette.families().len();
        let n_values = DESCRIPTOR_NAMES.len() + N_MFCC + N_CONTRAST + families + 1;
        Ok(Self {
            spec,
            hop_s,
            window_frames,
            hop_frames,
            families,
            n_values,
            ring: vec![0.0; window_frames * n_values],
            times: vec![0.0; window_frames],
            pos: 0,
            filled: 0,
            since: 0,
            emitted: 0,
            features: vec![0.0; 2 * n_values],
        })
    }

    /// The spec this windower was built with.
    pub fn spec(&self) -> WindowSpec {
        self.spec
    }

    /// Frames per window.
    pub fn window_frames(&self) -> usize {
        self.window_frames
    }

    /// Number of features per window.
    pub fn n_features(&self) -> usize {
        self.features.len()
    }

    /// Windows emitted since the start or the last reset.
    pub fn emitted(&self) -> u64 {
        self.emitted
    }

    /// Forgets all frames.
    pub fn reset(&mut self) {
        self.pos = 0;
        self.filled = 0;
        self.since = 0;
        self.emitted = 0;
    }

    /// Adds one frame; returns a window when one completes: the first once a whole window of
    /// frames has arrived, then one every hop. Does not allocate.
    pub fn push(&mut self, frame: &FrameResult) -> Option<WindowStats<'_>> {
        let row = &mut self.ring[self.pos * self.n_values..(self.pos + 1) * self.n_values];
        let d = &frame.descriptors;
        let head = [
            frame.level.rms_db,
            d.centroid_hz,
            d.bandwidth_hz,
            d.rolloff_hz,
            d.flatness,
            d.flux_db,
            d.zero_crossings_per_sample,
        ];
        let shares = &frame.shares.raw;
        let share_values = (0..self.families).map(|f| {
            if f < shares.families {
                shares.share[f]
            } else {
                0.0
            }
        });
        let values = head
            .iter()
            .copied()
            .chain(d.mfcc.iter().copied())
            .chain(d.contrast_db.iter().copied())
            .chain(share_values)
            .chain(std::iter::once(shares.unexplained));
        for (slot, v) in row.iter_mut().zip(values) {
            // Frames carry no NaN (the engine's contract); guard anyway so a window never does.
            *slot = if v.is_finite() { v } else { 0.0 };
        }
        self.times[self.pos] = frame.time_s;
        self.pos = (self.pos + 1) % self.window_frames;
        self.filled = (self.filled + 1).min(self.window_frames);
        self.since += 1;
        if self.filled == self.window_frames && (self.emitted == 0 || self.since >= self.hop_frames)
        {
            return Some(self.summarise());
        }
        None
    }

    /// Ends a finite stream: a clip shorter than one window still gives one window (of the
    /// frames it has); otherwise nothing. Does not allocate.
    pub fn finish(&mut self) -> Option<WindowStats<'_>> {
        (self.emitted == 0 && self.filled > 0).then(|| self.summarise())
    }

    fn summarise(&mut self) -> WindowStats<'_> {
        let n = self.filled;
        let v = self.n_values;
        // Rows of the ring in time order: the oldest is at `pos` once the ring is full.
        let first = if n == self.window_frames { self.pos } else { 0 };
        let (means, sds) = self.features.split_at_mut(v);
        means.fill(0.0);
        sds.fill(0.0);
        for r in 0..n {
            let row = &self.ring[r * v..(r + 1) * v];
            for (m, &x) in means.iter_mut().zip(row) {
                *m += f64::from(x);
            }
        }
        let inv = 1.0 / n as f64;
        for m in means.iter_mut() {
            *m *= inv;
        }
        for r in 0..n {
            let row = &self.ring[r * v..(r + 1) * v];
            for ((s, &m), &x) in sds.iter_mut().zip(means.iter()).zip(row) {
                let d = f64::from(x) - m;
                *s += d * d;
            }
        }
        for s in sds.iter_mut() {
            *s = (*s * inv).sqrt();
        }
        self.since = 0;
        self.emitted += 1;
        let last = (first + n - 1) % self.window_frames;
        WindowStats {
            start_s: self.times[first],
            end_s: self.times[last],
            frames: n,
            features: &self.features,
        }
    }

    /// Time between frames, seconds.
    pub fn frame_period_s(&self) -> f64 {
        self.hop_s
    }
}

/// The windows of a whole clip held in memory (mono, or the mid signal), as the live analysis
/// and `weft` compute them: the engine's default framing at `sample_rate_hz`, `palette`'s
/// shares, every window of `spec` and, for a clip shorter than one window, the one partial
/// window. For training and checking categories from audio already in memory. Allocates.
///
/// # Errors
/// [`WindowError`] for a bad spec or a rate the analysis or the palette cannot use.
pub fn clip_windows(
    palette: &Palette,
    spec: WindowSpec,
    sample_rate_hz: f64,
    mid: &[f32],
) -> Result<Vec<OwnedWindow>, WindowError> {
    let settings = AnalysisSettings::for_sample_rate(sample_rate_hz)?;
    let mut analyzer = Analyzer::with_palette(settings, palette, SharesSettings::default())?;
    let mut windower = Windower::new(spec, sample_rate_hz, settings.framing, palette)?;
    let mut out = Vec::new();
    let mut take = |f: &FrameResult| {
        if let Some(w) = windower.push(f) {
            out.push(OwnedWindow::from(w));
        }
    };
    analyzer.process(mid, None, &mut take);
    analyzer.finish(&mut take);
    if let Some(w) = windower.finish() {
        out.push(OwnedWindow::from(w));
    }
    Ok(out)
}

/// A window's features, owned (what [`clip_windows`] returns).
#[derive(Debug, Clone, PartialEq)]
pub struct OwnedWindow {
    /// Centre time of the window's first frame, seconds.
    pub start_s: f64,
    /// Centre time of its last frame, seconds.
    pub end_s: f64,
    /// Frames summarised.
    pub frames: usize,
    /// The features, in [`schema`] order.
    pub features: Vec<f64>,
}

impl From<WindowStats<'_>> for OwnedWindow {
    fn from(w: WindowStats<'_>) -> Self {
        Self {
            start_s: w.start_s,
            end_s: w.end_s,
            frames: w.frames,
            features: w.features.to_vec(),
        }
    }
}

/// Words for one feature of a reason, for a musician: what the window has more or less of than
/// the category (`relation` is the window's value against the category's mean, see
/// [`crate::style::Reason::relation_to_category`]). Unknown names fall back to the name itself.
#[must_use]
pub fn phrase(feature: &str, relation: Relation) -> String {
    let (value, stat) = match feature.rsplit_once('_') {
        Some((v, s @ ("mean" | "sd"))) => (v, s),
        _ => (feature, "mean"),
    };
    let above = match relation {
        Relation::Above => true,
        Relation::Below => false,
        Relation::Level => return format!("{} as in the category", readable(value)),
    };
    if stat == "sd" {
        let what = readable(value);
        return if above {
            format!("{what} varies more than in the category")
        } else {
            format!("steadier {what} than the category")
        };
    }
    let pick = |more: &str, less: &str| {
        if above {
            more.to_owned()
        } else {
            less.to_owned()
        }
    };
    if let Some(family) = value.strip_prefix("share_") {
        let family = family.replace('_', " ");
        return if family == "bass" && !above {
            "less low end (bass) than the category".to_owned()
        } else {
            format!(
                "{} {family} than the category",
                if above { "more" } else { "less" }
            )
        };
    }
    if let Some(k) = value.strip_prefix("mfcc_") {
        return format!(
            "tone colour differs (MFCC {k} {} the category)",
            if above { "above" } else { "below" }
        );
    }
    if let Some(k) = value.strip_prefix("contrast_db_") {
        return format!(
            "{} in {}",
            if above {
                "sharper peaks"
            } else {
                "a flatter spectrum"
            },
            contrast_band_words(k)
        );
    }
    match value {
        "level_rms_dbfs" => pick("louder than the category", "quieter than the category"),
        "centroid_hz" => pick("brighter than the category", "darker than the category"),
        "bandwidth_hz" => pick(
            "a wider spread of frequencies",
            "a narrower spread of frequencies",
        ),
        "rolloff_hz" => pick(
            "more top end than the category",
            "less top end than the category",
        ),
        "flatness" => pick("noisier than the category", "more tonal than the category"),
        "flux_db" => pick(
            "busier (more onsets) than the category",
            "smoother (fewer onsets) than the category",
        ),
        "zero_crossings_per_sample" => pick(
            "more hiss and edge than the category",
            "less hiss and edge than the category",
        ),
        "unexplained" => pick(
            "more sound the palette does not know",
            "less sound the palette does not know",
        ),
        _ => format!(
            "{} {} the category",
            readable(value),
            if above { "above" } else { "below" }
        ),
    }
}

/// A value name in plain words (`centroid_hz` → "brightness").
fn readable(value: &str) -> String {
    match value {
        "level_rms_dbfs" => "level".to_owned(),
        "centroid_hz" => "brightness".to_owned(),
        "bandwidth_hz" => "spread".to_owned(),
        "rolloff_hz" => "top end".to_owned(),
        "flatness" => "noisiness".to_owned(),
        "flux_db" => "onset activity".to_owned(),
        "zero_crossings_per_sample" => "edge".to_owned(),
        "unexplained" => "unexplained sound".to_owned(),
        v => {
            if let Some(f) = v.strip_prefix("share_") {
                format!("{} level", f.replace('_', " "))
            } else if let Some(k) = v.strip_prefix("mfcc_") {
                format!("tone colour (MFCC {k})")
            } else if let Some(k) = v.strip_prefix("contrast_db_") {
                format!("peakiness in {}", contrast_band_words(k))
            } else {
                v.replace('_', " ")
            }
        }
    }
}

/// The octave band of spectral contrast band `k` (1-based; librosa 0.11.0 spectral_contrast
/// with fmin = 200 Hz and 6 bands: below 200 Hz, then octaves up to 6.4 kHz, then above).
fn contrast_band_words(k: &str) -> String {
    match k.parse::<u32>() {
        Ok(1) => "the lows (below 200 Hz)".to_owned(),
        Ok(i @ 2..=6) => {
            let lo = 200u32 << (i - 2);
            format!("the {lo}–{} Hz octave", lo * 2)
        }
        Ok(7) => "the highs (above 6.4 kHz)".to_owned(),
        _ => format!("contrast band {k}"),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::analyzer::{AnalysisSettings, Analyzer};
    use crate::shares::SharesSettings;

    fn signal(sr: f64, seconds: f64, seed: u64) -> Vec<f32> {
        let mut state = seed;
        (0..(sr * seconds) as usize)
            .map(|i| {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let noise = (state >> 40) as f32 / (1u64 << 24) as f32 - 0.5;
                let t = i as f64 / sr;
                let tone = (0.3 * (std::f64::consts::TAU * 330.0 * t).sin()) as f32;
                // Loudness that changes over time, so the standard deviations are not zero.
                tone * (1.0 + (t * 0.7).sin() as f32) * 0.5 + 0.05 * noise
            })
            .collect()
    }

    fn frames(sr: f64, x: &[f32], block: usize) -> Vec<FrameResult> {
        let palette = Palette::default_palette();
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let mut analyzer =
            Analyzer::with_palette(settings, &palette, SharesSettings::default()).expect("ok");
        let mut out = Vec::new();
        for chunk in x.chunks(block) {
            analyzer.process(chunk, None, |f| out.push(*f));
        }
        analyzer.finish(|f| out.push(*f));
        out
    }

    fn windows_of(frames: &[FrameResult], sr: f64) -> Vec<(f64, f64, usize, Vec<f64>)> {
        let palette = Palette::default_palette();
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let mut w = Windower::new(WindowSpec::default(), sr, settings.framing, &palette)
            .expect("default spec");
        let mut out = Vec::new();
        for f in frames {
            if let Some(s) = w.push(f) {
                out.push((s.start_s, s.end_s, s.frames, s.features.to_vec()));
            }
        }
        if let Some(s) = w.finish() {
            out.push((s.start_s, s.end_s, s.frames, s.features.to_vec()));
        }
        out
    }

    #[test]
    fn schema_names_every_feature_once_with_units() {
        let palette = Palette::default_palette();
        let schema = schema(WindowSpec::default(), &palette).expect("valid");
        let values = frame_value_names(&palette);
        assert_eq!(schema.len(), 2 * values.len());
        assert_eq!(
            values.len(),
            7 + N_MFCC + N_CONTRAST + palette.families().len() + 1
        );
        assert!(schema.features.contains(&"centroid_hz_mean".to_owned()));
        assert!(
            schema
                .features
                .contains(&"share_toms_hand_percussion_sd".to_owned())
        );
        assert!(schema.palette.starts_with(palette.name()));
        // Another window length is another schema: a model trained on it is refused.
        let other = super::schema(
            WindowSpec {
                window_s: 5.0,
                hop_s: 1.0,
            },
            &palette,
        )
        .expect("valid");
        assert_ne!(schema, other);
    }

    #[test]
    fn windows_match_a_direct_computation_and_ignore_block_size() {
        let sr = 44_100.0;
        let x = signal(sr, 7.5, 0x3A1D_0001);
        let reference = frames(sr, &x, x.len());
        let windows = windows_of(&reference, sr);
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let per_window = (DEFAULT_WINDOW_S * sr / settings.framing.hop_len as f64).round() as usize;
        let per_hop = (DEFAULT_HOP_S * sr / settings.framing.hop_len as f64).round() as usize;
        // First window after `per_window` frames, then one per hop.
        assert_eq!(windows.len(), 1 + (reference.len() - per_window) / per_hop);
        // Recompute window 2 directly from its frames: centroid mean and sd (numpy's ddof = 0).
        let (start_s, end_s, n, features) = &windows[2];
        assert_eq!(*n, per_window);
        let first = per_window - 1 + 2 * per_hop + 1 - per_window;
        let span = &reference[first..first + per_window];
        assert_eq!(span[0].time_s, *start_s);
        assert_eq!(span[per_window - 1].time_s, *end_s);
        let c: Vec<f64> = span
            .iter()
            .map(|f| f64::from(f.descriptors.centroid_hz))
            .collect();
        let mean = c.iter().sum::<f64>() / c.len() as f64;
        let sd = (c.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / c.len() as f64).sqrt();
        let values = features.len() / 2;
        assert!((features[1] - mean).abs() < 1e-9 * mean.abs().max(1.0));
        assert!((features[values + 1] - sd).abs() < 1e-6 * sd.max(1.0));
        assert!(sd > 0.0, "the test signal varies");
        for block in [1, 512, 4093] {
            assert_eq!(
                windows_of(&frames(sr, &x, block), sr),
                windows,
                "block {block}"
            );
        }
    }

    #[test]
    fn a_short_clip_still_gives_one_window_and_reset_forgets() {
        let sr = 48_000.0;
        let x = signal(sr, 1.2, 7);
        let fr = frames(sr, &x, 4096);
        let windows = windows_of(&fr, sr);
        assert_eq!(windows.len(), 1);
        assert_eq!(windows[0].2, fr.len());
        assert!(windows[0].3.iter().all(|v| v.is_finite()));

        let palette = Palette::default_palette();
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let mut w =
            Windower::new(WindowSpec::default(), sr, settings.framing, &palette).expect("ok");
        for f in &fr {
            assert!(w.push(f).is_none());
        }
        w.reset();
        assert!(w.finish().is_none(), "nothing left after reset");
    }

    #[test]
    fn pushing_frames_does_not_allocate() {
        let sr = 48_000.0;
        let fr = frames(sr, &signal(sr, 5.0, 11), 4096);
        let palette = Palette::default_palette();
        let settings = AnalysisSettings::for_sample_rate(sr).expect("valid");
        let mut w =
            Windower::new(WindowSpec::default(), sr, settings.framing, &palette).expect("ok");
        let mut count = 0;
        assert_no_alloc::assert_no_alloc(|| {
            for f in &fr {
                count += usize::from(w.push(f).is_some());
            }
        });
        assert!(count >= 2);
    }

    #[test]
    fn bad_specs_are_refused() {
        for (window_s, hop_s) in [(0.1, 0.1), (3.0, 0.0), (3.0, 4.0), (f64::NAN, 1.0)] {
            assert!(WindowSpec { window_s, hop_s }.validate().is_err());
        }
    }

    #[test]
    fn phrases_read_as_words() {
        assert_eq!(
            phrase("share_driven_guitar_mean", Relation::Above),
            "more driven guitar than the category"
        );
        assert_eq!(
            phrase("centroid_hz_mean", Relation::Above),
            "brighter than the category"
        );
        assert_eq!(
            phrase("share_bass_mean", Relation::Below),
            "less low end (bass) than the category"
        );
        assert_eq!(
            phrase("flux_db_sd", Relation::Below),
            "steadier onset activity than the category"
        );
        assert!(phrase("contrast_db_3_mean", Relation::Above).contains("400–800 Hz"));
        assert_eq!(
            phrase("centroid_hz_mean", Relation::Level),
            "brightness as in the category"
        );
        assert_eq!(slug("Toms & hand percussion"), "toms_hand_percussion");
    }
}
