//! Divisions and square roots two at a time. The processor computes both with one slow unit that does not
//! take a new operation every cycle, so the model's few independent divisions and square roots go through it in
//! pairs (SSE2, part of every x86-64 target). IEEE 754 rounds each lane's result correctly, so the results are
//! the same bits as one at a time.

/// [1 / sqrt(x0), 1 / sqrt(x1)].
#[inline(always)]
pub fn reciprocal_square_roots([x0, x1]: [f64; 2]) -> [f64; 2] {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: SSE2 is part of every x86-64 target.
    unsafe {
        use std::arch::x86_64::{_mm_div_pd, _mm_set1_pd, _mm_set_pd, _mm_sqrt_pd};
        let roots = _mm_sqrt_pd(_mm_set_pd(x1, x0));
        split(_mm_div_pd(_mm_set1_pd(1.0), roots))
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        [1.0 / x0.sqrt(), 1.0 / x1.sqrt()]
    }
}

/// [1 / x0, 1 / x1].
#[inline(always)]
pub fn reciprocals([x0, x1]: [f64; 2]) -> [f64; 2] {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: SSE2 is part of every x86-64 target.
    unsafe {
        use std::arch::x86_64::{_mm_div_pd, _mm_set1_pd, _mm_set_pd};
        split(_mm_div_pd(_mm_set1_pd(1.0), _mm_set_pd(x1, x0)))
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        [1.0 / x0, 1.0 / x1]
    }
}

/// True when the four `pivots` are positive and `last` lies strictly between zero and infinity (false for a
/// NaN anywhere): three packed comparisons instead of six scalar ones.
#[inline(always)]
pub fn positive_pivots([x0, x1, x2, x3]: [f64; 4], last: f64) -> bool {
    #[cfg(target_arch = "x86_64")]
    // SAFETY: SSE2 is part of every x86-64 target.
    unsafe {
        use std::arch::x86_64::{
            _mm_and_pd, _mm_cmplt_pd, _mm_movemask_pd, _mm_set_pd, _mm_setzero_pd,
        };
        // Ordered comparisons: false in a lane holding a NaN.
        let zero = _mm_setzero_pd();
        let first = _mm_cmplt_pd(zero, _mm_set_pd(x1, x0));
        let second = _mm_cmplt_pd(zero, _mm_set_pd(x3, x2));
        let ends = _mm_cmplt_pd(_mm_set_pd(last, 0.0), _mm_set_pd(f64::INFINITY, last));
        _mm_movemask_pd(_mm_and_pd(_mm_and_pd(first, second), ends)) == 0b11
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        (x0 > 0.0) & (x1 > 0.0) & (x2 > 0.0) & (x3 > 0.0) & (last > 0.0) & (last < f64::INFINITY)
    }
}

/// The two lanes of a packed pair, low first.
#[cfg(target_arch = "x86_64")]
#[inline(always)]
fn split(v: std::arch::x86_64::__m128d) -> [f64; 2] {
    use std::arch::x86_64::{_mm_cvtsd_f64, _mm_unpackhi_pd};
    // SAFETY: SSE2 is part of every x86-64 target.
    unsafe { [_mm_cvtsd_f64(v), _mm_cvtsd_f64(_mm_unpackhi_pd(v, v))] }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The packed pivot test agrees with the scalar comparisons it replaces, NaN and infinities included.
    #[test]
    fn pivot_test_matches_scalar_comparisons() {
        let values = [
            f64::NAN,
            f64::NEG_INFINITY,
            -1.0,
            -0.0,
            0.0,
            1e-300,
            2.0,
            f64::INFINITY,
        ];
        for &a in &values {
            for &b in &values {
                for (k, pivots) in [
                    [a, 1.0, 1.0, 1.0],
                    [1.0, a, 1.0, b],
                    [1.0, 1.0, a, 1.0],
                    [b, 1.0, 1.0, a],
                ]
                .into_iter()
                .enumerate()
                {
                    let last = if k == 2 { b } else { 3.0 };
                    let scalar =
                        pivots.iter().all(|p| *p > 0.0) & (last > 0.0) & (last < f64::INFINITY);
                    assert_eq!(positive_pivots(pivots, last), scalar, "{pivots:?}, {last}");
                }
            }
        }
    }

    /// Bit for bit the scalar results (IEEE 754 rounds division and square root correctly), across magnitudes.
    #[test]
    fn pairs_match_one_at_a_time() {
        let values = [1e-300, 3e-12, 0.7, 1.0, 2.0, 300.0, 90_300.0, 1.5e7, 4e250];
        for &a in &values {
            for &b in &values {
                let [ra, rb] = reciprocals([a, b]);
                assert_eq!(
                    (ra.to_bits(), rb.to_bits()),
                    ((1.0 / a).to_bits(), (1.0 / b).to_bits())
                );
                let [qa, qb] = reciprocal_square_roots([a, b]);
                assert_eq!(
                    (qa.to_bits(), qb.to_bits()),
                    ((1.0 / a.sqrt()).to_bits(), (1.0 / b.sqrt()).to_bits())
                );
            }
        }
    }
}
