//! A small CLAP host that runs the built Weft plugin, for tests.
//!
//! The plugin is tested as hosts see it: the bundle built by `cargo xtask bundle weft` is loaded
//! as a shared library and driven only through the CLAP ABI (with `clack-host` 0.2.0). Nothing
//! here links the plugin crate, so these tests check the contract, not the implementation.
//!
//! A [`WeftPlugin`] is one instance of [`PLUGIN_ID`]. It picks a channel layout and a render
//! mode, activates ([`WeftPlugin::activate`]), processes caller-owned out-of-place buffers
//! ([`WeftPlugin::process`]), saves and loads state, and deactivates
//! ([`WeftPlugin::deactivate`]), which returns the final analysis [`Snapshot`] the plugin writes
//! into [`SNAPSHOT_DIR_ENV`] (this host always sets that variable, once per process, before the
//! plugin is loaded).
//!
//! By default everything runs on the calling thread: it is the host's main thread and, between
//! activation and deactivation, its audio thread too. Weft's `process()` never calls back into
//! the host, so that is enough for most tests. For a real audio thread,
//! [`WeftPlugin::detach_audio`] hands the started processor out as a [`DetachedAudio`] (which
//! can move to another thread) and [`WeftPlugin::attach_audio`] takes it back before
//! deactivation; the main-thread calls stay on the thread that created the instance.
//!
//! The editor: [`WeftPlugin::open_editor`] embeds the plugin's panel in a host window through
//! the CLAP `gui` extension (X11 API, embedded, as nice-plug's wrapper supports), and
//! [`ParentWindow`] is such a host window, made with `x11rb` on a display the caller chooses.
//! The host implements the `gui` host extension (nice-plug's wrapper requires it to create an
//! editor) and records the plugin's resize requests and closings, see [`WeftHostShared`].

use clack_extensions::audio_ports::{AudioPortFlags, AudioPortInfoBuffer, PluginAudioPorts};
use clack_extensions::audio_ports_config::{AudioPortsConfigBuffer, PluginAudioPortsConfig};
use clack_extensions::gui::{
    GuiApiType, GuiConfiguration, GuiError, GuiSize, HostGui, HostGuiImpl, PluginGui, Window,
};
use clack_extensions::render::{PluginRender, RenderMode};
use clack_extensions::state::{PluginState, StateError};
use clack_host::entry::PluginEntryError;
use clack_host::prelude::*;
use serde::Deserialize;
use std::ffi::CStr;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Condvar, Mutex, OnceLock, PoisonError};
use std::time::{Duration, Instant};
use thiserror::Error;

/// The CLAP id of the plugin under test.
pub const PLUGIN_ID: &CStr = c"org.weft.monitor";
/// Environment variable naming the `.clap` bundle to test, instead of [`default_bundle_path`].
pub const BUNDLE_ENV: &str = "WEFT_CLAP_BUNDLE";
/// Environment variable the plugin reads at activation: a folder where it writes its final
/// snapshot on deactivation (see `plugin/src/analysis.rs`).
pub const SNAPSHOT_DIR_ENV: &str = "WEFT_SNAPSHOT_DIR";
/// How long an activation waits for another active instance with the same settings (and so
/// the same snapshot file name) to deactivate.
pub const SNAPSHOT_CLAIM_TIMEOUT: Duration = Duration::from_secs(120);
/// What to run when the bundle is missing.
pub const BUNDLE_COMMAND: &str = "cargo xtask bundle weft";

/// Why the host could not do what it was asked.
#[derive(Debug, Error)]
pub enum HostError {
    /// The bundle file does not exist.
    #[error(
        "no Weft CLAP bundle at {}: run `{BUNDLE_COMMAND}` first (or set {BUNDLE_ENV} to a .clap file)",
        path.display()
    )]
    MissingBundle {
        /// Where the bundle was looked for.
        path: PathBuf,
    },
    /// The shared library could not be loaded or its entry failed to initialise.
    #[error("could not load the CLAP entry in {}", path.display())]
    Entry {
        /// The bundle that was loaded.
        path: PathBuf,
        /// What clack-host reported.
        #[source]
        source: PluginEntryError,
    },
    /// Creating, activating or running the instance failed.
    #[error("the plugin instance refused a call")]
    Instance(#[from] PluginInstanceError),
    /// The host info strings contain a NUL byte (a bug in this crate).
    #[error("invalid host info")]
    HostInfo(#[from] std::ffi::NulError),
    /// The plugin does not implement a CLAP extension this host needs.
    #[error("the plugin does not implement the CLAP {extension} extension")]
    MissingExtension {
        /// The extension's name.
        extension: &'static str,
    },
    /// No audio ports configuration has this many main input and output channels.
    #[error("the plugin offers no {channels}-channel main in/out configuration")]
    NoLayout {
        /// The channel count asked for.
        channels: u32,
    },
    /// The plugin declined an audio ports configuration it listed.
    #[error("the plugin refused audio ports configuration {id}")]
    SelectLayout {
        /// The refused configuration id.
        id: u32,
    },
    /// The plugin declined a render mode.
    #[error("the plugin refused render mode {mode:?}")]
    RenderMode {
        /// The refused mode.
        mode: RenderMode,
    },
    /// Saving or loading state failed.
    #[error("state {action} failed")]
    State {
        /// "save" or "load".
        action: &'static str,
        /// What clack-extensions reported.
        #[source]
        source: StateError,
    },
    /// The call needs an active plugin.
    #[error("the plugin is not active")]
    NotActive,
    /// The call needs an inactive plugin.
    #[error("the plugin is already active")]
    AlreadyActive,
    /// The settings cannot be used (zero block size or channels, …).
    #[error("invalid settings: {reason}")]
    Settings {
        /// What is wrong.
        reason: &'static str,
    },
    /// The buffers handed to [`WeftPlugin::process`] do not match the activation.
    #[error(
        "buffers do not match the activation: {inputs} inputs and {outputs} outputs for {channels} \
         channels, lengths {min_len}..={max_len} for a maximum block of {max_block}"
    )]
    Buffers {
        /// Channels the plugin was activated with.
        channels: u32,
        /// Input buffers given.
        inputs: usize,
        /// Output buffers given.
        outputs: usize,
        /// Shortest buffer given, frames.
        min_len: usize,
        /// Longest buffer given, frames.
        max_len: usize,
        /// The activation's maximum block, frames.
        max_block: u32,
    },
    /// The snapshot file could not be read.
    #[error("could not read the snapshot {}", path.display())]
    SnapshotRead {
        /// The expected snapshot file.
        path: PathBuf,
        /// What the file system reported.
        #[source]
        source: std::io::Error,
    },
    /// The snapshot file is not the JSON the host expects.
    #[error("could not parse the snapshot {}", path.display())]
    SnapshotParse {
        /// The snapshot file.
        path: PathBuf,
        /// What serde_json reported.
        #[source]
        source: serde_json::Error,
    },
    /// Another instance with the same settings stayed active for [`SNAPSHOT_CLAIM_TIMEOUT`].
    #[error("another active instance keeps the snapshot name {name}")]
    SnapshotBusy {
        /// The snapshot file name.
        name: String,
    },
    /// The snapshot folder could not be created.
    #[error("could not create the snapshot folder {}", path.display())]
    SnapshotDir {
        /// The folder.
        path: PathBuf,
        /// What the file system reported.
        #[source]
        source: std::io::Error,
    },
    /// The audio processor is out on another thread ([`WeftPlugin::detach_audio`]).
    #[error("the audio processor is detached: attach it again first")]
    AudioDetached,
    /// [`WeftPlugin::attach_audio`] was given the processor of another instance or activation.
    #[error("this audio processor belongs to another instance or activation")]
    ForeignAudio,
    /// The plugin does not offer its editor for the X11 API, embedded.
    #[error("the plugin does not support an embedded X11 editor")]
    EditorUnsupported,
    /// The plugin reported no size for its editor (CLAP `gui.get_size`).
    #[error("the editor reported no size")]
    NoEditorSize,
    /// [`WeftPlugin::open_editor`] was called while the editor is open.
    #[error("the editor is already open")]
    EditorOpen,
    /// [`WeftPlugin::close_editor`] was called while the editor is closed.
    #[error("the editor is not open")]
    EditorClosed,
    /// A call of the CLAP `gui` extension failed.
    #[error("the editor's {action} failed")]
    Gui {
        /// The call: "create", "get_size", "set_parent", "show", "hide".
        action: &'static str,
        /// What clack-extensions reported.
        #[source]
        source: GuiError,
    },
    /// Talking to the X server failed.
    #[error("X11: {action} failed")]
    X11 {
        /// What the host tried.
        action: &'static str,
        /// What x11rb reported.
        #[source]
        source: x11rb::errors::ReplyOrIdError,
    },
    /// No connection to the X server.
    #[error("cannot connect to the X display {display:?}")]
    X11Connect {
        /// The display asked for (`None`: the `DISPLAY` environment variable).
        display: Option<String>,
        /// What x11rb reported.
        #[source]
        source: x11rb::errors::ConnectError,
    },
    /// A window's visual or pixel format is not one [`ParentWindow::pixel_rgb`] can read.
    #[error("cannot read pixels of window {window:#x}: {reason}")]
    X11Pixels {
        /// The window.
        window: u32,
        /// What is unsupported.
        reason: &'static str,
    },
}

/// An error with its whole chain of causes, `outer: inner: …`, for test failure messages.
pub fn describe(err: &dyn std::error::Error) -> String {
    let mut text = err.to_string();
    let mut cause = err.source();
    while let Some(c) = cause {
        text.push_str(&format!(": {c}"));
        cause = c.source();
    }
    text
}

/// The workspace root (this crate's parent folder).
pub fn workspace_root() -> PathBuf {
    let here = Path::new(env!("CARGO_MANIFEST_DIR"));
    here.parent().unwrap_or(here).to_path_buf()
}

/// Where `cargo xtask bundle weft` writes the CLAP bundle: `target/bundled/Weft.clap`.
pub fn default_bundle_path() -> PathBuf {
    workspace_root().join("target/bundled/Weft.clap")
}

/// The bundle under test: [`BUNDLE_ENV`] if set, else [`default_bundle_path`].
pub fn bundle_path() -> PathBuf {
    std::env::var_os(BUNDLE_ENV).map_or_else(default_bundle_path, PathBuf::from)
}

/// This process's snapshot folder, `target/weft-tests/snapshots-<pid>`; [`SNAPSHOT_DIR_ENV`]
/// points there. The first call sets the variable, before any plugin is loaded.
pub fn snapshot_dir() -> Result<&'static Path, HostError> {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    if let Some(dir) = DIR.get() {
        return Ok(dir);
    }
    let parent = workspace_root().join("target/weft-tests");
    remove_stale_snapshot_dirs(&parent);
    let dir = parent.join(format!("snapshots-{}", std::process::id()));
    std::fs::create_dir_all(&dir).map_err(|source| HostError::SnapshotDir {
        path: dir.clone(),
        source,
    })?;
    Ok(DIR.get_or_init(|| {
        set_snapshot_env(&dir);
        dir
    }))
}

/// Removes the snapshot folders of test processes that have exited (Linux: no `/proc/<pid>`).
/// Elsewhere the folders stay; they only ever hold files while a plugin is active.
fn remove_stale_snapshot_dirs(parent: &Path) {
    if !cfg!(target_os = "linux") {
        return;
    }
    let Ok(entries) = std::fs::read_dir(parent) else {
        return;
    };
    for entry in entries.flatten() {
        let name = entry.file_name();
        let Some(pid) = name
            .to_str()
            .and_then(|n| n.strip_prefix("snapshots-"))
            .and_then(|p| p.parse::<u32>().ok())
        else {
            continue;
        };
        if pid != std::process::id() && !Path::new("/proc").join(pid.to_string()).exists() {
            let _ = std::fs::remove_dir_all(entry.path());
        }
    }
}

#[allow(unsafe_code)]
fn set_snapshot_env(dir: &Path) {
    // SAFETY: `set_var` is unsound only while another thread may read the environment outside
    // Rust's lock (C code calling `getenv`). This runs once, inside `OnceLock::get_or_init`,
    // before the plugin library is loaded: `load_entry` calls `snapshot_dir` first, and the
    // plugin's threads are the only foreign code in this process that reads the environment.
    unsafe { std::env::set_var(SNAPSHOT_DIR_ENV, dir) };
}

/// The loaded bundle, shared by every instance in the process (clack-host caches entries by
/// path too; keeping one here also keeps the library loaded between tests).
fn entry() -> Result<PluginEntry, HostError> {
    static ENTRY: Mutex<Option<PluginEntry>> = Mutex::new(None);
    let mut slot = ENTRY.lock().unwrap_or_else(PoisonError::into_inner);
    if let Some(entry) = slot.as_ref() {
        return Ok(entry.clone());
    }
    snapshot_dir()?;
    let path = bundle_path();
    if !path.is_file() {
        return Err(HostError::MissingBundle { path });
    }
    warn_if_stale(&path);
    let entry = load_entry(&path).map_err(|source| HostError::Entry { path, source })?;
    *slot = Some(entry.clone());
    Ok(entry)
}

/// Loads a CLAP entry: the one place this crate runs foreign code unchecked.
#[allow(unsafe_code)]
fn load_entry(path: &Path) -> Result<PluginEntry, PluginEntryError> {
    // SAFETY: the file is the Weft bundle built from this workspace by nice-plug's CLAP
    // wrapper, which exports a CLAP-compliant `clap_entry`; clack-host's safety rules for
    // everything after loading hold as long as the entry is compliant.
    unsafe { PluginEntry::load(path) }
}

/// Warns (does not fail) when plugin or engine sources are newer than the bundle: the tests
/// would then check an old build.
fn warn_if_stale(bundle: &Path) {
    let Ok(built) = bundle.metadata().and_then(|m| m.modified()) else {
        return;
    };
    let root = workspace_root();
    let mut stack = vec![root.join("plugin/src"), root.join("engine/src")];
    while let Some(dir) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&dir) else {
            continue;
        };
        for entry in entries.flatten() {
            let path = entry.path();
            if path.is_dir() {
                stack.push(path);
            } else if entry
                .metadata()
                .and_then(|m| m.modified())
                .is_ok_and(|t| t > built)
            {
                eprintln!(
                    "warning: {} is newer than {}: run `{BUNDLE_COMMAND}` to test the current code",
                    path.display(),
                    bundle.display()
                );
                return;
            }
        }
    }
}

/// The host's thread-safe side: records what the plugin asks of the host.
#[derive(Default)]
pub struct WeftHostShared {
    restart_requested: AtomicBool,
    process_requested: AtomicBool,
    callback_requested: AtomicBool,
    /// The newest editor size the plugin asked for (CLAP `gui.request_resize`), physical pixels.
    resize_request: Mutex<Option<GuiSize>>,
    /// How often the plugin said its editor was closed (CLAP `gui.closed`).
    gui_closed: AtomicUsize,
}

/// The `gui` host extension. nice-plug's wrapper needs it to create an editor (its
/// `ext_gui_create` uses the host's `clap_host_gui` without checking for it).
impl HostGuiImpl for WeftHostShared {
    fn resize_hints_changed(&self) {}

    /// Accepts every size: the caller resizes the [`ParentWindow`] after
    /// [`WeftPlugin::take_resize_request`].
    fn request_resize(&self, new_size: GuiSize) -> Result<(), clack_host::host::HostError> {
        *self
            .resize_request
            .lock()
            .unwrap_or_else(PoisonError::into_inner) = Some(new_size);
        Ok(())
    }

    /// Refused: only the host decides when the editor is shown.
    fn request_show(&self) -> Result<(), clack_host::host::HostError> {
        Err(clack_host::host::HostError::Message(
            "the test host shows the editor itself",
        ))
    }

    /// Refused: only the host decides when the editor is hidden.
    fn request_hide(&self) -> Result<(), clack_host::host::HostError> {
        Err(clack_host::host::HostError::Message(
            "the test host hides the editor itself",
        ))
    }

    fn closed(&self, _was_destroyed: bool) {
        self.gui_closed.fetch_add(1, Ordering::SeqCst);
    }
}

impl SharedHandler<'_> for WeftHostShared {
    fn request_restart(&self) {
        self.restart_requested.store(true, Ordering::SeqCst);
    }

    fn request_process(&self) {
        self.process_requested.store(true, Ordering::SeqCst);
    }

    fn request_callback(&self) {
        self.callback_requested.store(true, Ordering::SeqCst);
    }
}

/// The host's handler types; the one host extension is `gui` (for the editor).
pub struct WeftHost;

impl HostHandlers for WeftHost {
    type Shared<'a> = WeftHostShared;
    type MainThread<'a> = ();
    type AudioProcessor<'a> = ();

    fn declare_extensions(builder: &mut HostExtensions<Self>, _shared: &Self::Shared<'_>) {
        builder.register::<HostGui>();
    }
}

/// How to activate the plugin.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Settings {
    /// Sample rate, Hz.
    pub sample_rate_hz: f64,
    /// The largest block the host will pass (CLAP `max_frames_count`), frames.
    pub max_block: u32,
    /// Main input and output channels (the plugin offers 1 and 2).
    pub channels: u32,
    /// Switch the CLAP render extension to offline before activation (else realtime).
    pub offline: bool,
}

impl Settings {
    /// The snapshot file name the plugin writes for these settings:
    /// `weft-snapshot-{sample_rate}hz-{channels}ch-{max_block}.json`, the rate formatted from an
    /// `f32` with `{}` (`44100`, `48000`), as `plugin/src/lib.rs` does.
    pub fn snapshot_file_name(&self) -> String {
        format!(
            "weft-snapshot-{}hz-{}ch-{}.json",
            self.sample_rate_hz as f32, self.channels, self.max_block
        )
    }
}

/// The plugin's final analysis snapshot, as written to [`SNAPSHOT_DIR_ENV`] (fields and units
/// as in `plugin/src/snapshot.rs`).
#[derive(Debug, Clone, PartialEq, Deserialize)]
pub struct Snapshot {
    /// True while the analysis ran (the dump is written just before it stops).
    pub active: bool,
    /// Whether the plugin was activated in offline render mode.
    pub offline: bool,
    /// The analysis sample rate, Hz.
    pub sample_rate_hz: f32,
    /// Main input channels.
    pub channels: u32,
    /// Samples the analysis consumed, per channel.
    pub samples_analysed: u64,
    /// Samples the audio thread dropped because the ring was full.
    pub samples_dropped: u64,
    /// Analysis frames completed.
    pub frames: u64,
    /// RMS level of the newest frame, dBFS.
    pub rms_db: f32,
    /// Sample peak of the newest frame, dBFS.
    pub peak_db: f32,
    /// RMS level smoothed with the response time, dBFS.
    pub rms_smoothed_db: f32,
    /// Loudest frame peak since activation, dBFS.
    pub peak_hold_db: f32,
    /// Mean RMS level per history cell, dBFS, oldest first.
    pub level_history_db: Vec<f32>,
    /// The live instrument mix: `updates`, `signal`, `shares` (family → 0–1), `unexplained`.
    #[serde(default)]
    pub mix: serde_json::Value,
    /// The style estimate (`category`, `windows`, `closeness`, `reasons`), null without a model.
    #[serde(default)]
    pub style: serde_json::Value,
    /// Why the requested style model is not in use, if it is not.
    #[serde(default)]
    pub style_problem: Option<String>,
    /// Why the requested palette is not in use, if it is not.
    #[serde(default)]
    pub palette_problem: Option<String>,
}

/// Snapshot file names in use by active instances. Instances with equal settings write the same
/// file, so an activation waits until no other instance in this process holds its name.
struct SnapshotClaims {
    names: Mutex<Vec<String>>,
    released: Condvar,
}

static CLAIMS: SnapshotClaims = SnapshotClaims {
    names: Mutex::new(Vec::new()),
    released: Condvar::new(),
};

/// Holds one snapshot file name from activation until the snapshot has been read.
struct SnapshotClaim {
    name: String,
    path: PathBuf,
}

impl SnapshotClaim {
    fn acquire(dir: &Path, name: String) -> Result<Self, HostError> {
        let deadline = Instant::now() + SNAPSHOT_CLAIM_TIMEOUT;
        let mut names = CLAIMS.names.lock().unwrap_or_else(PoisonError::into_inner);
        while names.contains(&name) {
            // Two instances with equal settings on one thread would wait for each other forever.
            let left = deadline.saturating_duration_since(Instant::now());
            if left.is_zero() {
                return Err(HostError::SnapshotBusy { name });
            }
            names = CLAIMS
                .released
                .wait_timeout(names, left)
                .unwrap_or_else(PoisonError::into_inner)
                .0;
        }
        names.push(name.clone());
        let path = dir.join(&name);
        // A file left by an earlier run of this process must not pass for this run's.
        let _ = std::fs::remove_file(&path);
        Ok(Self { name, path })
    }

    /// Reads, parses and removes the snapshot file.
    fn read(&self) -> Result<Snapshot, HostError> {
        let text =
            std::fs::read_to_string(&self.path).map_err(|source| HostError::SnapshotRead {
                path: self.path.clone(),
                source,
            })?;
        let _ = std::fs::remove_file(&self.path);
        serde_json::from_str(&text).map_err(|source| HostError::SnapshotParse {
            path: self.path.clone(),
            source,
        })
    }
}

impl Drop for SnapshotClaim {
    fn drop(&mut self) {
        let mut names = CLAIMS.names.lock().unwrap_or_else(PoisonError::into_inner);
        names.retain(|n| *n != self.name);
        CLAIMS.released.notify_all();
    }
}

/// The audio-thread side of an activation: the started processor and its port buffers.
struct AudioSide {
    processor: StartedPluginAudioProcessor<WeftHost>,
    settings: Settings,
    inputs: AudioPorts,
    outputs: AudioPorts,
    steady_time: u64,
}

impl AudioSide {
    /// Processes one block (see [`WeftPlugin::process`]).
    fn process<I, O>(
        &mut self,
        inputs: &mut [I],
        outputs: &mut [O],
    ) -> Result<ProcessStatus, HostError>
    where
        I: AsMut<[f32]>,
        O: AsMut<[f32]>,
    {
        let settings = self.settings;
        let (mut min_len, mut max_len) = (usize::MAX, 0);
        for len in inputs
            .iter_mut()
            .map(|b| b.as_mut().len())
            .chain(outputs.iter_mut().map(|b| b.as_mut().len()))
        {
            min_len = min_len.min(len);
            max_len = max_len.max(len);
        }
        let channels = settings.channels as usize;
        if inputs.len() != channels
            || outputs.len() != channels
            || min_len != max_len
            || min_len == 0
            || max_len > settings.max_block as usize
        {
            return Err(HostError::Buffers {
                channels: settings.channels,
                inputs: inputs.len(),
                outputs: outputs.len(),
                min_len,
                max_len,
                max_block: settings.max_block,
            });
        }
        let audio_in = self.inputs.with_input_buffers([AudioPortBuffer {
            latency: 0,
            channels: AudioPortBufferType::f32_input_only(
                inputs
                    .iter_mut()
                    .map(|b| InputChannel::variable(b.as_mut())),
            ),
        }]);
        let mut audio_out = self.outputs.with_output_buffers([AudioPortBuffer {
            latency: 0,
            channels: AudioPortBufferType::f32_output_only(outputs.iter_mut().map(|b| b.as_mut())),
        }]);
        let status = self.processor.process(
            &audio_in,
            &mut audio_out,
            &InputEvents::empty(),
            &mut OutputEvents::void(),
            Some(self.steady_time),
            None,
        )?;
        self.steady_time += max_len as u64;
        Ok(status)
    }
}

/// The audio processor of an active [`WeftPlugin`], out for use on another thread (the
/// host's audio thread). Give it back with [`WeftPlugin::attach_audio`] before deactivating;
/// dropped instead, the instance cannot deactivate and leaks (as clack-host does).
pub struct DetachedAudio {
    side: AudioSide,
    /// Which activation it belongs to (see [`WeftPlugin::attach_audio`]).
    activation: u64,
}

impl DetachedAudio {
    /// Processes one block, as [`WeftPlugin::process`] does.
    pub fn process<I, O>(
        &mut self,
        inputs: &mut [I],
        outputs: &mut [O],
    ) -> Result<ProcessStatus, HostError>
    where
        I: AsMut<[f32]>,
        O: AsMut<[f32]>,
    {
        self.side.process(inputs, outputs)
    }

    /// The settings of the activation.
    pub fn settings(&self) -> Settings {
        self.side.settings
    }
}

/// What exists only while the plugin is active.
struct Active {
    /// `None` while detached ([`WeftPlugin::detach_audio`]).
    audio: Option<AudioSide>,
    settings: Settings,
    /// A number unique to this activation in this process.
    activation: u64,
    claim: SnapshotClaim,
}

/// Numbers activations, so a [`DetachedAudio`] only goes back where it came from.
static ACTIVATIONS: AtomicU64 = AtomicU64::new(0);

/// The size of an open editor, physical pixels (the X11 API's unit).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct EditorSize {
    /// Width, pixels.
    pub width_px: u32,
    /// Height, pixels.
    pub height_px: u32,
}

/// One instance of the Weft plugin in this host.
pub struct WeftPlugin {
    instance: PluginInstance<WeftHost>,
    active: Option<Active>,
    editor_open: bool,
}

impl WeftPlugin {
    /// Loads the bundle (once per process) and creates an instance of [`PLUGIN_ID`].
    pub fn new() -> Result<Self, HostError> {
        let entry = entry()?;
        let info = HostInfo::new(
            "weft-tests",
            "The Weft developers",
            "https://example.invalid/weft",
            env!("CARGO_PKG_VERSION"),
        )?;
        let instance = PluginInstance::<WeftHost>::new(
            |_| WeftHostShared::default(),
            |_| (),
            &entry,
            PLUGIN_ID,
            &info,
        )?;
        Ok(Self {
            instance,
            active: None,
            editor_open: false,
        })
    }

    /// Whether the plugin is active.
    pub fn is_active(&self) -> bool {
        self.active.is_some()
    }

    /// The settings of the current activation.
    pub fn settings(&self) -> Option<Settings> {
        self.active.as_ref().map(|a| a.settings)
    }

    /// Whether the plugin has asked the host to restart it (deactivate and activate again).
    pub fn restart_requested(&self) -> bool {
        self.instance
            .access_shared_handler(|h| h.restart_requested.load(Ordering::SeqCst))
    }

    /// Runs the plugin's main-thread callback if it asked for one.
    pub fn pump_main_thread(&mut self) {
        let asked = self
            .instance
            .access_shared_handler(|h| h.callback_requested.swap(false, Ordering::SeqCst));
        if asked {
            self.instance.call_on_main_thread_callback();
        }
    }

    /// Selects the audio ports configuration whose main input and output both have `channels`
    /// channels. The plugin must be inactive.
    pub fn select_channels(&mut self, channels: u32) -> Result<(), HostError> {
        if self.is_active() {
            return Err(HostError::AlreadyActive);
        }
        let handle = self.instance.plugin_handle();
        let configs = handle.get_extension::<PluginAudioPortsConfig>().ok_or(
            HostError::MissingExtension {
                extension: "audio-ports-config",
            },
        )?;
        let mut buffer = AudioPortsConfigBuffer::new();
        let mut found = None;
        for i in 0..configs.count(&handle) {
            let Some(config) = configs.get(&handle, i, &mut buffer) else {
                continue;
            };
            let main_in = config.main_input.as_ref().map(|p| p.channel_count);
            let main_out = config.main_output.as_ref().map(|p| p.channel_count);
            if main_in == Some(channels) && main_out == Some(channels) {
                found = Some(config.id);
                break;
            }
        }
        let id = found.ok_or(HostError::NoLayout { channels })?;
        configs
            .select(&handle, id)
            .map_err(|_| HostError::SelectLayout { id: id.get() })
    }

    /// The channel counts of the main input and output ports as the audio-ports extension
    /// reports them now (ports flagged main, else the first of each direction).
    pub fn main_port_channels(&mut self) -> Result<(u32, u32), HostError> {
        let handle = self.instance.plugin_handle();
        let ports =
            handle
                .get_extension::<PluginAudioPorts>()
                .ok_or(HostError::MissingExtension {
                    extension: "audio-ports",
                })?;
        let mut buffer = AudioPortInfoBuffer::new();
        let mut main = |is_input: bool| {
            let mut first = None;
            for i in 0..ports.count(&handle, is_input) {
                let Some(port) = ports.get(&handle, i, is_input, &mut buffer) else {
                    continue;
                };
                if port.flags.contains(AudioPortFlags::IS_MAIN) {
                    return port.channel_count;
                }
                first.get_or_insert(port.channel_count);
            }
            first.unwrap_or(0)
        };
        let input = main(true);
        let output = main(false);
        Ok((input, output))
    }

    /// Switches the CLAP render extension to realtime or offline.
    pub fn set_render_mode(&mut self, offline: bool) -> Result<(), HostError> {
        let mode = if offline {
            RenderMode::Offline
        } else {
            RenderMode::Realtime
        };
        let handle = self.instance.plugin_handle();
        let render = handle
            .get_extension::<PluginRender>()
            .ok_or(HostError::MissingExtension {
                extension: "render",
            })?;
        render
            .set(&handle, mode)
            .map_err(|_| HostError::RenderMode { mode })
    }

    /// Selects the layout and render mode, activates, and starts processing.
    pub fn activate(&mut self, settings: Settings) -> Result<(), HostError> {
        if self.is_active() {
            return Err(HostError::AlreadyActive);
        }
        if settings.max_block == 0 || settings.channels == 0 {
            return Err(HostError::Settings {
                reason: "the maximum block and the channel count must be at least 1",
            });
        }
        self.select_channels(settings.channels)?;
        // Always set the mode, so a reused instance does not keep an earlier one.
        self.set_render_mode(settings.offline)?;
        let claim = SnapshotClaim::acquire(snapshot_dir()?, settings.snapshot_file_name())?;
        let stopped = self.instance.activate(
            |_, _| (),
            PluginAudioConfiguration {
                sample_rate: settings.sample_rate_hz,
                min_frames_count: 1,
                max_frames_count: settings.max_block,
            },
        )?;
        let processor = match stopped.start_processing() {
            Ok(processor) => processor,
            Err(err) => {
                let stopped = err.into_stopped_processor();
                self.instance.deactivate(stopped);
                return Err(HostError::Instance(
                    PluginInstanceError::StartProcessingFailed,
                ));
            }
        };
        let channels = settings.channels as usize;
        self.active = Some(Active {
            audio: Some(AudioSide {
                processor,
                settings,
                inputs: AudioPorts::with_capacity(channels, 1),
                outputs: AudioPorts::with_capacity(channels, 1),
                steady_time: 0,
            }),
            settings,
            activation: ACTIVATIONS.fetch_add(1, Ordering::Relaxed),
            claim,
        });
        Ok(())
    }

    /// Hands the started audio processor out, for another thread to call
    /// [`DetachedAudio::process`] while this thread makes main-thread calls (the editor). Until
    /// [`WeftPlugin::attach_audio`], [`WeftPlugin::process`] and [`WeftPlugin::deactivate`]
    /// fail with [`HostError::AudioDetached`].
    pub fn detach_audio(&mut self) -> Result<DetachedAudio, HostError> {
        let active = self.active.as_mut().ok_or(HostError::NotActive)?;
        let side = active.audio.take().ok_or(HostError::AudioDetached)?;
        Ok(DetachedAudio {
            side,
            activation: active.activation,
        })
    }

    /// Takes back the processor [`WeftPlugin::detach_audio`] handed out. A processor of another
    /// instance or activation is refused ([`HostError::ForeignAudio`]) and dropped.
    pub fn attach_audio(&mut self, audio: DetachedAudio) -> Result<(), HostError> {
        let active = self.active.as_mut().ok_or(HostError::NotActive)?;
        if active.audio.is_some() || audio.activation != active.activation {
            return Err(HostError::ForeignAudio);
        }
        active.audio = Some(audio.side);
        Ok(())
    }

    /// Processes one block: `inputs` and `outputs` hold one buffer per channel, all of the same
    /// length in `1..=max_block`. They must be distinct buffers (out-of-place processing).
    pub fn process<I, O>(
        &mut self,
        inputs: &mut [I],
        outputs: &mut [O],
    ) -> Result<ProcessStatus, HostError>
    where
        I: AsMut<[f32]>,
        O: AsMut<[f32]>,
    {
        let active = self.active.as_mut().ok_or(HostError::NotActive)?;
        active
            .audio
            .as_mut()
            .ok_or(HostError::AudioDetached)?
            .process(inputs, outputs)
    }

    /// Stops processing, deactivates, and returns the snapshot the plugin wrote.
    pub fn deactivate(&mut self) -> Result<Snapshot, HostError> {
        let active = self.active.as_mut().ok_or(HostError::NotActive)?;
        let audio = active.audio.take().ok_or(HostError::AudioDetached)?;
        let Some(active) = self.active.take() else {
            return Err(HostError::NotActive);
        };
        let stopped = audio.processor.stop_processing();
        self.instance.deactivate(stopped);
        self.pump_main_thread();
        active.claim.read()
    }

    /// Saves the plugin's state (the CLAP state extension's byte stream).
    pub fn save_state(&mut self) -> Result<Vec<u8>, HostError> {
        let handle = self.instance.plugin_handle();
        let state = handle
            .get_extension::<PluginState>()
            .ok_or(HostError::MissingExtension { extension: "state" })?;
        let mut bytes = Vec::new();
        state
            .save(&handle, &mut bytes)
            .map_err(|source| HostError::State {
                action: "save",
                source,
            })?;
        self.pump_main_thread();
        Ok(bytes)
    }

    /// Loads state saved by [`WeftPlugin::save_state`] (or anything else: the plugin must
    /// refuse what it cannot read).
    pub fn load_state(&mut self, bytes: &[u8]) -> Result<(), HostError> {
        let handle = self.instance.plugin_handle();
        let state = handle
            .get_extension::<PluginState>()
            .ok_or(HostError::MissingExtension { extension: "state" })?;
        let result = state
            .load(&handle, &mut &bytes[..])
            .map_err(|source| HostError::State {
                action: "load",
                source,
            });
        self.pump_main_thread();
        result
    }
}

impl WeftPlugin {
    /// Opens the editor embedded in `parent`, as a CLAP host does on Linux: `is_api_supported`
    /// ("x11", not floating), `create`, `set_scale(1.0)` (the X11 API counts physical pixels;
    /// a refusal is allowed and ignored: the plugin then asks the system), `get_size`, the parent
    /// resized to that size, `set_parent`, `show`. Main thread only (the thread that created the
    /// instance). If a step after `create` fails, the editor is destroyed again.
    ///
    /// Keep `parent` until [`WeftPlugin::close_editor`]. Returns the editor's size.
    pub fn open_editor(&mut self, parent: &ParentWindow) -> Result<EditorSize, HostError> {
        if self.editor_open {
            return Err(HostError::EditorOpen);
        }
        let config = GuiConfiguration {
            api_type: GuiApiType::X11,
            is_floating: false,
        };
        let handle = self.instance.plugin_handle();
        let gui = handle
            .get_extension::<PluginGui>()
            .ok_or(HostError::MissingExtension { extension: "gui" })?;
        if !gui.is_api_supported(&handle, config) {
            return Err(HostError::EditorUnsupported);
        }
        gui.create(&handle, config)
            .map_err(|source| HostError::Gui {
                action: "create",
                source,
            })?;
        self.editor_open = true;
        let embedded = self.embed_editor(gui, parent);
        if embedded.is_err() {
            let _ = self.close_editor();
        }
        embedded
    }

    /// The steps of [`WeftPlugin::open_editor`] after `create`.
    fn embed_editor(
        &mut self,
        gui: PluginGui,
        parent: &ParentWindow,
    ) -> Result<EditorSize, HostError> {
        let handle = self.instance.plugin_handle();
        // Refusal allowed (CLAP `gui.h`: the plugin may query the system itself).
        let _ = gui.set_scale(&handle, 1.0);
        let size = gui.get_size(&handle).ok_or(HostError::NoEditorSize)?;
        parent.resize(size.width, size.height)?;
        let window = Window::from_x11_handle(std::ffi::c_ulong::from(parent.id()));
        set_parent(gui, &handle, window).map_err(|source| HostError::Gui {
            action: "set_parent",
            source,
        })?;
        gui.show(&handle).map_err(|source| HostError::Gui {
            action: "show",
            source,
        })?;
        self.pump_main_thread();
        Ok(EditorSize {
            width_px: size.width,
            height_px: size.height,
        })
    }

    /// Closes the editor: `hide`, then `destroy` (even if `hide` failed), then runs the
    /// main-thread callback if the plugin asked for one. Main thread only.
    pub fn close_editor(&mut self) -> Result<(), HostError> {
        if !self.editor_open {
            return Err(HostError::EditorClosed);
        }
        let handle = self.instance.plugin_handle();
        let gui = handle
            .get_extension::<PluginGui>()
            .ok_or(HostError::MissingExtension { extension: "gui" })?;
        let hidden = gui.hide(&handle);
        gui.destroy(&handle);
        self.editor_open = false;
        self.pump_main_thread();
        hidden.map_err(|source| HostError::Gui {
            action: "hide",
            source,
        })
    }

    /// Whether the editor is open.
    pub fn editor_is_open(&self) -> bool {
        self.editor_open
    }

    /// The newest editor size the plugin asked the host for (CLAP `gui.request_resize`) since the
    /// last call, physical pixels. The host accepted it; resize the [`ParentWindow`] to match.
    pub fn take_resize_request(&self) -> Option<EditorSize> {
        self.instance
            .access_shared_handler(|h| {
                h.resize_request
                    .lock()
                    .unwrap_or_else(PoisonError::into_inner)
                    .take()
            })
            .map(|size| EditorSize {
                width_px: size.width,
                height_px: size.height,
            })
    }

    /// How often the plugin has told the host its editor was closed or lost (CLAP
    /// `gui.closed`): a plugin that loses its window says so here.
    pub fn editor_closed_by_plugin(&self) -> usize {
        self.instance
            .access_shared_handler(|h| h.gui_closed.load(Ordering::SeqCst))
    }
}

/// `gui.set_parent` with an X11 window id.
#[allow(unsafe_code)]
fn set_parent(
    gui: PluginGui,
    handle: &PluginMainThreadHandle,
    window: Window,
) -> Result<(), GuiError> {
    // SAFETY: clack-extensions asks that the window stays valid until `destroy`. An X11 window
    // is a number on the X server, not memory of this process: the plugin only sends it to the
    // server, which answers a stale id with a protocol error, never with undefined behaviour
    // here. `ParentWindow`'s docs ask the caller to keep it until `close_editor`.
    unsafe { gui.set_parent(handle, window) }
}

impl Drop for WeftPlugin {
    fn drop(&mut self) {
        // CLAP: the editor is destroyed before the plugin.
        if self.editor_open {
            let _ = self.close_editor();
        }
        // Deactivate properly, else clack-host leaks the instance and its analysis thread.
        if let Some(active) = self.active.take() {
            // A processor still detached cannot be stopped from here: it leaks with the
            // instance (see `DetachedAudio`).
            if let Some(audio) = active.audio {
                let stopped = audio.processor.stop_processing();
                self.instance.deactivate(stopped);
            }
            let _ = std::fs::remove_file(&active.claim.path);
        }
    }
}

/// nice-plug's CLAP state: an 8-byte little-endian length, then that many bytes of JSON
/// (`{"version": …, "params": {id: value}, "fields": {…}}`; not compressed, as Weft builds
/// nice-plug without its `zstd` feature). See nice-plug 0.4.2, `src/wrapper/clap/wrapper.rs`,
/// `ext_state_save`.
pub mod state_format {
    /// Splits saved state into its JSON value. `None` if the bytes are not in this format.
    pub fn decode(bytes: &[u8]) -> Option<serde_json::Value> {
        let (len, json) = bytes.split_first_chunk::<8>()?;
        if u64::from_le_bytes(*len) != json.len() as u64 {
            return None;
        }
        serde_json::from_slice(json).ok()
    }

    /// Encodes a JSON value as saved state.
    pub fn encode(value: &serde_json::Value) -> Vec<u8> {
        let json = value.to_string().into_bytes();
        let mut bytes = (json.len() as u64).to_le_bytes().to_vec();
        bytes.extend_from_slice(&json);
        bytes
    }
}

/// A host window on an X server, for [`WeftPlugin::open_editor`] to embed the editor in:
/// a top-level window filled with [`ParentWindow::FILL_RGB`], mapped, on the default screen.
/// It talks to the server over its own connection (x11rb's pure-Rust one), so it never shares
/// a connection with the plugin. Dropping it destroys the window.
pub struct ParentWindow {
    conn: x11rb::rust_connection::RustConnection,
    window: u32,
}

/// An x11rb error as a [`HostError::X11`].
fn x11_error<E: Into<x11rb::errors::ReplyOrIdError>>(
    action: &'static str,
) -> impl FnOnce(E) -> HostError {
    move |err| HostError::X11 {
        action,
        source: err.into(),
    }
}

/// The masks of a TrueColor or DirectColor visual.
#[derive(Debug, Clone, Copy)]
struct ColourMasks {
    red: u32,
    green: u32,
    blue: u32,
}

impl ColourMasks {
    /// Scales an 8-bit value into `mask`'s bits.
    fn put(mask: u32, value: u8) -> u32 {
        if mask == 0 {
            return 0;
        }
        let shift = mask.trailing_zeros();
        let max = u64::from(mask >> shift);
        let scaled = (u64::from(value) * max + 127) / 255;
        ((scaled as u32) << shift) & mask
    }

    /// The 8-bit value of `mask`'s bits in `pixel`.
    fn get(mask: u32, pixel: u32) -> u8 {
        if mask == 0 {
            return 0;
        }
        let shift = mask.trailing_zeros();
        let max = u64::from(mask >> shift);
        let value = u64::from((pixel & mask) >> shift);
        ((value * 255 + max / 2) / max) as u8
    }

    fn encode(self, [r, g, b]: [u8; 3]) -> u32 {
        Self::put(self.red, r) | Self::put(self.green, g) | Self::put(self.blue, b)
    }

    fn decode(self, pixel: u32) -> [u8; 3] {
        [
            Self::get(self.red, pixel),
            Self::get(self.green, pixel),
            Self::get(self.blue, pixel),
        ]
    }
}

impl ParentWindow {
    /// The parent's fill, 8-bit sRGB: magenta, a colour an editor is unlikely to paint, so a
    /// pixel that keeps it was not drawn by the editor.
    pub const FILL_RGB: [u8; 3] = [0xff, 0x00, 0xff];
    /// How long [`ParentWindow::open`] waits for the server to map the window.
    pub const MAP_TIMEOUT: Duration = Duration::from_secs(10);

    /// Connects to `display` (`None`: the `DISPLAY` environment variable) and opens a mapped
    /// top-level window of `width_px` × `height_px` pixels.
    pub fn open(display: Option<&str>, width_px: u16, height_px: u16) -> Result<Self, HostError> {
        use x11rb::connection::Connection;
        use x11rb::protocol::xproto::{ConnectionExt, CreateWindowAux, EventMask, WindowClass};
        let (conn, screen_num) =
            x11rb::connect(display).map_err(|source| HostError::X11Connect {
                display: display.map(str::to_owned),
                source,
            })?;
        let screen = &conn.setup().roots[screen_num];
        let (root, root_visual, depth) = (screen.root, screen.root_visual, screen.root_depth);
        let fill = Self::masks(&conn, root_visual)
            .map_or(screen.white_pixel, |m| m.encode(Self::FILL_RGB));
        let window = conn
            .generate_id()
            .map_err(x11_error("generate a window id"))?;
        conn.create_window(
            depth,
            window,
            root,
            0,
            0,
            width_px.max(1),
            height_px.max(1),
            0,
            WindowClass::INPUT_OUTPUT,
            root_visual,
            &CreateWindowAux::new()
                .background_pixel(fill)
                .event_mask(EventMask::STRUCTURE_NOTIFY | EventMask::EXPOSURE),
        )
        .map_err(x11_error("create the parent window"))?
        .check()
        .map_err(x11_error("create the parent window"))?;
        let parent = Self { conn, window };
        parent
            .conn
            .map_window(window)
            .map_err(x11_error("map the parent window"))?
            .check()
            .map_err(x11_error("map the parent window"))?;
        let deadline = Instant::now() + Self::MAP_TIMEOUT;
        while !parent.is_viewable(window)? && Instant::now() < deadline {
            std::thread::sleep(Duration::from_millis(5));
        }
        Ok(parent)
    }

    /// The window's X11 id.
    pub fn id(&self) -> u32 {
        self.window
    }

    /// Resizes the window, pixels.
    pub fn resize(&self, width_px: u32, height_px: u32) -> Result<(), HostError> {
        use x11rb::protocol::xproto::{ConfigureWindowAux, ConnectionExt};
        self.conn
            .configure_window(
                self.window,
                &ConfigureWindowAux::new()
                    .width(width_px.max(1))
                    .height(height_px.max(1)),
            )
            .map_err(x11_error("resize the parent window"))?
            .check()
            .map_err(x11_error("resize the parent window"))
    }

    /// The windows directly inside this one (the embedded editor's, while it is open).
    pub fn children(&self) -> Result<Vec<u32>, HostError> {
        use x11rb::protocol::xproto::ConnectionExt;
        Ok(self
            .conn
            .query_tree(self.window)
            .map_err(x11_error("list the parent's children"))?
            .reply()
            .map_err(x11_error("list the parent's children"))?
            .children)
    }

    /// Whether `window` is mapped and all its ancestors are (X11 `MapState::VIEWABLE`).
    pub fn is_viewable(&self, window: u32) -> Result<bool, HostError> {
        use x11rb::protocol::xproto::{ConnectionExt, MapState};
        let attributes = self
            .conn
            .get_window_attributes(window)
            .map_err(x11_error("read window attributes"))?
            .reply()
            .map_err(x11_error("read window attributes"))?;
        Ok(attributes.map_state == MapState::VIEWABLE)
    }

    /// The colour of pixel (`x_px`, `y_px`) of `window` (this one or one inside it), 8-bit
    /// RGB, read back from the server (X11 `GetImage`). The window must be viewable and use a
    /// TrueColor or DirectColor visual with 24 or 32 bits per pixel.
    pub fn pixel_rgb(&self, window: u32, x_px: i16, y_px: i16) -> Result<[u8; 3], HostError> {
        use x11rb::connection::Connection;
        use x11rb::protocol::xproto::{ConnectionExt, ImageFormat, ImageOrder};
        let visual = self
            .conn
            .get_window_attributes(window)
            .map_err(x11_error("read window attributes"))?
            .reply()
            .map_err(x11_error("read window attributes"))?
            .visual;
        let masks = Self::masks(&self.conn, visual).ok_or(HostError::X11Pixels {
            window,
            reason: "not a TrueColor or DirectColor visual",
        })?;
        let image = self
            .conn
            .get_image(ImageFormat::Z_PIXMAP, window, x_px, y_px, 1, 1, u32::MAX)
            .map_err(x11_error("read a pixel"))?
            .reply()
            .map_err(x11_error("read a pixel"))?;
        let setup = self.conn.setup();
        let bits = setup
            .pixmap_formats
            .iter()
            .find(|f| f.depth == image.depth)
            .map(|f| f.bits_per_pixel);
        let bytes = match bits {
            Some(24) => 3,
            Some(32) => 4,
            _ => {
                return Err(HostError::X11Pixels {
                    window,
                    reason: "not 24 or 32 bits per pixel",
                });
            }
        };
        let raw = image.data.get(..bytes).ok_or(HostError::X11Pixels {
            window,
            reason: "short image",
        })?;
        let pixel = if setup.image_byte_order == ImageOrder::LSB_FIRST {
            raw.iter()
                .rev()
                .fold(0_u32, |p, &b| (p << 8) | u32::from(b))
        } else {
            raw.iter().fold(0_u32, |p, &b| (p << 8) | u32::from(b))
        };
        Ok(masks.decode(pixel))
    }

    /// The colour masks of `visual`, if it is TrueColor or DirectColor.
    fn masks(conn: &x11rb::rust_connection::RustConnection, visual: u32) -> Option<ColourMasks> {
        use x11rb::connection::Connection;
        use x11rb::protocol::xproto::VisualClass;
        conn.setup()
            .roots
            .iter()
            .flat_map(|screen| &screen.allowed_depths)
            .flat_map(|depth| &depth.visuals)
            .find(|v| v.visual_id == visual)
            .filter(|v| matches!(v.class, VisualClass::TRUE_COLOR | VisualClass::DIRECT_COLOR))
            .map(|v| ColourMasks {
                red: v.red_mask,
                green: v.green_mask,
                blue: v.blue_mask,
            })
    }
}

impl Drop for ParentWindow {
    fn drop(&mut self) {
        use x11rb::connection::Connection;
        use x11rb::protocol::xproto::ConnectionExt;
        if let Ok(cookie) = self.conn.destroy_window(self.window) {
            let _ = cookie.check();
        }
        let _ = self.conn.flush();
    }
}
