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

/// Solve v(x) - p - K i(x) = 0 from the seed in `x`; leaves the solution in `x` and its port currents
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
        let mut residual = [0.0; P];
        let mut jacobian = eval.volts_dx;
        let pattern = D::PATTERN;
        for row in 0..P {
            let mut r = eval.volts[row] - p[row];
            for q in 0..P {
                r -= k[row][q] * eval.current[q];
            }
            for &(q, col) in pattern {
                jacobian[row][col] -= k[row][q] * eval.current_dx[q][col];
            }
            residual[row] = -r;
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
            if step.abs() > tolerance[i] {
                small = false;
            }
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
