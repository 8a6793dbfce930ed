//! `saccade probe`: a linear probe on the bundle's feature network at known mark
//! positions, to tell whether the features or the attention limit quality.

use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;

use anyhow::{bail, Context};
use clap::Args;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::engine::{Bundle, Engine, Geometry, Settings};
use saccade::eval::marks::cell_of;
use saccade::eval::probe::{cross_validate, per_class_f1};
use saccade::labels::read_labels;
use saccade::source::{decode_file, DEFAULT_MAX_PIXELS};

/// Test the feature network alone: at labelled mark positions, do its features tell the
/// classes apart (and from look-alikes and plain ground)? Needs labels with positions.
#[derive(Args)]
pub struct ProbeArgs {
    /// Model bundle folder (holding bundle.toml).
    #[arg(long)]
    pub bundle: PathBuf,
    /// JSON Lines labels whose frames carry `defects` positions (and optionally `lookalikes`).
    #[arg(long)]
    pub labels: PathBuf,
    /// Folder the labels' frame names are relative to [default: the labels file's folder].
    #[arg(long)]
    pub frames: Option<PathBuf>,
    /// Cells of plain ground (no mark in or next to them) drawn per frame.
    #[arg(long, default_value_t = 3)]
    pub ground: usize,
    /// Cross-validation folds.
    #[arg(long, default_value_t = 5)]
    pub folds: usize,
    /// Seed of the ground cells and the folds.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
}

/// What a probed patch shows.
#[derive(Clone, Copy, PartialEq)]
enum Kind {
    Class(usize),
    Lookalike,
    Ground,
}

pub fn run(a: ProbeArgs) -> anyhow::Result<ExitCode> {
    let bundle = Arc::new(Bundle::load(&a.bundle, &Settings::default().batch_sizes())?);
    let engine = Engine::new(bundle.clone(), Settings::default())?;
    let m = &bundle.manifest;
    let classes = m.classes.clone();
    let mut labels = read_labels(&a.labels)?;
    if let Some(dir) = &a.frames {
        saccade::labels::rebase(&mut labels, dir);
    }
    if labels.iter().all(|l| l.marks.is_empty()) {
        bail!(
            "{}: no frame lists `defects` positions; the probe needs them (see the README, labels file)",
            a.labels.display()
        );
    }
    let mut rng = ChaCha8Rng::seed_from_u64(a.seed);
    let (mut feats, mut kinds) = (Vec::new(), Vec::new());
    for (i, l) in labels.iter().enumerate().filter(|(_, l)| !l.marks.is_empty() || !l.lookalikes.is_empty()) {
        let frame = decode_file(&l.frame, i as u64, DEFAULT_MAX_PIXELS)
            .with_context(|| format!("{}:{}", a.labels.display(), l.line))?;
        let (fw, fh) = (frame.width(), frame.height());
        let cell = (m.thumbnail_factor * m.cell_stride) as usize;
        let g = Geometry {
            frame_w: fw,
            frame_h: fh,
            factor: m.thumbnail_factor,
            stride: m.cell_stride,
            patch: m.patch_size,
            rows: (fh as usize).div_ceil(cell),
            cols: (fw as usize).div_ceil(cell),
        };
        let mut cells: Vec<(usize, Kind)> = Vec::new();
        for mk in &l.marks {
            let Some(c) = classes.iter().position(|n| *n == mk.class) else {
                bail!(
                    "{}:{}: class {:?} is not one of the bundle's classes [{}]",
                    a.labels.display(),
                    l.line,
                    mk.class,
                    classes.join(", ")
                );
            };
            cells.push((cell_of(&g, mk.x, mk.y), Kind::Class(c)));
        }
        cells.extend(l.lookalikes.iter().map(|mk| (cell_of(&g, mk.x, mk.y), Kind::Lookalike)));
        let near = |c: usize, taken: &[(usize, Kind)]| {
            let (r, col) = ((c / g.cols) as i64, (c % g.cols) as i64);
            taken.iter().any(|&(t, _)| ((t / g.cols) as i64 - r).abs() <= 1 && ((t % g.cols) as i64 - col).abs() <= 1)
        };
        let marked = cells.clone();
        for _ in 0..a.ground {
            // Seams span the frame and are not listed as cells; ground may hold one.
            if let Some(c) = (0..100).map(|_| rng.random_range(0..g.cells())).find(|&c| !near(c, &marked)) {
                cells.push((c, Kind::Ground));
            }
        }
        let list: Vec<usize> = cells.iter().map(|c| c.0).collect();
        let flat = engine.features(&frame, &g, &list)?;
        let d = m.feature_dim;
        for (j, &(_, k)) in cells.iter().enumerate() {
            // The head reads ln(Psi), so the probe does too: raw evidence spans e^±40 and
            // would swamp a linear probe's standardisation.
            feats.push(flat[j * d..(j + 1) * d].iter().map(|v| v.max(f32::MIN_POSITIVE).ln()).collect());
            kinds.push(k);
        }
    }
    // The probe's classes: the bundle's, then "no defect" (look-alikes and ground).
    let none = classes.len();
    let y: Vec<usize> = kinds.iter().map(|k| if let Kind::Class(c) = k { *c } else { none }).collect();
    let pred = cross_validate(&feats, &y, none + 1, a.folds, a.seed);
    let f1 = per_class_f1(&y, &pred, none + 1);
    let accuracy = y.iter().zip(&pred).filter(|(t, p)| t == p).count() as f64 / y.len() as f64;
    println!(
        "linear probe on {} patches ({} folds): accuracy {:.3}, macro F1 over the classes {:.3}",
        y.len(),
        a.folds,
        accuracy,
        f1[..none].iter().sum::<f64>() / none as f64
    );
    let mut names: Vec<String> = classes.clone();
    names.push("none".into());
    println!("{:<12} {:>7} {:>6}  predicted as: {}", "shown", "patches", "F1", names.join(" "));
    let rows = classes
        .iter()
        .enumerate()
        .map(|(c, n)| (n.clone(), Kind::Class(c)))
        .chain([("look-alike".to_string(), Kind::Lookalike), ("ground".to_string(), Kind::Ground)]);
    for (name, kind) in rows {
        let idx: Vec<usize> = (0..y.len()).filter(|&i| kinds[i] == kind).collect();
        if idx.is_empty() {
            continue;
        }
        let counts: Vec<String> =
            (0..=none).map(|c| idx.iter().filter(|&&i| pred[i] == c).count().to_string()).collect();
        let f = if let Kind::Class(c) = kind { format!("{:.3}", f1[c]) } else { "-".into() };
        println!("{name:<12} {:>7} {f:>6}  {}", idx.len(), counts.join(" "));
    }
    Ok(ExitCode::SUCCESS)
}
