//! The `[log]` and `[evidence]` tables of the daemon's config.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::engine::ranges::{first_outside, shown, Ranged};
use crate::folders::{self, FolderProblem};

/// Which analysed frames get a record in the detection log.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum RecordPolicy {
    All,
    NotClear,
}

/// Which examined patches a frame record lists (the per-patch list is for debugging: with
/// every patch a record grows from about 1 KB to 30 KB).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum PatchPolicy {
    /// None; each finding still names its patches in its class entry.
    None,
    /// Only the patches that carry a finding, with their attention and weight.
    Findings,
    /// Every examined patch.
    All,
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
    #[serde(default = "default_patches")]
    pub patches: PatchPolicy,
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
    /// Records waiting in memory while the log cannot be written (a full disk), in MB;
    /// past it the oldest are shed and counted.
    #[serde(default = "default_backlog")]
    pub backlog_mb: f64,
}

fn default_records() -> RecordPolicy {
    RecordPolicy::All
}
fn default_patches() -> PatchPolicy {
    PatchPolicy::None
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
fn default_backlog() -> f64 {
    16.0
}

/// Keys left out take their defaults (the reference config lists them).
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct EvidenceConfig {
    pub enabled: bool,
    /// Folder for evidence images (created if missing).
    pub dir: PathBuf,
    /// Total size kept; oldest files are removed first.
    pub quota_mb: f64,
    /// Files older than this are removed.
    pub max_age_hours: f64,
    /// Enlarged, captioned crops saved per frame, of the patches that carry findings.
    pub crops: usize,
}

impl Default for EvidenceConfig {
    fn default() -> Self {
        Self { enabled: false, dir: PathBuf::from("evidence"), quota_mb: 200.0, max_age_hours: 72.0, crops: 4 }
    }
}

/// A `[log]` or `[evidence]` value that cannot be used; `field` names the key.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SinkConfigError {
    #[error("{field}: {problem}")]
    Folder { field: &'static str, problem: FolderProblem },
    #[error("{field} = {}: expected {} to {}", shown(*value), shown(*min), shown(*max))]
    Range { field: &'static str, value: f64, min: f64, max: f64 },
}

impl SinkConfigError {
    /// The key the error is about, within its table.
    pub fn field(&self) -> &'static str {
        match self {
            Self::Folder { field, .. } | Self::Range { field, .. } => field,
        }
    }
}

/// Checks each number against its range (both ends included).
fn in_ranges(numbers: &[Ranged]) -> Result<(), SinkConfigError> {
    match first_outside(numbers) {
        Some((field, value, min, max)) => Err(SinkConfigError::Range { field, value, min, max }),
        None => Ok(()),
    }
}

/// A day: the longest interval between syncs or health records that still tells the
/// operator something.
const DAY_S: f64 = 86_400.0;

impl LogConfig {
    /// The folder the log file lives in.
    pub fn folder(&self) -> &Path {
        self.path.parent().filter(|p| !p.as_os_str().is_empty()).unwrap_or(Path::new("."))
    }

    /// Checks the values, and that the log's folder exists or can be made and the log
    /// path is not a folder; writes nothing.
    pub fn check(&self) -> Result<(), SinkConfigError> {
        folders::check_writable(self.folder()).map_err(|problem| SinkConfigError::Folder { field: "path", problem })?;
        if self.path.is_dir() {
            let problem = FolderProblem::IsAFolder(self.path.clone());
            return Err(SinkConfigError::Folder { field: "path", problem });
        }
        in_ranges(&[
            ("rotate_mb", self.rotate_mb, 0.001, 1_048_576.0),
            ("keep", self.keep as f64, 1.0, 1000.0),
            ("sync_interval_s", self.sync_interval_s, 0.001, DAY_S),
            ("health_interval_s", self.health_interval_s, 0.01, DAY_S),
            ("backlog_mb", self.backlog_mb, 0.001, 4096.0),
        ])
    }

    /// The backlog bound in bytes.
    pub fn backlog_bytes(&self) -> usize {
        (self.backlog_mb * 1024.0 * 1024.0) as usize
    }
}

impl EvidenceConfig {
    /// Checks the values, and that the folder exists or can be made when evidence is on;
    /// writes nothing.
    pub fn check(&self) -> Result<(), SinkConfigError> {
        in_ranges(&[
            ("quota_mb", self.quota_mb, 0.001, 1_048_576.0),
            ("max_age_hours", self.max_age_hours, 0.001, 87_600.0),
            ("crops", self.crops as f64, 0.0, 64.0),
        ])?;
        if !self.enabled {
            return Ok(());
        }
        folders::check_writable(&self.dir).map_err(|problem| SinkConfigError::Folder { field: "dir", problem })
    }
}
