//! A list of files or glob patterns replayed in order, at a fixed rate or as fast as
//! analysis takes them.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use super::decode::decode_file;
use super::feed::{Feed, FrameError};
use super::SourceError;

pub struct FilesSource {
    pub files: Vec<PathBuf>,
    pub rate_fps: f64,
    pub repeat: bool,
    pub max_pixels: u64,
}

/// Expands the patterns (each sorted by name), refusing patterns that match nothing.
pub fn expand(patterns: &[String]) -> Result<Vec<PathBuf>, SourceError> {
    let mut files = Vec::new();
    for p in patterns {
        let mut matched: Vec<PathBuf> = glob::glob(p)
            .map_err(|e| SourceError::Pattern { pattern: p.clone(), message: e.to_string() })?
            .filter_map(Result::ok)
            .filter(|f| f.is_file())
            .collect();
        if matched.is_empty() {
            return Err(SourceError::NoMatch(p.clone()));
        }
        matched.sort();
        files.extend(matched);
    }
    Ok(files)
}

impl FilesSource {
    pub fn run(self, feed: Feed) {
        let period = (self.rate_fps > 0.0).then(|| Duration::from_secs_f64(1.0 / self.rate_fps));
        let mut next = Instant::now();
        let mut seq = 0u64;
        loop {
            for path in &self.files {
                if let Some(p) = period {
                    if !feed.sleep(next.saturating_duration_since(Instant::now())) {
                        return;
                    }
                    next += p;
                }
                let item = decode_file(path, seq, self.max_pixels)
                    .map_err(|e| FrameError { origin: path.display().to_string(), message: e.to_string() });
                seq += 1;
                if !feed.send(item) {
                    return;
                }
            }
            if !self.repeat {
                return;
            }
        }
    }
}
