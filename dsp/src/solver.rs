// Small dense matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! Pieces of the Newton iteration on the root's nonlinear ports (K-method form, v(x) = p + K i(x)): the
//! report of one solve and the small dense linear solve of each step. The iteration itself is written out
//! for the stage's fixed sparsity in `stage.rs`.

use crate::wdf::root::solve_in_place;

/// How one solve went.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct NewtonReport {
    pub iterations: u32,
    pub converged: bool,
}

/// Solve the small dense system `a x = r` by elimination without row exchanges, accepted when the pivots
/// stay away from zero and the entries of the upper factor grow at most 1e6-fold (then the rounding error stays far below what a
/// Newton step needs); otherwise Gaussian elimination with partial pivoting.
#[inline(always)]
pub fn solve_small<const P: usize>(a: &[[f64; P]; P], r: &[f64; P]) -> [f64; P] {
    let mut largest_input = 0.0f64;
    for row in a {
        for v in row {
            let v = v.abs();
            // Plain comparisons (one maxsd each); f64::max's NaN rules cost several instructions.
            largest_input = if v > largest_input { v } else { largest_input };
        }
    }
    let mut m = *a;
    let mut y = *r;
    let mut smallest_pivot = f64::INFINITY;
    let mut largest_factor = 0.0f64;
    for col in 0..P {
        let d = m[col][col];
        let pivot = d.abs();
        smallest_pivot = if pivot < smallest_pivot {
            pivot
        } else {
            smallest_pivot
        };
        let inv = 1.0 / d;
        for row in col + 1..P {
            let f = m[row][col] * inv;
            for k in col + 1..P {
                m[row][k] -= f * m[col][k];
            }
            y[row] -= f * y[col];
        }
    }
    for (row, u) in m.iter().enumerate() {
        for v in &u[row..] {
            let v = v.abs();
            largest_factor = if v > largest_factor {
                v
            } else {
                largest_factor
            };
        }
    }
    // A NaN anywhere gives a NaN solution here as it would with pivoting; the Newton loop rejects the step.
    let stable = smallest_pivot >= 1e-12 * largest_input && largest_factor <= 1e6 * largest_input;
    if !stable {
        let mut m = *a;
        let mut y = *r;
        solve_in_place(&mut m, &mut y);
        return y;
    }
    for col in (0..P).rev() {
        let mut sum = y[col];
        for k in col + 1..P {
            sum -= m[col][k] * y[k];
        }
        y[col] = sum / m[col][col];
    }
    y
}
