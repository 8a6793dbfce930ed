//! Quality measures over labelled frames: F1 per class and macro, expected calibration
//! error, and interval coverage. Matrices are frames × classes, one row per frame.

/// F1 of each class and their unweighted mean.
#[derive(Clone, Debug, PartialEq)]
pub struct F1 {
    pub per_class: Vec<f64>,
    /// Mean of `per_class` (every class counts once, whatever its frequency).
    pub macro_f1: f64,
}

/// F1 per class, `2 TP / (2 TP + FP + FN)`, and macro F1, with scikit-learn's semantics
/// (`f1_score(average=None)` and `average="macro"`, `zero_division=0`): a class with no
/// true and no predicted positive (denominator 0) scores 0, and still counts in the macro
/// mean. A class whose labels are all negative can therefore only lower macro F1; label
/// sets for a sweep should contain every class.
///
/// Panics when the matrices differ in shape (the caller builds both from the same frames).
pub fn f1(truth: &[Vec<bool>], pred: &[Vec<bool>]) -> F1 {
    assert_eq!(truth.len(), pred.len(), "f1: truth has {} frames, predictions {}", truth.len(), pred.len());
    let classes = truth.first().map_or(0, Vec::len);
    let mut counts = vec![(0u64, 0u64, 0u64); classes]; // (tp, fp, fn)
    for (t, p) in truth.iter().zip(pred) {
        assert!(t.len() == classes && p.len() == classes, "f1: every row needs {classes} classes");
        for (c, (&t, &p)) in counts.iter_mut().zip(t.iter().zip(p)) {
            match (t, p) {
                (true, true) => c.0 += 1,
                (false, true) => c.1 += 1,
                (true, false) => c.2 += 1,
                (false, false) => {}
            }
        }
    }
    let per_class: Vec<f64> = counts
        .iter()
        .map(|&(tp, fp, fn_)| {
            let den = 2 * tp + fp + fn_;
            if den == 0 {
                0.0
            } else {
                (2 * tp) as f64 / den as f64
            }
        })
        .collect();
    let macro_f1 = if classes == 0 { 0.0 } else { per_class.iter().sum::<f64>() / classes as f64 };
    F1 { per_class, macro_f1 }
}

/// Predictions at per-class thresholds: present when `probability >= threshold`.
pub fn predict(probs: &[Vec<f64>], thresholds: &[f64]) -> Vec<Vec<bool>> {
    probs.iter().map(|row| row.iter().zip(thresholds).map(|(p, t)| p >= t).collect()).collect()
}

/// A per-class decision threshold chosen on held-out scores.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Threshold {
    /// The lowest score predicted positive at the best F1 (a threshold in the sense of
    /// scikit-learn's `precision_recall_curve`: positive when `score >= at`).
    pub at: f64,
    /// Best F1 on the held-out scores.
    pub f1: f64,
    /// What to use on new frames: midway between `at` and the next lower held-out score,
    /// so that a frame scoring like the weakest held-out positive is not on the edge.
    pub threshold: f64,
}

/// The rule `saccade train` uses per class: among the distinct held-out scores, the
/// threshold `score >= t` with the best F1; ties go to the highest such `t` (fewer false
/// alarms for the same F1). `None` when no held-out frame carries the class.
pub fn best_f1_threshold(scores: &[f64], truth: &[bool]) -> Option<Threshold> {
    let positives = truth.iter().filter(|&&t| t).count();
    if positives == 0 {
        return None;
    }
    let mut idx: Vec<usize> = (0..scores.len()).collect();
    idx.sort_by(|&a, &b| scores[b].total_cmp(&scores[a]));
    let (mut tp, mut fp) = (0usize, 0usize);
    let mut best: Option<(f64, f64, usize)> = None; // (f1, at, position of the next lower score)
    let mut j = 0;
    while j < idx.len() {
        let at = scores[idx[j]];
        // Every frame scoring exactly `at` is predicted positive together.
        while j < idx.len() && scores[idx[j]] == at {
            if truth[idx[j]] {
                tp += 1;
            } else {
                fp += 1;
            }
            j += 1;
        }
        let f1 = 2.0 * tp as f64 / (tp + fp + positives) as f64;
        if best.is_none_or(|(b, _, _)| f1 > b) {
            best = Some((f1, at, j));
        }
    }
    let (f1, at, next) = best.expect("at least one score");
    let lower = idx.get(next).map_or(0.0, |&k| scores[k]);
    Some(Threshold { at, f1, threshold: (at + lower) / 2.0 })
}

/// Equal-width bin of `p` among `bins`: bin `i` holds `(i/M, (i+1)/M]`, and `p = 0` goes
/// to the first bin.
fn bin_of(p: f64, bins: usize) -> usize {
    let m = bins as f64;
    let mut b = ((p * m).ceil() as usize).saturating_sub(1).min(bins - 1);
    // Correct the rounding of p·M against the edges i/M themselves.
    while b > 0 && p <= b as f64 / m {
        b -= 1;
    }
    while b + 1 < bins && p > (b + 1) as f64 / m {
        b += 1;
    }
    b
}

/// Expected calibration error (Guo, Pleiss, Sun and Weinberger, "On Calibration of
/// Modern Neural Networks", ICML 2017), with every (frame, class) probability taken as a
/// binary event: `ECE = Σ_b |B_b|/n · |acc(B_b) − conf(B_b)|` over `bins` equal-width
/// bins `(i/M, (i+1)/M]` (p = 0 in the first), where `acc` is the fraction of positives
/// in the bin and `conf` its mean probability. Empty bins add nothing; no events at all
/// give 0.
pub fn ece(probs: &[Vec<f64>], truth: &[Vec<bool>], bins: usize) -> f64 {
    assert!(bins > 0, "ece: at least one bin");
    assert_eq!(probs.len(), truth.len(), "ece: probabilities for {} frames, labels for {}", probs.len(), truth.len());
    let mut sum_p = vec![0.0f64; bins];
    let mut pos = vec![0u64; bins];
    let mut count = vec![0u64; bins];
    for (pr, tr) in probs.iter().zip(truth) {
        assert_eq!(pr.len(), tr.len(), "ece: a row's probabilities and labels differ in length");
        for (&p, &t) in pr.iter().zip(tr) {
            let b = bin_of(p.clamp(0.0, 1.0), bins);
            sum_p[b] += p;
            pos[b] += t as u64;
            count[b] += 1;
        }
    }
    let n: u64 = count.iter().sum();
    if n == 0 {
        return 0.0;
    }
    (0..bins)
        .filter(|&b| count[b] > 0)
        .map(|b| {
            let k = count[b] as f64;
            (k / n as f64) * (pos[b] as f64 / k - sum_p[b] / k).abs()
        })
        .sum()
}

/// Fraction of (frame, class) pairs whose interval `[lo, hi]` contains the reference
/// probability (closed at both ends); 0 when there are none.
pub fn coverage(intervals: &[Vec<[f64; 2]>], reference: &[Vec<f64>]) -> f64 {
    assert_eq!(
        intervals.len(),
        reference.len(),
        "coverage: intervals for {} frames, references for {}",
        intervals.len(),
        reference.len()
    );
    let (mut inside, mut n) = (0u64, 0u64);
    for (iv, rf) in intervals.iter().zip(reference) {
        assert_eq!(iv.len(), rf.len(), "coverage: a row's intervals and references differ in length");
        for (&[lo, hi], &r) in iv.iter().zip(rf) {
            inside += (lo <= r && r <= hi) as u64;
            n += 1;
        }
    }
    if n == 0 {
        0.0
    } else {
        inside as f64 / n as f64
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn f1_counts_and_zero_division() {
        let t = vec![vec![true, false, false], vec![true, false, true], vec![false, false, true]];
        let p = vec![vec![true, false, true], vec![false, false, true], vec![false, false, false]];
        let f = f1(&t, &p);
        // Class 0: tp 1, fn 1 → 2/3; class 1: nothing at all → 0; class 2: tp 1, fp 1, fn 1 → 1/2.
        assert_eq!(f.per_class, vec![2.0 / 3.0, 0.0, 0.5]);
        assert!((f.macro_f1 - (2.0 / 3.0 + 0.5) / 3.0).abs() < 1e-15);
    }

    #[test]
    fn bins_are_closed_on_the_right() {
        assert_eq!(bin_of(0.0, 10), 0);
        assert_eq!(bin_of(0.1, 10), 0);
        assert_eq!(bin_of(0.1000001, 10), 1);
        assert_eq!(bin_of(0.3, 10), 2);
        assert_eq!(bin_of(0.7, 10), 6);
        assert_eq!(bin_of(1.0, 10), 9);
    }

    #[test]
    fn ece_of_a_calibrated_and_an_overconfident_set() {
        // Bin (0.7, 0.8]: four events at 0.75, three positive → acc 0.75 = conf.
        let probs = vec![vec![0.75], vec![0.75], vec![0.75], vec![0.75]];
        let truth = vec![vec![true], vec![true], vec![true], vec![false]];
        assert!(ece(&probs, &truth, 10).abs() < 1e-12);
        // All at 0.95, half positive: |0.5 − 0.95| = 0.45.
        let probs = vec![vec![0.95, 0.95]];
        let truth = vec![vec![true, false]];
        assert!((ece(&probs, &truth, 10) - 0.45).abs() < 1e-12);
    }

    #[test]
    fn coverage_is_closed() {
        let iv = vec![vec![[0.2, 0.4], [0.5, 0.5]], vec![[0.0, 0.1], [0.3, 0.9]]];
        let rf = vec![vec![0.4, 0.5], vec![0.2, 0.1]];
        assert_eq!(coverage(&iv, &rf), 0.5);
    }
}
