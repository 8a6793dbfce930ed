//! `saccade analyze`: one JSON object per image on standard output.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::Context;
use clap::Args;
use saccade::engine::{Bundle, Engine, EstimatorKind, Mask, Settings};
use saccade::source::{decode_file, DEFAULT_MAX_PIXELS};

/// Analyse image files once and print one JSON object per image.
#[derive(Args)]
pub struct AnalyzeArgs {
    /// JPEG, PNG or PNM files.
    #[arg(required = true)]
    pub images: Vec<PathBuf>,
    #[command(flatten)]
    pub engine: EngineArgs,
    /// Refuse images with more pixels than this (checked from the header).
    #[arg(long, default_value_t = DEFAULT_MAX_PIXELS)]
    pub max_pixels: u64,
}

/// Options shared by the commands that run the engine.
#[derive(Args, Clone)]
pub struct EngineArgs {
    /// Model bundle folder (holding bundle.toml).
    #[arg(long)]
    pub bundle: PathBuf,
    /// Time budget per frame in milliseconds.
    #[arg(long, default_value_t = Settings::default().budget_ms)]
    pub budget_ms: f64,
    /// priority, replacement or exhaustive.
    #[arg(long, default_value = "priority")]
    pub estimator: EstimatorKind,
    /// RNG seed; with the same seed and --patches an analysis replays exactly.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Examine exactly this many patches (sets both --min-patches and --max-patches).
    #[arg(long)]
    pub patches: Option<usize>,
    #[command(flatten)]
    pub limits: EngineLimits,
    /// Greyscale mask image of the frame size (black = ignore).
    #[arg(long)]
    pub mask: Option<PathBuf>,
}

/// Engine options shared by `analyze` and `sweep`.
#[derive(Args, Clone)]
pub struct EngineLimits {
    /// Patches examined even past the deadline.
    #[arg(long, default_value_t = Settings::default().min_patches)]
    pub min_patches: usize,
    /// Most patches examined per frame.
    #[arg(long, default_value_t = Settings::default().max_patches)]
    pub max_patches: usize,
    /// Patches per feature-network run.
    #[arg(long, default_value_t = Settings::default().batch)]
    pub batch: usize,
    /// Gaussian samples of the estimate for the uncertainty.
    #[arg(long, default_value_t = Settings::default().samples)]
    pub samples: usize,
}

impl EngineLimits {
    /// `base` with these patch bounds, batch and sample count.
    pub fn apply(&self, base: Settings) -> Settings {
        Settings {
            min_patches: self.min_patches,
            max_patches: self.max_patches,
            batch: self.batch,
            samples: self.samples,
            ..base
        }
    }
}

impl EngineArgs {
    pub fn settings(&self) -> Settings {
        let s =
            self.limits.apply(Settings { budget_ms: self.budget_ms, estimator: self.estimator, ..Settings::default() });
        match self.patches {
            Some(k) => Settings { min_patches: k, max_patches: k, ..s },
            None => s,
        }
    }

    /// Loads the bundle and builds an engine with these settings and the mask.
    pub fn engine(&self) -> anyhow::Result<Engine> {
        let settings = self.settings();
        let bundle = Bundle::load(&self.bundle, &settings.batch_sizes())?;
        let mut engine = Engine::new(Arc::new(bundle), settings)?;
        if let Some(path) = &self.mask {
            engine.set_mask(Some(Mask::from_image_file(path)?));
        }
        Ok(engine)
    }
}

pub fn run(args: AnalyzeArgs) -> anyhow::Result<ExitCode> {
    let mut engine = args.engine.engine()?;
    let mut out = std::io::stdout().lock();
    let mut failed = 0;
    for (seq, path) in args.images.iter().enumerate() {
        let t = std::time::Instant::now();
        let line = match decode_file(path, seq as u64, args.max_pixels) {
            Err(e) => Err(e.to_string()),
            Ok(frame) => {
                let decode_ms = t.elapsed().as_secs_f64() * 1000.0;
                engine.analyze(&frame, args.engine.seed).map_err(|e| e.to_string()).map(|mut r| {
                    r.times_ms.decode = Some(decode_ms);
                    serde_json::to_string(&r).expect("report serialises")
                })
            }
        };
        let line = line.unwrap_or_else(|e| {
            failed += 1;
            log::error!("{e}");
            serde_json::json!({ "origin": path.display().to_string(), "error": e }).to_string()
        });
        writeln!(out, "{line}").context("writing to standard output")?;
    }
    Ok(if failed == 0 { ExitCode::SUCCESS } else { ExitCode::FAILURE })
}
