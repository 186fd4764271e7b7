//! One pass over a tensor's elements, in their own dtype, for what the
//! diagnosis asks of every value, adjoint and contribution: how many are not
//! finite, the largest and smallest non-zero finite magnitude, and the
//! Euclidean norm. Branch-free in blocks so that a clean tensor costs about a
//! memory read; the element-by-element scans that say which element crossed a
//! line run only when the survey says one did.

use super::float::Elements;
use half::slice::HalfFloatSliceExt;

/// What one pass over the elements found.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Survey {
    /// Elements that are NaN or infinite.
    pub non_finite: usize,
    /// The largest finite magnitude (0 when there is none).
    pub max_abs: f64,
    /// The smallest non-zero finite magnitude (+inf when there is none).
    pub min_abs: f64,
    /// Elements that are zero (of either sign).
    pub zeros: usize,
}

impl Survey {
    /// The survey of one number.
    pub fn of_scalar(x: f64) -> Survey {
        let finite = x.is_finite();
        let a = x.abs();
        Survey {
            non_finite: usize::from(!finite),
            max_abs: if finite { a } else { 0.0 },
            min_abs: if finite && a != 0.0 { a } else { f64::INFINITY },
            zeros: usize::from(a == 0.0),
        }
    }

    /// The survey of typed elements.
    pub fn of(elements: Elements<'_>) -> Survey {
        match elements {
            Elements::F64(s) => survey_f64(s),
            Elements::F32(s) => survey_f32(s),
            Elements::F16(s) => in_f32_blocks(s, Survey::EMPTY, |block, survey| {
                survey.merge(survey_f32(block))
            }),
            Elements::Bf16(s) => in_f32_blocks(s, Survey::EMPTY, |block, survey| {
                survey.merge(survey_f32(block))
            }),
        }
    }

    /// Nothing seen yet.
    const EMPTY: Survey = Survey {
        non_finite: 0,
        max_abs: 0.0,
        min_abs: f64::INFINITY,
        zeros: 0,
    };

    fn merge(&mut self, other: Survey) {
        self.non_finite += other.non_finite;
        self.zeros += other.zeros;
        self.max_abs = self.max_abs.max(other.max_abs);
        self.min_abs = self.min_abs.min(other.min_abs);
    }
}

/// Elements per block: small enough to stay in L1, large enough to amortise
/// the fold's setup.
const BLOCK: usize = 1024;

/// Visits half-precision elements as f32 blocks (exact: every f16 and bf16
/// is an f32), converted by the `half` crate's vectorised slice conversion.
fn in_f32_blocks<H, A>(s: &[H], mut state: A, mut visit: impl FnMut(&[f32], &mut A)) -> A
where
    [H]: HalfFloatSliceExt,
{
    let mut buffer = [0f32; BLOCK];
    for chunk in s.chunks(BLOCK) {
        let block = &mut buffer[..chunk.len()];
        chunk.convert_to_f32_slice(block);
        visit(block, &mut state);
    }
    state
}

// The loops below work on the bits of |x|: for non-negative IEEE numbers the
// bit patterns are ordered as the numbers are, finite ones lie below the
// pattern of infinity, and integer minima and maxima vectorise where
// floating-point ones (held back by NaN's rules) do not.
macro_rules! survey_loop {
    ($name:ident, $float:ty, $int:ty, $magnitude:expr, $infinity:expr) => {
        #[inline(always)]
        fn $name(s: &[$float]) -> Survey {
            // Sixteen independent lanes per reduction: written this way the
            // loop vectorises (one reduction chain of each kind did not; it
            // compiled to scalar conditional moves).
            const LANES: usize = 16;
            let mut result = Survey::EMPTY;
            let (mut max, mut min) = ([0 as $int; LANES], [<$int>::MAX; LANES]);
            for chunk in s.chunks(BLOCK) {
                let (mut bad, mut zeros) = ([0 as $int; LANES], [0 as $int; LANES]);
                let mut groups = chunk.chunks_exact(LANES);
                for group in &mut groups {
                    for lane in 0..LANES {
                        let bits = (group[lane].to_bits() & $magnitude) as $int;
                        let finite = bits < $infinity;
                        bad[lane] += <$int>::from(!finite);
                        zeros[lane] += <$int>::from(bits == 0);
                        max[lane] = max[lane].max(if finite { bits } else { 0 });
                        min[lane] = min[lane].min(if finite & (bits != 0) {
                            bits
                        } else {
                            <$int>::MAX
                        });
                    }
                }
                for &x in groups.remainder() {
                    let bits = (x.to_bits() & $magnitude) as $int;
                    let finite = bits < $infinity;
                    bad[0] += <$int>::from(!finite);
                    zeros[0] += <$int>::from(bits == 0);
                    max[0] = max[0].max(if finite { bits } else { 0 });
                    min[0] = min[0].min(if finite & (bits != 0) {
                        bits
                    } else {
                        <$int>::MAX
                    });
                }
                result.non_finite += bad.iter().map(|&n| n as usize).sum::<usize>();
                result.zeros += zeros.iter().map(|&n| n as usize).sum::<usize>();
            }
            let (max, min) = (
                max.into_iter().fold(0 as $int, <$int>::max),
                min.into_iter().fold(<$int>::MAX, <$int>::min),
            );
            result.max_abs = <$float>::from_bits(max as _) as f64;
            result.min_abs = if min == <$int>::MAX {
                f64::INFINITY
            } else {
                <$float>::from_bits(min as _) as f64
            };
            result
        }
    };
}

survey_loop!(
    survey_f64_plain,
    f64,
    i64,
    0x7fff_ffff_ffff_ffff,
    0x7ff0_0000_0000_0000
);
survey_loop!(survey_f32_plain, f32, i32, 0x7fff_ffff, 0x7f80_0000);

/// Compiles `$plain` (an `#[inline(always)]` function of one slice) again for
/// AVX-512 (whose 64-bit integer minima the f64 survey needs) and for AVX2,
/// and picks the widest the processor has at run time.
macro_rules! dispatched {
    ($name:ident, $widest:ident, $wide:ident, $plain:ident, $t:ty, $out:ty) => {
        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx512f,avx512vl,avx2")]
        fn $widest(s: &[$t]) -> $out {
            $plain(s)
        }

        #[cfg(target_arch = "x86_64")]
        #[target_feature(enable = "avx2")]
        fn $wide(s: &[$t]) -> $out {
            $plain(s)
        }

        fn $name(s: &[$t]) -> $out {
            #[cfg(target_arch = "x86_64")]
            {
                if std::arch::is_x86_feature_detected!("avx512f")
                    && std::arch::is_x86_feature_detected!("avx512vl")
                {
                    // SAFETY: the processor has just been found to support these.
                    return unsafe { $widest(s) };
                }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the processor has just been found to support AVX2.
                    return unsafe { $wide(s) };
                }
            }
            $plain(s)
        }
    };
}

dispatched!(
    survey_f64,
    survey_f64_avx512,
    survey_f64_avx2,
    survey_f64_plain,
    f64,
    Survey
);
dispatched!(
    survey_f32,
    survey_f32_avx512,
    survey_f32_avx2,
    survey_f32_plain,
    f32,
    Survey
);
dispatched!(
    squares_f32,
    squares_f32_avx512,
    squares_f32_avx2,
    squares_f32_plain,
    f32,
    f64
);
dispatched!(
    squares_f64,
    squares_f64_avx512,
    squares_f64_avx2,
    squares_f64_plain,
    f64,
    f64
);

/// Sums of squares this far inside f64's range cannot overflow, and squares
/// lost to underflow below it are negligible against the largest one.
const SAFE_MAX: f64 = 1e130;
const SAFE_MIN: f64 = 1e-130;

/// The Euclidean norm of typed elements: NaN when any is NaN, else +inf when
/// any is infinite.
///
/// Elements stored narrower than f64 have squares far inside f64's range, so
/// their squares are summed plainly in f64 (NaN and infinity propagate as
/// the norm's rule says). f64 elements are summed plainly too when their
/// largest magnitude lies in [1e-130, 1e130] or is not finite; otherwise by
/// the scaled method (see [`super::NormAccumulator`]) so that nothing
/// overflows or underflows.
pub fn l2_norm_of(elements: Elements<'_>) -> f64 {
    match elements {
        Elements::F64(s) => norm_f64(s),
        Elements::F32(s) => squares_f32(s).sqrt(),
        Elements::F16(s) => in_f32_blocks(s, 0.0, |block, sum| *sum += squares_f32(block)).sqrt(),
        Elements::Bf16(s) => in_f32_blocks(s, 0.0, |block, sum| *sum += squares_f32(block)).sqrt(),
    }
}

/// Eight running sums, so the loop vectorises; their order is fixed, so the
/// result does not depend on threads, alignment or the processor.
#[inline(always)]
fn squares_f32_plain(s: &[f32]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let mut octets = s.chunks_exact(8);
    for octet in &mut octets {
        for (lane, &x) in lanes.iter_mut().zip(octet) {
            let x = x as f64;
            *lane += x * x;
        }
    }
    let tail: f64 = octets.remainder().iter().map(|&x| (x as f64).powi(2)).sum();
    lanes.iter().sum::<f64>() + tail
}

/// As [`squares_f32_plain`], for f64 elements.
#[inline(always)]
fn squares_f64_plain(s: &[f64]) -> f64 {
    let mut lanes = [0.0f64; 8];
    let mut octets = s.chunks_exact(8);
    for octet in &mut octets {
        for (lane, &x) in lanes.iter_mut().zip(octet) {
            *lane += x * x;
        }
    }
    let tail: f64 = octets.remainder().iter().map(|&x| x * x).sum();
    lanes.iter().sum::<f64>() + tail
}

fn norm_f64(s: &[f64]) -> f64 {
    let survey = survey_f64(s);
    // A NaN makes the plain sum NaN, an infinity (without NaN) makes it +inf:
    // the norm's rule either way, whatever the finite elements' squares do.
    if survey.non_finite > 0 || (SAFE_MIN..=SAFE_MAX).contains(&survey.max_abs) {
        return squares_f64(s).sqrt();
    }
    if survey.max_abs == 0.0 {
        return 0.0;
    }
    let mut accumulator = super::NormAccumulator::default();
    s.iter().for_each(|&x| accumulator.push(x));
    accumulator.finish()
}

#[cfg(test)]
mod tests {
    use super::*;
    use half::{bf16, f16};

    fn scaled(data: &[f64]) -> f64 {
        let mut accumulator = crate::tensor::NormAccumulator::default();
        data.iter().for_each(|&x| accumulator.push(x));
        accumulator.finish()
    }

    #[test]
    fn the_survey_counts_and_bounds_magnitudes() {
        let data = [0.0, -3.0, 1e-300, f64::NAN, 2.5, f64::NEG_INFINITY];
        let survey = Survey::of(Elements::F64(&data));
        assert_eq!(survey.non_finite, 2);
        assert_eq!(survey.max_abs, 3.0);
        assert_eq!(survey.min_abs, 1e-300);
        assert_eq!(survey.zeros, 1);
        let empty = Survey::of(Elements::F64(&[]));
        assert_eq!((empty.max_abs, empty.min_abs), (0.0, f64::INFINITY));
        // Across a block boundary, in half precision: the smallest binary16
        // subnormal is 2^-24 (IEEE 754-2019, §3.6, Table 3.5: emin = -14, p = 11).
        let mut halves = vec![f16::from_f64(1.0); 3000];
        halves[2047] = f16::from_bits(1);
        halves[2999] = f16::from_bits(0x7e00);
        let survey = Survey::of(Elements::F16(&halves));
        assert_eq!(survey.non_finite, 1);
        assert_eq!(survey.min_abs, 2f64.powi(-24));
        assert_eq!(survey.max_abs, 1.0);
    }

    /// Both sums carry rounding error growing with the element count (Higham,
    /// "Accuracy and Stability of Numerical Algorithms", 2nd ed., 2002, §4.2:
    /// at most (n − 1)u relative to the sum of squares): far below 1e-12 here.
    #[test]
    fn the_plain_norm_agrees_with_the_scaled_method() {
        // 3-4-5 exactly, then pseudo-random entries against the scaled method.
        assert_eq!(l2_norm_of(Elements::F64(&[3.0, 4.0])), 5.0);
        let data: Vec<f64> = (0..10_001)
            .map(|i| ((i as f64) * 0.7548776662).fract() - 0.5)
            .collect();
        let plain = l2_norm_of(Elements::F64(&data));
        assert!((plain - scaled(&data)).abs() <= 1e-12 * plain);
        let narrow: Vec<f32> = data.iter().map(|&x| x as f32).collect();
        let wide: Vec<f64> = narrow.iter().map(|&x| x as f64).collect();
        let plain = l2_norm_of(Elements::F32(&narrow));
        assert!((plain - scaled(&wide)).abs() <= 1e-12 * plain);
    }

    #[test]
    fn the_loops_chosen_at_run_time_agree_bit_for_bit_with_the_plain_ones() {
        let mut data: Vec<f64> = (0..5000)
            .map(|i| (((i as f64) * 0.618034).fract() - 0.5) * 2f64.powi(i % 60 - 30))
            .collect();
        assert_eq!(
            squares_f64(&data).to_bits(),
            squares_f64_plain(&data).to_bits()
        );
        let narrow: Vec<f32> = data.iter().map(|&x| x as f32).collect();
        assert_eq!(
            squares_f32(&narrow).to_bits(),
            squares_f32_plain(&narrow).to_bits()
        );
        data.extend([f64::NAN, -f64::INFINITY, 5e-324, 0.0]);
        assert_eq!(survey_f64(&data), survey_f64_plain(&data));
        let narrow: Vec<f32> = data.iter().map(|&x| x as f32).collect();
        assert_eq!(survey_f32(&narrow), survey_f32_plain(&narrow));
        assert_eq!(survey_f64(&data).min_abs, 5e-324);
        assert_eq!(survey_f64(&data).non_finite, 2);
    }

    #[test]
    fn extreme_and_non_finite_norms() {
        // Squares of 1e200 overflow f64: the scaled method keeps the norm.
        let big = l2_norm_of(Elements::F64(&[1e200, 1e200]));
        assert!((big / (1e200 * 2f64.sqrt()) - 1.0).abs() < 1e-15);
        let tiny = l2_norm_of(Elements::F64(&[3e-200, 4e-200]));
        assert!((tiny / 5e-200 - 1.0).abs() < 1e-15);
        assert!(l2_norm_of(Elements::F64(&[1.0, f64::NAN, f64::INFINITY])).is_nan());
        assert_eq!(
            l2_norm_of(Elements::F64(&[1.0, f64::NEG_INFINITY])),
            f64::INFINITY
        );
        let halves = [bf16::from_f64(3.0), bf16::from_f64(4.0)];
        assert_eq!(l2_norm_of(Elements::Bf16(&halves)), 5.0);
        assert_eq!(l2_norm_of(Elements::F32(&[0.0, -0.0])), 0.0);
    }
}
