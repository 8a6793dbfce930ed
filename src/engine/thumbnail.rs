//! Integer-factor area-average reduction of a frame to the attention network's thumbnail.
//!
//! Every full-resolution pixel counts once. The output is `ceil(W/s) × ceil(H/s)`; boxes
//! on the right and bottom edges that hang over the frame average only the pixels that
//! exist (no padding, no replication), so a border defect keeps its contrast. Rounding is
//! to nearest, halves up.

use image::RgbImage;

/// Output size for a frame of `width × height` at factor `s`.
pub fn thumbnail_size(width: u32, height: u32, s: u32) -> (u32, u32) {
    (width.div_ceil(s), height.div_ceil(s))
}

/// Largest factor the 16-bit column sums can take (255 × 257 < 2¹⁶).
pub const MAX_FACTOR: u32 = crate::bundle::MAX_THUMBNAIL_FACTOR;

/// Area-average reduction by `s`: the SIMD box filter when `s` divides both sides (it is
/// about twice as fast as the loop there, see DEVELOPERS.md), the loop otherwise.
pub fn area_reduce(src: &RgbImage, s: u32) -> RgbImage {
    if s > 1 && src.width() % s == 0 && src.height() % s == 0 {
        area_reduce_simd(src, s)
    } else {
        area_reduce_loop(src, s)
    }
}

/// Area-average reduction by `s` (1 ≤ s ≤ [`MAX_FACTOR`]) with partial edge boxes.
pub fn area_reduce_loop(src: &RgbImage, s: u32) -> RgbImage {
    assert!((1..=MAX_FACTOR).contains(&s), "thumbnail factor {s} outside 1..={MAX_FACTOR}");
    let (w, h) = (src.width() as usize, src.height() as usize);
    let (tw, th) = thumbnail_size(src.width(), src.height(), s);
    let (tw, th, s) = (tw as usize, th as usize, s as usize);
    let raw = src.as_raw();
    let mut out = vec![0u8; tw * th * 3];
    // Column sums over a band of s rows: a plain element-wise add that the compiler
    // vectorises; each source byte is read once.
    let mut cols = vec![0u16; w * 3];
    for ty in 0..th {
        let y0 = ty * s;
        let rows = s.min(h - y0);
        cols.fill(0);
        for row in raw[y0 * w * 3..(y0 + rows) * w * 3].chunks_exact(w * 3) {
            for (c, &v) in cols.iter_mut().zip(row) {
                *c += v as u16;
            }
        }
        let out_row = &mut out[ty * tw * 3..(ty + 1) * tw * 3];
        for (tx, px) in out_row.chunks_exact_mut(3).enumerate() {
            let x0 = tx * s;
            let n = (s.min(w - x0) * rows) as u32;
            let mut sum = [0u32; 3];
            for col in cols[x0 * 3..(x0 + s).min(w) * 3].chunks_exact(3) {
                sum[0] += col[0] as u32;
                sum[1] += col[1] as u32;
                sum[2] += col[2] as u32;
            }
            for c in 0..3 {
                px[c] = ((sum[c] + n / 2) / n) as u8;
            }
        }
    }
    RgbImage::from_raw(tw as u32, th as u32, out).expect("buffer sized from the thumbnail dimensions")
}

/// The same reduction through `fast_image_resize`'s SIMD box convolution. It agrees with
/// [`area_reduce_loop`] only when `s` divides both sides (its box then covers exactly `s`
/// pixels); with partial edge boxes it would spread the scale over the whole width.
pub fn area_reduce_simd(src: &RgbImage, s: u32) -> RgbImage {
    use fast_image_resize::{
        images::{Image, ImageRef},
        FilterType, PixelType, ResizeAlg, ResizeOptions, Resizer,
    };
    let (tw, th) = thumbnail_size(src.width(), src.height(), s);
    let src_view = ImageRef::new(src.width(), src.height(), src.as_raw(), PixelType::U8x3).expect("RGB8 buffer");
    let mut dst = Image::new(tw, th, PixelType::U8x3);
    let opts = ResizeOptions::new().resize_alg(ResizeAlg::Convolution(FilterType::Box));
    Resizer::new().resize(&src_view, &mut dst, &opts).expect("same pixel type");
    RgbImage::from_raw(tw, th, dst.into_vec()).expect("buffer sized from the thumbnail dimensions")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn edge_boxes_average_only_existing_pixels() {
        // 5×3 frame at s = 2: the right column and bottom row are partial boxes.
        let mut img = RgbImage::new(5, 3);
        for (x, y, p) in img.enumerate_pixels_mut() {
            let v = (10 * x + 100 * y) as u8;
            *p = image::Rgb([v, v, 255 - v]);
        }
        let t = area_reduce_loop(&img, 2);
        assert_eq!(t.dimensions(), (3, 2));
        // Full box (0,0): pixels 0,10,100,110 → 55.
        assert_eq!(t.get_pixel(0, 0)[0], 55);
        // Right partial box (2,0): pixels x=4, y=0..2 → 40,140 → 90.
        assert_eq!(t.get_pixel(2, 0)[0], 90);
        // Bottom partial box (0,1): y=2, x=0..2 → 200,210 → 205.
        assert_eq!(t.get_pixel(0, 1)[0], 205);
        // Corner box (2,1): the single pixel (4,2) → 240.
        assert_eq!(t.get_pixel(2, 1)[0], 240);
        assert_eq!(t.get_pixel(2, 1)[2], 15);
    }

    #[test]
    fn rounds_half_up() {
        let img = RgbImage::from_raw(2, 1, vec![0, 0, 0, 1, 1, 1]).unwrap();
        assert_eq!(area_reduce_loop(&img, 2).get_pixel(0, 0)[0], 1);
    }

    #[test]
    fn simd_path_agrees_with_loop_on_divisible_sizes() {
        let img = RgbImage::from_fn(96, 40, |x, y| {
            image::Rgb([(x * 37 % 256) as u8, (y * 91 % 256) as u8, ((x * y) % 256) as u8])
        });
        for s in [2, 4, 8] {
            let (a, b) = (area_reduce_loop(&img, s), area_reduce_simd(&img, s));
            let worst = a.as_raw().iter().zip(b.as_raw()).map(|(p, q)| (*p as i32 - *q as i32).abs()).max().unwrap();
            assert!(worst <= 1, "s={s}: loop and SIMD differ by {worst}");
        }
    }
}
