//! The plugin's real-time processor driven directly (no host): equality with the `breakdown-dsp` engine on the
//! circuit it runs, no allocation or freeing on the audio thread (circuit swaps, rebuilt models and the
//! loudness meters included), click-free switching and circuit swaps, level match checked with a BS.1770 meter
//! (the `ebur128` crate, run here on the plugin's output; its own EBU Tech 3341 check is in src/loudness.rs).

use breakdown::controls_from;
use breakdown::params::{BreakdownParams, FamilyChoice};
use breakdown::runtime::{candidate_part, Controls, Processor, Worker};
use breakdown::session::{Session, CANDIDATE};
use breakdown::shared::Shared;
use breakdown_dsp::circuit::{SwitchPosition, ONE_STAGE_TOML};
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Arc;

struct Counting;
static EVENTS: AtomicUsize = AtomicUsize::new(0);
thread_local! {
    static ARMED: Cell<bool> = const { Cell::new(false) };
}
fn note() {
    if ARMED.with(|a| a.get()) {
        EVENTS.fetch_add(1, Ordering::Relaxed);
    }
}
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        note();
        unsafe { System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        note();
        unsafe { System.dealloc(ptr, layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        note();
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}
#[global_allocator]
static GLOBAL: Counting = Counting;

/// Count allocations and frees on this thread while `f` runs.
fn counted<R>(f: impl FnOnce() -> R) -> (R, usize) {
    let before = EVENTS.load(Ordering::Relaxed);
    ARMED.with(|a| a.set(true));
    let r = f();
    ARMED.with(|a| a.set(false));
    (r, EVENTS.load(Ordering::Relaxed) - before)
}

fn guitar_like(rate: f64, seconds: f64) -> Vec<f32> {
    // A decaying plucked-string-like tone: 110 Hz with a few partials, peak about 0.6 full scale.
    let n = (rate * seconds) as usize;
    (0..n)
        .map(|k| {
            let t = k as f64 / rate;
            let env = (-t * 1.5).exp() * 0.6;
            let w = 2.0 * std::f64::consts::PI * 110.0 * t;
            (env * (w.sin() + 0.4 * (2.0 * w).sin() + 0.2 * (3.0 * w).sin()) / 1.3) as f32
        })
        .collect()
}

fn new_processor(rate: f64, models: usize, controls: &Controls) -> (Processor, Arc<Worker>) {
    new_processor_on(Arc::new(Session::default()), rate, models, controls)
}

fn new_processor_on(
    session: Arc<Session>,
    rate: f64,
    models: usize,
    controls: &Controls,
) -> (Processor, Arc<Worker>) {
    let worker = Arc::new(Worker::new(session));
    let shared = Arc::new(Shared::default());
    let p = Processor::new(rate, models, controls, worker.clone(), shared).expect("processor");
    (p, worker)
}

fn run(
    p: &mut Processor,
    controls: &Controls,
    input: &[f32],
    block: usize,
    channels: usize,
) -> Vec<Vec<f32>> {
    let mut out = vec![Vec::with_capacity(input.len()); channels];
    let mut bufs = vec![vec![0.0f32; block]; channels];
    for chunk in input.chunks(block) {
        for b in bufs.iter_mut() {
            b.resize(chunk.len(), 0.0);
            b.copy_from_slice(chunk);
        }
        let mut slices: Vec<&mut [f32]> = bufs.iter_mut().map(|b| b.as_mut_slice()).collect();
        p.process(controls, &mut slices);
        for (o, b) in out.iter_mut().zip(bufs.iter()) {
            o.extend_from_slice(b);
        }
    }
    out
}

/// The renderer's output for `circuit` at `position` (latency removed).
fn render(
    circuit: &Circuit,
    rate: f64,
    quality: Quality,
    position: usize,
    input: &[f32],
) -> Vec<f32> {
    let settings = Settings {
        gain: 0.8,
        level: 0.5,
        position,
        ..Default::default()
    };
    let mut engine = Engine::new(circuit, rate, quality, settings).unwrap();
    engine.render(input, Probe::Listen)
}

#[test]
fn default_output_equals_the_dsp_engine() {
    // The plugin's output must be the dsp crate's output for the same settings on the same circuit (the
    // built-in one by default), delayed by the reported latency.
    let params = BreakdownParams::default();
    let controls = controls_from(&params);
    for (rate, block, models, channels) in [
        (44_100.0, 1, 1, 1),
        (48_000.0, 64, 1, 2),
        (96_000.0, 4096, 2, 2),
    ] {
        let input = guitar_like(rate, 0.25);
        let (mut p, _w) = new_processor(rate, models, &controls);
        let latency = p.latency() as usize;
        let out = run(&mut p, &controls, &input, block, channels);
        let settings = Settings {
            gain: params.gain.value() as f64,
            level: params.level.value() as f64,
            position: 1,
            ..Default::default()
        };
        let mut engine = Engine::new(&Circuit::builtin(), rate, Quality::X4, settings).unwrap();
        assert_eq!(engine.latency(), latency);
        let reference = engine.render(&input, Probe::Listen);
        for ch in &out {
            for n in 0..input.len() - latency {
                assert_eq!(
                    ch[n + latency],
                    reference[n],
                    "rate {rate} block {block} sample {n}"
                );
            }
        }
    }
}

#[test]
fn process_never_allocates_or_frees() {
    let mut controls = Controls::default();
    let rate = 48_000.0;
    let input = guitar_like(rate, 0.05);
    let session = Arc::new(Session::default());
    let (mut p, worker) = new_processor_on(session.clone(), rate, 2, &controls);
    let mut a = input.clone();
    let mut b = input.clone();
    let mut step = |p: &mut Processor, controls: &Controls| {
        a.copy_from_slice(&input);
        b.copy_from_slice(&input);
        let mut chans: [&mut [f32]; 2] = [&mut a, &mut b];
        counted(|| p.process(controls, &mut chans)).1
    };
    let mut events = step(&mut p, &controls);
    // Every control moves, switch positions change, new candidate parts and a new quality are requested.
    controls.pots.gain = 0.3;
    controls.pots.level = 0.9;
    controls.pots.treble = 0.2;
    controls.position = 2;
    controls.listen_clamp = true;
    controls.level_match = true;
    controls.trim_db = -6.0;
    controls.calibration = 0.4;
    controls.candidate.positive = 12.0;
    controls.candidate.family = FamilyChoice::HalfWatt;
    controls.quality = Quality::X2;
    events += step(&mut p, &controls);
    // The worker builds the new models (allocation here is fine: background thread) ...
    worker.service();
    // ... and the audio thread swaps them in, fades, and hands the old ones back.
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    worker.service();
    controls.position = CANDIDATE;
    controls.run_all = false;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    // A new circuit with more positions arrives through the session (as a host state or the editor loads it):
    // read and built off the audio thread, swapped in by it; a slot starting from rest resets its meter.
    let mut text = ONE_STAGE_TOML.to_string();
    text.push_str("\n[[clamp.position]]\nname = \"low pair\"\npositive = { volts = 6.2 }\nnegative = { volts = 6.2 }\n");
    session.load_text(text, None).unwrap();
    events += step(&mut p, &controls);
    worker.service();
    controls.position = 3;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    worker.service();
    for _ in 0..10 {
        events += step(&mut p, &controls);
    }
    assert_eq!(events, 0, "allocations or frees inside process()");
    // The counter works: an allocation while armed is seen (so zero above means zero).
    assert!(counted(|| std::hint::black_box(vec![1u8; 16]).len()).1 >= 1);
}

#[test]
fn switching_positions_crossfades_between_the_two_outputs() {
    // A crossfade with weights w and 1 - w (0 <= w <= 1) keeps every output sample between the two positions'
    // outputs (convex combination): no click can overshoot either.
    let rate = 48_000.0;
    let input = guitar_like(rate, 0.3);
    let mut controls = Controls::default();
    let (mut p, _w) = new_processor(rate, 1, &controls);
    let half = input.len() / 2;
    let mut out = run(&mut p, &controls, &input[..half], 64, 1).remove(0);
    controls.position = 2;
    out.extend(run(&mut p, &controls, &input[half..], 64, 1).remove(0));
    let render = |position: usize| {
        let settings = Settings {
            gain: 0.8,
            level: 0.5,
            position,
            ..Default::default()
        };
        let mut e = Engine::new(&Circuit::builtin(), rate, Quality::X4, settings).unwrap();
        let mut y = vec![0.0f32; input.len()];
        e.process_block(&input, &mut y, Probe::Listen);
        y
    };
    let (a, b) = (render(1), render(2));
    let fade = (0.02 * rate) as usize;
    for n in half..half + fade + 64 {
        let (lo, hi) = (a[n].min(b[n]), a[n].max(b[n]));
        assert!(
            out[n] >= lo - 1e-6 && out[n] <= hi + 1e-6,
            "sample {n}: {} not within [{lo}, {hi}]",
            out[n]
        );
    }
    // After the fade the output is position 2 exactly.
    for n in half + fade + 64..input.len() {
        assert_eq!(out[n], b[n]);
    }
}

fn lufs(signal: &[f32], rate: f64) -> f64 {
    let mut m = ebur128::EbuR128::new(1, rate as u32, ebur128::Mode::S).unwrap();
    m.add_frames_f32(signal).unwrap();
    m.loudness_shortterm().unwrap()
}

#[test]
fn level_match_brings_positions_to_the_same_loudness() {
    // With the level match on, each position's output has the same short-term loudness as measured by an
    // independent BS.1770 implementation (ebur128 crate); tolerance 0.5 LU.
    let rate = 48_000.0;
    let n = (rate * 6.0) as usize;
    let input: Vec<f32> = (0..n)
        .map(|k| (0.5 * (2.0 * std::f64::consts::PI * 220.0 * k as f64 / rate).sin()) as f32)
        .collect();
    let mut controls = Controls {
        level_match: true,
        ..Controls::default()
    };
    controls.pots.gain = 1.0;
    let mut measured = Vec::new();
    for heard in [0, 1, 2] {
        controls.position = heard;
        let (mut p, _w) = new_processor(rate, 1, &controls);
        let out = run(&mut p, &controls, &input, 512, 1).remove(0);
        measured.push(lufs(&out[n - (rate * 3.0) as usize..], rate));
    }
    let unmatched = {
        let mut c = Controls {
            level_match: false,
            position: 0,
            ..Controls::default()
        };
        c.pots.gain = 1.0;
        let (mut p, _w) = new_processor(rate, 1, &c);
        let out = run(&mut p, &c, &input, 512, 1).remove(0);
        let off = lufs(&out[n - (rate * 3.0) as usize..], rate);
        let c = Controls { position: 2, ..c };
        let (mut p, _w) = new_processor(rate, 1, &c);
        let out = run(&mut p, &c, &input, 512, 1).remove(0);
        off - lufs(&out[n - (rate * 3.0) as usize..], rate)
    };
    // The positions really differ without the match (otherwise the check would prove nothing).
    assert!(unmatched.abs() > 1.0, "unmatched difference {unmatched}");
    for m in &measured[1..] {
        assert!((m - measured[0]).abs() < 0.5, "{measured:?}");
    }
}

/// A circuit loaded while playing is read and built off the audio thread and crossfaded in like a switch move:
/// during the 20 ms fade every sample lies between the old circuit's and the new one's outputs (a convex
/// combination: nothing overshoots either), and after it the output is the renderer's on the new circuit
/// exactly, started from rest when the new models came in.
#[test]
fn a_loaded_circuit_is_crossfaded_in_and_then_equals_the_renderer() {
    let rate = 48_000.0;
    let block = 64;
    let input = guitar_like(rate, 0.4);
    let controls = Controls::default();
    let session = Arc::new(Session::default());
    let (mut p, worker) = new_processor_on(session.clone(), rate, 1, &controls);
    let latency = p.latency() as usize;
    let blocks_before = 40;
    let n0 = blocks_before * block;
    let mut out = run(&mut p, &controls, &input[..n0], block, 1).remove(0);
    // Our own invented values: the one-stage circuit with a 12 V / 4.7 V pair in position 1.
    let text = ONE_STAGE_TOML.replace(
        "name = \"symmetric 20 V\"\npositive = { volts = 20.0 }\nnegative = { volts = 20.0 }",
        "name = \"12 / 4.7\"\npositive = { volts = 12.0 }\nnegative = { volts = 4.7 }",
    );
    assert_ne!(text, ONE_STAGE_TOML);
    session
        .load_text(text.clone(), Some("mine.toml".into()))
        .unwrap();
    // One block notices the session and asks for the models; the worker builds them; the next block takes
    // them in and starts the fade at its first sample.
    out.extend(run(&mut p, &controls, &input[n0..n0 + block], block, 1).remove(0));
    worker.service();
    let start = n0 + block;
    out.extend(run(&mut p, &controls, &input[start..], block, 1).remove(0));
    let old = render(&Circuit::builtin(), rate, Quality::X4, 1, &input);
    let new_circuit = Circuit::from_toml(&text).unwrap();
    let new_from_rest = render(&new_circuit, rate, Quality::X4, 1, &input[start..]);
    let fade = (0.02 * rate) as usize;
    // out[n + latency] is the model's sample n (the renders have the latency removed).
    for n in start..start + fade {
        let (a, b) = (old[n], new_from_rest[n - start]);
        let y = out[n + latency];
        assert!(
            y >= a.min(b) - 1e-6 && y <= a.max(b) + 1e-6,
            "sample {n}: {y} not within [{a}, {b}]"
        );
    }
    for n in start + fade..input.len() - latency {
        assert_eq!(out[n + latency], new_from_rest[n - start], "sample {n}");
    }
    assert!(
        new_from_rest.iter().any(|y| y.abs() > 0.01),
        "silent render"
    );
}

/// The candidate runs the chosen family's datasheet row: the half-watt candidate at 12 V / 4.7 V equals the
/// renderer on a circuit whose position carries the 1N52xxB rows' knee data (parts::FAMILY_1N52XXB).
#[test]
fn the_candidate_runs_the_chosen_family() {
    let rate = 48_000.0;
    let input = guitar_like(rate, 0.2);
    let mut controls = Controls {
        position: CANDIDATE,
        ..Controls::default()
    };
    controls.candidate.positive = 12.0;
    controls.candidate.negative = 4.7;
    controls.candidate.family = FamilyChoice::HalfWatt;
    let (mut p, _w) = new_processor(rate, 1, &controls);
    let latency = p.latency() as usize;
    let out = run(&mut p, &controls, &input, 64, 1).remove(0);
    let mut circuit = Circuit::builtin();
    circuit.clamp.position = vec![SwitchPosition {
        name: "half-watt pair".into(),
        positive: Some(candidate_part(12.0, FamilyChoice::HalfWatt)),
        negative: Some(candidate_part(4.7, FamilyChoice::HalfWatt)),
    }];
    let sheet = breakdown_dsp::parts::FAMILY_1N52XXB.row(4.7).unwrap().sheet;
    assert_eq!(
        circuit.clamp.position[0].negative.unwrap().izt,
        Some(sheet.izt)
    );
    let reference = render(&circuit, rate, Quality::X4, 0, &input);
    for n in 0..input.len() - latency {
        assert_eq!(out[n + latency], reference[n], "sample {n}");
    }
}
