// Small dense matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! Pieces of the Newton iteration on the root's node equations: the report of one solve and a general dense
//! linear solve for the rare steps where the stage's own banded elimination (in `stage.rs`) declines.

/// How one solve went.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct NewtonReport {
    pub iterations: u32,
    pub converged: bool,
}

/// Solve the small dense system `a x = r` in place by Gaussian elimination with partial pivoting.
pub fn solve_in_place<const P: usize>(a: &mut [[f64; P]; P], r: &mut [f64; P]) {
    for col in 0..P {
        let mut pivot = col;
        let mut largest = a[col][col].abs();
        for row in col + 1..P {
            let m = a[row][col].abs();
            if m > largest {
                pivot = row;
                largest = m;
            }
        }
        if pivot != col {
            a.swap(col, pivot);
            r.swap(col, pivot);
        }
        let d = a[col][col];
        let d = if d.abs() < 1e-300 { 1e-300 } else { d };
        let inv = 1.0 / d;
        a[col][col] = d;
        let pivot_row = a[col];
        let pivot_r = r[col];
        for row in col + 1..P {
            let f = a[row][col] * inv;
            for k in col + 1..P {
                a[row][k] -= f * pivot_row[k];
            }
            r[row] -= f * pivot_r;
        }
    }
    for col in (0..P).rev() {
        let mut sum = r[col];
        for k in col + 1..P {
            sum -= a[col][k] * r[k];
        }
        r[col] = sum / a[col][col];
    }
}
