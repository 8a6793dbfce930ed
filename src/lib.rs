//! saccade: attention sampling over high-resolution frames on small CPUs.
//!
//! Data flows source → engine → sinks: [`source`] turns files and cameras into
//! [`source::Frame`]s, [`engine`] analyses a frame within a time budget and returns a
//! [`engine::Report`], and the command layer writes reports out.

pub mod config;
pub mod demo;
pub mod engine;
pub mod eval;
pub mod labels;
pub mod onnx;
pub mod service;
pub mod sinks;
pub mod source;
#[cfg(feature = "train")]
pub mod train;
