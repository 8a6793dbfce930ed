//! Where frames come from: decoding, and the source threads (folder, file list,
//! generated scene, camera) that feed analysis through a bounded hand-over.

#[cfg(feature = "camera")]
pub mod camera;
pub mod claim;
mod config;
pub mod decode;
pub mod feed;
pub mod files;
pub mod folder;
pub mod generated;
mod jpeg_end;
pub mod yuv;

use std::collections::HashSet;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::Duration;

use crossbeam_channel::Receiver;

use claim::CLAIMED_DIR as CLAIMED;
pub use config::{AfterUse, Overload, SourceConfig, SourceConfigError};
pub use decode::{decode_bytes, decode_file, DecodeError, DEFAULT_MAX_PIXELS};
pub use feed::{FrameError, Incoming, SourceCounters};

/// Why a source could not be started.
#[derive(Debug, thiserror::Error)]
pub enum SourceError {
    #[error("[source] {0}")]
    Config(#[from] SourceConfigError),
    #[error("[source] paths: {pattern:?} is not a valid pattern: {message}")]
    Pattern { pattern: String, message: String },
    #[error("[source] paths: {0:?} matches no file")]
    NoMatch(String),
    #[error("[source] camera {0}: this build has no camera support (cargo feature \"camera\")")]
    NoCamera(String),
    #[error("[source] path: cannot prepare {CLAIMED}/ in {}: {source}", dir.display())]
    Claimed { dir: std::path::PathBuf, source: std::io::Error },
    #[error("cannot start the source thread: {0}")]
    Thread(#[from] std::io::Error),
}

/// A running source thread and the receiving end of its feed.
pub struct Running {
    pub frames: Receiver<Incoming>,
    pub thread: JoinHandle<()>,
}

/// Opens the configured source and starts its thread. Errors (a missing folder, a
/// pattern matching nothing) are reported here, before the daemon says it is ready.
/// `recorded` holds the claim tokens already in the log: a folder source resolves the
/// files an earlier run claimed against them.
pub fn start(
    cfg: &SourceConfig,
    max_pixels: u64,
    counters: Arc<SourceCounters>,
    stop: Arc<AtomicBool>,
    recorded: &HashSet<String>,
) -> Result<Running, SourceError> {
    cfg.check()?;
    let (feed, frames) = feed::feed(cfg.overload(), counters, stop);
    let spawn = |name: &str, f: Box<dyn FnOnce() + Send>| std::thread::Builder::new().name(name.into()).spawn(f);
    let thread = match cfg.clone() {
        SourceConfig::Folder { path, after, move_to, stable_ms, poll_ms, overload } => {
            let settings = folder::FolderSettings {
                dir: &path,
                after,
                move_to: move_to.as_deref(),
                stable: Duration::from_millis(stable_ms),
                poll: Duration::from_millis(poll_ms),
                overload,
                max_pixels,
            };
            let s = folder::FolderSource::open(settings, recorded)
                .map_err(|source| SourceError::Claimed { dir: path.clone(), source })?;
            spawn("source-folder", Box::new(move || s.run(feed)))?
        }
        SourceConfig::Files { paths, rate_fps, repeat, .. } => {
            let files = files::expand(&paths)?;
            let s = files::FilesSource { files, rate_fps, repeat, max_pixels };
            spawn("source-files", Box::new(move || s.run(feed)))?
        }
        SourceConfig::Scene { width, height, fps, seed, count, .. } => {
            let s = generated::GeneratedSource { width, height, fps, seed, count };
            spawn("source-scene", Box::new(move || s.run(feed)))?
        }
        #[cfg(feature = "camera")]
        SourceConfig::Camera { device, width, height, fps, formats } => {
            let s = camera::CameraSource { device, width, height, fps, formats, max_pixels };
            spawn("source-camera", Box::new(move || s.run(feed)))?
        }
        #[cfg(not(feature = "camera"))]
        SourceConfig::Camera { device, .. } => return Err(SourceError::NoCamera(device)),
    };
    Ok(Running { frames, thread })
}
