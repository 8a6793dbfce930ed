//! Subcommands.

pub mod analyze;
pub mod bench;
pub mod demo;
pub mod run;
pub mod sweep;
pub mod scene;
#[cfg(feature = "train")]
pub mod train;
