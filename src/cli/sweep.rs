//! `saccade sweep`: quality and cost of a bundle on labelled frames at several budgets,
//! against the dense exhaustive answer, with a recommended budget.
//!
//! Frames are the outer loop: each is decoded once and, while it is in memory, analysed
//! exhaustively (the reference), by the thumbnail-only baseline when the bundle has one,
//! and at every budget for every seed. Only one decoded frame is held at a time, so a set
//! of any size fits, and slow drift of the machine (heat, other load) spreads over all
//! rows alike instead of favouring the budgets swept first.

use std::collections::HashSet;
use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;
use std::sync::Arc;
use std::time::Instant;

use anyhow::{bail, Context};
use clap::Args;
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use saccade::engine::{Bundle, Engine, EstimatorKind, Settings};
use saccade::eval::csv;
use saccade::eval::plot::{self, SweepPlot};
use saccade::eval::rows::{recommend, within_tolerance, Row, RowKind, Tally};
use saccade::labels::{class_matrix, read_labels, MarkAt};
use saccade::source::{decode_file, DEFAULT_MAX_PIXELS};

use super::analyze::EngineLimits;

/// Analyse labelled frames at several budgets and recommend the smallest good one.
#[derive(Args)]
pub struct SweepArgs {
    /// Model bundle folder (holding bundle.toml).
    #[arg(long)]
    pub bundle: PathBuf,
    /// Folder the labels' frame names are relative to [default: the labels file's folder].
    #[arg(long)]
    pub frames: Option<PathBuf>,
    /// JSON Lines labels, one `{"frame": FILE, "classes": [NAME, ...]}` per frame.
    #[arg(long)]
    pub labels: PathBuf,
    /// Budgets to sweep, in ms.
    #[arg(long, value_delimiter = ',', default_value = "25,50,100,200")]
    pub budgets: Vec<f64>,
    /// Estimator of the budget rows: priority or replacement.
    #[arg(long, default_value = "priority")]
    pub estimator: EstimatorKind,
    /// Analyses per frame and budget, each with its own seed.
    #[arg(long, default_value_t = 1)]
    pub seeds: u64,
    /// Recommend the smallest budget whose macro F1 is at most this many F1 points
    /// (hundredths) below exhaustive.
    #[arg(long, default_value_t = 2.0)]
    pub tolerance: f64,
    /// Pass over budgets that more than this share (%) of analyses ran past.
    #[arg(long, default_value_t = 5.0)]
    pub max_miss_pct: f64,
    /// Write the rows as CSV.
    #[arg(long)]
    pub csv: Option<PathBuf>,
    /// Write a PNG plot of macro F1 and analysis time against budget.
    #[arg(long)]
    pub plot: Option<PathBuf>,
    /// Outcome targets, as `[engine] miss_target` in the daemon's config: the largest share
    /// of frames carrying a class that may be called clear (bundles with calibration.json).
    #[arg(long, default_value_t = 0.1)]
    pub miss_target: f64,
    /// As `[engine] false_alarm_target`: the largest share of frames without a class that
    /// may be called detected.
    #[arg(long, default_value_t = 0.1)]
    pub false_alarm_target: f64,
    /// As `[engine] target_confidence`.
    #[arg(long, default_value_t = 0.9)]
    pub target_confidence: f64,
    /// Equal-width bins of the expected calibration error.
    #[arg(long, default_value_t = 10)]
    pub ece_bins: usize,
    #[command(flatten)]
    pub limits: EngineLimits,
    /// Refuse frames with more pixels than this (checked from the header).
    #[arg(long, default_value_t = DEFAULT_MAX_PIXELS)]
    pub max_pixels: u64,
}

impl SweepArgs {
    fn settings(&self) -> Settings {
        self.limits.apply(Settings {
            estimator: self.estimator,
            miss_target: self.miss_target,
            false_alarm_target: self.false_alarm_target,
            target_confidence: self.target_confidence,
            ..Settings::default()
        })
    }

    /// Budgets ascending without repeats, after checking every value.
    fn budgets(&self) -> anyhow::Result<Vec<f64>> {
        if self.budgets.is_empty() {
            bail!("--budgets: expected at least one budget in ms, e.g. 25,50,100,200");
        }
        if let Some(b) = self.budgets.iter().find(|b| !(b.is_finite() && **b > 0.0)) {
            bail!("--budgets: {b} is not a positive number of milliseconds");
        }
        let mut v = self.budgets.clone();
        v.sort_by(f64::total_cmp);
        v.dedup();
        Ok(v)
    }

    fn check(&self) -> anyhow::Result<()> {
        if self.estimator == EstimatorKind::Exhaustive {
            bail!("--estimator exhaustive: the exhaustive row is always included; choose priority or replacement for the budget rows");
        }
        if self.seeds == 0 {
            bail!("--seeds 0: expected at least 1 analysis per frame and budget");
        }
        if !(self.tolerance.is_finite() && self.tolerance >= 0.0) {
            bail!("--tolerance {}: expected a non-negative number of F1 points, e.g. 2", self.tolerance);
        }
        if !(self.max_miss_pct.is_finite() && (0.0..=100.0).contains(&self.max_miss_pct)) {
            bail!("--max-miss-pct {}: expected a share from 0 to 100 %", self.max_miss_pct);
        }
        if self.ece_bins == 0 {
            bail!("--ece-bins 0: expected at least 1 bin");
        }
        Ok(())
    }
}

/// A labelled frame ready to analyse.
struct LabelledFrame {
    path: PathBuf,
    name: String,
    line: usize,
    truth: Vec<bool>,
    marks: Vec<MarkAt>,
}

fn progress(total: u64) -> ProgressBar {
    let target =
        if std::io::stderr().is_terminal() { ProgressDrawTarget::stderr() } else { ProgressDrawTarget::hidden() };
    let bar = ProgressBar::with_draw_target(Some(total), target);
    let style = ProgressStyle::with_template("{bar:32} {pos}/{len} analyses  {elapsed} (eta {eta})  {msg}")
        .expect("valid template");
    bar.set_style(style);
    bar
}

pub fn run(args: SweepArgs) -> anyhow::Result<ExitCode> {
    args.check()?;
    let budgets = args.budgets()?;
    let base = args.settings();
    base.check(None).map_err(|e| anyhow::anyhow!("--{}", e.to_string().replace('_', "-")))?;
    let labels = read_labels(&args.labels)?;
    let bundle = Arc::new(Bundle::load(&args.bundle, &base.batch_sizes())?);
    let m = bundle.manifest.clone();
    let mut engine = Engine::new(bundle.clone(), base.clone())?;
    let truth = class_matrix(&labels, &m.classes, &args.labels)?;
    let items: Vec<LabelledFrame> = labels
        .iter()
        .zip(truth)
        .map(|(l, truth)| LabelledFrame {
            path: args.frames.as_ref().map_or_else(|| l.frame.clone(), |d| d.join(&l.name)),
            name: l.name.clone(),
            line: l.line,
            truth,
            marks: l.marks.clone(),
        })
        .collect();
    let missing: Vec<String> = items
        .iter()
        .filter(|it| !it.path.is_file())
        .map(|it| {
            format!("{}:{}: frame {:?}: {} is not a file", args.labels.display(), it.line, it.name, it.path.display())
        })
        .collect();
    if !missing.is_empty() {
        let more = if missing.len() > 5 { format!("\n… and {} more", missing.len() - 5) } else { String::new() };
        bail!(
            "{} of {} labelled frames are missing:\n{}{more}",
            missing.len(),
            items.len(),
            missing[..missing.len().min(5)].join("\n")
        );
    }
    for (c, name) in m.classes.iter().enumerate() {
        if !items.iter().any(|it| it.truth[c]) {
            log::warn!(
                "{}: no frame is labelled {name:?}; its F1 is 0 by definition and lowers macro F1",
                args.labels.display()
            );
        }
    }

    // Fail on an unwritable output before the long run, not after it.
    for path in args.csv.iter().chain(&args.plot) {
        std::fs::File::create(path).with_context(|| format!("creating {}", path.display()))?;
    }

    let has_baseline = bundle.baseline.is_some();
    let per_frame = 1 + has_baseline as u64 + budgets.len() as u64 * args.seeds;
    let bar = progress(items.len() as u64 * per_frame);
    let exhaustive_settings = Settings { estimator: EstimatorKind::Exhaustive, ..base.clone() };
    let mut exhaustive = Tally::default();
    let mut baseline = Tally::default();
    let mut tallies: Vec<Tally> = budgets.iter().map(|_| Tally::default()).collect();
    let mut sizes = HashSet::new();
    let n = items.len() as u64;
    for (i, it) in items.iter().enumerate() {
        bar.set_message(it.name.clone());
        let frame = decode_file(&it.path, i as u64, args.max_pixels)
            .with_context(|| format!("{}:{}", args.labels.display(), it.line))?;
        let at = || format!("{}:{}: frame {}", args.labels.display(), it.line, it.path.display());
        if sizes.insert((frame.width(), frame.height())) {
            // The first analysis of a new frame size builds its plans and warms caches; it
            // is not counted.
            engine.set_settings(Settings { budget_ms: budgets[0], ..base.clone() })?;
            engine.analyze(&frame, u64::MAX).with_context(at)?;
            bundle.baseline_probabilities(&frame.image).with_context(at)?;
        }
        engine.set_settings(exhaustive_settings.clone())?;
        let dense = engine.analyze(&frame, 0).with_context(at)?;
        let reference: Vec<f64> = dense.classes.iter().map(|c| c.probability).collect();
        exhaustive.add_report(&dense, &it.truth, &reference);
        exhaustive.add_marks(&dense, &it.marks);
        bar.inc(1);
        if has_baseline {
            let t = Instant::now();
            let probs = bundle
                .baseline_probabilities(&frame.image)
                .with_context(at)?
                .expect("the bundle has a baseline network");
            baseline.add_probabilities(&probs, &it.truth, t.elapsed().as_secs_f64() * 1000.0);
            bar.inc(1);
        }
        for (tally, &budget_ms) in tallies.iter_mut().zip(&budgets) {
            engine.set_settings(Settings { budget_ms, ..base.clone() })?;
            for seed in 0..args.seeds {
                // Distinct per (seed pass, frame); a report's seed replays it with `analyze`.
                let r = engine.analyze(&frame, seed * n + i as u64).with_context(at)?;
                tally.add_report(&r, &it.truth, &reference);
                tally.add_marks(&r, &it.marks);
                bar.inc(1);
            }
        }
    }
    bar.finish_and_clear();

    // F1 of the engine rows at the manifest's thresholds on the reported (calibrated)
    // scale; the thumbnail-only network's probabilities are its own, uncalibrated.
    let (t, bins) = (&bundle.reported_thresholds(), args.ece_bins);
    let mut rows: Vec<Row> = tallies
        .into_iter()
        .zip(&budgets)
        .map(|(tally, &b)| tally.finish(RowKind::Budget, Some(b), Some(args.estimator), t, bins))
        .collect();
    rows.push(exhaustive.finish(RowKind::Exhaustive, None, Some(EstimatorKind::Exhaustive), t, bins));
    if !baseline.is_empty() {
        rows.push(baseline.finish(RowKind::ThumbnailOnly, None, None, &m.thresholds, bins));
    }

    println!(
        "{} labelled frames, {} seed(s), bundle {}, thresholds {:?}",
        items.len(),
        args.seeds,
        args.bundle.display(),
        m.thresholds
    );
    print_table(&m.classes, &rows);
    print_outcomes(&m.classes, &rows, engine.decision(), &base, bundle.calibration.is_some());
    print_marks(&m.classes, &rows);
    if let Some(path) = &args.csv {
        std::fs::write(path, csv::to_csv(&m.classes, &rows)).with_context(|| format!("writing {}", path.display()))?;
        println!("CSV: {}", path.display());
    }
    if let Some(path) = &args.plot {
        plot::write(&plot_data(&args, &rows), path).with_context(|| format!("writing {}", path.display()))?;
        println!("plot: {}", path.display());
    }
    print_recommendation(&args, &base, &rows);
    Ok(ExitCode::SUCCESS)
}

fn plot_data(args: &SweepArgs, rows: &[Row]) -> SweepPlot {
    let budget: Vec<&Row> = rows.iter().filter(|r| r.row == RowKind::Budget).collect();
    let f1_of = |k: RowKind| rows.iter().find(|r| r.row == k).map(|r| r.macro_f1);
    SweepPlot {
        estimator: args.estimator.to_string(),
        budgets: budget.iter().filter_map(|r| r.budget_ms).collect(),
        macro_f1: budget.iter().map(|r| r.macro_f1).collect(),
        p50_ms: budget.iter().map(|r| r.p50_ms).collect(),
        p99_ms: budget.iter().map(|r| r.p99_ms).collect(),
        exhaustive_f1: f1_of(RowKind::Exhaustive),
        baseline_f1: f1_of(RowKind::ThumbnailOnly),
    }
}

fn print_table(classes: &[String], rows: &[Row]) {
    let dash = || "-".to_string();
    let pct = |v: Option<f64>| v.map_or_else(dash, |v| format!("{:.1}", 100.0 * v));
    let mut head = vec!["row".to_string(), "budget ms".into(), "estimator".into(), "macro F1".into()];
    head.extend(classes.iter().map(|c| format!("F1 {c}")));
    head.extend(["ECE", "cover %", "patches", "p50 ms", "p99 ms", "misses", "miss %", "review"].map(String::from));
    let body: Vec<Vec<String>> = rows
        .iter()
        .map(|r| {
            let mut f = vec![
                r.row.name().to_string(),
                r.budget_ms.map_or_else(dash, |b| format!("{b}")),
                r.estimator.map_or_else(dash, |e| e.to_string()),
                format!("{:.3}", r.macro_f1),
            ];
            f.extend(r.per_class_f1.iter().map(|v| format!("{v:.3}")));
            f.extend([
                format!("{:.3}", r.ece),
                pct(r.coverage),
                r.mean_patches.map_or_else(dash, |p| format!("{p:.1}")),
                format!("{:.1}", r.p50_ms),
                format!("{:.1}", r.p99_ms),
                r.deadline_misses.map_or_else(dash, |m| m.to_string()),
                r.deadline_miss_pct.map_or_else(dash, |p| format!("{p:.1}")),
                r.reviews.map_or_else(dash, |v| v.to_string()),
            ]);
            f
        })
        .collect();
    table(&head, &body);
}

/// Prints aligned columns: the first three left-aligned, numbers right-aligned.
fn table(head: &[String], body: &[Vec<String>]) {
    let widths: Vec<usize> = (0..head.len())
        .map(|c| {
            std::iter::once(head).chain(body.iter().map(Vec::as_slice)).map(|r| r[c].chars().count()).max().unwrap_or(0)
        })
        .collect();
    for line in std::iter::once(head).chain(body.iter().map(Vec::as_slice)) {
        let cells: Vec<String> = line
            .iter()
            .zip(&widths)
            .enumerate()
            .map(|(c, (v, w))| if c < 3 { format!("{v:<w$}") } else { format!("{v:>w$}") })
            .collect();
        println!("{}", cells.join("  ").trim_end());
    }
}

/// What the three-way outcome achieved on these frames, per engine row.
fn print_outcomes(
    classes: &[String],
    rows: &[Row],
    decision: &[saccade::engine::Decision],
    s: &Settings,
    calibrated: bool,
) {
    let pct = |v: Option<f64>| v.map_or_else(|| "-".to_string(), |v| format!("{:.1}", 100.0 * v));
    println!();
    if calibrated {
        println!(
            "outcomes (targets: misses ≤ {:.1} %, false alarms ≤ {:.1} %, each at {:.0} % confidence); clear below / detected above: {}",
            100.0 * s.miss_target,
            100.0 * s.false_alarm_target,
            100.0 * s.target_confidence,
            classes.iter().zip(decision).map(|(c, d)| format!("{c} {:.3}/{:.3}", d.0, d.1)).collect::<Vec<_>>().join(", ")
        );
    } else {
        println!("outcomes (the bundle has no calibration.json: one threshold per class, no risk targets):");
    }
    let mut head =
        vec!["row".to_string(), "budget ms".into(), "estimator".into(), "miss %".into(), "false alarm %".into()];
    head.push("to review %".into());
    head.extend(classes.iter().map(|c| format!("{c} miss/fa %")));
    let body: Vec<Vec<String>> = rows
        .iter()
        .filter_map(|r| r.outcomes.as_ref().map(|o| (r, o)))
        .map(|(r, o)| {
            let mut f = vec![
                r.row.name().to_string(),
                r.budget_ms.map_or_else(|| "-".into(), |b| format!("{b}")),
                r.estimator.map_or_else(|| "-".into(), |e| e.to_string()),
                pct(o.miss_rate),
                pct(o.false_alarm_rate),
                pct(Some(o.review_share)),
            ];
            f.extend((0..classes.len()).map(|c| {
                format!(
                    "{}/{}",
                    pct(o.per_class_miss.get(c).copied().flatten()),
                    pct(o.per_class_false_alarm.get(c).copied().flatten())
                )
            }));
            f
        })
        .collect();
    table(&head, &body);
}

/// Where attention looked, for labels with mark positions: a second, shorter table.
fn print_marks(classes: &[String], rows: &[Row]) {
    if rows.iter().all(|r| r.mark_recall.is_none()) {
        return;
    }
    let pct = |v: Option<f64>| v.map_or_else(|| "-".to_string(), |v| format!("{:.1}", 100.0 * v));
    let mut head = vec!["row".to_string(), "budget ms".into(), "marks seen %".into()];
    head.extend(classes.iter().map(|c| format!("{c} %")));
    head.push("attention on marks".into());
    let body: Vec<Vec<String>> = rows
        .iter()
        .filter(|r| r.mark_recall.is_some())
        .map(|r| {
            let mut f = vec![
                r.row.name().to_string(),
                r.budget_ms.map_or_else(|| "-".into(), |b| format!("{b}")),
                pct(r.mark_recall),
            ];
            f.extend((0..classes.len()).map(|c| pct(r.mark_recall_per_class.get(c).copied().flatten())));
            f.push(r.mark_attention.map_or_else(|| "-".into(), |v| format!("{v:.3}")));
            f
        })
        .collect();
    println!("\nlabelled marks in examined cells, and the attention their cells got (mean per frame):");
    table(&head, &body);
}

fn print_recommendation(args: &SweepArgs, base: &Settings, rows: &[Row]) {
    let Some(ex) = rows.iter().find(|r| r.row == RowKind::Exhaustive) else { return };
    let rec = recommend(rows, args.tolerance, args.max_miss_pct);
    println!();
    for r in within_tolerance(rows, args.tolerance)
        .into_iter()
        .take_while(|r| rec.is_none_or(|rec| r.budget_ms < rec.budget_ms))
    {
        println!(
            "passed over {} ms: macro F1 {:.3} is within tolerance, but {:.1} % of analyses ran past the budget (--max-miss-pct {}); min_patches = {} may not fit in it on this machine",
            r.budget_ms.unwrap_or(0.0),
            r.macro_f1,
            r.deadline_miss_pct.unwrap_or(0.0),
            args.max_miss_pct,
            base.min_patches
        );
    }
    let Some(r) = rec else {
        let best = rows.iter().filter(|r| r.row == RowKind::Budget).max_by(|a, b| a.macro_f1.total_cmp(&b.macro_f1));
        println!(
            "no budget swept reaches macro F1 within {} points of exhaustive ({:.3}) and holds its deadline.",
            args.tolerance, ex.macro_f1
        );
        if let Some(b) = best {
            let capped = b.mean_patches.unwrap_or(0.0) >= args.limits.max_patches as f64 - 0.5;
            println!(
                "best: {} ms at {:.3}, {:.0} patches on average; try larger budgets{}.",
                b.budget_ms.unwrap_or(0.0),
                b.macro_f1,
                b.mean_patches.unwrap_or(0.0),
                if capped { " and a larger --max-patches (the rows stop at it)" } else { "" }
            );
        }
        return;
    };
    let budget = r.budget_ms.expect("budget rows have a budget");
    println!(
        "recommended: {budget} ms, the smallest budget within {} F1 points of exhaustive: macro F1 {:.3} vs {:.3}; p99 analysis {:.1} ms, {:.1} % past the deadline.",
        args.tolerance,
        r.macro_f1,
        ex.macro_f1,
        r.p99_ms,
        r.deadline_miss_pct.unwrap_or(0.0)
    );
    println!("paste into the daemon's config file:\n\n[engine]\nbudget_ms = {budget:?}");
    // Every knob the sweep ran with that differs from the defaults, so the daemon runs as measured.
    let d = Settings::default();
    if base.estimator != d.estimator {
        println!("estimator = \"{}\"", base.estimator);
    }
    for (key, v, dv) in [
        ("min_patches", base.min_patches, d.min_patches),
        ("max_patches", base.max_patches, d.max_patches),
        ("batch", base.batch, d.batch),
        ("samples", base.samples, d.samples),
    ] {
        if v != dv {
            println!("{key} = {v}");
        }
    }
}
