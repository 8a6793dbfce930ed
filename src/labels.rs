//! Frame-level labels: which classes each frame shows, without boxes.
//!
//! The file is JSON Lines, one object per frame:
//! `{"frame": "sheet-000001.jpg", "classes": ["pinhole", "stain"]}`. `frame` is a path
//! relative to the labels file's folder (or absolute); `classes` lists the classes present
//! (empty for a clean frame). An optional `defects` list gives where marks are, each
//! `{"kind": CLASS, "x": X, "y": Y}` in frame pixels; training never reads it, but
//! `saccade sweep` uses it to say whether attention looked at the marks. Other keys are
//! allowed and ignored. Blank lines are skipped.

use std::path::{Path, PathBuf};

use serde::Deserialize;

#[derive(Debug, thiserror::Error)]
#[error("{path}{}: {message}", line.map(|n| format!(":{n}")).unwrap_or_default())]
pub struct LabelError {
    pub path: PathBuf,
    pub line: Option<usize>,
    pub message: String,
}

/// One labelled frame.
#[derive(Clone, Debug)]
pub struct Labelled {
    /// The frame file, resolved against the labels file's folder.
    pub frame: PathBuf,
    /// The frame as written in the labels file.
    pub name: String,
    pub classes: Vec<String>,
    /// Line of the labels file (1-based), for error messages.
    pub line: usize,
    /// Known positions of marks (optional; for diagnostics only).
    pub marks: Vec<MarkAt>,
}

/// Where a mark of a class is, in frame pixels.
#[derive(Clone, Debug, PartialEq, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct MarkAt {
    #[serde(rename = "kind")]
    pub class: String,
    pub x: f64,
    pub y: f64,
    /// Radius in pixels of the circle that holds the mark, when known.
    #[serde(default)]
    pub extent: Option<f64>,
}

#[derive(Deserialize)]
struct Line {
    frame: String,
    classes: Vec<String>,
    #[serde(default)]
    defects: Vec<MarkAt>,
}

pub fn read_labels(path: &Path) -> Result<Vec<Labelled>, LabelError> {
    let err = |line: Option<usize>, message: String| LabelError { path: path.to_path_buf(), line, message };
    let text = std::fs::read_to_string(path).map_err(|e| err(None, format!("cannot read the labels file: {e}")))?;
    let base = path.parent().unwrap_or(Path::new("."));
    let mut out: Vec<Labelled> = Vec::new();
    for (n, raw) in text.lines().enumerate() {
        let line = n + 1;
        if raw.trim().is_empty() {
            continue;
        }
        let l: Line = serde_json::from_str(raw).map_err(|e| {
            err(Some(line), format!("expected {{\"frame\": \"FILE\", \"classes\": [\"NAME\", ...]}}: {e}"))
        })?;
        if l.frame.is_empty() {
            return Err(err(Some(line), "frame: expected a file name, found an empty string".into()));
        }
        if let Some(prev) = out.iter().find(|p| p.name == l.frame) {
            return Err(err(Some(line), format!("frame {:?} is already labelled on line {}", l.frame, prev.line)));
        }
        let mut classes = l.classes;
        classes.sort();
        classes.dedup();
        if let Some(m) = l.defects.iter().find(|m| !classes.contains(&m.class)) {
            return Err(err(
                Some(line),
                format!("defects: a {:?} mark, but \"classes\" does not list {:?}", m.class, m.class),
            ));
        }
        if let Some(m) = l.defects.iter().find(|m| !(m.x.is_finite() && m.y.is_finite())) {
            return Err(err(
                Some(line),
                format!("defects: position ({}, {}) is not a pair of finite numbers", m.x, m.y),
            ));
        }
        out.push(Labelled { frame: base.join(&l.frame), name: l.frame, classes, line, marks: l.defects });
    }
    if out.is_empty() {
        return Err(err(None, "the labels file lists no frames".into()));
    }
    Ok(out)
}

/// Resolves every frame name against `dir` instead of the labels file's folder.
pub fn rebase(items: &mut [Labelled], dir: &Path) {
    for it in items {
        it.frame = dir.join(&it.name);
    }
}

/// Presence matrix (frames × `classes`); a label naming a class outside `classes` is an
/// error that names its line.
pub fn class_matrix(items: &[Labelled], classes: &[String], path: &Path) -> Result<Vec<Vec<bool>>, LabelError> {
    items
        .iter()
        .map(|it| {
            if let Some(bad) = it.classes.iter().find(|c| !classes.contains(c)) {
                return Err(LabelError {
                    path: path.to_path_buf(),
                    line: Some(it.line),
                    message: format!("class {bad:?} is not one of the model's classes [{}]", classes.join(", ")),
                });
            }
            Ok(classes.iter().map(|c| it.classes.contains(c)).collect())
        })
        .collect()
}

/// Every class named anywhere in the labels, sorted.
pub fn all_classes(items: &[Labelled]) -> Vec<String> {
    let mut v: Vec<String> = items.iter().flat_map(|i| i.classes.iter().cloned()).collect();
    v.sort();
    v.dedup();
    v
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(text: &str) -> (tempfile::TempDir, PathBuf) {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("labels.jsonl");
        std::fs::write(&p, text).unwrap();
        (d, p)
    }

    #[test]
    fn reads_resolves_and_builds_the_matrix() {
        let (d, p) = write("{\"frame\":\"a.jpg\",\"classes\":[\"stain\",\"pinhole\",\"stain\"],\"x\":1}\n\n{\"frame\":\"b.jpg\",\"classes\":[]}\n");
        let items = read_labels(&p).unwrap();
        assert_eq!(items[0].frame, d.path().join("a.jpg"));
        assert_eq!(items[0].classes, ["pinhole", "stain"]);
        assert_eq!(items[1].line, 3);
        let classes = all_classes(&items);
        assert_eq!(class_matrix(&items, &classes, &p).unwrap(), vec![vec![true, true], vec![false, false]]);
        let e = class_matrix(&items, &["stain".to_string()], &p).unwrap_err().to_string();
        assert!(e.ends_with("labels.jsonl:1: class \"pinhole\" is not one of the model's classes [stain]"), "{e}");
    }

    #[test]
    fn bad_lines_name_their_line() {
        let (_d, p) = write("{\"frame\":\"a.jpg\",\"classes\":[]}\n{\"frame\":\"b.jpg\"}\n");
        let e = read_labels(&p).unwrap_err().to_string();
        assert!(e.contains("labels.jsonl:2: expected") && e.contains("classes"), "{e}");
        let (_d, p) = write("{\"frame\":\"a.jpg\",\"classes\":[]}\n{\"frame\":\"a.jpg\",\"classes\":[]}\n");
        let e = read_labels(&p).unwrap_err().to_string();
        assert!(e.contains(":2: frame \"a.jpg\" is already labelled on line 1"), "{e}");
    }
}
