//! The training loops: the attention-sampling model end to end, and the thumbnail-only
//! comparison with the same loss, split and stopping rule.
//!
//! The model's quantity is `Psi = Σ_i a_i f_i` over every cell (attention sampling,
//! Katharopoulos and Fleuret, "Processing Megapixel Images with Deep Attention-Sampling
//! Models", ICML 2019). Each step estimates it, per frame, without bias and with low
//! variance by splitting the cells in two: the `top` cells of highest attention, summed
//! exactly, and the rest, estimated from `tail` draws in proportion to attention,
//!
//! `Psi_hat = Σ_{i ∈ top} a_i f_i + (R / m) Σ_{j=1..m} f_{c_j} · a_{c_j} / sg(a_{c_j})`,
//!
//! with `R` the attention mass outside the top cells and `sg` a stop-gradient (the draws
//! actually follow a tempered proposal, see [`TEMPER`], with matching weights). Its gradient
//! with respect to the attention is exact for the top cells and the usual unbiased
//! score-function estimate for the rest. Taking the top cells with certainty mirrors what
//! priority sampling does at inference, where cells of high attention are always examined,
//! and it shows the feature network every mark attention already points at, in every
//! step, instead of a few lucky draws. Frames are independent given the weights, so each
//! of the `threads` workers takes its share of a step's frames with its own buffers, and
//! their gradients are summed.
//!
//! Training runs in three stages, each kept only where it beats the weights it started
//! from. The warm-up trains the feature network and head on single patches
//! (multiple-instance learning with a max over the initial attention's top cells); the
//! attention stage then teaches the attention network, alone, where the warmed-up patch
//! classifier finds the strongest evidence (thin lines that nearly vanish in the thumbnail
//! are plain at full resolution), and is kept only if the sampled model's held-out F1
//! improves; and the end-to-end stage tunes all three through the estimator.

use std::time::Instant;

use indicatif::{MultiProgress, ProgressBar, ProgressStyle};
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::data::{Augment, Dataset, View};
use super::nn::{bce, sigmoid, Act, AdamW, Grads, Net, Tape};

#[derive(Clone, Debug)]
pub struct FitOptions {
    /// Epochs of end-to-end training.
    pub epochs: usize,
    /// Epochs before it with the attention held at its initial form, training only the
    /// feature network and head.
    pub warmup: usize,
    /// Epochs between the two that teach the attention network what the warmed-up
    /// feature network and head see.
    pub attention_epochs: usize,
    /// Frames per step.
    pub batch: usize,
    /// Cells of highest attention summed exactly per frame and step, end to end.
    pub top: usize,
    /// Cells of highest initial attention per frame and step in the warm-up (more cells
    /// reach marks the initial attention ranks low, but make more look-alikes candidates
    /// for a frame's maximum).
    pub warmup_top: usize,
    /// Every this many warm-up epochs (0: never), the patch classifier scores a wide pool
    /// of each frame's cells and its strongest cells per class join the frame's
    /// warm-up cells (hard-example mining, see [`Sampled::mine`]).
    pub mine_every: usize,
    /// Draws from the remaining attention per frame and step.
    pub tail: usize,
    pub learning_rate: f64,
    /// Learning rate of the attention network (end to end) relative to `learning_rate`.
    pub attention_rate: f64,
    /// Learning rate of the feature network and head end to end, relative to
    /// `learning_rate`: they arrive trained by the warm-up and need only adjusting.
    pub tune_rate: f64,
    /// Weight β of the attention entropy bonus `−β H(a) / ln N`.
    pub entropy: f64,
    /// Epochs without a better validation loss before a stage stops.
    pub patience: usize,
    /// Patches per validation frame (priority sampling, fixed draws).
    pub val_patches: usize,
    pub augment: Augment,
    pub threads: usize,
}

/// One line of the per-epoch training log.
#[derive(Clone, Debug, Serialize)]
pub struct EpochLog {
    pub model: &'static str,
    pub epoch: usize,
    pub train_loss: f64,
    pub val_loss: f64,
    pub val_macro_f1: f64,
    pub seconds: f64,
}

/// The three networks of a bundle.
#[derive(Clone)]
pub struct Sampled {
    pub attention: Net,
    pub features: Net,
    pub head: Net,
}

/// Softmax of `s` in f64.
pub fn softmax(s: &[f32]) -> Vec<f64> {
    let max = s.iter().fold(f64::NEG_INFINITY, |m, &z| m.max(z as f64));
    let mut a: Vec<f64> = s.iter().map(|&z| (z as f64 - max).exp()).collect();
    let total: f64 = a.iter().sum();
    a.iter_mut().for_each(|x| *x /= total);
    a
}

/// Cells to examine and their weights in the estimate of `Psi`.
struct Selection {
    cells: Vec<usize>,
    weights: Vec<f64>,
    /// `∂ weight / ∂ a` of each selected cell (1 for a top cell, `weight / a` for a draw).
    slopes: Vec<f64>,
}

/// Exponent of the tail's proposal: draws follow `a^TEMPER` over the remaining cells, so
/// cells that attention ranks low (a faint mark it has not learnt yet) are examined more
/// often than attention alone would; their weights `a / q` keep the estimate unbiased.
const TEMPER: f64 = 1.0;

/// Cells of highest current attention the attention stage examines besides the entry
/// attention's top cells.
const ATTENTION_TOP: usize = 24;
/// Cells drawn uniformly per frame and step in the attention stage.
const EXPLORE: usize = 32;

/// Cells of highest attention per frame that warm-up mining scores. On the demo frames
/// the initial attention ranks 72 % of thin scratches among its top 24 cells and 92 %
/// among its top 384 (counted on 200 training frames with their marks' positions), so
/// the pool reaches the marks the warm-up's own cells miss.
const MINE_POOL: usize = 512;
/// Cells per class that mining adds to a frame's warm-up cells.
const MINED_PER_CLASS: usize = 3;
/// Patches per feature-network run while mining.
const MINE_BATCH: usize = 64;

/// The top cells and `tail` draws from the rest (see the module notes).
fn select(a: &[f64], top: usize, tail: usize, rng: &mut ChaCha8Rng) -> Selection {
    let top = top.min(a.len());
    let mut order: Vec<usize> = (0..a.len()).collect();
    if top < a.len() {
        order.select_nth_unstable_by(top, |&x, &y| a[y].total_cmp(&a[x]));
    }
    let mut cells: Vec<usize> = order[..top].to_vec();
    let mut weights: Vec<f64> = cells.iter().map(|&c| a[c]).collect();
    let mut slopes = vec![1.0; top];
    let rest: Vec<usize> = order[top..].iter().copied().filter(|&c| a[c] > 0.0).collect();
    if tail > 0 && !rest.is_empty() {
        let q: Vec<f64> = rest.iter().map(|&c| a[c].powf(TEMPER)).collect();
        let total: f64 = q.iter().sum();
        let mut cdf = Vec::with_capacity(rest.len());
        let mut acc = 0.0;
        for v in &q {
            acc += v;
            cdf.push(acc);
        }
        let mut counts: Vec<(usize, usize)> = Vec::new();
        for _ in 0..tail {
            let u = rng.random::<f64>() * acc;
            let j = cdf.partition_point(|&v| v <= u).min(rest.len() - 1);
            match counts.iter_mut().find(|(k, _)| *k == j) {
                Some((_, n)) => *n += 1,
                None => counts.push((j, 1)),
            }
        }
        for (j, n) in counts {
            let c = rest[j];
            // E[n / (tail q_j)] = 1 with q_j the draw probability: unbiased for Σ_rest a f.
            let w = n as f64 * a[c] / (tail as f64 * q[j] / total);
            cells.push(c);
            weights.push(w);
            slopes.push(w / a[c]);
        }
    }
    Selection { cells, weights, slopes }
}

/// Priority sampling (Duffield, Lund and Thorup, J. ACM 54(6), 2007) of `k` cells with
/// the uniforms from `rng`: the engine's default estimator, here for validation.
fn priority(a: &[f64], k: usize, rng: &mut ChaCha8Rng) -> Selection {
    let mut q: Vec<(usize, f64)> =
        a.iter().enumerate().filter(|(_, &x)| x > 0.0).map(|(i, &x)| (i, x / (1.0 - rng.random::<f64>()))).collect();
    q.sort_by(|x, y| y.1.total_cmp(&x.1).then(x.0.cmp(&y.0)));
    let k = k.min(q.len());
    let tau = q.get(k).map_or(0.0, |x| x.1);
    let cells: Vec<usize> = q[..k].iter().map(|x| x.0).collect();
    let weights = cells.iter().map(|&c| a[c].max(tau)).collect();
    Selection { slopes: vec![0.0; k], cells, weights }
}

/// Buffers of one worker thread.
struct Worker {
    at: Tape,
    ft: Tape,
    ht: Tape,
    ga: Grads,
    gf: Grads,
    gh: Grads,
    scratch: Vec<f32>,
}

impl Worker {
    fn new(m: &Sampled) -> Self {
        Self {
            at: Tape::default(),
            ft: Tape::default(),
            ht: Tape::default(),
            ga: m.attention.grads(),
            gf: m.features.grads(),
            gh: m.head.grads(),
            scratch: Vec::new(),
        }
    }

    fn zero(&mut self) {
        self.ga.zero();
        self.gf.zero();
        self.gh.zero();
    }
}

/// What one frame's forward pass gives: logits and the pieces its backward pass needs.
struct FramePass {
    logits: Vec<f32>,
    a: Vec<f64>,
    sel: Selection,
    /// Features of the selected cells, `[cells, D]`.
    f: Vec<f32>,
}

impl Sampled {
    fn frame_forward(
        &self,
        data: &Dataset,
        i: usize,
        view: &View,
        pick: impl FnOnce(&[f64]) -> Selection,
        w: &mut Worker,
    ) -> FramePass {
        let thumb = data.thumbnail(i, view, &mut w.scratch, w.at.recycle_input());
        let scores = self.attention.forward(thumb, &mut w.at);
        let a = softmax(&scores.data);
        let sel = pick(&a);
        let p = data.geometry.patch as usize;
        let mut patches = w.ft.recycle_input();
        for &c in &sel.cells {
            data.patch(i, view, c, &mut w.scratch, &mut patches);
        }
        let x = Act::new(sel.cells.len(), p, p, 3, patches);
        let f = self.features.forward(x, &mut w.ft).data.clone();
        let d = f.len() / sel.cells.len();
        let mut psi = vec![0f32; d];
        for (row, &wt) in f.chunks_exact(d).zip(&sel.weights) {
            for (p, v) in psi.iter_mut().zip(row) {
                *p += (wt * *v as f64) as f32;
            }
        }
        let logits = self.head.forward(Act::new(1, 1, 1, d, psi), &mut w.ht).data.clone();
        FramePass { logits, a, sel, f }
    }

    /// The warm-up's objective on one frame: the head on each top cell's features alone,
    /// and per class the frame's logit is the largest of them (multiple-instance learning
    /// with max pooling: a frame carries a class when at least one patch shows it). It
    /// teaches the feature network to see each class in a single patch before attention
    /// weights come into play. Returns the frame's logits and loss; with `learn` (the loss
    /// scale of the step) the gradients go to features and head.
    #[allow(clippy::too_many_arguments)]
    fn instance_step(
        &self,
        data: &Dataset,
        i: usize,
        view: &View,
        top: usize,
        mined: &[usize],
        learn: Option<f32>,
        w: &mut Worker,
    ) -> (Vec<f32>, f64) {
        let thumb = data.thumbnail(i, view, &mut w.scratch, w.at.recycle_input());
        let a = softmax(&self.attention.forward(thumb, &mut w.at).data);
        let mut cells = select(&a, top, 0, &mut ChaCha8Rng::seed_from_u64(0)).cells;
        if !mined.is_empty() {
            // Mined cells are stored-frame indices; the view may flip or turn the frame.
            let mut viewed = vec![0usize; a.len()];
            for j in 0..a.len() {
                viewed[data.source_cell(view, j)] = j;
            }
            for &c in mined {
                if !cells.contains(&viewed[c]) {
                    cells.push(viewed[c]);
                }
            }
        }
        let p = data.geometry.patch as usize;
        let mut patches = w.ft.recycle_input();
        for &c in &cells {
            data.patch(i, view, c, &mut w.scratch, &mut patches);
        }
        let n = cells.len();
        let f = self.features.forward(Act::new(n, p, p, 3, patches), &mut w.ft).data.clone();
        let z = self.head.forward(Act::new(n, 1, 1, f.len() / n, f), &mut w.ht).data.clone();
        let classes = z.len() / n;
        let best: Vec<usize> = (0..classes)
            .map(|c| (0..n).max_by(|&x, &y| z[x * classes + c].total_cmp(&z[y * classes + c])).expect("cells"))
            .collect();
        let frame: Vec<f32> = best.iter().enumerate().map(|(c, &j)| z[j * classes + c]).collect();
        let mut dframe = vec![0f32; classes];
        let loss = bce(&frame, &data.samples[i].target, learn.unwrap_or(1.0), &mut dframe);
        if learn.is_none() {
            return (frame, loss);
        }
        let mut dz = vec![0f32; z.len()];
        for (c, &j) in best.iter().enumerate() {
            dz[j * classes + c] = dframe[c];
        }
        let df = self.head.backward(&mut w.ht, &dz, &mut w.gh, true).expect("input gradient").data.clone();
        self.features.backward(&mut w.ft, &df, &mut w.gf, false);
        (frame, loss)
    }

    /// Hard-example mining for the warm-up: the patch classifier scores the attention's
    /// top [`MINE_POOL`] cells of frame `i` (as stored) and, per class, the
    /// [`MINED_PER_CLASS`] cells where its logit is highest come back. Labels play no
    /// part: on a frame with the class these are its likeliest cells (a thin mark the
    /// attention ranks below the warm-up's top cells gets trained on), on a frame without
    /// it the hardest look-alikes (which the max-pooled loss then pushes down).
    fn mine(&self, data: &Dataset, i: usize, w: &mut Worker) -> Vec<usize> {
        let plain = View::plain(&data.norm);
        let thumb = data.thumbnail(i, &plain, &mut w.scratch, w.at.recycle_input());
        let a = softmax(&self.attention.forward(thumb, &mut w.at).data);
        let pool = select(&a, MINE_POOL, 0, &mut ChaCha8Rng::seed_from_u64(0)).cells;
        let p = data.geometry.patch as usize;
        let mut z = Vec::new();
        for chunk in pool.chunks(MINE_BATCH) {
            let mut patches = w.ft.recycle_input();
            for &c in chunk {
                data.patch(i, &plain, c, &mut w.scratch, &mut patches);
            }
            let f = self.features.forward(Act::new(chunk.len(), p, p, 3, patches), &mut w.ft).data.clone();
            let d = f.len() / chunk.len();
            z.extend_from_slice(&self.head.forward(Act::new(chunk.len(), 1, 1, d, f), &mut w.ht).data);
        }
        let classes = z.len() / pool.len().max(1);
        let mut out = Vec::new();
        for c in 0..classes {
            let mut order: Vec<usize> = (0..pool.len()).collect();
            order.sort_by(|&x, &y| z[y * classes + c].total_cmp(&z[x * classes + c]));
            for &j in order.iter().take(MINED_PER_CLASS) {
                if !out.contains(&pool[j]) {
                    out.push(pool[j]);
                }
            }
        }
        out
    }

    /// The attention stage's objective on one frame: the attention network learns where
    /// the warmed-up feature network and head find the strongest evidence. The examined
    /// cells are the `entry` attention's top `top` (the cells the warm-up trained on), the
    /// current attention's top [`ATTENTION_TOP`] (so that what it has come to rank high is
    /// checked) and [`EXPLORE`] cells drawn uniformly (plain ground). Over them the target
    /// is `q ∝ exp(SHARPNESS · m)`, with `m` a cell's largest class score: the share of
    /// `Psi` each cell carries were the attention uniform. Fitting the attention's softmax
    /// over the examined cells to `q` (cross-entropy) puts its mass where a frame's answer
    /// comes from, so that `Psi = Σ a f` is close to the strongest patch's own evidence,
    /// on clean frames as on marked ones. Returns the cross-entropy; with `learn` (frames
    /// in the step) the gradients go to the attention network.
    #[allow(clippy::too_many_arguments)]
    fn attention_step(
        &self,
        entry: &Net,
        data: &Dataset,
        i: usize,
        view: &View,
        top: usize,
        seed: u64,
        learn: Option<f32>,
        w: &mut Worker,
    ) -> f64 {
        let thumb = data.thumbnail(i, view, &mut w.scratch, w.at.recycle_input());
        let held = softmax(&entry.infer(thumb.clone()).data);
        let s = self.attention.forward(thumb, &mut w.at).data.clone();
        let mut cells = select(&held, top, 0, &mut ChaCha8Rng::seed_from_u64(0)).cells;
        for c in select(&softmax(&s), ATTENTION_TOP, 0, &mut ChaCha8Rng::seed_from_u64(0)).cells {
            if !cells.contains(&c) {
                cells.push(c);
            }
        }
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        for _ in 0..EXPLORE {
            let c = rng.random_range(0..s.len());
            if !cells.contains(&c) {
                cells.push(c);
            }
        }
        let p = data.geometry.patch as usize;
        let mut patches = w.ft.recycle_input();
        for &c in &cells {
            data.patch(i, view, c, &mut w.scratch, &mut patches);
        }
        let n = cells.len();
        let f = self.features.forward(Act::new(n, p, p, 3, patches), &mut w.ft).data.clone();
        let z = self.head.forward(Act::new(n, 1, 1, f.len() / n, f), &mut w.ht).data.clone();
        let classes = z.len() / n;
        let evidence: Vec<f32> = z
            .chunks_exact(classes)
            .map(|row| super::model::SHARPNESS * row.iter().fold(f32::NEG_INFINITY, |m, &v| m.max(v)))
            .collect();
        let q = softmax(&evidence);
        let att = softmax(&cells.iter().map(|&c| s[c]).collect::<Vec<f32>>());
        let loss = -q.iter().zip(&att).map(|(&q, &p)| q * p.max(1e-300).ln()).sum::<f64>();
        if let Some(frames) = learn {
            let mut ds = vec![0f32; s.len()];
            for ((&c, &q), &p) in cells.iter().zip(&q).zip(&att) {
                ds[c] = ((p - q) / frames as f64) as f32;
            }
            self.attention.backward(&mut w.at, &ds, &mut w.ga, false);
        }
        loss
    }

    /// Backward pass of one frame from `dz` (gradient at its logits).
    fn frame_backward(&self, pass: &FramePass, dz: &[f32], train_attention: bool, entropy: f64, w: &mut Worker) {
        let dpsi = self.head.backward(&mut w.ht, dz, &mut w.gh, true).expect("input gradient").data.clone();
        let d = dpsi.len();
        let mut df = vec![0f32; pass.f.len()];
        let mut da = Vec::with_capacity(pass.sel.cells.len());
        for ((row, drow), (&wt, &slope)) in
            pass.f.chunks_exact(d).zip(df.chunks_exact_mut(d)).zip(pass.sel.weights.iter().zip(&pass.sel.slopes))
        {
            let mut dot = 0.0f64;
            for ((g, &v), &dp) in drow.iter_mut().zip(row).zip(&dpsi) {
                *g = (wt as f32) * dp;
                dot += (v * dp) as f64;
            }
            da.push(slope * dot);
        }
        self.features.backward(&mut w.ft, &df, &mut w.gf, false);
        if !train_attention {
            return;
        }
        // Softmax: ∂L/∂s_i = a_i (∂L/∂a_i − Σ_j a_j ∂L/∂a_j).
        let a = &pass.a;
        let mean: f64 = pass.sel.cells.iter().zip(&da).map(|(&c, g)| a[c] * g).sum();
        let mut ds: Vec<f64> = a.iter().map(|&x| -x * mean).collect();
        for (&c, g) in pass.sel.cells.iter().zip(&da) {
            ds[c] += a[c] * g;
        }
        if entropy > 0.0 {
            // Bonus −β H / ln N: ∂/∂s_i = β / ln N · a_i (ln a_i + H).
            let h: f64 = -a.iter().filter(|&&x| x > 0.0).map(|&x| x * x.ln()).sum::<f64>();
            let k = entropy / (a.len() as f64).ln();
            for (g, &x) in ds.iter_mut().zip(a) {
                if x > 0.0 {
                    *g += k * x * (x.ln() + h);
                }
            }
        }
        let ds: Vec<f32> = ds.iter().map(|&v| v as f32).collect();
        self.attention.backward(&mut w.at, &ds, &mut w.ga, false);
    }
}

/// Splits `items` over one scoped thread per state in `states`; returns the results in
/// order, one list per state.
fn parallel<T: Sync, S: Send, R: Send>(
    items: &[T],
    states: &mut [S],
    work: impl Fn(&mut S, &T) -> R + Sync,
) -> Vec<Vec<R>> {
    let per = items.len().div_ceil(states.len().max(1)).max(1);
    std::thread::scope(|s| {
        let handles: Vec<_> = items
            .chunks(per)
            .zip(states.iter_mut())
            .map(|(chunk, state)| {
                let work = &work;
                s.spawn(move || chunk.iter().map(|it| work(state, it)).collect::<Vec<R>>())
            })
            .collect();
        handles.into_iter().map(|h| h.join().expect("training worker panicked")).collect()
    })
}

/// Probabilities and mean loss of the sampled model on `frames` with the engine's
/// estimator: priority sampling of `k` cells, with draws fixed by `seed` and the frame.
pub fn validate(
    m: &Sampled,
    data: &Dataset,
    frames: &[usize],
    k: usize,
    seed: u64,
    threads: usize,
) -> (Vec<Vec<f64>>, f64) {
    validate_stage(m, Stage::EndToEnd, &m.attention, data, frames, k, seed, threads)
}

/// Validation as a stage sees it: the warm-up's single-patch objective over the top `k`
/// cells, the attention stage's objective with the `entry` attention's top `k` cells (no
/// probabilities), or (end to end) priority sampling of `k` cells as the engine does it.
#[allow(clippy::too_many_arguments)]
fn validate_stage(
    m: &Sampled,
    stage: Stage,
    entry: &Net,
    data: &Dataset,
    frames: &[usize],
    k: usize,
    seed: u64,
    threads: usize,
) -> (Vec<Vec<f64>>, f64) {
    if stage == Stage::Attention {
        let mut workers: Vec<Worker> = (0..threads.max(1)).map(|_| Worker::new(m)).collect();
        let plain = View::plain(&data.norm);
        let losses = parallel(frames, &mut workers, |w, &i| {
            m.attention_step(entry, data, i, &plain, k, seed ^ i as u64, None, w)
        });
        return (Vec::new(), losses.iter().flatten().sum::<f64>() / frames.len().max(1) as f64);
    }
    let mut workers: Vec<Worker> = (0..threads.max(1)).map(|_| Worker::new(m)).collect();
    let plain = View::plain(&data.norm);
    let out = parallel(frames, &mut workers, |w, &i| {
        let (logits, loss) = if stage == Stage::Warmup {
            m.instance_step(data, i, &plain, k, &[], None, w)
        } else {
            let mut rng = ChaCha8Rng::seed_from_u64(seed ^ (i as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15));
            let pass = m.frame_forward(data, i, &plain, |a| priority(a, k, &mut rng), w);
            let mut dz = vec![0f32; pass.logits.len()];
            let loss = bce(&pass.logits, &data.samples[i].target, 1.0, &mut dz);
            (pass.logits, loss)
        };
        (logits.iter().map(|&z| sigmoid(z) as f64).collect::<Vec<f64>>(), loss)
    });
    let results: Vec<(Vec<f64>, f64)> = out.into_iter().flatten().collect();
    let loss =
        results.iter().map(|r| r.1).sum::<f64>() / frames.len().max(1) as f64 / data.samples[0].target.len() as f64;
    (results.into_iter().map(|r| r.0).collect(), loss)
}

/// Where the sampled model looks on `frames`, as validation does it (priority sampling of
/// `k` cells with the draws of `seed`): each frame's attention and the cells examined.
pub fn examined(
    m: &Sampled,
    data: &Dataset,
    frames: &[usize],
    k: usize,
    seed: u64,
    threads: usize,
) -> Vec<(Vec<f64>, Vec<usize>)> {
    let mut workers: Vec<Worker> = (0..threads.max(1)).map(|_| Worker::new(m)).collect();
    let plain = View::plain(&data.norm);
    let out = parallel(frames, &mut workers, |w, &i| {
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ (i as u64).wrapping_mul(0x9e37_79b9_7f4a_7c15));
        let thumb = data.thumbnail(i, &plain, &mut w.scratch, w.at.recycle_input());
        let a = softmax(&m.attention.forward(thumb, &mut w.at).data);
        let cells = priority(&a, k, &mut rng).cells;
        (a, cells)
    });
    out.into_iter().flatten().collect()
}

/// Probabilities and mean loss of the thumbnail-only network on `frames`.
pub fn validate_baseline(b: &Net, data: &Dataset, frames: &[usize], threads: usize) -> (Vec<Vec<f64>>, f64) {
    let mut scratch: Vec<Vec<f32>> = vec![Vec::new(); threads.max(1)];
    let out = parallel(frames, &mut scratch, |scratch, &i| {
        let z = b.infer(data.thumbnail(i, &View::plain(&data.norm), scratch, Vec::new())).data;
        let mut dz = vec![0f32; z.len()];
        let loss = bce(&z, &data.samples[i].target, 1.0, &mut dz);
        (z.iter().map(|&v| sigmoid(v) as f64).collect::<Vec<f64>>(), loss)
    });
    let results: Vec<(Vec<f64>, f64)> = out.into_iter().flatten().collect();
    let loss =
        results.iter().map(|r| r.1).sum::<f64>() / frames.len().max(1) as f64 / data.samples[0].target.len() as f64;
    (results.into_iter().map(|r| r.0).collect(), loss)
}

/// Macro F1 with each class at its best threshold on these frames (the rule the bundle's
/// thresholds follow).
pub fn thresholded_f1(probs: &[Vec<f64>], data: &Dataset, frames: &[usize]) -> f64 {
    let classes = data.samples[0].target.len();
    let total: f64 = (0..classes)
        .map(|c| {
            let scores: Vec<f64> = probs.iter().map(|p| p[c]).collect();
            let truth: Vec<bool> = frames.iter().map(|&i| data.samples[i].target[c] > 0.5).collect();
            crate::eval::metrics::best_f1_threshold(&scores, &truth).map_or(0.0, |t| t.f1)
        })
        .sum();
    total / classes as f64
}

/// Macro F1 at probability 0.5.
pub fn macro_f1(probs: &[Vec<f64>], data: &Dataset, frames: &[usize]) -> f64 {
    let pred: Vec<Vec<bool>> = probs.iter().map(|p| p.iter().map(|&v| v >= 0.5).collect()).collect();
    let truth: Vec<Vec<bool>> =
        frames.iter().map(|&i| data.samples[i].target.iter().map(|&t| t > 0.5).collect()).collect();
    crate::eval::metrics::f1(&truth, &pred).macro_f1
}

/// The thumbnail-only network's name in the training log.
pub const BASELINE: &str = "baseline";

/// What a stage trains.
#[derive(Clone, Copy, PartialEq, Eq)]
pub enum Stage {
    /// Feature network and head on single patches, attention held (see `instance_step`).
    Warmup,
    /// The attention network alone, taught by the warmed-up patch classifier (see
    /// `attention_step`).
    Attention,
    /// All three networks.
    EndToEnd,
}

impl Stage {
    /// The stage's name in the log, `training.jsonl` and its stage file.
    pub fn name(self) -> &'static str {
        match self {
            Stage::Warmup => "warm-up",
            Stage::Attention => "attention",
            Stage::EndToEnd => "sampled",
        }
    }
}

fn bar(bars: &MultiProgress, steps: usize, prefix: String) -> ProgressBar {
    let style = ProgressStyle::with_template("{prefix} [{bar:30}] {pos}/{len} {msg} ({eta})")
        .expect("valid template")
        .progress_chars("=> ");
    let b = bars.add(ProgressBar::new(steps as u64)).with_style(style);
    b.set_prefix(prefix);
    b
}

/// Learning rate of `epoch` (1-based) of `epochs`: cosine from `lr` down to `lr / 20`.
fn cosine(lr: f64, epoch: usize, epochs: usize) -> f64 {
    let t = (epoch - 1) as f64 / epochs.max(1) as f64;
    lr * (0.05 + 0.95 * 0.5 * (1.0 + (std::f64::consts::PI * t).cos()))
}

/// Largest global gradient norm a step applies; longer gradients are scaled down to it.
const CLIP: f64 = 5.0;

fn clip(gs: &mut [&mut Grads]) {
    let norm = gs.iter().map(|g| g.norm_sq()).sum::<f64>().sqrt();
    if norm > CLIP {
        gs.iter_mut().for_each(|g| g.scale((CLIP / norm) as f32));
    }
}

/// Keeps the weights with the lowest validation loss seen, starting from the entry
/// weights, and says when `patience` epochs brought nothing better.
struct Keeper<T> {
    best: T,
    loss: f64,
    since: usize,
}

impl<T: Clone> Keeper<T> {
    fn new(entry: &T, loss: f64) -> Self {
        Self { best: entry.clone(), loss, since: 0 }
    }

    /// Records an epoch; true when training should stop.
    fn epoch(&mut self, current: &T, loss: f64, patience: usize) -> bool {
        if loss < self.loss {
            (self.best, self.loss, self.since) = (current.clone(), loss, 0);
        } else {
            self.since += 1;
        }
        self.since >= patience
    }
}

/// The optimiser state and worker buffers of one stage: one [`Stepper::step`] per batch.
pub struct Stepper {
    stage: Stage,
    /// The attention the stage started from (the attention stage examines its top cells).
    entry: Net,
    /// The warm-up's mined cells per frame of the data set (empty: none yet).
    mined: Vec<Vec<usize>>,
    opt: [AdamW; 3],
    workers: Vec<Worker>,
}

impl Stepper {
    pub fn new(m: &Sampled, stage: Stage, threads: usize) -> Self {
        Self {
            stage,
            entry: m.attention.clone(),
            mined: Vec::new(),
            opt: [AdamW::new(&m.attention, 1e-4), AdamW::new(&m.features, 1e-4), AdamW::new(&m.head, 1e-4)],
            workers: (0..threads.max(1)).map(|_| Worker::new(m)).collect(),
        }
    }

    /// One optimiser step on the frames `chunk` at learning rate `lr`; returns the summed
    /// loss over frames and classes.
    pub fn step(
        &mut self,
        m: &mut Sampled,
        data: &Dataset,
        chunk: &[usize],
        o: &FitOptions,
        lr: f32,
        rng: &mut ChaCha8Rng,
    ) -> f64 {
        let stage = self.stage;
        let jobs: Vec<(usize, View, u64)> =
            chunk.iter().map(|&i| (i, View::draw(&data.norm, &o.augment, rng), rng.random())).collect();
        let classes = data.samples[0].target.len();
        let scale = (chunk.len() * classes) as f32;
        let (model, entry, mined) = (&*m, &self.entry, &self.mined);
        self.workers.iter_mut().for_each(Worker::zero);
        // Each job gives its frame's loss summed over classes.
        let done = parallel(&jobs, &mut self.workers, |w, (i, view, s)| match stage {
            Stage::Warmup => {
                let mined = mined.get(*i).map_or(&[][..], Vec::as_slice);
                model.instance_step(data, *i, view, o.warmup_top, mined, Some(scale), w).1 * scale as f64
            }
            Stage::Attention => {
                let frames = Some(chunk.len() as f32);
                model.attention_step(entry, data, *i, view, o.warmup_top, *s, frames, w) * classes as f64
            }
            Stage::EndToEnd => {
                let mut r = ChaCha8Rng::seed_from_u64(*s);
                let pass = model.frame_forward(data, *i, view, |a| select(a, o.top, o.tail, &mut r), w);
                let mut dz = vec![0f32; pass.logits.len()];
                let loss = bce(&pass.logits, &data.samples[*i].target, scale, &mut dz);
                model.frame_backward(&pass, &dz, true, o.entropy / chunk.len() as f64, w);
                loss * scale as f64
            }
        });
        let (mut ga, mut gf, mut gh) = (m.attention.grads(), m.features.grads(), m.head.grads());
        for w in &self.workers {
            ga.add(&w.ga);
            gf.add(&w.gf);
            gh.add(&w.gh);
        }
        match stage {
            Stage::Warmup => {
                clip(&mut [&mut gf, &mut gh]);
                self.opt[1].step(&mut m.features, &gf, lr);
                self.opt[2].step(&mut m.head, &gh, lr);
            }
            Stage::Attention => {
                clip(&mut [&mut ga]);
                self.opt[0].step(&mut m.attention, &ga, lr);
            }
            Stage::EndToEnd => {
                clip(&mut [&mut ga, &mut gf, &mut gh]);
                self.opt[0].step(&mut m.attention, &ga, lr * o.attention_rate as f32);
                let tuned = lr * o.tune_rate as f32;
                self.opt[1].step(&mut m.features, &gf, tuned);
                self.opt[2].step(&mut m.head, &gh, tuned);
            }
        }
        done.iter().flatten().sum()
    }
}

/// One stage of the sampled model. Early stopping compares every epoch with the weights
/// the stage started from, so a stage that only makes validation worse changes nothing.
#[allow(clippy::too_many_arguments)]
pub fn fit_sampled(
    m: &mut Sampled,
    stage: Stage,
    data: &Dataset,
    train: &[usize],
    val: &[usize],
    o: &FitOptions,
    rng: &mut ChaCha8Rng,
    log: &mut Vec<EpochLog>,
    bars: &MultiProgress,
) {
    let (epochs, k) = match stage {
        Stage::Warmup => (o.warmup, o.warmup_top),
        Stage::Attention => (o.attention_epochs, o.warmup_top),
        Stage::EndToEnd => (o.epochs, o.val_patches),
    };
    if epochs == 0 {
        return;
    }
    let seed = rng.random::<u64>();
    let entry = m.attention.clone();
    let (_, entry_loss) = validate_stage(m, stage, &entry, data, val, k, seed, o.threads);
    log::info!("{}: validation loss {entry_loss:.4} at the start", stage.name());
    let mut keeper = Keeper::new(m, entry_loss);
    let mut stepper = Stepper::new(m, stage, o.threads);
    let mut order = train.to_vec();
    let classes = data.samples[0].target.len() as f64;
    for epoch in 1..=epochs {
        let t0 = Instant::now();
        let lr = cosine(o.learning_rate, epoch, epochs) as f32;
        if stage == Stage::Warmup && o.mine_every > 0 && epoch > 1 && (epoch - 1) % o.mine_every == 0 {
            let t = Instant::now();
            let mut workers: Vec<Worker> = (0..o.threads.max(1)).map(|_| Worker::new(m)).collect();
            let all: Vec<usize> = (0..data.samples.len()).collect();
            let model = &*m;
            stepper.mined =
                parallel(&all, &mut workers, |w, &i| model.mine(data, i, w)).into_iter().flatten().collect();
            log::info!("warm-up: mined {MINE_POOL} cells of every frame in {:.1} s", t.elapsed().as_secs_f64());
        }
        order.shuffle(rng);
        let b = bar(bars, order.len().div_ceil(o.batch), format!("{} epoch {epoch}/{epochs}", stage.name()));
        let mut total = 0.0;
        for chunk in order.chunks(o.batch) {
            total += stepper.step(m, data, chunk, o, lr, rng);
            b.inc(1);
            b.set_message(format!("loss {:.4}", total / (b.position() as f64 * o.batch as f64 * classes)));
        }
        b.finish_and_clear();
        let (mut probs, val_loss) = validate_stage(m, stage, &entry, data, val, k, seed, o.threads);
        if stage == Stage::Attention {
            // Its objective has no frame answer; report the sampled model's.
            probs = validate(m, data, val, o.val_patches, seed, o.threads).0;
        }
        let entry = EpochLog {
            model: stage.name(),
            epoch,
            train_loss: total / (order.len() as f64 * classes),
            val_loss,
            val_macro_f1: macro_f1(&probs, data, val),
            seconds: t0.elapsed().as_secs_f64(),
        };
        log::info!(
            "{} epoch {epoch}: train loss {:.4}, validation loss {val_loss:.4}, validation macro F1 {:.3} ({:.1} s)",
            entry.model,
            entry.train_loss,
            entry.val_macro_f1,
            entry.seconds
        );
        log.push(entry);
        if keeper.epoch(m, val_loss, o.patience) {
            log::info!("{}: no better validation loss for {} epochs, stopping", stage.name(), o.patience);
            break;
        }
    }
    log::info!("{}: keeping the weights with validation loss {:.4}", stage.name(), keeper.loss);
    if stage == Stage::Attention {
        // Its own objective always improves; what counts is the sampled model's answer, as
        // the bundle will use it: each class at its best threshold on the held-out frames.
        // (The loss would also count a shift of every logit that the thresholds absorb.)
        let mut start = keeper.best.clone();
        start.attention = entry;
        let (p0, l0) = validate(&start, data, val, o.val_patches, seed, o.threads);
        let (p1, l1) = validate(&keeper.best, data, val, o.val_patches, seed, o.threads);
        let (f0, f1) = (thresholded_f1(&p0, data, val), thresholded_f1(&p1, data, val));
        log::info!(
            "attention: sampled model with the entry attention: loss {l0:.4}, macro F1 {f0:.3} at the best thresholds; with the new: {l1:.4}, {f1:.3}"
        );
        if f1 <= f0 {
            log::info!("attention: keeping the entry attention");
            keeper.best = start;
        }
    }
    *m = keeper.best;
}

/// The thumbnail-only comparison network, trained on whole thumbnails.
#[allow(clippy::too_many_arguments)]
pub fn fit_baseline(
    net: &mut Net,
    epochs: usize,
    data: &Dataset,
    train: &[usize],
    val: &[usize],
    o: &FitOptions,
    rng: &mut ChaCha8Rng,
    log: &mut Vec<EpochLog>,
    bars: &MultiProgress,
) {
    let (_, entry_loss) = validate_baseline(net, data, val, o.threads);
    let mut keeper = Keeper::new(net, entry_loss);
    let mut opt = AdamW::new(net, 1e-4);
    let mut order = train.to_vec();
    let steps = order.len().div_ceil(o.batch);
    let mut workers: Vec<(Tape, Grads, Vec<f32>)> =
        (0..o.threads.max(1)).map(|_| (Tape::default(), net.grads(), Vec::new())).collect();
    for epoch in 1..=epochs {
        let t0 = Instant::now();
        let lr = cosine(o.learning_rate, epoch, epochs) as f32;
        order.shuffle(rng);
        let b = bar(bars, steps, format!("baseline epoch {epoch}/{epochs}"));
        let mut total = 0.0;
        for chunk in order.chunks(o.batch) {
            let jobs: Vec<(usize, View)> =
                chunk.iter().map(|&i| (i, View::draw(&data.norm, &o.augment, rng))).collect();
            let scale = (chunk.len() * data.samples[0].target.len()) as f32;
            let model = &*net;
            workers.iter_mut().for_each(|w| w.1.zero());
            let done = parallel(&jobs, &mut workers, |(tape, g, scratch), (i, view)| {
                let buf = tape.recycle_input();
                let z = model.forward(data.thumbnail(*i, view, scratch, buf), tape).data.clone();
                let mut dz = vec![0f32; z.len()];
                let loss = bce(&z, &data.samples[*i].target, scale, &mut dz);
                model.backward(tape, &dz, g, false);
                loss
            });
            let mut g = net.grads();
            for ((_, gw, _), losses) in workers.iter().zip(&done) {
                g.add(gw);
                total += losses.iter().sum::<f64>() * scale as f64;
            }
            clip(&mut [&mut g]);
            opt.step(net, &g, lr);
            b.inc(1);
        }
        b.finish_and_clear();
        let (probs, val_loss) = validate_baseline(net, data, val, o.threads);
        let entry = EpochLog {
            model: BASELINE,
            epoch,
            train_loss: total / (order.len() * data.samples[0].target.len()) as f64,
            val_loss,
            val_macro_f1: macro_f1(&probs, data, val),
            seconds: t0.elapsed().as_secs_f64(),
        };
        log::info!(
            "baseline epoch {epoch}: train loss {:.4}, validation loss {val_loss:.4}, validation macro F1 {:.3}",
            entry.train_loss,
            entry.val_macro_f1
        );
        log.push(entry);
        if keeper.epoch(net, val_loss, o.patience) {
            break;
        }
    }
    *net = keeper.best;
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The top-plus-tail estimate is unbiased for `Σ a_i f_i` (scalar f here): its mean
    /// over many draws matches the exact sum within a few standard errors.
    #[test]
    fn the_training_estimate_is_unbiased() {
        let mut rng = ChaCha8Rng::seed_from_u64(4);
        let a = softmax(&(0..50).map(|_| rng.random_range(-2.0f32..2.0)).collect::<Vec<_>>());
        let f: Vec<f64> = (0..50).map(|_| rng.random_range(0.0..3.0)).collect();
        let exact: f64 = a.iter().zip(&f).map(|(a, f)| a * f).sum();
        let runs = 20_000;
        let est: Vec<f64> = (0..runs)
            .map(|_| {
                let s = select(&a, 5, 4, &mut rng);
                s.cells.iter().zip(&s.weights).map(|(&c, w)| w * f[c]).sum()
            })
            .collect();
        let mean = est.iter().sum::<f64>() / runs as f64;
        let sd = (est.iter().map(|e| (e - mean).powi(2)).sum::<f64>() / (runs - 1) as f64).sqrt();
        assert!((mean - exact).abs() < 4.0 * sd / (runs as f64).sqrt(), "mean {mean} vs exact {exact} (sd {sd})");
        // The slopes are the weights' derivatives in a: 1 for top cells, w / a for draws.
        let s = select(&a, 5, 4, &mut rng);
        for ((&c, &w), &d) in s.cells.iter().zip(&s.weights).zip(&s.slopes).skip(5) {
            assert!((d * a[c] - w).abs() < 1e-12);
        }
    }

    #[test]
    fn the_keeper_keeps_the_entry_weights_when_nothing_is_better() {
        let mut k = Keeper::new(&0u32, 0.40);
        assert!(!k.epoch(&1, 0.45, 2));
        assert!(k.epoch(&2, 0.41, 2), "two epochs without a better loss stop the stage");
        assert_eq!((k.best, k.loss), (0, 0.40));
        let mut k = Keeper::new(&0u32, 0.40);
        k.epoch(&1, 0.30, 5);
        k.epoch(&2, 0.35, 5);
        assert_eq!(k.best, 1);
    }
}
