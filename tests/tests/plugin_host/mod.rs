//! Shared by the host-level plugin tests (`clap_host.rs`, `vst3_host.rs`, `ardour_host.rs`): find or build the plugin
//! bundles, a DI-like test signal, and the `breakdown-dsp` rendering the plugin's output must equal (on the
//! built-in circuit, the plugin's default, or on any circuit a test loads into the plugin).

#![allow(dead_code)]

use breakdown_dsp::cabinet::Cabinet;
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::Mutex;
use std::time::SystemTime;

/// Write a mono 32-bit float WAV (the DI files the hosts play).
pub fn write_wav(path: &Path, rate: u32, x: &[f32]) {
    let spec = hound::WavSpec {
        channels: 1,
        sample_rate: rate,
        bits_per_sample: 32,
        sample_format: hound::SampleFormat::Float,
    };
    let mut w = hound::WavWriter::create(path, spec).expect("create wav");
    for &s in x {
        w.write_sample(s).unwrap();
    }
    w.finalize().unwrap();
}

/// Workspace root (the parent of this crate).
pub fn workspace_root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .parent()
        .expect("tests crate sits inside the workspace")
        .to_path_buf()
}

/// Cargo's target directory (honours CARGO_TARGET_DIR).
pub fn target_dir() -> PathBuf {
    match std::env::var_os("CARGO_TARGET_DIR") {
        Some(d) => {
            let d = PathBuf::from(d);
            if d.is_absolute() {
                d
            } else {
                workspace_root().join(d)
            }
        }
        None => workspace_root().join("target"),
    }
}

pub fn clap_bundle() -> PathBuf {
    target_dir().join("bundled").join("breakdown.clap")
}

pub fn vst3_bundle() -> PathBuf {
    target_dir().join("bundled").join("breakdown.vst3")
}

/// The shared object inside the VST3 bundle (Linux x86-64 layout of the VST3 module format).
pub fn vst3_binary() -> PathBuf {
    vst3_bundle()
        .join("Contents")
        .join("x86_64-linux")
        .join("breakdown.so")
}

/// Newest modification time of the files the plugin binary is built from.
fn newest_source() -> SystemTime {
    fn walk(p: &Path, newest: &mut SystemTime) {
        let Ok(meta) = std::fs::metadata(p) else {
            return;
        };
        if meta.is_dir() {
            if let Ok(entries) = std::fs::read_dir(p) {
                for e in entries.flatten() {
                    walk(&e.path(), newest);
                }
            }
        } else if let Ok(m) = meta.modified() {
            if m > *newest {
                *newest = m;
            }
        }
    }
    let root = workspace_root();
    let mut newest = SystemTime::UNIX_EPOCH;
    for p in [
        "plugin/src",
        "plugin/Cargo.toml",
        "dsp/src",
        "dsp/Cargo.toml",
        "presets-demo/builtin-preamp.toml",
        "presets-demo/one-stage.toml",
        "presets-demo/plugin",
        "Cargo.lock",
    ] {
        walk(&root.join(p), &mut newest);
    }
    newest
}

fn modified(p: &Path) -> Option<SystemTime> {
    std::fs::metadata(p).and_then(|m| m.modified()).ok()
}

static BUNDLE: Mutex<Option<Result<(), String>>> = Mutex::new(None);

/// Make sure `target/bundled/breakdown.clap` and `.vst3` exist and are newer than the sources; otherwise run
/// `cargo xtask bundle breakdown --release` from the workspace root (once per test process). Under
/// `cargo test` the outer cargo has released its build lock while tests run, so the inner build can take it.
pub fn ensure_bundles() {
    let mut done = BUNDLE.lock().unwrap_or_else(|e| e.into_inner());
    if done.is_none() {
        *done = Some(build_if_stale());
    }
    if let Some(Err(e)) = done.as_ref() {
        panic!("{e}");
    }
}

fn build_if_stale() -> Result<(), String> {
    let newest = newest_source();
    let fresh = [clap_bundle(), vst3_binary()]
        .iter()
        .all(|p| modified(p).is_some_and(|m| m >= newest));
    if fresh {
        return Ok(());
    }
    let cargo = std::env::var_os("CARGO").unwrap_or_else(|| "cargo".into());
    eprintln!(
        "plugin bundles missing or older than the sources: running `cargo xtask bundle breakdown --release`"
    );
    let mut cmd = Command::new(&cargo);
    cmd.current_dir(workspace_root())
        .args(["xtask", "bundle", "breakdown", "--release"]);
    // Variables the outer `cargo test` set for this test binary; they describe this crate, not the build.
    for (k, _) in std::env::vars_os() {
        if let Some(k) = k.to_str() {
            if k.starts_with("CARGO_PKG_")
                || k == "CARGO_MANIFEST_DIR"
                || k == "CARGO_MANIFEST_PATH"
                || k == "CARGO_CRATE_NAME"
                || k == "CARGO_PRIMARY_PACKAGE"
            {
                cmd.env_remove(k);
            }
        }
    }
    let status = cmd
        .status()
        .map_err(|e| format!("cannot run {cargo:?} to build the plugin bundles: {e}"))?;
    if !status.success() {
        return Err(format!(
            "`cargo xtask bundle breakdown --release` failed ({status})"
        ));
    }
    for p in [clap_bundle(), vst3_binary()] {
        if !p.exists() {
            return Err(format!(
                "the bundler ran but {} is still missing",
                p.display()
            ));
        }
    }
    Ok(())
}

/// A DI-like test signal: two plucked notes (A2 then E3), each a sum of decaying harmonics with a short pick
/// attack, the second starting while the first rings; peak about `peak` of full scale. Our own synthesis
/// (harmonic amplitudes fall as 1/k and higher harmonics decay faster, as a plucked string's do — common
/// practice), so the stage is driven into its clamp and out again.
pub fn di_signal(rate: f64, seconds: f64, peak: f64) -> Vec<f32> {
    let n = (rate * seconds).round() as usize;
    let notes = [(110.0, 0.0), (164.81, seconds * 0.45)];
    let mut x = vec![0.0f64; n];
    for (f0, start) in notes {
        for (i, v) in x.iter_mut().enumerate() {
            let t = i as f64 / rate - start;
            if t < 0.0 {
                continue;
            }
            let attack = (t / 0.002).min(1.0);
            let mut s = 0.0;
            for k in 1..=12 {
                let fk = f0 * k as f64;
                if fk > rate * 0.45 {
                    break;
                }
                let decay = (-(2.0 + 0.8 * k as f64) * t).exp();
                s +=
                    decay / k as f64 * (2.0 * std::f64::consts::PI * fk * t + 0.3 * k as f64).sin();
            }
            *v += attack * s;
        }
    }
    let max = x.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-12);
    x.iter().map(|v| (v * peak / max) as f32).collect()
}

/// The settings the plugin runs with, in the terms its README documents.
#[derive(Clone, Copy, Debug)]
pub struct PluginSettings {
    /// Gain pot rotation as the plugin holds it (a 32-bit float parameter).
    pub gain: f32,
    pub level: f32,
    /// Switch position of the circuit, counted from 0 (the plugin's `position` parameter). On the built-in
    /// circuit (presets-demo/builtin-preamp.toml): 0 off, 1 symmetric 20 V (the plugin's default), 2 asymmetric
    /// 18 V / 5.6 V (the default compare-with).
    pub position: usize,
    pub quality: Quality,
    /// Peak volts at the input jack for full scale.
    pub volts_at_full_scale: f64,
}

impl Default for PluginSettings {
    /// The plugin's documented defaults (plugin/README.md): gain 0.8, level 0.5, position 1 (20 V / 20 V on
    /// the built-in circuit), 4x, volts at full scale 1 V.
    fn default() -> Self {
        PluginSettings {
            gain: 0.8,
            level: 0.5,
            position: 1,
            quality: Quality::X4,
            volts_at_full_scale: 1.0,
        }
    }
}

/// What the `breakdown-dsp` model renders for `input` on the built-in circuit (the plugin's default) at the
/// wiper listening point (latency removed), and the model's latency.
pub fn reference_render(rate: f64, s: PluginSettings, input: &[f32]) -> (Vec<f32>, usize) {
    reference_render_on(&Circuit::builtin(), rate, s, input)
}

/// What the `breakdown-dsp` model renders for `input` on `circuit` with the plugin's settings (its volts at
/// full scale replacing the file's, as the plugin's parameter does), latency removed, and the model's latency.
pub fn reference_render_on(
    circuit: &Circuit,
    rate: f64,
    s: PluginSettings,
    input: &[f32],
) -> (Vec<f32>, usize) {
    let mut circuit = circuit.clone();
    circuit.input.volts_at_full_scale = s.volts_at_full_scale;
    let settings = Settings {
        gain: s.gain as f64,
        level: s.level as f64,
        position: s.position,
        ..Default::default()
    };
    let mut engine = Engine::new(&circuit, rate, s.quality, settings).expect("the circuit builds");
    let latency = engine.latency();
    (engine.render(input, Probe::Listen), latency)
}

/// What the plugin's default listening chain gives for `input` on the built-in circuit: the model's listening
/// output (the tone stack's output), sample by sample from rest with its latency, through the dsp crate's
/// built-in cabinet (`Cabinet::builtin`, run here on its own), then the latency removed; and the latency.
pub fn reference_chain_render(rate: f64, s: PluginSettings, input: &[f32]) -> (Vec<f32>, usize) {
    let cabinet = Cabinet::builtin(rate, 1).expect("the built-in cabinet builds");
    reference_chain_render_with(rate, s, input, cabinet)
}

/// `reference_chain_render` through `cabinet` (mono signal) instead of the built-in one.
pub fn reference_chain_render_with(
    rate: f64,
    s: PluginSettings,
    input: &[f32],
    mut cabinet: Cabinet,
) -> (Vec<f32>, usize) {
    let mut circuit = Circuit::builtin();
    circuit.input.volts_at_full_scale = s.volts_at_full_scale;
    let settings = Settings {
        gain: s.gain as f64,
        level: s.level as f64,
        position: s.position,
        ..Default::default()
    };
    let mut engine = Engine::new(&circuit, rate, s.quality, settings).expect("the circuit builds");
    let latency = engine.latency();
    let mut out = Vec::with_capacity(input.len());
    for n in 0..input.len() + latency {
        let x = input.get(n).copied().unwrap_or(0.0);
        let y = cabinet.process_mono(engine.process_sample(x).listen)[0];
        if n >= latency {
            out.push(y as f32);
        }
    }
    (out, latency)
}

/// Largest |a - b| and where.
pub fn max_diff(a: &[f32], b: &[f32]) -> (f32, usize) {
    assert_eq!(a.len(), b.len(), "signals of different length");
    let mut worst = (0.0f32, 0usize);
    for (i, (x, y)) in a.iter().zip(b).enumerate() {
        let d = (x - y).abs();
        if d > worst.0 || d.is_nan() {
            worst = (d, i);
        }
    }
    worst
}

pub fn peak(x: &[f32]) -> f32 {
    x.iter().fold(0.0f32, |m, v| m.max(v.abs()))
}

/// A NUL-terminated C character array (as plugin APIs fill in names) as a Rust string.
pub fn c_text(chars: &[std::ffi::c_char]) -> String {
    let bytes: Vec<u8> = chars
        .iter()
        .take_while(|c| **c != 0)
        .map(|c| *c as u8)
        .collect();
    String::from_utf8_lossy(&bytes).into_owned()
}
