//! Criterion benchmark: one block of 4800 host samples (0.1 s at 48 kHz) through the reference stage at 1x
//! and 4x, on a DI-like plucked 110 Hz note at 0.8 V peak, gain 0.8, symmetric 20 V pair.

use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use criterion::{black_box, criterion_group, criterion_main, Criterion, Throughput};

const RATE: f64 = 48_000.0;
const BLOCK: usize = 4800;

/// A 110 Hz note with eight harmonics (amplitude 1/k, higher ones decaying faster), peak 0.8 full scale.
fn plucked(n: usize) -> Vec<f32> {
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
    raw.iter().map(|v| (0.8 * v / max) as f32).collect()
}

fn engine_block(c: &mut Criterion) {
    let circuit = Circuit::one_stage();
    let settings = Settings {
        gain: 0.8,
        position: 1,
        ..Settings::default()
    };
    // Blocks from a 1 s note: each iteration takes the next block so the signal keeps its decay.
    let note = plucked(48_000);
    let mut group = c.benchmark_group("engine_4800_samples_48k");
    group.throughput(Throughput::Elements(BLOCK as u64));
    group.sample_size(20);
    for quality in [Quality::X1, Quality::X4] {
        let mut engine = Engine::new(&circuit, RATE, quality, settings).expect("reference circuit");
        let mut out = vec![0.0f32; BLOCK];
        let mut start = 0;
        group.bench_function(format!("x{}", quality.factor()), |b| {
            b.iter(|| {
                let block = &note[start..start + BLOCK];
                start = (start + BLOCK) % note.len();
                engine.process_block(black_box(block), &mut out, Probe::Listen);
                black_box(out[BLOCK - 1])
            })
        });
    }
    group.finish();
}

criterion_group!(benches, engine_block);
criterion_main!(benches);
