//! Zones of the frame to ignore, applied to the attention before it is renormalised.
//!
//! A mask is given in frame coordinates, either as a greyscale image of the frame's size
//! (black = ignore, white = keep, grey scales the attention) or as rectangles to ignore.
//! Each cell's attention is multiplied by the mean keep value over the frame pixels the
//! cell covers, so a cell half inside an ignored zone keeps half its weight.

use std::path::{Path, PathBuf};

use image::GrayImage;
use serde::{Deserialize, Serialize};

use super::patches::Geometry;

/// A rectangle `[x, x + width) × [y, y + height)` in frame pixels.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Rect {
    pub x: u32,
    pub y: u32,
    pub width: u32,
    pub height: u32,
}

#[derive(Clone, Debug, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
/// The `[mask]` table of the daemon's config.
pub struct MaskConfig {
    /// Greyscale image of the frame size: black = ignore, white = keep.
    pub image: Option<PathBuf>,
    /// Rectangles to ignore, in frame pixels.
    #[serde(default)]
    pub ignore: Vec<Rect>,
}

impl MaskConfig {
    /// The mask this describes, if any.
    pub fn load(&self) -> Result<Option<Mask>, MaskError> {
        match (&self.image, self.ignore.is_empty()) {
            (Some(_), false) => Err(MaskError::Both),
            (Some(p), true) => Mask::from_image_file(p).map(Some),
            (None, false) => Ok(Some(Mask::Ignore(self.ignore.clone()))),
            (None, true) => Ok(None),
        }
    }

    /// Checks that the mask can be read and, when the frame size is known, that it fits.
    pub fn check(&self, frame_size: Option<(u32, u32)>) -> Result<(), MaskError> {
        if let Some(p) = self.image.as_ref().filter(|p| !p.is_file()) {
            return Err(MaskError::ImageMissing(p.clone()));
        }
        match (self.load()?, frame_size) {
            (Some(mask), Some((w, h))) => mask.check(w, h),
            _ => Ok(()),
        }
    }
}

/// Why a mask cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum MaskError {
    #[error("image = {0:?}: file not found")]
    ImageMissing(PathBuf),
    #[error("{}: cannot read the mask image: {source}", path.display())]
    Read { path: PathBuf, source: image::ImageError },
    #[error("give either image or ignore, not both")]
    Both,
    #[error("mask image is {width}×{height}, expected the frame size {frame_w}×{frame_h}")]
    ImageSize { width: u32, height: u32, frame_w: u32, frame_h: u32 },
    #[error("mask image is black everywhere: it would ignore the whole frame")]
    AllBlack,
    #[error("ignore rectangle {n} (x={}, y={}, width={}, height={}) is empty or reaches outside the {frame_w}×{frame_h} frame", rect.x, rect.y, rect.width, rect.height)]
    Rect { n: usize, rect: Rect, frame_w: u32, frame_h: u32 },
    #[error("the mask leaves no attention on this frame")]
    NothingLeft,
}

impl MaskError {
    /// The `[mask]` key the error is about.
    pub fn field(&self) -> &'static str {
        match self {
            Self::ImageMissing(_) | Self::Read { .. } | Self::ImageSize { .. } | Self::AllBlack => "image",
            Self::Both | Self::Rect { .. } | Self::NothingLeft => "ignore",
        }
    }
}

#[derive(Clone, Debug)]
pub enum Mask {
    Image(GrayImage),
    Ignore(Vec<Rect>),
}

impl Mask {
    /// Reads a greyscale (or colour, converted) mask image.
    pub fn from_image_file(path: &Path) -> Result<Self, MaskError> {
        let img = image::open(path).map_err(|source| MaskError::Read { path: path.to_path_buf(), source })?;
        Ok(Mask::Image(img.into_luma8()))
    }

    /// Checks the mask against a frame size and that it leaves something to look at.
    pub fn check(&self, frame_w: u32, frame_h: u32) -> Result<(), MaskError> {
        match self {
            Mask::Image(img) => {
                if img.dimensions() != (frame_w, frame_h) {
                    let (width, height) = img.dimensions();
                    return Err(MaskError::ImageSize { width, height, frame_w, frame_h });
                }
                if img.as_raw().iter().all(|&v| v == 0) {
                    return Err(MaskError::AllBlack);
                }
            }
            Mask::Ignore(rects) => {
                for (n, r) in rects.iter().enumerate() {
                    if r.width == 0
                        || r.height == 0
                        || r.x as u64 + r.width as u64 > frame_w as u64
                        || r.y as u64 + r.height as u64 > frame_h as u64
                    {
                        return Err(MaskError::Rect { n: n + 1, rect: *r, frame_w, frame_h });
                    }
                }
            }
        }
        Ok(())
    }

    /// Keep factor in [0, 1] per cell of `g`.
    pub fn cell_factors(&self, g: &Geometry) -> Vec<f64> {
        (0..g.cells())
            .map(|i| {
                let (x0, y0, x1, y1) = g.footprint(i);
                let area = ((x1 - x0) * (y1 - y0)) as f64;
                if area == 0.0 {
                    return 0.0;
                }
                match self {
                    Mask::Image(img) => {
                        let mut sum = 0u64;
                        for y in y0..y1 {
                            let row = &img.as_raw()[(y * img.width()) as usize..];
                            sum += row[x0 as usize..x1 as usize].iter().map(|&v| v as u64).sum::<u64>();
                        }
                        sum as f64 / (255.0 * area)
                    }
                    Mask::Ignore(rects) => {
                        let mut kept = 0u64;
                        for y in y0..y1 {
                            for x in x0..x1 {
                                let hidden = rects
                                    .iter()
                                    .any(|r| x >= r.x && x < r.x + r.width && y >= r.y && y < r.y + r.height);
                                kept += u64::from(!hidden);
                            }
                        }
                        kept as f64 / area
                    }
                }
            })
            .collect()
    }
}

/// Multiplies attention by the mask factors and renormalises; `None` when nothing is left.
pub fn apply(attention: &mut [f64], factors: &[f64]) -> Option<()> {
    for (a, f) in attention.iter_mut().zip(factors) {
        *a *= f;
    }
    let total: f64 = attention.iter().sum();
    if total.is_nan() || total <= 0.0 {
        return None;
    }
    attention.iter_mut().for_each(|a| *a /= total);
    Some(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn geom() -> Geometry {
        Geometry { frame_w: 16, frame_h: 8, factor: 2, stride: 2, patch: 4, rows: 2, cols: 4 }
    }

    #[test]
    fn rectangles_scale_cells_by_uncovered_fraction() {
        // Cell 0 covers x 0..4, y 0..4; hide its left half.
        let m = Mask::Ignore(vec![Rect { x: 0, y: 0, width: 2, height: 4 }]);
        m.check(16, 8).unwrap();
        let f = m.cell_factors(&geom());
        assert_eq!(f[0], 0.5);
        assert!(f[1..].iter().all(|&v| v == 1.0));
        let mut a = vec![0.125; 8];
        apply(&mut a, &f).unwrap();
        assert!((a.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!((a[0] - 0.0625 / 0.9375).abs() < 1e-12);
    }

    #[test]
    fn image_mask_and_checks() {
        let mut img = GrayImage::from_pixel(16, 8, image::Luma([255]));
        for y in 4..8 {
            for x in 12..16 {
                img.put_pixel(x, y, image::Luma([0]));
            }
        }
        let m = Mask::Image(img);
        m.check(16, 8).unwrap();
        assert!(m.check(17, 8).is_err());
        assert_eq!(m.cell_factors(&geom())[7], 0.0);
        let outside = Mask::Ignore(vec![Rect { x: 10, y: 0, width: 7, height: 2 }]);
        assert!(outside.check(16, 8).unwrap_err().to_string().contains("outside"));
        let mut a = vec![0.0, 1.0];
        assert!(apply(&mut a, &[1.0, 0.0]).is_none());
    }
}
