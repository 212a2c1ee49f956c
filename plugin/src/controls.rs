//! What the panel asks of the analysis, and what the host saves with a session.
//!
//! [`PanelSettings`] is persisted in the plugin state (nice-plug `#[persist]`): the palette and
//! style model files, recent files, the set-log folder, the history span and hold. The panel
//! writes it (a write lock held for an assignment, never across a draw); the analysis thread
//! reads it with `try_read` a few times a second and loads what changed, so neither ever waits
//! for the other. Recording is not persisted: a restored session never starts writing a log by
//! itself.

use serde::{Deserialize, Serialize};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};

/// History spans the panel offers, seconds (30 s to 10 min).
pub const HISTORY_SPANS_S: [u32; 5] = [30, 60, 120, 300, 600];
/// Recent files remembered.
pub const MAX_RECENT: usize = 8;
/// Longest path accepted from a saved state, bytes (a longer one is dropped).
pub const MAX_PATH_BYTES: usize = 4096;

/// Persisted panel settings.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(default)]
pub struct PanelSettings {
    /// Palette file to use; `None`: the built-in palette.
    pub palette_path: Option<String>,
    /// Style model file to use; `None`: no style estimate.
    pub style_path: Option<String>,
    /// Recently loaded files, newest first.
    pub recent: Vec<String>,
    /// Folder for set logs; `None`: the user's home folder.
    pub log_folder: Option<String>,
    /// History span shown, seconds (one of [`HISTORY_SPANS_S`]).
    pub history_span_s: u32,
    /// Whether the displays are held (the analysis goes on).
    pub hold: bool,
}

impl Default for PanelSettings {
    fn default() -> Self {
        Self {
            palette_path: None,
            style_path: None,
            recent: Vec::new(),
            log_folder: None,
            history_span_s: 120,
            hold: false,
        }
    }
}

/// Environment variable naming a palette file to start with (the standalone program has no
/// session to restore; a saved session's own choice wins over it).
pub const PALETTE_ENV: &str = "WEFT_PALETTE";
/// Environment variable naming a style model file to start with (as [`PALETTE_ENV`]).
pub const STYLE_MODEL_ENV: &str = "WEFT_STYLE_MODEL";
/// Environment variable naming the set-log folder to start with.
pub const LOG_FOLDER_ENV: &str = "WEFT_SET_LOG_DIR";

impl PanelSettings {
    /// The defaults, with the files named by [`PALETTE_ENV`], [`STYLE_MODEL_ENV`] and
    /// [`LOG_FOLDER_ENV`] when set.
    pub fn from_env() -> Self {
        let var = |name| std::env::var(name).ok().filter(|v| !v.trim().is_empty());
        Self {
            palette_path: var(PALETTE_ENV),
            style_path: var(STYLE_MODEL_ENV),
            log_folder: var(LOG_FOLDER_ENV),
            ..Self::default()
        }
        .sanitized()
    }

    /// The settings with anything a saved state could hold out of range put back in range:
    /// an unknown span becomes the nearest offered one, over-long or empty paths are dropped,
    /// the recent list is cut to [`MAX_RECENT`].
    pub fn sanitized(mut self) -> Self {
        let keep = |p: Option<String>| {
            p.filter(|p| !p.trim().is_empty() && p.len() <= MAX_PATH_BYTES && !p.contains('\0'))
        };
        self.palette_path = keep(self.palette_path);
        self.style_path = keep(self.style_path);
        self.log_folder = keep(self.log_folder);
        self.recent = self
            .recent
            .into_iter()
            .filter_map(|p| keep(Some(p)))
            .take(MAX_RECENT)
            .collect();
        self.history_span_s = *HISTORY_SPANS_S
            .iter()
            .min_by_key(|&&s| s.abs_diff(self.history_span_s))
            .unwrap_or(&120);
        self
    }

    /// Puts `path` at the front of the recent list.
    pub fn remember(&mut self, path: &str) {
        self.recent.retain(|p| p != path);
        self.recent.insert(0, path.to_owned());
        self.recent.truncate(MAX_RECENT);
    }
}

/// State shared by the panel, the plugin and the analysis thread, living as long as the plugin.
#[derive(Debug, Default)]
pub struct Controls {
    /// The persisted settings (the same object the parameters persist).
    pub settings: Arc<RwLock<PanelSettings>>,
    /// Whether the user asked for a set log.
    pub recording: AtomicBool,
}

impl Controls {
    /// Controls over the persisted `settings`.
    pub fn new(settings: Arc<RwLock<PanelSettings>>) -> Self {
        Self {
            settings,
            recording: AtomicBool::new(false),
        }
    }

    /// A copy of the settings, sanitized; `None` when a writer holds them right now.
    pub fn try_settings(&self) -> Option<PanelSettings> {
        self.settings.try_read().ok().map(|s| s.clone().sanitized())
    }

    /// Changes the settings (waits for a reader's clone at most).
    pub fn update(&self, change: impl FnOnce(&mut PanelSettings)) {
        let mut guard = self
            .settings
            .write()
            .unwrap_or_else(std::sync::PoisonError::into_inner);
        change(&mut guard);
    }

    /// Whether a set log is asked for.
    pub fn recording(&self) -> bool {
        self.recording.load(Ordering::Acquire)
    }

    /// Asks for a set log to start or stop.
    pub fn set_recording(&self, on: bool) {
        self.recording.store(on, Ordering::Release);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn saved_settings_are_put_back_in_range() {
        let s = PanelSettings {
            palette_path: Some(String::new()),
            style_path: Some("x".repeat(MAX_PATH_BYTES + 1)),
            recent: (0..20).map(|i| format!("/f{i}")).collect(),
            log_folder: Some("/tmp".into()),
            history_span_s: 7,
            hold: true,
        }
        .sanitized();
        assert_eq!(s.palette_path, None);
        assert_eq!(s.style_path, None);
        assert_eq!(s.recent.len(), MAX_RECENT);
        assert_eq!(s.history_span_s, 30);
        assert_eq!(s.log_folder.as_deref(), Some("/tmp"));
        let mut s = s;
        s.remember("/f5");
        assert_eq!(s.recent[0], "/f5");
        assert_eq!(s.recent.iter().filter(|p| *p == "/f5").count(), 1);
    }

    #[test]
    fn settings_read_from_json_with_missing_fields_take_defaults() {
        let s: PanelSettings =
            serde_json::from_str(r#"{"style_path":"/m.json"}"#).expect("valid JSON");
        assert_eq!(s.style_path.as_deref(), Some("/m.json"));
        assert_eq!(s.history_span_s, PanelSettings::default().history_span_s);
    }
}
