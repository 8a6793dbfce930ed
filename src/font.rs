//! The project's own stroke font for plot labels and evidence captions (it imports nothing
//! of ours, so the sweep plot and the evidence images share it). Each glyph is a
//! few polylines on a 4 × 8 grid (capitals and digits from row 0 to the baseline at row 6,
//! lower case from row 2, descenders to row 8), with chamfered corners instead of curves.
//! The grid's rows are set on a taller raster ([`ROWS`]: capitals 8 pens high, lower case
//! 6, the upper half of a capital shorter than the lower) and text is drawn by running a
//! square pen of side `scale` along the strokes, so it stays legible at any integer size. Characters without a glyph are drawn as a hollow box, so
//! a missing glyph shows instead of vanishing.

use image::{Rgb, RgbImage};

/// Glyph box in pen widths: 5 across (grid 0–4 plus the pen), 10 down.
pub const WIDTH: u32 = 5;
pub const HEIGHT: u32 = 10;
/// Pen widths above and at the baseline: digits and capitals fill exactly these.
pub const CAP_HEIGHT: u32 = 8;
/// Raster row of each grid row: rows 3 and 4 of the grid are two pens apart, which gives
/// capitals their low waist and lower case its height.
const ROWS: [i64; 9] = [0, 1, 2, 3, 5, 6, 7, 8, 9];
pub const ADVANCE: u32 = WIDTH + 1;

type Stroke = &'static [(i8, i8)];

const BOX: &[Stroke] = &[&[(0, 0), (4, 0), (4, 6), (0, 6), (0, 0)]];
const RING: Stroke = &[(1, 0), (3, 0), (4, 1), (4, 5), (3, 6), (1, 6), (0, 5), (0, 1), (1, 0)];
const BOWL: Stroke = &[(0, 6), (0, 0), (3, 0), (4, 1), (4, 2), (3, 3), (0, 3)];

/// The strokes of `c`.
fn glyph(c: char) -> &'static [Stroke] {
    match c {
        ' ' => &[],
        '0' => &[RING, &[(1, 5), (3, 1)]],
        '1' => &[&[(1, 1), (2, 0), (2, 6)], &[(1, 6), (3, 6)]],
        '2' => &[&[(0, 1), (1, 0), (3, 0), (4, 1), (4, 2), (0, 6), (4, 6)]],
        '3' => &[&[(0, 0), (4, 0), (2, 2), (3, 2), (4, 3), (4, 5), (3, 6), (1, 6), (0, 5)]],
        '4' => &[&[(3, 6), (3, 0), (0, 4), (4, 4)]],
        '5' => &[&[(4, 0), (0, 0), (0, 2), (3, 2), (4, 3), (4, 5), (3, 6), (0, 6)]],
        '6' => &[&[(3, 0), (1, 0), (0, 1), (0, 5), (1, 6), (3, 6), (4, 5), (4, 3), (3, 2), (0, 2)]],
        '7' => &[&[(0, 0), (4, 0), (4, 1), (1, 6)]],
        '8' => &[
            &[(1, 0), (3, 0), (4, 1), (4, 2), (3, 3), (1, 3), (0, 2), (0, 1), (1, 0)],
            &[(1, 3), (0, 4), (0, 5), (1, 6), (3, 6), (4, 5), (4, 4), (3, 3)],
        ],
        '9' => &[&[(4, 3), (1, 3), (0, 2), (0, 1), (1, 0), (3, 0), (4, 1), (4, 5), (3, 6), (1, 6)]],
        'A' => &[&[(0, 6), (0, 2), (2, 0), (4, 2), (4, 6)], &[(0, 4), (4, 4)]],
        'B' => &[BOWL, &[(3, 3), (4, 4), (4, 5), (3, 6), (0, 6)]],
        'C' => &[&[(4, 1), (3, 0), (1, 0), (0, 1), (0, 5), (1, 6), (3, 6), (4, 5)]],
        'D' => &[&[(0, 0), (2, 0), (4, 2), (4, 4), (2, 6), (0, 6), (0, 0)]],
        'E' => &[&[(4, 0), (0, 0), (0, 6), (4, 6)], &[(0, 3), (3, 3)]],
        'F' => &[&[(4, 0), (0, 0), (0, 6)], &[(0, 3), (3, 3)]],
        'G' => &[&[(4, 1), (3, 0), (1, 0), (0, 1), (0, 5), (1, 6), (3, 6), (4, 5), (4, 3), (2, 3)]],
        'H' => &[&[(0, 0), (0, 6)], &[(4, 0), (4, 6)], &[(0, 3), (4, 3)]],
        'I' => &[&[(1, 0), (3, 0)], &[(2, 0), (2, 6)], &[(1, 6), (3, 6)]],
        'J' => &[&[(4, 0), (4, 5), (3, 6), (1, 6), (0, 5)]],
        'K' => &[&[(0, 0), (0, 6)], &[(4, 0), (0, 4)], &[(1, 3), (4, 6)]],
        'L' => &[&[(0, 0), (0, 6), (4, 6)]],
        'M' => &[&[(0, 6), (0, 0), (2, 3), (4, 0), (4, 6)]],
        'N' => &[&[(0, 6), (0, 0), (4, 6), (4, 0)]],
        'O' => &[RING],
        'P' => &[BOWL],
        'Q' => &[RING, &[(2, 4), (4, 6)]],
        'R' => &[BOWL, &[(2, 3), (4, 6)]],
        'S' => &[&[(4, 1), (3, 0), (1, 0), (0, 1), (0, 2), (1, 3), (3, 3), (4, 4), (4, 5), (3, 6), (1, 6), (0, 5)]],
        'T' => &[&[(0, 0), (4, 0)], &[(2, 0), (2, 6)]],
        'U' => &[&[(0, 0), (0, 5), (1, 6), (3, 6), (4, 5), (4, 0)]],
        'V' => &[&[(0, 0), (0, 3), (2, 6), (4, 3), (4, 0)]],
        'W' => &[&[(0, 0), (0, 6), (2, 4), (4, 6), (4, 0)]],
        'X' => &[&[(0, 0), (4, 6)], &[(4, 0), (0, 6)]],
        'Y' => &[&[(0, 0), (2, 3), (4, 0)], &[(2, 3), (2, 6)]],
        'Z' => &[&[(0, 0), (4, 0), (0, 6), (4, 6)]],
        'a' => &[&[(4, 2), (4, 6)], &[(4, 3), (3, 2), (1, 2), (0, 3), (0, 5), (1, 6), (3, 6), (4, 5)]],
        'b' => &[&[(0, 0), (0, 6), (3, 6), (4, 5), (4, 3), (3, 2), (0, 2)]],
        'c' => &[&[(4, 2), (1, 2), (0, 3), (0, 5), (1, 6), (4, 6)]],
        'd' => &[&[(4, 0), (4, 6), (1, 6), (0, 5), (0, 3), (1, 2), (4, 2)]],
        'e' => &[&[(0, 4), (4, 4), (4, 3), (3, 2), (1, 2), (0, 3), (0, 5), (1, 6), (4, 6)]],
        'f' => &[&[(4, 0), (3, 0), (2, 1), (2, 6)], &[(0, 2), (4, 2)]],
        'g' => &[&[(4, 2), (1, 2), (0, 3), (0, 4), (1, 5), (4, 5)], &[(4, 2), (4, 7), (3, 8), (0, 8)]],
        'h' => &[&[(0, 0), (0, 6)], &[(0, 2), (3, 2), (4, 3), (4, 6)]],
        'i' => &[&[(2, 0)], &[(1, 2), (2, 2), (2, 6)]],
        'j' => &[&[(3, 0)], &[(3, 2), (3, 7), (2, 8), (0, 8)]],
        'k' => &[&[(0, 0), (0, 6)], &[(4, 2), (1, 4), (4, 6)], &[(0, 4), (1, 4)]],
        'l' => &[&[(1, 0), (2, 0), (2, 5), (3, 6), (4, 6)]],
        'm' => &[&[(0, 6), (0, 2), (1, 2), (2, 3), (2, 6)], &[(2, 3), (3, 2), (4, 3), (4, 6)]],
        'n' => &[&[(0, 6), (0, 2)], &[(0, 3), (1, 2), (3, 2), (4, 3), (4, 6)]],
        'o' => &[&[(1, 2), (3, 2), (4, 3), (4, 5), (3, 6), (1, 6), (0, 5), (0, 3), (1, 2)]],
        'p' => &[&[(0, 8), (0, 2), (3, 2), (4, 3), (4, 5), (3, 6), (0, 6)]],
        'q' => &[&[(4, 8), (4, 2), (1, 2), (0, 3), (0, 5), (1, 6), (4, 6)]],
        'r' => &[&[(0, 2), (0, 6)], &[(0, 4), (2, 2), (4, 2)]],
        's' => &[&[(4, 2), (1, 2), (0, 3), (1, 4), (3, 4), (4, 5), (3, 6), (0, 6)]],
        't' => &[&[(2, 0), (2, 5), (3, 6), (4, 6)], &[(0, 2), (4, 2)]],
        'u' => &[&[(0, 2), (0, 5), (1, 6), (3, 6), (4, 5)], &[(4, 2), (4, 6)]],
        'v' => &[&[(0, 2), (2, 6), (4, 2)]],
        'w' => &[&[(0, 2), (1, 6), (2, 4), (3, 6), (4, 2)]],
        'x' => &[&[(0, 2), (4, 6)], &[(4, 2), (0, 6)]],
        'y' => &[&[(0, 2), (0, 5), (1, 6), (4, 6)], &[(4, 2), (4, 7), (3, 8), (0, 8)]],
        'z' => &[&[(0, 2), (4, 2), (0, 6), (4, 6)]],
        '.' => &[&[(2, 6)]],
        ',' => &[&[(2, 5), (2, 6), (1, 7)]],
        ':' => &[&[(2, 2)], &[(2, 5)]],
        ';' => &[&[(2, 2)], &[(2, 5), (2, 6), (1, 7)]],
        '-' => &[&[(1, 3), (3, 3)]],
        '–' | '—' => &[&[(0, 3), (4, 3)]],
        '+' => &[&[(0, 3), (4, 3)], &[(2, 1), (2, 5)]],
        '=' => &[&[(0, 2), (4, 2)], &[(0, 4), (4, 4)]],
        '_' => &[&[(0, 7), (4, 7)]],
        '/' => &[&[(0, 6), (4, 0)]],
        '%' => {
            &[&[(0, 6), (4, 0)], &[(0, 0), (1, 0), (1, 1), (0, 1), (0, 0)], &[(3, 5), (4, 5), (4, 6), (3, 6), (3, 5)]]
        }
        '(' => &[&[(3, 0), (1, 2), (1, 4), (3, 6)]],
        ')' => &[&[(1, 0), (3, 2), (3, 4), (1, 6)]],
        '[' => &[&[(3, 0), (1, 0), (1, 6), (3, 6)]],
        ']' => &[&[(1, 0), (3, 0), (3, 6), (1, 6)]],
        '<' => &[&[(4, 1), (0, 3), (4, 5)]],
        '>' => &[&[(0, 1), (4, 3), (0, 5)]],
        '≤' => &[&[(4, 0), (0, 2), (4, 4)], &[(0, 6), (4, 6)]],
        '×' => &[&[(1, 2), (3, 4)], &[(3, 2), (1, 4)]],
        '·' => &[&[(2, 3)]],
        '\'' => &[&[(2, 0), (2, 2)]],
        '"' => &[&[(1, 0), (1, 2)], &[(3, 0), (3, 2)]],
        '!' => &[&[(2, 0), (2, 4)], &[(2, 6)]],
        '?' => &[&[(0, 1), (1, 0), (3, 0), (4, 1), (4, 2), (2, 4)], &[(2, 6)]],
        _ => BOX,
    }
}

/// Width in pixels of `text` at `scale` (no trailing spacing).
pub fn text_width(text: &str, scale: u32) -> u32 {
    let n = text.chars().count() as u32;
    if n == 0 {
        0
    } else {
        (n * ADVANCE - 1) * scale
    }
}

/// Draws `text` with its top-left corner at (`x`, `y`); pixels outside the image are
/// skipped.
pub fn draw_text(img: &mut RgbImage, x: i64, y: i64, text: &str, scale: u32, color: Rgb<u8>) {
    let s = scale.max(1) as i64;
    let mut pen = |px: i64, py: i64| {
        for dy in 0..s {
            for dx in 0..s {
                let (u, v) = (px + dx, py + dy);
                if u >= 0 && v >= 0 && (u as u32) < img.width() && (v as u32) < img.height() {
                    img.put_pixel(u as u32, v as u32, color);
                }
            }
        }
    };
    for (n, c) in text.chars().enumerate() {
        let gx = x + n as i64 * ADVANCE as i64 * s;
        for stroke in glyph(c) {
            let at = |(u, v): (i8, i8)| (gx + u as i64 * s, y + ROWS[v as usize] * s);
            let (mut px, mut py) = at(stroke[0]);
            pen(px, py);
            for &point in &stroke[1..] {
                let (qx, qy) = at(point);
                // One pen stamp per pixel step along the longer axis.
                let steps = (qx - px).abs().max((qy - py).abs()).max(1);
                for i in 1..=steps {
                    pen(px + (qx - px) * i / steps, py + (qy - py) * i / steps);
                }
                (px, py) = (qx, qy);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn render(c: char, scale: u32) -> RgbImage {
        let mut img = RgbImage::from_pixel(WIDTH * scale, HEIGHT * scale, Rgb([255, 255, 255]));
        draw_text(&mut img, 0, 0, &c.to_string(), scale, Rgb([0, 0, 0]));
        img
    }

    #[test]
    fn glyphs_differ_and_unknown_is_a_box() {
        let chars: Vec<char> = ('0'..='9').chain('A'..='Z').chain('a'..='z').chain(".,:-+%()/=".chars()).collect();
        let images: Vec<RgbImage> = chars.iter().map(|&c| render(c, 1)).collect();
        for i in 0..chars.len() {
            assert_ne!(images[i], render('\u{2603}', 1), "{:?} has no glyph of its own", chars[i]);
            for j in 0..i {
                // Lower and upper case may share a shape (o, x, z and friends) only across cases.
                let same_letter = chars[i].eq_ignore_ascii_case(&chars[j]);
                if !same_letter {
                    assert_ne!(images[i], images[j], "{:?} and {:?} are drawn alike", chars[i], chars[j]);
                }
            }
        }
        assert_eq!(render('#', 1), render('\u{2603}', 1));
        assert_ne!(render('#', 1), render(' ', 1));
    }

    #[test]
    fn not_the_old_bitmap_font() {
        // Rows of '0', '5' and 'a' in the 5×7 bitmap font this one replaced (bit 4 leftmost):
        // our glyphs must not reproduce them pixel for pixel, nor is their ink as tall.
        let old: [(char, [u8; 7]); 3] = [
            ('0', [0b01110, 0b10001, 0b10011, 0b10101, 0b11001, 0b10001, 0b01110]),
            ('5', [0b11111, 0b10000, 0b11110, 0b00001, 0b00001, 0b10001, 0b01110]),
            ('a', [0b00000, 0b00000, 0b01110, 0b00001, 0b01111, 0b10001, 0b01111]),
        ];
        for (c, rows) in old {
            let img = render(c, 1);
            let ours: Vec<u8> =
                (0..7).map(|y| (0..5).fold(0u8, |b, x| (b << 1) | (img.get_pixel(x, y).0[0] == 0) as u8)).collect();
            assert_ne!(ours, rows, "{c:?} matches the old bitmap");
            let ink_rows = (0..HEIGHT).filter(|&y| (0..WIDTH).any(|x| img.get_pixel(x, y).0[0] == 0)).count();
            let old_rows = rows.iter().filter(|&&r| r != 0).count();
            assert_ne!(ink_rows, old_rows, "{c:?} is as tall as the old glyph");
        }
    }

    #[test]
    fn text_lands_inside_its_box() {
        let mut img = RgbImage::from_pixel(40, 24, Rgb([255, 255, 255]));
        draw_text(&mut img, 2, 3, "1.5", 2, Rgb([0, 0, 0]));
        let w = text_width("1.5", 2);
        assert_eq!(w, 34);
        for (x, y, p) in img.enumerate_pixels() {
            if p.0 == [0, 0, 0] {
                assert!((2..2 + w).contains(&x) && (3..3 + 2 * CAP_HEIGHT).contains(&y), "ink at ({x}, {y})");
            }
        }
        assert!(img.pixels().any(|p| p.0 == [0, 0, 0]));
    }
}
