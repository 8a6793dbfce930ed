//! A linear probe on the feature network: how well do its features, at known mark
//! positions and at positions with no defect, separate the classes? A multinomial
//! logistic regression on standardised features, scored by k-fold cross-validation. A
//! high score with a poor sweep means attention is what limits quality; a low score means
//! the features do.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Multinomial logistic regression with an L2 penalty, fitted by full-batch gradient
/// descent with Adam steps on standardised inputs.
pub struct Softmax {
    mean: Vec<f64>,
    scale: Vec<f64>,
    /// `[classes, dim + 1]`, bias last.
    w: Vec<f64>,
    classes: usize,
}

impl Softmax {
    pub fn fit(x: &[Vec<f32>], y: &[usize], classes: usize, l2: f64, iterations: usize) -> Self {
        let d = x[0].len();
        let n = x.len() as f64;
        let mean: Vec<f64> = (0..d).map(|j| x.iter().map(|r| r[j] as f64).sum::<f64>() / n).collect();
        let scale: Vec<f64> = (0..d)
            .map(|j| {
                let v = x.iter().map(|r| (r[j] as f64 - mean[j]).powi(2)).sum::<f64>() / n;
                if v > 1e-12 {
                    1.0 / v.sqrt()
                } else {
                    0.0
                }
            })
            .collect();
        let mut m = Self { mean, scale, w: vec![0.0; classes * (d + 1)], classes };
        let z: Vec<Vec<f64>> = x.iter().map(|r| m.standardise(r)).collect();
        let (mut mom, mut vel) = (vec![0.0; m.w.len()], vec![0.0; m.w.len()]);
        let lr = 0.05;
        for t in 1..=iterations {
            let mut g = vec![0.0; m.w.len()];
            for (row, &label) in z.iter().zip(y) {
                let p = m.probabilities_std(row);
                for c in 0..classes {
                    let e = p[c] - (c == label) as u8 as f64;
                    let gw = &mut g[c * (d + 1)..(c + 1) * (d + 1)];
                    for (gj, v) in gw.iter_mut().zip(row) {
                        *gj += e * v / n;
                    }
                    gw[d] += e / n;
                }
            }
            for c in 0..classes {
                for j in 0..d {
                    g[c * (d + 1) + j] += l2 * m.w[c * (d + 1) + j];
                }
            }
            let (b1, b2) = (0.9f64, 0.999f64);
            for i in 0..m.w.len() {
                mom[i] = b1 * mom[i] + (1.0 - b1) * g[i];
                vel[i] = b2 * vel[i] + (1.0 - b2) * g[i] * g[i];
                let (mh, vh) = (mom[i] / (1.0 - b1.powi(t as i32)), vel[i] / (1.0 - b2.powi(t as i32)));
                m.w[i] -= lr * mh / (vh.sqrt() + 1e-8);
            }
        }
        m
    }

    fn standardise(&self, x: &[f32]) -> Vec<f64> {
        x.iter().zip(&self.mean).zip(&self.scale).map(|((&v, m), s)| (v as f64 - m) * s).collect()
    }

    fn probabilities_std(&self, z: &[f64]) -> Vec<f64> {
        let d = z.len();
        let logits: Vec<f64> = (0..self.classes)
            .map(|c| {
                let w = &self.w[c * (d + 1)..(c + 1) * (d + 1)];
                w[..d].iter().zip(z).map(|(a, b)| a * b).sum::<f64>() + w[d]
            })
            .collect();
        let max = logits.iter().fold(f64::NEG_INFINITY, |a, &b| a.max(b));
        let e: Vec<f64> = logits.iter().map(|l| (l - max).exp()).collect();
        let s: f64 = e.iter().sum();
        e.iter().map(|v| v / s).collect()
    }

    pub fn predict(&self, x: &[f32]) -> usize {
        let p = self.probabilities_std(&self.standardise(x));
        (0..self.classes).max_by(|&a, &b| p[a].total_cmp(&p[b])).expect("at least one class")
    }
}

/// Cross-validated predictions: every sample is predicted by a probe fitted on the other
/// folds (`folds` shuffled folds, fixed by `seed`).
pub fn cross_validate(x: &[Vec<f32>], y: &[usize], classes: usize, folds: usize, seed: u64) -> Vec<usize> {
    let mut order: Vec<usize> = (0..x.len()).collect();
    order.shuffle(&mut ChaCha8Rng::seed_from_u64(seed));
    let mut pred = vec![0; x.len()];
    let folds = folds.clamp(2, x.len().max(2));
    for f in 0..folds {
        let test: Vec<usize> = order.iter().copied().skip(f).step_by(folds).collect();
        let train: Vec<usize> = order.iter().copied().filter(|i| !test.contains(i)).collect();
        if train.is_empty() {
            continue;
        }
        let xs: Vec<Vec<f32>> = train.iter().map(|&i| x[i].clone()).collect();
        let ys: Vec<usize> = train.iter().map(|&i| y[i]).collect();
        let m = Softmax::fit(&xs, &ys, classes, 1e-3, 300);
        for &i in &test {
            pred[i] = m.predict(&x[i]);
        }
    }
    pred
}

/// Per-class F1 of multiclass predictions (one class against the rest).
pub fn per_class_f1(truth: &[usize], pred: &[usize], classes: usize) -> Vec<f64> {
    (0..classes)
        .map(|c| {
            let tp = truth.iter().zip(pred).filter(|&(&t, &p)| t == c && p == c).count();
            let den = truth.iter().filter(|&&t| t == c).count() + pred.iter().filter(|&&p| p == c).count();
            if den == 0 {
                0.0
            } else {
                2.0 * tp as f64 / den as f64
            }
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::Rng;

    #[test]
    fn separable_clusters_are_told_apart() {
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let centres = [[0.0f32, 0.0, 5.0], [4.0, 0.0, 5.0], [0.0, 4.0, 5.0]];
        let (mut x, mut y) = (Vec::new(), Vec::new());
        for _ in 0..60 {
            let c = rng.random_range(0..3);
            x.push(centres[c].iter().map(|v| v + rng.random_range(-0.5f32..0.5)).collect());
            y.push(c);
        }
        let pred = cross_validate(&x, &y, 3, 5, 1);
        assert!(per_class_f1(&y, &pred, 3).iter().all(|&f| f > 0.95), "{:?}", per_class_f1(&y, &pred, 3));
    }
}
