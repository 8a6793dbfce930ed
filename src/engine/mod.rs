//! The attention-sampling engine: frame in, report out.

pub mod analysis;
pub mod estimator;
pub mod frame;
pub mod mask;
pub mod networks;
pub mod patches;
pub mod thumbnail;
pub mod uncertainty;

pub use analysis::{Engine, EngineError, Report, Settings, StopReason};
pub use estimator::EstimatorKind;
pub use frame::Frame;
pub use mask::{Mask, MaskConfig, Rect};
pub use networks::{Bundle, BundleError};
pub use uncertainty::Outcome;
