//! The engine: input calibration, oversampling around the circuit model, smoothing of every knob, probes in real
//! volts aligned with the input, and the meters. Real-time safe after `Engine::new`.

use crate::circuit::{Circuit, CircuitError, Settings, MAX_PREAMP_STAGES};
use crate::elements::Knob;
use crate::lane::Lane;
use crate::netlist::Netlist;
use crate::nodal::{NewtonReport, Nodal};
use crate::oversampling::{self, Downsampler, Quality, Upsampler};

/// Largest voltage at the input jack the model accepts; anything beyond (or not finite) is limited first.
pub const INPUT_LIMIT_VOLTS: f64 = 100.0;
/// Pair current above which the pair counts as conducting, for "share of time clamped" and the "conducts at"
/// readouts (A).
pub const CLAMPED_CURRENT: f64 = 10e-6;
/// Knob moves glide over this time (s), so automation never clicks.
const SMOOTHING_SECONDS: f64 = 0.01;
/// A moving pot's network is rebuilt at most every this many host samples while it glides.
const POT_UPDATE_INTERVAL: usize = 16;
/// Most valves in a circuit: the preamp stages, the gain stage and the follower.
pub const MAX_VALVES: usize = MAX_PREAMP_STAGES + 2;
/// Probe slots: the seven named ones and one per preamp plate.
const SLOTS: usize = 7 + MAX_PREAMP_STAGES;

/// Node voltages and currents the engine can write out, each at the host rate and aligned with the input.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Probe {
    /// Listening output: the tone stack's output (or, without one, the level pot's wiper) in volts divided by
    /// `[listen] volts_at_full_scale`.
    Listen,
    /// The node the Zeners connect to (V).
    Clamp,
    /// Level pot wiper (V).
    Wiper,
    /// Zener pair current, clamp node to ground (A).
    ZenerCurrent,
    /// Across the positive-clamp part, cathode to anode (V).
    PositivePartVolts,
    /// Across the negative-clamp part, anode to cathode (V).
    NegativePartVolts,
    /// The tone stack's output (V).
    Tone,
    /// Preamp stage k's plate (V), k counted from 1.
    Plate(usize),
}

impl Probe {
    /// The probes every circuit has.
    pub const FIXED: [Probe; 6] = [
        Probe::Listen,
        Probe::Clamp,
        Probe::Wiper,
        Probe::ZenerCurrent,
        Probe::PositivePartVolts,
        Probe::NegativePartVolts,
    ];

    fn slot(self) -> usize {
        match self {
            Probe::Listen => 0,
            Probe::Clamp => 1,
            Probe::Wiper => 2,
            Probe::ZenerCurrent => 3,
            Probe::PositivePartVolts => 4,
            Probe::NegativePartVolts => 5,
            Probe::Tone => 6,
            Probe::Plate(k) => 6 + k.clamp(1, MAX_PREAMP_STAGES),
        }
    }

    /// The probe's name on the command line.
    pub fn name(self) -> String {
        match self {
            Probe::Listen => "listen".into(),
            Probe::Clamp => "clamp".into(),
            Probe::Wiper => "wiper".into(),
            Probe::ZenerCurrent => "zener-current".into(),
            Probe::PositivePartVolts => "positive-part".into(),
            Probe::NegativePartVolts => "negative-part".into(),
            Probe::Tone => "tone".into(),
            Probe::Plate(k) => format!("plate{k}"),
        }
    }

    /// The probe called `name`, if there is one.
    pub fn parse(name: &str) -> Option<Probe> {
        let fixed = Probe::FIXED
            .into_iter()
            .chain([Probe::Tone])
            .find(|p| p.name() == name);
        fixed.or_else(|| {
            let k: usize = name.strip_prefix("plate")?.parse().ok()?;
            (1..=MAX_PREAMP_STAGES)
                .contains(&k)
                .then_some(Probe::Plate(k))
        })
    }

    /// The probes `circuit` has: the fixed ones, `tone` with a tone stack, `plate1`.. per preamp stage.
    pub fn available(circuit: &Circuit) -> Vec<Probe> {
        let mut out: Vec<Probe> = Probe::FIXED.to_vec();
        if circuit.tone_stack.is_some() {
            out.push(Probe::Tone);
        }
        out.extend((1..=circuit.preamp.len()).map(Probe::Plate));
        out
    }

    /// The unit of the probe's values ("V" or "A").
    pub fn unit(self) -> &'static str {
        match self {
            Probe::ZenerCurrent => "A",
            Probe::Listen => "full scale",
            _ => "V",
        }
    }
}

/// One host-rate output sample of every probe.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Frame {
    pub listen: f64,
    pub clamp_volts: f64,
    pub wiper_volts: f64,
    pub zener_current: f64,
    pub positive_part_volts: f64,
    pub negative_part_volts: f64,
    pub tone_volts: f64,
    /// Preamp plates 1, 2, ... (V).
    pub plate_volts: [f64; MAX_PREAMP_STAGES],
}

impl Frame {
    pub fn get(&self, probe: Probe) -> f64 {
        match probe {
            Probe::Listen => self.listen,
            Probe::Clamp => self.clamp_volts,
            Probe::Wiper => self.wiper_volts,
            Probe::ZenerCurrent => self.zener_current,
            Probe::PositivePartVolts => self.positive_part_volts,
            Probe::NegativePartVolts => self.negative_part_volts,
            Probe::Tone => self.tone_volts,
            Probe::Plate(k) => self.plate_volts[k.clamp(1, MAX_PREAMP_STAGES) - 1],
        }
    }

    fn from_slots(v: &[f64; SLOTS]) -> Frame {
        let mut plate_volts = [0.0; MAX_PREAMP_STAGES];
        plate_volts.copy_from_slice(&v[7..]);
        Frame {
            listen: v[0],
            clamp_volts: v[1],
            wiper_volts: v[2],
            zener_current: v[3],
            positive_part_volts: v[4],
            negative_part_volts: v[5],
            tone_volts: v[6],
            plate_volts,
        }
    }
}

/// Running statistics of one valve.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ValveMeters {
    /// Lowest and highest plate voltage (V): the plate's swing.
    pub plate_volts_min: f64,
    pub plate_volts_max: f64,
    /// Highest grid current (A).
    pub grid_current_peak: f64,
    /// Lowest plate current (A): near zero means the valve cut off.
    pub plate_current_min: f64,
    /// Highest plate dissipation (W).
    pub plate_watts_peak: f64,
}

impl Default for ValveMeters {
    fn default() -> Self {
        ValveMeters {
            plate_volts_min: f64::INFINITY,
            plate_volts_max: f64::NEG_INFINITY,
            grid_current_peak: 0.0,
            plate_current_min: f64::INFINITY,
            plate_watts_peak: 0.0,
        }
    }
}

impl ValveMeters {
    /// Peak-to-peak plate swing (V), 0 before any sample.
    pub fn plate_swing(&self) -> f64 {
        if self.plate_volts_max >= self.plate_volts_min {
            self.plate_volts_max - self.plate_volts_min
        } else {
            0.0
        }
    }

    fn merge(&mut self, other: &ValveMeters) {
        self.plate_volts_min = self.plate_volts_min.min(other.plate_volts_min);
        self.plate_volts_max = self.plate_volts_max.max(other.plate_volts_max);
        self.grid_current_peak = self.grid_current_peak.max(other.grid_current_peak);
        self.plate_current_min = self.plate_current_min.min(other.plate_current_min);
        self.plate_watts_peak = self.plate_watts_peak.max(other.plate_watts_peak);
    }
}

/// Running statistics at the internal rate, from the last `reset_meters`.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Meters {
    pub samples: u64,
    pub clamped_samples: u64,
    pub clamp_peak_positive: f64,
    pub clamp_peak_negative: f64,
    pub zener_peak_current: f64,
    pub zener_current_square_sum: f64,
    pub positive_part_peak_watts: f64,
    pub negative_part_peak_watts: f64,
    /// Sums of the parts' instantaneous power over the samples (W; times `period`, the energy in J).
    pub positive_part_watt_sum: f64,
    pub negative_part_watt_sum: f64,
    /// Each valve in signal order (preamp stages, gain stage, follower); the first `valve_count` are used.
    pub valves: [ValveMeters; MAX_VALVES],
    pub valve_count: usize,
    pub newton_iterations: u64,
    pub newton_failures: u64,
    /// Internal sample period (s).
    pub period: f64,
}

impl Meters {
    fn new(period: f64, valve_count: usize) -> Self {
        Meters {
            valves: [ValveMeters::default(); MAX_VALVES],
            valve_count,
            period,
            ..Default::default()
        }
    }
    /// Share of time the pair conducts more than CLAMPED_CURRENT (0..1).
    pub fn share_clamped(&self) -> f64 {
        if self.samples == 0 {
            0.0
        } else {
            self.clamped_samples as f64 / self.samples as f64
        }
    }
    /// RMS pair current (A).
    pub fn zener_rms_current(&self) -> f64 {
        if self.samples == 0 {
            0.0
        } else {
            (self.zener_current_square_sum / self.samples as f64).sqrt()
        }
    }
    /// Average power (W) in the positive-clamp and negative-clamp parts.
    pub fn average_watts(&self) -> (f64, f64) {
        if self.samples == 0 {
            (0.0, 0.0)
        } else {
            let samples = self.samples as f64;
            (
                self.positive_part_watt_sum / samples,
                self.negative_part_watt_sum / samples,
            )
        }
    }
    /// Peak-to-peak clamp node swing (V).
    pub fn clamp_peak_to_peak(&self) -> f64 {
        self.clamp_peak_positive - self.clamp_peak_negative
    }
    /// The valves in use.
    pub fn valves(&self) -> &[ValveMeters] {
        &self.valves[..self.valve_count]
    }
    /// The gain stage's meters (the valve before the follower).
    pub fn gain_stage(&self) -> &ValveMeters {
        &self.valves[self.valve_count.saturating_sub(2)]
    }
    /// The follower's meters.
    pub fn follower(&self) -> &ValveMeters {
        &self.valves[self.valve_count.saturating_sub(1)]
    }

    /// Fold in the meters of another run of the same circuit (another channel, another stretch): counts and
    /// sums add, peaks keep the extreme, minima the minimum.
    pub fn merge(&mut self, other: &Meters) {
        self.samples += other.samples;
        self.clamped_samples += other.clamped_samples;
        self.clamp_peak_positive = self.clamp_peak_positive.max(other.clamp_peak_positive);
        self.clamp_peak_negative = self.clamp_peak_negative.min(other.clamp_peak_negative);
        self.zener_peak_current = self.zener_peak_current.max(other.zener_peak_current);
        self.zener_current_square_sum += other.zener_current_square_sum;
        self.positive_part_peak_watts = self
            .positive_part_peak_watts
            .max(other.positive_part_peak_watts);
        self.negative_part_peak_watts = self
            .negative_part_peak_watts
            .max(other.negative_part_peak_watts);
        self.positive_part_watt_sum += other.positive_part_watt_sum;
        self.negative_part_watt_sum += other.negative_part_watt_sum;
        self.valve_count = self.valve_count.max(other.valve_count);
        for (mine, theirs) in self.valves.iter_mut().zip(&other.valves) {
            mine.merge(theirs);
        }
        self.newton_iterations += other.newton_iterations;
        self.newton_failures += other.newton_failures;
        if self.period == 0.0 {
            self.period = other.period;
        }
    }

    #[inline(always)]
    fn record(&mut self, r: &SampleReadout, report: NewtonReport) {
        self.samples += 1;
        let i = r.zener_current;
        if i.abs() > CLAMPED_CURRENT {
            self.clamped_samples += 1;
        }
        // The same as larger(peak +, v) and smaller(peak -, v): peak - <= peak + always holds (both start at 0),
        // so a new sample can pass at most one of them, and a NaN passes neither.
        let v = r.clamp_volts;
        if v > self.clamp_peak_positive {
            self.clamp_peak_positive = v;
        } else if v < self.clamp_peak_negative {
            self.clamp_peak_negative = v;
        }
        self.zener_peak_current = larger(self.zener_peak_current, i.abs());
        self.zener_current_square_sum += i * i;
        let (wp, wn) = (r.positive_part_volts * i, r.negative_part_volts * i);
        self.positive_part_peak_watts = larger(self.positive_part_peak_watts, wp);
        self.negative_part_peak_watts = larger(self.negative_part_peak_watts, wn);
        self.positive_part_watt_sum += wp;
        self.negative_part_watt_sum += wn;
        self.newton_iterations += report.iterations as u64;
        self.newton_failures += u64::from(!report.converged);
    }

    #[inline(always)]
    fn record_valve(&mut self, index: usize, plate_volts: f64, vpk: f64, plate: f64, grid: f64) {
        let m = &mut self.valves[index];
        m.plate_volts_min = smaller(m.plate_volts_min, plate_volts);
        m.plate_volts_max = larger(m.plate_volts_max, plate_volts);
        m.grid_current_peak = larger(m.grid_current_peak, grid);
        m.plate_current_min = smaller(m.plate_current_min, plate);
        m.plate_watts_peak = larger(m.plate_watts_peak, vpk * plate);
    }
}

/// The larger of a running extreme `a` and a new value `b` (a NaN `b` is ignored), in one comparison.
#[inline(always)]
fn larger(a: f64, b: f64) -> f64 {
    if b > a {
        b
    } else {
        a
    }
}

/// The smaller of a running extreme `a` and a new value `b` (a NaN `b` is ignored).
#[inline(always)]
fn smaller(a: f64, b: f64) -> f64 {
    if b < a {
        b
    } else {
        a
    }
}

/// What the meters need from one internal sample.
#[derive(Clone, Copy, Debug, Default)]
struct SampleReadout {
    clamp_volts: f64,
    zener_current: f64,
    positive_part_volts: f64,
    negative_part_volts: f64,
}

/// One valve at one instant.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct ValveReadout {
    pub plate_volts: f64,
    pub grid_volts: f64,
    pub cathode_volts: f64,
    /// Plate current, plate to cathode (A).
    pub plate_current: f64,
    /// Grid current, grid to cathode (A).
    pub grid_current: f64,
}

impl ValveReadout {
    /// Plate dissipation (W).
    pub fn plate_watts(&self) -> f64 {
        (self.plate_volts - self.cathode_volts) * self.plate_current
    }
}

/// Every readout of the circuit at one instant (the last internal sample), in volts and amps.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Readout {
    pub clamp_volts: f64,
    pub wiper_volts: f64,
    pub tone_volts: f64,
    pub zener_current: f64,
    pub positive_part_volts: f64,
    pub negative_part_volts: f64,
    /// The valves in signal order; the first `valve_count` are used.
    pub valves: [ValveReadout; MAX_VALVES],
    pub valve_count: usize,
}

impl Readout {
    /// The valves in use.
    pub fn valves(&self) -> &[ValveReadout] {
        &self.valves[..self.valve_count]
    }
    /// The gain stage (the valve before the follower).
    pub fn gain_stage(&self) -> &ValveReadout {
        &self.valves[self.valve_count.saturating_sub(2)]
    }
    /// The follower.
    pub fn follower(&self) -> &ValveReadout {
        &self.valves[self.valve_count.saturating_sub(1)]
    }
}

/// One-pole glide toward a target.
#[derive(Clone, Copy, Debug)]
struct Glide {
    value: f64,
    target: f64,
    coeff: f64,
}

impl Glide {
    fn new(value: f64, rate: f64) -> Self {
        Glide {
            value,
            target: value,
            coeff: 1.0 - (-1.0 / (SMOOTHING_SECONDS * rate)).exp(),
        }
    }
    #[inline]
    fn next(&mut self) -> f64 {
        if self.value == self.target {
            return self.target;
        }
        self.value += (self.target - self.value) * self.coeff;
        if (self.target - self.value).abs() < 1e-9 {
            self.value = self.target;
        }
        self.value
    }
    fn moving(&self) -> bool {
        self.value != self.target
    }
}

/// Where the probes read in the model.
#[derive(Clone, Copy, Debug)]
struct ProbeNodes {
    clamp: usize,
    wiper: usize,
    tone: Option<usize>,
    plates: [usize; MAX_PREAMP_STAGES],
    plate_count: usize,
}

pub use crate::lane::MAX_LANES;

/// The circuit model plus oversampling and controls, at one host sample rate. `L` is the model's lane type:
/// `f64` runs one model; a packed type (`crate::lanes`) runs two or four that share the knobs, each with its own
/// input, switch position, oversampling, probes and meters (the two channels of a stereo DI, or the compared
/// positions on one DI). The single-model methods (`process_sample`, `meters`, `readout`, `render`) feed every
/// lane the same input and report lane 0.
#[derive(Clone)]
pub struct Engine<L: Lane = f64> {
    model: Nodal<L>,
    nodes: ProbeNodes,
    quality: Quality,
    sample_rate: f64,
    /// Per lane: the upsampler, the decimators of each probe slot and their working rows.
    up: Vec<Upsampler>,
    down: Vec<[Downsampler; SLOTS]>,
    high_in: Vec<[f64; 16]>,
    high_out: Vec<[[f64; 16]; SLOTS]>,
    input_volts_per_unit: f64,
    listen_units_per_volt: f64,
    knobs: [Glide; 5],
    /// Host samples until a moving knob's pots are rebuilt again.
    countdown: [usize; 5],
    /// The value each knob's pots were last set to.
    applied: [f64; 5],
    active: [bool; SLOTS],
    /// Per lane: the meters and the last host-rate frame.
    meters: Vec<Meters>,
    frames: Vec<Frame>,
    outs: Vec<[f64; SLOTS]>,
}

impl<L: Lane> std::fmt::Debug for Engine<L> {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Engine")
            .field("quality", &self.quality)
            .field("sample_rate", &self.sample_rate)
            .field("lanes", &L::WIDTH)
            .finish()
    }
}

impl Engine {
    /// Prepare one model for `circuit` at host rate `sample_rate` (22.05 kHz .. 384 kHz). Allocates and solves
    /// the DC operating point: call outside the audio thread.
    pub fn new(
        circuit: &Circuit,
        sample_rate: f64,
        quality: Quality,
        settings: Settings,
    ) -> Result<Engine, CircuitError> {
        Engine::with_lanes(circuit, sample_rate, quality, settings)
    }
}

impl<L: Lane> Engine<L> {
    /// As `Engine::new`, with `L::WIDTH` models side by side, every lane at `settings`.
    pub fn with_lanes(
        circuit: &Circuit,
        sample_rate: f64,
        quality: Quality,
        settings: Settings,
    ) -> Result<Engine<L>, CircuitError> {
        circuit.validate()?;
        circuit.check_settings(&settings)?;
        if !(22_050.0..=384_000.0).contains(&sample_rate) {
            return Err(CircuitError(format!(
                "sample rate {sample_rate} Hz is outside 22050 .. 384000 Hz"
            )));
        }
        if L::WIDTH > MAX_LANES {
            return Err(CircuitError(format!(
                "{} models side by side: at most {MAX_LANES}",
                L::WIDTH
            )));
        }
        let factor = quality.factor();
        let rate = sample_rate * factor as f64;
        let mut model = Nodal::<L>::new(circuit, rate, settings.position)?;
        let knob_values = [
            settings.gain,
            settings.level,
            settings.treble,
            settings.middle,
            settings.bass,
        ];
        for (knob, v) in Knob::ALL.iter().zip(knob_values) {
            model.set_knob(*knob, v);
        }
        let nodes = Self::probe_nodes(model.netlist());
        let valve_count = model.netlist().valves.len();
        let lanes = L::WIDTH;
        let mut engine = Engine {
            model,
            nodes,
            quality,
            sample_rate,
            up: (0..lanes).map(|_| Upsampler::new(quality)).collect(),
            down: (0..lanes)
                .map(|_| std::array::from_fn(|_| Downsampler::new(quality)))
                .collect(),
            high_in: vec![[0.0; 16]; lanes],
            high_out: vec![[[0.0; 16]; SLOTS]; lanes],
            input_volts_per_unit: circuit.input.volts_at_full_scale,
            listen_units_per_volt: 1.0 / circuit.listen.volts_at_full_scale,
            knobs: knob_values.map(|v| Glide::new(v, sample_rate)),
            countdown: [0; 5],
            applied: knob_values,
            active: [true; SLOTS],
            meters: vec![Meters::new(1.0 / rate, valve_count); lanes],
            frames: vec![Frame::default(); lanes],
            outs: vec![[0.0; SLOTS]; lanes],
        };
        engine.reset();
        Ok(engine)
    }

    fn probe_nodes(net: &Netlist) -> ProbeNodes {
        let mut plates = [net.level_wiper; MAX_PREAMP_STAGES];
        for (slot, p) in plates.iter_mut().zip(&net.preamp_plates) {
            *slot = *p;
        }
        ProbeNodes {
            clamp: net.clamp_node,
            wiper: net.level_wiper,
            tone: net.tone,
            plates,
            plate_count: net.preamp_plates.len(),
        }
    }

    /// Models side by side.
    pub fn lanes(&self) -> usize {
        L::WIDTH
    }

    /// Return to the rest state with silent history (no thump on the next sample); knobs jump to their
    /// targets. Real-time safe.
    pub fn reset(&mut self) {
        for (k, knob) in Knob::ALL.iter().enumerate() {
            self.knobs[k].value = self.knobs[k].target;
            self.model.set_knob(*knob, self.knobs[k].value);
            self.applied[k] = self.knobs[k].value;
            self.countdown[k] = 0;
        }
        self.model.reset();
        for lane in 0..L::WIDTH {
            self.up[lane].reset(0.0);
            let rest = self.slot_values(lane);
            for (d, v) in self.down[lane].iter_mut().zip(rest) {
                d.reset(v);
            }
        }
        self.reset_meters();
    }

    /// Lane `lane`'s probes at the model's last sample, in slot order.
    #[inline(always)]
    fn slot_values(&self, lane: usize) -> [f64; SLOTS] {
        let m = &self.model;
        let n = &self.nodes;
        let wiper = m.node_volts(n.wiper).get(lane);
        let tone = n.tone.map_or(0.0, |t| m.node_volts(t).get(lane));
        let (positive, negative) = m.part_volts(lane);
        let heard = if n.tone.is_some() { tone } else { wiper };
        let mut v = [0.0; SLOTS];
        v[0] = heard * self.listen_units_per_volt;
        v[1] = m.node_volts(n.clamp).get(lane);
        v[2] = wiper;
        v[3] = m.pair_state().current.get(lane);
        v[4] = positive;
        v[5] = negative;
        v[6] = tone;
        for k in 0..n.plate_count {
            if self.active[7 + k] {
                v[7 + k] = m.node_volts(n.plates[k]).get(lane);
            }
        }
        v
    }

    /// Decimate only these probes (each costs one anti-alias filter per lane); the others read 0 in every
    /// `Frame`. All probes are active after `new`.
    pub fn set_active_probes(&mut self, probes: &[Probe]) {
        self.active = [false; SLOTS];
        for p in probes {
            self.active[p.slot()] = true;
        }
    }

    /// Latency in host samples added by oversampling (exact).
    pub fn latency(&self) -> usize {
        oversampling::latency(self.quality)
    }

    pub fn quality(&self) -> Quality {
        self.quality
    }

    pub fn sample_rate(&self) -> f64 {
        self.sample_rate
    }

    /// Turn a knob (rotation 0..1; glides; a non-finite value is ignored).
    pub fn set_knob(&mut self, knob: Knob, rotation: f64) {
        if rotation.is_finite() {
            self.knobs[knob.index()].target = rotation.clamp(0.0, 1.0);
        }
    }

    /// Gain control rotation 0..1 (glides).
    pub fn set_gain(&mut self, gain: f64) {
        self.set_knob(Knob::Gain, gain);
    }

    /// Level pot rotation 0..1 (glides).
    pub fn set_level(&mut self, level: f64) {
        self.set_knob(Knob::Level, level);
    }

    /// Switch position of every lane (index into the circuit's list; clamped). Instant, as the real switch is:
    /// crossfade between engines for click-free comparison.
    pub fn set_position(&mut self, position: usize) {
        for lane in 0..L::WIDTH {
            self.model.set_position(lane, position);
        }
    }

    /// Switch position of one lane (as `set_position`; a lane beyond the engine's is ignored).
    pub fn set_lane_position(&mut self, lane: usize, position: usize) {
        if lane < L::WIDTH {
            self.model.set_position(lane, position);
        }
    }

    /// Peak volts at the input jack for a full-scale sample.
    pub fn set_input_calibration(&mut self, volts_at_full_scale: f64) {
        if volts_at_full_scale.is_finite() && volts_at_full_scale > 0.0 {
            self.input_volts_per_unit = volts_at_full_scale;
        }
    }

    /// The circuit model (pairs, netlist, node voltages).
    pub fn model(&self) -> &Nodal<L> {
        &self.model
    }

    /// Mutable model, for replacing a pair (not real-time safe: builds tables).
    pub fn model_mut(&mut self) -> &mut Nodal<L> {
        &mut self.model
    }

    /// Every readout of lane 0 at the model's last internal sample (right after `new` or `reset`: the DC
    /// operating point).
    pub fn readout(&self) -> Readout {
        self.lane_readout(0)
    }

    /// Every readout of lane `lane` (below `lanes()`) at the model's last internal sample.
    pub fn lane_readout(&self, lane: usize) -> Readout {
        let m = &self.model;
        let n = &self.nodes;
        let (positive, negative) = m.part_volts(lane);
        let mut r = Readout {
            clamp_volts: m.node_volts(n.clamp).get(lane),
            wiper_volts: m.node_volts(n.wiper).get(lane),
            tone_volts: n.tone.map_or(0.0, |t| m.node_volts(t).get(lane)),
            zener_current: m.pair_state().current.get(lane),
            positive_part_volts: positive,
            negative_part_volts: negative,
            valve_count: m.netlist().valves.len(),
            ..Default::default()
        };
        for (k, out) in r.valves.iter_mut().take(r.valve_count).enumerate() {
            let [plate, grid, cathode] = m.valve_terminal_volts(k);
            let e = m.valve(k);
            *out = ValveReadout {
                plate_volts: plate.get(lane),
                grid_volts: grid.get(lane),
                cathode_volts: cathode.get(lane),
                plate_current: e.plate.get(lane),
                grid_current: e.grid.get(lane),
            };
        }
        r
    }

    /// Lane 0's meters.
    pub fn meters(&self) -> &Meters {
        &self.meters[0]
    }

    /// Lane `lane`'s meters (below `lanes()`).
    pub fn lane_meters(&self, lane: usize) -> &Meters {
        &self.meters[lane]
    }

    pub fn reset_meters(&mut self) {
        for m in self.meters.iter_mut() {
            *m = Meters::new(m.period, m.valve_count);
        }
    }

    /// Process one host sample (full-scale units), the same input in every lane, and return lane 0's active
    /// probes at the host rate.
    #[inline]
    pub fn process_sample(&mut self, input: f32) -> &Frame {
        let inputs = [input; MAX_LANES];
        &self.process_lanes(&inputs[..L::WIDTH])[0]
    }

    /// Process one host sample of each lane (`inputs[lane]`, full-scale units; a missing lane reads silence)
    /// and return every lane's active probes at the host rate.
    #[inline]
    pub fn process_lanes(&mut self, inputs: &[f32]) -> &[Frame] {
        self.advance(inputs);
        for lane in 0..L::WIDTH {
            let mut out = self.outs[lane];
            for (o, active) in out.iter_mut().zip(self.active) {
                if !(active && o.is_finite()) {
                    *o = 0.0;
                }
            }
            self.frames[lane] = Frame::from_slots(&out);
        }
        &self.frames
    }

    /// Glide the knobs one host sample; a moving pot's network is rebuilt every `POT_UPDATE_INTERVAL` samples
    /// and once more when it arrives.
    #[inline(always)]
    fn glide_knobs(&mut self) {
        for (k, knob) in Knob::ALL.iter().enumerate() {
            let glide = &mut self.knobs[k];
            if !glide.moving() && self.applied[k] == glide.value {
                continue;
            }
            let value = glide.next();
            if self.countdown[k] > 0 && glide.moving() {
                self.countdown[k] -= 1;
                continue;
            }
            if value != self.applied[k] {
                self.model.set_knob(*knob, value);
                self.applied[k] = value;
            }
            self.countdown[k] = POT_UPDATE_INTERVAL;
        }
    }

    /// One host sample through the model: each lane's probes in slot order into `outs`, the active ones
    /// decimated (the others unspecified), not yet checked for finiteness.
    #[inline(always)]
    fn advance(&mut self, inputs: &[f32]) {
        let mut lanes = [0.0; MAX_LANES];
        for (lane, v) in lanes.iter_mut().enumerate().take(L::WIDTH) {
            let mut x = inputs.get(lane).map_or(0.0, |&x| x as f64);
            if !x.is_finite() {
                x = 0.0;
            }
            *v = (x * self.input_volts_per_unit).clamp(-INPUT_LIMIT_VOLTS, INPUT_LIMIT_VOLTS);
        }
        let volts = L::from_lanes(lanes);
        self.glide_knobs();
        if self.quality == Quality::X1 {
            self.step_model(volts);
            for lane in 0..L::WIDTH {
                self.outs[lane] = self.slot_values(lane);
            }
            return;
        }
        let factor = self.quality.factor();
        for ((up, high), v) in self.up.iter_mut().zip(self.high_in.iter_mut()).zip(lanes) {
            up.process(v, &mut high[..factor]);
        }
        for k in 0..factor {
            let mut v = [0.0; MAX_LANES];
            for (lane, v) in v.iter_mut().enumerate().take(L::WIDTH) {
                *v = self.high_in[lane][k];
            }
            self.step_model(L::from_lanes(v));
            for lane in 0..L::WIDTH {
                let values = self.slot_values(lane);
                for (row, v) in self.high_out[lane].iter_mut().zip(values) {
                    row[k] = v;
                }
            }
        }
        for lane in 0..L::WIDTH {
            for slot in 0..SLOTS {
                if self.active[slot] {
                    self.outs[lane][slot] =
                        self.down[lane][slot].process(&self.high_out[lane][slot][..factor]);
                }
            }
        }
    }

    /// One internal sample of the model and the meters.
    #[inline(always)]
    fn step_model(&mut self, jack_volts: L) {
        self.model.process(jack_volts);
        let m = &self.model;
        let clamp = m.node_volts(self.nodes.clamp).to_lanes();
        let current = m.pair_state().current.to_lanes();
        for lane in 0..L::WIDTH {
            let (positive, negative) = m.part_volts(lane);
            let r = SampleReadout {
                clamp_volts: clamp[lane],
                zener_current: current[lane],
                positive_part_volts: positive,
                negative_part_volts: negative,
            };
            self.meters[lane].record(&r, m.report());
        }
        for k in 0..self.meters[0].valve_count {
            let [plate, _, cathode] = m.valve_terminal_volts(k).map(Lane::to_lanes);
            let e = m.valve(k);
            let (plate_current, grid_current) = (e.plate.to_lanes(), e.grid.to_lanes());
            for (lane, meters) in self.meters.iter_mut().enumerate() {
                meters.record_valve(
                    k,
                    plate[lane],
                    plate[lane] - cathode[lane],
                    plate_current[lane],
                    grid_current[lane],
                );
            }
        }
    }

    /// Process a block, writing one probe of lane 0 (every lane fed the same input). Output is delayed by
    /// `latency()` samples. Only `probe` stays active afterwards (see `set_active_probes`).
    pub fn process_block(&mut self, input: &[f32], output: &mut [f32], probe: Probe) {
        let slot = probe.slot();
        if !self.active[slot] || self.active.iter().filter(|a| **a).count() > 1 {
            self.set_active_probes(&[probe]);
        }
        let _guard = crate::denormals::FlushGuard::new();
        for (x, y) in input.iter().zip(output.iter_mut()) {
            let inputs = [*x; MAX_LANES];
            self.advance(&inputs[..L::WIDTH]);
            let v = self.outs[0][slot];
            *y = if v.is_finite() { v as f32 } else { 0.0 };
        }
    }

    /// Render a whole signal offline for one probe of lane 0 (every lane fed the same input), latency removed
    /// (output[n] lines up with input[n]). Only `probe` stays active afterwards (see `set_active_probes`).
    pub fn render(&mut self, input: &[f32], probe: Probe) -> Vec<f32> {
        let mut out = self.render_lanes(&[input], probe);
        out.swap_remove(0)
    }

    /// Render one signal per lane offline (`inputs[lane]`; a missing lane or a shorter signal reads silence)
    /// for one probe, latency removed; one output per lane, as long as the longest input. Only `probe` stays
    /// active afterwards.
    pub fn render_lanes(&mut self, inputs: &[&[f32]], probe: Probe) -> Vec<Vec<f32>> {
        self.set_active_probes(&[probe]);
        let latency = self.latency();
        let len = inputs.iter().map(|i| i.len()).max().unwrap_or(0);
        let mut out = vec![Vec::with_capacity(len); L::WIDTH];
        let _guard = crate::denormals::FlushGuard::new();
        let mut x = [0.0f32; MAX_LANES];
        for n in 0..len + latency {
            for (lane, v) in x.iter_mut().take(L::WIDTH).enumerate() {
                *v = inputs
                    .get(lane)
                    .and_then(|i| i.get(n))
                    .copied()
                    .unwrap_or(0.0);
            }
            let frames = self.process_lanes(&x[..L::WIDTH]);
            if n >= latency {
                for (o, f) in out.iter_mut().zip(frames) {
                    o.push(f.get(probe) as f32);
                }
            }
        }
        out
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Gain full up, level half way, at switch `position`.
    fn flat_out(position: usize) -> Settings {
        Settings {
            gain: 1.0,
            level: 0.5,
            position,
            ..Default::default()
        }
    }

    /// `samples` of a 220 Hz tone at 0.9 of full scale, 48 kHz: drives the one-stage circuit into both clamps.
    fn hard_tone(samples: usize) -> Vec<f32> {
        (0..samples)
            .map(|n| {
                (0.9 * (2.0 * std::f64::consts::PI * 220.0 * n as f64 / 48_000.0).sin()) as f32
            })
            .collect()
    }

    /// A probe switched on mid-stream gives, from `decimator_memory` host samples after switching on, exactly
    /// the output it gives when on all along; switching probes never touches the model, so the listening output
    /// is the same throughout.
    #[test]
    fn probe_switched_on_late_is_exact_after_decimator_memory() {
        let (settings, input) = (flat_out(1), hard_tone(3000));
        for quality in Quality::ALL {
            let mut always =
                Engine::new(&Circuit::one_stage(), 48_000.0, quality, settings).unwrap();
            always.set_active_probes(&[Probe::Listen, Probe::Clamp]);
            let mut late = always.clone();
            late.set_active_probes(&[Probe::Listen]);
            let switch_on = 1500;
            let exact_from = switch_on + oversampling::decimator_memory(quality) - 1;
            for (n, &x) in input.iter().enumerate() {
                if n == switch_on {
                    late.set_active_probes(&[Probe::Listen, Probe::Clamp]);
                }
                let a = *always.process_sample(x);
                let b = *late.process_sample(x);
                assert_eq!(
                    a.listen.to_bits(),
                    b.listen.to_bits(),
                    "{quality:?} listen at {n}"
                );
                if n >= exact_from {
                    assert_eq!(
                        a.clamp_volts.to_bits(),
                        b.clamp_volts.to_bits(),
                        "{quality:?} clamp at {n}"
                    );
                }
            }
        }
    }

    /// The meters against their definitions, recomputed directly from every internal-rate sample of an identical
    /// model: counts, f64::max / f64::min of the readouts, sums of I^2 and of V I.
    #[test]
    fn meters_match_their_definitions() {
        let circuit = Circuit::one_stage();
        let settings = flat_out(2);
        let mut engine = Engine::new(&circuit, 48_000.0, Quality::X2, settings).unwrap();
        engine.set_active_probes(&[Probe::Listen]);
        let mut twin = engine.clone();
        // A hard-driven, decaying 220 Hz tone (both clamp directions conduct) with one NaN sample.
        let input: Vec<f32> = (0..4800)
            .map(|n| {
                let t = n as f64 / 48_000.0;
                if n == 1000 {
                    f32::NAN
                } else {
                    (0.9 * (-5.0 * t).exp() * (2.0 * std::f64::consts::PI * 220.0 * t).sin()) as f32
                }
            })
            .collect();
        for &x in &input {
            engine.process_sample(x);
        }
        let factor = twin.quality.factor();
        let mut high = [0.0; 16];
        let mut m = Meters::new(1.0 / (48_000.0 * factor as f64), 2);
        let mut probes = 0usize;
        for &x in &input {
            let x = if x.is_finite() { x as f64 } else { 0.0 };
            let volts =
                (x * twin.input_volts_per_unit).clamp(-INPUT_LIMIT_VOLTS, INPUT_LIMIT_VOLTS);
            twin.up[0].process(volts, &mut high[..factor]);
            for &h in &high[..factor] {
                twin.model.process(h);
                let r = twin.readout();
                let report = twin.model.report();
                let i = r.zener_current;
                m.samples += 1;
                m.clamped_samples += u64::from(i.abs() > CLAMPED_CURRENT);
                m.clamp_peak_positive = m.clamp_peak_positive.max(r.clamp_volts);
                m.clamp_peak_negative = m.clamp_peak_negative.min(r.clamp_volts);
                m.zener_peak_current = m.zener_peak_current.max(i.abs());
                m.zener_current_square_sum += i * i;
                let wp = r.positive_part_volts * i;
                let wn = r.negative_part_volts * i;
                m.positive_part_peak_watts = m.positive_part_peak_watts.max(wp);
                m.negative_part_peak_watts = m.negative_part_peak_watts.max(wn);
                m.positive_part_watt_sum += wp;
                m.negative_part_watt_sum += wn;
                for (k, v) in r.valves().iter().enumerate() {
                    let vm = &mut m.valves[k];
                    vm.plate_volts_min = vm.plate_volts_min.min(v.plate_volts);
                    vm.plate_volts_max = vm.plate_volts_max.max(v.plate_volts);
                    vm.grid_current_peak = vm.grid_current_peak.max(v.grid_current);
                    vm.plate_current_min = vm.plate_current_min.min(v.plate_current);
                    vm.plate_watts_peak = vm.plate_watts_peak.max(v.plate_watts());
                }
                m.newton_iterations += u64::from(report.iterations);
                m.newton_failures += u64::from(!report.converged);
                probes += 1;
            }
        }
        assert_eq!(probes, input.len() * factor);
        // Both directions clamped hard, so every peak and energy field is exercised.
        assert!(m.clamp_peak_positive > 10.0 && m.clamp_peak_negative < -3.0);
        assert!(m.clamped_samples > 0 && m.positive_part_watt_sum > 0.0);
        assert_eq!(*engine.meters(), m);
    }

    /// Merging the meters of two halves of a run gives the meters of the whole run (counts and sums add within
    /// rounding, extremes are the extremes).
    #[test]
    fn merged_halves_equal_the_whole() {
        let circuit = Circuit::one_stage();
        let mut whole = Engine::new(&circuit, 48_000.0, Quality::X1, flat_out(2)).unwrap();
        let mut halves = whole.clone();
        let input = hard_tone(4000);
        for &x in &input {
            whole.process_sample(x);
        }
        for &x in &input[..2000] {
            halves.process_sample(x);
        }
        let mut merged = *halves.meters();
        halves.reset_meters();
        for &x in &input[2000..] {
            halves.process_sample(x);
        }
        merged.merge(halves.meters());
        let w = whole.meters();
        assert_eq!(merged.samples, w.samples);
        assert_eq!(merged.clamped_samples, w.clamped_samples);
        assert_eq!(merged.clamp_peak_positive, w.clamp_peak_positive);
        assert_eq!(merged.clamp_peak_negative, w.clamp_peak_negative);
        assert_eq!(merged.valves, w.valves);
        assert!((merged.zener_current_square_sum / w.zener_current_square_sum - 1.0).abs() < 1e-12);
        assert!((merged.positive_part_watt_sum / w.positive_part_watt_sum - 1.0).abs() < 1e-12);
    }
}
