//! Where frames come from.

pub mod decode;
pub mod frame;

pub use decode::{decode_bytes, decode_file, DecodeError, DEFAULT_MAX_PIXELS};
pub use frame::Frame;
