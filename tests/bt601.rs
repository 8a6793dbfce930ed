//! YUV → RGB against ITU-R BT.601 (Recommendation ITU-R BT.601-7, section 2.5): the
//! forward equations with Kr = 0.299, Kb = 0.114 and 8-bit studio range are applied here
//! to known colours, and the project's inverse must give the colours back.

use saccade::source::yuv::{nv12_to_rgb, yuyv_to_rgb};

/// BT.601 forward: E'Y = 0.299 R + 0.587 G + 0.114 B; Y = 219 E'Y + 16,
/// Cb = 224 (B − E'Y) / 1.772 + 128, Cr = 224 (R − E'Y) / 1.402 + 128 (R, G, B in 0–1).
fn bt601(rgb: [u8; 3]) -> [u8; 3] {
    let [r, g, b] = rgb.map(|v| v as f64 / 255.0);
    let y = 0.299 * r + 0.587 * g + 0.114 * b;
    let q = |x: f64| x.round().clamp(0.0, 255.0) as u8;
    [q(219.0 * y + 16.0), q(224.0 * (b - y) / 1.772 + 128.0), q(224.0 * (r - y) / 1.402 + 128.0)]
}

const COLOURS: [[u8; 3]; 9] = [
    [0, 0, 0],
    [255, 255, 255],
    [255, 0, 0],
    [0, 255, 0],
    [0, 0, 255],
    [255, 255, 0],
    [0, 255, 255],
    [255, 0, 255],
    [191, 191, 191],
];

#[test]
fn forward_equations_match_the_standards_published_values() {
    // Values printed in the standard's tables for 100 % colours are common knowledge in
    // video engineering (from memory): black 16/128/128, white 235/128/128,
    // red Y 81 Cb 90 Cr 240, blue Y 41 Cb 240 Cr 110.
    assert_eq!(bt601([0, 0, 0]), [16, 128, 128]);
    assert_eq!(bt601([255, 255, 255]), [235, 128, 128]);
    assert_eq!(bt601([255, 0, 0]), [81, 90, 240]);
    assert_eq!(bt601([0, 0, 255]), [41, 240, 110]);
}

#[test]
fn yuyv_gives_back_known_colours() {
    let mut data = Vec::new();
    for c in COLOURS {
        let [y, u, v] = bt601(c);
        data.extend_from_slice(&[y, u, y, v]);
    }
    let img = yuyv_to_rgb(&data, 2 * COLOURS.len() as u32, 1).unwrap();
    for (i, c) in COLOURS.iter().enumerate() {
        for x in [2 * i as u32, 2 * i as u32 + 1] {
            let got = img.get_pixel(x, 0).0;
            let worst = got.iter().zip(c).map(|(a, b)| (*a as i32 - *b as i32).abs()).max().unwrap();
            assert!(worst <= 2, "colour {c:?} came back as {got:?}");
        }
    }
    assert!(yuyv_to_rgb(&data[..10], 4, 2).is_err());
}

#[test]
fn nv12_gives_back_known_colours() {
    // One 2×2 block per colour, side by side: width 2n, height 2.
    let n = COLOURS.len();
    let (w, h) = (2 * n, 2);
    let mut ys = vec![0u8; w * h];
    let mut uv = vec![0u8; w];
    for (i, c) in COLOURS.iter().enumerate() {
        let [y, u, v] = bt601(*c);
        for (r, k) in [(0, 0), (0, 1), (1, 0), (1, 1)] {
            ys[r * w + 2 * i + k] = y;
        }
        uv[2 * i] = u;
        uv[2 * i + 1] = v;
    }
    let img = nv12_to_rgb(&[ys, uv].concat(), w as u32, h as u32).unwrap();
    for (i, c) in COLOURS.iter().enumerate() {
        let got = img.get_pixel(2 * i as u32 + 1, 1).0;
        let worst = got.iter().zip(c).map(|(a, b)| (*a as i32 - *b as i32).abs()).max().unwrap();
        assert!(worst <= 2, "colour {c:?} came back as {got:?}");
    }
}
