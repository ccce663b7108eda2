//! `breakdown bench`: speed per quality for one channel at 48 kHz on a DI-like signal.

use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::time::Instant;

const RATE: f64 = 48_000.0;
const BLOCK: usize = 512;
/// Each quality renders the signal again until its measured time reaches this (s): the thread CPU time the
/// kernel reports advances in scheduler ticks (4 ms here), so a short run would be off by a tick's share.
const MIN_MEASURED_SECONDS: f64 = 1.0;

#[derive(clap::Args)]
pub struct BenchArgs {
    /// Seconds of test signal rendered per quality.
    #[arg(long, default_value_t = 10.0)]
    pub seconds: f64,
}

/// A DI-like test signal in full-scale units (1.0 = 1 V at the jack for the reference circuit): a 110 Hz
/// plucked note with harmonics, re-plucked every second, each pluck decaying from `peak`, the higher
/// harmonics faster, as a string does.
pub fn plucked_di(rate: f64, seconds: f64, peak: f64) -> Vec<f32> {
    let n = (rate * seconds).round() as usize;
    let f0 = 110.0;
    // Harmonic amplitudes 1/k and decay rates rising with k (1/s).
    let harmonics: Vec<(f64, f64, f64)> = (1..=8)
        .map(|k| (k as f64 * f0, 1.0 / k as f64, 2.0 + 1.5 * k as f64))
        .collect();
    let raw: Vec<f64> = (0..n)
        .map(|i| {
            let t = (i as f64 / rate) % 1.0;
            // 2 ms attack so the pluck has no step.
            let attack = (t / 0.002).min(1.0);
            harmonics
                .iter()
                .map(|&(f, a, d)| a * (-d * t).exp() * (std::f64::consts::TAU * f * t).sin())
                .sum::<f64>()
                * attack
        })
        .collect();
    let max = raw.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-12);
    raw.iter().map(|v| (v * peak / max) as f32).collect()
}

/// CPU time this thread has run (s), from Linux's /proc/thread-self/schedstat (first field, ns); `None`
/// elsewhere. On a shared machine this is fairer than wall-clock time, which counts time spent waiting.
fn thread_cpu_seconds() -> Option<f64> {
    let text = std::fs::read_to_string("/proc/thread-self/schedstat").ok()?;
    let ns: u64 = text.split_whitespace().next()?.parse().ok()?;
    Some(ns as f64 * 1e-9)
}

pub fn run(args: BenchArgs) -> Result<(), String> {
    if !args.seconds.is_finite() || args.seconds < 0.1 || args.seconds > 3600.0 {
        return Err(format!(
            "--seconds {}: give a length from 0.1 to 3600 seconds",
            args.seconds
        ));
    }
    let circuit = Circuit::one_stage();
    let settings = Settings {
        gain: 0.8,
        position: 1,
        ..Settings::default()
    };
    let signal = plucked_di(RATE, args.seconds, 0.8);
    let warmup = plucked_di(RATE, 0.2, 0.8);
    println!(
        "breakdown bench: reference circuit, one channel at {} kHz, {:.1} s of plucked 110 Hz DI (0.8 V peak), \
         gain {}, level {}, position {} ({})",
        RATE / 1000.0,
        args.seconds,
        settings.gain,
        settings.level,
        settings.position,
        circuit.clamp.position[settings.position].name
    );
    println!(
        "{:>7} {:>14} {:>14} {:>16} {:>12} {:>18} {:>10}",
        "quality", "ns/sample", "ns/step", "x real time", "(wall)", "Newton its/step", "failures"
    );
    let mut out = vec![0.0f32; BLOCK];
    for quality in Quality::ALL {
        let mut engine = Engine::new(&circuit, RATE, quality, settings).map_err(|e| e.0)?;
        for block in warmup.chunks(BLOCK) {
            engine.process_block(block, &mut out[..block.len()], Probe::Listen);
        }
        let mut sink = 0.0f32;
        let cpu_start = thread_cpu_seconds();
        let start = Instant::now();
        let mut renders = 0usize;
        let (wall, cpu) = loop {
            engine.reset();
            engine.reset_meters();
            for block in signal.chunks(BLOCK) {
                engine.process_block(block, &mut out[..block.len()], Probe::Listen);
                sink += std::hint::black_box(out[0]);
            }
            renders += 1;
            let wall = start.elapsed().as_secs_f64();
            let cpu = match (cpu_start, thread_cpu_seconds()) {
                (Some(a), Some(b)) if b > a => Some(b - a),
                _ => None,
            };
            if cpu.unwrap_or(wall) >= MIN_MEASURED_SECONDS {
                break (wall, cpu);
            }
        };
        let elapsed = cpu.unwrap_or(wall);
        std::hint::black_box(sink);
        let samples = (signal.len() * renders) as f64;
        let factor = quality.factor() as f64;
        let m = engine.meters();
        let iterations = if m.samples > 0 {
            m.newton_iterations as f64 / m.samples as f64
        } else {
            0.0
        };
        println!(
            "{:>6}x {:>14.1} {:>14.1} {:>16.1} {:>12.1} {:>18.2} {:>10}",
            quality.factor(),
            elapsed * 1e9 / samples,
            elapsed * 1e9 / (samples * factor),
            args.seconds * renders as f64 / elapsed,
            args.seconds * renders as f64 / wall,
            iterations,
            m.newton_failures
        );
    }
    if thread_cpu_seconds().is_none() {
        println!("(thread CPU time unavailable here: figures are wall-clock)");
    } else {
        println!(
            "(ns and x real time from the thread's CPU time over at least {MIN_MEASURED_SECONDS} s per quality, \
             the signal rendered again as often as needed; the (wall) column from wall-clock time)"
        );
    }
    println!(
        "(model copy: {}; BREAKDOWN_SEPARATE_MADD=1 times the other)",
        if breakdown_dsp::arith::fused_available() {
            "fused multiply-add, as this processor has FMA"
        } else {
            "separate multiply and add"
        }
    );
    println!(
        "(targets: at least 50x real time at the default 4x quality, at least 300x at 1x; one core, this machine)"
    );
    Ok(())
}
