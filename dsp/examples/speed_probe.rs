//! Quick speed probe: one channel of a decaying plucked tone at 48 kHz through X1 and X4.
//! Arguments: tenths of a second [gain pot, default 0.8] [switch position, default 1] [only this oversampling
//! factor, 1 or 4].
use breakdown_dsp::{Circuit, Engine, Quality, Settings};
use std::time::Instant;
fn main() {
    let c = Circuit::one_stage();
    let arg = |n: usize, default: f64| {
        std::env::args()
            .nth(n)
            .and_then(|s| s.parse().ok())
            .unwrap_or(default)
    };
    let (gain, position) = (arg(2, 0.8), arg(3, 1.0) as usize);
    // Denormals flushed, as `Engine::process_block` and the plugin run the model.
    let _flush = breakdown_dsp::denormals::FlushGuard::new();
    let only = std::env::args().nth(4);
    for q in [Quality::X1, Quality::X4] {
        if only.as_deref().is_some_and(|f| f != q.factor().to_string()) {
            continue;
        }
        let mut e = Engine::new(
            &c,
            48000.0,
            q,
            Settings {
                gain,
                level: 0.5,
                position,
                ..Default::default()
            },
        )
        .unwrap();
        e.set_active_probes(&[breakdown_dsp::Probe::Listen]);
        let secs: usize = std::env::args()
            .nth(1)
            .map(|s| s.parse().unwrap())
            .unwrap_or(5);
        let n = 48000 * secs / 10;
        let input: Vec<f32> = (0..n)
            .map(|i| {
                let t = i as f64 / 48000.0;
                let env = (-((t % 1.0) * 3.0)).exp();
                (0.5 * env
                    * ((2.0 * std::f64::consts::PI * 110.0 * t).sin()
                        + 0.5 * (2.0 * std::f64::consts::PI * 220.0 * t).sin()
                        + 0.25 * (2.0 * std::f64::consts::PI * 330.0 * t).sin()))
                    as f32
            })
            .collect();
        let t0 = Instant::now();
        let mut acc = 0.0f64;
        for &x in &input {
            acc += e.process_sample(x).listen;
        }
        let el = t0.elapsed().as_secs_f64();
        let m = e.meters();
        println!("{q:?}: {:.1} ns/sample, RT x{:.1}, iters/step {:.2}, failures {}, maxpeak {:.2} {:.2} acc {acc:.3}", el*1e9/n as f64, (n as f64/48000.0)/el, m.newton_iterations as f64/m.samples as f64, m.newton_failures, m.clamp_peak_positive, m.clamp_peak_negative);
    }
}
