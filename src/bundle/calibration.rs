//! The bundle's optional `calibration.json`: per class a calibration map for the
//! probability and the two risk-controlled thresholds of the outcome, with the
//! calibration frames' scores they were chosen on. Part of the bundle format, it imports
//! nothing else of ours: the engine applies it, `saccade train` and `saccade calibrate` fit it.
//!
//! **Map: Platt scaling** (J. Platt, "Probabilistic outputs for support vector machines",
//! 1999), one per class: `p' = sigmoid(a · logit(p) + b)`, fitted by Newton's method on
//! the logistic loss with Platt's targets `(N₊ + 1) / (N₊ + 2)` and `1 / (N₋ + 2)`. Two
//! parameters stay stable on the few dozen frames per class a user labels (isotonic
//! regression needs far more and is a step function), and with `a > 0` the map is strictly
//! increasing, so it maps the sampling interval end to end and leaves the order of
//! frames, and with it the risk guarantee below, unchanged.
//!
//! **Thresholds: risk control with Clopper–Pearson bounds** (the upper confidence bound
//! procedure of S. Bates, A. Angelopoulos, L. Lei, J. Malik, M. Jordan, "Distribution-free,
//! risk-controlling prediction sets", J. ACM 2021, with the exact binomial bound of
//! C. Clopper and E. Pearson, Biometrika 1934). A frame is `clear` for a class when its
//! probability (the whole interval) is below `clear_below`, `detected` when above
//! `detected_above`. `clear_below` is the largest value for which the Clopper–Pearson upper
//! bound, at the stated confidence, of the miss rate (the share of calibration frames that
//! carry the class and score below it) is at most the miss target; `detected_above` the
//! smallest for which the bound of the false-alarm rate (the share of frames without the
//! class that score above it) is at most the false-alarm target. Both rates are monotone in
//! the threshold, so each guarantee holds, over the draw of calibration frames like the new
//! ones, with at least the stated confidence.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

/// The file's name inside a bundle folder.
pub const FILE: &str = "calibration.json";
/// The format this program reads and writes.
pub const FORMAT: u32 = 1;
/// Scores are stored to this many decimals: enough for any threshold, small on disk.
const DECIMALS: f64 = 1e6;
/// Probabilities are clamped this far from 0 and 1 before the logit.
const EPS: f64 = 1e-7;

/// What the outcome thresholds promise: at most `miss` of the frames that carry a class
/// are called clear, and at most `false_alarm` of those without it are called detected,
/// each with probability at least `confidence` over the calibration frames.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Targets {
    pub miss: f64,
    pub false_alarm: f64,
    pub confidence: f64,
}

impl Default for Targets {
    fn default() -> Self {
        Self { miss: 0.1, false_alarm: 0.1, confidence: 0.9 }
    }
}

/// Platt scaling of one class: `p' = sigmoid(a · logit(p) + b)`.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Platt {
    pub a: f64,
    pub b: f64,
}

impl Platt {
    pub const IDENTITY: Platt = Platt { a: 1.0, b: 0.0 };

    pub fn apply(&self, p: f64) -> f64 {
        sigmoid(self.a * logit(p) + self.b)
    }

    /// Fits the map to raw probabilities `p` of frames labelled `y` (Platt 1999: Newton's
    /// method on the cross-entropy against the smoothed targets). `a` is kept at least
    /// [`Platt::MIN_SLOPE`] so that the map stays increasing even when the scores carry no
    /// signal (then it is nearly the constant base rate).
    pub fn fit(p: &[f64], y: &[bool]) -> Platt {
        let x: Vec<f64> = p.iter().map(|&p| logit(p)).collect();
        let pos = y.iter().filter(|&&v| v).count() as f64;
        let neg = y.len() as f64 - pos;
        let (hi, lo) = ((pos + 1.0) / (pos + 2.0), 1.0 / (neg + 2.0));
        let t: Vec<f64> = y.iter().map(|&v| if v { hi } else { lo }).collect();
        // Start from Platt's suggestion: a = 1 on the logit scale, b at the prior's logit.
        let (mut a, mut b) = (1.0, ((pos + 1.0) / (neg + 1.0)).ln());
        let loss = |a: f64, b: f64| -> f64 {
            x.iter()
                .zip(&t)
                .map(|(&x, &t)| {
                    let z = a * x + b;
                    // log(1 + e^z) - t z, computed without overflow.
                    z.max(0.0) + (-z.abs()).exp().ln_1p() - t * z
                })
                .sum()
        };
        let mut current = loss(a, b);
        for _ in 0..100 {
            let (mut ga, mut gb, mut haa, mut hab, mut hbb) = (0.0, 0.0, 0.0, 0.0, 0.0);
            for (&x, &t) in x.iter().zip(&t) {
                let q = sigmoid(a * x + b);
                let (d, w) = (q - t, (q * (1.0 - q)).max(1e-12));
                ga += d * x;
                gb += d;
                haa += w * x * x;
                hab += w * x;
                hbb += w;
            }
            // A tiny ridge keeps the step defined when every score is the same.
            let (haa, hbb) = (haa + 1e-9, hbb + 1e-9);
            let det = haa * hbb - hab * hab;
            let (da, db) = ((hbb * ga - hab * gb) / det, (haa * gb - hab * ga) / det);
            // Backtrack until the loss goes down (Newton can overshoot on separable data).
            let mut step = 1.0;
            let mut next = None;
            while step > 1e-10 {
                let (na, nb) = (a - step * da, b - step * db);
                let l = loss(na, nb);
                if l <= current {
                    next = Some((na, nb, l));
                    break;
                }
                step /= 2.0;
            }
            let Some((na, nb, l)) = next else { break };
            let moved = (na - a).abs() + (nb - b).abs();
            (a, b, current) = (na, nb, l);
            if moved < 1e-12 || (ga.abs() + gb.abs()) < 1e-10 {
                break;
            }
        }
        Platt { a: a.max(Self::MIN_SLOPE), b }
    }

    /// The smallest slope a fitted map keeps.
    pub const MIN_SLOPE: f64 = 1e-3;
}

pub fn sigmoid(z: f64) -> f64 {
    if z >= 0.0 {
        1.0 / (1.0 + (-z).exp())
    } else {
        let e = z.exp();
        e / (1.0 + e)
    }
}

pub fn logit(p: f64) -> f64 {
    let p = p.clamp(EPS, 1.0 - EPS);
    (p / (1.0 - p)).ln()
}

/// One class of the calibration file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ClassCalibration {
    pub name: String,
    pub map: Platt,
    /// Outcome thresholds on the calibrated probability, for the file's `targets`.
    pub clear_below: f64,
    pub detected_above: f64,
    /// Calibrated probabilities of the calibration frames that carry the class, and of
    /// those that do not, ascending: what the thresholds are chosen on, kept so that other
    /// targets in the config get their own thresholds without the frames.
    pub positives: Vec<f64>,
    pub negatives: Vec<f64>,
}

impl ClassCalibration {
    /// Fits the map and chooses the thresholds on raw probabilities `p` of frames labelled `y`.
    pub fn fit(name: &str, p: &[f64], y: &[bool], targets: &Targets) -> Self {
        let map = Platt::fit(p, y);
        let round = |v: f64| (v * DECIMALS).round() / DECIMALS;
        let mut positives: Vec<f64> = p.iter().zip(y).filter(|(_, &y)| y).map(|(&p, _)| round(map.apply(p))).collect();
        let mut negatives: Vec<f64> = p.iter().zip(y).filter(|(_, &y)| !y).map(|(&p, _)| round(map.apply(p))).collect();
        positives.sort_by(f64::total_cmp);
        negatives.sort_by(f64::total_cmp);
        let (clear_below, detected_above) = risk_thresholds(&positives, &negatives, targets);
        Self { name: name.to_string(), map, clear_below, detected_above, positives, negatives }
    }

    /// The thresholds for other targets, from the stored scores.
    pub fn thresholds(&self, targets: &Targets) -> (f64, f64) {
        risk_thresholds(&self.positives, &self.negatives, targets)
    }
}

/// The whole `calibration.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Calibration {
    pub format: u32,
    /// `"platt"`: the map each class carries.
    pub method: String,
    /// How the file was made (command, frames).
    #[serde(default)]
    pub description: String,
    /// Calibration frames the maps and thresholds were fitted on.
    pub frames: usize,
    /// The targets `clear_below` and `detected_above` were chosen for.
    pub targets: Targets,
    /// One per class of the bundle, in its order.
    pub classes: Vec<ClassCalibration>,
}

/// Why a calibration file cannot be used; every error names the file.
#[derive(Debug, thiserror::Error)]
pub enum CalibrationError {
    #[error("{}: cannot read: {source}", path.display())]
    Read { path: PathBuf, source: std::io::Error },
    /// JSON syntax, a wrong type or an unknown key; serde_json names the line and column.
    #[error("{}: {message}", path.display())]
    Syntax { path: PathBuf, message: String },
    #[error("{}: {field}: {problem}", path.display())]
    Invalid { path: PathBuf, field: String, problem: String },
}

impl Calibration {
    /// Fits every class on raw probabilities `probs` (frames × classes) and labels `truth`.
    pub fn fit(
        classes: &[String],
        probs: &[Vec<f64>],
        truth: &[Vec<bool>],
        targets: &Targets,
        description: &str,
    ) -> Self {
        let classes = classes
            .iter()
            .enumerate()
            .map(|(c, name)| {
                let p: Vec<f64> = probs.iter().map(|r| r[c]).collect();
                let y: Vec<bool> = truth.iter().map(|r| r[c]).collect();
                ClassCalibration::fit(name, &p, &y, targets)
            })
            .collect();
        Self {
            format: FORMAT,
            method: "platt".into(),
            description: description.into(),
            frames: probs.len(),
            targets: *targets,
            classes,
        }
    }

    /// Reads `dir/calibration.json` if there is one, checked against the bundle's classes.
    pub fn read_optional(dir: &Path, classes: &[String]) -> Result<Option<Self>, CalibrationError> {
        let path = dir.join(FILE);
        if !path.exists() {
            return Ok(None);
        }
        let text =
            std::fs::read_to_string(&path).map_err(|source| CalibrationError::Read { path: path.clone(), source })?;
        let c: Calibration = serde_json::from_str(&text)
            .map_err(|e| CalibrationError::Syntax { path: path.clone(), message: e.to_string() })?;
        c.check(classes).map_err(|(field, problem)| CalibrationError::Invalid { path, field, problem })?;
        Ok(Some(c))
    }

    /// Writes the file into the bundle folder `dir`.
    pub fn write(&self, dir: &Path) -> std::io::Result<()> {
        let text = serde_json::to_string_pretty(self).expect("calibration serialises") + "\n";
        std::fs::write(dir.join(FILE), text)
    }

    /// Checks what the types alone do not: returns the field and the problem.
    pub fn check(&self, classes: &[String]) -> Result<(), (String, String)> {
        if self.format != FORMAT {
            return Err(("format".into(), format!("{}: this saccade reads calibration format {FORMAT}", self.format)));
        }
        if self.method != "platt" {
            return Err(("method".into(), format!("{:?}: expected \"platt\"", self.method)));
        }
        check_targets(&self.targets).map_err(|(f, p)| (format!("targets.{f}"), p))?;
        let names: Vec<&String> = self.classes.iter().map(|c| &c.name).collect();
        if names.len() != classes.len() || names.iter().zip(classes).any(|(a, b)| *a != b) {
            return Err((
                "classes".into(),
                format!("names {names:?}, expected the bundle's classes {classes:?} in order"),
            ));
        }
        for (k, c) in self.classes.iter().enumerate() {
            let at = |f: &str| format!("classes[{k}].{f}");
            if !(c.map.a.is_finite() && c.map.a > 0.0) {
                return Err((at("map.a"), format!("{}: expected a positive slope (an increasing map)", c.map.a)));
            }
            if !c.map.b.is_finite() {
                return Err((at("map.b"), format!("{}: expected a finite number", c.map.b)));
            }
            for (f, v) in [("clear_below", c.clear_below), ("detected_above", c.detected_above)] {
                if !(0.0..=1.0).contains(&v) {
                    return Err((at(f), format!("{v} is outside [0, 1]")));
                }
            }
            if c.clear_below > c.detected_above {
                return Err((
                    at("clear_below"),
                    format!("{} is above detected_above = {}", c.clear_below, c.detected_above),
                ));
            }
            for (f, v) in [("positives", &c.positives), ("negatives", &c.negatives)] {
                if v.iter().any(|x| !(0.0..=1.0).contains(x)) || v.windows(2).any(|w| w[0] > w[1]) {
                    return Err((at(f), "expected probabilities in [0, 1], ascending".into()));
                }
            }
        }
        Ok(())
    }
}

/// Range checks of the targets, naming the field (`miss`, `false_alarm`, `confidence`).
pub fn check_targets(t: &Targets) -> Result<(), (&'static str, String)> {
    for (f, v) in [("miss", t.miss), ("false_alarm", t.false_alarm), ("confidence", t.confidence)] {
        if !(v > 0.0 && v < 1.0) {
            return Err((f, format!("{v}: expected a share strictly between 0 and 1, e.g. 0.1")));
        }
    }
    Ok(())
}

/// The Clopper–Pearson upper confidence bound at `confidence` on a binomial rate after
/// `k` events in `n` trials: the `p` with `P(Bin(n, p) ≤ k) = 1 − confidence` (1 when
/// `k = n`).
pub fn clopper_pearson_upper(k: usize, n: usize, confidence: f64) -> f64 {
    if k >= n {
        return 1.0;
    }
    let delta = 1.0 - confidence;
    // The binomial CDF falls as p rises: bisect.
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    for _ in 0..100 {
        let mid = 0.5 * (lo + hi);
        if binomial_cdf(k, n, mid) > delta {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    hi
}

/// `P(Bin(n, p) ≤ k)`, summed in log space.
pub fn binomial_cdf(k: usize, n: usize, p: f64) -> f64 {
    if p <= 0.0 {
        return 1.0;
    }
    if p >= 1.0 {
        return if k >= n { 1.0 } else { 0.0 };
    }
    let (lp, lq) = (p.ln(), (-p).ln_1p());
    let mut log_choose = 0.0f64; // ln C(n, 0)
    let mut sum = 0.0;
    for i in 0..=k.min(n) {
        if i > 0 {
            log_choose += ((n - i + 1) as f64).ln() - (i as f64).ln();
        }
        sum += (log_choose + i as f64 * lp + (n - i) as f64 * lq).exp();
    }
    sum.min(1.0)
}

/// The largest event count in `n` trials whose Clopper–Pearson upper bound is at most
/// `target` (None when even 0 events is not enough evidence).
pub fn max_events(n: usize, target: f64, confidence: f64) -> Option<usize> {
    let mut best = None;
    for k in 0..n {
        if clopper_pearson_upper(k, n, confidence) <= target {
            best = Some(k);
        } else {
            break;
        }
    }
    best
}

/// `(clear_below, detected_above)` from ascending calibrated scores of the frames that
/// carry the class and of those that do not (see the module notes). Without enough
/// frames for a target the corresponding outcome is never given: `clear_below = 0`,
/// `detected_above = 1`. Where the two would cross, both meet in the middle: lowering
/// `clear_below` and raising `detected_above` keep both guarantees.
pub fn risk_thresholds(positives: &[f64], negatives: &[f64], t: &Targets) -> (f64, f64) {
    // clear when score < clear_below: exactly k positives lie below the (k+1)-th smallest.
    let clear_below = match max_events(positives.len(), t.miss, t.confidence) {
        Some(k) => positives[k],
        None => 0.0,
    };
    // detected when score > detected_above: exactly k negatives lie above the (k+1)-th largest.
    let detected_above = match max_events(negatives.len(), t.false_alarm, t.confidence) {
        Some(k) => negatives[negatives.len() - 1 - k],
        None => 1.0,
    };
    if clear_below > detected_above {
        let m = 0.5 * (clear_below + detected_above);
        (m, m)
    } else {
        (clear_below, detected_above)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clopper_pearson_matches_closed_forms() {
        // k = 0: the bound solves (1 - p)^n = delta.
        let u = clopper_pearson_upper(0, 20, 0.9);
        assert!((u - (1.0 - 0.1f64.powf(1.0 / 20.0))).abs() < 1e-9, "{u}");
        // k = n - 1: 1 - p^n = delta.
        let u = clopper_pearson_upper(9, 10, 0.95);
        assert!((u - 0.95f64.powf(1.0 / 10.0)).abs() < 1e-9, "{u}");
        assert_eq!(clopper_pearson_upper(5, 5, 0.9), 1.0);
        assert!(max_events(10, 0.1, 0.9).is_none(), "10 frames cannot show a 10 % rate at 90 %");
        assert_eq!(max_events(22, 0.1, 0.9), Some(0));
    }

    #[test]
    fn thresholds_count_what_they_promise() {
        let pos: Vec<f64> = (0..100).map(|i| 0.3 + 0.007 * i as f64).collect();
        let neg: Vec<f64> = (0..200).map(|i| 0.0035 * i as f64).collect();
        let t = Targets::default();
        let (lo, hi) = risk_thresholds(&pos, &neg, &t);
        let k = max_events(100, t.miss, t.confidence).unwrap();
        assert_eq!(pos.iter().filter(|&&s| s < lo).count(), k);
        let j = max_events(200, t.false_alarm, t.confidence).unwrap();
        assert_eq!(neg.iter().filter(|&&s| s > hi).count(), j);
        assert!(lo <= hi);
        // Too few frames: never clear, never detected.
        assert_eq!(risk_thresholds(&pos[..5], &neg[..5], &t), (0.0, 1.0));
    }

    #[test]
    fn platt_is_increasing_and_recovers_a_known_map() {
        // Scores whose true probability is sigmoid(2 logit(p) - 1).
        let truth = Platt { a: 2.0, b: -1.0 };
        let mut p = Vec::new();
        let mut y = Vec::new();
        for i in 0..4000 {
            let s = (i as f64 + 0.5) / 4000.0;
            p.push(s);
            // A deterministic low-discrepancy draw of the label.
            let u = ((i as f64) * 0.618_033_988_749_895).fract();
            y.push(u < truth.apply(s));
        }
        let m = Platt::fit(&p, &y);
        assert!((m.a - 2.0).abs() < 0.15 && (m.b + 1.0).abs() < 0.15, "{m:?}");
        assert!(m.apply(0.2) < m.apply(0.3));
    }
}
