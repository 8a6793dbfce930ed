//! Training frames in memory: full-resolution pixels for patches, thumbnails made exactly
//! as the engine makes them, frame-level targets, and the augmentations a camera's own
//! frames can take without new labels (the eight flips and quarter turns, brightness and
//! contrast).

use std::path::Path;

use image::RgbImage;
use rand::Rng;
use rand_chacha::ChaCha8Rng;

use super::nn::Act;
use crate::bundle::Normalization;
use crate::engine::patches::Geometry;
use crate::engine::thumbnail::area_reduce;
use crate::labels::{class_matrix, Labelled, MarkAt};
use crate::source::decode_file;

/// Shape parameters shared by every frame of a training set.
#[derive(Clone, Copy, Debug)]
pub struct Shape {
    pub factor: u32,
    pub stride: u32,
    pub patch: u32,
}

pub struct Sample {
    pub name: String,
    pub image: RgbImage,
    /// Thumbnail cut to whole cells, `[th, tw, 3]` bytes, row-major.
    pub thumb: Vec<u8>,
    pub target: Vec<f32>,
    /// Labelled mark positions, when the labels give them (diagnostics only).
    pub marks: Vec<MarkAt>,
}

pub struct Dataset {
    pub samples: Vec<Sample>,
    pub geometry: Geometry,
    /// Thumbnail height and width cut to whole cells.
    pub thumb_hw: (usize, usize),
    pub norm: Normalization,
}

/// How one frame is shown in one step: one of the eight symmetries of the square grid,
/// and a brightness/contrast change folded into the byte → input lookup table.
#[derive(Clone)]
pub struct View {
    /// Bit 0 mirrors x, bit 1 mirrors y, bit 2 transposes (applied first).
    pub dihedral: u8,
    lut: [[f32; 256]; 3],
}

/// Augmentation ranges; [`Augment::NONE`] shows frames as they are.
#[derive(Clone, Copy, Debug)]
pub struct Augment {
    pub flips: bool,
    /// Contrast gain drawn from `[1 - g, 1 + g]`.
    pub gain: f32,
    /// Brightness offset in grey levels drawn from `[-o, o]`.
    pub offset: f32,
}

impl Augment {
    pub const NONE: Augment = Augment { flips: false, gain: 0.0, offset: 0.0 };
}

impl View {
    pub fn plain(norm: &Normalization) -> Self {
        Self::new(norm, 0, 1.0, 0.0)
    }

    pub fn draw(norm: &Normalization, a: &Augment, rng: &mut ChaCha8Rng) -> Self {
        let dihedral = if a.flips { rng.random_range(0..8u8) } else { 0 };
        let gain = if a.gain > 0.0 { rng.random_range(1.0 - a.gain..1.0 + a.gain) } else { 1.0 };
        let offset = if a.offset > 0.0 { rng.random_range(-a.offset..a.offset) } else { 0.0 };
        Self::new(norm, dihedral, gain, offset)
    }

    fn new(norm: &Normalization, dihedral: u8, gain: f32, offset: f32) -> Self {
        let mut lut = [[0f32; 256]; 3];
        for (c, table) in lut.iter_mut().enumerate() {
            for (v, out) in table.iter_mut().enumerate() {
                let level = (gain * v as f32 + offset).clamp(0.0, 255.0);
                *out = (level / 255.0 - norm.mean[c]) / norm.std[c];
            }
        }
        Self { dihedral, lut }
    }

    fn transposed(&self) -> bool {
        self.dihedral & 4 != 0
    }

    /// Size of an `h × w` grid after this view's symmetry.
    pub fn shape(&self, h: usize, w: usize) -> (usize, usize) {
        if self.transposed() {
            (w, h)
        } else {
            (h, w)
        }
    }

    /// The source position of `(y, x)` in the viewed `h × w` grid (sizes after the view).
    pub fn source(&self, y: usize, x: usize, h: usize, w: usize) -> (usize, usize) {
        let y = if self.dihedral & 2 != 0 { h - 1 - y } else { y };
        let x = if self.dihedral & 1 != 0 { w - 1 - x } else { x };
        if self.transposed() {
            (x, y)
        } else {
            (y, x)
        }
    }

    /// Writes `src` (`[h, w, 3]` in source orientation, already normalised) into `dst` in
    /// this view's orientation.
    fn orient(&self, src: &[f32], h: usize, w: usize, dst: &mut [f32]) {
        let (vh, vw) = self.shape(h, w);
        for y in 0..vh {
            for x in 0..vw {
                let (sy, sx) = self.source(y, x, vh, vw);
                dst[(y * vw + x) * 3..][..3].copy_from_slice(&src[(sy * w + sx) * 3..][..3]);
            }
        }
    }
}

impl Dataset {
    /// Decodes every labelled frame (all of one size) and prepares its thumbnail.
    pub fn load(
        labels: &Path,
        items: &[Labelled],
        classes: &[String],
        shape: Shape,
        norm: &Normalization,
        max_pixels: u64,
    ) -> anyhow::Result<Self> {
        let targets = class_matrix(items, classes, labels)?;
        let workers = std::thread::available_parallelism().map_or(1, |n| n.get());
        let decoded: Vec<anyhow::Result<RgbImage>> = std::thread::scope(|s| {
            let handles: Vec<_> = (0..workers)
                .map(|k| {
                    s.spawn(move || {
                        items
                            .iter()
                            .enumerate()
                            .skip(k)
                            .step_by(workers)
                            .map(|(i, it)| {
                                let frame = decode_file(&it.frame, i as u64, max_pixels)
                                    .map_err(|e| anyhow::anyhow!("{}:{}: {e}", labels.display(), it.line))?;
                                Ok((i, frame.image))
                            })
                            .collect::<Vec<anyhow::Result<(usize, RgbImage)>>>()
                    })
                })
                .collect();
            let mut all: Vec<_> = handles.into_iter().flat_map(|h| h.join().expect("loader panicked")).collect();
            all.sort_by_key(|r| r.as_ref().map_or(0, |(i, _)| *i));
            all.into_iter().map(|r| r.map(|(_, v)| v)).collect()
        });
        let mut images = Vec::with_capacity(items.len());
        for (it, d) in items.iter().zip(decoded) {
            let image = d?;
            if let Some((w, h, first)) =
                images.first().map(|(im, name): &(RgbImage, &str)| (im.width(), im.height(), *name))
            {
                if (image.width(), image.height()) != (w, h) {
                    anyhow::bail!(
                        "{}:{}: {} is {}×{}, but {first} is {w}×{h}: train on frames of one size (the camera's)",
                        labels.display(),
                        it.line,
                        it.name,
                        image.width(),
                        image.height(),
                    );
                }
            }
            images.push((image, it.name.as_str()));
        }
        let frames = images
            .into_iter()
            .zip(items)
            .zip(targets)
            .map(|(((image, _), it), target)| Sample {
                name: it.name.clone(),
                image,
                thumb: Vec::new(),
                target: target.iter().map(|&b| b as u8 as f32).collect(),
                marks: it.marks.clone(),
            })
            .collect();
        Self::new(frames, shape, norm).map_err(|e| anyhow::anyhow!("{}: {e}", labels.display()))
    }

    /// A dataset of decoded frames (all of one size; their `thumb` is filled in here).
    pub fn new(mut samples: Vec<Sample>, shape: Shape, norm: &Normalization) -> anyhow::Result<Self> {
        let (w, h) = (samples[0].image.width(), samples[0].image.height());
        let (rows, cols) = cells(w, h, shape);
        if rows == 0 || cols == 0 {
            anyhow::bail!(
                "frames of {w}×{h} give no whole attention cell at factor {} and stride {}",
                shape.factor,
                shape.stride
            );
        }
        let s = shape.stride as usize;
        let (th, tw) = (rows * s, cols * s);
        for sample in &mut samples {
            let t = area_reduce(&sample.image, shape.factor);
            let full_w = t.width() as usize;
            sample.thumb.clear();
            for y in 0..th {
                sample.thumb.extend_from_slice(&t.as_raw()[y * full_w * 3..][..tw * 3]);
            }
        }
        let geometry = Geometry {
            frame_w: w,
            frame_h: h,
            factor: shape.factor,
            stride: shape.stride,
            patch: shape.patch,
            rows,
            cols,
        };
        Ok(Self { samples, geometry, thumb_hw: (th, tw), norm: norm.clone() })
    }

    /// The thumbnail of sample `i` as the attention network's input `[1, h, w, 3]`, in the
    /// view's orientation, written into `buf` (cleared first).
    pub fn thumbnail(&self, i: usize, view: &View, scratch: &mut Vec<f32>, mut buf: Vec<f32>) -> Act {
        let (h, w) = self.thumb_hw;
        scratch.clear();
        scratch.extend(
            self.samples[i].thumb.chunks_exact(3).flat_map(|px| (0..3).map(move |c| view.lut[c][px[c] as usize])),
        );
        let (vh, vw) = view.shape(h, w);
        buf.clear();
        buf.resize(scratch.len(), 0.0);
        view.orient(scratch, h, w, &mut buf);
        Act::new(1, vh, vw, 3, buf)
    }

    /// The cell of the unviewed grid that cell `cell` of the viewed grid shows.
    pub fn source_cell(&self, view: &View, cell: usize) -> usize {
        let g = &self.geometry;
        let (vh, vw) = view.shape(g.rows, g.cols);
        let (r, c) = view.source(cell / vw, cell % vw, vh, vw);
        r * g.cols + c
    }

    /// Appends the patch of viewed cell `cell` of sample `i` (`[P, P, 3]`, normalised,
    /// in the view's orientation; pixels outside the frame are 0) to `out`.
    pub fn patch(&self, i: usize, view: &View, cell: usize, scratch: &mut Vec<f32>, out: &mut Vec<f32>) {
        let p = self.geometry.patch as usize;
        let (ox, oy) = self.geometry.patch_origin(self.source_cell(view, cell));
        let image = &self.samples[i].image;
        let (w, h) = (image.width() as i64, image.height() as i64);
        scratch.clear();
        scratch.resize(p * p * 3, 0.0);
        let raw = image.as_raw();
        for py in 0..p {
            let fy = oy + py as i64;
            if fy < 0 || fy >= h {
                continue;
            }
            for px in 0..p {
                let fx = ox + px as i64;
                if fx < 0 || fx >= w {
                    continue;
                }
                let at = ((fy * w + fx) * 3) as usize;
                for c in 0..3 {
                    scratch[(py * p + px) * 3 + c] = view.lut[c][raw[at + c] as usize];
                }
            }
        }
        let start = out.len();
        out.resize(start + p * p * 3, 0.0);
        view.orient(scratch, p, p, &mut out[start..]);
    }
}

/// Whole cells of a frame: the engine's grid rounded down.
pub fn cells(w: u32, h: u32, s: Shape) -> (usize, usize) {
    let (tw, th) = (w.div_ceil(s.factor) as usize, h.div_ceil(s.factor) as usize);
    (th / s.stride as usize, tw / s.stride as usize)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn norm() -> Normalization {
        Normalization { mean: [0.0; 3], std: [1.0 / 255.0; 3] }
    }

    /// Every view is a bijection of the grid, and the eight views are the eight distinct
    /// symmetries of a square.
    #[test]
    fn views_are_the_eight_symmetries() {
        let (h, w) = (3, 5);
        let mut seen = std::collections::HashSet::new();
        for d in 0..8u8 {
            let v = View::new(&norm(), d, 1.0, 0.0);
            let (vh, vw) = v.shape(h, w);
            let map: Vec<(usize, usize)> = (0..vh * vw).map(|j| v.source(j / vw, j % vw, vh, vw)).collect();
            let mut sorted = map.clone();
            sorted.sort();
            sorted.dedup();
            assert_eq!(sorted.len(), h * w, "view {d} is not a bijection");
            assert!(seen.insert(map), "view {d} repeats another");
        }
    }

    #[test]
    fn the_lookup_folds_in_brightness_and_contrast() {
        let v = View::new(&norm(), 0, 1.5, -10.0);
        // Identity normalisation: the table gives the changed grey level, clamped.
        for (got, want) in [(v.lut[0][100], 140.0), (v.lut[1][0], 0.0), (v.lut[2][255], 255.0)] {
            assert!((got - want).abs() < 1e-3, "{got} vs {want}");
        }
    }
}
