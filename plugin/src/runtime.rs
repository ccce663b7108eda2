//! The real-time side: the compared switch positions of the running circuit and the candidate, each with its
//! model (a stereo input's two channels as two lanes of one engine), crossfades, level match, and the meters for
//! the editor.
//!
//! Models for a new circuit, new candidate parts or a new quality are built by a background worker and handed
//! over through single-slot atomic mailboxes; retired models go back the same way to be freed off the audio
//! thread. After `Processor::new`, nothing here allocates, frees, locks or blocks.
//!
//! Everything the processor does with a model goes through `Models` (build, pots, one sample, reset, meters,
//! latency): "one engine per compared position, the channels as its lanes" lives there and nowhere else, so it
//! can become one engine running the positions side by side without touching the rest.

use crate::loudness::ShortTerm;
use crate::params::{CabinetChoice, FamilyChoice, ListenPoint};
use crate::session::{CircuitKey, Session, CANDIDATE};
use crate::shared::{Shared, SLOTS};
use atomic_float::AtomicF64;
use breakdown_dsp::cabinet::Cabinet;
use breakdown_dsp::circuit::{SwitchPosition, ZenerSpec};
use breakdown_dsp::engine::{Meters, CLAMPED_CURRENT};
use breakdown_dsp::lanes::f64x2;
use breakdown_dsp::smoothing::Glide;
use breakdown_dsp::units::{db_to_gain, gain_to_db};
use breakdown_dsp::Knob;
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::ptr;
use std::sync::atomic::{AtomicBool, AtomicPtr, AtomicU32, AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

/// Crossfade time for switching positions, listening points and swapping in rebuilt models (s).
pub const FADE_SECONDS: f64 = 0.02;
/// Level-match gain glide time constant (s).
const MATCH_GLIDE_SECONDS: f64 = 0.3;
/// Glide time constant for the input calibration, the output trim and the tone knobs (s).
const CONTROL_GLIDE_SECONDS: f64 = 0.01;
/// Quietest loudness that still steers the level match (LUFS); below it the gains hold.
const MATCH_GATE_LUFS: f64 = -70.0;
/// Largest level-match cut (dB).
const MATCH_RANGE_DB: f64 = 30.0;
/// Models waiting to be handed back for freeing, per slot.
const BIN: usize = 4;
/// Meter windows published per second.
const METER_SECONDS: f64 = 0.1;

// ---------------------------------------------------------------------------------------------------------
// Controls

/// Pot rotations, 0..1.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Pots {
    pub gain: f64,
    pub level: f64,
    pub treble: f64,
    pub middle: f64,
    pub bass: f64,
}

impl Default for Pots {
    fn default() -> Self {
        Pots {
            gain: 0.8,
            level: 0.5,
            treble: 0.5,
            middle: 0.5,
            bass: 0.5,
        }
    }
}

/// The freely set candidate pair: Vz of its positive-clamp and negative-clamp parts, and their family.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Candidate {
    pub positive: f64,
    pub negative: f64,
    pub family: FamilyChoice,
}

/// Control values for one block, read from the parameters (already clamped to their ranges).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Controls {
    pub pots: Pots,
    /// Peak volts at the input jack for full scale.
    pub calibration: f64,
    pub trim_db: f64,
    /// Switch position parameter values: 0.. the circuit's positions (past the last one clamps), CANDIDATE.
    pub position: usize,
    pub compare_with: usize,
    /// A/B: hear compare-with instead of position.
    pub ab: bool,
    pub candidate: Candidate,
    pub quality: Quality,
    /// The listening point heard.
    pub listen: ListenPoint,
    /// The cabinet at the end of the chain (heard at `ListenPoint::Chain`).
    pub cabinet: CabinetChoice,
    pub level_match: bool,
    /// Run every position all the time (instant comparison). When false, only the heard position and the
    /// compare-with position run; others restart from rest when selected.
    pub run_all: bool,
}

impl Controls {
    /// The heard position as a parameter value.
    pub fn heard_value(&self) -> usize {
        if self.ab {
            self.compare_with
        } else {
            self.position
        }
    }
}

impl Default for Controls {
    /// The parameters' defaults (plugin/README.md).
    fn default() -> Self {
        Controls {
            pots: Pots::default(),
            calibration: 1.0,
            trim_db: 0.0,
            position: 1,
            compare_with: 2,
            ab: false,
            candidate: Candidate {
                positive: 15.0,
                negative: 9.1,
                family: FamilyChoice::OneWatt,
            },
            quality: Quality::X4,
            listen: ListenPoint::Chain,
            cabinet: CabinetChoice::BuiltIn,
            level_match: false,
            run_all: true,
        }
    }
}

// ---------------------------------------------------------------------------------------------------------
// What a slot runs

/// What one compared slot runs.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Source {
    /// Nothing: a slot past the running circuit's last position.
    Idle,
    /// Switch position `k` of the running circuit.
    Position(usize),
    Candidate(Candidate),
}

/// One slot's models as asked for: the circuit (by id), what they run, and the quality.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SlotSpec {
    pub circuit: u32,
    pub source: Source,
    pub quality: Quality,
}

/// What slot `slot` runs for the circuit `key` and `controls`.
pub fn slot_spec(slot: usize, key: CircuitKey, controls: &Controls) -> SlotSpec {
    let source = if slot == CANDIDATE {
        Source::Candidate(controls.candidate)
    } else if slot < key.positions {
        Source::Position(slot)
    } else {
        Source::Idle
    };
    SlotSpec {
        circuit: key.id,
        source,
        quality: controls.quality,
    }
}

/// A candidate part: Vz with the knee data of the chosen family's row (interpolated between rows for a Vz the
/// family does not have; see `parts::Family::sheet_for`).
pub fn candidate_part(volts: f64, family: FamilyChoice) -> ZenerSpec {
    let sheet = family.family().sheet_for(volts);
    ZenerSpec {
        volts,
        izt: Some(sheet.izt),
        zzt: Some(sheet.zzt),
        izk: Some(sheet.izk),
        zzk: Some(sheet.zzk),
    }
}

/// The circuit one slot's models run: `circuit` with its switch reduced to the one position (a circuit
/// position, or the candidate pair); None for an idle slot or a position the circuit does not have.
pub fn slot_circuit(circuit: &Circuit, source: &Source) -> Option<Circuit> {
    let position = match source {
        Source::Idle => return None,
        Source::Position(k) => circuit.clamp.position.get(*k)?.clone(),
        Source::Candidate(c) => SwitchPosition {
            name: "candidate".into(),
            positive: Some(candidate_part(c.positive, c.family)),
            negative: Some(candidate_part(c.negative, c.family)),
        },
    };
    let mut c = circuit.clone();
    c.clamp.position = vec![position];
    Some(c)
}

/// What the editor shows about a slot's parts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PartsInfo {
    /// Vz (V); NaN for a missing part.
    pub volts_positive: f64,
    pub volts_negative: f64,
    /// Where the pair conducts CLAMPED_CURRENT (V); NaN when it has no parts.
    pub threshold_positive: f64,
    pub threshold_negative: f64,
    /// The family the rating is judged against.
    pub family: FamilyChoice,
    /// The parts carry their own knee data from the circuit file.
    pub own_knee: bool,
}

// ---------------------------------------------------------------------------------------------------------
// The model interface

/// A slot's model: one engine for a mono input; for a stereo input, the two channels as two lanes of one engine
/// (they share the knobs; each lane has its own input, oversampling and meters), which costs well under two
/// engines.
#[derive(Clone)]
enum Engines {
    Mono(Engine),
    Stereo(Engine<f64x2>),
}

/// Call `$body` with `$e` bound to the slot's engine, whichever lane type it has.
macro_rules! each_engine {
    ($engines:expr, $e:ident => $body:expr) => {
        match $engines {
            Engines::Mono($e) => $body,
            Engines::Stereo($e) => $body,
        }
    };
}

/// The models of one slot, built off the audio thread.
pub struct Models {
    pub spec: SlotSpec,
    pub sample_rate: f64,
    engines: Engines,
    /// Volts to listening-output units (1 / the circuit's `[listen] volts_at_full_scale`), for the wiper and
    /// clamp-node listening points.
    listen_scale: f64,
    pub parts: PartsInfo,
    /// A loudness meter for a slot that has none yet (a slot gets its meter with its first models, so slots
    /// the running circuit does not use hold no 3 s buffer); dropped with the models otherwise.
    meter: Option<Box<ShortTerm>>,
}

/// One sample of a slot's models on one channel.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Point {
    /// The signal at each listening point (`listen_index`) in listening-output units, before the cabinet:
    /// the engine's listening output (the tone stack's output), the wiper, the clamp node.
    pub points: [f64; 3],
    /// Clamp-node volts (for the scope).
    pub clamp_volts: f64,
}

/// Index of a listening point in `Point::points`.
pub fn listen_index(point: ListenPoint) -> usize {
    match point {
        ListenPoint::Chain => 0,
        ListenPoint::Wiper => 1,
        ListenPoint::ClampNode => 2,
    }
}

/// One slot's meter window, over its channels.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct MeterWindow {
    pub clamp_peak_positive: f64,
    pub clamp_peak_negative: f64,
    pub share_clamped: f64,
    pub zener_peak_current: f64,
    pub positive_peak_watts: f64,
    pub negative_peak_watts: f64,
    pub positive_average_watts: f64,
    pub negative_average_watts: f64,
}

impl Models {
    /// `new` with a loudness meter for a slot that has none.
    fn with_meter(mut self: Box<Self>) -> Result<Box<Models>, String> {
        self.meter = Some(Box::new(ShortTerm::new(self.sample_rate)?));
        Ok(self)
    }

    /// Build the models of `spec` on `circuit` (allocates: off the audio thread).
    pub fn new(
        spec: SlotSpec,
        circuit: &Circuit,
        sample_rate: f64,
        channels: usize,
        pots: &Pots,
        calibration: f64,
    ) -> Result<Box<Models>, String> {
        let slot = slot_circuit(circuit, &spec.source)
            .ok_or_else(|| format!("no model for {:?}", spec.source))?;
        let settings = Settings {
            gain: pots.gain.clamp(0.0, 1.0),
            level: pots.level.clamp(0.0, 1.0),
            position: 0,
            treble: pots.treble.clamp(0.0, 1.0),
            middle: pots.middle.clamp(0.0, 1.0),
            bass: pots.bass.clamp(0.0, 1.0),
        };
        let mut engines = if channels >= 2 {
            Engines::Stereo(
                Engine::with_lanes(&slot, sample_rate, spec.quality, settings)
                    .map_err(|e| e.to_string())?,
            )
        } else {
            Engines::Mono(
                Engine::new(&slot, sample_rate, spec.quality, settings)
                    .map_err(|e| e.to_string())?,
            )
        };
        let (threshold_positive, threshold_negative) = each_engine!(&mut engines, engine => {
            if calibration.is_finite() && calibration > 0.0 {
                engine.set_input_calibration(calibration);
            }
            // The processor reads the listening output, the wiper and the clamp node only: decimate just those.
            engine.set_active_probes(&[Probe::Listen, Probe::Wiper, Probe::Clamp]);
            match engine.model().pair(0) {
                Some(pair) if !pair.is_open() => pair.thresholds_at(CLAMPED_CURRENT),
                _ => (f64::NAN, f64::NAN),
            }
        });
        let position = &slot.clamp.position[0];
        let parts = PartsInfo {
            volts_positive: position.positive.map_or(f64::NAN, |z| z.volts),
            volts_negative: position.negative.map_or(f64::NAN, |z| z.volts),
            threshold_positive,
            threshold_negative,
            family: match spec.source {
                Source::Candidate(c) => c.family,
                _ => FamilyChoice::OneWatt,
            },
            own_knee: matches!(spec.source, Source::Position(_))
                && [position.positive, position.negative]
                    .iter()
                    .flatten()
                    .any(|z| z.izt.is_some()),
        };
        Ok(Box::new(Models {
            spec,
            sample_rate,
            engines,
            listen_scale: 1.0 / slot.listen.volts_at_full_scale,
            parts,
            meter: None,
        }))
    }

    pub fn channels(&self) -> usize {
        each_engine!(&self.engines, e => e.lanes())
    }

    /// Latency in host samples (the oversampling filters).
    pub fn latency(&self) -> u32 {
        each_engine!(&self.engines, e => e.latency() as u32)
    }

    /// Turn the pots (the model glides them).
    pub fn set_pots(&mut self, pots: &Pots) {
        each_engine!(&mut self.engines, e => {
            e.set_gain(pots.gain);
            e.set_level(pots.level);
            e.set_knob(Knob::Treble, pots.treble);
            e.set_knob(Knob::Middle, pots.middle);
            e.set_knob(Knob::Bass, pots.bass);
        })
    }

    /// One frame of every channel (`inputs[channel]`): per channel, the listening points' signals and the
    /// clamp-node volts (the second is unused for a mono model).
    #[inline]
    pub fn process(&mut self, inputs: &[f32; 2], calibration: f64) -> [Point; 2] {
        let scale = self.listen_scale;
        let point = |f: &breakdown_dsp::Frame| Point {
            points: [f.listen, f.wiper_volts * scale, f.clamp_volts * scale],
            clamp_volts: f.clamp_volts,
        };
        each_engine!(&mut self.engines, e => {
            e.set_input_calibration(calibration);
            let frames = e.process_lanes(&inputs[..e.lanes()]);
            let mut out = [Point::default(); 2];
            for (o, f) in out.iter_mut().zip(frames) {
                *o = point(f);
            }
            out
        })
    }

    /// Back to the operating point with silent history.
    pub fn reset(&mut self) {
        each_engine!(&mut self.engines, e => e.reset())
    }

    /// The meters since the last call, over the channels (None when nothing was processed); starts a new
    /// window.
    pub fn take_meters(&mut self) -> Option<MeterWindow> {
        let mut w = MeterWindow {
            clamp_peak_positive: f64::NEG_INFINITY,
            clamp_peak_negative: f64::INFINITY,
            ..Default::default()
        };
        let (mut clamped, mut samples) = (0u64, 0u64);
        let lanes: [Option<Meters>; 2] = each_engine!(&mut self.engines, e => {
            let lanes = std::array::from_fn(|l| (l < e.lanes()).then(|| *e.lane_meters(l)));
            e.reset_meters();
            lanes
        });
        for m in lanes.into_iter().flatten() {
            if m.samples > 0 {
                w.clamp_peak_positive = w.clamp_peak_positive.max(m.clamp_peak_positive);
                w.clamp_peak_negative = w.clamp_peak_negative.min(m.clamp_peak_negative);
                clamped += m.clamped_samples;
                samples += m.samples;
                w.zener_peak_current = w.zener_peak_current.max(m.zener_peak_current);
                w.positive_peak_watts = w.positive_peak_watts.max(m.positive_part_peak_watts);
                w.negative_peak_watts = w.negative_peak_watts.max(m.negative_part_peak_watts);
                let (a, b) = m.average_watts();
                w.positive_average_watts = w.positive_average_watts.max(a);
                w.negative_average_watts = w.negative_average_watts.max(b);
            }
        }
        (samples > 0).then(|| MeterWindow {
            share_clamped: clamped as f64 / samples as f64,
            ..w
        })
    }
}

// ---------------------------------------------------------------------------------------------------------
// The cabinet

/// Which cabinet the chain ends in, as the audio thread asks for it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CabinetSpec {
    /// No cabinet: the chain ends at the tone stack's output.
    None,
    BuiltIn,
    /// The session's impulse response with this id (`Session::ir_id`, never 0).
    Loaded(u32),
}

impl CabinetSpec {
    /// The cabinet for the choice `choice` when the session's response has id `ir` (0: none loaded, and the
    /// `loaded` choice plays the built-in response).
    pub fn of(choice: CabinetChoice, ir: u32) -> CabinetSpec {
        match choice {
            CabinetChoice::None => CabinetSpec::None,
            CabinetChoice::BuiltIn => CabinetSpec::BuiltIn,
            CabinetChoice::Loaded if ir == 0 => CabinetSpec::BuiltIn,
            CabinetChoice::Loaded => CabinetSpec::Loaded(ir),
        }
    }

    fn pack(self) -> u64 {
        match self {
            CabinetSpec::None => 0,
            CabinetSpec::BuiltIn => 1,
            CabinetSpec::Loaded(id) => (2 << 32) | id as u64,
        }
    }

    fn unpack(word: u64) -> CabinetSpec {
        match word >> 32 {
            2 => CabinetSpec::Loaded(word as u32),
            _ if word == 1 => CabinetSpec::BuiltIn,
            _ => CabinetSpec::None,
        }
    }

    /// For the editor: 0 none, 1 built-in, 2 loaded.
    pub fn kind(self) -> u32 {
        match self {
            CabinetSpec::None => 0,
            CabinetSpec::BuiltIn => 1,
            CabinetSpec::Loaded(_) => 2,
        }
    }
}

/// A prepared cabinet and what it was built for (built off the audio thread).
pub struct CabinetBuild {
    pub spec: CabinetSpec,
    pub sample_rate: f64,
    pub channels: usize,
    pub cabinet: Cabinet,
}

impl CabinetBuild {
    /// Build the cabinet of `spec` (not `None`) at `sample_rate` for `channels` signal channels; a `Loaded`
    /// spec needs the response `ir` (allocates: off the audio thread).
    pub fn new(
        spec: CabinetSpec,
        ir: Option<&breakdown_dsp::cabinet::ImpulseResponse>,
        sample_rate: f64,
        channels: usize,
    ) -> Result<Box<CabinetBuild>, String> {
        let cabinet = match (spec, ir) {
            (CabinetSpec::None, _) => return Err("no cabinet to build for 'none'".into()),
            (CabinetSpec::BuiltIn, _) => Cabinet::builtin(sample_rate, channels),
            (CabinetSpec::Loaded(_), Some(ir)) => Cabinet::new(ir, sample_rate, channels),
            (CabinetSpec::Loaded(_), None) => {
                return Err("the session's impulse response is no longer there".into())
            }
        }
        .map_err(|e| e.to_string())?;
        Ok(Box::new(CabinetBuild {
            spec,
            sample_rate,
            channels,
            cabinet,
        }))
    }
}

/// The cabinet at run time: the one playing (None: no cabinet) and one fading in over it.
struct CabinetStage {
    current: Option<Box<CabinetBuild>>,
    /// Some while a change fades in: Some(None) fades to no cabinet.
    next: Option<Option<Box<CabinetBuild>>>,
    fade: usize,
    wanted: CabinetSpec,
    bin: [Option<Box<CabinetBuild>>; BIN],
}

impl CabinetStage {
    fn spec(&self) -> CabinetSpec {
        self.current.as_ref().map_or(CabinetSpec::None, |c| c.spec)
    }
    fn bin_room(&self) -> usize {
        self.bin.iter().filter(|b| b.is_none()).count()
    }
    fn retire(&mut self, b: Box<CabinetBuild>) {
        if let Some(place) = self.bin.iter_mut().find(|b| b.is_none()) {
            *place = Some(b);
        } else {
            // Never reached: callers check bin_room first. Keep it rather than free on the audio thread.
            std::mem::forget(b);
        }
    }
    fn flush_bin(&mut self, returns: &Mailbox<CabinetBuild>) -> bool {
        for place in self.bin.iter_mut() {
            if let Some(b) = place.take() {
                if let Err(b) = returns.offer(b) {
                    *place = Some(b);
                    return true;
                }
            }
        }
        false
    }
    /// Start fading to `to` (a change already fading is retired first; the bin has room for both). Already
    /// fading to no cabinet, a second "none" lets that fade go on.
    fn fade_to(&mut self, to: Option<Box<CabinetBuild>>) {
        if to.is_none() && matches!(self.next, Some(None)) {
            return;
        }
        if let Some(Some(old)) = self.next.take() {
            self.retire(old);
        }
        self.next = Some(to);
        self.fade = 0;
    }
    fn reset(&mut self) {
        if let Some(c) = self.current.as_mut() {
            c.cabinet.reset();
        }
        if let Some(Some(c)) = self.next.as_mut() {
            c.cabinet.reset();
        }
    }

    /// One sample through the cabinet (`[left, right]`; a mono signal is `input[0]`, and without a cabinet it
    /// comes out on both sides), fading to the next one when there is one. True in the second value when a
    /// fade finished (the worker has something to free).
    #[inline]
    fn process(&mut self, input: [f64; 2], mono: bool, fade_len: usize) -> ([f64; 2], bool) {
        let bare = if mono { [input[0], input[0]] } else { input };
        let run = |c: &mut Option<Box<CabinetBuild>>| match c {
            Some(c) => c.cabinet.process(input),
            None => bare,
        };
        let a = run(&mut self.current);
        let Some(next) = self.next.as_mut() else {
            return (a, false);
        };
        let b = run(next);
        let w = fade_weight(self.fade as f64 / fade_len as f64);
        let y = [a[0] + (b[0] - a[0]) * w, a[1] + (b[1] - a[1]) * w];
        self.fade += 1;
        let mut finished = false;
        if self.fade >= fade_len {
            if let Some(to) = self.next.take() {
                if let Some(old) = std::mem::replace(&mut self.current, to) {
                    self.retire(old);
                }
            }
            self.fade = 0;
            finished = true;
        }
        (y, finished)
    }
}

// ---------------------------------------------------------------------------------------------------------
// Hand-over between the audio thread and the worker

/// Single-slot lock-free exchange of a boxed model set (or a prepared cabinet).
pub struct Mailbox<T = Models> {
    slot: AtomicPtr<T>,
}

impl<T> Default for Mailbox<T> {
    fn default() -> Self {
        Mailbox {
            slot: AtomicPtr::new(ptr::null_mut()),
        }
    }
}

impl<T> Mailbox<T> {
    /// Put `b` in, returning what was there (worker side; the caller frees it).
    pub fn replace(&self, b: Box<T>) -> Option<Box<T>> {
        let old = self.slot.swap(Box::into_raw(b), Ordering::AcqRel);
        // SAFETY: every non-null pointer in the slot came from Box::into_raw and is owned by the slot.
        (!old.is_null()).then(|| unsafe { Box::from_raw(old) })
    }
    /// Put `b` in only if the slot is empty (audio side: never frees).
    pub fn offer(&self, b: Box<T>) -> Result<(), Box<T>> {
        let raw = Box::into_raw(b);
        match self
            .slot
            .compare_exchange(ptr::null_mut(), raw, Ordering::AcqRel, Ordering::Acquire)
        {
            Ok(_) => Ok(()),
            // SAFETY: the exchange failed, so we still own `raw`.
            Err(_) => Err(unsafe { Box::from_raw(raw) }),
        }
    }
    /// Take what is there.
    pub fn take(&self) -> Option<Box<T>> {
        let old = self.slot.swap(ptr::null_mut(), Ordering::AcqRel);
        // SAFETY: as in `replace`.
        (!old.is_null()).then(|| unsafe { Box::from_raw(old) })
    }
}

impl<T> Drop for Mailbox<T> {
    fn drop(&mut self) {
        drop(self.take());
    }
}

/// The spec a slot should run, as the audio thread last asked for it (atomics only).
#[derive(Default)]
struct Request {
    /// 0 idle, 1 a circuit position, 2 the candidate.
    kind: AtomicUsize,
    index: AtomicUsize,
    positive: AtomicF64,
    negative: AtomicF64,
    family: AtomicUsize,
    factor: AtomicUsize,
    circuit: AtomicU32,
    generation: AtomicU32,
}

/// Builds models off the audio thread, for the session's running circuit.
pub struct Worker {
    session: Arc<Session>,
    requests: [Request; SLOTS],
    pub incoming: [Mailbox; SLOTS],
    pub returns: [Mailbox; SLOTS],
    sample_rate: AtomicF64,
    channels: AtomicUsize,
    pots: [AtomicF64; 5],
    calibration: AtomicF64,
    /// The slot has its loudness meter (set by the audio thread); the worker adds one to a slot's models
    /// until it has.
    metered: [AtomicBool; SLOTS],
    built_generation: Mutex<[u32; SLOTS]>,
    /// The cabinet asked for (`CabinetSpec::pack`) and its request count.
    cabinet_request: AtomicU64,
    cabinet_generation: AtomicU32,
    cabinet_built: AtomicU32,
    pub cabinet_incoming: Mailbox<CabinetBuild>,
    pub cabinet_returns: Mailbox<CabinetBuild>,
}

impl Default for Worker {
    fn default() -> Self {
        Worker::new(Arc::new(Session::default()))
    }
}

impl Worker {
    pub fn new(session: Arc<Session>) -> Worker {
        let pots = Pots::default();
        Worker {
            session,
            requests: Default::default(),
            incoming: Default::default(),
            returns: Default::default(),
            sample_rate: AtomicF64::new(48_000.0),
            channels: AtomicUsize::new(1),
            pots: [pots.gain, pots.level, pots.treble, pots.middle, pots.bass].map(AtomicF64::new),
            calibration: AtomicF64::new(1.0),
            metered: Default::default(),
            built_generation: Mutex::new([0; SLOTS]),
            cabinet_request: AtomicU64::new(CabinetSpec::BuiltIn.pack()),
            cabinet_generation: AtomicU32::new(0),
            cabinet_built: AtomicU32::new(0),
            cabinet_incoming: Mailbox::default(),
            cabinet_returns: Mailbox::default(),
        }
    }

    pub fn session(&self) -> &Arc<Session> {
        &self.session
    }

    /// Ask for `spec` at `slot` (audio thread: atomics only).
    fn request(&self, slot: usize, spec: SlotSpec, controls: &Controls) {
        let r = &self.requests[slot];
        let (kind, index, p, n, family) = match spec.source {
            Source::Idle => (0, 0, 0.0, 0.0, 0),
            Source::Position(k) => (1, k, 0.0, 0.0, 0),
            Source::Candidate(c) => (2, 0, c.positive, c.negative, c.family as usize),
        };
        r.kind.store(kind, Ordering::Relaxed);
        r.index.store(index, Ordering::Relaxed);
        r.positive.store(p, Ordering::Relaxed);
        r.negative.store(n, Ordering::Relaxed);
        r.family.store(family, Ordering::Relaxed);
        r.factor.store(spec.quality.factor(), Ordering::Relaxed);
        r.circuit.store(spec.circuit, Ordering::Relaxed);
        let p = &controls.pots;
        for (a, v) in self
            .pots
            .iter()
            .zip([p.gain, p.level, p.treble, p.middle, p.bass])
        {
            a.store(v, Ordering::Relaxed);
        }
        self.calibration
            .store(controls.calibration, Ordering::Relaxed);
        r.generation.fetch_add(1, Ordering::Release);
    }

    /// Ask for the cabinet `spec` (audio thread: atomics only).
    fn request_cabinet(&self, spec: CabinetSpec) {
        self.cabinet_request.store(spec.pack(), Ordering::Relaxed);
        self.cabinet_generation.fetch_add(1, Ordering::Release);
    }

    /// Build the cabinet asked for, if a new one was (background thread, under the build lock).
    fn service_cabinet(&self) -> bool {
        drop(self.cabinet_returns.take());
        let generation = self.cabinet_generation.load(Ordering::Acquire);
        if generation == self.cabinet_built.load(Ordering::Relaxed) {
            return false;
        }
        self.cabinet_built.store(generation, Ordering::Relaxed);
        let spec = CabinetSpec::unpack(self.cabinet_request.load(Ordering::Relaxed));
        let (id, ir) = self.session.ir();
        match spec {
            CabinetSpec::None => return true,
            // Asked for a response that is no longer running: the audio thread asks again.
            CabinetSpec::Loaded(want) if want != id => return true,
            _ => {}
        }
        match CabinetBuild::new(
            spec,
            ir.as_deref(),
            self.sample_rate.load(Ordering::Relaxed),
            self.channels.load(Ordering::Relaxed),
        ) {
            Ok(b) => drop(self.cabinet_incoming.replace(b)),
            Err(e) => {
                nice_plug::nice_warn!("Breakdown: could not build the cabinet: {e}");
                self.session.set_ir_problem(
                    id,
                    format!("the cabinet could not be built at this session's rate: {e}"),
                );
            }
        }
        true
    }

    fn requested(&self, slot: usize) -> SlotSpec {
        let r = &self.requests[slot];
        let source = match r.kind.load(Ordering::Relaxed) {
            1 => Source::Position(r.index.load(Ordering::Relaxed)),
            2 => Source::Candidate(Candidate {
                positive: r.positive.load(Ordering::Relaxed),
                negative: r.negative.load(Ordering::Relaxed),
                family: if r.family.load(Ordering::Relaxed) == FamilyChoice::HalfWatt as usize {
                    FamilyChoice::HalfWatt
                } else {
                    FamilyChoice::OneWatt
                },
            }),
            _ => Source::Idle,
        };
        SlotSpec {
            circuit: r.circuit.load(Ordering::Relaxed),
            source,
            quality: Quality::from_factor(r.factor.load(Ordering::Relaxed)).unwrap_or_default(),
        }
    }

    fn pots(&self) -> Pots {
        let [gain, level, treble, middle, bass] =
            self.pots.each_ref().map(|a| a.load(Ordering::Relaxed));
        Pots {
            gain,
            level,
            treble,
            middle,
            bass,
        }
    }

    /// Bring the session's circuit up to date, build whatever was asked for and free what came back
    /// (background thread).
    pub fn service(&self) {
        self.session.refresh();
        let Ok(mut built) = self.built_generation.lock() else {
            return;
        };
        loop {
            for returns in &self.returns {
                drop(returns.take());
            }
            let mut worked = self.service_cabinet();
            for slot in 0..SLOTS {
                let generation = self.requests[slot].generation.load(Ordering::Acquire);
                if generation == built[slot] {
                    continue;
                }
                built[slot] = generation;
                worked = true;
                let spec = self.requested(slot);
                let (id, circuit) = self.session.circuit();
                if spec.source == Source::Idle || spec.circuit != id {
                    // Asked for a circuit that is no longer running: the audio thread asks again for the
                    // running one as soon as it sees it.
                    continue;
                }
                match Models::new(
                    spec,
                    &circuit,
                    self.sample_rate.load(Ordering::Relaxed),
                    self.channels.load(Ordering::Relaxed),
                    &self.pots(),
                    self.calibration.load(Ordering::Relaxed),
                )
                .and_then(|b| {
                    if self.metered[slot].load(Ordering::Acquire) {
                        Ok(b)
                    } else {
                        b.with_meter()
                    }
                }) {
                    Ok(b) => drop(self.incoming[slot].replace(b)),
                    Err(e) => nice_plug::nice_warn!("Breakdown: could not build a model: {e}"),
                }
            }
            if !worked {
                break;
            }
        }
    }

    /// Forget pending requests and set the rate and channel count for new builds (activation, not real-time).
    fn restart(&self, sample_rate: f64, channels: usize) {
        self.sample_rate.store(sample_rate, Ordering::Relaxed);
        self.channels.store(channels, Ordering::Relaxed);
        let mut built = self
            .built_generation
            .lock()
            .unwrap_or_else(|e| e.into_inner());
        for slot in 0..SLOTS {
            built[slot] = self.requests[slot].generation.load(Ordering::Acquire);
            drop(self.incoming[slot].take());
            drop(self.returns[slot].take());
            self.metered[slot].store(false, Ordering::Release);
        }
        self.cabinet_built.store(
            self.cabinet_generation.load(Ordering::Acquire),
            Ordering::Relaxed,
        );
        drop(self.cabinet_incoming.take());
        drop(self.cabinet_returns.take());
    }
}

// ---------------------------------------------------------------------------------------------------------
// The processor

/// Raised-cosine crossfade weight for fade position `t` in 0..=1.
#[inline]
fn fade_weight(t: f64) -> f64 {
    0.5 - 0.5 * (std::f64::consts::PI * t.clamp(0.0, 1.0)).cos()
}

/// One compared slot at run time.
struct Slot {
    current: Option<Box<Models>>,
    /// A rebuilt set fading in over `current` (from silence when there is no current).
    next: Option<Box<Models>>,
    fade: usize,
    wanted: SlotSpec,
    bin: [Option<Box<Models>>; BIN],
    /// None until the slot's first models brought one.
    loudness: Option<Box<ShortTerm>>,
    match_gain: Glide,
    /// Per channel: the listening points and clamp volts of the last sample.
    out: [Point; 2],
    /// Running this block.
    active: bool,
    /// The parts shown changed (publish after the block).
    changed: bool,
}

impl Slot {
    fn bin_room(&self) -> usize {
        self.bin.iter().filter(|b| b.is_none()).count()
    }
    fn retire(&mut self, b: Box<Models>) {
        if let Some(place) = self.bin.iter_mut().find(|b| b.is_none()) {
            *place = Some(b);
        } else {
            // Never reached: callers check bin_room first. Keep it rather than free on the audio thread.
            std::mem::forget(b);
        }
    }
    /// Hand retired models to the worker; true if some are still waiting.
    fn flush_bin(&mut self, returns: &Mailbox) -> bool {
        for place in self.bin.iter_mut() {
            if let Some(b) = place.take() {
                if let Err(b) = returns.offer(b) {
                    *place = Some(b);
                    return true;
                }
            }
        }
        false
    }
    fn models_mut(&mut self) -> impl Iterator<Item = &mut Models> {
        self.current
            .iter_mut()
            .chain(self.next.iter_mut())
            .map(|b| b.as_mut())
    }
    fn has_models(&self) -> bool {
        self.current.is_some() || self.next.is_some()
    }
    /// Restart from rest: silent history, a new loudness window.
    fn restart(&mut self) {
        for m in self.models_mut() {
            m.reset();
        }
        if let Some(l) = self.loudness.as_mut() {
            l.reset();
        }
        self.out = [Point::default(); 2];
    }
}

/// What the plugin wrapper must do after a block.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct BlockActions {
    /// Wake the background worker (a circuit to read, models to build or to free).
    pub service_worker: bool,
    /// New latency to report to the host.
    pub latency: Option<u32>,
}

/// The listening point's crossfade: weights of the points (`listen_index`), moving from `from` to the one
/// `to` over the fade (a change during a fade starts from where the weights are, so they stay continuous and
/// sum to 1).
#[derive(Clone, Copy, Debug)]
struct ListenFade {
    from: [f64; 3],
    to: usize,
    step: usize,
}

impl ListenFade {
    fn at(point: ListenPoint, fade_len: usize) -> ListenFade {
        let to = listen_index(point);
        let mut from = [0.0; 3];
        from[to] = 1.0;
        ListenFade {
            from,
            to,
            step: fade_len,
        }
    }
    fn weights(&self, fade_len: usize) -> [f64; 3] {
        let mut w = [0.0; 3];
        if self.step >= fade_len {
            w[self.to] = 1.0;
            return w;
        }
        let t = fade_weight(self.step as f64 / fade_len as f64);
        for (k, wk) in w.iter_mut().enumerate() {
            let target = if k == self.to { 1.0 } else { 0.0 };
            *wk = self.from[k] + (target - self.from[k]) * t;
        }
        w
    }
    fn retarget(&mut self, point: ListenPoint, fade_len: usize) {
        let to = listen_index(point);
        if to != self.to {
            self.from = self.weights(fade_len);
            self.to = to;
            self.step = 0;
        }
    }
    fn advance(&mut self, fade_len: usize) {
        if self.step < fade_len {
            self.step += 1;
        }
    }
}

/// The real-time processor for one activation (sample rate, channel layout).
pub struct Processor {
    sample_rate: f64,
    channels: usize,
    slots: Box<[Slot; SLOTS]>,
    /// The running circuit the slots follow.
    key: CircuitKey,
    seen_revision: u32,
    heard: usize,
    previous: usize,
    heard_fade: usize,
    fade_len: usize,
    listen: ListenFade,
    /// The listening points' weights for the sample being processed.
    weights: [f64; 3],
    cabinet: CabinetStage,
    /// The cabinet was fed last sample (it is fed silence while the chain is not heard).
    cabinet_fed: bool,
    calibration: Glide,
    trim: Glide,
    tone: [Glide; 3],
    level_match: bool,
    latency: u32,
    meter_countdown: usize,
    /// Set by `reset`: the first block starts at rest at its own control values (hosts often deliver the
    /// parameter values of a fresh start in the first block rather than before it).
    fresh: bool,
    worker: Arc<Worker>,
    shared: Arc<Shared>,
}

impl Processor {
    /// Build every slot's models for `controls` on the session's circuit (allocates: call from activation,
    /// not from the audio thread).
    pub fn new(
        sample_rate: f64,
        channels: usize,
        controls: &Controls,
        worker: Arc<Worker>,
        shared: Arc<Shared>,
    ) -> Result<Processor, String> {
        let channels = channels.clamp(1, 2);
        worker.restart(sample_rate, channels);
        let session = worker.session().clone();
        session.refresh();
        let (id, circuit) = session.circuit();
        let key = CircuitKey {
            id,
            positions: circuit.clamp.position.len(),
        };
        let mut slots = Vec::with_capacity(SLOTS);
        for s in 0..SLOTS {
            let spec = slot_spec(s, key, controls);
            let mut current = match spec.source {
                Source::Idle => None,
                _ => Some(
                    Models::new(
                        spec,
                        &circuit,
                        sample_rate,
                        channels,
                        &controls.pots,
                        controls.calibration,
                    )?
                    .with_meter()?,
                ),
            };
            let loudness = current.as_mut().and_then(|m| m.meter.take());
            worker.metered[s].store(loudness.is_some(), Ordering::Release);
            slots.push(Slot {
                current,
                next: None,
                fade: 0,
                wanted: spec,
                bin: Default::default(),
                loudness,
                match_gain: Glide::new(1.0, MATCH_GLIDE_SECONDS, sample_rate),
                out: [Point::default(); 2],
                active: true,
                changed: true,
            });
        }
        let slots: Box<[Slot; SLOTS]> = match slots.into_boxed_slice().try_into() {
            Ok(s) => s,
            Err(_) => return Err("internal: wrong number of slots".into()),
        };
        let fade_len = ((FADE_SECONDS * sample_rate).round() as usize).max(1);
        let heard = key.slot_of(controls.heard_value());
        let latency = slots
            .iter()
            .find_map(|s| s.current.as_ref().map(|m| m.latency()))
            .unwrap_or(0);
        let glide = |v: f64| Glide::new(v, CONTROL_GLIDE_SECONDS, sample_rate);
        let p = &controls.pots;
        let wanted = CabinetSpec::of(controls.cabinet, session.ir_id());
        let (ir_id, ir) = session.ir();
        let current = match wanted {
            CabinetSpec::None => None,
            CabinetSpec::Loaded(id) if id != ir_id => Some(CabinetBuild::new(
                CabinetSpec::BuiltIn,
                None,
                sample_rate,
                channels,
            )?),
            spec => match CabinetBuild::new(spec, ir.as_deref(), sample_rate, channels) {
                Ok(b) => Some(b),
                Err(e) => {
                    // Keep playing: the built-in cabinet, with the reason shown in the editor.
                    session.set_ir_problem(
                        ir_id,
                        format!("the cabinet could not be built at this session's rate: {e}"),
                    );
                    Some(CabinetBuild::new(
                        CabinetSpec::BuiltIn,
                        None,
                        sample_rate,
                        channels,
                    )?)
                }
            },
        };
        let cabinet = CabinetStage {
            current,
            next: None,
            fade: 0,
            wanted,
            bin: Default::default(),
        };
        let mut processor = Processor {
            sample_rate,
            channels,
            slots,
            key,
            seen_revision: session.revision(),
            heard,
            previous: heard,
            heard_fade: fade_len,
            fade_len,
            listen: ListenFade::at(controls.listen, fade_len),
            weights: ListenFade::at(controls.listen, fade_len).weights(fade_len),
            cabinet,
            cabinet_fed: false,
            calibration: glide(controls.calibration),
            trim: glide(db_to_gain(controls.trim_db)),
            tone: [glide(p.treble), glide(p.middle), glide(p.bass)],
            level_match: controls.level_match,
            latency,
            meter_countdown: 0,
            fresh: true,
            worker,
            shared,
        };
        processor.publish_static();
        Ok(processor)
    }

    /// Latency in samples (the oversampling filters of the models heard).
    pub fn latency(&self) -> u32 {
        self.latency
    }

    /// Models per slot (one per input channel).
    pub fn channels(&self) -> usize {
        self.channels
    }

    pub fn sample_rate(&self) -> f64 {
        self.sample_rate
    }

    /// The cabinet playing (the one fading in while a change fades).
    pub fn cabinet_spec(&self) -> CabinetSpec {
        match &self.cabinet.next {
            Some(Some(b)) => b.spec,
            Some(None) => CabinetSpec::None,
            None => self.cabinet.spec(),
        }
    }

    /// The runtime slot heard (a position index or CANDIDATE).
    pub fn heard(&self) -> usize {
        self.heard
    }

    /// Back to the operating point of `controls` with silent history, no glides pending (real-time safe).
    pub fn reset(&mut self, controls: &Controls) {
        for slot in self.slots.iter_mut() {
            for m in slot.models_mut() {
                m.set_pots(&controls.pots);
            }
            slot.restart();
        }
        self.heard = self.key.slot_of(controls.heard_value());
        self.previous = self.heard;
        self.heard_fade = self.fade_len;
        self.listen = ListenFade::at(controls.listen, self.fade_len);
        self.weights = self.listen.weights(self.fade_len);
        self.cabinet.reset();
        self.cabinet_fed = false;
        self.calibration.jump(controls.calibration);
        self.trim.jump(db_to_gain(controls.trim_db));
        let p = &controls.pots;
        for (g, v) in self.tone.iter_mut().zip([p.treble, p.middle, p.bass]) {
            g.jump(v);
        }
        self.fresh = true;
    }

    /// Process one block in place. `channels[..models]` hold the input; every channel receives the output (a
    /// mono model feeds all output channels).
    pub fn process(&mut self, controls: &Controls, channels: &mut [&mut [f32]]) -> BlockActions {
        let mut actions = BlockActions::default();
        if self.fresh {
            self.reset(controls);
            self.fresh = false;
        }
        self.follow_session(&mut actions);
        self.exchange(controls, &mut actions);
        let frames = channels.iter().map(|c| c.len()).min().unwrap_or(0);
        if frames == 0 {
            return actions;
        }
        self.follow_switch(controls);
        self.choose_running(controls);
        self.set_targets(controls);
        let _guard = breakdown_dsp::denormals::FlushGuard::new();
        for n in 0..frames {
            let inputs = self.read_frame(channels, n);
            self.step_glides();
            self.run_slots(&inputs, &mut actions);
            let y = self.mix_heard(&mut actions);
            self.write_frame(channels, n, y);
        }
        self.finish_block(frames, &mut actions);
        actions
    }

    /// Notice a changed session (wake the worker to read it) and follow the running circuit.
    fn follow_session(&mut self, actions: &mut BlockActions) {
        let session = self.worker.session();
        let revision = session.revision();
        if revision != self.seen_revision {
            self.seen_revision = revision;
            actions.service_worker = true;
        }
        self.key = session.key();
    }

    /// Pick up rebuilt models, ask for new ones, hand back retired ones.
    fn exchange(&mut self, controls: &Controls, actions: &mut BlockActions) {
        for s in 0..SLOTS {
            let want = slot_spec(s, self.key, controls);
            let slot = &mut self.slots[s];
            if want != slot.wanted {
                slot.wanted = want;
                if want.source != Source::Idle {
                    self.worker.request(s, want, controls);
                    actions.service_worker = true;
                }
            }
            if slot.bin_room() >= 2 {
                if let Some(b) = self.worker.incoming[s].take() {
                    let fits = b.spec == slot.wanted
                        && b.sample_rate == self.sample_rate
                        && b.channels() == self.channels;
                    if !fits {
                        slot.retire(b);
                    } else {
                        if let Some(old_next) = slot.next.take() {
                            slot.retire(old_next);
                        }
                        let mut b = b;
                        if slot.loudness.is_none() {
                            slot.loudness = b.meter.take();
                            self.worker.metered[s]
                                .store(slot.loudness.is_some(), Ordering::Release);
                        }
                        slot.next = Some(b);
                        slot.fade = 0;
                    }
                }
            }
            // A slot the running circuit no longer has: free its models once nothing plays them.
            if slot.wanted.source == Source::Idle && !slot.active && slot.bin_room() >= 2 {
                if let Some(b) = slot.current.take() {
                    slot.retire(b);
                    slot.changed = true;
                }
                if let Some(b) = slot.next.take() {
                    slot.retire(b);
                }
            }
            actions.service_worker |= slot.flush_bin(&self.worker.returns[s]);
            let rebuilding = slot.wanted.source != Source::Idle
                && slot.current.as_ref().map(|m| m.spec) != Some(slot.wanted);
            self.shared.slots[s]
                .rebuilding
                .store(rebuilding, Ordering::Relaxed);
        }
        self.exchange_cabinet(controls, actions);
    }

    /// Pick up a prepared cabinet, ask for a new one, hand back retired ones. "None" needs no build: it
    /// fades to the bare tone stack output at once.
    fn exchange_cabinet(&mut self, controls: &Controls, actions: &mut BlockActions) {
        let want = CabinetSpec::of(controls.cabinet, self.worker.session().ir_id());
        let stage = &mut self.cabinet;
        if want != stage.wanted && stage.bin_room() >= 2 {
            stage.wanted = want;
            if want == CabinetSpec::None {
                if stage.current.is_some() || matches!(stage.next, Some(Some(_))) {
                    stage.fade_to(None);
                }
            } else {
                self.worker.request_cabinet(want);
                actions.service_worker = true;
            }
        }
        if stage.bin_room() >= 2 {
            if let Some(b) = self.worker.cabinet_incoming.take() {
                let fits = b.spec == stage.wanted
                    && b.sample_rate == self.sample_rate
                    && b.channels == self.channels;
                if fits {
                    stage.fade_to(Some(b));
                } else {
                    stage.retire(b);
                }
            }
        }
        actions.service_worker |= stage.flush_bin(&self.worker.cabinet_returns);
        let running = self.cabinet_spec();
        let (kind, ir) = match running {
            CabinetSpec::Loaded(id) => (2, id),
            other => (other.kind(), 0),
        };
        self.shared.cabinet_kind.store(kind, Ordering::Relaxed);
        self.shared.cabinet_ir.store(ir, Ordering::Relaxed);
        self.shared
            .cabinet_pending
            .store(want != running, Ordering::Relaxed);
    }

    /// A new heard slot starts a crossfade from the one heard before.
    fn follow_switch(&mut self, controls: &Controls) {
        let heard = self.key.slot_of(controls.heard_value());
        if heard != self.heard {
            self.previous = self.heard;
            self.heard = heard;
            self.heard_fade = 0;
        }
    }

    /// Which slots run this block: all with run-all, else the heard, the compare-with and the one fading out.
    /// A slot that starts running again restarts from rest (its history is stale).
    fn choose_running(&mut self, controls: &Controls) {
        let fading_from = (self.heard_fade < self.fade_len).then_some(self.previous);
        let compare = self.key.slot_of(controls.compare_with);
        for (s, slot) in self.slots.iter_mut().enumerate() {
            let wanted = slot.wanted.source != Source::Idle
                && (controls.run_all || s == self.heard || s == compare);
            let active = slot.has_models() && (wanted || Some(s) == fading_from);
            if active && !slot.active {
                slot.restart();
            }
            slot.active = active;
        }
    }

    /// Hand the pots to the running models and set the glides' targets for the block.
    fn set_targets(&mut self, controls: &Controls) {
        let p = &controls.pots;
        for (g, v) in self.tone.iter_mut().zip([p.treble, p.middle, p.bass]) {
            g.set_target(v);
        }
        let pots = Pots {
            treble: self.tone[0].value(),
            middle: self.tone[1].value(),
            bass: self.tone[2].value(),
            ..*p
        };
        for slot in self.slots.iter_mut().filter(|s| s.active) {
            for m in slot.models_mut() {
                m.set_pots(&pots);
            }
        }
        if controls.calibration.is_finite() && controls.calibration > 0.0 {
            self.calibration.set_target(controls.calibration);
        }
        self.trim.set_target(db_to_gain(controls.trim_db));
        self.level_match = controls.level_match;
        self.listen.retarget(controls.listen, self.fade_len);
        self.shared
            .listen_point
            .store(listen_index(controls.listen) as u32, Ordering::Relaxed);
    }

    fn read_frame(&self, channels: &[&mut [f32]], n: usize) -> [f32; 2] {
        let mut inputs = [0.0f32; 2];
        for (c, x) in inputs
            .iter_mut()
            .enumerate()
            .take(self.channels.min(channels.len()))
        {
            *x = channels[c][n];
        }
        inputs
    }

    /// One step of every glide and of the listening point's crossfade.
    fn step_glides(&mut self) {
        self.calibration.step();
        self.trim.step();
        for g in self.tone.iter_mut() {
            g.step();
        }
        self.listen.advance(self.fade_len);
        self.weights = self.listen.weights(self.fade_len);
    }

    /// One sample through every running slot (with the fade-in of rebuilt models), its loudness and match gain.
    fn run_slots(&mut self, inputs: &[f32; 2], actions: &mut BlockActions) {
        let calibration = self.calibration.value();
        let mut new_window = false;
        for s in 0..SLOTS {
            let slot = &mut self.slots[s];
            if !slot.active {
                continue;
            }
            let w = if slot.next.is_some() {
                fade_weight(slot.fade as f64 / self.fade_len as f64)
            } else {
                0.0
            };
            let mut out = match slot.current.as_mut() {
                Some(m) => m.process(inputs, calibration),
                None => [Point::default(); 2],
            };
            if let Some(next) = slot.next.as_mut() {
                let q = next.process(inputs, calibration);
                for (p, q) in out.iter_mut().zip(q).take(self.channels) {
                    for (a, b) in p.points.iter_mut().zip(q.points) {
                        *a += (b - *a) * w;
                    }
                    p.clamp_volts += (q.clamp_volts - p.clamp_volts) * w;
                }
            }
            slot.out[..self.channels].copy_from_slice(&out[..self.channels]);
            if slot.next.is_some() {
                slot.fade += 1;
                if slot.fade >= self.fade_len {
                    if let Some(old) = std::mem::replace(&mut slot.current, slot.next.take()) {
                        slot.retire(old);
                    }
                    slot.fade = 0;
                    slot.changed = true;
                    actions.service_worker = true;
                }
            }
            if let Some(l) = slot.loudness.as_mut() {
                // The listening point before the cabinet (the cabinet is normalised to unit loudness in its
                // band, and is the same for every position).
                let p = slot.out[0].points;
                let v = self.weights[0] * p[0] + self.weights[1] * p[1] + self.weights[2] * p[2];
                new_window |= l.push(v);
            }
            slot.match_gain.step();
        }
        if new_window {
            self.update_match();
        }
    }

    /// The heard slot's output (crossfaded from the previous one while the switch moves), level-matched, at
    /// the listening point (the chain through the cabinet), trimmed, as `[left, right]` (a mono signal gives
    /// both, equal unless a stereo response makes them differ); also feeds the editor's scope and spectrum.
    fn mix_heard(&mut self, actions: &mut BlockActions) -> [f64; 2] {
        let w = if self.heard_fade < self.fade_len {
            self.heard_fade += 1;
            fade_weight(self.heard_fade as f64 / self.fade_len as f64)
        } else {
            self.previous = self.heard;
            1.0
        };
        let (a, b) = (&self.slots[self.heard], &self.slots[self.previous]);
        // Per channel, the three listening points of the heard mix.
        let mut points = [[0.0f64; 3]; 2];
        for (c, pc) in points.iter_mut().enumerate().take(self.channels) {
            for (k, v) in pc.iter_mut().enumerate() {
                let ya = a.out[c].points[k] * a.match_gain.value();
                *v = if self.previous == self.heard {
                    ya
                } else {
                    let yb = b.out[c].points[k] * b.match_gain.value();
                    yb + (ya - yb) * w
                };
            }
        }
        let scope = a.out[0].clamp_volts;
        let mono = self.channels == 1;
        if mono {
            points[1] = points[0];
        }
        let weights = self.weights;
        // The cabinet runs while the chain is heard (or fading in or out), and while a cabinet change fades.
        let feed = weights[0] > 0.0;
        let input = if feed {
            [points[0][0], points[1][0]]
        } else {
            [0.0, 0.0]
        };
        // A cabinet left unfed keeps its tail: clear it (no allocation) before it is fed again.
        if feed && !self.cabinet_fed {
            self.cabinet.reset();
        }
        let (cabinet, finished) = if feed || self.cabinet.next.is_some() {
            self.cabinet.process(input, mono, self.fade_len)
        } else {
            ([0.0, 0.0], false)
        };
        self.cabinet_fed = feed;
        actions.service_worker |= finished;
        let trim = self.trim.value();
        let mut y = [0.0f64; 2];
        for (c, yc) in y.iter_mut().enumerate() {
            let p = &points[c];
            *yc = weights[0] * cabinet[c] + weights[1] * p[1] + weights[2] * p[2];
        }
        self.shared.scope.push(scope as f32);
        self.shared.listen.push(y[0] as f32);
        [y[0] * trim, y[1] * trim]
    }

    fn write_frame(&self, channels: &mut [&mut [f32]], n: usize, y: [f64; 2]) {
        for (c, ch) in channels.iter_mut().enumerate() {
            let v = y[c.min(1)];
            ch[n] = if v.is_finite() { v as f32 } else { 0.0 };
        }
    }

    /// New loudness readings: publish them and steer every slot's match gain toward the quietest.
    fn update_match(&mut self) {
        let level_match = self.level_match;
        let mut loudness = [f64::NEG_INFINITY; SLOTS];
        for (s, slot) in self.slots.iter().enumerate() {
            if slot.active {
                loudness[s] = slot
                    .loudness
                    .as_ref()
                    .map_or(f64::NEG_INFINITY, |l| l.lufs());
                self.shared.slots[s]
                    .loudness
                    .store(loudness[s] as f32, Ordering::Relaxed);
            }
        }
        let reference = loudness
            .iter()
            .copied()
            .filter(|l| *l > MATCH_GATE_LUFS)
            .fold(f64::INFINITY, f64::min);
        for (s, slot) in self.slots.iter_mut().enumerate() {
            if !level_match {
                slot.match_gain.set_target(1.0);
            } else if reference.is_finite() && loudness[s] > MATCH_GATE_LUFS {
                let db = (reference - loudness[s]).clamp(-MATCH_RANGE_DB, 0.0);
                slot.match_gain.set_target(db_to_gain(db));
            }
            self.shared.slots[s].match_gain_db.store(
                gain_to_db(slot.match_gain.value()) as f32,
                Ordering::Relaxed,
            );
        }
    }

    /// After the block: the heard models' latency, the parts of changed slots, the meter window.
    fn finish_block(&mut self, frames: usize, actions: &mut BlockActions) {
        if let Some(latency) = self.slots[self.heard].current.as_ref().map(|m| m.latency()) {
            if latency != self.latency {
                self.latency = latency;
                actions.latency = Some(latency);
            }
        }
        for s in 0..SLOTS {
            if self.slots[s].changed {
                self.slots[s].changed = false;
                self.publish_parts(s);
            }
        }
        self.publish_meters(frames);
        self.shared.heard.store(self.heard, Ordering::Relaxed);
        self.shared.circuit.store(self.key.id, Ordering::Relaxed);
        self.shared.latency.store(self.latency, Ordering::Relaxed);
    }

    fn publish_static(&mut self) {
        self.shared
            .sample_rate
            .store(self.sample_rate, Ordering::Relaxed);
        self.shared.latency.store(self.latency, Ordering::Relaxed);
        self.shared.models.store(self.channels, Ordering::Relaxed);
        for s in 0..SLOTS {
            self.publish_parts(s);
            self.slots[s].changed = false;
        }
    }

    fn publish_parts(&self, s: usize) {
        let r = &self.shared.slots[s];
        let store = |a: &atomic_float::AtomicF32, v: f64| a.store(v as f32, Ordering::Relaxed);
        match self.slots[s].current.as_ref() {
            Some(m) => {
                let p = &m.parts;
                store(&r.threshold_positive, p.threshold_positive);
                store(&r.threshold_negative, p.threshold_negative);
                store(&r.volts_positive, p.volts_positive);
                store(&r.volts_negative, p.volts_negative);
                r.family.store(p.family as u32, Ordering::Relaxed);
                r.own_knee.store(p.own_knee, Ordering::Relaxed);
                r.circuit.store(m.spec.circuit, Ordering::Relaxed);
            }
            None => {
                for a in [
                    &r.threshold_positive,
                    &r.threshold_negative,
                    &r.volts_positive,
                    &r.volts_negative,
                ] {
                    store(a, f64::NAN);
                }
                r.circuit.store(0, Ordering::Relaxed);
            }
        }
    }

    /// Publish the meter window every 100 ms and start a new one.
    fn publish_meters(&mut self, frames: usize) {
        if self.meter_countdown > frames {
            self.meter_countdown -= frames;
            return;
        }
        self.meter_countdown = (self.sample_rate * METER_SECONDS) as usize;
        for (s, slot) in self.slots.iter_mut().enumerate() {
            let Some(w) = slot.current.as_mut().and_then(|m| m.take_meters()) else {
                continue;
            };
            let r = &self.shared.slots[s];
            let store = |a: &atomic_float::AtomicF32, v: f64| a.store(v as f32, Ordering::Relaxed);
            store(&r.clamp_peak_positive, w.clamp_peak_positive);
            store(&r.clamp_peak_negative, w.clamp_peak_negative);
            store(&r.share_clamped, w.share_clamped);
            store(&r.zener_peak_current, w.zener_peak_current);
            store(&r.positive_peak_watts, w.positive_peak_watts);
            store(&r.negative_peak_watts, w.negative_peak_watts);
            store(&r.positive_average_watts, w.positive_average_watts);
            store(&r.negative_average_watts, w.negative_average_watts);
        }
        self.shared.publications.fetch_add(1, Ordering::Relaxed);
    }
}
