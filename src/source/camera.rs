//! A V4L2 camera through nokhwa. Frames arrive as MJPEG (decoded by `image`), YUYV or
//! NV12 (converted by the BT.601 equations in [`super::yuv`]). A lost camera is reported,
//! then reopened with backoff; the daemon never exits for it.

use std::time::{Duration, SystemTime};

use image::RgbImage;
use nokhwa::utils::{CameraFormat, CameraIndex, FrameFormat, RequestedFormat, RequestedFormatType};
use nokhwa::Camera;

use super::config::{device_index, SourceConfigError};
use super::decode::{decode_bytes, DecodeError};
use super::feed::{Feed, FrameError};
use super::yuv::{nv12_to_rgb, yuyv_to_rgb, ConvertError};
use crate::engine::Frame;

pub struct CameraSource {
    pub device: String,
    pub width: u32,
    pub height: u32,
    pub fps: u32,
    pub formats: Vec<String>,
    pub max_pixels: u64,
}

/// Why a camera frame could not be had.
#[derive(Debug, thiserror::Error)]
pub enum CameraError {
    #[error(transparent)]
    Device(#[from] SourceConfigError),
    /// nokhwa's explanation follows.
    #[error("{0}")]
    Open(String),
    #[error(transparent)]
    Decode(#[from] DecodeError),
    #[error(transparent)]
    Convert(#[from] ConvertError),
    #[error("short RGB frame: {got} bytes for {width}×{height}")]
    ShortRgb { width: u32, height: u32, got: usize },
    #[error("camera delivered {0}, which saccade does not convert")]
    Unsupported(String),
}

fn frame_format(name: &str) -> FrameFormat {
    match name {
        "yuyv" => FrameFormat::YUYV,
        "nv12" => FrameFormat::NV12,
        _ => FrameFormat::MJPEG,
    }
}

/// Raw camera bytes in `format` to RGB.
pub fn to_rgb(
    format: FrameFormat,
    data: &[u8],
    width: u32,
    height: u32,
    max_pixels: u64,
    origin: &str,
) -> Result<RgbImage, CameraError> {
    Ok(match format {
        FrameFormat::MJPEG => decode_bytes(data, origin.to_string(), 0, max_pixels)?.image,
        FrameFormat::YUYV => yuyv_to_rgb(data, width, height)?,
        FrameFormat::NV12 => nv12_to_rgb(data, width, height)?,
        FrameFormat::RAWRGB => RgbImage::from_raw(width, height, data.to_vec()).ok_or(CameraError::ShortRgb {
            width,
            height,
            got: data.len(),
        })?,
        other => return Err(CameraError::Unsupported(format!("{other:?}"))),
    })
}

const BACKOFF_MAX: Duration = Duration::from_secs(30);

impl CameraSource {
    fn open(&self, formats: &[FrameFormat]) -> Result<Camera, CameraError> {
        let index = device_index(&self.device)?;
        let wanted = CameraFormat::new_from(self.width, self.height, formats[0], self.fps);
        let request = RequestedFormat::with_formats(RequestedFormatType::Closest(wanted), formats);
        let mut cam = Camera::new(CameraIndex::Index(index), request).map_err(|e| CameraError::Open(e.to_string()))?;
        cam.open_stream().map_err(|e| CameraError::Open(e.to_string()))?;
        let f = cam.camera_format();
        log::info!(
            "{}: streaming {}×{} {:?} at {} frames/s",
            self.device,
            f.resolution().width(),
            f.resolution().height(),
            f.format(),
            f.frame_rate()
        );
        Ok(cam)
    }

    pub fn run(self, feed: Feed) {
        let formats: Vec<FrameFormat> = self.formats.iter().map(|f| frame_format(f)).collect();
        let mut backoff = Duration::from_secs(1);
        let mut seq = 0u64;
        while !feed.stopped() {
            let mut cam = match self.open(&formats) {
                Ok(c) => {
                    backoff = Duration::from_secs(1);
                    c
                }
                Err(e) => {
                    let message =
                        format!("camera {} unavailable: {e}; retrying in {} s", self.device, backoff.as_secs());
                    log::error!("{message}");
                    if !feed.send(Err(FrameError { origin: self.device.clone(), message })) || !feed.sleep(backoff) {
                        return;
                    }
                    backoff = (backoff * 2).min(BACKOFF_MAX);
                    continue;
                }
            };
            let mut failures = 0;
            while !feed.stopped() && failures < 3 {
                let item = match cam.frame() {
                    Ok(buf) => {
                        let res = buf.resolution();
                        let captured = SystemTime::now();
                        to_rgb(
                            buf.source_frame_format(),
                            buf.buffer(),
                            res.width(),
                            res.height(),
                            self.max_pixels,
                            &self.device,
                        )
                        .map(|image| {
                            failures = 0;
                            let mut f = Frame::new(seq, self.device.clone(), image);
                            f.captured = captured;
                            f
                        })
                        .map_err(|e| FrameError { origin: self.device.clone(), message: e.to_string() })
                    }
                    Err(e) => {
                        failures += 1;
                        Err(FrameError { origin: self.device.clone(), message: format!("camera read failed: {e}") })
                    }
                };
                seq += 1;
                if !feed.send(item) {
                    break;
                }
            }
            cam.stop_stream().ok();
            if failures >= 3 {
                log::error!("camera {} lost after repeated read failures; reopening", self.device);
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn device_paths_map_to_indices() {
        assert_eq!(device_index("/dev/video2"), Ok(2));
        assert_eq!(device_index("0"), Ok(0));
        assert!(device_index("/dev/sda").is_err());
    }

    #[test]
    fn converts_each_supported_format() {
        let yuyv = [81u8, 90, 81, 240]; // BT.601 red, two pixels
        let img = to_rgb(FrameFormat::YUYV, &yuyv, 2, 1, 100, "cam").unwrap();
        assert!(img.get_pixel(0, 0)[0] > 250 && img.get_pixel(1, 0)[1] < 5);
        assert!(to_rgb(FrameFormat::MJPEG, b"not a jpeg", 2, 1, 100, "cam")
            .unwrap_err()
            .to_string()
            .contains("not a JPEG"));
        assert!(to_rgb(FrameFormat::GRAY, &[0, 0], 2, 1, 100, "cam").is_err());
    }
}
