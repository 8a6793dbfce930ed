//! One frame through the engine: thumbnail, attention, the budgeted patch loop, the
//! estimate and its uncertainty.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use image::RgbImage;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};
use tract_onnx::prelude::Tensor;

use super::estimator::{EstimatorKind, Plan};
use super::frame::Frame;
use super::mask::{self, Mask};
use super::patches::{Geometry, Normalizer};
use super::thumbnail::area_reduce;
use super::networks::{f32_slice, Bundle, BundleError};
use super::uncertainty::{probabilities, sample_psi, summarise, ClassResult};

/// Per-frame knobs; the daemon reloads these without reloading the bundle.
#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Settings {
    /// Time allowed from the start of the thumbnail to the end of the head, in ms.
    pub budget_ms: f64,
    pub estimator: EstimatorKind,
    /// Patches computed even when the deadline has passed (at least 1).
    pub min_patches: usize,
    /// Upper bound on patches per frame (also the number of draws for `replacement`).
    pub max_patches: usize,
    /// Patches per feature-network run.
    pub batch: usize,
    /// Gaussian samples of Psi for the uncertainty.
    pub samples: usize,
    /// Level of the central interval, e.g. 0.9 for 5 %–95 %.
    pub interval: f64,
    /// Per-class thresholds overriding the bundle's defaults.
    pub thresholds: Option<Vec<f64>>,
    /// Base RNG seed: the daemon gives frame `n` the seed `seed + n`, recorded in its report.
    pub seed: u64,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            budget_ms: 100.0,
            estimator: EstimatorKind::Priority,
            min_patches: 4,
            max_patches: 256,
            batch: 8,
            samples: 64,
            interval: 0.9,
            thresholds: None,
            seed: 0,
        }
    }
}

impl Settings {
    /// Checks the values (and the threshold count when the class count is known); errors
    /// name the field and what was expected.
    pub fn validate(&self, classes: Option<usize>) -> Result<(), String> {
        if !(self.budget_ms > 0.0 && self.budget_ms.is_finite()) {
            return Err(format!("budget_ms = {}: expected a positive number of milliseconds", self.budget_ms));
        }
        if self.min_patches == 0 {
            return Err("min_patches = 0: expected at least 1 (an estimate needs one patch)".into());
        }
        if self.max_patches < self.min_patches {
            return Err(format!("max_patches = {} is below min_patches = {}", self.max_patches, self.min_patches));
        }
        if self.batch == 0 || self.batch > 256 {
            return Err(format!("batch = {}: expected 1 to 256", self.batch));
        }
        if !(self.interval > 0.0 && self.interval < 1.0) {
            return Err(format!("interval = {}: expected a level strictly between 0 and 1, e.g. 0.9", self.interval));
        }
        if self.samples == 0 {
            return Err("samples = 0: expected at least 1 Gaussian sample for the interval".into());
        }
        if let Some(t) = &self.thresholds {
            if let Some(classes) = classes.filter(|&c| c != t.len()) {
                return Err(format!("thresholds: expected one per class ({classes}), found {}", t.len()));
            }
            if let Some(v) = t.iter().find(|v| !(0.0..=1.0).contains(*v)) {
                return Err(format!("thresholds: {v} is outside [0, 1]"));
            }
        }
        Ok(())
    }

    /// Batch sizes the loop may use: powers of two below `batch`, and `batch`.
    pub fn batch_sizes(&self) -> Vec<usize> {
        let mut v: Vec<usize> = (0..).map(|e| 1usize << e).take_while(|&b| b < self.batch).collect();
        v.push(self.batch);
        v
    }
}

/// Why the patch loop ended.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum StopReason {
    /// The next batch would have passed the deadline.
    Budget,
    /// `max_patches` was reached.
    MaxPatches,
    /// Every cell with positive attention was examined.
    AllCells,
}

/// One examined patch.
#[derive(Clone, Debug, Serialize)]
pub struct PatchUse {
    /// Top-left corner in frame pixels (may be negative at the border).
    pub x: i64,
    pub y: i64,
    pub size: u32,
    pub row: usize,
    pub col: usize,
    /// The cell's attention after masking.
    pub attention: f64,
    /// Its weight in the estimate.
    pub weight: f64,
}

#[derive(Clone, Debug, Default, Serialize)]
pub struct StageTimes {
    /// Set by callers that decode (the engine starts from a decoded frame).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub decode: Option<f64>,
    pub thumbnail: f64,
    pub attention: f64,
    /// Patch extraction and feature network runs.
    pub patches: f64,
    /// Gaussian samples, head and summary.
    pub head: f64,
    /// Thumbnail to head: the part the budget governs.
    pub total: f64,
    /// One-off plan building for a new frame size (outside the budget).
    #[serde(skip_serializing_if = "is_zero")]
    pub plan: f64,
}

fn is_zero(v: &f64) -> bool {
    *v == 0.0
}

/// Everything the engine says about one frame.
#[derive(Clone, Debug, Serialize)]
pub struct Report {
    pub seq: u64,
    pub origin: String,
    pub width: u32,
    pub height: u32,
    pub estimator: EstimatorKind,
    /// RNG seed of this analysis: with the same seed and patch count it replays exactly.
    pub seed: u64,
    pub classes: Vec<ClassResult>,
    pub patch_count: usize,
    pub cells: usize,
    /// Attention mass of the examined cells, `Σ_{i≤k} a_i`.
    pub attention_mass: f64,
    pub patches: Vec<PatchUse>,
    pub times_ms: StageTimes,
    pub budget_ms: f64,
    pub budget_met: bool,
    pub stop: StopReason,
    /// Estimate of Psi (feature space), for replay checks and sweeps.
    #[serde(skip)]
    pub psi: Vec<f64>,
    /// Attention per cell after masking, row-major over `geometry`.
    #[serde(skip)]
    pub attention: Vec<f64>,
    #[serde(skip)]
    pub geometry: Option<Geometry>,
    #[serde(skip)]
    pub thumbnail: Option<RgbImage>,
}

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error("{0}")]
    Mask(String),
    #[error("settings: {0}")]
    Settings(String),
}

/// Running estimates of what the next batch and the head will cost.
struct CostModel {
    per_patch: BTreeMap<usize, f64>,
    /// Fixed part of the head stage (its network run), from the load-time dry run.
    head_base: f64,
    /// Part of the head stage that grows with the patches examined (the Gaussian samples).
    head_per_patch: f64,
}

impl CostModel {
    const KEEP: f64 = 0.7;
    /// Safety factor on predicted costs: timing noise on a busy CPU is one-sided.
    const MARGIN: f64 = 1.25;
    /// Share of the budget held back for what the model does not predict (scheduling,
    /// cache misses on the last batch).
    const SLACK: f64 = 0.02;

    fn update(slot: &mut f64, observed: f64) {
        *slot = Self::KEEP * *slot + (1.0 - Self::KEEP) * observed;
    }

    /// Predicted head stage time after `k` patches.
    fn head(&self, k: usize) -> f64 {
        self.head_base + self.head_per_patch * k as f64
    }
}

/// The engine for one bundle; holds per-shape caches, so one per analysis thread.
pub struct Engine {
    bundle: Arc<Bundle>,
    norm: Normalizer,
    cost: CostModel,
    mask: Option<Mask>,
    mask_cache: Option<(Geometry, Vec<f64>)>,
}

impl Engine {
    pub fn new(bundle: Arc<Bundle>) -> Self {
        let norm = Normalizer::new(&bundle.manifest.normalization);
        let per_patch = bundle.dry_run.per_patch.iter().map(|(b, t)| (*b, t.as_secs_f64())).collect();
        let cost = CostModel { per_patch, head_base: bundle.dry_run.head.as_secs_f64(), head_per_patch: 0.0 };
        Self { bundle, norm, cost, mask: None, mask_cache: None }
    }

    pub fn bundle(&self) -> &Bundle {
        &self.bundle
    }

    /// Replaces the mask (None: examine the whole frame).
    pub fn set_mask(&mut self, mask: Option<Mask>) {
        self.mask = mask;
        self.mask_cache = None;
    }

    /// Builds the plans one frame size and these settings need, so that the first frame
    /// is not charged for them.
    pub fn prepare(&mut self, width: u32, height: u32, settings: &Settings) -> Result<(), EngineError> {
        let m = &self.bundle.manifest;
        let (tw, th) = super::thumbnail::thumbnail_size(width, height, m.thumbnail_factor);
        self.bundle.attention.plan(&[1, 3, th as usize, tw as usize])?;
        let p = m.patch_size as usize;
        for b in settings.batch_sizes() {
            self.bundle.features.plan(&[b, 3, p, p])?;
        }
        self.bundle.head.plan(&[settings.samples + 1, m.feature_dim])?;
        Ok(())
    }

    /// Analyses one frame within `settings.budget_ms`, drawing randomness from `seed`.
    pub fn analyze(&mut self, frame: &Frame, settings: &Settings, seed: u64) -> Result<Report, EngineError> {
        let bundle = self.bundle.clone();
        let m = &bundle.manifest;
        settings.validate(Some(m.classes.len())).map_err(EngineError::Settings)?;
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut times = StageTimes::default();
        let (fw, fh) = (frame.width(), frame.height());
        let (tw, th) = super::thumbnail::thumbnail_size(fw, fh, m.thumbnail_factor);
        let attention_shape = [1, 3, th as usize, tw as usize];
        if !bundle.attention.has_plan(&attention_shape) {
            let t = Instant::now();
            self.prepare(fw, fh, settings)?;
            times.plan = ms(t.elapsed());
        }

        let start = Instant::now();
        let budget = Duration::from_secs_f64(settings.budget_ms / 1000.0);
        let thumb = area_reduce(&frame.image, m.thumbnail_factor);
        let mut input = Tensor::zero::<f32>(&attention_shape).expect("thumbnail tensor");
        self.norm.write_planar(&thumb, f32_slice(&mut input));
        times.thumbnail = ms(start.elapsed());

        let t = Instant::now();
        let scores = bundle.attention.run(input)?;
        let (rows, cols) = bundle.cell_grid(scores.shape(), th as usize, tw as usize)?;
        let geometry = Geometry {
            frame_w: fw,
            frame_h: fh,
            factor: m.thumbnail_factor,
            stride: m.cell_stride,
            patch: m.patch_size,
            rows,
            cols,
        };
        let mut a = softmax(scores.as_slice().expect("dense output"));
        if let Some(factors) = self.mask_factors(&geometry)? {
            mask::apply(&mut a, &factors)
                .ok_or_else(|| EngineError::Mask("the mask leaves no attention on this frame".into()))?;
        }
        times.attention = ms(t.elapsed());

        let t = Instant::now();
        let plan = Plan::new(settings.estimator, &a, settings.max_patches, &mut rng);
        let (k, stop, feats) = self.patch_loop(frame, &geometry, &plan, settings, start + budget)?;
        times.patches = ms(t.elapsed());

        let t = Instant::now();
        let weights = plan.weights(k);
        let d = m.feature_dim;
        let rows_psi = sample_psi(&weights, &feats, d, settings.samples, &mut rng);
        let n = settings.samples + 1;
        let logits = bundle.head.run(Tensor::from_shape(&[n, d], &rows_psi).expect("head input"))?;
        let probs = probabilities(logits.as_slice().expect("dense output"), m.classes.len(), m.activation);
        let thresholds = settings.thresholds.as_ref().unwrap_or(&m.thresholds);
        let classes = summarise(&probs, &m.classes, thresholds, settings.interval);
        let head_time = t.elapsed();
        let per = (head_time.as_secs_f64() - self.cost.head_base).max(0.0) / k as f64;
        CostModel::update(&mut self.cost.head_per_patch, per);
        times.head = ms(head_time);
        let elapsed = start.elapsed();
        times.total = ms(elapsed);

        let patches = plan.order[..k]
            .iter()
            .zip(&weights.w)
            .map(|(&i, &w)| {
                let (x, y) = geometry.patch_origin(i);
                PatchUse { x, y, size: m.patch_size, row: i / cols, col: i % cols, attention: a[i], weight: w }
            })
            .collect();
        Ok(Report {
            seq: frame.seq,
            origin: frame.origin.clone(),
            width: fw,
            height: fh,
            estimator: settings.estimator,
            seed,
            classes,
            patch_count: k,
            cells: geometry.cells(),
            attention_mass: plan.order[..k].iter().map(|&i| a[i]).sum(),
            patches,
            times_ms: times,
            budget_ms: settings.budget_ms,
            budget_met: elapsed <= budget,
            stop,
            psi: weights.estimate(&feats, d),
            attention: a,
            geometry: Some(geometry),
            thumbnail: Some(thumb),
        })
    }

    fn mask_factors(&mut self, g: &Geometry) -> Result<Option<Vec<f64>>, EngineError> {
        let Some(mask) = &self.mask else { return Ok(None) };
        if let Some((cached, f)) = &self.mask_cache {
            if cached == g {
                return Ok(Some(f.clone()));
            }
        }
        mask.check(g.frame_w, g.frame_h).map_err(EngineError::Mask)?;
        let f = mask.cell_factors(g);
        self.mask_cache = Some((*g, f.clone()));
        Ok(Some(f))
    }

    /// Computes features along the plan's order until a stop condition; returns the
    /// number of cells done, why it stopped and their feature rows.
    fn patch_loop(
        &mut self,
        frame: &Frame,
        g: &Geometry,
        plan: &Plan,
        s: &Settings,
        deadline: Instant,
    ) -> Result<(usize, StopReason, Vec<f32>), EngineError> {
        let bundle = self.bundle.clone();
        let (p, d) = (bundle.manifest.patch_size as usize, bundle.manifest.feature_dim);
        let exhaustive = plan.kind() == EstimatorKind::Exhaustive;
        let slack = CostModel::SLACK * s.budget_ms / 1000.0;
        let limit = if exhaustive { plan.len() } else { plan.len().min(s.max_patches) };
        let sizes = s.batch_sizes();
        let mut feats = Vec::with_capacity(limit * d);
        let mut k = 0;
        let stop = loop {
            if k == plan.len() {
                break StopReason::AllCells;
            }
            if k >= limit {
                break StopReason::MaxPatches;
            }
            let want = s.batch.min(limit - k);
            let fits = |b: usize| b <= want;
            let nb = if exhaustive || k < s.min_patches {
                // Whole batches up to min_patches, even past the deadline (reported as an overrun).
                *sizes.iter().rev().find(|&&b| fits(b)).expect("batch size 1 always fits")
            } else {
                let left = deadline.saturating_duration_since(Instant::now()).as_secs_f64() - slack;
                let cost = |b: usize| {
                    CostModel::MARGIN
                        * (b as f64 * self.cost.per_patch.get(&b).copied().unwrap_or(f64::MAX) + self.cost.head(k + b))
                };
                match sizes.iter().rev().find(|&&b| fits(b) && cost(b) <= left) {
                    Some(&b) => b,
                    None => break StopReason::Budget,
                }
            };
            let t = Instant::now();
            let mut batch = Tensor::zero::<f32>(&[nb, 3, p, p]).expect("patch batch");
            let dst = f32_slice(&mut batch);
            for (j, &cell) in plan.order[k..k + nb].iter().enumerate() {
                self.norm.write_patch(
                    &frame.image,
                    g.patch_origin(cell),
                    p,
                    &mut dst[j * 3 * p * p..(j + 1) * 3 * p * p],
                );
            }
            let out = bundle.features.run(batch)?;
            feats.extend_from_slice(out.as_slice().expect("dense output"));
            let per = t.elapsed().as_secs_f64() / nb as f64;
            CostModel::update(self.cost.per_patch.entry(nb).or_insert(per), per);
            k += nb;
        };
        Ok((k, stop, feats))
    }
}

/// Softmax over all cells, in f64 so that small attention values keep their precision.
pub fn softmax(scores: &[f32]) -> Vec<f64> {
    let max = scores.iter().fold(f64::NEG_INFINITY, |m, &z| m.max(z as f64));
    let mut a: Vec<f64> = scores.iter().map(|&z| (z as f64 - max).exp()).collect();
    let s: f64 = a.iter().sum();
    a.iter_mut().for_each(|x| *x /= s);
    a
}

fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1000.0
}
