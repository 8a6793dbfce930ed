//! Subcommands.

pub mod analyze;
pub mod bench;
pub mod demo;
pub mod run;
pub mod sweep;
