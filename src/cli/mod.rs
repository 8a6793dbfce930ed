//! Subcommands.

pub mod analyze;
pub mod bench;
pub mod demo;
