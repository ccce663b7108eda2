//! Two and four models side by side in SIMD registers: `Lane` for the `wide` crate's `f64x2` (SSE2 on every
//! x86-64 processor, NEON on aarch64) and `f64x4` (one AVX register where the build enables AVX, else two SSE2
//! ones). The arithmetic is the scalar lane's operation for operation (a b + c as a multiply then an add; min
//! and max keep `self` where either is NaN), so each lane's result equals the one-model solver's.

use crate::lane::{Lane, MAX_LANES};
pub use wide::{f64x2, f64x4};

macro_rules! packed_lane {
    ($t:ty, $width:expr, $full:expr) => {
        impl Lane for $t {
            const WIDTH: usize = $width;
            /// All bits set in a model's slot where true.
            type Mask = $t;

            #[inline(always)]
            fn splat(value: f64) -> Self {
                <$t>::splat(value)
            }
            #[inline(always)]
            fn get(self, index: usize) -> f64 {
                self.to_array()[index]
            }
            #[inline(always)]
            fn set(&mut self, index: usize, value: f64) {
                let mut a = self.to_array();
                a[index] = value;
                *self = <$t>::new(a);
            }
            #[inline(always)]
            fn to_lanes(self) -> [f64; MAX_LANES] {
                let mut out = [0.0; MAX_LANES];
                out[..$width].copy_from_slice(&self.to_array());
                out
            }
            #[inline(always)]
            fn from_lanes(values: [f64; MAX_LANES]) -> Self {
                let mut a = [0.0; $width];
                a.copy_from_slice(&values[..$width]);
                <$t>::new(a)
            }
            #[inline(always)]
            fn madd(self, b: Self, c: Self) -> Self {
                self * b + c
            }
            #[inline(always)]
            fn abs(self) -> Self {
                <$t>::abs(self)
            }
            #[inline(always)]
            fn sqrt(self) -> Self {
                <$t>::sqrt(self)
            }
            #[inline(always)]
            fn min(self, other: Self) -> Self {
                other.simd_lt(self).select(other, self)
            }
            #[inline(always)]
            fn max(self, other: Self) -> Self {
                self.simd_lt(other).select(other, self)
            }
            #[inline(always)]
            fn lt(self, other: Self) -> Self::Mask {
                self.simd_lt(other)
            }
            #[inline(always)]
            fn and(a: Self::Mask, b: Self::Mask) -> Self::Mask {
                a & b
            }
            #[inline(always)]
            fn or(a: Self::Mask, b: Self::Mask) -> Self::Mask {
                a | b
            }
            #[inline(always)]
            fn all(mask: Self::Mask) -> bool {
                mask.to_bitmask() == $full
            }
            #[inline(always)]
            fn any(mask: Self::Mask) -> bool {
                mask.to_bitmask() != 0
            }
            #[inline(always)]
            fn select(mask: Self::Mask, a: Self, b: Self) -> Self {
                mask.select(a, b)
            }
            #[inline(always)]
            fn mask_get(mask: Self::Mask, index: usize) -> bool {
                (mask.to_bitmask() >> index) & 1 == 1
            }
        }
    };
}

packed_lane!(f64x2, 2, 0b11);
packed_lane!(f64x4, 4, 0b1111);

#[cfg(test)]
mod tests {
    use super::*;

    /// Each packed operation against the scalar lane's, NaN included (IEEE 754 comparisons: NaN is never less).
    fn check<L: Lane>() {
        let values = [1.5, -2.0, f64::NAN, 0.0, 3.0, -0.5, 7.0, f64::INFINITY];
        for start in 0..values.len() {
            let mut a = L::splat(0.0);
            let mut b = L::splat(0.0);
            for i in 0..L::WIDTH {
                a.set(i, values[(start + i) % values.len()]);
                b.set(i, values[(start + 3 * i + 1) % values.len()]);
            }
            let m = a.lt(b);
            for i in 0..L::WIDTH {
                let (x, y) = (a.get(i), b.get(i));
                let same = |p: f64, q: f64| p == q || (p.is_nan() && q.is_nan());
                assert!(same(a.min(b).get(i), Lane::min(x, y)));
                assert!(same(a.max(b).get(i), Lane::max(x, y)));
                assert!(same(a.madd(b, a).get(i), x * y + x));
                assert!(same(L::select(m, a, b).get(i), if x < y { x } else { y }));
                assert_eq!(L::mask_get(m, i), x < y);
            }
            let lanes: Vec<bool> = (0..L::WIDTH).map(|i| a.get(i) < b.get(i)).collect();
            assert_eq!(L::all(m), lanes.iter().all(|&t| t));
            assert_eq!(L::any(m), lanes.iter().any(|&t| t));
        }
    }

    #[test]
    fn packed_lanes_compute_what_the_scalar_lane_computes() {
        check::<f64x2>();
        check::<f64x4>();
    }
}
