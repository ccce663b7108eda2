//! The speaker cabinet (`breakdown_dsp::cabinet`) against outside references: the convolution sum, an analytic
//! band-limited response, the minimum-phase energy property, and the real-time rules (no allocation, no NaN
//! out). A counting allocator (per thread, so the harness's parallel tests do not disturb each other) measures
//! allocation while a test arms it.

use breakdown_dsp::cabinet::{
    Cabinet, CabinetError, Convolver, ImpulseResponse, ResampleMethod, MAX_SECONDS,
};
use proptest::prelude::*;
use realfft::num_complex::Complex;
use realfft::RealFftPlanner;
use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;
use std::f64::consts::{PI, TAU};

// ---------------------------------------------------------------------------------------------------------
// Counting allocator.

struct Counting;

thread_local! {
    static ARMED: Cell<bool> = const { Cell::new(false) };
    static CALLS: Cell<usize> = const { Cell::new(0) };
    static LIVE: Cell<isize> = const { Cell::new(0) };
    static PEAK: Cell<isize> = const { Cell::new(0) };
}

fn note(delta: isize) {
    // `try_with`: thread-locals may be gone while a thread exits.
    let _ = ARMED.try_with(|armed| {
        if armed.get() {
            CALLS.with(|c| c.set(c.get() + 1));
            LIVE.with(|l| {
                let now = l.get() + delta;
                l.set(now);
                PEAK.with(|p| p.set(p.get().max(now)));
            });
        }
    });
}

// SAFETY: forwards every call to the system allocator unchanged; only counts.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        note(layout.size() as isize);
        System.alloc(layout)
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        note(layout.size() as isize);
        System.alloc_zeroed(layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        note(new_size as isize - layout.size() as isize);
        System.realloc(ptr, layout, new_size)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        note(-(layout.size() as isize));
        System.dealloc(ptr, layout)
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

/// Allocator calls and the peak of bytes held (above the start) while `f` runs on this thread.
fn measure<T>(f: impl FnOnce() -> T) -> (T, usize, usize) {
    CALLS.with(|c| c.set(0));
    LIVE.with(|l| l.set(0));
    PEAK.with(|p| p.set(0));
    ARMED.with(|a| a.set(true));
    let out = f();
    ARMED.with(|a| a.set(false));
    let calls = CALLS.with(|c| c.get());
    let peak = PEAK.with(|p| p.get()).max(0) as usize;
    (out, calls, peak)
}

// ---------------------------------------------------------------------------------------------------------
// Helpers.

/// xorshift64* (Vigna, "An experimental exploration of Marsaglia's xorshift generators"): uniform in [-1, 1).
struct Rng(u64);
impl Rng {
    fn next(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        let v = self.0.wrapping_mul(0x2545_F491_4F6C_DD1D);
        (v >> 11) as f64 / (1u64 << 52) as f64 - 1.0
    }
    fn vec(&mut self, n: usize) -> Vec<f64> {
        (0..n).map(|_| self.next()).collect()
    }
}

/// The convolution sum y[n] = sum_k h[k] x[n-k] (Oppenheim & Schafer, "Discrete-Time Signal Processing",
/// chapter 2), term by term.
fn direct(h: &[f64], x: &[f64]) -> Vec<f64> {
    (0..x.len())
        .map(|n| (0..h.len().min(n + 1)).map(|k| h[k] * x[n - k]).sum())
        .collect()
}

fn peak(v: &[f64]) -> f64 {
    v.iter().fold(0.0f64, |m, x| m.max(x.abs()))
}

/// Magnitude (dB) of `h` at bin frequencies of an FFT of `size` at `rate`.
fn magnitude_db(h: &[f64], size: usize) -> Vec<f64> {
    let mut planner = RealFftPlanner::<f64>::new();
    let fft = planner.plan_fft_forward(size);
    let mut time = vec![0.0; size];
    time[..h.len()].copy_from_slice(h);
    let mut spec = fft.make_output_vec();
    fft.process(&mut time, &mut spec).unwrap();
    spec.iter()
        .map(|c| 20.0 * c.norm().max(1e-300).log10())
        .collect()
}

fn to_f32(v: &[f64]) -> Vec<f32> {
    v.iter().map(|&x| x as f32).collect()
}

// ---------------------------------------------------------------------------------------------------------
// Partitioned convolution against the convolution sum.

/// Runs `conv` on `inputs` (one or two channels) and returns its outputs.
fn run(conv: &mut Convolver, inputs: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let n = inputs[0].len();
    let outs = conv.output_channels();
    let mut y = vec![Vec::with_capacity(n); outs];
    for i in 0..n {
        let x = [inputs[0][i], inputs.get(1).map_or(0.0, |c| c[i])];
        let v = conv.process(x);
        for (o, ch) in y.iter_mut().enumerate() {
            ch.push(v[o]);
        }
    }
    y
}

#[test]
fn partitioned_convolution_matches_the_convolution_sum() {
    // Reference: the convolution sum, computed term by term. Target: every output within 1e-6 of the
    // reference's peak, for responses shorter than, equal to, just over and many times the partition.
    let mut rng = Rng(0x9E37_79B9_7F4A_7C15);
    for partition in [16usize, 64, 256] {
        for len in [
            5,
            partition,
            partition + 1,
            3 * partition + 7,
            40 * partition,
        ] {
            let h = rng.vec(len);
            // Random input, with a long silent stretch in the middle (the convolver skips work once its
            // state is all zeros; it must resume exactly).
            let n = 44 * partition + len + 3 * partition + 123;
            let mut x = rng.vec(n);
            let gap = 5 * partition + 2 * len + 1;
            let start = n / 3;
            for v in x.iter_mut().skip(start).take(gap.min(n - start)) {
                *v = 0.0;
            }
            let reference = direct(&h, &x);
            let scale = peak(&reference);
            // The copy this processor runs, and the portable copy.
            for portable in [false, true] {
                let mut conv = Convolver::new(std::slice::from_ref(&h), 1, partition).unwrap();
                if portable {
                    conv.use_portable_copy();
                }
                assert_eq!(conv.latency(), 0);
                let y = run(&mut conv, std::slice::from_ref(&x));
                let err = y[0]
                    .iter()
                    .zip(&reference)
                    .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
                println!(
                    "B {partition} L {len} portable {portable}: max error {:.2e} of peak",
                    err / scale
                );
                assert!(
                    err <= 1e-6 * scale,
                    "B {partition}, L {len}, portable {portable}: error {err:e} against peak {scale}"
                );
            }
        }
    }
}

#[test]
fn channel_routing_matches_the_convolution_sum() {
    // Mono signal through a stereo response gives two outputs; stereo signal through a mono response uses it
    // on both; stereo through stereo pairs them. Reference: the convolution sum per pair.
    let mut rng = Rng(7);
    let partition = 32;
    let len = 10 * partition + 3;
    let (hl, hr) = (rng.vec(len), rng.vec(len));
    let (xl, xr) = (rng.vec(2_000), rng.vec(2_000));
    // (responses, signal channels, which response and input each output is)
    type Case = (Vec<Vec<f64>>, Vec<Vec<f64>>, Vec<(usize, usize)>);
    let cases: Vec<Case> = vec![
        (
            vec![hl.clone(), hr.clone()],
            vec![xl.clone()],
            vec![(0, 0), (1, 0)],
        ),
        (
            vec![hl.clone()],
            vec![xl.clone(), xr.clone()],
            vec![(0, 0), (0, 1)],
        ),
        (vec![hl, hr], vec![xl, xr], vec![(0, 0), (1, 1)]),
    ];
    for (taps, inputs, pairs) in cases {
        let mut conv = Convolver::new(&taps, inputs.len(), partition).unwrap();
        assert_eq!(conv.output_channels(), 2);
        let y = run(&mut conv, &inputs);
        for (o, (t, i)) in pairs.into_iter().enumerate() {
            let reference = direct(&taps[t], &inputs[i]);
            let err = y[o]
                .iter()
                .zip(&reference)
                .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
            assert!(err <= 1e-6 * peak(&reference), "output {o}: error {err:e}");
        }
    }
}

// ---------------------------------------------------------------------------------------------------------
// Resampling against an analytic response.

/// A sum of fourth-order gammatones, h(t) = sum a t^3 exp(-t/tau) cos(2 pi f t + phi) (the gammatone of
/// Patterson et al., "An efficient auditory filterbank based on the gammatone function", 1987). Chosen
/// because it is known at any instant, starts smoothly (t^3: no step for a resampler to ring on), and is
/// band-limited in effect: each term's spectrum is 6 a / (1/tau + j 2 pi (f' - f))^4, which falls 24 dB per
/// octave away from f, so with every f at most 8.7 kHz and tau at least 0.6 ms the content above 20 kHz (what
/// a 44.1 kHz file cannot hold) is below -120 dB. It lasts 0.25 s, by which time it is below -130 dB.
fn analytic(t: f64) -> f64 {
    const TERMS: [(f64, f64, f64, f64); 5] = [
        // (amplitude, f Hz, tau s, phase)
        (1.0, 90.0, 8e-3, 0.3),
        (1.6e2, 700.0, 4e-3, 1.1),
        (1.2e3, 2_400.0, 2e-3, -0.4),
        (6.0e3, 5_200.0, 1e-3, 2.0),
        (2.0e4, 8_700.0, 0.6e-3, 0.9),
    ];
    TERMS
        .iter()
        .map(|&(a, f, tau, phi)| a * t.powi(3) * (-t / tau).exp() * (TAU * f * t + phi).cos())
        .sum::<f64>()
        * 1e5
}

const ANALYTIC_SECONDS: f64 = 0.25;

fn sampled_analytic(rate: f64) -> Vec<f64> {
    let n = (ANALYTIC_SECONDS * rate).ceil() as usize;
    (0..n).map(|i| analytic(i as f64 / rate)).collect()
}

/// The cabinet's response with its normalisation undone, against `analytic` at 48 kHz.
fn resampled_error_db(source_rate: f64) -> (f64, ResampleMethod) {
    let source = sampled_analytic(source_rate);
    let ir = ImpulseResponse {
        channels: vec![to_f32(&source)],
        sample_rate: source_rate,
    };
    let session = 48_000.0;
    let cabinet = Cabinet::new(&ir, session, 1).unwrap();
    let got: Vec<f64> = cabinet.response()[0]
        .iter()
        .map(|v| v / cabinet.normalisation_gain())
        .collect();
    let reference = sampled_analytic(session);
    let scale = peak(&reference);
    let n = got.len().max(reference.len());
    let mut err = 0.0f64;
    for i in 0..n {
        let a = got.get(i).copied().unwrap_or(0.0);
        let b = reference.get(i).copied().unwrap_or(0.0);
        err = err.max((a - b).abs());
    }
    (
        20.0 * (err / scale).log10(),
        breakdown_dsp::cabinet::resample_method(source_rate, session),
    )
}

#[test]
fn resampled_response_matches_the_analytic_response() {
    // Reference: the analytic response sampled at 48 kHz. Target: the largest error at least 60 dB below
    // its peak (the f32 source limits the floor near -140 dB).
    for rate in [44_100.0, 96_000.0] {
        let (db, method) = resampled_error_db(rate);
        println!("{rate} Hz -> 48 kHz with {method:?}: max error {db:.1} dB re peak");
        assert!(matches!(method, ResampleMethod::Fft { .. }));
        assert!(db <= -60.0, "{rate} Hz: error {db:.1} dB re peak");
    }
}

#[test]
fn awkward_rate_keeps_the_analytic_magnitude() {
    // A rate with no small ratio to 48 kHz goes through the sinc resampler, which may shift the whole
    // response by a constant fraction of a sample; its magnitude response must still match the analytic
    // one sampled at 48 kHz to 60 dB below the peak magnitude, from 20 Hz to 10 kHz.
    let rate = 44_101.0;
    assert_eq!(
        breakdown_dsp::cabinet::resample_method(rate, 48_000.0),
        ResampleMethod::Sinc
    );
    let ir = ImpulseResponse {
        channels: vec![to_f32(&sampled_analytic(rate))],
        sample_rate: rate,
    };
    let cabinet = Cabinet::new(&ir, 48_000.0, 1).unwrap();
    let got: Vec<f64> = cabinet.response()[0]
        .iter()
        .map(|v| v / cabinet.normalisation_gain())
        .collect();
    let reference = sampled_analytic(48_000.0);
    let size = 1 << 15;
    let spectrum = |h: &[f64]| -> Vec<Complex<f64>> {
        let mut planner = RealFftPlanner::<f64>::new();
        let fft = planner.plan_fft_forward(size);
        let mut time = vec![0.0; size];
        time[..h.len()].copy_from_slice(h);
        let mut s = fft.make_output_vec();
        fft.process(&mut time, &mut s).unwrap();
        s
    };
    let (a, b) = (spectrum(&got), spectrum(&reference));
    let top = b.iter().fold(0.0f64, |m, c| m.max(c.norm()));
    let bin = |f: f64| (f * size as f64 / 48_000.0) as usize;
    let err =
        (bin(20.0)..=bin(10_000.0)).fold(0.0f64, |m, k| m.max((a[k].norm() - b[k].norm()).abs()));
    let db = 20.0 * (err / top).log10();
    println!("44101 Hz -> 48 kHz (sinc): magnitude error {db:.1} dB re peak");
    let (time_db, _) = resampled_error_db(rate);
    println!("44101 Hz -> 48 kHz (sinc): time-domain error {time_db:.1} dB re peak (this path may delay the whole response by a constant fraction of a sample; not a target)");
    assert!(db <= -60.0, "magnitude error {db:.1} dB");
}

// ---------------------------------------------------------------------------------------------------------
// Normalisation.

/// Pink noise (power density proportional to 1 / f) confined to 100 Hz-5 kHz, periodic over `size` samples
/// at `rate`: each FFT bin in the band gets amplitude 1 / sqrt(f) and a random phase, the others nothing.
fn band_pink_noise(size: usize, rate: f64, rng: &mut Rng) -> Vec<f64> {
    let mut planner = RealFftPlanner::<f64>::new();
    let ifft = planner.plan_fft_inverse(size);
    let mut spec = ifft.make_input_vec();
    for (k, c) in spec.iter_mut().enumerate() {
        let f = k as f64 * rate / size as f64;
        if (100.0..=5_000.0).contains(&f) {
            *c = Complex::from_polar(1.0 / f.sqrt(), PI * rng.next());
        }
    }
    let mut out = vec![0.0; size];
    ifft.process(&mut spec, &mut out).unwrap();
    let rms = (out.iter().map(|v| v * v).sum::<f64>() / size as f64).sqrt();
    out.iter().map(|v| 0.1 * v / rms).collect()
}

#[test]
fn band_limited_pink_noise_keeps_its_level_through_any_cabinet() {
    // The documented normalisation, checked by listening to it: pink noise in 100 Hz-5 kHz (made here by FFT
    // shaping) through the cabinet keeps its power (mean over a stereo response's two outputs) within
    // 0.2 dB, for responses as different as the built-in, the gammatone sum of the resampling test, a
    // one-sample click and a stereo pair whose sides differ by 12 dB in level.
    let rate = 48_000.0;
    let mut rng = Rng(21);
    let size = 1 << 17;
    let noise = band_pink_noise(size, rate, &mut rng);
    let power = |v: &[f64]| v.iter().map(|x| x * x).sum::<f64>() / v.len() as f64;
    let input_power = power(&noise);
    let click = {
        let mut v = vec![0.0f32; 64];
        v[3] = 0.5;
        v
    };
    let gammatone = to_f32(&sampled_analytic(rate));
    let quiet_side: Vec<f32> = gammatone.iter().map(|v| v * 0.25).collect();
    let cabinets = [
        ("built-in", Cabinet::builtin(rate, 1).unwrap()),
        (
            "gammatone sum",
            Cabinet::new(&mono(gammatone.clone(), rate), rate, 1).unwrap(),
        ),
        ("click", Cabinet::new(&mono(click, rate), rate, 1).unwrap()),
        (
            "stereo, sides 12 dB apart",
            Cabinet::new(
                &ImpulseResponse {
                    channels: vec![gammatone, quiet_side],
                    sample_rate: rate,
                },
                rate,
                1,
            )
            .unwrap(),
        ),
    ];
    for (name, mut cabinet) in cabinets {
        assert!(cabinet.taps() < size);
        // Two periods: the second is the steady state (circular convolution with the periodic noise).
        let mut out = vec![Vec::with_capacity(size); cabinet.output_channels()];
        for n in 0..2 * size {
            let y = cabinet.process_mono(noise[n % size]);
            if n >= size {
                for (o, ch) in out.iter_mut().enumerate() {
                    ch.push(y[o]);
                }
            }
        }
        let output_power = out.iter().map(|ch| power(ch)).sum::<f64>() / out.len() as f64;
        let db = 10.0 * (output_power / input_power).log10();
        println!(
            "{name}: band pink noise gain {db:+.3} dB, normalisation gain {:.3e}",
            cabinet.normalisation_gain()
        );
        assert!(db.abs() <= 0.2, "{name}: {db:+.3} dB");
    }
}

// ---------------------------------------------------------------------------------------------------------
// The built-in response.

#[test]
fn builtin_response_has_the_documented_shape() {
    // Measured by FFT of the response as convolved, at three session rates. Stated bounds (cabinet/builtin.rs):
    // low peak within 80-130 Hz, at least 4 dB above 1 kHz; the 2-3 kHz rise at least 4 dB above 1 kHz;
    // 8-10 kHz at least 20 dB, and 10 kHz up to Nyquist at least 30 dB, below 1 kHz.
    for rate in [44_100.0, 48_000.0, 96_000.0] {
        let cabinet = Cabinet::builtin(rate, 1).unwrap();
        let h = &cabinet.response()[0];
        let size = 1 << 18;
        let db = magnitude_db(h, size);
        let hz = |k: usize| k as f64 * rate / size as f64;
        let at = |f: f64| db[(f * size as f64 / rate).round() as usize];
        let range = |lo: f64, hi: f64| {
            (0..db.len())
                .filter(move |&k| hz(k) >= lo && hz(k) <= hi)
                .map(|k| (hz(k), db[k]))
        };
        let ref_1k = at(1_000.0);
        let (low_f, low_db) =
            range(20.0, 1_000.0).fold(
                (0.0, f64::MIN),
                |m, (f, d)| if d > m.1 { (f, d) } else { m },
            );
        let presence = range(2_000.0, 3_000.0).fold(f64::MIN, |m, (_, d)| m.max(d));
        let top_8_10 = range(8_000.0, 10_000.0).fold(f64::MIN, |m, (_, d)| m.max(d));
        let top_10_up = range(10_000.0, rate / 2.0).fold(f64::MIN, |m, (_, d)| m.max(d));
        println!(
            "{rate} Hz: low peak {:.1} dB at {low_f:.0} Hz, 2-3 kHz {:.1} dB, 8-10 kHz {:.1} dB, \
             10 kHz up {:.1} dB (re 1 kHz), {} taps",
            low_db - ref_1k,
            presence - ref_1k,
            top_8_10 - ref_1k,
            top_10_up - ref_1k,
            h.len()
        );
        assert!((80.0..=130.0).contains(&low_f), "low peak at {low_f} Hz");
        assert!(low_db - ref_1k >= 4.0);
        assert!(presence - ref_1k >= 4.0);
        assert!(top_8_10 - ref_1k <= -20.0);
        assert!(top_10_up - ref_1k <= -30.0);
        // Truncated where it has decayed: its closing fade (2 ms, of which the cabinet may trim the last
        // samples that the fade took below -140 dB) lies below -90 dB of its peak.
        let p = peak(h);
        let fade = (0.001 * rate) as usize;
        let tail = peak(&h[h.len() - fade..]);
        assert!(
            20.0 * (tail / p).log10() <= -90.0,
            "tail at {:.1} dB",
            20.0 * (tail / p).log10()
        );
    }
}

/// Partial energies E(n) = sum_{k<=n} h[k]^2.
fn partial_energy(h: &[f64]) -> Vec<f64> {
    h.iter()
        .scan(0.0, |s, v| {
            *s += v * v;
            Some(*s)
        })
        .collect()
}

#[test]
fn builtin_response_is_minimum_phase() {
    // Reference: the minimum energy-delay property (Oppenheim & Schafer, "Discrete-Time Signal Processing",
    // section on minimum-phase systems, from memory 5.6): of all causal responses with the same magnitude
    // response, the minimum-phase one has the largest partial energy sum_{k<=n} h[k]^2 for every n. Every
    // causal response with the built-in's magnitude is the built-in through an all-pass filter (or its time
    // reverse, which is one of them); compared here with the time reverse and with the built-in through
    // twenty random stable all-pass cascades (first-order sections with real coefficients, second-order with
    // complex pole pairs), computed here sample by sample.
    for rate in [44_100.0, 48_000.0, 96_000.0] {
        let cabinet = Cabinet::builtin(rate, 1).unwrap();
        let h = cabinet.response()[0].clone();
        let own = partial_energy(&h);
        let total = *own.last().unwrap();
        let mut others: Vec<(String, Vec<f64>)> = Vec::new();
        let mut reversed = h.clone();
        reversed.reverse();
        others.push(("time reverse".into(), reversed));
        let mut rng = Rng(99);
        for i in 0..20 {
            // Poles at radius at most 0.98: the all-pass tails die within the 6000 extra samples.
            let mut g = h.clone();
            g.resize(h.len() + 6_000, 0.0);
            let first = 1 + (i % 3);
            for _ in 0..first {
                let c = 0.98 * rng.next();
                // A(z) = (-c + z^-1) / (1 - c z^-1)
                let (mut x1, mut y1) = (0.0, 0.0);
                for v in g.iter_mut() {
                    let x = *v;
                    let y = -c * x + x1 + c * y1;
                    x1 = x;
                    y1 = y;
                    *v = y;
                }
            }
            for _ in 0..(i % 2 + 1) {
                let r = 0.5 + 0.48 * (0.5 + 0.5 * rng.next());
                let theta = PI * (0.5 + 0.5 * rng.next());
                let (a1, a2) = (-2.0 * r * theta.cos(), r * r);
                // A(z) = (a2 + a1 z^-1 + z^-2) / (1 + a1 z^-1 + a2 z^-2)
                let (mut x1, mut x2, mut y1, mut y2) = (0.0, 0.0, 0.0, 0.0);
                for v in g.iter_mut() {
                    let x = *v;
                    let y = a2 * x + a1 * x1 + x2 - a1 * y1 - a2 * y2;
                    (x2, x1, y2, y1) = (x1, x, y1, y);
                    *v = y;
                }
            }
            others.push((format!("all-pass cascade {i}"), g));
        }
        for (name, g) in &others {
            let theirs = partial_energy(g);
            let their_total = *theirs.last().unwrap();
            assert!(
                (their_total - total).abs() <= 1e-6 * total,
                "{name}: an all-pass keeps the energy ({their_total} against {total})"
            );
            for (n, t) in theirs.iter().enumerate() {
                let mine = own.get(n).copied().unwrap_or(total);
                assert!(
                    mine >= t - 1e-9 * total,
                    "{rate} Hz, {name}: partial energy at {n} is {} of the total, the built-in's {}",
                    t / total,
                    mine / total
                );
            }
        }
        // The check is not empty: the built-in is well ahead of its time reverse early on.
        let early = h.len() / 20;
        assert!(own[early] > 2.0 * partial_energy(&others[0].1)[early]);
    }
}

// ---------------------------------------------------------------------------------------------------------
// Bad responses.

fn mono(samples: Vec<f32>, rate: f64) -> ImpulseResponse {
    ImpulseResponse {
        channels: vec![samples],
        sample_rate: rate,
    }
}

fn refusal(ir: &ImpulseResponse, session: f64, channels: usize) -> String {
    match Cabinet::new(ir, session, channels) {
        Ok(_) => panic!("accepted a bad response"),
        Err(e) => e.to_string(),
    }
}

#[test]
fn bad_responses_are_refused_with_clear_messages() {
    let good = || {
        (0..480)
            .map(|i| (-(i as f32) / 50.0).exp() * ((i as f32) * 0.3).sin())
            .collect::<Vec<f32>>()
    };
    let cases: Vec<(&str, ImpulseResponse, usize, Vec<&str>)> = vec![
        (
            "no channels",
            ImpulseResponse {
                channels: vec![],
                sample_rate: 48_000.0,
            },
            1,
            vec!["no channels"],
        ),
        (
            "empty",
            mono(vec![], 48_000.0),
            1,
            vec!["empty", "0 samples"],
        ),
        (
            "all zero",
            mono(vec![0.0; 4_800], 48_000.0),
            1,
            vec!["silent", "every sample is zero"],
        ),
        (
            "quiet",
            mono(vec![1e-7; 4_800], 48_000.0),
            1,
            vec!["silent", "-140.0 dBFS", "-120 dBFS"],
        ),
        (
            "three channels",
            ImpulseResponse {
                channels: vec![good(), good(), good()],
                sample_rate: 48_000.0,
            },
            1,
            vec!["3 channels", "1 (mono) or 2 (stereo)"],
        ),
        (
            "unequal",
            ImpulseResponse {
                channels: vec![good(), vec![0.5; 100]],
                sample_rate: 48_000.0,
            },
            1,
            vec!["differ in length", "480", "channel 2 has 100"],
        ),
        (
            "signal channels",
            mono(good(), 48_000.0),
            3,
            vec!["signal channels", "not 3"],
        ),
        (
            "rate zero",
            mono(good(), 0.0),
            1,
            vec!["sample rate 0 Hz", "8000 .. 384000"],
        ),
        (
            "rate NaN",
            mono(good(), f64::NAN),
            1,
            vec!["sample rate NaN Hz"],
        ),
        (
            "high only",
            // A 15 kHz burst: nothing in 100 Hz-5 kHz.
            mono(
                (0..2_000)
                    .map(|i| {
                        let t = i as f32 / 48_000.0;
                        (t * 3_000.0).powi(3)
                            * (-t * 3_000.0).exp()
                            * (std::f32::consts::TAU * 15_000.0 * t).sin()
                    })
                    .collect(),
                48_000.0,
            ),
            1,
            vec!["passes almost nothing", "100 Hz", "5000 Hz", "60 dB"],
        ),
    ];
    for (name, ir, channels, needles) in cases {
        let text = refusal(&ir, 48_000.0, channels);
        println!("{name}: {text}");
        for needle in needles {
            assert!(text.contains(needle), "{name}: {text:?} lacks {needle:?}");
        }
    }
    // A bad session rate is named.
    let text = match Cabinet::builtin(1_000.0, 1) {
        Err(e) => e.to_string(),
        Ok(_) => panic!("accepted 1 kHz"),
    };
    assert!(
        text.contains("session sample rate 1000 Hz") && text.contains("22050 .. 384000"),
        "{text}"
    );
}

#[test]
fn non_finite_samples_are_named_by_channel_sample_and_time() {
    let mut left: Vec<f32> = (0..9_600)
        .map(|i| ((i as f32) * 0.01).sin() * 0.5)
        .collect();
    let mut right = left.clone();
    left[7_000] = f32::INFINITY;
    right[4_800] = f32::NAN;
    let ir = ImpulseResponse {
        channels: vec![left.clone(), right],
        sample_rate: 48_000.0,
    };
    let text = refusal(&ir, 48_000.0, 1);
    println!("{text}");
    for needle in ["NaN", "channel 2", "sample 4800", "0.100000 s"] {
        assert!(text.contains(needle), "{text:?} lacks {needle:?}");
    }
    left[7_000] = f32::NEG_INFINITY;
    let text = refusal(&mono(left, 48_000.0), 48_000.0, 1);
    assert!(
        text.contains("-infinity") && text.contains("sample 7000") && text.contains("0.145833 s"),
        "{text}"
    );
}

#[test]
fn ten_minute_response_is_refused_without_allocating() {
    // The caller has decoded ten minutes (28.8 M samples); the cabinet must refuse it from its length alone.
    let long = mono(vec![0.25f32; 48_000 * 600], 48_000.0);
    let (result, calls, bytes) = measure(|| Cabinet::new(&long, 48_000.0, 1).err());
    let error = result.expect("refused");
    assert!(matches!(error, CabinetError::TooLong { .. }));
    assert_eq!(
        (calls, bytes),
        (0, 0),
        "allocated {calls} times, {bytes} bytes at peak"
    );
    let text = error.to_string();
    println!("{text}");
    for needle in ["600.000 s", "28800000 samples", "48000 Hz", "2.000 s"] {
        assert!(text.contains(needle), "{text:?} lacks {needle:?}");
    }
    // The bound itself is accepted.
    let edge = mono(
        (0..(MAX_SECONDS * 48_000.0) as usize)
            .map(|i| (-(i as f32) / 500.0).exp() * ((i as f32) * 0.2).sin())
            .collect(),
        48_000.0,
    );
    assert!(Cabinet::new(&edge, 48_000.0, 1).is_ok());
    let over = mono(
        vec![0.25f32; (MAX_SECONDS * 48_000.0) as usize + 1],
        48_000.0,
    );
    assert!(matches!(
        Cabinet::new(&over, 48_000.0, 1),
        Err(CabinetError::TooLong { .. })
    ));
}

// ---------------------------------------------------------------------------------------------------------
// Latency, real-time rules.

#[test]
fn an_impulse_appears_exactly_latency_samples_later() {
    // Through a loaded response long enough to use the partitioned tail: the output of an impulse at n0 is
    // zero before n0 + latency() and is the response from there.
    let mut rng = Rng(3);
    let len = 6_000;
    let h: Vec<f32> = (0..len)
        .map(|i| (rng.next() * (-(i as f64) / 800.0).exp()) as f32)
        .collect();
    let mut cabinet = Cabinet::new(&mono(h, 48_000.0), 48_000.0, 1).unwrap();
    assert!(cabinet.taps() > 2 * cabinet.partition());
    let latency = cabinet.latency();
    let response = cabinet.response()[0].clone();
    let n0 = 1_001;
    let total = n0 + latency + response.len() + 10;
    let out: Vec<f64> = (0..total)
        .map(|n| cabinet.process_mono(if n == n0 { 1.0 } else { 0.0 })[0])
        .collect();
    let scale = peak(&response);
    assert!(
        out[..n0 + latency].iter().all(|v| *v == 0.0),
        "output before the impulse"
    );
    assert!(out[n0 + latency] != 0.0 && (out[n0 + latency] - response[0]).abs() <= 1e-9 * scale);
    for (k, r) in response.iter().enumerate() {
        assert!((out[n0 + latency + k] - r).abs() <= 1e-9 * scale, "tap {k}");
    }
    println!("latency() = {latency}; impulse measured at +{latency}");
    // The offline render gives the same samples.
    cabinet.reset();
    let mut click = vec![0.0f32; total];
    click[n0] = 1.0;
    let rendered = cabinet.render(&[click]);
    assert_eq!(rendered.len(), 1);
    for (a, b) in rendered[0].iter().zip(&out) {
        assert_eq!(*a, *b as f32);
    }
}

#[test]
fn nan_and_huge_input_never_poison_the_state() {
    // A NaN, infinities, a huge and a subnormal value mid-stream. Every output is finite; the output is
    // exactly that of the same input with non-finite and subnormal samples silent and the huge one limited;
    // and once the response's length (and a block) has passed, exactly that of the input with all five
    // silent: nothing of them is left in the state.
    let make = || Cabinet::builtin(48_000.0, 1).unwrap();
    let (mut dirty_cab, mut limited_cab, mut silent_cab) = (make(), make(), make());
    let mut rng = Rng(11);
    let n = 20_000;
    let x = rng.vec(n);
    let (mut dirty, mut limited, mut silent) = (x.clone(), x.clone(), x.clone());
    let bad = [
        (1_000, f64::NAN),
        (1_001, f64::INFINITY),
        (1_002, f64::NEG_INFINITY),
        (1_003, 1e300),
        (1_004, 1e-310),
    ];
    for (i, v) in bad {
        dirty[i] = v;
        limited[i] = if v.is_finite() && v.abs() > 1.0 {
            1e6f64.copysign(v)
        } else {
            0.0
        };
        silent[i] = 0.0;
    }
    let after = 1_004 + dirty_cab.taps() + 2 * dirty_cab.partition();
    for i in 0..n {
        let a = dirty_cab.process_mono(dirty[i]);
        let b = limited_cab.process_mono(limited[i]);
        let c = silent_cab.process_mono(silent[i]);
        assert!(a[0].is_finite() && a[1].is_finite(), "sample {i}");
        assert_eq!(a, b, "sample {i}");
        if i > after {
            assert_eq!(a, c, "sample {i}");
        }
    }
}

#[test]
fn processing_does_not_allocate() {
    let mut rng = Rng(5);
    let h2: Vec<Vec<f32>> = (0..2)
        .map(|_| {
            (0..3_000)
                .map(|i| (rng.next() * (-(i as f64) / 400.0).exp()) as f32)
                .collect()
        })
        .collect();
    let stereo = ImpulseResponse {
        channels: h2.clone(),
        sample_rate: 44_100.0,
    };
    let mono_ir = ImpulseResponse {
        channels: vec![h2[0].clone()],
        sample_rate: 96_000.0,
    };
    let mut cabinets = [
        Cabinet::builtin(48_000.0, 1).unwrap(),
        Cabinet::builtin(48_000.0, 2).unwrap(),
        Cabinet::new(&stereo, 48_000.0, 1).unwrap(),
        Cabinet::new(&stereo, 48_000.0, 2).unwrap(),
        Cabinet::new(&mono_ir, 48_000.0, 2).unwrap(),
    ];
    let input: Vec<f64> = (0..10_000)
        .map(|n| match n {
            1_000 => f64::NAN,
            1_001 => f64::INFINITY,
            1_002 => -1e300,
            2_000 => 1e-310,
            3_000..=6_000 => 0.0,
            _ => rng.next(),
        })
        .collect();
    for (i, cabinet) in cabinets.iter_mut().enumerate() {
        let ((), calls, _) = measure(|| {
            let mut sum = 0.0;
            for &x in &input {
                let y = cabinet.process([x, -x]);
                sum += y[0] + y[1];
            }
            cabinet.reset();
            for &x in &input[..500] {
                sum += cabinet.process_mono(x)[1];
            }
            std::hint::black_box(sum);
        });
        assert_eq!(
            calls, 0,
            "cabinet {i}: {calls} allocator calls while processing"
        );
    }
    // The counter works: an allocation while armed is seen.
    let ((), calls, _) = measure(|| {
        std::hint::black_box(vec![1u8; 16]);
    });
    assert!(calls >= 1);
}

// ---------------------------------------------------------------------------------------------------------
// Any input: a cabinet or an error, never a panic, bounded allocation.

/// Peak bytes a load may hold at `session` Hz. What a stereo-through-stereo cabinet keeps, per tap of the
/// response at the session rate: the response (2 x 8 bytes), the two filters' partition spectra and the two
/// lanes' input spectra (each about 16 bytes per tap: B + 1 complex bins per B taps), so about 80 bytes; the
/// bound allows 120 per tap of the longest response, for the resampler's and the normalisation's
/// temporaries, plus 4 MiB.
fn allocation_bound(session: f64) -> usize {
    let taps = (MAX_SECONDS * session).ceil() as usize;
    120 * taps + (4 << 20)
}

#[test]
fn the_largest_loads_stay_within_the_allocation_bound() {
    // The longest response at the fastest session rate, stereo through stereo, from rates that take each
    // resampler (and the same rate, which takes none).
    for (rate, session) in [
        (44_100.0, 384_000.0),
        (383_999.0, 384_000.0),
        (384_000.0, 384_000.0),
        (8_000.0, 22_050.0),
    ] {
        let len = (MAX_SECONDS * rate) as usize;
        let h: Vec<f32> = (0..len)
            .map(|i| {
                let t = i as f32 / rate as f32;
                (std::f32::consts::TAU * 1_000.0 * t).sin() * (-t / 0.3).exp()
            })
            .collect();
        let ir = ImpulseResponse {
            channels: vec![h.clone(), h],
            sample_rate: rate,
        };
        let (cabinet, _, bytes) = measure(|| Cabinet::new(&ir, session, 2));
        let cabinet = cabinet.unwrap();
        println!(
            "{rate} Hz -> {session} Hz: {} taps, partition {}, peak {:.1} MB while loading (bound {:.1} MB)",
            cabinet.taps(),
            cabinet.partition(),
            bytes as f64 / 1e6,
            allocation_bound(session) as f64 / 1e6
        );
        assert!(bytes <= allocation_bound(session));
    }
}

fn any_rate() -> impl Strategy<Value = f64> {
    prop_oneof![
        Just(f64::NAN),
        Just(f64::INFINITY),
        Just(-48_000.0),
        Just(0.0),
        Just(1e-3),
        Just(7_999.0),
        Just(8_000.0),
        Just(44_100.0),
        Just(48_000.0),
        Just(96_000.0),
        Just(384_000.0),
        Just(1e12),
        (8_000u32..=200_000u32).prop_map(|r| r as f64),
        (8_000.0f64..200_000.0),
    ]
}

fn any_sample() -> impl Strategy<Value = f32> {
    prop_oneof![
        8 => -1.0f32..1.0,
        1 => Just(0.0f32),
        1 => Just(f32::NAN),
        1 => Just(f32::INFINITY),
        1 => Just(1e-40f32),
        1 => Just(3e38f32),
    ]
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 128, failure_persistence: None, .. ProptestConfig::default() })]

    #[test]
    fn any_samples_and_rate_give_a_cabinet_or_an_error(
        channels in prop_oneof![4 => 1usize..=2, 1 => 0usize..5],
        len in prop_oneof![0usize..8, 8usize..3_000, Just(20_000usize)],
        unequal in prop::bool::weighted(0.1),
        samples in prop_oneof![
            3 => prop::collection::vec(-1.0f32..1.0, 64),
            1 => prop::collection::vec(any_sample(), 64),
        ],
        rate in any_rate(),
        session in prop_oneof![2 => Just(44_100.0), 2 => Just(48_000.0), 1 => Just(96_000.0), 1 => Just(1_000.0), 3 => 22_050.0f64..100_000.0],
        signal in prop_oneof![4 => 1usize..=2, 1 => 0usize..5],
    ) {
        // Samples repeat the drawn pattern with a decay, so a long response is a plausible one.
        let ir = ImpulseResponse {
            channels: (0..channels)
                .map(|c| {
                    let n = if unequal && c == 1 { len / 2 } else { len };
                    (0..n).map(|i| samples[(i * 7 + c) % samples.len()] * (-(i as f32) / 2_000.0).exp()).collect()
                })
                .collect(),
            sample_rate: rate,
        };
        let (result, _, bytes) = measure(|| Cabinet::new(&ir, session, signal).map(|c| (c.taps(), c.output_channels())));
        prop_assert!(bytes <= allocation_bound(session), "{bytes} bytes at peak");
        match result {
            Ok((taps, outputs)) => {
                println!("built: {taps} taps, {outputs} outputs");
                prop_assert!(taps >= 1 && (taps as f64) <= MAX_SECONDS * session + 1.0);
                prop_assert!(outputs == 1 || outputs == 2);
            }
            Err(e) => {
                println!("refused: {e}");
                prop_assert!(!e.to_string().is_empty());
            }
        }
    }
}

#[test]
fn a_cabinet_can_be_built_on_one_thread_and_played_on_another() {
    // Loading happens off the audio thread; the finished cabinet moves to it.
    fn send<T: Send + 'static>() {}
    send::<Cabinet>();
    let handle = std::thread::spawn(|| Cabinet::builtin(48_000.0, 1).unwrap());
    let mut cabinet = handle.join().unwrap();
    assert!(cabinet.process_mono(1.0)[0] != 0.0);
}
