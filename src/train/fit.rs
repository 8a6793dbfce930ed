//! The training loop: attention sampling trained end to end, and the thumbnail-only
//! comparison trained with the same loss, split and stopping rule.
//!
//! Gradient through the sampled patches (Katharopoulos and Fleuret, "Processing Megapixel
//! Images with Deep Attention-Sampling Models", ICML 2019): draw `k` cells per frame
//! i.i.d. from the attention distribution `a`, and estimate
//! `Psi_hat = (1/k) Σ_j f(x_j) · a_j / stop_gradient(a_j)`. Its value is the plain Monte
//! Carlo mean (an unbiased estimate of `Σ_i a_i f_i`), and its gradient with respect to
//! the attention scores is an unbiased estimate of the gradient of `Σ_i a_i f_i`, so the
//! attention network learns where to look from frame-level labels alone. An entropy bonus
//! `−β H(a) / ln N` keeps attention from collapsing onto one cell early on.

use std::time::Instant;

use candle_core::{Device, Result, Tensor, Var};
use candle_nn::{AdamW, Optimizer, ParamsAdamW};
use indicatif::{MultiProgress, ProgressBar, ProgressStyle};
use rand::seq::SliceRandom;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::data::Dataset;
use super::layers::{bce_with_logits, draw};
use super::model::{log_attention, AttentionNet, Baseline, FeatureNet, Head};

#[derive(Clone, Debug)]
pub struct FitOptions {
    pub epochs: usize,
    pub batch: usize,
    /// Cells drawn per frame and step.
    pub patches: usize,
    /// Epochs of the warm-up stage ([`Frozen`]) before end-to-end training.
    pub warmup: usize,
    pub learning_rate: f64,
    /// Weight β of the entropy bonus.
    pub entropy: f64,
    /// Epochs without a better validation loss before stopping.
    pub patience: usize,
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

pub struct Sampled {
    pub attention: AttentionNet,
    pub features: FeatureNet,
    pub head: Head,
}

/// The sampled model with its attention held fixed at precomputed distributions (one per
/// frame): the warm-up stage, where only the feature network and head learn. Each step
/// then costs a few patches instead of an attention pass over the whole thumbnail, so
/// the classifier gets many cheap updates before end-to-end training begins.
pub struct Frozen<'a> {
    pub model: &'a Sampled,
    /// Attention distribution of every frame of the dataset, by sample index.
    pub attention: Vec<Vec<f32>>,
}

impl<'a> Frozen<'a> {
    pub fn new(model: &'a Sampled, data: &Dataset, batch: usize) -> Result<Self> {
        let all: Vec<usize> = (0..data.samples.len()).collect();
        let mut attention = Vec::with_capacity(all.len());
        for chunk in all.chunks(batch) {
            let log_a = log_attention(&model.attention.forward_folded(&thumbs(data, chunk)?)?)?;
            attention.extend(log_a.exp()?.to_vec2::<f32>()?);
        }
        Ok(Self { model, attention })
    }
}

/// Draws `k` cells per frame from `rows` and runs the feature network on their patches:
/// features `[B, k, D]` and the cells drawn.
fn sampled_features(
    m: &Sampled,
    data: &Dataset,
    idx: &[usize],
    rows: &[&[f32]],
    k: usize,
    rng: &mut ChaCha8Rng,
) -> Result<(Tensor, Vec<u32>)> {
    let p = data.geometry.patch as usize;
    let (b, e) = (idx.len(), m.features.c1.k);
    let (mut picks, mut planar, mut pixels) =
        (Vec::with_capacity(b * k), Vec::new(), Vec::with_capacity(b * k * p * p * 3));
    for (row, &i) in rows.iter().zip(idx) {
        for _ in 0..k {
            let cell = draw(row, rng);
            picks.push(cell as u32);
            data.patch(i, cell, e, &mut planar, &mut pixels);
        }
    }
    let f = m.features.forward_folded(&Tensor::from_vec(pixels, (b * k, p / e, p / e, e * e * 3), &Device::Cpu)?)?;
    Ok((f.reshape((b, k, m.features.dim))?, picks))
}

impl Model for Frozen<'_> {
    const NAME: &'static str = "warm-up";

    fn logits(
        &self,
        data: &Dataset,
        idx: &[usize],
        rng: &mut ChaCha8Rng,
        o: &FitOptions,
    ) -> Result<(Tensor, Option<Tensor>)> {
        let rows: Vec<&[f32]> = idx.iter().map(|&i| self.attention[i].as_slice()).collect();
        let (f, _) = sampled_features(self.model, data, idx, &rows, o.patches, rng)?;
        Ok((self.model.head.forward(&f.mean(1)?)?, None))
    }
}

/// The whole model as one function of a batch of frames, for training and validation.
pub trait Model {
    const NAME: &'static str;
    /// Logits `[B, C]` for the frames `idx`, plus a term added to the loss.
    fn logits(
        &self,
        data: &Dataset,
        idx: &[usize],
        rng: &mut ChaCha8Rng,
        o: &FitOptions,
    ) -> Result<(Tensor, Option<Tensor>)>;
}

fn thumbs(data: &Dataset, idx: &[usize]) -> Result<Tensor> {
    let (h, w) = data.thumb_hw;
    let mut v = Vec::with_capacity(idx.len() * h * w * 3);
    for &i in idx {
        v.extend_from_slice(&data.samples[i].thumb);
    }
    Tensor::from_vec(v, (idx.len(), h / 2, w / 2, 12), &Device::Cpu)
}

fn targets(data: &Dataset, idx: &[usize]) -> Result<Tensor> {
    let c = data.samples[0].target.len();
    let v: Vec<f32> = idx.iter().flat_map(|&i| data.samples[i].target.iter().copied()).collect();
    Tensor::from_vec(v, (idx.len(), c), &Device::Cpu)
}

impl Model for Sampled {
    const NAME: &'static str = "sampled";

    fn logits(
        &self,
        data: &Dataset,
        idx: &[usize],
        rng: &mut ChaCha8Rng,
        o: &FitOptions,
    ) -> Result<(Tensor, Option<Tensor>)> {
        let (b, k) = (idx.len(), o.patches);
        let log_a = log_attention(&self.attention.forward_folded(&thumbs(data, idx)?)?)?;
        let a = log_a.exp()?;
        let host = a.to_vec2::<f32>()?;
        let rows: Vec<&[f32]> = host.iter().map(Vec::as_slice).collect();
        let (f, picks) = sampled_features(self, data, idx, &rows, k, rng)?;
        let chosen = a.gather(&Tensor::from_vec(picks, (b, k), &Device::Cpu)?, 1)?;
        // Value 1, gradient ∇a_j / a_j: the score-function term that trains the attention.
        let ratio = chosen.div(&chosen.detach())?;
        let psi = f.broadcast_mul(&ratio.unsqueeze(2)?)?.mean(1)?;
        let n = a.dim(1)? as f64;
        let entropy = (a * &log_a)?.sum(1)?.neg()?.mean_all()?;
        let bonus = entropy.affine(-o.entropy / n.ln(), 0.0)?;
        Ok((self.head.forward(&psi)?, Some(bonus)))
    }
}

impl Model for Baseline {
    const NAME: &'static str = "baseline";

    fn logits(
        &self,
        data: &Dataset,
        idx: &[usize],
        _rng: &mut ChaCha8Rng,
        _o: &FitOptions,
    ) -> Result<(Tensor, Option<Tensor>)> {
        Ok((self.forward_folded(&thumbs(data, idx)?)?, None))
    }
}

/// Mean loss and macro F1 of `m` on the frames `val`.
pub fn evaluate<M: Model>(
    m: &M,
    data: &Dataset,
    val: &[usize],
    rng: &mut ChaCha8Rng,
    o: &FitOptions,
) -> Result<(f64, f64)> {
    let (mut loss, mut all) = (0.0, Vec::new());
    for chunk in val.chunks(o.batch) {
        let (z, _) = m.logits(data, chunk, rng, o)?;
        loss += bce_with_logits(&z, &targets(data, chunk)?)?.to_scalar::<f32>()? as f64 * chunk.len() as f64;
        all.extend(z.to_vec2::<f32>()?);
    }
    // Predicted at probability 0.5, i.e. logit 0.
    let pred: Vec<Vec<bool>> = all.iter().map(|z| z.iter().map(|&v| v > 0.0).collect()).collect();
    let truth: Vec<Vec<bool>> =
        val.iter().map(|&i| data.samples[i].target.iter().map(|&t| t > 0.5).collect()).collect();
    Ok((loss / val.len() as f64, crate::eval::metrics::f1(&truth, &pred).macro_f1))
}

/// Trains `m` with AdamW, keeps the weights of the epoch with the lowest validation
/// loss and stops after `patience` epochs without improvement.
#[allow(clippy::too_many_arguments)]
pub fn fit<M: Model>(
    m: &M,
    vars: &[Var],
    data: &Dataset,
    train: &[usize],
    val: &[usize],
    o: &FitOptions,
    rng: &mut ChaCha8Rng,
    log: &mut Vec<EpochLog>,
    bars: &MultiProgress,
) -> anyhow::Result<()> {
    let mut opt =
        AdamW::new(vars.to_vec(), ParamsAdamW { lr: o.learning_rate, weight_decay: 1e-4, ..Default::default() })?;
    let mut best: Option<(f64, Vec<Tensor>)> = None;
    let mut since_best = 0;
    let mut order = train.to_vec();
    let steps = order.len().div_ceil(o.batch);
    for epoch in 1..=o.epochs {
        let t0 = Instant::now();
        order.shuffle(rng);
        let bar = bars.add(ProgressBar::new(steps as u64)).with_style(
            ProgressStyle::with_template("{prefix} [{bar:30}] {pos}/{len} {msg} ({eta})")
                .expect("valid template")
                .progress_chars("=> "),
        );
        bar.set_prefix(format!("{} epoch {epoch}/{}", M::NAME, o.epochs));
        let mut total = 0.0;
        for (s, chunk) in order.chunks(o.batch).enumerate() {
            let (z, extra) = m.logits(data, chunk, rng, o)?;
            let bce = bce_with_logits(&z, &targets(data, chunk)?)?;
            let loss = match extra {
                Some(e) => (&bce + e)?,
                None => bce.clone(),
            };
            opt.backward_step(&loss)?;
            total += bce.to_scalar::<f32>()? as f64 * chunk.len() as f64;
            bar.set_message(format!("loss {:.4}", total / ((s * o.batch + chunk.len()) as f64)));
            bar.inc(1);
        }
        bar.finish_and_clear();
        let (val_loss, val_f1) = evaluate(m, data, val, rng, o)?;
        let entry = EpochLog {
            model: M::NAME,
            epoch,
            train_loss: total / order.len() as f64,
            val_loss,
            val_macro_f1: val_f1,
            seconds: t0.elapsed().as_secs_f64(),
        };
        log::info!(
            "{} epoch {epoch}: train loss {:.4}, validation loss {:.4}, validation macro F1 {:.3} ({:.1} s)",
            M::NAME,
            entry.train_loss,
            val_loss,
            val_f1,
            entry.seconds
        );
        log.push(entry);
        if best.as_ref().is_none_or(|(b, _)| val_loss < *b) {
            best = Some((val_loss, vars.iter().map(|v| v.as_tensor().copy()).collect::<Result<_>>()?));
            since_best = 0;
        } else {
            since_best += 1;
            if since_best >= o.patience {
                log::info!("{}: no better validation loss for {} epochs, stopping", M::NAME, o.patience);
                break;
            }
        }
    }
    if let Some((loss, weights)) = best {
        log::info!("{}: keeping the weights with validation loss {loss:.4}", M::NAME);
        for (v, w) in vars.iter().zip(weights) {
            v.set(&w)?;
        }
    }
    Ok(())
}
