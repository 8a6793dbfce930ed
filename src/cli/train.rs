//! `saccade train`: train a bundle from frames with frame-level labels (cargo feature `train`).

use std::path::PathBuf;
use std::process::ExitCode;

use clap::Args;
use saccade::engine::Bundle;
use saccade::source::DEFAULT_MAX_PIXELS;
use saccade::train::data::{Augment, Shape};
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
    /// Bundle name written into bundle.toml.
    #[arg(long, default_value = "trained")]
    pub name: String,
    /// Class names in output order [default: every class the labels name, sorted].
    #[arg(long, value_delimiter = ',')]
    pub classes: Vec<String>,
    /// Epochs of end-to-end training (all three networks).
    #[arg(long, default_value_t = 40)]
    pub epochs: usize,
    /// Epochs before end-to-end training with the attention held at its initial
    /// local-contrast form, training only the feature network and head.
    #[arg(long, default_value_t = 20)]
    pub warmup_epochs: usize,
    /// Epochs after the warm-up that teach the attention network, alone, what the
    /// warmed-up feature network sees in each cell.
    #[arg(long, default_value_t = 10)]
    pub attention_epochs: usize,
    /// Frames per step.
    #[arg(long, default_value_t = 8)]
    pub batch: usize,
    /// Cells of highest attention examined per frame and step end to end.
    #[arg(long, default_value_t = 24)]
    pub top: usize,
    /// Cells of highest initial attention examined per frame and step in the warm-up.
    #[arg(long, default_value_t = 24)]
    pub warmup_top: usize,
    /// Every this many warm-up epochs, score a wide pool of each frame's cells with the
    /// patch classifier and add each class's strongest cells to the frame's warm-up cells
    /// (0: never).
    #[arg(long, default_value_t = 0)]
    pub warmup_mine: usize,
    /// Further cells drawn per frame and step from the remaining attention.
    #[arg(long, default_value_t = 8)]
    pub tail: usize,
    /// AdamW step size at the start of each stage (cosine decay to a twentieth).
    #[arg(long, default_value_t = 2e-3)]
    pub learning_rate: f64,
    /// Step size of the attention network (end to end) relative to --learning-rate.
    #[arg(long, default_value_t = 0.5)]
    pub attention_rate: f64,
    /// Step size of the feature network and head end to end relative to --learning-rate
    /// (they arrive trained by the warm-up).
    #[arg(long, default_value_t = 0.25)]
    pub tune_rate: f64,
    /// Weight of the attention entropy bonus.
    #[arg(long, default_value_t = 0.0)]
    pub entropy: f64,
    /// Epochs without a better validation loss before a stage stops early.
    #[arg(long, default_value_t = 8)]
    pub patience: usize,
    /// Share of frames held out for validation, early stopping and thresholds.
    #[arg(long, default_value_t = 0.2)]
    pub validation: f64,
    /// Patches per held-out frame when validating (priority sampling, as the engine).
    #[arg(long, default_value_t = 64)]
    pub val_patches: usize,
    /// Seed of the split, initial weights, draws and augmentation.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Frame pixels per thumbnail pixel.
    #[arg(long, default_value_t = 8)]
    pub thumbnail_factor: u32,
    /// Thumbnail pixels per attention cell (a power of two).
    #[arg(long, default_value_t = 4)]
    pub cell_stride: u32,
    /// Patch side in frame pixels (a multiple of 8).
    #[arg(long, default_value_t = 48)]
    pub patch_size: u32,
    /// Network widths: standard or small (see DEVELOPERS.md).
    #[arg(long, default_value = "standard", value_parser = clap::builder::PossibleValuesParser::new(Arch::PRESETS))]
    pub arch: String,
    /// Epochs for the thumbnail-only comparison (same loss, split and early stopping).
    #[arg(long, default_value_t = 20)]
    pub baseline_epochs: usize,
    /// Skip the thumbnail-only comparison network.
    #[arg(long)]
    pub no_baseline: bool,
    /// Do not show frames mirrored and turned by quarter turns.
    #[arg(long)]
    pub no_flips: bool,
    /// Contrast jitter: gain drawn from [1 - G, 1 + G] per frame and step.
    #[arg(long, default_value_t = 0.15)]
    pub gain_jitter: f32,
    /// Brightness jitter: offset in grey levels drawn from [-O, O] per frame and step.
    #[arg(long, default_value_t = 15.0)]
    pub offset_jitter: f32,
    /// Start from the weights of a stage file an earlier run wrote (OUT/stages/NAME.json;
    /// same --arch and classes) instead of the initial ones; with --warmup-epochs 0, training
    /// continues where that stage ended.
    #[arg(long)]
    pub start_from: Option<PathBuf>,
    /// Worker threads [default: the CPU cores available].
    #[arg(long)]
    pub threads: Option<usize>,
}

pub fn run(a: TrainArgs) -> anyhow::Result<ExitCode> {
    if !(0.0..1.0).contains(&a.validation)
        || a.epochs == 0
        || a.batch == 0
        || a.top + a.tail == 0
        || a.warmup_top == 0
        || a.val_patches == 0
    {
        anyhow::bail!(
            "--validation must be in [0, 1); --epochs, --batch, --warmup-top, --val-patches and --top + --tail must be positive"
        );
    }
    if !(0.0..1.0).contains(&a.gain_jitter) || !(0.0..=128.0).contains(&a.offset_jitter) {
        anyhow::bail!("--gain-jitter must be in [0, 1) and --offset-jitter in [0, 128] grey levels");
    }
    let threads = a.threads.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get())).max(1);
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
            top: a.top,
            warmup_top: a.warmup_top,
            mine_every: a.warmup_mine,
            attention_epochs: a.attention_epochs,
            tail: a.tail,
            learning_rate: a.learning_rate,
            attention_rate: a.attention_rate,
            tune_rate: a.tune_rate,
            entropy: a.entropy,
            patience: a.patience,
            val_patches: a.val_patches,
            augment: Augment { flips: !a.no_flips, gain: a.gain_jitter, offset: a.offset_jitter },
            threads,
        },
        validation: a.validation,
        seed: a.seed,
        baseline: !a.no_baseline,
        baseline_epochs: a.baseline_epochs,
        max_pixels: DEFAULT_MAX_PIXELS,
        start: a.start_from,
    };
    let t = train(&o)?;
    // The written bundle must load as the daemon would load it.
    Bundle::load(&a.out, &[1, 8])?;
    log::info!("wrote {} ({} classes) in {:.0} s", a.out.display(), t.manifest.classes.len(), t.seconds);
    Ok(ExitCode::SUCCESS)
}
