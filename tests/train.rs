//! The trainer end to end on a tiny generated set: it lowers the loss, and what it
//! exports passes the ONNX checker and computes what the training graph computes, in
//! tract and in onnxruntime.
#![cfg(feature = "train")]

mod common;

use std::process::Command;

use candle_core::{Device, Tensor as CTensor};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::engine::Bundle;
use saccade::train::data::Shape;
use saccade::train::fit::FitOptions;
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

#[test]
fn a_tiny_run_lowers_the_loss_and_exports_checked_networks() {
    let dir = tempfile::tempdir().unwrap();
    let frames = dir.path().join("frames");
    let status = Command::new(env!("CARGO_BIN_EXE_saccade"))
        .args([
            "scene",
            "--out",
            frames.to_str().unwrap(),
            "--count",
            "12",
            "--seed",
            "40",
            "--size",
            "512x384",
            "--format",
            "png",
        ])
        .status()
        .unwrap();
    assert!(status.success());
    let out = dir.path().join("bundle");
    let o = TrainOptions {
        labels: frames.join("labels.jsonl"),
        frames: None,
        out: out.clone(),
        name: "tiny".into(),
        classes: saccade::demo::scene::CLASSES.iter().map(|s| s.to_string()).collect(),
        shape: Shape { factor: 8, stride: 4, patch: 48 },
        arch: Default::default(),
        fit: FitOptions { epochs: 2, warmup: 2, batch: 3, patches: 8, learning_rate: 1e-2, entropy: 0.01, patience: 5 },
        validation: 0.25,
        seed: 3,
        baseline: true,
        baseline_epochs: 2,
        max_pixels: 1 << 24,
    };
    let t = train(&o).unwrap();
    assert!(t.loss_after < t.loss_before, "training loss {} → {}", t.loss_before, t.loss_after);
    assert_eq!(t.log.iter().filter(|e| e.model == "sampled").count(), 2);
    assert_eq!(t.log.iter().filter(|e| e.model == "warm-up").count(), 2);

    let bundle = Bundle::load(&out, &[1, 5]).unwrap();
    assert!(bundle.baseline.is_some());
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let mut rand = |n: usize| -> Vec<f32> { (0..n).map(|_| rng.random_range(-2.0f32..2.0)).collect() };
    let cpu = Device::Cpu;
    let s = &t.sampled;
    // Each network: (file, input name, NCHW/NC input, training-graph output).
    let mut cases: Vec<(&str, &str, Vec<usize>, Vec<f32>, Vec<f32>)> = Vec::new();
    let thumb = rand(32 * 48 * 3);
    let x = CTensor::from_vec(thumb.clone(), (1, 32, 48, 3), &cpu).unwrap();
    cases.push((
        "attention.onnx",
        "thumbnail",
        vec![1, 3, 32, 48],
        planar(&thumb, 1, 32, 48),
        s.attention.forward(&x).unwrap().flatten_all().unwrap().to_vec1().unwrap(),
    ));
    let b = t.baseline.as_ref().unwrap();
    cases.push((
        "baseline.onnx",
        "thumbnail",
        vec![1, 3, 32, 48],
        planar(&thumb, 1, 32, 48),
        b.forward(&x).unwrap().flatten_all().unwrap().to_vec1().unwrap(),
    ));
    let patches = rand(5 * 48 * 48 * 3);
    let x = CTensor::from_vec(patches.clone(), (5, 48, 48, 3), &cpu).unwrap();
    cases.push((
        "features.onnx",
        "patches",
        vec![5, 3, 48, 48],
        planar(&patches, 5, 48, 48),
        s.features.forward(&x).unwrap().flatten_all().unwrap().to_vec1().unwrap(),
    ));
    let psi: Vec<f32> = rand(3 * 32).iter().map(|v| v.abs()).collect();
    let x = CTensor::from_vec(psi.clone(), (3, 32), &cpu).unwrap();
    cases.push((
        "head.onnx",
        "psi",
        vec![3, 32],
        psi,
        s.head.forward(&x).unwrap().flatten_all().unwrap().to_vec1().unwrap(),
    ));

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
}
