//! The networks a bundle holds, as trained here, and their export to ONNX.
//!
//! Only plain operators: 3×3 convolutions with zero padding (runtimes fold it into the
//! convolution), ReLU, max pooling, a global max, dense layers and a log. DEVELOPERS.md
//! ("Trainer architectures") has the per-patch times of the presets in tract and
//! onnxruntime.

use rand_chacha::ChaCha8Rng;

use super::nn::{Conv, Layer, Net};
use crate::onnx::writer::{Dim, GraphWriter};

const PRODUCER: &str = "saccade-train";

/// Channel widths of the networks.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Arch {
    /// Attention: the first layer (at half the thumbnail's resolution), the layers before
    /// each further halving, the layer at the cell grid.
    pub attention: [usize; 3],
    /// Feature network: the 3×3 layers at 1/2, 1/2, 1/4 and 1/8 of the patch side.
    pub features: [usize; 4],
    /// Thumbnail-only comparison network.
    pub baseline: [usize; 4],
}

impl Arch {
    pub const PRESETS: [&'static str; 3] = ["standard", "small", "wide"];

    pub fn preset(name: &str) -> Option<Self> {
        let standard = Self { attention: [8, 8, 16], features: [16, 16, 32, 32], baseline: [12, 16, 32, 32] };
        match name {
            "standard" => Some(standard),
            "small" => Some(Self { features: [8, 12, 24, 24], ..standard }),
            "wide" => Some(Self { features: [24, 32, 48, 64], ..standard }),
            _ => None,
        }
    }
}

impl Default for Arch {
    fn default() -> Self {
        Self::preset("standard").expect("default preset exists")
    }
}

fn conv3(rng: &mut ChaCha8Rng, cin: usize, cout: usize) -> Layer {
    Layer::Conv(Conv::new(rng, cin, cout, 3, 1, 1))
}

/// Slope of the initial attention score above its cap, relative to below it.
pub const ABOVE_CAP: f32 = 0.25;

/// Halvings from the thumbnail to the cell grid: `stride = 2^n`, `n ≥ 1`.
pub fn halvings(stride: u32) -> Option<usize> {
    (stride >= 2 && stride.is_power_of_two()).then(|| stride.trailing_zeros() as usize)
}

/// Thumbnail → one score per cell. A 4×4 layer at stride 2 on the edge-padded
/// thumbnail (each output sees the 3×3 neighbourhoods of all four thumbnail pixels of
/// its 2×2 block, so a mark of a few frame pixels, one thumbnail pixel, is not averaged
/// away), then a 3×3 layer and a max pool per further halving down to the cell grid, a
/// 3×3 layer there and a 1×1 layer to the score.
///
/// It starts as a capped local-contrast detector: the first layer's channels 0–3 are the
/// grey Laplacian at the block's four pixels and channels 4–7 its negative, the next
/// layer sums them (the block's absolute Laplacian), and the score is
/// `gain · contrast` at the cell's strongest block, with a quarter of the slope above `cap`.
/// The bend keeps large marks from drowning small ones in the softmax, so the first steps
/// already look at every kind of mark; training then learns which of them matter. Needs at least 8 channels in the
/// first layer and 2 in the others.
pub fn attention(rng: &mut ChaCha8Rng, a: &Arch, stride: u32, gain: f32, cap: f32) -> Net {
    let n = halvings(stride).expect("cell stride is a power of two");
    let [c1, c2, c3] = a.attention;
    assert!(
        c1 >= 8 && c2 >= 2 && c3 >= 2,
        "attention widths {:?} below the 8, 2, 2 the initial form needs",
        a.attention
    );
    let mut layers = vec![Layer::PadEdge(1), Layer::Conv(Conv::new(rng, 3, c1, 4, 2, 0)), Layer::Relu];
    let mut c = c1;
    for _ in 1..n {
        layers.extend([conv3(rng, c, c2), Layer::Relu, Layer::MaxPool(2)]);
        c = c2;
    }
    layers.extend([conv3(rng, c, c3), Layer::Relu, Layer::Conv(Conv::new(rng, c3, 1, 1, 1, 0))]);
    let mut net = Net::new(layers);
    let last = net.convs_mut().count() - 1;
    for (j, conv) in net.convs_mut().enumerate() {
        let (k, cin, cout) = (conv.k, conv.cin, conv.cout);
        let at = |ky: usize, kx: usize, ci: usize, co: usize| ((ky * k + kx) * cin + ci) * cout + co;
        if j == 0 {
            for co in 0..8 {
                for w in (0..k * k * cin).map(|r| r * cout + co) {
                    conv.w[w] = 0.0;
                }
            }
            for (sub, (sy, sx)) in [(0, 0), (0, 1), (1, 0), (1, 1)].into_iter().enumerate() {
                for dy in 0..3 {
                    for dx in 0..3 {
                        let lap = if (dy, dx) == (1, 1) { 1.0 } else { -1.0 / 8.0 };
                        for ch in 0..3 {
                            conv.w[at(sy + dy, sx + dx, ch, sub)] = lap / 3.0;
                            conv.w[at(sy + dy, sx + dx, ch, 4 + sub)] = -lap / 3.0;
                        }
                    }
                }
            }
        } else if j < last {
            // Output 0 (and 1 in the last 3×3 layer) reads only the contrast channels.
            let keep = if j + 1 == last { 2 } else { 1 };
            for r in 0..k * k * cin {
                for co in 0..keep {
                    conv.w[r * cout + co] = 0.0;
                }
            }
            let inputs = if j == 1 { 8 } else { 1 };
            for co in 0..keep {
                for ci in 0..inputs {
                    conv.w[at(1, 1, ci, co)] = 1.0;
                }
            }
            if keep == 2 {
                conv.b[1] = -cap;
            }
        } else {
            // Slope 1 below the cap, ABOVE_CAP above it: the order of marks is kept (a hard
            // cap would tie every textured cell with every mark), their range compressed.
            conv.w = vec![0.0; cin];
            conv.w[0] = gain;
            conv.w[1] = -gain * (1.0 - ABOVE_CAP);
        }
    }
    net
}

/// How far apart two patches' evidence may be: `SHARPNESS · x` is clamped to
/// `±EVIDENCE_LIMIT` before the exponential (e^40 is far inside f32).
pub const EVIDENCE_LIMIT: f32 = 40.0;
/// Sharpness of the evidence: a patch's class score `x` becomes `f = exp(SHARPNESS · x)`
/// and the head starts as `ln(Psi) / SHARPNESS`, so on one patch the head gives back `x`,
/// and on a frame the log of the attention on the best patch weighs in only
/// `1 / SHARPNESS` as much as the patch's own score (see [`features`]).
pub const SHARPNESS: f32 = 4.0;

/// Width of the per-patch scoring layer.
const SCORE_HIDDEN: usize = 32;
/// Offset inside the log of the pooled convolution features.
const FEATURE_EPS: f32 = 1e-3;

/// Patch → evidence, one value per class: a 3×3 layer at stride 2 (it still sees every
/// pixel, so a mark of one or two pixels is not lost, at a quarter of the cost of stride
/// 1), three 3×3 layers with a 2×2 max pool before the last two, all followed by ReLU, a
/// global max, then a small scorer (the log of the pooled features, one hidden ReLU
/// layer) giving one score `x_c` per class, and `f_c = exp(SHARPNESS · x_c)`.
///
/// Why the exponential: the engine reports `Psi = Σ_i a_i f_i`, an attention-weighted
/// mean. With `f = exp(γ x)`, `ln Psi_c / γ = ln (Σ_i a_i e^{γ x_ic}) / γ` is a
/// log-sum-exp: close to the largest `x_ic` among the cells attention looked at, lowered
/// only by the log of that cell's attention divided by `γ`. A mean of plain
/// non-negative features would instead dilute a mark by every look-alike and every cell
/// of ground that shares the attention, which is what made small defects go missing.
/// The patch side must be a multiple of 8.
pub fn features(rng: &mut ChaCha8Rng, a: &Arch, classes: usize) -> Net {
    let [f1, f2, f3, f4] = a.features;
    let mut hidden = Conv::dense(rng, f4, SCORE_HIDDEN);
    hidden.b = vec![0.1; SCORE_HIDDEN];
    let score = Conv::dense(rng, SCORE_HIDDEN, classes);
    Net::new(vec![
        Layer::Conv(Conv::new(rng, 3, f1, 3, 2, 1)),
        Layer::Relu,
        conv3(rng, f1, f2),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, f2, f3),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, f3, f4),
        Layer::Relu,
        Layer::GlobalMax,
        Layer::LogRelu(FEATURE_EPS),
        Layer::Conv(hidden),
        Layer::Relu,
        Layer::Conv(score),
        Layer::ClampExp { scale: SHARPNESS, limit: EVIDENCE_LIMIT },
    ])
}

/// Offset inside the head's log, below `exp(-EVIDENCE_LIMIT)`'s order: evidence below it
/// counts as none, and Gaussian samples of Psi that fall below zero stay finite.
pub const HEAD_EPS: f32 = 1e-12;

/// Psi → class logits: `ln(Psi + eps)` and a dense layer, starting as `ln(Psi_c) / SHARPNESS`
/// per class. On one patch's evidence alone it gives that patch's class logits, which is
/// how the warm-up trains it and how a finding is placed.
pub fn head(_rng: &mut ChaCha8Rng, classes: usize) -> Net {
    let mut d = Conv {
        k: 1,
        stride: 1,
        pad: 0,
        cin: classes,
        cout: classes,
        dense: true,
        w: vec![0.0; classes * classes],
        b: vec![0.0; classes],
    };
    for c in 0..classes {
        d.w[c * classes + c] = 1.0 / SHARPNESS;
    }
    Net::new(vec![Layer::LogRelu(HEAD_EPS), Layer::Conv(d)])
}

/// The thumbnail-only comparison: a small CNN on the same thumbnail, trained with the
/// same loss, that never looks at full resolution.
pub fn baseline(rng: &mut ChaCha8Rng, a: &Arch, classes: usize) -> Net {
    let [b1, b2, b3, b4] = a.baseline;
    Net::new(vec![
        Layer::PadEdge(1),
        Layer::Conv(Conv::new(rng, 3, b1, 3, 1, 0)),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, b1, b2),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, b2, b3),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, b3, b4),
        Layer::Relu,
        Layer::GlobalMax,
        Layer::Conv(Conv::dense(rng, b4, classes)),
    ])
}

fn thumbnail_input(g: &mut GraphWriter) -> String {
    g.input("thumbnail", &[Dim::Fixed(1), Dim::Fixed(3), Dim::Symbol("height"), Dim::Symbol("width")])
}

/// Records the bundle geometry the weights were trained for (`Manifest::geometry`), which
/// the bundle loader checks against the manifest.
fn record_geometry(g: &mut GraphWriter, geometry: &[(String, String)]) {
    for (key, value) in geometry {
        g.metadata(key, value);
    }
}

pub fn attention_onnx(net: &Net, geometry: &[(String, String)]) -> Vec<u8> {
    let mut g = GraphWriter::new("attention");
    record_geometry(&mut g, geometry);
    let x = thumbnail_input(&mut g);
    let s = net.onnx(&mut g, &x);
    g.output(&s, "scores", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("rows"), Dim::Symbol("cols")]);
    g.finish(PRODUCER)
}

pub fn features_onnx(net: &Net, patch: usize, dim: usize, geometry: &[(String, String)]) -> Vec<u8> {
    let mut g = GraphWriter::new("features");
    record_geometry(&mut g, geometry);
    let p = patch as i64;
    let x = g.input("patches", &[Dim::Symbol("batch"), Dim::Fixed(3), Dim::Fixed(p), Dim::Fixed(p)]);
    let f = net.onnx(&mut g, &x);
    g.output(&f, "features", &[Dim::Symbol("batch"), Dim::Fixed(dim as i64)]);
    g.finish(PRODUCER)
}

pub fn head_onnx(net: &Net, dim: usize, classes: usize) -> Vec<u8> {
    let mut g = GraphWriter::new("head");
    let x = g.input("psi", &[Dim::Symbol("n"), Dim::Fixed(dim as i64)]);
    let z = net.onnx(&mut g, &x);
    g.output(&z, "logits", &[Dim::Symbol("n"), Dim::Fixed(classes as i64)]);
    g.finish(PRODUCER)
}

pub fn baseline_onnx(net: &Net, classes: usize, geometry: &[(String, String)]) -> Vec<u8> {
    let mut g = GraphWriter::new("baseline");
    record_geometry(&mut g, geometry);
    let x = thumbnail_input(&mut g);
    let z = net.onnx(&mut g, &x);
    g.output(&z, "logits", &[Dim::Fixed(1), Dim::Fixed(classes as i64)]);
    g.finish(PRODUCER)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::train::nn::Act;
    use rand::SeedableRng;

    /// The initial attention scores a bright dot by its contrast, capped, and flat ground
    /// by nothing.
    #[test]
    fn attention_starts_as_capped_local_contrast() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let (gain, cap) = (40.0, 0.15);
        let net = attention(&mut rng, &Arch::default(), 4, gain, cap);
        let (h, w) = (16, 16);
        let mut x = vec![0.1f32; h * w * 3];
        let dot = |x: &mut Vec<f32>, y: usize, xx: usize, v: f32| x[(y * w + xx) * 3..][..3].fill(v);
        dot(&mut x, 2, 2, 0.1 + 0.05); // faint: below the cap
        dot(&mut x, 9, 13, 0.1 + 1.0); // strong: above the bend
        let s = net.infer(Act::new(1, h, w, 3, x)).data;
        assert_eq!(s.len(), 16);
        // The dot's Laplacian, plus a ring of its negative (an eighth) at the three other
        // pixels of its 2×2 block.
        assert!((s[0] - gain * 0.05 * (1.0 + 3.0 / 8.0)).abs() < 1e-4, "faint dot scores {}", s[0]);
        let strong = 1.0 * (1.0 + 3.0 / 8.0);
        let want = gain * (cap + ABOVE_CAP * (strong - cap));
        assert!((s[2 * 4 + 3] - want).abs() < 1e-3, "strong dot scores {} (want {want})", s[11]);
        assert!(s.iter().enumerate().filter(|(i, _)| ![0, 11].contains(i)).all(|(_, v)| v.abs() < 1e-4), "{s:?}");
    }
}
