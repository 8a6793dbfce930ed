//! From an estimate of `Psi` and its covariance terms to per-class probabilities with a
//! spread and a central interval, and the three-way outcome against a threshold.

use rand::Rng;
use rand_distr::StandardNormal;
use serde::Serialize;

use super::estimator::Weights;
use super::report::{six, six_pair};
use crate::bundle::Activation;

/// What a class's interval says relative to its two thresholds.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Outcome {
    /// The whole interval lies above `detected_above`.
    Detected,
    /// Anything else: the interval reaches into the band between the thresholds, where
    /// the calibration frames cannot back either call, so a person should look.
    Review,
    /// The whole interval lies below `clear_below`.
    Clear,
}

/// A patch whose own evidence carries a class: the head applied to that patch's features
/// alone gives `probability`.
#[derive(Clone, Debug, Serialize)]
pub struct Spot {
    /// Top-left corner in frame pixels (may be negative at the border) and side.
    pub x: i64,
    pub y: i64,
    pub size: u32,
    /// Index into the report's examined patches.
    #[serde(skip)]
    pub patch: usize,
    #[serde(serialize_with = "six")]
    pub probability: f64,
}

/// Per class, the outcome thresholds on the calibrated probability:
/// `(clear_below, detected_above)`; equal for a single-threshold bundle.
pub type Decision = (f64, f64);

#[derive(Clone, Debug, Serialize)]
pub struct ClassResult {
    pub name: String,
    /// Probability at the point estimate `Psi_hat`.
    #[serde(serialize_with = "six")]
    pub probability: f64,
    /// Standard deviation of the probability over the Gaussian samples of `Psi`.
    #[serde(serialize_with = "six")]
    pub spread: f64,
    /// Central interval of the probability at the configured level.
    #[serde(serialize_with = "six_pair")]
    pub interval: [f64; 2],
    /// Clear when the whole interval is below this.
    #[serde(serialize_with = "six")]
    pub clear_below: f64,
    /// Detected when the whole interval is above this.
    #[serde(serialize_with = "six")]
    pub detected_above: f64,
    pub outcome: Outcome,
    /// For a class that is not clear: the examined patches that carry it, strongest first.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub patches: Vec<Spot>,
}

/// Rows `[Psi_hat, Psi_1 .. Psi_S]` (each of length `d`), `Psi_s ~ N(Psi_hat, Sigma_hat)`,
/// drawn from the covariance's low-rank terms without forming the matrix.
pub fn sample_psi<R: Rng>(weights: &Weights, f: &[f32], d: usize, samples: usize, rng: &mut R) -> Vec<f32> {
    let psi = weights.estimate(f, d);
    let centre = if weights.centred { psi.clone() } else { vec![0.0; d] };
    // Rows g_j * sqrt(c_j) for the terms that carry variance.
    let terms: Vec<Vec<f64>> = f
        .chunks_exact(d)
        .zip(&weights.c)
        .filter(|(_, &c)| c > 0.0)
        .map(|(row, &c)| {
            let s = c.sqrt();
            row.iter().zip(&centre).map(|(&x, m)| s * (x as f64 - m)).collect()
        })
        .collect();
    let mut out = Vec::with_capacity((samples + 1) * d);
    out.extend(psi.iter().map(|&x| x as f32));
    let mut row = vec![0.0f64; d];
    for _ in 0..samples {
        row.copy_from_slice(&psi);
        for g in &terms {
            let z: f64 = rng.sample(StandardNormal);
            for (r, gv) in row.iter_mut().zip(g) {
                *r += z * gv;
            }
        }
        out.extend(row.iter().map(|&x| x as f32));
    }
    out
}

/// Turns a `[n, classes]` row-major logit matrix into probabilities.
pub fn probabilities(logits: &[f32], classes: usize, activation: Activation) -> Vec<f64> {
    let mut out = Vec::with_capacity(logits.len());
    for row in logits.chunks_exact(classes) {
        match activation {
            Activation::Sigmoid => out.extend(row.iter().map(|&z| 1.0 / (1.0 + (-(z as f64)).exp()))),
            Activation::Softmax => {
                let max = row.iter().fold(f64::NEG_INFINITY, |m, &z| m.max(z as f64));
                let e: Vec<f64> = row.iter().map(|&z| (z as f64 - max).exp()).collect();
                let s: f64 = e.iter().sum();
                out.extend(e.iter().map(|x| x / s));
            }
        }
    }
    out
}

/// Linear-interpolation quantile of sorted values (the common "type 7" definition).
pub fn quantile(sorted: &[f64], q: f64) -> f64 {
    let pos = q * (sorted.len() - 1) as f64;
    let (lo, hi) = (pos.floor() as usize, pos.ceil() as usize);
    sorted[lo] + (sorted[hi] - sorted[lo]) * (pos - lo as f64)
}

/// Per-class summary of probabilities `[1 + S, classes]` (row 0 = point estimate).
pub fn summarise(probs: &[f64], names: &[String], decision: &[Decision], level: f64) -> Vec<ClassResult> {
    let c = names.len();
    let n = probs.len() / c;
    (0..c)
        .map(|k| {
            let point = probs[k];
            let mut s: Vec<f64> = (1..n).map(|r| probs[r * c + k]).collect();
            assert!(!s.is_empty(), "at least one Gaussian sample (Settings::validate refuses samples = 0)");
            s.sort_by(f64::total_cmp);
            let mean = s.iter().sum::<f64>() / s.len() as f64;
            let var = s.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (s.len().max(2) - 1) as f64;
            let tail = (1.0 - level) / 2.0;
            // The point estimate always lies inside its own interval.
            let (spread, interval) = (var.sqrt(), [quantile(&s, tail).min(point), quantile(&s, 1.0 - tail).max(point)]);
            let (clear_below, detected_above) = decision[k];
            let outcome = if interval[0] > detected_above {
                Outcome::Detected
            } else if interval[1] < clear_below {
                Outcome::Clear
            } else {
                Outcome::Review
            };
            ClassResult {
                name: names[k].clone(),
                probability: point,
                spread,
                interval,
                clear_below,
                detected_above,
                outcome,
                patches: Vec::new(),
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantile_matches_linear_definition() {
        let s = [1.0, 2.0, 3.0, 4.0, 5.0];
        assert_eq!(quantile(&s, 0.0), 1.0);
        assert_eq!(quantile(&s, 0.5), 3.0);
        assert!((quantile(&s, 0.1) - 1.4).abs() < 1e-12);
    }

    #[test]
    fn outcome_follows_interval_against_threshold() {
        let names = vec!["a".to_string()];
        let hi = summarise(&[0.9, 0.8, 0.85, 0.95], &names, &[(0.5, 0.5)], 0.9);
        assert_eq!(hi[0].outcome, Outcome::Detected);
        let mid = summarise(&[0.5, 0.3, 0.7, 0.6], &names, &[(0.5, 0.5)], 0.9);
        assert_eq!(mid[0].outcome, Outcome::Review);
        let lo = summarise(&[0.1, 0.05, 0.2, 0.15], &names, &[(0.5, 0.5)], 0.9);
        assert_eq!(lo[0].outcome, Outcome::Clear);
        // Two thresholds: a narrow interval inside the band is for a person.
        let band = summarise(&[0.5, 0.49, 0.51, 0.5], &names, &[(0.3, 0.7)], 0.9);
        assert_eq!(band[0].outcome, Outcome::Review);
        let low = summarise(&[0.25, 0.2, 0.28, 0.26], &names, &[(0.3, 0.7)], 0.9);
        assert_eq!(low[0].outcome, Outcome::Clear);
    }

    #[test]
    fn softmax_rows_sum_to_one() {
        let p = probabilities(&[1.0, 2.0, 3.0, 0.0, 0.0, 0.0], 3, Activation::Softmax);
        assert!((p[0..3].iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((p[3] - 1.0 / 3.0).abs() < 1e-12);
    }
}
