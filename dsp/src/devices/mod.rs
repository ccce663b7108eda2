//! Nonlinear devices, each described by its terminal currents and their derivatives.
//! Devices know nothing of the solver: the stage hands their currents to the root of the wave tree.

pub mod triode;
pub mod zener;

pub use triode::{Triode, TubeType};
pub use zener::{Zener, ZenerPair};

/// ln(1 + e^x) without overflow (same value and slope as the naive form).
#[inline]
pub fn softplus(x: f64) -> f64 {
    if x > 0.0 {
        x + (-x).exp().ln_1p()
    } else {
        x.exp().ln_1p()
    }
}

/// The logistic function 1 / (1 + e^-x), the derivative of [`softplus`].
#[inline]
pub fn logistic(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}
