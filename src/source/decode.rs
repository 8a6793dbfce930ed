//! Encoded image bytes (JPEG, PNG, PNM) to frames, refusing oversized images from the
//! header alone so that a hostile or broken file cannot make us allocate gigabytes.

use std::io::Cursor;
use std::path::Path;

use image::metadata::Orientation;
use image::{DynamicImage, ImageDecoder, ImageFormat, ImageReader, Limits};

use super::jpeg_end::{find_end, JpegEnd};

use crate::engine::Frame;

/// Default ceiling on decoded pixels: 40 MP leaves room above 12 MP sensors.
pub const DEFAULT_MAX_PIXELS: u64 = 40_000_000;

#[derive(Debug, thiserror::Error)]
pub enum DecodeError {
    #[error("{origin}: cannot read the file: {source}")]
    Io { origin: String, source: std::io::Error },
    #[error("{origin}: empty file (0 bytes), expected a JPEG, PNG or PNM image")]
    Empty { origin: String },
    #[error("{origin}: not a JPEG, PNG or PNM image (unrecognised header)")]
    UnknownFormat { origin: String },
    #[error("{origin}: the header declares {width}×{height} = {pixels} pixels, over the limit of {limit} pixels (max_pixels)")]
    TooLarge { origin: String, width: u32, height: u32, pixels: u64, limit: u64 },
    #[error("{origin}: corrupt or truncated {format:?} image: {message}")]
    Corrupt { origin: String, format: ImageFormat, message: String },
}

/// Reads and decodes one image file into a frame with sequence number `seq`.
pub fn decode_file(path: &Path, seq: u64, max_pixels: u64) -> Result<Frame, DecodeError> {
    let origin = path.display().to_string();
    let bytes = std::fs::read(path).map_err(|source| DecodeError::Io { origin: origin.clone(), source })?;
    decode_bytes(&bytes, origin, seq, max_pixels)
}

/// Decodes encoded bytes; the format comes from the content, never from a file name.
pub fn decode_bytes(bytes: &[u8], origin: String, seq: u64, max_pixels: u64) -> Result<Frame, DecodeError> {
    if bytes.is_empty() {
        return Err(DecodeError::Empty { origin });
    }
    let format = match image::guess_format(bytes) {
        Ok(f @ (ImageFormat::Jpeg | ImageFormat::Png | ImageFormat::Pnm)) => f,
        _ => return Err(DecodeError::UnknownFormat { origin }),
    };
    let corrupt = |e: image::ImageError, origin: &str| DecodeError::Corrupt {
        origin: origin.to_string(),
        format,
        message: e.to_string(),
    };

    // Header only: no pixel buffer exists yet.
    let (width, height) =
        ImageReader::with_format(Cursor::new(bytes), format).into_dimensions().map_err(|e| corrupt(e, &origin))?;
    let pixels = width as u64 * height as u64;
    if pixels > max_pixels {
        return Err(DecodeError::TooLarge { origin, width, height, pixels, limit: max_pixels });
    }
    if pixels == 0 {
        return Err(DecodeError::Corrupt {
            origin,
            format,
            message: format!("the header declares {width}×{height} pixels"),
        });
    }
    // Some JPEG decoders fill a truncated scan with grey instead of failing: a complete
    // file has the main image's end-of-image marker, whatever follows it. A file whose
    // markers do not walk is left to the decoder, which says what is wrong.
    if format == ImageFormat::Jpeg && find_end(bytes) == JpegEnd::Missing {
        return Err(DecodeError::Corrupt { origin, format, message: "truncated: no end-of-image marker".into() });
    }

    let mut reader = ImageReader::with_format(Cursor::new(bytes), format);
    let mut limits = Limits::default();
    // The decoder's own allocation cap, as a second guard: RGBA16 worst case plus slack.
    limits.max_alloc = Some(pixels * 8 + (1 << 20));
    reader.limits(limits);
    let mut decoder = reader.into_decoder().map_err(|e| corrupt(e, &origin))?;
    // A snapshot's EXIF orientation (JPEG APP1, PNG eXIf) says how to turn the pixels
    // upright; an unreadable one is taken as none, as viewers do.
    let orientation = decoder.orientation().unwrap_or(Orientation::NoTransforms);
    let mut image = DynamicImage::from_decoder(decoder).map_err(|e| corrupt(e, &origin))?;
    image.apply_orientation(orientation);
    Ok(Frame::new(seq, origin, image.into_rgb8()))
}
