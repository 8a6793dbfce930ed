//! Measuring the engine on labelled frames: quality metrics, sweep rows, the CSV and
//! the plot that `saccade sweep` writes.

pub mod csv;
pub mod font;
pub mod marks;
pub mod metrics;
pub mod plot;
pub mod probe;
pub mod rows;
