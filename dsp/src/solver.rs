// Small dense matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! Damped Newton iteration for the nonlinear ports at the root of the wave tree (K-method form):
//! find unknowns x with v(x) = p + K i(x), where the devices give port voltages v and currents i.

use crate::wdf::root::solve_in_place;

/// Port voltages, currents and their derivatives with respect to the unknowns.
#[derive(Clone, Copy, Debug)]
pub struct PortEval<const P: usize> {
    pub volts: [f64; P],
    pub volts_dx: [[f64; P]; P],
    pub current: [f64; P],
    pub current_dx: [[f64; P]; P],
}

impl<const P: usize> Default for PortEval<P> {
    fn default() -> Self {
        PortEval {
            volts: [0.0; P],
            volts_dx: [[0.0; P]; P],
            current: [0.0; P],
            current_dx: [[0.0; P]; P],
        }
    }
}

/// The nonlinear devices seen from the root: how their port voltages and currents follow the unknowns.
pub trait RootDevices<const P: usize> {
    /// Evaluate voltages, currents and derivatives at `x` (fills every field of `out` it uses).
    fn evaluate(&self, x: &[f64; P], out: &mut PortEval<P>);
    /// The (port, unknown) pairs where `current_dx` can be nonzero.
    const PATTERN: &'static [(usize, usize)];
    /// Largest step per unknown in one iteration (damping).
    fn max_step(&self) -> &[f64; P];
    /// Convergence tolerance per unknown.
    fn tolerance(&self) -> &[f64; P];
}

/// How one solve went.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct NewtonReport {
    pub iterations: u32,
    pub converged: bool,
}

/// Solve v(x) - p - K i(x) = 0 from the starting point in `x`; leaves the solution in `x` and its port currents
/// (first-order corrected to the final step) in `eval`.
#[inline]
pub fn solve<const P: usize, D: RootDevices<P>>(
    devices: &D,
    k: &[[f64; P]; P],
    p: &[f64; P],
    x: &mut [f64; P],
    eval: &mut PortEval<P>,
    max_iterations: u32,
) -> NewtonReport {
    let max_step = devices.max_step();
    let tolerance = devices.tolerance();
    let mut report = NewtonReport::default();
    while report.iterations < max_iterations {
        report.iterations += 1;
        devices.evaluate(x, eval);
        // Residual v - p - K i (negated, as the right-hand side) and Jacobian dv/dx - K di/dx.
        let mut residual = [0.0; P];
        let mut jacobian = [[0.0; P]; P];
        for row in 0..P {
            let k_row = &k[row];
            let mut r = p[row] - eval.volts[row];
            for q in 0..P {
                r += k_row[q] * eval.current[q];
            }
            residual[row] = r;
            let j_row = &mut jacobian[row];
            *j_row = eval.volts_dx[row];
            for &(q, col) in D::PATTERN {
                j_row[col] -= k_row[q] * eval.current_dx[q][col];
            }
        }
        solve_in_place(&mut jacobian, &mut residual);
        let mut small = true;
        for i in 0..P {
            // Per-unknown limiting, as SPICE limits each junction's step.
            let mut step = residual[i].clamp(-max_step[i], max_step[i]);
            if !step.is_finite() {
                step = 0.0;
                small = false;
            }
            x[i] += step;
            residual[i] = step;
            small &= step.abs() <= tolerance[i];
        }
        if small {
            // Carry the currents through the last (tiny) step to first order.
            for &(q, col) in D::PATTERN {
                eval.current[q] += eval.current_dx[q][col] * residual[col];
            }
            report.converged = true;
            return report;
        }
    }
    devices.evaluate(x, eval);
    report
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
