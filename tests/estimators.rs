//! Statistical checks of the estimators against exact enumeration (the exhaustive Psi).
//! The ground truth is computed directly as Σ a_i f_i; nothing here is a stored answer.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use saccade::bundle::Activation;
use saccade::engine::estimator::{CellOrder, EstimatorKind};
use saccade::engine::uncertainty::{probabilities, sample_psi, summarise};

struct Problem {
    a: Vec<f64>,
    f: Vec<f32>,
    d: usize,
    psi: Vec<f64>,
}

/// Uneven attention (softmax of scaled normals) over `n` cells and random features.
fn problem(n: usize, d: usize, spread: f64, seed: u64) -> Problem {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let s: Vec<f64> = (0..n).map(|_| spread * rng.sample::<f64, _>(StandardNormal)).collect();
    let max = s.iter().cloned().fold(f64::MIN, f64::max);
    let e: Vec<f64> = s.iter().map(|x| (x - max).exp()).collect();
    let z: f64 = e.iter().sum();
    let a: Vec<f64> = e.iter().map(|x| x / z).collect();
    let f: Vec<f32> = (0..n * d).map(|j| (rng.sample::<f64, _>(StandardNormal) + (j % d) as f64) as f32).collect();
    let mut psi = vec![0.0; d];
    for i in 0..n {
        for c in 0..d {
            psi[c] += a[i] * f[i * d + c] as f64;
        }
    }
    Problem { a, f, d, psi }
}

/// Feature rows of the first `k` cells of an order.
fn rows(p: &Problem, order: &CellOrder, k: usize) -> Vec<f32> {
    order.cells[..k].iter().flat_map(|&i| p.f[i * p.d..(i + 1) * p.d].iter().copied()).collect()
}

/// Over `draws` seeded orders stopped at `k`: the mean estimate is within 4 standard
/// errors of Psi in every dimension, and the mean covariance estimate agrees with the
/// empirical covariance of the estimates within 4 combined standard errors per entry.
fn check_unbiased(p: &Problem, kind: EstimatorKind, k: usize, n_draws: usize, draws: usize) {
    let d = p.d;
    let mut rng = ChaCha8Rng::seed_from_u64(1000 + k as u64);
    let mut est = Vec::with_capacity(draws);
    let mut covs = Vec::with_capacity(draws);
    for _ in 0..draws {
        let order = CellOrder::new(kind, &p.a, n_draws, &mut rng);
        let k = k.min(order.len());
        let f = rows(p, &order, k);
        let w = order.weights(k);
        est.push(w.estimate(&f, d));
        covs.push(w.covariance(&f, d));
    }
    let r = draws as f64;
    let mean: Vec<f64> = (0..d).map(|c| est.iter().map(|e| e[c]).sum::<f64>() / r).collect();
    for c in 0..d {
        let var = est.iter().map(|e| (e[c] - mean[c]).powi(2)).sum::<f64>() / (r - 1.0);
        let se = (var / r).sqrt();
        assert!(
            (mean[c] - p.psi[c]).abs() <= 4.0 * se + 1e-12,
            "{kind} k={k} dim {c}: mean {} vs Psi {} (se {se})",
            mean[c],
            p.psi[c]
        );
    }
    for x in 0..d {
        for y in 0..d {
            let prod: Vec<f64> = est.iter().map(|e| (e[x] - p.psi[x]) * (e[y] - p.psi[y])).collect();
            let emp = prod.iter().sum::<f64>() / r;
            let emp_se = (prod.iter().map(|v| (v - emp).powi(2)).sum::<f64>() / (r - 1.0) / r).sqrt();
            let entries: Vec<f64> = covs.iter().map(|s| s[x * d + y]).collect();
            let mc = entries.iter().sum::<f64>() / r;
            let mc_se = (entries.iter().map(|v| (v - mc).powi(2)).sum::<f64>() / (r - 1.0) / r).sqrt();
            let tol = 4.0 * (emp_se.powi(2) + mc_se.powi(2)).sqrt() + 1e-12;
            assert!(
                (mc - emp).abs() <= tol,
                "{kind} k={k} cov[{x},{y}]: mean estimate {mc} vs empirical {emp} (tol {tol})"
            );
        }
    }
}

#[test]
fn priority_is_unbiased_at_every_stopping_point() {
    let p = problem(36, 3, 1.5, 1);
    for k in [1, 4, 10, 25, 35] {
        check_unbiased(&p, EstimatorKind::Priority, k, 0, 20_000);
    }
}

#[test]
fn replacement_is_unbiased_with_all_draws_and_when_stopped_early() {
    let p = problem(36, 3, 1.5, 2);
    // 24 draws; stopping after k distinct cells keeps the draws before the (k+1)-th new one.
    for k in [2, 6, 12, 36] {
        check_unbiased(&p, EstimatorKind::Replacement, k, 24, 20_000);
    }
}

#[test]
fn priority_with_every_cell_equals_exhaustive() {
    let p = problem(30, 4, 2.0, 3);
    let mut rng = ChaCha8Rng::seed_from_u64(9);
    let order = CellOrder::new(EstimatorKind::Priority, &p.a, 0, &mut rng);
    let exact = CellOrder::new(EstimatorKind::Exhaustive, &p.a, 0, &mut rng);
    let (w, we) = (order.weights(order.len()), exact.weights(exact.len()));
    assert_eq!(w.tau, Some(0.0));
    // Each cell's weight is exactly its attention, and no variance is left.
    for (j, &i) in order.cells.iter().enumerate() {
        assert_eq!(w.w[j], p.a[i]);
        assert_eq!(w.c[j], 0.0);
    }
    let (psi, psi_e) =
        (w.estimate(&rows(&p, &order, order.len()), p.d), we.estimate(&rows(&p, &exact, exact.len()), p.d));
    for c in 0..p.d {
        // Same terms, summed in another order.
        assert!((psi[c] - psi_e[c]).abs() < 1e-12 && (psi_e[c] - p.psi[c]).abs() < 1e-12);
    }
}

#[test]
fn certain_cells_carry_no_variance() {
    // One cell holds 70 % of the attention among 100 small ones: it is always among the
    // first 10 processed, with weight exactly a_i and no variance (a_i >= tau).
    let mut a = vec![0.003; 101];
    a[7] = 0.7;
    let mut rng = ChaCha8Rng::seed_from_u64(4);
    for _ in 0..200 {
        let order = CellOrder::new(EstimatorKind::Priority, &a, 0, &mut rng);
        let j = order.cells.iter().position(|&i| i == 7).unwrap();
        assert!(j < 10, "the dominant cell came {j}th");
        let w = order.weights(10);
        assert!(w.tau.unwrap() < 0.7);
        assert_eq!((w.w[j], w.c[j]), (0.7, 0.0));
        // Tail cells below tau get the larger weight tau and positive variance.
        let tail = (0..10).find(|&m| order.cells[m] != 7).unwrap();
        assert!(w.w[tail] > a[order.cells[tail]] && w.c[tail] > 0.0);
    }
}

/// Share of draws whose nominal 90 % interval (Gaussian samples of Psi through a sigmoid
/// head) contains the exhaustive probability, per class.
fn coverage(kind: EstimatorKind, k: usize, draws: usize) -> Vec<f64> {
    let p = problem(400, 4, 1.0, 5);
    let (classes, d) = (2, p.d);
    // A linear head with known weights: logits = W Psi + b.
    let w = [0.8f32, -0.5, 0.3, 0.2, -0.4, 0.6, 0.5, -0.3];
    let b = [-0.6f32, -0.4];
    let head = |rows: &[f32]| -> Vec<f32> {
        rows.chunks_exact(d)
            .flat_map(|r| (0..classes).map(move |c| (0..d).map(|j| w[c * d + j] * r[j]).sum::<f32>() + b[c]))
            .collect()
    };
    let psi32: Vec<f32> = p.psi.iter().map(|&x| x as f32).collect();
    let exact = probabilities(&head(&psi32), classes, Activation::Sigmoid);
    let names = vec!["a".to_string(), "b".to_string()];
    let mut rng = ChaCha8Rng::seed_from_u64(77);
    let mut hits = vec![0usize; classes];
    for _ in 0..draws {
        let order = CellOrder::new(kind, &p.a, k, &mut rng);
        let kk = k.min(order.len());
        let f = rows(&p, &order, kk);
        let weights = order.weights(kk);
        let samples = sample_psi(&weights, &f, d, 200, &mut rng);
        let probs = probabilities(&head(&samples), classes, Activation::Sigmoid);
        for (c, r) in summarise(&probs, &names, &[(0.5, 0.5), (0.5, 0.5)], 0.9).iter().enumerate() {
            hits[c] += usize::from(r.interval[0] <= exact[c] && exact[c] <= r.interval[1]);
        }
    }
    hits.iter().map(|&h| h as f64 / draws as f64).collect()
}

#[test]
fn priority_intervals_are_honest() {
    for k in [40, 120] {
        for (c, cov) in coverage(EstimatorKind::Priority, k, 2000).iter().enumerate() {
            assert!((0.85..=0.95).contains(cov), "priority k={k} class {c}: 90 % interval covered {cov}");
        }
    }
}

#[test]
fn replacement_intervals_are_honest() {
    for (c, cov) in coverage(EstimatorKind::Replacement, 100, 2000).iter().enumerate() {
        assert!((0.85..=0.95).contains(cov), "replacement class {c}: 90 % interval covered {cov}");
    }
}
