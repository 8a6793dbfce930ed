//! Helpers shared by the integration tests.
#![allow(dead_code)]

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};

use saccade::demo::designed::{self, DesignedParams};

/// The Python interpreter with the reference packages (tests/reference/requirements.txt):
/// `$SACCADE_PYTHON`, else the repository's `.venv` that `tests/run` creates.
pub fn python() -> PathBuf {
    if let Some(p) = std::env::var_os("SACCADE_PYTHON") {
        return PathBuf::from(p);
    }
    let venv = Path::new(env!("CARGO_MANIFEST_DIR")).join(".venv/bin/python");
    assert!(venv.is_file(), "reference checks need Python with tests/reference/requirements.txt: run `bash tests/run` once (it creates .venv) or set SACCADE_PYTHON");
    venv
}

/// Runs `tests/reference/<script>` with `args`, feeding `input` on stdin; returns stdout.
pub fn run_reference(script: &str, args: &[&str], input: &str) -> String {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference").join(script);
    let mut child = Command::new(python())
        .arg(&path)
        .args(args)
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("start python");
    child.stdin.take().unwrap().write_all(input.as_bytes()).unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(out.status.success(), "{script} failed: {}", String::from_utf8_lossy(&out.stderr));
    String::from_utf8(out.stdout).unwrap()
}

/// Writes the designed bundle into a fresh temporary folder.
pub fn designed_bundle(params: &DesignedParams) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    designed::write_bundle(dir.path(), params).unwrap();
    dir
}
