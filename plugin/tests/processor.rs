//! The plugin's real-time processor driven directly (no host): equality with the `breakdown-dsp` engine on the
//! circuit it runs, no allocation or freeing on the audio thread (circuit swaps, rebuilt models and the
//! loudness meters included), click-free switching and circuit swaps, level match checked with a BS.1770 meter
//! (the `ebur128` crate, run here on the plugin's output; its own EBU Tech 3341 check is in src/loudness.rs).

use breakdown::controls_from;
use breakdown::params::{BreakdownParams, CabinetChoice, FamilyChoice, ListenPoint};
use breakdown::runtime::{candidate_part, Controls, Processor, Worker};
use breakdown::session::{Session, CANDIDATE};
use breakdown::shared::Shared;
use breakdown_dsp::cabinet::{Cabinet, ImpulseResponse};
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

/// The defaults without the cabinet: the chain ends at the tone stack's output, the engine's listening output.
fn bare() -> Controls {
    Controls {
        cabinet: CabinetChoice::None,
        ..Controls::default()
    }
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
fn default_output_without_cabinet_equals_the_dsp_engine() {
    // The plugin's output with the cabinet set to none must be the dsp crate's listening output (the tone
    // stack's output of the built-in circuit) for the same settings on the same circuit, delayed by the
    // reported latency.
    let params = BreakdownParams::default();
    let controls = Controls {
        cabinet: CabinetChoice::None,
        ..controls_from(&params)
    };
    assert_eq!(controls.listen, ListenPoint::Chain);
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
    controls.listen = ListenPoint::ClampNode;
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
    // The listening chain: back to the chain, the cabinet off and on again, then a loaded response (read and
    // checked off the audio thread, prepared by the worker, swapped in and the old cabinet handed back).
    controls.listen = ListenPoint::Chain;
    controls.cabinet = CabinetChoice::None;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    controls.cabinet = CabinetChoice::BuiltIn;
    events += step(&mut p, &controls);
    worker.service();
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    session
        .load_ir(&float_wav(44_100, &invented_ir(44_100)), "room.wav".into())
        .unwrap();
    controls.cabinet = CabinetChoice::Loaded;
    events += step(&mut p, &controls);
    worker.service();
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    controls.listen = ListenPoint::Wiper;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    controls.listen = ListenPoint::Chain;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    worker.service();
    assert_eq!(
        p.cabinet_spec(),
        breakdown::runtime::CabinetSpec::Loaded(session.ir_id()),
        "the loaded cabinet plays"
    );
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
    let mut controls = bare();
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
        ..bare()
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
            ..bare()
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
    let controls = bare();
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
        ..bare()
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

// ---------------------------------------------------------------------------------------------------------
// The listening chain: listening points and the cabinet

/// A mono 32-bit float WAV file (WAVE_FORMAT_IEEE_FLOAT, the Microsoft/IBM RIFF layout), of our own making.
fn float_wav(rate: u32, samples: &[f32]) -> Vec<u8> {
    let data = samples.len() * 4;
    let mut b = Vec::with_capacity(44 + data);
    b.extend_from_slice(b"RIFF");
    b.extend_from_slice(&((36 + data) as u32).to_le_bytes());
    b.extend_from_slice(b"WAVEfmt ");
    b.extend_from_slice(&16u32.to_le_bytes());
    b.extend_from_slice(&3u16.to_le_bytes()); // IEEE float
    b.extend_from_slice(&1u16.to_le_bytes()); // mono
    b.extend_from_slice(&rate.to_le_bytes());
    b.extend_from_slice(&(rate * 4).to_le_bytes());
    b.extend_from_slice(&4u16.to_le_bytes());
    b.extend_from_slice(&32u16.to_le_bytes());
    b.extend_from_slice(b"data");
    b.extend_from_slice(&(data as u32).to_le_bytes());
    for s in samples {
        b.extend_from_slice(&s.to_le_bytes());
    }
    b
}

/// An invented cabinet-like response: a unit first tap and a decaying 1.8 kHz ring, 0.1 s at `rate`.
fn invented_ir(rate: u32) -> Vec<f32> {
    let n = rate as usize / 10;
    (0..n)
        .map(|k| {
            let t = k as f64 / rate as f64;
            let ring =
                0.5 * (-t / 0.004).exp() * (2.0 * std::f64::consts::PI * 1800.0 * t + 0.3).sin();
            (if k == 0 { 1.0 } else { 0.0 } + ring) as f32
        })
        .collect()
}

/// The engine's raw per-sample frames on the built-in circuit at the plugin's default settings (latency
/// included, as the plugin's output carries it): (listening output, wiper volts) per sample.
fn engine_frames(rate: f64, input: &[f32]) -> Vec<(f64, f64)> {
    let settings = Settings {
        gain: 0.8,
        level: 0.5,
        position: 1,
        ..Default::default()
    };
    let mut e = Engine::new(&Circuit::builtin(), rate, Quality::X4, settings).unwrap();
    e.set_input_calibration(1.0);
    input
        .iter()
        .map(|&x| {
            let f = e.process_sample(x);
            (f.listen, f.wiper_volts)
        })
        .collect()
}

/// `signal` through `cabinet` run on its own, one sample at a time (left, right).
fn through(mut cabinet: Cabinet, signal: &[f64], channels: usize) -> Vec<[f64; 2]> {
    signal
        .iter()
        .map(|&x| {
            if channels == 1 {
                cabinet.process_mono(x)
            } else {
                cabinet.process([x, x])
            }
        })
        .collect()
}

fn assert_close(out: &[Vec<f32>], reference: &[[f64; 2]], what: &str) {
    for (c, ch) in out.iter().enumerate() {
        for (n, (y, r)) in ch.iter().zip(reference).enumerate() {
            let r = r[c.min(1)];
            // Float rounding: the plugin writes 32-bit samples of the same f64 arithmetic.
            assert!(
                (*y as f64 - r).abs() <= 1e-6 * (1.0 + r.abs()),
                "{what}: channel {c} sample {n}: {y} against {r}"
            );
        }
    }
}

#[test]
fn the_default_listening_point_is_the_chain_through_the_built_in_cabinet() {
    let controls = controls_from(&BreakdownParams::default());
    assert_eq!(controls.listen, ListenPoint::Chain);
    assert_eq!(controls.cabinet, CabinetChoice::BuiltIn);
    let d = Controls::default();
    assert_eq!((d.listen, d.cabinet), (controls.listen, controls.cabinet));
}

/// The wiring of the chain, cross-checked: the plugin's default output equals the engine's listening output
/// (the tone stack's output) run separately through `Cabinet::builtin` at the same rate, sample for sample.
#[test]
fn the_built_in_cabinet_follows_the_engine_listening_output() {
    let controls = Controls::default();
    for (rate, block, models, channels) in [(48_000.0, 64, 1, 2), (44_100.0, 1, 2, 2)] {
        let input = guitar_like(rate, 0.2);
        let (mut p, _w) = new_processor(rate, models, &controls);
        let out = run(&mut p, &controls, &input, block, channels);
        let listen: Vec<f64> = engine_frames(rate, &input).iter().map(|f| f.0).collect();
        let cabinet = Cabinet::builtin(rate, models).unwrap();
        let reference = through(cabinet, &listen, models);
        assert_close(&out, &reference, &format!("{rate} Hz, {models} model(s)"));
        // The cabinet really changes the signal (otherwise the check would prove nothing).
        let moved = listen
            .iter()
            .zip(&out[0])
            .fold(0.0f64, |m, (a, b)| m.max((a - *b as f64).abs()));
        assert!(
            moved > 0.01,
            "the cabinet left the signal as it was ({moved})"
        );
    }
}

/// The wiper listening point is the bare wiper: the engine's wiper volts over the circuit's `[listen]
/// volts_at_full_scale` (4 V in the built-in circuit), no tone stack, no cabinet; switching to it from the chain
/// crossfades (every sample of the fade between the two outputs).
#[test]
fn the_wiper_is_the_bare_wiper_and_switching_to_it_crossfades() {
    let rate = 48_000.0;
    let input = guitar_like(rate, 0.3);
    let mut controls = Controls::default();
    let (mut p, _w) = new_processor(rate, 1, &controls);
    let half = input.len() / 2;
    let mut out = run(&mut p, &controls, &input[..half], 64, 1).remove(0);
    controls.listen = ListenPoint::Wiper;
    out.extend(run(&mut p, &controls, &input[half..], 64, 1).remove(0));
    let frames = engine_frames(rate, &input);
    let vfs = Circuit::builtin().listen.volts_at_full_scale;
    assert_eq!(vfs, 4.0, "presets-demo/builtin-preamp.toml [listen]");
    let wiper: Vec<f64> = frames.iter().map(|f| f.1 / vfs).collect();
    let listen: Vec<f64> = frames.iter().map(|f| f.0).collect();
    let chain = through(Cabinet::builtin(rate, 1).unwrap(), &listen, 1);
    let fade = (0.02 * rate) as usize;
    for n in half..half + fade {
        let (a, b) = (chain[n][0], wiper[n]);
        let y = out[n] as f64;
        assert!(
            y >= a.min(b) - 1e-6 && y <= a.max(b) + 1e-6,
            "sample {n}: {y} not within [{a}, {b}]"
        );
    }
    for n in half + fade + 1..input.len() {
        assert!(
            (out[n] as f64 - wiper[n]).abs() <= 1e-6 * (1.0 + wiper[n].abs()),
            "sample {n}: {} against the wiper's {}",
            out[n],
            wiper[n]
        );
    }
    assert!(wiper.iter().any(|w| w.abs() > 0.01), "silent wiper");
}

/// An impulse response loaded into the session survives a save and a load (the persisted field as JSON, the
/// state check included) into another session, and the cabinet there plays it: the output equals the engine's
/// listening output through `Cabinet::new` of the same file decoded by the dsp crate's WAV reader.
#[test]
fn an_ir_in_the_state_survives_save_and_load_and_plays() {
    use breakdown::session::{PersistedState, STATE_FIELD};
    use nice_plug::params::persist::PersistentField;
    let bytes = float_wav(44_100, &invented_ir(44_100));
    let a = Session::default();
    let summary = a.load_ir(&bytes, "my room.wav".into()).expect("a good IR");
    assert!(summary.contains("44.1 kHz"), "{summary}");
    // Save (the framework stores the field as JSON), check as a host load does, load elsewhere.
    let saved = serde_json::to_string(&a.persisted()).unwrap();
    let mut state = nice_plug::plugin::PluginState {
        version: "0.1.0".into(),
        params: breakdown::state::default_param_values(),
        fields: [(STATE_FIELD.to_string(), saved)].into_iter().collect(),
    };
    let repair = breakdown::state::repair_state(&mut state);
    assert!(repair.notes.is_empty(), "{:?}", repair.notes);
    let loaded: PersistedState = serde_json::from_str(&state.fields[STATE_FIELD]).unwrap();
    let b = Arc::new(Session::default());
    PersistentField::set(b.as_ref(), loaded);
    b.refresh();
    let view = b.ir_view();
    assert_eq!(view.file.as_deref(), Some("my room.wav"));
    assert_eq!(view.problem, None);
    assert_ne!(b.ir_id(), 0);
    assert_eq!(a.ir().1.unwrap().as_ref(), b.ir().1.unwrap().as_ref());
    let rate = 48_000.0;
    let controls = Controls {
        cabinet: CabinetChoice::Loaded,
        ..Controls::default()
    };
    let (mut p, _w) = new_processor_on(b, rate, 1, &controls);
    let input = guitar_like(rate, 0.2);
    let out = run(&mut p, &controls, &input, 128, 2);
    let wav = breakdown_dsp::wav::parse(&bytes, "my room.wav", &Default::default()).unwrap();
    let ir = ImpulseResponse {
        channels: wav.audio.channels,
        sample_rate: wav.audio.rate as f64,
    };
    let listen: Vec<f64> = engine_frames(rate, &input).iter().map(|f| f.0).collect();
    let reference = through(Cabinet::new(&ir, rate, 1).unwrap(), &listen, 1);
    assert_close(&out, &reference, "loaded IR");
    // And it is not the built-in cabinet.
    let builtin = through(Cabinet::builtin(rate, 1).unwrap(), &listen, 1);
    assert!(builtin
        .iter()
        .zip(&reference)
        .any(|(x, y)| (x[0] - y[0]).abs() > 1e-3));
}

/// A bad impulse response arriving in a state (as a host loads one) is refused with a message naming the
/// problem; the running response stays, the persisted field goes back to it, and the cabinet keeps playing
/// sample for sample as before.
#[test]
fn a_bad_ir_in_the_state_is_refused_and_the_old_cabinet_keeps_playing() {
    use breakdown::ir::encode_base64;
    use nice_plug::params::persist::PersistentField;
    let rate = 48_000.0;
    let good = float_wav(48_000, &invented_ir(48_000));
    let session = Arc::new(Session::default());
    session.load_ir(&good, "good.wav".into()).unwrap();
    let id = session.ir_id();
    let controls = Controls {
        cabinet: CabinetChoice::Loaded,
        ..Controls::default()
    };
    let shared = Arc::new(Shared::default());
    let worker = Arc::new(Worker::new(session.clone()));
    let mut p = Processor::new(rate, 1, &controls, worker.clone(), shared.clone()).unwrap();
    let input = guitar_like(rate, 0.5);
    let mut nan = invented_ir(48_000);
    nan[10] = f32::NAN;
    let cases: [(&str, String, &str); 5] = [
        ("damaged.wav", "not base64!".into(), "not base64"),
        (
            "text.wav",
            encode_base64(b"hello, not audio"),
            "not a WAV file",
        ),
        (
            "nan.wav",
            encode_base64(&float_wav(48_000, &nan)),
            "non-finite",
        ),
        ("empty.wav", encode_base64(&float_wav(48_000, &[])), "empty"),
        (
            "long.wav",
            encode_base64(&float_wav(8_000, &vec![0.25; 8_000 * 3])),
            "longest accepted is 2.000 s",
        ),
    ];
    let chunk = input.len() / (cases.len() + 1);
    let mut out = run(&mut p, &controls, &input[..chunk], 64, 1).remove(0);
    for (k, (file, text, expect)) in cases.iter().enumerate() {
        let mut state = session.persisted();
        state.ir = Some(text.clone());
        state.ir_file = Some(file.to_string());
        PersistentField::set(session.as_ref(), state);
        // The audio thread notices the new state and wakes the worker, which reads it.
        let start = chunk * (k + 1);
        out.extend(run(&mut p, &controls, &input[start..start + 64], 64, 1).remove(0));
        worker.service();
        let end = if k + 1 == cases.len() {
            input.len()
        } else {
            start + chunk
        };
        out.extend(run(&mut p, &controls, &input[start + 64..end], 64, 1).remove(0));
        let view = session.ir_view();
        let problem = view.problem.unwrap_or_default();
        assert!(
            problem.contains(expect) && problem.contains(file),
            "{file}: {problem}"
        );
        assert_eq!(session.ir_id(), id, "{file}: the running response changed");
        assert_eq!(view.file.as_deref(), Some("good.wav"));
        assert_eq!(
            session.persisted().ir,
            Some(breakdown::ir::encode_base64(&good)),
            "{file}: the refused response was left in the persisted field"
        );
        assert_eq!(shared.cabinet_kind.load(Ordering::Relaxed), 2);
        assert_eq!(shared.cabinet_ir.load(Ordering::Relaxed), id);
    }
    let wav = breakdown_dsp::wav::parse(&good, "good.wav", &Default::default()).unwrap();
    let ir = ImpulseResponse {
        channels: wav.audio.channels,
        sample_rate: wav.audio.rate as f64,
    };
    let listen: Vec<f64> = engine_frames(rate, &input).iter().map(|f| f.0).collect();
    let reference = through(Cabinet::new(&ir, rate, 1).unwrap(), &listen, 1);
    assert_close(&[out], &reference, "the good IR throughout");
}

/// Changing the cabinet crossfades: from the built-in cabinet to none, every sample of the fade lies between
/// the two outputs, and after it the output is the bare listening output.
#[test]
fn changing_the_cabinet_crossfades() {
    let rate = 48_000.0;
    let input = guitar_like(rate, 0.3);
    let mut controls = Controls::default();
    let (mut p, _w) = new_processor(rate, 1, &controls);
    let half = input.len() / 2;
    let mut out = run(&mut p, &controls, &input[..half], 64, 1).remove(0);
    controls.cabinet = CabinetChoice::None;
    out.extend(run(&mut p, &controls, &input[half..], 64, 1).remove(0));
    let listen: Vec<f64> = engine_frames(rate, &input).iter().map(|f| f.0).collect();
    let chain = through(Cabinet::builtin(rate, 1).unwrap(), &listen, 1);
    let fade = (0.02 * rate) as usize;
    for n in half..half + fade {
        let (a, b) = (chain[n][0], listen[n]);
        let y = out[n] as f64;
        assert!(
            y >= a.min(b) - 1e-6 && y <= a.max(b) + 1e-6,
            "sample {n}: {y} not within [{a}, {b}]"
        );
    }
    for n in half + fade..input.len() {
        assert_eq!(out[n], listen[n] as f32, "sample {n}");
    }
}

/// A new activation at another rate (the plugin keeps its worker and session across activations) builds the
/// cabinet again at the new rate: the loaded response plays as `Cabinet::new` at 44.1 kHz, then at 96 kHz.
#[test]
fn a_new_activation_rebuilds_the_cabinet_at_its_rate() {
    let bytes = float_wav(48_000, &invented_ir(48_000));
    let session = Arc::new(Session::default());
    session.load_ir(&bytes, "room.wav".into()).unwrap();
    let wav = breakdown_dsp::wav::parse(&bytes, "room.wav", &Default::default()).unwrap();
    let ir = ImpulseResponse {
        channels: wav.audio.channels,
        sample_rate: wav.audio.rate as f64,
    };
    let controls = Controls {
        cabinet: CabinetChoice::Loaded,
        ..Controls::default()
    };
    let worker = Arc::new(Worker::new(session.clone()));
    for rate in [44_100.0, 96_000.0] {
        let shared = Arc::new(Shared::default());
        let mut p = Processor::new(rate, 1, &controls, worker.clone(), shared).unwrap();
        let input = guitar_like(rate, 0.15);
        let out = run(&mut p, &controls, &input, 256, 1);
        worker.service();
        let listen: Vec<f64> = engine_frames(rate, &input).iter().map(|f| f.0).collect();
        let reference = through(Cabinet::new(&ir, rate, 1).unwrap(), &listen, 1);
        assert_close(&out, &reference, &format!("{rate} Hz"));
    }
}
