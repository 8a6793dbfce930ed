//! Evidence for frames worth a look: the thumbnail with the attention map and the
//! examined patches drawn on it, and full-resolution crops of the patches that weighed
//! most. Kept under a size quota and an age limit, oldest removed first. Any write
//! failure (full disk, unwritable folder) disables evidence with a warning; the detection
//! log is never affected.

use std::collections::VecDeque;
use std::path::PathBuf;
use std::time::{Duration, SystemTime};

use image::{Rgb, RgbImage};

use super::config::EvidenceConfig;
use crate::engine::Report;

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
                (m.is_file() && e.file_name().to_string_lossy().ends_with(".png"))
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

    /// Writes the overview and crops for one report; returns the files written.
    pub fn write(&mut self, report: &Report, frame: &RgbImage, stem: &str) -> Vec<PathBuf> {
        if !self.enabled {
            return vec![];
        }
        let mut written = Vec::new();
        let mut images = vec![(format!("{stem}-overview.png"), overview(report))];
        let mut by_weight: Vec<_> = report.patches.iter().collect();
        by_weight.sort_by(|a, b| b.weight.total_cmp(&a.weight));
        for (n, p) in by_weight.iter().take(self.crops).enumerate() {
            images.push((format!("{stem}-crop{}.png", n + 1), crop(frame, p.x, p.y, p.size)));
        }
        for (name, img) in images {
            let path = self.dir.join(name);
            if let Err(e) = img.save(&path) {
                std::fs::remove_file(&path).ok();
                self.disable(&format!("cannot write {}: {e}", path.display()));
                break;
            }
            let size = std::fs::metadata(&path).map(|m| m.len()).unwrap_or(0);
            self.files.push_back((SystemTime::now(), path.clone(), size));
            self.total += size;
            written.push(path);
        }
        self.prune();
        written
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

/// The thumbnail tinted red by attention (square root, so the tail stays visible), with
/// the examined patches outlined in yellow.
fn overview(report: &Report) -> RgbImage {
    let g = &report.geometry;
    let mut img = report.thumbnail.clone();
    let max = report.attention.iter().cloned().fold(0.0, f64::max).max(f64::MIN_POSITIVE);
    let stride = g.stride;
    for (x, y, px) in img.enumerate_pixels_mut() {
        let (r, c) = ((y / stride) as usize, (x / stride) as usize);
        if r < g.rows && c < g.cols {
            let alpha = 0.65 * (report.attention[r * g.cols + c] / max).sqrt();
            px.0[0] = (px.0[0] as f64 * (1.0 - alpha) + 255.0 * alpha) as u8;
            px.0[1] = (px.0[1] as f64 * (1.0 - alpha)) as u8;
            px.0[2] = (px.0[2] as f64 * (1.0 - alpha)) as u8;
        }
    }
    let s = g.factor as i64;
    for p in &report.patches {
        outline(&mut img, p.x.div_euclid(s), p.y.div_euclid(s), (p.size as i64 / s).max(1), Rgb([255, 230, 0]));
    }
    img
}

fn outline(img: &mut RgbImage, x0: i64, y0: i64, side: i64, colour: Rgb<u8>) {
    let (w, h) = (img.width() as i64, img.height() as i64);
    let mut put = |x: i64, y: i64| {
        if (0..w).contains(&x) && (0..h).contains(&y) {
            img.put_pixel(x as u32, y as u32, colour);
        }
    };
    for k in 0..side {
        put(x0 + k, y0);
        put(x0 + k, y0 + side - 1);
        put(x0, y0 + k);
        put(x0 + side - 1, y0 + k);
    }
}

/// The patch's pixels that lie inside the frame.
fn crop(frame: &RgbImage, x: i64, y: i64, size: u32) -> RgbImage {
    let x0 = x.clamp(0, frame.width() as i64 - 1) as u32;
    let y0 = y.clamp(0, frame.height() as i64 - 1) as u32;
    let x1 = (x + size as i64).clamp(x0 as i64 + 1, frame.width() as i64) as u32;
    let y1 = (y + size as i64).clamp(y0 as i64 + 1, frame.height() as i64) as u32;
    image::imageops::crop_imm(frame, x0, y0, x1 - x0, y1 - y0).to_image()
}
