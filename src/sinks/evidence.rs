//! Evidence for frames worth a look, for a person to read: an overview of the frame at a
//! legible size with the patches that carry each finding boxed and labelled (class,
//! probability, outcome), and enlarged, captioned full-resolution crops around those
//! patches. Kept under a size quota and an age limit, oldest removed first. Any write
//! failure (full disk, unwritable folder) disables evidence with a warning; the detection
//! log is never affected.
//!
//! Sizes (documented in the README): the overview is the frame reduced by the integer
//! factor `f = ceil(max(width, height) / OVERVIEW_SIDE)` (at least 1), `ceil(W/f)` wide and
//! `ceil(H/f) + HEADER` high, as JPEG; a crop is the `2P × 2P` region (P = patch side)
//! centred on a finding's patch, enlarged `z = max(1, round(CROP_SIDE / 2P))` times
//! (nearest pixel, so pixels stay pixels), with a caption band of `CAPTION` rows below, as PNG.

use std::collections::VecDeque;
use std::path::PathBuf;
use std::time::{Duration, SystemTime};

use image::{Rgb, RgbImage};

use super::config::EvidenceConfig;
use super::record::EvidenceFiles;
use crate::engine::thumbnail::area_reduce;
use crate::engine::{ClassResult, Outcome, Report, Spot};
use crate::font::{draw_text, text_width, HEIGHT as GLYPH_HEIGHT};

/// Longest side of the overview, at most, in pixels.
pub const OVERVIEW_SIDE: u32 = 1280;
/// Rows of the title band above the overview.
pub const HEADER: u32 = 56;
/// Side a crop is enlarged to, about.
pub const CROP_SIDE: u32 = 384;
/// Rows of the caption band below a crop.
pub const CAPTION: u32 = 84;
/// Text size in pen widths (the font's glyphs are 9 pens high).
const TEXT: u32 = 2;

const PAPER: Rgb<u8> = Rgb([250, 248, 240]);
const INK: Rgb<u8> = Rgb([30, 30, 30]);
const OUTSIDE: Rgb<u8> = Rgb([60, 60, 60]);

/// Mark colour of an outcome: signal red for detected, amber for review.
fn colour(o: Outcome) -> Rgb<u8> {
    match o {
        Outcome::Detected => Rgb([214, 38, 38]),
        _ => Rgb([236, 160, 0]),
    }
}

fn outcome_word(o: Outcome) -> &'static str {
    match o {
        Outcome::Detected => "detected",
        Outcome::Review => "review",
        Outcome::Clear => "clear",
    }
}

pub struct Evidence {
    dir: PathBuf,
    quota: u64,
    max_age: Duration,
    crops: usize,
    /// Files we know of, oldest first, with their sizes.
    files: VecDeque<(SystemTime, PathBuf, u64)>,
    total: u64,
    pub enabled: bool,
}

impl Evidence {
    pub fn open(cfg: &EvidenceConfig) -> Self {
        let mut ev = Self {
            dir: cfg.dir.clone(),
            quota: (cfg.quota_mb * 1024.0 * 1024.0) as u64,
            max_age: Duration::from_secs_f64(cfg.max_age_hours * 3600.0),
            crops: cfg.crops,
            files: VecDeque::new(),
            total: 0,
            enabled: cfg.enabled,
        };
        if ev.enabled {
            if let Err(e) = std::fs::create_dir_all(&ev.dir) {
                ev.disable(&format!("cannot create the folder: {e}"));
            } else {
                ev.scan();
                ev.prune();
            }
        }
        ev
    }

    fn scan(&mut self) {
        let mut found: Vec<(SystemTime, PathBuf, u64)> = std::fs::read_dir(&self.dir)
            .into_iter()
            .flatten()
            .flatten()
            .filter_map(|e| {
                let m = e.metadata().ok()?;
                let name = e.file_name().to_string_lossy().into_owned();
                (m.is_file() && (name.ends_with(".png") || name.ends_with(".jpg")))
                    .then(|| (m.modified().unwrap_or(SystemTime::UNIX_EPOCH), e.path(), m.len()))
            })
            .collect();
        found.sort();
        self.total = found.iter().map(|f| f.2).sum();
        self.files = found.into();
    }

    fn disable(&mut self, why: &str) {
        log::warn!("evidence disabled ({}): {why}; the detection log goes on", self.dir.display());
        self.enabled = false;
    }

    /// Writes the overview and the crops of one report's findings; returns the files
    /// written (None when evidence is off or a write failed).
    pub fn write(&mut self, report: &Report, frame: &RgbImage, stem: &str) -> Option<EvidenceFiles> {
        if !self.enabled {
            return None;
        }
        let mut images = vec![(format!("{stem}-overview.jpg"), overview(report, frame))];
        let findings = report.classes.iter().filter(|c| c.outcome != Outcome::Clear);
        let spots = findings.flat_map(|c| c.patches.iter().map(move |s| (c, s)));
        for (n, (class, spot)) in spots.take(self.crops).enumerate() {
            images.push((format!("{stem}-crop{}.png", n + 1), crop(frame, class, spot)));
        }
        let mut written = Vec::new();
        for (name, img) in images {
            let path = self.dir.join(name);
            let saved = if path.extension().is_some_and(|e| e == "jpg") {
                save_jpeg(&img, &path)
            } else {
                img.save(&path).map_err(|e| e.to_string())
            };
            if let Err(e) = saved {
                std::fs::remove_file(&path).ok();
                self.disable(&format!("cannot write {}: {e}", path.display()));
                self.prune();
                return None;
            }
            let size = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
            self.files.push_back((SystemTime::now(), path.clone(), size));
            self.total += size;
            written.push(path.display().to_string());
        }
        self.prune();
        let overview = written.remove(0);
        Some(EvidenceFiles { overview, crops: written })
    }

    /// Removes files past the age limit, then the oldest until the quota holds.
    fn prune(&mut self) {
        let now = SystemTime::now();
        while let Some((t, path, size)) = self.files.front().cloned() {
            let old = now.duration_since(t).unwrap_or_default() > self.max_age;
            if !old && self.total <= self.quota {
                break;
            }
            std::fs::remove_file(&path).ok();
            self.total -= size;
            self.files.pop_front();
        }
    }

    pub fn total_bytes(&self) -> u64 {
        self.total
    }
}

fn save_jpeg(img: &RgbImage, path: &std::path::Path) -> Result<(), String> {
    let file = std::fs::File::create(path).map_err(|e| e.to_string())?;
    let mut w = std::io::BufWriter::new(file);
    image::codecs::jpeg::JpegEncoder::new_with_quality(&mut w, 90).encode_image(img).map_err(|e| e.to_string())?;
    std::io::Write::flush(&mut w).map_err(|e| e.to_string())
}

/// The overview's reduction factor for a frame.
pub fn overview_factor(width: u32, height: u32) -> u32 {
    width.max(height).div_ceil(OVERVIEW_SIDE).max(1)
}

/// The overview's size for a frame, as documented above.
pub fn overview_size(width: u32, height: u32) -> (u32, u32) {
    let f = overview_factor(width, height);
    (width.div_ceil(f), height.div_ceil(f) + HEADER)
}

/// The enlargement of a crop for a patch side.
pub fn crop_zoom(patch: u32) -> u32 {
    ((CROP_SIDE as f64 / (2 * patch.max(1)) as f64).round() as u32).max(1)
}

/// A crop's size for a patch side, as documented above.
pub fn crop_size(patch: u32) -> (u32, u32) {
    let side = 2 * patch * crop_zoom(patch);
    (side, side + CAPTION)
}

fn fill(img: &mut RgbImage, x0: i64, y0: i64, w: i64, h: i64, c: Rgb<u8>) {
    for y in y0.max(0)..(y0 + h).min(img.height() as i64) {
        for x in x0.max(0)..(x0 + w).min(img.width() as i64) {
            img.put_pixel(x as u32, y as u32, c);
        }
    }
}

/// A square outline `thick` pixels wide, its outer edge at (x0, y0) with side `side`.
fn frame_box(img: &mut RgbImage, x0: i64, y0: i64, side: i64, thick: i64, c: Rgb<u8>) {
    fill(img, x0, y0, side, thick, c);
    fill(img, x0, y0 + side - thick, side, thick, c);
    fill(img, x0, y0, thick, side, c);
    fill(img, x0 + side - thick, y0, thick, side, c);
}

/// Text on a filled label, cut to `max_w` pixels; returns the label's width.
fn label(img: &mut RgbImage, x: i64, y: i64, text: &str, bg: Rgb<u8>, fg: Rgb<u8>) -> i64 {
    let w = text_width(text, TEXT) as i64 + 8;
    fill(img, x, y, w, (GLYPH_HEIGHT * TEXT) as i64 + 6, bg);
    draw_text(img, x + 4, y + 3, text, TEXT, fg);
    w
}

/// `text` cut to what fits in `width` pixels at the text size.
fn fit(text: &str, width: u32) -> String {
    let room = ((width.saturating_sub(8)) / (crate::font::ADVANCE * TEXT)) as usize;
    text.chars().take(room).collect()
}

/// The frame reduced to a legible size under a title band; each patch that carries a
/// finding boxed in its outcome's colour and labelled with class and probability.
fn overview(report: &Report, frame: &RgbImage) -> RgbImage {
    let f = overview_factor(frame.width(), frame.height());
    let small = area_reduce(frame, f);
    let (w, h) = overview_size(frame.width(), frame.height());
    let mut img = RgbImage::from_pixel(w, h, PAPER);
    image::imageops::replace(&mut img, &small, 0, HEADER as i64);
    let findings: Vec<&ClassResult> = report.classes.iter().filter(|c| c.outcome != Outcome::Clear).collect();
    let title = format!(
        "frame {} · {}×{} · {} patches · {} finding(s)",
        report.seq,
        report.width,
        report.height,
        report.patch_count,
        findings.len()
    );
    draw_text(&mut img, 8, 6, &fit(&title, w), TEXT, INK);
    let summary: Vec<String> = findings
        .iter()
        .map(|c| {
            format!(
                "{} {} {:.2} [{:.2}-{:.2}]",
                c.name,
                outcome_word(c.outcome),
                c.probability,
                c.interval[0],
                c.interval[1]
            )
        })
        .collect();
    draw_text(&mut img, 8, 8 + (GLYPH_HEIGHT * TEXT) as i64 + 4, &fit(&summary.join("  "), w), TEXT, INK);
    // One box per patch, labelled with every class it carries (several classes often
    // share their strongest patch); labels move down until they overlap no earlier one.
    let f = f as i64;
    let mut marks: Vec<(i64, i64, u32, Outcome, Vec<String>)> = Vec::new();
    for c in &findings {
        for s in &c.patches {
            let text = format!("{} {:.2}", c.name, c.probability);
            match marks.iter_mut().find(|m| (m.0, m.1) == (s.x, s.y)) {
                Some(m) => {
                    m.4.push(text);
                    if c.outcome == Outcome::Detected {
                        m.3 = Outcome::Detected;
                    }
                }
                None => marks.push((s.x, s.y, s.size, c.outcome, vec![text])),
            }
        }
    }
    let lh = (GLYPH_HEIGHT * TEXT) as i64 + 6;
    let mut taken: Vec<(i64, i64, i64, i64)> = Vec::new();
    for (x, y, size, outcome, texts) in &marks {
        let col = colour(*outcome);
        let side = (*size as i64 / f).max(1);
        let margin = 6;
        let (x0, y0) = (x.div_euclid(f) - margin, y.div_euclid(f) + HEADER as i64 - margin);
        frame_box(&mut img, x0, y0, side + 2 * margin, 3, col);
        let text = texts.join(" · ");
        let lw = text_width(&text, TEXT) as i64 + 8;
        // Above the box where there is room, else below it; left edge kept in the image.
        let lx = x0.min(w as i64 - lw).max(0);
        let mut ly = if y0 - lh - 2 >= HEADER as i64 { y0 - lh - 2 } else { y0 + side + 2 * margin + 2 };
        let overlaps = |ly: i64, t: &[(i64, i64, i64, i64)]| {
            t.iter().any(|&(tx, ty, tw, th)| lx < tx + tw && tx < lx + lw && ly < ty + th && ty < ly + lh)
        };
        for _ in 0..8 {
            if !overlaps(ly, &taken) {
                break;
            }
            ly += lh + 2;
        }
        let fg = if *outcome == Outcome::Detected { Rgb([255, 255, 255]) } else { INK };
        label(&mut img, lx, ly, &text, col, fg);
        taken.push((lx, ly, lw, lh));
    }
    img
}

/// The `2P × 2P` region around a finding's patch, enlarged, with the patch outlined and a
/// caption: class and outcome, the frame's probability and interval, the patch's own
/// probability and where it lies in the frame.
fn crop(frame: &RgbImage, class: &ClassResult, spot: &Spot) -> RgbImage {
    let p = spot.size as i64;
    let z = crop_zoom(spot.size) as i64;
    let (w, h) = crop_size(spot.size);
    let mut img = RgbImage::from_pixel(w, h, PAPER);
    let (x0, y0) = (spot.x - p / 2, spot.y - p / 2);
    for v in 0..2 * p {
        for u in 0..2 * p {
            let (fx, fy) = (x0 + u, y0 + v);
            let px = if fx >= 0 && fy >= 0 && fx < frame.width() as i64 && fy < frame.height() as i64 {
                *frame.get_pixel(fx as u32, fy as u32)
            } else {
                OUTSIDE
            };
            fill(&mut img, u * z, v * z, z, z, px);
        }
    }
    let col = colour(class.outcome);
    frame_box(&mut img, p / 2 * z - 2, p / 2 * z - 2, p * z + 4, 2, col);
    let side = 2 * p * z;
    fill(&mut img, 0, side, w as i64, 6, col);
    let lines = [
        format!("{} {}", class.name, outcome_word(class.outcome)),
        format!("frame p {:.2} [{:.2}-{:.2}]", class.probability, class.interval[0], class.interval[1]),
        format!("patch p {:.2} at {},{} ×{z}", spot.probability, spot.x, spot.y),
    ];
    for (n, line) in lines.iter().enumerate() {
        draw_text(&mut img, 6, side + 12 + n as i64 * 23, &fit(line, w), TEXT, INK);
    }
    img
}
