//! The engine: one frame through its stages (thumbnail, attention, the budgeted patch
//! loop, the head with the uncertainty) into a report.

use std::sync::Arc;
use std::time::{Duration, Instant};

use image::RgbImage;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tract_onnx::prelude::Tensor;

use super::budget::{self, CostModel, Limits};
use super::estimator::{CellOrder, EstimatorKind, Weights};
use super::frame::Frame;
use super::isolate;
use super::mask::{self, Mask, MaskError};
use super::networks::{f32_slice, zeros, Bundle, BundleError};
use super::patches::{Geometry, Normalizer};
use super::report::{PatchUse, Report, StageTimes, StopReason};
use super::settings::{Settings, SettingsError};
use super::thumbnail::{area_reduce, thumbnail_size};
use super::uncertainty::{probabilities, sample_psi, summarise, ClassResult, Decision, Outcome, Spot};

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error("mask: {0}")]
    Mask(#[from] MaskError),
    #[error("settings: {0}")]
    Settings(#[from] SettingsError),
    #[error("the frame is {width}×{height} pixels; this bundle needs at least {min}×{min}: its attention network takes thumbnails of {thumbnail}×{thumbnail} and more (thumbnail_factor = {factor})")]
    TooSmall { width: u32, height: u32, min: u32, thumbnail: u32, factor: u32 },
    /// A defect of ours or of a network that the checks did not catch; the frame is
    /// skipped and the daemon goes on.
    #[error("internal error while analysing the frame: {0}")]
    Panicked(String),
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
    /// Per class `(clear_below, detected_above)` for the current settings.
    decision: Vec<Decision>,
}

/// At most this many patches are named per finding.
pub const MAX_SPOTS: usize = 3;

impl Engine {
    /// Checks `settings` against the bundle and builds the plans they need.
    pub fn new(bundle: Arc<Bundle>, settings: Settings) -> Result<Self, EngineError> {
        let norm = Normalizer::new(&bundle.manifest.normalization);
        let dry = &bundle.dry_run;
        let cost = CostModel::new(dry.per_patch.iter().map(|(b, t)| (*b, t.as_secs_f64())), dry.head.as_secs_f64());
        let mut engine = Self {
            bundle,
            settings: Settings::default(),
            norm,
            cost,
            mask: None,
            mask_cache: None,
            decision: Vec::new(),
        };
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
            if !self.cost.knows(b) {
                let t = Instant::now();
                self.bundle.features.run(zeros(&[b, 3, p, p]))?;
                self.cost.observe_batch(b, t.elapsed().as_secs_f64() / b as f64);
            }
        }
        self.bundle.head.plan(&[settings.samples + 1, m.feature_dim])?;
        self.decision = decision(&self.bundle, &settings);
        self.settings = settings;
        Ok(())
    }

    /// Per class `(clear_below, detected_above)` in use.
    pub fn decision(&self) -> &[Decision] {
        &self.decision
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

    /// Analyses one frame within the budget, drawing randomness from `seed`. A panic
    /// inside is contained and returned as [`EngineError::Panicked`]: the engine's cost
    /// model and settings change only when a frame completes, so it stays usable.
    pub fn analyze(&mut self, frame: &Frame, seed: u64) -> Result<Report, EngineError> {
        let (b, min) = (&self.bundle, self.bundle.min_frame_side());
        if frame.width() < min || frame.height() < min {
            let (width, height, thumbnail, factor) =
                (frame.width(), frame.height(), b.min_thumbnail, b.manifest.thumbnail_factor);
            return Err(EngineError::TooSmall { width, height, min, thumbnail, factor });
        }
        isolate::run(|| self.analyze_frame(frame, seed)).unwrap_or_else(|message| Err(EngineError::Panicked(message)))
    }

    fn analyze_frame(&mut self, frame: &Frame, seed: u64) -> Result<Report, EngineError> {
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
        let (k, stop, feats) = self.patch_loop(frame, &geometry, &order, start)?;
        times.patches = ms(t.elapsed());

        let t = Instant::now();
        let weights = order.weights(k);
        let classes = self.head(&weights, &feats, &mut rng)?;

        let m = &self.bundle.manifest;
        let cols = geometry.cols;
        let patches: Vec<PatchUse> = order.cells[..k]
            .iter()
            .zip(&weights.w)
            .map(|(&i, &w)| {
                let (x, y) = geometry.patch_origin(i);
                PatchUse { x, y, size: m.patch_size, row: i / cols, col: i % cols, attention: a[i], weight: w }
            })
            .collect();
        let mut classes = classes;
        self.spots(&feats, &patches, &mut classes)?;
        let head_time = t.elapsed();
        self.cost.observe_head(k, head_time.as_secs_f64());
        times.head = ms(head_time);
        let elapsed = start.elapsed();
        times.total = ms(elapsed);
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
        let probs = self.calibrated(probabilities(&logits, m.classes.len(), m.activation));
        Ok(summarise(&probs, &m.classes, &self.decision, s.interval))
    }

    /// Applies the bundle's calibration maps (rows of one probability per class); the
    /// identity without a calibration file.
    fn calibrated(&self, mut probs: Vec<f64>) -> Vec<f64> {
        if let Some(cal) = &self.bundle.calibration {
            let c = cal.classes.len();
            for (i, p) in probs.iter_mut().enumerate() {
                *p = cal.classes[i % c].map.apply(*p);
            }
        }
        probs
    }

    /// Per-patch class evidence for the classes that are not clear: the head on each
    /// examined patch's features alone (what a frame of only that patch would score),
    /// calibrated like the frame. Names the patches that would not be clear on their own,
    /// strongest first, up to [`MAX_SPOTS`]; the single strongest when none would.
    fn spots(&self, feats: &[f32], patches: &[PatchUse], classes: &mut [ClassResult]) -> Result<(), EngineError> {
        if patches.is_empty() || classes.iter().all(|c| c.outcome == Outcome::Clear) {
            return Ok(());
        }
        let m = &self.bundle.manifest;
        let (d, c) = (m.feature_dim, m.classes.len());
        // Rows go through the head in blocks of the planned shape, padded with zeros, so
        // that no new plan is built inside the budget.
        let rows = self.settings.samples + 1;
        let mut probs = Vec::with_capacity(patches.len() * c);
        for block in feats[..patches.len() * d].chunks(rows * d) {
            let mut padded = block.to_vec();
            padded.resize(rows * d, 0.0);
            let input = Tensor::from_shape(&[rows, d], &padded).expect("rows sized from samples and feature_dim");
            let (_, logits) = self.bundle.head.run_flat(input)?;
            let n = block.len() / d;
            probs.extend(probabilities(&logits[..n * c], c, m.activation));
        }
        let probs = self.calibrated(probs);
        for (k, class) in classes.iter_mut().enumerate().filter(|(_, r)| r.outcome != Outcome::Clear) {
            let mut order: Vec<usize> = (0..patches.len()).collect();
            order.sort_by(|&i, &j| probs[j * c + k].total_cmp(&probs[i * c + k]));
            let strong = order.iter().filter(|&&i| probs[i * c + k] >= class.clear_below).count();
            class.patches = order[..strong.clamp(1, MAX_SPOTS)]
                .iter()
                .map(|&i| Spot {
                    x: patches[i].x,
                    y: patches[i].y,
                    size: patches[i].size,
                    patch: i,
                    probability: probs[i * c + k],
                })
                .collect();
        }
        Ok(())
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

    /// Computes features along the order until the budget loop stops; returns the number
    /// of cells done, why it stopped and their feature rows. `start` is when the budget
    /// began.
    fn patch_loop(
        &mut self,
        frame: &Frame,
        g: &Geometry,
        order: &CellOrder,
        start: Instant,
    ) -> Result<(usize, StopReason, Vec<f32>), EngineError> {
        let s = &self.settings;
        let exhaustive = order.kind() == EstimatorKind::Exhaustive;
        let seconds = s.budget_ms / 1000.0;
        let limits = Limits {
            cells: order.len(),
            limit: if exhaustive { order.len() } else { order.len().min(s.max_patches) },
            forced: if exhaustive { order.len() } else { s.min_patches },
            sizes: s.batch_sizes(),
            deadline: seconds,
            slack: CostModel::SLACK * seconds,
        };
        let mut feats = Vec::with_capacity(limits.limit * self.bundle.manifest.feature_dim);
        let mut cost = self.cost.clone();
        let (k, stop) = budget::run(
            &limits,
            &mut cost,
            || start.elapsed().as_secs_f64(),
            |first, n| {
                feats.extend(self.features(frame, g, &order.cells[first..first + n])?);
                Ok::<_, EngineError>(())
            },
        )?;
        self.cost = cost;
        Ok((k, stop, feats))
    }
}

/// Per class `(clear_below, detected_above)`: the config's single thresholds when it sets
/// them; else the calibration file's risk-controlled pair for the config's targets; else
/// the manifest's single threshold (a bundle without a calibration file behaves as before).
fn decision(bundle: &Bundle, s: &Settings) -> Vec<Decision> {
    if let Some(t) = &s.thresholds {
        return t.iter().map(|&t| (t, t)).collect();
    }
    match &bundle.calibration {
        Some(cal) if cal.targets == s.targets() => {
            cal.classes.iter().map(|c| (c.clear_below, c.detected_above)).collect()
        }
        Some(cal) => cal.classes.iter().map(|c| c.thresholds(&s.targets())).collect(),
        None => bundle.manifest.thresholds.iter().map(|&t| (t, t)).collect(),
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
