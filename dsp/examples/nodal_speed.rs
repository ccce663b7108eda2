//! Times the node-equation model alone: `nodal_speed [one-stage|builtin|FILE.toml] [seconds] [lanes: 1|2|4]`.
//! With 2 or 4 lanes, that many models (the circuit's switch positions in turn) run packed in one solver.
use breakdown_dsp::elements::Knob;
use breakdown_dsp::lane::Lane;
use breakdown_dsp::nodal::Nodal;
use breakdown_dsp::Circuit;
use wide::{f64x2, f64x4};

fn run<L: Lane>(c: &Circuit, secs: f64) {
    let rate = 192_000.0;
    let mut m: Nodal<L> = Nodal::new(c, rate, 0).unwrap();
    for lane in 0..L::WIDTH {
        m.set_position(lane, lane % m.positions());
    }
    m.reset();
    m.set_knob(Knob::Level, 0.5);
    m.set_knob(Knob::Gain, 0.9);
    let n = (secs * rate) as usize;
    let _g = breakdown_dsp::denormals::FlushGuard::new();
    let t0 = std::time::Instant::now();
    let mut it = 0u64;
    let mut acc = 0.0;
    for k in 0..n {
        let t = k as f64 / rate;
        m.process(L::splat(
            0.8 * (2.0 * std::f64::consts::PI * 220.0 * t).sin(),
        ));
        it += m.report().iterations as u64;
        acc += m.node_volts(m.netlist().clamp_node).get(0);
    }
    let dt = t0.elapsed().as_nanos() as f64 / n as f64;
    println!(
        "{} nodes, band {}+{}, {} lane(s): {dt:.0} ns/step, {:.3} iterations/step ({acc:.1})",
        m.netlist().nodes.len(),
        m.shape().below,
        m.shape().above,
        L::WIDTH,
        it as f64 / n as f64
    );
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    let c = match args.get(1).map(String::as_str) {
        Some("builtin") => Circuit::builtin(),
        Some(path) if path.ends_with(".toml") => {
            let text = std::fs::read_to_string(path).expect("readable circuit file");
            Circuit::from_toml(&text).expect("valid circuit file")
        }
        _ => Circuit::one_stage(),
    };
    let secs: f64 = args.get(2).and_then(|s| s.parse().ok()).unwrap_or(1.0);
    match args.get(3).map(String::as_str) {
        Some("2") => run::<f64x2>(&c, secs),
        Some("4") => run::<f64x4>(&c, secs),
        _ => run::<f64>(&c, secs),
    }
}
