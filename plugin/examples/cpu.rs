//! CPU cost of the plugin's processor on the built-in circuit at the default quality (4x), 48 kHz: the share of
//! one core for a mono and a stereo DI with one position running, with the heard and compare-with positions,
//! and with every position live (the three switch positions and the candidate), and the ratios between them,
//! all measured in the same run. A stereo DI runs as two lanes of one engine per position.
//! Run: cargo run --release -p breakdown --example cpu [seconds] [case]

use breakdown::runtime::{Controls, Processor, Worker};
use breakdown::shared::Shared;
use std::sync::Arc;
use std::time::Instant;

fn main() {
    let seconds: f64 = std::env::args()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(5.0);
    // Optional second argument: run only that case (0-3), e.g. under a profiler.
    let only: Option<usize> = std::env::args().nth(2).and_then(|s| s.parse().ok());
    let rate = 48_000.0;
    let block = 256;
    let n = (rate * seconds) as usize;
    let input: Vec<f32> = (0..n)
        .map(|k| {
            let t = k as f64 / rate;
            (0.5 * (-(t % 1.0) * 2.0).exp() * (2.0 * std::f64::consts::PI * 110.0 * t).sin()) as f32
        })
        .collect();
    // (label, input channels, which positions run)
    let cases = [
        ("mono DI, one position", 1, Running::One),
        ("mono DI, heard + compare-with", 1, Running::Two),
        ("mono DI, every position live", 1, Running::All),
        ("stereo DI, one position", 2, Running::One),
        ("stereo DI, heard + compare-with", 2, Running::Two),
        ("stereo DI, every position live", 2, Running::All),
    ];
    let mut share = [f64::NAN; 6];
    for (case, (label, models, running)) in cases.into_iter().enumerate() {
        if only.is_some_and(|k| k != case) {
            continue;
        }
        let defaults = Controls::default();
        let controls = Controls {
            run_all: running == Running::All,
            compare_with: if running == Running::One {
                defaults.position
            } else {
                defaults.compare_with
            },
            ..defaults
        };
        let mut p = Processor::new(
            rate,
            models,
            &controls,
            Arc::new(Worker::default()),
            Arc::new(Shared::default()),
        )
        .expect("processor");
        // Stereo out in every case (a mono model feeds both outputs).
        let mut bufs = vec![vec![0.0f32; block]; 2];
        let start = Instant::now();
        for chunk in input.chunks(block) {
            for b in bufs.iter_mut() {
                b.resize(chunk.len(), 0.0);
                b.copy_from_slice(chunk);
            }
            let mut slices: Vec<&mut [f32]> = bufs.iter_mut().map(|b| b.as_mut_slice()).collect();
            p.process(&controls, &mut slices);
        }
        let used = start.elapsed().as_secs_f64();
        share[case] = 100.0 * used / seconds;
        println!(
            "{label}: {:.1}% of one core ({used:.2} s for {seconds} s of audio)",
            share[case]
        );
    }
    let ratio = |a: usize, b: usize| share[a] / share[b];
    if share.iter().all(|s| s.is_finite()) {
        println!(
            "ratios in this run: heard + compare-with / one position {:.2} (mono), {:.2} (stereo); every position / \
             one {:.2} (mono), {:.2} (stereo); stereo / mono {:.2} (one position), {:.2} (two), {:.2} (every)",
            ratio(1, 0),
            ratio(4, 3),
            ratio(2, 0),
            ratio(5, 3),
            ratio(3, 0),
            ratio(4, 1),
            ratio(5, 2)
        );
    }
}

#[derive(Clone, Copy, PartialEq)]
enum Running {
    One,
    Two,
    All,
}
