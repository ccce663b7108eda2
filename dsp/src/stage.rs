//! The reference stage, assembled as its schematic reads (BRIEF section 3):
//!
//! ```text
//!  input jack -> gain pot (ideal attenuator) -> grid stopper -> [gain valve grid]
//!  [gain valve]  plate: plate resistor to B+;  cathode: cathode resistor || bypass capacitor to ground
//!  gain plate -> [follower grid];  follower plate at B+;  follower cathode: cathode resistor to ground
//!  follower cathode -> coupling cap -> feed resistor -> clamp node -> level pot -> wiper -> load resistor
//!  clamp node: antiseries Zener pair to ground (at the pot top, "across-pot", or at the wiper, "at-wiper")
//! ```
//!
//! Linear parts form six wave subtrees hung from an R-type root; the two valves and the Zener pair are the
//! root's five nonlinear ports, solved together by Newton's method every sample (no unit delay).

use crate::circuit::{Circuit, Placement};
use crate::devices::triode::Triode;
use crate::devices::zener::{PairPoint, ZenerPair, CURRENT_SCALE};
use crate::pot::PotLaw;
use crate::solver::{self, NewtonReport, SmallLu};
use crate::wdf::{
    Capacitor, Parallel, RTypeRoot, ResistiveVoltageSource, Resistor, Series, Terminal, WaveElement,
};

// Root nodes (1-based; 0 is ground).
const GAIN_GRID: usize = 1;
const GAIN_CATHODE: usize = 2;
const GAIN_PLATE: usize = 3;
const FOLLOWER_CATHODE: usize = 4;
const CLAMP_NODE: usize = 5;

// Nonlinear ports and Newton unknowns.
const GAIN_PLATE_PORT: usize = 0; // Vpk of the gain valve
const GAIN_GRID_PORT: usize = 1; // Vgk of the gain valve
const FOLLOWER_PLATE_PORT: usize = 2; // Vpk of the follower
const FOLLOWER_GRID_PORT: usize = 3; // Vgk of the follower
const ZENER_PORT: usize = 4; // pair, unknown s = asinh(I / CURRENT_SCALE)

const PORTS: usize = 5;
const MAX_ITERATIONS: u32 = 40;
const DC_ITERATIONS: u32 = 500;
/// Largest change of a Jacobian column, relative to its size, for which the last LU factors still serve.
const CHORD_DRIFT: f64 = 0.02;
/// Chord steps tried in one sample before a new factorisation.
const CHORD_STEPS: u32 = 3;

/// Everything the stage knows after one sample, in volts and amps.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct StageProbe {
    /// The node the Zeners connect to (V).
    pub clamp_volts: f64,
    /// Level pot wiper, the stage's output (V).
    pub wiper_volts: f64,
    /// Current through the Zener pair, clamp node to ground (A).
    pub zener_current: f64,
    /// Voltage across the positive-clamp part, cathode to anode (V).
    pub positive_part_volts: f64,
    /// Voltage across the negative-clamp part, anode to cathode (V).
    pub negative_part_volts: f64,
    pub gain_grid_volts: f64,
    pub gain_cathode_volts: f64,
    pub gain_plate_volts: f64,
    pub follower_cathode_volts: f64,
    pub gain_plate_current: f64,
    pub gain_grid_current: f64,
    pub follower_plate_current: f64,
    pub follower_grid_current: f64,
}

impl StageProbe {
    /// Power in the positive-clamp part (W).
    pub fn positive_part_watts(&self) -> f64 {
        self.positive_part_volts * self.zener_current
    }
    /// Power in the negative-clamp part (W).
    pub fn negative_part_watts(&self) -> f64 {
        self.negative_part_volts * self.zener_current
    }
}

/// The two valves and the selected Zener pair as the root sees them.
#[derive(Clone, Debug)]
struct StageDevices {
    gain_valve: Triode,
    follower_valve: Triode,
    pairs: Vec<ZenerPair>,
    active_pair: usize,
    max_step: [f64; PORTS],
    tolerance: [f64; PORTS],
    /// Largest |K| entry per column (see `set_coupling`).
    column_weight: [f64; PORTS],
    /// K by columns: `k_columns[port]` is the port voltages per unit current of `port`.
    k_columns: [[f64; PORTS]; PORTS],
    /// LU factors of the last Jacobian, for chord steps.
    chord: Option<Chord>,
    /// `CHORD_DRIFT`, or 0 to factor afresh every sample (tests compare the two).
    chord_drift: f64,
}

// Device slopes, the entries of the Jacobian that change from sample to sample (indices into `slopes`).
/// d(gain plate current)/dVpk, d(gain plate current)/dVgk, d(gain grid current)/dVgk.
const GAIN_PLATE_DVPK: usize = 0;
const GAIN_PLATE_DVGK: usize = 1;
const GAIN_GRID_DVGK: usize = 2;
/// The same for the follower.
const FOLLOWER_PLATE_DVPK: usize = 3;
const FOLLOWER_PLATE_DVGK: usize = 4;
const FOLLOWER_GRID_DVGK: usize = 5;
/// dV/ds and dI/ds of the pair.
const PAIR_VOLTS_DS: usize = 6;
const PAIR_CURRENT_DS: usize = 7;
const SLOPES: usize = 8;

/// Device currents and derivatives at one Newton point, in the stage's fixed sparsity: each valve's plate
/// current follows its Vpk and Vgk, its grid current its Vgk, and the pair's current and voltage its s.
#[derive(Clone, Copy, Debug, Default)]
struct DeviceEval {
    /// Port currents, indexed by port.
    current: [f64; PORTS],
    /// Pair voltage (the valve ports' voltages are their unknowns themselves).
    pair_volts: f64,
    /// The negative-clamp part's share of the pair voltage and its dV/ds.
    negative_part_volts: f64,
    negative_part_volts_ds: f64,
    /// The slopes, indexed by GAIN_PLATE_DVPK ... PAIR_CURRENT_DS.
    slopes: [f64; SLOPES],
}

/// LU factors of one Newton Jacobian kept for chord steps, with the device slopes and the Jacobian's diagonal
/// they were built from.
#[derive(Clone, Copy, Debug)]
struct Chord {
    lu: SmallLu<PORTS>,
    slopes: [f64; SLOPES],
    diagonal: [f64; PORTS],
}

impl StageDevices {
    #[inline(always)]
    fn evaluate(&self, x: &[f64; PORTS], out: &mut DeviceEval) {
        let gain = self
            .gain_valve
            .currents(x[GAIN_PLATE_PORT], x[GAIN_GRID_PORT]);
        let follower = self
            .follower_valve
            .currents(x[FOLLOWER_PLATE_PORT], x[FOLLOWER_GRID_PORT]);
        let pair = &self.pairs[self.active_pair];
        let point = if pair.is_open() {
            // No parts: the unknown is the open port's voltage and no current flows.
            PairPoint {
                volts: x[ZENER_PORT],
                volts_ds: 1.0,
                ..Default::default()
            }
        } else {
            pair.port(x[ZENER_PORT])
        };
        out.current = [
            gain.plate,
            gain.grid,
            follower.plate,
            follower.grid,
            point.current,
        ];
        out.pair_volts = point.volts;
        out.negative_part_volts = point.negative_part_volts;
        out.negative_part_volts_ds = point.negative_part_volts_ds;
        out.slopes = [
            gain.plate_dvpk,
            gain.plate_dvgk,
            gain.grid_dvgk,
            follower.plate_dvpk,
            follower.plate_dvgk,
            follower.grid_dvgk,
            point.volts_ds,
            point.current_ds,
        ];
    }

    /// Newton's right-hand side p - v(x) + K i(x) at the point evaluated in `e`.
    #[inline(always)]
    fn residual(&self, p: &[f64; PORTS], x: &[f64; PORTS], e: &DeviceEval) -> [f64; PORTS] {
        let v = [x[0], x[1], x[2], x[3], e.pair_volts];
        let mut rhs = [0.0; PORTS];
        for ((out, p), v) in rhs.iter_mut().zip(p).zip(&v) {
            *out = p - v;
        }
        for (column, current) in self.k_columns.iter().zip(&e.current) {
            for (out, m) in rhs.iter_mut().zip(column) {
                *out += m * current;
            }
        }
        rhs
    }

    /// Newton's Jacobian dv/dx - K di/dx at the point evaluated in `e`, written out for the fixed sparsity.
    #[inline(always)]
    fn jacobian(&self, e: &DeviceEval) -> [[f64; PORTS]; PORTS] {
        let k = &self.k_columns;
        let g = &e.slopes;
        let mut jacobian = [[0.0; PORTS]; PORTS];
        for (row, out) in jacobian.iter_mut().enumerate() {
            *out = [
                -(k[GAIN_PLATE_PORT][row] * g[GAIN_PLATE_DVPK]),
                -(k[GAIN_PLATE_PORT][row] * g[GAIN_PLATE_DVGK]
                    + k[GAIN_GRID_PORT][row] * g[GAIN_GRID_DVGK]),
                -(k[FOLLOWER_PLATE_PORT][row] * g[FOLLOWER_PLATE_DVPK]),
                -(k[FOLLOWER_PLATE_PORT][row] * g[FOLLOWER_PLATE_DVGK]
                    + k[FOLLOWER_GRID_PORT][row] * g[FOLLOWER_GRID_DVGK]),
                -(k[ZENER_PORT][row] * g[PAIR_CURRENT_DS]),
            ];
        }
        jacobian[0][0] += 1.0;
        jacobian[1][1] += 1.0;
        jacobian[2][2] += 1.0;
        jacobian[3][3] += 1.0;
        jacobian[4][4] += g[PAIR_VOLTS_DS];
        jacobian
    }

    /// K by columns and the largest |K| entry in each column (how strongly each unknown's device slopes enter
    /// the Jacobian: ohms; for the pair, per unit of its current slope). Call after every change of K.
    fn set_coupling(&mut self, k: &[[f64; PORTS]; PORTS]) {
        for port in 0..PORTS {
            self.column_weight[port] = k.iter().map(|row| row[port].abs()).fold(0.0, f64::max);
            for (out, k_row) in self.k_columns[port].iter_mut().zip(k) {
                *out = k_row[port];
            }
        }
        self.chord = None;
    }

    /// Diagonal of the Jacobian for the device slopes `g` (see `jacobian`).
    #[inline(always)]
    fn diagonal(&self, g: &[f64; SLOPES]) -> [f64; PORTS] {
        let k = &self.k_columns;
        [
            1.0 - k[GAIN_PLATE_PORT][GAIN_PLATE_PORT] * g[GAIN_PLATE_DVPK],
            1.0 - k[GAIN_PLATE_PORT][GAIN_GRID_PORT] * g[GAIN_PLATE_DVGK]
                - k[GAIN_GRID_PORT][GAIN_GRID_PORT] * g[GAIN_GRID_DVGK],
            1.0 - k[FOLLOWER_PLATE_PORT][FOLLOWER_PLATE_PORT] * g[FOLLOWER_PLATE_DVPK],
            1.0 - k[FOLLOWER_PLATE_PORT][FOLLOWER_GRID_PORT] * g[FOLLOWER_PLATE_DVGK]
                - k[FOLLOWER_GRID_PORT][FOLLOWER_GRID_PORT] * g[FOLLOWER_GRID_DVGK],
            g[PAIR_VOLTS_DS] - k[ZENER_PORT][ZENER_PORT] * g[PAIR_CURRENT_DS],
        ]
    }

    /// Keep `lu`, the factors of the Jacobian at `e`, for chord steps.
    fn keep_factors(&mut self, lu: Option<SmallLu<PORTS>>, e: &DeviceEval) {
        self.chord = match lu {
            Some(lu) if self.chord_drift > 0.0 => Some(Chord {
                lu,
                slopes: e.slopes,
                diagonal: self.diagonal(&e.slopes),
            }),
            _ => None,
        };
    }

    /// A chord step for the right-hand side `rhs` at slopes `now`, or None when the kept factors no longer
    /// serve. The Jacobian now is taken as the kept one with each column j rescaled by c_j, the ratio of its
    /// diagonal entries now and then (so a valve or the pair moving along its curve, which mostly scales its
    /// column, keeps the factors); the step is then the kept factors' step divided by c. The factors serve
    /// while what the rescaling leaves (each slope's change against c_j times its old value, weighted by its
    /// largest K entry) stays within `chord_drift` of the column's size.
    #[inline(always)]
    fn chord_step(
        &self,
        chord: &Chord,
        now: &[f64; SLOPES],
        rhs: &[f64; PORTS],
    ) -> Option<[f64; PORTS]> {
        let w = &self.column_weight;
        let then = &chord.slopes;
        let diagonal = self.diagonal(now);
        let mut scale = [0.0; PORTS];
        for ((c, d_now), d_then) in scale.iter_mut().zip(&diagonal).zip(&chord.diagonal) {
            *c = d_now / d_then;
        }
        let left =
            |slope: usize, weight: f64, c: f64| weight * (now[slope] - c * then[slope]).abs();
        let size = |slope: usize, weight: f64| weight * now[slope].abs();
        let columns = [
            (
                left(GAIN_PLATE_DVPK, w[0], scale[0]),
                1.0 + size(GAIN_PLATE_DVPK, w[0]),
            ),
            (
                left(GAIN_PLATE_DVGK, w[0], scale[1]) + left(GAIN_GRID_DVGK, w[1], scale[1]),
                1.0 + size(GAIN_PLATE_DVGK, w[0]) + size(GAIN_GRID_DVGK, w[1]),
            ),
            (
                left(FOLLOWER_PLATE_DVPK, w[2], scale[2]),
                1.0 + size(FOLLOWER_PLATE_DVPK, w[2]),
            ),
            (
                left(FOLLOWER_PLATE_DVGK, w[2], scale[3])
                    + left(FOLLOWER_GRID_DVGK, w[3], scale[3]),
                1.0 + size(FOLLOWER_PLATE_DVGK, w[2]) + size(FOLLOWER_GRID_DVGK, w[3]),
            ),
            (
                left(PAIR_CURRENT_DS, w[4], scale[4]),
                now[PAIR_VOLTS_DS].abs() + size(PAIR_CURRENT_DS, w[4]),
            ),
        ];
        let mut serves = true;
        for ((left, size), c) in columns.iter().zip(&scale) {
            // Written so that a NaN fails the test; a column that changed sign is not a rescaling.
            serves &= *left <= self.chord_drift * size && *c > 0.0;
        }
        if !serves {
            return None;
        }
        let mut step = chord.lu.solve(rhs);
        for (s, c) in step.iter_mut().zip(&scale) {
            *s /= c;
        }
        Some(step)
    }

    /// Damped Newton on v(x) - p - K i(x) = 0 (K-method form) from the starting point in `x`, with each unknown's step
    /// limited as SPICE limits junction steps; stops when every step is within its tolerance. Leaves the
    /// solution in `x` and its port currents (first-order corrected through the last step) in `eval`.
    /// The first step reuses the last LU factors while the device slopes stay close to theirs (a chord step;
    /// accepted only when it is already within tolerance), so most samples need no new factorisation.
    #[inline]
    fn solve(
        &mut self,
        p: &[f64; PORTS],
        x: &mut [f64; PORTS],
        eval: &mut DeviceEval,
        max_iterations: u32,
    ) -> NewtonReport {
        let mut report = NewtonReport {
            iterations: 1,
            ..Default::default()
        };
        self.evaluate(x, eval);
        let mut rhs = self.residual(p, x, eval);
        // Chord steps while the kept factors serve: accepted once a step is within tolerance; a larger step
        // (within a quarter of the step limits) is taken and the point evaluated again, up to CHORD_STEPS times.
        let mut chord_steps = 0;
        while let Some(step) = self
            .chord
            .as_ref()
            .and_then(|chord| self.chord_step(chord, &eval.slopes, &rhs))
        {
            let mut small = true;
            let mut modest = true;
            for ((s, tolerance), max_step) in step.iter().zip(&self.tolerance).zip(&self.max_step) {
                // Written so that a NaN fails both tests.
                small &= s.abs() <= *tolerance;
                modest &= s.abs() <= 0.25 * max_step;
            }
            if small {
                for (x, s) in x.iter_mut().zip(&step) {
                    *x += s;
                }
                eval.carry(&step);
                report.converged = true;
                report.chord = true;
                return report;
            }
            chord_steps += 1;
            if !modest || chord_steps >= CHORD_STEPS || report.iterations >= max_iterations {
                break;
            }
            for (x, s) in x.iter_mut().zip(&step) {
                *x += s;
            }
            report.iterations += 1;
            self.evaluate(x, eval);
            rhs = self.residual(p, x, eval);
        }
        // Per-unknown step limits (a trust region): when a step that hit its limit is followed by a step the
        // other way, the limit halves, so a Newton 2-cycle (overshoot one way, then back) closes in like
        // bisection; otherwise it grows back toward the full limit.
        let mut limit = self.max_step;
        let mut last_step = [0.0f64; PORTS];
        let mut last_limited = [false; PORTS];
        loop {
            let (mut step, factors) = solver::solve_small(&self.jacobian(eval), &rhs);
            self.keep_factors(factors, eval);
            let mut small = true;
            for n in 0..PORTS {
                // Limit by comparisons (f64::clamp also checks its bounds); NaN passes to the test below.
                let s = step[n];
                if s * last_step[n] < 0.0 && last_limited[n] {
                    limit[n] *= 0.5;
                } else if limit[n] < self.max_step[n] {
                    limit[n] = (2.0 * limit[n]).min(self.max_step[n]);
                }
                last_limited[n] = s.abs() > limit[n];
                let mut s = if s > limit[n] {
                    limit[n]
                } else if s < -limit[n] {
                    -limit[n]
                } else {
                    s
                };
                last_step[n] = s;
                if !s.is_finite() {
                    s = 0.0;
                    small = false;
                }
                x[n] += s;
                step[n] = s;
                small &= s.abs() <= self.tolerance[n];
            }
            if small {
                eval.carry(&step);
                report.converged = true;
                return report;
            }
            if report.iterations >= max_iterations {
                break;
            }
            report.iterations += 1;
            self.evaluate(x, eval);
            rhs = self.residual(p, x, eval);
        }
        self.evaluate(x, eval);
        report
    }
}

impl DeviceEval {
    /// Carry the port currents and the negative part's voltage through a last (tiny) step of the unknowns,
    /// to first order.
    #[inline(always)]
    fn carry(&mut self, step: &[f64; PORTS]) {
        let g = &self.slopes;
        let current = &mut self.current;
        current[GAIN_PLATE_PORT] +=
            g[GAIN_PLATE_DVPK] * step[GAIN_PLATE_PORT] + g[GAIN_PLATE_DVGK] * step[GAIN_GRID_PORT];
        current[GAIN_GRID_PORT] += g[GAIN_GRID_DVGK] * step[GAIN_GRID_PORT];
        current[FOLLOWER_PLATE_PORT] += g[FOLLOWER_PLATE_DVPK] * step[FOLLOWER_PLATE_PORT]
            + g[FOLLOWER_PLATE_DVGK] * step[FOLLOWER_GRID_PORT];
        current[FOLLOWER_GRID_PORT] += g[FOLLOWER_GRID_DVGK] * step[FOLLOWER_GRID_PORT];
        current[ZENER_PORT] += g[PAIR_CURRENT_DS] * step[ZENER_PORT];
        self.negative_part_volts += self.negative_part_volts_ds * step[ZENER_PORT];
    }
}

/// The modelled stage at one internal sample rate.
#[derive(Clone, Debug)]
pub struct Stage {
    // Gain stage.
    grid_feed: ResistiveVoltageSource,
    cathode_network: Parallel<Resistor, Capacitor>,
    plate_load: ResistiveVoltageSource,
    // Cathode follower.
    follower_load: Resistor,
    // Clamp: coupling cap and feed resistor (plus the pot's top leg when the Zeners sit at the wiper) ...
    coupling_feed: Series<Series<Capacitor, Resistor>, Resistor>,
    // ... and from the clamp node: the pot's top leg (across-pot) then bottom leg in parallel with the load.
    level_network: Series<Resistor, Parallel<Resistor, Resistor>>,
    devices: StageDevices,
    root: RTypeRoot<5, 6, PORTS>,
    placement: Placement,
    level_pot: f64,
    level_law: PotLaw,
    period: f64,
    unknowns: [f64; PORTS],
    previous_unknowns: [f64; PORTS],
    older_unknowns: [f64; PORTS],
    eval: DeviceEval,
    last_report: NewtonReport,
    probe: StageProbe,
}

impl Stage {
    /// Build the stage for `circuit` at internal sample rate `rate` (Hz), at its DC operating point.
    /// Every switch position's Zener tables are built here, outside the audio path.
    pub fn new(circuit: &Circuit, rate: f64, level: f64, position: usize) -> Stage {
        crate::fastmath::prepare_tables();
        let g = &circuit.gain_stage;
        let c = &circuit.clamp;
        let pairs = c
            .position
            .iter()
            .map(|p| {
                ZenerPair::new(
                    p.positive.as_ref().map(|z| z.model()),
                    p.negative.as_ref().map(|z| z.model()),
                )
            })
            .collect();
        let mut stage = Stage {
            grid_feed: ResistiveVoltageSource::new(0.0, g.grid_stopper),
            cathode_network: Parallel::new(
                Resistor::new(g.cathode_resistor),
                Capacitor::new(g.cathode_bypass),
            ),
            plate_load: ResistiveVoltageSource::new(circuit.supply_volts, g.plate_resistor),
            follower_load: Resistor::new(circuit.follower.cathode_resistor),
            coupling_feed: Series::new(
                Series::new(
                    Capacitor::new(c.coupling_cap),
                    Resistor::new(c.feed_resistor),
                ),
                Resistor::new(0.0),
            ),
            level_network: Series::new(
                Resistor::new(0.0),
                Parallel::new(Resistor::new(c.level_pot), Resistor::new(c.load_resistor)),
            ),
            devices: StageDevices {
                gain_valve: g.tube.triode(),
                follower_valve: circuit.follower.tube.triode(),
                pairs,
                active_pair: position.min(c.position.len().saturating_sub(1)),
                max_step: [50.0, 5.0, 50.0, 5.0, 4.0],
                // Step sizes below which Newton stops (10 mV on the plates, 1 mV on the grids): the error left is
                // about their square after a Newton step and CHORD_DRIFT times them after a chord step, far
                // below what the ngspice cross-check resolves (its figures do not move with these).
                tolerance: [1e-2, 1e-3, 1e-2, 1e-3, 1e-2],
                column_weight: [0.0; PORTS],
                k_columns: [[0.0; PORTS]; PORTS],
                chord: None,
                chord_drift: CHORD_DRIFT,
            },
            root: RTypeRoot::new(
                [
                    (GAIN_GRID, 0),
                    (GAIN_CATHODE, 0),
                    (GAIN_PLATE, 0),
                    (FOLLOWER_CATHODE, 0),
                    (FOLLOWER_CATHODE, CLAMP_NODE),
                    (CLAMP_NODE, 0),
                ],
                [
                    (Terminal::Node(GAIN_PLATE), Terminal::Node(GAIN_CATHODE)),
                    (Terminal::Node(GAIN_GRID), Terminal::Node(GAIN_CATHODE)),
                    (
                        Terminal::Fixed(circuit.supply_volts),
                        Terminal::Node(FOLLOWER_CATHODE),
                    ),
                    (Terminal::Node(GAIN_PLATE), Terminal::Node(FOLLOWER_CATHODE)),
                    (Terminal::Node(CLAMP_NODE), Terminal::Ground),
                ],
            ),
            placement: c.placement,
            level_pot: c.level_pot,
            level_law: c.level_pot_law,
            period: 1.0 / rate,
            unknowns: [0.0; PORTS],
            previous_unknowns: [0.0; PORTS],
            older_unknowns: [0.0; PORTS],
            eval: DeviceEval::default(),
            last_report: NewtonReport::default(),
            probe: StageProbe::default(),
        };
        stage.set_level_legs(level);
        stage.reset();
        stage
    }

    fn set_level_legs(&mut self, level: f64) {
        let (top, bottom) = self.level_law.legs(self.level_pot, level);
        match self.placement {
            Placement::AcrossPot => {
                self.coupling_feed.second.set_resistance(0.0);
                self.level_network.first.set_resistance(top);
            }
            Placement::AtWiper => {
                self.coupling_feed.second.set_resistance(top);
                self.level_network.first.set_resistance(0.0);
            }
        }
        self.level_network.second.first.set_resistance(bottom);
    }

    /// Refresh every subtree's cached coefficients and return the edge port resistances.
    fn edge_resistances(&mut self) -> [f64; 6] {
        self.cathode_network.refresh();
        self.coupling_feed.refresh();
        self.level_network.refresh();
        [
            self.grid_feed.port_resistance(),
            self.cathode_network.port_resistance(),
            self.plate_load.port_resistance(),
            self.follower_load.port_resistance(),
            self.coupling_feed.port_resistance(),
            self.level_network.port_resistance(),
        ]
    }

    /// Turn the level pot (rotation 0..1); recomputes the root scattering, keeps every stored charge.
    pub fn set_level(&mut self, level: f64) {
        self.set_level_legs(level);
        let r = self.edge_resistances();
        self.root.update(&r);
        self.devices.set_coupling(&self.root.port_from_current);
    }

    /// Select the Zener pair of switch position `position` (clamped to the list).
    pub fn set_position(&mut self, position: usize) {
        let last = self.devices.pairs.len().saturating_sub(1);
        self.devices.active_pair = position.min(last);
        self.devices.chord = None;
        self.unknowns[ZENER_PORT] = 0.0;
        self.previous_unknowns[ZENER_PORT] = 0.0;
        self.older_unknowns[ZENER_PORT] = 0.0;
    }

    /// Replace the pair at `position` (for example a freely set candidate). Builds tables: not real-time safe.
    pub fn replace_pair(&mut self, position: usize, pair: ZenerPair) {
        if position < self.devices.pairs.len() {
            self.devices.pairs[position] = pair;
        } else {
            self.devices.pairs.push(pair);
        }
        self.devices.chord = None;
    }

    /// The pair at `position`.
    pub fn pair(&self, position: usize) -> Option<&ZenerPair> {
        self.devices.pairs.get(position)
    }

    /// Index of the selected switch position.
    pub fn position(&self) -> usize {
        self.devices.active_pair
    }

    /// Settle at the DC operating point with silent input: capacitors open, Newton to convergence, then
    /// each capacitor charged to its DC voltage so the first sample continues without a step.
    pub fn reset(&mut self) {
        self.grid_feed.volts = 0.0;
        self.cathode_network.second.discretise(None);
        self.coupling_feed.first.first.discretise(None);
        let r = self.edge_resistances();
        self.root.update(&r);
        self.devices.set_coupling(&self.root.port_from_current);
        self.unknowns = [150.0, -1.5, 150.0, -1.0, 0.0];
        self.step(DC_ITERATIONS);
        self.previous_unknowns = self.unknowns;
        self.older_unknowns = self.unknowns;
        let cathode_volts = self.cathode_network.second.voltage();
        let coupling_volts = self.coupling_feed.first.first.voltage();
        self.cathode_network.second.discretise(Some(self.period));
        self.coupling_feed.first.first.discretise(Some(self.period));
        self.cathode_network.second.charge_to(cathode_volts);
        self.coupling_feed.first.first.charge_to(coupling_volts);
        let r = self.edge_resistances();
        self.root.update(&r);
        self.devices.set_coupling(&self.root.port_from_current);
        // One silent sample in transient mode to settle every wave on the new discretisation.
        self.step(DC_ITERATIONS);
        self.previous_unknowns = self.unknowns;
        self.older_unknowns = self.unknowns;
    }

    /// Advance one internal sample with `grid_source_volts` at the gain pot's wiper.
    #[inline]
    pub fn process(&mut self, grid_source_volts: f64) -> &StageProbe {
        self.grid_feed.volts = grid_source_volts;
        self.step(MAX_ITERATIONS);
        &self.probe
    }

    #[inline]
    fn step(&mut self, max_iterations: u32) {
        let b = [
            self.grid_feed.reflected(),
            self.cathode_network.reflected(),
            self.plate_load.reflected(),
            self.follower_load.reflected(),
            self.coupling_feed.reflected(),
            self.level_network.reflected(),
        ];
        let open_nodes = self.root.open_node_voltages(&b);
        let p = self.root.open_port_voltages(&open_nodes);
        let last_solution = self.unknowns;
        // Predictor: quadratic extrapolation through the last three solutions (they move smoothly), kept
        // within a quarter of each unknown's Newton step limit of the last solution.
        if max_iterations == MAX_ITERATIONS {
            for k in 0..PORTS {
                let (x0, x1, x2) = (
                    self.unknowns[k],
                    self.previous_unknowns[k],
                    self.older_unknowns[k],
                );
                let limit = 0.25 * self.devices.max_step[k];
                let change = 2.0 * x0 - 3.0 * x1 + x2;
                let change = if change > limit {
                    limit
                } else if change < -limit {
                    -limit
                } else {
                    change
                };
                self.unknowns[k] = x0 + change;
            }
        }
        self.older_unknowns = self.previous_unknowns;
        self.previous_unknowns = last_solution;
        self.last_report =
            self.devices
                .solve(&p, &mut self.unknowns, &mut self.eval, max_iterations);
        if !self.last_report.converged {
            // Start again from the last solution without the prediction, with a larger budget.
            self.unknowns = last_solution;
            let retry = self
                .devices
                .solve(&p, &mut self.unknowns, &mut self.eval, DC_ITERATIONS);
            self.last_report = solver::NewtonReport {
                iterations: self.last_report.iterations + retry.iterations,
                converged: retry.converged,
                chord: false,
            };
        }
        if !self.unknowns.iter().all(|v| v.is_finite()) {
            self.unknowns = last_solution;
            self.devices.evaluate(&last_solution, &mut self.eval);
        }
        let currents = self.eval.current;
        let nodes = self.root.node_voltages(&open_nodes, &currents);
        let a = self.root.incident_waves(&b, &nodes);
        self.grid_feed.incident(a[0]);
        self.cathode_network.incident(a[1]);
        self.plate_load.incident(a[2]);
        self.follower_load.incident(a[3]);
        self.coupling_feed.incident(a[4]);
        self.level_network.incident(a[5]);
        let pair = &self.devices.pairs[self.devices.active_pair];
        let (positive_part_volts, negative_part_volts) =
            pair.split(nodes[CLAMP_NODE - 1], self.eval.negative_part_volts);
        self.probe = StageProbe {
            clamp_volts: nodes[CLAMP_NODE - 1],
            wiper_volts: self.level_network.second.voltage(),
            zener_current: currents[ZENER_PORT],
            positive_part_volts,
            negative_part_volts,
            gain_grid_volts: nodes[GAIN_GRID - 1],
            gain_cathode_volts: nodes[GAIN_CATHODE - 1],
            gain_plate_volts: nodes[GAIN_PLATE - 1],
            follower_cathode_volts: nodes[FOLLOWER_CATHODE - 1],
            gain_plate_current: currents[GAIN_PLATE_PORT],
            gain_grid_current: currents[GAIN_GRID_PORT],
            follower_plate_current: currents[FOLLOWER_PLATE_PORT],
            follower_grid_current: currents[FOLLOWER_GRID_PORT],
        };
    }

    /// The readouts of the last sample.
    pub fn probe(&self) -> &StageProbe {
        &self.probe
    }

    /// Newton iterations and convergence of the last sample.
    pub fn last_report(&self) -> NewtonReport {
        self.last_report
    }

    /// Current scale of the Zener unknown (A), for diagnostics.
    pub fn zener_current_scale() -> f64 {
        CURRENT_SCALE
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Chord steps (reused factors) change the answer by far less than the Newton tolerance would allow to
    /// be heard: the clamp node of a hard-driven stage matches a fresh factorisation every sample.
    #[test]
    fn chord_steps_match_fresh_factorisation() {
        let circuit = Circuit::reference();
        let rate = 192_000.0;
        let mut with_chord = Stage::new(&circuit, rate, 0.5, 1);
        let mut fresh = Stage::new(&circuit, rate, 0.5, 1);
        fresh.devices.chord_drift = 0.0;
        fresh.devices.chord = None;
        let mut chord_steps = 0usize;
        let mut worst = 0.0f64;
        let samples = 38_400;
        for n in 0..samples {
            let t = n as f64 / rate;
            // A 220 Hz tone swelling from clean to far past the clamp, with a 5x harmonic on top.
            let envelope = 8.0 * (t / 0.2).min(1.0);
            let input = envelope
                * ((2.0 * std::f64::consts::PI * 220.0 * t).sin()
                    + 0.3 * (2.0 * std::f64::consts::PI * 1100.0 * t).sin());
            let a = with_chord.process(input).clamp_volts;
            chord_steps += usize::from(with_chord.last_report().chord);
            let b = fresh.process(input).clamp_volts;
            assert!(!fresh.last_report().chord);
            worst = worst.max((a - b).abs());
        }
        assert!(
            chord_steps > samples / 4,
            "chord steps were rarely used: {chord_steps} of {samples}"
        );
        eprintln!("chord steps {chord_steps} of {samples}, largest difference {worst:.2e} V");
        // The plate unknowns' step tolerance is 10 mV; the two solves must agree within a tenth of it.
        assert!(worst < 1e-3, "chord and fresh solves differ by {worst} V");
    }
}
