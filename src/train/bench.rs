//! Speed of one training step, for `saccade bench --train-step`: the work of one step of
//! `saccade train` end to end (attention on each thumbnail, the top and tail patches
//! through the feature network, the head, the loss, every gradient and an AdamW update),
//! timed on frames the caller supplies. `tests/bench/train_step.py` does the same step in
//! PyTorch as an independent reference.

use std::time::Instant;

use image::RgbImage;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use super::data::{Augment, Dataset, Sample, Shape};
use super::fit::{FitOptions, Sampled, Stage, Stepper};
use super::model::{self, Arch};
use super::{ATTENTION_CAP, ATTENTION_GAIN, NORMALIZATION};

/// What to time: frames with their class targets (0 or 1 per class), and the step's shape.
pub struct StepBench {
    pub frames: Vec<(RgbImage, Vec<f32>)>,
    pub shape: Shape,
    pub arch: Arch,
    pub top: usize,
    pub tail: usize,
    pub threads: usize,
    pub repeats: usize,
}

#[derive(Debug, Serialize)]
pub struct StepTiming {
    pub implementation: String,
    pub threads: usize,
    pub frames: usize,
    pub patches_per_frame: usize,
    /// Thumbnail height and width cut to whole cells.
    pub thumbnail: [usize; 2],
    pub median_ms_per_step: f64,
    pub min_ms_per_step: f64,
    pub median_ms_per_frame: f64,
}

/// Times `repeats` end-to-end steps (after one untimed step that sizes every buffer).
pub fn time_step(b: StepBench) -> anyhow::Result<StepTiming> {
    if b.frames.is_empty() {
        anyhow::bail!("a training step needs at least one frame");
    }
    let n = b.frames.len();
    let classes = b.frames[0].1.len();
    let samples = b
        .frames
        .into_iter()
        .enumerate()
        .map(|(i, (image, target))| Sample {
            name: format!("frame {i}"),
            image,
            thumb: Vec::new(),
            target,
            marks: Vec::new(),
        })
        .collect();
    let data = Dataset::new(samples, b.shape, &NORMALIZATION)?;
    let mut init = ChaCha8Rng::seed_from_u64(1);
    let mut m = Sampled {
        attention: model::attention(&mut init, &b.arch, b.shape.stride, ATTENTION_GAIN, ATTENTION_CAP),
        features: model::features(&mut init, &b.arch, classes),
        head: model::head(&mut init, classes),
    };
    let o = FitOptions {
        epochs: 1,
        warmup: 0,
        attention_epochs: 0,
        batch: n,
        top: b.top,
        warmup_top: b.top,
        mine_every: 0,
        tail: b.tail,
        learning_rate: 1e-3,
        attention_rate: 0.5,
        tune_rate: 0.25,
        entropy: 0.0,
        patience: 1,
        val_patches: b.top + b.tail,
        augment: Augment::NONE,
        threads: b.threads,
    };
    let all: Vec<usize> = (0..n).collect();
    let mut stepper = Stepper::new(&m, Stage::EndToEnd, b.threads);
    let mut rng = ChaCha8Rng::seed_from_u64(2);
    stepper.step(&mut m, &data, &all, &o, 1e-3, &mut rng);
    let mut ms: Vec<f64> = (0..b.repeats.max(1))
        .map(|_| {
            let t = Instant::now();
            stepper.step(&mut m, &data, &all, &o, 1e-3, &mut rng);
            t.elapsed().as_secs_f64() * 1000.0
        })
        .collect();
    ms.sort_by(f64::total_cmp);
    let median = ms[ms.len() / 2];
    Ok(StepTiming {
        implementation: format!("saccade {}", env!("CARGO_PKG_VERSION")),
        threads: b.threads,
        frames: n,
        patches_per_frame: b.top + b.tail,
        thumbnail: [data.thumb_hw.0, data.thumb_hw.1],
        median_ms_per_step: median,
        min_ms_per_step: ms[0],
        median_ms_per_frame: median / n as f64,
    })
}
