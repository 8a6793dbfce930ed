//! Files of a watched folder are claimed before they are read: renamed into a folder of
//! their own inside the inbox, under a unique token that the file's record carries
//! (`claim`). A claimed file is deleted, moved or put back only once its record is
//! durably in the log, so a crash at any point leaves it either in the inbox or claimed;
//! at start, claimed leftovers whose token is in the log are disposed of and the others
//! analysed again. Nothing is skipped and nothing is recorded twice.

use std::collections::HashSet;
use std::fs::OpenOptions;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::{Arc, Mutex};
use std::time::SystemTime;

use serde::{Deserialize, Serialize};

/// The folder inside the inbox holding files taken but not yet recorded. Hidden, so that
/// producers and the folder scan pass it by.
pub const CLAIMED_DIR: &str = ".saccade-claimed";
/// With `after = "keep"`: the files already recorded, kept in place (JSON Lines).
const KEPT_LIST: &str = "kept.jsonl";

/// What becomes of a file once its record is on disk.
#[derive(Clone, Debug)]
pub enum Disposal {
    Delete,
    MoveTo(PathBuf),
    /// Put back into the inbox and listed as done, so neither this run nor a later one
    /// takes it again.
    Keep(Arc<Kept>),
}

/// A file taken from the inbox.
#[derive(Debug)]
pub struct Claim {
    /// Unique across runs: the claiming run's start (ms, hex) and a counter.
    pub token: String,
    /// The file's name in the inbox.
    pub name: String,
    inbox: PathBuf,
    disposal: Disposal,
}

/// Makes tokens: the run's start time keeps them unique across restarts.
pub(crate) struct Tokens {
    run: u128,
    next: u64,
}

impl Tokens {
    pub(crate) fn new() -> Self {
        let run = SystemTime::now().duration_since(SystemTime::UNIX_EPOCH).unwrap_or_default().as_millis();
        Self { run, next: 0 }
    }

    fn next(&mut self) -> String {
        self.next += 1;
        format!("{:x}-{}", self.run, self.next)
    }
}

/// A claimed file name `TOKEN.NAME` split, when the token has the form `HEX-N`.
fn parse_claimed(file_name: &str) -> Option<(&str, &str)> {
    let (token, name) = file_name.split_once('.')?;
    let (run, n) = token.split_once('-')?;
    let ok = !run.is_empty() && run.chars().all(|c| c.is_ascii_hexdigit()) && !n.is_empty() && n.parse::<u64>().is_ok();
    (ok && !name.is_empty()).then_some((token, name))
}

impl Claim {
    /// Claims `inbox/name` by renaming it into the claimed folder. `Ok(None)` when the file
    /// is gone (its producer took it back).
    pub(crate) fn take(
        inbox: &Path,
        name: &str,
        tokens: &mut Tokens,
        disposal: &Disposal,
    ) -> std::io::Result<Option<Self>> {
        let claim = Self {
            token: tokens.next(),
            name: name.to_string(),
            inbox: inbox.to_path_buf(),
            disposal: disposal.clone(),
        };
        match std::fs::rename(inbox.join(name), claim.path()) {
            Ok(()) => Ok(Some(claim)),
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
            Err(e) => Err(e),
        }
    }

    /// The claimed leftovers of an earlier run, in the order they were claimed.
    pub fn leftovers(inbox: &Path, disposal: &Disposal) -> std::io::Result<Vec<Self>> {
        let mut found = Vec::new();
        for entry in std::fs::read_dir(inbox.join(CLAIMED_DIR))? {
            let entry = entry?;
            let Some(file_name) = entry.file_name().to_str().map(str::to_string) else { continue };
            if let Some((token, name)) = parse_claimed(&file_name) {
                let (run, n) = token.split_once('-').expect("parsed");
                let order = (u128::from_str_radix(run, 16).unwrap_or(0), n.parse::<u64>().unwrap_or(0));
                let claim =
                    Self { token: token.into(), name: name.into(), inbox: inbox.into(), disposal: disposal.clone() };
                found.push((order, claim));
            }
        }
        found.sort_by_key(|(order, _)| *order);
        Ok(found.into_iter().map(|(_, c)| c).collect())
    }

    /// Where the claimed file is now.
    pub fn path(&self) -> PathBuf {
        self.inbox.join(CLAIMED_DIR).join(format!("{}.{}", self.token, self.name))
    }

    /// The file's path in the inbox, as its record names it.
    pub fn origin(&self) -> String {
        self.inbox.join(&self.name).display().to_string()
    }

    /// Deletes, moves or puts back the file; call only once its record is on disk.
    pub fn dispose(self) -> std::io::Result<()> {
        let from = self.path();
        match &self.disposal {
            Disposal::Delete => match std::fs::remove_file(&from) {
                Err(e) if e.kind() != std::io::ErrorKind::NotFound => Err(e),
                _ => Ok(()),
            },
            Disposal::MoveTo(dir) => {
                let dest = dir.join(&self.name);
                // Across file systems a rename fails: copy, then remove (a crash between
                // the two leaves the claim, and the copy is made again).
                std::fs::rename(&from, &dest)
                    .or_else(|_| std::fs::copy(&from, &dest).and_then(|_| std::fs::remove_file(&from)))
            }
            Disposal::Keep(kept) => {
                let meta = std::fs::metadata(&from)?;
                kept.add(KeptFile::of(&self.name, &meta))?;
                // Never over a new file of the same name that arrived meanwhile: then the
                // used one stays claimed (and is put back at the next start).
                let flags = rustix::fs::RenameFlags::NOREPLACE;
                rustix::fs::renameat_with(rustix::fs::CWD, &from, rustix::fs::CWD, self.inbox.join(&self.name), flags)
                    .map_err(std::io::Error::from)
            }
        }
    }
}

/// A kept file as the list records it: the same name, size and modification time mean
/// the same file.
#[derive(Clone, Debug, PartialEq, Eq, Hash, Serialize, Deserialize)]
pub struct KeptFile {
    name: String,
    len: u64,
    modified_ns: u128,
}

impl KeptFile {
    pub fn of(name: &str, meta: &std::fs::Metadata) -> Self {
        let modified = meta.modified().unwrap_or(SystemTime::UNIX_EPOCH);
        let modified_ns = modified.duration_since(SystemTime::UNIX_EPOCH).unwrap_or_default().as_nanos();
        Self { name: name.to_string(), len: meta.len(), modified_ns }
    }
}

/// The files recorded and kept in the inbox, shared by the source thread (which passes
/// them by) and the sinks thread (which adds them once their records are on disk).
#[derive(Debug)]
pub struct Kept {
    path: PathBuf,
    files: Mutex<HashSet<KeptFile>>,
}

impl Kept {
    /// Reads the list, keeping only the files still in the inbox unchanged, and writes it
    /// back so that it does not grow without end.
    pub fn open(inbox: &Path) -> std::io::Result<Self> {
        let path = inbox.join(CLAIMED_DIR).join(KEPT_LIST);
        let text = match std::fs::read_to_string(&path) {
            Ok(t) => t,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => String::new(),
            Err(e) => return Err(e),
        };
        let present = |f: &KeptFile| {
            std::fs::metadata(inbox.join(&f.name)).is_ok_and(|m| m.is_file() && KeptFile::of(&f.name, &m) == *f)
        };
        // A line cut by a crash does not parse and is passed over.
        let files: HashSet<KeptFile> =
            text.lines().filter_map(|l| serde_json::from_str(l).ok()).filter(|f| present(f)).collect();
        let tmp = path.with_extension("jsonl.tmp");
        let mut out = String::new();
        for f in &files {
            out += &serde_json::to_string(f).expect("serialises");
            out.push('\n');
        }
        std::fs::write(&tmp, out)?;
        std::fs::rename(&tmp, &path)?;
        Ok(Self { path, files: Mutex::new(files) })
    }

    fn files(&self) -> std::sync::MutexGuard<'_, HashSet<KeptFile>> {
        self.files.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    pub fn contains(&self, f: &KeptFile) -> bool {
        self.files().contains(f)
    }

    /// Lists a file as done, durably, before it goes back into the inbox.
    fn add(&self, f: KeptFile) -> std::io::Result<()> {
        let mut files = self.files();
        let mut list = OpenOptions::new().create(true).append(true).open(&self.path)?;
        list.write_all((serde_json::to_string(&f).expect("serialises") + "\n").as_bytes())?;
        list.sync_data()?;
        files.insert(f);
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn claimed_names_parse_only_with_a_token() {
        assert_eq!(parse_claimed("18c2a-7.f001.jpg"), Some(("18c2a-7", "f001.jpg")));
        assert_eq!(parse_claimed("kept.jsonl"), None);
        assert_eq!(parse_claimed("18c2a-x.f.jpg"), None);
        assert_eq!(parse_claimed("18c2a-7."), None);
    }

    #[test]
    fn a_claim_is_disposed_of_as_configured_and_leftovers_come_back_in_order() {
        let dir = tempfile::tempdir().unwrap();
        let (inbox, done) = (dir.path().join("inbox"), dir.path().join("done"));
        std::fs::create_dir_all(inbox.join(CLAIMED_DIR)).unwrap();
        std::fs::create_dir_all(&done).unwrap();
        for n in ["a.jpg", "b.jpg", "c.jpg"] {
            std::fs::write(inbox.join(n), n).unwrap();
        }
        let kept = Arc::new(Kept::open(&inbox).unwrap());
        let mut tokens = Tokens::new();
        let a = Claim::take(&inbox, "a.jpg", &mut tokens, &Disposal::Delete).unwrap().unwrap();
        let b = Claim::take(&inbox, "b.jpg", &mut tokens, &Disposal::MoveTo(done.clone())).unwrap().unwrap();
        let c = Claim::take(&inbox, "c.jpg", &mut tokens, &Disposal::Keep(kept.clone())).unwrap().unwrap();
        assert!(Claim::take(&inbox, "gone.jpg", &mut tokens, &Disposal::Delete).unwrap().is_none());
        assert!(!inbox.join("a.jpg").exists() && a.path().is_file());
        let left: Vec<String> =
            Claim::leftovers(&inbox, &Disposal::Delete).unwrap().into_iter().map(|c| c.name).collect();
        assert_eq!(left, ["a.jpg", "b.jpg", "c.jpg"]);
        a.dispose().unwrap();
        b.dispose().unwrap();
        c.dispose().unwrap();
        assert_eq!(std::fs::read(done.join("b.jpg")).unwrap(), b"b.jpg");
        assert!(!inbox.join("a.jpg").exists() && !inbox.join("b.jpg").exists());
        let meta = std::fs::metadata(inbox.join("c.jpg")).unwrap();
        assert!(kept.contains(&KeptFile::of("c.jpg", &meta)));
        // The list survives a restart, and forgets files that left the inbox.
        assert!(Kept::open(&inbox).unwrap().contains(&KeptFile::of("c.jpg", &meta)));
        std::fs::remove_file(inbox.join("c.jpg")).unwrap();
        assert!(Kept::open(&inbox).unwrap().files().is_empty());
        assert!(Claim::leftovers(&inbox, &Disposal::Delete).unwrap().is_empty());
    }
}
