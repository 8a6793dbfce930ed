//! `saccade demo`: write the shipped demo bundle and generated frames, then analyse them.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use clap::Args;
use saccade::demo::{designed, scene, shipped};
use saccade::engine::{Bundle, Engine, Outcome, Settings};
use saccade::source::{decode_file, DEFAULT_MAX_PIXELS};

/// Run the engine on generated sheet-inspection frames; no camera or model download needed.
#[derive(Args)]
pub struct DemoArgs {
    /// Folder for the generated bundle and frames.
    #[arg(long, default_value = "demo-out")]
    pub out: PathBuf,
    /// Generated frames to write and analyse.
    #[arg(long, default_value_t = 4)]
    pub frames: usize,
    /// Seed of the generated frames and of the analyses.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Frame size as WIDTHxHEIGHT.
    #[arg(long, default_value = "2448x2048", value_parser = parse_size)]
    pub size: (u32, u32),
    /// Time budget per frame in milliseconds.
    #[arg(long, default_value_t = Settings::default().budget_ms)]
    pub budget_ms: f64,
    /// Use the designed (untrained) bundle instead of the shipped trained one.
    #[arg(long)]
    pub designed: bool,
}

pub fn parse_size(s: &str) -> Result<(u32, u32), String> {
    let (w, h) = s.split_once('x').ok_or_else(|| format!("{s:?}: expected WIDTHxHEIGHT, e.g. 2448x2048"))?;
    let parse = |v: &str| {
        v.parse::<u32>().ok().filter(|&n| n > 0).ok_or_else(|| format!("{s:?}: {v:?} is not a positive integer"))
    };
    Ok((parse(w)?, parse(h)?))
}

pub fn run(args: DemoArgs) -> anyhow::Result<ExitCode> {
    let bundle_dir = args.out.join("bundle");
    if args.designed {
        designed::write_bundle(&bundle_dir, &designed::DesignedParams::default())
    } else {
        shipped::write_bundle(&bundle_dir)
    }
    .with_context(|| format!("writing {}", bundle_dir.display()))?;
    let frames_dir = args.out.join("frames");
    std::fs::create_dir_all(&frames_dir).with_context(|| format!("creating {}", frames_dir.display()))?;
    let settings = Settings { budget_ms: args.budget_ms, ..Settings::default() };
    let bundle = Bundle::load(&bundle_dir, &settings.batch_sizes())?;
    let mut engine = Engine::new(Arc::new(bundle), settings)?;
    let mut out = std::io::stdout().lock();
    for n in 0..args.frames {
        let seed = args.seed.wrapping_mul(1_000_003).wrapping_add(n as u64);
        let generated = scene::generate(args.size.0, args.size.1, seed);
        let path = frames_dir.join(format!("sheet-{n:03}.jpg"));
        generated.image.save(&path).with_context(|| format!("writing {}", path.display()))?;
        let t = std::time::Instant::now();
        let frame = decode_file(&path, n as u64, DEFAULT_MAX_PIXELS)?;
        let decode_ms = t.elapsed().as_secs_f64() * 1000.0;
        let mut report = engine.analyze(&frame, seed)?;
        report.times_ms.decode = Some(decode_ms);
        writeln!(out, "{}", serde_json::to_string(&report)?)?;
        let placed = generated.classes();
        let said: Vec<String> = report
            .classes
            .iter()
            .filter(|c| c.outcome != Outcome::Clear)
            .map(|c| format!("{}:{:?}", c.name, c.outcome).to_lowercase())
            .collect();
        log::info!(
            "{}: placed [{}], engine says [{}] from {} patches ({:.0} % of attention) in {:.1} ms",
            path.display(),
            placed.join(", "),
            said.join(", "),
            report.patch_count,
            100.0 * report.attention_mass,
            report.times_ms.total
        );
    }
    Ok(ExitCode::SUCCESS)
}
