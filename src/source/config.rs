//! The `[source]` table of the daemon's config: which source, and its knobs.

use std::path::PathBuf;

use serde::{Deserialize, Serialize};

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
