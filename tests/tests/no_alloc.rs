//! No allocation in the processing path (issue 2; real-time audio practice: the audio thread must not call the
//! allocator, which may lock). A counting global allocator records every allocation while armed; this binary
//! has its own harness (`harness = false` in Cargo.toml) so nothing else runs in it.

use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};

struct Counting;

static ARMED: AtomicBool = AtomicBool::new(false);
static ALLOCATIONS: AtomicUsize = AtomicUsize::new(0);

// SAFETY: forwards every call to the system allocator unchanged; only counts.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        if ARMED.load(Ordering::Relaxed) {
            ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        }
        System.alloc(layout)
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        if ARMED.load(Ordering::Relaxed) {
            ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        }
        System.alloc_zeroed(layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        if ARMED.load(Ordering::Relaxed) {
            ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        }
        System.realloc(ptr, layout, new_size)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        if ARMED.load(Ordering::Relaxed) {
            ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        }
        System.dealloc(ptr, layout)
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

/// Allocator calls made by `f`.
fn count(f: impl FnOnce()) -> usize {
    ALLOCATIONS.store(0, Ordering::SeqCst);
    ARMED.store(true, Ordering::SeqCst);
    f();
    ARMED.store(false, Ordering::SeqCst);
    ALLOCATIONS.load(Ordering::SeqCst)
}

fn main() {
    let rate = 48_000.0;
    // A signal that clamps hard, with hostile samples mixed in, and a block buffer made before arming.
    let input: Vec<f32> = (0..4_800)
        .map(|n| match n {
            1_000 => f32::NAN,
            1_001 => f32::INFINITY,
            1_002 => -1e9,
            2_000 => 1e-40,
            _ => (1.5 * (2.0 * std::f64::consts::PI * 440.0 * n as f64 / rate).sin()) as f32,
        })
        .collect();
    let mut output = vec![0.0f32; input.len()];
    let mut failures = Vec::new();
    for quality in Quality::ALL {
        for position in 0..3 {
            let settings = Settings {
                position,
                ..Settings::default()
            };
            let mut engine = Engine::new(&Circuit::one_stage(), rate, quality, settings)
                .expect("reference circuit");
            let n = count(|| {
                let mut sum = 0.0;
                for &x in &input[..2_400] {
                    sum += engine.process_sample(x).clamp_volts;
                }
                // Real-time controls while running: pot moves glide, the switch flips, calibration changes.
                engine.set_gain(0.3);
                engine.set_level(0.9);
                engine.set_position((position + 1) % 3);
                engine.set_input_calibration(2.0);
                engine.process_block(&input[2_400..], &mut output[2_400..], Probe::Wiper);
                for probe in Probe::FIXED {
                    sum += engine.process_sample(0.1).get(probe);
                }
                std::hint::black_box(sum);
                let m = engine.meters();
                std::hint::black_box(
                    m.share_clamped() + m.zener_rms_current() + m.average_watts().0,
                );
                std::hint::black_box(engine.latency());
            });
            println!("{quality:?} position {position}: {n} allocator calls while processing");
            if n != 0 {
                failures.push(format!(
                    "{quality:?} position {position}: {n} allocator calls"
                ));
            }
        }
    }
    // The counter works: an allocation while armed is seen (so zero above means zero).
    let seen = count(|| {
        std::hint::black_box(vec![1u8; 16]);
    });
    assert!(seen >= 1, "the counting allocator saw nothing");
    if !failures.is_empty() {
        eprintln!(
            "allocation in the processing path:\n{}",
            failures.join("\n")
        );
        std::process::exit(1);
    }
    println!("no_alloc: ok");
}
