//! One sweep row from the analyses it collected: quality against the labels, coverage
//! of the stated intervals against the exhaustive answer, cost and deadline misses.
//!
//! Analyses over several seeds are pooled: each (frame, seed) is one more row of the
//! truth and prediction matrices, so F1 and ECE are over every analysis, not a mean of
//! per-seed scores.

use serde::Serialize;

use super::marks::MarkTally;
use super::metrics;
use crate::engine::{EstimatorKind, Outcome, Report};
use crate::labels::MarkAt;
use crate::sinks::record::Percentiles;

/// What a row measures.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum RowKind {
    /// The engine under one time budget.
    Budget,
    /// Every cell at full resolution (the dense answer; ignores the budget).
    Exhaustive,
    /// The bundle's baseline network on the thumbnail alone.
    ThumbnailOnly,
}

impl RowKind {
    pub fn name(&self) -> &'static str {
        match self {
            Self::Budget => "budget",
            Self::Exhaustive => "exhaustive",
            Self::ThumbnailOnly => "thumbnail-only",
        }
    }
}

#[derive(Clone, Debug, Serialize)]
pub struct Row {
    pub row: RowKind,
    /// The budget of a `budget` row.
    pub budget_ms: Option<f64>,
    /// Estimator of the engine rows; none for thumbnail-only.
    pub estimator: Option<EstimatorKind>,
    /// Analyses pooled (frames × seeds).
    pub analyses: usize,
    pub macro_f1: f64,
    pub per_class_f1: Vec<f64>,
    pub ece: f64,
    /// Share of (analysis, class) whose interval holds the exhaustive probability.
    pub coverage: Option<f64>,
    pub mean_patches: Option<f64>,
    /// Analysis time percentiles (nearest rank): the budgeted part, thumbnail to head, for
    /// engine rows; thumbnail plus network for thumbnail-only.
    pub p50_ms: f64,
    pub p99_ms: f64,
    /// Analyses whose budgeted part ran past the budget (budget rows only).
    pub deadline_misses: Option<usize>,
    pub deadline_miss_pct: Option<f64>,
    /// (analysis, class) pairs whose outcome was `review` (engine rows).
    pub reviews: Option<usize>,
    /// Outcomes against the labels (engine rows): the share of (frame, class) that carry
    /// the class and were called `clear`, of those without it called `detected`, and of
    /// frames with at least one class to `review` (sent to a person), pooled over classes.
    pub outcomes: Option<OutcomeRates>,
    /// Share of labelled marks whose cell was examined (engine rows, labels with positions).
    pub mark_recall: Option<f64>,
    /// The same per class, in the bundle's order.
    pub mark_recall_per_class: Vec<Option<f64>>,
    /// Mean attention on the cells holding a frame's marks.
    pub mark_attention: Option<f64>,
}

/// What the three-way outcome achieved on labelled frames.
#[derive(Clone, Debug, Default, Serialize)]
pub struct OutcomeRates {
    /// Called `clear` among (frame, class) that carry the class; None without any.
    pub miss_rate: Option<f64>,
    /// Called `detected` among (frame, class) without the class.
    pub false_alarm_rate: Option<f64>,
    /// Frames with at least one class called `review`.
    pub review_share: f64,
    /// The first two per class, in the bundle's order.
    pub per_class_miss: Vec<Option<f64>>,
    pub per_class_false_alarm: Vec<Option<f64>>,
}

impl OutcomeRates {
    /// From outcomes and labels, frames × classes.
    pub fn of(outcomes: &[Vec<Outcome>], truth: &[Vec<bool>]) -> Self {
        let classes = truth.first().map_or(0, Vec::len);
        let rate = |hit: usize, n: usize| (n > 0).then(|| hit as f64 / n as f64);
        let mut per = vec![(0usize, 0usize, 0usize, 0usize); classes]; // (missed, positives, alarms, negatives)
        for (o, t) in outcomes.iter().zip(truth) {
            for (c, (o, &t)) in o.iter().zip(t).enumerate() {
                if t {
                    per[c].1 += 1;
                    per[c].0 += (*o == Outcome::Clear) as usize;
                } else {
                    per[c].3 += 1;
                    per[c].2 += (*o == Outcome::Detected) as usize;
                }
            }
        }
        let sum = |f: fn(&(usize, usize, usize, usize)) -> usize| per.iter().map(f).sum::<usize>();
        let reviewed = outcomes.iter().filter(|o| o.contains(&Outcome::Review)).count();
        Self {
            miss_rate: rate(sum(|p| p.0), sum(|p| p.1)),
            false_alarm_rate: rate(sum(|p| p.2), sum(|p| p.3)),
            review_share: reviewed as f64 / outcomes.len().max(1) as f64,
            per_class_miss: per.iter().map(|p| rate(p.0, p.1)).collect(),
            per_class_false_alarm: per.iter().map(|p| rate(p.2, p.3)).collect(),
        }
    }
}

/// Collects the analyses of one row.
#[derive(Default)]
pub struct Tally {
    truth: Vec<Vec<bool>>,
    probs: Vec<Vec<f64>>,
    intervals: Vec<Vec<[f64; 2]>>,
    reference: Vec<Vec<f64>>,
    patches: usize,
    times_ms: Vec<f64>,
    misses: usize,
    reviews: usize,
    outcomes: Vec<Vec<Outcome>>,
    marks: Option<MarkTally>,
}

impl Tally {
    /// One engine analysis of a frame labelled `truth`; `reference` is the exhaustive
    /// probability of each class on the same frame.
    pub fn add_report(&mut self, r: &Report, truth: &[bool], reference: &[f64]) {
        self.truth.push(truth.to_vec());
        self.probs.push(r.classes.iter().map(|c| c.probability).collect());
        self.intervals.push(r.classes.iter().map(|c| c.interval).collect());
        self.reference.push(reference.to_vec());
        self.patches += r.patch_count;
        self.times_ms.push(r.times_ms.total);
        self.misses += !r.budget_met as usize;
        self.reviews += r.classes.iter().filter(|c| c.outcome == Outcome::Review).count();
        self.outcomes.push(r.classes.iter().map(|c| c.outcome).collect());
    }

    /// Where the analysis `r` looked against the frame's labelled `marks`.
    pub fn add_marks(&mut self, r: &Report, marks: &[MarkAt]) {
        let g = &r.geometry;
        let names: Vec<String> = r.classes.iter().map(|c| c.name.clone()).collect();
        let examined: Vec<usize> = r.patches.iter().map(|p| p.row * g.cols + p.col).collect();
        self.marks.get_or_insert_with(|| MarkTally::new(names.len())).add(g, &r.attention, &examined, marks, &names);
    }

    /// One thumbnail-only answer, with the time it took.
    pub fn add_probabilities(&mut self, probs: &[f64], truth: &[bool], ms: f64) {
        self.truth.push(truth.to_vec());
        self.probs.push(probs.to_vec());
        self.times_ms.push(ms);
    }

    pub fn len(&self) -> usize {
        self.truth.len()
    }

    pub fn is_empty(&self) -> bool {
        self.truth.is_empty()
    }

    /// The row: predictions are `probability >= threshold` per class; ECE over `bins`
    /// equal-width bins.
    pub fn finish(
        mut self,
        row: RowKind,
        budget_ms: Option<f64>,
        estimator: Option<EstimatorKind>,
        thresholds: &[f64],
        bins: usize,
    ) -> Row {
        let n = self.truth.len();
        let f = metrics::f1(&self.truth, &metrics::predict(&self.probs, thresholds));
        let engine = row != RowKind::ThumbnailOnly;
        let pct = Percentiles::of(&mut self.times_ms);
        Row {
            row,
            budget_ms,
            estimator,
            analyses: n,
            macro_f1: f.macro_f1,
            per_class_f1: f.per_class,
            ece: metrics::ece(&self.probs, &self.truth, bins),
            coverage: engine.then(|| metrics::coverage(&self.intervals, &self.reference)),
            mean_patches: engine.then(|| self.patches as f64 / n.max(1) as f64),
            p50_ms: pct.p50,
            p99_ms: pct.p99,
            deadline_misses: (row == RowKind::Budget).then_some(self.misses),
            deadline_miss_pct: (row == RowKind::Budget).then(|| 100.0 * self.misses as f64 / n.max(1) as f64),
            reviews: engine.then_some(self.reviews),
            outcomes: engine.then(|| OutcomeRates::of(&self.outcomes, &self.truth)),
            mark_recall: self.marks.as_ref().and_then(MarkTally::recall),
            mark_recall_per_class: self.marks.as_ref().map(MarkTally::recall_per_class).unwrap_or_default(),
            mark_attention: self.marks.as_ref().and_then(MarkTally::mean_mass),
        }
    }
}

/// Budget rows whose macro F1 is within `tolerance_points` F1 points (hundredths) of the
/// exhaustive row's, smallest budget first (none without an exhaustive row).
pub fn within_tolerance(rows: &[Row], tolerance_points: f64) -> Vec<&Row> {
    let Some(exhaustive) = rows.iter().find(|r| r.row == RowKind::Exhaustive) else { return Vec::new() };
    let floor = exhaustive.macro_f1 - tolerance_points / 100.0;
    let mut v: Vec<&Row> = rows.iter().filter(|r| r.row == RowKind::Budget && r.macro_f1 >= floor - 1e-12).collect();
    v.sort_by(|a, b| a.budget_ms.unwrap_or(f64::INFINITY).total_cmp(&b.budget_ms.unwrap_or(f64::INFINITY)));
    v
}

/// The recommended budget: the smallest within tolerance that also held its deadline in
/// all but at most `max_miss_pct` % of analyses. A budget that is mostly overrun (where
/// `min_patches` alone takes longer) would be met by nothing the daemon does and would
/// count every frame as an overrun.
pub fn recommend(rows: &[Row], tolerance_points: f64, max_miss_pct: f64) -> Option<&Row> {
    within_tolerance(rows, tolerance_points).into_iter().find(|r| r.deadline_miss_pct.unwrap_or(0.0) <= max_miss_pct)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn row(kind: RowKind, budget: Option<f64>, f1: f64) -> Row {
        Row {
            row: kind,
            budget_ms: budget,
            estimator: None,
            analyses: 1,
            macro_f1: f1,
            per_class_f1: vec![f1],
            ece: 0.0,
            coverage: None,
            mean_patches: None,
            p50_ms: 0.0,
            p99_ms: 0.0,
            deadline_misses: None,
            deadline_miss_pct: None,
            reviews: None,
            outcomes: None,
            mark_recall: None,
            mark_recall_per_class: Vec::new(),
            mark_attention: None,
        }
    }

    #[test]
    fn recommends_the_smallest_budget_within_tolerance() {
        let rows = vec![
            row(RowKind::Budget, Some(100.0), 0.80),
            row(RowKind::Budget, Some(25.0), 0.60),
            row(RowKind::Budget, Some(50.0), 0.785),
            row(RowKind::Exhaustive, None, 0.80),
        ];
        assert_eq!(recommend(&rows, 2.0, 5.0).unwrap().budget_ms, Some(50.0));
        assert_eq!(recommend(&rows, 1.0, 5.0).unwrap().budget_ms, Some(100.0));
        assert_eq!(
            within_tolerance(&rows, 30.0).iter().map(|r| r.budget_ms.unwrap()).collect::<Vec<_>>(),
            vec![25.0, 50.0, 100.0]
        );
        assert_eq!(recommend(&rows[..3], 2.0, 5.0).map(|r| r.budget_ms), None, "no exhaustive row, no recommendation");
        let low = [row(RowKind::Budget, Some(25.0), 0.5), row(RowKind::Exhaustive, None, 0.8)];
        assert!(recommend(&low, 2.0, 5.0).is_none());
        // A budget that is mostly overrun is passed over for the next one.
        let mut rows = rows;
        rows[2].deadline_miss_pct = Some(40.0);
        assert_eq!(recommend(&rows, 2.0, 5.0).unwrap().budget_ms, Some(100.0));
        assert_eq!(recommend(&rows, 2.0, 50.0).unwrap().budget_ms, Some(50.0));
    }
}
