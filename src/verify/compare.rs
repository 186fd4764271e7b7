//! Comparing two sets of numbers: the relative error used by every check, and
//! the bands that say how worried to be.

use serde::Serialize;

/// |a − b| / (|a| + |b|) for two finite numbers, 0 when they are equal.
/// Symmetric and bounded by 1, so a sign error scores exactly 1. Common
/// practice for gradient checks.
///
/// A number and a non-finite value disagree completely (1). Two non-finite
/// values — NaN against anything non-finite, or two infinities — cannot be
/// compared at all: the result is NaN, which [`Band::of`] reads as
/// [`Band::NotFinite`]. NaN never agrees with anything, itself included.
pub fn relative_error(a: f64, b: f64) -> f64 {
    match (a.is_finite(), b.is_finite()) {
        (true, true) if a == b => 0.0,
        (true, true) => (a - b).abs() / (a.abs() + b.abs()),
        (false, false) => f64::NAN,
        _ => 1.0,
    }
}

/// [`relative_error`] with a floor: |a − b| / max(|a| + |b|, `scale`). A
/// gradient computed twice in finite precision (by Ebb's sweep and by the
/// framework, summing in different orders) differs by rounding noise of the
/// size of the tensor's large entries times the unit roundoff; an entry
/// whose true value is 0 (the key bias of attention, whose softmax does not
/// change when a constant is added to every score) is all noise, and its
/// plain relative error is 1. Measured against the tensor's scale (its
/// largest entry), the noise is tiny while a wrong entry of any size that
/// matters still scores near 1. Non-finite values as in [`relative_error`].
pub fn scaled_error(a: f64, b: f64, scale: f64) -> f64 {
    match (a.is_finite(), b.is_finite()) {
        (true, true) if a == b => 0.0,
        (true, true) => (a - b).abs() / (a.abs() + b.abs()).max(scale),
        (false, false) => f64::NAN,
        _ => 1.0,
    }
}

/// Whether `a` and `b` are not shown to agree within `tolerance`: they
/// disagree, or they cannot be compared because both are non-finite.
pub fn differs(a: f64, b: f64, tolerance: f64) -> bool {
    let error = relative_error(a, b);
    error.is_nan() || error > tolerance
}

/// How far apart two derivatives are. Thresholds are common practice for
/// gradient checks in f64: above 1e-2 the derivative is probably wrong; 1e-4 to
/// 1e-2 is doubtful; below 1e-4 is acceptable for functions with kinks; below
/// 1e-7 is good. Two more outcomes are no judgement at all: a finite
/// difference too small to resolve, and numbers that are not finite.
///
/// Ordered from least to most worrying: `Unresolved` first (nothing was
/// shown), `NotFinite` last (the check could not be made, and the run is broken).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Band {
    /// A finite difference below its rounding resolution: it cannot tell the
    /// derivative from zero, so it neither confirms nor refutes it.
    Unresolved,
    /// Below 1e-7.
    Good,
    /// 1e-7 to 1e-4: fine near kinks, and for f32 traces.
    Acceptable,
    /// 1e-4 to 1e-2.
    Doubtful,
    /// Above 1e-2.
    ProbablyWrong,
    /// A value compared is NaN or infinite: no derivative can be judged.
    NotFinite,
}

impl Band {
    /// The band of a relative error (NaN: the numbers were not finite).
    pub fn of(error: f64) -> Band {
        if error.is_nan() {
            Band::NotFinite
        } else if error > 1e-2 {
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
            Band::Unresolved => "unresolved",
            Band::Good => "good",
            Band::Acceptable => "acceptable",
            Band::Doubtful => "doubtful",
            Band::ProbablyWrong => "probably wrong",
            Band::NotFinite => "not finite: cannot judge",
        }
    }

    /// True for the bands that are a judgement of the derivative (not
    /// `Unresolved`, not `NotFinite`).
    pub fn is_judgement(self) -> bool {
        !matches!(self, Band::Unresolved | Band::NotFinite)
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
    /// Compares two equally long slices element by element; `None` when
    /// empty. An element that cannot be compared (both non-finite) is the
    /// worst of all: its relative error is NaN.
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
                let severity = |w: &Worst| {
                    if w.relative.is_nan() {
                        f64::INFINITY
                    } else {
                        w.relative
                    }
                };
                severity(x)
                    .total_cmp(&severity(y))
                    .then(x.absolute.total_cmp(&y.absolute))
                    .then(y.element.cmp(&x.element))
            })
    }

    /// As [`Worst::of`], with each element's error measured by
    /// [`scaled_error`] against the largest finite magnitude in either slice.
    pub fn of_scaled(actual: &[f64], expected: &[f64]) -> Option<Worst> {
        let scale = actual
            .iter()
            .chain(expected)
            .filter(|x| x.is_finite())
            .fold(0.0f64, |m, x| m.max(x.abs()));
        let mut worst = Worst::of(actual, expected)?;
        let errors = actual
            .iter()
            .zip(expected)
            .map(|(&a, &e)| scaled_error(a, e, scale));
        let (element, relative) = errors.enumerate().fold(
            (worst.element, f64::NEG_INFINITY),
            |(best, worst_error), (i, error)| {
                let severity = if error.is_nan() { f64::INFINITY } else { error };
                if severity > worst_error {
                    (i, severity)
                } else {
                    (best, worst_error)
                }
            },
        );
        worst.element = element;
        worst.actual = actual[element];
        worst.expected = expected[element];
        worst.absolute = (worst.actual - worst.expected).abs();
        worst.relative = if relative.is_infinite() {
            f64::NAN
        } else {
            relative
        };
        Some(worst)
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
        assert_eq!(relative_error(f64::NAN, 1.0), 1.0);
        assert_eq!(relative_error(-1.0, f64::INFINITY), 1.0);
        assert!((relative_error(1.0, 1.0 + 2e-8) - 1e-8).abs() < 1e-15);
        assert_eq!(relative_error(3.0, 1.0), relative_error(1.0, 3.0));
    }

    #[test]
    fn bands_follow_the_thresholds() {
        assert_eq!(Band::of(0.5), Band::ProbablyWrong);
        assert_eq!(Band::of(1e-3), Band::Doubtful);
        assert_eq!(Band::of(1e-5), Band::Acceptable);
        assert_eq!(Band::of(1e-9), Band::Good);
        assert_eq!(Band::of(f64::NAN), Band::NotFinite);
    }

    #[test]
    fn scaled_error_forgives_noise_around_zero_but_not_a_wrong_entry() {
        // Rounding noise in an entry whose true value is 0, beside entries
        // of 1e-5: the plain relative error is 1, against the scale ~1e-13.
        let sweep = [2.0e-5, 1.5e-18, -1.0e-5];
        let reported = [2.0e-5, -6.5e-19, -1.0e-5];
        assert_eq!(Worst::of(&sweep, &reported).unwrap().relative, 1.0);
        let scaled = Worst::of_scaled(&sweep, &reported).unwrap();
        assert!(scaled.relative < 1e-12, "{scaled:?}");
        // A sign error in the smallest entry that matters still scores ~1.
        let wrong = [2.0e-5, 3.0e-6, -1.0e-5];
        let right = [2.0e-5, -3.0e-6, -1.0e-5];
        let worst = Worst::of_scaled(&wrong, &right).unwrap();
        assert_eq!(worst.element, 1);
        assert!(worst.relative > 0.29, "{worst:?}");
        assert!(
            Worst::of_scaled(&[1.0, f64::NAN], &[1.0, f64::NAN])
                .unwrap()
                .relative
                .is_nan()
        );
    }

    // IEEE 754-2019 §5.11: NaN is unordered with everything, itself included,
    // so no comparison involving it can show agreement; two infinities carry
    // no magnitude to compare.
    #[test]
    fn nan_never_agrees_and_two_non_finite_values_cannot_be_judged() {
        assert!(relative_error(f64::NAN, f64::NAN).is_nan());
        assert!(relative_error(f64::INFINITY, f64::INFINITY).is_nan());
        assert!(relative_error(f64::NAN, f64::NEG_INFINITY).is_nan());
        assert!(differs(f64::NAN, f64::NAN, 1.0));
        assert!(differs(f64::INFINITY, f64::INFINITY, 1e-4));
        assert!(!differs(1.0, 1.0, 0.0));
        assert_eq!(
            Band::of(relative_error(f64::NAN, f64::NAN)),
            Band::NotFinite
        );
        let worst = Worst::of(&[1.0, f64::NAN, 3.0], &[2.0, f64::NAN, 3.0]).unwrap();
        assert_eq!(
            worst.element, 1,
            "the element that cannot be judged is the worst"
        );
        assert_eq!(worst.band(), Band::NotFinite);
    }
}
