//! A bundle whose networks have designed (not learned) weights: local-contrast attention,
//! dark/bright spot features and a linear head. It exercises the whole engine with real
//! ONNX files before any training has happened, and the tests use it as a network with
//! known behaviour.

use std::path::Path;

use crate::bundle::{Activation, Manifest, NetworkRef, Normalization, FORMAT, MANIFEST};
use crate::onnx::writer::{Dim, GraphWriter};

pub const CLASSES: [&str; 2] = ["dark_spot", "bright_spot"];
pub const FEATURE_DIM: usize = 4;

/// Shape parameters of the designed bundle.
#[derive(Clone, Copy, Debug)]
pub struct DesignedParams {
    pub thumbnail_factor: u32,
    pub cell_stride: u32,
    pub patch_size: u32,
    /// Softmax temperature of the attention scores: higher concentrates attention.
    pub attention_gain: f32,
    /// Contrast (normalised units) above which a cell scores no higher.
    pub attention_cap: f32,
}

impl Default for DesignedParams {
    fn default() -> Self {
        Self { thumbnail_factor: 8, cell_stride: 4, patch_size: 48, attention_gain: 20.0, attention_cap: 0.5 }
    }
}

const GREY: [f32; 3] = [1.0 / 3.0; 3];

/// Centre-minus-box-mean kernel of side `k`: responds to local contrast.
fn contrast_kernel(k: usize) -> Vec<f32> {
    let mut w = vec![-1.0 / (k * k) as f32; k * k];
    w[k * k / 2] += 1.0;
    w
}

/// Records the geometry the weights were designed for, as the trainer records its own.
fn record_geometry(g: &mut GraphWriter, p: &DesignedParams) {
    for (key, value) in manifest(p).geometry() {
        g.metadata(&key, &value);
    }
}

/// Attention: capped |local contrast| of the grey thumbnail, max-pooled to cells, scaled.
pub fn attention_onnx(p: &DesignedParams) -> Vec<u8> {
    let mut g = GraphWriter::new("attention");
    record_geometry(&mut g, p);
    let x = g.input("thumbnail", &[Dim::Fixed(1), Dim::Fixed(3), Dim::Symbol("height"), Dim::Symbol("width")]);
    let grey = g.conv(&x, &GREY, &[0.0], 3, 1, 1, 0);
    // Edge padding: zero padding would make the frame border look like a flaw.
    let padded = g.pad_edge(&grey, 2);
    let contrast = g.conv(&padded, &contrast_kernel(5), &[0.0], 1, 5, 1, 0);
    let mag = g.unary("Abs", &contrast);
    // Capped, so that every clear flaw scores alike and several flaws share the attention.
    let cap = g.constant("cap", &[1], &[p.attention_cap]);
    let capped = g.binary("Min", &mag, &cap);
    let s = p.cell_stride as usize;
    let cells = g.pool("MaxPool", &capped, s, s);
    let scores = g.scale(&cells, p.attention_gain);
    g.output(&scores, "scores", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("rows"), Dim::Symbol("cols")]);
    g.finish("saccade-designed")
}

/// Features: [max dark contrast, max bright contrast, mean dark contrast, mean grey],
/// contrasts measured against the patch mean.
pub fn features_onnx(p: &DesignedParams) -> Vec<u8> {
    let mut g = GraphWriter::new("features");
    record_geometry(&mut g, p);
    let ps = p.patch_size as i64;
    let x = g.input("patches", &[Dim::Symbol("batch"), Dim::Fixed(3), Dim::Fixed(ps), Dim::Fixed(ps)]);
    let grey = g.conv(&x, &GREY, &[0.0], 3, 1, 1, 0);
    // Contrast against the patch's own mean: a spot does not create a halo of the
    // opposite sign around it, as a local-window contrast would.
    let mean = g.unary("GlobalAveragePool", &grey);
    let dark = g.binary("Sub", &mean, &grey);
    let dark_pos = g.unary("Relu", &dark);
    let bright = g.binary("Sub", &grey, &mean);
    let bright_pos = g.unary("Relu", &bright);
    let f0 = g.global_pool("GlobalMaxPool", &dark_pos);
    let f1 = g.global_pool("GlobalMaxPool", &bright_pos);
    let f2 = g.global_pool("GlobalAveragePool", &dark_pos);
    let f3 = g.global_pool("GlobalAveragePool", &grey);
    let f = g.concat(&[&f0, &f1, &f2, &f3], 1);
    g.output(&f, "features", &[Dim::Symbol("batch"), Dim::Fixed(FEATURE_DIM as i64)]);
    g.finish("saccade-designed")
}

/// Head: one logit per class from the spot strengths.
pub fn head_onnx() -> Vec<u8> {
    let mut g = GraphWriter::new("head");
    let x = g.input("psi", &[Dim::Symbol("n"), Dim::Fixed(FEATURE_DIM as i64)]);
    #[rustfmt::skip]
    let w = [
        10.0, 0.0, 0.0, 0.0, // dark_spot
        0.0, 10.0, 0.0, 0.0, // bright_spot
    ];
    let logits = g.dense(&x, &w, &[-4.5, -4.5], FEATURE_DIM);
    g.output(&logits, "logits", &[Dim::Symbol("n"), Dim::Fixed(CLASSES.len() as i64)]);
    g.finish("saccade-designed")
}

pub fn manifest(p: &DesignedParams) -> Manifest {
    let net = |file: &str, input: &str, output: &str| NetworkRef {
        file: file.into(),
        input: input.into(),
        output: output.into(),
    };
    Manifest {
        format: FORMAT,
        name: "designed-spots".into(),
        description: "Designed (untrained) weights: local-contrast attention, dark/bright spot features, linear head. Written by `saccade demo`.".into(),
        classes: CLASSES.iter().map(|s| s.to_string()).collect(),
        activation: Activation::Sigmoid,
        thresholds: vec![0.5, 0.5],
        thumbnail_factor: p.thumbnail_factor,
        cell_stride: p.cell_stride,
        patch_size: p.patch_size,
        feature_dim: FEATURE_DIM,
        normalization: Normalization { mean: [0.5; 3], std: [0.25; 3] },
        attention: net("attention.onnx", "thumbnail", "scores"),
        features: net("features.onnx", "patches", "features"),
        head: net("head.onnx", "psi", "logits"),
        baseline: None,
    }
}

/// Writes the designed bundle into `dir` (created if missing).
pub fn write_bundle(dir: &Path, p: &DesignedParams) -> std::io::Result<()> {
    std::fs::create_dir_all(dir)?;
    std::fs::write(dir.join("attention.onnx"), attention_onnx(p))?;
    std::fs::write(dir.join("features.onnx"), features_onnx(p))?;
    std::fs::write(dir.join("head.onnx"), head_onnx())?;
    let text = toml::to_string_pretty(&manifest(p)).expect("manifest serialises");
    std::fs::write(dir.join(MANIFEST), text)
}
