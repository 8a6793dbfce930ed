//! The `[source]` table of the daemon's config: which source, and its knobs.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::ranges::{first_outside, shown, Ranged};
use crate::folders::{self, FolderProblem};

/// Pixel formats a camera may deliver that the source converts.
pub const CAMERA_FORMATS: [&str; 3] = ["mjpeg", "yuyv", "nv12"];

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

#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
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

impl SourceConfig {
    /// The frame size when the config fixes it.
    pub fn frame_size(&self) -> Option<(u32, u32)> {
        match self {
            Self::Camera { width, height, .. } | Self::Scene { width, height, .. } => Some((*width, *height)),
            _ => None,
        }
    }

    /// What the source does when analysis is busy.
    pub fn overload(&self) -> Overload {
        match self {
            Self::Folder { overload, .. } | Self::Files { overload, .. } | Self::Scene { overload, .. } => *overload,
            Self::Camera { .. } => Overload::DropOldest,
        }
    }
}

/// A `[source]` value that cannot be used; [`SourceConfigError::field`] names the key.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SourceConfigError {
    #[error("{field} = {}: expected {} to {}", shown(*value), shown(*min), shown(*max))]
    Range { field: &'static str, value: f64, min: f64, max: f64 },
    #[error("formats: {0:?} is not one of \"mjpeg\", \"yuyv\", \"nv12\"")]
    Format(String),
    #[error("device = {0:?}: expected /dev/videoN")]
    Device(String),
    #[error("path = {0:?}: not a folder")]
    NotAFolder(PathBuf),
    #[error("path: {0} (files are claimed by a rename inside the folder)")]
    Inbox(FolderProblem),
    #[error("after = \"move\" needs move_to = \"FOLDER\"")]
    MoveWithoutFolder,
    #[error("move_to: {0}")]
    MoveTo(FolderProblem),
    #[error("paths: expected at least one file or glob pattern")]
    NoPaths,
    #[error("rate_fps = {}: expected 0 (as fast as analysis goes) or 0.001 to 1000", shown(*.0))]
    Rate(f64),
}

impl SourceConfigError {
    /// The `[source]` key the error is about.
    pub fn field(&self) -> &'static str {
        match self {
            Self::Range { field, .. } => field,
            Self::Format(_) => "formats",
            Self::Device(_) => "device",
            Self::NotAFolder(_) | Self::Inbox(_) => "path",
            Self::MoveWithoutFolder => "after",
            Self::MoveTo(_) => "move_to",
            Self::NoPaths => "paths",
            Self::Rate(_) => "rate_fps",
        }
    }
}

/// `/dev/videoN` (or `N`) to the V4L2 index N.
pub fn device_index(device: &str) -> Result<u32, SourceConfigError> {
    device.trim_start_matches("/dev/video").parse().map_err(|_| SourceConfigError::Device(device.to_string()))
}

impl SourceConfig {
    /// Checks the values, and that folders exist or can be made; writes nothing.
    pub fn check(&self) -> Result<(), SourceConfigError> {
        if let Some((field, value, min, max)) = first_outside(&self.numbers()) {
            return Err(SourceConfigError::Range { field, value, min, max });
        }
        match self {
            Self::Camera { device, formats, .. } => {
                device_index(device)?;
                if let Some(f) = formats.iter().find(|f| !CAMERA_FORMATS.contains(&f.as_str())) {
                    return Err(SourceConfigError::Format(f.clone()));
                }
            }
            Self::Folder { path, after, move_to, .. } => {
                if !path.is_dir() {
                    return Err(SourceConfigError::NotAFolder(path.clone()));
                }
                folders::check_writable(path).map_err(SourceConfigError::Inbox)?;
                match (after, move_to) {
                    (AfterUse::Move, None) => return Err(SourceConfigError::MoveWithoutFolder),
                    (AfterUse::Move, Some(m)) => folders::check_writable(m).map_err(SourceConfigError::MoveTo)?,
                    _ => {}
                }
            }
            Self::Files { paths, rate_fps, .. } => {
                if paths.is_empty() {
                    return Err(SourceConfigError::NoPaths);
                }
                if !(*rate_fps == 0.0 || (0.001..=1000.0).contains(rate_fps)) {
                    return Err(SourceConfigError::Rate(*rate_fps));
                }
            }
            Self::Scene { .. } => {}
        }
        Ok(())
    }

    /// Every number of the table with its accepted range. Sizes stop at 16384 pixels a
    /// side (a generated frame at 8192, it is held in memory); times and rates stay where
    /// a `Duration` of them exists and means something for a camera.
    fn numbers(&self) -> Vec<Ranged> {
        match self {
            Self::Camera { width, height, fps, .. } => vec![
                ("width", *width as f64, 1.0, 16384.0),
                ("height", *height as f64, 1.0, 16384.0),
                ("fps", *fps as f64, 1.0, 1000.0),
            ],
            Self::Folder { stable_ms, poll_ms, .. } => {
                vec![("stable_ms", *stable_ms as f64, 1.0, 3_600_000.0), ("poll_ms", *poll_ms as f64, 1.0, 60_000.0)]
            }
            Self::Files { .. } => vec![],
            Self::Scene { width, height, fps, .. } => vec![
                ("width", *width as f64, 64.0, 8192.0),
                ("height", *height as f64, 64.0, 8192.0),
                ("fps", *fps, 0.001, 1000.0),
            ],
        }
    }

    /// Folders `saccade run` creates before the source starts.
    pub fn folders(&self) -> Vec<&Path> {
        match self {
            Self::Folder { after: AfterUse::Move, move_to: Some(m), .. } => vec![m.as_path()],
            _ => vec![],
        }
    }

    /// Makes relative paths relative to `base` (the config file's folder).
    pub fn resolve_paths(&mut self, base: &Path) {
        match self {
            Self::Folder { path, move_to, .. } => {
                *path = base.join(&*path);
                if let Some(m) = move_to {
                    *m = base.join(&*m);
                }
            }
            Self::Files { paths, .. } => {
                for p in paths.iter_mut() {
                    if Path::new(p).is_relative() {
                        *p = base.join(&*p).to_string_lossy().into_owned();
                    }
                }
            }
            Self::Camera { .. } | Self::Scene { .. } => {}
        }
    }
}
