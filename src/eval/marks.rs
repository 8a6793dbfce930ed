//! Did attention look at the marks? With mark positions in the labels (optional
//! `defects` entries), each analysis says which labelled marks lie in a cell it examined,
//! and how much attention the cells holding marks got. Low recall here means the
//! attention network is what limits quality, not the feature network.

use crate::engine::patches::Geometry;
use crate::labels::MarkAt;

/// The row-major cell whose footprint holds frame point `(x, y)` (clamped to the grid).
pub fn cell_of(g: &Geometry, x: f64, y: f64) -> usize {
    let k = g.cell_pixels() as f64;
    let clamp = |v: f64, n: usize| ((v / k).floor().max(0.0) as usize).min(n - 1);
    clamp(y, g.rows) * g.cols + clamp(x, g.cols)
}

/// Counts over analyses of frames with known marks.
#[derive(Clone, Debug, Default)]
pub struct MarkTally {
    seen: Vec<usize>,
    total: Vec<usize>,
    mass: f64,
    frames: usize,
}

impl MarkTally {
    pub fn new(classes: usize) -> Self {
        Self { seen: vec![0; classes], total: vec![0; classes], ..Default::default() }
    }

    /// One analysis: `attention` per cell of `g`, `examined` the cells it computed
    /// features for, `marks` the frame's labelled marks (class names from `classes`).
    pub fn add(&mut self, g: &Geometry, attention: &[f64], examined: &[usize], marks: &[MarkAt], classes: &[String]) {
        if marks.is_empty() {
            return;
        }
        let mut cells: Vec<usize> = Vec::with_capacity(marks.len());
        for m in marks {
            let Some(c) = classes.iter().position(|n| *n == m.class) else { continue };
            let cell = cell_of(g, m.x, m.y);
            self.total[c] += 1;
            self.seen[c] += examined.contains(&cell) as usize;
            if !cells.contains(&cell) {
                cells.push(cell);
            }
        }
        self.mass += cells.iter().map(|&c| attention[c]).sum::<f64>();
        self.frames += 1;
    }

    /// Share of all marks whose cell was examined; `None` without marks.
    pub fn recall(&self) -> Option<f64> {
        let total: usize = self.total.iter().sum();
        (total > 0).then(|| self.seen.iter().sum::<usize>() as f64 / total as f64)
    }

    /// The same per class (`None` for a class with no labelled mark).
    pub fn recall_per_class(&self) -> Vec<Option<f64>> {
        self.seen.iter().zip(&self.total).map(|(&s, &t)| (t > 0).then(|| s as f64 / t as f64)).collect()
    }

    /// Mean over frames with marks of the attention on the cells holding them.
    pub fn mean_mass(&self) -> Option<f64> {
        (self.frames > 0).then(|| self.mass / self.frames as f64)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn marks_map_to_the_cell_that_holds_them() {
        let g = Geometry { frame_w: 100, frame_h: 60, factor: 4, stride: 2, patch: 12, rows: 7, cols: 12 };
        assert_eq!(cell_of(&g, 0.0, 0.0), 0);
        assert_eq!(cell_of(&g, 7.99, 8.0), 12);
        assert_eq!(cell_of(&g, 99.0, 59.0), 6 * 12 + 11, "the partial last row and column clamp to the grid");
    }
}
