//! Number and shape formatting shared by reports, the sweep listing and the view.

use crate::dtype::Dtype;

/// The shortest text that reads back to the same f64 (`NaN`, `inf`, `-inf` for
/// the non-finite values).
pub fn number(x: f64) -> String {
    format!("{x}")
}

/// The shortest decimal that reads back to the same number in `dtype`, in
/// scientific notation (`3.3e-10`, `7.2e-1`): for f64 and f32 Rust's
/// shortest round-trip output, for f16 and bf16 the fewest significant
/// digits whose decimal rounds back to `x`. A number that `dtype` cannot
/// hold exactly is written at f64's precision, so nothing shown is rounded
/// away. `NaN`, `inf` and `-inf` for the non-finite values.
pub fn shortest_in(x: f64, dtype: Dtype) -> String {
    if !x.is_finite() {
        return number(x);
    }
    if dtype.round(x) != x {
        return format!("{x:e}");
    }
    match dtype {
        Dtype::F64 => format!("{x:e}"),
        Dtype::F32 => format!("{:e}", x as f32),
        Dtype::F16 | Dtype::Bf16 => (1..=17)
            .map(|digits| format!("{x:.*e}", digits - 1))
            .find(|text| text.parse::<f64>().is_ok_and(|y| dtype.round(y) == x))
            .unwrap_or_else(|| format!("{x:e}")),
    }
}

/// A number as a person reads it, at its dtype's precision
/// ([`shortest_in`]): plain decimals for magnitudes in [1e-4, 1e6),
/// scientific notation outside (`3.3e-10`, `2.5e8`); zero is `0` (`-0` for
/// negative zero).
pub fn readable(x: f64, dtype: Dtype) -> String {
    let shortest = shortest_in(x, dtype);
    if !x.is_finite() || x == 0.0 {
        return if x == 0.0 && x.is_sign_negative() {
            "-0".to_string()
        } else if x == 0.0 {
            "0".to_string()
        } else {
            shortest
        };
    }
    if (1e-4..1e6).contains(&x.abs()) {
        plain(&shortest)
    } else {
        shortest
    }
}

/// `d.ddde±N` written out without the exponent.
fn plain(scientific: &str) -> String {
    let (mantissa, exponent) = scientific
        .split_once('e')
        .expect("Rust's {:e} output has an exponent");
    let exponent: i32 = exponent.parse().expect("an integer exponent");
    let (sign, mantissa) = match mantissa.strip_prefix('-') {
        Some(rest) => ("-", rest),
        None => ("", mantissa),
    };
    let digits: String = mantissa.chars().filter(char::is_ascii_digit).collect();
    // The decimal point sits after the first digit, moved by the exponent.
    let point = 1 + exponent;
    let text = if point <= 0 {
        format!("0.{}{digits}", "0".repeat((-point) as usize))
    } else if point as usize >= digits.len() {
        format!("{digits}{}", "0".repeat(point as usize - digits.len()))
    } else {
        let (whole, fraction) = digits.split_at(point as usize);
        format!("{whole}.{fraction}")
    };
    format!("{sign}{text}")
}

/// A flat element index of a tensor of `shape` as a multi-index, `[3, 17]`
/// (row-major); a scalar's only element is `[]`.
pub fn multi_index(flat: usize, shape: &[usize]) -> String {
    let mut rest = flat;
    let mut index = vec![0; shape.len()];
    for (axis, &size) in shape.iter().enumerate().rev() {
        let size = size.max(1);
        index[axis] = rest % size;
        rest /= size;
    }
    self::shape(&index)
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

/// A short form for sentences: four significant digits, scientific outside
/// [1e-3, 1e5).
pub fn short(x: f64) -> String {
    if !x.is_finite() {
        return number(x);
    }
    let magnitude = x.abs();
    if x == 0.0 {
        "0".to_string()
    } else if (1e-3..1e5).contains(&magnitude) {
        let decimals = (3 - magnitude.log10().floor() as i32).max(0) as usize;
        let text = format!("{x:.decimals$}");
        if text.contains('.') {
            text.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            text
        }
    } else {
        let text = format!("{x:.3e}");
        let (mantissa, exponent) = text.split_once('e').expect("scientific");
        let mantissa = if mantissa.contains('.') {
            mantissa.trim_end_matches('0').trim_end_matches('.')
        } else {
            mantissa
        };
        format!("{mantissa}e{exponent}")
    }
}

/// A fraction as a percentage for sentences: `0%`, `2.6%`, `0.004827%`
/// (four significant digits, so a small fraction never reads as 0).
pub fn percent(fraction: f64) -> String {
    format!("{}%", short(100.0 * fraction))
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
        assert_eq!(short(7583.700867), "7584");
        assert_eq!(short(1.2000000476837158), "1.2");
        assert_eq!(short(0.18112), "0.1811");
        assert_eq!(short(7.4043e-12), "7.404e-12");
        assert_eq!(short(2.2403e8), "2.24e8");
        assert_eq!(short(-0.5), "-0.5");
        assert_eq!(percent(0.0), "0%");
        assert_eq!(percent(12.0 / 248593.0), "0.004827%");
        assert_eq!(percent(0.026), "2.6%");
        assert_eq!(power_of_ten(f64::INFINITY), "inf");
        assert_eq!(power_of_ten(f64::NAN), "NaN");
    }

    // Round trip: IEEE 754-2019 §5.12.2 asks that a conversion to decimal and
    // back recover the number; the shortest such decimal is what is shown.
    // The f16 and bf16 conversions are checked against the `half` crate.
    #[test]
    fn numbers_print_at_their_dtype_precision() {
        assert_eq!(readable(0.72f32 as f64, Dtype::F32), "0.72");
        assert_eq!(readable(0.72f32 as f64, Dtype::F64), "0.7200000286102295");
        assert_eq!(readable(3.3e-10, Dtype::F64), "3.3e-10");
        assert_eq!(readable(2.5e8, Dtype::F64), "2.5e8");
        assert_eq!(readable(-1.0, Dtype::F64), "-1");
        assert_eq!(readable(123456.5, Dtype::F64), "123456.5");
        assert_eq!(readable(1e-4, Dtype::F64), "0.0001");
        assert_eq!(readable(0.0, Dtype::F16), "0");
        assert_eq!(readable(-0.0, Dtype::F64), "-0");
        assert_eq!(readable(f64::NEG_INFINITY, Dtype::F32), "-inf");
        for (x, dtype) in [
            (0.1, Dtype::F16),
            (0.1, Dtype::Bf16),
            (1.0 / 3.0, Dtype::F16),
            (1.0 / 3.0, Dtype::Bf16),
            (6.1e-5, Dtype::F16),
        ] {
            let stored = dtype.round(x);
            let shown = shortest_in(stored, dtype);
            let through_half = |text: &str| {
                let y: f64 = text.parse().unwrap();
                match dtype {
                    Dtype::F16 => half::f16::from_f64(y).to_f64(),
                    _ => half::bf16::from_f64(y).to_f64(),
                }
            };
            assert_eq!(
                through_half(&shown),
                stored,
                "{shown} reads back in {dtype}"
            );
            // One significant digit fewer no longer does.
            let digits = shown
                .split('e')
                .next()
                .unwrap()
                .replace(['.', '-'], "")
                .len();
            if digits > 1 {
                let fewer = format!("{stored:.*e}", digits - 2);
                assert_ne!(through_half(&fewer), stored, "{fewer} would do for {dtype}");
            }
        }
        // 0.1 in f16 is 0.0999755859375 (Table 3.5's 10 fraction bits); "0.1" reads back to it.
        assert_eq!(readable(Dtype::F16.round(0.1), Dtype::F16), "0.1");
        assert_eq!(readable(Dtype::Bf16.round(1.0 / 3.0), Dtype::Bf16), "0.334");
        // A number the dtype cannot hold is shown at f64's precision, not rounded away.
        assert_eq!(readable(0.1, Dtype::F32), "0.1");
        assert_eq!(
            readable(0.1 + 1e-12, Dtype::F32),
            format!("{}", 0.1 + 1e-12)
        );
    }

    #[test]
    fn multi_indices_are_row_major() {
        assert_eq!(multi_index(3 * 20 + 17, &[5, 20]), "[3, 17]");
        assert_eq!(multi_index(5, &[2, 3]), "[1, 2]");
        assert_eq!(multi_index(0, &[]), "[]");
        assert_eq!(multi_index(7, &[8]), "[7]");
    }
}
