//! Whether a JPEG file is complete: its markers are walked from the start to the
//! end-of-image marker, skipping segments by their lengths and entropy-coded data up to
//! the next marker. Bytes after the end marker (padding, vendor trailers) do not matter;
//! an end marker inside an embedded thumbnail (skipped with its segment) does not count.

/// What the walk found.
#[derive(Debug, PartialEq, Eq)]
pub enum JpegEnd {
    /// The end-of-image marker of the main image, at this offset.
    Found(usize),
    /// The data stops before it: a truncated file.
    Missing,
    /// A byte where a marker must be.
    Malformed(usize),
}

pub fn find_end(bytes: &[u8]) -> JpegEnd {
    if !bytes.starts_with(&[0xFF, 0xD8]) {
        return JpegEnd::Malformed(0);
    }
    let mut i = 2;
    loop {
        if i >= bytes.len() {
            return JpegEnd::Missing;
        }
        if bytes[i] != 0xFF {
            return JpegEnd::Malformed(i);
        }
        // Fill bytes: any number of 0xFF before the marker code.
        while i < bytes.len() && bytes[i] == 0xFF {
            i += 1;
        }
        let Some(&code) = bytes.get(i) else { return JpegEnd::Missing };
        let at = i - 1;
        i += 1;
        match code {
            0xD9 => return JpegEnd::Found(at),
            // Markers without a length: restart markers and TEM.
            0xD0..=0xD7 | 0x01 => continue,
            0x00 => return JpegEnd::Malformed(at),
            _ => {}
        }
        let Some(len) = bytes.get(i..i + 2).map(|b| u16::from_be_bytes([b[0], b[1]]) as usize) else {
            return JpegEnd::Missing;
        };
        if len < 2 {
            return JpegEnd::Malformed(i);
        }
        i += len;
        if code == 0xDA {
            // Entropy-coded data: a 0xFF in it is followed by 0x00 (stuffing) or a
            // restart marker; anything else is the next marker.
            loop {
                match bytes.get(i..i + 2) {
                    None => return JpegEnd::Missing,
                    Some([0xFF, next]) if *next != 0x00 && !(0xD0..=0xD7).contains(next) => break,
                    _ => i += 1,
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn walks_segments_and_scan_data_to_the_end_marker() {
        // SOI, APP1 holding a thumbnail's own SOI/EOI, SOS header, scan data with a
        // stuffed 0xFF and a restart marker, EOI, then trailing bytes.
        let app1 = [0xFF, 0xE1, 0x00, 0x08, 0xFF, 0xD8, 0xFF, 0xD9, 0x00, 0x00];
        let sos = [0xFF, 0xDA, 0x00, 0x04, 0x01, 0x02];
        let scan = [0x12, 0xFF, 0x00, 0x34, 0xFF, 0xD3, 0x56];
        let mut f = vec![0xFF, 0xD8];
        f.extend(app1);
        f.extend(sos);
        f.extend(scan);
        let end = f.len();
        f.extend([0xFF, 0xD9]);
        assert_eq!(find_end(&f), JpegEnd::Found(end));
        f.extend([0u8; 500]);
        assert_eq!(find_end(&f), JpegEnd::Found(end), "trailing bytes");
        // Cut anywhere before the end marker: missing, never found in the thumbnail.
        for cut in 2..end + 1 {
            assert_eq!(find_end(&f[..cut]), JpegEnd::Missing, "cut at {cut}");
        }
        assert_eq!(find_end(b"\xFF\xD8\x12"), JpegEnd::Malformed(2));
    }
}
