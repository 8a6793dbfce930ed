//! Synthetic frames of the demo scenario: a fixed camera over a moving web of sheet
//! material (woven fabric or paper) under uneven light, with defects and benign
//! look-alikes placed at known positions.
//!
//! Sizes are in frame pixels and do not scale with the frame: at the usual thumbnail
//! factor of 8 each defect is a dot or a short streak whose class cannot be read, and each
//! defect class has a look-alike that makes a similar mark in the thumbnail:
//!
//! | defect (labelled) | full resolution                      | look-alike (not labelled)        |
//! |-------------------|--------------------------------------|----------------------------------|
//! | `pinhole`         | sharp saturated disc, r 1.2–3.5 px   | `glint`: soft bright Gaussian    |
//! | `scratch`         | straight bright line, 20–60 px, slanted | `lint`: curly fibre, either sign |
//! | `knot`            | dark ring, r 3–7 px, lighter centre  | `fleck`: soft dark Gaussian dot  |
//! | `stain`           | soft irregular darkening, r 8–28 px  | (lighting gradient, vignette)    |
//!
//! plus `seam`, an occasional axis-aligned band across the whole frame. Everything is
//! drawn from the seed: the same seed gives the same bytes.

use image::{Rgb, RgbImage};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde::Serialize;

/// The labelled defect classes, in the order a trained demo bundle uses.
pub const CLASSES: [&str; 4] = ["pinhole", "scratch", "knot", "stain"];

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum DefectClass {
    Pinhole,
    Scratch,
    Knot,
    Stain,
}

impl DefectClass {
    pub const ALL: [DefectClass; 4] =
        [DefectClass::Pinhole, DefectClass::Scratch, DefectClass::Knot, DefectClass::Stain];

    pub fn name(&self) -> &'static str {
        CLASSES[*self as usize]
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum LookalikeKind {
    Glint,
    Lint,
    Fleck,
    Seam,
}

/// A placed mark: centre and extent (the radius of the circle that holds it) in frame
/// pixels.
#[derive(Clone, Debug, Serialize)]
pub struct Mark<K> {
    pub kind: K,
    pub x: f64,
    pub y: f64,
    pub extent: f64,
}

/// One generated frame and what was placed in it.
pub struct SceneFrame {
    pub image: RgbImage,
    pub defects: Vec<Mark<DefectClass>>,
    pub lookalikes: Vec<Mark<LookalikeKind>>,
}

impl SceneFrame {
    /// The classes present, sorted by [`CLASSES`] order, each once.
    pub fn classes(&self) -> Vec<&'static str> {
        DefectClass::ALL.iter().filter(|c| self.defects.iter().any(|d| d.kind == **c)).map(|c| c.name()).collect()
    }
}

/// Grey-level canvas the marks are painted on before colour and noise are applied.
struct Canvas {
    w: usize,
    h: usize,
    v: Vec<f32>,
}

impl Canvas {
    /// Calls `f(value, dx, dy)` for every pixel within `r` of `(cx, cy)`.
    fn around(&mut self, cx: f64, cy: f64, r: f64, mut f: impl FnMut(&mut f32, f64, f64)) {
        let x0 = (cx - r).floor().max(0.0) as usize;
        let y0 = (cy - r).floor().max(0.0) as usize;
        let x1 = ((cx + r).ceil().max(0.0) as usize).min(self.w.saturating_sub(1));
        let y1 = ((cy + r).ceil().max(0.0) as usize).min(self.h.saturating_sub(1));
        for y in y0..=y1 {
            for x in x0..=x1 {
                let (dx, dy) = (x as f64 + 0.5 - cx, y as f64 + 0.5 - cy);
                f(&mut self.v[y * self.w + x], dx, dy);
            }
        }
    }

    /// Moves pixels towards `target` by a coverage in [0, 1] from `cover(dx, dy)`.
    fn blend(&mut self, cx: f64, cy: f64, r: f64, target: f32, cover: impl Fn(f64, f64) -> f64) {
        self.around(cx, cy, r, |v, dx, dy| {
            let c = cover(dx, dy).clamp(0.0, 1.0) as f32;
            *v += (target - *v) * c;
        });
    }

    /// Adds `delta × shape(dx, dy)`.
    fn add(&mut self, cx: f64, cy: f64, r: f64, delta: f32, shape: impl Fn(f64, f64) -> f64) {
        self.around(cx, cy, r, |v, dx, dy| *v += delta * shape(dx, dy) as f32);
    }

    /// Anti-aliased segment of half-width `hw` from `a` to `b`, adding `delta`.
    fn segment(&mut self, a: (f64, f64), b: (f64, f64), hw: f64, delta: f32) {
        let (mx, my) = ((a.0 + b.0) / 2.0, (a.1 + b.1) / 2.0);
        let (vx, vy) = (b.0 - a.0, b.1 - a.1);
        let len2 = (vx * vx + vy * vy).max(1e-9);
        let r = len2.sqrt() / 2.0 + hw + 1.0;
        self.around(mx, my, r, |v, dx, dy| {
            // Distance from the pixel centre to the segment.
            let (px, py) = (dx + mx - a.0, dy + my - a.1);
            let t = ((px * vx + py * vy) / len2).clamp(0.0, 1.0);
            let d = ((px - t * vx).powi(2) + (py - t * vy).powi(2)).sqrt();
            *v += delta * (hw + 0.5 - d).clamp(0.0, 1.0) as f32;
        });
    }
}

fn disc(radius: f64) -> impl Fn(f64, f64) -> f64 {
    move |dx, dy| radius + 0.5 - (dx * dx + dy * dy).sqrt()
}

fn gaussian(sigma: f64) -> impl Fn(f64, f64) -> f64 {
    move |dx, dy| (-(dx * dx + dy * dy) / (2.0 * sigma * sigma)).exp()
}

/// Draws a frame of `width × height` from `seed`: zero to three defects and zero to four
/// look-alikes.
pub fn generate(width: u32, height: u32, seed: u64) -> SceneFrame {
    let mut c = compose(width, height, seed);
    let image = finish(&c.marked, &mut c.rng);
    SceneFrame { image, defects: c.defects, lookalikes: c.lookalikes }
}

/// A frame before colour and noise: the bare material and the material with marks.
struct Composed {
    #[cfg(test)]
    material: Vec<f32>,
    marked: Canvas,
    defects: Vec<Mark<DefectClass>>,
    lookalikes: Vec<Mark<LookalikeKind>>,
    rng: ChaCha8Rng,
}

fn compose(width: u32, height: u32, seed: u64) -> Composed {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let (w, h) = (width as usize, height as usize);
    let mut canvas = Canvas { w, h, v: vec![0.0; w * h] };
    paint_material(&mut canvas, &mut rng);
    #[cfg(test)]
    let material = canvas.v.clone();

    let mut taken: Vec<(f64, f64, f64)> = Vec::new();
    let defect_count = if rng.random_bool(0.4) { 0 } else { rng.random_range(1..=3) };
    let mut defects = Vec::with_capacity(defect_count);
    for _ in 0..defect_count {
        let kind = DefectClass::ALL[rng.random_range(0..DefectClass::ALL.len())];
        let extent = match kind {
            DefectClass::Pinhole => rng.random_range(1.2..3.5),
            DefectClass::Scratch => rng.random_range(10.0..30.0),
            DefectClass::Knot => rng.random_range(3.0..7.0),
            DefectClass::Stain => rng.random_range(8.0..28.0),
        };
        if let Some((x, y)) = free_spot(&mut rng, w, h, extent, &taken) {
            taken.push((x, y, extent));
            paint_defect(&mut canvas, &mut rng, kind, x, y, extent);
            defects.push(Mark { kind, x, y, extent });
        }
    }
    let mut lookalikes = Vec::new();
    for _ in 0..rng.random_range(0..=4) {
        let kind = [LookalikeKind::Glint, LookalikeKind::Lint, LookalikeKind::Fleck][rng.random_range(0..3)];
        let extent = match kind {
            LookalikeKind::Glint => rng.random_range(3.0..7.0),
            LookalikeKind::Lint => rng.random_range(8.0..25.0),
            _ => rng.random_range(4.0..8.0),
        };
        if let Some((x, y)) = free_spot(&mut rng, w, h, extent, &taken) {
            taken.push((x, y, extent));
            paint_lookalike(&mut canvas, &mut rng, kind, x, y, extent);
            lookalikes.push(Mark { kind, x, y, extent });
        }
    }
    if rng.random_bool(0.15) {
        lookalikes.push(paint_seam(&mut canvas, &mut rng));
    }
    Composed {
        #[cfg(test)]
        material,
        marked: canvas,
        defects,
        lookalikes,
        rng,
    }
}

/// A centre at least `extent + 4` px from the frame edges and clear of earlier marks, or
/// `None` when the frame is too small or crowded.
fn free_spot(rng: &mut ChaCha8Rng, w: usize, h: usize, extent: f64, taken: &[(f64, f64, f64)]) -> Option<(f64, f64)> {
    let m = extent + 4.0;
    if (w as f64) <= 2.0 * m || (h as f64) <= 2.0 * m {
        return None;
    }
    (0..50).find_map(|_| {
        let (x, y) = (rng.random_range(m..w as f64 - m), rng.random_range(m..h as f64 - m));
        let clear = taken.iter().all(|&(tx, ty, te)| ((x - tx).powi(2) + (y - ty).powi(2)).sqrt() > extent + te + 12.0);
        clear.then_some((x, y))
    })
}

/// Base material: light level with a gradient and vignette, and a weave or paper grain.
fn paint_material(c: &mut Canvas, rng: &mut ChaCha8Rng) {
    let (w, h) = (c.w, c.h);
    let level = rng.random_range(120.0f32..170.0);
    let (gx, gy) = (rng.random_range(-25.0f32..25.0), rng.random_range(-25.0f32..25.0));
    let vignette = rng.random_range(0.0f32..30.0);
    let woven = rng.random_bool(0.6);
    let period = rng.random_range(5.0f32..8.0);
    let depth = if woven { rng.random_range(5.0f32..12.0) } else { 0.0 };
    let k = std::f32::consts::TAU / period;
    let sx: Vec<f32> = (0..w).map(|x| (k * x as f32).sin()).collect();
    let cy: Vec<f32> = (0..h).map(|y| (k * y as f32).cos()).collect();
    // Paper grain: a coarse random lattice, bilinearly interpolated.
    const G: usize = 6;
    let (gw, gh) = (w / G + 2, h / G + 2);
    let grain_amp = if woven { 2.0 } else { rng.random_range(4.0f32..8.0) };
    let grain_noise = Normal::new(0.0f32, grain_amp).expect("valid sigma");
    let lattice: Vec<f32> = (0..gw * gh).map(|_| grain_noise.sample(rng)).collect();
    let (hw, hh) = (w as f32 / 2.0, h as f32 / 2.0);
    let diag2 = hw * hw + hh * hh;
    for (y, &cos_y) in cy.iter().enumerate() {
        let (yf, ly) = (y as f32, y / G);
        let ty = (y % G) as f32 / G as f32;
        for (x, &sin_x) in sx.iter().enumerate() {
            let (xf, lx) = (x as f32, x / G);
            let tx = (x % G) as f32 / G as f32;
            let l = |i: usize, j: usize| lattice[j * gw + i];
            let grain = (l(lx, ly) * (1.0 - tx) + l(lx + 1, ly) * tx) * (1.0 - ty)
                + (l(lx, ly + 1) * (1.0 - tx) + l(lx + 1, ly + 1) * tx) * ty;
            let r2 = ((xf - hw).powi(2) + (yf - hh).powi(2)) / diag2;
            let light = level + gx * (xf / w as f32 - 0.5) + gy * (yf / h as f32 - 0.5) - vignette * r2;
            c.v[y * w + x] = light + depth * sin_x * cos_y + grain;
        }
    }
}

fn paint_defect(c: &mut Canvas, rng: &mut ChaCha8Rng, kind: DefectClass, x: f64, y: f64, extent: f64) {
    match kind {
        // Backlight through the hole saturates the sensor.
        DefectClass::Pinhole => c.blend(x, y, extent + 1.0, rng.random_range(245.0..255.0), disc(extent)),
        DefectClass::Scratch => {
            // Slanted at least 15° away from both axes, so a seam is not a scratch.
            let quadrant = rng.random_range(0..4) as f64 * std::f64::consts::FRAC_PI_2;
            let angle = quadrant + rng.random_range(15f64..75.0).to_radians();
            let (dx, dy) = (extent * angle.cos(), extent * angle.sin());
            c.segment((x - dx, y - dy), (x + dx, y + dy), rng.random_range(0.5..1.0), rng.random_range(45.0..70.0));
        }
        DefectClass::Knot => {
            let width = rng.random_range(1.5..2.5);
            let ring = extent - width / 2.0;
            let dark = rng.random_range(-70.0f32..-50.0);
            c.add(x, y, extent + 1.0, dark, move |dx, dy| {
                (width / 2.0 + 0.5 - ((dx * dx + dy * dy).sqrt() - ring).abs()).clamp(0.0, 1.0)
            });
            c.add(x, y, ring, rng.random_range(10.0..25.0), disc(ring - width));
        }
        DefectClass::Stain => {
            // Irregular edge: the radius wobbles with the angle.
            let harmonics: Vec<(f64, f64, f64)> = (2..5)
                .map(|n| (n as f64, rng.random_range(0.03..0.12), rng.random_range(0.0..std::f64::consts::TAU)))
                .collect();
            let keep = rng.random_range(0.55f32..0.78);
            let soft = rng.random_range(2.0..5.0);
            c.around(x, y, extent * 1.4 + soft, |v, dx, dy| {
                let theta = dy.atan2(dx);
                let r = extent * (1.0 + harmonics.iter().map(|(n, a, p)| a * (n * theta + p).sin()).sum::<f64>());
                let cover = ((r - (dx * dx + dy * dy).sqrt()) / soft + 0.5).clamp(0.0, 1.0) as f32;
                *v *= 1.0 - (1.0 - keep) * cover;
            });
        }
    }
}

fn paint_lookalike(c: &mut Canvas, rng: &mut ChaCha8Rng, kind: LookalikeKind, x: f64, y: f64, extent: f64) {
    match kind {
        LookalikeKind::Glint => c.add(x, y, extent, rng.random_range(50.0..80.0), gaussian(extent / 2.2)),
        LookalikeKind::Fleck => c.add(x, y, extent, rng.random_range(-70.0..-50.0), gaussian(extent / 2.2)),
        LookalikeKind::Lint => {
            // A fibre: a walk whose heading drifts, centred on (x, y).
            let sign = if rng.random_bool(0.5) { 1.0 } else { -1.0 };
            let delta = sign * rng.random_range(35.0f32..55.0);
            let steps = (extent * 2.0 / 2.0).ceil() as usize;
            let mut heading = rng.random_range(0.0..std::f64::consts::TAU);
            let turn = rng.random_range(0.04..0.15) * if rng.random_bool(0.5) { 1.0 } else { -1.0 };
            let mut pts = vec![(0.0f64, 0.0f64)];
            for _ in 0..steps {
                heading += turn + rng.random_range(-0.2..0.2);
                let (px, py) = *pts.last().expect("non-empty");
                pts.push((px + 2.0 * heading.cos(), py + 2.0 * heading.sin()));
            }
            let (mx, my) = pts.iter().fold((0.0, 0.0), |(a, b), p| (a + p.0, b + p.1));
            let n = pts.len() as f64;
            for seg in pts.windows(2) {
                let a = (x + seg[0].0 - mx / n, y + seg[0].1 - my / n);
                let b = (x + seg[1].0 - mx / n, y + seg[1].1 - my / n);
                c.segment(a, b, 0.5, delta);
            }
        }
        LookalikeKind::Seam => unreachable!("seams span the frame and are painted by paint_seam"),
    }
}

/// An axis-aligned band across the whole frame, where two lengths of material are joined.
fn paint_seam(c: &mut Canvas, rng: &mut ChaCha8Rng) -> Mark<LookalikeKind> {
    let horizontal = rng.random_bool(0.5);
    let half = rng.random_range(1.0..1.75);
    let delta = if rng.random_bool(0.5) { 1.0 } else { -1.0 } * rng.random_range(20.0f32..30.0);
    let (w, h) = (c.w as f64, c.h as f64);
    let at = rng.random_range(0.1..0.9) * if horizontal { h } else { w };
    for y in 0..c.h {
        for x in 0..c.w {
            let d = if horizontal { (y as f64 + 0.5 - at).abs() } else { (x as f64 + 0.5 - at).abs() };
            c.v[y * c.w + x] += delta * (half + 0.5 - d).clamp(0.0, 1.0) as f32;
        }
    }
    let (x, y, extent) = if horizontal { (w / 2.0, at, w / 2.0) } else { (at, h / 2.0, h / 2.0) };
    Mark { kind: LookalikeKind::Seam, x, y, extent }
}

/// Material tint and sensor noise, quantised to 8 bits.
fn finish(c: &Canvas, rng: &mut ChaCha8Rng) -> RgbImage {
    let tint = [rng.random_range(0.92f32..1.06), 1.0, rng.random_range(0.85f32..1.0)];
    let noise = Normal::new(0.0f32, rng.random_range(1.5f32..4.0)).expect("valid sigma");
    let mut image = RgbImage::new(c.w as u32, c.h as u32);
    for (px, &v) in image.pixels_mut().zip(&c.v) {
        let n = noise.sample(rng);
        *px = Rgb(std::array::from_fn(|ch| (v * tint[ch] + n).round().clamp(0.0, 255.0) as u8));
    }
    image
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn same_seed_same_bytes() {
        let a = generate(320, 240, 7);
        let b = generate(320, 240, 7);
        assert_eq!(a.image.as_raw(), b.image.as_raw());
        assert_ne!(a.image.as_raw(), generate(320, 240, 8).image.as_raw());
    }

    /// Labels are right: every changed pixel lies on a recorded mark (so nothing is
    /// unlabelled), and every recorded defect changes the pixels at its place.
    #[test]
    fn marks_are_where_the_labels_say() {
        let (w, h) = (640u32, 480u32);
        let mut defects_seen = 0;
        for seed in 0..40 {
            let c = compose(w, h, seed);
            let near = |x: usize, y: usize| {
                let (px, py) = (x as f64 + 0.5, y as f64 + 0.5);
                let on = |mx: f64, my: f64, e: f64| ((px - mx).powi(2) + (py - my).powi(2)).sqrt() <= e * 1.45 + 6.0;
                c.defects.iter().any(|m| on(m.x, m.y, m.extent))
                    || c.lookalikes.iter().any(|m| match m.kind {
                        LookalikeKind::Seam if m.extent == w as f64 / 2.0 => (py - m.y).abs() <= 3.0,
                        LookalikeKind::Seam => (px - m.x).abs() <= 3.0,
                        _ => on(m.x, m.y, m.extent),
                    })
            };
            for y in 0..h as usize {
                for x in 0..w as usize {
                    let d = (c.marked.v[y * w as usize + x] - c.material[y * w as usize + x]).abs();
                    assert!(d < 0.5 || near(x, y), "seed {seed}: pixel ({x}, {y}) changed by {d} away from every mark");
                }
            }
            for m in &c.defects {
                defects_seen += 1;
                let r = m.extent.ceil() as i64 + 1;
                let changed = (-r..=r).flat_map(|dy| (-r..=r).map(move |dx| (dx, dy))).any(|(dx, dy)| {
                    let (x, y) = ((m.x as i64 + dx) as usize, (m.y as i64 + dy) as usize);
                    (c.marked.v[y * w as usize + x] - c.material[y * w as usize + x]).abs() > 20.0
                });
                assert!(changed, "seed {seed}: {:?} at ({:.0}, {:.0}) is not visible", m.kind, m.x, m.y);
                assert!(m.x > m.extent && m.y > m.extent && m.x < w as f64 - m.extent && m.y < h as f64 - m.extent);
            }
        }
        assert!(defects_seen > 20, "only {defects_seen} defects in 40 frames");
    }

    #[test]
    fn tiny_frames_hold_no_marks_but_do_not_fail() {
        let f = generate(16, 12, 3);
        assert_eq!((f.image.width(), f.image.height()), (16, 12));
        assert!(f.defects.is_empty());
    }
}
