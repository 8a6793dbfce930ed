//! The model bundle: `bundle.toml` plus the attention, feature and head ONNX files.
//!
//! Loading validates everything the engine relies on (names, ranks, channel counts,
//! feature dimension, class count) by reading the ONNX graph and by a dry run of each
//! network, so that a bad bundle fails at start-up with a message naming the file.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use serde::{Deserialize, Serialize};
use tract_onnx::pb;
use tract_onnx::prelude::*;

pub const MANIFEST: &str = "bundle.toml";
pub const FORMAT: u32 = 1;

/// How the head's logits become probabilities.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Activation {
    /// Independent classes (multi-label): one sigmoid per class.
    Sigmoid,
    /// Mutually exclusive classes: softmax across classes.
    Softmax,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Normalization {
    /// Per-channel mean (R, G, B) on the 0–1 scale.
    pub mean: [f32; 3],
    /// Per-channel standard deviation (R, G, B) on the 0–1 scale.
    pub std: [f32; 3],
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct NetworkRef {
    pub file: PathBuf,
    pub input: String,
    pub output: String,
}

#[derive(Clone, Debug, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    pub format: u32,
    pub name: String,
    /// Free text: how the bundle was made.
    #[serde(default)]
    pub description: String,
    pub classes: Vec<String>,
    pub activation: Activation,
    /// Default decision threshold per class, in [0, 1].
    pub thresholds: Vec<f64>,
    /// Frame pixels per thumbnail pixel along each axis.
    pub thumbnail_factor: u32,
    /// Thumbnail pixels per attention cell along each axis.
    pub cell_stride: u32,
    /// Side of a full-resolution patch in frame pixels.
    pub patch_size: u32,
    pub feature_dim: usize,
    pub normalization: Normalization,
    pub attention: NetworkRef,
    pub features: NetworkRef,
    pub head: NetworkRef,
    /// Optional thumbnail-only classifier (thumbnail in, one logit per class out), kept
    /// for comparison: `saccade sweep` reports it beside the sampled estimate.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub baseline: Option<NetworkRef>,
}

#[derive(Debug, thiserror::Error)]
pub enum BundleError {
    #[error("{path}: {message}")]
    Manifest { path: PathBuf, message: String },
    #[error("{path}: {message}")]
    Network { path: PathBuf, message: String },
}

fn manifest_err(path: &Path, message: impl Into<String>) -> BundleError {
    BundleError::Manifest { path: path.to_path_buf(), message: message.into() }
}

fn net_err(path: &Path, message: impl Into<String>) -> BundleError {
    BundleError::Network { path: path.to_path_buf(), message: message.into() }
}

impl Manifest {
    pub fn read(path: &Path) -> Result<Self, BundleError> {
        let text = std::fs::read_to_string(path)
            .map_err(|e| manifest_err(path, format!("cannot read the bundle manifest: {e}")))?;
        let m: Manifest =
            toml::from_str(&text).map_err(|e| manifest_err(path, e.to_string().trim_end().to_string()))?;
        m.validate().map_err(|msg| manifest_err(path, msg))?;
        Ok(m)
    }

    fn validate(&self) -> Result<(), String> {
        if self.format != FORMAT {
            return Err(format!("format = {}: this saccade reads bundle format {FORMAT}", self.format));
        }
        if self.classes.is_empty() {
            return Err("classes: expected at least one class name".into());
        }
        if self.activation == Activation::Softmax && self.classes.len() < 2 {
            return Err("activation = \"softmax\" needs at least two classes".into());
        }
        if self.thresholds.len() != self.classes.len() {
            return Err(format!(
                "thresholds: expected one per class ({}), found {}",
                self.classes.len(),
                self.thresholds.len()
            ));
        }
        if let Some(t) = self.thresholds.iter().find(|t| !(0.0..=1.0).contains(*t)) {
            return Err(format!("thresholds: {t} is outside [0, 1]"));
        }
        for (key, v) in [
            ("thumbnail_factor", self.thumbnail_factor),
            ("cell_stride", self.cell_stride),
            ("patch_size", self.patch_size),
        ] {
            if v == 0 {
                return Err(format!("{key}: expected a positive integer, found 0"));
            }
        }
        if self.thumbnail_factor > super::thumbnail::MAX_FACTOR {
            return Err(format!(
                "thumbnail_factor = {}: at most {} is supported",
                self.thumbnail_factor,
                super::thumbnail::MAX_FACTOR
            ));
        }
        if self.feature_dim == 0 {
            return Err("feature_dim: expected a positive integer, found 0".into());
        }
        if let Some(s) = self.normalization.std.iter().find(|s| !(**s > 0.0)) {
            return Err(format!("normalization.std: {s} must be positive"));
        }
        Ok(())
    }
}

/// One ONNX network with optimised plans cached per concrete input shape.
pub struct Network {
    pub path: PathBuf,
    model: InferenceModel,
    plans: Mutex<HashMap<Vec<usize>, Arc<TypedRunnableModel>>>,
    /// Total time spent inside inference, for separating engine overhead from network cost.
    busy_ns: AtomicU64,
}

impl Network {
    /// Loads `file`, checks that it has one input named `input` of rank `rank` (with
    /// `channels` at axis 1 when given) and an output named `output`.
    fn load(path: PathBuf, net: &NetworkRef, rank: usize, channels: Option<usize>) -> Result<Self, BundleError> {
        if !path.is_file() {
            return Err(net_err(&path, "file not found (named in bundle.toml)"));
        }
        let onnx = tract_onnx::onnx();
        let proto =
            onnx.proto_model_for_path(&path).map_err(|e| net_err(&path, format!("not a readable ONNX model: {e}")))?;
        let graph = proto.graph.as_ref().ok_or_else(|| net_err(&path, "the ONNX file holds no graph"))?;
        let inits: Vec<&str> = graph.initializer.iter().map(|t| t.name.as_str()).collect();
        let inputs: Vec<&pb::ValueInfoProto> =
            graph.input.iter().filter(|i| !inits.contains(&i.name.as_str())).collect();
        let names =
            |v: &[&pb::ValueInfoProto]| v.iter().map(|i| format!("{:?}", i.name)).collect::<Vec<_>>().join(", ");
        if inputs.len() != 1 || inputs[0].name != net.input {
            return Err(net_err(
                &path,
                format!("expected one input named {:?}, the graph has {}", net.input, names(&inputs)),
            ));
        }
        if !graph.output.iter().any(|o| o.name == net.output) {
            let outs: Vec<&pb::ValueInfoProto> = graph.output.iter().collect();
            return Err(net_err(
                &path,
                format!("expected an output named {:?}, the graph has {}", net.output, names(&outs)),
            ));
        }
        if let Some(dims) = declared_dims(inputs[0]) {
            if dims.len() != rank {
                return Err(net_err(
                    &path,
                    format!("input {:?} has rank {}, expected rank {rank}", net.input, dims.len()),
                ));
            }
            if let (Some(c), Some(Some(d))) = (channels, dims.get(1)) {
                if *d != c as i64 {
                    return Err(net_err(&path, format!("input {:?} has {d} channels, expected {c} (RGB)", net.input)));
                }
            }
        }
        let model = onnx
            .model_for_proto_model(&proto)
            .and_then(|m| m.with_outputs_by_name([net.output.as_str()]))
            .map_err(|e| net_err(&path, format!("tract cannot load the graph: {e:#}")))?;
        Ok(Self { path, model, plans: Mutex::new(HashMap::new()), busy_ns: AtomicU64::new(0) })
    }

    /// The optimised plan for one input shape, built on first use.
    pub fn plan(&self, shape: &[usize]) -> Result<Arc<TypedRunnableModel>, BundleError> {
        if let Some(p) = self.plans.lock().expect("plan cache poisoned").get(shape) {
            return Ok(p.clone());
        }
        let plan = self
            .model
            .clone()
            .with_input_fact(0, f32::fact(shape).into())
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable())
            .map_err(|e| net_err(&self.path, format!("cannot build a plan for input shape {shape:?}: {e:#}")))?;
        self.plans.lock().expect("plan cache poisoned").insert(shape.to_vec(), plan.clone());
        Ok(plan)
    }

    /// Time spent inside inference since the network was loaded.
    pub fn busy(&self) -> Duration {
        Duration::from_nanos(self.busy_ns.load(Ordering::Relaxed))
    }

    /// Whether a plan for this shape is already cached.
    pub fn has_plan(&self, shape: &[usize]) -> bool {
        self.plans.lock().expect("plan cache poisoned").contains_key(shape)
    }

    /// Runs the network on one input tensor, returning its output as a dense f32 array.
    pub fn run(&self, input: Tensor) -> Result<tract_ndarray::ArrayD<f32>, BundleError> {
        let plan = self.plan(input.shape())?;
        let shape = input.shape().to_vec();
        let t = Instant::now();
        let mut out = plan
            .run(tvec!(input.into_tvalue()))
            .map_err(|e| net_err(&self.path, format!("inference failed on input shape {shape:?}: {e:#}")))?;
        self.busy_ns.fetch_add(t.elapsed().as_nanos() as u64, Ordering::Relaxed);
        let t = out.remove(0).into_tensor();
        let view =
            t.to_plain_array_view::<f32>().map_err(|e| net_err(&self.path, format!("output is not f32: {e}")))?;
        Ok(view.to_owned())
    }
}

fn declared_dims(v: &pb::ValueInfoProto) -> Option<Vec<Option<i64>>> {
    use pb::tensor_shape_proto::dimension::Value;
    let pb::type_proto::Value::TensorType(t) = v.r#type.as_ref()?.value.as_ref()?;
    let shape = t.shape.as_ref()?;
    Some(
        shape
            .dim
            .iter()
            .map(|d| match d.value {
                Some(Value::DimValue(n)) => Some(n),
                _ => None,
            })
            .collect(),
    )
}

/// Costs observed during the load-time dry run, used to seed the budget loop's estimates.
#[derive(Clone, Debug, Default)]
pub struct DryRunCosts {
    /// Wall time per patch at each batch size that was tried.
    pub per_patch: Vec<(usize, Duration)>,
    pub head: Duration,
}

/// A loaded, validated bundle.
pub struct Bundle {
    pub dir: PathBuf,
    pub manifest: Manifest,
    pub attention: Network,
    pub features: Network,
    pub head: Network,
    pub baseline: Option<Network>,
    pub dry_run: DryRunCosts,
}

impl Bundle {
    /// Loads and validates the bundle in `dir`, warming plans for the given patch batch sizes.
    pub fn load(dir: &Path, batch_sizes: &[usize]) -> Result<Self, BundleError> {
        let manifest_path = dir.join(MANIFEST);
        if !manifest_path.is_file() {
            return Err(manifest_err(&manifest_path, "bundle manifest not found (is this a bundle folder?)"));
        }
        let manifest = Manifest::read(&manifest_path)?;
        let attention = Network::load(dir.join(&manifest.attention.file), &manifest.attention, 4, Some(3))?;
        let features = Network::load(dir.join(&manifest.features.file), &manifest.features, 4, Some(3))?;
        let head = Network::load(dir.join(&manifest.head.file), &manifest.head, 2, None)?;
        let baseline = match &manifest.baseline {
            Some(net) => Some(Network::load(dir.join(&net.file), net, 4, Some(3))?),
            None => None,
        };
        let mut bundle = Self {
            dir: dir.to_path_buf(),
            manifest,
            attention,
            features,
            head,
            baseline,
            dry_run: DryRunCosts::default(),
        };
        bundle.dry_run = bundle.check_by_running(batch_sizes)?;
        Ok(bundle)
    }

    /// Runs each network on small inputs and checks every shape the engine depends on.
    fn check_by_running(&self, batch_sizes: &[usize]) -> Result<DryRunCosts, BundleError> {
        let m = &self.manifest;
        let stride = m.cell_stride as usize;
        // Two thumbnail sizes, one not a multiple of the stride, prove the symbolic H and W.
        let c = m.classes.len();
        for (h, w) in [(8 * stride, 12 * stride), (10 * stride + stride / 2 + 1, 7 * stride + 1)] {
            let out = self.attention.run(Tensor::zero::<f32>(&[1, 3, h, w]).expect("small tensor"))?;
            cell_grid(out.shape(), h, w, stride).map_err(|msg| net_err(&self.attention.path, msg))?;
            if let Some(b) = &self.baseline {
                let out = b.run(Tensor::zero::<f32>(&[1, 3, h, w]).expect("small tensor"))?;
                if out.shape() != [1, c] {
                    return Err(net_err(&b.path, format!("for a thumbnail of {h}×{w} the baseline output has shape {:?}, expected [1, {c}] (one logit per class)", out.shape())));
                }
            }
        }
        let p = m.patch_size as usize;
        let mut sizes: Vec<usize> = batch_sizes.iter().copied().chain([1, 2]).collect();
        sizes.sort_unstable();
        sizes.dedup();
        let mut per_patch = Vec::new();
        for &b in &sizes {
            let input = Tensor::zero::<f32>(&[b, 3, p, p]).expect("small tensor");
            let out = self.features.run(input.clone())?;
            if out.shape() != [b, m.feature_dim] {
                return Err(net_err(
                    &self.features.path,
                    format!("for a batch of {b} patches of {p}×{p} the output {:?} has shape {:?}, expected [{b}, {}] (feature_dim in bundle.toml)", m.features.output, out.shape(), m.feature_dim),
                ));
            }
            let t0 = Instant::now();
            self.features.run(input)?;
            per_patch.push((b, t0.elapsed() / b as u32));
        }
        let input = Tensor::zero::<f32>(&[2, m.feature_dim]).expect("small tensor");
        let out = self.head.run(input.clone())?;
        if out.shape() != [2, c] {
            return Err(net_err(
                &self.head.path,
                format!("for 2 feature vectors of {} the output {:?} has shape {:?}, expected [2, {c}] (one logit per class in bundle.toml)", m.feature_dim, m.head.output, out.shape()),
            ));
        }
        let t0 = Instant::now();
        self.head.run(input)?;
        Ok(DryRunCosts { per_patch, head: t0.elapsed() })
    }

    /// Class probabilities of the thumbnail-only baseline for a whole frame, when the
    /// bundle has one. The thumbnail is made exactly as for the attention network.
    pub fn baseline_probabilities(&self, frame: &image::RgbImage) -> Result<Option<Vec<f64>>, BundleError> {
        let Some(net) = &self.baseline else { return Ok(None) };
        let m = &self.manifest;
        let thumb = super::thumbnail::area_reduce(frame, m.thumbnail_factor);
        let (w, h) = (thumb.width() as usize, thumb.height() as usize);
        let mut input = Tensor::zero::<f32>(&[1, 3, h, w]).expect("thumbnail tensor");
        super::patches::Normalizer::new(&m.normalization).write_planar(&thumb, super::analysis::f32_slice(&mut input));
        let logits = net.run(input)?;
        let logits = logits.as_slice().ok_or_else(|| net_err(&net.path, "output is not contiguous"))?;
        Ok(Some(super::uncertainty::probabilities(logits, m.classes.len(), m.activation)))
    }
}

/// Checks an attention output shape against a thumbnail of `h × w` and returns the cell
/// grid `(rows, cols)`. A network may round partial cells either way.
pub fn cell_grid(shape: &[usize], h: usize, w: usize, stride: usize) -> Result<(usize, usize), String> {
    if shape.len() != 4 || shape[0] != 1 || shape[1] != 1 {
        return Err(format!("attention output has shape {shape:?}, expected [1, 1, rows, cols]"));
    }
    let ok = |n: usize, len: usize| n == len / stride || n == len.div_ceil(stride);
    if !ok(shape[2], h) || !ok(shape[3], w) {
        return Err(format!(
            "for a thumbnail of {h}×{w} the attention map is {}×{}, expected {}×{} or {}×{} (cell_stride = {stride} in bundle.toml)",
            shape[2],
            shape[3],
            h / stride,
            w / stride,
            h.div_ceil(stride),
            w.div_ceil(stride)
        ));
    }
    Ok((shape[2], shape[3]))
}
