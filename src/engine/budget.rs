//! The budget loop: how many patches a frame gets. Batches go along the estimator's order
//! while the cost model predicts that the next batch and the head still fit before the
//! deadline.
//!
//! The loop takes its clock and its batch runner as arguments, so that its decisions can
//! be tested against a simulated clock, with no premise about the machine's speed.

use std::collections::BTreeMap;

use super::report::StopReason;

/// Running estimates of what the next batch and the head will cost, in seconds.
#[derive(Clone, Debug)]
pub(super) struct CostModel {
    /// Seconds per patch at each batch size.
    per_patch: BTreeMap<usize, f64>,
    /// Fixed part of the head stage (its network run), from the load-time dry run.
    head_base: f64,
    /// Part of the head stage that grows with the patches examined (the Gaussian samples).
    head_per_patch: f64,
}

impl CostModel {
    /// Weight of the old estimate when a new observation arrives.
    const KEEP: f64 = 0.7;
    /// Safety factor on predicted costs: timing noise on a busy CPU is one-sided.
    pub(super) const MARGIN: f64 = 1.25;
    /// Share of the budget held back for what the model does not predict (scheduling,
    /// cache misses on the last batch).
    pub(super) const SLACK: f64 = 0.02;

    pub(super) fn new(per_patch: impl IntoIterator<Item = (usize, f64)>, head_base: f64) -> Self {
        Self { per_patch: per_patch.into_iter().collect(), head_base, head_per_patch: 0.0 }
    }

    /// Whether the model has an estimate for batches of `b`.
    pub(super) fn knows(&self, b: usize) -> bool {
        self.per_patch.contains_key(&b)
    }

    /// A batch of `b` patches took `secs` per patch. The first observation of a size is
    /// taken as is; later ones move the estimate by 1 − KEEP of the difference.
    pub(super) fn observe_batch(&mut self, b: usize, secs: f64) {
        let slot = self.per_patch.entry(b).or_insert(secs);
        *slot = Self::KEEP * *slot + (1.0 - Self::KEEP) * secs;
    }

    /// The head stage took `secs` after `k` patches.
    pub(super) fn observe_head(&mut self, k: usize, secs: f64) {
        let per = (secs - self.head_base).max(0.0) / k.max(1) as f64;
        self.head_per_patch = Self::KEEP * self.head_per_patch + (1.0 - Self::KEEP) * per;
    }

    /// Predicted head stage time after `k` patches.
    pub(super) fn head(&self, k: usize) -> f64 {
        self.head_base + self.head_per_patch * k as f64
    }

    /// Predicted time, with the margin, to run a batch of `b` after `k` patches and then
    /// the head; infinite for a size never measured.
    pub(super) fn next(&self, b: usize, k: usize) -> f64 {
        match self.per_patch.get(&b) {
            Some(per) => Self::MARGIN * (b as f64 * per + self.head(k + b)),
            None => f64::INFINITY,
        }
    }
}

/// What the loop may do on one frame.
#[derive(Clone, Debug)]
pub(super) struct Limits {
    /// Cells in the estimator's order.
    pub cells: usize,
    /// Most cells to examine (`cells` for the exhaustive estimator).
    pub limit: usize,
    /// Cells examined even past the deadline: `min_patches`, or every cell for the
    /// exhaustive estimator.
    pub forced: usize,
    /// Batch sizes, ascending; the largest is the configured batch.
    pub sizes: Vec<usize>,
    /// Seconds from the clock's origin to the deadline.
    pub deadline: f64,
    /// Seconds held back from the deadline (see [`CostModel::SLACK`]).
    pub slack: f64,
}

/// Runs batches along the order until a stop condition; returns the cells examined and
/// why it stopped. `now` reads the clock in seconds; `run(first, count)` computes the
/// features of `count` cells from position `first` of the order.
pub(super) fn run<E>(
    limits: &Limits,
    cost: &mut CostModel,
    mut now: impl FnMut() -> f64,
    mut run: impl FnMut(usize, usize) -> Result<(), E>,
) -> Result<(usize, StopReason), E> {
    let largest = *limits.sizes.last().expect("at least one batch size");
    let mut k = 0;
    let stop = loop {
        if k == limits.cells {
            break StopReason::AllCells;
        }
        if k >= limits.limit {
            break StopReason::MaxPatches;
        }
        let want = largest.min(limits.limit - k);
        let mut fitting = limits.sizes.iter().rev().copied().filter(|&b| b <= want);
        let nb = if k < limits.forced {
            // Whole batches up to the forced count, even past the deadline (reported as an overrun).
            fitting.next().expect("batch size 1 always fits")
        } else {
            let left = limits.deadline - now() - limits.slack;
            match fitting.find(|&b| cost.next(b, k) <= left) {
                Some(b) => b,
                None => break StopReason::Budget,
            }
        };
        let t = now();
        run(k, nb)?;
        cost.observe_batch(nb, (now() - t) / nb as f64);
        k += nb;
    };
    Ok((k, stop))
}

#[cfg(test)]
mod tests {
    use std::cell::Cell;

    use super::*;

    const MS: f64 = 1e-3;

    fn limits(cells: usize, limit: usize, forced: usize, batch: usize, deadline: f64) -> Limits {
        let mut sizes: Vec<usize> = (0..).map(|e| 1usize << e).take_while(|&b| b < batch).collect();
        sizes.push(batch);
        Limits { cells, limit, forced, sizes, deadline, slack: CostModel::SLACK * deadline }
    }

    /// Runs the loop on a simulated clock where a batch of `b` truly costs `true_cost(b)`
    /// seconds; returns (patches, stop, clock at the end, batch sizes used).
    fn simulate(
        l: &Limits,
        cost: &mut CostModel,
        true_cost: impl Fn(usize) -> f64,
    ) -> (usize, StopReason, f64, Vec<usize>) {
        let clock = Cell::new(0.0);
        let mut used = Vec::new();
        let (k, stop) = run::<()>(
            l,
            cost,
            || clock.get(),
            |_, b| {
                clock.set(clock.get() + true_cost(b));
                used.push(b);
                Ok(())
            },
        )
        .unwrap();
        (k, stop, clock.get(), used)
    }

    fn model(per_patch_ms: f64, head_ms: f64) -> CostModel {
        CostModel::new([1, 2, 4, 8].map(|b| (b, per_patch_ms * MS)), head_ms * MS)
    }

    #[test]
    fn estimates_follow_observations_by_a_fixed_share() {
        let mut c = CostModel::new([(8, 1.0)], 0.0);
        c.observe_batch(8, 2.0);
        assert!((c.per_patch[&8] - (0.7 + 0.3 * 2.0)).abs() < 1e-12);
        // A size never seen starts at its first observation.
        c.observe_batch(16, 0.5);
        assert_eq!(c.per_patch[&16], 0.5);
        // Repeated observations close the gap geometrically: 0.7^20 of it (1.7) is left.
        for _ in 0..20 {
            c.observe_batch(8, 3.0);
        }
        assert!((c.per_patch[&8] - 3.0).abs() < 1.7 * 0.7f64.powi(20) + 1e-12);
        // The head's growth per patch: (time − fixed part) / k.
        let mut h = CostModel::new([], 0.002);
        h.observe_head(10, 0.012);
        assert!((h.head_per_patch - 0.3 * 0.001).abs() < 1e-15);
        assert!((h.head(10) - (0.002 + 10.0 * 0.3 * 0.001)).abs() < 1e-15);
    }

    #[test]
    fn prediction_carries_the_margin_and_the_head() {
        let c = model(1.0, 4.0);
        // 8 patches at 1 ms and the head at 4 ms, times 1.25.
        assert!((c.next(8, 0) - 1.25 * 0.012).abs() < 1e-12);
        assert_eq!(c.next(3, 0), f64::INFINITY, "a size never measured never fits");
    }

    #[test]
    fn stops_for_the_budget_without_passing_it_when_costs_are_as_predicted() {
        let l = limits(5000, 5000, 1, 8, 100.0 * MS);
        let mut c = model(1.0, 0.0);
        let (k, stop, end, used) = simulate(&l, &mut c, |b| b as f64 * MS);
        assert_eq!(stop, StopReason::Budget);
        assert!(end <= l.deadline, "ran to {end} s past the {} s deadline", l.deadline);
        // It stops only when not even one more patch fits, with its margin, before the
        // deadline less the slack.
        let unused = l.deadline - l.slack - end;
        assert!(unused < CostModel::MARGIN * MS, "{k} patches, {unused} s unused");
        // Near the deadline it falls back to smaller batches instead of stopping early.
        assert!(used.iter().any(|&b| b < 8), "{used:?}");
    }

    #[test]
    fn forced_patches_are_done_past_the_deadline() {
        let l = limits(5000, 100, 8, 4, 0.0);
        let (k, stop, end, used) = simulate(&l, &mut model(1.0, 0.0), |b| b as f64 * MS);
        assert_eq!((k, stop), (8, StopReason::Budget));
        assert_eq!(used, vec![4, 4]);
        assert!(end > l.deadline, "the overrun shows");
    }

    #[test]
    fn the_patch_cap_and_the_last_cell_stop_the_loop() {
        let l = limits(5000, 37, 1, 8, 1e9);
        let (k, stop, _, used) = simulate(&l, &mut model(1.0, 0.0), |b| b as f64 * MS);
        assert_eq!((k, stop), (37, StopReason::MaxPatches));
        assert_eq!(used, vec![8, 8, 8, 8, 4, 1], "whole batches, then the largest that fits the cap");
        let l = limits(20, 20, 20, 8, 0.0);
        let (k, stop, _, _) = simulate(&l, &mut model(1.0, 0.0), |b| b as f64 * MS);
        assert_eq!((k, stop), (20, StopReason::AllCells), "forced to the end, as the exhaustive estimator is");
    }

    #[test]
    fn a_slowdown_costs_at_most_one_batch_of_overrun() {
        // The model believes 1 ms per patch; the machine is suddenly three times slower.
        let l = limits(5000, 5000, 1, 8, 100.0 * MS);
        let mut c = model(1.0, 0.0);
        let (_, stop, end, _) = simulate(&l, &mut c, |b| 3.0 * b as f64 * MS);
        assert_eq!(stop, StopReason::Budget);
        assert!(end <= l.deadline + 8.0 * 3.0 * MS, "ran to {end} s");
        // And it learnt: the estimate moved most of the way from 1 ms to the true 3 ms.
        assert!(c.per_patch[&8] > 2.0 * MS, "{:?}", c.per_patch);
    }

    #[test]
    fn time_for_the_head_is_kept_free() {
        // A head that costs 40 ms takes its share of a 100 ms budget from the patches.
        let l = limits(5000, 5000, 1, 8, 100.0 * MS);
        let mut c = model(1.0, 40.0);
        let (k, _, end, _) = simulate(&l, &mut c, |b| b as f64 * MS);
        assert!(end + c.head(k) <= l.deadline, "patches end at {end} s, head {} s", c.head(k));
        let mut no_head = model(1.0, 0.0);
        let (k0, _, _, _) = simulate(&l, &mut no_head, |b| b as f64 * MS);
        assert!(k < k0, "{k} patches with the head against {k0} without");
    }
}
