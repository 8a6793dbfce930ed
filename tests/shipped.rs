//! The trained demo bundle that ships with the program finds the defects placed in
//! generated frames it never saw in training (seeds from 900 000 on; training used seeds
//! 1–600, see the README's "The demo bundle").

use std::sync::Arc;

use saccade::demo::{scene, shipped};
use saccade::engine::{Bundle, Engine, Frame, Settings};
use saccade::eval::metrics::f1;

#[test]
fn the_shipped_bundle_finds_the_placed_defects() {
    let bundle = Bundle::load(shipped::source_dir(), &Settings::default().batch_sizes()).unwrap();
    assert_eq!(bundle.manifest.classes, scene::CLASSES);
    assert!(bundle.baseline.is_some(), "the shipped bundle carries its thumbnail-only comparison");
    let classes = bundle.manifest.classes.clone();
    let bundle = Arc::new(bundle);
    let thresholds = bundle.manifest.thresholds.clone();
    let reported = bundle.reported_thresholds();
    // No time budget here: the machine running tests is shared, and the question is what
    // the model sees, not how fast (`saccade sweep` measures that).
    let settings = Settings { budget_ms: 60_000.0, ..Settings::default() };
    let mut engine = Engine::new(bundle.clone(), settings).unwrap();
    let (mut truth, mut said, mut thumb_said) = (Vec::new(), Vec::new(), Vec::new());
    for n in 0..60u64 {
        let seed = 900_000 + n;
        let f = scene::generate(2448, 2048, seed);
        let placed = f.classes();
        let baseline = bundle.baseline_probabilities(&f.image).unwrap().unwrap();
        thumb_said.push(baseline.iter().zip(&thresholds).map(|(p, t)| p >= t).collect::<Vec<bool>>());
        let report = engine.analyze(&Frame::new(n, format!("scene:{seed}"), f.image), seed).unwrap();
        said.push(report.classes.iter().zip(&reported).map(|(c, t)| c.probability >= *t).collect::<Vec<bool>>());
        truth.push(classes.iter().map(|c| placed.contains(&c.as_str())).collect::<Vec<bool>>());
    }
    let thumb = f1(&truth, &thumb_said);
    let f1 = f1(&truth, &said);
    eprintln!("per-class F1 {:?}, macro {:.3}; thumbnail-only macro {:.3}", f1.per_class, f1.macro_f1, thumb.macro_f1);
    // The product's aim on these frames (README, "Reference results": 0.89 over 300 frames
    // at the default budget, scratches the weak class). This bundle measures 0.909 here;
    // the two before it measured 0.845 and 0.57 and fail.
    assert!(f1.macro_f1 >= 0.85, "macro F1 {:.3} over 60 frames (per class {:?})", f1.macro_f1, f1.per_class);
    assert!(f1.macro_f1 > thumb.macro_f1 + 0.2, "sampled {:.3} vs thumbnail-only {:.3}", f1.macro_f1, thumb.macro_f1);
}
