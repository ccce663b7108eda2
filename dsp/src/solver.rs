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
    /// The solve ended on a chord step (the last sample's LU factors reused, no new factorisation).
    pub chord: bool,
}

/// LU factors of a small dense matrix from elimination without row exchanges, kept so later Newton steps
/// can reuse them (chord steps) while the Jacobian barely moves.
#[derive(Clone, Copy, Debug)]
pub struct SmallLu<const P: usize> {
    /// Unit lower factor below the diagonal (the multipliers), upper factor on and above it.
    factors: [[f64; P]; P],
    inverse_pivot: [f64; P],
}

impl<const P: usize> SmallLu<P> {
    /// Factor `a`, accepted when the pivots stay away from zero and the entries of the upper factor grow at
    /// most 1e6-fold (then the rounding error stays far below what a Newton step needs); `None` otherwise
    /// (use `solve_in_place`, which exchanges rows). A NaN anywhere also gives `None`.
    #[inline(always)]
    pub fn factor(a: &[[f64; P]; P]) -> Option<Self> {
        let mut largest_input = 0.0f64;
        for row in a {
            for v in row {
                let v = v.abs();
                // Plain comparisons (one maxsd each); f64::max's NaN rules cost several instructions.
                largest_input = if v > largest_input { v } else { largest_input };
            }
        }
        let mut m = *a;
        let mut inverse_pivot = [0.0; P];
        let mut smallest_pivot = f64::INFINITY;
        for col in 0..P {
            let d = m[col][col];
            let pivot = d.abs();
            smallest_pivot = if pivot < smallest_pivot {
                pivot
            } else {
                smallest_pivot
            };
            let inv = 1.0 / d;
            inverse_pivot[col] = inv;
            for row in col + 1..P {
                let f = m[row][col] * inv;
                m[row][col] = f;
                for k in col + 1..P {
                    m[row][k] -= f * m[col][k];
                }
            }
        }
        let mut largest_factor = 0.0f64;
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
        // Written so that a NaN fails the test.
        if smallest_pivot >= 1e-12 * largest_input && largest_factor <= 1e6 * largest_input {
            Some(SmallLu {
                factors: m,
                inverse_pivot,
            })
        } else {
            None
        }
    }

    /// Solve `a x = r` with the stored factors.
    #[inline(always)]
    pub fn solve(&self, r: &[f64; P]) -> [f64; P] {
        let m = &self.factors;
        let mut y = *r;
        for col in 0..P {
            for row in col + 1..P {
                y[row] -= m[row][col] * y[col];
            }
        }
        for col in (0..P).rev() {
            let mut sum = y[col];
            for k in col + 1..P {
                sum -= m[col][k] * y[k];
            }
            y[col] = sum * self.inverse_pivot[col];
        }
        y
    }
}

/// Solve the small dense system `a x = r`: elimination without row exchanges when `SmallLu::factor` accepts
/// it, otherwise Gaussian elimination with partial pivoting. Returns the factors when they can be reused.
#[inline(always)]
pub fn solve_small<const P: usize>(
    a: &[[f64; P]; P],
    r: &[f64; P],
) -> ([f64; P], Option<SmallLu<P>>) {
    match SmallLu::factor(a) {
        Some(lu) => (lu.solve(r), Some(lu)),
        None => {
            let mut m = *a;
            let mut y = *r;
            solve_in_place(&mut m, &mut y);
            (y, None)
        }
    }
}
