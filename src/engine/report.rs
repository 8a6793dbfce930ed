//! What the engine says about one frame.

use image::RgbImage;
use serde::{Serialize, Serializer};

use super::estimator::EstimatorKind;
use super::patches::Geometry;
use super::uncertainty::ClassResult;

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
    #[serde(skip_serializing_if = "Option::is_none", serialize_with = "opt_ms")]
    pub decode: Option<f64>,
    #[serde(serialize_with = "ms")]
    pub thumbnail: f64,
    #[serde(serialize_with = "ms")]
    pub attention: f64,
    /// Patch extraction and feature network runs.
    #[serde(serialize_with = "ms")]
    pub patches: f64,
    /// Gaussian samples, head, summary and the patches that carry findings.
    #[serde(serialize_with = "ms")]
    pub head: f64,
    /// Thumbnail to head: the part the budget governs.
    #[serde(serialize_with = "ms")]
    pub total: f64,
    /// One-off plan building for a new frame size (outside the budget).
    #[serde(skip_serializing_if = "is_zero", serialize_with = "ms")]
    pub plan: f64,
}

fn is_zero(v: &f64) -> bool {
    *v == 0.0
}

/// JSON keeps probabilities and shares to 6 decimals and milliseconds to 3: further digits
/// say nothing to anyone and made up half of a frame record's bytes.
fn round(v: f64, scale: f64) -> f64 {
    if v.is_finite() {
        (v * scale).round() / scale
    } else {
        v
    }
}

pub(super) fn six<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_f64(round(*v, 1e6))
}

pub(super) fn six_pair<S: Serializer>(v: &[f64; 2], s: S) -> Result<S::Ok, S::Error> {
    [round(v[0], 1e6), round(v[1], 1e6)].serialize(s)
}

pub(super) fn ms<S: Serializer>(v: &f64, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_f64(round(*v, 1e3))
}

fn opt_ms<S: Serializer>(v: &Option<f64>, s: S) -> Result<S::Ok, S::Error> {
    v.map(|v| round(v, 1e3)).serialize(s)
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
    #[serde(serialize_with = "six")]
    pub attention_mass: f64,
    /// The examined patches in the order examined (left out of JSON when empty: the
    /// daemon's log lists them only on request).
    #[serde(skip_serializing_if = "Vec::is_empty")]
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
