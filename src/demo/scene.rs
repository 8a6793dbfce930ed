//! Synthetic frames of the demo scenario: a camera over a moving web of woven sheet
//! material under uneven light, with small flaws placed at known positions.
//! Everything is drawn from a seed, so the same seed gives the same bytes.

use image::{Rgb, RgbImage};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde::Serialize;

/// Kinds of flaw the demo places.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum FlawKind {
    /// A dark, round spot (a burn or a stain).
    DarkSpot,
    /// A bright, round spot (a hole letting backlight through).
    BrightSpot,
}

impl FlawKind {
    pub fn class_name(&self) -> &'static str {
        match self {
            FlawKind::DarkSpot => "dark_spot",
            FlawKind::BrightSpot => "bright_spot",
        }
    }
}

#[derive(Clone, Debug, Serialize)]
pub struct Flaw {
    pub kind: FlawKind,
    pub x: f64,
    pub y: f64,
    pub radius: f64,
}

/// One generated frame and what was placed in it.
pub struct SceneFrame {
    pub image: RgbImage,
    pub flaws: Vec<Flaw>,
}

/// Draws a frame of `width × height` from `seed` with up to `max_flaws` flaws.
pub fn generate(width: u32, height: u32, seed: u64, max_flaws: usize) -> SceneFrame {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0f32, 3.0).expect("valid sigma");
    // Weave period and lighting vary a little from frame to frame.
    let period = rng.random_range(5.0f32..7.0);
    let (gx, gy) = (rng.random_range(-0.015f32..0.015), rng.random_range(-0.015f32..0.015));
    let tint = [rng.random_range(0.95f32..1.05), 1.0, rng.random_range(0.9f32..1.0)];
    let mut image = RgbImage::new(width, height);
    let k = std::f32::consts::TAU / period;
    for (x, y, px) in image.enumerate_pixels_mut() {
        let (xf, yf) = (x as f32, y as f32);
        let weave = 10.0 * (k * xf).sin() * (k * yf).cos();
        let light = 150.0 + gx * xf + gy * yf;
        let v = light + weave + noise.sample(&mut rng);
        *px = Rgb(std::array::from_fn(|c| (v * tint[c]).clamp(0.0, 255.0) as u8));
    }
    let count = rng.random_range(0..=max_flaws);
    let mut flaws = Vec::with_capacity(count);
    for _ in 0..count {
        let kind = if rng.random_bool(0.5) { FlawKind::DarkSpot } else { FlawKind::BrightSpot };
        let radius = rng.random_range(2.5..10.0);
        let margin = radius + 2.0;
        let flaw = Flaw { kind, x: rng.random_range(margin..width as f64 - margin), y: rng.random_range(margin..height as f64 - margin), radius };
        paint(&mut image, &flaw);
        flaws.push(flaw);
    }
    SceneFrame { image, flaws }
}

/// Paints a soft-edged disc that moves pixels towards black or white.
fn paint(image: &mut RgbImage, f: &Flaw) {
    let target = match f.kind {
        FlawKind::DarkSpot => 35.0,
        FlawKind::BrightSpot => 250.0,
    };
    let r = f.radius + 1.5;
    let (x0, x1) = ((f.x - r).floor().max(0.0) as u32, ((f.x + r).ceil() as u32).min(image.width() - 1));
    let (y0, y1) = ((f.y - r).floor().max(0.0) as u32, ((f.y + r).ceil() as u32).min(image.height() - 1));
    for y in y0..=y1 {
        for x in x0..=x1 {
            let d = ((x as f64 - f.x).powi(2) + (y as f64 - f.y).powi(2)).sqrt();
            let cover = (f.radius + 0.5 - d).clamp(0.0, 1.0) as f32;
            if cover > 0.0 {
                let px = image.get_pixel_mut(x, y);
                for c in px.0.iter_mut() {
                    *c = (*c as f32 + (target - *c as f32) * cover) as u8;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_bytes() {
        let a = generate(200, 120, 7, 3);
        let b = generate(200, 120, 7, 3);
        assert_eq!(a.image.as_raw(), b.image.as_raw());
        assert_ne!(a.image.as_raw(), generate(200, 120, 8, 3).image.as_raw());
    }

    #[test]
    fn flaws_change_the_pixels_they_cover() {
        let plain_seed = (0..100).find(|&s| generate(300, 200, s, 3).flaws.len() == 3).unwrap();
        let f = generate(300, 200, plain_seed, 3);
        for flaw in &f.flaws {
            let v = f.image.get_pixel(flaw.x as u32, flaw.y as u32)[1];
            match flaw.kind {
                FlawKind::DarkSpot => assert!(v < 80, "dark spot centre is {v}"),
                FlawKind::BrightSpot => assert!(v > 220, "bright spot centre is {v}"),
            }
        }
    }
}
