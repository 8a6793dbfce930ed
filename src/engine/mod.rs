//! The attention-sampling engine: frame in, report out.

pub mod analysis;
pub mod bundle;
pub mod estimator;
pub mod mask;
pub mod patches;
pub mod thumbnail;
pub mod uncertainty;

pub use analysis::{Engine, EngineError, Report, Settings, StopReason};
pub use bundle::{Bundle, BundleError, Manifest};
pub use estimator::EstimatorKind;
pub use mask::{Mask, Rect};
pub use uncertainty::Outcome;
