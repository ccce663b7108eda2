//! `breakdown demo`: synthesise a guitar-like DI (plucked strings through a pickup-like filter, a short riff of
//! our own with single notes and chords) and run the demo plan on it into `./breakdown-demo/`.
//! `breakdown demo --bench` times a 3-minute stereo DI through six variants instead.

use crate::audio::{self, Audio};
use crate::compare::abclip::Mix;
use crate::compare::{self, Options};
use crate::report;
use std::f64::consts::PI;
use std::path::PathBuf;

/// The demo plan, built in so the demo runs from any folder.
pub const DEMO_PLAN: &str = include_str!("../../presets-demo/demo-plan.toml");
/// Demo DI sample rate (Hz).
pub const DEMO_RATE: u32 = 48_000;
/// Peak volts of the demo DI at the input jack: a hot passive pickup dug in hard [common practice], enough
/// to drive the reference stage past the 20 V pair at full gain.
pub const DEMO_PEAK_VOLTS: f64 = 0.8;

#[derive(clap::Args)]
pub struct DemoArgs {
    /// Output folder (default ./breakdown-demo).
    #[arg(long)]
    pub output: Option<PathBuf>,
    /// Instead of the demo: time a 3-minute stereo DI through six variants at the default quality.
    #[arg(long)]
    pub bench: bool,
    /// Length of the benchmark DI (s).
    #[arg(long, default_value_t = 180.0, requires = "bench")]
    pub bench_seconds: f64,
    /// Worker threads (default: every core).
    #[arg(long)]
    pub jobs: Option<usize>,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// Small deterministic noise source in -1..1 (the A/B clip's SplitMix64 generator).
struct Noise(Mix);

impl Noise {
    fn next(&mut self) -> f64 {
        self.0.signed_unit()
    }
}

fn midi_hz(note: f64) -> f64 {
    440.0 * 2f64.powf((note - 69.0) / 12.0)
}

/// One plucked note (Karplus-Strong string with a fractional-delay allpass for tuning, a pick-position comb
/// on the excitation and a pickup-position comb on the output), added into `out`.
#[allow(clippy::too_many_arguments)]
fn pluck(
    out: &mut [f64],
    rate: f64,
    note: f64,
    start: f64,
    hold: f64,
    velocity: f64,
    ring_t60: f64,
    noise: &mut Noise,
) {
    let freq = midi_hz(note);
    let period = rate / freq;
    let len = (period - 0.5).floor().max(2.0) as usize;
    let frac = (period - 0.5 - len as f64).clamp(0.05, 0.95);
    let allpass = (1.0 - frac) / (1.0 + frac);
    // Excitation: noise, lowpassed more for softer picking, with the pick-position notch comb.
    let brightness = 0.12 + 0.3 * velocity;
    let mut excitation = vec![0.0; len];
    let mut lp = 0.0;
    for e in excitation.iter_mut() {
        lp += brightness * (noise.next() - lp);
        *e = lp;
    }
    let mean = excitation.iter().sum::<f64>() / len as f64;
    let pick = ((0.13 * len as f64).round() as usize).max(1);
    let combed: Vec<f64> = (0..len)
        .map(|n| {
            excitation[n]
                - mean
                - if n >= pick {
                    excitation[n - pick] - mean
                } else {
                    0.0
                }
        })
        .collect();
    let peak = combed.iter().fold(1e-9f64, |m, x| m.max(x.abs()));
    let mut line: Vec<f64> = combed.iter().map(|x| x / peak * velocity).collect();

    let ring_gain = 10f64.powf(-3.0 / (freq * ring_t60));
    let damp_gain = 10f64.powf(-3.0 / (freq * 0.09));
    let start_n = (start * rate) as usize;
    let hold_n = (hold * rate) as usize;
    let total = hold_n + (0.25 * rate) as usize;
    let pickup = ((0.22 * period).round() as usize).max(1);
    let mut history = vec![0.0; pickup + 1];
    let (mut i, mut last, mut ap_x, mut ap_y) = (0usize, 0.0f64, 0.0f64, 0.0f64);
    for n in 0..total {
        let at = start_n + n;
        if at >= out.len() {
            break;
        }
        let s = line[i];
        let gain = if n < hold_n { ring_gain } else { damp_gain };
        let averaged = gain * 0.5 * (s + last);
        last = s;
        let y = allpass * averaged + ap_x - allpass * ap_y;
        ap_x = averaged;
        ap_y = y;
        line[i] = y;
        i = (i + 1) % len;
        // Pickup position: the pickup senses the string a fraction of its length from the bridge.
        let h = n % history.len();
        let delayed = history[(n + 1) % history.len()];
        history[h] = s;
        out[at] += s - delayed;
    }
}

/// RBJ-cookbook biquad lowpass (R. Bristow-Johnson, "Cookbook formulae for audio EQ biquad filter
/// coefficients"), in place.
fn lowpass(signal: &mut [f64], rate: f64, freq: f64, q: f64) {
    let w = 2.0 * PI * freq / rate;
    let alpha = w.sin() / (2.0 * q);
    let cos = w.cos();
    let a0 = 1.0 + alpha;
    let b0 = (1.0 - cos) / 2.0 / a0;
    let b1 = (1.0 - cos) / a0;
    let a1 = -2.0 * cos / a0;
    let a2 = (1.0 - alpha) / a0;
    let (mut x1, mut x2, mut y1, mut y2) = (0.0, 0.0, 0.0, 0.0);
    for s in signal.iter_mut() {
        let x = *s;
        let y = b0 * x + b1 * x1 + b0 * x2 - a1 * y1 - a2 * y2;
        x2 = x1;
        x1 = x;
        y2 = y1;
        y1 = y;
        *s = y;
    }
}

/// A note or chord of the riff: beat position, length in beats, MIDI notes (low string first), velocity,
/// whether it rings or is muted short.
struct Event {
    beat: f64,
    beats: f64,
    notes: &'static [u8],
    velocity: f64,
}

const E5: &[u8] = &[40, 47, 52];
const G5: &[u8] = &[43, 50, 55];
const A5: &[u8] = &[45, 52, 57];
const C5: &[u8] = &[48, 55, 60];
const D5: &[u8] = &[50, 57, 62];
const EM: &[u8] = &[40, 47, 52, 55, 59, 64];
const CMAJ: &[u8] = &[48, 52, 55, 60, 64];
const GMAJ: &[u8] = &[43, 47, 50, 55, 59, 67];
const DMAJ: &[u8] = &[50, 57, 62, 66];

/// The riff (our own): two bars of low single notes, two of power chords, two of a higher line, two of open
/// chords, the low line again and a ringing chord. 96 bpm, 4/4.
fn riff() -> Vec<Event> {
    let mut ev = Vec::new();
    let single = |bar: f64, notes: &[&'static [u8]], velocity: f64, ev: &mut Vec<Event>| {
        for (k, n) in notes.iter().enumerate() {
            ev.push(Event {
                beat: bar * 4.0 + k as f64 * 0.5,
                beats: if n[0] == 40 { 0.3 } else { 0.45 },
                notes: n,
                velocity,
            });
        }
    };
    let low1: [&[u8]; 8] = [&[40], &[40], &[43], &[40], &[45], &[40], &[47], &[45]];
    let low2: [&[u8]; 8] = [&[40], &[40], &[43], &[40], &[50], &[48], &[47], &[45]];
    single(0.0, &low1, 0.7, &mut ev);
    single(1.0, &low2, 0.75, &mut ev);
    for (beat, beats, notes) in [
        (8.0, 2.0, E5),
        (10.0, 1.0, G5),
        (11.0, 1.0, A5),
        (12.0, 2.0, C5),
        (14.0, 1.5, D5),
        (15.5, 0.5, D5),
    ] {
        ev.push(Event {
            beat,
            beats,
            notes,
            velocity: 0.95,
        });
    }
    let high: [(f64, f64, &[u8]); 11] = [
        (16.0, 0.5, &[64]),
        (16.5, 0.5, &[62]),
        (17.0, 0.5, &[59]),
        (17.5, 0.5, &[57]),
        (18.0, 0.5, &[55]),
        (18.5, 0.5, &[57]),
        (19.0, 0.5, &[59]),
        (19.5, 0.5, &[62]),
        (20.0, 2.0, &[64]),
        (22.0, 1.5, &[59]),
        (23.5, 0.5, &[57]),
    ];
    for (beat, beats, notes) in high {
        ev.push(Event {
            beat,
            beats,
            notes,
            velocity: 0.8,
        });
    }
    for (beat, notes) in [(24.0, EM), (26.0, CMAJ), (28.0, GMAJ), (30.0, DMAJ)] {
        ev.push(Event {
            beat,
            beats: 1.9,
            notes,
            velocity: 1.0,
        });
    }
    single(8.0, &low1, 0.75, &mut ev);
    ev.push(Event {
        beat: 36.0,
        beats: 6.0,
        notes: E5,
        velocity: 1.0,
    });
    ev
}

/// Beats in the riff (its length before the final chord rings out).
const RIFF_BEATS: f64 = 42.0;
const BPM: f64 = 96.0;

/// Synthesise `seconds` of the riff (looped) at `rate`, peak-normalised to `peak` full-scale units. `take`
/// varies the picking, so two takes make a double-tracked pair.
pub fn synthesize(rate: u32, seconds: f64, peak: f64, take: u64) -> Vec<f32> {
    let rate_f = rate as f64;
    let frames = (seconds * rate_f) as usize;
    let mut out = vec![0.0f64; frames];
    let mut noise = Noise(Mix(0xD1_5EED ^ take.wrapping_mul(0x2545_F491_4F6C_DD1D)));
    let beat = 60.0 / BPM;
    let riff = riff();
    let mut offset = 0.0;
    while offset * beat < seconds {
        for e in &riff {
            let t0 = (offset + e.beat) * beat + 0.004 * noise.next();
            if t0 >= seconds {
                continue;
            }
            let velocity = (e.velocity * (1.0 + 0.08 * noise.next())).clamp(0.1, 1.0);
            let strum = if e.notes.len() > 1 { 0.011 } else { 0.0 };
            for (k, &n) in e.notes.iter().enumerate() {
                let start = t0 + k as f64 * strum;
                let hold = (e.beats * beat - k as f64 * strum).max(0.05);
                let ring = if e.notes.len() > 1 { 2.5 } else { 1.6 };
                pluck(
                    &mut out,
                    rate_f,
                    n as f64,
                    start,
                    hold,
                    velocity * (1.0 - 0.04 * k as f64),
                    ring,
                    &mut noise,
                );
            }
        }
        offset += RIFF_BEATS;
    }
    // Pickup: inductance against cable capacitance gives a resonant lowpass near 3 kHz [common practice].
    lowpass(&mut out, rate_f, 3200.0, 1.8);
    // Fade the very end so a cut-off loop never clicks.
    let fade = (0.05 * rate_f) as usize;
    for k in 0..fade.min(frames) {
        out[frames - 1 - k] *= k as f64 / fade as f64;
    }
    let max = out.iter().fold(1e-12f64, |m, x| m.max(x.abs()));
    out.iter().map(|x| (x / max * peak) as f32).collect()
}

/// Length of the demo DI (s): the riff once plus the last chord's ring.
pub fn demo_seconds() -> f64 {
    RIFF_BEATS * 60.0 / BPM + 0.5
}

fn staging(tag: &str) -> Result<PathBuf, String> {
    let dir = std::env::temp_dir().join(format!("breakdown-{tag}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).map_err(|e| format!("cannot create '{}': {e}", dir.display()))?;
    Ok(dir)
}

/// Remove a staging folder on drop.
struct Cleanup(PathBuf);

impl Drop for Cleanup {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

pub fn run(args: DemoArgs) -> Result<(), String> {
    if args.bench {
        return bench(&args);
    }
    let dir = staging("demo-input")?;
    let _cleanup = Cleanup(dir.clone());
    let di_path = dir.join("demo-di.wav");
    let plan_path = dir.join("demo-plan.toml");
    let di = synthesize(DEMO_RATE, demo_seconds(), DEMO_PEAK_VOLTS, 1);
    audio::write_wav_f32(
        &di_path,
        &Audio {
            rate: DEMO_RATE,
            channels: vec![di],
        },
    )?;
    std::fs::write(&plan_path, DEMO_PLAN)
        .map_err(|e| format!("cannot write '{}': {e}", plan_path.display()))?;
    let output = match &args.output {
        Some(o) => o.clone(),
        None => std::env::current_dir()
            .map_err(|e| format!("cannot find the current folder: {e}"))?
            .join("breakdown-demo"),
    };
    let di_bytes =
        std::fs::read(&di_path).map_err(|e| format!("cannot read '{}': {e}", di_path.display()))?;
    let outcome = compare::run_plan(
        &plan_path,
        Options {
            output: Some(output),
            calibration: None,
            jobs: args.jobs,
            quiet: args.quiet,
            extra_files: vec![
                (PathBuf::from("input/demo-di.wav"), di_bytes),
                (
                    PathBuf::from("input/demo-plan.toml"),
                    DEMO_PLAN.as_bytes().to_vec(),
                ),
            ],
            plan_label: Some("built-in demo plan (copy in input/demo-plan.toml)".into()),
        },
    )?;
    compare::print_summary(&outcome);
    let out = &outcome.output;
    println!();
    println!("Demo files in {}:", out.display());
    println!("  report.html (open in a browser), report.json, report.csv");
    for di in &outcome.report.di {
        println!(
            "  {}  blind A/B clip; key in {}_ab-key.txt",
            di.ab_clip, di.name
        );
        for r in &di.results {
            println!(
                "  {}  (matched to {} LUFS; raw level in {})",
                r.matched_file, outcome.report.target_lufs, r.unmatched_file
            );
        }
    }
    println!("  input/demo-di.wav, input/demo-plan.toml  (the synthesized DI and the plan)");
    Ok(())
}

/// The benchmark plan: six variants at the default quality.
fn bench_plan() -> String {
    let mut plan = String::from(
        "di = [\"bench-di.wav\"]\noutput = \"bench-out\"\ngain = 1.0\nlevel = 0.5\n\n",
    );
    for (name, spec) in [
        ("off", "position = 0"),
        ("symmetric 20 V", "position = 1"),
        ("asymmetric 18 V / 5.6 V", "position = 2"),
        ("symmetric 8.2 V", "positive = 8.2\nnegative = 8.2"),
        ("symmetric 12 V", "positive = 12.0\nnegative = 12.0"),
        ("asymmetric 24 V / 5.1 V", "positive = 24.0\nnegative = 5.1"),
    ] {
        plan.push_str(&format!("[[variant]]\nname = \"{name}\"\n{spec}\n\n"));
    }
    plan
}

/// CPU time of this process, all threads (s), from /proc/self/stat (Linux; 100 clock ticks per second, the
/// kernel's USER_HZ on every common configuration). None elsewhere.
fn process_cpu_seconds() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    // Fields after the command name (which is in parentheses and may hold spaces): utime is the 14th field
    // of the line, stime the 15th.
    let rest = &stat[stat.rfind(')')? + 2..];
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let utime: f64 = fields.get(11)?.parse().ok()?;
    let stime: f64 = fields.get(12)?.parse().ok()?;
    Some((utime + stime) / 100.0)
}

fn bench(args: &DemoArgs) -> Result<(), String> {
    if !(args.bench_seconds.is_finite() && (2.0..=3600.0).contains(&args.bench_seconds)) {
        return Err(format!(
            "--bench-seconds {}: give 2 to 3600 s",
            args.bench_seconds
        ));
    }
    let dir = staging("bench")?;
    let _cleanup = Cleanup(dir.clone());
    let seconds = args.bench_seconds;
    let left = synthesize(DEMO_RATE, seconds, DEMO_PEAK_VOLTS, 11);
    let right = synthesize(DEMO_RATE, seconds, DEMO_PEAK_VOLTS, 12);
    audio::write_wav_f32(
        dir.join("bench-di.wav"),
        &Audio {
            rate: DEMO_RATE,
            channels: vec![left, right],
        },
    )?;
    let plan_path = dir.join("bench-plan.toml");
    std::fs::write(&plan_path, bench_plan()).map_err(|e| format!("cannot write plan: {e}"))?;
    let cpu_start = process_cpu_seconds();
    let outcome = compare::run_plan(
        &plan_path,
        Options {
            output: None,
            calibration: None,
            jobs: args.jobs,
            quiet: args.quiet,
            extra_files: Vec::new(),
            plan_label: None,
        },
    )?;
    let cpu = process_cpu_seconds().map(|end| end - cpu_start.unwrap_or(0.0));
    let variant_seconds = seconds * 2.0 * outcome.report.variants.len() as f64;
    println!(
        "compare benchmark: {seconds:.0} s stereo DI at {DEMO_RATE} Hz x {} variants at {}x oversampling (the default) \
         on {} threads: {:.1} s wall, everything included (render, matching, A/B clip, report); \
         {:.1}x real time per variant-channel overall",
        outcome.report.variants.len(),
        breakdown_dsp::Quality::default().factor(),
        outcome.threads,
        outcome.seconds,
        variant_seconds / outcome.seconds
    );
    if let Some(cpu) = cpu {
        println!(
            "CPU time of the run: {cpu:.1} s over all threads; on {} otherwise idle cores that is about {:.1} s wall \
             ({:.1}x real time per variant-channel per core)",
            outcome.threads,
            cpu / outcome.threads as f64,
            variant_seconds / cpu
        );
    }
    println!("Safety: {}", report::SAFETY);
    Ok(())
}
