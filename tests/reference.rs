//! Checks against independent implementations outside this project, each named beside
//! its check: numpy (priority sampling, Duffield–Lund–Thorup 2007), onnxruntime (the
//! same ONNX files), Pillow (box reduction). They run through `tests/reference/*.py`.

mod common;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::demo::designed::{self, DesignedParams};
use saccade::engine::estimator::CellOrder;
use saccade::engine::thumbnail::{area_reduce, area_reduce_loop};
use saccade::onnx::writer::{Dim, GraphWriter};
use serde_json::{json, Value};
use tract_onnx::prelude::{tvec, Datum, Framework, InferenceFact, InferenceModelExt, IntoRunnable, Tensor};

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

#[test]
fn priority_weights_agree_with_numpy_reference() {
    // Reference: tests/reference/priority_sampling.py, a numpy implementation written
    // from Duffield, Lund and Thorup, J. ACM 54(6), 2007, fed the same uniforms.
    let mut rng = ChaCha8Rng::seed_from_u64(21);
    let n = 60;
    let d = 3;
    let raw: Vec<f64> = (0..n).map(|i| if i % 13 == 0 { 0.0 } else { rng.random::<f64>().powi(3) }).collect();
    let z: f64 = raw.iter().sum();
    let a: Vec<f64> = raw.iter().map(|x| x / z).collect();
    let u: Vec<f64> = (0..n).map(|_| 1.0 - rng.random::<f64>()).collect();
    let f: Vec<f32> = (0..n * d).map(|_| rng.random_range(-2.0..2.0)).collect();
    let ks = [1usize, 5, 17, 40, 55];
    let req = json!({
        "attention": a, "uniforms": u, "k": ks,
        "features": f.chunks(d).map(|r| r.iter().map(|&x| x as f64).collect::<Vec<_>>()).collect::<Vec<_>>(),
    });
    let out: Value =
        serde_json::from_str(&common::run_reference("priority_sampling.py", &[], &req.to_string())).unwrap();
    let order = CellOrder::priority_with_uniforms(&a, &u);
    assert_eq!(order.len(), 55, "zero-attention cells are never processed");
    for (r, &k) in out.as_array().unwrap().iter().zip(&ks) {
        let cells: Vec<usize> = r["cells"].as_array().unwrap().iter().map(|c| c.as_u64().unwrap() as usize).collect();
        assert_eq!(&order.cells[..k], &cells[..], "k={k}: processing order");
        let w = order.weights(k);
        let rows: Vec<f32> = cells.iter().flat_map(|&i| f[i * d..(i + 1) * d].iter().copied()).collect();
        let pairs = [
            (w.w.clone(), floats(&r["w"])),
            (w.c.clone(), floats(&r["v"])),
            (vec![w.tau.unwrap()], vec![r["tau"].as_f64().unwrap()]),
            (w.estimate(&rows, d), floats(&r["estimate"])),
            (w.covariance(&rows, d), floats(&r["covariance"])),
        ];
        for (ours, theirs) in pairs {
            assert_eq!(ours.len(), theirs.len());
            for (x, y) in ours.iter().zip(&theirs) {
                assert!((x - y).abs() <= 1e-6 * (1.0 + y.abs()), "k={k}: {x} vs numpy {y}");
            }
        }
    }
}

/// A conv net with pseudo-random weights: conv 3x3 stride 2 → relu → conv 1x1 → global
/// average pool, the shape family of real feature networks.
fn random_features_onnx(seed: u64, p: i64) -> Vec<u8> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut r = |n: usize| -> Vec<f32> { (0..n).map(|_| rng.random_range(-0.5..0.5)).collect() };
    let mut g = GraphWriter::new("features");
    let x = g.input("patches", &[Dim::Symbol("batch"), Dim::Fixed(3), Dim::Fixed(p), Dim::Fixed(p)]);
    let (w1, b1) = (r(8 * 3 * 9), r(8));
    let c1 = g.conv(&x, &w1, &b1, 3, 3, 2, 1);
    let a1 = g.unary("Relu", &c1);
    let (w2, b2) = (r(6 * 8), r(6));
    let c2 = g.conv(&a1, &w2, &b2, 8, 1, 1, 0);
    let f = g.global_pool("GlobalAveragePool", &c2);
    g.output(&f, "features", &[Dim::Symbol("batch"), Dim::Fixed(6)]);
    g.finish("test")
}

#[test]
fn tract_agrees_with_onnxruntime_on_the_test_networks() {
    // Reference: onnxruntime (PyPI), CPU provider, one thread, on the very same files.
    let dir = tempfile::tempdir().unwrap();
    let p = DesignedParams::default();
    let ps = p.patch_size as usize;
    let files = [
        ("attention.onnx", designed::attention_onnx(&p), "thumbnail", vec![1, 3, 37, 53]),
        ("features.onnx", designed::features_onnx(&p), "patches", vec![5, 3, ps, ps]),
        ("head.onnx", designed::head_onnx(), "psi", vec![7, designed::FEATURE_DIM]),
        ("random.onnx", random_features_onnx(3, 32), "patches", vec![4, 3, 32, 32]),
    ];
    let mut rng = ChaCha8Rng::seed_from_u64(5);
    let mut jobs = Vec::new();
    let mut ours = Vec::new();
    for (name, bytes, input, shape) in &files {
        let path = dir.path().join(name);
        std::fs::write(&path, bytes).unwrap();
        let n: usize = shape.iter().product();
        let data: Vec<f32> = (0..n).map(|_| rng.random_range(-2.0..2.0)).collect();
        let model = tract_onnx::onnx().model_for_path(&path).unwrap();
        let fact = InferenceFact::dt_shape(f32::datum_type(), shape);
        let plan = model.with_input_fact(0, fact).unwrap().into_optimized().unwrap().into_runnable().unwrap();
        let out = plan.run(tvec!(Tensor::from_shape(shape, &data).unwrap().into())).unwrap();
        let view = out[0].to_plain_array_view::<f32>().unwrap();
        ours.push((name, view.shape().to_vec(), view.iter().map(|&x| x as f64).collect::<Vec<_>>()));
        jobs.push(json!({ "model": path, "input": input, "shape": shape, "data": data }));
    }
    let out: Value =
        serde_json::from_str(&common::run_reference("onnx_run.py", &[], &Value::Array(jobs).to_string())).unwrap();
    for ((name, shape, data), theirs) in ours.iter().zip(out.as_array().unwrap()) {
        let tshape: Vec<usize> =
            theirs["shape"].as_array().unwrap().iter().map(|v| v.as_u64().unwrap() as usize).collect();
        assert_eq!(shape, &tshape, "{name}: output shape");
        for (x, y) in data.iter().zip(floats(&theirs["data"])) {
            assert!((x - y).abs() <= 1e-4 * (1.0 + y.abs()), "{name}: tract {x} vs onnxruntime {y}");
        }
    }
}

#[test]
fn thumbnail_agrees_with_pillow_reduce() {
    // Reference: Pillow's Image.reduce (PyPI), box average with partial edge boxes.
    let dir = tempfile::tempdir().unwrap();
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    // Sizes that divide evenly and sizes that leave partial boxes on both edges.
    for (w, h, s) in [(96u32, 64u32, 8u32), (2448 / 4, 2048 / 4, 8), (203, 117, 8), (130, 71, 4), (61, 45, 3)] {
        let img = image::RgbImage::from_fn(w, h, |x, y| {
            let base = ((x * 3 + y * 5) % 256) as i32;
            image::Rgb(std::array::from_fn(|c| (base + rng.random_range(-40..40) + 30 * c as i32).clamp(0, 255) as u8))
        });
        let src = dir.path().join(format!("in-{w}x{h}.png"));
        let dst = dir.path().join(format!("out-{w}x{h}.png"));
        img.save(&src).unwrap();
        common::run_reference("pillow_reduce.py", &[src.to_str().unwrap(), &s.to_string(), dst.to_str().unwrap()], "");
        let theirs = image::open(&dst).unwrap().into_rgb8();
        // Both paths: the one frames take (SIMD where s divides the sides) and the loop.
        for (path, ours) in [("area_reduce", area_reduce(&img, s)), ("area_reduce_loop", area_reduce_loop(&img, s))] {
            assert_eq!(ours.dimensions(), theirs.dimensions(), "{path} {w}x{h}/{s}");
            let worst =
                ours.as_raw().iter().zip(theirs.as_raw()).map(|(a, b)| (*a as i32 - *b as i32).abs()).max().unwrap();
            assert!(worst <= 1, "{path} {w}x{h}/{s}: differs from Pillow by {worst} grey levels");
        }
    }
}
