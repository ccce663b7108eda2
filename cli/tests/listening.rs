//! The listening point of `render` and `compare`: the chain (tone stack output, then a cabinet) by default,
//! the bare wiper on request, and a cabinet file that is checked before anything is written.
//!
//! The cabinet checks compare against a direct time-domain convolution sum written here (y[n] = sum h[k]
//! x[n-k], the textbook definition; Oppenheim and Schafer, "Discrete-Time Signal Processing", eq. 2.49),
//! not against the project's FFT convolver.

mod common;

use common::{run, write_float};
use std::path::{Path, PathBuf};
use std::process::Output;

fn scratch(name: &str) -> PathBuf {
    common::scratch("listening", name)
}

fn ok(out: &Output) {
    assert!(
        out.status.success(),
        "breakdown failed:\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

fn read(path: &Path) -> Vec<Vec<f32>> {
    let mut r = hound::WavReader::open(path).unwrap();
    let channels = r.spec().channels as usize;
    let all: Vec<f32> = r.samples::<f32>().map(Result::unwrap).collect();
    (0..channels)
        .map(|c| all.iter().skip(c).step_by(channels).copied().collect())
        .collect()
}

/// A guitar-like test DI: a 196 Hz tone with two overtones at 0.3 of full scale, 0.4 s at 48 kHz.
fn di(dir: &Path) -> PathBuf {
    let rate = 48_000.0;
    let x: Vec<f32> = (0..19_200)
        .map(|n| {
            let t = n as f64 / rate;
            let w = 2.0 * std::f64::consts::PI * 196.0 * t;
            (0.3 * (w.sin() + 0.4 * (2.0 * w).sin() + 0.2 * (3.0 * w).sin()) / 1.6) as f32
        })
        .collect();
    let path = dir.join("di.wav");
    write_float(&path, 48_000, &x);
    path
}

/// A short decaying, ringing response (96 taps at 48 kHz), our own test data.
fn response() -> Vec<f32> {
    (0..96)
        .map(|n| {
            let n = n as f64;
            ((-n / 18.0).exp() * (0.9 * n).cos() + if n == 0.0 { 0.5 } else { 0.0 }) as f32
        })
        .collect()
}

fn direct_convolution(h: &[f32], x: &[f32]) -> Vec<f64> {
    (0..x.len())
        .map(|n| {
            (0..h.len().min(n + 1))
                .map(|k| h[k] as f64 * x[n - k] as f64)
                .sum()
        })
        .collect()
}

fn render(dir: &Path, out: &str, extra: &[&str]) -> Vec<Vec<f32>> {
    let input = di(dir);
    let output = dir.join(out);
    let mut args = vec!["render", "--input", s(&input), "--output", s(&output)];
    args.extend_from_slice(extra);
    ok(&run(&args));
    read(&output)
}

#[test]
fn a_loaded_cabinet_is_the_convolution_sum_of_the_bare_chain() {
    let dir = scratch("file");
    let h = response();
    let ir = dir.join("ir.wav");
    write_float(&ir, 48_000, &h);
    let ir_bytes = std::fs::read(&ir).unwrap();
    let bare = render(&dir, "bare.wav", &["--cabinet", "none"]);
    let heard = render(&dir, "cab.wav", &["--cabinet", s(&ir)]);
    assert_eq!((bare.len(), heard.len()), (1, 1));
    let expected = direct_convolution(&h, &bare[0]);
    // The cabinet normalises its response to a loudness of its own choosing: fit that one gain, then the
    // shape and the timing (latency 0) must match the convolution sum.
    let dot: f64 = expected
        .iter()
        .zip(&heard[0])
        .map(|(e, y)| e * *y as f64)
        .sum();
    let energy: f64 = expected.iter().map(|e| e * e).sum();
    let gain = dot / energy;
    assert!(gain.is_finite() && gain > 0.0, "gain {gain}");
    let peak = heard[0].iter().fold(0.0f64, |m, v| m.max(v.abs() as f64));
    assert!(peak > 1e-3, "the cabinet's output is silent (peak {peak})");
    let worst = expected
        .iter()
        .zip(&heard[0])
        .map(|(e, y)| (gain * e - *y as f64).abs())
        .fold(0.0f64, f64::max);
    assert!(
        worst <= 1e-5 * peak,
        "cabinet output differs from the convolution sum by {worst:e} (peak {peak:e})"
    );
    assert_eq!(
        std::fs::read(&ir).unwrap(),
        ir_bytes,
        "the response file is only read"
    );
}

#[test]
fn the_default_listening_point_is_the_chain_with_the_built_in_cabinet() {
    let dir = scratch("default");
    let default = render(&dir, "default.wav", &[]);
    let chain = render(
        &dir,
        "chain.wav",
        &["--listen", "chain", "--cabinet", "builtin"],
    );
    let bare = render(&dir, "bare.wav", &["--cabinet", "none"]);
    assert_eq!(
        default, chain,
        "the default is the chain with the built-in cabinet"
    );
    let differs = default[0]
        .iter()
        .zip(&bare[0])
        .any(|(a, b)| (a - b).abs() > 1e-3);
    assert!(differs, "the built-in cabinet changes the sound");
}

#[test]
fn without_a_cabinet_the_chain_is_the_tone_node_and_the_wiper_point_is_the_wiper_node() {
    // The built-in preamp's [listen] volts_at_full_scale is 4 V (presets-demo/builtin-preamp.toml).
    let full_scale = 4.0f32;
    let dir = scratch("nodes");
    let bare = render(&dir, "bare.wav", &["--cabinet", "none"]);
    let tone = render(&dir, "tone.wav", &["--probe", "tone"]);
    let wiper_point = render(&dir, "wiper.wav", &["--listen", "wiper"]);
    let wiper = render(&dir, "wiper-volts.wav", &["--probe", "wiper"]);
    for (heard, volts, what) in [(&bare, &tone, "tone"), (&wiper_point, &wiper, "wiper")] {
        let worst = heard[0]
            .iter()
            .zip(&volts[0])
            .map(|(a, v)| (a - v / full_scale).abs())
            .fold(0.0f32, f32::max);
        assert!(
            worst < 1e-6,
            "{what}: listening output vs node volts / 4 V: {worst}"
        );
    }
    let differs = bare[0]
        .iter()
        .zip(&wiper_point[0])
        .any(|(a, b)| (a - b).abs() > 1e-3);
    assert!(differs, "the tone stack changes what is heard");
}

#[test]
fn a_stereo_response_makes_a_mono_di_stereo() {
    let dir = scratch("stereo");
    let h = response();
    let ir = dir.join("ir2.wav");
    let spec = hound::WavSpec {
        channels: 2,
        sample_rate: 96_000,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(&ir, spec).unwrap();
    for &x in &h {
        w.write_sample(x).unwrap();
        w.write_sample(0.5 * x).unwrap();
    }
    w.finalize().unwrap();
    let out = render(&dir, "st.wav", &["--cabinet", s(&ir)]);
    assert_eq!(out.len(), 2);
    // One normalisation gain for both channels keeps their balance: right = left / 2.
    let peak = out[0].iter().fold(0.0f32, |m, v| m.max(v.abs()));
    let worst = out[0]
        .iter()
        .zip(&out[1])
        .map(|(l, r)| (0.5 * l - r).abs())
        .fold(0.0f32, f32::max);
    assert!(
        peak > 1e-3 && worst <= 1e-5 * peak,
        "balance off by {worst}"
    );
}

#[test]
fn bad_listening_options_are_refused_before_anything_is_written() {
    let dir = scratch("bad");
    let input = di(&dir);
    let output = dir.join("out.wav");
    let not_audio = dir.join("notes.wav");
    std::fs::write(&not_audio, "these are my notes, not audio\n").unwrap();
    let nan = dir.join("nan.wav");
    write_float(&nan, 48_000, &[0.5, f32::NAN, 0.1]);
    let long = dir.join("long.wav");
    write_float(&long, 8_000, &vec![0.01; 8_000 * 3]);
    let silent = dir.join("silent.wav");
    write_float(&silent, 48_000, &[0.0; 64]);
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["--listen", "speaker"], "--listen speaker"),
        (vec!["--cabinet", s(&not_audio)], "not a WAV file"),
        (vec!["--cabinet", s(&nan)], "--cabinet"),
        (vec!["--cabinet", s(&long)], "--cabinet"),
        (vec!["--cabinet", s(&silent)], "silent"),
        (vec!["--cabinet", "missing.wav"], "missing.wav"),
        (
            vec!["--listen", "wiper", "--cabinet", "builtin"],
            "the bare wiper has no cabinet",
        ),
        (vec!["--probe", "clamp", "--cabinet", "none"], "--probe"),
    ];
    for (extra, needle) in cases {
        let mut args = vec!["render", "--input", s(&input), "--output", s(&output)];
        args.extend_from_slice(&extra);
        let out = run(&args);
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(!out.status.success(), "{extra:?} was accepted");
        assert!(
            err.contains(needle),
            "{extra:?}: message '{err}' lacks '{needle}'"
        );
        assert!(!output.exists(), "{extra:?} left an output behind");
    }
    assert_eq!(
        std::fs::read_to_string(&not_audio).unwrap(),
        "these are my notes, not audio\n"
    );
    // The output may not be the cabinet file.
    let ir = dir.join("ir.wav");
    write_float(&ir, 48_000, &response());
    let before = std::fs::read(&ir).unwrap();
    let out = run(&[
        "render",
        "--input",
        s(&input),
        "--output",
        s(&ir),
        "--cabinet",
        s(&ir),
    ]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("cabinet file"));
    assert_eq!(std::fs::read(&ir).unwrap(), before);
}
