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
//! Linear parts form six wave subtrees hung from an R-type root of five nodes; the two valves and the Zener
//! pair connect at those nodes, and Kirchhoff's current law at each node is solved by Newton's method every
//! sample (no unit delay). Each node meets only its schematic neighbours, so every Newton step is a banded
//! elimination written out in a few lines.

use crate::arith::{Arith, Separate};
use crate::circuit::{Circuit, Placement};
use crate::devices::triode::Triode;
use crate::devices::zener::{PairPoint, ZenerPair, CURRENT_SCALE};
use crate::packed;
use crate::pot::PotLaw;
use crate::solver::{self, NewtonReport};
use crate::wdf::{
    Capacitor, Parallel, RTypeRoot, ResistiveVoltageSource, Resistor, Series, WaveElement,
};

// Root nodes (indices into node voltages; the root numbers them from 1, 0 being ground).
const GAIN_GRID: usize = 0;
const GAIN_CATHODE: usize = 1;
const GAIN_PLATE: usize = 2;
const FOLLOWER_CATHODE: usize = 3;
const CLAMP_NODE: usize = 4;
const NODES: usize = 5;

// The subtrees hung from the root (its edges), in the order of `Stage::edge_resistances`.
const GRID_FEED: usize = 0; // gain pot wiper through the grid stopper, gain grid to ground
const CATHODE_NETWORK: usize = 1; // cathode resistor || bypass cap, gain cathode to ground
const PLATE_LOAD: usize = 2; // B+ through the plate resistor, gain plate to ground
const FOLLOWER_LOAD: usize = 3; // follower cathode resistor, follower cathode to ground
const COUPLING_FEED: usize = 4; // coupling cap + feed resistor, follower cathode to clamp node
const LEVEL_NETWORK: usize = 5; // level pot (and load), clamp node to ground
const EDGES: usize = 6;

// Newton unknowns: the node voltages of the gain grid, gain cathode, gain plate and follower cathode, and in the
// clamp node's place the pair's s = asinh(I / CURRENT_SCALE), from which its voltage and current both follow
// (no floating junction between the two Zeners, no steep I(V) to step along).
const PAIR_S: usize = CLAMP_NODE;
const UNKNOWNS: usize = 5;

// The device ports, for step limits and tolerances: each valve's Vpk and Vgk, and the pair's s.
const GAIN_VPK: usize = 0;
const GAIN_VGK: usize = 1;
const FOLLOWER_VPK: usize = 2;
const FOLLOWER_VGK: usize = 3;
const PAIR_PORT: usize = 4;
const PORTS: usize = 5;

/// Largest change the predictor makes to each unknown in one sample (V; for the pair, in s): a quarter of the
/// step limit of the device port each unknown mostly moves (grid 5 V, plate 50 V, s 4).
const PREDICTOR_LIMIT: [f64; UNKNOWNS] = [1.25, 1.25, 12.5, 12.5, 1.0];
const MAX_ITERATIONS: u32 = 40;
const DC_ITERATIONS: u32 = 500;

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

/// The two valves and the selected Zener pair, and the root's edge conductances they meet at the nodes.
#[derive(Clone, Debug)]
struct StageDevices {
    gain_valve: Triode,
    follower_valve: Triode,
    pairs: Vec<ZenerPair>,
    active_pair: usize,
    supply_volts: f64,
    /// Edge conductances G_e (S), from the root.
    conductance: [f64; EDGES],
    /// Largest change of each port in one Newton step, and the changes below which Newton stops.
    max_step: [f64; PORTS],
    tolerance: [f64; PORTS],
}

/// Device currents and slopes at one Newton point.
#[derive(Clone, Copy, Debug)]
struct DeviceEval {
    gain_plate: f64,
    gain_grid: f64,
    follower_plate: f64,
    follower_grid: f64,
    pair_current: f64,
    pair_volts: f64,
    /// The negative-clamp part's share of the pair voltage and its dV/ds.
    negative_part_volts: f64,
    negative_part_volts_ds: f64,
    /// d(gain plate current)/dVpk, /dVgk, d(gain grid current)/dVgk (S).
    gain_plate_dvpk: f64,
    gain_plate_dvgk: f64,
    gain_grid_dvgk: f64,
    /// The same for the follower.
    follower_plate_dvpk: f64,
    follower_plate_dvgk: f64,
    follower_grid_dvgk: f64,
    /// dV/ds and dI/ds of the pair.
    pair_volts_ds: f64,
    pair_current_ds: f64,
}

/// Change of each device port for a change `step` of the unknowns.
#[inline(always)]
fn port_changes(step: &[f64; UNKNOWNS]) -> [f64; PORTS] {
    [
        step[GAIN_PLATE] - step[GAIN_CATHODE],
        step[GAIN_GRID] - step[GAIN_CATHODE],
        -step[FOLLOWER_CATHODE],
        step[GAIN_PLATE] - step[FOLLOWER_CATHODE],
        step[PAIR_S],
    ]
}

impl StageDevices {
    /// The devices evaluated at the unknowns `x`.
    #[inline(always)]
    fn evaluate<A: Arith>(&self, x: &[f64; UNKNOWNS]) -> DeviceEval {
        let [gain, follower] = Triode::currents_of_two::<A>(
            (
                &self.gain_valve,
                x[GAIN_PLATE] - x[GAIN_CATHODE],
                x[GAIN_GRID] - x[GAIN_CATHODE],
            ),
            (
                &self.follower_valve,
                self.supply_volts - x[FOLLOWER_CATHODE],
                x[GAIN_PLATE] - x[FOLLOWER_CATHODE],
            ),
        );
        let pair = &self.pairs[self.active_pair];
        let point = if pair.is_open() {
            // No parts: the unknown is the open node's voltage and no current flows.
            PairPoint {
                volts: x[PAIR_S],
                volts_ds: 1.0,
                ..Default::default()
            }
        } else {
            pair.port_as::<A>(x[PAIR_S])
        };
        DeviceEval {
            gain_plate: gain.plate,
            gain_grid: gain.grid,
            follower_plate: follower.plate,
            follower_grid: follower.grid,
            pair_current: point.current,
            pair_volts: point.volts,
            negative_part_volts: point.negative_part_volts,
            negative_part_volts_ds: point.negative_part_volts_ds,
            gain_plate_dvpk: gain.plate_dvpk,
            gain_plate_dvgk: gain.plate_dvgk,
            gain_grid_dvgk: gain.grid_dvgk,
            follower_plate_dvpk: follower.plate_dvpk,
            follower_plate_dvgk: follower.plate_dvgk,
            follower_grid_dvgk: follower.grid_dvgk,
            pair_volts_ds: point.volts_ds,
            pair_current_ds: point.current_ds,
        }
    }

    /// Kirchhoff's current law at each node: the current leaving it into the subtrees (G_e v_e - G_e b_e, with
    /// the Norton currents G_e b_e in `norton`) and into the devices, at the point evaluated in `e`. Zero at
    /// the solution.
    #[inline(always)]
    fn residual<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &[f64; UNKNOWNS],
        e: &DeviceEval,
    ) -> [f64; NODES] {
        let g = &self.conductance;
        let edge = |edge: usize, volts: f64| A::madd(g[edge], volts, -norton[edge]);
        let clamp_volts = e.pair_volts;
        let coupling = edge(COUPLING_FEED, x[FOLLOWER_CATHODE] - clamp_volts);
        [
            edge(GRID_FEED, x[GAIN_GRID]) + e.gain_grid,
            edge(CATHODE_NETWORK, x[GAIN_CATHODE]) - e.gain_plate - e.gain_grid,
            edge(PLATE_LOAD, x[GAIN_PLATE]) + e.gain_plate + e.follower_grid,
            edge(FOLLOWER_LOAD, x[FOLLOWER_CATHODE]) + coupling
                - e.follower_plate
                - e.follower_grid,
            edge(LEVEL_NETWORK, clamp_volts) - coupling + e.pair_current,
        ]
    }

    /// The Jacobian of `residual` by the unknowns (rows: nodes; columns: unknowns). Each node meets only its
    /// neighbours in the schematic, so the matrix is banded: one entry above the diagonal, two below.
    #[inline(always)]
    fn jacobian<A: Arith>(&self, e: &DeviceEval) -> [[f64; UNKNOWNS]; NODES] {
        let g = &self.conductance;
        // Gain valve: Vpk = plate - cathode, Vgk = grid - cathode; follower: Vpk = B+ - cathode,
        // Vgk = gain plate - follower cathode.
        let (pk, gk, grid) = (e.gain_plate_dvpk, e.gain_plate_dvgk, e.gain_grid_dvgk);
        let (fpk, fgk, fgrid) = (
            e.follower_plate_dvpk,
            e.follower_plate_dvgk,
            e.follower_grid_dvgk,
        );
        let (dv, di) = (e.pair_volts_ds, e.pair_current_ds);
        let coupling = g[COUPLING_FEED];
        [
            [g[GRID_FEED] + grid, -grid, 0.0, 0.0, 0.0],
            [
                -(gk + grid),
                g[CATHODE_NETWORK] + pk + gk + grid,
                -pk,
                0.0,
                0.0,
            ],
            [gk, -(pk + gk), g[PLATE_LOAD] + pk + fgrid, -fgrid, 0.0],
            [
                0.0,
                0.0,
                -(fgk + fgrid),
                g[FOLLOWER_LOAD] + coupling + fpk + fgk + fgrid,
                -coupling * dv,
            ],
            [
                0.0,
                0.0,
                0.0,
                -coupling,
                A::madd(coupling + g[LEVEL_NETWORK], dv, di),
            ],
        ]
    }

    /// The Newton step: solves J step = -r by Gaussian elimination in the band, written out (no row
    /// exchanges: each pivot is a node's conductance to everything, positive for these devices). Rows are
    /// combined by cross-multiplying instead of dividing by each pivot, so the five divisions wait for no
    /// one another; a dense pivoted solve takes over if a pivot is not positive.
    #[inline(always)]
    fn newton_step<A: Arith>(&self, e: &DeviceEval, r: &[f64; NODES]) -> [f64; UNKNOWNS] {
        let j = self.jacobian::<A>(e);
        // a b - c d, the first product in the multiply-add.
        let cross = |a: f64, b: f64, c: f64, d: f64| A::madd(a, b, -(c * d));
        let [[a00, a01, ..], [a10, a11, a12, ..], [a20, a21, a22, a23, _], [_, _, a32, a33, a34], [.., a43, a44]] =
            j;
        let (y0, y1, y2, y3, y4) = (-r[0], -r[1], -r[2], -r[3], -r[4]);
        // Column 0 out of rows 1 and 2.
        let b11 = cross(a00, a11, a10, a01);
        let b12 = a00 * a12;
        let z1 = cross(a00, y1, a10, y0);
        let b21 = cross(a00, a21, a20, a01);
        let b22 = a00 * a22;
        let b23 = a00 * a23;
        let z2 = cross(a00, y2, a20, y0);
        // Column 1 out of row 2, column 2 out of row 3, column 3 out of row 4.
        let c22 = cross(b11, b22, b21, b12);
        let c23 = b11 * b23;
        let w2 = cross(b11, z2, b21, z1);
        let d33 = cross(c22, a33, a32, c23);
        let d34 = c22 * a34;
        let w3 = cross(c22, y3, a32, w2);
        let e44 = cross(d33, a44, a43, d34);
        let w4 = cross(d33, y4, a43, w3);
        // Back substitution.
        let [i0, i1] = packed::reciprocals([a00, b11]);
        let [i2, i3] = packed::reciprocals([c22, d33]);
        let i4 = 1.0 / e44;
        let x4 = w4 * i4;
        let x3 = A::madd(-d34, x4, w3) * i3;
        let x2 = A::madd(-c23, x3, w2) * i2;
        let x1 = A::madd(-b12, x2, z1) * i1;
        let x0 = A::madd(-a01, x1, y0) * i0;
        if packed::positive_pivots([a00, b11, c22, d33], e44) {
            return [x0, x1, x2, x3, x4];
        }
        let mut dense = j;
        let mut step = [y0, y1, y2, y3, y4];
        solver::solve_in_place(&mut dense, &mut step);
        step
    }

    /// Newton on the node equations from the starting point in `x`, stopping once every device port's change
    /// is within its tolerance (most samples: the first step from the predictor). Leaves the solution in `x`
    /// and returns its device currents (first-order corrected through the last step).
    #[inline(always)]
    fn solve<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &mut [f64; UNKNOWNS],
        max_iterations: u32,
    ) -> (NewtonReport, DeviceEval) {
        let mut eval = self.evaluate::<A>(x);
        let step = self.newton_step::<A>(&eval, &self.residual::<A>(norton, x, &eval));
        if self.accept::<A>(x, &mut eval, &step) {
            let report = NewtonReport {
                iterations: 1,
                converged: true,
            };
            return (report, eval);
        }
        let report = self.damped_newton::<A>(norton, x, &mut eval, step, max_iterations);
        (report, eval)
    }

    /// The devices evaluated at `x` (into `eval`) and the full Newton step from there (damped iterations).
    #[inline(always)]
    fn step_from<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &[f64; UNKNOWNS],
        eval: &mut DeviceEval,
    ) -> [f64; UNKNOWNS] {
        *eval = self.evaluate::<A>(x);
        let r = self.residual::<A>(norton, x, eval);
        self.newton_step::<A>(eval, &r)
    }

    /// Take `step` and carry the device currents through it if every port's change is within its tolerance.
    #[inline(always)]
    fn accept<A: Arith>(
        &self,
        x: &mut [f64; UNKNOWNS],
        eval: &mut DeviceEval,
        step: &[f64; UNKNOWNS],
    ) -> bool {
        let ports = port_changes(step);
        let mut small = true;
        for (s, tolerance) in ports.iter().zip(&self.tolerance) {
            // Written so that a NaN fails the test.
            small &= s.abs() <= *tolerance;
        }
        if small {
            for (x, s) in x.iter_mut().zip(step) {
                *x += s;
            }
            eval.carry::<A>(&ports);
        }
        small
    }

    /// The rest of a solve whose first `step` was too large to accept: damped Newton, each step scaled so that
    /// no device port moves further than its limit (a trust region, as SPICE limits junction steps).
    #[inline(never)]
    fn damped_newton<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &mut [f64; UNKNOWNS],
        eval: &mut DeviceEval,
        step: [f64; UNKNOWNS],
        max_iterations: u32,
    ) -> NewtonReport {
        #[cfg(target_arch = "x86_64")]
        if A::FUSED {
            // SAFETY: the fused copy runs only where the processor has FMA (`arith::fused_available`).
            return unsafe { self.damped_newton_fused::<A>(norton, x, eval, step, max_iterations) };
        }
        self.damped_newton_body::<A>(norton, x, eval, step, max_iterations)
    }

    /// `damped_newton` compiled with the FMA instructions, for the fused copy (it is not inlined into the
    /// engine's FMA-enabled loop).
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "fma")]
    unsafe fn damped_newton_fused<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &mut [f64; UNKNOWNS],
        eval: &mut DeviceEval,
        step: [f64; UNKNOWNS],
        max_iterations: u32,
    ) -> NewtonReport {
        self.damped_newton_body::<A>(norton, x, eval, step, max_iterations)
    }

    #[inline(always)]
    fn damped_newton_body<A: Arith>(
        &self,
        norton: &[f64; EDGES],
        x: &mut [f64; UNKNOWNS],
        eval: &mut DeviceEval,
        mut step: [f64; UNKNOWNS],
        max_iterations: u32,
    ) -> NewtonReport {
        let mut report = NewtonReport {
            iterations: 1,
            converged: false,
        };
        // Per-port step limits: when a port that hit its limit then steps the other way, its limit halves,
        // so a Newton 2-cycle (overshoot one way, then back) closes in like bisection; otherwise it grows
        // back toward the full limit.
        let mut limit = self.max_step;
        let mut last_step = [0.0f64; PORTS];
        let mut last_limited = [false; PORTS];
        loop {
            let ports = port_changes(&step);
            let mut scale = 1.0f64;
            for n in 0..PORTS {
                let s = ports[n];
                if s * last_step[n] < 0.0 && last_limited[n] {
                    limit[n] *= 0.5;
                } else if limit[n] < self.max_step[n] {
                    limit[n] = (2.0 * limit[n]).min(self.max_step[n]);
                }
                let size = s.abs();
                last_limited[n] = size > limit[n];
                if size > limit[n] {
                    scale = scale.min(limit[n] / size);
                }
            }
            let mut finite = true;
            for n in 0..PORTS {
                last_step[n] = scale * ports[n];
                // Written so that a NaN fails the test.
                finite &= last_step[n].abs() < f64::INFINITY;
            }
            if finite {
                for (x, s) in x.iter_mut().zip(&step) {
                    *x += scale * s;
                }
            }
            if report.iterations >= max_iterations {
                break;
            }
            report.iterations += 1;
            step = self.step_from::<A>(norton, x, eval);
            if self.accept::<A>(x, eval, &step) {
                report.converged = true;
                return report;
            }
        }
        *eval = self.evaluate::<A>(x);
        report
    }
}

impl DeviceEval {
    /// Carry the device currents, the pair voltage and the negative part's voltage through a last (tiny)
    /// change `ports` of the device ports, to first order.
    #[inline(always)]
    fn carry<A: Arith>(&mut self, ports: &[f64; PORTS]) {
        self.gain_plate += A::madd(
            self.gain_plate_dvpk,
            ports[GAIN_VPK],
            self.gain_plate_dvgk * ports[GAIN_VGK],
        );
        self.gain_grid = A::madd(self.gain_grid_dvgk, ports[GAIN_VGK], self.gain_grid);
        self.follower_plate += A::madd(
            self.follower_plate_dvpk,
            ports[FOLLOWER_VPK],
            self.follower_plate_dvgk * ports[FOLLOWER_VGK],
        );
        self.follower_grid = A::madd(
            self.follower_grid_dvgk,
            ports[FOLLOWER_VGK],
            self.follower_grid,
        );
        self.pair_current = A::madd(self.pair_current_ds, ports[PAIR_PORT], self.pair_current);
        self.pair_volts = A::madd(self.pair_volts_ds, ports[PAIR_PORT], self.pair_volts);
        self.negative_part_volts = A::madd(
            self.negative_part_volts_ds,
            ports[PAIR_PORT],
            self.negative_part_volts,
        );
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
    root: RTypeRoot<NODES, EDGES>,
    placement: Placement,
    level_pot: f64,
    level_law: PotLaw,
    period: f64,
    unknowns: [f64; UNKNOWNS],
    previous_unknowns: [f64; UNKNOWNS],
    older_unknowns: [f64; UNKNOWNS],
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
                Parallel::new(
                    Resistor::new(c.level_pot),
                    Resistor::new(c.load_resistor.unwrap_or(1e12)),
                ),
            ),
            devices: StageDevices {
                gain_valve: g.tube.triode(),
                follower_valve: circuit.follower.tube.triode(),
                pairs,
                active_pair: position.min(c.position.len().saturating_sub(1)),
                supply_volts: circuit.supply_volts,
                conductance: [0.0; EDGES],
                max_step: [50.0, 5.0, 50.0, 5.0, 4.0],
                // Port changes below which Newton stops (10 mV on the plates, 1 mV on the grids): the error left
                // is about their square, far below what the ngspice cross-check resolves (its figures do not
                // move with these).
                tolerance: [1e-2, 1e-3, 1e-2, 1e-3, 1e-2],
            },
            // Each subtree between its two nodes (1-based for the root; 0 is ground), in edge order.
            root: RTypeRoot::new([
                (GAIN_GRID + 1, 0),
                (GAIN_CATHODE + 1, 0),
                (GAIN_PLATE + 1, 0),
                (FOLLOWER_CATHODE + 1, 0),
                (FOLLOWER_CATHODE + 1, CLAMP_NODE + 1),
                (CLAMP_NODE + 1, 0),
            ]),
            placement: c.placement,
            level_pot: c.level_pot,
            level_law: c.level_pot_law,
            period: 1.0 / rate,
            unknowns: [0.0; UNKNOWNS],
            previous_unknowns: [0.0; UNKNOWNS],
            older_unknowns: [0.0; UNKNOWNS],
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

    /// Give the root (and the node equations) the subtrees' current port resistances.
    fn update_root(&mut self) {
        let r = self.edge_resistances();
        self.root.update(&r);
        self.devices.conductance = *self.root.conductances();
    }

    /// Refresh every subtree's cached coefficients and return the edge port resistances.
    fn edge_resistances(&mut self) -> [f64; EDGES] {
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
        self.update_root();
    }

    /// Select the Zener pair of switch position `position` (clamped to the list).
    pub fn set_position(&mut self, position: usize) {
        let last = self.devices.pairs.len().saturating_sub(1);
        self.devices.active_pair = position.min(last);
        self.unknowns[PAIR_S] = 0.0;
        self.previous_unknowns[PAIR_S] = 0.0;
        self.older_unknowns[PAIR_S] = 0.0;
    }

    /// Replace the pair at `position` (for example a freely set candidate). Builds tables: not real-time safe.
    pub fn replace_pair(&mut self, position: usize, pair: ZenerPair) {
        if position < self.devices.pairs.len() {
            self.devices.pairs[position] = pair;
        } else {
            self.devices.pairs.push(pair);
        }
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
        self.update_root();
        // Grid at 0 V, cathode at 1.5 V, plate near half the supply, follower grid 1 V below its cathode, pair at rest.
        let half_supply = 0.5 * self.devices.supply_volts;
        self.unknowns = [0.0, 1.5, half_supply + 1.5, half_supply + 2.5, 0.0];
        self.step::<Separate>(DC_ITERATIONS);
        self.previous_unknowns = self.unknowns;
        self.older_unknowns = self.unknowns;
        let cathode_volts = self.cathode_network.second.voltage();
        let coupling_volts = self.coupling_feed.first.first.voltage();
        self.cathode_network.second.discretise(Some(self.period));
        self.coupling_feed.first.first.discretise(Some(self.period));
        self.cathode_network.second.charge_to(cathode_volts);
        self.coupling_feed.first.first.charge_to(coupling_volts);
        self.update_root();
        // One silent sample in transient mode to settle every wave on the new discretisation.
        self.step::<Separate>(DC_ITERATIONS);
        self.previous_unknowns = self.unknowns;
        self.older_unknowns = self.unknowns;
    }

    /// Advance one internal sample with `grid_source_volts` at the gain pot's wiper.
    #[inline]
    pub fn process(&mut self, grid_source_volts: f64) -> &StageProbe {
        self.process_as::<Separate>(grid_source_volts)
    }

    /// `process` with `A`'s multiply-add (see `arith`). `Fused` only where the processor has FMA: its table
    /// polynomials use the packed FMA instruction.
    #[inline(always)]
    pub(crate) fn process_as<A: Arith>(&mut self, grid_source_volts: f64) -> &StageProbe {
        self.grid_feed.volts = grid_source_volts;
        self.step::<A>(MAX_ITERATIONS);
        &self.probe
    }

    #[inline(always)]
    fn step<A: Arith>(&mut self, max_iterations: u32) {
        let b = [
            self.grid_feed.reflected(),
            self.cathode_network.reflected(),
            self.plate_load.reflected(),
            self.follower_load.reflected(),
            self.coupling_feed.reflected(),
            self.level_network.reflected(),
        ];
        let norton = self.root.norton_currents(&b);
        let last_solution = self.unknowns;
        // Predictor: quadratic extrapolation through the last three solutions (they move smoothly), kept
        // within PREDICTOR_LIMIT of the last solution.
        if max_iterations == MAX_ITERATIONS {
            for (((x, x1), x2), limit) in self
                .unknowns
                .iter_mut()
                .zip(&self.previous_unknowns)
                .zip(&self.older_unknowns)
                .zip(&PREDICTOR_LIMIT)
            {
                let x0 = *x;
                let change = 2.0 * x0 - 3.0 * x1 + x2;
                *x = x0 + change.clamp(-limit, *limit);
            }
        }
        self.older_unknowns = self.previous_unknowns;
        self.previous_unknowns = last_solution;
        let (report, mut eval) =
            self.devices
                .solve::<A>(&norton, &mut self.unknowns, max_iterations);
        self.last_report = report;
        if !self.last_report.converged {
            // Start again from the last solution without the prediction, with a larger budget.
            self.unknowns = last_solution;
            let (retry, retry_eval) =
                self.devices
                    .solve::<A>(&norton, &mut self.unknowns, DC_ITERATIONS);
            eval = retry_eval;
            self.last_report = solver::NewtonReport {
                iterations: self.last_report.iterations + retry.iterations,
                converged: retry.converged,
            };
            // A converged solve ends on a finite point (each accepted step is finite and within its
            // tolerance, from a finite start); only a failed one can leave anything else.
            if !self.unknowns.iter().all(|v| v.is_finite()) {
                self.unknowns = last_solution;
                eval = self.devices.evaluate::<A>(&last_solution);
            }
        }
        let e = &eval;
        let x = &self.unknowns;
        let nodes = [
            x[GAIN_GRID],
            x[GAIN_CATHODE],
            x[GAIN_PLATE],
            x[FOLLOWER_CATHODE],
            e.pair_volts,
        ];
        let a = self.root.incident_waves(&b, &nodes);
        self.grid_feed.incident(a[GRID_FEED]);
        self.cathode_network.incident(a[CATHODE_NETWORK]);
        self.plate_load.incident(a[PLATE_LOAD]);
        self.follower_load.incident(a[FOLLOWER_LOAD]);
        self.coupling_feed.incident(a[COUPLING_FEED]);
        self.level_network.incident(a[LEVEL_NETWORK]);
        let pair = &self.devices.pairs[self.devices.active_pair];
        let (positive_part_volts, negative_part_volts) =
            pair.split(nodes[CLAMP_NODE], e.negative_part_volts);
        self.probe = StageProbe {
            clamp_volts: nodes[CLAMP_NODE],
            wiper_volts: self.level_network.second.voltage(),
            zener_current: e.pair_current,
            positive_part_volts,
            negative_part_volts,
            gain_grid_volts: nodes[GAIN_GRID],
            gain_cathode_volts: nodes[GAIN_CATHODE],
            gain_plate_volts: nodes[GAIN_PLATE],
            follower_cathode_volts: nodes[FOLLOWER_CATHODE],
            gain_plate_current: e.gain_plate,
            gain_grid_current: e.gain_grid,
            follower_plate_current: e.follower_plate,
            follower_grid_current: e.follower_grid,
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

    /// A stage driven hard into both clamps (a 220 Hz tone with a 5x harmonic at 8 V on the grid), with the
    /// Norton currents of its next sample and a point near (not at) that sample's solution.
    fn driven_point(samples: usize) -> (Stage, [f64; EDGES], [f64; UNKNOWNS]) {
        let rate = 192_000.0;
        let mut stage = Stage::new(&Circuit::reference(), rate, 0.5, 1);
        for n in 0..samples {
            let t = n as f64 / rate;
            let input = 8.0
                * ((2.0 * std::f64::consts::PI * 220.0 * t).sin()
                    + 0.3 * (2.0 * std::f64::consts::PI * 1100.0 * t).sin());
            stage.process(input);
        }
        let b = [
            stage.grid_feed.reflected(),
            stage.cathode_network.reflected(),
            stage.plate_load.reflected(),
            stage.follower_load.reflected(),
            stage.coupling_feed.reflected(),
            stage.level_network.reflected(),
        ];
        let norton = stage.root.norton_currents(&b);
        let mut x = stage.unknowns;
        for (k, v) in x.iter_mut().enumerate() {
            *v += 0.01 * (k as f64 + 1.0);
        }
        (stage, norton, x)
    }

    /// The written-out Jacobian is the derivative of the node equations: central differences of the
    /// residual (through the device models) agree with it entry by entry, at points across a driven period.
    #[test]
    fn jacobian_matches_central_differences() {
        for samples in [100, 400, 700, 900, 1300] {
            let (stage, norton, x) = driven_point(samples);
            let devices = &stage.devices;
            let e = devices.evaluate::<Separate>(&x);
            let jacobian = devices.jacobian::<Separate>(&e);
            for col in 0..UNKNOWNS {
                let h = 1e-6 * (1.0 + x[col].abs());
                let (mut up, mut down) = (x, x);
                up[col] += h;
                down[col] -= h;
                let e_up = devices.evaluate::<Separate>(&up);
                let e_down = devices.evaluate::<Separate>(&down);
                let r_up = devices.residual::<Separate>(&norton, &up, &e_up);
                let r_down = devices.residual::<Separate>(&norton, &down, &e_down);
                for row in 0..NODES {
                    let numeric = (r_up[row] - r_down[row]) / (2.0 * h);
                    let scale: f64 = jacobian[row].iter().map(|v| v.abs()).sum();
                    assert!(
                        (numeric - jacobian[row][col]).abs() <= 1e-5 * scale + 1e-15,
                        "sample {samples}, d row {row} / d unknown {col}: numeric {numeric:e}, \
                         written {:e}",
                        jacobian[row][col]
                    );
                }
            }
        }
    }

    /// The banded elimination gives the step that Gaussian elimination with partial pivoting on the full
    /// matrix gives (a general method, independent of the band's layout).
    #[test]
    fn banded_step_matches_dense_pivoted_solve() {
        for samples in [100, 400, 700, 900, 1300] {
            let (stage, norton, x) = driven_point(samples);
            let devices = &stage.devices;
            let e = devices.evaluate::<Separate>(&x);
            let r = devices.residual::<Separate>(&norton, &x, &e);
            let banded = devices.newton_step::<Separate>(&e, &r);
            let mut dense = devices.jacobian::<Separate>(&e);
            let mut step = [-r[0], -r[1], -r[2], -r[3], -r[4]];
            solver::solve_in_place(&mut dense, &mut step);
            for (k, (a, b)) in banded.iter().zip(&step).enumerate() {
                assert!(
                    (a - b).abs() <= 1e-9 * (1.0 + b.abs()),
                    "sample {samples}, unknown {k}: banded {a:e}, dense {b:e}"
                );
            }
        }
    }
}
