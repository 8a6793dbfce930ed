//! The built-in demo: a synthetic sheet-inspection scene, the trained bundle that ships
//! with the program, and a designed (untrained) bundle with known behaviour for tests.

pub mod designed;
pub mod scene;
pub mod shipped;
