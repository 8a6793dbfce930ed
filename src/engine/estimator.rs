//! Unbiased estimators of `Psi = Σ a_i f_i` from a subset of cells, with their
//! covariance estimates (see DESIGN.md).
//!
//! An estimator first fixes a processing order of cells (from the attention and the
//! random draws only); the budget loop computes features along that order and may stop
//! after any `k` cells. [`CellOrder::weights`] then gives, for the first `k` cells, the weights
//! of the estimate and the terms of its covariance estimate:
//!
//! `Psi_hat = Σ_j w_j f_j`, `Sigma_hat = Σ_j c_j (f_j - m)(f_j - m)ᵀ`, with `m = 0` or
//! `m = Psi_hat` ([`Weights::centred`]).

use rand::Rng;
use serde::{Deserialize, Serialize};

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum EstimatorKind {
    /// Priority sampling (Duffield, Lund and Thorup, J. ACM 54(6), 2007): anytime.
    #[default]
    Priority,
    /// I.i.d. draws from the attention distribution (Monte-Carlo attention sampling).
    Replacement,
    /// Every cell with positive attention: the exact `Psi`.
    Exhaustive,
}

/// A name that is not an estimator.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("unknown estimator {0:?}: expected priority, replacement or exhaustive")]
pub struct UnknownEstimator(pub String);

impl std::str::FromStr for EstimatorKind {
    type Err = UnknownEstimator;
    fn from_str(s: &str) -> Result<Self, UnknownEstimator> {
        match s {
            "priority" => Ok(Self::Priority),
            "replacement" => Ok(Self::Replacement),
            "exhaustive" => Ok(Self::Exhaustive),
            _ => Err(UnknownEstimator(s.to_string())),
        }
    }
}

impl std::fmt::Display for EstimatorKind {
    fn fmt(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
        f.write_str(match self {
            Self::Priority => "priority",
            Self::Replacement => "replacement",
            Self::Exhaustive => "exhaustive",
        })
    }
}

/// Weights for the first `k` cells of a [`CellOrder`].
#[derive(Clone, Debug, PartialEq)]
pub struct Weights {
    /// Estimate weight per processed cell.
    pub w: Vec<f64>,
    /// Covariance coefficient per processed cell.
    pub c: Vec<f64>,
    /// Whether covariance terms are centred on the estimate (replacement) or not (priority).
    pub centred: bool,
    /// Priority sampling's threshold `tau` (0 when every cell was processed); None otherwise.
    pub tau: Option<f64>,
}

/// A processing order of cells and what is needed to weight any prefix of it.
#[derive(Clone, Debug)]
pub struct CellOrder {
    kind: EstimatorKind,
    /// Cell indices in processing order.
    pub cells: Vec<usize>,
    /// Attention of each cell in `cells`.
    attention: Vec<f64>,
    /// Priority: priorities along `cells`; the first unprocessed one is `priorities[k]`.
    priorities: Vec<f64>,
    /// Replacement: the draw sequence as positions in `cells`.
    draws: Vec<usize>,
}

impl CellOrder {
    /// Builds an order over attention `a` (non-negative, summing to 1). `draws` is the
    /// number of i.i.d. draws for `replacement` and is ignored otherwise.
    pub fn new<R: Rng>(kind: EstimatorKind, a: &[f64], draws: usize, rng: &mut R) -> Self {
        match kind {
            EstimatorKind::Priority => {
                // u in (0, 1]: 1 - [0, 1).
                let u: Vec<f64> = a.iter().map(|_| 1.0 - rng.random::<f64>()).collect();
                Self::priority_with_uniforms(a, &u)
            }
            EstimatorKind::Exhaustive => {
                let cells: Vec<usize> = (0..a.len()).filter(|&i| a[i] > 0.0).collect();
                let attention = cells.iter().map(|&i| a[i]).collect();
                Self { kind, cells, attention, priorities: vec![], draws: vec![] }
            }
            EstimatorKind::Replacement => {
                let cdf: Vec<f64> = a
                    .iter()
                    .scan(0.0, |s, &x| {
                        *s += x;
                        Some(*s)
                    })
                    .collect();
                let total = *cdf.last().unwrap_or(&0.0);
                let mut pos_of = vec![usize::MAX; a.len()];
                let (mut order, mut seq) = (Vec::new(), Vec::with_capacity(draws));
                for _ in 0..draws {
                    let x = rng.random::<f64>() * total;
                    // First cell whose cumulative mass exceeds x; zero-mass cells are never hit.
                    let mut i = cdf.partition_point(|&c| c <= x).min(a.len() - 1);
                    while a[i] == 0.0 {
                        i -= 1;
                    }
                    if pos_of[i] == usize::MAX {
                        pos_of[i] = order.len();
                        order.push(i);
                    }
                    seq.push(pos_of[i]);
                }
                let attention = order.iter().map(|&i| a[i]).collect();
                Self { kind, cells: order, attention, priorities: vec![], draws: seq }
            }
        }
    }

    /// Priority sampling with given uniforms `u_i ∈ (0, 1]` (exposed for reference checks).
    pub fn priority_with_uniforms(a: &[f64], u: &[f64]) -> Self {
        assert_eq!(a.len(), u.len());
        let mut cells: Vec<(usize, f64)> = (0..a.len()).filter(|&i| a[i] > 0.0).map(|i| (i, a[i] / u[i])).collect();
        // Decreasing priority; ties broken by index so that the order is reproducible.
        cells.sort_by(|x, y| y.1.total_cmp(&x.1).then(x.0.cmp(&y.0)));
        Self {
            kind: EstimatorKind::Priority,
            cells: cells.iter().map(|c| c.0).collect(),
            attention: cells.iter().map(|c| a[c.0]).collect(),
            priorities: cells.iter().map(|c| c.1).collect(),
            draws: vec![],
        }
    }

    pub fn kind(&self) -> EstimatorKind {
        self.kind
    }

    /// Number of cells this order would process if never stopped.
    pub fn len(&self) -> usize {
        self.cells.len()
    }

    pub fn is_empty(&self) -> bool {
        self.cells.is_empty()
    }

    /// Weights of the estimate after processing the first `k` cells (`1 ≤ k ≤ len`).
    pub fn weights(&self, k: usize) -> Weights {
        assert!(k >= 1 && k <= self.len(), "k = {k} outside 1..={}", self.len());
        let a = &self.attention[..k];
        match self.kind {
            EstimatorKind::Priority => {
                let tau = self.priorities.get(k).copied().unwrap_or(0.0);
                Weights {
                    w: a.iter().map(|&ai| ai.max(tau)).collect(),
                    c: a.iter().map(|&ai| tau * (tau - ai).max(0.0)).collect(),
                    centred: false,
                    tau: Some(tau),
                }
            }
            EstimatorKind::Exhaustive => {
                // A prefix of the exhaustive order is not an estimate of Psi; only k = len is exact.
                let complete = k == self.len();
                Weights { w: a.to_vec(), c: vec![0.0; k], centred: false, tau: complete.then_some(0.0) }
            }
            EstimatorKind::Replacement => {
                // Draws before the first draw of cell k+1: every one of them is computed.
                let n = if k == self.len() {
                    self.draws.len()
                } else {
                    self.draws.iter().position(|&p| p == k).expect("every ordered cell is drawn")
                };
                let mut counts = vec![0usize; k];
                for &p in &self.draws[..n] {
                    counts[p] += 1;
                }
                let nf = n as f64;
                // Sample covariance / n, unbiased for the variance of the mean of n i.i.d. draws.
                let cov = if n > 1 { 1.0 / (nf * (nf - 1.0)) } else { 0.0 };
                Weights {
                    w: counts.iter().map(|&m| m as f64 / nf).collect(),
                    c: counts.iter().map(|&m| m as f64 * cov).collect(),
                    centred: true,
                    tau: None,
                }
            }
        }
    }
}

impl Weights {
    /// `Psi_hat` from feature rows `f` (one per processed cell, each of length `d`).
    pub fn estimate(&self, f: &[f32], d: usize) -> Vec<f64> {
        let mut psi = vec![0.0; d];
        for (j, row) in f.chunks_exact(d).enumerate().take(self.w.len()) {
            for (p, &x) in psi.iter_mut().zip(row) {
                *p += self.w[j] * x as f64;
            }
        }
        psi
    }

    /// Covariance estimate as a dense `d × d` row-major matrix (for tests and reports;
    /// sampling uses the low-rank form directly).
    pub fn covariance(&self, f: &[f32], d: usize) -> Vec<f64> {
        let centre = if self.centred { self.estimate(f, d) } else { vec![0.0; d] };
        let mut cov = vec![0.0; d * d];
        for (j, row) in f.chunks_exact(d).enumerate().take(self.c.len()) {
            if self.c[j] == 0.0 {
                continue;
            }
            let g: Vec<f64> = row.iter().zip(&centre).map(|(&x, m)| x as f64 - m).collect();
            for r in 0..d {
                for s in 0..d {
                    cov[r * d + s] += self.c[j] * g[r] * g[s];
                }
            }
        }
        cov
    }
}
