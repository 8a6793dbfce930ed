//! Writing ONNX files (reading is tract's job).

pub mod writer;
