//! Camera YUV formats to RGB by the ITU-R BT.601 equations, 8-bit studio (limited) range:
//! Y' in 16–235, Cb and Cr in 16–240 around 128, with Kr = 0.299 and Kb = 0.114:
//!
//! R = 1.164 (Y − 16) + 1.596 (Cr − 128)
//! G = 1.164 (Y − 16) − 0.392 (Cb − 128) − 0.813 (Cr − 128)
//! B = 1.164 (Y − 16) + 2.017 (Cb − 128)
//!
//! (coefficients are 255/219, and 255/224 times 2(1 − Kr), 2(1 − Kb)·Kb/Kg, 2(1 − Kr)·Kr/Kg,
//! 2(1 − Kb)), in 16.16 fixed point.

use image::RgbImage;

/// A camera buffer too short for the frame size it came with.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConvertError {
    #[error("YUYV frame of {width}×{height} needs an even width and {need} bytes, got {got}")]
    Yuyv { width: u32, height: u32, need: usize, got: usize },
    #[error("NV12 frame of {width}×{height} needs {need} bytes, got {got}")]
    Nv12 { width: u32, height: u32, need: usize, got: usize },
}

const FIX: i32 = 1 << 16;
const fn fix(x: f64) -> i32 {
    (x * FIX as f64 + 0.5) as i32
}
const KY: i32 = fix(255.0 / 219.0);
const KR_V: i32 = fix(255.0 / 224.0 * 2.0 * (1.0 - 0.299));
const KB_U: i32 = fix(255.0 / 224.0 * 2.0 * (1.0 - 0.114));
const KG_U: i32 = fix(255.0 / 224.0 * 2.0 * (1.0 - 0.114) * 0.114 / 0.587);
const KG_V: i32 = fix(255.0 / 224.0 * 2.0 * (1.0 - 0.299) * 0.299 / 0.587);

#[inline]
fn pixel(y: u8, u: u8, v: u8) -> [u8; 3] {
    let c = (y as i32 - 16) * KY;
    let (d, e) = (u as i32 - 128, v as i32 - 128);
    let clamp = |x: i32| ((x + FIX / 2) >> 16).clamp(0, 255) as u8;
    [clamp(c + KR_V * e), clamp(c - KG_U * d - KG_V * e), clamp(c + KB_U * d)]
}

/// YUYV 4:2:2 (bytes Y0 U Y1 V per two pixels) to RGB.
pub fn yuyv_to_rgb(data: &[u8], width: u32, height: u32) -> Result<RgbImage, ConvertError> {
    let (w, h) = (width as usize, height as usize);
    if w % 2 != 0 || data.len() < w * h * 2 {
        return Err(ConvertError::Yuyv { width, height, need: w * h * 2, got: data.len() });
    }
    let mut out = Vec::with_capacity(w * h * 3);
    for q in data[..w * h * 2].chunks_exact(4) {
        out.extend_from_slice(&pixel(q[0], q[1], q[3]));
        out.extend_from_slice(&pixel(q[2], q[1], q[3]));
    }
    Ok(RgbImage::from_raw(width, height, out).expect("sized from the frame"))
}

/// NV12 (a Y plane, then interleaved U V at half resolution both ways) to RGB.
pub fn nv12_to_rgb(data: &[u8], width: u32, height: u32) -> Result<RgbImage, ConvertError> {
    let (w, h) = (width as usize, height as usize);
    let need = w * h + w.div_ceil(2) * 2 * h.div_ceil(2);
    if data.len() < need {
        return Err(ConvertError::Nv12 { width, height, need, got: data.len() });
    }
    let (ys, uv) = data.split_at(w * h);
    let stride = w.div_ceil(2) * 2;
    let mut out = Vec::with_capacity(w * h * 3);
    for r in 0..h {
        let uv_row = &uv[(r / 2) * stride..];
        for c in 0..w {
            let k = (c / 2) * 2;
            out.extend_from_slice(&pixel(ys[r * w + c], uv_row[k], uv_row[k + 1]));
        }
    }
    Ok(RgbImage::from_raw(width, height, out).expect("sized from the frame"))
}
