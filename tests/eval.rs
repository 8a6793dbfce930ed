//! Budget tuning: the metrics against independent references (scikit-learn's F1, a numpy
//! ECE written from Guo et al. 2017), and `saccade sweep` end to end on a tiny labelled
//! set: the exhaustive row against a plain exhaustive analysis, the CSV columns, the plot,
//! and the errors for bad input.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::sync::Arc;

use image::RgbImage;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::demo::designed::DesignedParams;
use saccade::engine::{Bundle, Engine, EstimatorKind, Settings};
use saccade::eval::{csv, metrics, plot};
use saccade::onnx::writer::{Dim, GraphWriter};
use saccade::source::decode_file;
use serde_json::{json, Value};

const BIN: &str = env!("CARGO_BIN_EXE_saccade");

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().unwrap().iter().map(|x| x.as_f64().unwrap()).collect()
}

/// Truth, predictions and probabilities, one row per frame.
type Case = (Vec<Vec<bool>>, Vec<Vec<bool>>, Vec<Vec<f64>>);

/// A random case; `edges` puts probabilities on bin edges and 0/1, and fixes the columns
/// scikit-learn treats specially (no positives and no predictions, no positives but
/// predictions, positives but no predictions).
fn case(rng: &mut ChaCha8Rng, frames: usize, classes: usize, edges: bool) -> Case {
    let mut truth = vec![vec![false; classes]; frames];
    let mut pred = vec![vec![false; classes]; frames];
    let mut probs = vec![vec![0.0; classes]; frames];
    let edge_values = [0.0, 0.1, 0.2, 0.3, 0.5, 0.7, 0.9, 1.0];
    for f in 0..frames {
        for c in 0..classes {
            let p: f64 = if edges && rng.random_bool(0.5) {
                edge_values[rng.random_range(0..edge_values.len())]
            } else {
                rng.random()
            };
            probs[f][c] = p;
            truth[f][c] = rng.random_bool(p.clamp(0.05, 0.95));
            pred[f][c] = rng.random_bool(0.4);
        }
    }
    if edges && classes >= 4 {
        for f in 0..frames {
            (truth[f][0], pred[f][0]) = (false, false);
            truth[f][1] = false;
            pred[f][2] = false;
        }
        pred[0][1] = true;
        truth[0][2] = true;
    }
    (truth, pred, probs)
}

fn ints(m: &[Vec<bool>]) -> Vec<Vec<u8>> {
    m.iter().map(|r| r.iter().map(|&b| b as u8).collect()).collect()
}

#[test]
fn f1_and_ece_agree_with_scikit_learn_and_numpy() {
    let mut rng = ChaCha8Rng::seed_from_u64(31);
    // (frames, classes, edge cases, ECE bins)
    let shapes = [(40, 4, true, 10), (200, 5, true, 15), (17, 2, false, 1), (300, 3, false, 7), (9, 6, true, 10)];
    let cases: Vec<_> = shapes.iter().map(|&(f, c, e, bins)| (case(&mut rng, f, c, e), bins)).collect();
    let req: Vec<Value> = cases
        .iter()
        .map(|((t, p, pr), bins)| json!({"truth": ints(t), "pred": ints(p), "probs": pr, "bins": bins}))
        .collect();
    let out: Value =
        serde_json::from_str(&common::run_reference("metrics_ref.py", &[], &Value::Array(req).to_string())).unwrap();
    for (((truth, pred, probs), bins), theirs) in cases.iter().zip(out.as_array().unwrap()) {
        // Reference: scikit-learn f1_score(average=None / "macro", zero_division=0).
        let ours = metrics::f1(truth, pred);
        let per = floats(&theirs["per_class"]);
        assert_eq!(ours.per_class.len(), per.len());
        for (c, (x, y)) in ours.per_class.iter().zip(&per).enumerate() {
            assert!((x - y).abs() < 1e-12, "class {c}: F1 {x} vs scikit-learn {y}");
        }
        let mac = theirs["macro"].as_f64().unwrap();
        assert!((ours.macro_f1 - mac).abs() < 1e-12, "macro F1 {} vs scikit-learn {mac}", ours.macro_f1);
        // Reference: numpy ECE from Guo et al., ICML 2017, equal-width bins (i/M, (i+1)/M].
        let e = theirs["ece"].as_f64().unwrap();
        let ours = metrics::ece(probs, truth, *bins);
        assert!((ours - e).abs() < 1e-12, "ECE over {bins} bins: {ours} vs numpy {e}");
    }
}

/// The per-class threshold rule of `saccade train` (best held-out F1, ties to the highest
/// threshold) against scikit-learn's `precision_recall_curve` on the same scores, with
/// ties among scores and classes without positives.
#[test]
fn the_threshold_rule_agrees_with_scikit_learn() {
    let mut rng = ChaCha8Rng::seed_from_u64(8);
    let mut cases = Vec::new();
    for n in [5usize, 40, 200, 333] {
        for coarse in [false, true] {
            let truth: Vec<bool> = (0..n).map(|_| rng.random_bool(0.3)).collect();
            // Positives score higher on average; coarse scores repeat (ties).
            let scores: Vec<f64> = truth
                .iter()
                .map(|&t| {
                    let v: f64 = rng.random::<f64>() * 0.7 + if t { 0.3 } else { 0.0 };
                    if coarse {
                        (v * 10.0).round() / 10.0
                    } else {
                        v
                    }
                })
                .collect();
            cases.push((scores, truth));
        }
    }
    cases.push((vec![0.2, 0.9, 0.4], vec![false, false, false]));
    let req: Vec<Value> = cases
        .iter()
        .map(|(s, t)| json!({"scores": s, "truth": t.iter().map(|&b| b as u8).collect::<Vec<_>>()}))
        .collect();
    let out: Value =
        serde_json::from_str(&common::run_reference("threshold_ref.py", &[], &Value::Array(req).to_string())).unwrap();
    for ((scores, truth), theirs) in cases.iter().zip(out.as_array().unwrap()) {
        let ours = metrics::best_f1_threshold(scores, truth);
        if theirs.is_null() {
            assert!(ours.is_none(), "no positives: no threshold");
            continue;
        }
        let ours = ours.expect("positives present");
        let (at, f1) = (theirs["at"].as_f64().unwrap(), theirs["f1"].as_f64().unwrap());
        assert!(
            (ours.at - at).abs() < 1e-12 && (ours.f1 - f1).abs() < 1e-12,
            "{ours:?} vs scikit-learn at {at}, F1 {f1}"
        );
        // The threshold used lies between the chosen score and the next lower one.
        let lower = scores.iter().copied().filter(|&v| v < at).fold(0.0, f64::max);
        assert!(ours.threshold <= at && ours.threshold > lower || ours.threshold == at, "{ours:?}");
    }
}

/// The share of labelled marks in examined cells and the attention on them against a
/// numpy reference written from the README's definition.
#[test]
fn mark_recall_agrees_with_numpy() {
    use saccade::engine::Geometry;
    use saccade::eval::marks::MarkTally;
    use saccade::labels::MarkAt;
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let g = Geometry { frame_w: 300, frame_h: 200, factor: 4, stride: 4, patch: 24, rows: 13, cols: 19 };
    let classes: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
    let mut tally = MarkTally::new(classes.len());
    let mut frames = Vec::new();
    for _ in 0..25 {
        let mut att: Vec<f64> = (0..g.cells()).map(|_| rng.random::<f64>()).collect();
        let total: f64 = att.iter().sum();
        att.iter_mut().for_each(|v| *v /= total);
        let examined: Vec<usize> = (0..g.cells()).filter(|_| rng.random_bool(0.3)).collect();
        // Some marks on the frame's edges and outside the whole-cell grid, which clamp.
        let marks: Vec<MarkAt> = (0..rng.random_range(0..4))
            .map(|_| MarkAt {
                class: classes[rng.random_range(0..3)].clone(),
                x: rng.random_range(0.0..300.0),
                y: rng.random_range(0.0..200.0),
                extent: None,
            })
            .collect();
        tally.add(&g, &att, &examined, &marks, &classes);
        let m: Vec<Value> = marks.iter().map(|m| json!([m.class, m.x, m.y])).collect();
        frames.push(json!({"attention": att, "examined": examined, "marks": m}));
    }
    let req = json!({"cell": 16, "rows": g.rows, "cols": g.cols, "classes": classes, "frames": frames});
    let theirs: Value = serde_json::from_str(&common::run_reference("marks_ref.py", &[], &req.to_string())).unwrap();
    assert!((tally.recall().unwrap() - theirs["recall"].as_f64().unwrap()).abs() < 1e-12);
    assert!((tally.mean_mass().unwrap() - theirs["mass"].as_f64().unwrap()).abs() < 1e-12);
    for (ours, theirs) in tally.recall_per_class().iter().zip(theirs["per_class"].as_array().unwrap()) {
        assert_eq!(ours.is_some(), !theirs.is_null());
        if let Some(v) = ours {
            assert!((v - theirs.as_f64().unwrap()).abs() < 1e-12);
        }
    }
}

/// A flat grey sheet with discs: `(x, y, r, value)`.
fn sheet(w: u32, h: u32, discs: &[(i64, i64, i64, u8)]) -> RgbImage {
    let mut img = RgbImage::from_pixel(w, h, image::Rgb([150, 150, 150]));
    for &(x, y, r, v) in discs {
        for dy in -r..=r {
            for dx in -r..=r {
                if dx * dx + dy * dy <= r * r {
                    img.put_pixel((x + dx) as u32, (y + dy) as u32, image::Rgb([v, v, v]));
                }
            }
        }
    }
    img
}

struct Set {
    dir: tempfile::TempDir,
    _bundle: tempfile::TempDir,
    bundle: PathBuf,
}

impl Set {
    /// Six labelled frames of the designed bundle's classes; one is labelled wrongly on
    /// purpose, so that the exhaustive F1 is not trivially 1.
    fn new() -> Self {
        let bundle = common::designed_bundle(&DesignedParams::default());
        let dir = tempfile::tempdir().unwrap();
        // (file, discs as (x, y, radius, grey level), labelled classes)
        type Drawn<'a> = (&'a str, Vec<(i64, i64, i64, u8)>, &'a [&'a str]);
        let frames: [Drawn; 6] = [
            ("dark.png", vec![(400, 200, 6, 30)], &["dark_spot"]),
            ("bright.png", vec![(200, 300, 6, 255)], &["bright_spot"]),
            ("plain.png", vec![], &[]),
            ("both.png", vec![(100, 100, 6, 30), (500, 380, 7, 255)], &["bright_spot", "dark_spot"]),
            ("mislabelled.png", vec![], &["dark_spot"]),
            ("bright2.png", vec![(560, 90, 7, 255)], &["bright_spot"]),
        ];
        let mut labels = String::new();
        for (name, discs, classes) in &frames {
            sheet(640, 480, discs).save(dir.path().join(name)).unwrap();
            labels.push_str(&format!("{}\n", json!({"frame": name, "classes": classes, "note": "ignored"})));
        }
        std::fs::write(dir.path().join("labels.jsonl"), labels).unwrap();
        Self { bundle: bundle.path().to_path_buf(), _bundle: bundle, dir }
    }

    fn path(&self, p: &str) -> PathBuf {
        self.dir.path().join(p)
    }

    /// Gives the bundle a thumbnail-only baseline: the darkest and brightest thumbnail
    /// pixel, each through a linear logit (dark_spot from the minimum, bright_spot from
    /// the maximum).
    fn add_baseline(&self) {
        let mut g = GraphWriter::new("baseline");
        let x = g.input("thumbnail", &[Dim::Fixed(1), Dim::Fixed(3), Dim::Symbol("height"), Dim::Symbol("width")]);
        let neg = g.unary("Neg", &x);
        let darkest = g.global_pool("GlobalMaxPool", &neg);
        let brightest = g.global_pool("GlobalMaxPool", &x);
        let both = g.concat(&[&darkest, &brightest], 1);
        let k = 4.0 / 3.0;
        let logits = g.dense(&both, &[k, k, k, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0, k, k, k], &[-4.0, -4.0], 6);
        g.output(&logits, "logits", &[Dim::Fixed(1), Dim::Fixed(2)]);
        std::fs::write(self.bundle.join("baseline.onnx"), g.finish("test")).unwrap();
        let manifest = self.bundle.join("bundle.toml");
        let text = std::fs::read_to_string(&manifest).unwrap()
            + "\n[baseline]\nfile = \"baseline.onnx\"\ninput = \"thumbnail\"\noutput = \"logits\"\n";
        std::fs::write(manifest, text).unwrap();
    }

    /// Labels of the set in the designed bundle's class order, and the frames.
    fn truth_and_frames(&self) -> (Vec<Vec<bool>>, Vec<saccade::engine::Frame>) {
        let classes = ["dark_spot", "bright_spot"];
        std::fs::read_to_string(self.path("labels.jsonl"))
            .unwrap()
            .lines()
            .map(|l| {
                let v: Value = serde_json::from_str(l).unwrap();
                let named: Vec<&str> = v["classes"].as_array().unwrap().iter().map(|c| c.as_str().unwrap()).collect();
                (
                    classes.iter().map(|c| named.contains(c)).collect(),
                    decode_file(&self.path(v["frame"].as_str().unwrap()), 0, u64::MAX).unwrap(),
                )
            })
            .unzip()
    }

    fn sweep(&self, labels: &Path, extra: &[&str]) -> Output {
        Command::new(BIN)
            .arg("sweep")
            .arg("--bundle")
            .arg(&self.bundle)
            .arg("--labels")
            .arg(labels)
            .args(extra)
            .output()
            .unwrap()
    }
}

fn text(b: &[u8]) -> String {
    String::from_utf8_lossy(b).into_owned()
}

#[test]
fn sweep_exhaustive_row_matches_a_plain_exhaustive_analysis() {
    let set = Set::new();
    let (csv_path, png_path) = (set.path("sweep.csv"), set.path("sweep.png"));
    let out = set.sweep(
        &set.path("labels.jsonl"),
        &[
            "--budgets",
            "1000,20",
            "--seeds",
            "2",
            "--tolerance",
            "100",
            "--max-miss-pct",
            "100",
            "--csv",
            csv_path.to_str().unwrap(),
            "--plot",
            png_path.to_str().unwrap(),
        ],
    );
    let stdout = text(&out.stdout);
    assert!(out.status.success(), "sweep failed: {}\n{stdout}", text(&out.stderr));
    // With a tolerance of 100 points and any share of misses allowed every budget
    // qualifies: the smallest is recommended.
    assert!(stdout.contains("recommended: 20 ms") && stdout.contains("[engine]\nbudget_ms = 20.0"), "{stdout}");

    // The CSV has the documented header and one line per row, every line as wide.
    let body = std::fs::read_to_string(&csv_path).unwrap();
    let lines: Vec<Vec<&str>> = body.lines().map(|l| l.split(',').collect()).collect();
    let classes = vec!["dark_spot".to_string(), "bright_spot".to_string()];
    let header = [
        "row",
        "budget_ms",
        "estimator",
        "analyses",
        "macro_f1",
        "f1_dark_spot",
        "f1_bright_spot",
        "ece",
        "coverage",
        "mean_patches",
        "p50_ms",
        "p99_ms",
        "deadline_misses",
        "deadline_miss_pct",
        "reviews",
        "miss_rate",
        "false_alarm_rate",
        "review_share",
        "mark_recall",
        "mark_attention",
        "recall_dark_spot",
        "recall_bright_spot",
        "miss_dark_spot",
        "miss_bright_spot",
        "false_alarm_dark_spot",
        "false_alarm_bright_spot",
    ];
    assert_eq!(lines[0], header);
    assert_eq!(csv::header(&classes), header);
    assert_eq!(lines.len(), 4, "two budgets and exhaustive (the designed bundle has no baseline): {body}");
    assert!(lines.iter().all(|l| l.len() == header.len()), "{body}");
    let col = |name: &str| header.iter().position(|h| *h == name).unwrap();
    let num = |l: &[&str], name: &str| {
        l[col(name)].parse::<f64>().unwrap_or_else(|e| panic!("{name} = {:?}: {e}", l[col(name)]))
    };
    let budgets: Vec<&Vec<&str>> = lines[1..].iter().filter(|l| l[0] == "budget").collect();
    assert_eq!(
        budgets.iter().map(|l| num(l, "budget_ms")).collect::<Vec<_>>(),
        vec![20.0, 1000.0],
        "budgets ascending"
    );
    for l in &budgets {
        assert_eq!(l[col("estimator")], "priority");
        assert_eq!(num(l, "analyses"), 12.0, "6 frames × 2 seeds");
        let cov = num(l, "coverage");
        assert!((0.0..=1.0).contains(&cov) && num(l, "mean_patches") >= 4.0, "{l:?}");
        assert!(num(l, "deadline_misses") <= 12.0 && num(l, "p99_ms") >= num(l, "p50_ms"));
        for name in ["macro_f1", "f1_dark_spot", "f1_bright_spot", "ece", "deadline_miss_pct", "reviews"] {
            num(l, name);
        }
        let share = num(l, "review_share");
        assert!((0.0..=1.0).contains(&share), "{l:?}");
    }
    let ex = lines.iter().find(|l| l[0] == "exhaustive").unwrap();
    assert_eq!((ex[col("budget_ms")], ex[col("estimator")], ex[col("deadline_misses")]), ("", "exhaustive", ""));
    assert_eq!(num(ex, "analyses"), 6.0);
    assert_eq!(num(ex, "coverage"), 1.0, "the exhaustive answer lies in its own interval");

    // The same frames through Engine::analyze, exhaustive, scored separately.
    let bundle = Arc::new(Bundle::load(&set.bundle, &Settings::default().batch_sizes()).unwrap());
    let thresholds = bundle.manifest.thresholds.clone();
    let dense = Settings { estimator: EstimatorKind::Exhaustive, ..Settings::default() };
    let mut engine = Engine::new(bundle, dense).unwrap();
    let (truth, frames) = set.truth_and_frames();
    let probs: Vec<Vec<f64>> =
        frames.iter().map(|f| engine.analyze(f, 9).unwrap().classes.iter().map(|c| c.probability).collect()).collect();
    let f = metrics::f1(&truth, &metrics::predict(&probs, &thresholds));
    assert!(f.macro_f1 < 1.0, "the mislabelled frame costs F1: {f:?}");
    assert!((num(ex, "macro_f1") - f.macro_f1).abs() < 1e-12, "sweep {} vs plain {}", num(ex, "macro_f1"), f.macro_f1);
    assert!(
        (num(ex, "f1_dark_spot") - f.per_class[0]).abs() < 1e-12
            && (num(ex, "f1_bright_spot") - f.per_class[1]).abs() < 1e-12
    );
    assert!((num(ex, "ece") - metrics::ece(&probs, &truth, 10)).abs() < 1e-12);

    // The plot is a PNG of the documented size.
    let png = image::open(&png_path).unwrap();
    assert_eq!((png.width(), png.height()), (plot::WIDTH, plot::HEIGHT));
    assert_eq!(image::guess_format(&std::fs::read(&png_path).unwrap()).unwrap(), image::ImageFormat::Png);
    let rgb = png.to_rgb8();
    assert!(
        rgb.pixels().any(|p| *p == plot::BLUE) && rgb.pixels().any(|p| *p == plot::RED),
        "F1 line and exhaustive reference drawn"
    );
}

#[test]
fn sweep_adds_the_thumbnail_only_row_when_the_bundle_has_a_baseline() {
    let set = Set::new();
    set.add_baseline();
    let (csv_path, png_path) = (set.path("sweep.csv"), set.path("sweep.png"));
    let out = set.sweep(
        &set.path("labels.jsonl"),
        &["--budgets", "30", "--csv", csv_path.to_str().unwrap(), "--plot", png_path.to_str().unwrap()],
    );
    assert!(out.status.success(), "sweep failed: {}", text(&out.stderr));
    let body = std::fs::read_to_string(&csv_path).unwrap();
    let lines: Vec<Vec<&str>> = body.lines().map(|l| l.split(',').collect()).collect();
    let header = lines[0].clone();
    let rows: Vec<&str> = lines[1..].iter().map(|l| l[0]).collect();
    assert_eq!(rows, ["budget", "exhaustive", "thumbnail-only"]);
    let thumb = &lines[3];
    let field = |name: &str| thumb[header.iter().position(|h| *h == name).unwrap()];
    for empty in
        ["budget_ms", "estimator", "coverage", "mean_patches", "deadline_misses", "deadline_miss_pct", "reviews"]
    {
        assert_eq!(field(empty), "", "{empty} does not apply to thumbnail-only");
    }
    assert_eq!(field("analyses"), "6");

    // The baseline scored separately on the same frames.
    let bundle = Bundle::load(&set.bundle, &Settings::default().batch_sizes()).unwrap();
    let (truth, frames) = set.truth_and_frames();
    let probs: Vec<Vec<f64>> =
        frames.iter().map(|f| bundle.baseline_probabilities(&f.image).unwrap().expect("a baseline")).collect();
    let f = metrics::f1(&truth, &metrics::predict(&probs, &bundle.manifest.thresholds));
    assert!(f.macro_f1 > 0.5, "the min/max baseline finds the discs: {f:?}");
    let num = |name: &str| field(name).parse::<f64>().unwrap();
    assert!(
        (num("macro_f1") - f.macro_f1).abs() < 1e-12
            && (num("f1_dark_spot") - f.per_class[0]).abs() < 1e-12
            && (num("f1_bright_spot") - f.per_class[1]).abs() < 1e-12,
        "{thumb:?} vs {f:?}"
    );
    assert!((num("ece") - metrics::ece(&probs, &truth, 10)).abs() < 1e-12);
    assert!(
        image::open(&png_path).unwrap().to_rgb8().pixels().any(|p| *p == plot::GREEN),
        "the thumbnail-only reference line is drawn"
    );
}

#[test]
fn sweep_names_bad_input() {
    let set = Set::new();
    let err = |out: Output| {
        assert_eq!(out.status.code(), Some(2), "stdout: {}", text(&out.stdout));
        text(&out.stderr)
    };
    let bad = set.path("unknown.jsonl");
    std::fs::write(&bad, "{\"frame\": \"dark.png\", \"classes\": [\"dark_spot\"]}\n{\"frame\": \"plain.png\", \"classes\": [\"crack\"]}\n").unwrap();
    let e = err(set.sweep(&bad, &["--budgets", "20"]));
    assert!(e.contains("unknown.jsonl:2: class \"crack\" is not one of the model's classes"), "{e}");

    let missing = set.path("missing.jsonl");
    std::fs::write(
        &missing,
        "{\"frame\": \"dark.png\", \"classes\": []}\n\n{\"frame\": \"gone.png\", \"classes\": []}\n",
    )
    .unwrap();
    let e = err(set.sweep(&missing, &["--budgets", "20"]));
    assert!(
        e.contains("1 of 2 labelled frames are missing")
            && e.contains("missing.jsonl:3: frame \"gone.png\"")
            && e.contains("gone.png is not a file"),
        "{e}"
    );
    // --frames moves where names resolve: here nothing is found.
    let e = err(
        set.sweep(&set.path("labels.jsonl"), &["--budgets", "20", "--frames", set.path("elsewhere").to_str().unwrap()])
    );
    assert!(e.contains("6 of 6 labelled frames are missing") && e.contains("… and 1 more"), "{e}");

    let labels = set.path("labels.jsonl");
    let e = err(set.sweep(&labels, &["--budgets", "20,0"]));
    assert!(e.contains("--budgets: 0 is not a positive number of milliseconds"), "{e}");
    let e = err(set.sweep(&labels, &["--estimator", "exhaustive"]));
    assert!(e.contains("the exhaustive row is always included"), "{e}");
    let e = err(set.sweep(&labels, &["--seeds", "0"]));
    assert!(e.contains("--seeds 0"), "{e}");
    let e = err(set.sweep(&labels, &["--max-miss-pct", "120"]));
    assert!(e.contains("--max-miss-pct 120: expected a share from 0 to 100 %"), "{e}");
}

#[test]
fn bench_json_names_every_stage_and_rate() {
    let bundle = common::designed_bundle(&DesignedParams::default());
    let out = Command::new(BIN)
        .args(["bench", "--size", "640x480", "--repeats", "2", "--budgets", "25,100", "--json", "--bundle"])
        .arg(bundle.path())
        .output()
        .unwrap();
    assert!(out.status.success(), "{}", text(&out.stderr));
    let v: Value = serde_json::from_str(&text(&out.stdout)).unwrap();
    let stages: Vec<&str> = v["stages"].as_array().unwrap().iter().map(|s| s["stage"].as_str().unwrap()).collect();
    for want in [
        "decode",
        "thumbnail",
        "attention network",
        "per patch, batch 16",
        "head + uncertainty",
        "whole analysis",
        "log write: frame record, serialise + append (sync = interval)",
        "log write: frame record, serialise + append (sync = always)",
        "dense: exhaustive over every cell (300 cells)",
    ] {
        assert!(stages.iter().any(|s| s.starts_with(want)), "no stage {want:?} in {stages:?}");
    }
    for s in v["stages"].as_array().unwrap() {
        let (lo, mid, hi) =
            (s["min_ms"].as_f64().unwrap(), s["median_ms"].as_f64().unwrap(), s["max_ms"].as_f64().unwrap());
        assert!(0.0 <= lo && lo <= mid && mid <= hi, "{s}");
    }
    let rates = v["frame_rates"].as_array().unwrap();
    assert_eq!(rates.iter().map(|r| r["budget_ms"].as_f64().unwrap()).collect::<Vec<_>>(), vec![25.0, 100.0]);
    for r in rates.iter().chain([&v["dense"]]) {
        // Decoding beside the analysis never allows fewer frames than doing both in turn.
        assert!(r["frames_per_s_pipelined"].as_f64().unwrap() >= r["frames_per_s"].as_f64().unwrap(), "{r}");
    }
    assert_eq!(v["dense"]["cells"], 300, "640×480 at factor 8 and stride 4: 20 × 15 cells");
}
