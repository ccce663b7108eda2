//! The plugin's real-time processor driven directly (no host): equality with the `breakdown-dsp` engine,
//! no allocation or freeing on the audio thread, click-free switching, level match checked with an independent
//! BS.1770 meter (the `ebur128` crate).

use breakdown::controls_from;
use breakdown::params::BreakdownParams;
use breakdown::runtime::{Controls, Processor, Worker};
use breakdown::shared::Shared;
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
    let worker = Arc::new(Worker::default());
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

#[test]
fn default_output_equals_the_dsp_engine() {
    // The plugin's output must be the dsp crate's output for the same settings, delayed by the reported latency.
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
        let mut engine = Engine::new(&Circuit::one_stage(), rate, Quality::X4, settings).unwrap();
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
    let (mut p, worker) = new_processor(rate, 2, &controls);
    let mut a = input.clone();
    let mut b = input.clone();
    let mut step = |p: &mut Processor, controls: &Controls| {
        a.copy_from_slice(&input);
        b.copy_from_slice(&input);
        let mut chans: [&mut [f32]; 2] = [&mut a, &mut b];
        counted(|| p.process(controls, &mut chans)).1
    };
    let mut events = step(&mut p, &controls);
    // Every control moves, switch positions change, new parts and a new quality are requested.
    controls.gain = 0.3;
    controls.level = 0.9;
    controls.heard = 2;
    controls.listen_clamp = true;
    controls.level_match = true;
    controls.trim_db = -6.0;
    controls.calibration = 0.4;
    controls.specs[1].pair = Some((12.0, 4.7));
    controls.specs[3].quality = Quality::X2;
    events += step(&mut p, &controls);
    // The worker builds the new models (allocation here is fine: background thread) ...
    worker.service();
    // ... and the audio thread swaps them in, fades, and hands the old ones back.
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    worker.service();
    controls.heard = 3;
    for _ in 0..30 {
        events += step(&mut p, &controls);
    }
    assert_eq!(events, 0, "allocations or frees inside process()");
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
    controls.heard = 2;
    out.extend(run(&mut p, &controls, &input[half..], 64, 1).remove(0));
    let render = |position: usize| {
        let settings = Settings {
            gain: 0.8,
            level: 0.5,
            position,
            ..Default::default()
        };
        let mut e = Engine::new(&Circuit::one_stage(), rate, Quality::X4, settings).unwrap();
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
        gain: 1.0,
        ..Controls::default()
    };
    let mut measured = Vec::new();
    for heard in [0, 1, 2] {
        controls.heard = heard;
        let (mut p, _w) = new_processor(rate, 1, &controls);
        let out = run(&mut p, &controls, &input, 512, 1).remove(0);
        measured.push(lufs(&out[n - (rate * 3.0) as usize..], rate));
    }
    let unmatched = {
        let c = Controls {
            level_match: false,
            gain: 1.0,
            heard: 0,
            ..Controls::default()
        };
        let (mut p, _w) = new_processor(rate, 1, &c);
        let out = run(&mut p, &c, &input, 512, 1).remove(0);
        let off = lufs(&out[n - (rate * 3.0) as usize..], rate);
        let c = Controls { heard: 2, ..c };
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
