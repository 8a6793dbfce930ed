//! Calibration maps and risk-controlled outcome thresholds: the maths against independent
//! references, the risk guarantee by simulation, and bundles with and without
//! `calibration.json` in the engine.

mod common;

use std::sync::Arc;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use saccade::bundle::calibration::{
    clopper_pearson_upper, risk_thresholds, Calibration, ClassCalibration, Platt, Targets, FILE,
};
use saccade::demo::designed::DesignedParams;
use saccade::engine::{Bundle, Engine, Frame, Outcome, Settings};
use serde_json::{json, Value};

/// Platt scaling against scikit-learn's LogisticRegression (no penalty, Platt's 1999
/// targets as sample weights), and Clopper–Pearson bounds against scipy's beta quantile
/// (Clopper and Pearson 1934): tests/reference/calibration_ref.py.
#[test]
fn platt_and_clopper_pearson_agree_with_scikit_learn_and_scipy() {
    let mut rng = ChaCha8Rng::seed_from_u64(10);
    let mut cases: Vec<(Vec<f64>, Vec<bool>)> = Vec::new();
    for (n, rate, gain) in [(30usize, 0.3, 1.0), (200, 0.1, 3.0), (500, 0.5, 0.4), (80, 0.05, 2.0)] {
        let y: Vec<bool> = (0..n).map(|_| rng.random_bool(rate)).collect();
        // Overconfident or timid scores around the labels: logit = gain × noisy signal.
        let p: Vec<f64> = y
            .iter()
            .map(|&t| {
                let z = gain * (if t { 1.0 } else { -1.0 } + 1.5 * (rng.random::<f64>() - 0.5) * 2.0);
                1.0 / (1.0 + (-z).exp())
            })
            .collect();
        cases.push((p, y));
    }
    let cp: Vec<(usize, usize, f64)> = vec![(0, 20, 0.9), (3, 50, 0.9), (10, 400, 0.95), (49, 50, 0.8), (7, 7, 0.9)];
    let req = json!({
        "platt": cases.iter().map(|(p, y)| json!({"p": p, "y": y.iter().map(|&b| b as u8).collect::<Vec<_>>()})).collect::<Vec<_>>(),
        "cp": cp.iter().map(|&(k, n, c)| json!([k, n, c])).collect::<Vec<_>>(),
    });
    let out: Value = serde_json::from_str(&common::run_reference("calibration_ref.py", &[], &req.to_string())).unwrap();
    for ((p, y), theirs) in cases.iter().zip(out["platt"].as_array().unwrap()) {
        let ours = Platt::fit(p, y);
        let theirs = Platt { a: theirs["a"].as_f64().unwrap(), b: theirs["b"].as_f64().unwrap() };
        // Compare the maps where they are used, on a grid of probabilities.
        for i in 1..100 {
            let q = i as f64 / 100.0;
            let (u, v) = (ours.apply(q), theirs.apply(q));
            assert!((u - v).abs() < 1e-5, "at {q}: ours {u} ({ours:?}) vs scikit-learn {v} ({theirs:?})");
        }
    }
    for (&(k, n, c), theirs) in cp.iter().zip(out["cp"].as_array().unwrap()) {
        let (ours, theirs) = (clopper_pearson_upper(k, n, c), theirs.as_f64().unwrap());
        assert!((ours - theirs).abs() < 1e-9, "k {k} n {n} c {c}: ours {ours} vs scipy {theirs}");
    }
}

/// The guarantee, by simulation with known score distributions: positives score
/// `sqrt(U)` (so P(score < t) = t²), negatives `1 − sqrt(U)` (P(score > t) = (1 − t)²).
/// Over many random calibration sets, the true miss rate of `clear` and false-alarm rate
/// of `detected` exceed their targets in at most about 1 − confidence of the sets.
#[test]
fn the_risk_guarantee_holds_over_random_calibration_sets() {
    let targets = Targets { miss: 0.1, false_alarm: 0.05, confidence: 0.9 };
    let (sets, n_pos, n_neg) = (1000, 120, 300);
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let (mut miss_over, mut alarm_over, mut lo_sum, mut hi_sum) = (0usize, 0usize, 0.0, 0.0);
    for _ in 0..sets {
        let mut pos: Vec<f64> = (0..n_pos).map(|_| rng.random::<f64>().sqrt()).collect();
        let mut neg: Vec<f64> = (0..n_neg).map(|_| 1.0 - rng.random::<f64>().sqrt()).collect();
        pos.sort_by(f64::total_cmp);
        neg.sort_by(f64::total_cmp);
        let (lo, hi) = risk_thresholds(&pos, &neg, &targets);
        miss_over += (lo * lo > targets.miss) as usize;
        alarm_over += ((1.0 - hi).powi(2) > targets.false_alarm) as usize;
        lo_sum += lo;
        hi_sum += hi;
    }
    // A fixed seed makes this exact; the bound allows 3 binomial standard deviations of
    // Monte Carlo error around 1 − confidence.
    let allowed = (1.0 - targets.confidence) + 3.0 * (0.1f64 * 0.9 / sets as f64).sqrt();
    let (m, a) = (miss_over as f64 / sets as f64, alarm_over as f64 / sets as f64);
    eprintln!("over target: misses in {m:.3}, false alarms in {a:.3} of {sets} sets (allowed {allowed:.3})");
    assert!(m <= allowed, "miss target broken in {m} of the calibration sets");
    assert!(a <= allowed, "false-alarm target broken in {a} of the calibration sets");
    // And the thresholds are not vacuous: the rates they reach are close to the targets
    // (sqrt(0.1) ≈ 0.32 would be exact for `clear`, 1 − sqrt(0.05) ≈ 0.78 for `detected`).
    let (lo, hi) = (lo_sum / sets as f64, hi_sum / sets as f64);
    assert!(lo > 0.2 && lo < 0.317 && hi > 0.776 && hi < 0.9, "mean clear_below {lo}, detected_above {hi}");
}

/// The same through the fitted file: Platt's map is increasing, so thresholds on the
/// calibrated scale are thresholds on the raw score; the guarantee carries over.
#[test]
fn the_guarantee_survives_the_calibration_map() {
    let targets = Targets::default();
    let sets = 300;
    let mut rng = ChaCha8Rng::seed_from_u64(12);
    let mut over = 0;
    for _ in 0..sets {
        let y: Vec<bool> = (0..400).map(|_| rng.random_bool(0.3)).collect();
        let p: Vec<f64> =
            y.iter().map(|&t| if t { rng.random::<f64>().sqrt() } else { 1.0 - rng.random::<f64>().sqrt() }).collect();
        let c = ClassCalibration::fit("k", &p, &y, &targets);
        // The raw score where the calibrated one crosses clear_below, by bisection.
        let (mut a, mut b) = (0.0f64, 1.0f64);
        for _ in 0..60 {
            let m = 0.5 * (a + b);
            if c.map.apply(m) < c.clear_below {
                a = m;
            } else {
                b = m;
            }
        }
        over += (a * a > targets.miss) as usize;
    }
    let allowed = (1.0 - targets.confidence) + 3.0 * (0.09f64 / sets as f64).sqrt();
    assert!((over as f64 / sets as f64) <= allowed, "{over} of {sets} calibration sets break the miss target");
}

fn flat_frame() -> Frame {
    Frame::new(0, "flat", image::RgbImage::from_pixel(320, 240, image::Rgb([150, 150, 150])))
}

/// A bundle without calibration.json keeps the single threshold per class and the head's
/// own probabilities; with one, the map and the two thresholds apply, other targets in the
/// settings get their own thresholds, and a bad file is refused naming file and field.
#[test]
fn bundles_with_and_without_calibration() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let plain = Arc::new(Bundle::load(dir.path(), &Settings::default().batch_sizes()).unwrap());
    assert!(plain.calibration.is_none());
    let mut e = Engine::new(plain.clone(), Settings::default()).unwrap();
    let pairs: Vec<(f64, f64)> = plain.manifest.thresholds.iter().map(|&t| (t, t)).collect();
    assert_eq!(e.decision(), &pairs[..], "old behaviour: one threshold, clear below and detected above it");
    let raw = e.analyze(&flat_frame(), 1).unwrap();

    // Scores for a calibration file: separable, enough frames for both outcomes.
    let classes = plain.manifest.classes.clone();
    let mut rng = ChaCha8Rng::seed_from_u64(13);
    let truth: Vec<Vec<bool>> = (0..400).map(|_| classes.iter().map(|_| rng.random_bool(0.4)).collect()).collect();
    let probs: Vec<Vec<f64>> = truth
        .iter()
        .map(|r| {
            r.iter().map(|&t| if t { 0.5 + 0.5 * rng.random::<f64>() } else { 0.6 * rng.random::<f64>() }).collect()
        })
        .collect();
    let cal = Calibration::fit(&classes, &probs, &truth, &Targets::default(), "test");
    cal.write(dir.path()).unwrap();
    let calibrated = Arc::new(Bundle::load(dir.path(), &Settings::default().batch_sizes()).unwrap());
    let mut e = Engine::new(calibrated.clone(), Settings::default()).unwrap();
    let expected: Vec<(f64, f64)> = cal.classes.iter().map(|c| (c.clear_below, c.detected_above)).collect();
    assert_eq!(e.decision(), &expected[..]);
    assert!(expected.iter().all(|(lo, hi)| lo < hi), "{expected:?}");
    let r = e.analyze(&flat_frame(), 1).unwrap();
    for ((c, before), k) in r.classes.iter().zip(&raw.classes).zip(&cal.classes) {
        assert!((c.probability - k.map.apply(before.probability)).abs() < 1e-9, "the map applies to {}", c.name);
        assert!((c.interval[0] - k.map.apply(before.interval[0])).abs() < 1e-9);
        assert_eq!((c.clear_below, c.detected_above), (k.clear_below, k.detected_above));
    }
    // Stricter targets from the config widen the band.
    let strict = Settings { miss_target: 0.02, false_alarm_target: 0.02, ..Settings::default() };
    e.set_settings(strict).unwrap();
    for ((lo, hi), (lo0, hi0)) in e.decision().iter().zip(&expected) {
        assert!(lo <= lo0 && hi >= hi0, "({lo}, {hi}) against ({lo0}, {hi0})");
    }
    // Single thresholds from the config override the pair.
    let single = Settings { thresholds: Some(vec![0.4; classes.len()]), ..Settings::default() };
    e.set_settings(single).unwrap();
    assert!(e.decision().iter().all(|&d| d == (0.4, 0.4)));

    // A damaged file names itself and the field.
    let text = std::fs::read_to_string(dir.path().join(FILE)).unwrap();
    let v: Value = serde_json::from_str(&text).unwrap();
    let mut bad = v.clone();
    bad["classes"][1]["map"]["a"] = json!(-2.0);
    std::fs::write(dir.path().join(FILE), bad.to_string()).unwrap();
    let err = Bundle::load(dir.path(), &[1]).err().unwrap().to_string();
    assert!(err.contains(FILE) && err.contains("classes[1].map.a"), "{err}");
    let mut bad = v;
    bad["targets"]["miss"] = json!(1.5);
    std::fs::write(dir.path().join(FILE), bad.to_string()).unwrap();
    let err = Bundle::load(dir.path(), &[1]).err().unwrap().to_string();
    assert!(err.contains("targets.miss"), "{err}");
    std::fs::write(dir.path().join(FILE), "{\"format\": 1,\n \"method\": 3}").unwrap();
    let err = Bundle::load(dir.path(), &[1]).err().unwrap().to_string();
    assert!(err.contains(FILE) && err.contains("line 2"), "{err}");
}

/// Each finding names the examined patches that carry it, in frame coordinates, and a
/// clear class names none.
#[test]
fn findings_name_their_patches() {
    let dir = common::designed_bundle(&DesignedParams::default());
    let bundle = Arc::new(Bundle::load(dir.path(), &Settings::default().batch_sizes()).unwrap());
    let s = Settings { budget_ms: 60_000.0, min_patches: 32, max_patches: 32, ..Settings::default() };
    let mut e = Engine::new(bundle, s).unwrap();
    let mut img = image::RgbImage::from_pixel(640, 480, image::Rgb([150, 150, 150]));
    let (cx, cy) = (410i64, 230i64);
    for dy in -6i64..=6 {
        for dx in -6i64..=6 {
            if dx * dx + dy * dy <= 36 {
                img.put_pixel((cx + dx) as u32, (cy + dy) as u32, image::Rgb([20, 20, 20]));
            }
        }
    }
    let r = e.analyze(&Frame::new(0, "spot", img), 3).unwrap();
    let dark = &r.classes[0];
    assert_ne!(dark.outcome, Outcome::Clear, "{:?}", r.classes);
    assert!(!dark.patches.is_empty() && dark.patches.len() <= saccade::engine::MAX_SPOTS);
    let best = &dark.patches[0];
    let inside = |s: &saccade::engine::Spot| {
        (s.x..s.x + s.size as i64).contains(&cx) && (s.y..s.y + s.size as i64).contains(&cy)
    };
    assert!(inside(best), "the strongest patch holds the spot: {best:?}");
    assert!(dark.patches.windows(2).all(|w| w[0].probability >= w[1].probability));
    for c in r.classes.iter().filter(|c| c.outcome == Outcome::Clear) {
        assert!(c.patches.is_empty(), "{c:?}");
    }
}

/// The log lists no examined patch by default, only the finding patches with `findings`,
/// and all of them with `all`.
#[test]
fn records_list_the_patches_the_config_asks_for() {
    use saccade::sinks::worker::keep_patches;
    use saccade::sinks::PatchPolicy;
    let dir = common::designed_bundle(&DesignedParams::default());
    let bundle = Arc::new(Bundle::load(dir.path(), &Settings::default().batch_sizes()).unwrap());
    let s = Settings { budget_ms: 60_000.0, min_patches: 32, max_patches: 32, ..Settings::default() };
    let mut e = Engine::new(bundle, s).unwrap();
    let mut img = image::RgbImage::from_pixel(640, 480, image::Rgb([150, 150, 150]));
    for dy in 0..8 {
        for dx in 0..8 {
            img.put_pixel(300 + dx, 200 + dy, image::Rgb([10, 10, 10]));
        }
    }
    let r = e.analyze(&Frame::new(0, "spot", img), 5).unwrap();
    let named: std::collections::BTreeSet<(i64, i64)> =
        r.classes.iter().flat_map(|c| c.patches.iter().map(|p| (p.x, p.y))).collect();
    assert!(!named.is_empty());
    let mut all = r.clone();
    keep_patches(&mut all, PatchPolicy::All);
    assert_eq!(all.patches.len(), 32);
    let mut none = r.clone();
    keep_patches(&mut none, PatchPolicy::None);
    let json = serde_json::to_value(&none).unwrap();
    assert!(json.get("patches").is_none(), "no list in the record");
    assert!(json["classes"].as_array().unwrap().iter().any(|c| c.get("patches").is_some()), "findings keep theirs");
    let mut findings = r;
    keep_patches(&mut findings, PatchPolicy::Findings);
    let kept: std::collections::BTreeSet<(i64, i64)> = findings.patches.iter().map(|p| (p.x, p.y)).collect();
    assert_eq!(kept, named);
}
