//! Folders the daemon writes into: checked without writing anything (a config check must
//! leave the disk as it was), and created as an explicit step of `saccade run`.

use std::path::{Path, PathBuf};

use rustix::fs::Access;

/// Why a folder cannot be written into, now or once created.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum FolderProblem {
    #[error("{} is not a folder", .0.display())]
    NotAFolder(PathBuf),
    #[error("{} is a folder, expected a file name", .0.display())]
    IsAFolder(PathBuf),
    #[error("{} is not writable by this user", .0.display())]
    NotWritable(PathBuf),
    #[error("{} cannot be created: {} is not a folder", dir.display(), blocker.display())]
    Blocked { dir: PathBuf, blocker: PathBuf },
    #[error("{} cannot be created: {} is not writable by this user", dir.display(), parent.display())]
    ParentNotWritable { dir: PathBuf, parent: PathBuf },
}

/// Whether `dir` exists as a writable folder, or could be created: its nearest existing
/// ancestor is a folder this user may write into. Reads only (access(2)).
pub fn check_writable(dir: &Path) -> Result<(), FolderProblem> {
    let writable = |p: &Path| rustix::fs::access(p, Access::WRITE_OK | Access::EXEC_OK).is_ok();
    if dir.exists() {
        if !dir.is_dir() {
            return Err(FolderProblem::NotAFolder(dir.to_path_buf()));
        }
        if !writable(dir) {
            return Err(FolderProblem::NotWritable(dir.to_path_buf()));
        }
        return Ok(());
    }
    let mut ancestor = dir.parent();
    while let Some(a) = ancestor {
        let a = if a.as_os_str().is_empty() { Path::new(".") } else { a };
        if a.exists() {
            if !a.is_dir() {
                return Err(FolderProblem::Blocked { dir: dir.to_path_buf(), blocker: a.to_path_buf() });
            }
            if !writable(a) {
                return Err(FolderProblem::ParentNotWritable { dir: dir.to_path_buf(), parent: a.to_path_buf() });
            }
            return Ok(());
        }
        ancestor = a.parent();
    }
    Ok(())
}

/// Creates `dir` and its missing parents.
pub fn create(dir: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn checks_without_creating() {
        let tmp = tempfile::tempdir().unwrap();
        let deep = tmp.path().join("a/b/c");
        assert_eq!(check_writable(&deep), Ok(()));
        assert!(!tmp.path().join("a").exists(), "checking created a folder");
        std::fs::write(tmp.path().join("file"), b"x").unwrap();
        let under_file = tmp.path().join("file/sub");
        assert!(matches!(check_writable(&under_file), Err(FolderProblem::Blocked { .. })));
        assert!(matches!(check_writable(&tmp.path().join("file")), Err(FolderProblem::NotAFolder(_))));
        create(&deep).unwrap();
        assert!(deep.is_dir());
        assert_eq!(check_writable(&deep), Ok(()));
    }
}
