//! The per-frame knobs of the engine and their ranges.

use serde::{Deserialize, Serialize};

use super::estimator::EstimatorKind;
use super::ranges::shown;
use crate::bundle::calibration::Targets;

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
    /// Per-class single thresholds overriding the bundle's (clear below, detected above
    /// the same value; no risk control).
    pub thresholds: Option<Vec<f64>>,
    /// Largest share of frames carrying a class that may be called `clear` (bundles with
    /// a calibration file).
    pub miss_target: f64,
    /// Largest share of frames without a class that may be called `detected`.
    pub false_alarm_target: f64,
    /// Confidence, over the calibration frames, that each target holds.
    pub target_confidence: f64,
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
            miss_target: 0.1,
            false_alarm_target: 0.1,
            target_confidence: 0.9,
        }
    }
}

/// Longest budget accepted: a minute per frame is far beyond any camera's cadence.
pub const MAX_BUDGET_MS: f64 = 60_000.0;
/// Most patches per frame, and most Gaussian samples: bounds on memory per frame.
pub const MAX_PATCHES: usize = 1_000_000;
pub const MAX_SAMPLES: usize = 10_000;

/// A setting out of its range; [`SettingsError::field`] names the key.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SettingsError {
    #[error("budget_ms = {}: expected more than 0 and at most {} milliseconds", shown(*.0), shown(MAX_BUDGET_MS))]
    Budget(f64),
    #[error("{field} = {value}: expected {min} to {max}")]
    Count { field: &'static str, value: usize, min: usize, max: usize },
    #[error("interval = {}: expected a level strictly between 0 and 1, e.g. 0.9", shown(*.0))]
    Interval(f64),
    #[error("thresholds: expected one per class ({classes}), found {found}")]
    ThresholdCount { classes: usize, found: usize },
    #[error("thresholds: {} is outside [0, 1]", shown(*.0))]
    ThresholdRange(f64),
    #[error("{field} = {}: expected a share strictly between 0 and 1, e.g. 0.1", shown(*value))]
    Target { field: &'static str, value: f64 },
}

impl SettingsError {
    /// The settings key the error is about.
    pub fn field(&self) -> &'static str {
        match self {
            Self::Budget(_) => "budget_ms",
            Self::Count { field, .. } | Self::Target { field, .. } => field,
            Self::Interval(_) => "interval",
            Self::ThresholdCount { .. } | Self::ThresholdRange(_) => "thresholds",
        }
    }
}

impl Settings {
    /// Checks the values, and the threshold count when the class count is known.
    pub fn check(&self, classes: Option<usize>) -> Result<(), SettingsError> {
        if !(self.budget_ms > 0.0 && self.budget_ms <= MAX_BUDGET_MS) {
            return Err(SettingsError::Budget(self.budget_ms));
        }
        for (field, value, min, max) in [
            ("min_patches", self.min_patches, 1, MAX_PATCHES),
            ("max_patches", self.max_patches, self.min_patches.max(1), MAX_PATCHES),
            ("batch", self.batch, 1, 256),
            ("samples", self.samples, 1, MAX_SAMPLES),
        ] {
            if !(min..=max).contains(&value) {
                return Err(SettingsError::Count { field, value, min, max });
            }
        }
        if !(self.interval > 0.0 && self.interval < 1.0) {
            return Err(SettingsError::Interval(self.interval));
        }
        for (field, value) in [
            ("miss_target", self.miss_target),
            ("false_alarm_target", self.false_alarm_target),
            ("target_confidence", self.target_confidence),
        ] {
            if !(value > 0.0 && value < 1.0) {
                return Err(SettingsError::Target { field, value });
            }
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

    /// The outcome targets as the calibration file states them.
    pub fn targets(&self) -> Targets {
        Targets { miss: self.miss_target, false_alarm: self.false_alarm_target, confidence: self.target_confidence }
    }

    /// Batch sizes the loop may use: powers of two below `batch`, and `batch`.
    pub fn batch_sizes(&self) -> Vec<usize> {
        let mut v: Vec<usize> = (0..).map(|e| 1usize << e).take_while(|&b| b < self.batch).collect();
        v.push(self.batch);
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn batch_sizes_are_powers_of_two_below_the_batch_and_the_batch() {
        let s = |batch| Settings { batch, ..Settings::default() }.batch_sizes();
        assert_eq!(s(8), vec![1, 2, 4, 8]);
        assert_eq!(s(12), vec![1, 2, 4, 8, 12]);
        assert_eq!(s(1), vec![1]);
    }

    #[test]
    fn each_range_error_names_its_field() {
        let d = Settings::default;
        let cases = [
            (Settings { budget_ms: f64::NAN, ..d() }, "budget_ms"),
            (Settings { min_patches: 0, ..d() }, "min_patches"),
            (Settings { min_patches: 9, max_patches: 8, ..d() }, "max_patches"),
            (Settings { batch: 257, ..d() }, "batch"),
            (Settings { budget_ms: 1e300, ..d() }, "budget_ms"),
            (Settings { max_patches: MAX_PATCHES + 1, ..d() }, "max_patches"),
            (Settings { samples: MAX_SAMPLES + 1, ..d() }, "samples"),
            (Settings { interval: 1.0, ..d() }, "interval"),
            (Settings { samples: 0, ..d() }, "samples"),
            (Settings { thresholds: Some(vec![0.5, 1.2]), ..d() }, "thresholds"),
            (Settings { miss_target: 0.0, ..d() }, "miss_target"),
            (Settings { false_alarm_target: 1.0, ..d() }, "false_alarm_target"),
            (Settings { target_confidence: f64::NAN, ..d() }, "target_confidence"),
        ];
        for (s, field) in cases {
            let e = s.check(None).unwrap_err();
            assert_eq!(e.field(), field, "{e}");
            assert!(e.to_string().starts_with(field), "{e}");
        }
        // The threshold count is checked once the class count is known.
        let two = Settings { thresholds: Some(vec![0.5, 0.5]), ..d() };
        assert!(two.check(None).is_ok());
        assert_eq!(two.check(Some(3)), Err(SettingsError::ThresholdCount { classes: 3, found: 2 }));
        assert!(d().check(Some(3)).is_ok());
    }
}
