//! Detection log records (schema version [`SCHEMA`], described by
//! `config/record.schema.json`). Times are RFC 3339 in UTC.

use std::time::SystemTime;

use serde::Serialize;

use crate::engine::Report;

/// 2: two outcome thresholds per class (`clear_below`, `detected_above`) instead of one
/// `threshold`, the patches that carry each finding, `evidence`, and `patches` optional.
pub const SCHEMA: u32 = 2;

/// RFC 3339 with milliseconds, UTC (e.g. `2026-12-02T00:51:46.123Z`).
pub fn rfc3339(t: SystemTime) -> String {
    match jiff::Timestamp::try_from(t) {
        Ok(ts) => format!("{ts:.3}"),
        Err(_) => "1970-01-01T00:00:00.000Z".into(),
    }
}

#[derive(Serialize)]
pub struct FrameRecord<'a> {
    pub schema: u32,
    pub record: &'static str,
    /// When the record was written.
    pub time: String,
    /// When the source took the frame.
    pub captured: String,
    /// Capture to record written, ms.
    pub age_ms: f64,
    /// The evidence images written for this frame.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub evidence: Option<EvidenceFiles>,
    /// The claim on the frame's file (watched folders only).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub claim: Option<&'a str>,
    #[serde(flatten)]
    pub report: &'a Report,
}

/// Paths of a frame's evidence images, as written (under `[evidence] dir`).
#[derive(Serialize, Clone, Debug, Default)]
pub struct EvidenceFiles {
    pub overview: String,
    /// One per named finding patch, in the order of the classes and their patches.
    pub crops: Vec<String>,
}

#[derive(Serialize)]
pub struct ErrorRecord<'a> {
    pub schema: u32,
    pub record: &'static str,
    pub time: String,
    pub origin: &'a str,
    pub error: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub claim: Option<&'a str>,
}

#[derive(Serialize, Clone, Copy, Default)]
pub struct Percentiles {
    pub p50: f64,
    pub p99: f64,
}

impl Percentiles {
    /// Nearest-rank percentiles of the values (zeros when there are none).
    pub fn of(values: &mut [f64]) -> Self {
        if values.is_empty() {
            return Self::default();
        }
        values.sort_by(f64::total_cmp);
        let rank = |p: f64| values[((p * values.len() as f64).ceil() as usize).clamp(1, values.len()) - 1];
        Self { p50: rank(0.50), p99: rank(0.99) }
    }
}

#[derive(Serialize)]
pub struct HealthRecord {
    pub schema: u32,
    pub record: &'static str,
    pub time: String,
    pub uptime_s: f64,
    /// Totals since start.
    pub frames_in: u64,
    pub analysed: u64,
    pub dropped: u64,
    pub errors: u64,
    pub budget_overruns: u64,
    /// Over the frames analysed since the previous health record.
    pub window_frames: u64,
    pub frames_per_s: f64,
    pub analysis_ms: Percentiles,
    pub age_ms: Percentiles,
    pub evidence: bool,
    /// Records waiting in memory for the log to take them (a full disk), in bytes.
    pub backlog_bytes: u64,
    /// Records given up since start because the backlog passed `backlog_mb`.
    pub shed: u64,
}
