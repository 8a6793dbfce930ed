//! The sinks thread: writes frame, error and health records to the detection log and
//! evidence for frames that are not clear.

use std::collections::VecDeque;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::thread::JoinHandle;
use std::time::{Duration, Instant, SystemTime};

use crossbeam_channel::{bounded, Receiver, RecvTimeoutError, Sender};
use image::RgbImage;

use super::config::{EvidenceConfig, LogConfig, PatchPolicy, RecordPolicy};
use super::evidence::Evidence;
use super::jsonl::JsonlLog;
use super::record::{rfc3339, ErrorRecord, FrameRecord, HealthRecord, Percentiles, SCHEMA};
use crate::engine::{isolate, Outcome, Report};
use crate::source::claim::Claim;
use crate::source::SourceCounters;

pub enum SinkMsg {
    Frame { report: Box<Report>, captured: SystemTime, image: Option<RgbImage>, claim: Option<Claim> },
    BadFrame { origin: String, error: String, claim: Option<Claim> },
    Reconfigure { log: LogConfig, evidence: EvidenceConfig },
}

/// A record not yet in the log, and the claim on its file.
struct Pending {
    line: Vec<u8>,
    claim: Option<Claim>,
}

struct Worker {
    log: JsonlLog,
    log_cfg: LogConfig,
    evidence: Evidence,
    counters: Arc<SourceCounters>,
    started: Instant,
    /// Records the log could not take yet (a full disk), oldest first, and their bytes.
    pending: VecDeque<Pending>,
    pending_bytes: usize,
    /// Records given up because the backlog passed its bound.
    shed: u64,
    /// Claims whose records are written but not yet synced: disposed of after the sync.
    unsynced: Vec<Claim>,
    analysed: u64,
    errors: u64,
    overruns: u64,
    window_start: Instant,
    window_ms: Vec<f64>,
    window_age: Vec<f64>,
}

/// Whether a frame needs a person's look (any class not clear).
pub fn not_clear(r: &Report) -> bool {
    r.classes.iter().any(|c| c.outcome != Outcome::Clear)
}

/// Leaves in the report the examined patches the record should list.
pub fn keep_patches(report: &mut Report, policy: PatchPolicy) {
    match policy {
        PatchPolicy::All => {}
        PatchPolicy::None => report.patches.clear(),
        PatchPolicy::Findings => {
            let mut named: Vec<usize> = report.classes.iter().flat_map(|c| c.patches.iter().map(|s| s.patch)).collect();
            named.sort_unstable();
            named.dedup();
            let all = std::mem::take(&mut report.patches);
            report.patches = named.into_iter().filter_map(|i| all.get(i).cloned()).collect();
        }
    }
}

/// Starts the sinks thread on an opened log; it ends when every sender is gone.
pub fn spawn(
    log: JsonlLog,
    log_cfg: LogConfig,
    evidence: &EvidenceConfig,
    counters: Arc<SourceCounters>,
) -> std::io::Result<(Sender<SinkMsg>, JoinHandle<()>)> {
    let (tx, rx) = bounded(8);
    let now = Instant::now();
    let mut w = Worker {
        log,
        log_cfg,
        evidence: Evidence::open(evidence),
        counters,
        started: now,
        pending: VecDeque::new(),
        pending_bytes: 0,
        shed: 0,
        unsynced: Vec::new(),
        analysed: 0,
        errors: 0,
        overruns: 0,
        window_start: now,
        window_ms: vec![],
        window_age: vec![],
    };
    let handle = std::thread::Builder::new().name("sinks".into()).spawn(move || w.run(rx))?;
    Ok((tx, handle))
}

impl Worker {
    fn run(&mut self, rx: Receiver<SinkMsg>) {
        loop {
            let due = self.window_start + Duration::from_secs_f64(self.log_cfg.health_interval_s);
            match rx.recv_timeout(due.saturating_duration_since(Instant::now())) {
                // A panic while writing one record (or its evidence) loses that record
                // only; the thread, and the log, go on.
                Ok(msg) => {
                    if let Err(panic) = isolate::run(|| self.handle(msg)) {
                        log::error!("{}: a record was lost to an internal error: {panic}", self.log.path().display());
                    }
                }
                Err(RecvTimeoutError::Timeout) => self.health(),
                Err(RecvTimeoutError::Disconnected) => break,
            }
        }
        self.health();
        self.sync_and_dispose();
        if !self.pending.is_empty() {
            log::error!(
                "{}: {} records ({} bytes) could not be written before exit; their files stay claimed",
                self.log.path().display(),
                self.pending.len(),
                self.pending_bytes
            );
        }
    }

    fn handle(&mut self, msg: SinkMsg) {
        match msg {
            SinkMsg::Frame { mut report, captured, image, claim } => {
                self.analysed += 1;
                self.overruns += u64::from(!report.budget_met);
                self.window_ms.push(report.times_ms.total);
                let look = not_clear(&report);
                let mut evidence = None;
                if look {
                    if let Some(img) = &image {
                        let stem = format!("{}-{:06}", rfc3339(captured).replace(':', ""), report.seq);
                        evidence = self.evidence.write(&report, img, &stem);
                    }
                }
                keep_patches(&mut report, self.log_cfg.patches);
                // Microseconds are plenty for an age.
                let age_ms =
                    (SystemTime::now().duration_since(captured).unwrap_or_default().as_secs_f64() * 1e6).round() / 1e3;
                self.window_age.push(age_ms);
                if look || self.log_cfg.records == RecordPolicy::All {
                    let rec = FrameRecord {
                        schema: SCHEMA,
                        record: "frame",
                        time: rfc3339(SystemTime::now()),
                        captured: rfc3339(captured),
                        age_ms,
                        evidence,
                        claim: claim.as_ref().map(|c| c.token.as_str()),
                        report: &report,
                    };
                    self.write(serde_json::to_vec(&rec).expect("record serialises"), claim);
                } else if let Some(c) = claim {
                    // No record to wait for.
                    dispose(c);
                }
            }
            SinkMsg::BadFrame { origin, error, claim } => {
                self.errors += 1;
                let rec = ErrorRecord {
                    schema: SCHEMA,
                    record: "error",
                    time: rfc3339(SystemTime::now()),
                    origin: &origin,
                    error: &error,
                    claim: claim.as_ref().map(|c| c.token.as_str()),
                };
                self.write(serde_json::to_vec(&rec).expect("record serialises"), claim);
            }
            SinkMsg::Reconfigure { log, evidence } => {
                if log != self.log_cfg {
                    match JsonlLog::open(&log) {
                        Ok(l) => self.log = l,
                        Err(e) => log::error!(
                            "{}: cannot open the new log, keeping {}: {e}",
                            log.path.display(),
                            self.log.path().display()
                        ),
                    }
                }
                self.log_cfg = log;
                self.evidence = Evidence::open(&evidence);
            }
        }
    }

    /// Appends a record, first any that an earlier failure left waiting. Past the
    /// backlog bound the oldest waiting records are shed (their files stay claimed and
    /// are analysed again at the next start).
    fn write(&mut self, line: Vec<u8>, claim: Option<Claim>) {
        self.pending_bytes += line.len();
        self.pending.push_back(Pending { line, claim });
        while let Some(p) = self.pending.front() {
            if let Err(e) = self.log.append(&p.line) {
                // Said when the backlog starts and as it doubles, not for every record.
                if self.pending.len().is_power_of_two() {
                    log::error!(
                        "{}: cannot write a record ({} waiting, {} bytes): {e}",
                        self.log.path().display(),
                        self.pending.len(),
                        self.pending_bytes
                    );
                }
                let bound = self.log_cfg.backlog_bytes();
                while self.pending_bytes > bound {
                    let Some(old) = self.pending.pop_front() else { break };
                    self.pending_bytes -= old.line.len();
                    self.shed += 1;
                    if self.shed.is_power_of_two() {
                        log::error!(
                            "{}: backlog over backlog_mb = {}: {} records shed so far",
                            self.log.path().display(),
                            self.log_cfg.backlog_mb,
                            self.shed
                        );
                    }
                }
                return;
            }
            let p = self.pending.pop_front().expect("front exists");
            self.pending_bytes -= p.line.len();
            if let Some(c) = p.claim {
                self.unsynced.push(c);
                self.sync_and_dispose();
            }
        }
    }

    /// Syncs the log and disposes of the files whose records it now holds durably.
    fn sync_and_dispose(&mut self) {
        if let Err(e) = self.log.sync_now() {
            log::error!(
                "{}: sync failed: {e}; used files stay claimed until a sync succeeds",
                self.log.path().display()
            );
            return;
        }
        for c in self.unsynced.drain(..) {
            dispose(c);
        }
    }

    fn health(&mut self) {
        let secs = self.window_start.elapsed().as_secs_f64();
        let rec = HealthRecord {
            schema: SCHEMA,
            record: "health",
            time: rfc3339(SystemTime::now()),
            uptime_s: self.started.elapsed().as_secs_f64(),
            frames_in: self.counters.frames_in.load(Ordering::Relaxed),
            analysed: self.analysed,
            dropped: self.counters.dropped.load(Ordering::Relaxed),
            errors: self.errors,
            budget_overruns: self.overruns,
            window_frames: self.window_ms.len() as u64,
            frames_per_s: if secs > 0.0 { self.window_ms.len() as f64 / secs } else { 0.0 },
            analysis_ms: Percentiles::of(&mut self.window_ms),
            age_ms: Percentiles::of(&mut self.window_age),
            evidence: self.evidence.enabled,
            backlog_bytes: self.pending_bytes as u64,
            shed: self.shed,
        };
        self.write(serde_json::to_vec(&rec).expect("record serialises"), None);
        if !self.unsynced.is_empty() {
            self.sync_and_dispose();
        }
        self.window_ms.clear();
        self.window_age.clear();
        self.window_start = Instant::now();
    }
}

/// Deletes, moves or puts back a file whose record is on disk (or that needs none).
fn dispose(claim: Claim) {
    let origin = claim.origin();
    if let Err(e) = claim.dispose() {
        log::warn!("{origin}: recorded, but cannot dispose of the file: {e}; it stays claimed");
    }
}
