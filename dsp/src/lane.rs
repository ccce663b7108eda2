//! The number type the model's hot path is written in. A `Lane` holds one value for each of `WIDTH` models that
//! share their input (the compared switch positions, the channels of a stereo DI): `f64` is one model; the
//! packed types in `lanes.rs` run two or four side by side in SIMD registers. The solver is written once, generic
//! over the lane type; how a b + c is computed (a multiply then an add, or one fused instruction) belongs to the
//! lane type too.

use std::fmt::Debug;
use std::ops::{Add, AddAssign, Div, Mul, MulAssign, Neg, Sub, SubAssign};

/// Most models one lane type holds (`WIDTH` of the widest packed type), and so one engine runs side by side.
pub const MAX_LANES: usize = 4;

/// One value per model, with the arithmetic the solver needs.
pub trait Lane:
    Copy
    + Debug
    + Default
    + Send
    + Sync
    + 'static
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + Neg<Output = Self>
    + AddAssign
    + SubAssign
    + MulAssign
{
    /// Models held.
    const WIDTH: usize;
    /// A true/false per model.
    type Mask: Copy + Debug;

    fn splat(value: f64) -> Self;
    /// The value of model `index`.
    fn get(self, index: usize) -> f64;
    /// Set the value of model `index`.
    fn set(&mut self, index: usize, value: f64);
    /// Every model's value, in the first `WIDTH` slots (the rest zero).
    fn to_lanes(self) -> [f64; MAX_LANES];
    /// The models' values from the first `WIDTH` slots.
    fn from_lanes(values: [f64; MAX_LANES]) -> Self;
    /// a b + c.
    fn madd(self, b: Self, c: Self) -> Self;
    fn abs(self) -> Self;
    fn sqrt(self) -> Self;
    fn min(self, other: Self) -> Self;
    fn max(self, other: Self) -> Self;

    /// self < other, per model (false where either is NaN).
    fn lt(self, other: Self) -> Self::Mask;
    /// The models where both masks are true.
    fn and(a: Self::Mask, b: Self::Mask) -> Self::Mask;
    /// The models where either mask is true.
    fn or(a: Self::Mask, b: Self::Mask) -> Self::Mask;
    fn all(mask: Self::Mask) -> bool;
    fn any(mask: Self::Mask) -> bool;
    /// `a` where the mask is true, `b` elsewhere.
    fn select(mask: Self::Mask, a: Self, b: Self) -> Self;
    /// A mask true for model `index` only when `value`.
    fn mask_get(mask: Self::Mask, index: usize) -> bool;

    /// Apply `f` to each model's value.
    #[inline(always)]
    fn map(self, mut f: impl FnMut(f64) -> f64) -> Self {
        let mut out = self;
        for i in 0..Self::WIDTH {
            out.set(i, f(self.get(i)));
        }
        out
    }

    /// |self| < limit, per model (false for NaN).
    #[inline(always)]
    fn within(self, limit: Self) -> Self::Mask {
        self.abs().lt(limit)
    }

    /// Clamp to [low, high] (NaN stays NaN).
    #[inline(always)]
    fn clamp_to(self, low: Self, high: Self) -> Self {
        self.max(low).min(high)
    }
}

/// One model, a multiply then an add (two roundings): any processor.
impl Lane for f64 {
    const WIDTH: usize = 1;
    type Mask = bool;

    #[inline(always)]
    fn splat(value: f64) -> Self {
        value
    }
    #[inline(always)]
    fn get(self, _index: usize) -> f64 {
        self
    }
    #[inline(always)]
    fn set(&mut self, _index: usize, value: f64) {
        *self = value;
    }
    #[inline(always)]
    fn to_lanes(self) -> [f64; MAX_LANES] {
        [self, 0.0, 0.0, 0.0]
    }
    #[inline(always)]
    fn from_lanes(values: [f64; MAX_LANES]) -> Self {
        values[0]
    }
    #[inline(always)]
    fn madd(self, b: Self, c: Self) -> Self {
        self * b + c
    }
    #[inline(always)]
    fn abs(self) -> Self {
        f64::abs(self)
    }
    #[inline(always)]
    fn sqrt(self) -> Self {
        f64::sqrt(self)
    }
    #[inline(always)]
    fn min(self, other: Self) -> Self {
        if other < self {
            other
        } else {
            self
        }
    }
    #[inline(always)]
    fn max(self, other: Self) -> Self {
        if other > self {
            other
        } else {
            self
        }
    }
    #[inline(always)]
    fn lt(self, other: Self) -> bool {
        self < other
    }
    #[inline(always)]
    fn and(a: bool, b: bool) -> bool {
        a & b
    }
    #[inline(always)]
    fn or(a: bool, b: bool) -> bool {
        a | b
    }
    #[inline(always)]
    fn all(mask: bool) -> bool {
        mask
    }
    #[inline(always)]
    fn any(mask: bool) -> bool {
        mask
    }
    #[inline(always)]
    fn select(mask: bool, a: Self, b: Self) -> Self {
        if mask {
            a
        } else {
            b
        }
    }
    #[inline(always)]
    fn mask_get(mask: bool, _index: usize) -> bool {
        mask
    }
}
