//! A watched folder: another program drops frames in; a file is taken only once it is
//! complete (its size and modification time have held still for `stable_ms`, and its
//! name does not mark it as being written: hidden, `.tmp` or `.part`).
//!
//! The folder is the queue: a file is taken only when analysis is ready for the next
//! frame, so none is dropped. `overload` chooses which waiting file goes next: the
//! newest (`drop_oldest`, for the lowest age) or the oldest (`wait`, arrival order).
//! Taking a file claims it (see [`super::claim`]); it leaves the inbox for good only once
//! its record is on disk.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use super::claim::{Claim, Disposal, Kept, KeptFile, Tokens, CLAIMED_DIR};
use super::config::{AfterUse, Overload};
use super::decode::decode_bytes;
use super::feed::{Feed, FrameError};
use crate::engine::{isolate, Frame};

pub struct FolderSource {
    dir: PathBuf,
    disposal: Disposal,
    stable: Duration,
    poll: Duration,
    max_pixels: u64,
    newest_first: bool,
    /// Claims of an earlier run whose records are not in the log: analysed first.
    leftovers: Vec<Claim>,
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

/// The folder source's settings, as the `[source]` table gives them.
pub struct FolderSettings<'a> {
    pub dir: &'a Path,
    pub after: AfterUse,
    pub move_to: Option<&'a Path>,
    pub stable: Duration,
    pub poll: Duration,
    pub overload: Overload,
    pub max_pixels: u64,
}

impl FolderSource {
    /// Makes the claimed folder and resolves what an earlier run left in it: a file whose
    /// record is in the log (`recorded` holds the log's claim tokens) is disposed of now,
    /// the others wait to be analysed again.
    pub fn open(s: FolderSettings, recorded: &HashSet<String>) -> std::io::Result<Self> {
        std::fs::create_dir_all(s.dir.join(CLAIMED_DIR))?;
        let disposal = match (s.after, s.move_to) {
            (AfterUse::Delete, _) => Disposal::Delete,
            (AfterUse::Move, Some(dir)) => Disposal::MoveTo(dir.to_path_buf()),
            _ => Disposal::Keep(Arc::new(Kept::open(s.dir)?)),
        };
        let mut leftovers = Vec::new();
        for claim in Claim::leftovers(s.dir, &disposal)? {
            if recorded.contains(&claim.token) {
                let origin = claim.origin();
                match claim.dispose() {
                    Ok(()) => log::info!("{origin}: recorded before the last stop; now disposed of"),
                    Err(e) => log::warn!("{origin}: recorded, but cannot dispose of it: {e}"),
                }
            } else {
                log::info!("{}: claimed before the last stop but not recorded; analysing it again", claim.origin());
                leftovers.push(claim);
            }
        }
        Ok(Self {
            dir: s.dir.to_path_buf(),
            disposal,
            stable: s.stable,
            poll: s.poll,
            max_pixels: s.max_pixels,
            newest_first: s.overload == Overload::DropOldest,
            leftovers,
        })
    }

    pub fn run(mut self, feed: Feed) {
        let mut seq = 0u64;
        for claim in std::mem::take(&mut self.leftovers) {
            if !feed.send_claimed(self.read(&claim, seq), claim) {
                return;
            }
            seq += 1;
        }
        let mut tokens = Tokens::new();
        let mut watching: HashMap<String, Seen> = HashMap::new();
        // Files that could not be claimed (no permission): not tried again unless changed.
        let mut refused: HashSet<KeptFile> = HashSet::new();
        loop {
            let Some(name) = self.next_ready(&mut watching, &refused) else {
                if !feed.sleep(self.poll) {
                    return;
                }
                continue;
            };
            watching.remove(&name);
            let claim = match Claim::take(&self.dir, &name, &mut tokens, &self.disposal) {
                Ok(Some(c)) => c,
                Ok(None) => continue,
                Err(e) => {
                    log::warn!(
                        "{}: cannot claim the file (rename into {CLAIMED_DIR}): {e}",
                        self.dir.join(&name).display()
                    );
                    if let Ok(meta) = std::fs::metadata(self.dir.join(&name)) {
                        refused.insert(KeptFile::of(&name, &meta));
                    }
                    continue;
                }
            };
            if !feed.send_claimed(self.read(&claim, seq), claim) {
                return;
            }
            seq += 1;
        }
    }

    /// Reads and decodes a claimed file; a panic in a decoder is this file's error.
    fn read(&self, claim: &Claim, seq: u64) -> Result<Frame, FrameError> {
        let origin = claim.origin();
        let bytes = std::fs::read(claim.path()).map_err(|e| FrameError {
            origin: origin.clone(),
            message: format!("{origin}: cannot read the file: {e}"),
        })?;
        match isolate::run(|| decode_bytes(&bytes, origin.clone(), seq, self.max_pixels)) {
            Ok(decoded) => decoded.map_err(|e| FrameError { origin: origin.clone(), message: e.to_string() }),
            Err(panic) => Err(FrameError {
                origin: origin.clone(),
                message: format!("{origin}: internal error while decoding: {panic}"),
            }),
        }
    }

    /// Lists the inbox, updates what is watched, and names the file to take next.
    fn next_ready(&self, watching: &mut HashMap<String, Seen>, refused: &HashSet<KeptFile>) -> Option<String> {
        let entries = match std::fs::read_dir(&self.dir) {
            Ok(e) => e,
            Err(e) => {
                log::warn!("{}: cannot list the folder: {e}", self.dir.display());
                return None;
            }
        };
        let now = Instant::now();
        let mut present = HashSet::new();
        let mut ready: Vec<(SystemTime, String)> = Vec::new();
        for entry in entries.flatten() {
            let Some(name) = entry.file_name().to_str().map(str::to_string) else { continue };
            let Ok(meta) = entry.metadata() else { continue };
            if !meta.is_file() || in_progress(&name) {
                continue;
            }
            let file = KeptFile::of(&name, &meta);
            let kept = matches!(&self.disposal, Disposal::Keep(k) if k.contains(&file));
            if kept || refused.contains(&file) {
                continue;
            }
            present.insert(name.clone());
            let modified = meta.modified().unwrap_or(SystemTime::UNIX_EPOCH);
            let seen = watching.entry(name.clone()).or_insert(Seen { len: meta.len(), modified, since: now });
            if seen.len != meta.len() || seen.modified != modified {
                *seen = Seen { len: meta.len(), modified, since: now };
            } else if now.duration_since(seen.since) >= self.stable {
                ready.push((modified, name));
            }
        }
        watching.retain(|name, _| present.contains(name));
        if self.newest_first { ready.into_iter().max() } else { ready.into_iter().min() }.map(|(_, name)| name)
    }
}
