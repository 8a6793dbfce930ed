//! A loaded bundle: its manifest and its three (or four) ONNX networks in tract, each
//! with optimised plans cached per concrete input shape.
//!
//! Loading validates everything the engine relies on (names, ranks, channel counts,
//! feature dimension, class count) by reading the ONNX graph and by a dry run of each
//! network, so that a bad bundle fails at start-up with a message naming the file.

use std::collections::HashMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

use image::RgbImage;
use tract_onnx::pb;
use tract_onnx::prelude::*;

use super::isolate;
use super::patches::Normalizer;
use super::thumbnail::area_reduce;
use super::uncertainty::probabilities;
use crate::bundle::calibration::{Calibration, CalibrationError};
use crate::bundle::{Manifest, ManifestError, NetworkRef, GEOMETRY_PREFIX, MANIFEST};

/// Why a bundle cannot be loaded or one of its networks cannot run.
#[derive(Debug, thiserror::Error)]
pub enum BundleError {
    #[error(transparent)]
    Manifest(#[from] ManifestError),
    #[error(transparent)]
    Calibration(#[from] CalibrationError),
    #[error("{}: {problem}", path.display())]
    Network { path: PathBuf, problem: NetworkProblem },
}

/// What is wrong with one network file, or with one run of it.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum NetworkProblem {
    #[error("file not found (named in bundle.toml)")]
    Missing,
    /// tract's own explanation follows.
    #[error("not a readable ONNX model: {0}")]
    NotOnnx(String),
    #[error("the ONNX file holds no graph")]
    NoGraph,
    #[error("expected one input named {expected:?}, the graph has {found}")]
    InputName { expected: String, found: String },
    #[error("expected an output named {expected:?}, the graph has {found}")]
    OutputName { expected: String, found: String },
    #[error("input {input:?} has rank {found}, expected rank {expected}")]
    Rank { input: String, found: usize, expected: usize },
    #[error("input {input:?} has {found} channels, expected {expected} (RGB)")]
    Channels { input: String, found: i64, expected: usize },
    #[error("tract cannot load the graph: {0}")]
    Load(String),
    #[error("cannot build a plan for input shape {shape:?}: {message}")]
    Plan { shape: Vec<usize>, message: String },
    #[error("inference failed on input shape {shape:?}: {message}")]
    Inference { shape: Vec<usize>, message: String },
    #[error("the input declares patches of side {found}, but bundle.toml says patch_size = {expected}")]
    PatchSide { found: i64, expected: i64 },
    #[error("the file records {key} = {recorded} (the geometry it was trained for), but bundle.toml says {key} = {manifest}")]
    Geometry { key: String, recorded: String, manifest: String },
    #[error("the attention network fails on every thumbnail from {smallest}×{smallest} to {largest}×{largest} pixels: {message}")]
    NoThumbnail { smallest: usize, largest: usize, message: String },
    #[error("output is not f32: {0}")]
    Output(String),
    #[error("attention output has shape {0:?}, expected [1, 1, rows, cols]")]
    AttentionRank(Vec<usize>),
    #[error("for a thumbnail of {h}×{w} the attention map is {rows}×{cols}, expected {}×{} or {}×{} (cell_stride = {stride} in bundle.toml)", h / stride, w / stride, h.div_ceil(*stride), w.div_ceil(*stride))]
    AttentionGrid { h: usize, w: usize, rows: usize, cols: usize, stride: usize },
    #[error("for a thumbnail of {h}×{w} the baseline output has shape {shape:?}, expected [1, {classes}] (one logit per class)")]
    BaselineShape { h: usize, w: usize, shape: Vec<usize>, classes: usize },
    #[error("for a batch of {batch} patches of {patch}×{patch} the output {output:?} has shape {shape:?}, expected [{batch}, {feature_dim}] (feature_dim in bundle.toml)")]
    FeatureShape { batch: usize, patch: usize, output: String, shape: Vec<usize>, feature_dim: usize },
    #[error("for 2 feature vectors of {feature_dim} the output {output:?} has shape {shape:?}, expected [2, {classes}] (one logit per class in bundle.toml)")]
    HeadShape { feature_dim: usize, output: String, shape: Vec<usize>, classes: usize },
}

/// One ONNX network with optimised plans cached per concrete input shape.
pub struct Network {
    path: PathBuf,
    /// The input's axes as the file declares them (None: a symbolic axis).
    input_dims: Option<Vec<Option<i64>>>,
    model: InferenceModel,
    plans: Mutex<HashMap<Vec<usize>, Arc<TypedRunnableModel>>>,
    /// Total time spent inside inference, for separating engine overhead from network cost.
    busy_ns: AtomicU64,
}

impl Network {
    fn error(&self, problem: NetworkProblem) -> BundleError {
        BundleError::Network { path: self.path.clone(), problem }
    }

    /// Loads `path`, checks that it has one input named as `net` says, of rank `rank`
    /// (with `channels` at axis 1 when given), the output `net` names, and that any
    /// training geometry recorded in the file's metadata is the manifest's.
    fn load(
        path: PathBuf,
        net: &NetworkRef,
        rank: usize,
        channels: Option<usize>,
        m: &Manifest,
    ) -> Result<Self, BundleError> {
        let fail = |problem| BundleError::Network { path: path.clone(), problem };
        if !path.is_file() {
            return Err(fail(NetworkProblem::Missing));
        }
        let onnx = tract_onnx::onnx();
        let proto = onnx.proto_model_for_path(&path).map_err(|e| fail(NetworkProblem::NotOnnx(e.to_string())))?;
        let graph = proto.graph.as_ref().ok_or_else(|| fail(NetworkProblem::NoGraph))?;
        let inits: Vec<&str> = graph.initializer.iter().map(|t| t.name.as_str()).collect();
        let inputs: Vec<&pb::ValueInfoProto> =
            graph.input.iter().filter(|i| !inits.contains(&i.name.as_str())).collect();
        let names =
            |v: &[&pb::ValueInfoProto]| v.iter().map(|i| format!("{:?}", i.name)).collect::<Vec<_>>().join(", ");
        if inputs.len() != 1 || inputs[0].name != net.input {
            return Err(fail(NetworkProblem::InputName { expected: net.input.clone(), found: names(&inputs) }));
        }
        if !graph.output.iter().any(|o| o.name == net.output) {
            let outs: Vec<&pb::ValueInfoProto> = graph.output.iter().collect();
            return Err(fail(NetworkProblem::OutputName { expected: net.output.clone(), found: names(&outs) }));
        }
        let input_dims = declared_dims(inputs[0]);
        if let Some(dims) = &input_dims {
            if dims.len() != rank {
                return Err(fail(NetworkProblem::Rank { input: net.input.clone(), found: dims.len(), expected: rank }));
            }
            if let (Some(c), Some(Some(d))) = (channels, dims.get(1)) {
                if *d != c as i64 {
                    return Err(fail(NetworkProblem::Channels { input: net.input.clone(), found: *d, expected: c }));
                }
            }
        }
        let recorded = proto.metadata_props.iter().map(|e| (e.key.as_str(), e.value.as_str()));
        check_geometry(recorded, m).map_err(fail)?;
        let model = onnx
            .model_for_proto_model(&proto)
            .and_then(|m| m.with_outputs_by_name([net.output.as_str()]))
            .map_err(|e| fail(NetworkProblem::Load(format!("{e:#}"))))?;
        Ok(Self { path, input_dims, model, plans: Mutex::new(HashMap::new()), busy_ns: AtomicU64::new(0) })
    }

    /// A feature network whose input declares its patch side must declare the manifest's.
    fn check_patch_side(&self, m: &Manifest) -> Result<(), BundleError> {
        let p = m.patch_size as i64;
        let Some(dims) = &self.input_dims else { return Ok(()) };
        match dims[2..].iter().flatten().find(|&&d| d != p) {
            Some(&found) => Err(self.error(NetworkProblem::PatchSide { found, expected: p })),
            None => Ok(()),
        }
    }

    /// The network's file.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// The plan cache. A panic contained while the lock was held leaves complete entries
    /// only (a plan is inserted whole), so a poisoned lock is taken over.
    fn plans(&self) -> std::sync::MutexGuard<'_, HashMap<Vec<usize>, Arc<TypedRunnableModel>>> {
        self.plans.lock().unwrap_or_else(std::sync::PoisonError::into_inner)
    }

    /// The optimised plan for one input shape, built on first use.
    pub fn plan(&self, shape: &[usize]) -> Result<Arc<TypedRunnableModel>, BundleError> {
        if let Some(p) = self.plans().get(shape) {
            return Ok(p.clone());
        }
        let plan = self
            .model
            .clone()
            .with_input_fact(0, f32::fact(shape).into())
            .and_then(|m| m.into_optimized())
            .and_then(|m| m.into_runnable())
            .map_err(|e| self.error(NetworkProblem::Plan { shape: shape.to_vec(), message: format!("{e:#}") }))?;
        self.plans().insert(shape.to_vec(), plan.clone());
        Ok(plan)
    }

    /// Whether a plan for this shape is already cached.
    pub fn has_plan(&self, shape: &[usize]) -> bool {
        self.plans().contains_key(shape)
    }

    /// Time spent inside inference since the network was loaded.
    pub fn busy(&self) -> Duration {
        Duration::from_nanos(self.busy_ns.load(Ordering::Relaxed))
    }

    /// Runs the network on one input tensor, returning its output as a dense f32 array.
    pub fn run(&self, input: Tensor) -> Result<tract_ndarray::ArrayD<f32>, BundleError> {
        let plan = self.plan(input.shape())?;
        let shape = input.shape().to_vec();
        let t = Instant::now();
        let mut out = plan
            .run(tvec!(input.into_tvalue()))
            .map_err(|e| self.error(NetworkProblem::Inference { shape, message: format!("{e:#}") }))?;
        self.busy_ns.fetch_add(t.elapsed().as_nanos() as u64, Ordering::Relaxed);
        let t = out.remove(0).into_tensor();
        let view = t.to_plain_array_view::<f32>().map_err(|e| self.error(NetworkProblem::Output(e.to_string())))?;
        Ok(view.to_owned())
    }

    /// Runs the network and returns its output as a flat row-major vector.
    pub fn run_flat(&self, input: Tensor) -> Result<(Vec<usize>, Vec<f32>), BundleError> {
        let out = self.run(input)?;
        let flat = out.as_slice().map_or_else(|| out.iter().copied().collect(), <[f32]>::to_vec);
        Ok((out.shape().to_vec(), flat))
    }
}

/// Compares the training geometry a network file records (ONNX metadata, written by
/// saccade's trainer) with the manifest; files without it are checked by the dry run only.
fn check_geometry<'a>(recorded: impl Iterator<Item = (&'a str, &'a str)>, m: &Manifest) -> Result<(), NetworkProblem> {
    let expected = m.geometry();
    for (key, value) in recorded {
        if let Some((_, want)) = expected.iter().find(|(k, _)| *k == key) {
            if value.trim() != want {
                let key = key.trim_start_matches(GEOMETRY_PREFIX).to_string();
                return Err(NetworkProblem::Geometry { key, recorded: value.to_string(), manifest: want.clone() });
            }
        }
    }
    Ok(())
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

/// A loaded, validated bundle. Shared between engines behind an `Arc`: the plan caches
/// are behind locks.
pub struct Bundle {
    pub dir: PathBuf,
    pub manifest: Manifest,
    pub attention: Network,
    pub features: Network,
    pub head: Network,
    pub baseline: Option<Network>,
    /// `calibration.json` when the bundle has one; without it probabilities are the
    /// head's own and each class has the manifest's single threshold.
    pub calibration: Option<Calibration>,
    pub dry_run: DryRunCosts,
    /// Side of the smallest square thumbnail the attention network was seen to take.
    pub min_thumbnail: u32,
}

impl Bundle {
    /// Loads and validates the bundle in `dir`, warming and timing plans for the given
    /// patch batch sizes (1 and 2 are always tried: they prove a symbolic batch axis).
    pub fn load(dir: &Path, batch_sizes: &[usize]) -> Result<Self, BundleError> {
        let manifest = Manifest::read(&dir.join(MANIFEST))?;
        let calibration = Calibration::read_optional(dir, &manifest.classes)?;
        let m = &manifest;
        let attention = Network::load(dir.join(&m.attention.file), &m.attention, 4, Some(3), m)?;
        let features = Network::load(dir.join(&m.features.file), &m.features, 4, Some(3), m)?;
        features.check_patch_side(m)?;
        let head = Network::load(dir.join(&m.head.file), &m.head, 2, None, m)?;
        let baseline = match &m.baseline {
            Some(net) => Some(Network::load(dir.join(&net.file), net, 4, Some(3), m)?),
            None => None,
        };
        let mut bundle = Self {
            dir: dir.to_path_buf(),
            manifest,
            attention,
            features,
            head,
            baseline,
            calibration,
            dry_run: DryRunCosts::default(),
            min_thumbnail: 0,
        };
        bundle.min_thumbnail = bundle.smallest_thumbnail()?;
        bundle.dry_run = bundle.check_by_running(batch_sizes)?;
        Ok(bundle)
    }

    /// The smallest frame side analysed: the one whose thumbnail (sides rounded up) has
    /// the smallest side the attention network takes.
    pub fn min_frame_side(&self) -> u32 {
        (self.min_thumbnail - 1) * self.manifest.thumbnail_factor + 1
    }

    /// Finds the smallest square thumbnail, from one cell up to eight cells a side, that
    /// the attention network runs on and maps to a cell grid. Networks with pooling
    /// layers fail (some by panicking inside tract) on thumbnails below their receptive
    /// field; frames that small are refused before analysis instead.
    fn smallest_thumbnail(&self) -> Result<u32, BundleError> {
        let stride = self.manifest.cell_stride as usize;
        let mut last = String::new();
        for side in [stride, 2 * stride, 4 * stride, 8 * stride] {
            let attempt = isolate::run(|| {
                let (shape, _) = self.attention.run_flat(zeros(&[1, 3, side, side]))?;
                self.cell_grid(&shape, side, side)
            });
            match attempt {
                Ok(Ok(_)) => return Ok(side as u32),
                Ok(Err(e)) => last = e.to_string(),
                Err(panic) => last = panic,
            }
        }
        Err(self.attention.error(NetworkProblem::NoThumbnail { smallest: stride, largest: 8 * stride, message: last }))
    }

    /// Runs each network on small inputs and checks every shape the engine depends on.
    fn check_by_running(&self, batch_sizes: &[usize]) -> Result<DryRunCosts, BundleError> {
        let m = &self.manifest;
        let stride = m.cell_stride as usize;
        let c = m.classes.len();
        // Two thumbnail sizes, one not a multiple of the stride, prove the symbolic H and W.
        for (h, w) in [(8 * stride, 12 * stride), (10 * stride + stride / 2 + 1, 7 * stride + 1)] {
            let (shape, _) = self.attention.run_flat(zeros(&[1, 3, h, w]))?;
            self.cell_grid(&shape, h, w)?;
            if let Some(b) = &self.baseline {
                let (shape, _) = b.run_flat(zeros(&[1, 3, h, w]))?;
                if shape != [1, c] {
                    return Err(b.error(NetworkProblem::BaselineShape { h, w, shape, classes: c }));
                }
            }
        }
        let p = m.patch_size as usize;
        let mut sizes: Vec<usize> = batch_sizes.iter().copied().chain([1, 2]).collect();
        sizes.sort_unstable();
        sizes.dedup();
        let mut per_patch = Vec::new();
        for &b in &sizes {
            let input = zeros(&[b, 3, p, p]);
            let (shape, _) = self.features.run_flat(input.clone())?;
            if shape != [b, m.feature_dim] {
                return Err(self.features.error(NetworkProblem::FeatureShape {
                    batch: b,
                    patch: p,
                    output: m.features.output.clone(),
                    shape,
                    feature_dim: m.feature_dim,
                }));
            }
            let t0 = Instant::now();
            self.features.run(input)?;
            per_patch.push((b, t0.elapsed() / b as u32));
        }
        let input = zeros(&[2, m.feature_dim]);
        let (shape, _) = self.head.run_flat(input.clone())?;
        if shape != [2, c] {
            return Err(self.head.error(NetworkProblem::HeadShape {
                feature_dim: m.feature_dim,
                output: m.head.output.clone(),
                shape,
                classes: c,
            }));
        }
        let t0 = Instant::now();
        self.head.run(input)?;
        Ok(DryRunCosts { per_patch, head: t0.elapsed() })
    }

    /// The manifest's single per-class thresholds on the scale of the probabilities the
    /// engine reports: mapped through the calibration map when there is one (an increasing
    /// map, so the same frames fall on each side), as they are otherwise.
    pub fn reported_thresholds(&self) -> Vec<f64> {
        let t = &self.manifest.thresholds;
        match &self.calibration {
            Some(cal) => t.iter().zip(&cal.classes).map(|(&t, c)| c.map.apply(t)).collect(),
            None => t.clone(),
        }
    }

    /// Checks an attention output shape against a thumbnail of `h × w` and returns the
    /// cell grid `(rows, cols)`. A network may round partial cells either way.
    pub fn cell_grid(&self, shape: &[usize], h: usize, w: usize) -> Result<(usize, usize), BundleError> {
        let stride = self.manifest.cell_stride as usize;
        if shape.len() != 4 || shape[0] != 1 || shape[1] != 1 {
            return Err(self.attention.error(NetworkProblem::AttentionRank(shape.to_vec())));
        }
        let ok = |n: usize, len: usize| n == len / stride || n == len.div_ceil(stride);
        if !ok(shape[2], h) || !ok(shape[3], w) {
            return Err(self.attention.error(NetworkProblem::AttentionGrid {
                h,
                w,
                rows: shape[2],
                cols: shape[3],
                stride,
            }));
        }
        Ok((shape[2], shape[3]))
    }

    /// Class probabilities of the thumbnail-only baseline for a whole frame, when the
    /// bundle has one. The thumbnail is made exactly as for the attention network.
    pub fn baseline_probabilities(&self, frame: &RgbImage) -> Result<Option<Vec<f64>>, BundleError> {
        let Some(net) = &self.baseline else { return Ok(None) };
        let m = &self.manifest;
        let thumb = area_reduce(frame, m.thumbnail_factor);
        let (w, h) = (thumb.width() as usize, thumb.height() as usize);
        let mut input = zeros(&[1, 3, h, w]);
        Normalizer::new(&m.normalization).write_planar(&thumb, f32_slice(&mut input));
        let (_, logits) = net.run_flat(input)?;
        Ok(Some(probabilities(&logits, m.classes.len(), m.activation)))
    }
}

/// A zeroed f32 tensor of `shape`.
pub(super) fn zeros(shape: &[usize]) -> Tensor {
    Tensor::zero::<f32>(shape).expect("an f32 tensor of a concrete shape")
}

/// The contiguous f32 storage of a tensor made by [`zeros`].
pub(super) fn f32_slice(t: &mut Tensor) -> &mut [f32] {
    let view = t.to_plain_array_view_mut::<f32>().expect("f32 tensor");
    view.into_slice().expect("contiguous tensor")
}
