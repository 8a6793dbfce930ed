//! The sweep's CSV (RFC 4180: comma-separated, a header row, fields quoted only when
//! they hold a comma, quote or line break). Columns, in order:
//!
//! | column | meaning |
//! |---|---|
//! | `row` | `budget`, `exhaustive` or `thumbnail-only` |
//! | `budget_ms` | the budget (budget rows; empty otherwise) |
//! | `estimator` | `priority`, `replacement` or `exhaustive` (empty for thumbnail-only) |
//! | `analyses` | analyses pooled in the row (frames × seeds) |
//! | `macro_f1` | unweighted mean of the per-class F1 |
//! | `f1_<class>` | one column per class of the bundle, in its order |
//! | `ece` | expected calibration error, every (analysis, class) a binary event |
//! | `coverage` | share of (analysis, class) whose interval holds the exhaustive probability |
//! | `mean_patches` | patches examined per analysis |
//! | `p50_ms`, `p99_ms` | analysis time percentiles (nearest rank) |
//! | `deadline_misses`, `deadline_miss_pct` | analyses past the budget (budget rows) |
//! | `reviews` | (analysis, class) pairs with outcome `review` |
//! | `miss_rate` | share of (analysis, class) carrying the class that were called `clear` |
//! | `false_alarm_rate` | share of (analysis, class) without the class called `detected` |
//! | `review_share` | share of analyses with at least one class to `review` (sent to a person) |
//! | `mark_recall` | share of labelled marks whose cell was examined (labels with positions) |
//! | `mark_attention` | mean attention on the cells holding a frame's marks |
//! | `recall_<class>` | `mark_recall` of one class, one column per class |
//! | `miss_<class>`, `false_alarm_<class>` | the two rates of one class, one column each per class |
//!
//! Scores and shares are fractions in [0, 1] written at full precision; an empty field
//! means the column does not apply to the row.

use super::rows::Row;

/// The header row's fields for a bundle with these classes.
pub fn header(classes: &[String]) -> Vec<String> {
    let mut h: Vec<String> =
        ["row", "budget_ms", "estimator", "analyses", "macro_f1"].iter().map(|s| s.to_string()).collect();
    h.extend(classes.iter().map(|c| format!("f1_{c}")));
    h.extend(
        ["ece", "coverage", "mean_patches", "p50_ms", "p99_ms", "deadline_misses", "deadline_miss_pct", "reviews"]
            .iter()
            .map(|s| s.to_string()),
    );
    h.extend(["miss_rate", "false_alarm_rate", "review_share"].map(String::from));
    h.extend(["mark_recall".to_string(), "mark_attention".to_string()]);
    h.extend(classes.iter().map(|c| format!("recall_{c}")));
    h.extend(classes.iter().map(|c| format!("miss_{c}")));
    h.extend(classes.iter().map(|c| format!("false_alarm_{c}")));
    h
}

fn quote(field: &str) -> String {
    if field.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", field.replace('"', "\"\""))
    } else {
        field.to_string()
    }
}

fn opt<T: ToString>(v: Option<T>) -> String {
    v.map(|v| v.to_string()).unwrap_or_default()
}

/// One row's fields, in the order of [`header`].
pub fn fields(r: &Row) -> Vec<String> {
    let mut f = vec![
        r.row.name().to_string(),
        opt(r.budget_ms),
        opt(r.estimator),
        r.analyses.to_string(),
        r.macro_f1.to_string(),
    ];
    f.extend(r.per_class_f1.iter().map(|v| v.to_string()));
    f.extend([
        r.ece.to_string(),
        opt(r.coverage),
        opt(r.mean_patches),
        format!("{:.3}", r.p50_ms),
        format!("{:.3}", r.p99_ms),
        opt(r.deadline_misses),
        opt(r.deadline_miss_pct),
        opt(r.reviews),
    ]);
    let o = r.outcomes.as_ref();
    f.extend([
        opt(o.and_then(|o| o.miss_rate)),
        opt(o.and_then(|o| o.false_alarm_rate)),
        opt(o.map(|o| o.review_share)),
        opt(r.mark_recall),
        opt(r.mark_attention),
    ]);
    let classes = r.per_class_f1.len();
    f.extend((0..classes).map(|c| opt(r.mark_recall_per_class.get(c).copied().flatten())));
    f.extend((0..classes).map(|c| opt(o.and_then(|o| o.per_class_miss.get(c).copied().flatten()))));
    f.extend((0..classes).map(|c| opt(o.and_then(|o| o.per_class_false_alarm.get(c).copied().flatten()))));
    f
}

/// The whole file: header and one line per row, each ending in `\n`.
pub fn to_csv(classes: &[String], rows: &[Row]) -> String {
    let line = |fields: Vec<String>| fields.iter().map(|f| quote(f)).collect::<Vec<_>>().join(",") + "\n";
    let mut out = line(header(classes));
    for r in rows {
        out.push_str(&line(fields(r)));
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quotes_only_when_needed() {
        assert_eq!(quote("plain"), "plain");
        assert_eq!(quote("a,b"), "\"a,b\"");
        assert_eq!(quote("say \"x\""), "\"say \"\"x\"\"\"");
        assert_eq!(header(&["a,b".to_string()])[5], "f1_a,b");
    }
}
