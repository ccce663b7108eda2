//! Shared helpers for Breakdown's cross-crate and external-reference tests.
//!
//! The device formulas here are typed again from their published form (BRIEF section 4) rather than called
//! from the model, so a test comparing the two checks the model against the paper, not against itself.

pub mod tone_stack;

use realfft::num_complex::Complex;
use realfft::RealFftPlanner;
use std::f64::consts::PI;

/// Koren 1996 triode parameters (N. Koren, "Improved vacuum tube models for SPICE simulations",
/// Glass Audio 8(5), 1996).
#[derive(Clone, Copy, Debug)]
pub struct KorenSet {
    pub mu: f64,
    pub ex: f64,
    pub kg1: f64,
    pub kp: f64,
    pub kvb: f64,
}

/// Koren's published 12AX7 set: mu 100, ex 1.4, kg1 1060, kp 600, kvb 300 (BRIEF section 4).
pub const KOREN_12AX7: KorenSet = KorenSet {
    mu: 100.0,
    ex: 1.4,
    kg1: 1060.0,
    kp: 600.0,
    kvb: 300.0,
};

/// Plate current (A) in Koren's form, written out literally:
/// E1 = (Vpk/kp) ln(1 + exp(kp (1/mu + Vgk / sqrt(kvb + Vpk^2)))); Ip = 2 E1^ex / kg1 for E1 > 0, else 0.
pub fn koren_plate_current(k: &KorenSet, vpk: f64, vgk: f64) -> f64 {
    let arg = k.kp * (1.0 / k.mu + vgk / (k.kvb + vpk * vpk).sqrt());
    let e1 = vpk / k.kp * (1.0 + arg.exp()).ln();
    if e1 > 0.0 {
        2.0 * e1.powf(k.ex) / k.kg1
    } else {
        0.0
    }
}

/// Grid current (A) of Dempwolf and Zoelzer, "A physically-motivated triode model for circuit simulations",
/// DAFx-11, written out literally: Ig = Gg (ln(1 + exp(Cg Vgk)) / Cg)^xi + Ig0 with their 12AX7 set.
pub fn dempwolf_grid_current(vgk: f64) -> f64 {
    const GG: f64 = 6.177e-4;
    const XI: f64 = 1.314;
    const CG: f64 = 9.901;
    const IG0: f64 = 8.025e-8;
    GG * ((1.0 + (CG * vgk).exp()).ln() / CG).powf(XI) + IG0
}

/// Small-signal figures of a triode at one operating point.
#[derive(Clone, Copy, Debug)]
pub struct SmallSignal {
    /// Plate current (A).
    pub plate_current: f64,
    /// Transconductance dIp/dVgk (S).
    pub gm: f64,
    /// Plate resistance 1 / (dIp/dVpk) (ohm).
    pub rp: f64,
    /// Amplification factor gm rp.
    pub mu: f64,
}

/// gm, rp and mu of `plate_current(vpk, vgk)` by central differences (steps of 1 mV).
pub fn small_signal(plate_current: impl Fn(f64, f64) -> f64, vpk: f64, vgk: f64) -> SmallSignal {
    let h = 1e-3;
    let gm = (plate_current(vpk, vgk + h) - plate_current(vpk, vgk - h)) / (2.0 * h);
    let gp = (plate_current(vpk + h, vgk) - plate_current(vpk - h, vgk)) / (2.0 * h);
    SmallSignal {
        plate_current: plate_current(vpk, vgk),
        gm,
        rp: 1.0 / gp,
        mu: gm / gp,
    }
}

/// Textbook common-cathode voltage gain with the cathode fully bypassed: A = mu RL / (RL + rp)
/// (RCA Receiving Tube Manual, "Resistance-coupled amplifiers"; Valley and Wallman, "Vacuum Tube Amplifiers",
/// 1948, chapter 2).
pub fn common_cathode_gain(mu: f64, rp: f64, load: f64) -> f64 {
    mu * load / (load + rp)
}

/// Two resistors in parallel.
pub fn parallel(a: f64, b: f64) -> f64 {
    a * b / (a + b)
}

/// `amplitude` sin(2 pi f n / rate) for n in 0..len, as f32 samples.
pub fn sine(freq: f64, rate: f64, amplitude: f64, len: usize) -> Vec<f32> {
    (0..len)
        .map(|n| (amplitude * (2.0 * PI * freq * n as f64 / rate).sin()) as f32)
        .collect()
}

/// Complex peak amplitude of the component at `freq`: X = (2/N) sum x[n] e^{-j 2 pi f n / rate} (a sine of
/// amplitude A reads -jA). Exact when the signal spans whole periods.
pub fn phasor(signal: &[f64], rate: f64, freq: f64) -> Complex<f64> {
    let w = 2.0 * PI * freq / rate;
    let mut acc = Complex::new(0.0, 0.0);
    for (n, &x) in signal.iter().enumerate() {
        let p = w * n as f64;
        acc += Complex::new(x * p.cos(), -x * p.sin());
    }
    acc * (2.0 / signal.len() as f64)
}

/// Power spectrum |X[k]|^2 of a real signal (rectangular window; for exactly periodic signals over the block,
/// every component falls on one bin). Bin k is k rate / N Hz.
pub fn power_spectrum(signal: &[f64]) -> Vec<f64> {
    let mut planner = RealFftPlanner::<f64>::new();
    let fft = planner.plan_fft_forward(signal.len());
    let mut input = signal.to_vec();
    let mut output = fft.make_output_vec();
    fft.process(&mut input, &mut output)
        .expect("buffer lengths come from the planner");
    output.iter().map(|c| c.norm_sqr()).collect()
}

/// Largest absolute value.
pub fn peak(signal: &[f64]) -> f64 {
    signal.iter().fold(0.0f64, |m, x| m.max(x.abs()))
}

/// Root mean square.
pub fn rms(signal: &[f64]) -> f64 {
    (signal.iter().map(|x| x * x).sum::<f64>() / signal.len().max(1) as f64).sqrt()
}

/// Decibels of a power ratio.
pub fn db_power(ratio: f64) -> f64 {
    10.0 * ratio.log10()
}

/// Relative difference |a - b| / |b|.
pub fn rel(a: f64, b: f64) -> f64 {
    (a - b).abs() / b.abs()
}
