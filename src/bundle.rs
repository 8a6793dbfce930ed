//! The bundle format: `bundle.toml` (the manifest) beside the ONNX files it names.
//!
//! This module only describes and checks the manifest, so that whatever writes bundles
//! (the trainer, the designed demo bundle) shares one definition with the engine, which
//! loads them (`engine::Bundle`).

pub mod calibration;

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// The manifest's file name inside a bundle folder.
pub const MANIFEST: &str = "bundle.toml";
/// The manifest format this program reads and writes.
pub const FORMAT: u32 = 1;
/// Largest thumbnail factor: the engine sums up to this many rows of 8-bit values in 16
/// bits (255 × 257 < 2¹⁶).
pub const MAX_THUMBNAIL_FACTOR: u32 = 257;

/// Prefix of the ONNX metadata keys that record the geometry a network was trained for
/// (`saccade.thumbnail_factor`, `saccade.cell_stride`, `saccade.patch_size`).
pub const GEOMETRY_PREFIX: &str = "saccade.";

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

/// One network of the bundle: its file and the names of its input and output.
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

/// Why a manifest cannot be used; every error names the manifest file.
#[derive(Debug, thiserror::Error)]
pub enum ManifestError {
    #[error("{}: bundle manifest not found (is this a bundle folder?)", path.display())]
    Missing { path: PathBuf },
    #[error("{}: cannot read the bundle manifest: {source}", path.display())]
    Read { path: PathBuf, source: std::io::Error },
    /// TOML syntax, a wrong type or an unknown key; the parser's text names the line.
    #[error("{}: {message}", path.display())]
    Syntax { path: PathBuf, message: String },
    #[error("{}: {problem}", path.display())]
    Invalid { path: PathBuf, problem: ManifestProblem },
}

/// A value that parses but cannot be used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ManifestProblem {
    #[error("format = {0}: this saccade reads bundle format {FORMAT}")]
    Format(u32),
    #[error("classes: expected at least one class name")]
    NoClasses,
    #[error("activation = \"softmax\" needs at least two classes")]
    SoftmaxNeedsTwo,
    #[error("thresholds: expected one per class ({classes}), found {found}")]
    ThresholdCount { classes: usize, found: usize },
    #[error("thresholds: {0} is outside [0, 1]")]
    ThresholdRange(f64),
    #[error("classes: {0:?} is named twice; each class needs its own name")]
    DuplicateClass(String),
    #[error("{field} = {value}: expected {min} to {max}")]
    Range { field: &'static str, value: u64, min: u64, max: u64 },
    #[error("normalization.mean: {0} must be a finite number")]
    Mean(f32),
    #[error("normalization.std: {0} must be a positive finite number")]
    Std(f32),
}

/// The accepted range of each integer in the manifest. A patch of 512² pixels is far
/// above any network this engine is meant for, and keeps a batch's tensor under 1 GB.
const INTEGER_RANGES: [(&str, u64, u64); 4] = [
    ("thumbnail_factor", 1, MAX_THUMBNAIL_FACTOR as u64),
    ("cell_stride", 1, 256),
    ("patch_size", 1, 512),
    ("feature_dim", 1, 65_536),
];

impl ManifestProblem {
    /// The manifest key the problem is about.
    pub fn field(&self) -> &'static str {
        match self {
            Self::Format(_) => "format",
            Self::NoClasses | Self::SoftmaxNeedsTwo | Self::DuplicateClass(_) => "classes",
            Self::ThresholdCount { .. } | Self::ThresholdRange(_) => "thresholds",
            Self::Range { field, .. } => field,
            Self::Mean(_) => "normalization.mean",
            Self::Std(_) => "normalization.std",
        }
    }
}

impl Manifest {
    /// Reads and checks the manifest at `path`.
    pub fn read(path: &Path) -> Result<Self, ManifestError> {
        if !path.is_file() {
            return Err(ManifestError::Missing { path: path.to_path_buf() });
        }
        let text =
            std::fs::read_to_string(path).map_err(|source| ManifestError::Read { path: path.to_path_buf(), source })?;
        let m: Manifest = toml::from_str(&text).map_err(|e| ManifestError::Syntax {
            path: path.to_path_buf(),
            message: e.to_string().trim_end().to_string(),
        })?;
        m.check().map_err(|problem| ManifestError::Invalid { path: path.to_path_buf(), problem })?;
        Ok(m)
    }

    /// Checks the values that the types alone do not.
    pub fn check(&self) -> Result<(), ManifestProblem> {
        if self.format != FORMAT {
            return Err(ManifestProblem::Format(self.format));
        }
        if self.classes.is_empty() {
            return Err(ManifestProblem::NoClasses);
        }
        if self.activation == Activation::Softmax && self.classes.len() < 2 {
            return Err(ManifestProblem::SoftmaxNeedsTwo);
        }
        if self.thresholds.len() != self.classes.len() {
            return Err(ManifestProblem::ThresholdCount { classes: self.classes.len(), found: self.thresholds.len() });
        }
        if let Some(t) = self.thresholds.iter().find(|t| !(0.0..=1.0).contains(*t)) {
            return Err(ManifestProblem::ThresholdRange(*t));
        }
        for (n, name) in self.classes.iter().enumerate() {
            if self.classes[..n].contains(name) {
                return Err(ManifestProblem::DuplicateClass(name.clone()));
            }
        }
        let values =
            [self.thumbnail_factor as u64, self.cell_stride as u64, self.patch_size as u64, self.feature_dim as u64];
        for ((field, min, max), value) in INTEGER_RANGES.into_iter().zip(values) {
            if !(min..=max).contains(&value) {
                return Err(ManifestProblem::Range { field, value, min, max });
            }
        }
        if let Some(m) = self.normalization.mean.iter().find(|m| !m.is_finite()) {
            return Err(ManifestProblem::Mean(*m));
        }
        if let Some(s) = self.normalization.std.iter().find(|s| !(s.is_finite() && **s > 0.0)) {
            return Err(ManifestProblem::Std(*s));
        }
        Ok(())
    }

    /// The training geometry as ONNX metadata entries: the trainer records them in each
    /// network it writes, and loading compares them with the manifest.
    pub fn geometry(&self) -> [(String, String); 3] {
        [
            ("thumbnail_factor", self.thumbnail_factor),
            ("cell_stride", self.cell_stride),
            ("patch_size", self.patch_size),
        ]
        .map(|(k, v)| (format!("{GEOMETRY_PREFIX}{k}"), v.to_string()))
    }
}
