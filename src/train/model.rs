//! The networks a bundle holds, as trained here, and their export to ONNX.
//!
//! Only plain operators: 3×3 convolutions with zero padding (runtimes fold it into the
//! convolution), ReLU, max pooling, a global max, dense layers and a log. DEVELOPERS.md
//! ("Trainer architectures") has the per-patch times of the presets in tract and
//! onnxruntime.

use rand_chacha::ChaCha8Rng;

use super::nn::{small, Conv, Layer, Net};
use crate::onnx::writer::{Dim, GraphWriter};

const PRODUCER: &str = "saccade-train";

/// Channel widths of the networks.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Arch {
    /// Attention: full thumbnail resolution, after each halving, at the cell grid.
    pub attention: [usize; 3],
    /// Feature network: the 3×3 layers at 1, 1/2, 1/4 and 1/8 of the patch side; the last
    /// one's width is the feature dimension.
    pub features: [usize; 4],
    pub head_hidden: usize,
    /// Thumbnail-only comparison network.
    pub baseline: [usize; 4],
}

impl Arch {
    pub const PRESETS: [&'static str; 2] = ["standard", "small"];

    pub fn preset(name: &str) -> Option<Self> {
        let standard =
            Self { attention: [8, 16, 16], features: [8, 16, 32, 32], head_hidden: 32, baseline: [12, 16, 32, 32] };
        match name {
            "standard" => Some(standard),
            "small" => Some(Self { features: [8, 12, 24, 24], ..standard }),
            _ => None,
        }
    }

    pub fn feature_dim(&self) -> usize {
        self.features[3]
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

/// Halvings from the thumbnail to the cell grid: `stride = 2^n`, `n ≥ 1`.
pub fn halvings(stride: u32) -> Option<usize> {
    (stride >= 2 && stride.is_power_of_two()).then(|| stride.trailing_zeros() as usize)
}

/// Thumbnail → one score per cell. A 3×3 layer (edge-padded) at the thumbnail's own resolution (where a
/// mark of a few frame pixels is still a distinct thumbnail pixel), then max pools with a
/// 3×3 layer after each, down to the cell grid, and a 1×1 layer to the score.
///
/// It starts as a capped local-contrast detector: channels 0 and 1 of the first layer are
/// the grey Laplacian of either sign, the later layers carry their sum through, and the
/// score is `gain · min(|Laplacian|, cap)` at the cell's strongest point. The cap keeps
/// large marks from drowning small ones in the softmax, so the first steps already look
/// at every kind of mark; training then learns which of them matter.
pub fn attention(rng: &mut ChaCha8Rng, a: &Arch, stride: u32, gain: f32, cap: f32) -> Net {
    let n = halvings(stride).expect("cell stride is a power of two");
    let [c1, c2, c3] = a.attention;
    let mut layers = vec![Layer::PadEdge(1), Layer::Conv(Conv::new(rng, 3, c1, 3, 1, 0)), Layer::Relu];
    let mut c = c1;
    for _ in 0..n {
        layers.extend([Layer::MaxPool(2), conv3(rng, c, c2), Layer::Relu]);
        c = c2;
    }
    layers.extend([conv3(rng, c, c3), Layer::Relu, Layer::Conv(Conv::new(rng, c3, 1, 1, 1, 0))]);
    let mut net = Net::new(layers);
    let last = net.convs_mut().count() - 1;
    for (j, conv) in net.convs_mut().enumerate() {
        let (cin, cout) = (conv.cin, conv.cout);
        let at = |tap: usize, ci: usize, co: usize| (tap * cin + ci) * cout + co;
        if j == 0 {
            for tap in 0..9 {
                let lap = if tap == 4 { 1.0 } else { -1.0 / 8.0 };
                for ch in 0..3 {
                    conv.w[at(tap, ch, 0)] = lap / 3.0;
                    conv.w[at(tap, ch, 1)] = -lap / 3.0;
                }
            }
        } else if j < last {
            // Outputs 0 (and 1 in the last 3×3 layer) read only input channels 0 (and 1).
            let keep = if j + 1 == last { 2 } else { 1 };
            for tap in 0..9 {
                for ci in 0..cin {
                    for co in 0..keep {
                        conv.w[at(tap, ci, co)] = 0.0;
                    }
                }
            }
            let sum_in = if j == 1 { 2 } else { 1 };
            for co in 0..keep {
                for ci in 0..sum_in {
                    conv.w[at(4, ci, co)] = 1.0;
                }
            }
            if keep == 2 {
                conv.b[1] = -cap;
            }
        } else {
            conv.w = vec![0.0; cin];
            conv.w[0] = gain;
            conv.w[1] = -gain;
        }
    }
    net
}

/// Patch → feature vector: four 3×3 layers with a 2×2 max pool between each, all
/// followed by ReLU, and a global max, so features are non-negative evidence that
/// averages sensibly under the attention weights. The patch side must be a multiple of 8.
pub fn features(rng: &mut ChaCha8Rng, a: &Arch) -> Net {
    let [f1, f2, f3, f4] = a.features;
    Net::new(vec![
        conv3(rng, 3, f1),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, f1, f2),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, f2, f3),
        Layer::Relu,
        Layer::MaxPool(2),
        conv3(rng, f3, f4),
        Layer::Relu,
        Layer::GlobalMax,
    ])
}

/// Offset inside the head's log: evidence well below it counts as none.
pub const HEAD_EPS: f32 = 1e-3;

/// Psi → class logits: `ln(Psi + eps)`, one hidden ReLU layer, one logit per class.
pub fn head(rng: &mut ChaCha8Rng, a: &Arch, classes: usize) -> Net {
    let mut first = Conv::dense(rng, a.feature_dim(), a.head_hidden);
    first.b = small(rng, a.head_hidden, 0.1);
    Net::new(vec![
        Layer::LogRelu(HEAD_EPS),
        Layer::Conv(first),
        Layer::Relu,
        Layer::Conv(Conv::dense(rng, a.head_hidden, classes)),
    ])
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

pub fn attention_onnx(net: &Net) -> Vec<u8> {
    let mut g = GraphWriter::new("attention");
    let x = thumbnail_input(&mut g);
    let s = net.onnx(&mut g, &x);
    g.output(&s, "scores", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("rows"), Dim::Symbol("cols")]);
    g.finish(PRODUCER)
}

pub fn features_onnx(net: &Net, patch: usize, dim: usize) -> Vec<u8> {
    let mut g = GraphWriter::new("features");
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

pub fn baseline_onnx(net: &Net, classes: usize) -> Vec<u8> {
    let mut g = GraphWriter::new("baseline");
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
        dot(&mut x, 9, 13, 0.1 + 1.0); // strong: capped
        let s = net.infer(Act::new(1, h, w, 3, x)).data;
        assert_eq!(s.len(), 16);
        // The dot's Laplacian (0.05) plus the strongest of its ring of negative Laplacian
        // (0.05 / 8), each channel pooled on its own.
        assert!((s[0] - gain * (0.05 + 0.05 / 8.0)).abs() < 1e-4, "faint dot scores {}", s[0]);
        assert!((s[2 * 4 + 3] - gain * cap).abs() < 1e-4, "strong dot scores {}", s[11]);
        assert!(s.iter().enumerate().filter(|(i, _)| ![0, 11].contains(i)).all(|(_, v)| v.abs() < 1e-4), "{s:?}");
    }
}
