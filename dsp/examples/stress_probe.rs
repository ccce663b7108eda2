//! Stress probe: the built-in preamp driven hard (gain and calibration at their extremes, full-scale noise or
//! square) at a chosen rate and oversampling; prints ns per output sample and Newton iterations per step.
//! Arguments: rate [oversampling factor 1..16] [volts at full scale, default 20] [signal: noise|square|di].
use breakdown_dsp::{Circuit, Engine, Quality, Settings};
use std::time::Instant;
fn main() {
    let arg = |n: usize| std::env::args().nth(n);
    let rate: f64 = arg(1).and_then(|s| s.parse().ok()).unwrap_or(48_000.0);
    let factor: u32 = arg(2).and_then(|s| s.parse().ok()).unwrap_or(1);
    let volts: f64 = arg(3).and_then(|s| s.parse().ok()).unwrap_or(20.0);
    let signal = arg(4).unwrap_or_else(|| "noise".into());
    let q = [
        Quality::X1,
        Quality::X2,
        Quality::X4,
        Quality::X8,
        Quality::X16,
    ]
    .into_iter()
    .find(|q| q.factor() as u32 == factor)
    .expect("factor 1, 2, 4, 8 or 16");
    let _flush = breakdown_dsp::denormals::FlushGuard::new();
    let c = Circuit::builtin();
    let mut e = Engine::new(
        &c,
        rate,
        q,
        Settings {
            gain: 1.0,
            level: 1.0,
            position: 1,
            ..Default::default()
        },
    )
    .unwrap();
    e.set_input_calibration(volts);
    e.set_active_probes(&[breakdown_dsp::Probe::Listen]);
    let n = (rate * 1.0) as usize;
    let mut seed = 0x1234_5678_9abc_def0u64;
    let input: Vec<f32> = (0..n)
        .map(|i| match signal.as_str() {
            "square" => {
                if (i / (rate / 400.0) as usize).is_multiple_of(2) {
                    1.0
                } else {
                    -1.0
                }
            }
            "di" => (0.5 * (2.0 * std::f64::consts::PI * 110.0 * i as f64 / rate).sin()) as f32,
            _ => {
                seed ^= seed >> 12;
                seed ^= seed << 25;
                seed ^= seed >> 27;
                (seed.wrapping_mul(0x2545_f491_4f6c_dd1d) >> 11) as f32 / (1u64 << 53) as f32 * 2.0
                    - 1.0
            }
        })
        .collect();
    let t0 = Instant::now();
    let mut acc = 0.0f64;
    for &x in &input {
        acc += e.process_sample(x).listen;
    }
    let el = t0.elapsed().as_secs_f64();
    let m = e.meters();
    println!(
        "{rate} Hz x{factor} {volts} V {signal}: {:.0} ns/sample, iterations/step {:.2}, failures {} (acc {acc:.1})",
        el * 1e9 / n as f64,
        m.newton_iterations as f64 / m.samples as f64,
        m.newton_failures
    );
}
