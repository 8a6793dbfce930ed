//! The detection log: JSON Lines appended a whole line per write, rotated by size.
//!
//! Each record is one `write` of a complete line to a file opened for appending, so a
//! crash can leave at most the last line partial. A write that fails part-way (a full
//! disk) is cut back to the last whole line before anything else is written, and on
//! opening, a partial last line left by a crash is cut off: every line but the last is
//! whole. Readers skip a line that does not parse (`jq -R 'fromjson?'`).

use std::collections::HashSet;
use std::fs::{File, OpenOptions};
use std::io::{Read, Seek, SeekFrom, Write};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use super::config::{LogConfig, SyncPolicy};

pub struct JsonlLog {
    path: PathBuf,
    file: File,
    size: u64,
    rotate_bytes: u64,
    keep: usize,
    sync: SyncPolicy,
    sync_interval: Duration,
    last_sync: Instant,
    dirty: bool,
}

fn open_append(path: &Path) -> std::io::Result<(File, u64)> {
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir)?;
    }
    let mut file = OpenOptions::new().create(true).append(true).read(true).open(path)?;
    let size = file.metadata()?.len();
    let whole = whole_lines_end(&mut file, size)?;
    if whole < size {
        log::warn!(
            "{}: cutting off a partial last line of {} bytes (a write cut by a crash)",
            path.display(),
            size - whole
        );
        file.set_len(whole)?;
    }
    Ok((file, whole))
}

/// The length of the file's whole lines: just after its last newline.
fn whole_lines_end(file: &mut File, size: u64) -> std::io::Result<u64> {
    const CHUNK: u64 = 64 * 1024;
    let mut end = size;
    let mut buf = vec![0u8; CHUNK as usize];
    while end > 0 {
        let start = end.saturating_sub(CHUNK);
        let chunk = &mut buf[..(end - start) as usize];
        file.seek(SeekFrom::Start(start))?;
        file.read_exact(chunk)?;
        if let Some(i) = chunk.iter().rposition(|&b| b == b'\n') {
            return Ok(start + i as u64 + 1);
        }
        end = start;
    }
    Ok(0)
}

impl JsonlLog {
    pub fn open(cfg: &LogConfig) -> std::io::Result<Self> {
        let (file, size) = open_append(&cfg.path)?;
        Ok(Self {
            path: cfg.path.clone(),
            file,
            size,
            rotate_bytes: (cfg.rotate_mb * 1024.0 * 1024.0) as u64,
            keep: cfg.keep,
            sync: cfg.sync,
            sync_interval: Duration::from_secs_f64(cfg.sync_interval_s),
            last_sync: Instant::now(),
            dirty: false,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Appends one record; `line` must not contain a newline.
    pub fn append(&mut self, line: &[u8]) -> std::io::Result<()> {
        debug_assert!(!line.contains(&b'\n'));
        let mut buf = Vec::with_capacity(line.len() + 1);
        buf.extend_from_slice(line);
        buf.push(b'\n');
        if self.size > 0 && self.size + buf.len() as u64 > self.rotate_bytes {
            self.rotate()?;
        }
        if let Err(e) = self.file.write_all(&buf) {
            // Part of the line may be in the file: cut it off, so the next attempt (or
            // the next record) starts on a line of its own. The file is opened for
            // appending, so every write lands at the new end.
            if let Err(cut) = self.file.set_len(self.size) {
                log::error!("{}: cannot cut a partial record off: {cut}", self.path.display());
            }
            return Err(e);
        }
        self.size += buf.len() as u64;
        self.dirty = true;
        match self.sync {
            SyncPolicy::Always => self.sync_now()?,
            SyncPolicy::Interval if self.last_sync.elapsed() >= self.sync_interval => self.sync_now()?,
            _ => {}
        }
        Ok(())
    }

    /// Forces written records to stable storage (always done at rotation and close).
    pub fn sync_now(&mut self) -> std::io::Result<()> {
        if self.dirty {
            self.file.sync_data()?;
            self.dirty = false;
        }
        self.last_sync = Instant::now();
        Ok(())
    }

    fn rotated(&self, n: usize) -> PathBuf {
        let mut s = self.path.clone().into_os_string();
        s.push(format!(".{n}"));
        PathBuf::from(s)
    }

    fn rotate(&mut self) -> std::io::Result<()> {
        self.sync_now()?;
        std::fs::remove_file(self.rotated(self.keep)).ok();
        for n in (1..self.keep).rev() {
            let from = self.rotated(n);
            if from.exists() {
                std::fs::rename(&from, self.rotated(n + 1))?;
            }
        }
        std::fs::rename(&self.path, self.rotated(1))?;
        let (file, size) = open_append(&self.path)?;
        self.file = file;
        self.size = size;
        Ok(())
    }
}

impl Drop for JsonlLog {
    fn drop(&mut self) {
        if let Err(e) = self.sync_now() {
            log::error!("{}: final sync failed: {e}", self.path.display());
        }
    }
}

/// The claim tokens of the records in the log and its newest rotated file: the files a
/// folder source claimed whose records are on disk. (A record is written, synced and its
/// file disposed of before the next record, so a record whose file is still claimed is
/// among the newest.)
pub fn claims_in(path: &Path) -> std::io::Result<HashSet<String>> {
    let mut rotated = path.as_os_str().to_owned();
    rotated.push(".1");
    let mut tokens = HashSet::new();
    for p in [PathBuf::from(rotated), path.to_path_buf()] {
        let text = match std::fs::read(&p) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => continue,
            Err(e) => return Err(e),
        };
        for line in text.split(|&b| b == b'\n').filter(|l| l.windows(8).any(|w| w == b"\"claim\":")) {
            if let Ok(serde_json::Value::Object(rec)) = serde_json::from_slice(line) {
                if let Some(serde_json::Value::String(t)) = rec.get("claim") {
                    tokens.insert(t.clone());
                }
            }
        }
    }
    Ok(tokens)
}

/// Reads the records of a log, skipping a partial or unparsable line, as a reader should.
pub fn read_records(path: &Path) -> std::io::Result<Vec<serde_json::Value>> {
    let text = std::fs::read_to_string(path)?;
    Ok(text.lines().filter_map(|l| serde_json::from_str(l).ok()).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg(dir: &Path, rotate_mb: f64, keep: usize) -> LogConfig {
        LogConfig {
            path: dir.join("log.jsonl"),
            records: super::super::config::RecordPolicy::All,
            patches: super::super::config::PatchPolicy::None,
            rotate_mb,
            keep,
            sync: SyncPolicy::Always,
            sync_interval_s: 1.0,
            health_interval_s: 60.0,
            backlog_mb: 1.0,
        }
    }

    #[test]
    fn rotates_by_size_and_keeps_n_files() {
        let dir = tempfile::tempdir().unwrap();
        let c = cfg(dir.path(), 200.0 / (1024.0 * 1024.0), 2);
        let mut log = JsonlLog::open(&c).unwrap();
        for i in 0..40 {
            log.append(format!("{{\"n\":{i},\"pad\":\"0123456789\"}}").as_bytes()).unwrap();
        }
        drop(log);
        let sizes: Vec<u64> = ["log.jsonl", "log.jsonl.1", "log.jsonl.2"]
            .iter()
            .map(|f| std::fs::metadata(dir.path().join(f)).unwrap().len())
            .collect();
        assert!(sizes.iter().all(|&s| s <= 200), "{sizes:?}");
        assert!(!dir.path().join("log.jsonl.3").exists());
        // The newest records are in the live file, in order, every line whole.
        let live = read_records(&dir.path().join("log.jsonl")).unwrap();
        assert_eq!(live.last().unwrap()["n"], 39);
        let text = std::fs::read_to_string(dir.path().join("log.jsonl.1")).unwrap();
        assert!(text.ends_with('\n') && text.lines().all(|l| serde_json::from_str::<serde_json::Value>(l).is_ok()));
    }

    #[test]
    fn a_partial_last_line_is_cut_off_on_open() {
        let dir = tempfile::tempdir().unwrap();
        let c = cfg(dir.path(), 1.0, 2);
        std::fs::write(&c.path, b"{\"n\":1}\n{\"n\":2,\"cut").unwrap();
        let mut log = JsonlLog::open(&c).unwrap();
        log.append(b"{\"n\":3}").unwrap();
        drop(log);
        assert_eq!(std::fs::read_to_string(&c.path).unwrap(), "{\"n\":1}\n{\"n\":3}\n");
        // A file that is one partial line, and one longer than a read chunk.
        std::fs::write(&c.path, b"{\"n\":").unwrap();
        drop(JsonlLog::open(&c).unwrap());
        assert_eq!(std::fs::read(&c.path).unwrap(), b"");
        let long = format!("{{\"pad\":\"{}\"}}\n{{\"cut", "x".repeat(200_000));
        std::fs::write(&c.path, &long).unwrap();
        drop(JsonlLog::open(&c).unwrap());
        assert_eq!(std::fs::read(&c.path).unwrap().len(), 200_011);
    }

    #[test]
    fn claims_are_read_from_the_log_and_its_newest_rotation() {
        let dir = tempfile::tempdir().unwrap();
        let c = cfg(dir.path(), 1.0, 2);
        std::fs::write(dir.path().join("log.jsonl.1"), b"{\"claim\":\"a-1\"}\n{\"n\":1}\n").unwrap();
        std::fs::write(&c.path, b"{\"claim\":\"a-2\",\"n\":2}\n{\"claim\":\"a-3\",\"cu").unwrap();
        let got = claims_in(&c.path).unwrap();
        assert_eq!(got, ["a-1", "a-2"].map(String::from).into_iter().collect());
    }
}
