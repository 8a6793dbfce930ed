//! One frame through the engine: thumbnail, attention, the budgeted patch loop, the
//! estimate and its uncertainty.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use image::RgbImage;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::{Deserialize, Serialize};
use tract_onnx::prelude::Tensor;

use super::estimator::{CellOrder, EstimatorKind, Weights};
use super::frame::Frame;
use super::mask::{self, Mask, MaskError};
use super::networks::{f32_slice, zeros, Bundle, BundleError};
use super::patches::{Geometry, Normalizer};
use super::thumbnail::{area_reduce, thumbnail_size};
use super::uncertainty::{probabilities, sample_psi, summarise, ClassResult};

/// Per-frame knobs; the daemon reloads these without reloading the bundle.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
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
        }
    }
}

/// A setting out of its range; [`SettingsError::field`] names the key.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SettingsError {
    #[error("budget_ms = {0}: expected a positive number of milliseconds")]
    Budget(f64),
    #[error("min_patches = 0: expected at least 1 (an estimate needs one patch)")]
    MinPatches,
    #[error("max_patches = {max} is below min_patches = {min}")]
    MaxPatches { max: usize, min: usize },
    #[error("batch = {0}: expected 1 to 256")]
    Batch(usize),
    #[error("interval = {0}: expected a level strictly between 0 and 1, e.g. 0.9")]
    Interval(f64),
    #[error("samples = 0: expected at least 1 Gaussian sample for the interval")]
    Samples,
    #[error("thresholds: expected one per class ({classes}), found {found}")]
    ThresholdCount { classes: usize, found: usize },
    #[error("thresholds: {0} is outside [0, 1]")]
    ThresholdRange(f64),
}

impl SettingsError {
    /// The settings key the error is about.
    pub fn field(&self) -> &'static str {
        match self {
            Self::Budget(_) => "budget_ms",
            Self::MinPatches => "min_patches",
            Self::MaxPatches { .. } => "max_patches",
            Self::Batch(_) => "batch",
            Self::Interval(_) => "interval",
            Self::Samples => "samples",
            Self::ThresholdCount { .. } | Self::ThresholdRange(_) => "thresholds",
        }
    }
}

impl Settings {
    /// Checks the values, and the threshold count when the class count is known.
    pub fn check(&self, classes: Option<usize>) -> Result<(), SettingsError> {
        if !(self.budget_ms > 0.0 && self.budget_ms.is_finite()) {
            return Err(SettingsError::Budget(self.budget_ms));
        }
        if self.min_patches == 0 {
            return Err(SettingsError::MinPatches);
        }
        if self.max_patches < self.min_patches {
            return Err(SettingsError::MaxPatches { max: self.max_patches, min: self.min_patches });
        }
        if self.batch == 0 || self.batch > 256 {
            return Err(SettingsError::Batch(self.batch));
        }
        if !(self.interval > 0.0 && self.interval < 1.0) {
            return Err(SettingsError::Interval(self.interval));
        }
        if self.samples == 0 {
            return Err(SettingsError::Samples);
        }
        if let Some(t) = &self.thresholds {
            if let Some(classes) = classes.filter(|&c| c != t.len()) {
                return Err(SettingsError::ThresholdCount { classes, found: t.len() });
            }
            if let Some(v) = t.iter().find(|v| !(0.0..=1.0).contains(*v)) {
                return Err(SettingsError::ThresholdRange(*v));
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
    pub geometry: Geometry,
    #[serde(skip)]
    pub thumbnail: RgbImage,
}

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error("mask: {0}")]
    Mask(#[from] MaskError),
    #[error("settings: {0}")]
    Settings(#[from] SettingsError),
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

/// The thumbnail of a frame and the attention network's input made from it.
pub struct Thumbnail {
    pub image: RgbImage,
    pub input: Tensor,
}

/// The attention over the cells of one frame, after the mask, summing to 1.
pub struct Attention {
    pub geometry: Geometry,
    pub cells: Vec<f64>,
}

/// The engine for one bundle and one set of checked settings. It holds the cost model
/// and the mask cache, so one per analysis thread; the bundle is shared.
pub struct Engine {
    bundle: Arc<Bundle>,
    settings: Settings,
    norm: Normalizer,
    cost: CostModel,
    mask: Option<Mask>,
    mask_cache: Option<(Geometry, Vec<f64>)>,
}

impl Engine {
    /// Checks `settings` against the bundle and builds the plans they need.
    pub fn new(bundle: Arc<Bundle>, settings: Settings) -> Result<Self, EngineError> {
        let norm = Normalizer::new(&bundle.manifest.normalization);
        let per_patch = bundle.dry_run.per_patch.iter().map(|(b, t)| (*b, t.as_secs_f64())).collect();
        let cost = CostModel { per_patch, head_base: bundle.dry_run.head.as_secs_f64(), head_per_patch: 0.0 };
        let mut engine = Self { bundle, settings: Settings::default(), norm, cost, mask: None, mask_cache: None };
        engine.set_settings(settings)?;
        Ok(engine)
    }

    pub fn bundle(&self) -> &Bundle {
        &self.bundle
    }

    pub fn settings(&self) -> &Settings {
        &self.settings
    }

    /// Replaces the settings after checking them, and builds the plans (and first cost
    /// estimates) of any new batch size or sample count now, outside any frame's budget.
    /// On an error the engine keeps its settings.
    pub fn set_settings(&mut self, settings: Settings) -> Result<(), EngineError> {
        let m = &self.bundle.manifest;
        settings.check(Some(m.classes.len()))?;
        let p = m.patch_size as usize;
        for b in settings.batch_sizes() {
            self.bundle.features.plan(&[b, 3, p, p])?;
            if !self.cost.per_patch.contains_key(&b) {
                let t = Instant::now();
                self.bundle.features.run(zeros(&[b, 3, p, p]))?;
                self.cost.per_patch.insert(b, t.elapsed().as_secs_f64() / b as f64);
            }
        }
        self.bundle.head.plan(&[settings.samples + 1, m.feature_dim])?;
        self.settings = settings;
        Ok(())
    }

    /// Replaces the mask (None: examine the whole frame).
    pub fn set_mask(&mut self, mask: Option<Mask>) {
        self.mask = mask;
        self.mask_cache = None;
    }

    fn attention_shape(&self, width: u32, height: u32) -> [usize; 4] {
        let (tw, th) = thumbnail_size(width, height, self.bundle.manifest.thumbnail_factor);
        [1, 3, th as usize, tw as usize]
    }

    /// Builds the plan a frame size needs, so that the first frame of that size is not
    /// charged for it ([`Engine::analyze`] does it otherwise, outside the budget).
    pub fn prepare(&mut self, width: u32, height: u32) -> Result<(), EngineError> {
        self.bundle.attention.plan(&self.attention_shape(width, height))?;
        Ok(())
    }

    /// Analyses one frame within the budget, drawing randomness from `seed`.
    pub fn analyze(&mut self, frame: &Frame, seed: u64) -> Result<Report, EngineError> {
        let mut rng = ChaCha8Rng::seed_from_u64(seed);
        let mut times = StageTimes::default();
        let (fw, fh) = (frame.width(), frame.height());
        if !self.bundle.attention.has_plan(&self.attention_shape(fw, fh)) {
            let t = Instant::now();
            self.prepare(fw, fh)?;
            times.plan = ms(t.elapsed());
        }
        let s = self.settings.clone();

        let start = Instant::now();
        let budget = Duration::from_secs_f64(s.budget_ms / 1000.0);
        let Thumbnail { image: thumb, input } = self.thumbnail(frame);
        times.thumbnail = ms(start.elapsed());

        let t = Instant::now();
        let Attention { geometry, cells: a } = self.attention(frame, input)?;
        times.attention = ms(t.elapsed());

        let t = Instant::now();
        let order = CellOrder::new(s.estimator, &a, s.max_patches, &mut rng);
        let (k, stop, feats) = self.patch_loop(frame, &geometry, &order, start + budget)?;
        times.patches = ms(t.elapsed());

        let t = Instant::now();
        let weights = order.weights(k);
        let classes = self.head(&weights, &feats, &mut rng)?;
        let head_time = t.elapsed();
        let per = (head_time.as_secs_f64() - self.cost.head_base).max(0.0) / k as f64;
        CostModel::update(&mut self.cost.head_per_patch, per);
        times.head = ms(head_time);
        let elapsed = start.elapsed();
        times.total = ms(elapsed);

        let m = &self.bundle.manifest;
        let cols = geometry.cols;
        let patches = order.cells[..k]
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
            estimator: s.estimator,
            seed,
            classes,
            patch_count: k,
            cells: geometry.cells(),
            attention_mass: order.cells[..k].iter().map(|&i| a[i]).sum(),
            patches,
            times_ms: times,
            budget_ms: s.budget_ms,
            budget_met: elapsed <= budget,
            stop,
            psi: weights.estimate(&feats, m.feature_dim),
            attention: a,
            geometry,
            thumbnail: thumb,
        })
    }

    /// Stage 1: the area-average thumbnail and the attention network's input.
    pub fn thumbnail(&self, frame: &Frame) -> Thumbnail {
        let image = area_reduce(&frame.image, self.bundle.manifest.thumbnail_factor);
        let mut input = zeros(&[1, 3, image.height() as usize, image.width() as usize]);
        self.norm.write_planar(&image, f32_slice(&mut input));
        Thumbnail { image, input }
    }

    /// Stage 2: the attention network on the thumbnail, softmax over the cells, the mask.
    pub fn attention(&mut self, frame: &Frame, input: Tensor) -> Result<Attention, EngineError> {
        let m = &self.bundle.manifest;
        let (th, tw) = (input.shape()[2], input.shape()[3]);
        let (shape, scores) = self.bundle.attention.run_flat(input)?;
        let (rows, cols) = self.bundle.cell_grid(&shape, th, tw)?;
        let geometry = Geometry {
            frame_w: frame.width(),
            frame_h: frame.height(),
            factor: m.thumbnail_factor,
            stride: m.cell_stride,
            patch: m.patch_size,
            rows,
            cols,
        };
        let mut cells = softmax(&scores);
        if let Some(factors) = self.mask_factors(&geometry)? {
            mask::apply(&mut cells, &factors).ok_or(MaskError::NothingLeft)?;
        }
        Ok(Attention { geometry, cells })
    }

    /// Stage 3, one batch: the full-resolution patches of `cells` through the feature
    /// network; one row of `feature_dim` values per cell.
    pub fn features(&self, frame: &Frame, g: &Geometry, cells: &[usize]) -> Result<Vec<f32>, EngineError> {
        let p = self.bundle.manifest.patch_size as usize;
        let mut batch = zeros(&[cells.len(), 3, p, p]);
        let dst = f32_slice(&mut batch);
        for (&cell, out) in cells.iter().zip(dst.chunks_exact_mut(3 * p * p)) {
            self.norm.write_patch(&frame.image, g.patch_origin(cell), p, out);
        }
        Ok(self.bundle.features.run_flat(batch)?.1)
    }

    /// Stage 4: Gaussian samples of the estimate through the head, summarised per class.
    pub fn head<R: Rng>(&self, weights: &Weights, feats: &[f32], rng: &mut R) -> Result<Vec<ClassResult>, EngineError> {
        let (m, s) = (&self.bundle.manifest, &self.settings);
        let d = m.feature_dim;
        let rows = sample_psi(weights, feats, d, s.samples, rng);
        let input = Tensor::from_shape(&[s.samples + 1, d], &rows).expect("rows sized from samples and feature_dim");
        let (_, logits) = self.bundle.head.run_flat(input)?;
        let probs = probabilities(&logits, m.classes.len(), m.activation);
        let thresholds = s.thresholds.as_ref().unwrap_or(&m.thresholds);
        Ok(summarise(&probs, &m.classes, thresholds, s.interval))
    }

    fn mask_factors(&mut self, g: &Geometry) -> Result<Option<Vec<f64>>, MaskError> {
        let Some(mask) = &self.mask else { return Ok(None) };
        if let Some((cached, f)) = &self.mask_cache {
            if cached == g {
                return Ok(Some(f.clone()));
            }
        }
        mask.check(g.frame_w, g.frame_h)?;
        let f = mask.cell_factors(g);
        self.mask_cache = Some((*g, f.clone()));
        Ok(Some(f))
    }

    /// Computes features along the order until a stop condition; returns the number of
    /// cells done, why it stopped and their feature rows.
    fn patch_loop(
        &mut self,
        frame: &Frame,
        g: &Geometry,
        order: &CellOrder,
        deadline: Instant,
    ) -> Result<(usize, StopReason, Vec<f32>), EngineError> {
        let s = self.settings.clone();
        let d = self.bundle.manifest.feature_dim;
        let exhaustive = order.kind() == EstimatorKind::Exhaustive;
        let slack = CostModel::SLACK * s.budget_ms / 1000.0;
        let limit = if exhaustive { order.len() } else { order.len().min(s.max_patches) };
        let sizes = s.batch_sizes();
        let mut feats = Vec::with_capacity(limit * d);
        let mut k = 0;
        let stop = loop {
            if k == order.len() {
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
            feats.extend(self.features(frame, g, &order.cells[k..k + nb])?);
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
