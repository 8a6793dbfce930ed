//! A watched folder: another program drops frames in; a file is taken only once it is
//! complete (its size and modification time have held still for `stable_ms`, and its
//! name does not mark it as being written: hidden, `.tmp` or `.part`).

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

use super::config::AfterUse;
use super::decode::decode_bytes;
use super::feed::{Feed, FrameError};

pub struct FolderSource {
    pub dir: PathBuf,
    pub after: AfterUse,
    pub move_to: Option<PathBuf>,
    pub stable: Duration,
    pub poll: Duration,
    pub max_pixels: u64,
}

/// What a file looked like at the last poll, and since when.
struct Seen {
    len: u64,
    modified: SystemTime,
    since: Instant,
}

fn in_progress(name: &str) -> bool {
    name.starts_with('.') || name.ends_with(".tmp") || name.ends_with(".part")
}

impl FolderSource {
    pub fn run(self, feed: Feed) {
        let mut watching: HashMap<PathBuf, Seen> = HashMap::new();
        // Files taken and kept in place, so that they are not taken again.
        let mut taken: HashSet<(PathBuf, u64, SystemTime)> = HashSet::new();
        let mut seq = 0u64;
        loop {
            let mut ready = Vec::new();
            match std::fs::read_dir(&self.dir) {
                Err(e) => log::warn!("{}: cannot list the folder: {e}", self.dir.display()),
                Ok(entries) => {
                    let mut present = HashSet::new();
                    for entry in entries.flatten() {
                        let path = entry.path();
                        let Some(name) = path.file_name().and_then(|n| n.to_str()) else { continue };
                        let Ok(meta) = entry.metadata() else { continue };
                        if !meta.is_file() || in_progress(name) {
                            continue;
                        }
                        let modified = meta.modified().unwrap_or(SystemTime::UNIX_EPOCH);
                        let key = (path.clone(), meta.len(), modified);
                        present.insert(key.clone());
                        if taken.contains(&key) {
                            continue;
                        }
                        let now = Instant::now();
                        let seen =
                            watching.entry(path.clone()).or_insert(Seen { len: meta.len(), modified, since: now });
                        if seen.len != meta.len() || seen.modified != modified {
                            *seen = Seen { len: meta.len(), modified, since: now };
                        } else if now.duration_since(seen.since) >= self.stable {
                            ready.push((modified, path));
                        }
                    }
                    taken.retain(|k| present.contains(k));
                    watching.retain(|p, _| present.iter().any(|k| &k.0 == p));
                }
            }
            ready.sort();
            for (_, path) in ready {
                watching.remove(&path);
                let origin = path.display().to_string();
                let item = match std::fs::read(&path) {
                    Ok(bytes) => decode_bytes(&bytes, origin.clone(), seq, self.max_pixels)
                        .map_err(|e| FrameError { origin, message: e.to_string() }),
                    Err(e) => Err(FrameError { origin, message: format!("cannot read the file: {e}") }),
                };
                seq += 1;
                if let Some(key) = self.dispose(&path) {
                    taken.insert(key);
                }
                if !feed.send(item) {
                    return;
                }
            }
            if !feed.sleep(self.poll) {
                return;
            }
        }
    }

    /// Applies the after-use policy; returns the key to remember when the file stays.
    fn dispose(&self, path: &Path) -> Option<(PathBuf, u64, SystemTime)> {
        let result = match (self.after, &self.move_to) {
            (AfterUse::Delete, _) => std::fs::remove_file(path),
            (AfterUse::Move, Some(dir)) => {
                let dest = dir.join(path.file_name().expect("a listed file has a name"));
                std::fs::rename(path, &dest)
                    .or_else(|_| std::fs::copy(path, &dest).and_then(|_| std::fs::remove_file(path)))
            }
            _ => {
                let meta = std::fs::metadata(path).ok()?;
                return Some((path.to_path_buf(), meta.len(), meta.modified().unwrap_or(SystemTime::UNIX_EPOCH)));
            }
        };
        if let Err(e) = result {
            log::warn!("{}: cannot {:?} the used file: {e}; keeping it", path.display(), self.after);
            let meta = std::fs::metadata(path).ok()?;
            return Some((path.to_path_buf(), meta.len(), meta.modified().unwrap_or(SystemTime::UNIX_EPOCH)));
        }
        None
    }
}
