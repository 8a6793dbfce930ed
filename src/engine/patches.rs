//! Cells of the attention map, the full-resolution patches they name, and writing
//! normalised pixels straight into the networks' input tensors.

use image::RgbImage;

use crate::bundle::Normalization;

/// Maps attention cells to frame coordinates for one frame size.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Geometry {
    pub frame_w: u32,
    pub frame_h: u32,
    /// Frame pixels per thumbnail pixel.
    pub factor: u32,
    /// Thumbnail pixels per cell.
    pub stride: u32,
    /// Patch side in frame pixels.
    pub patch: u32,
    pub rows: usize,
    pub cols: usize,
}

impl Geometry {
    pub fn cells(&self) -> usize {
        self.rows * self.cols
    }

    /// Frame pixels per cell along each axis.
    pub fn cell_pixels(&self) -> u32 {
        self.factor * self.stride
    }

    /// Centre of cell `i` (row-major) in frame coordinates.
    pub fn centre(&self, i: usize) -> (f64, f64) {
        let (r, c) = (i / self.cols, i % self.cols);
        let k = self.cell_pixels() as f64;
        ((c as f64 + 0.5) * k, (r as f64 + 0.5) * k)
    }

    /// Top-left corner of cell `i`'s patch; it may lie outside the frame.
    pub fn patch_origin(&self, i: usize) -> (i64, i64) {
        let (cx, cy) = self.centre(i);
        let half = self.patch as f64 / 2.0;
        ((cx - half).round() as i64, (cy - half).round() as i64)
    }

    /// The frame rectangle `[x0, x1) × [y0, y1)` that cell `i` covers, clipped to the frame.
    pub fn footprint(&self, i: usize) -> (u32, u32, u32, u32) {
        let (r, c) = ((i / self.cols) as u32, (i % self.cols) as u32);
        let k = self.cell_pixels();
        let x0 = (c * k).min(self.frame_w);
        let y0 = (r * k).min(self.frame_h);
        (x0, y0, (x0 + k).min(self.frame_w), (y0 + k).min(self.frame_h))
    }
}

/// Lookup tables from 8-bit channel values to the networks' normalised inputs.
#[derive(Clone)]
pub struct Normalizer {
    lut: [[f32; 256]; 3],
}

impl Normalizer {
    pub fn new(n: &Normalization) -> Self {
        let mut lut = [[0f32; 256]; 3];
        for (c, table) in lut.iter_mut().enumerate() {
            for (v, out) in table.iter_mut().enumerate() {
                *out = (v as f32 / 255.0 - n.mean[c]) / n.std[c];
            }
        }
        Self { lut }
    }

    /// Writes an RGB8 image as planar normalised floats (`[3, H, W]`) into `dst`.
    pub fn write_planar(&self, img: &RgbImage, dst: &mut [f32]) {
        let plane = (img.width() * img.height()) as usize;
        assert_eq!(dst.len(), 3 * plane, "destination must hold 3 planes");
        for (j, px) in img.as_raw().chunks_exact(3).enumerate() {
            for c in 0..3 {
                dst[c * plane + j] = self.lut[c][px[c] as usize];
            }
        }
    }

    /// Writes the `p × p` patch at `origin` as planar normalised floats (`[3, p, p]`) into
    /// `dst`. Pixels outside the frame become 0, the normalised mean colour.
    pub fn write_patch(&self, frame: &RgbImage, origin: (i64, i64), p: usize, dst: &mut [f32]) {
        assert_eq!(dst.len(), 3 * p * p, "destination must hold one patch");
        let (w, h) = (frame.width() as i64, frame.height() as i64);
        let raw = frame.as_raw();
        let (ox, oy) = origin;
        // Columns of the patch that fall inside the frame.
        let cx0 = (-ox).clamp(0, p as i64) as usize;
        let cx1 = (w - ox).clamp(0, p as i64) as usize;
        let (r, rest) = dst.split_at_mut(p * p);
        let (g, b) = rest.split_at_mut(p * p);
        for py in 0..p {
            let row = py * p;
            let fy = oy + py as i64;
            if fy < 0 || fy >= h || cx0 >= cx1 {
                r[row..row + p].fill(0.0);
                g[row..row + p].fill(0.0);
                b[row..row + p].fill(0.0);
                continue;
            }
            for plane in [&mut *r, &mut *g, &mut *b] {
                plane[row..row + cx0].fill(0.0);
                plane[row + cx1..row + p].fill(0.0);
            }
            let start = ((fy * w + ox + cx0 as i64) * 3) as usize;
            let src = &raw[start..start + (cx1 - cx0) * 3];
            for (k, px) in src.chunks_exact(3).enumerate() {
                let at = row + cx0 + k;
                r[at] = self.lut[0][px[0] as usize];
                g[at] = self.lut[1][px[1] as usize];
                b[at] = self.lut[2][px[2] as usize];
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn norm() -> Normalizer {
        Normalizer::new(&Normalization { mean: [0.5; 3], std: [0.5; 3] })
    }

    #[test]
    fn patch_outside_frame_is_zero_and_inside_is_normalised() {
        let mut img = RgbImage::new(4, 3);
        for p in img.pixels_mut() {
            *p = image::Rgb([255, 0, 255]);
        }
        let p = 4;
        let mut dst = vec![9.0; 3 * p * p];
        // Origin (-2, 1): columns 0,1 and the last row fall outside.
        norm().write_patch(&img, (-2, 1), p, &mut dst);
        for py in 0..p {
            for px in 0..p {
                let inside = px >= 2 && py < 2;
                let (r, g) = (dst[py * p + px], dst[p * p + py * p + px]);
                if inside {
                    assert_eq!((r, g), (1.0, -1.0), "pixel ({px},{py})");
                } else {
                    assert_eq!((r, g), (0.0, 0.0), "pixel ({px},{py})");
                }
            }
        }
    }

    #[test]
    fn geometry_maps_cells_to_frame() {
        let g = Geometry { frame_w: 100, frame_h: 60, factor: 4, stride: 2, patch: 10, rows: 8, cols: 13 };
        assert_eq!(g.centre(0), (4.0, 4.0));
        assert_eq!(g.patch_origin(14), (7, 7)); // row 1, col 1: centre (12, 12)
        assert_eq!(g.footprint(12), (96, 0, 100, 8)); // last column is clipped
    }
}
