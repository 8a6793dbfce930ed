//! saccade: attention sampling over high-resolution frames on small CPUs.
//!
//! Data flows source → engine → sinks, and imports follow it one way: [`source`] turns
//! files and cameras into [`engine::Frame`]s, [`engine`] analyses a frame within a time
//! budget and returns an [`engine::Report`], and [`sinks`] write reports out. [`config`]
//! gathers the tables that source, engine and sinks own into one file; [`service`] runs
//! them as a daemon. [`bundle`] is the model bundle's format, shared by the engine that
//! loads bundles and the tools that write them; [`bundle::calibration`] is the bundle's optional
//! calibration file (probability maps and risk-controlled outcome thresholds).

pub mod bundle;
pub mod config;
pub mod demo;
pub mod engine;
pub mod eval;
pub mod folders;
pub mod font;
pub mod labels;
pub mod onnx;
pub mod service;
pub mod sinks;
pub mod source;
#[cfg(feature = "train")]
pub mod train;
