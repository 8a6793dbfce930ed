//! A seeded fuzz harness on the stable toolchain: mutated config text, bundle manifests
//! and image bytes go through the same loading, checking, decoding and analysis as in the
//! daemon. Nothing may panic; every error names the file (and the field, where there is
//! one). Bounded by iteration counts; `SACCADE_FUZZ_SEED=N` replays another sequence,
//! and a failure prints the seed, the iteration and the input.

mod common;

use std::collections::HashSet;
use std::io::Cursor;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::Path;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;

use image::{ImageFormat, RgbImage};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::bundle::{Manifest, ManifestError};
use saccade::config::Config;
use saccade::demo::designed::DesignedParams;
use saccade::engine::{Bundle, Engine, EngineError, Frame, Settings};
use saccade::sinks::evidence::Evidence;
use saccade::sinks::jsonl::JsonlLog;
use saccade::source::{self, decode_bytes, SourceCounters};

fn seed() -> u64 {
    std::env::var("SACCADE_FUZZ_SEED").ok().and_then(|s| s.parse().ok()).unwrap_or(13)
}

/// Values that broke, or could break, a range: signs, zeros, extremes, non-numbers.
const NUMBERS: [&str; 18] = [
    "0",
    "-1",
    "1",
    "0.5",
    "1e300",
    "-1e300",
    "1e-300",
    "inf",
    "-inf",
    "nan",
    "4294967296",
    "18446744073709551615",
    "9223372036854775807",
    "100000",
    "0.0001",
    "65536",
    "\"x\"",
    "[]",
];

/// One random edit of TOML text: a number replaced, a line dropped, doubled or moved, a
/// byte changed, or the text cut short.
fn mutate_text(text: &str, rng: &mut ChaCha8Rng) -> String {
    let mut lines: Vec<String> = text.lines().map(String::from).collect();
    match rng.random_range(0..10) {
        0..=4 => {
            // A value after `=`, or an element of an array, becomes another number.
            let candidates: Vec<usize> = (0..lines.len())
                .filter(|&i| {
                    lines[i].trim_start().starts_with(|c: char| c.is_ascii_digit()) || lines[i].contains(" = ")
                })
                .collect();
            if let Some(&i) = candidates.get(rng.random_range(0..candidates.len().max(1))) {
                let n = NUMBERS[rng.random_range(0..NUMBERS.len())];
                lines[i] = match lines[i].split_once(" = ") {
                    Some((k, _)) => format!("{k} = {n}"),
                    None => format!("    {n},"),
                };
            }
        }
        5 if !lines.is_empty() => {
            lines.remove(rng.random_range(0..lines.len()));
        }
        6 if !lines.is_empty() => {
            let i = rng.random_range(0..lines.len());
            let l = lines[i].clone();
            lines.insert(rng.random_range(0..=lines.len()), l);
        }
        7 => {
            let mut b = text.as_bytes().to_vec();
            if !b.is_empty() {
                let i = rng.random_range(0..b.len());
                b[i] = rng.random_range(0x20..0x7f);
            }
            return String::from_utf8_lossy(&b).into_owned();
        }
        8 => {
            let cut = rng.random_range(0..=text.len());
            return String::from_utf8_lossy(&text.as_bytes()[..cut]).into_owned();
        }
        _ => {
            let (i, j) = (rng.random_range(0..lines.len().max(1)), rng.random_range(0..lines.len().max(1)));
            if i < lines.len() && j < lines.len() {
                lines.swap(i, j);
            }
        }
    }
    lines.join("\n") + "\n"
}

/// Runs `f`, failing the test with the seed, iteration and input if it panics.
fn no_panic<T>(what: &str, iteration: usize, input: &dyn std::fmt::Debug, f: impl FnOnce() -> T) -> T {
    catch_unwind(AssertUnwindSafe(f))
        .unwrap_or_else(|_| panic!("{what} panicked: seed {}, iteration {iteration}, input:\n{input:?}", seed()))
}

/// The engine a valid config or bundle goes on to: one small frame analysed.
fn analyse_one(engine: &mut Engine, what: &str, iteration: usize, input: &dyn std::fmt::Debug) {
    let frame = Frame::new(0, "fuzz", saccade::demo::scene::generate(96, 64, iteration as u64).image);
    let r = no_panic(what, iteration, input, || engine.analyze(&frame, 1));
    if let Err(EngineError::Panicked(m)) = r {
        panic!("{what}: contained panic {m}: seed {}, iteration {iteration}, input:\n{input:?}", seed());
    }
}

#[test]
fn mutated_configs_are_refused_by_name_or_run_without_panics() {
    let bundle_dir = common::designed_bundle(&DesignedParams::default());
    let bundle = Arc::new(Bundle::load(bundle_dir.path(), &[1, 2, 4, 8]).unwrap());
    let mut engine = Engine::new(bundle.clone(), Settings::default()).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let frame = dir.path().join("frame.png");
    saccade::demo::scene::generate(96, 64, 1).image.save(&frame).unwrap();
    std::fs::create_dir_all(dir.path().join("inbox")).unwrap();
    let tables = "[engine]\nbudget_ms = 100.0\nmin_patches = 4\nmax_patches = 256\nbatch = 8\nsamples = 64\ninterval = 0.9\n\
         miss_target = 0.1\nfalse_alarm_target = 0.1\ntarget_confidence = 0.9\nthresholds = [\n    0.5,\n    0.5,\n]\nseed = 0\n\n\
         [mask]\nignore = [{ x = 0, y = 0, width = 10, height = 10 }]\n\n\
         [log]\npath = \"log/d.jsonl\"\nrotate_mb = 64.0\nkeep = 5\nsync_interval_s = 5.0\nhealth_interval_s = 60.0\nbacklog_mb = 16.0\n\n\
         [evidence]\nenabled = true\ndir = \"ev\"\nquota_mb = 200.0\nmax_age_hours = 72.0\ncrops = 4\n";
    let sources = [
        format!("[source]\nkind = \"files\"\npaths = [{:?}]\nrate_fps = 5.0\n", frame.display().to_string()),
        "[source]\nkind = \"folder\"\npath = \"inbox\"\nstable_ms = 500\npoll_ms = 100\n".to_string(),
        "[source]\nkind = \"scene\"\nwidth = 2448\nheight = 2048\nfps = 2.0\nseed = 1\ncount = 0\n".to_string(),
        "[source]\nkind = \"camera\"\nwidth = 2448\nheight = 2048\nfps = 5\n".to_string(),
    ];
    let path = dir.path().join("saccade.toml");
    let mut rng = ChaCha8Rng::seed_from_u64(seed());
    let (mut refused, mut accepted) = (0, 0);
    for i in 0..1500 {
        let base = format!(
            "bundle = {:?}\nmax_pixels = 40000000\n\n{}\n{}",
            bundle_dir.path().display().to_string(),
            sources[i % sources.len()],
            tables
        );
        let mut text = mutate_text(&base, &mut rng);
        if rng.random_bool(0.5) {
            text = mutate_text(&text, &mut rng);
        }
        match no_panic("Config::parse", i, &text, || Config::parse(&text, &path)) {
            Err(e) => {
                refused += 1;
                let msg = e.to_string();
                assert!(msg.starts_with(&path.display().to_string()), "iteration {i}: {msg}");
                if let Some(key) = e.problem.key() {
                    let field = key.rsplit('.').next().unwrap();
                    assert!(msg.contains(field), "iteration {i}: {msg} does not name {key}");
                }
            }
            Ok(cfg) => {
                accepted += 1;
                // What run does next with the values: the engine's settings and mask, the
                // log and evidence writers, and (for files and folders) the source.
                no_panic("the config's engine", i, &text, || {
                    if cfg.check_classes(2).is_ok() && engine.set_settings(cfg.engine.settings.clone()).is_ok() {
                        engine.set_mask(cfg.mask().ok().flatten().filter(|m| m.check(96, 64).is_ok()));
                    }
                });
                analyse_one(&mut engine, "analysis under the config", i, &text);
                no_panic("the log and evidence", i, &text, || {
                    JsonlLog::open(&cfg.log).map(drop).ok();
                    Evidence::open(&cfg.evidence);
                });
                if matches!(cfg.source, source::SourceConfig::Files { .. } | source::SourceConfig::Folder { .. }) {
                    let stop = Arc::new(AtomicBool::new(false));
                    let counters = Arc::new(SourceCounters::default());
                    if let Ok(running) =
                        source::start(&cfg.source, cfg.max_pixels, counters, stop.clone(), &HashSet::new())
                    {
                        running.frames.recv_timeout(Duration::from_millis(200)).ok();
                        stop.store(true, Ordering::Relaxed);
                        drop(running.frames);
                        assert!(running.thread.join().is_ok(), "source thread panicked: iteration {i}:\n{text}");
                    }
                }
            }
        }
    }
    // The mutations reach both sides.
    assert!(refused > 100 && accepted > 50, "refused {refused}, accepted {accepted}");
}

#[test]
fn mutated_manifests_are_refused_by_name_or_load_and_run() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let path = dir.path().join("bundle.toml");
    let base = std::fs::read_to_string(&path).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed() ^ 0xB0);
    let (mut refused, mut loaded) = (0, 0);
    for i in 0..600 {
        let mut text = mutate_text(&base, &mut rng);
        if rng.random_bool(0.3) {
            text = mutate_text(&text, &mut rng);
        }
        std::fs::write(&path, &text).unwrap();
        match no_panic("Manifest::read", i, &text, || Manifest::read(&path)) {
            Err(e) => {
                refused += 1;
                let msg = e.to_string();
                assert!(msg.starts_with(&path.display().to_string()), "iteration {i}: {msg}");
                if let ManifestError::Invalid { problem, .. } = &e {
                    assert!(msg.contains(problem.field().rsplit('.').next().unwrap()), "iteration {i}: {msg}");
                }
            }
            Ok(_) => match no_panic("Bundle::load", i, &text, || Bundle::load(dir.path(), &[1, 2])) {
                Err(e) => {
                    refused += 1;
                    let msg = e.to_string();
                    assert!(msg.starts_with(&dir.path().display().to_string()), "iteration {i}: {msg}");
                }
                Ok(b) => {
                    loaded += 1;
                    let mut engine = match Engine::new(Arc::new(b), Settings { batch: 2, ..Settings::default() }) {
                        Ok(e) => e,
                        Err(e) => panic!("iteration {i}: a loaded bundle gives no engine: {e}\n{text}"),
                    };
                    analyse_one(&mut engine, "analysis with the bundle", i, &text);
                }
            },
        }
    }
    assert!(refused > 50 && loaded > 20, "refused {refused}, loaded {loaded}");
}

/// A minimal EXIF APP1 segment (big-endian TIFF, one Orientation entry).
fn exif_app1(orientation: u16) -> Vec<u8> {
    let mut tiff = b"MM\0\x2a\0\0\0\x08\0\x01".to_vec();
    tiff.extend([0x01, 0x12, 0x00, 0x03, 0, 0, 0, 1]);
    tiff.extend(orientation.to_be_bytes());
    tiff.extend([0, 0, 0, 0, 0, 0]);
    let mut seg = vec![0xFF, 0xE1];
    seg.extend(((tiff.len() + 8) as u16).to_be_bytes());
    seg.extend(b"Exif\0\0");
    seg.extend(tiff);
    seg
}

/// Sample images of every format the decoder takes.
fn samples() -> Vec<(&'static str, Vec<u8>)> {
    let img = saccade::demo::scene::generate(96, 64, 5).image;
    let enc = |img: &image::DynamicImage, f| {
        let mut b = Cursor::new(Vec::new());
        img.write_to(&mut b, f).unwrap();
        b.into_inner()
    };
    let rgb = image::DynamicImage::ImageRgb8(img.clone());
    let jpeg = enc(&rgb, ImageFormat::Jpeg);
    let mut rotated = jpeg[..2].to_vec();
    rotated.extend(exif_app1(6));
    rotated.extend(&jpeg[2..]);
    let grey = image::DynamicImage::ImageLuma8(rgb.to_luma8());
    let rgba16 = image::DynamicImage::ImageRgba16(rgb.to_rgba16());
    let pbm = b"P4\n16 8\n".iter().copied().chain((0..16u8).map(|b| b.wrapping_mul(37))).collect();
    vec![
        ("jpeg", jpeg),
        ("jpeg-exif", rotated),
        ("png", enc(&rgb, ImageFormat::Png)),
        ("png-grey", enc(&grey, ImageFormat::Png)),
        ("png-16", enc(&rgba16, ImageFormat::Png)),
        ("ppm", enc(&rgb, ImageFormat::Pnm)),
        ("pgm", enc(&grey, ImageFormat::Pnm)),
        ("pbm", pbm),
    ]
}

/// One random edit of image bytes, header fields included.
fn mutate_bytes(b: &[u8], rng: &mut ChaCha8Rng) -> Vec<u8> {
    let mut b = b.to_vec();
    let header = b.len().min(64);
    match rng.random_range(0..7) {
        0 => {
            for _ in 0..rng.random_range(1..8) {
                let i = rng.random_range(0..b.len());
                b[i] ^= 1 << rng.random_range(0..8);
            }
        }
        1 => {
            // Header bytes (sizes, depths, markers) set to edge values.
            let i = rng.random_range(0..header);
            b[i] = [0x00, 0xFF, 0x7F, 0x80, 0x01][rng.random_range(0..5)];
        }
        2 => b.truncate(rng.random_range(0..b.len())),
        3 => {
            let at = rng.random_range(0..=b.len());
            let junk: Vec<u8> = (0..rng.random_range(1..64)).map(|_| rng.random()).collect();
            b.splice(at..at, junk);
        }
        4 => b.extend((0..rng.random_range(1..2000)).map(|_| rng.random::<u8>())),
        5 => {
            let (i, n) = (rng.random_range(0..b.len()), rng.random_range(1..32));
            b.drain(i..(i + n).min(b.len()));
        }
        _ => {
            // A decimal header number (PNM) or a 16-bit field replaced by an extreme.
            let i = rng.random_range(0..header.saturating_sub(2).max(1));
            let v: u16 = [0, 1, 8, 9, 65535, 32768][rng.random_range(0..6)];
            b[i..i + 2].copy_from_slice(&v.to_be_bytes());
        }
    }
    b
}

#[test]
fn mutated_images_are_refused_by_name_or_analysed_without_panics() {
    let bundle_dir = common::designed_bundle(&DesignedParams::default());
    let bundle = Arc::new(Bundle::load(bundle_dir.path(), &[1, 2, 4, 8]).unwrap());
    let mut engine = Engine::new(bundle, Settings { budget_ms: 20.0, max_patches: 16, ..Settings::default() }).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(seed() ^ 0x1A6);
    let (mut refused, mut analysed) = (0, 0);
    for (name, base) in samples() {
        // The unmutated sample is a valid image of its format.
        decode_bytes(&base, name.into(), 0, 4_000_000).unwrap_or_else(|e| panic!("{name}: {e}"));
        for i in 0..600 {
            let mut bytes = mutate_bytes(&base, &mut rng);
            if rng.random_bool(0.3) && !bytes.is_empty() {
                bytes = mutate_bytes(&bytes, &mut rng);
            }
            let origin = format!("fuzz/{name}-{i}");
            let input = format!("{name}, {} bytes", bytes.len());
            match no_panic("decode", i, &input, || decode_bytes(&bytes, origin.clone(), i as u64, 4_000_000)) {
                Err(e) => {
                    refused += 1;
                    assert!(e.to_string().starts_with(&origin), "{e}");
                }
                Ok(frame) => {
                    analysed += 1;
                    let r = no_panic("analysis", i, &input, || engine.analyze(&frame, 1));
                    if let Err(EngineError::Panicked(m)) = r {
                        panic!("{origin}: contained panic {m} (seed {})", seed());
                    }
                }
            }
        }
    }
    assert!(refused > 300 && analysed > 300, "refused {refused}, analysed {analysed}");
}

#[test]
fn frames_of_every_small_size_are_refused_or_analysed() {
    // The sizes around the bundle's minimum, where the attention network's pooling
    // panicked; each side from 1 to 40 pixels against a few others.
    let bundle_dir = common::designed_bundle(&DesignedParams::default());
    let bundle = Arc::new(Bundle::load(bundle_dir.path(), &[1, 2, 4, 8]).unwrap());
    let min = bundle.min_frame_side();
    let mut engine = Engine::new(bundle, Settings { budget_ms: 20.0, max_patches: 8, ..Settings::default() }).unwrap();
    for w in 1..=40u32 {
        for h in [1, 7, 8, 9, 24, 25, 26, 33, 300] {
            let f = Frame::new(0, "small", RgbImage::from_pixel(w, h, image::Rgb([200, 30, 30])));
            match engine.analyze(&f, 0) {
                Ok(r) => assert!(w >= min && h >= min, "{w}×{h} analysed below the minimum {min}: {:?}", r.stop),
                Err(EngineError::TooSmall { min: m, .. }) => assert!(m == min && (w < min || h < min), "{w}×{h}"),
                Err(e) => panic!("{w}×{h}: {e}"),
            }
        }
    }
    assert!(Path::new(bundle_dir.path()).is_dir());
}
