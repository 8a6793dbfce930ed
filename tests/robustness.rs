//! Bad bundles, odd images and one bad image among good ones: clear errors naming the
//! file and field, never a panic.

mod common;

use std::io::Cursor;
use std::path::Path;
use std::process::Command;

use image::{ImageFormat, RgbImage};
use saccade::demo::designed::DesignedParams;
use saccade::engine::Bundle;
use saccade::source::{decode_bytes, decode_file, DEFAULT_MAX_PIXELS};

const BIN: &str = env!("CARGO_BIN_EXE_saccade");

fn load_error(dir: &Path) -> String {
    match Bundle::load(dir, &[1]) {
        Ok(_) => panic!("{} loaded", dir.display()),
        Err(e) => e.to_string(),
    }
}

#[test]
fn bundles_with_bad_numbers_geometry_or_names_are_refused() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let path = dir.path().join("bundle.toml");
    let text = std::fs::read_to_string(&path).unwrap();
    assert!(Bundle::load(dir.path(), &[1]).is_ok());
    let std_line = "std = [\n    0.25,\n    0.25,\n    0.25,\n]";
    let mean_line = "mean = [\n    0.5,\n    0.5,\n    0.5,\n]";
    let classes = "classes = [\n    \"dark_spot\",\n    \"bright_spot\",\n]";
    assert!(text.contains(std_line) && text.contains(mean_line) && text.contains(classes), "{text}");
    let cases = [
        // A 120 GB dry run before: refused from the manifest, with the range.
        (
            text.replace("patch_size = 48", "patch_size = 100000"),
            vec!["bundle.toml", "patch_size = 100000", "1 to 512"],
        ),
        (text.replace("cell_stride = 4", "cell_stride = 0"), vec!["cell_stride = 0", "1 to 256"]),
        (text.replace(std_line, "std = [0.25, nan, 0.25]"), vec!["normalization.std", "NaN"]),
        (text.replace(mean_line, "mean = [0.5, inf, 0.5]"), vec!["normalization.mean", "inf"]),
        (
            text.replace(classes, "classes = [\"dark_spot\", \"dark_spot\"]"),
            vec!["classes", "\"dark_spot\" is named twice"],
        ),
        // The networks record the geometry they were made for.
        (text.replace("patch_size = 48", "patch_size = 32"), vec![".onnx", "patch_size = 48", "patch_size = 32"]),
        (
            text.replace("thumbnail_factor = 8", "thumbnail_factor = 4"),
            vec!["attention.onnx", "thumbnail_factor = 8", "thumbnail_factor = 4"],
        ),
    ];
    for (bad, wanted) in cases {
        std::fs::write(&path, &bad).unwrap();
        let e = load_error(dir.path());
        assert!(wanted.iter().all(|w| e.contains(w)), "wanted {wanted:?} in: {e}");
    }
}

#[test]
fn networks_without_recorded_geometry_still_load() {
    // Written by another trainer: no saccade.* metadata, symbolic patch axes. The dry
    // run is then the whole check, and the bundle loads.
    let dir = common::designed_bundle(&DesignedParams::default());
    let strip = |name: &str| {
        use prost::Message;
        let p = dir.path().join(name);
        let mut m = tract_onnx::pb::ModelProto::decode(&*std::fs::read(&p).unwrap()).unwrap();
        assert!(!m.metadata_props.is_empty(), "{name} records its geometry");
        m.metadata_props.clear();
        std::fs::write(&p, m.encode_to_vec()).unwrap();
    };
    strip("attention.onnx");
    strip("features.onnx");
    let path = dir.path().join("bundle.toml");
    let text = std::fs::read_to_string(&path).unwrap();
    std::fs::write(&path, text.replace("thumbnail_factor = 8", "thumbnail_factor = 4")).unwrap();
    let b = Bundle::load(dir.path(), &[1]).unwrap();
    assert_eq!(b.manifest.thumbnail_factor, 4);
    // The feature network still declares patches of 48: another patch size is refused.
    std::fs::write(&path, text.replace("patch_size = 48", "patch_size = 32")).unwrap();
    let e = load_error(dir.path());
    assert!(e.contains("features.onnx") && e.contains("side 48") && e.contains("patch_size = 32"), "{e}");
}

fn encoded(img: &RgbImage, format: ImageFormat) -> Vec<u8> {
    let mut buf = Cursor::new(Vec::new());
    img.write_to(&mut buf, format).unwrap();
    buf.into_inner()
}

#[test]
fn exif_orientation_turns_files_upright_as_pillow_does() {
    let dir = tempfile::tempdir().unwrap();
    common::run_reference("exif_transpose.py", &[dir.path().to_str().unwrap()], "");
    for n in 1..=8 {
        let ours = decode_file(&dir.path().join(format!("o{n}.jpg")), 0, DEFAULT_MAX_PIXELS).unwrap().image;
        // Independent reference: Pillow's ImageOps.exif_transpose of the same JPEG.
        let pillow = image::open(dir.path().join(format!("o{n}.png"))).unwrap().into_rgb8();
        assert_eq!(ours.dimensions(), pillow.dimensions(), "orientation {n}");
        // Two JPEG decoders agree to a few levels; a wrong turn differs by far more.
        let diff = |a: &RgbImage, b: &RgbImage| {
            a.as_raw().iter().zip(b.as_raw()).map(|(&x, &y)| (x as f64 - y as f64).abs()).sum::<f64>()
                / a.as_raw().len() as f64
        };
        assert!(diff(&ours, &pillow) < 3.0, "orientation {n}: mean difference {}", diff(&ours, &pillow));
        if n > 1 && ours.dimensions() == (96, 64) {
            let stored = image::open(dir.path().join("o1.png")).unwrap().into_rgb8();
            assert!(diff(&stored, &pillow) > 10.0, "orientation {n}: the check would not see a missing turn");
        }
    }
}

#[test]
fn trailing_bytes_after_the_end_marker_are_accepted_and_truncation_is_not() {
    let img = RgbImage::from_fn(64, 48, |x, y| image::Rgb([(x * 4) as u8, (y * 5) as u8, 90]));
    let mut j = encoded(&img, ImageFormat::Jpeg);
    let whole = j.len();
    j.extend(std::iter::repeat_n(0xA5u8, 4096));
    let f = decode_bytes(&j, "cam/padded.jpg".into(), 0, DEFAULT_MAX_PIXELS).unwrap();
    assert_eq!((f.width(), f.height()), (64, 48));
    let e = decode_bytes(&j[..whole - 2], "cam/cut.jpg".into(), 0, DEFAULT_MAX_PIXELS).unwrap_err().to_string();
    assert!(e.contains("cam/cut.jpg") && e.contains("truncated"), "{e}");
}

#[test]
fn analyze_reports_a_too_small_image_and_goes_on_to_the_next() {
    let bundle = common::designed_bundle(&DesignedParams::default());
    let dir = tempfile::tempdir().unwrap();
    let tiny = dir.path().join("tiny.png");
    RgbImage::from_pixel(8, 8, image::Rgb([10, 10, 10])).save(&tiny).unwrap();
    let good = dir.path().join("good.png");
    saccade::demo::scene::generate(320, 240, 3).image.save(&good).unwrap();
    let out = Command::new(BIN)
        .args(["analyze", "--bundle", bundle.path().to_str().unwrap()])
        .args([&tiny, &tiny, &good])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(1), "{}", String::from_utf8_lossy(&out.stderr));
    let lines: Vec<serde_json::Value> =
        String::from_utf8(out.stdout).unwrap().lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    assert_eq!(lines.len(), 3);
    for l in &lines[..2] {
        let e = l["error"].as_str().unwrap();
        // The designed bundle: one 4-cell-stride thumbnail at factor 8 needs 25 pixels.
        assert!(e.contains("8×8") && e.contains("at least 25×25"), "{e}");
    }
    assert_eq!(lines[2]["width"], 320);
}
