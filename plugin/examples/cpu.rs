//! CPU cost of the plugin's processor on the built-in circuit with instant comparison on (its three switch
//! positions and the candidate running), at the default quality: prints the share of one core for a mono and
//! a stereo 48 kHz stream.
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
    for (label, models, channels, run_all) in [
        (
            "mono in, stereo out, 3 positions + candidate running",
            1,
            2,
            true,
        ),
        ("stereo, 3 positions + candidate running", 2, 2, true),
        (
            "mono in, stereo out, heard + compare-with only",
            1,
            2,
            false,
        ),
        ("stereo, heard + compare-with only", 2, 2, false),
    ]
    .into_iter()
    .enumerate()
    .filter(|(case, _)| only.is_none_or(|k| k == *case))
    .map(|(_, c)| c)
    {
        let controls = Controls {
            run_all,
            ..Controls::default()
        };
        let mut p = Processor::new(
            rate,
            models,
            &controls,
            Arc::new(Worker::default()),
            Arc::new(Shared::default()),
        )
        .expect("processor");
        let mut bufs = vec![vec![0.0f32; block]; channels];
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
        println!(
            "{label} ({models} model(s) per position), 4x oversampling, 48 kHz: {:.1}% of one core ({used:.2} s for {seconds} s of audio)",
            100.0 * used / seconds
        );
    }
}
