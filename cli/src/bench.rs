//! `breakdown bench`: the model's speed as ratios measured in one run, per quality, at 48 kHz on a DI-like
//! signal: the built-in preamp against the one-stage preset, the listening chain (cabinet) on against off,
//! stereo (two engines) against mono, and, where ngspice and the reference script are installed, the model
//! against ngspice on the same circuit at audio-rate settings. Absolute figures are printed with the machine
//! they were measured on; only the ratios carry from one machine to another.

use breakdown_dsp::cabinet::Cabinet;
use breakdown_dsp::circuit::BUILTIN_TOML;
use breakdown_dsp::lanes::{f64x2, f64x4};
use breakdown_dsp::{Circuit, Engine, Probe, Quality, Settings};
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

const RATE: f64 = 48_000.0;
const BLOCK: usize = 512;
/// Each item renders the signal again until its measured CPU time reaches this (s): the thread CPU time the
/// kernel reports may advance in scheduler ticks (4 ms here), so a short run would be off by a tick's share.
const MIN_MEASURED_SECONDS: f64 = 0.5;
/// The same for `--quick` (a smoke run: the figures are rough, the ratios still meaningful to a few percent).
const QUICK_MEASURED_SECONDS: f64 = 0.05;
/// Targets from the issue list: the built-in preamp at most this many times the one-stage cost per sample,
/// the listening chain at most this many times the model alone.
const PREAMP_TARGET: f64 = 2.0;
const CABINET_TARGET: f64 = 1.3;
/// ngspice gets this long to run its timing before it is stopped (s).
const NGSPICE_TIMEOUT: f64 = 300.0;

#[derive(clap::Args)]
pub struct BenchArgs {
    /// Seconds of test signal rendered per item (each item renders it again until it has run long enough to
    /// time).
    #[arg(long, default_value_t = 3.0)]
    pub seconds: f64,
    /// Short smoke run (about a second of signal per item), for CI: every figure printed, less accurately.
    #[arg(long)]
    pub quick: bool,
    /// Qualities to measure, comma-separated from 1, 2, 4, 8, 16 (default all).
    #[arg(long, value_name = "1,2,4,8,16", value_delimiter = ',')]
    pub quality: Vec<usize>,
    /// The reference script with the ngspice timing mode (default: references/gen.py found from the current
    /// folder or the executable's repository).
    #[arg(long, value_name = "PATH")]
    pub ngspice_script: Option<PathBuf>,
}

/// A DI-like test signal in full-scale units (1.0 = 1 V at the jack for the reference circuit): a 110 Hz
/// plucked note with harmonics, re-plucked every second, each pluck decaying from `peak`, the higher
/// harmonics faster, as a string does.
pub fn plucked_di(rate: f64, seconds: f64, peak: f64) -> Vec<f32> {
    let n = (rate * seconds).round() as usize;
    let f0 = 110.0;
    // Harmonic amplitudes 1/k and decay rates rising with k (1/s).
    let harmonics: Vec<(f64, f64, f64)> = (1..=8)
        .map(|k| (k as f64 * f0, 1.0 / k as f64, 2.0 + 1.5 * k as f64))
        .collect();
    let raw: Vec<f64> = (0..n)
        .map(|i| {
            let t = (i as f64 / rate) % 1.0;
            // 2 ms attack so the pluck has no step.
            let attack = (t / 0.002).min(1.0);
            harmonics
                .iter()
                .map(|&(f, a, d)| a * (-d * t).exp() * (std::f64::consts::TAU * f * t).sin())
                .sum::<f64>()
                * attack
        })
        .collect();
    let max = raw.iter().fold(0.0f64, |m, v| m.max(v.abs())).max(1e-12);
    raw.iter().map(|v| (v * peak / max) as f32).collect()
}

/// CPU time this thread has run (s), from Linux's /proc/thread-self/schedstat (first field, ns); `None`
/// elsewhere. On a shared machine this is fairer than wall-clock time, which counts time spent waiting.
fn thread_cpu_seconds() -> Option<f64> {
    let text = std::fs::read_to_string("/proc/thread-self/schedstat").ok()?;
    let ns: u64 = text.split_whitespace().next()?.parse().ok()?;
    Some(ns as f64 * 1e-9)
}

/// The machine the figures belong to: CPU model name and the cores this process may use.
fn machine() -> String {
    let model = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|text| {
            text.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split_once(':'))
                .map(|(_, v)| v.trim().to_string())
        })
        .unwrap_or_else(|| "CPU model unknown".to_string());
    let cores = std::thread::available_parallelism()
        .map(|n| n.get().to_string())
        .unwrap_or_else(|_| "?".to_string());
    format!("{model}, {cores} cores")
}

/// What one item runs.
#[derive(Clone, Copy)]
struct Item<'a> {
    circuit: &'a Circuit,
    /// 1 (mono) or 2 (two engines, one per channel).
    channels: usize,
    /// The cabinet after the engine's listening output.
    cabinet: bool,
    /// How the models run: one engine per channel, or packed as lanes of one engine.
    lanes: Lanes,
}

/// How an item's models run.
#[derive(Clone, Copy, PartialEq)]
enum Lanes {
    /// One engine per channel.
    Separate,
    /// The two channels as two packed lanes of one engine.
    Stereo,
    /// Four switch positions (0, 1, 2, 3, clamped to the circuit's) on one DI as four packed lanes.
    Positions,
}

/// The engines of an item.
enum Runner {
    Separate(Vec<Engine>),
    Two(Engine<f64x2>),
    Four(Engine<f64x4>),
}

impl Runner {
    fn new(item: &Item, quality: Quality, settings: Settings) -> Result<Runner, String> {
        Ok(match item.lanes {
            Lanes::Separate => Runner::Separate(
                (0..item.channels)
                    .map(|_| Engine::new(item.circuit, RATE, quality, settings).map_err(|e| e.0))
                    .collect::<Result<Vec<_>, _>>()?,
            ),
            Lanes::Stereo => {
                let mut e =
                    Engine::with_lanes(item.circuit, RATE, quality, settings).map_err(|e| e.0)?;
                e.set_active_probes(&[Probe::Listen]);
                Runner::Two(e)
            }
            Lanes::Positions => {
                let mut e: Engine<f64x4> =
                    Engine::with_lanes(item.circuit, RATE, quality, settings).map_err(|e| e.0)?;
                let count = e.model().positions();
                for lane in 0..4 {
                    e.set_lane_position(lane, lane.min(count.saturating_sub(1)));
                }
                e.reset();
                e.set_active_probes(&[Probe::Listen]);
                Runner::Four(e)
            }
        })
    }

    fn reset(&mut self) {
        match self {
            Runner::Separate(engines) => engines.iter_mut().for_each(|e| e.reset()),
            Runner::Two(e) => e.reset(),
            Runner::Four(e) => e.reset(),
        }
    }

    /// One block of the listening output into `outs` (one row per channel; packed positions write row 0).
    fn process(&mut self, block: &[f32], outs: &mut [Vec<f32>]) {
        match self {
            Runner::Separate(engines) => {
                for (engine, out) in engines.iter_mut().zip(outs.iter_mut()) {
                    engine.process_block(block, &mut out[..block.len()], Probe::Listen);
                }
            }
            Runner::Two(e) => {
                for (n, &x) in block.iter().enumerate() {
                    let f = e.process_lanes(&[x, x]);
                    let (l, r) = (f[0].listen as f32, f[1].listen as f32);
                    outs[0][n] = l;
                    outs[1][n] = r;
                }
            }
            Runner::Four(e) => {
                for (n, &x) in block.iter().enumerate() {
                    let f = e.process_lanes(&[x; 4]);
                    outs[0][n] = (f[0].listen + f[1].listen + f[2].listen + f[3].listen) as f32;
                }
            }
        }
    }
}

/// One item's cost: ns of CPU per output sample (per frame for stereo) and the real-time factor.
#[derive(Clone, Copy)]
struct Cost {
    ns_per_sample: f64,
    realtime: f64,
}

fn measure(
    item: Item,
    quality: Quality,
    settings: Settings,
    signal: &[f32],
    min_seconds: f64,
) -> Result<Cost, String> {
    let mut engines = Runner::new(&item, quality, settings)?;
    let mut cabinet = if item.cabinet {
        Some(Cabinet::builtin(RATE, item.channels).map_err(|e| format!("cabinet: {e}"))?)
    } else {
        None
    };
    let warmup = plucked_di(RATE, 0.1, 0.8);
    let mut outs = vec![vec![0.0f32; BLOCK]; item.channels];
    let mut sink = 0.0f64;
    let mut render = |engines: &mut Runner, cabinet: &mut Option<Cabinet>, input: &[f32]| {
        for block in input.chunks(BLOCK) {
            engines.process(block, &mut outs);
            if let Some(cab) = cabinet.as_mut() {
                for n in 0..block.len() {
                    let right = outs.get(1).map_or(0.0, |o| o[n] as f64);
                    let y = cab.process([outs[0][n] as f64, right]);
                    sink += std::hint::black_box(y[0] + y[1]);
                }
            } else {
                sink += std::hint::black_box(outs[0][0] as f64);
            }
        }
    };
    render(&mut engines, &mut cabinet, &warmup);
    let cpu_start = thread_cpu_seconds();
    let start = Instant::now();
    let mut renders = 0usize;
    let elapsed = loop {
        engines.reset();
        if let Some(cab) = cabinet.as_mut() {
            cab.reset();
        }
        render(&mut engines, &mut cabinet, signal);
        renders += 1;
        let wall = start.elapsed().as_secs_f64();
        let cpu = match (cpu_start, thread_cpu_seconds()) {
            (Some(a), Some(b)) if b > a => Some(b - a),
            _ => None,
        };
        let elapsed = cpu.unwrap_or(wall);
        if elapsed >= min_seconds {
            break elapsed;
        }
    };
    std::hint::black_box(sink);
    let samples = (signal.len() * renders) as f64;
    Ok(Cost {
        ns_per_sample: elapsed * 1e9 / samples,
        realtime: samples / RATE / elapsed,
    })
}

/// The reference script: given, or references/gen.py above the current folder or the executable.
fn find_script(given: Option<&Path>) -> Result<PathBuf, String> {
    if let Some(path) = given {
        return if path.is_file() {
            Ok(path.to_path_buf())
        } else {
            Err(format!("--ngspice-script {}: no such file", path.display()))
        };
    }
    let mut starts = Vec::new();
    if let Ok(dir) = std::env::current_dir() {
        starts.push(dir);
    }
    if let Ok(exe) = std::env::current_exe() {
        starts.push(exe);
    }
    for start in starts {
        for dir in start.ancestors() {
            let candidate = dir.join("references").join("gen.py");
            if candidate.is_file() {
                return Ok(candidate);
            }
        }
    }
    Err("references/gen.py not found from the current folder or the executable (give --ngspice-script)".into())
}

fn on_path(program: &str) -> bool {
    std::env::var_os("PATH")
        .is_some_and(|paths| std::env::split_paths(&paths).any(|dir| dir.join(program).is_file()))
}

/// ngspice's real-time factor on the built-in preamp through the reference script's timing mode (output
/// step and maximum step 1/48000 s, reltol 1e-3, as that mode sets them), or why it was not measured.
fn ngspice_realtime(script: Option<&Path>, seconds: f64) -> Result<f64, String> {
    if !on_path("ngspice") {
        return Err("ngspice is not on PATH".into());
    }
    if !on_path("python3") {
        return Err("python3 is not on PATH".into());
    }
    let script = find_script(script)?;
    let circuit = std::env::temp_dir().join(format!(
        "breakdown-bench-{}-builtin-preamp.toml",
        std::process::id()
    ));
    std::fs::write(&circuit, BUILTIN_TOML)
        .map_err(|e| format!("could not write {}: {e}", circuit.display()))?;
    let result = run_timing(&script, &circuit, seconds);
    let _ = std::fs::remove_file(&circuit);
    result
}

fn run_timing(script: &Path, circuit: &Path, seconds: f64) -> Result<f64, String> {
    let mut child = Command::new("python3")
        .arg(script)
        .arg("timing")
        .arg("--circuit")
        .arg(circuit)
        .arg("--seconds")
        .arg(format!("{seconds}"))
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .map_err(|e| format!("could not start python3 {}: {e}", script.display()))?;
    let start = Instant::now();
    loop {
        match child.try_wait() {
            Ok(Some(_)) => break,
            Ok(None) if start.elapsed().as_secs_f64() > NGSPICE_TIMEOUT => {
                let _ = child.kill();
                let _ = child.wait();
                return Err(format!("the timing run took over {NGSPICE_TIMEOUT} s"));
            }
            Ok(None) => std::thread::sleep(Duration::from_millis(50)),
            Err(e) => return Err(format!("waiting for the timing run: {e}")),
        }
    }
    let out = child
        .wait_with_output()
        .map_err(|e| format!("reading the timing run: {e}"))?;
    let stdout = String::from_utf8_lossy(&out.stdout);
    if !out.status.success() {
        let stderr = String::from_utf8_lossy(&out.stderr);
        let last = stderr
            .lines()
            .rev()
            .find(|l| !l.trim().is_empty())
            .unwrap_or("");
        return Err(format!(
            "{} timing failed ({}): {last}",
            script.display(),
            out.status
        ));
    }
    let line = stdout
        .lines()
        .rev()
        .find(|l| l.trim_start().starts_with('{'))
        .ok_or("the timing run printed no JSON line")?;
    let value: serde_json::Value =
        serde_json::from_str(line).map_err(|e| format!("timing output {line:?}: {e}"))?;
    let factor = value
        .get("realtime_factor")
        .and_then(serde_json::Value::as_f64)
        .ok_or_else(|| format!("timing output {line:?} has no realtime_factor"))?;
    if factor.is_finite() && factor > 0.0 {
        Ok(factor)
    } else {
        Err(format!("timing output gave realtime_factor {factor}"))
    }
}

pub fn run(args: BenchArgs) -> Result<(), String> {
    if !args.seconds.is_finite() || args.seconds < 0.1 || args.seconds > 3600.0 {
        return Err(format!(
            "--seconds {}: give a length from 0.1 to 3600 seconds",
            args.seconds
        ));
    }
    let qualities = if args.quality.is_empty() {
        Quality::ALL.to_vec()
    } else {
        args.quality
            .iter()
            .map(|&f| {
                Quality::from_factor(f)
                    .ok_or_else(|| format!("--quality {f}: give qualities from 1, 2, 4, 8, 16"))
            })
            .collect::<Result<Vec<_>, _>>()?
    };
    let (seconds, min_seconds) = if args.quick {
        (1.0, QUICK_MEASURED_SECONDS)
    } else {
        (args.seconds, MIN_MEASURED_SECONDS)
    };
    let one_stage = Circuit::one_stage();
    let preamp = Circuit::builtin();
    let settings = Settings {
        gain: 0.8,
        position: 1,
        ..Settings::default()
    };
    let signal = plucked_di(RATE, seconds, 0.8);
    println!("breakdown bench on {}", machine());
    println!(
        "one channel at {} kHz, {seconds:.1} s of plucked 110 Hz DI (0.8 V peak) per item, gain {}, level {}, \
         position {}; cost is the thread's CPU time per output sample{}",
        RATE / 1000.0,
        settings.gain,
        settings.level,
        settings.position,
        if args.quick { " (--quick: rough)" } else { "" }
    );
    let ngspice = ngspice_realtime(
        args.ngspice_script.as_deref(),
        if args.quick { 0.2 } else { 1.0 },
    );
    let mut header = format!(
        "{:>7} {:>11} {:>11} {:>11} {:>11} {:>14} {:>10} {:>8} {:>10} {:>12} {:>12} {:>10}",
        "quality",
        "1stage-ns",
        "1stage-xRT",
        "preamp-ns",
        "preamp-xRT",
        "preamp/1stage",
        "cab-ns",
        "cab/off",
        "stereo-ns",
        "stereo/mono",
        "packed/mono",
        "4pos/mono"
    );
    if ngspice.is_ok() {
        header.push_str(&format!(" {:>15}", "preamp/ngspice"));
    }
    println!("{header}");
    let mut worst_preamp = (0.0f64, Quality::X1);
    let mut worst_cabinet = (0.0f64, Quality::X1);
    for &quality in &qualities {
        let cost = |circuit, channels, cabinet, lanes| {
            measure(
                Item {
                    circuit,
                    channels,
                    cabinet,
                    lanes,
                },
                quality,
                settings,
                &signal,
                min_seconds,
            )
        };
        let single = cost(&one_stage, 1, false, Lanes::Separate)?;
        let mono = cost(&preamp, 1, false, Lanes::Separate)?;
        let cab = cost(&preamp, 1, true, Lanes::Separate)?;
        let stereo = cost(&preamp, 2, false, Lanes::Separate)?;
        let packed = cost(&preamp, 2, false, Lanes::Stereo)?;
        let four = cost(&preamp, 1, false, Lanes::Positions)?;
        let preamp_ratio = mono.ns_per_sample / single.ns_per_sample;
        let cabinet_ratio = cab.ns_per_sample / mono.ns_per_sample;
        if preamp_ratio > worst_preamp.0 {
            worst_preamp = (preamp_ratio, quality);
        }
        if cabinet_ratio > worst_cabinet.0 {
            worst_cabinet = (cabinet_ratio, quality);
        }
        let mut row = format!(
            "{:>6}x {:>11.1} {:>11.1} {:>11.1} {:>11.1} {:>14.2} {:>10.1} {:>8.2} {:>10.1} {:>12.2} {:>12.2} {:>10.2}",
            quality.factor(),
            single.ns_per_sample,
            single.realtime,
            mono.ns_per_sample,
            mono.realtime,
            preamp_ratio,
            cab.ns_per_sample,
            cabinet_ratio,
            stereo.ns_per_sample,
            stereo.ns_per_sample / mono.ns_per_sample,
            packed.ns_per_sample / mono.ns_per_sample,
            four.ns_per_sample / mono.ns_per_sample
        );
        if let Ok(spice) = ngspice {
            row.push_str(&format!(" {:>15.1}", mono.realtime / spice));
        }
        println!("{row}");
    }
    println!(
        "(1stage: presets-demo/one-stage.toml; preamp: the built-in preamp; cab: the preamp with the built-in \
         cabinet after its listening output; stereo: two preamp engines, ns per stereo frame; packed: the two \
         channels as two SIMD lanes of one engine; 4pos: four switch positions on one DI as four lanes; xRT: \
         times real time on one core)"
    );
    println!(
        "targets: preamp/1stage at most {PREAMP_TARGET} (worst here {:.2} at {}x: {}); cab/off at most \
         {CABINET_TARGET} (worst here {:.2} at {}x: {})",
        worst_preamp.0,
        worst_preamp.1.factor(),
        if worst_preamp.0 <= PREAMP_TARGET { "met" } else { "not met" },
        worst_cabinet.0,
        worst_cabinet.1.factor(),
        if worst_cabinet.0 <= CABINET_TARGET { "met" } else { "not met" },
    );
    match ngspice {
        Ok(factor) => println!(
            "ngspice: {factor:.2}x real time on the built-in preamp (output and maximum step 1/48000 s, reltol \
             1e-3); preamp/ngspice is the model's real-time factor over that"
        ),
        Err(why) => println!("ngspice: not measured ({why})"),
    }
    if thread_cpu_seconds().is_none() {
        println!("(thread CPU time unavailable here: figures are wall-clock)");
    }
    println!(
        "(multiply-adds: the solver's are a multiply then an add; the triode tables and the cabinet use {}; \
         BREAKDOWN_SEPARATE_MADD=1 times them separate)",
        if breakdown_dsp::arith::fused_available() {
            "fused ones, as this processor has FMA"
        } else {
            "separate ones"
        }
    );
    Ok(())
}
