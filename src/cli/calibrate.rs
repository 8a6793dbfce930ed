//! `saccade calibrate`: fits a bundle's calibration maps and risk-controlled outcome
//! thresholds to the user's own labelled frames, and writes `calibration.json` into the
//! bundle (the networks are not touched).

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::{bail, Context};
use clap::Args;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use saccade::bundle::calibration::{self, Calibration, Targets};
use saccade::engine::{Bundle, Engine, EstimatorKind, Settings};
use saccade::eval::metrics::ece;
use saccade::labels::{class_matrix, read_labels, rebase};
use saccade::source::{decode_file, DEFAULT_MAX_PIXELS};

use super::analyze::EngineLimits;

/// Fit the bundle's probability maps and outcome thresholds to labelled frames.
#[derive(Args)]
pub struct CalibrateArgs {
    /// Model bundle folder; calibration.json is written into it.
    #[arg(long)]
    pub bundle: PathBuf,
    /// JSON Lines labels, one `{"frame": FILE, "classes": [NAME, ...]}` per frame. Use frames
    /// the bundle was not trained on, from the camera it will watch.
    #[arg(long)]
    pub labels: PathBuf,
    /// Folder the labels' frame names are relative to [default: the labels file's folder].
    #[arg(long)]
    pub frames: Option<PathBuf>,
    /// Budget per frame, as the daemon will run (the thresholds hold for the estimate it gives).
    #[arg(long, default_value_t = Settings::default().budget_ms)]
    pub budget_ms: f64,
    /// priority, replacement or exhaustive.
    #[arg(long, default_value = "priority")]
    pub estimator: EstimatorKind,
    /// Examine exactly this many patches per frame (instead of the budget: repeatable on any machine).
    #[arg(long)]
    pub patches: Option<usize>,
    #[command(flatten)]
    pub limits: EngineLimits,
    /// Largest share of frames carrying a class that may be called clear.
    #[arg(long, default_value_t = Targets::default().miss)]
    pub miss_target: f64,
    /// Largest share of frames without a class that may be called detected.
    #[arg(long, default_value_t = Targets::default().false_alarm)]
    pub false_alarm_target: f64,
    /// Confidence, over the calibration frames, that each target holds.
    #[arg(long, default_value_t = Targets::default().confidence)]
    pub target_confidence: f64,
    /// Equal-width bins of the expected calibration error printed at the end.
    #[arg(long, default_value_t = 10)]
    pub ece_bins: usize,
    /// Refuse frames with more pixels than this (checked from the header).
    #[arg(long, default_value_t = DEFAULT_MAX_PIXELS)]
    pub max_pixels: u64,
}

pub fn run(args: CalibrateArgs) -> anyhow::Result<ExitCode> {
    let targets =
        Targets { miss: args.miss_target, false_alarm: args.false_alarm_target, confidence: args.target_confidence };
    calibration::check_targets(&targets).map_err(|(f, p)| {
        let flag = match f {
            "miss" => "--miss-target",
            "false_alarm" => "--false-alarm-target",
            _ => "--target-confidence",
        };
        anyhow::anyhow!("{flag} {p}")
    })?;
    if args.ece_bins == 0 {
        bail!("--ece-bins 0: expected at least 1 bin");
    }
    let mut settings =
        args.limits.apply(Settings { budget_ms: args.budget_ms, estimator: args.estimator, ..Settings::default() });
    if let Some(k) = args.patches {
        (settings.min_patches, settings.max_patches, settings.budget_ms) = (k, k, 1e9);
    }
    let mut bundle = Bundle::load(&args.bundle, &settings.batch_sizes())?;
    // The maps are fitted to the head's own probabilities: set aside any earlier file.
    bundle.calibration = None;
    let bundle = Arc::new(bundle);
    let classes = bundle.manifest.classes.clone();
    let mut engine = Engine::new(bundle.clone(), settings)?;
    let mut items = read_labels(&args.labels)?;
    if let Some(dir) = &args.frames {
        rebase(&mut items, dir);
    }
    let truth = class_matrix(&items, &classes, &args.labels)?;
    if items.is_empty() {
        bail!("{}: no labelled frames", args.labels.display());
    }
    let target =
        if std::io::stderr().is_terminal() { ProgressDrawTarget::stderr() } else { ProgressDrawTarget::hidden() };
    let bar = ProgressBar::with_draw_target(Some(items.len() as u64), target);
    bar.set_style(
        ProgressStyle::with_template("{bar:32} {pos}/{len} frames  {elapsed} (eta {eta})").expect("valid template"),
    );
    let mut probs = Vec::with_capacity(items.len());
    for (i, it) in items.iter().enumerate() {
        let at = || format!("{}:{}: frame {}", args.labels.display(), it.line, it.frame.display());
        let frame = decode_file(&it.frame, i as u64, args.max_pixels).with_context(at)?;
        let r = engine.analyze(&frame, i as u64).with_context(at)?;
        probs.push(r.classes.iter().map(|c| c.probability).collect::<Vec<f64>>());
        bar.inc(1);
    }
    bar.finish_and_clear();

    let how = match args.patches {
        Some(k) => format!("{k} patches per frame"),
        None => format!("a {} ms budget", args.budget_ms),
    };
    let description = format!(
        "saccade calibrate on {} labelled frames from {} ({} estimator, {how})",
        items.len(),
        args.labels.display(),
        args.estimator
    );
    let cal = Calibration::fit(&classes, &probs, &truth, &targets, &description);
    cal.write(&args.bundle).with_context(|| format!("writing {}", args.bundle.join(calibration::FILE).display()))?;

    let after: Vec<Vec<f64>> =
        probs.iter().map(|row| row.iter().zip(&cal.classes).map(|(&p, c)| c.map.apply(p)).collect()).collect();
    println!("{description}");
    println!(
        "targets: misses ≤ {:.1} %, false alarms ≤ {:.1} %, each with {:.0} % confidence (Clopper–Pearson bounds)",
        100.0 * targets.miss,
        100.0 * targets.false_alarm,
        100.0 * targets.confidence
    );
    println!(
        "{:<12} {:>6} {:>6} {:>8} {:>8} {:>12} {:>15}",
        "class", "with", "without", "a", "b", "clear below", "detected above"
    );
    for c in &cal.classes {
        println!(
            "{:<12} {:>6} {:>6} {:>8.3} {:>8.3} {:>12.4} {:>15.4}",
            c.name,
            c.positives.len(),
            c.negatives.len(),
            c.map.a,
            c.map.b,
            c.clear_below,
            c.detected_above
        );
    }
    // The fewest frames with (without) a class that can show a target with no error at all.
    let least = |target: f64| ((1.0 - targets.confidence).ln() / (1.0 - target).ln()).ceil() as usize;
    for c in &cal.classes {
        if c.clear_below == 0.0 {
            println!(
                "note: {}: {} frames carry it, too few to back `clear` at this target (at least {} are needed): it is never clear",
                c.name,
                c.positives.len(),
                least(targets.miss)
            );
        }
        if c.detected_above == 1.0 {
            println!(
                "note: {}: {} frames lack it, too few to back `detected` at this target (at least {} are needed): it is never detected",
                c.name,
                c.negatives.len(),
                least(targets.false_alarm)
            );
        }
    }
    println!(
        "ECE on these frames ({} bins): {:.4} before, {:.4} after (in-sample; measure held-out frames with saccade sweep)",
        args.ece_bins,
        ece(&probs, &truth, args.ece_bins),
        ece(&after, &truth, args.ece_bins)
    );
    println!("wrote {}", args.bundle.join(calibration::FILE).display());
    Ok(ExitCode::SUCCESS)
}
