//! The trainer end to end on a tiny generated set: it lowers the validation loss, a stage
//! that only makes validation worse leaves the weights as they were, and what it exports
//! passes the ONNX checker and computes what the training graph computes, in tract and in
//! onnxruntime.
#![cfg(feature = "train")]

mod common;

use std::process::Command;

use indicatif::MultiProgress;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::engine::Bundle;
use saccade::train::data::{Augment, Dataset, Shape};
use saccade::train::fit::{fit_sampled, FitOptions, Stage};
use saccade::train::nn::Act;
use saccade::train::{train, TrainOptions};
use serde_json::{json, Value};
use tract_onnx::prelude::Tensor;

fn close(name: &str, ours: &[f32], theirs: &[f32]) {
    assert_eq!(ours.len(), theirs.len(), "{name}: lengths");
    for (i, (x, y)) in ours.iter().zip(theirs).enumerate() {
        assert!((x - y).abs() <= 1e-4 * (1.0 + y.abs()), "{name}[{i}]: {x} vs {y}");
    }
}

/// NHWC → NCHW.
fn planar(x: &[f32], n: usize, h: usize, w: usize) -> Vec<f32> {
    let mut out = vec![0f32; x.len()];
    for b in 0..n {
        for y in 0..h {
            for xx in 0..w {
                for c in 0..3 {
                    out[((b * 3 + c) * h + y) * w + xx] = x[((b * h + y) * w + xx) * 3 + c];
                }
            }
        }
    }
    out
}

fn scene(dir: &std::path::Path, count: u32, seed: u32) -> std::path::PathBuf {
    let frames = dir.join("frames");
    let status = Command::new(env!("CARGO_BIN_EXE_saccade"))
        .args(["scene", "--out", frames.to_str().unwrap(), "--count", &count.to_string(), "--seed", &seed.to_string()])
        .args(["--size", "512x384", "--format", "png"])
        .status()
        .unwrap();
    assert!(status.success());
    frames.join("labels.jsonl")
}

fn options(labels: std::path::PathBuf, out: std::path::PathBuf) -> TrainOptions {
    TrainOptions {
        labels,
        frames: None,
        out,
        name: "tiny".into(),
        classes: saccade::demo::scene::CLASSES.iter().map(|s| s.to_string()).collect(),
        shape: Shape { factor: 8, stride: 4, patch: 48 },
        arch: Default::default(),
        fit: FitOptions {
            epochs: 3,
            warmup: 3,
            attention_epochs: 2,
            batch: 3,
            top: 6,
            warmup_top: 8,
            mine_every: 1,
            tail: 2,
            learning_rate: 1e-2,
            attention_rate: 0.5,
            tune_rate: 0.25,
            entropy: 0.0,
            patience: 10,
            val_patches: 8,
            augment: Augment { flips: true, gain: 0.1, offset: 5.0 },
            threads: 2,
        },
        validation: 0.25,
        seed: 3,
        baseline: true,
        baseline_epochs: 2,
        max_pixels: 1 << 24,
        start: None,
    }
}

#[test]
fn a_tiny_run_lowers_the_loss_and_exports_checked_networks() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("bundle");
    let o = options(scene(dir.path(), 16, 40), out.clone());
    let t = train(&o).unwrap();
    assert!(t.loss_after < t.loss_before, "validation loss {} → {}", t.loss_before, t.loss_after);
    assert!(t.log.iter().filter(|e| e.model == "sampled").count() >= 1);
    assert!(t.log.iter().filter(|e| e.model == "warm-up").count() >= 1);
    assert_eq!(t.held_out.thresholds, t.manifest.thresholds);

    let bundle = Bundle::load(&out, &[1, 5]).unwrap();
    assert!(bundle.baseline.is_some());
    // The networks record the geometry they were trained for: a manifest that claims
    // another thumbnail factor (which no dry run could notice) is refused.
    let manifest = out.join("bundle.toml");
    let text = std::fs::read_to_string(&manifest).unwrap();
    std::fs::write(&manifest, text.replace("thumbnail_factor = 8", "thumbnail_factor = 4")).unwrap();
    let err = Bundle::load(&out, &[1, 5]).err().expect("a changed thumbnail factor is refused").to_string();
    assert!(err.contains("thumbnail_factor"), "{err}");
    std::fs::write(&manifest, text).unwrap();
    // Calibration on the held-out split: one map per class, fitted on its 4 frames.
    let cal = bundle.calibration.as_ref().expect("saccade train writes calibration.json");
    assert_eq!(cal.frames, t.held_out.frames);
    assert_eq!(cal.classes.iter().map(|c| c.name.as_str()).collect::<Vec<_>>(), saccade::demo::scene::CLASSES);
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let mut rand = |n: usize| -> Vec<f32> { (0..n).map(|_| rng.random_range(-2.0f32..2.0)).collect() };
    let s = &t.sampled;
    // Each network: (file, input name, NCHW/NC input, training-graph output).
    type Case<'a> = (&'a str, &'a str, Vec<usize>, Vec<f32>, Vec<f32>);
    let mut cases: Vec<Case> = Vec::new();
    let thumb = rand(32 * 48 * 3);
    let x = Act::new(1, 32, 48, 3, thumb.clone());
    cases.push((
        "attention.onnx",
        "thumbnail",
        vec![1, 3, 32, 48],
        planar(&thumb, 1, 32, 48),
        s.attention.infer(x.clone()).data,
    ));
    let b = t.baseline.as_ref().unwrap();
    cases.push(("baseline.onnx", "thumbnail", vec![1, 3, 32, 48], planar(&thumb, 1, 32, 48), b.infer(x).data));
    let patches = rand(5 * 48 * 48 * 3);
    let x = Act::new(5, 48, 48, 3, patches.clone());
    cases.push(("features.onnx", "patches", vec![5, 3, 48, 48], planar(&patches, 5, 48, 48), s.features.infer(x).data));
    let psi: Vec<f32> = rand(3 * 4).iter().map(|v| v.abs()).collect();
    let x = Act::new(3, 1, 1, 4, psi.clone());
    cases.push(("head.onnx", "psi", vec![3, 4], psi, s.head.infer(x).data));

    let nets = [
        ("attention.onnx", &bundle.attention),
        ("baseline.onnx", bundle.baseline.as_ref().unwrap()),
        ("features.onnx", &bundle.features),
        ("head.onnx", &bundle.head),
    ];
    let mut jobs = Vec::new();
    let mut tract_out = Vec::new();
    for ((file, input, shape, data, trained), (_, net)) in cases.iter().zip(nets) {
        let y = net.run(Tensor::from_shape(shape, data).unwrap()).unwrap();
        let y: Vec<f32> = y.iter().copied().collect();
        close(&format!("{file}: tract vs training graph"), &y, trained);
        tract_out.push(y);
        jobs.push(json!({ "model": out.join(file), "input": input, "shape": shape, "data": data }));
    }
    // Reference: the ONNX checker (onnx, PyPI) and onnxruntime (PyPI), CPU, one thread.
    let theirs: Value =
        serde_json::from_str(&common::run_reference("onnx_run.py", &[], &Value::Array(jobs).to_string())).unwrap();
    for (((file, ..), ours), r) in cases.iter().zip(&tract_out).zip(theirs.as_array().unwrap()) {
        let r: Vec<f32> = r["data"].as_array().unwrap().iter().map(|v| v.as_f64().unwrap() as f32).collect();
        close(&format!("{file}: tract vs onnxruntime"), ours, &r);
    }
    // The manifest records what the trainer used; the log has one line per epoch.
    assert_eq!(bundle.manifest.patch_size, 48);
    let lines = std::fs::read_to_string(out.join("training.jsonl")).unwrap();
    assert_eq!(lines.lines().count(), t.log.len());
    let held: Value = serde_json::from_str(&std::fs::read_to_string(out.join("held-out.json")).unwrap()).unwrap();
    assert_eq!(held["frames"], 4);
    // The curves decode as the documented 960×540 PNG (image crate's decoder).
    let png = image::open(out.join("training.png")).unwrap();
    assert_eq!((png.width(), png.height()), (960, 540));

    // A run that starts from the last stage's file, with nothing left to train but one
    // end-to-end epoch, starts where this one ended: same split and validation draws, so
    // the same validation loss to the last bit.
    let stage = out.join("stages").join("sampled.json");
    let again = TrainOptions {
        out: dir.path().join("again"),
        start: Some(stage.clone()),
        baseline: false,
        fit: FitOptions { warmup: 0, attention_epochs: 0, epochs: 1, ..o.fit.clone() },
        ..o.clone()
    };
    assert_eq!(train(&again).unwrap().loss_before, t.loss_after);
    // A stage file of another shape is refused with the network and layer named.
    let wide = TrainOptions { arch: saccade::train::model::Arch::preset("wide").unwrap(), ..again };
    let err = format!("{:#}", train(&wide).err().expect("a wider network cannot take these weights"));
    assert!(err.contains("sampled.json") && err.contains("features network: layer"), "{err}");
}

/// Early stopping compares every epoch with the weights a stage started from: a stage
/// whose steps only make validation worse (a learning rate far too large) hands back
/// the entry weights unchanged.
#[test]
fn a_stage_that_only_hurts_keeps_the_entry_weights() {
    let dir = tempfile::tempdir().unwrap();
    let labels = scene(dir.path(), 8, 70);
    let o = options(labels.clone(), dir.path().join("unused"));
    let items = saccade::labels::read_labels(&labels).unwrap();
    let norm = saccade::bundle::Normalization { mean: [0.5; 3], std: [0.25; 3] };
    let data = Dataset::load(&labels, &items, &o.classes, o.shape, &norm, 1 << 24).unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    let mut m = saccade::train::fit::Sampled {
        attention: saccade::train::model::attention(&mut rng, &o.arch, 4, 50.0, 0.15),
        features: saccade::train::model::features(&mut rng, &o.arch, 4),
        head: saccade::train::model::head(&mut rng, 4),
    };
    let entry = m.clone();
    let (train, val): (Vec<usize>, Vec<usize>) = ((0..6).collect(), vec![6, 7]);
    let fit = FitOptions { learning_rate: 50.0, epochs: 2, patience: 5, ..o.fit.clone() };
    let entry_loss = saccade::train::fit::validate(&entry, &data, &val, fit.val_patches, 0, 1).1;
    let mut log = Vec::new();
    fit_sampled(&mut m, Stage::EndToEnd, &data, &train, &val, &fit, &mut rng, &mut log, &MultiProgress::new());
    assert_eq!(log.len(), 2);
    // The premise: every epoch of this stage is clearly worse than where it started.
    assert!(log.iter().all(|e| e.val_loss > entry_loss + 0.05), "entry {entry_loss}, epochs {log:?}");
    let same = |a: &saccade::train::nn::Net, b: &saccade::train::nn::Net| a.params() == b.params();
    assert!(same(&m.attention, &entry.attention) && same(&m.features, &entry.features) && same(&m.head, &entry.head));
}
