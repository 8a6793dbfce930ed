//! `saccade scene`: write generated sheet-inspection frames and their labels file.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Context;
use clap::{Args, ValueEnum};
use image::codecs::jpeg::JpegEncoder;
use saccade::demo::scene::{self, DefectClass, LookalikeKind, Mark};
use serde::Serialize;

use super::demo::parse_size;

/// Write generated frames of the demo scenario and `labels.jsonl`, deterministic by seed.
#[derive(Args)]
pub struct SceneArgs {
    /// Folder for the frames and labels.jsonl (created if missing).
    #[arg(long)]
    pub out: PathBuf,
    /// Frames to write.
    #[arg(long, default_value_t = 100)]
    pub count: u64,
    /// Frame n is drawn from generator seed SEED + n.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Frame size as WIDTHxHEIGHT.
    #[arg(long, default_value = "2448x2048", value_parser = parse_size)]
    pub size: (u32, u32),
    /// Image format of the frames.
    #[arg(long, value_enum, default_value_t = Format::Jpg)]
    pub format: Format,
    /// JPEG quality (1–100), as a camera's encoder would apply.
    #[arg(long, default_value_t = 92, value_parser = clap::value_parser!(u8).range(1..=100))]
    pub quality: u8,
}

#[derive(Clone, Copy, ValueEnum)]
pub enum Format {
    Jpg,
    Png,
}

/// One line of `labels.jsonl`: `frame` and `classes` are what training and sweeps read;
/// the rest records what was placed where.
#[derive(Serialize)]
struct LabelLine<'a> {
    frame: String,
    classes: Vec<&'a str>,
    seed: u64,
    width: u32,
    height: u32,
    defects: &'a [Mark<DefectClass>],
    lookalikes: &'a [Mark<LookalikeKind>],
}

fn encode(image: &image::RgbImage, format: Format, quality: u8, path: &Path) -> anyhow::Result<()> {
    match format {
        Format::Png => image.save(path)?,
        Format::Jpg => {
            let mut out = std::io::BufWriter::new(std::fs::File::create(path)?);
            image.write_with_encoder(JpegEncoder::new_with_quality(&mut out, quality))?;
            out.flush()?;
        }
    }
    Ok(())
}

pub fn run(args: SceneArgs) -> anyhow::Result<ExitCode> {
    std::fs::create_dir_all(&args.out).with_context(|| format!("creating {}", args.out.display()))?;
    let ext = match args.format {
        Format::Jpg => "jpg",
        Format::Png => "png",
    };
    let (w, h) = args.size;
    let workers = std::thread::available_parallelism().map_or(1, |n| n.get()) as u64;
    // Frames are generated in parallel; lines are written in frame order.
    let lines: Vec<anyhow::Result<String>> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..workers)
            .map(|k| {
                let args = &args;
                s.spawn(move || {
                    (k..args.count)
                        .step_by(workers as usize)
                        .map(|n| {
                            let seed = args.seed.wrapping_add(n);
                            let f = scene::generate(w, h, seed);
                            let name = format!("sheet-{n:06}.{ext}");
                            let path = args.out.join(&name);
                            encode(&f.image, args.format, args.quality, &path)
                                .with_context(|| format!("writing {}", path.display()))?;
                            let line = LabelLine {
                                frame: name,
                                classes: f.classes(),
                                seed,
                                width: w,
                                height: h,
                                defects: &f.defects,
                                lookalikes: &f.lookalikes,
                            };
                            Ok((n, serde_json::to_string(&line)?))
                        })
                        .collect::<Vec<anyhow::Result<(u64, String)>>>()
                })
            })
            .collect();
        let mut all: Vec<anyhow::Result<(u64, String)>> =
            handles.into_iter().flat_map(|h| h.join().expect("scene worker panicked")).collect();
        all.sort_by_key(|r| r.as_ref().map_or(0, |(n, _)| *n));
        all.into_iter().map(|r| r.map(|(_, s)| s)).collect()
    });
    let labels = args.out.join("labels.jsonl");
    let mut text = String::new();
    for line in lines {
        text.push_str(&line?);
        text.push('\n');
    }
    std::fs::write(&labels, text).with_context(|| format!("writing {}", labels.display()))?;
    log::info!("wrote {} frames of {w}×{h} and {}", args.count, labels.display());
    Ok(ExitCode::SUCCESS)
}
