//! Layers for training on the CPU, channels-last (`[N, H, W, C]`), and their ONNX export.
//!
//! Convolutions are written as shifted copies of the input followed by one matrix
//! product. Every operation involved (pad, narrow, cat, matmul) has a fast gradient in
//! candle, whereas its direct transposed convolution, which the gradient of its own
//! `conv2d` uses, loops over pixels one by one. The weight matrix rows are ordered
//! `(dy, dx, c)`; export reorders them into ONNX's `[out, in, kh, kw]`.

use candle_core::{Result, Tensor, Var};
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use crate::onnx::writer::GraphWriter;

/// The trainable variables of a model, created from a seeded generator.
pub struct Params {
    pub vars: Vec<Var>,
    rng: ChaCha8Rng,
}

impl Params {
    pub fn new(rng: ChaCha8Rng) -> Self {
        Self { vars: Vec::new(), rng }
    }

    fn var(&mut self, data: Vec<f32>, shape: &[usize]) -> Result<Var> {
        let v = Var::from_vec(data, shape, &candle_core::Device::Cpu)?;
        self.vars.push(v.clone());
        Ok(v)
    }

    /// He-normal weights (He et al., ICCV 2015) for a layer with `fan_in` inputs.
    fn he(&mut self, fan_in: usize, n: usize) -> Vec<f32> {
        let d = Normal::new(0.0, (2.0 / fan_in as f32).sqrt()).expect("valid sigma");
        (0..n).map(|_| d.sample(&mut self.rng)).collect()
    }

    pub fn rng(&mut self) -> &mut ChaCha8Rng {
        &mut self.rng
    }
}

pub fn values(v: &Var) -> Result<Vec<f32>> {
    v.as_tensor().flatten_all()?.to_vec1::<f32>()
}

/// A `k × k` convolution. With `stride == 1` it pads by `k / 2`, repeating edge values
/// (k odd, output the size of the input); with `stride == k` it is a non-overlapping patch embedding.
pub struct Conv {
    pub w: Var,
    pub b: Var,
    pub k: usize,
    pub stride: usize,
    pub cin: usize,
    pub cout: usize,
}

impl Conv {
    pub fn new(p: &mut Params, cin: usize, cout: usize, k: usize, stride: usize) -> Result<Self> {
        assert!(stride == 1 && k % 2 == 1 || stride == k, "conv: stride 1 with odd k, or stride k");
        let w = p.he(k * k * cin, k * k * cin * cout);
        Ok(Self { w: p.var(w, &[k * k * cin, cout])?, b: p.var(vec![0.0; cout], &[cout])?, k, stride, cin, cout })
    }

    /// Overwrites weights and bias (rows `(dy, dx, c)`, columns output channels).
    pub fn set(&self, w: &[f32], b: &[f32]) -> Result<()> {
        self.w.set(&Tensor::from_slice(w, (self.k * self.k * self.cin, self.cout), &candle_core::Device::Cpu)?)?;
        self.b.set(&Tensor::from_slice(b, self.cout, &candle_core::Device::Cpu)?)
    }

    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (n, h, w, c) = x.dims4()?;
        let k = self.k;
        let (cols, oh, ow) = if k == 1 {
            (x.clone(), h, w)
        } else if self.stride == k {
            return self.forward_folded(&fold(x, k)?);
        } else {
            // Edge padding: with zeros the border of every thumbnail and patch would look
            // like a strong edge, and attention would pile up there.
            let p = k / 2;
            let xp = x.pad_with_same(1, p, p)?.pad_with_same(2, p, p)?;
            let mut parts = Vec::with_capacity(k * k);
            for dy in 0..k {
                for dx in 0..k {
                    parts.push(xp.narrow(1, dy, h)?.narrow(2, dx, w)?);
                }
            }
            (Tensor::cat(&parts, 3)?, h, w)
        };
        cols.reshape((n * oh * ow, k * k * c))?
            .matmul(self.w.as_tensor())?
            .broadcast_add(self.b.as_tensor())?
            .reshape((n, oh, ow, self.cout))
    }

    /// A patch embedding (`stride == k`) applied to input already folded by [`fold`].
    pub fn forward_folded(&self, x: &Tensor) -> Result<Tensor> {
        let (n, oh, ow, kkc) = x.dims4()?;
        x.reshape((n * oh * ow, kkc))?
            .matmul(self.w.as_tensor())?
            .broadcast_add(self.b.as_tensor())?
            .reshape((n, oh, ow, self.cout))
    }

    pub fn onnx(&self, g: &mut GraphWriter, x: &str) -> Result<String> {
        let w = values(&self.w)?;
        let (k, cin, cout) = (self.k, self.cin, self.cout);
        let mut ow = vec![0f32; w.len()];
        for dy in 0..k {
            for dx in 0..k {
                for c in 0..cin {
                    for o in 0..cout {
                        ow[((o * cin + c) * k + dy) * k + dx] = w[((dy * k + dx) * cin + c) * cout + o];
                    }
                }
            }
        }
        if self.stride == 1 && k > 1 {
            let padded = g.pad_edge(x, (k / 2) as i64);
            return Ok(g.conv(&padded, &ow, &values(&self.b)?, cin, k, 1, 0));
        }
        Ok(g.conv(x, &ow, &values(&self.b)?, cin, k, self.stride, 0))
    }
}

/// Space to depth: `[N, H, W, C]` → `[N, H/k, W/k, k·k·C]`, each block's values in
/// `(dy, dx, c)` order (a partial last block is dropped).
pub fn fold(x: &Tensor, k: usize) -> Result<Tensor> {
    let (n, h, w, c) = x.dims4()?;
    let (oh, ow) = (h / k, w / k);
    x.narrow(1, 0, oh * k)?.narrow(2, 0, ow * k)?.reshape((n, oh, k, ow, k, c))?.permute((0, 1, 3, 2, 4, 5))?.reshape((
        n,
        oh,
        ow,
        k * k * c,
    ))
}

/// Fully connected layer on `[N, din]`.
pub struct Dense {
    pub w: Var,
    pub b: Var,
    pub din: usize,
    pub dout: usize,
}

impl Dense {
    pub fn new(p: &mut Params, din: usize, dout: usize) -> Result<Self> {
        let w = p.he(din, din * dout);
        Ok(Self { w: p.var(w, &[din, dout])?, b: p.var(vec![0.0; dout], &[dout])?, din, dout })
    }

    pub fn forward(&self, x: &Tensor) -> Result<Tensor> {
        x.matmul(self.w.as_tensor())?.broadcast_add(self.b.as_tensor())
    }

    pub fn onnx(&self, g: &mut GraphWriter, x: &str) -> Result<String> {
        let w = values(&self.w)?;
        let mut t = vec![0f32; w.len()];
        for i in 0..self.din {
            for o in 0..self.dout {
                t[o * self.din + i] = w[i * self.dout + o];
            }
        }
        Ok(g.dense(x, &t, &values(&self.b)?, self.din))
    }
}

/// Non-overlapping `k × k` max pool; a partial last window is dropped (export uses
/// `ceil_mode`, where it is kept: training crops inputs to whole windows so both agree).
pub fn max_pool(x: &Tensor, k: usize) -> Result<Tensor> {
    let (n, h, w, c) = x.dims4()?;
    let (oh, ow) = (h / k, w / k);
    x.narrow(1, 0, oh * k)?.narrow(2, 0, ow * k)?.reshape((n, oh, k, ow, k, c))?.max(4)?.max(2)
}

/// `[N, H, W, C]` → `[N, C]`.
pub fn global_max(x: &Tensor) -> Result<Tensor> {
    x.max(1)?.max(1)
}

/// Mean binary cross-entropy from logits, in the overflow-free form
/// `max(z, 0) − z·y + log(1 + e^{−|z|})`.
pub fn bce_with_logits(z: &Tensor, y: &Tensor) -> Result<Tensor> {
    let soft = z.abs()?.neg()?.exp()?.affine(1.0, 1.0)?.log()?;
    (z.relu()? - (z * y)?)?.add(&soft)?.mean_all()
}

/// Index of a draw from the distribution `p` by inverse CDF.
pub fn draw(p: &[f32], rng: &mut ChaCha8Rng) -> usize {
    let total: f64 = p.iter().map(|&x| x as f64).sum();
    let u = rng.random::<f64>() * total;
    let mut acc = 0.0;
    for (i, &x) in p.iter().enumerate() {
        acc += x as f64;
        if u < acc {
            return i;
        }
    }
    p.len() - 1
}
