//! `saccade train` (cargo feature `train`): trains a bundle on the CPU from frames with
//! frame-level labels, and writes it in the bundle format the engine loads.

pub mod data;
pub mod fit;
pub mod layers;
pub mod model;

use std::path::{Path, PathBuf};
use std::time::Instant;

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

use crate::engine::bundle::{Activation, Manifest, NetworkRef, Normalization, FORMAT, MANIFEST};
use data::{Dataset, Shape};
use fit::{fit, EpochLog, FitOptions, Frozen, Sampled};
use layers::Params;
use model::{Arch, AttentionNet, Baseline, FeatureNet, Head};

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
    /// Share of the frames held out for validation and early stopping.
    pub validation: f64,
    pub seed: u64,
    /// Also train the thumbnail-only comparison network, for this many epochs.
    pub baseline: bool,
    pub baseline_epochs: usize,
    pub max_pixels: u64,
}

pub struct Trained {
    pub sampled: Sampled,
    pub baseline: Option<Baseline>,
    pub log: Vec<EpochLog>,
    /// Mean loss of the sampled model on the training frames before and after training.
    pub loss_before: f64,
    pub loss_after: f64,
    pub manifest: Manifest,
    pub seconds: f64,
}

/// Inputs scaled so a mid-grey sheet sits near 0; the designed bundle uses the same.
const NORMALIZATION: Normalization = Normalization { mean: [0.5; 3], std: [0.25; 3] };
/// Initial attention gain on local contrast (normalised units).
const ATTENTION_GAIN: f32 = 30.0;

pub fn train(o: &TrainOptions) -> anyhow::Result<Trained> {
    let t0 = Instant::now();
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
    log::info!(
        "training on {} frames of {}×{} ({} held out), {} cells per frame, classes [{}]",
        train.len(),
        data.geometry.frame_w,
        data.geometry.frame_h,
        val.len(),
        data.geometry.cells(),
        classes.join(", ")
    );

    // The thumbnail-only comparison trains on the other core meanwhile; candle runs each
    // model on its own thread (RAYON_NUM_THREADS = 1, set by the command) so the two do
    // not contend for one pool.
    // One bar per model on the terminal, each on its own line.
    let bars = indicatif::MultiProgress::new();
    let (sampled, loss_before, loss_after, baseline, log) = std::thread::scope(|scope| -> anyhow::Result<_> {
        let comparison = o.baseline.then(|| {
            let (data, train, val, bars) = (&data, train, val, &bars);
            let classes = classes.len();
            scope.spawn(move || -> anyhow::Result<(Baseline, Vec<EpochLog>)> {
                let mut bp = Params::new(ChaCha8Rng::seed_from_u64(o.seed ^ 0xba5e));
                let b = Baseline::new(&mut bp, &o.arch, classes)?;
                let mut log = Vec::new();
                let opts = FitOptions { epochs: o.baseline_epochs, ..o.fit.clone() };
                fit(
                    &b,
                    &bp.vars,
                    data,
                    train,
                    val,
                    &opts,
                    &mut ChaCha8Rng::seed_from_u64(o.seed ^ 0xba5e),
                    &mut log,
                    bars,
                )?;
                Ok((b, log))
            })
        });
        let mut params = Params::new(ChaCha8Rng::seed_from_u64(o.seed ^ 0x5eed));
        let attention = AttentionNet::new(&mut params, &o.arch, o.shape.stride as usize, ATTENTION_GAIN)?;
        let attention_vars = params.vars.len();
        let sampled = Sampled {
            attention,
            features: FeatureNet::new(&mut params, &o.arch, o.shape.patch as usize)?,
            head: Head::new(&mut params, &o.arch, classes.len())?,
        };
        let mut log = Vec::new();
        // Same draws before and after, so the change is the weights' alone.
        let loss_on_train = |m: &Sampled| {
            fit::evaluate(m, &data, train, &mut ChaCha8Rng::seed_from_u64(o.seed ^ 0x1055), &o.fit).map(|(l, _)| l)
        };
        let loss_before = loss_on_train(&sampled)?;
        if o.fit.warmup > 0 {
            let frozen = Frozen::new(&sampled, &data, o.fit.batch)?;
            let warm = FitOptions { epochs: o.fit.warmup, ..o.fit.clone() };
            fit(&frozen, &params.vars[attention_vars..], &data, train, val, &warm, &mut rng, &mut log, &bars)?;
        }
        fit(&sampled, &params.vars, &data, train, val, &o.fit, &mut rng, &mut log, &bars)?;
        let loss_after = loss_on_train(&sampled)?;
        log::info!("sampled model: training loss {loss_before:.4} before, {loss_after:.4} after");
        let baseline = match comparison {
            Some(h) => {
                let (b, blog) = h.join().expect("baseline training panicked")?;
                log.extend(blog);
                Some(b)
            }
            None => None,
        };
        Ok((sampled, loss_before, loss_after, baseline, log))
    })?;
    let seconds = t0.elapsed().as_secs_f64();
    let description = format!(
        "Trained by saccade train on {} frames of {}×{} ({} held out) from {}, seed {}, {} patches per frame and step, {:.0} s on the CPU.",
        train.len(),
        data.geometry.frame_w,
        data.geometry.frame_h,
        val.len(),
        o.labels.file_name().map_or_else(|| o.labels.display().to_string(), |f| f.to_string_lossy().into_owned()),
        o.seed,
        o.fit.patches,
        seconds
    );
    let manifest = manifest(o, &classes, &description);
    write_bundle(&o.out, &sampled, baseline.as_ref(), &manifest, &log)?;
    Ok(Trained { sampled, baseline, log, loss_before, loss_after, manifest, seconds })
}

fn manifest(o: &TrainOptions, classes: &[String], description: &str) -> Manifest {
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
        thresholds: vec![0.5; classes.len()],
        thumbnail_factor: o.shape.factor,
        cell_stride: o.shape.stride,
        patch_size: o.shape.patch,
        feature_dim: o.arch.feature_dim,
        normalization: NORMALIZATION,
        attention: net("attention.onnx", "thumbnail", "scores"),
        features: net("features.onnx", "patches", "features"),
        head: net("head.onnx", "psi", "logits"),
        baseline: o.baseline.then(|| net("baseline.onnx", "thumbnail", "logits")),
    }
}

/// Writes the ONNX files, `bundle.toml` and `training.jsonl` (one line per epoch).
pub fn write_bundle(
    dir: &Path,
    s: &Sampled,
    baseline: Option<&Baseline>,
    m: &Manifest,
    log: &[EpochLog],
) -> anyhow::Result<()> {
    use anyhow::Context;
    std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
    let write = |name: &str, bytes: Vec<u8>| {
        std::fs::write(dir.join(name), bytes).with_context(|| format!("writing {}", dir.join(name).display()))
    };
    write("attention.onnx", s.attention.onnx()?)?;
    write("features.onnx", s.features.onnx()?)?;
    write("head.onnx", s.head.onnx()?)?;
    if let Some(b) = baseline {
        write("baseline.onnx", b.onnx()?)?;
    }
    write(MANIFEST, toml::to_string_pretty(m)?.into_bytes())?;
    let lines: Vec<String> = log.iter().map(serde_json::to_string).collect::<Result<_, _>>()?;
    write("training.jsonl", (lines.join("\n") + "\n").into_bytes())
}
