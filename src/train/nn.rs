//! A small neural-network kernel for training on the CPU: channels-last activations,
//! layers with explicit forward and backward passes, AdamW, and export to ONNX.
//!
//! The networks a bundle holds are a handful of small convolutions, pools and dense
//! layers. Each convolution is an im2col copy plus one matrix product (matrixmultiply's
//! sgemm, already in the dependency tree through tract), forward and backward, with every
//! buffer kept in a [`Tape`] and reused from step to step. That is all a training step
//! needs, and it runs at the speed of the matrix products.

use matrixmultiply::sgemm;
use rand::Rng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use crate::onnx::writer::GraphWriter;

/// A batch of channels-last feature maps `[n, h, w, c]`; dense vectors are `h = w = 1`.
#[derive(Clone, Debug, Default)]
pub struct Act {
    pub n: usize,
    pub h: usize,
    pub w: usize,
    pub c: usize,
    pub data: Vec<f32>,
}

impl Act {
    pub fn new(n: usize, h: usize, w: usize, c: usize, data: Vec<f32>) -> Self {
        assert_eq!(data.len(), n * h * w * c, "activation data does not match its shape");
        Self { n, h, w, c, data }
    }

    /// Reshapes in place, keeping the allocation; contents are unspecified.
    fn reset(&mut self, n: usize, h: usize, w: usize, c: usize) {
        (self.n, self.h, self.w, self.c) = (n, h, w, c);
        self.data.resize(n * h * w * c, 0.0);
    }

    /// Values per batch item.
    pub fn item(&self) -> usize {
        self.h * self.w * self.c
    }
}

/// A `k × k` convolution with `stride` and symmetric zero padding `pad`; as a dense layer
/// (`dense`) it is a 1×1 convolution on `[n, 1, 1, c]`, exported as a matrix product.
/// Weights are `[k·k·cin, cout]` with rows in `(dy, dx, c)` order.
#[derive(Clone, Debug)]
pub struct Conv {
    pub k: usize,
    pub stride: usize,
    pub pad: usize,
    pub cin: usize,
    pub cout: usize,
    pub dense: bool,
    pub w: Vec<f32>,
    pub b: Vec<f32>,
}

impl Conv {
    /// He-normal weights (He et al., "Delving deep into rectifiers", ICCV 2015), zero bias.
    pub fn new(rng: &mut ChaCha8Rng, cin: usize, cout: usize, k: usize, stride: usize, pad: usize) -> Self {
        let fan_in = k * k * cin;
        let d = Normal::new(0.0, (2.0 / fan_in as f32).sqrt()).expect("valid sigma");
        let w = (0..fan_in * cout).map(|_| d.sample(rng)).collect();
        Self { k, stride, pad, cin, cout, dense: false, w, b: vec![0.0; cout] }
    }

    pub fn dense(rng: &mut ChaCha8Rng, cin: usize, cout: usize) -> Self {
        Self { dense: true, ..Self::new(rng, cin, cout, 1, 1, 0) }
    }

    fn out_hw(&self, h: usize, w: usize) -> (usize, usize) {
        let (k, s, p) = (self.k, self.stride, self.pad);
        assert!(h + 2 * p >= k && w + 2 * p >= k, "input {h}×{w} is smaller than the {k}×{k} kernel");
        ((h + 2 * p - k) / s + 1, (w + 2 * p - k) / s + 1)
    }

    /// Whether the input rows are the im2col rows already (1×1, stride 1, no padding).
    fn direct(&self) -> bool {
        self.k == 1 && self.stride == 1 && self.pad == 0
    }

    fn im2col(&self, x: &Act, oh: usize, ow: usize, cols: &mut Vec<f32>) {
        let (k, s, p, cin) = (self.k, self.stride as isize, self.pad as isize, self.cin);
        let kk = k * k * cin;
        cols.resize(x.n * oh * ow * kk, 0.0);
        let (h, w) = (x.h as isize, x.w as isize);
        for b in 0..x.n {
            let img = &x.data[b * x.item()..(b + 1) * x.item()];
            for oy in 0..oh {
                for ox in 0..ow {
                    let row = &mut cols[((b * oh + oy) * ow + ox) * kk..][..kk];
                    for dy in 0..k {
                        let iy = oy as isize * s + dy as isize - p;
                        for dx in 0..k {
                            let ix = ox as isize * s + dx as isize - p;
                            let dst = &mut row[(dy * k + dx) * cin..][..cin];
                            if iy < 0 || iy >= h || ix < 0 || ix >= w {
                                dst.fill(0.0);
                            } else {
                                dst.copy_from_slice(&img[((iy * w + ix) as usize) * cin..][..cin]);
                            }
                        }
                    }
                }
            }
        }
    }

    /// Adds the im2col gradient `dcols` back onto the input gradient `dx` (zeroed first).
    fn col2im(&self, dcols: &[f32], oh: usize, ow: usize, dx: &mut Act) {
        let (k, s, p, cin) = (self.k, self.stride as isize, self.pad as isize, self.cin);
        let kk = k * k * cin;
        dx.data.fill(0.0);
        let (h, w, item) = (dx.h as isize, dx.w as isize, dx.item());
        for b in 0..dx.n {
            let img = &mut dx.data[b * item..(b + 1) * item];
            for oy in 0..oh {
                for ox in 0..ow {
                    let row = &dcols[((b * oh + oy) * ow + ox) * kk..][..kk];
                    for dy in 0..k {
                        let iy = oy as isize * s + dy as isize - p;
                        if iy < 0 || iy >= h {
                            continue;
                        }
                        for dx_ in 0..k {
                            let ix = ox as isize * s + dx_ as isize - p;
                            if ix < 0 || ix >= w {
                                continue;
                            }
                            let src = &row[(dy * k + dx_) * cin..][..cin];
                            let dst = &mut img[((iy * w + ix) as usize) * cin..][..cin];
                            for (d, v) in dst.iter_mut().zip(src) {
                                *d += v;
                            }
                        }
                    }
                }
            }
        }
    }

    fn forward(&self, x: &Act, cols: &mut Vec<f32>, y: &mut Act) {
        assert_eq!(x.c, self.cin, "convolution expects {} input channels, found {}", self.cin, x.c);
        let (oh, ow) = self.out_hw(x.h, x.w);
        let (m, kk, n) = (x.n * oh * ow, self.k * self.k * self.cin, self.cout);
        let a: &[f32] = if self.direct() {
            &x.data
        } else {
            self.im2col(x, oh, ow, cols);
            cols
        };
        y.reset(x.n, oh, ow, n);
        for row in y.data.chunks_exact_mut(n) {
            row.copy_from_slice(&self.b);
        }
        // SAFETY: the slices hold m×kk, kk×n and m×n values with the strides given.
        unsafe {
            sgemm(
                m,
                kk,
                n,
                1.0,
                a.as_ptr(),
                kk as isize,
                1,
                self.w.as_ptr(),
                n as isize,
                1,
                1.0,
                y.data.as_mut_ptr(),
                n as isize,
                1,
            );
        }
    }

    /// Accumulates the weight and bias gradients and, when `dx` is given, writes the input
    /// gradient. `a` is what [`Conv::forward`] multiplied (the im2col rows or the input).
    fn backward(&self, a: &[f32], dy: &Act, gw: &mut [f32], gb: &mut [f32], dx: Option<(&mut Act, &mut Vec<f32>)>) {
        let (oh, ow) = (dy.h, dy.w);
        let (m, kk, n) = (dy.n * oh * ow, self.k * self.k * self.cin, self.cout);
        // SAFETY: as in forward; aᵀ is a with its strides swapped.
        unsafe {
            sgemm(
                kk,
                m,
                n,
                1.0,
                a.as_ptr(),
                1,
                kk as isize,
                dy.data.as_ptr(),
                n as isize,
                1,
                1.0,
                gw.as_mut_ptr(),
                n as isize,
                1,
            );
        }
        for row in dy.data.chunks_exact(n) {
            for (g, v) in gb.iter_mut().zip(row) {
                *g += v;
            }
        }
        let Some((dx, dcols)) = dx else { return };
        let target: &mut Vec<f32> = if self.direct() { &mut dx.data } else { dcols };
        target.resize(m * kk, 0.0);
        // SAFETY: dy is m×n, Wᵀ is n×kk (W with its strides swapped), the target m×kk.
        unsafe {
            sgemm(
                m,
                n,
                kk,
                1.0,
                dy.data.as_ptr(),
                n as isize,
                1,
                self.w.as_ptr(),
                1,
                n as isize,
                0.0,
                target.as_mut_ptr(),
                kk as isize,
                1,
            );
        }
        if !self.direct() {
            self.col2im(dcols, oh, ow, dx);
        }
    }

    /// Weights in ONNX's `[out, in, kh, kw]` order.
    fn onnx_weights(&self) -> Vec<f32> {
        let (k, cin, cout) = (self.k, self.cin, self.cout);
        let mut ow = vec![0f32; self.w.len()];
        for dy in 0..k {
            for dx in 0..k {
                for c in 0..cin {
                    for o in 0..cout {
                        ow[((o * cin + c) * k + dy) * k + dx] = self.w[((dy * k + dx) * cin + c) * cout + o];
                    }
                }
            }
        }
        ow
    }
}

/// One layer of a [`Net`].
#[derive(Clone, Debug)]
pub enum Layer {
    Conv(Conv),
    Relu,
    /// Non-overlapping `k × k` max pool; a partial last window is dropped in training (inputs
    /// are cut to whole windows) and kept on export (ONNX `ceil_mode`).
    MaxPool(usize),
    /// `[n, h, w, c]` → `[n, 1, 1, c]`.
    GlobalMax,
    /// `exp(clamp(scale · x, -limit, limit))`: turns per-patch class logits into positive
    /// evidence whose attention-weighted mean behaves like a maximum over patches (see
    /// `model::features`); the clamp keeps it finite in f32.
    ClampExp {
        scale: f32,
        limit: f32,
    },
    /// Pads by `p` on each side repeating the edge values: before a network's first
    /// convolution on a whole thumbnail, so that the frame's border is not an edge.
    PadEdge(usize),
    /// `ln(max(x, 0) + eps)`: puts an attention-weighted mean of non-negative evidence on
    /// a scale where a mark that got a tenth of the attention differs from one that got
    /// all of it by a constant, not by a factor.
    LogRelu(f32),
}

/// What a forward pass keeps for the backward pass; its buffers are reused between steps.
#[derive(Default)]
pub struct Tape {
    /// `acts[0]` is the input, `acts[i + 1]` the output of layer `i`.
    acts: Vec<Act>,
    cols: Vec<Vec<f32>>,
    argmax: Vec<Vec<u32>>,
    grad: [Act; 2],
    dcols: Vec<f32>,
}

impl Tape {
    /// The storage of the last input, emptied, to fill with the next one (saves
    /// allocating a large buffer per step).
    pub fn recycle_input(&mut self) -> Vec<f32> {
        let mut v = self.acts.first_mut().map(|a| std::mem::take(&mut a.data)).unwrap_or_default();
        v.clear();
        v
    }

    /// The network's output after [`Net::forward`].
    pub fn output(&self) -> &Act {
        self.acts.last().expect("forward ran")
    }
}

/// Gradients of every parameter tensor of a [`Net`], in [`Net::params`] order.
#[derive(Clone, Debug)]
pub struct Grads(pub Vec<Vec<f32>>);

impl Grads {
    pub fn zero(&mut self) {
        self.0.iter_mut().for_each(|g| g.fill(0.0));
    }

    pub fn add(&mut self, other: &Grads) {
        for (a, b) in self.0.iter_mut().zip(&other.0) {
            for (x, y) in a.iter_mut().zip(b) {
                *x += y;
            }
        }
    }

    pub fn scale(&mut self, s: f32) {
        self.0.iter_mut().flatten().for_each(|g| *g *= s);
    }

    pub fn norm_sq(&self) -> f64 {
        self.0.iter().flatten().map(|&g| (g as f64) * (g as f64)).sum()
    }
}

/// A chain of layers.
#[derive(Clone, Debug)]
pub struct Net {
    pub layers: Vec<Layer>,
}

impl Net {
    pub fn new(layers: Vec<Layer>) -> Self {
        Self { layers }
    }

    fn convs(&self) -> impl Iterator<Item = &Conv> {
        self.layers.iter().filter_map(|l| if let Layer::Conv(c) = l { Some(c) } else { None })
    }

    pub fn convs_mut(&mut self) -> impl Iterator<Item = &mut Conv> {
        self.layers.iter_mut().filter_map(|l| if let Layer::Conv(c) = l { Some(c) } else { None })
    }

    /// Every convolution's weights and bias, in order (what a stage file stores).
    pub fn weights(&self) -> Vec<(Vec<f32>, Vec<f32>)> {
        self.convs().map(|c| (c.w.clone(), c.b.clone())).collect()
    }

    /// Sets every convolution's weights and bias from [`Net::weights`] of a network of the
    /// same shape; on a mismatch, says which layer and leaves the network as it was.
    pub fn set_weights(&mut self, weights: &[(Vec<f32>, Vec<f32>)]) -> Result<(), String> {
        let convs: Vec<(usize, usize)> = self.convs().map(|c| (c.w.len(), c.b.len())).collect();
        if convs.len() != weights.len() {
            return Err(format!("{} layers stored, the network has {}", weights.len(), convs.len()));
        }
        for (j, (&(w, b), (sw, sb))) in convs.iter().zip(weights).enumerate() {
            if (w, b) != (sw.len(), sb.len()) {
                return Err(format!(
                    "layer {j}: {} weights and {} biases stored, the network has {w} and {b}",
                    sw.len(),
                    sb.len()
                ));
            }
        }
        for (c, (w, b)) in self.convs_mut().zip(weights) {
            c.w.clone_from(w);
            c.b.clone_from(b);
        }
        Ok(())
    }

    /// Parameter tensors: each convolution's weights, then its bias.
    pub fn params(&self) -> Vec<&[f32]> {
        self.convs().flat_map(|c| [c.w.as_slice(), c.b.as_slice()]).collect()
    }

    pub fn params_mut(&mut self) -> Vec<&mut Vec<f32>> {
        self.convs_mut().flat_map(|c| [&mut c.w, &mut c.b]).collect()
    }

    pub fn param_count(&self) -> usize {
        self.params().iter().map(|p| p.len()).sum()
    }

    pub fn grads(&self) -> Grads {
        Grads(self.params().iter().map(|p| vec![0.0; p.len()]).collect())
    }

    /// Runs the network on `x`, keeping what the backward pass needs in `tape`.
    pub fn forward<'t>(&self, x: Act, tape: &'t mut Tape) -> &'t Act {
        let n = self.layers.len();
        tape.acts.resize_with(n + 1, Act::default);
        tape.cols.resize_with(n, Vec::new);
        tape.argmax.resize_with(n, Vec::new);
        tape.acts[0] = x;
        for (i, layer) in self.layers.iter().enumerate() {
            let (done, rest) = tape.acts.split_at_mut(i + 1);
            let (x, y) = (&done[i], &mut rest[0]);
            match layer {
                Layer::Conv(c) => c.forward(x, &mut tape.cols[i], y),
                Layer::Relu => {
                    y.reset(x.n, x.h, x.w, x.c);
                    for (o, &v) in y.data.iter_mut().zip(&x.data) {
                        *o = v.max(0.0);
                    }
                }
                Layer::LogRelu(eps) => {
                    y.reset(x.n, x.h, x.w, x.c);
                    for (o, &v) in y.data.iter_mut().zip(&x.data) {
                        *o = (v.max(0.0) + eps).ln();
                    }
                }
                Layer::MaxPool(k) => max_pool(x, *k, *k, y, &mut tape.argmax[i]),
                Layer::GlobalMax => max_pool(x, x.h, x.w, y, &mut tape.argmax[i]),
                Layer::PadEdge(p) => pad_edge(x, *p, y, &mut tape.argmax[i]),
                Layer::ClampExp { scale, limit } => {
                    y.reset(x.n, x.h, x.w, x.c);
                    for (o, &v) in y.data.iter_mut().zip(&x.data) {
                        *o = (scale * v).clamp(-limit, *limit).exp();
                    }
                }
            }
        }
        &tape.acts[n]
    }

    /// Backpropagates `dy` (the gradient of the loss at the output of the last
    /// [`Net::forward`] on `tape`), adding parameter gradients into `grads`. Returns the
    /// gradient at the input when `want_input` (the first layer's input gradient is
    /// otherwise skipped: nothing upstream of a network's input learns from it).
    pub fn backward<'t>(&self, tape: &'t mut Tape, dy: &[f32], grads: &mut Grads, want_input: bool) -> Option<&'t Act> {
        let n = self.layers.len();
        let out = &tape.acts[n];
        assert_eq!(dy.len(), out.data.len(), "gradient does not match the network's output");
        let [g0, g1] = &mut tape.grad;
        g0.reset(out.n, out.h, out.w, out.c);
        g0.data.copy_from_slice(dy);
        let (mut cur, mut next) = (g0, g1);
        let mut slot = grads.0.len();
        for (i, layer) in self.layers.iter().enumerate().rev() {
            let x = &tape.acts[i];
            let need_dx = i > 0 || want_input;
            if let Layer::Conv(c) = layer {
                slot -= 2;
                let (gw, gb) = grads.0[slot..slot + 2].split_at_mut(1);
                let a: &[f32] = if c.direct() { &x.data } else { &tape.cols[i] };
                next.reset(x.n, x.h, x.w, x.c);
                c.backward(a, cur, &mut gw[0], &mut gb[0], need_dx.then_some((&mut *next, &mut tape.dcols)));
            } else if need_dx {
                next.reset(x.n, x.h, x.w, x.c);
                match layer {
                    Layer::Relu => {
                        for ((d, &g), &v) in next.data.iter_mut().zip(&cur.data).zip(&x.data) {
                            *d = if v > 0.0 { g } else { 0.0 };
                        }
                    }
                    Layer::LogRelu(eps) => {
                        for ((d, &g), &v) in next.data.iter_mut().zip(&cur.data).zip(&x.data) {
                            *d = if v > 0.0 { g / (v + eps) } else { 0.0 };
                        }
                    }
                    Layer::ClampExp { scale, limit } => {
                        let y = &tape.acts[i + 1].data;
                        for (((d, &g), &v), &e) in next.data.iter_mut().zip(&cur.data).zip(&x.data).zip(y) {
                            *d = if (scale * v).abs() < *limit { g * e * scale } else { 0.0 };
                        }
                    }
                    Layer::MaxPool(_) | Layer::GlobalMax | Layer::PadEdge(_) => {
                        next.data.fill(0.0);
                        for (&j, &g) in tape.argmax[i].iter().zip(&cur.data) {
                            next.data[j as usize] += g;
                        }
                    }
                    Layer::Conv(_) => unreachable!("handled above"),
                }
            }
            if !need_dx {
                return None;
            }
            std::mem::swap(&mut cur, &mut next);
        }
        Some(cur)
    }

    /// Forward pass without keeping a tape across calls.
    pub fn infer(&self, x: Act) -> Act {
        let mut tape = Tape::default();
        self.forward(x, &mut tape);
        tape.acts.pop().expect("forward ran")
    }

    /// Appends the layers to an ONNX graph (NCHW) reading `x`; returns the output's name.
    pub fn onnx(&self, g: &mut GraphWriter, x: &str) -> String {
        let mut h = x.to_string();
        for layer in &self.layers {
            h = match layer {
                Layer::Conv(c) if c.dense => {
                    let mut t = vec![0f32; c.w.len()];
                    for i in 0..c.cin {
                        for o in 0..c.cout {
                            t[o * c.cin + i] = c.w[i * c.cout + o];
                        }
                    }
                    g.dense(&h, &t, &c.b, c.cin)
                }
                Layer::Conv(c) => g.conv(&h, &c.onnx_weights(), &c.b, c.cin, c.k, c.stride, c.pad),
                Layer::Relu => g.unary("Relu", &h),
                Layer::LogRelu(eps) => {
                    let r = g.unary("Relu", &h);
                    let e = g.constant("eps", &[1], &[*eps]);
                    let s = g.binary("Add", &r, &e);
                    g.unary("Log", &s)
                }
                Layer::MaxPool(k) => g.max_pool_ceil(&h, *k),
                Layer::GlobalMax => g.global_pool("GlobalMaxPool", &h),
                Layer::PadEdge(p) => g.pad_edge(&h, *p as i64),
                Layer::ClampExp { scale, limit } => {
                    let scaled = g.scale(&h, *scale);
                    let lo = g.constant("clip_min", &[], &[-limit]);
                    let hi = g.constant("clip_max", &[], &[*limit]);
                    let c = g.node("Clip", &[&scaled, &lo, &hi], &[]);
                    g.unary("Exp", &c)
                }
            };
        }
        h
    }
}

/// Max over `kh × kw` windows at stride `(kh, kw)`, remembering where each maximum was.
fn max_pool(x: &Act, kh: usize, kw: usize, y: &mut Act, argmax: &mut Vec<u32>) {
    let (oh, ow, c) = (x.h / kh, x.w / kw, x.c);
    y.reset(x.n, oh, ow, c);
    argmax.resize(y.data.len(), 0);
    for b in 0..x.n {
        for oy in 0..oh {
            for ox in 0..ow {
                let o = ((b * oh + oy) * ow + ox) * c;
                let (best, at) = (&mut y.data[o..o + c], &mut argmax[o..o + c]);
                let first = ((b * x.h + oy * kh) * x.w + ox * kw) * c;
                best.copy_from_slice(&x.data[first..first + c]);
                for (a, i) in at.iter_mut().zip(first as u32..) {
                    *a = i;
                }
                for dy in 0..kh {
                    for dx in 0..kw {
                        let start = ((b * x.h + oy * kh + dy) * x.w + ox * kw + dx) * c;
                        let src = &x.data[start..start + c];
                        for (ch, ((m, a), &v)) in best.iter_mut().zip(at.iter_mut()).zip(src).enumerate() {
                            if v > *m {
                                *m = v;
                                *a = (start + ch) as u32;
                            }
                        }
                    }
                }
            }
        }
    }
}

/// Edge padding by `p`; `source[j]` is the input index output `j` copies (the backward
/// pass adds each output's gradient there, as for a pool).
fn pad_edge(x: &Act, p: usize, y: &mut Act, source: &mut Vec<u32>) {
    let (oh, ow, c) = (x.h + 2 * p, x.w + 2 * p, x.c);
    y.reset(x.n, oh, ow, c);
    source.resize(y.data.len(), 0);
    for b in 0..x.n {
        for oy in 0..oh {
            let iy = oy.saturating_sub(p).min(x.h - 1);
            for ox in 0..ow {
                let ix = ox.saturating_sub(p).min(x.w - 1);
                for ch in 0..c {
                    let (o, i) = (((b * oh + oy) * ow + ox) * c + ch, ((b * x.h + iy) * x.w + ix) * c + ch);
                    y.data[o] = x.data[i];
                    source[o] = i as u32;
                }
            }
        }
    }
}

/// AdamW (Loshchilov and Hutter, "Decoupled weight decay regularization", ICLR 2019) over
/// one network's parameters; decay applies to weights, not biases.
pub struct AdamW {
    m: Vec<Vec<f32>>,
    v: Vec<Vec<f32>>,
    t: i32,
    pub weight_decay: f32,
}

impl AdamW {
    const BETA1: f32 = 0.9;
    const BETA2: f32 = 0.999;
    const EPS: f32 = 1e-8;

    pub fn new(net: &Net, weight_decay: f32) -> Self {
        let zeros: Vec<Vec<f32>> = net.params().iter().map(|p| vec![0.0; p.len()]).collect();
        Self { m: zeros.clone(), v: zeros, t: 0, weight_decay }
    }

    pub fn step(&mut self, net: &mut Net, g: &Grads, lr: f32) {
        self.t += 1;
        let c1 = 1.0 - Self::BETA1.powi(self.t);
        let c2 = 1.0 - Self::BETA2.powi(self.t);
        for (j, p) in net.params_mut().into_iter().enumerate() {
            let decay = if j % 2 == 0 { self.weight_decay } else { 0.0 };
            let (m, v, g) = (&mut self.m[j], &mut self.v[j], &g.0[j]);
            for i in 0..p.len() {
                m[i] = Self::BETA1 * m[i] + (1.0 - Self::BETA1) * g[i];
                v[i] = Self::BETA2 * v[i] + (1.0 - Self::BETA2) * g[i] * g[i];
                p[i] -= lr * ((m[i] / c1) / ((v[i] / c2).sqrt() + Self::EPS) + decay * p[i]);
            }
        }
    }
}

/// Mean binary cross-entropy of logits `z` against targets `y` and its gradient with
/// respect to `z` (scaled by `1 / scale`, the number of terms the mean is over).
pub fn bce(z: &[f32], y: &[f32], scale: f32, dz: &mut [f32]) -> f64 {
    let mut loss = 0.0;
    for ((&z, &y), d) in z.iter().zip(y).zip(dz.iter_mut()) {
        // max(z, 0) − z·y + ln(1 + e^{−|z|}): no overflow for any z.
        loss += (z.max(0.0) - z * y + (-z.abs()).exp().ln_1p()) as f64;
        *d = (sigmoid(z) - y) / scale;
    }
    loss / scale as f64
}

pub fn sigmoid(z: f32) -> f32 {
    1.0 / (1.0 + (-z).exp())
}

/// Small uniform values in `[-a, a)`.
pub fn small(rng: &mut ChaCha8Rng, n: usize, a: f32) -> Vec<f32> {
    (0..n).map(|_| rng.random_range(-a..a)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;

    /// Loss = Σ r_i · out_i for fixed random r: its gradient is r, so backward(r) gives the
    /// gradient that central differences must match. Entries where the two one-sided
    /// differences disagree sit on a kink (a ReLU at 0, a max changing hands) and are
    /// skipped; at most a tenth may be.
    fn check(net: &mut Net, x: Act, tol: f64) {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let out = net.infer(x.clone());
        let r: Vec<f32> = (0..out.data.len()).map(|_| rng.random_range(-1.0f32..1.0)).collect();
        let loss = |net: &Net, x: &Act| -> f64 {
            net.infer(x.clone()).data.iter().zip(&r).map(|(a, b)| (*a as f64) * (*b as f64)).sum()
        };
        let mut tape = Tape::default();
        net.forward(x.clone(), &mut tape);
        let mut grads = net.grads();
        let dx = net.backward(&mut tape, &r, &mut grads, true).unwrap().data.clone();
        let h = 2e-3f32;
        let (mut checked, mut kinks) = (0, 0);
        let mut compare = |what: String, l0: f64, lp: f64, lm: f64, g: f64| {
            let (up, down) = ((lp - l0) / h as f64, (l0 - lm) / h as f64);
            if (up - down).abs() > tol * (1.0 + up.abs()) {
                kinks += 1;
                return;
            }
            checked += 1;
            let fd = (lp - lm) / (2.0 * h as f64);
            assert!((fd - g).abs() <= tol * (1.0 + fd.abs()), "{what}: central difference {fd} vs backward {g}");
        };
        let l0 = loss(net, &x);
        for i in (0..x.data.len()).step_by(3) {
            let (mut xp, mut xm) = (x.clone(), x.clone());
            xp.data[i] += h;
            xm.data[i] -= h;
            compare(format!("input {i}"), l0, loss(net, &xp), loss(net, &xm), dx[i] as f64);
        }
        for j in 0..net.params().len() {
            for i in (0..net.params()[j].len()).step_by(2) {
                let orig = net.params()[j][i];
                net.params_mut()[j][i] = orig + h;
                let lp = loss(net, &x);
                net.params_mut()[j][i] = orig - h;
                let lm = loss(net, &x);
                net.params_mut()[j][i] = orig;
                compare(format!("parameter {j}[{i}]"), l0, lp, lm, grads.0[j][i] as f64);
            }
        }
        assert!(kinks * 10 <= checked, "{kinks} kinks among {checked} checked entries");
    }

    fn input(rng: &mut ChaCha8Rng, n: usize, h: usize, w: usize, c: usize) -> Act {
        // Values away from 0 and from each other, so ReLU kinks and max ties are not hit.
        let data = (0..n * h * w * c)
            .map(|_| rng.random_range(0.2f32..1.0) * if rng.random_bool(0.5) { 1.0 } else { -1.0 })
            .collect();
        Act::new(n, h, w, c, data)
    }

    #[test]
    fn convolutions_match_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        for (k, s, p) in [(3, 1, 1), (2, 2, 0), (3, 2, 1), (1, 1, 0)] {
            let mut net = Net::new(vec![Layer::Conv(Conv::new(&mut rng, 3, 4, k, s, p))]);
            for c in net.convs_mut() {
                c.b = small(&mut rng, c.cout, 0.5);
            }
            let x = input(&mut rng, 2, 6, 5, 3);
            // f32 central differences on a linear map: only rounding error.
            check(&mut net, x, 2e-2);
        }
    }

    #[test]
    fn the_layer_zoo_matches_finite_differences() {
        let mut rng = ChaCha8Rng::seed_from_u64(2);
        let mut net = Net::new(vec![
            Layer::PadEdge(1),
            Layer::Conv(Conv::new(&mut rng, 2, 3, 3, 1, 0)),
            Layer::Relu,
            Layer::MaxPool(2),
            Layer::Conv(Conv::new(&mut rng, 3, 4, 3, 1, 1)),
            Layer::GlobalMax,
            Layer::LogRelu(0.5),
            Layer::Conv(Conv::dense(&mut rng, 4, 3)),
            Layer::ClampExp { scale: 2.0, limit: 3.0 },
        ]);
        for c in net.convs_mut() {
            c.b = small(&mut rng, c.cout, 0.3).iter().map(|v| v + 0.4).collect();
        }
        let x = input(&mut rng, 2, 8, 6, 2);
        check(&mut net, x, 3e-2);
    }

    #[test]
    fn bce_matches_its_definition_and_gradient() {
        let z = [-12.0f32, -1.0, 0.0, 2.5, 9.0];
        let y = [0.0f32, 1.0, 0.0, 1.0, 0.0];
        let mut dz = [0f32; 5];
        let loss = bce(&z, &y, 5.0, &mut dz);
        let direct: f64 = z
            .iter()
            .zip(&y)
            .map(|(&z, &y)| {
                let p = 1.0 / (1.0 + (-(z as f64)).exp());
                -(y as f64 * p.ln() + (1.0 - y as f64) * (1.0 - p).ln())
            })
            .sum::<f64>()
            / 5.0;
        assert!((loss - direct).abs() < 1e-4, "{loss} vs {direct}");
        for i in 0..5 {
            assert!((dz[i] - (sigmoid(z[i]) - y[i]) / 5.0).abs() < 1e-7);
        }
        // Far out, the loss is the logit itself and nothing overflows.
        let loss = bce(&[1000.0, -1000.0], &[0.0, 1.0], 2.0, &mut dz[..2]);
        assert_eq!(loss, 1000.0);
    }
}
