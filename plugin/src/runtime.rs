//! The real-time side: one model per compared switch position (and per input channel), crossfades, level match,
//! meters for the editor. Models for new part values or a new quality are built by a background worker and
//! handed over through single-slot atomic mailboxes; retired models go back the same way to be freed off the
//! audio thread. After `Processor::new`, nothing here allocates, frees, locks or blocks.

use crate::loudness::ShortTerm;
use crate::params::SLOTS;
use crate::shared::Shared;
use atomic_float::AtomicF64;
use breakdown_dsp::circuit::{SwitchPosition, ZenerSpec};
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::ptr;
use std::sync::atomic::{AtomicPtr, AtomicU32, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};

/// Crossfade time for switching positions, listening points and swapping in rebuilt models (s).
pub const FADE_SECONDS: f64 = 0.02;
/// Level-match gain glide time constant (s).
const MATCH_GLIDE_SECONDS: f64 = 0.3;
/// Glide time constant for input calibration and output trim (s).
const CONTROL_GLIDE_SECONDS: f64 = 0.01;
/// Quietest loudness that still steers the level match (LUFS); below it the gains hold.
const MATCH_GATE_LUFS: f64 = -70.0;
/// Largest level-match cut (dB).
const MATCH_RANGE_DB: f64 = 30.0;
/// Models waiting to be handed back for freeing, per position.
const BIN: usize = 4;

/// What one compared position runs: its pair (positive-clamp volts, negative-clamp volts; None = off) and quality.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct SlotSpec {
    pub pair: Option<(f64, f64)>,
    pub quality: Quality,
}

/// Control values for one block, read from the parameters.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Controls {
    pub gain: f64,
    pub level: f64,
    /// Peak volts at the input jack for full scale.
    pub calibration: f64,
    pub trim_db: f64,
    /// Index of the heard position.
    pub heard: usize,
    pub specs: [SlotSpec; SLOTS],
    /// Listen to the clamp node instead of the wiper.
    pub listen_clamp: bool,
    pub level_match: bool,
    /// Run every position all the time (instant comparison). When false, only the heard position and the
    /// "compare with" position run, which halves the cost; others restart from rest when selected.
    pub run_all: bool,
    /// Index of the position the compare key switches to.
    pub compare_with: usize,
}

impl Default for Controls {
    fn default() -> Self {
        let q = Quality::X4;
        Controls {
            gain: 0.8,
            level: 0.5,
            calibration: 1.0,
            trim_db: 0.0,
            heard: 1,
            specs: [
                SlotSpec {
                    pair: None,
                    quality: q,
                },
                SlotSpec {
                    pair: Some((20.0, 20.0)),
                    quality: q,
                },
                SlotSpec {
                    pair: Some((18.0, 5.6)),
                    quality: q,
                },
                SlotSpec {
                    pair: Some((15.0, 9.1)),
                    quality: q,
                },
            ],
            listen_clamp: false,
            level_match: false,
            run_all: true,
            compare_with: 2,
        }
    }
}

/// The reference circuit with a single switch position holding `pair`.
pub fn slot_circuit(pair: Option<(f64, f64)>, calibration: f64) -> Circuit {
    let mut circuit = Circuit::builtin();
    circuit.input.volts_at_full_scale = calibration;
    circuit.clamp.position = vec![SwitchPosition {
        name: "compared".into(),
        positive: pair.map(|p| ZenerSpec::volts(p.0)),
        negative: pair.map(|p| ZenerSpec::volts(p.1)),
    }];
    circuit
}

/// Models of one position, one per input channel, built off the audio thread.
pub struct Built {
    pub spec: SlotSpec,
    pub sample_rate: f64,
    pub engines: Vec<Engine>,
}

impl Built {
    pub fn new(
        spec: SlotSpec,
        sample_rate: f64,
        models: usize,
        gain: f64,
        level: f64,
        calibration: f64,
    ) -> Result<Box<Built>, String> {
        let circuit = slot_circuit(spec.pair, calibration.clamp(1e-3, 100.0));
        let settings = Settings {
            gain: gain.clamp(0.0, 1.0),
            level: level.clamp(0.0, 1.0),
            position: 0,
            ..Default::default()
        };
        let mut engine = Engine::new(&circuit, sample_rate, spec.quality, settings)
            .map_err(|e| e.to_string())?;
        // The processor reads the listening output and the clamp node only: decimate just those two.
        engine.set_active_probes(&[Probe::Listen, Probe::Clamp]);
        let mut engines = Vec::with_capacity(models);
        for _ in 1..models {
            engines.push(engine.clone());
        }
        engines.push(engine);
        Ok(Box::new(Built {
            spec,
            sample_rate,
            engines,
        }))
    }
}

/// Single-slot lock-free exchange of a boxed model set.
pub struct Mailbox {
    slot: AtomicPtr<Built>,
}

impl Default for Mailbox {
    fn default() -> Self {
        Mailbox {
            slot: AtomicPtr::new(ptr::null_mut()),
        }
    }
}

impl Mailbox {
    /// Put `b` in, returning what was there (worker side; the caller frees it).
    pub fn replace(&self, b: Box<Built>) -> Option<Box<Built>> {
        let old = self.slot.swap(Box::into_raw(b), Ordering::AcqRel);
        // SAFETY: every non-null pointer in the slot came from Box::into_raw and is owned by the slot.
        (!old.is_null()).then(|| unsafe { Box::from_raw(old) })
    }
    /// Put `b` in only if the slot is empty (audio side: never frees).
    pub fn offer(&self, b: Box<Built>) -> Result<(), Box<Built>> {
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
    pub fn take(&self) -> Option<Box<Built>> {
        let old = self.slot.swap(ptr::null_mut(), Ordering::AcqRel);
        // SAFETY: as in `replace`.
        (!old.is_null()).then(|| unsafe { Box::from_raw(old) })
    }
}

impl Drop for Mailbox {
    fn drop(&mut self) {
        drop(self.take());
    }
}

/// The spec a position should run, as the audio thread last asked for it.
#[derive(Default)]
struct Request {
    positive: AtomicF64,
    negative: AtomicF64,
    factor: AtomicUsize,
    generation: AtomicU32,
}

/// Builds models off the audio thread.
pub struct Worker {
    requests: [Request; SLOTS],
    pub incoming: [Mailbox; SLOTS],
    pub returns: [Mailbox; SLOTS],
    sample_rate: AtomicF64,
    models: AtomicUsize,
    gain: AtomicF64,
    level: AtomicF64,
    calibration: AtomicF64,
    built_generation: Mutex<[u32; SLOTS]>,
}

impl Default for Worker {
    fn default() -> Self {
        Worker {
            requests: Default::default(),
            incoming: Default::default(),
            returns: Default::default(),
            sample_rate: AtomicF64::new(48_000.0),
            models: AtomicUsize::new(1),
            gain: AtomicF64::new(0.8),
            level: AtomicF64::new(0.5),
            calibration: AtomicF64::new(1.0),
            built_generation: Mutex::new([0; SLOTS]),
        }
    }
}

impl Worker {
    /// Ask for `spec` at position `slot` (audio thread: atomics only).
    fn request(&self, slot: usize, spec: SlotSpec, controls: &Controls) {
        let r = &self.requests[slot];
        let (p, n) = spec.pair.unwrap_or((f64::NAN, f64::NAN));
        r.positive.store(p, Ordering::Relaxed);
        r.negative.store(n, Ordering::Relaxed);
        r.factor.store(spec.quality.factor(), Ordering::Relaxed);
        self.gain.store(controls.gain, Ordering::Relaxed);
        self.level.store(controls.level, Ordering::Relaxed);
        self.calibration
            .store(controls.calibration, Ordering::Relaxed);
        r.generation.fetch_add(1, Ordering::Release);
    }

    fn requested(&self, slot: usize) -> SlotSpec {
        let r = &self.requests[slot];
        let (p, n) = (
            r.positive.load(Ordering::Relaxed),
            r.negative.load(Ordering::Relaxed),
        );
        SlotSpec {
            pair: (p.is_finite() && n.is_finite()).then_some((p, n)),
            quality: Quality::from_factor(r.factor.load(Ordering::Relaxed)).unwrap_or_default(),
        }
    }

    /// Build whatever was asked for and free what came back (background thread).
    pub fn service(&self) {
        let Ok(mut built) = self.built_generation.lock() else {
            return;
        };
        loop {
            for returns in &self.returns {
                drop(returns.take());
            }
            let mut worked = false;
            for slot in 0..SLOTS {
                let generation = self.requests[slot].generation.load(Ordering::Acquire);
                if generation == built[slot] {
                    continue;
                }
                built[slot] = generation;
                worked = true;
                let spec = self.requested(slot);
                match Built::new(
                    spec,
                    self.sample_rate.load(Ordering::Relaxed),
                    self.models.load(Ordering::Relaxed),
                    self.gain.load(Ordering::Relaxed),
                    self.level.load(Ordering::Relaxed),
                    self.calibration.load(Ordering::Relaxed),
                ) {
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
    fn restart(&self, sample_rate: f64, models: usize) {
        self.sample_rate.store(sample_rate, Ordering::Relaxed);
        self.models.store(models, Ordering::Relaxed);
        let mut built = self
            .built_generation
            .lock()
            .unwrap_or_else(|e| e.into_inner());
        for slot in 0..SLOTS {
            built[slot] = self.requests[slot].generation.load(Ordering::Acquire);
            drop(self.incoming[slot].take());
            drop(self.returns[slot].take());
        }
    }
}

/// Raised-cosine crossfade weight for fade position `t` in 0..=1.
#[inline]
fn fade_weight(t: f64) -> f64 {
    0.5 - 0.5 * (std::f64::consts::PI * t.clamp(0.0, 1.0)).cos()
}

/// One compared position at run time.
struct Slot {
    current: Box<Built>,
    next: Option<Box<Built>>,
    fade: usize,
    wanted: SlotSpec,
    bin: [Option<Box<Built>>; BIN],
    loudness: ShortTerm,
    match_gain: f64,
    match_target: f64,
    /// Per model: (listening value, clamp volts) of the last sample.
    out: [(f64, f64); 2],
    /// Running this block.
    active: bool,
}

impl Slot {
    fn bin_room(&self) -> usize {
        self.bin.iter().filter(|b| b.is_none()).count()
    }
    fn retire(&mut self, b: Box<Built>) {
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
}

/// What the plugin wrapper must do after a block.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct BlockActions {
    /// Wake the background worker (models to build or to free).
    pub service_worker: bool,
    /// New latency to report to the host.
    pub latency: Option<u32>,
}

/// The real-time processor for one activation (sample rate, channel layout).
pub struct Processor {
    sample_rate: f64,
    models: usize,
    slots: [Slot; SLOTS],
    heard: usize,
    previous: usize,
    heard_fade: usize,
    fade_len: usize,
    listen_mix: f64,
    listen_step: f64,
    calibration: f64,
    trim: f64,
    control_coeff: f64,
    match_coeff: f64,
    latency: u32,
    meter_countdown: usize,
    /// Set by `reset`: the first block starts at rest at its own control values (hosts often deliver the
    /// parameter values of a fresh start in the first block rather than before it).
    fresh: bool,
    worker: Arc<Worker>,
    shared: Arc<Shared>,
}

impl Processor {
    /// Build every model for `controls` (allocates: call from activation, not from the audio thread).
    pub fn new(
        sample_rate: f64,
        models: usize,
        controls: &Controls,
        worker: Arc<Worker>,
        shared: Arc<Shared>,
    ) -> Result<Processor, String> {
        let models = models.clamp(1, 2);
        worker.restart(sample_rate, models);
        let mut slots = Vec::with_capacity(SLOTS);
        for spec in controls.specs {
            let built = Built::new(
                spec,
                sample_rate,
                models,
                controls.gain,
                controls.level,
                controls.calibration,
            )?;
            slots.push(Slot {
                current: built,
                next: None,
                fade: 0,
                wanted: spec,
                bin: Default::default(),
                loudness: ShortTerm::new(sample_rate),
                match_gain: 1.0,
                match_target: 1.0,
                out: [(0.0, 0.0); 2],
                active: true,
            });
        }
        let slots: [Slot; SLOTS] = match slots.try_into() {
            Ok(s) => s,
            Err(_) => return Err("internal: wrong number of positions".into()),
        };
        let fade_len = ((FADE_SECONDS * sample_rate).round() as usize).max(1);
        let heard = controls.heard.min(SLOTS - 1);
        let latency = slots[0].current.engines[0].latency() as u32;
        let p = Processor {
            sample_rate,
            models,
            slots,
            heard,
            previous: heard,
            heard_fade: fade_len,
            fade_len,
            listen_mix: if controls.listen_clamp { 1.0 } else { 0.0 },
            listen_step: 1.0 / fade_len as f64,
            calibration: controls.calibration,
            trim: db_to_gain(controls.trim_db),
            control_coeff: 1.0 - (-1.0 / (CONTROL_GLIDE_SECONDS * sample_rate)).exp(),
            match_coeff: 1.0 - (-1.0 / (MATCH_GLIDE_SECONDS * sample_rate)).exp(),
            latency,
            meter_countdown: 0,
            fresh: true,
            worker,
            shared,
        };
        p.shared.sample_rate.store(sample_rate, Ordering::Relaxed);
        p.shared.latency.store(latency, Ordering::Relaxed);
        p.shared.models.store(models, Ordering::Relaxed);
        for s in 0..SLOTS {
            p.publish_pair(s);
        }
        Ok(p)
    }

    /// Latency in samples (the oversampling filters of the models heard).
    pub fn latency(&self) -> u32 {
        self.latency
    }

    pub fn models(&self) -> usize {
        self.models
    }

    pub fn sample_rate(&self) -> f64 {
        self.sample_rate
    }

    /// Back to the operating point of `controls` with silent history, no glides pending (real-time safe).
    pub fn reset(&mut self, controls: &Controls) {
        for slot in self.slots.iter_mut() {
            let engines = slot
                .current
                .engines
                .iter_mut()
                .chain(slot.next.iter_mut().flat_map(|n| n.engines.iter_mut()));
            for e in engines {
                e.set_gain(controls.gain);
                e.set_level(controls.level);
                e.reset();
            }
            slot.loudness.reset();
            slot.out = [(0.0, 0.0); 2];
        }
        self.heard = controls.heard.min(SLOTS - 1);
        self.previous = self.heard;
        self.heard_fade = self.fade_len;
        self.listen_mix = if controls.listen_clamp { 1.0 } else { 0.0 };
        if controls.calibration.is_finite() && controls.calibration > 0.0 {
            self.calibration = controls.calibration;
        }
        self.trim = db_to_gain(controls.trim_db);
        self.fresh = true;
    }

    fn publish_pair(&self, slot: usize) {
        let r = &self.shared.slots[slot];
        let built = &self.slots[slot].current;
        let (tp, tn) = match built.engines[0].model().pair(0) {
            Some(pair) if !pair.is_open() => {
                let (p, n) = pair.thresholds_at(CLAMPED_CURRENT);
                (p as f32, n as f32)
            }
            _ => (f32::NAN, f32::NAN),
        };
        r.threshold_positive.store(tp, Ordering::Relaxed);
        r.threshold_negative.store(tn, Ordering::Relaxed);
        let (vp, vn) = built.spec.pair.unwrap_or((f64::NAN, f64::NAN));
        r.volts_positive.store(vp as f32, Ordering::Relaxed);
        r.volts_negative.store(vn as f32, Ordering::Relaxed);
    }

    /// Pick up rebuilt models, ask for new ones, hand back retired ones.
    fn exchange(&mut self, controls: &Controls, actions: &mut BlockActions) {
        for s in 0..SLOTS {
            let want = controls.specs[s];
            let slot = &mut self.slots[s];
            if want != slot.wanted {
                slot.wanted = want;
                self.worker.request(s, want, controls);
                actions.service_worker = true;
            }
            if slot.bin_room() >= 2 {
                if let Some(b) = self.worker.incoming[s].take() {
                    let fits = b.spec == slot.wanted
                        && b.sample_rate == self.sample_rate
                        && b.engines.len() == self.models;
                    if !fits {
                        slot.retire(b);
                    } else {
                        if let Some(old_next) = slot.next.take() {
                            slot.retire(old_next);
                        }
                        slot.next = Some(b);
                        slot.fade = 0;
                    }
                }
            }
            let waiting = slot.flush_bin(&self.worker.returns[s]);
            actions.service_worker |= waiting;
            let rebuilding = slot.current.spec != slot.wanted;
            self.shared.slots[s]
                .rebuilding
                .store(rebuilding, Ordering::Relaxed);
        }
    }

    /// Process one block in place. `channels[..models]` hold the input; every channel receives the output (a
    /// mono model feeds all output channels).
    pub fn process(&mut self, controls: &Controls, channels: &mut [&mut [f32]]) -> BlockActions {
        let mut actions = BlockActions::default();
        if self.fresh {
            self.reset(controls);
            self.fresh = false;
        }
        self.exchange(controls, &mut actions);
        if channels.is_empty() {
            return actions;
        }
        let frames = channels.iter().map(|c| c.len()).min().unwrap_or(0);
        let models = self.models.min(channels.len());

        let heard = controls.heard.min(SLOTS - 1);
        if heard != self.heard {
            self.previous = self.heard;
            self.heard = heard;
            self.heard_fade = 0;
        }
        let fading_from = (self.heard_fade < self.fade_len).then_some(self.previous);
        for (s, slot) in self.slots.iter_mut().enumerate() {
            let active = controls.run_all
                || s == self.heard
                || Some(s) == fading_from
                || s == controls.compare_with;
            if active && !slot.active {
                // Restart from rest: its history is stale.
                for e in slot.current.engines.iter_mut() {
                    e.reset();
                }
                if let Some(next) = slot.next.as_mut() {
                    for e in next.engines.iter_mut() {
                        e.reset();
                    }
                }
                slot.loudness.reset();
                slot.out = [(0.0, 0.0); 2];
            }
            slot.active = active;
            for e in slot.current.engines.iter_mut() {
                e.set_gain(controls.gain);
                e.set_level(controls.level);
            }
            if let Some(next) = slot.next.as_mut() {
                for e in next.engines.iter_mut() {
                    e.set_gain(controls.gain);
                    e.set_level(controls.level);
                }
            }
        }
        let listen_target = if controls.listen_clamp { 1.0 } else { 0.0 };
        let calibration_target = if controls.calibration.is_finite() && controls.calibration > 0.0 {
            controls.calibration
        } else {
            1.0
        };
        let trim_target = db_to_gain(controls.trim_db);
        let listen_volts = 1.0 / breakdown_dsp::circuit::Listen::default().volts_at_full_scale;

        let mut swapped = [false; SLOTS];
        let _guard = breakdown_dsp::denormals::FlushGuard::new();
        for n in 0..frames {
            self.calibration += (calibration_target - self.calibration) * self.control_coeff;
            self.trim += (trim_target - self.trim) * self.control_coeff;
            if self.listen_mix != listen_target {
                self.listen_mix = if self.listen_mix < listen_target {
                    (self.listen_mix + self.listen_step).min(listen_target)
                } else {
                    (self.listen_mix - self.listen_step).max(listen_target)
                };
            }
            let mix = fade_weight(self.listen_mix);
            let mut inputs = [0.0f32; 2];
            for (c, x) in inputs.iter_mut().enumerate().take(models) {
                *x = channels[c][n];
            }
            let mut new_block = false;
            for (s, slot) in self.slots.iter_mut().enumerate() {
                if !slot.active {
                    continue;
                }
                let fading = slot.next.is_some();
                let w = if fading {
                    fade_weight(slot.fade as f64 / self.fade_len as f64)
                } else {
                    0.0
                };
                for (c, &x) in inputs.iter().enumerate().take(models) {
                    let e = &mut slot.current.engines[c];
                    e.set_input_calibration(self.calibration);
                    let f = e.process_sample(x);
                    let mut listen = f.listen * (1.0 - mix) + f.clamp_volts * listen_volts * mix;
                    let mut clamp = f.clamp_volts;
                    if let Some(next) = slot.next.as_mut() {
                        let e = &mut next.engines[c];
                        e.set_input_calibration(self.calibration);
                        let g = e.process_sample(x);
                        let l2 = g.listen * (1.0 - mix) + g.clamp_volts * listen_volts * mix;
                        listen += (l2 - listen) * w;
                        clamp += (g.clamp_volts - clamp) * w;
                    }
                    slot.out[c] = (listen, clamp);
                }
                if fading {
                    slot.fade += 1;
                    if slot.fade >= self.fade_len {
                        if let Some(next) = slot.next.take() {
                            let old = std::mem::replace(&mut slot.current, next);
                            slot.retire(old);
                        }
                        slot.fade = 0;
                        let latency = slot.current.engines[0].latency() as u32;
                        if s == self.heard && latency != self.latency {
                            self.latency = latency;
                            actions.latency = Some(latency);
                        }
                        actions.service_worker = true;
                        swapped[s] = true;
                    }
                }
                new_block |= slot.loudness.push(slot.out[0].0);
                slot.match_gain += (slot.match_target - slot.match_gain) * self.match_coeff;
            }
            if new_block {
                self.update_match(controls.level_match);
            }
            let w = if self.heard_fade < self.fade_len {
                self.heard_fade += 1;
                fade_weight(self.heard_fade as f64 / self.fade_len as f64)
            } else {
                self.previous = self.heard;
                1.0
            };
            let (a, b) = (&self.slots[self.heard], &self.slots[self.previous]);
            let mut y = [0.0f64; 2];
            for (c, yc) in y.iter_mut().enumerate().take(models) {
                let ya = a.out[c].0 * a.match_gain;
                *yc = if self.previous == self.heard {
                    ya * self.trim
                } else {
                    let yb = b.out[c].0 * b.match_gain;
                    (yb + (ya - yb) * w) * self.trim
                };
            }
            self.shared.scope.push(a.out[0].1 as f32);
            self.shared.listen.push(a.out[0].0 as f32);
            for (c, ch) in channels.iter_mut().enumerate() {
                let v = y[c.min(models - 1)];
                ch[n] = if v.is_finite() { v as f32 } else { 0.0 };
            }
        }
        for (s, done) in swapped.iter().enumerate() {
            if *done {
                self.publish_pair(s);
                self.shared.latency.store(self.latency, Ordering::Relaxed);
            }
        }
        self.publish_meters(frames);
        self.shared.heard.store(self.heard, Ordering::Relaxed);
        actions
    }

    fn update_match(&mut self, enabled: bool) {
        let loudness: [f64; SLOTS] = std::array::from_fn(|s| {
            if self.slots[s].active {
                self.slots[s].loudness.lufs()
            } else {
                f64::NEG_INFINITY
            }
        });
        for (s, l) in loudness.iter().enumerate() {
            if self.slots[s].active {
                self.shared.slots[s]
                    .loudness
                    .store(*l as f32, Ordering::Relaxed);
            }
        }
        let reference = loudness
            .iter()
            .copied()
            .filter(|l| *l > MATCH_GATE_LUFS)
            .fold(f64::INFINITY, f64::min);
        for (s, slot) in self.slots.iter_mut().enumerate() {
            if !enabled {
                slot.match_target = 1.0;
            } else if reference.is_finite() && loudness[s] > MATCH_GATE_LUFS {
                let db = (reference - loudness[s]).clamp(-MATCH_RANGE_DB, 0.0);
                slot.match_target = db_to_gain(db);
            }
            self.shared.slots[s]
                .match_gain_db
                .store((20.0 * slot.match_gain.log10()) as f32, Ordering::Relaxed);
        }
    }

    /// Publish the meter window every ~100 ms and start a new one.
    fn publish_meters(&mut self, frames: usize) {
        if self.meter_countdown > frames {
            self.meter_countdown -= frames;
            return;
        }
        self.meter_countdown = (self.sample_rate * 0.1) as usize;
        for (s, slot) in self.slots.iter_mut().enumerate() {
            let r = &self.shared.slots[s];
            let mut peak_pos = f64::NEG_INFINITY;
            let mut peak_neg = f64::INFINITY;
            let (mut clamped, mut samples) = (0u64, 0u64);
            let (mut ipk, mut wpp, mut wnp, mut wpa, mut wna) =
                (0.0f64, 0.0f64, 0.0f64, 0.0f64, 0.0f64);
            for e in slot.current.engines.iter_mut() {
                let m = *e.meters();
                if m.samples > 0 {
                    peak_pos = peak_pos.max(m.clamp_peak_positive);
                    peak_neg = peak_neg.min(m.clamp_peak_negative);
                    clamped += m.clamped_samples;
                    samples += m.samples;
                    ipk = ipk.max(m.zener_peak_current);
                    wpp = wpp.max(m.positive_part_peak_watts);
                    wnp = wnp.max(m.negative_part_peak_watts);
                    let (a, b) = m.average_watts();
                    wpa = wpa.max(a);
                    wna = wna.max(b);
                }
                e.reset_meters();
            }
            if samples == 0 {
                continue;
            }
            r.clamp_peak_positive
                .store(peak_pos as f32, Ordering::Relaxed);
            r.clamp_peak_negative
                .store(peak_neg as f32, Ordering::Relaxed);
            r.share_clamped
                .store((clamped as f64 / samples as f64) as f32, Ordering::Relaxed);
            r.zener_peak_current.store(ipk as f32, Ordering::Relaxed);
            r.positive_peak_watts.store(wpp as f32, Ordering::Relaxed);
            r.negative_peak_watts.store(wnp as f32, Ordering::Relaxed);
            r.positive_average_watts
                .store(wpa as f32, Ordering::Relaxed);
            r.negative_average_watts
                .store(wna as f32, Ordering::Relaxed);
        }
        self.shared.publications.fetch_add(1, Ordering::Relaxed);
    }
}

#[inline]
pub fn db_to_gain(db: f64) -> f64 {
    if db.is_finite() {
        10f64.powf(db / 20.0)
    } else {
        1.0
    }
}
