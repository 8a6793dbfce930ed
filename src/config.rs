//! The daemon's TOML configuration: parsing, defaults and semantic checks.
//!
//! Unknown keys are errors. Every error names the file, and the line where the offending
//! key is written, and says what was expected.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::{Mask, Rect, Settings};
use crate::source::DEFAULT_MAX_PIXELS;

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Config {
    /// Model bundle folder (relative paths are relative to the config file).
    pub bundle: PathBuf,
    /// Frames with more pixels are refused from their header.
    #[serde(default = "default_max_pixels")]
    pub max_pixels: u64,
    pub source: SourceConfig,
    #[serde(default)]
    pub engine: Settings,
    #[serde(default)]
    pub mask: MaskConfig,
    pub log: LogConfig,
    #[serde(default)]
    pub evidence: EvidenceConfig,
}

fn default_max_pixels() -> u64 {
    DEFAULT_MAX_PIXELS
}

/// What a source does when analysis is busy and a new frame arrives.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Overload {
    /// Keep only the newest frame and count the one it replaces as dropped.
    DropOldest,
    /// Wait until analysis takes the frame: nothing is skipped.
    Wait,
}

/// What happens to a file from a watched folder once it has been taken.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AfterUse {
    Keep,
    Delete,
    Move,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case", deny_unknown_fields)]
pub enum SourceConfig {
    /// A V4L2 camera.
    Camera {
        #[serde(default = "default_device")]
        device: String,
        width: u32,
        height: u32,
        #[serde(default = "default_fps")]
        fps: u32,
        /// Pixel formats in order of preference: "mjpeg", "yuyv", "nv12".
        #[serde(default = "default_formats")]
        formats: Vec<String>,
    },
    /// A folder into which another program drops frames.
    Folder {
        path: PathBuf,
        #[serde(default = "default_after")]
        after: AfterUse,
        /// Destination for `after = "move"`.
        move_to: Option<PathBuf>,
        /// A file is taken once its size and modification time have not changed for this long.
        #[serde(default = "default_stable_ms")]
        stable_ms: u64,
        #[serde(default = "default_poll_ms")]
        poll_ms: u64,
        #[serde(default = "default_drop")]
        overload: Overload,
    },
    /// A list of files or glob patterns replayed in order.
    Files {
        paths: Vec<String>,
        /// Frames per second; 0 replays as fast as analysis goes.
        #[serde(default)]
        rate_fps: f64,
        /// Start again from the first file after the last one.
        #[serde(default)]
        repeat: bool,
        #[serde(default = "default_wait")]
        overload: Overload,
    },
    /// The built-in generated scene (the demo's sheet inspection).
    Scene {
        #[serde(default = "default_scene_width")]
        width: u32,
        #[serde(default = "default_scene_height")]
        height: u32,
        #[serde(default = "default_scene_fps")]
        fps: f64,
        #[serde(default = "default_scene_seed")]
        seed: u64,
        /// Frames to generate; 0 for no end.
        #[serde(default)]
        count: u64,
        #[serde(default = "default_drop")]
        overload: Overload,
    },
}

fn default_device() -> String {
    "/dev/video0".into()
}
fn default_fps() -> u32 {
    5
}
fn default_formats() -> Vec<String> {
    vec!["mjpeg".into(), "yuyv".into(), "nv12".into()]
}
fn default_after() -> AfterUse {
    AfterUse::Keep
}
fn default_stable_ms() -> u64 {
    500
}
fn default_poll_ms() -> u64 {
    100
}
fn default_drop() -> Overload {
    Overload::DropOldest
}
fn default_wait() -> Overload {
    Overload::Wait
}
fn default_scene_width() -> u32 {
    2448
}
fn default_scene_height() -> u32 {
    2048
}
fn default_scene_fps() -> f64 {
    2.0
}
fn default_scene_seed() -> u64 {
    1
}

#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MaskConfig {
    /// Greyscale image of the frame size: black = ignore, white = keep.
    pub image: Option<PathBuf>,
    /// Rectangles to ignore, in frame pixels.
    #[serde(default)]
    pub ignore: Vec<Rect>,
}

/// Which analysed frames get a record in the detection log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RecordPolicy {
    All,
    NotClear,
}

/// When appended lines are forced to stable storage.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum SyncPolicy {
    /// Leave it to the operating system.
    Never,
    /// At most every `sync_interval_s` seconds, and at rotation and exit.
    Interval,
    /// After every record.
    Always,
}

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LogConfig {
    /// The JSON Lines detection log.
    pub path: PathBuf,
    #[serde(default = "default_records")]
    pub records: RecordPolicy,
    /// Rotate when the file would pass this size.
    #[serde(default = "default_rotate_mb")]
    pub rotate_mb: f64,
    /// Rotated files kept (`path.1` … `path.N`).
    #[serde(default = "default_keep")]
    pub keep: usize,
    #[serde(default = "default_sync")]
    pub sync: SyncPolicy,
    #[serde(default = "default_sync_interval")]
    pub sync_interval_s: f64,
    /// Seconds between health records.
    #[serde(default = "default_health")]
    pub health_interval_s: f64,
}

fn default_records() -> RecordPolicy {
    RecordPolicy::All
}
fn default_rotate_mb() -> f64 {
    64.0
}
fn default_keep() -> usize {
    5
}
fn default_sync() -> SyncPolicy {
    SyncPolicy::Interval
}
fn default_sync_interval() -> f64 {
    5.0
}
fn default_health() -> f64 {
    60.0
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct EvidenceConfig {
    pub enabled: bool,
    /// Folder for evidence images (created if missing).
    pub dir: PathBuf,
    /// Total size kept; oldest files are removed first.
    pub quota_mb: f64,
    /// Files older than this are removed.
    pub max_age_hours: f64,
    /// Full-resolution crops saved per frame (highest weight first).
    pub crops: usize,
}

impl Default for EvidenceConfig {
    fn default() -> Self {
        Self { enabled: false, dir: PathBuf::from("evidence"), quota_mb: 200.0, max_age_hours: 72.0, crops: 4 }
    }
}

#[derive(Debug, thiserror::Error)]
#[error("{path}{}: {message}", at.map(|(l, c)| format!(":{l}:{c}")).unwrap_or_default())]
pub struct ConfigError {
    pub path: PathBuf,
    /// Line and column (1-based) of the offending key or value.
    pub at: Option<(usize, usize)>,
    pub message: String,
}

impl Config {
    /// Reads, parses and checks a config file; relative paths become relative to its folder.
    pub fn load(path: &Path) -> Result<Self, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            path: path.into(),
            at: None,
            message: format!("cannot read the config file: {e}"),
        })?;
        Self::parse(&text, path)
    }

    pub fn parse(text: &str, path: &Path) -> Result<Self, ConfigError> {
        let mut c: Config = toml::from_str(text).map_err(|e| {
            let at = e.span().map(|s| position(text, s.start));
            ConfigError { path: path.into(), at, message: e.message().to_string() }
        })?;
        let base = path.parent().unwrap_or(Path::new("."));
        c.resolve_paths(base);
        c.check().map_err(|(key, message)| ConfigError { path: path.into(), at: locate(text, key), message })?;
        Ok(c)
    }

    fn resolve_paths(&mut self, base: &Path) {
        let fix = |p: &mut PathBuf| {
            if p.is_relative() {
                *p = base.join(&*p);
            }
        };
        fix(&mut self.bundle);
        fix(&mut self.log.path);
        fix(&mut self.evidence.dir);
        if let Some(p) = &mut self.mask.image {
            fix(p);
        }
        match &mut self.source {
            SourceConfig::Folder { path, move_to, .. } => {
                fix(path);
                if let Some(m) = move_to {
                    fix(m);
                }
            }
            SourceConfig::Files { paths, .. } => {
                for p in paths.iter_mut() {
                    if Path::new(p).is_relative() {
                        *p = base.join(&*p).to_string_lossy().into_owned();
                    }
                }
            }
            _ => {}
        }
    }

    /// Semantic checks; an error is (the key to point at, the message).
    fn check(&self) -> Result<(), (&'static str, String)> {
        if !self.bundle.join(crate::engine::bundle::MANIFEST).is_file() {
            return Err(("bundle", format!("bundle = {:?}: no bundle.toml there", self.bundle)));
        }
        self.engine.validate(None).map_err(|e| (first_word(&e), format!("[engine] {e}")))?;
        if self.max_pixels == 0 {
            return Err(("max_pixels", "max_pixels = 0: expected a positive pixel count".into()));
        }
        match &self.source {
            SourceConfig::Camera { width, height, fps, formats, .. } => {
                if *width == 0 || *height == 0 || *fps == 0 {
                    return Err(("width", "[source] camera width, height and fps must be positive".into()));
                }
                if let Some(f) = formats.iter().find(|f| !["mjpeg", "yuyv", "nv12"].contains(&f.as_str())) {
                    return Err((
                        "formats",
                        format!("[source] formats: {f:?} is not one of \"mjpeg\", \"yuyv\", \"nv12\""),
                    ));
                }
            }
            SourceConfig::Folder { path, after, move_to, stable_ms, poll_ms, .. } => {
                if !path.is_dir() {
                    return Err(("path", format!("[source] path = {path:?}: not a folder")));
                }
                match (after, move_to) {
                    (AfterUse::Move, None) => {
                        return Err(("after", "[source] after = \"move\" needs move_to = \"FOLDER\"".into()))
                    }
                    (AfterUse::Move, Some(m)) => {
                        creatable(m).map_err(|e| ("move_to", format!("[source] move_to: {e}")))?
                    }
                    _ => {}
                }
                if *poll_ms == 0 || *stable_ms == 0 {
                    return Err(("poll_ms", "[source] poll_ms and stable_ms must be positive".into()));
                }
            }
            SourceConfig::Files { paths, rate_fps, .. } => {
                if paths.is_empty() {
                    return Err(("paths", "[source] paths: expected at least one file or glob pattern".into()));
                }
                if !(*rate_fps >= 0.0 && rate_fps.is_finite()) {
                    return Err((
                        "rate_fps",
                        format!("[source] rate_fps = {rate_fps}: expected 0 (as fast as possible) or a positive rate"),
                    ));
                }
            }
            SourceConfig::Scene { width, height, fps, .. } => {
                if *width < 64 || *height < 64 {
                    return Err(("width", "[source] scene width and height must be at least 64".into()));
                }
                if !(*fps > 0.0 && fps.is_finite()) {
                    return Err(("fps", format!("[source] fps = {fps}: expected a positive rate")));
                }
            }
        }
        if let Some(p) = &self.mask.image {
            if !p.is_file() {
                return Err(("image", format!("[mask] image = {p:?}: file not found")));
            }
            if !self.mask.ignore.is_empty() {
                return Err(("ignore", "[mask] give either image or ignore, not both".into()));
            }
        }
        if let Some(size) = self.frame_size() {
            if let Some(mask) = self.mask().map_err(|e| ("image", format!("[mask] {e}")))? {
                mask.check(size.0, size.1).map_err(|e| ("ignore", format!("[mask] {e}")))?;
            }
        }
        let log = &self.log;
        creatable(log.path.parent().unwrap_or(Path::new("."))).map_err(|e| ("path", format!("[log] path: {e}")))?;
        if !(log.rotate_mb > 0.0) || log.keep == 0 {
            return Err(("rotate_mb", "[log] rotate_mb must be positive and keep at least 1".into()));
        }
        if !(log.sync_interval_s > 0.0) || !(log.health_interval_s > 0.0) {
            return Err(("health_interval_s", "[log] sync_interval_s and health_interval_s must be positive".into()));
        }
        let ev = &self.evidence;
        if ev.enabled {
            creatable(&ev.dir).map_err(|e| ("dir", format!("[evidence] dir: {e}")))?;
            if !(ev.quota_mb > 0.0) || !(ev.max_age_hours > 0.0) {
                return Err(("quota_mb", "[evidence] quota_mb and max_age_hours must be positive".into()));
            }
        }
        Ok(())
    }

    /// Checks what depends on the loaded bundle: one threshold per class.
    pub fn check_bundle(&self, path: &Path, bundle: &crate::engine::Bundle) -> Result<(), String> {
        self.engine
            .validate(Some(bundle.manifest.classes.len()))
            .map_err(|e| format!("{}: [engine] {e}", path.display()))
    }

    /// The frame size when the source fixes it in the config.
    pub fn frame_size(&self) -> Option<(u32, u32)> {
        match self.source {
            SourceConfig::Camera { width, height, .. } | SourceConfig::Scene { width, height, .. } => {
                Some((width, height))
            }
            _ => None,
        }
    }

    /// The configured mask, if any.
    pub fn mask(&self) -> Result<Option<Mask>, String> {
        match (&self.mask.image, self.mask.ignore.is_empty()) {
            (Some(p), _) => Mask::from_image_file(p).map(Some),
            (None, false) => Ok(Some(Mask::Ignore(self.mask.ignore.clone()))),
            (None, true) => Ok(None),
        }
    }
}

fn first_word(e: &str) -> &'static str {
    ["budget_ms", "min_patches", "max_patches", "batch", "samples", "interval", "thresholds"]
        .into_iter()
        .find(|k| e.starts_with(k))
        .unwrap_or("engine")
}

/// The folder exists or can be created, and is writable.
fn creatable(dir: &Path) -> Result<(), String> {
    std::fs::create_dir_all(dir).map_err(|e| format!("{dir:?} cannot be created: {e}"))?;
    let probe = dir.join(format!(".saccade-write-test-{}", std::process::id()));
    std::fs::write(&probe, b"").map_err(|e| format!("{dir:?} is not writable: {e}"))?;
    std::fs::remove_file(&probe).ok();
    Ok(())
}

/// Line and column (1-based) of a byte offset.
fn position(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line_start = before.rfind('\n').map_or(0, |i| i + 1);
    (before.matches('\n').count() + 1, before[line_start..].chars().count() + 1)
}

/// Line and column of the first `key = …` in the text.
fn locate(text: &str, key: &str) -> Option<(usize, usize)> {
    let mut offset = 0;
    for l in text.split_inclusive('\n') {
        let indent = l.len() - l.trim_start().len();
        if l.trim_start().strip_prefix(key).is_some_and(|rest| rest.trim_start().starts_with('=')) {
            return Some(position(text, offset + indent));
        }
        offset += l.len();
    }
    None
}
