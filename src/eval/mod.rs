//! Measuring the engine on labelled frames: quality metrics, sweep rows, the CSV and
//! the plot that `saccade sweep` writes.

pub mod csv;
/// The stroke font lives at the bottom layer, shared with the evidence images.
pub use crate::font;
pub mod marks;
pub mod metrics;
pub mod plot;
pub mod probe;
pub mod rows;
