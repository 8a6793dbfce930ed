//! A 5×7 bitmap font (with two rows below for descenders) for plot labels: digits,
//! lowercase letters, `F`, and the punctuation that tick labels and legends use. Anything
//! else is drawn as a hollow box, so a missing glyph shows instead of vanishing.

use image::{Rgb, RgbImage};

/// Glyph cell: 5 columns, 9 rows (7 above the baseline, 2 for descenders), one column
/// of spacing.
pub const WIDTH: u32 = 5;
pub const HEIGHT: u32 = 9;
/// Rows above the baseline: digits and capitals fill exactly these.
pub const CAP_HEIGHT: u32 = 7;
pub const ADVANCE: u32 = WIDTH + 1;

/// Rows top to bottom; bit 4 is the leftmost column.
fn glyph(c: char) -> [u8; 9] {
    let descender = match c {
        'g' => Some([0b00000, 0b00000, 0b01111, 0b10001, 0b10001, 0b10001, 0b01111, 0b00001, 0b01110]),
        'j' => Some([0b00010, 0b00000, 0b00110, 0b00010, 0b00010, 0b00010, 0b00010, 0b10010, 0b01100]),
        'p' => Some([0b00000, 0b00000, 0b11110, 0b10001, 0b10001, 0b10001, 0b11110, 0b10000, 0b10000]),
        'q' => Some([0b00000, 0b00000, 0b01111, 0b10001, 0b10001, 0b10001, 0b01111, 0b00001, 0b00001]),
        'y' => Some([0b00000, 0b00000, 0b10001, 0b10001, 0b10001, 0b10001, 0b01111, 0b00001, 0b01110]),
        _ => None,
    };
    if let Some(g) = descender {
        return g;
    }
    let rows: [u8; 7] = match c {
        '0' => [0b01110, 0b10001, 0b10011, 0b10101, 0b11001, 0b10001, 0b01110],
        '1' => [0b00100, 0b01100, 0b00100, 0b00100, 0b00100, 0b00100, 0b01110],
        '2' => [0b01110, 0b10001, 0b00001, 0b00010, 0b00100, 0b01000, 0b11111],
        '3' => [0b11111, 0b00010, 0b00100, 0b00010, 0b00001, 0b10001, 0b01110],
        '4' => [0b00010, 0b00110, 0b01010, 0b10010, 0b11111, 0b00010, 0b00010],
        '5' => [0b11111, 0b10000, 0b11110, 0b00001, 0b00001, 0b10001, 0b01110],
        '6' => [0b00110, 0b01000, 0b10000, 0b11110, 0b10001, 0b10001, 0b01110],
        '7' => [0b11111, 0b00001, 0b00010, 0b00100, 0b01000, 0b01000, 0b01000],
        '8' => [0b01110, 0b10001, 0b10001, 0b01110, 0b10001, 0b10001, 0b01110],
        '9' => [0b01110, 0b10001, 0b10001, 0b01111, 0b00001, 0b00010, 0b01100],
        'a' => [0b00000, 0b00000, 0b01110, 0b00001, 0b01111, 0b10001, 0b01111],
        'b' => [0b10000, 0b10000, 0b10110, 0b11001, 0b10001, 0b10001, 0b11110],
        'c' => [0b00000, 0b00000, 0b01110, 0b10000, 0b10000, 0b10001, 0b01110],
        'd' => [0b00001, 0b00001, 0b01101, 0b10011, 0b10001, 0b10001, 0b01111],
        'e' => [0b00000, 0b00000, 0b01110, 0b10001, 0b11111, 0b10000, 0b01110],
        'f' => [0b00110, 0b01001, 0b01000, 0b11100, 0b01000, 0b01000, 0b01000],
        'h' => [0b10000, 0b10000, 0b10110, 0b11001, 0b10001, 0b10001, 0b10001],
        'i' => [0b00100, 0b00000, 0b01100, 0b00100, 0b00100, 0b00100, 0b01110],
        'k' => [0b10000, 0b10000, 0b10010, 0b10100, 0b11000, 0b10100, 0b10010],
        'l' => [0b01100, 0b00100, 0b00100, 0b00100, 0b00100, 0b00100, 0b01110],
        'm' => [0b00000, 0b00000, 0b11010, 0b10101, 0b10101, 0b10001, 0b10001],
        'n' => [0b00000, 0b00000, 0b10110, 0b11001, 0b10001, 0b10001, 0b10001],
        'o' => [0b00000, 0b00000, 0b01110, 0b10001, 0b10001, 0b10001, 0b01110],
        'r' => [0b00000, 0b00000, 0b10110, 0b11001, 0b10000, 0b10000, 0b10000],
        's' => [0b00000, 0b00000, 0b01110, 0b10000, 0b01110, 0b00001, 0b11110],
        't' => [0b01000, 0b01000, 0b11100, 0b01000, 0b01000, 0b01001, 0b00110],
        'u' => [0b00000, 0b00000, 0b10001, 0b10001, 0b10001, 0b10011, 0b01101],
        'v' => [0b00000, 0b00000, 0b10001, 0b10001, 0b10001, 0b01010, 0b00100],
        'w' => [0b00000, 0b00000, 0b10001, 0b10001, 0b10101, 0b10101, 0b01010],
        'x' => [0b00000, 0b00000, 0b10001, 0b01010, 0b00100, 0b01010, 0b10001],
        'z' => [0b00000, 0b00000, 0b11111, 0b00010, 0b00100, 0b01000, 0b11111],
        'F' => [0b11111, 0b10000, 0b10000, 0b11110, 0b10000, 0b10000, 0b10000],
        '.' => [0b00000, 0b00000, 0b00000, 0b00000, 0b00000, 0b01100, 0b01100],
        '%' => [0b11000, 0b11001, 0b00010, 0b00100, 0b01000, 0b10011, 0b00011],
        '-' => [0b00000, 0b00000, 0b00000, 0b11111, 0b00000, 0b00000, 0b00000],
        '+' => [0b00000, 0b00100, 0b00100, 0b11111, 0b00100, 0b00100, 0b00000],
        '=' => [0b00000, 0b00000, 0b11111, 0b00000, 0b11111, 0b00000, 0b00000],
        ':' => [0b00000, 0b01100, 0b01100, 0b00000, 0b01100, 0b01100, 0b00000],
        '/' => [0b00000, 0b00001, 0b00010, 0b00100, 0b01000, 0b10000, 0b00000],
        '(' => [0b00010, 0b00100, 0b01000, 0b01000, 0b01000, 0b00100, 0b00010],
        ')' => [0b01000, 0b00100, 0b00010, 0b00010, 0b00010, 0b00100, 0b01000],
        '_' => [0b00000, 0b00000, 0b00000, 0b00000, 0b00000, 0b00000, 0b11111],
        ' ' => [0; 7],
        _ => [0b11111, 0b10001, 0b10001, 0b10001, 0b10001, 0b10001, 0b11111],
    };
    let mut out = [0u8; 9];
    out[..7].copy_from_slice(&rows);
    out
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
    let s = scale as i64;
    for (n, c) in text.chars().enumerate() {
        let gx = x + n as i64 * ADVANCE as i64 * s;
        for (row, bits) in glyph(c).iter().enumerate() {
            for col in 0..WIDTH as i64 {
                if bits & (1 << (WIDTH as i64 - 1 - col)) != 0 {
                    for dy in 0..s {
                        for dx in 0..s {
                            let (px, py) = (gx + col * s + dx, y + row as i64 * s + dy);
                            if px >= 0 && py >= 0 && (px as u32) < img.width() && (py as u32) < img.height() {
                                img.put_pixel(px as u32, py as u32, color);
                            }
                        }
                    }
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn digits_differ_and_unknown_is_a_box() {
        let digits: Vec<[u8; 9]> = "0123456789".chars().map(glyph).collect();
        for i in 0..10 {
            for j in 0..i {
                assert_ne!(digits[i], digits[j], "{i} and {j} share a glyph");
            }
        }
        assert_eq!(glyph('#'), glyph('\u{2603}'));
        assert_ne!(glyph('#'), glyph(' '));
    }

    #[test]
    fn text_lands_inside_its_box() {
        let mut img = RgbImage::from_pixel(40, 20, Rgb([255, 255, 255]));
        draw_text(&mut img, 2, 3, "1.5", 2, Rgb([0, 0, 0]));
        let w = text_width("1.5", 2);
        assert_eq!(w, 34);
        for (x, y, p) in img.enumerate_pixels() {
            if p.0 == [0, 0, 0] {
                assert!((2..2 + w).contains(&x) && (3..3 + 14).contains(&y), "ink at ({x}, {y})");
            }
        }
        assert!(img.pixels().any(|p| p.0 == [0, 0, 0]));
    }
}
