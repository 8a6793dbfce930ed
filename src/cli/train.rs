//! `saccade train`: train a bundle from frames with frame-level labels (cargo feature `train`).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use saccade::engine::Bundle;
use saccade::source::DEFAULT_MAX_PIXELS;
use saccade::train::data::Shape;
use saccade::train::fit::FitOptions;
use saccade::train::model::Arch;
use saccade::train::{train, TrainOptions};

/// Train the attention, feature and head networks (and a thumbnail-only comparison) on the CPU.
#[derive(Args)]
pub struct TrainArgs {
    /// Folder the labels file's frame names are relative to [default: the labels file's folder].
    #[arg(long)]
    pub frames: Option<PathBuf>,
    /// JSON Lines labels file: {"frame": FILE, "classes": [NAME, ...]} per line.
    #[arg(long)]
    pub labels: PathBuf,
    /// Bundle folder to write.
    #[arg(long)]
    pub out: PathBuf,
    #[arg(long, default_value = "trained")]
    pub name: String,
    /// Class names in output order [default: every class the labels name, sorted].
    #[arg(long, value_delimiter = ',')]
    pub classes: Vec<String>,
    #[arg(long, default_value_t = 30)]
    pub epochs: usize,
    /// Epochs with the attention held at its initial local-contrast form, training only the
    /// feature network and head (cheap), before end-to-end training.
    #[arg(long, default_value_t = 20)]
    pub warmup_epochs: usize,
    #[arg(long, default_value_t = 4)]
    pub batch: usize,
    /// Cells drawn per frame and step.
    #[arg(long, default_value_t = 32)]
    pub patches: usize,
    #[arg(long, default_value_t = 2e-3)]
    pub learning_rate: f64,
    /// Weight of the attention entropy bonus.
    #[arg(long, default_value_t = 0.01)]
    pub entropy: f64,
    /// Epochs without a better validation loss before stopping early.
    #[arg(long, default_value_t = 5)]
    pub patience: usize,
    /// Share of frames held out for validation.
    #[arg(long, default_value_t = 0.15)]
    pub validation: f64,
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    #[arg(long, default_value_t = 8)]
    pub thumbnail_factor: u32,
    #[arg(long, default_value_t = 4)]
    pub cell_stride: u32,
    /// Patch side in frame pixels (a multiple of 16).
    #[arg(long, default_value_t = 48)]
    pub patch_size: u32,
    /// Feature network shape: compact, wide or coarse (see DEVELOPERS.md).
    #[arg(long, default_value = "compact", value_parser = clap::builder::PossibleValuesParser::new(Arch::PRESETS))]
    pub arch: String,
    /// Epochs for the thumbnail-only comparison (same loss, split and early stopping).
    #[arg(long, default_value_t = 12)]
    pub baseline_epochs: usize,
    /// Skip the thumbnail-only comparison network.
    #[arg(long)]
    pub no_baseline: bool,
}

pub fn run(a: TrainArgs) -> anyhow::Result<ExitCode> {
    if a.patch_size == 0 || a.patch_size % 16 != 0 {
        anyhow::bail!("--patch-size {}: expected a positive multiple of 16", a.patch_size);
    }
    if !(0.0..1.0).contains(&a.validation) || a.epochs == 0 || a.batch == 0 || a.patches == 0 {
        anyhow::bail!("--validation must be in [0, 1); --epochs, --batch and --patches must be positive");
    }
    let o = TrainOptions {
        labels: a.labels,
        frames: a.frames,
        out: a.out.clone(),
        name: a.name,
        classes: a.classes,
        shape: Shape { factor: a.thumbnail_factor, stride: a.cell_stride, patch: a.patch_size },
        arch: Arch::preset(&a.arch).expect("clap checked the preset name"),
        fit: FitOptions {
            epochs: a.epochs,
            warmup: a.warmup_epochs,
            batch: a.batch,
            patches: a.patches,
            learning_rate: a.learning_rate,
            entropy: a.entropy,
            patience: a.patience,
        },
        validation: a.validation,
        seed: a.seed,
        baseline: !a.no_baseline,
        baseline_epochs: a.baseline_epochs,
        max_pixels: DEFAULT_MAX_PIXELS,
    };
    // One thread per model (the comparison trains beside the sampled model), unless the
    // caller chose otherwise: candle's pool adds more synchronisation than speed here.
    if std::env::var_os("RAYON_NUM_THREADS").is_none() {
        std::env::set_var("RAYON_NUM_THREADS", "1");
    }
    let t = train(&o)?;
    // The written bundle must load as the daemon would load it.
    Bundle::load(&a.out, &[1, 8])?;
    log::info!("wrote {} ({} classes) in {:.0} s", a.out.display(), t.manifest.classes.len(), t.seconds);
    Ok(ExitCode::SUCCESS)
}
