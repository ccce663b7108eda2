//! Times the node-equation model alone: `nodal_speed [one-stage|builtin] [seconds]`.
use breakdown_dsp::elements::Knob;
use breakdown_dsp::nodal::Nodal;
use breakdown_dsp::Circuit;
fn main() {
    let args: Vec<String> = std::env::args().collect();
    let c = match args.get(1).map(String::as_str) {
        Some("builtin") => Circuit::builtin(),
        _ => Circuit::one_stage(),
    };
    let secs: f64 = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(1.0);
    let rate = 192_000.0;
    let mut m: Nodal<f64> = Nodal::new(&c, rate, 2).unwrap();
    m.set_knob(Knob::Level, 0.5);
    m.set_knob(Knob::Gain, 0.9);
    let n = (secs * rate) as usize;
    let _g = breakdown_dsp::denormals::FlushGuard::new();
    let t0 = std::time::Instant::now();
    let mut it = 0u64;
    let mut acc = 0.0;
    for k in 0..n {
        let t = k as f64 / rate;
        m.process(0.8 * (2.0 * std::f64::consts::PI * 220.0 * t).sin());
        it += m.report().iterations as u64;
        acc += m.node_volts(m.netlist().clamp_node);
    }
    let dt = t0.elapsed().as_nanos() as f64 / n as f64;
    println!(
        "{} nodes, band {}+{}: {dt:.0} ns/step, {:.3} iterations/step ({acc:.1})",
        m.netlist().nodes.len(),
        m.shape().below,
        m.shape().above,
        it as f64 / n as f64
    );
}
