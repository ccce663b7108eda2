use breakdown_dsp::{Circuit, Stage};
fn main() {
    let c = Circuit::reference();
    let rate = 768000.0;
    let mut s = Stage::new(&c, rate, 0.5, 1);
    let p = *s.probe();
    println!("{p:#?}");
    let att = (81f64.powf(0.9) - 1.0) / 80.0;
    let n = (0.03 * rate) as usize;
    let mut iters = 0u64; let mut maxit = 0;
    for i in 0..n {
        let t = i as f64 / rate;
        let v = 0.6 * (2.0 * std::f64::consts::PI * 1000.0 * t).sin() * att;
        let p = *s.process(v);
        let r = s.last_report(); iters += r.iterations as u64; maxit = maxit.max(r.iterations);
        if i % 64 == 0 && t > 0.028 { println!("{t:.7} {:.6} {:.6} {:.6} {:.6}", p.clamp_volts, p.wiper_volts, p.follower_cathode_volts, p.gain_plate_volts); }
    }
    println!("avg iters {} max {}", iters as f64 / n as f64, maxit);
}
