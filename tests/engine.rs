//! The engine end to end on the designed bundle: loading, validation errors, the budget
//! loop, replay, masks and detection of placed flaws.

mod common;

use std::path::Path;
use std::sync::Arc;

use image::RgbImage;
use saccade::demo::designed::{self, DesignedParams};
use saccade::demo::scene;
use saccade::engine::{
    Bundle, BundleError, Engine, EngineError, EstimatorKind, Frame, Mask, Outcome, Rect, Report, Settings, StopReason,
};
use saccade::onnx::writer::{Dim, GraphWriter};

fn load(dir: &Path) -> Result<Bundle, BundleError> {
    Bundle::load(dir, &Settings::default().batch_sizes())
}

fn engine(params: &DesignedParams) -> (tempfile::TempDir, Engine) {
    let dir = common::designed_bundle(params);
    let e = Engine::new(Arc::new(load(dir.path()).unwrap()), Settings::default()).unwrap();
    (dir, e)
}

/// Analyses `frame` with settings `s` (which the engine checks before anything runs).
fn analyze(e: &mut Engine, frame: &Frame, s: &Settings, seed: u64) -> Result<Report, EngineError> {
    e.set_settings(s.clone())?;
    e.analyze(frame, seed)
}

/// A flat grey sheet with one dark disc of radius `r` at (`x`, `y`).
fn sheet_with_spot(w: u32, h: u32, x: u32, y: u32, r: i64) -> Frame {
    let mut img = RgbImage::from_pixel(w, h, image::Rgb([150, 150, 150]));
    for dy in -r..=r {
        for dx in -r..=r {
            if dx * dx + dy * dy <= r * r {
                img.put_pixel((x as i64 + dx) as u32, (y as i64 + dy) as u32, image::Rgb([30, 30, 30]));
            }
        }
    }
    Frame::new(0, "test", img)
}

fn error_text(dir: &Path) -> String {
    match load(dir) {
        Ok(_) => panic!("bundle in {} loaded but should not", dir.display()),
        Err(e) => e.to_string(),
    }
}

#[test]
fn designed_bundle_loads_and_reports_its_shapes() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let b = load(dir.path()).unwrap();
    assert_eq!(b.manifest.classes, designed::CLASSES);
    assert!(b.dry_run.per_patch.iter().any(|(n, _)| *n == 8));
}

#[test]
fn missing_file_is_named() {
    let dir = common::designed_bundle(&DesignedParams::default());
    std::fs::remove_file(dir.path().join("features.onnx")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("features.onnx") && e.contains("file not found"), "{e}");
    let empty = tempfile::tempdir().unwrap();
    assert!(error_text(empty.path()).contains("bundle.toml"));
}

#[test]
fn wrong_input_name_is_named() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let path = dir.path().join("bundle.toml");
    let text = std::fs::read_to_string(&path).unwrap().replace("input = \"patches\"", "input = \"crops\"");
    std::fs::write(&path, text).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("features.onnx") && e.contains("\"crops\"") && e.contains("\"patches\""), "{e}");
}

#[test]
fn wrong_feature_dimension_is_named() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let path = dir.path().join("bundle.toml");
    let text = std::fs::read_to_string(&path).unwrap().replace("feature_dim = 4", "feature_dim = 6");
    std::fs::write(&path, text).unwrap();
    let e = error_text(dir.path());
    assert!(
        e.contains("features.onnx") && e.contains("feature_dim") && e.contains("[1, 6]") && e.contains("[1, 4]"),
        "{e}"
    );
}

#[test]
fn wrong_class_count_rank_and_channels_are_named() {
    let dir = common::designed_bundle(&DesignedParams::default());
    // A head with three logits against a manifest naming two classes.
    let mut g = GraphWriter::new("head");
    let x = g.input("psi", &[Dim::Symbol("n"), Dim::Fixed(4)]);
    let y = g.dense(&x, &[0.0; 12], &[0.0; 3], 4);
    g.output(&y, "logits", &[Dim::Symbol("n"), Dim::Fixed(3)]);
    std::fs::write(dir.path().join("head.onnx"), g.finish("test")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("head.onnx") && e.contains("[2, 2]") && e.contains("[2, 3]"), "{e}");

    // An attention network that takes one channel.
    designed::write_bundle(dir.path(), &DesignedParams::default()).unwrap();
    let mut g = GraphWriter::new("attention");
    let x = g.input("thumbnail", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("h"), Dim::Symbol("w")]);
    let y = g.pool("MaxPool", &x, 4, 4);
    g.output(&y, "scores", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("r"), Dim::Symbol("c")]);
    std::fs::write(dir.path().join("attention.onnx"), g.finish("test")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("attention.onnx") && e.contains("1 channels, expected 3"), "{e}");

    // A head declared with rank 3.
    designed::write_bundle(dir.path(), &DesignedParams::default()).unwrap();
    let mut g = GraphWriter::new("head");
    let x = g.input("psi", &[Dim::Symbol("n"), Dim::Fixed(4), Dim::Fixed(1)]);
    let y = g.unary("Relu", &x);
    g.output(&y, "logits", &[Dim::Symbol("n"), Dim::Fixed(4), Dim::Fixed(1)]);
    std::fs::write(dir.path().join("head.onnx"), g.finish("test")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("head.onnx") && e.contains("rank 3, expected rank 2"), "{e}");
}

#[test]
fn manifest_errors_name_line_and_field() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let path = dir.path().join("bundle.toml");
    let text = std::fs::read_to_string(&path).unwrap();
    std::fs::write(&path, text.replace("patch_size = 48", "patch_size = \"big\"")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("bundle.toml") && e.contains("line") && e.contains("patch_size"), "{e}");
    std::fs::write(&path, format!("{text}\ncolour = 3\n")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("unknown field") && e.contains("colour"), "{e}");
    std::fs::write(&path, text.replace("thresholds = [\n    0.5,\n    0.5,\n]", "thresholds = [0.5, 1.5]")).unwrap();
    let e = error_text(dir.path());
    assert!(e.contains("1.5") && e.contains("[0, 1]"), "{e}");
}

#[test]
fn finds_a_dark_spot_and_looks_where_it_is() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = sheet_with_spot(640, 480, 400, 200, 6);
    let s = Settings { budget_ms: 10_000.0, min_patches: 16, max_patches: 16, ..Settings::default() };
    let r = analyze(&mut e, &frame, &s, 1).unwrap();
    assert_eq!(r.stop, StopReason::MaxPatches);
    assert_eq!(r.patch_count, 16);
    let dark = &r.classes[0];
    assert_eq!(dark.outcome, Outcome::Detected, "{r:?}");
    assert_eq!(r.classes[1].outcome, Outcome::Clear, "{r:?}");
    // The highest-weighted patches contain the spot.
    let first = &r.patches[0];
    assert!(first.x <= 400 && 400 < first.x + 48 && first.y <= 200 && 200 < first.y + 48, "{first:?}");
    // A plain sheet is clear.
    let plain = Frame::new(1, "plain", RgbImage::from_pixel(640, 480, image::Rgb([150, 150, 150])));
    let r = analyze(&mut e, &plain, &s, 1).unwrap();
    assert!(r.classes.iter().all(|c| c.outcome == Outcome::Clear), "{r:?}");
}

#[test]
fn same_seed_and_patch_count_replays_exactly() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = Frame::new(0, "scene", scene::generate(800, 600, 3).image);
    let s = Settings { budget_ms: 10_000.0, min_patches: 24, max_patches: 24, ..Settings::default() };
    let a = analyze(&mut e, &frame, &s, 42).unwrap();
    let b = analyze(&mut e, &frame, &s, 42).unwrap();
    assert_eq!(serde_json::to_value(&a.classes).unwrap(), serde_json::to_value(&b.classes).unwrap());
    assert_eq!(serde_json::to_value(&a.patches).unwrap(), serde_json::to_value(&b.patches).unwrap());
    assert_eq!(a.psi, b.psi);
    let c = analyze(&mut e, &frame, &s, 43).unwrap();
    assert_ne!(serde_json::to_value(&a.patches).unwrap(), serde_json::to_value(&c.patches).unwrap());
}

#[test]
fn budget_loop_honours_min_and_max_and_all_cells() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = Frame::new(0, "scene", scene::generate(1024, 768, 5).image);
    // A budget far too small: min_patches is still done, the overrun reported.
    let tight = Settings { budget_ms: 0.001, min_patches: 8, max_patches: 100, ..Settings::default() };
    let r = analyze(&mut e, &frame, &tight, 1).unwrap();
    assert_eq!((r.patch_count, r.stop, r.budget_met), (8, StopReason::Budget, false));
    // Generous budget: max_patches bounds the work.
    let capped = Settings { budget_ms: 60_000.0, min_patches: 1, max_patches: 37, ..Settings::default() };
    let r = analyze(&mut e, &frame, &capped, 1).unwrap();
    assert_eq!((r.patch_count, r.stop), (37, StopReason::MaxPatches));
    // Exhaustive: every cell, whatever the budget.
    let dense = Settings { estimator: EstimatorKind::Exhaustive, budget_ms: 0.001, ..Settings::default() };
    let r = analyze(&mut e, &frame, &dense, 1).unwrap();
    assert_eq!((r.patch_count, r.stop), (r.cells, StopReason::AllCells));
    assert!((r.attention_mass - 1.0).abs() < 1e-9);
    // Priority over every cell gives the exhaustive estimate.
    let all = Settings { budget_ms: 60_000.0, max_patches: 100_000, ..Settings::default() };
    let p = analyze(&mut e, &frame, &all, 9).unwrap();
    assert_eq!((p.patch_count, p.stop), (r.cells, StopReason::AllCells));
    for (x, y) in p.psi.iter().zip(&r.psi) {
        assert!((x - y).abs() < 1e-9, "{x} vs {y}");
    }
    for (a, b) in p.classes.iter().zip(&r.classes) {
        assert!((a.probability - b.probability).abs() < 1e-6 && a.spread < 1e-12, "{a:?} vs {b:?}");
    }
}

#[test]
fn a_realistic_budget_stops_on_time() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = Frame::new(0, "scene", scene::generate(2448, 2048, 11).image);
    let s = Settings { budget_ms: 30.0, min_patches: 1, max_patches: 100_000, ..Settings::default() };
    analyze(&mut e, &frame, &s, 1).unwrap(); // warm the cost estimates
    let r = analyze(&mut e, &frame, &s, 2).unwrap();
    // The loop stopped for the budget, well before the 4864 cells; no timing is asserted.
    assert_eq!(r.stop, StopReason::Budget);
    assert!(r.patch_count >= 1 && r.patch_count < r.cells);
}

#[test]
fn mask_removes_attention_from_ignored_zones() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = sheet_with_spot(640, 480, 400, 200, 6);
    let s = Settings { budget_ms: 10_000.0, min_patches: 16, max_patches: 16, ..Settings::default() };
    e.set_mask(Some(Mask::Ignore(vec![Rect { x: 320, y: 128, width: 160, height: 160 }])));
    let r = analyze(&mut e, &frame, &s, 1).unwrap();
    let g = r.geometry;
    for (i, a) in r.attention.iter().enumerate() {
        let (x0, y0, x1, y1) = g.footprint(i);
        if x0 >= 320 && x1 <= 480 && y0 >= 128 && y1 <= 288 {
            assert_eq!(*a, 0.0, "cell {i} inside the ignored zone");
        }
    }
    assert!((r.attention.iter().sum::<f64>() - 1.0).abs() < 1e-9);
    assert_eq!(r.classes[0].outcome, Outcome::Clear, "{r:?}");
    // A mask that reaches outside the frame is refused with a clear error.
    e.set_mask(Some(Mask::Ignore(vec![Rect { x: 600, y: 0, width: 100, height: 10 }])));
    let err = analyze(&mut e, &frame, &s, 1).unwrap_err().to_string();
    assert!(err.contains("outside the 640×480 frame"), "{err}");
}

#[test]
fn bad_settings_are_refused() {
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = sheet_with_spot(200, 200, 100, 100, 3);
    let err = analyze(&mut e, &frame, &Settings { min_patches: 0, ..Settings::default() }, 1).unwrap_err().to_string();
    assert!(err.contains("min_patches"), "{err}");
    let err = analyze(&mut e, &frame, &Settings { budget_ms: -1.0, ..Settings::default() }, 1).unwrap_err().to_string();
    assert!(err.contains("budget_ms"), "{err}");
}

#[test]
fn evidence_keeps_its_quota_and_switches_off_when_it_cannot_write() {
    use saccade::engine::Outcome;
    use saccade::sinks::evidence::{self, Evidence};
    use saccade::sinks::EvidenceConfig;
    let (_d, mut e) = engine(&DesignedParams::default());
    let frame = sheet_with_spot(640, 480, 400, 200, 6);
    let s = Settings { budget_ms: 10_000.0, min_patches: 16, max_patches: 16, ..Settings::default() };
    let report = analyze(&mut e, &frame, &s, 1).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let cfg =
        EvidenceConfig { enabled: true, dir: dir.path().join("ev"), quota_mb: 0.05, max_age_hours: 1.0, crops: 3 };
    let mut ev = Evidence::open(&cfg);
    let first = ev.write(&report, &frame.image, "a").expect("evidence written");
    // The documented sizes: a 640×480 frame stays at full size under the title band; a
    // crop is the 2P square around its patch, enlarged, over its caption.
    let overview = image::open(&first.overview).unwrap();
    assert_eq!(evidence::overview_size(640, 480), (640, 480 + evidence::HEADER));
    assert_eq!((overview.width(), overview.height()), evidence::overview_size(640, 480));
    assert_eq!(evidence::overview_size(2448, 2048), (1224, 1024 + evidence::HEADER));
    let findings: usize = report.classes.iter().filter(|c| c.outcome != Outcome::Clear).map(|c| c.patches.len()).sum();
    assert!(findings >= 1, "the spot is a finding: {:?}", report.classes);
    assert_eq!(first.crops.len(), findings.min(3), "one crop per finding patch, at most `crops`");
    let p = report.patches[0].size;
    for c in &first.crops {
        let img = image::open(c).unwrap();
        assert_eq!((img.width(), img.height()), evidence::crop_size(p), "{c}");
    }
    for n in 0..100 {
        ev.write(&report, &frame.image, &format!("f{n}"));
    }
    let on_disk: u64 = std::fs::read_dir(&cfg.dir).unwrap().map(|f| f.unwrap().metadata().unwrap().len()).sum();
    assert!(on_disk <= 50 * 1024 + 1024 && on_disk == ev.total_bytes(), "{on_disk} bytes kept");
    assert!(!cfg.dir.join("a-overview.jpg").exists(), "the oldest went first");
    assert!(ev.enabled);
    // A folder that cannot exist (its parent is a file) disables evidence, without panic.
    std::fs::write(dir.path().join("file"), b"x").unwrap();
    let bad = EvidenceConfig { dir: dir.path().join("file/ev"), ..cfg };
    let mut ev = Evidence::open(&bad);
    assert!(!ev.enabled);
    assert!(ev.write(&report, &frame.image, "b").is_none());
}
