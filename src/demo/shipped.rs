//! The trained demo bundle that ships inside the program: made by `saccade train` on
//! generated frames of the demo scenario (README, "The demo bundle", says how), stored in
//! `src/demo/bundle/` and written out by `saccade demo`.

use std::path::Path;

const FILES: [(&str, &[u8]); 9] = [
    ("bundle.toml", include_bytes!("bundle/bundle.toml")),
    ("attention.onnx", include_bytes!("bundle/attention.onnx")),
    ("features.onnx", include_bytes!("bundle/features.onnx")),
    ("head.onnx", include_bytes!("bundle/head.onnx")),
    ("baseline.onnx", include_bytes!("bundle/baseline.onnx")),
    ("training.jsonl", include_bytes!("bundle/training.jsonl")),
    ("training.png", include_bytes!("bundle/training.png")),
    ("held-out.json", include_bytes!("bundle/held-out.json")),
    ("calibration.json", include_bytes!("bundle/calibration.json")),
];

/// Where the bundle lives in the source tree, for tests and tools that read it in place.
pub fn source_dir() -> &'static Path {
    Path::new(concat!(env!("CARGO_MANIFEST_DIR"), "/src/demo/bundle"))
}

/// Writes the shipped bundle into `dir` (created if missing).
pub fn write_bundle(dir: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    for (name, bytes) in FILES {
        std::fs::write(dir.join(name), bytes)?;
    }
    Ok(())
}
