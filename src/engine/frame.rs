//! The unit of work that flows from a source to the engine.

use std::time::SystemTime;

use image::RgbImage;

/// One owned RGB8 frame with where and when it was taken.
#[derive(Clone, Debug)]
pub struct Frame {
    /// Increases by one per frame a source emits (gaps mean dropped frames).
    pub seq: u64,
    pub captured: SystemTime,
    /// Where the frame came from (file path, device), for records and errors.
    pub origin: String,
    pub image: RgbImage,
}

impl Frame {
    pub fn new(seq: u64, origin: impl Into<String>, image: RgbImage) -> Self {
        Self { seq, captured: SystemTime::now(), origin: origin.into(), image }
    }

    pub fn width(&self) -> u32 {
        self.image.width()
    }

    pub fn height(&self) -> u32 {
        self.image.height()
    }
}
