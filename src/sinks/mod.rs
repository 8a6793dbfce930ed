//! Where reports go: the detection log, evidence images, and health records.

mod config;
pub mod evidence;
pub mod jsonl;
pub mod record;
pub mod worker;

pub use config::{EvidenceConfig, LogConfig, PatchPolicy, RecordPolicy, SinkConfigError, SyncPolicy};
