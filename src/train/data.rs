//! Training frames in memory: full-resolution pixels for patches, normalised thumbnails
//! made exactly as the engine makes them, and frame-level targets.

use std::path::Path;

use image::RgbImage;

use crate::engine::bundle::Normalization;
use crate::engine::patches::{Geometry, Normalizer};
use crate::engine::thumbnail::area_reduce;
use crate::labels::{class_matrix, Labelled};
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
    /// Thumbnail cropped to whole cells, normalised, folded 2×2 (space to depth:
    /// `[H/2, W/2, 12]`, each block in `(dy, dx, c)` order) as the networks' first,
    /// 2×2 patch-embedding layer reads it.
    pub thumb: Vec<f32>,
    pub target: Vec<f32>,
}

pub struct Dataset {
    pub samples: Vec<Sample>,
    pub geometry: Geometry,
    /// Cropped thumbnail height and width (before folding).
    pub thumb_hw: (usize, usize),
    pub normalizer: Normalizer,
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
        let normalizer = Normalizer::new(norm);
        let workers = std::thread::available_parallelism().map_or(1, |n| n.get());
        let decoded: Vec<anyhow::Result<(RgbImage, Vec<f32>)>> = std::thread::scope(|s| {
            let handles: Vec<_> = (0..workers)
                .map(|k| {
                    let normalizer = &normalizer;
                    s.spawn(move || {
                        items
                            .iter()
                            .enumerate()
                            .skip(k)
                            .step_by(workers)
                            .map(|(i, it)| {
                                let frame = decode_file(&it.frame, i as u64, max_pixels)
                                    .map_err(|e| anyhow::anyhow!("{}:{}: {e}", labels.display(), it.line))?;
                                let thumb = thumbnail(&frame.image, shape, normalizer);
                                Ok((i, (frame.image, thumb)))
                            })
                            .collect::<Vec<anyhow::Result<(usize, (RgbImage, Vec<f32>))>>>()
                    })
                })
                .collect();
            let mut all: Vec<_> = handles.into_iter().flat_map(|h| h.join().expect("loader panicked")).collect();
            all.sort_by_key(|r| r.as_ref().map_or(0, |(i, _)| *i));
            all.into_iter().map(|r| r.map(|(_, v)| v)).collect()
        });
        let mut samples = Vec::with_capacity(items.len());
        for ((it, target), d) in items.iter().zip(targets).zip(decoded) {
            let (image, thumb) = d?;
            if let Some(first) = samples.first().map(|s: &Sample| (s.image.width(), s.image.height(), &s.name)) {
                if (image.width(), image.height()) != (first.0, first.1) {
                    anyhow::bail!(
                        "{}:{}: {} is {}×{}, but {} is {}×{}: train on frames of one size (the camera's)",
                        labels.display(),
                        it.line,
                        it.name,
                        image.width(),
                        image.height(),
                        first.2,
                        first.0,
                        first.1
                    );
                }
            }
            samples.push(Sample {
                name: it.name.clone(),
                image,
                thumb,
                target: target.iter().map(|&b| b as u8 as f32).collect(),
            });
        }
        let (w, h) = (samples[0].image.width(), samples[0].image.height());
        let (rows, cols) = cells(w, h, shape);
        if rows == 0 || cols == 0 {
            anyhow::bail!(
                "{}: frames of {w}×{h} give no whole attention cell at factor {} and stride {}",
                labels.display(),
                shape.factor,
                shape.stride
            );
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
        let s = shape.stride as usize;
        Ok(Self { samples, geometry, thumb_hw: (rows * s, cols * s), normalizer })
    }

    /// Patch of `cell` in sample `i`, normalised and folded `k × k` (space to depth:
    /// `[P/k, P/k, k·k·3]`, blocks in `(dy, dx, c)` order), appended to `out`.
    pub fn patch(&self, i: usize, cell: usize, k: usize, planar: &mut Vec<f32>, out: &mut Vec<f32>) {
        let p = self.geometry.patch as usize;
        planar.resize(3 * p * p, 0.0);
        self.normalizer.write_patch(&self.samples[i].image, self.geometry.patch_origin(cell), p, planar);
        let start = out.len();
        out.resize(start + 3 * p * p, 0.0);
        let dst = &mut out[start..];
        let q = p / k;
        for y in 0..p {
            for x in 0..p {
                let block = ((y / k) * q + x / k) * k * k * 3 + ((y % k) * k + x % k) * 3;
                for c in 0..3 {
                    dst[block + c] = planar[c * p * p + y * p + x];
                }
            }
        }
    }
}

/// Whole cells of a frame: the engine's grid rounded down.
fn cells(w: u32, h: u32, s: Shape) -> (usize, usize) {
    let (tw, th) = (w.div_ceil(s.factor) as usize, h.div_ceil(s.factor) as usize);
    (th / s.stride as usize, tw / s.stride as usize)
}

fn thumbnail(image: &RgbImage, s: Shape, n: &Normalizer) -> Vec<f32> {
    let t = area_reduce(image, s.factor);
    let (rows, cols) = cells(image.width(), image.height(), s);
    let (h, w) = (rows * s.stride as usize, cols * s.stride as usize);
    let tw = t.width() as usize;
    let mut planar = vec![0f32; 3 * (t.width() * t.height()) as usize];
    n.write_planar(&t, &mut planar);
    let plane = planar.len() / 3;
    let mut out = vec![0f32; h * w * 3];
    for y in 0..h {
        for x in 0..w {
            let block = ((y / 2) * (w / 2) + x / 2) * 12 + ((y % 2) * 2 + x % 2) * 3;
            for c in 0..3 {
                out[block + c] = planar[c * plane + y * tw + x];
            }
        }
    }
    out
}
