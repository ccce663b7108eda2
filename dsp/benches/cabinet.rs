//! Criterion benchmark: one block of 4800 samples (0.1 s at 48 kHz) through a cabinet with a 2048-tap
//! response (mono signal, mono response; and mono signal, stereo response), on the same DI-like note as the
//! engine benchmark, so the two read as a ratio.

use breakdown_dsp::cabinet::{Cabinet, ImpulseResponse};
use criterion::{black_box, criterion_group, criterion_main, Criterion, Throughput};

const RATE: f64 = 48_000.0;
const BLOCK: usize = 4800;
const TAPS: usize = 2048;

/// A 110 Hz note with eight harmonics, peak 0.8 full scale (as in `engine.rs`).
fn plucked(n: usize) -> Vec<f64> {
    let raw: Vec<f64> = (0..n)
        .map(|i| {
            let t = i as f64 / RATE;
            let attack = (t / 0.002).min(1.0);
            (1..=8)
                .map(|k| {
                    let k = k as f64;
                    (-(2.0 + 1.5 * k) * t).exp() / k * (std::f64::consts::TAU * 110.0 * k * t).sin()
                })
                .sum::<f64>()
                * attack
        })
        .collect();
    let max = raw.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    raw.iter().map(|v| 0.8 * v / max).collect()
}

/// A decaying noise-like response of `TAPS` samples (a fixed linear congruential sequence).
fn response(seed: u64) -> Vec<f32> {
    let mut state = seed;
    (0..TAPS)
        .map(|i| {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1_442_695_040_888_963_407);
            let u = (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5;
            (u * (-(i as f64) / 400.0).exp()) as f32
        })
        .collect()
}

fn cabinet_block(c: &mut Criterion) {
    let note = plucked(48_000);
    let mut group = c.benchmark_group("cabinet_2048_taps_4800_samples_48k");
    group.throughput(Throughput::Elements(BLOCK as u64));
    group.sample_size(20);
    for (name, channels) in [
        ("mono", vec![response(1)]),
        ("stereo_response", vec![response(1), response(2)]),
    ] {
        let ir = ImpulseResponse {
            channels,
            sample_rate: RATE,
        };
        let mut cabinet = Cabinet::new(&ir, RATE, 1).expect("a plain response");
        assert_eq!(cabinet.taps(), TAPS);
        let mut start = 0;
        group.bench_function(name, |b| {
            b.iter(|| {
                let mut sum = 0.0;
                for &x in &note[start..start + BLOCK] {
                    let y = cabinet.process_mono(black_box(x));
                    sum += y[0] + y[1];
                }
                start = (start + BLOCK) % note.len();
                black_box(sum)
            })
        });
    }
    group.finish();
}

criterion_group!(benches, cabinet_block);
criterion_main!(benches);
