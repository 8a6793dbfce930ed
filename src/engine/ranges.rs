//! Numbers of a configuration table against their accepted ranges, and how an error
//! message shows a number: shared by the source, engine and sink tables.

/// A number as an error message shows it: whole numbers without a decimal point, others
/// as Rust writes them (`1e300`, `inf`, `NaN`), never hundreds of digits.
pub fn shown(v: f64) -> String {
    if v.fract() == 0.0 && v.abs() < 1e15 {
        format!("{}", v as i64)
    } else {
        format!("{v:?}")
    }
}

/// A key, its value and the accepted range, both ends included.
pub type Ranged = (&'static str, f64, f64, f64);

/// The first number outside its range (NaN is outside every range).
pub fn first_outside(numbers: &[Ranged]) -> Option<Ranged> {
    numbers.iter().copied().find(|&(_, v, min, max)| !(v >= min && v <= max))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ends_are_inside_and_nan_is_outside() {
        assert_eq!(first_outside(&[("a", 1.0, 1.0, 2.0), ("b", 2.0, 1.0, 2.0)]), None);
        assert_eq!(first_outside(&[("a", 1.0, 1.0, 2.0), ("b", 2.5, 1.0, 2.0)]), Some(("b", 2.5, 1.0, 2.0)));
        assert!(first_outside(&[("a", f64::NAN, 0.0, 1.0)]).is_some());
        assert_eq!(
            (shown(3.0), shown(1e300), shown(f64::INFINITY), shown(0.5)),
            ("3".into(), "1e300".into(), "inf".into(), "0.5".into())
        );
    }
}
