//! `saccade scene`: the same seed writes the same bytes, and its labels file reads back.

use std::process::Command;

use saccade::labels::read_labels;

fn scene(out: &std::path::Path, seed: &str) {
    let status = Command::new(env!("CARGO_BIN_EXE_saccade"))
        .args(["scene", "--out", out.to_str().unwrap(), "--count", "5", "--seed", seed, "--size", "640x480"])
        .status()
        .unwrap();
    assert!(status.success());
}

#[test]
fn same_seed_same_files_and_labels_that_read_back() {
    let d = tempfile::tempdir().unwrap();
    let (a, b, c) = (d.path().join("a"), d.path().join("b"), d.path().join("c"));
    scene(&a, "77");
    scene(&b, "77");
    scene(&c, "78");
    let mut names: Vec<_> = std::fs::read_dir(&a).unwrap().map(|e| e.unwrap().file_name()).collect();
    names.sort();
    assert_eq!(names.len(), 6, "5 frames and labels.jsonl: {names:?}");
    for n in &names {
        assert_eq!(
            std::fs::read(a.join(n)).unwrap(),
            std::fs::read(b.join(n)).unwrap(),
            "{n:?} differs between two runs with one seed"
        );
    }
    assert_ne!(std::fs::read(a.join("sheet-000000.jpg")).unwrap(), std::fs::read(c.join("sheet-000000.jpg")).unwrap());
    let items = read_labels(&a.join("labels.jsonl")).unwrap();
    assert_eq!(items.len(), 5);
    for it in &items {
        assert!(it.frame.is_file(), "{} is labelled but missing", it.frame.display());
        assert!(it.classes.iter().all(|c| saccade::demo::scene::CLASSES.contains(&c.as_str())), "{:?}", it.classes);
    }
}
