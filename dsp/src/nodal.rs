// Matrix code: index loops mirror the maths (rows, columns) more clearly than iterators.
#![allow(clippy::needless_range_loop)]

//! The solver: Kirchhoff's current law at every node of a `Netlist`, with every valve and the Zener pair in it,
//! solved by Newton's method at each sample (nothing is cut by a unit delay or a buffer: a grid's current flows
//! back through the coupling network that feeds it).
//!
//! Unknowns are the node voltages, except at the Zener pair's node, where the unknown is the pair's
//! s = asinh(I / 1 pA), from which its voltage and current both follow (no floating node between the two parts,
//! no steep I(V) to step along). Each equation is "current leaving the node": G v - h + i_devices = 0, with G the
//! conductances of the linear parts (capacitors as their trapezoidal companions), h the given currents (from
//! sources and capacitor histories) and i_devices the valves' and the pair's currents. The Jacobian is G (the
//! pair's column times dV/ds) plus each device's slopes at its terminals, banded in signal order (`band.rs`).
//! Nodes no device touches are eliminated first (`condense.rs`), so Newton's method works on the device nodes
//! alone; their voltages are recovered after each solve.
//!
//! Each sample starts from a quadratic prediction through the last three solutions; one Newton step from there is
//! nearly always within tolerance. When it is not, steps are damped by per-port limits; a solve that still fails
//! restarts from the last solution with a larger budget, and a model that stays unsolved keeps its last
//! solution (finite in, finite out).
//!
//! The model holds `L::WIDTH` lanes: models of the same circuit that share the linear network and its settings
//! but each run their own input and switch position. A lane that has converged stops changing while the others
//! take more steps.

use crate::band::{self, dense_solve, BandShape};
use crate::circuit::{Circuit, CircuitError, GainControl};
use crate::condense::Condensation;
use crate::devices::triode::{Triode, TriodeCurrents};
use crate::devices::zener::{PairPoint, ZenerPair};
use crate::elements::{Knob, Stamper, Terminal};
use crate::lane::{Lane, MAX_LANES};
use crate::netlist::Netlist;

/// Newton iterations allowed per sample before the restart from the last solution.
const MAX_ITERATIONS: u32 = 40;
/// Newton iterations of a restart, and of the DC operating point.
const LONG_ITERATIONS: u32 = 500;
/// Port changes below which Newton stops: 10 mV on a valve's plate-cathode voltage, 1 mV on its grid-cathode
/// voltage, 0.01 in the pair's s (the error left is about their square, far below what the ngspice cross-check
/// resolves).
const TOLERANCE_VPK: f64 = 1e-2;
const TOLERANCE_VGK: f64 = 1e-3;
const TOLERANCE_S: f64 = 1e-2;
/// Largest change of each port in one damped step (V; for the pair, in s).
const LIMIT_VPK: f64 = 50.0;
const LIMIT_VGK: f64 = 5.0;
const LIMIT_S: f64 = 4.0;
/// Largest change the predictor makes to an unknown in one sample: a quarter of the step limit of the port it
/// mostly moves (grids and cathodes 5 V, plates and the rest 50 V, s 4).
const PREDICT_GRID: f64 = 1.25;
const PREDICT_OTHER: f64 = 12.5;
const PREDICT_S: f64 = 1.0;

/// How one sample's solve went (over all lanes).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct NewtonReport {
    /// Newton steps taken (the most any lane needed).
    pub iterations: u32,
    /// Every lane converged.
    pub converged: bool,
}

/// A valve in the solver: where its terminals' voltages, currents and slopes live, each in the order plate,
/// grid, cathode. A terminal on a rail or ground reads its voltage from a fixed slot of `volts`, reads a zero
/// step, and writes its current and slopes into a spare slot nobody reads, so the hot loops need no branches.
#[derive(Clone, Debug)]
struct ValveSlot {
    model: Triode,
    volts_at: [usize; 3],
    step_at: [usize; 3],
    residual_at: [usize; 3],
    /// Band positions of (row, column).
    jacobian_at: [[usize; 3]; 3],
}

/// Currents and slopes of one valve (per lane).
#[derive(Clone, Copy, Debug, Default)]
pub struct ValveEval<L> {
    /// Plate current, plate to cathode (A).
    pub plate: L,
    /// Grid current, grid to cathode (A).
    pub grid: L,
    pub plate_dvpk: L,
    pub plate_dvgk: L,
    pub grid_dvgk: L,
}

impl<L: Lane> ValveEval<L> {
    #[inline(always)]
    fn select(keep: L::Mask, old: &Self, new: &Self) -> Self {
        ValveEval {
            plate: L::select(keep, old.plate, new.plate),
            grid: L::select(keep, old.grid, new.grid),
            plate_dvpk: L::select(keep, old.plate_dvpk, new.plate_dvpk),
            plate_dvgk: L::select(keep, old.plate_dvgk, new.plate_dvgk),
            grid_dvgk: L::select(keep, old.grid_dvgk, new.grid_dvgk),
        }
    }
}

/// The pair at one point (per lane).
#[derive(Clone, Copy, Debug, Default)]
pub struct PairEval<L> {
    /// Clamp node voltage (V) and its slope by s.
    pub volts: L,
    pub volts_ds: L,
    /// Pair current, clamp node to ground (A), and its slope by s.
    pub current: L,
    pub current_ds: L,
    /// The negative-clamp part's voltage (anode to cathode) and its slope by s.
    pub negative_part_volts: L,
    pub negative_part_volts_ds: L,
}

impl<L: Lane> PairEval<L> {
    #[inline(always)]
    fn select(keep: L::Mask, old: &Self, new: &Self) -> Self {
        PairEval {
            volts: L::select(keep, old.volts, new.volts),
            volts_ds: L::select(keep, old.volts_ds, new.volts_ds),
            current: L::select(keep, old.current, new.current),
            current_ds: L::select(keep, old.current_ds, new.current_ds),
            negative_part_volts: L::select(keep, old.negative_part_volts, new.negative_part_volts),
            negative_part_volts_ds: L::select(
                keep,
                old.negative_part_volts_ds,
                new.negative_part_volts_ds,
            ),
        }
    }
}

/// A capacitor in the solver: where its terminals' voltages are read (`volts`), and its companion conductance.
#[derive(Clone, Copy, Debug)]
struct CapSlot {
    volts_at: [usize; 2],
    conductance: f64,
}

/// Writes the linear parts' conductances into the full (dense) matrix and the sources' currents into the given
/// currents.
struct Assembly<'a> {
    size: usize,
    g: &'a mut [f64],
    /// Constant given currents into each node from the supply rails (A).
    rails: &'a mut [f64],
    /// Conductances from nodes to the jack: (node, G).
    jack: &'a mut Vec<(usize, f64)>,
    sources: &'a [f64],
    jack_index: usize,
}

impl Assembly<'_> {
    fn one_side(&mut self, node: usize, other: Terminal, g: f64) {
        self.g[node * self.size + node] += g;
        match other {
            Terminal::Node(j) => self.g[node * self.size + j] -= g,
            Terminal::Source(s) if s == self.jack_index => self.jack.push((node, g)),
            Terminal::Source(s) => self.rails[node] += g * self.sources[s],
            Terminal::Ground => {}
        }
    }
}

impl Stamper for Assembly<'_> {
    fn conductance(&mut self, a: Terminal, b: Terminal, g: f64) {
        if let Terminal::Node(i) = a {
            self.one_side(i, b, g);
        }
        if let Terminal::Node(j) = b {
            self.one_side(j, a, g);
        }
    }
}

/// Records which matrix entries the parts touch, to size the band.
struct Pattern(Vec<(usize, usize)>);

impl Stamper for Pattern {
    fn conductance(&mut self, a: Terminal, b: Terminal, _g: f64) {
        if let (Terminal::Node(i), Terminal::Node(j)) = (a, b) {
            self.0.push((i, j));
            self.0.push((j, i));
        }
    }
}

/// Where things sit in the solver's working vectors.
///
/// `volts`: the band's half-width of zeros, the kept nodes (in the order of the unknowns), another half-width of
/// zeros, the linear nodes, then the sources. Slot 0 (a zero that nothing writes) reads as ground. The kept
/// nodes' voltages are then one contiguous run, padded each side, which the residual's row products read whole.
struct Layout {
    /// Each node's slot in `volts`.
    slots: Vec<usize>,
    source: usize,
    volts_len: usize,
    /// `step` (the kept unknowns, then the band's half-width of zeros): a slot that is zero after every
    /// solve, and one nobody reads; a spare Jacobian entry.
    zero_step: usize,
    spare_step: usize,
    step_len: usize,
    spare_jacobian: usize,
    jacobian_len: usize,
}

impl Layout {
    fn new(shape: &BandShape, reduced_of: &[Option<usize>], sources: usize) -> Layout {
        let (m, half) = (shape.size, shape.half);
        let band = shape.rows() * shape.width();
        let mut next_linear = m + 2 * half;
        let slots: Vec<usize> = reduced_of
            .iter()
            .map(|r| match r {
                Some(r) => half + r,
                None => {
                    next_linear += 1;
                    next_linear - 1
                }
            })
            .collect();
        Layout {
            slots,
            source: next_linear,
            volts_len: next_linear + sources,
            zero_step: m,
            spare_step: m + half,
            step_len: m + half + 1,
            spare_jacobian: band,
            jacobian_len: band + 1,
        }
    }
    fn volts(&self, t: Terminal) -> usize {
        match t {
            Terminal::Node(i) => self.slots[i],
            Terminal::Source(s) => self.source + s,
            Terminal::Ground => 0,
        }
    }
}

/// Per-port damping state of one solve: each valve's Vpk and Vgk, then the pair's s.
#[derive(Clone, Debug)]
struct Damping<L: Lane> {
    limit: Vec<L>,
    last_step: Vec<L>,
    last_limited: Vec<L::Mask>,
}

/// The circuit's node equations and their solution, for `L::WIDTH` lanes.
#[derive(Clone)]
pub struct Nodal<L: Lane> {
    net: Netlist,
    period: f64,
    /// The kept (device) nodes and the eliminated linear clusters.
    condensed: Condensation,
    /// The kept nodes' equations' band.
    shape: BandShape,
    /// The full conductance matrix (dense, node numbering) and the kept nodes' reduced one (dense, then in band
    /// storage); the same for every lane.
    g_full: Vec<f64>,
    g_reduced: Vec<f64>,
    g: Vec<f64>,
    rails: Vec<f64>,
    jack: Vec<(usize, f64)>,
    /// Conductance of each node to the jack, and a scratch vector, both node-long (plus one).
    jack_per_node: Vec<f64>,
    scratch: Vec<f64>,
    /// Source voltages now (stepped during the DC solve) and as the circuit gives them.
    source_volts: Vec<f64>,
    full_source_volts: Vec<f64>,
    caps: Vec<CapSlot>,
    /// Where the jack's voltage sits in `volts`.
    jack_at: usize,
    /// Each capacitor's history current h (A).
    history: Vec<L>,
    valves: Vec<ValveSlot>,
    /// The pair's unknown (kept numbering), the band positions of its column, and its diagonal.
    pair_unknown: usize,
    pair_column: Vec<usize>,
    pair_diagonal: usize,
    /// Every switch position's pair, and the one each lane runs.
    pairs: Vec<ZenerPair>,
    active: Vec<usize>,
    /// Gain of the ideal attenuator at the jack (1 when a pot is the gain control).
    attenuation: f64,
    /// Unknowns now and at the last two samples.
    x: Vec<L>,
    x1: Vec<L>,
    x2: Vec<L>,
    predict_limit: Vec<f64>,
    /// The DC operating point found at set-up, where `reset` starts from.
    rest_x: Vec<L>,
    // Working storage (no allocation while running).
    /// Every voltage (`Layout`) and each node's slot in it.
    volts: Vec<L>,
    slots: Vec<usize>,
    /// Given currents into the kept nodes after elimination.
    given: Vec<L>,
    /// G_cc^-1 h_c of every linear cluster.
    linear: Vec<L>,
    step: Vec<L>,
    jacobian: Vec<L>,
    inverse_pivots: Vec<L>,
    dense: Vec<f64>,
    dense_rhs: Vec<f64>,
    ports: Vec<L>,
    port_limit: Vec<f64>,
    port_tolerance: Vec<f64>,
    damping: Damping<L>,
    valve_eval: Vec<ValveEval<L>>,
    pair_eval: PairEval<L>,
    report: NewtonReport,
}

impl<L: Lane> Nodal<L> {
    /// The circuit at internal sample rate `rate` (Hz), every lane at switch position `position`, at its DC
    /// operating point. Builds every switch position's Zener tables (not real-time safe).
    pub fn new(circuit: &Circuit, rate: f64, position: usize) -> Result<Nodal<L>, CircuitError> {
        crate::fastmath::prepare_tables();
        let net = Netlist::build(circuit);
        let n = net.nodes.len();
        // Which parts join which nodes; the nodes a device touches are kept, the others eliminated.
        let mut links = Pattern(Vec::new());
        net.resistors.iter().for_each(|r| r.stamp(&mut links));
        net.capacitors
            .iter()
            .for_each(|c| c.stamp(&mut links, Some(1.0)));
        net.pots.iter().for_each(|p| p.stamp(&mut links));
        let mut kept = vec![false; n];
        for v in &net.valves {
            for t in [v.plate, v.grid, v.cathode] {
                if let Some(i) = t.node() {
                    kept[i] = true;
                }
            }
        }
        kept[net.clamp_node] = true;
        let cap_terminals: Vec<[Option<usize>; 2]> = net
            .capacitors
            .iter()
            .map(|c| [c.a.node(), c.b.node()])
            .collect();
        let condensed = Condensation::new(n, &kept, &links.0, &cap_terminals);
        let m = condensed.kept();
        let reduced = |t: Terminal| t.node().and_then(|i| condensed.reduced_of[i]);
        // The band's shape: the kept nodes' own links, the fill of elimination, every valve's terminals on each
        // other.
        let mut pattern: Vec<(usize, usize)> = links
            .0
            .iter()
            .filter_map(|&(i, j)| Some((condensed.reduced_of[i]?, condensed.reduced_of[j]?)))
            .collect();
        pattern.extend(condensed.fill());
        for v in &net.valves {
            let pins = [v.plate, v.grid, v.cathode];
            for a in pins {
                for b in pins {
                    if let (Some(i), Some(j)) = (reduced(a), reduced(b)) {
                        pattern.push((i, j));
                    }
                }
            }
        }
        let shape = BandShape::new(m, pattern).ok_or_else(|| {
            CircuitError(
                "the circuit's nodes do not form a chain the solver can hold (a part joins nodes far apart)"
                    .into(),
            )
        })?;
        let layout = Layout::new(&shape, &condensed.reduced_of, net.sources.len());
        let valves: Vec<ValveSlot> = net
            .valves
            .iter()
            .map(|v| {
                let terms = [v.plate, v.grid, v.cathode];
                ValveSlot {
                    model: v.tube.triode(),
                    volts_at: terms.map(|t| layout.volts(t)),
                    step_at: terms.map(|t| reduced(t).unwrap_or(layout.zero_step)),
                    residual_at: terms.map(|t| reduced(t).unwrap_or(layout.spare_step)),
                    jacobian_at: terms.map(|row| {
                        terms.map(|col| match (reduced(row), reduced(col)) {
                            (Some(i), Some(j)) => shape.at(i, j),
                            _ => layout.spare_jacobian,
                        })
                    }),
                }
            })
            .collect();
        let pair_node = net.clamp_node;
        let pair_unknown = condensed.reduced_of[pair_node].expect("the pair's node is kept");
        let pair_column = (0..m)
            .filter(|&i| shape.holds(i, pair_unknown))
            .map(|i| shape.at(i, pair_unknown))
            .collect();
        let pair_diagonal = shape.at(pair_unknown, pair_unknown);
        let caps: Vec<CapSlot> = net
            .capacitors
            .iter()
            .map(|c| CapSlot {
                volts_at: [layout.volts(c.a), layout.volts(c.b)],
                conductance: 0.0,
            })
            .collect();
        let jack_at = layout.volts(Terminal::Source(net.jack));
        let mut predict_limit = vec![PREDICT_OTHER; m];
        for v in &net.valves {
            for t in [v.grid, v.cathode] {
                if let Some(i) = reduced(t) {
                    predict_limit[i] = PREDICT_GRID;
                }
            }
        }
        predict_limit[pair_unknown] = PREDICT_S;
        let mut port_limit = Vec::new();
        let mut port_tolerance = Vec::new();
        for _ in &valves {
            port_limit.extend([LIMIT_VPK, LIMIT_VGK]);
            port_tolerance.extend([TOLERANCE_VPK, TOLERANCE_VGK]);
        }
        port_limit.push(LIMIT_S);
        port_tolerance.push(TOLERANCE_S);
        let ports = port_limit.len();
        let pairs: Vec<ZenerPair> = circuit
            .clamp
            .position
            .iter()
            .map(|p| {
                ZenerPair::new(
                    p.positive.as_ref().map(|z| z.model()),
                    p.negative.as_ref().map(|z| z.model()),
                )
            })
            .collect();
        let source_volts: Vec<f64> = net.sources.iter().map(|s| s.volts).collect();
        let no = L::lt(L::splat(1.0), L::splat(0.0));
        let mut model = Nodal {
            period: 1.0 / rate,
            g_full: vec![0.0; n * n],
            g_reduced: vec![0.0; m * m],
            g: vec![0.0; layout.jacobian_len],
            rails: vec![0.0; n],
            jack: Vec::with_capacity(n),
            jack_per_node: vec![0.0; n],
            scratch: vec![0.0; n + 1],
            full_source_volts: source_volts.clone(),
            source_volts,
            history: vec![L::default(); caps.len()],
            caps,
            valve_eval: vec![ValveEval::default(); valves.len()],
            valves,
            pair_unknown,
            pair_column,
            pair_diagonal,
            active: vec![position.min(pairs.len().saturating_sub(1)); L::WIDTH],
            pairs,
            attenuation: 1.0,
            x: vec![L::default(); m],
            x1: vec![L::default(); m],
            x2: vec![L::default(); m],
            rest_x: vec![L::default(); m],
            predict_limit,
            volts: vec![L::default(); layout.volts_len],
            slots: layout.slots.clone(),
            given: vec![L::default(); m],
            linear: vec![L::default(); condensed.linear_count()],
            jack_at,
            step: vec![L::default(); layout.step_len],
            jacobian: vec![L::default(); layout.jacobian_len],
            inverse_pivots: vec![L::default(); m],
            dense: vec![0.0; m * m],
            dense_rhs: vec![0.0; m],
            ports: vec![L::default(); ports],
            damping: Damping {
                limit: vec![L::default(); ports],
                last_step: vec![L::default(); ports],
                last_limited: vec![no; ports],
            },
            port_limit,
            port_tolerance,
            pair_eval: PairEval::default(),
            report: NewtonReport::default(),
            shape,
            condensed,
            net,
        };
        model.check_slots();
        model.condensed.set_slots(&model.slots);
        if let GainControl::Attenuator(law) = model.net.gain_control {
            model.attenuation = law.fraction(0.5);
        }
        model.operating_point()?;
        Ok(model)
    }

    /// Every index the hot loops read without a bounds check lies inside its vector (a set-up fault is a panic
    /// here, never a stray write later).
    fn check_slots(&self) {
        for v in &self.valves {
            assert!(v.residual_at.iter().all(|&i| i < self.step.len()));
            assert!(v.step_at.iter().all(|&i| i < self.step.len()));
            assert!(v.volts_at.iter().all(|&i| i < self.volts.len()));
            assert!(v
                .jacobian_at
                .iter()
                .flatten()
                .all(|&i| i < self.jacobian.len()));
        }
        assert!(self.pair_column.iter().all(|&i| i < self.jacobian.len()));
        assert!(self.ports.len() == 2 * self.valves.len() + 1);
        for c in &self.caps {
            assert!(c.volts_at.iter().all(|&i| i < self.volts.len()));
        }
    }

    /// The netlist the model solves.
    pub fn netlist(&self) -> &Netlist {
        &self.net
    }

    /// The band's shape (size and width), for diagnostics and tests.
    pub fn shape(&self) -> &BandShape {
        &self.shape
    }

    /// Rebuild the linear network's matrix (after a pot moved or the discretisation changed) and eliminate the
    /// linear nodes from it. No allocation.
    fn assemble(&mut self, transient: bool) {
        self.g_full.iter_mut().for_each(|v| *v = 0.0);
        self.rails.iter_mut().for_each(|v| *v = 0.0);
        self.jack.clear();
        let period = transient.then_some(self.period);
        let mut a = Assembly {
            size: self.net.nodes.len(),
            g: &mut self.g_full,
            rails: &mut self.rails,
            jack: &mut self.jack,
            sources: &self.source_volts,
            jack_index: self.net.jack,
        };
        self.net.resistors.iter().for_each(|r| r.stamp(&mut a));
        self.net.pots.iter().for_each(|p| p.stamp(&mut a));
        for (slot, c) in self.caps.iter_mut().zip(&self.net.capacitors) {
            c.stamp(&mut a, period);
            slot.conductance = c.conductance(period);
        }
        // A cluster with no DC path leaves its inverse undefined; the solve then fails and says so.
        self.condensed
            .reduce_matrix(&self.g_full, &mut self.g_reduced);
        self.jack_per_node.iter_mut().for_each(|v| *v = 0.0);
        for &(node, g) in &self.jack {
            self.jack_per_node[node] += g;
        }
        self.condensed
            .prepare_sources(&self.rails, &self.jack_per_node, &mut self.scratch);
        // The kept nodes' matrix in band storage, then the identity rows after it.
        let m = self.shape.size;
        self.g.iter_mut().for_each(|v| *v = 0.0);
        for i in 0..m {
            for j in 0..m {
                if self.shape.holds(i, j) {
                    self.g[self.shape.at(i, j)] = self.g_reduced[i * m + j];
                }
            }
        }
        for i in m..self.shape.rows() {
            self.g[i * self.shape.width() + self.shape.half] = 1.0;
        }
        // Pins and capacitor terminals on sources follow the source voltages (stepped during the DC solve).
        let first_source = self.volts.len() - self.source_volts.len();
        for (slot, v) in self.volts[first_source..]
            .iter_mut()
            .zip(&self.source_volts)
        {
            *slot = L::splat(*v);
        }
    }

    /// Turn every pot that follows `knob` to `rotation` (0..1), or set the attenuator's gain for the gain knob
    /// when no pot follows it. Rebuilds the matrix (about a microsecond); every stored charge stays.
    pub fn set_knob(&mut self, knob: Knob, rotation: f64) {
        if !rotation.is_finite() {
            return;
        }
        let rotation = rotation.clamp(0.0, 1.0);
        if knob == Knob::Gain {
            if let GainControl::Attenuator(law) = self.net.gain_control {
                self.attenuation = law.fraction(rotation);
                return;
            }
        }
        let mut moved = false;
        for p in self.net.pots.iter_mut().filter(|p| p.knob == Some(knob)) {
            moved |= p.rotation != rotation;
            p.rotation = rotation;
        }
        if moved {
            self.assemble(true);
        }
    }

    /// Select switch position `position` (clamped to the list) in lane `lane`. Instant, as a real switch is.
    pub fn set_position(&mut self, lane: usize, position: usize) {
        let position = position.min(self.pairs.len() - 1);
        if lane < L::WIDTH && self.active[lane] != position {
            self.active[lane] = position;
            for x in [&mut self.x, &mut self.x1, &mut self.x2] {
                x[self.pair_unknown].set(lane, 0.0);
            }
        }
    }

    /// The switch position lane `lane` runs.
    pub fn position(&self, lane: usize) -> usize {
        self.active[lane.min(L::WIDTH - 1)]
    }

    /// The pair of switch position `position`.
    pub fn pair(&self, position: usize) -> Option<&ZenerPair> {
        self.pairs.get(position)
    }

    /// How many switch positions there are.
    pub fn positions(&self) -> usize {
        self.pairs.len()
    }

    /// Replace the pair of `position` (or add one past the end). Builds tables: not real-time safe.
    pub fn replace_pair(&mut self, position: usize, pair: ZenerPair) {
        if position < self.pairs.len() {
            self.pairs[position] = pair;
        } else {
            self.pairs.push(pair);
        }
    }

    /// Find the DC operating point (capacitors open, the supplies brought up in ten steps, each solve starting
    /// from the last), charge each capacitor to its DC voltage, and keep the result as the rest state.
    fn operating_point(&mut self) -> Result<(), CircuitError> {
        self.history.iter_mut().for_each(|h| *h = L::default());
        self.x.iter_mut().for_each(|v| *v = L::default());
        let none = L::lt(L::splat(1.0), L::splat(0.0));
        let mut converged = true;
        for step in 1..=10 {
            let share = step as f64 / 10.0;
            for (v, f) in self.source_volts.iter_mut().zip(&self.full_source_volts) {
                *v = f * share;
            }
            self.assemble(false);
            converged = L::all(self.solve(L::default(), LONG_ITERATIONS, none));
        }
        if !converged {
            return Err(CircuitError(
                "the circuit has no DC operating point the solver can find (check the supplies and the \
                 resistor values)"
                    .into(),
            ));
        }
        self.rest_x.clone_from(&self.x);
        self.reset();
        Ok(())
    }

    /// Back to the DC operating point at the present knob settings, with silent history (real-time safe: no
    /// allocation; a few Newton steps from the rest state found at set-up, since a pot's position moves the DC
    /// point only through the grid currents that flow in its legs).
    pub fn reset(&mut self) {
        self.x.copy_from_slice(&self.rest_x);
        self.history.iter_mut().for_each(|h| *h = L::default());
        let none = L::lt(L::splat(1.0), L::splat(0.0));
        self.assemble(false);
        self.solve(L::default(), LONG_ITERATIONS, none);
        // With G = 2C/T and h = G v, a capacitor passes no current at its DC voltage v.
        self.assemble(true);
        for (slot, h) in self.caps.iter().zip(self.history.iter_mut()) {
            *h = L::splat(slot.conductance) * across(&self.volts, slot);
        }
        self.solve(L::default(), LONG_ITERATIONS, none);
        self.update_history();
        self.x1.copy_from_slice(&self.x);
        self.x2.copy_from_slice(&self.x);
    }

    /// Advance one internal sample with `jack_volts` at the input jack of each lane (before the attenuator).
    #[inline]
    pub fn process(&mut self, jack_volts: L) {
        for i in 0..self.x.len() {
            // Predictor: quadratic extrapolation through the last three solutions, limited per unknown.
            let (x0, x1, x2) = (self.x[i], self.x1[i], self.x2[i]);
            self.x2[i] = x1;
            self.x1[i] = x0;
            let change = L::splat(2.0) * x0 - L::splat(3.0) * x1 + x2;
            let limit = L::splat(self.predict_limit[i]);
            self.x[i] = x0 + change.clamp_to(-limit, limit);
        }
        let input = jack_volts * L::splat(self.attenuation);
        let no = L::lt(L::splat(1.0), L::splat(0.0));
        let converged = self.solve(input, MAX_ITERATIONS, no);
        if !L::all(converged) {
            self.recover(input, converged);
        }
        self.update_history();
    }

    /// After a solve that failed in some lanes: those lanes start again from their last solution with a larger
    /// budget, the lanes that converged keep their solution untouched; a lane that still fails keeps its last
    /// solution.
    #[cold]
    #[inline(never)]
    fn recover(&mut self, input: L, converged: L::Mask) {
        let first = self.report.iterations;
        for (x, last) in self.x.iter_mut().zip(&self.x1) {
            *x = L::select(converged, *x, *last);
        }
        let converged = self.solve(input, LONG_ITERATIONS, converged);
        self.report.iterations += first;
        if !L::all(converged) {
            let mut x = std::mem::take(&mut self.x);
            for (xi, last) in x.iter_mut().zip(&self.x1) {
                for lane in 0..L::WIDTH {
                    if !xi.get(lane).is_finite() {
                        xi.set(lane, last.get(lane));
                    }
                }
            }
            self.evaluate(&x, converged);
            self.x = x;
        }
    }

    /// New capacitor histories from the solved node voltages: h = 2 G v - h.
    #[inline(always)]
    fn update_history(&mut self) {
        for (slot, h) in self.caps.iter().zip(self.history.iter_mut()) {
            let v = across(&self.volts, slot);
            *h = L::splat(2.0 * slot.conductance).madd(v, -*h);
        }
    }

    /// Newton from the unknowns in `x` for this sample's given currents, except in the lanes of `keep`, which
    /// hold a solution already and do not move; the lanes that converged (`keep` among them). Leaves the node
    /// voltages in `volts` and the devices' currents (carried through the last step) in the evaluations.
    #[inline(always)]
    fn solve(&mut self, input: L, max_iterations: u32, keep: L::Mask) -> L::Mask {
        // Given currents of the kept nodes (and the clusters' share for their recovery): the rails, the jack
        // through its conductances, the capacitors' histories, each through the elimination.
        self.condensed
            .given(input, &self.history, &mut self.given, &mut self.linear);
        self.volts[self.jack_at] = input;
        let mut x = std::mem::take(&mut self.x);
        let converged = match self.shape.half {
            1 => self.newton::<3>(&mut x, max_iterations, keep),
            2 => self.newton::<5>(&mut x, max_iterations, keep),
            3 => self.newton::<7>(&mut x, max_iterations, keep),
            4 => self.newton::<9>(&mut x, max_iterations, keep),
            _ => self.newton::<13>(&mut x, max_iterations, keep),
        };
        self.x = x;
        // The linear nodes from the solved device nodes.
        self.condensed.recover(&self.linear, &mut self.volts);
        converged
    }

    /// Node voltages from the unknowns (the pair's node from its s), and every device evaluated there, except in
    /// the lanes of `keep`, which keep their evaluation.
    #[inline(always)]
    fn evaluate(&mut self, x: &[L], keep: L::Mask) {
        let half = self.shape.half;
        self.volts[half..half + x.len()].copy_from_slice(x);
        // Each lane's devices are evaluated from plain arrays, the results packed once per quantity.
        let s = x[self.pair_unknown].to_lanes();
        let mut pair = [[0.0; MAX_LANES]; 6];
        for lane in 0..L::WIDTH {
            let p = &self.pairs[self.active[lane]];
            let point = if p.is_open() {
                // No parts: the unknown is the open node's voltage and no current flows.
                PairPoint {
                    volts: s[lane],
                    volts_ds: 1.0,
                    ..Default::default()
                }
            } else {
                p.port(s[lane])
            };
            pair[0][lane] = point.volts;
            pair[1][lane] = point.volts_ds;
            pair[2][lane] = point.current;
            pair[3][lane] = point.current_ds;
            pair[4][lane] = point.negative_part_volts;
            pair[5][lane] = point.negative_part_volts_ds;
        }
        let pair = PairEval {
            volts: L::from_lanes(pair[0]),
            volts_ds: L::from_lanes(pair[1]),
            current: L::from_lanes(pair[2]),
            current_ds: L::from_lanes(pair[3]),
            negative_part_volts: L::from_lanes(pair[4]),
            negative_part_volts_ds: L::from_lanes(pair[5]),
        };
        self.pair_eval = if L::any(keep) {
            PairEval::select(keep, &self.pair_eval, &pair)
        } else {
            pair
        };
        self.volts[half + self.pair_unknown] = self.pair_eval.volts;
        for (slot, out) in self.valves.iter().zip(self.valve_eval.iter_mut()) {
            // SAFETY: `check_slots` (in `new`) holds every `volts_at` below `volts`'s length.
            let [vp, vg, vk] = slot
                .volts_at
                .map(|i| unsafe { *self.volts.get_unchecked(i) });
            let (vpk, vgk) = ((vp - vk).to_lanes(), (vg - vk).to_lanes());
            let mut c = [[0.0; MAX_LANES]; 5];
            for lane in 0..L::WIDTH {
                let t: TriodeCurrents = slot.model.currents(vpk[lane], vgk[lane]);
                c[0][lane] = t.plate;
                c[1][lane] = t.grid;
                c[2][lane] = t.plate_dvpk;
                c[3][lane] = t.plate_dvgk;
                c[4][lane] = t.grid_dvgk;
            }
            let e = ValveEval {
                plate: L::from_lanes(c[0]),
                grid: L::from_lanes(c[1]),
                plate_dvpk: L::from_lanes(c[2]),
                plate_dvgk: L::from_lanes(c[3]),
                grid_dvgk: L::from_lanes(c[4]),
            };
            *out = if L::any(keep) {
                ValveEval::select(keep, out, &e)
            } else {
                e
            };
        }
    }

    /// The negated residual (into `step`) and the Jacobian at the evaluated point (band half-width `K`).
    #[inline(always)]
    fn linearise<const W: usize>(&mut self) {
        let n = self.shape.size;
        // Residual: G v - given + device currents (current leaving each node). Row i of G holds nodes
        // i - K ..= i + K, which sit at volts[i ..= i + 2K] in the padded storage.
        let (rows, _) = self.g.as_chunks::<W>();
        for ((row, window), (r, given)) in rows[..n]
            .iter()
            .zip(self.volts.windows(W))
            .zip(self.step.iter_mut().zip(&self.given))
        {
            let mut sum = -*given;
            for d in 0..W {
                sum = L::splat(row[d]).madd(window[d], sum);
            }
            *r = sum;
        }
        for y in self.step[n..n + W / 2].iter_mut() {
            *y = L::default();
        }
        self.step[self.pair_unknown] += self.pair_eval.current;
        // Jacobian: G with the pair's column times dV/ds, plus the devices' slopes.
        for (j, g) in self.jacobian.iter_mut().zip(&self.g) {
            *j = L::splat(*g);
        }
        for &at in &self.pair_column {
            // SAFETY: `check_slots` (in `new`) holds the pair's column below `jacobian`'s length.
            unsafe { *self.jacobian.get_unchecked_mut(at) *= self.pair_eval.volts_ds };
        }
        self.jacobian[self.pair_diagonal] += self.pair_eval.current_ds;
        let (step, jacobian) = (self.step.as_mut_ptr(), self.jacobian.as_mut_ptr());
        for (slot, e) in self.valves.iter().zip(&self.valve_eval) {
            // SAFETY: `Nodal::new` checks every `residual_at` against `step`'s length and every `jacobian_at`
            // against `jacobian`'s (`check_slots`), and neither vector changes length after it.
            unsafe {
                // Into the plate +Ip, into the grid +Ig, into the cathode -(Ip + Ig).
                let [p, g, k] = slot.residual_at;
                *step.add(p) += e.plate;
                *step.add(g) += e.grid;
                *step.add(k) -= e.plate + e.grid;
                // Slopes by the plate, grid and cathode voltages (Ip of Vpk and Vgk, Ig of Vgk).
                let (pk, gk, ig) = (e.plate_dvpk, e.plate_dvgk, e.grid_dvgk);
                let slopes = [
                    [pk, gk, -(pk + gk)],
                    [L::default(), ig, -ig],
                    [-pk, -(gk + ig), pk + gk + ig],
                ];
                for (row, values) in slot.jacobian_at.iter().zip(slopes) {
                    for (at, v) in row.iter().zip(values) {
                        *jacobian.add(*at) += v;
                    }
                }
            }
        }
        for r in self.step[..n].iter_mut() {
            *r = -*r;
        }
    }

    /// The Newton step at the evaluated point, into `step`.
    #[inline(always)]
    fn newton_step<const W: usize>(&mut self) {
        self.linearise::<W>();
        let n = self.shape.size;
        if !band::solve::<W, L>(
            n,
            &mut self.jacobian,
            &mut self.step,
            &mut self.inverse_pivots,
        ) {
            self.dense_step::<W>();
        }
    }

    /// The Newton step by dense elimination with partial pivoting, lane by lane, for the rare point where a
    /// pivot of the band solve was not clearly positive.
    #[cold]
    #[inline(never)]
    fn dense_step<const W: usize>(&mut self) {
        self.linearise::<W>();
        let n = self.shape.size;
        for lane in 0..L::WIDTH {
            self.shape.to_dense(&self.jacobian, lane, &mut self.dense);
            for i in 0..n {
                self.dense_rhs[i] = self.step[i].get(lane);
            }
            dense_solve(&mut self.dense, &mut self.dense_rhs, n);
            for i in 0..n {
                let v = self.dense_rhs[i];
                self.step[i].set(lane, v);
            }
        }
    }

    /// Each device port's change for the Newton step in `step`, into `ports` (valves' Vpk, Vgk, then s).
    #[inline(always)]
    fn port_changes(&mut self) {
        for (slot, ports) in self.valves.iter().zip(self.ports.chunks_exact_mut(2)) {
            // SAFETY: `check_slots` (in `new`) holds every `step_at` below `step`'s length.
            let [dp, dg, dk] = slot.step_at.map(|i| unsafe { *self.step.get_unchecked(i) });
            ports[0] = dp - dk;
            ports[1] = dg - dk;
        }
        let last = self.ports.len() - 1;
        self.ports[last] = self.step[self.pair_unknown];
    }

    /// Carry the device currents through a last small step (first order), in the lanes of `mask`.
    #[inline(always)]
    fn carry(&mut self, mask: L::Mask) {
        for (k, e) in self.valve_eval.iter_mut().enumerate() {
            let (dpk, dgk) = (self.ports[2 * k], self.ports[2 * k + 1]);
            let plate = e.plate_dvpk.madd(dpk, e.plate_dvgk.madd(dgk, e.plate));
            let grid = e.grid_dvgk.madd(dgk, e.grid);
            e.plate = L::select(mask, plate, e.plate);
            e.grid = L::select(mask, grid, e.grid);
        }
        let ds = self.ports[self.ports.len() - 1];
        let p = &mut self.pair_eval;
        p.current = L::select(mask, p.current_ds.madd(ds, p.current), p.current);
        p.volts = L::select(mask, p.volts_ds.madd(ds, p.volts), p.volts);
        p.negative_part_volts = L::select(
            mask,
            p.negative_part_volts_ds.madd(ds, p.negative_part_volts),
            p.negative_part_volts,
        );
    }

    /// Newton's method from `x`, lane by lane, the lanes of `keep` held as they are; the lanes that converged.
    #[inline(always)]
    fn newton<const W: usize>(
        &mut self,
        x: &mut [L],
        max_iterations: u32,
        keep: L::Mask,
    ) -> L::Mask {
        let no = L::lt(L::splat(1.0), L::splat(0.0));
        let every = L::lt(L::splat(0.0), L::splat(1.0));
        self.evaluate(x, keep);
        self.newton_step::<W>();
        let mut done = keep;
        let mut iterations = 1;
        // The damping state is set up on the first damped step (most samples need none).
        let mut damping_ready = false;
        loop {
            self.port_changes();
            // Within tolerance on every port: take the step and carry the currents through it.
            let mut small = L::lt(L::splat(0.0), L::splat(1.0));
            for (change, tolerance) in self.ports.iter().zip(&self.port_tolerance) {
                small = L::and(small, change.within(L::splat(*tolerance)));
            }
            let newly = L::and(small, not::<L>(done));
            if L::all(L::or(small, done)) {
                // Every lane within tolerance (or done): the common case, no damping.
                let scale = L::select(done, L::splat(0.0), L::splat(1.0));
                for (xi, si) in x.iter_mut().zip(&self.step) {
                    *xi = scale.madd(*si, *xi);
                }
                self.carry(newly);
                self.report = NewtonReport {
                    iterations,
                    converged: true,
                };
                self.settle_volts(x);
                return every;
            }
            // Otherwise a damped step: when a port that hit its limit then steps the other way its limit
            // halves, so a Newton 2-cycle closes in as bisection would; else the limit grows back to full.
            if !damping_ready {
                for (limit, full) in self.damping.limit.iter_mut().zip(&self.port_limit) {
                    *limit = L::splat(*full);
                }
                self.damping
                    .last_step
                    .iter_mut()
                    .for_each(|s| *s = L::default());
                self.damping.last_limited.iter_mut().for_each(|m| *m = no);
                damping_ready = true;
            }
            let mut scale = L::splat(1.0);
            let d = &mut self.damping;
            for n in 0..self.ports.len() {
                let s = self.ports[n];
                let reversed = L::and((s * d.last_step[n]).lt(L::splat(0.0)), d.last_limited[n]);
                let full = L::splat(self.port_limit[n]);
                d.limit[n] = L::select(
                    reversed,
                    d.limit[n] * L::splat(0.5),
                    (d.limit[n] * L::splat(2.0)).min(full),
                );
                let size = s.abs();
                d.last_limited[n] = d.limit[n].lt(size);
                scale = L::select(d.last_limited[n], scale.min(d.limit[n] / size), scale);
            }
            // Written so that a NaN step scales to nothing.
            let mut finite = L::lt(L::splat(0.0), L::splat(1.0));
            for n in 0..self.ports.len() {
                d.last_step[n] = scale * self.ports[n];
                finite = L::and(finite, d.last_step[n].abs().lt(L::splat(f64::INFINITY)));
            }
            let scale = L::select(small, L::splat(1.0), scale);
            let scale = L::select(L::and(finite, not::<L>(done)), scale, L::splat(0.0));
            for (xi, si) in x.iter_mut().zip(&self.step) {
                *xi = scale.madd(*si, *xi);
            }
            self.carry(newly);
            done = L::or(done, newly);
            if L::all(done) {
                self.report = NewtonReport {
                    iterations,
                    converged: true,
                };
                self.settle_volts(x);
                return every;
            }
            if iterations >= max_iterations {
                break;
            }
            iterations += 1;
            self.evaluate(x, done);
            self.newton_step::<W>();
        }
        self.report = NewtonReport {
            iterations,
            converged: false,
        };
        self.evaluate(x, done);
        done
    }

    /// The kept nodes' voltages at the accepted point (the pair's node from its carried voltage).
    #[inline(always)]
    fn settle_volts(&mut self, x: &[L]) {
        let half = self.shape.half;
        self.volts[half..half + x.len()].copy_from_slice(x);
        self.volts[half + self.pair_unknown] = self.pair_eval.volts;
    }

    /// Newton iterations and convergence of the last sample.
    pub fn report(&self) -> NewtonReport {
        self.report
    }

    /// Voltage of node `node` (V) in every lane, after the last sample.
    #[inline(always)]
    pub fn node_volts(&self, node: usize) -> L {
        self.volts[self.slots[node]]
    }

    /// Currents of valve `index` (in the netlist's order) after the last sample.
    #[inline(always)]
    pub fn valve(&self, index: usize) -> &ValveEval<L> {
        &self.valve_eval[index]
    }

    /// The valve's plate, grid and cathode voltages after the last sample.
    #[inline(always)]
    pub fn valve_terminal_volts(&self, index: usize) -> [L; 3] {
        self.valves[index].volts_at.map(|i| self.volts[i])
    }

    /// The valve's plate-cathode and grid-cathode voltages after the last sample.
    #[inline(always)]
    pub fn valve_volts(&self, index: usize) -> (L, L) {
        let [vp, vg, vk] = self.valves[index].volts_at.map(|i| self.volts[i]);
        (vp - vk, vg - vk)
    }

    /// The pair after the last sample.
    #[inline(always)]
    pub fn pair_state(&self) -> &PairEval<L> {
        &self.pair_eval
    }

    /// The (positive-part, negative-part) voltages after the last sample, in lane `lane`.
    pub fn part_volts(&self, lane: usize) -> (f64, f64) {
        let p = &self.pair_eval;
        self.pairs[self.active[lane]].split(p.volts.get(lane), p.negative_part_volts.get(lane))
    }
}

/// The voltage across capacitor `slot`, a to b.
#[inline(always)]
fn across<L: Lane>(volts: &[L], slot: &CapSlot) -> L {
    // SAFETY: `check_slots` (in `Nodal::new`) holds every capacitor's `volts_at` below `volts`'s length, and
    // `volts` is only ever the model's own voltage vector.
    unsafe { *volts.get_unchecked(slot.volts_at[0]) - *volts.get_unchecked(slot.volts_at[1]) }
}

/// The negation of a mask.
#[inline(always)]
fn not<L: Lane>(mask: L::Mask) -> L::Mask {
    L::select(mask, L::splat(1.0), L::splat(0.0)).lt(L::splat(0.5))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::circuit::{PotSpec, ToneStack};
    use crate::pot::PotLaw;

    /// The built-in preamp with a tone stack (the widest band the shipped circuits have), driven hard for
    /// `samples` by a 220 Hz tone with a 5x harmonic, with the unknowns moved a little off that sample's solution.
    fn driven_point(samples: usize) -> (Nodal<f64>, Vec<f64>) {
        let mut circuit = Circuit::builtin();
        circuit.tone_stack = Some(ToneStack {
            slope_resistor: 47e3,
            treble_cap: 330e-12,
            bass_cap: 33e-9,
            middle_cap: 22e-9,
            treble_pot: PotSpec {
                resistance: 250e3,
                law: PotLaw::Log,
            },
            bass_pot: PotSpec {
                resistance: 1e6,
                law: PotLaw::Log,
            },
            middle_pot: PotSpec {
                resistance: 20e3,
                law: PotLaw::Linear,
            },
            load_resistor: 1e6,
        });
        let rate = 192_000.0;
        let mut model: Nodal<f64> = Nodal::new(&circuit, rate, 2).unwrap();
        model.set_knob(Knob::Gain, 0.7);
        for n in 0..samples {
            let t = n as f64 / rate;
            let input = 0.5
                * ((2.0 * std::f64::consts::PI * 220.0 * t).sin()
                    + 0.3 * (2.0 * std::f64::consts::PI * 1100.0 * t).sin());
            model.process(input);
        }
        let mut x = model.x.clone();
        for (k, v) in x.iter_mut().enumerate() {
            *v += 1e-3 * (k as f64 % 3.0 - 1.0);
        }
        (model, x)
    }

    /// `linearise` (and with `solve`, the band step) at the model's band width.
    fn linearise(model: &mut Nodal<f64>, solve: bool) {
        match (model.shape.half, solve) {
            (2, false) => model.linearise::<5>(),
            (2, true) => model.newton_step::<5>(),
            (3, false) => model.linearise::<7>(),
            (3, true) => model.newton_step::<7>(),
            (half, _) => panic!("band half-width {half}: add it here"),
        }
    }

    /// The residual (current leaving each kept node, the linear ones eliminated) at `x`, through the devices.
    fn residual(model: &mut Nodal<f64>, x: &[f64]) -> Vec<f64> {
        model.evaluate(x, false);
        linearise(model, false);
        model.step[..x.len()].iter().map(|v| -v).collect()
    }

    /// The assembled Jacobian is the derivative of the node equations: central differences of the residual
    /// (through the device models) agree with it entry by entry, at points across a driven period.
    #[test]
    fn jacobian_matches_central_differences() {
        for samples in [300, 900, 1500, 2100] {
            let (mut model, x) = driven_point(samples);
            // Eliminating the linear nodes (the whole tone stack among them) leaves the valves' and the pair's.
            assert_eq!(model.x.len(), 11, "kept nodes");
            model.evaluate(&x, false);
            linearise(&mut model, false);
            let jacobian = model.jacobian.clone();
            let shape = model.shape.clone();
            let n = x.len();
            for col in 0..n {
                let h = 1e-6 * (1.0 + x[col].abs());
                let (mut up, mut down) = (x.clone(), x.clone());
                up[col] += h;
                down[col] -= h;
                let r_up = residual(&mut model, &up);
                let r_down = residual(&mut model, &down);
                for row in 0..n {
                    let numeric = (r_up[row] - r_down[row]) / (2.0 * h);
                    let written = if shape.holds(row, col) {
                        jacobian[shape.at(row, col)]
                    } else {
                        0.0
                    };
                    let scale: f64 = (0..n)
                        .filter(|&j| shape.holds(row, j))
                        .map(|j| jacobian[shape.at(row, j)].abs())
                        .sum();
                    assert!(
                        (numeric - written).abs() <= 1e-5 * scale + 1e-15,
                        "sample {samples}, d row {row} / d unknown {col}: numeric {numeric:e}, written {written:e}"
                    );
                }
            }
        }
    }

    /// The band solve gives the step that dense Gaussian elimination with partial pivoting gives on the same
    /// Jacobian and residual (a general method, independent of the band's layout).
    #[test]
    fn band_step_matches_dense_pivoted_solve() {
        for samples in [300, 900, 1500, 2100] {
            let (mut model, x) = driven_point(samples);
            model.evaluate(&x, false);
            linearise(&mut model, false);
            let n = x.len();
            let mut dense = vec![0.0; n * n];
            model.shape.to_dense(&model.jacobian, 0, &mut dense);
            let mut expected: Vec<f64> = model.step[..n].to_vec();
            band::dense_solve(&mut dense, &mut expected, n);
            linearise(&mut model, true);
            for k in 0..n {
                let got = model.step[k];
                assert!(
                    (got - expected[k]).abs() <= 1e-9 * (1.0 + expected[k].abs()),
                    "sample {samples}, unknown {k}: band {got:e}, dense {:e}",
                    expected[k]
                );
            }
        }
    }
}
