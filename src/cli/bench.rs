//! `saccade bench`: per-stage costs of a bundle on this machine.

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::{Duration, Instant, SystemTime};

use anyhow::Context;
use clap::Args;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::demo::scene;
use saccade::engine::thumbnail::{area_reduce_loop, area_reduce_simd};
use saccade::engine::{Bundle, CellOrder, Engine, EstimatorKind, Settings};
use saccade::sinks::jsonl::JsonlLog;
use saccade::sinks::record::{rfc3339, FrameRecord, SCHEMA};
use saccade::sinks::{LogConfig, PatchPolicy, RecordPolicy, SyncPolicy};
use saccade::source::{decode_bytes, DEFAULT_MAX_PIXELS};
use serde::Serialize;
use tract_onnx::prelude::Tensor;

use super::demo::parse_size;

/// Measure per-stage costs (min / median / max over repeats) on this machine.
#[derive(Args)]
pub struct BenchArgs {
    /// Model bundle folder (holding bundle.toml); needed unless --train-step.
    #[arg(long)]
    pub bundle: Option<PathBuf>,
    /// Frame to use; without it a demo frame of --size is generated and JPEG-encoded.
    #[arg(long)]
    pub frame: Option<PathBuf>,
    /// Size of the generated frame as WIDTHxHEIGHT (without --frame).
    #[arg(long, default_value = "2448x2048", value_parser = parse_size)]
    pub size: (u32, u32),
    /// Repeats of each stage; min, median and max are reported.
    #[arg(long, default_value_t = 15)]
    pub repeats: usize,
    /// Budgets (ms) for which to report the frame rate they allow.
    #[arg(long, value_delimiter = ',', default_value = "25,50,100,200")]
    pub budgets: Vec<f64>,
    /// Print JSON instead of a table.
    #[arg(long)]
    pub json: bool,
    /// Time one end-to-end step of `saccade train` on generated frames of --size instead
    /// of a bundle's stages (compare with tests/bench/train_step.py).
    #[cfg(feature = "train")]
    #[arg(long)]
    pub train_step: bool,
    /// Frames per training step (with --train-step).
    #[cfg(feature = "train")]
    #[arg(long, default_value_t = 8)]
    pub step_frames: usize,
    /// Worker threads of the training step (with --train-step) [default: one per core].
    #[cfg(feature = "train")]
    #[arg(long)]
    pub threads: Option<usize>,
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
    dense: Dense,
}

/// The dense exhaustive pass over every cell, for comparison with the budgets.
#[derive(Serialize)]
struct Dense {
    cells: usize,
    median_ms: f64,
    frames_per_s: f64,
    frames_per_s_pipelined: f64,
}

#[derive(Serialize)]
struct BudgetRate {
    budget_ms: f64,
    /// Frames per second if every frame takes decode + the whole budget on one core.
    frames_per_s: f64,
    /// Frames per second with decoding in the source thread beside the analysis (two
    /// cores): `1000 / max(decode, budget)`.
    frames_per_s_pipelined: f64,
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
    #[cfg(feature = "train")]
    if args.train_step {
        return train_step(&args);
    }
    let Some(bundle_dir) = &args.bundle else {
        anyhow::bail!("--bundle is required: the bundle whose stages to time");
    };
    let n = args.repeats.max(1);
    let settings = Settings::default();
    let sizes = [1usize, 4, 16];
    let bundle = Arc::new(Bundle::load(bundle_dir, &sizes)?);
    let m = bundle.manifest.clone();
    let (bytes, origin) = match &args.frame {
        Some(p) => (std::fs::read(p).with_context(|| format!("reading {}", p.display()))?, p.display().to_string()),
        None => {
            let img = scene::generate(args.size.0, args.size.1, 1).image;
            let mut buf = std::io::Cursor::new(Vec::new());
            img.write_to(&mut buf, image::ImageFormat::Jpeg)?;
            (buf.into_inner(), format!("generated {}x{} JPEG", args.size.0, args.size.1))
        }
    };
    let frame = decode_bytes(&bytes, origin.clone(), 0, DEFAULT_MAX_PIXELS)?;
    let (fw, fh) = (frame.width(), frame.height());
    let mut stages =
        vec![measure("decode", n, || timed(|| drop(decode_bytes(&bytes, String::new(), 0, DEFAULT_MAX_PIXELS))))];
    let s = m.thumbnail_factor;
    stages.push(measure("thumbnail (area loop)", n, || timed(|| drop(area_reduce_loop(&frame.image, s)))));
    stages.push(measure("thumbnail (fast_image_resize box)", n, || timed(|| drop(area_reduce_simd(&frame.image, s)))));

    // The engine's own stages, as `analyze` runs them.
    let mut engine = Engine::new(bundle.clone(), settings.clone())?;
    engine.prepare(fw, fh)?;
    let thumb = engine.thumbnail(&frame);
    stages.push(measure("thumbnail (engine stage: reduce and normalise)", n, || {
        timed(|| drop(engine.thumbnail(&frame)))
    }));
    let attention = engine.attention(&frame, thumb.input.clone())?;
    stages.push(measure("attention network (engine stage: run, softmax)", n, || {
        let input = thumb.input.clone();
        timed(|| drop(engine.attention(&frame, input).expect("attention runs")))
    }));

    let g = attention.geometry;
    let mut rng = ChaCha8Rng::seed_from_u64(1);
    for &b in &sizes {
        stages.push(measure(&format!("per patch, batch {b} (engine stage: extract and run)"), n, || {
            let cells: Vec<usize> = (0..b).map(|_| rng.random_range(0..g.cells())).collect();
            timed(|| drop(engine.features(&frame, &g, &cells).expect("features run"))) / b as u32
        }));
    }

    let p = m.patch_size as usize;
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
    let weights = CellOrder::new(EstimatorKind::Priority, &a, 0, &mut rng).weights(k);
    stages.push(measure(&format!("head + uncertainty ({} samples, {k} patches)", settings.samples), n, || {
        timed(|| drop(engine.head(&weights, &feats, &mut rng).expect("head runs")))
    }));

    let net_busy = || bundle.attention.busy() + bundle.features.busy() + bundle.head.busy();
    let mut overhead = Vec::new();
    let mut report = None;
    stages.push(measure(&format!("whole analysis, priority, {} ms budget", settings.budget_ms), n, || {
        let busy0 = net_busy();
        let t = Instant::now();
        report = Some(engine.analyze(&frame, 7).expect("analysis runs"));
        let total = t.elapsed();
        overhead.push((total - (net_busy() - busy0)).as_secs_f64() * 1000.0);
        total
    }));
    let report = report.expect("at least one repeat");
    // A typical frame record through the daemon's own log writer, once with the default
    // sync policy and once with an fsync per record.
    // The default record: no per-patch list ([log] patches = "none").
    let mut report = report;
    report.patches.clear();
    let record = FrameRecord {
        schema: SCHEMA,
        record: "frame",
        time: rfc3339(SystemTime::now()),
        captured: rfc3339(frame.captured),
        age_ms: report.times_ms.total,
        evidence: None,
        claim: None,
        report: &report,
    };
    for (sync, label) in [(SyncPolicy::Interval, "sync = interval"), (SyncPolicy::Always, "sync = always")] {
        let path = std::env::temp_dir().join(format!("saccade-bench-{}.jsonl", std::process::id()));
        let cfg = LogConfig {
            path: path.clone(),
            records: RecordPolicy::All,
            patches: PatchPolicy::None,
            rotate_mb: 64.0,
            keep: 1,
            sync,
            sync_interval_s: 5.0,
            health_interval_s: 60.0,
            backlog_mb: 16.0,
        };
        let mut log = JsonlLog::open(&cfg).with_context(|| format!("opening {}", path.display()))?;
        stages.push(measure(&format!("log write: frame record, serialise + append ({label})"), n, || {
            timed(|| {
                let line = serde_json::to_vec(&record).expect("serialises");
                log.append(&line).expect("log write");
            })
        }));
        drop(log);
        std::fs::remove_file(&path).ok();
    }
    engine.set_settings(Settings { estimator: EstimatorKind::Exhaustive, ..settings.clone() })?;
    let cells = report.cells;
    stages.push(measure(&format!("dense: exhaustive over every cell ({cells} cells)"), n.min(3), || {
        timed(|| drop(engine.analyze(&frame, 7).expect("analysis runs")))
    }));

    let median = |name: &str| stages.iter().find(|s| s.stage.starts_with(name)).map(|s| s.median_ms).unwrap_or(0.0);
    overhead.sort_by(f64::total_cmp);
    let whole = median("whole analysis");
    let share = overhead[overhead.len() / 2] / (median("decode") + whole);
    let decode = median("decode");
    let dense_ms = median("dense");
    let frame_rates = args
        .budgets
        .iter()
        .map(|&b| BudgetRate {
            budget_ms: b,
            frames_per_s: 1000.0 / (decode + b),
            frames_per_s_pipelined: 1000.0 / decode.max(b),
        })
        .collect();
    let dense = Dense {
        cells,
        median_ms: dense_ms,
        frames_per_s: 1000.0 / (decode + dense_ms),
        frames_per_s_pipelined: 1000.0 / decode.max(dense_ms),
    };
    let out = BenchReport {
        frame: origin,
        width: fw,
        height: fh,
        repeats: n,
        stages,
        engine_overhead_share: share,
        frame_rates,
        dense,
    };
    if args.json {
        println!("{}", serde_json::to_string_pretty(&out)?);
    } else {
        println!("{} ({}×{}), {} repeats, bundle {}", out.frame, fw, fh, n, bundle_dir.display());
        let w = out.stages.iter().map(|s| s.stage.chars().count()).max().unwrap_or(5);
        println!("{:<w$} {:>9} {:>9} {:>9}", "stage", "min ms", "median ms", "max ms");
        for s in &out.stages {
            println!("{:<w$} {:>9.3} {:>9.3} {:>9.3}", s.stage, s.min_ms, s.median_ms, s.max_ms);
        }
        println!(
            "engine overhead (all but decode and network runs): {:.1} % of the frame",
            100.0 * out.engine_overhead_share
        );
        println!("frame rate a budget allows: one core (decode + budget), two threads (decode beside the budget)");
        for r in &out.frame_rates {
            println!(
                "  budget {:>7.1} ms → at most {:>5.1} frames/s on one core, {:>5.1} frames/s pipelined",
                r.budget_ms, r.frames_per_s, r.frames_per_s_pipelined
            );
        }
        let d = &out.dense;
        println!(
            "  dense   {:>7.1} ms → at most {:>5.1} frames/s on one core, {:>5.1} frames/s pipelined ({} cells)",
            d.median_ms, d.frames_per_s, d.frames_per_s_pipelined, d.cells
        );
    }
    Ok(ExitCode::SUCCESS)
}

/// `--train-step`: the step of `saccade train`'s end-to-end stage with its default shape
/// (24 top and 8 tail patches per frame, the standard networks) on generated frames.
#[cfg(feature = "train")]
fn train_step(args: &BenchArgs) -> anyhow::Result<ExitCode> {
    use saccade::train::bench::{time_step, StepBench};
    use saccade::train::data::Shape;
    use saccade::train::model::Arch;

    let frames = (0..args.step_frames.max(1))
        .map(|i| {
            let s = scene::generate(args.size.0, args.size.1, 1 + i as u64);
            let target = scene::CLASSES.iter().map(|c| s.defects.iter().any(|d| d.kind.name() == *c) as u8 as f32);
            (s.image, target.collect())
        })
        .collect();
    let threads = args.threads.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    let t = time_step(StepBench {
        frames,
        shape: Shape { factor: 8, stride: 4, patch: 48 },
        arch: Arch::default(),
        top: 24,
        tail: 8,
        threads,
        repeats: args.repeats,
    })?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&t)?);
    } else {
        println!(
            "training step ({}, {} thread(s)): {} frames of {}x{}, thumbnail {}x{}, {} patches per frame",
            t.implementation,
            t.threads,
            t.frames,
            args.size.0,
            args.size.1,
            t.thumbnail[1],
            t.thumbnail[0],
            t.patches_per_frame
        );
        println!(
            "median {:.1} ms per step (min {:.1}), {:.1} ms per frame",
            t.median_ms_per_step, t.min_ms_per_step, t.median_ms_per_frame
        );
    }
    Ok(ExitCode::SUCCESS)
}
