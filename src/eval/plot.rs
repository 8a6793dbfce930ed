//! The sweep's PNG: macro F1 against budget (top panel, with the exhaustive and
//! thumbnail-only answers as dashed horizontal lines) and p50/p99 analysis time against
//! budget (bottom panel, with the budget itself as a dashed line). The budget axis is
//! logarithmic with a tick at every budget swept. Lines differ by marker shape and dash
//! pattern as well as colour. Drawn with `image` and the project's stroke font only; the
//! size is fixed at [`WIDTH`] × [`HEIGHT`].

use std::path::Path;

use image::{ImageFormat, Rgb, RgbImage};

use super::font::{draw_text, text_width, CAP_HEIGHT};

pub const WIDTH: u32 = 960;
pub const HEIGHT: u32 = 540;

/// What the plot shows; the vectors run over `budgets`, in the same order.
#[derive(Clone, Debug)]
pub struct SweepPlot {
    /// Estimator of the budget rows (for the legend).
    pub estimator: String,
    pub budgets: Vec<f64>,
    pub macro_f1: Vec<f64>,
    pub p50_ms: Vec<f64>,
    pub p99_ms: Vec<f64>,
    pub exhaustive_f1: Option<f64>,
    pub baseline_f1: Option<f64>,
}

const WHITE: Rgb<u8> = Rgb([255, 255, 255]);
const INK: Rgb<u8> = Rgb([40, 40, 40]);
const GRID: Rgb<u8> = Rgb([225, 225, 225]);
// The project's own palette (deep ink blue, amber, brick, pine, plum, moss), chosen to
// stay apart in greyscale print as well as in colour.
pub const BLUE: Rgb<u8> = Rgb([36, 62, 140]);
pub const ORANGE: Rgb<u8> = Rgb([232, 160, 32]);
pub const RED: Rgb<u8> = Rgb([170, 52, 40]);
pub const GREEN: Rgb<u8> = Rgb([28, 112, 84]);
const PLUM: Rgb<u8> = Rgb([120, 64, 130]);
const MOSS: Rgb<u8> = Rgb([120, 128, 40]);
const GREY: Rgb<u8> = Rgb([140, 140, 140]);
const SCALE: u32 = 2;

/// Plot area in pixels, edges inclusive.
#[derive(Clone, Copy)]
struct Area {
    x0: i64,
    x1: i64,
    y0: i64,
    y1: i64,
}

impl Area {
    fn contains(&self, x: i64, y: i64) -> bool {
        (self.x0..=self.x1).contains(&x) && (self.y0..=self.y1).contains(&y)
    }
}

/// Horizontal axis: logarithmic for budgets, linear for epochs.
struct XAxis {
    lo: f64,
    hi: f64,
    log: bool,
}

impl XAxis {
    fn new(budgets: &[f64]) -> Self {
        let finite = budgets.iter().copied().filter(|b| b.is_finite() && *b > 0.0);
        let (lo, hi) = finite.fold((f64::INFINITY, 0.0f64), |(l, h), b| (l.min(b), h.max(b)));
        if !(lo.is_finite() && hi > 0.0) {
            return Self { lo: 1.0, hi: 1000.0, log: true };
        }
        // A margin on both sides keeps the first and last markers off the frame.
        Self { lo: lo / 1.3, hi: if hi > lo { hi * 1.3 } else { hi * 1.69 }, log: true }
    }

    fn linear(lo: f64, hi: f64) -> Self {
        Self { lo, hi: if hi > lo { hi } else { lo + 1.0 }, log: false }
    }

    fn px(&self, v: f64, a: &Area) -> i64 {
        let t = if self.log {
            (v.ln() - self.lo.ln()) / (self.hi.ln() - self.lo.ln())
        } else {
            (v - self.lo) / (self.hi - self.lo)
        };
        a.x0 + (t * (a.x1 - a.x0) as f64).round() as i64
    }
}

/// Linear value axis with "nice" ticks (1, 2 or 5 × 10^k).
struct YAxis {
    lo: f64,
    hi: f64,
    step: f64,
}

impl YAxis {
    fn nice(lo: f64, hi: f64) -> Self {
        let (lo, hi) =
            if hi - lo < 1e-9 { (lo - 0.5 * lo.abs().max(1e-3), hi + 0.5 * hi.abs().max(1e-3)) } else { (lo, hi) };
        let raw = (hi - lo) / 5.0;
        let mag = 10f64.powf(raw.log10().floor());
        let f = raw / mag;
        let step = mag
            * if f < 1.5 {
                1.0
            } else if f < 3.0 {
                2.0
            } else if f < 7.0 {
                5.0
            } else {
                10.0
            };
        Self { lo: (lo / step).floor() * step, hi: (hi / step).ceil() * step, step }
    }

    fn px(&self, v: f64, a: &Area) -> i64 {
        let t = (v - self.lo) / (self.hi - self.lo);
        a.y1 - (t * (a.y1 - a.y0) as f64).round() as i64
    }

    fn ticks(&self) -> Vec<f64> {
        let n = ((self.hi - self.lo) / self.step).round() as i64;
        (0..=n).map(|i| self.lo + i as f64 * self.step).collect()
    }

    fn label(&self, v: f64) -> String {
        let decimals = if self.step >= 1.0 { 0 } else { (-self.step.log10() - 1e-9).ceil() as usize };
        let s = format!("{v:.decimals$}");
        if s.starts_with('-') && s[1..].chars().all(|c| c == '0' || c == '.') {
            s[1..].to_string()
        } else {
            s
        }
    }
}

/// A budget as a tick label: whole numbers without decimals.
fn budget_label(v: f64) -> String {
    if v.fract() == 0.0 {
        format!("{v:.0}")
    } else {
        let s = format!("{v:.2}");
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    }
}

struct Line {
    points: Vec<(f64, f64)>,
    color: Rgb<u8>,
    dashed: bool,
    markers: bool,
}

struct LegendEntry {
    label: String,
    color: Rgb<u8>,
    dashed: bool,
}

/// Dash patterns (pixels on, pixels off) of dashed lines, by their place in the panel, so
/// that lines of similar colour still differ in print and for colour-blind readers.
const DASHES: [(u32, u32); 3] = [(8, 6), (3, 4), (12, 4)];

/// Marker shapes, by the line's place in the panel.
#[derive(Clone, Copy)]
enum Marker {
    Square,
    Triangle,
    Diamond,
    Ring,
    Cross,
}
const MARKERS: [Marker; 5] = [Marker::Square, Marker::Triangle, Marker::Diamond, Marker::Ring, Marker::Cross];

fn marker(img: &mut RgbImage, a: &Area, x: i64, y: i64, shape: Marker, color: Rgb<u8>) {
    let r = 4i64;
    for dy in -r..=r {
        for dx in -r..=r {
            let on = match shape {
                Marker::Square => dx.abs() <= 3 && dy.abs() <= 3,
                // Apex up, base on the bottom row.
                Marker::Triangle => dy >= -r && 2 * dx.abs() <= dy + r,
                Marker::Diamond => dx.abs() + dy.abs() <= r,
                Marker::Ring => (9..=20).contains(&(dx * dx + dy * dy)),
                Marker::Cross => (dx - dy).abs() <= 1 || (dx + dy).abs() <= 1,
            };
            if on && a.contains(x + dx, y + dy) {
                img.put_pixel((x + dx) as u32, (y + dy) as u32, color);
            }
        }
    }
}

/// A 2-pixel segment clipped to `a`; `dash` carries the pattern and its phase across segments.
fn segment(
    img: &mut RgbImage,
    a: &Area,
    (x0, y0): (i64, i64),
    (x1, y1): (i64, i64),
    color: Rgb<u8>,
    dash: Option<(&mut u32, (u32, u32))>,
) {
    let steps = (x1 - x0).abs().max((y1 - y0).abs()).max(1);
    let mut phase = dash;
    for i in 0..=steps {
        let x = x0 + ((x1 - x0) as f64 * i as f64 / steps as f64).round() as i64;
        let y = y0 + ((y1 - y0) as f64 * i as f64 / steps as f64).round() as i64;
        let on = match phase.as_mut() {
            Some((p, (on, off))) => {
                **p = (**p + 1) % (*on + *off);
                **p < *on
            }
            None => true,
        };
        if on {
            for (dx, dy) in [(0, 0), (1, 0), (0, 1), (1, 1)] {
                if a.contains(x + dx, y + dy) {
                    img.put_pixel((x + dx) as u32, (y + dy) as u32, color);
                }
            }
        }
    }
}

/// The `n`-th line of a panel: dashed lines take the `n`-th dash pattern, markers the
/// `n`-th shape.
fn draw_line(img: &mut RgbImage, a: &Area, x: &XAxis, y: &YAxis, line: &Line, n: usize) {
    let pts: Vec<(i64, i64)> = line
        .points
        .iter()
        .filter(|(u, v)| u.is_finite() && *u > 0.0 && v.is_finite())
        .map(|&(u, v)| (x.px(u, a), y.px(v, a)))
        .collect();
    let mut phase = 0u32;
    for w in pts.windows(2) {
        segment(img, a, w[0], w[1], line.color, line.dashed.then_some((&mut phase, DASHES[n % DASHES.len()])));
    }
    if line.markers {
        for &(px, py) in &pts {
            marker(img, a, px, py, MARKERS[n % MARKERS.len()], line.color);
        }
    }
}

/// Frame, grid, ticks and labels of one panel, then its lines and legend; `budgets` are
/// the x ticks.
#[allow(clippy::too_many_arguments)] // one call per panel, each argument a different part of it
fn panel(
    img: &mut RgbImage,
    a: Area,
    x: &XAxis,
    y: &YAxis,
    title: &str,
    budgets: &[f64],
    lines: &[Line],
    legend: &[LegendEntry],
) {
    let gh = (CAP_HEIGHT * SCALE) as i64;
    draw_text(img, a.x0, a.y0 - gh - 8, title, SCALE, INK);
    for v in y.ticks() {
        let py = y.px(v, &a);
        for px in a.x0..=a.x1 {
            img.put_pixel(px as u32, py as u32, GRID);
        }
        let label = y.label(v);
        draw_text(img, a.x0 - 10 - text_width(&label, SCALE) as i64, py - gh / 2, &label, SCALE, INK);
        img.put_pixel((a.x0 - 3) as u32, py as u32, INK);
        img.put_pixel((a.x0 - 2) as u32, py as u32, INK);
    }
    // Budget ticks, skipping a label that would run into the previous one.
    let mut right_of_last = i64::MIN;
    for &b in budgets.iter().filter(|b| b.is_finite() && **b > 0.0) {
        let px = x.px(b, &a);
        for dy in 1..=5 {
            img.put_pixel(px as u32, (a.y1 + dy) as u32, INK);
        }
        let label = budget_label(b);
        let w = text_width(&label, SCALE) as i64;
        let left = px - w / 2;
        if left > right_of_last + 8 {
            draw_text(img, left, a.y1 + 9, &label, SCALE, INK);
            right_of_last = left + w;
        }
    }
    for px in a.x0..=a.x1 {
        img.put_pixel(px as u32, a.y0 as u32, INK);
        img.put_pixel(px as u32, a.y1 as u32, INK);
    }
    for py in a.y0..=a.y1 {
        img.put_pixel(a.x0 as u32, py as u32, INK);
        img.put_pixel(a.x1 as u32, py as u32, INK);
    }
    for (n, line) in lines.iter().enumerate() {
        draw_line(img, &a, x, y, line, n);
    }
    let all = Area { x0: 0, x1: WIDTH as i64 - 1, y0: 0, y1: HEIGHT as i64 - 1 };
    let lx = a.x1 + 16;
    // Legend entry n shows line n's dash and marker (the callers list both in one order).
    for (n, e) in legend.iter().enumerate() {
        let ly = a.y0 + 6 + n as i64 * (gh + 10);
        let mut phase = 0u32;
        let dash = e.dashed.then_some((&mut phase, DASHES[n % DASHES.len()]));
        segment(img, &all, (lx, ly + gh / 2), (lx + 26, ly + gh / 2), e.color, dash);
        if lines.get(n).is_some_and(|l| l.markers) {
            marker(img, &all, lx + 13, ly + gh / 2, MARKERS[n % MARKERS.len()], e.color);
        }
        draw_text(img, lx + 34, ly, &e.label, SCALE, INK);
    }
}

fn horizontal(v: f64, x: &XAxis, color: Rgb<u8>) -> Line {
    Line { points: vec![(x.lo, v), (x.hi, v)], color, dashed: true, markers: false }
}

fn range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    values.filter(|v| v.is_finite()).fold((f64::INFINITY, f64::NEG_INFINITY), |(l, h), v| (l.min(v), h.max(v)))
}

/// Draws the plot.
pub fn render(p: &SweepPlot) -> RgbImage {
    let mut img = RgbImage::from_pixel(WIDTH, HEIGHT, WHITE);
    let x = XAxis::new(&p.budgets);
    let top = Area { x0: 84, x1: 724, y0: 34, y1: 214 };
    let bottom = Area { x0: 84, x1: 724, y0: 300, y1: 480 };

    let refs: Vec<f64> = p.exhaustive_f1.iter().chain(&p.baseline_f1).copied().collect();
    let (lo, hi) = range(p.macro_f1.iter().chain(&refs).copied());
    let (lo, hi) = if lo.is_finite() { (lo, hi) } else { (0.0, 1.0) };
    let pad = ((hi - lo) * 0.1).max(0.01);
    let y = YAxis::nice((lo - pad).max(0.0), (hi + pad).min(1.0));
    let series = |v: &[f64]| p.budgets.iter().copied().zip(v.iter().copied()).collect::<Vec<_>>();
    let mut lines = vec![Line { points: series(&p.macro_f1), color: BLUE, dashed: false, markers: true }];
    let mut legend = vec![LegendEntry { label: p.estimator.clone(), color: BLUE, dashed: false }];
    if let Some(v) = p.exhaustive_f1 {
        lines.push(horizontal(v, &x, RED));
        legend.push(LegendEntry { label: "exhaustive".into(), color: RED, dashed: true });
    }
    if let Some(v) = p.baseline_f1 {
        lines.push(horizontal(v, &x, GREEN));
        legend.push(LegendEntry { label: "thumbnail-only".into(), color: GREEN, dashed: true });
    }
    panel(&mut img, top, &x, &y, "macro F1", &p.budgets, &lines, &legend);

    let (_, hi) = range(p.p50_ms.iter().chain(&p.p99_ms).chain(&p.budgets).copied());
    let hi = if hi.is_finite() && hi > 0.0 { hi } else { 1.0 };
    let y = YAxis::nice(0.0, hi * 1.08);
    // y = budget, sampled along the log axis (a curve on this scale).
    let diagonal: Vec<(f64, f64)> =
        (0..=64).map(|i| x.lo * (x.hi / x.lo).powf(i as f64 / 64.0)).map(|b| (b, b)).collect();
    // In the legend's order, so each entry shows its line's marker and dash.
    let lines = [
        Line { points: series(&p.p50_ms), color: BLUE, dashed: false, markers: true },
        Line { points: series(&p.p99_ms), color: ORANGE, dashed: true, markers: true },
        Line { points: diagonal, color: GREY, dashed: true, markers: false },
    ];
    let legend = [
        LegendEntry { label: "p50".into(), color: BLUE, dashed: false },
        LegendEntry { label: "p99".into(), color: ORANGE, dashed: true },
        LegendEntry { label: "budget".into(), color: GREY, dashed: true },
    ];
    panel(&mut img, bottom, &x, &y, "analysis time ms", &p.budgets, &lines, &legend);
    let label = "budget ms (log scale)";
    draw_text(
        &mut img,
        (bottom.x0 + bottom.x1) / 2 - text_width(label, SCALE) as i64 / 2,
        bottom.y1 + 34,
        label,
        SCALE,
        INK,
    );
    img
}

/// One panel of [`render_curves`]: named series of `(x, y)` points.
#[derive(Clone, Debug)]
pub struct CurvePanel {
    pub title: String,
    pub series: Vec<(String, Vec<(f64, f64)>)>,
}

/// Two panels of curves over a shared linear x axis (a training run's losses and scores
/// against epochs), each series in its own colour with markers.
pub fn render_curves(top: &CurvePanel, bottom: &CurvePanel, x_title: &str) -> RgbImage {
    const COLORS: [Rgb<u8>; 6] = [BLUE, ORANGE, RED, GREEN, PLUM, MOSS];
    let mut img = RgbImage::from_pixel(WIDTH, HEIGHT, WHITE);
    let xs = || top.series.iter().chain(&bottom.series).flat_map(|(_, p)| p.iter().map(|q| q.0));
    let (lo, hi) = range(xs());
    let (lo, hi) = if lo.is_finite() { (lo, hi) } else { (0.0, 1.0) };
    let ticks = YAxis::nice(lo, hi);
    let x = XAxis::linear(ticks.lo, ticks.hi);
    let areas = [Area { x0: 84, x1: 724, y0: 34, y1: 214 }, Area { x0: 84, x1: 724, y0: 300, y1: 480 }];
    for (p, a) in [top, bottom].into_iter().zip(areas) {
        let (lo, hi) = range(p.series.iter().flat_map(|(_, s)| s.iter().map(|q| q.1)));
        let (lo, hi) = if lo.is_finite() { (lo, hi) } else { (0.0, 1.0) };
        let y = YAxis::nice(lo, hi + (hi - lo) * 0.05);
        let color = |i: usize| COLORS[i % COLORS.len()];
        let lines: Vec<Line> = p
            .series
            .iter()
            .enumerate()
            .map(|(i, (_, pts))| Line { points: pts.clone(), color: color(i), dashed: false, markers: true })
            .collect();
        let legend: Vec<LegendEntry> = p
            .series
            .iter()
            .enumerate()
            .map(|(i, (name, _))| LegendEntry { label: name.clone(), color: color(i), dashed: false })
            .collect();
        panel(&mut img, a, &x, &y, &p.title, &ticks.ticks(), &lines, &legend);
    }
    let b = areas[1];
    draw_text(&mut img, (b.x0 + b.x1) / 2 - text_width(x_title, SCALE) as i64 / 2, b.y1 + 34, x_title, SCALE, INK);
    img
}

/// An image as PNG bytes.
pub fn png_bytes(img: &RgbImage) -> Vec<u8> {
    let mut buf = std::io::Cursor::new(Vec::new());
    img.write_to(&mut buf, ImageFormat::Png).expect("PNG encoding into memory cannot fail");
    buf.into_inner()
}

/// The plot as PNG bytes.
pub fn png(p: &SweepPlot) -> Vec<u8> {
    png_bytes(&render(p))
}

/// Writes the plot as a PNG file.
pub fn write(p: &SweepPlot, path: &Path) -> std::io::Result<()> {
    std::fs::write(path, png(p))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample() -> SweepPlot {
        SweepPlot {
            estimator: "priority".into(),
            budgets: vec![25.0, 50.0, 100.0, 200.0],
            macro_f1: vec![0.61, 0.74, 0.80, 0.81],
            p50_ms: vec![24.0, 48.0, 97.0, 150.0],
            p99_ms: vec![26.0, 51.0, 101.0, 190.0],
            exhaustive_f1: Some(0.82),
            baseline_f1: Some(0.55),
        }
    }

    fn count(img: &RgbImage, c: Rgb<u8>, rows: std::ops::Range<u32>) -> usize {
        img.enumerate_pixels().filter(|(x, y, p)| **p == c && rows.contains(y) && *x < 730).count()
    }

    #[test]
    fn each_panel_carries_its_lines() {
        let img = render(&sample());
        assert_eq!(img.dimensions(), (WIDTH, HEIGHT));
        assert!(count(&img, BLUE, 34..215) > 200, "F1 line in the top panel");
        assert!(count(&img, RED, 34..215) > 100, "exhaustive reference in the top panel");
        assert!(count(&img, GREEN, 34..215) > 100, "baseline reference in the top panel");
        assert!(count(&img, ORANGE, 300..481) > 200, "p99 line in the bottom panel");
        assert_eq!(count(&img, RED, 300..481), 0);
    }

    #[test]
    fn curves_go_to_their_panels_in_their_colours() {
        let rising: Vec<(f64, f64)> = (1..=12).map(|e| (e as f64, e as f64 / 12.0)).collect();
        let falling: Vec<(f64, f64)> = (1..=12).map(|e| (e as f64, 1.0 / e as f64)).collect();
        let top =
            CurvePanel { title: "loss".into(), series: vec![("a".into(), falling.clone()), ("b".into(), falling)] };
        let bottom = CurvePanel { title: "F1".into(), series: vec![("a".into(), rising)] };
        let img = render_curves(&top, &bottom, "epoch");
        assert_eq!(img.dimensions(), (WIDTH, HEIGHT));
        // The second series is drawn over the first where they coincide, so the top panel
        // shows orange, and only the bottom one blue.
        assert!(count(&img, ORANGE, 34..215) > 200, "second series in the top panel");
        assert!(count(&img, BLUE, 300..481) > 200, "first series in the bottom panel");
        assert_eq!(count(&img, ORANGE, 300..481), 0);
    }

    #[test]
    fn lines_differ_by_marker_and_dash_not_only_colour() {
        // Two series in one colour still draw different shapes at their points.
        let a = Area { x0: 0, x1: 20, y0: 0, y1: 20 };
        let shapes: Vec<RgbImage> = MARKERS
            .iter()
            .map(|&m| {
                let mut img = RgbImage::from_pixel(21, 21, WHITE);
                marker(&mut img, &a, 10, 10, m, BLUE);
                img
            })
            .collect();
        for i in 0..shapes.len() {
            for j in 0..i {
                assert_ne!(shapes[i], shapes[j], "markers {i} and {j} look alike");
            }
        }
        assert_ne!(DASHES[0], DASHES[1]);
    }

    #[test]
    fn no_baseline_no_green_and_ticks_are_nice() {
        let mut p = sample();
        p.baseline_f1 = None;
        let img = render(&p);
        assert_eq!(img.pixels().filter(|q| **q == GREEN).count(), 0);
        let y = YAxis::nice(0.5, 0.83);
        assert!((y.step - 0.05).abs() < 1e-12, "{}", y.step);
        assert_eq!(y.ticks().len(), 8);
        assert_eq!(y.label(0.55), "0.55");
        assert!((YAxis::nice(0.0, 216.0).step - 50.0).abs() < 1e-9);
        assert_eq!(budget_label(12.5), "12.5");
        assert_eq!(budget_label(50.0), "50");
    }
}
