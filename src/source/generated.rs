//! The source of generated frames: the demo scene's sheet frames at a steady rate.

use std::time::{Duration, Instant};

use super::feed::Feed;
use crate::demo::scene;
use crate::engine::Frame;

pub struct GeneratedSource {
    pub width: u32,
    pub height: u32,
    pub fps: f64,
    pub seed: u64,
    /// 0 for no end.
    pub count: u64,
}

impl GeneratedSource {
    pub fn run(self, feed: Feed) {
        let period = Duration::from_secs_f64(1.0 / self.fps);
        let mut next = Instant::now();
        for seq in 0.. {
            if self.count > 0 && seq >= self.count {
                return;
            }
            if !feed.sleep(next.saturating_duration_since(Instant::now())) {
                return;
            }
            next += period;
            let generated = scene::generate(self.width, self.height, self.seed.wrapping_add(seq));
            if !feed.send(Ok(Frame::new(seq, format!("scene:{}", self.seed.wrapping_add(seq)), generated.image))) {
                return;
            }
        }
    }
}
