//! The attention-sampling engine: frame in, report out.
//!
//! Build an [`Engine`] once from a loaded [`Bundle`] and checked [`Settings`], then call
//! [`Engine::analyze`] per frame. The method's building blocks (thumbnail, patches,
//! estimators, uncertainty) are public modules so that the trainer and the reference
//! checks use exactly what the engine uses.

mod analysis;
mod budget;
pub mod estimator;
mod frame;
pub mod isolate;
mod mask;
mod networks;
pub mod patches;
pub mod ranges;
mod report;
mod settings;
pub mod thumbnail;
pub mod uncertainty;

pub use analysis::{softmax, Attention, Engine, EngineError, Thumbnail, MAX_SPOTS};
pub use estimator::{CellOrder, EstimatorKind, Weights};
pub use frame::Frame;
pub use mask::{Mask, MaskConfig, MaskError, Rect};
pub use networks::{Bundle, BundleError, DryRunCosts, Network, NetworkProblem};
pub use patches::{Geometry, Normalizer};
pub use report::{PatchUse, Report, StageTimes, StopReason};
pub use settings::{Settings, SettingsError};
pub use uncertainty::{ClassResult, Decision, Outcome, Spot};
