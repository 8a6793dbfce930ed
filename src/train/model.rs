//! The networks a bundle holds, as trained here, and their export to ONNX.
//!
//! Only plain operators: patch-embedding and 3×3 convolutions, ReLU, max pooling and
//! dense layers. DEVELOPERS.md ("Trainer architectures") has the per-patch times of the
//! feature-network presets in tract and onnxruntime.

use candle_core::{Result, Tensor, D};

use super::layers::{fold, global_max, max_pool, Conv, Dense, Params};
use crate::onnx::writer::{Dim, GraphWriter};

const PRODUCER: &str = "saccade-train";

/// Channel widths of the three networks.
#[derive(Clone, Copy, Debug)]
pub struct Arch {
    pub attention: usize,
    /// Side of the feature network's first, non-overlapping convolution.
    pub embed: usize,
    pub features: [usize; 2],
    pub feature_dim: usize,
    pub head_hidden: usize,
    pub baseline: [usize; 3],
}

impl Arch {
    /// Named shapes of the feature network; `compact` is the default.
    pub fn preset(name: &str) -> Option<Self> {
        let base = Self {
            attention: 8,
            embed: 4,
            features: [16, 32],
            feature_dim: 32,
            head_hidden: 32,
            baseline: [12, 16, 32],
        };
        match name {
            "compact" => Some(base),
            "wide" => Some(Self { features: [32, 64], ..base }),
            "coarse" => Some(Self { embed: 8, features: [32, 32], ..base }),
            _ => None,
        }
    }

    pub const PRESETS: [&'static str; 3] = ["compact", "wide", "coarse"];
}

impl Default for Arch {
    fn default() -> Self {
        Self::preset("compact").expect("default preset exists")
    }
}

fn thumbnail_input(g: &mut GraphWriter) -> String {
    g.input("thumbnail", &[Dim::Fixed(1), Dim::Fixed(3), Dim::Symbol("height"), Dim::Symbol("width")])
}

/// Thumbnail → one score per cell: a 2×2 patch embedding, a 3×3 convolution, a max pool
/// to the cell grid and two 1×1 convolutions. Embedding first keeps the costly 3×3 layer
/// at a quarter of the thumbnail's pixels.
pub struct AttentionNet {
    c1: Conv,
    c2: Conv,
    c3: Conv,
    c4: Conv,
    pub stride: usize,
}

impl AttentionNet {
    /// Starts as a local-contrast detector (channel 0 of the embedding is the grey level,
    /// channels 0 and 1 of the 3×3 layer its Laplacian of either sign, summed through to
    /// the score) so that sampling finds candidate marks from the first step; training
    /// then learns which of them matter.
    pub fn new(p: &mut Params, a: &Arch, stride: usize, gain: f32) -> Result<Self> {
        assert!(stride % 2 == 0 && stride >= 2, "the trained attention network needs an even cell stride");
        let ch = a.attention;
        let c1 = Conv::new(p, 3, ch, 2, 2)?;
        let c2 = Conv::new(p, ch, ch, 3, 1)?;
        let c3 = Conv::new(p, ch, ch, 1, 1)?;
        let c4 = Conv::new(p, ch, 1, 1, 1)?;
        let small = |p: &mut Params, n: usize| -> Vec<f32> {
            (0..n).map(|_| rand::Rng::random_range(p.rng(), -0.05f32..0.05)).collect()
        };
        // Rows are (dy, dx, c); columns output channels.
        let mut w1 = small(p, 12 * ch);
        for r in 0..12 {
            w1[r * ch] = 1.0 / 12.0;
        }
        c1.set(&w1, &vec![0.0; ch])?;
        let mut w2 = small(p, 9 * ch * ch);
        for t in 0..9 {
            let lap = if t == 4 { 1.0 } else { -1.0 / 8.0 };
            for c in 0..ch {
                w2[(t * ch + c) * ch] = if c == 0 { lap } else { 0.0 };
                w2[(t * ch + c) * ch + 1] = if c == 0 { -lap } else { 0.0 };
            }
        }
        c2.set(&w2, &vec![0.0; ch])?;
        let mut w3 = small(p, ch * ch);
        for c in 0..ch {
            w3[c * ch] = if c < 2 { 1.0 } else { 0.0 };
        }
        c3.set(&w3, &vec![0.0; ch])?;
        let mut w4 = vec![0.0; ch];
        w4[0] = gain;
        c4.set(&w4, &[0.0])?;
        Ok(Self { c1, c2, c3, c4, stride })
    }

    /// `[B, H, W, 3]` (H, W multiples of the stride) → scores `[B, cells]`, row-major.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        self.forward_folded(&fold(x, 2)?)
    }

    /// The same on a thumbnail folded 2×2 ([`fold`]), as training stores it.
    pub fn forward_folded(&self, x: &Tensor) -> Result<Tensor> {
        let h = self.c2.forward(&self.c1.forward_folded(x)?)?.relu()?;
        let h = max_pool(&h, self.stride / 2)?;
        let s = self.c4.forward(&self.c3.forward(&h)?.relu()?)?;
        let b = s.dim(0)?;
        s.reshape((b, ()))
    }

    pub fn onnx(&self) -> Result<Vec<u8>> {
        let mut g = GraphWriter::new("attention");
        let x = thumbnail_input(&mut g);
        let h = self.c1.onnx(&mut g, &x)?;
        let h = self.c2.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let h = g.max_pool_ceil(&h, self.stride / 2);
        let h = self.c3.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let s = self.c4.onnx(&mut g, &h)?;
        g.output(&s, "scores", &[Dim::Fixed(1), Dim::Fixed(1), Dim::Symbol("rows"), Dim::Symbol("cols")]);
        Ok(g.finish(PRODUCER))
    }
}

/// Patch → feature vector: a 4×4 (or 8×8) patch embedding, 3×3 convolution, 2×2 max pool, 3×3
/// convolution and a global max, all followed by ReLU so features are non-negative
/// evidence that averages sensibly under the attention weights.
pub struct FeatureNet {
    pub c1: Conv,
    c2: Conv,
    c3: Conv,
    pub patch: usize,
    pub dim: usize,
}

impl FeatureNet {
    pub fn new(p: &mut Params, a: &Arch, patch: usize) -> Result<Self> {
        assert!(patch % (2 * a.embed) == 0, "patch size must be a multiple of twice the embedding side");
        let [f1, f2] = a.features;
        Ok(Self {
            c1: Conv::new(p, 3, f1, a.embed, a.embed)?,
            c2: Conv::new(p, f1, f2, 3, 1)?,
            c3: Conv::new(p, f2, a.feature_dim, 3, 1)?,
            patch,
            dim: a.feature_dim,
        })
    }

    /// `[N, P, P, 3]` → `[N, D]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        self.forward_folded(&fold(x, self.c1.k)?)
    }

    /// The same on patches folded by the embedding side ([`fold`]), as training makes them.
    pub fn forward_folded(&self, x: &Tensor) -> Result<Tensor> {
        let h = self.c1.forward_folded(x)?.relu()?;
        let h = max_pool(&self.c2.forward(&h)?.relu()?, 2)?;
        global_max(&self.c3.forward(&h)?.relu()?)
    }

    pub fn onnx(&self) -> Result<Vec<u8>> {
        let mut g = GraphWriter::new("features");
        let p = self.patch as i64;
        let x = g.input("patches", &[Dim::Symbol("batch"), Dim::Fixed(3), Dim::Fixed(p), Dim::Fixed(p)]);
        let h = self.c1.onnx(&mut g, &x)?;
        let h = g.unary("Relu", &h);
        let h = self.c2.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let h = g.pool("MaxPool", &h, 2, 2);
        let h = self.c3.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let f = g.global_pool("GlobalMaxPool", &h);
        g.output(&f, "features", &[Dim::Symbol("batch"), Dim::Fixed(self.dim as i64)]);
        Ok(g.finish(PRODUCER))
    }
}

/// Psi → class logits: one hidden ReLU layer.
pub struct Head {
    d1: Dense,
    d2: Dense,
}

impl Head {
    pub fn new(p: &mut Params, a: &Arch, classes: usize) -> Result<Self> {
        Ok(Self { d1: Dense::new(p, a.feature_dim, a.head_hidden)?, d2: Dense::new(p, a.head_hidden, classes)? })
    }

    pub fn forward(&self, psi: &Tensor) -> Result<Tensor> {
        self.d2.forward(&self.d1.forward(psi)?.relu()?)
    }

    pub fn onnx(&self) -> Result<Vec<u8>> {
        let mut g = GraphWriter::new("head");
        let x = g.input("psi", &[Dim::Symbol("n"), Dim::Fixed(self.d1.din as i64)]);
        let h = self.d1.onnx(&mut g, &x)?;
        let h = g.unary("Relu", &h);
        let z = self.d2.onnx(&mut g, &h)?;
        g.output(&z, "logits", &[Dim::Symbol("n"), Dim::Fixed(self.d2.dout as i64)]);
        Ok(g.finish(PRODUCER))
    }
}

/// The thumbnail-only comparison: a small CNN on the same thumbnail, trained with the
/// same loss, that never looks at full resolution. 2×2 embedding, then 3×3 convolutions
/// and 2×2 max pools, a global max and a linear layer.
pub struct Baseline {
    c1: Conv,
    c2: Conv,
    c3: Conv,
    c4: Conv,
    out: Dense,
}

impl Baseline {
    pub fn new(p: &mut Params, a: &Arch, classes: usize) -> Result<Self> {
        let [b1, b2, b3] = a.baseline;
        Ok(Self {
            c1: Conv::new(p, 3, b1, 2, 2)?,
            c2: Conv::new(p, b1, b2, 3, 1)?,
            c3: Conv::new(p, b2, b3, 3, 1)?,
            c4: Conv::new(p, b3, b3, 3, 1)?,
            out: Dense::new(p, b3, classes)?,
        })
    }

    /// `[B, H, W, 3]` (H, W multiples of 8) → logits `[B, classes]`.
    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        self.forward_folded(&fold(x, 2)?)
    }

    /// The same on a thumbnail folded 2×2 ([`fold`]).
    pub fn forward_folded(&self, x: &Tensor) -> Result<Tensor> {
        let h = self.c2.forward(&self.c1.forward_folded(x)?)?.relu()?;
        let h = max_pool(&self.c3.forward(&max_pool(&h, 2)?)?.relu()?, 2)?;
        let h = self.c4.forward(&h)?.relu()?;
        self.out.forward(&global_max(&h)?)
    }

    pub fn onnx(&self) -> Result<Vec<u8>> {
        let mut g = GraphWriter::new("baseline");
        let x = thumbnail_input(&mut g);
        let h = self.c1.onnx(&mut g, &x)?;
        let h = self.c2.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let h = g.max_pool_ceil(&h, 2);
        let h = self.c3.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let h = g.max_pool_ceil(&h, 2);
        let h = self.c4.onnx(&mut g, &h)?;
        let h = g.unary("Relu", &h);
        let f = g.global_pool("GlobalMaxPool", &h);
        let z = self.out.onnx(&mut g, &f)?;
        g.output(&z, "logits", &[Dim::Fixed(1), Dim::Fixed(self.out.dout as i64)]);
        Ok(g.finish(PRODUCER))
    }
}

/// Log-softmax over cells, `[B, N]`.
pub fn log_attention(scores: &Tensor) -> Result<Tensor> {
    candle_nn::ops::log_softmax(scores, D::Minus1)
}
