//! Bad frames give clear errors and never panic or allocate a huge buffer.

use std::io::Cursor;

use image::{ImageFormat, RgbImage};
use saccade::source::{decode_bytes, decode_file, DecodeError, DEFAULT_MAX_PIXELS};

fn jpeg() -> Vec<u8> {
    let img = RgbImage::from_fn(64, 48, |x, y| image::Rgb([(x * 4) as u8, (y * 5) as u8, 90]));
    let mut buf = Cursor::new(Vec::new());
    img.write_to(&mut buf, ImageFormat::Jpeg).unwrap();
    buf.into_inner()
}

fn decode(bytes: &[u8]) -> Result<saccade::engine::Frame, DecodeError> {
    decode_bytes(bytes, "cam/frame-7.jpg".into(), 7, DEFAULT_MAX_PIXELS)
}

/// CRC-32 as PNG specifies it (ISO 3309 / ITU-T V.42 polynomial, reflected).
fn crc32(data: &[u8]) -> u32 {
    let mut c = 0xFFFF_FFFFu32;
    for &b in data {
        c ^= b as u32;
        for _ in 0..8 {
            c = if c & 1 != 0 { 0xEDB8_8320 ^ (c >> 1) } else { c >> 1 };
        }
    }
    !c
}

#[test]
fn a_good_jpeg_decodes() {
    let f = decode(&jpeg()).unwrap();
    assert_eq!((f.width(), f.height(), f.seq), (64, 48, 7));
}

#[test]
fn zero_byte_file_is_named() {
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("empty.jpg");
    std::fs::write(&path, b"").unwrap();
    let e = decode_file(&path, 0, DEFAULT_MAX_PIXELS).unwrap_err().to_string();
    assert!(e.contains("empty.jpg") && e.contains("empty file"), "{e}");
    let e = decode_file(&dir.path().join("missing.jpg"), 0, DEFAULT_MAX_PIXELS).unwrap_err().to_string();
    assert!(e.contains("missing.jpg") && e.contains("cannot read"), "{e}");
}

#[test]
fn truncated_jpeg_is_refused() {
    let j = jpeg();
    for cut in [j.len() / 2, j.len() - 10, 200] {
        let e = decode(&j[..cut]).unwrap_err();
        assert!(matches!(e, DecodeError::Corrupt { .. }), "cut at {cut}: {e}");
        assert!(e.to_string().contains("cam/frame-7.jpg"), "{e}");
    }
}

#[test]
fn corrupt_jpeg_is_refused() {
    let mut j = jpeg();
    // Overwrite the middle, scan data and tables alike, with noise.
    let n = j.len();
    for (k, b) in j[20..n - 2].iter_mut().enumerate() {
        *b = (k * 7919 % 251) as u8;
    }
    let e = decode(&j).unwrap_err();
    assert!(matches!(e, DecodeError::Corrupt { .. }), "{e}");
    let e = decode(b"this is not an image at all").unwrap_err().to_string();
    assert!(e.contains("not a JPEG, PNG or PNM"), "{e}");
}

#[test]
fn huge_header_is_refused_before_allocation() {
    // A PNM header claiming 100 000 × 100 000 pixels and no data.
    let e = decode(b"P6\n100000 100000\n255\n").unwrap_err();
    assert!(matches!(e, DecodeError::TooLarge { width: 100_000, height: 100_000, .. }), "{e}");
    assert!(e.to_string().contains("10000000000 pixels"), "{e}");

    // A PNG whose IHDR (with a valid CRC) claims the same.
    let mut ihdr = b"IHDR".to_vec();
    ihdr.extend(100_000u32.to_be_bytes());
    ihdr.extend(100_000u32.to_be_bytes());
    ihdr.extend([8, 2, 0, 0, 0]);
    let mut png = b"\x89PNG\r\n\x1a\n".to_vec();
    png.extend(13u32.to_be_bytes());
    png.extend(&ihdr);
    png.extend(crc32(&ihdr).to_be_bytes());
    // The start of the pixel data, which the header reader stops at; no more follows.
    let idat = b"IDAT\x78\x01".to_vec();
    png.extend(2u32.to_be_bytes());
    png.extend(&idat);
    png.extend(crc32(&idat).to_be_bytes());
    let e = decode(&png).unwrap_err();
    assert!(matches!(e, DecodeError::TooLarge { .. }), "{e}");
}

#[test]
fn pixel_limit_is_configurable() {
    let e = decode_bytes(&jpeg(), "small.jpg".into(), 0, 1000).unwrap_err().to_string();
    assert!(e.contains("64×48") && e.contains("limit of 1000"), "{e}");
}
