//! The built-in demo: a synthetic sheet-inspection scene and a designed bundle.

pub mod designed;
pub mod scene;
