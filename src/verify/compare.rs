//! Comparing two sets of numbers: the relative error used by every check, and
//! the bands that say how worried to be.

use serde::Serialize;

/// |a − b| / (|a| + |b|), 0 when both are zero (or equal, infinities
/// included), and 1 when exactly one is NaN. Symmetric and bounded by 1, so a
/// sign error scores exactly 1. Common practice for gradient checks.
pub fn relative_error(a: f64, b: f64) -> f64 {
    if a == b || (a.is_nan() && b.is_nan()) {
        return 0.0;
    }
    if a.is_nan() || b.is_nan() || a.is_infinite() || b.is_infinite() {
        return 1.0;
    }
    (a - b).abs() / (a.abs() + b.abs())
}

/// How far apart two derivatives are. Thresholds are common practice for
/// gradient checks in f64: above 1e-2 the derivative is probably wrong; 1e-4 to
/// 1e-2 is doubtful; below 1e-4 is acceptable for functions with kinks; below
/// 1e-7 is good.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Band {
    /// Below 1e-7.
    Good,
    /// 1e-7 to 1e-4: fine near kinks, and for f32 traces.
    Acceptable,
    /// 1e-4 to 1e-2.
    Doubtful,
    /// Above 1e-2.
    ProbablyWrong,
}

impl Band {
    /// The band of a relative error.
    pub fn of(error: f64) -> Band {
        if error.is_nan() || error > 1e-2 {
            Band::ProbablyWrong
        } else if error > 1e-4 {
            Band::Doubtful
        } else if error > 1e-7 {
            Band::Acceptable
        } else {
            Band::Good
        }
    }

    /// A short name for reports.
    pub fn name(self) -> &'static str {
        match self {
            Band::Good => "good",
            Band::Acceptable => "acceptable",
            Band::Doubtful => "doubtful",
            Band::ProbablyWrong => "probably wrong",
        }
    }
}

/// The worst element of a comparison of `actual` against `expected`.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Worst {
    /// Flat index of the worst element.
    pub element: usize,
    /// The value found.
    pub actual: f64,
    /// The value it should be.
    pub expected: f64,
    /// |actual − expected|.
    pub absolute: f64,
    /// [`relative_error`] of the two.
    pub relative: f64,
}

impl Worst {
    /// Compares two equally long slices element by element; `None` when empty.
    pub fn of(actual: &[f64], expected: &[f64]) -> Option<Worst> {
        actual
            .iter()
            .zip(expected)
            .enumerate()
            .map(|(element, (&a, &e))| Worst {
                element,
                actual: a,
                expected: e,
                absolute: (a - e).abs(),
                relative: relative_error(a, e),
            })
            .max_by(|x, y| {
                x.relative
                    .total_cmp(&y.relative)
                    .then(x.absolute.total_cmp(&y.absolute))
            })
    }

    /// The band of the worst element.
    pub fn band(&self) -> Band {
        Band::of(self.relative)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_error_is_symmetric_and_bounded() {
        assert_eq!(relative_error(0.0, 0.0), 0.0);
        assert_eq!(relative_error(2.0, -2.0), 1.0, "a sign error scores 1");
        assert_eq!(relative_error(1.0, 0.0), 1.0);
        assert_eq!(relative_error(f64::INFINITY, f64::INFINITY), 0.0);
        assert_eq!(relative_error(f64::NAN, 1.0), 1.0);
        assert!((relative_error(1.0, 1.0 + 2e-8) - 1e-8).abs() < 1e-15);
        assert_eq!(relative_error(3.0, 1.0), relative_error(1.0, 3.0));
    }

    #[test]
    fn bands_follow_the_thresholds() {
        assert_eq!(Band::of(0.5), Band::ProbablyWrong);
        assert_eq!(Band::of(1e-3), Band::Doubtful);
        assert_eq!(Band::of(1e-5), Band::Acceptable);
        assert_eq!(Band::of(1e-9), Band::Good);
        assert_eq!(Band::of(f64::NAN), Band::ProbablyWrong);
    }
}
