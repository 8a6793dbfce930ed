//! The trained demo bundle that ships with the program finds the defects placed in
//! generated frames it never saw in training (seeds from 900 000 on; training used seeds
//! below 10 000, see the README's "The demo bundle").

use std::sync::Arc;

use saccade::demo::{scene, shipped};
use saccade::engine::{Bundle, Engine, Settings};
use saccade::source::Frame;

#[test]
fn the_shipped_bundle_finds_the_placed_defects() {
    let bundle = Bundle::load(shipped::source_dir(), &Settings::default().batch_sizes()).unwrap();
    assert_eq!(bundle.manifest.classes, scene::CLASSES);
    assert!(bundle.baseline.is_some(), "the shipped bundle carries its thumbnail-only comparison");
    let classes = bundle.manifest.classes.clone();
    let mut engine = Engine::new(Arc::new(bundle));
    // No time budget here: the machine running tests is shared, and the question is what
    // the model sees, not how fast (`saccade sweep` measures that).
    let settings = Settings { budget_ms: 60_000.0, ..Settings::default() };
    let (mut tp, mut fp, mut fneg) = (vec![0u32; classes.len()], vec![0u32; classes.len()], vec![0u32; classes.len()]);
    for n in 0..40u64 {
        let seed = 900_000 + n;
        let f = scene::generate(2448, 2048, seed);
        let truth = f.classes();
        let report = engine.analyze(&Frame::new(n, format!("scene:{seed}"), f.image), &settings, seed).unwrap();
        for (j, c) in report.classes.iter().enumerate() {
            let said = c.probability >= c.threshold;
            match (said, truth.contains(&c.name.as_str())) {
                (true, true) => tp[j] += 1,
                (true, false) => fp[j] += 1,
                (false, true) => fneg[j] += 1,
                _ => {}
            }
        }
    }
    let f1: Vec<f64> = (0..classes.len()).map(|j| 2.0 * tp[j] as f64 / (2 * tp[j] + fp[j] + fneg[j]).max(1) as f64).collect();
    let macro_f1 = f1.iter().sum::<f64>() / f1.len() as f64;
    eprintln!("per-class F1 {f1:?}, macro {macro_f1:.3}; tp {tp:?} fp {fp:?} fn {fneg:?}");
    assert!(macro_f1 >= 0.8, "macro F1 {macro_f1:.3} over 40 frames (per class {f1:?})");
}
