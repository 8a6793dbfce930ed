//! `saccade train`: trains a bundle on the CPU from frames with frame-level labels, and
//! writes it in the bundle format the engine loads.

pub mod bench;
pub mod data;
pub mod fit;
pub mod model;
pub mod nn;

use std::path::{Path, PathBuf};
use std::time::Instant;

use indicatif::MultiProgress;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde::Serialize;

use crate::bundle::{Activation, Manifest, NetworkRef, Normalization, FORMAT, MANIFEST};
use crate::eval::marks::MarkTally;
use crate::eval::metrics::{best_f1_threshold, f1, predict};
use data::{Dataset, Shape};
use fit::{fit_baseline, fit_sampled, validate, validate_baseline, EpochLog, FitOptions, Sampled, Stage};
use model::Arch;
use nn::Net;

#[derive(Clone, Debug)]
pub struct TrainOptions {
    pub labels: PathBuf,
    /// Folder the frame names are relative to, when not the labels file's folder.
    pub frames: Option<PathBuf>,
    pub out: PathBuf,
    pub name: String,
    /// Classes in output order; the labels' classes, sorted, when empty.
    pub classes: Vec<String>,
    pub shape: Shape,
    pub arch: Arch,
    pub fit: FitOptions,
    /// Share of the frames held out for validation, early stopping and thresholds.
    pub validation: f64,
    pub seed: u64,
    /// Also train the thumbnail-only comparison network, for this many epochs.
    pub baseline: bool,
    pub baseline_epochs: usize,
    pub max_pixels: u64,
    /// A stage file of an earlier run (same `arch` and classes) to start from instead of the
    /// initial weights; with no warm-up epochs, training continues where that stage ended.
    pub start: Option<PathBuf>,
}

/// What the held-out frames say about the trained bundle.
#[derive(Clone, Debug, Serialize)]
pub struct HeldOut {
    pub frames: usize,
    pub thresholds: Vec<f64>,
    pub per_class_f1: Vec<f64>,
    pub macro_f1: f64,
    /// The thumbnail-only network's macro F1 at its own best thresholds.
    pub baseline_macro_f1: Option<f64>,
    /// With mark positions in the labels: the share of held-out marks in cells that
    /// validation examined, overall and per class, and the attention on their cells.
    pub mark_recall: Option<f64>,
    pub mark_recall_per_class: Vec<Option<f64>>,
    pub mark_attention: Option<f64>,
}

pub struct Trained {
    pub sampled: Sampled,
    pub baseline: Option<Net>,
    pub log: Vec<EpochLog>,
    /// Mean validation loss of the sampled model before and after training.
    pub loss_before: f64,
    pub loss_after: f64,
    pub held_out: HeldOut,
    pub manifest: Manifest,
    pub seconds: f64,
}

/// Inputs scaled so a mid-grey sheet sits near 0.
pub(crate) const NORMALIZATION: Normalization = Normalization { mean: [0.5; 3], std: [0.25; 3] };
/// Initial attention: gain on the local contrast (normalised units), and where its slope
/// bends down (about 20 grey levels).
pub(crate) const ATTENTION_GAIN: f32 = 40.0;
pub(crate) const ATTENTION_CAP: f32 = 0.3;

pub fn train(o: &TrainOptions) -> anyhow::Result<Trained> {
    let t0 = Instant::now();
    if model::halvings(o.shape.stride).is_none() {
        anyhow::bail!(
            "--cell-stride {}: the trained attention network needs a power of two, at least 2",
            o.shape.stride
        );
    }
    if o.shape.patch == 0 || o.shape.patch % 8 != 0 {
        anyhow::bail!(
            "--patch-size {}: expected a positive multiple of 8 (the feature network halves it three times)",
            o.shape.patch
        );
    }
    let mut items = crate::labels::read_labels(&o.labels)?;
    if let Some(dir) = &o.frames {
        crate::labels::rebase(&mut items, dir);
    }
    let classes = if o.classes.is_empty() { crate::labels::all_classes(&items) } else { o.classes.clone() };
    if classes.is_empty() {
        anyhow::bail!(
            "{}: no frame names a class, so there is nothing to learn (or pass --classes)",
            o.labels.display()
        );
    }
    let data = Dataset::load(&o.labels, &items, &classes, o.shape, &NORMALIZATION, o.max_pixels)?;
    let n = data.samples.len();
    if n < 2 {
        anyhow::bail!(
            "{}: at least 2 labelled frames are needed (one to train on, one to validate)",
            o.labels.display()
        );
    }
    let mut rng = ChaCha8Rng::seed_from_u64(o.seed);
    let mut order: Vec<usize> = (0..n).collect();
    order.shuffle(&mut rng);
    let held = ((n as f64 * o.validation).round() as usize).clamp(1, n - 1);
    let (val, train) = order.split_at(held);
    let g = &data.geometry;
    log::info!(
        "training on {} frames of {}×{} ({} held out), {} cells per frame, classes [{}], {} thread(s)",
        train.len(),
        g.frame_w,
        g.frame_h,
        val.len(),
        g.cells(),
        classes.join(", "),
        o.fit.threads
    );

    let bars = MultiProgress::new();
    let mut log = Vec::new();
    let mut init = ChaCha8Rng::seed_from_u64(o.seed ^ 0x5eed);
    let mut m = Sampled {
        attention: model::attention(&mut init, &o.arch, o.shape.stride, ATTENTION_GAIN, ATTENTION_CAP),
        features: model::features(&mut init, &o.arch, classes.len()),
        head: model::head(&mut init, classes.len()),
    };
    if let Some(path) = &o.start {
        StageFile::read(path)?.apply(&mut m, path)?;
        log::info!("starting from the weights in {}", path.display());
    }
    let check_seed = rng.random::<u64>();
    let (_, loss_before) = validate(&m, &data, val, o.fit.val_patches, check_seed, o.fit.threads);
    for stage in [Stage::Warmup, Stage::Attention, Stage::EndToEnd] {
        fit_sampled(&mut m, stage, &data, train, val, &o.fit, &mut rng, &mut log, &bars);
        StageFile::of(&m).write(&o.out.join(STAGES).join(format!("{}.json", stage.name())))?;
    }
    let (probs, loss_after) = validate(&m, &data, val, o.fit.val_patches, check_seed, o.fit.threads);
    log::info!("sampled model: validation loss {loss_before:.4} before training, {loss_after:.4} after");

    let truth: Vec<Vec<bool>> =
        val.iter().map(|&i| data.samples[i].target.iter().map(|&t| t > 0.5).collect()).collect();
    let thresholds = choose_thresholds(&classes, &probs, &truth);
    let scored = f1(&truth, &predict(&probs, &thresholds));
    let baseline = o.baseline.then(|| {
        let mut b = model::baseline(&mut ChaCha8Rng::seed_from_u64(o.seed ^ 0xba5e), &o.arch, classes.len());
        fit_baseline(&mut b, o.baseline_epochs, &data, train, val, &o.fit, &mut rng, &mut log, &bars);
        b
    });
    let baseline_macro_f1 = baseline.as_ref().map(|b| {
        let (p, _) = validate_baseline(b, &data, val, o.fit.threads);
        f1(&truth, &predict(&p, &choose_thresholds(&classes, &p, &truth))).macro_f1
    });
    let mut marks = MarkTally::new(classes.len());
    if val.iter().any(|&i| !data.samples[i].marks.is_empty()) {
        for (&i, (a, cells)) in
            val.iter().zip(fit::examined(&m, &data, val, o.fit.val_patches, check_seed, o.fit.threads))
        {
            marks.add(&data.geometry, &a, &cells, &data.samples[i].marks, &classes);
        }
    }
    let held_out = HeldOut {
        frames: val.len(),
        thresholds: thresholds.clone(),
        per_class_f1: scored.per_class,
        macro_f1: scored.macro_f1,
        baseline_macro_f1,
        mark_recall: marks.recall(),
        mark_recall_per_class: marks.recall_per_class(),
        mark_attention: marks.mean_mass(),
    };
    if let Some(r) = held_out.mark_recall {
        log::info!(
            "held out: {:.1} % of labelled marks in examined cells ({} patches per frame)",
            100.0 * r,
            o.fit.val_patches
        );
    }
    log::info!(
        "held out: macro F1 {:.3} (per class {}) at thresholds [{}]",
        held_out.macro_f1,
        held_out.per_class_f1.iter().zip(&classes).map(|(f, c)| format!("{c} {f:.3}")).collect::<Vec<_>>().join(", "),
        thresholds.iter().map(|t| format!("{t:.3}")).collect::<Vec<_>>().join(", ")
    );

    let seconds = t0.elapsed().as_secs_f64();
    let description = format!(
        "Trained by saccade train on {} frames of {}×{} ({} held out) from {}, seed {}, {} + {} patches per frame and step, {:.0} s on the CPU. Thresholds: best F1 per class on the held-out frames.",
        train.len(),
        g.frame_w,
        g.frame_h,
        val.len(),
        o.labels.file_name().map_or_else(|| o.labels.display().to_string(), |f| f.to_string_lossy().into_owned()),
        o.seed,
        o.fit.top,
        o.fit.tail,
        seconds
    );
    let manifest = manifest(o, &classes, &thresholds, &description);
    write_bundle(&o.out, &m, baseline.as_ref(), &manifest, &log, &held_out)?;
    write_calibration(&o.out, &classes, &probs, &truth)?;
    Ok(Trained { sampled: m, baseline, log, loss_before, loss_after, held_out, manifest, seconds })
}

/// Folder of the bundle where each stage's weights are written.
pub const STAGES: &str = "stages";

/// The three networks' weights after a stage (`--start-from` reads it back).
#[derive(Serialize, serde::Deserialize)]
struct StageFile {
    attention: Vec<(Vec<f32>, Vec<f32>)>,
    features: Vec<(Vec<f32>, Vec<f32>)>,
    head: Vec<(Vec<f32>, Vec<f32>)>,
}

impl StageFile {
    fn of(m: &Sampled) -> Self {
        Self { attention: m.attention.weights(), features: m.features.weights(), head: m.head.weights() }
    }

    fn write(&self, path: &Path) -> anyhow::Result<()> {
        use anyhow::Context;
        let dir = path.parent().expect("a file in the bundle folder");
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        std::fs::write(path, serde_json::to_vec(self)?).with_context(|| format!("writing {}", path.display()))
    }

    fn read(path: &Path) -> anyhow::Result<Self> {
        use anyhow::Context;
        let bytes = std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
        serde_json::from_slice(&bytes).with_context(|| format!("{}: not a stage file of saccade train", path.display()))
    }

    fn apply(&self, m: &mut Sampled, path: &Path) -> anyhow::Result<()> {
        let nets = [("attention", &mut m.attention, &self.attention), ("features", &mut m.features, &self.features)];
        for (name, net, w) in nets.into_iter().chain([("head", &mut m.head, &self.head)]) {
            net.set_weights(w).map_err(|e| {
                anyhow::anyhow!(
                    "{}: {name} network: {e} (was it written with other --arch or classes?)",
                    path.display()
                )
            })?;
        }
        Ok(())
    }
}

/// `calibration.json` from the held-out split: Platt maps and the outcome thresholds for
/// the default targets (the config's own targets are met from the stored scores; a user's
/// own frames give better ones through `saccade calibrate`).
fn write_calibration(dir: &Path, classes: &[String], probs: &[Vec<f64>], truth: &[Vec<bool>]) -> anyhow::Result<()> {
    use crate::bundle::calibration::{Calibration, Targets};
    let description = format!("saccade train, on its {} held-out frames", probs.len());
    let cal = Calibration::fit(classes, probs, truth, &Targets::default(), &description);
    for c in cal.classes.iter().filter(|c| c.clear_below == 0.0 || c.detected_above == 1.0) {
        log::warn!(
            "calibration: {:?} has {} held-out frames with it and {} without, too few to back both outcomes at the default targets; run saccade calibrate on more labelled frames",
            c.name,
            c.positives.len(),
            c.negatives.len()
        );
    }
    cal.write(dir).map_err(|e| anyhow::anyhow!("writing {}: {e}", dir.join(crate::bundle::calibration::FILE).display()))
}

/// Per class, [`best_f1_threshold`] on the held-out probabilities; 0.5 for a class that
/// no held-out frame carries (with a warning).
fn choose_thresholds(classes: &[String], probs: &[Vec<f64>], truth: &[Vec<bool>]) -> Vec<f64> {
    (0..classes.len())
        .map(|c| {
            let scores: Vec<f64> = probs.iter().map(|p| p[c]).collect();
            let t: Vec<bool> = truth.iter().map(|t| t[c]).collect();
            match best_f1_threshold(&scores, &t) {
                Some(th) => th.threshold,
                None => {
                    log::warn!("no held-out frame carries {:?}: its threshold stays at 0.5", classes[c]);
                    0.5
                }
            }
        })
        .collect()
}

fn manifest(o: &TrainOptions, classes: &[String], thresholds: &[f64], description: &str) -> Manifest {
    let net = |file: &str, input: &str, output: &str| NetworkRef {
        file: file.into(),
        input: input.into(),
        output: output.into(),
    };
    Manifest {
        format: FORMAT,
        name: o.name.clone(),
        description: description.into(),
        classes: classes.to_vec(),
        activation: Activation::Sigmoid,
        thresholds: thresholds.to_vec(),
        thumbnail_factor: o.shape.factor,
        cell_stride: o.shape.stride,
        patch_size: o.shape.patch,
        feature_dim: classes.len(),
        normalization: NORMALIZATION,
        attention: net("attention.onnx", "thumbnail", "scores"),
        features: net("features.onnx", "patches", "features"),
        head: net("head.onnx", "psi", "logits"),
        baseline: o.baseline.then(|| net("baseline.onnx", "thumbnail", "logits")),
    }
}

/// Writes the ONNX files, `bundle.toml`, `training.jsonl` (one line per epoch) and
/// `held-out.json` (thresholds and F1 on the held-out frames) and `training.png` (the
/// curves of `training.jsonl`).
pub fn write_bundle(
    dir: &Path,
    s: &Sampled,
    baseline: Option<&Net>,
    m: &Manifest,
    log: &[EpochLog],
    held_out: &HeldOut,
) -> anyhow::Result<()> {
    use anyhow::Context;
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let write = |name: &str, bytes: Vec<u8>| {
        std::fs::write(dir.join(name), bytes).with_context(|| format!("writing {}", dir.join(name).display()))
    };
    let (d, c, geo) = (m.feature_dim, m.classes.len(), m.geometry());
    write("attention.onnx", model::attention_onnx(&s.attention, &geo))?;
    write("features.onnx", model::features_onnx(&s.features, m.patch_size as usize, d, &geo))?;
    write("head.onnx", model::head_onnx(&s.head, d, c))?;
    if let Some(b) = baseline {
        write("baseline.onnx", model::baseline_onnx(b, c, &geo))?;
    }
    write(MANIFEST, toml::to_string_pretty(m)?.into_bytes())?;
    let lines: Vec<String> = log.iter().map(serde_json::to_string).collect::<Result<_, _>>()?;
    write("training.jsonl", (lines.join("\n") + "\n").into_bytes())?;
    write("held-out.json", (serde_json::to_string_pretty(held_out)? + "\n").into_bytes())?;
    write("training.png", crate::eval::plot::png_bytes(&curves(log)))
}

/// The training curves: validation losses (top) and macro F1 at probability 0.5 (bottom)
/// against epochs, the sampled model's stages one after another and the thumbnail-only
/// network from epoch 1.
fn curves(log: &[EpochLog]) -> image::RgbImage {
    use crate::eval::plot::{render_curves, CurvePanel};
    let mut models: Vec<&'static str> = Vec::new();
    for e in log {
        if !models.contains(&e.model) {
            models.push(e.model);
        }
    }
    let (mut losses, mut scores) = (Vec::new(), Vec::new());
    let mut offset = 0usize;
    for model in models {
        let epochs: Vec<&EpochLog> = log.iter().filter(|e| e.model == model).collect();
        let start = if model == fit::BASELINE { 0 } else { offset };
        let at = |f: fn(&EpochLog) -> f64| epochs.iter().map(|e| ((start + e.epoch) as f64, f(e))).collect();
        losses.push((model.to_string(), at(|e| e.val_loss)));
        scores.push((model.to_string(), at(|e| e.val_macro_f1)));
        if model != fit::BASELINE {
            offset += epochs.len();
        }
    }
    let top = CurvePanel { title: "validation loss (each stage its own objective)".into(), series: losses };
    let bottom = CurvePanel { title: "validation macro F1 at 0.5".into(), series: scores };
    render_curves(&top, &bottom, "epoch")
}
