//! Number and shape formatting shared by reports, the sweep listing and the view.

/// The shortest text that reads back to the same f64 (`NaN`, `inf`, `-inf` for
/// the non-finite values).
pub fn number(x: f64) -> String {
    format!("{x}")
}

/// A short form for tables: six significant digits, scientific outside
/// [1e-4, 1e6).
pub fn compact(x: f64) -> String {
    if !x.is_finite() {
        return number(x);
    }
    let magnitude = x.abs();
    if x == 0.0 {
        "0".to_string()
    } else if (1e-4..1e6).contains(&magnitude) {
        let text = format!("{x:.6}");
        let trimmed = text.trim_end_matches('0').trim_end_matches('.');
        trimmed.to_string()
    } else {
        format!("{x:.4e}")
    }
}

/// 10^`log10` in [`compact`] form, or as `10^x` when beyond f64's range (a
/// product of many gains can be).
pub fn power_of_ten(log10: f64) -> String {
    if log10 == f64::NEG_INFINITY {
        // A product with a zero factor.
        return "0".to_string();
    }
    if !log10.is_finite() {
        return number(10f64.powf(log10));
    }
    let value = 10f64.powf(log10);
    if value.is_finite() && value > 0.0 {
        compact(value)
    } else {
        format!("10^{log10:.1}")
    }
}

/// A shape as `[2, 3]`; a scalar as `[]`.
pub fn shape(dims: &[usize]) -> String {
    let inner: Vec<String> = dims.iter().map(|d| d.to_string()).collect();
    format!("[{}]", inner.join(", "))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_round_trip_and_compact() {
        assert_eq!(number(5.5), "5.5");
        assert_eq!(number(f64::NAN), "NaN");
        assert_eq!(number(f64::NEG_INFINITY), "-inf");
        assert_eq!(compact(1.7163378145367738), "1.716338");
        assert_eq!(compact(2.0), "2");
        assert_eq!(compact(1.5e-9), "1.5000e-9");
        assert_eq!(compact(0.0), "0");
        assert_eq!(shape(&[2, 3]), "[2, 3]");
        assert_eq!(power_of_ten(-1.0), "0.1");
        assert_eq!(power_of_ten(400.0), "10^400.0");
        assert_eq!(power_of_ten(f64::NEG_INFINITY), "0");
        assert_eq!(power_of_ten(f64::INFINITY), "inf");
        assert_eq!(power_of_ten(f64::NAN), "NaN");
    }
}
