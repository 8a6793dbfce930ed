//! Subcommands.

pub mod analyze;
pub mod bench;
pub mod calibrate;
pub mod demo;
pub mod probe;
pub mod run;
pub mod scene;
pub mod sweep;
#[cfg(feature = "train")]
pub mod train;
