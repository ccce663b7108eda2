//! Peak volts at the clamp node, the wiper and the tone output of the built-in preamp for a plucked note at a
//! given peak at the jack: `levels [peak volts] [gain]`.
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
fn main() {
    let arg = |n: usize, d: f64| {
        std::env::args()
            .nth(n)
            .and_then(|s| s.parse().ok())
            .unwrap_or(d)
    };
    let (peak, gain) = (arg(1, 0.3), arg(2, 0.8));
    let c = Circuit::builtin();
    let input: Vec<f32> = (0..48000)
        .map(|i| {
            let t = i as f64 / 48000.0;
            (peak * (-3.0 * t).exp() * (2.0 * std::f64::consts::PI * 110.0 * t).sin()) as f32
        })
        .collect();
    for position in 0..3 {
        let s = Settings {
            gain,
            position,
            ..Settings::default()
        };
        let mut line = format!("position {position}:");
        for p in [
            Probe::Clamp,
            Probe::Wiper,
            Probe::Tone,
            Probe::Plate(1),
            Probe::Plate(2),
        ] {
            let mut e = Engine::new(&c, 48000.0, Quality::X4, s).unwrap();
            let out = e.render(&input, p);
            let hi = out.iter().fold(f32::MIN, |m, v| m.max(*v));
            let lo = out.iter().fold(f32::MAX, |m, v| m.min(*v));
            line += &format!(" {} {lo:.2}..{hi:.2}", p.name());
        }
        println!("{line}");
    }
}
