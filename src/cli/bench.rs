//! `saccade bench`: per-stage costs of a bundle on this machine.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant};

use anyhow::Context;
use clap::Args;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::demo::scene;
use saccade::engine::analysis::f32_slice;
use saccade::engine::estimator::{EstimatorKind, Plan};
use saccade::engine::patches::Normalizer;
use saccade::engine::thumbnail::{area_reduce, area_reduce_loop, area_reduce_simd, thumbnail_size};
use saccade::engine::uncertainty::{probabilities, sample_psi, summarise};
use saccade::engine::{Bundle, Engine, Settings};
use saccade::source::{decode_bytes, DEFAULT_MAX_PIXELS};
use serde::Serialize;
use tract_onnx::prelude::Tensor;

use super::demo::parse_size;

/// Measure per-stage costs (min / median / max over repeats) on this machine.
#[derive(Args)]
pub struct BenchArgs {
    #[arg(long)]
    pub bundle: PathBuf,
    /// Frame to use; without it a demo frame of --size is generated and JPEG-encoded.
    #[arg(long)]
    pub frame: Option<PathBuf>,
    #[arg(long, default_value = "2448x2048", value_parser = parse_size)]
    pub size: (u32, u32),
    #[arg(long, default_value_t = 15)]
    pub repeats: usize,
    /// Budgets (ms) for which to report the frame rate they allow.
    #[arg(long, value_delimiter = ',', default_value = "25,50,100,200")]
    pub budgets: Vec<f64>,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
}

#[derive(Serialize)]
struct Stage {
    stage: String,
    min_ms: f64,
    median_ms: f64,
    max_ms: f64,
}

#[derive(Serialize)]
struct BenchReport {
    frame: String,
    width: u32,
    height: u32,
    repeats: usize,
    stages: Vec<Stage>,
    /// Share of the analysed frame (decode + engine) spent outside decode and network runs.
    engine_overhead_share: f64,
    frame_rates: Vec<BudgetRate>,
}

#[derive(Serialize)]
struct BudgetRate {
    budget_ms: f64,
    /// Frames per second if every frame takes decode + the whole budget.
    frames_per_s: f64,
}

fn measure(name: &str, repeats: usize, mut f: impl FnMut() -> Duration) -> Stage {
    let mut t: Vec<f64> = (0..repeats).map(|_| f().as_secs_f64() * 1000.0).collect();
    t.sort_by(f64::total_cmp);
    Stage { stage: name.to_string(), min_ms: t[0], median_ms: t[t.len() / 2], max_ms: t[t.len() - 1] }
}

fn timed(f: impl FnOnce()) -> Duration {
    let t = Instant::now();
    f();
    t.elapsed()
}

pub fn run(args: BenchArgs) -> anyhow::Result<ExitCode> {
    let n = args.repeats.max(1);
    let settings = Settings::default();
    let sizes = [1usize, 4, 16];
    let bundle = Arc::new(Bundle::load(&args.bundle, &sizes)?);
    let m = bundle.manifest.clone();
    let (bytes, origin) = match &args.frame {
        Some(p) => (std::fs::read(p).with_context(|| format!("reading {}", p.display()))?, p.display().to_string()),
        None => {
            let img = scene::generate(args.size.0, args.size.1, 1, 3).image;
            let mut buf = std::io::Cursor::new(Vec::new());
            img.write_to(&mut buf, image::ImageFormat::Jpeg)?;
            (buf.into_inner(), format!("generated {}x{} JPEG", args.size.0, args.size.1))
        }
    };
    let frame = decode_bytes(&bytes, origin.clone(), 0, DEFAULT_MAX_PIXELS)?;
    let (fw, fh) = (frame.width(), frame.height());
    let mut stages = vec![measure("decode", n, || timed(|| drop(decode_bytes(&bytes, String::new(), 0, DEFAULT_MAX_PIXELS))))];
    let s = m.thumbnail_factor;
    stages.push(measure("thumbnail (area loop)", n, || timed(|| drop(area_reduce_loop(&frame.image, s)))));
    stages.push(measure("thumbnail (fast_image_resize box)", n, || timed(|| drop(area_reduce_simd(&frame.image, s)))));

    let norm = Normalizer::new(&m.normalization);
    let thumb = area_reduce(&frame.image, s);
    let (tw, th) = thumbnail_size(fw, fh, s);
    let shape = [1, 3, th as usize, tw as usize];
    bundle.attention.plan(&shape)?;
    stages.push(measure("attention network", n, || {
        let mut input = Tensor::zero::<f32>(&shape).expect("tensor");
        norm.write_planar(&thumb, f32_slice(&mut input));
        timed(|| drop(bundle.attention.run(input).expect("attention runs")))
    }));

    let p = m.patch_size as usize;
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for &b in &sizes {
        stages.push(measure(&format!("per patch, batch {b}"), n, || {
            let t = Instant::now();
            let mut batch = Tensor::zero::<f32>(&[b, 3, p, p]).expect("tensor");
            let dst = f32_slice(&mut batch);
            for j in 0..b {
                let origin = (rng.random_range(0..fw as i64 - p as i64), rng.random_range(0..fh as i64 - p as i64));
                norm.write_patch(&frame.image, origin, p, &mut dst[j * 3 * p * p..(j + 1) * 3 * p * p]);
            }
            bundle.features.run(batch).expect("features run");
            t.elapsed() / b as u32
        }));
    }

    for &b in &sizes {
        let input = Tensor::zero::<f32>(&[b, 3, p, p]).expect("tensor");
        stages.push(measure(&format!("feature network only, per patch, batch {b}"), n, || {
            let input = input.clone();
            timed(|| drop(bundle.features.run(input).expect("features run"))) / b as u32
        }));
    }

    let d = m.feature_dim;
    let k = 64;
    let feats: Vec<f32> = (0..k * d).map(|_| rng.random_range(-1.0..1.0)).collect();
    let a: Vec<f64> = vec![1.0 / 4096.0; 4096];
    let weights = Plan::new(EstimatorKind::Priority, &a, 0, &mut rng).weights(k);
    bundle.head.plan(&[settings.samples + 1, d])?;
    stages.push(measure(&format!("head + uncertainty ({} samples, {k} patches)", settings.samples), n, || {
        timed(|| {
            let rows = sample_psi(&weights, &feats, d, settings.samples, &mut rng);
            let logits = bundle.head.run(Tensor::from_shape(&[settings.samples + 1, d], &rows).expect("tensor")).expect("head runs");
            let probs = probabilities(logits.as_slice().expect("dense"), m.classes.len(), m.activation);
            drop(summarise(&probs, &m.classes, &m.thresholds, settings.interval));
        })
    }));

    let mut engine = Engine::new(bundle.clone());
    engine.prepare(fw, fh, &settings)?;
    let net_busy = || bundle.attention.busy() + bundle.features.busy() + bundle.head.busy();
    let mut overhead = Vec::new();
    let mut report = None;
    stages.push(measure(&format!("whole analysis, priority, {} ms budget", settings.budget_ms), n, || {
        let busy0 = net_busy();
        let t = Instant::now();
        report = Some(engine.analyze(&frame, &settings, 7).expect("analysis runs"));
        let total = t.elapsed();
        overhead.push((total - (net_busy() - busy0)).as_secs_f64() * 1000.0);
        total
    }));
    let report = report.expect("at least one repeat");
    let log_path = std::env::temp_dir().join(format!("saccade-bench-{}.jsonl", std::process::id()));
    let mut log = std::fs::OpenOptions::new().create(true).append(true).open(&log_path)?;
    stages.push(measure("log record (serialise + append + flush)", n, || {
        timed(|| {
            let mut line = serde_json::to_vec(&report).expect("serialises");
            line.push(b'\n');
            log.write_all(&line).expect("log write");
            log.flush().expect("flush");
        })
    }));
    std::fs::remove_file(&log_path).ok();
    let dense = Settings { estimator: EstimatorKind::Exhaustive, ..settings.clone() };
    stages.push(measure("dense: exhaustive over every cell", n.min(3), || timed(|| drop(engine.analyze(&frame, &dense, 7).expect("analysis runs")))));

    let median = |name: &str| stages.iter().find(|s| s.stage.starts_with(name)).map(|s| s.median_ms).unwrap_or(0.0);
    overhead.sort_by(f64::total_cmp);
    let whole = median("whole analysis");
    let share = overhead[overhead.len() / 2] / (median("decode") + whole);
    let frame_rates = args.budgets.iter().map(|&b| BudgetRate { budget_ms: b, frames_per_s: 1000.0 / (median("decode") + b) }).collect();
    let out = BenchReport { frame: origin, width: fw, height: fh, repeats: n, stages, engine_overhead_share: share, frame_rates };
    if args.json {
        println!("{}", serde_json::to_string_pretty(&out)?);
    } else {
        println!("{} ({}×{}), {} repeats, bundle {}", out.frame, fw, fh, n, args.bundle.display());
        println!("{:<52} {:>9} {:>9} {:>9}", "stage", "min ms", "median ms", "max ms");
        for s in &out.stages {
            println!("{:<52} {:>9.3} {:>9.3} {:>9.3}", s.stage, s.min_ms, s.median_ms, s.max_ms);
        }
        println!("engine overhead (all but decode and network runs): {:.1} % of the frame", 100.0 * out.engine_overhead_share);
        for r in &out.frame_rates {
            println!("budget {:>6.0} ms → at most {:>5.1} frames/s (decode + budget)", r.budget_ms, r.frames_per_s);
        }
    }
    Ok(ExitCode::SUCCESS)
}
