//! `breakdown compare PLAN.toml`: render DI files through several variants of the clamp, in parallel over the
//! cores, into loudness-matched clips, blind A/B clips and a report (HTML with SVG plots, JSON, CSV).
//!
//! Everything is written into a temporary folder beside the output folder and moved into place at the end,
//! so an error (or Ctrl-C) never leaves a half-written output behind. The output folder carries a manifest,
//! `breakdown-output.json`, listing every file Breakdown wrote; an existing folder is replaced only when it is
//! empty or holds exactly what its manifest lists, so a folder with anything of the user's in it is never
//! deleted.

pub mod abclip;
pub mod loudness;
pub mod plan;
pub mod tone;

use crate::audio::{self, Audio, Silence};
use crate::files::{self, Temporary};
use crate::listening::CabinetChoice;
use crate::report::{
    self, AbSegment, DiInfo, DiResult, PartInfo, PartLoad, PreampParts, Report, VariantInfo,
    ZenerLoad,
};
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::engine::MAX_LANES;
use breakdown_dsp::lane::Lane;
use breakdown_dsp::lanes::f64x2;
use breakdown_dsp::oversampling::decimator_memory;
use breakdown_dsp::parts::FAMILY_1N47XXA;
use breakdown_dsp::{Circuit, Engine, Meters, Probe};
use indicatif::{ProgressBar, ProgressDrawTarget, ProgressStyle};
use plan::{DiEntry, Plan, Variant};
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

/// Pair current at which the clamp thresholds are read (A).
pub const THRESHOLD_CURRENT: f64 = 1e-3;
/// Length of the scope window (s).
pub const SCOPE_SECONDS: f64 = 0.02;
/// Shortest DI accepted (s): integrated loudness needs several 400 ms blocks.
const MIN_DI_SECONDS: f64 = 1.0;
/// Progress is reported every this many samples.
const PROGRESS_STEP: usize = 8192;
/// The progress bar appears only once a run has taken this long (short runs finish without one).
pub const PROGRESS_AFTER: Duration = Duration::from_secs(2);
/// The manifest of an output folder: every file Breakdown wrote there.
pub const MANIFEST: &str = "breakdown-output.json";
/// Most DI files and variants in a plan, and the most renders (DI x variant): beyond these a run takes hours
/// and the report is unreadable.
pub const MAX_DI: usize = 32;
pub const MAX_VARIANTS: usize = 24;
pub const MAX_RENDERS: usize = 256;

#[derive(clap::Args)]
pub struct CompareArgs {
    /// Comparison plan (TOML): DI files, circuit, output folder, loudness target, variants (README,
    /// "Comparison plans").
    pub plan: PathBuf,
    /// Write into this folder instead of the plan's `output`. An existing folder is replaced only when it holds
    /// nothing but an earlier Breakdown output (its breakdown-output.json lists every file).
    #[arg(long, value_name = "FOLDER")]
    pub output: Option<PathBuf>,
    #[arg(long, hide = true, conflicts_with = "output")]
    pub out: Option<PathBuf>,
    /// Worker threads (default: every core).
    #[arg(long, value_name = "N", allow_negative_numbers = true)]
    pub jobs: Option<i64>,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
    #[command(flatten)]
    pub calibration: crate::options::CalibrationArgs,
}

/// How to run a plan.
#[derive(Default)]
pub struct Options {
    pub output: Option<PathBuf>,
    /// The command line's input calibration (overrides the plan's and the circuit file's).
    pub calibration: Option<crate::options::Calibration>,
    pub jobs: Option<usize>,
    pub quiet: bool,
    /// Extra files to place in the output (relative path, contents), e.g. the demo's inputs.
    pub extra_files: Vec<(PathBuf, Vec<u8>)>,
    /// How the report names the plan (default: its path).
    pub plan_label: Option<String>,
}

/// What a finished run produced.
pub struct Outcome {
    pub output: PathBuf,
    pub report: Report,
    pub seconds: f64,
    /// Input samples rendered (every channel of every DI through every variant).
    pub rendered_samples: u64,
    pub threads: usize,
}

pub fn run(args: CompareArgs) -> Result<(), String> {
    let jobs = match args.jobs {
        None => None,
        Some(n) if (1..=256).contains(&n) => Some(n as usize),
        Some(n) => {
            return Err(format!(
                "--jobs {n}: give 1 to 256 worker threads (default: every core)"
            ))
        }
    };
    let options = Options {
        output: crate::options::pick(args.output.as_ref(), args.out.as_ref(), "--out", "--output"),
        calibration: args.calibration.given()?,
        jobs,
        quiet: args.quiet,
        extra_files: Vec::new(),
        plan_label: None,
    };
    let outcome = run_plan(&args.plan, options)?;
    print_summary(&outcome);
    Ok(())
}

/// Short table of the results on stdout.
pub fn print_summary(outcome: &Outcome) {
    let r = &outcome.report;
    for di in &r.di {
        println!("{} ({:.1} s):", di.name, di.seconds);
        println!(
            "  {:<28} {:>9} {:>9} {:>9} {:>9} {:>8} {:>9}  limiting",
            "variant", "peak+ V", "peak- V", "p-p V", "clamped%", "THD_F%", "LUFS in"
        );
        for res in &di.results {
            let thd = r
                .variant(&res.variant)
                .map(|v| v.tone.thd_f_percent)
                .unwrap_or(f64::NAN);
            let m = &res.matching;
            let lufs = if m.silent {
                "silent".to_string()
            } else {
                format!("{:.1}", m.loudness_before_lufs)
            };
            println!(
                "  {:<28} {:>9.2} {:>9.2} {:>9.2} {:>9.2} {:>8.2} {:>9}  {}",
                breakdown_dsp::units::clip(&res.variant, 28),
                res.clamp_peak_positive_volts,
                res.clamp_peak_negative_volts,
                res.clamp_peak_to_peak_volts,
                res.share_clamped_percent,
                thd,
                lufs,
                if m.limited {
                    format!("yes, up to {:.1} dB", m.limiter_max_reduction_db)
                } else {
                    "no".into()
                }
            );
        }
    }
    println!(
        "THD_F: {} Hz tone at {} peak at the jack, read at the level pot wiper; {}.",
        r.tone.frequency_hz,
        breakdown_dsp::units::si(r.tone.peak_volts_at_jack, "V"),
        breakdown_dsp::measure::THD_F_DEFINITION
    );
    println!(
        "Rendered {:.1} s of audio per variant-channel in {:.1} s on {} threads.",
        outcome.rendered_samples as f64 / r.di.first().map_or(48_000.0, |d| d.sample_rate as f64),
        outcome.seconds,
        outcome.threads
    );
    println!("Report: {}", outcome.output.join("report.html").display());
    println!("Safety: {}", report::SAFETY);
}

/// Every file under `folder`, as paths relative to it ('/'-separated), sorted; folders are not listed.
fn listing(folder: &Path) -> Result<Vec<String>, String> {
    fn walk(root: &Path, dir: &Path, out: &mut Vec<String>) -> std::io::Result<()> {
        for entry in std::fs::read_dir(dir)? {
            let entry = entry?;
            let path = entry.path();
            if entry.file_type()?.is_dir() {
                walk(root, &path, out)?;
            } else {
                let rel = path.strip_prefix(root).unwrap_or(&path);
                out.push(
                    rel.components()
                        .map(|c| c.as_os_str().to_string_lossy())
                        .collect::<Vec<_>>()
                        .join("/"),
                );
            }
        }
        Ok(())
    }
    let mut out = Vec::new();
    walk(folder, folder, &mut out)
        .map_err(|e| format!("cannot read the folder '{}': {e}", folder.display()))?;
    out.sort();
    Ok(out)
}

#[derive(serde::Serialize, serde::Deserialize)]
struct Manifest {
    written_by: String,
    files: Vec<String>,
}

/// Write the manifest of a finished output folder: every file in it.
fn write_manifest(folder: &Path) -> Result<(), String> {
    let manifest = Manifest {
        written_by: format!("Breakdown {}", env!("CARGO_PKG_VERSION")),
        files: listing(folder)?,
    };
    let text = serde_json::to_string_pretty(&manifest).unwrap_or_default();
    std::fs::write(folder.join(MANIFEST), text).map_err(|e| format!("cannot write {MANIFEST}: {e}"))
}

/// An existing output folder may be replaced only when it is empty or holds exactly the files its manifest
/// lists, and never when an input of the run lies inside it.
pub fn check_output(output: &Path, inputs: &[(String, PathBuf)]) -> Result<(), String> {
    let shown = output.display();
    for (what, path) in inputs {
        if files::inside(path, output) {
            return Err(format!(
                "the output folder '{shown}' holds the {what} '{}': Breakdown replaces its output folder whole, so it may not hold an input; choose another output folder",
                path.display()
            ));
        }
    }
    if !output.exists() {
        return Ok(());
    }
    if !output.is_dir() {
        return Err(format!(
            "output '{shown}' is a file; the output must be a folder"
        ));
    }
    let present = listing(output)?;
    if present.is_empty() {
        return Ok(());
    }
    let refuse = |why: String| {
        Err(format!(
            "output folder '{shown}' exists and {why}; Breakdown replaces only a folder holding nothing but its own earlier output: choose another folder, or empty this one yourself"
        ))
    };
    let Ok(text) = std::fs::read_to_string(output.join(MANIFEST)) else {
        return refuse(format!(
            "has no {MANIFEST} (it holds {} file(s) Breakdown did not list, e.g. '{}')",
            present.len(),
            breakdown_dsp::units::clip(&present[0], 60)
        ));
    };
    let Ok(manifest) = serde_json::from_str::<Manifest>(&text) else {
        return refuse(format!("its {MANIFEST} is not one Breakdown wrote"));
    };
    let foreign: Vec<&String> = present
        .iter()
        .filter(|f| f.as_str() != MANIFEST && !manifest.files.contains(f))
        .collect();
    if let Some(first) = foreign.first() {
        return refuse(format!(
            "holds {} file(s) Breakdown did not write, e.g. '{}'",
            foreign.len(),
            breakdown_dsp::units::clip(first, 60)
        ));
    }
    Ok(())
}

/// Move the finished folder into place (replacing an earlier output, checked by `check_output`).
fn install(temp: &mut Temporary, output: &Path) -> Result<(), String> {
    let shown = output.display();
    if output.exists() {
        let mut old = Temporary::new(files::sibling(output, "old"));
        std::fs::rename(output, &old.path)
            .map_err(|e| format!("cannot replace the earlier output '{shown}': {e}"))?;
        if let Err(e) = std::fs::rename(&temp.path, output) {
            let _ = std::fs::rename(&old.path, output);
            old.keep();
            return Err(format!("cannot move the results into '{shown}': {e}"));
        }
        drop(old);
    } else {
        std::fs::rename(&temp.path, output)
            .map_err(|e| format!("cannot move the results into '{shown}': {e}"))?;
    }
    temp.keep();
    Ok(())
}

/// Loudest `len` frames of any channel: (channel, start frame).
fn loudest_window(audio: &Audio, len: usize) -> (usize, usize) {
    let mut best = (0, 0, -1.0f64);
    let hop = (len / 20).max(1);
    for (c, ch) in audio.channels.iter().enumerate() {
        if ch.len() < len {
            continue;
        }
        let mut prefix = Vec::with_capacity(ch.len() + 1);
        let mut acc = 0.0f64;
        prefix.push(0.0);
        for x in ch {
            acc += (*x as f64) * (*x as f64);
            prefix.push(acc);
        }
        let mut start = 0;
        while start + len <= ch.len() {
            let e = prefix[start + len] - prefix[start];
            if e > best.2 {
                best = (c, start, e);
            }
            start += hop;
        }
    }
    (best.0, best.1)
}

/// One unit of work for the thread pool.
enum Job {
    Tone { variant: usize },
    Render { di: usize, variant: usize },
}

enum JobResult {
    Tone(report::ToneResult),
    Render(Box<DiResult>),
}

/// Everything the workers share.
struct Shared<'a> {
    plan: &'a Plan,
    inputs: &'a [Audio],
    scopes: &'a [(usize, usize, usize)],
    layouts: &'a [abclip::Layout],
    clips: &'a [Mutex<Vec<Vec<f32>>>],
    temp: &'a Path,
    progress: &'a ProgressBar,
    cancel: &'a AtomicBool,
}

/// The meters of every channel as one.
fn combine(meters: &[Meters]) -> Meters {
    let mut m = meters[0];
    for n in &meters[1..] {
        m.merge(n);
    }
    m
}

fn part_specs(variant: &Variant) -> (Option<f64>, Option<f64>) {
    let position = &variant.circuit.clamp.position[variant.settings.position];
    (
        position.positive.map(|z| z.volts),
        position.negative.map(|z| z.volts),
    )
}

/// Render `channels` (DI channels `first..`, one per lane of `engine`) at the plan's listening point, appending
/// each channel's output and meters, and the clamp-node scope passage when its channel is among them.
#[allow(clippy::too_many_arguments)]
fn render_channels<L: Lane>(
    s: &Shared,
    variant: &Variant,
    mut engine: Engine<L>,
    channels: &[&[f32]],
    first: usize,
    (scope_channel, scope_start, scope_len): (usize, usize, usize),
    outputs: &mut Vec<Vec<f32>>,
    meters: &mut Vec<Meters>,
    scope: &mut Vec<f32>,
) -> Result<(), String> {
    let plan = s.plan;
    let frames = channels.iter().map(|c| c.len()).max().unwrap_or(0);
    // Only the listening output is read throughout; the clamp node only for the scope passage, so its
    // decimator runs from `decimator_memory` samples before the passage (its output is then exact) to the
    // passage's end. The other probes' decimators never run.
    let latency = engine.latency();
    let scope_lane = scope_channel
        .checked_sub(first)
        .filter(|&l| l < channels.len());
    let (clamp_on, clamp_off) = if scope_lane.is_some() {
        let start = scope_start + latency;
        (
            (start + 1).saturating_sub(decimator_memory(variant.quality)),
            start + scope_len,
        )
    } else {
        (usize::MAX, usize::MAX)
    };
    let heard = plan.listening.probe();
    let scale = plan.listening.scale(&variant.circuit);
    engine.set_active_probes(&[heard]);
    let _flush = breakdown_dsp::denormals::FlushGuard::new();
    let mut out: Vec<Vec<f32>> = channels
        .iter()
        .map(|_| Vec::with_capacity(frames))
        .collect();
    let mut x = [0.0f32; MAX_LANES];
    for n in 0..frames + latency {
        if n == clamp_on {
            engine.set_active_probes(&[heard, Probe::Clamp]);
        } else if n == clamp_off {
            engine.set_active_probes(&[heard]);
        }
        for (v, c) in x.iter_mut().zip(channels) {
            *v = c.get(n).copied().unwrap_or(0.0);
        }
        let lanes = engine.process_lanes(&x[..L::WIDTH]);
        if n >= latency {
            for (o, frame) in out.iter_mut().zip(lanes) {
                o.push(plan.listening.value(frame, scale) as f32);
            }
            let m = n - latency;
            if let Some(lane) = scope_lane {
                if m >= scope_start && m < scope_start + scope_len {
                    scope.push(lanes[lane].clamp_volts as f32);
                }
            }
        }
        if n % PROGRESS_STEP == PROGRESS_STEP - 1 {
            s.progress.inc((PROGRESS_STEP * channels.len()) as u64);
            if s.cancel.load(Ordering::Relaxed) {
                return Err("cancelled".into());
            }
        }
    }
    s.progress
        .inc((((frames + latency) % PROGRESS_STEP) * channels.len()) as u64);
    for lane in 0..channels.len() {
        meters.push(*engine.lane_meters(lane));
    }
    outputs.extend(out);
    Ok(())
}

fn render_job(s: &Shared, di_index: usize, vi: usize) -> Result<DiResult, String> {
    let plan = s.plan;
    let variant = &plan.variants[vi];
    let input = &s.inputs[di_index];
    let entry = &plan.di[di_index];
    let (scope_channel, scope_start, scope_len) = s.scopes[di_index];
    let mut outputs: Vec<Vec<f32>> = Vec::with_capacity(input.channels.len());
    let mut meters = Vec::new();
    let mut scope = Vec::with_capacity(scope_len);
    let scope_at = (scope_channel, scope_start, scope_len);
    let fail = |e: breakdown_dsp::CircuitError| format!("variant '{}': {e}", variant.name);
    if input.channels.len() == 2 {
        // A stereo DI's two channels run as two lanes of one engine (two amps that share the knobs).
        let engine = Engine::<f64x2>::with_lanes(
            &variant.circuit,
            input.rate as f64,
            variant.quality,
            variant.settings,
        )
        .map_err(fail)?;
        let channels = [&input.channels[0][..], &input.channels[1][..]];
        render_channels(
            s,
            variant,
            engine,
            &channels,
            0,
            scope_at,
            &mut outputs,
            &mut meters,
            &mut scope,
        )?;
    } else {
        for (c, samples) in input.channels.iter().enumerate() {
            let engine = Engine::new(
                &variant.circuit,
                input.rate as f64,
                variant.quality,
                variant.settings,
            )
            .map_err(fail)?;
            render_channels(
                s,
                variant,
                engine,
                &[samples],
                c,
                scope_at,
                &mut outputs,
                &mut meters,
                &mut scope,
            )?;
        }
    }
    let mut average_watts = (0.0f64, 0.0f64);
    for m in &meters {
        let (p, q) = m.average_watts();
        average_watts = (average_watts.0.max(p), average_watts.1.max(q));
    }
    let m = combine(&meters);
    // The chain's cabinet over the whole clip (a stereo response makes a mono DI stereo).
    let outputs = plan
        .listening
        .through_cabinet(outputs, input.rate as f64)
        .map_err(|e| format!("variant '{}': {e}", variant.name))?;

    // Crest factor of the listening output over all channels.
    let (mut peak, mut square, mut count) = (0.0f64, 0.0f64, 0usize);
    for c in &outputs {
        for x in c {
            let x = *x as f64;
            peak = peak.max(x.abs());
            square += x * x;
            count += 1;
        }
    }
    let rms = (square / count.max(1) as f64).sqrt();
    let crest_factor_db = if rms > 0.0 {
        breakdown_dsp::units::gain_to_db(peak / rms)
    } else {
        0.0
    };

    let file = format!("{}_{}.wav", entry.stem, variant.file_stem);
    let unmatched_file = format!("unmatched/{file}");
    let mut audio = Audio {
        rate: input.rate,
        channels: outputs,
    };
    audio::write_wav_f32(s.temp.join(&unmatched_file), &audio)?;
    let matching = loudness::match_loudness(&mut audio.channels, input.rate, plan.target_lufs)
        .map_err(|e| format!("{}: {e}", file))?;
    audio::write_wav_i24(s.temp.join(&file), &audio)?;
    {
        let mut clip = s.clips[di_index]
            .lock()
            .map_err(|_| "A/B clip lock poisoned".to_string())?;
        abclip::add_variant(&mut clip, &s.layouts[di_index], vi, &audio.channels);
    }

    let (pos, neg) = part_specs(variant);
    let rating = FAMILY_1N47XXA.power_rating_watts;
    let load = |volts: Option<f64>, average: f64, peak: f64| {
        volts.map(|_| PartLoad::new(average, peak, rating))
    };
    let zener = if pos.is_none() && neg.is_none() {
        None
    } else {
        Some(ZenerLoad {
            peak_current_ma: m.zener_peak_current * 1e3,
            rms_current_ma: m.zener_rms_current() * 1e3,
            positive: load(pos, average_watts.0, m.positive_part_peak_watts),
            negative: load(neg, average_watts.1, m.negative_part_peak_watts),
        })
    };
    Ok(DiResult {
        variant: variant.name.clone(),
        clamp_peak_positive_volts: m.clamp_peak_positive,
        clamp_peak_negative_volts: m.clamp_peak_negative,
        clamp_peak_to_peak_volts: m.clamp_peak_to_peak(),
        share_clamped_percent: m.share_clamped() * 100.0,
        crest_factor_db,
        matching,
        zener,
        matched_file: file,
        unmatched_file,
        scope,
    })
}

fn run_job(s: &Shared, job: &Job) -> Result<JobResult, String> {
    match *job {
        Job::Tone { variant } => {
            let v = &s.plan.variants[variant];
            let r = tone::run(
                v,
                s.plan.tone_peak_volts,
                s.plan.calibration.volts_at_full_scale,
            )?;
            s.progress
                .inc((tone::TONE_SECONDS * tone::TONE_RATE) as u64);
            Ok(JobResult::Tone(r))
        }
        Job::Render { di, variant } => Ok(JobResult::Render(Box::new(render_job(s, di, variant)?))),
    }
}

fn read_inputs(plan: &Plan) -> Result<Vec<Audio>, String> {
    let shown = plan.path.display();
    plan.di
        .iter()
        .map(|entry: &DiEntry| {
            let at = |e: String| format!("{shown} line {}: {e}", entry.line);
            let audio = audio::read_input(
                &entry.path,
                &entry.name,
                Some(plan.calibration.volts_at_full_scale),
                Silence::Refuse("a silent DI cannot be compared or matched in loudness"),
            )
            .map_err(at)?;
            if !(crate::render::MIN_RATE..=crate::render::MAX_RATE).contains(&audio.rate) {
                return Err(at(format!(
                    "DI '{}' is at {} Hz; Breakdown renders {} to {} Hz",
                    entry.name,
                    audio.rate,
                    crate::render::MIN_RATE,
                    crate::render::MAX_RATE
                )));
            }
            if audio.seconds() < MIN_DI_SECONDS {
                return Err(at(format!(
                    "DI '{}' is {:.2} s long; give at least {MIN_DI_SECONDS} s (integrated loudness needs \
                     several 400 ms blocks)",
                    entry.name,
                    audio.seconds()
                )));
            }
            audio::check_size(&entry.path, audio.frames(), audio.channels.len(), 4).map_err(at)?;
            Ok(audio)
        })
        .collect()
}

fn variant_infos(plan: &Plan) -> Result<Vec<VariantInfo>, String> {
    plan.variants
        .iter()
        .map(|v| {
            // Building the engine here also checks every variant before any rendering starts.
            let engine = Engine::new(&v.circuit, 48_000.0, v.quality, v.settings)
                .map_err(|e| format!("variant '{}': {e}", v.name))?;
            let thresholds = engine
                .model()
                .pair(v.settings.position)
                .filter(|p| !p.is_open())
                .map(|p| p.thresholds_at(THRESHOLD_CURRENT));
            let (pos, neg) = part_specs(v);
            let part = |volts: Option<f64>| {
                volts.map(|volts| PartInfo {
                    volts,
                    part_number: FAMILY_1N47XXA.part_number(volts).map(str::to_string),
                    rating_watts: FAMILY_1N47XXA.power_rating_watts,
                })
            };
            Ok(VariantInfo {
                name: v.name.clone(),
                parts: v.parts_description(),
                gain: v.settings.gain,
                level: v.settings.level,
                quality: v.quality.factor(),
                threshold_positive_volts: thresholds.map(|t| t.0),
                threshold_negative_volts: thresholds.map(|t| t.1),
                positive_part: part(pos),
                negative_part: part(neg),
                tone: report::ToneResult {
                    thd_f_percent: f64::NAN,
                    highest_harmonic: 0,
                    even_share_percent: f64::NAN,
                    fundamental_wiper_volts: f64::NAN,
                    harmonics_db: Vec::new(),
                    clamp_peak_positive_volts: f64::NAN,
                    clamp_peak_negative_volts: f64::NAN,
                },
            })
        })
        .collect()
}

/// The preamp's parts, once per distinct circuit the variants use (the switch positions a variant adds do not
/// make a circuit distinct), at the idle operating point of the first variant using it.
fn preamp_parts(plan: &Plan) -> Result<Vec<PreampParts>, String> {
    let mut groups: Vec<(Circuit, Vec<usize>)> = Vec::new();
    for (i, v) in plan.variants.iter().enumerate() {
        let mut key = v.circuit.clone();
        key.clamp.position.clear();
        match groups.iter_mut().find(|(c, _)| *c == key) {
            Some((_, members)) => members.push(i),
            None => groups.push((key, vec![i])),
        }
    }
    groups
        .into_iter()
        .map(|(_, members)| {
            let first = &plan.variants[members[0]];
            let engine = Engine::new(&first.circuit, 48_000.0, first.quality, first.settings)
                .map_err(|e| format!("variant '{}': {e}", first.name))?;
            let names = members
                .iter()
                .map(|&i| plan.variants[i].name.clone())
                .collect();
            Ok(PreampParts::new(names, &first.circuit, &engine.readout()))
        })
        .collect()
}

/// Channels the chain's cabinet makes of a mono DI: 2 with a stereo impulse response, else 1.
fn plan_output_channels(plan: &Plan) -> usize {
    match plan.listening.heard_cabinet() {
        CabinetChoice::File { ir, .. } => ir.channels.len(),
        _ => 1,
    }
}

/// The inputs a plan names, for the output checks: (what, path).
fn plan_inputs(plan: &Plan) -> Vec<(String, PathBuf)> {
    let mut inputs = vec![("plan".to_string(), plan.path.clone())];
    for d in &plan.di {
        inputs.push(("DI".into(), d.path.clone()));
    }
    if let Some(c) = &plan.circuit_path {
        inputs.push(("circuit file".into(), c.clone()));
    }
    if let CabinetChoice::File { path, .. } = &plan.listening.cabinet {
        inputs.push(("cabinet".into(), path.clone()));
    }
    inputs
}

/// Bounds on what a plan may ask for, stated in the message.
fn check_size_of_run(plan: &Plan) -> Result<(), String> {
    let shown = plan.path.display();
    let (d, v) = (plan.di.len(), plan.variants.len());
    if d > MAX_DI {
        return Err(format!(
            "{shown}: {d} DI files; a plan takes at most {MAX_DI} (split it into several plans)"
        ));
    }
    if v > MAX_VARIANTS {
        return Err(format!(
            "{shown}: {v} variants; a plan takes at most {MAX_VARIANTS} (a report with more is unreadable)"
        ));
    }
    if d * v > MAX_RENDERS {
        return Err(format!(
            "{shown}: {d} DI files x {v} variants = {} renders; a plan takes at most {MAX_RENDERS}",
            d * v
        ));
    }
    Ok(())
}

/// Where the scope plots look (channel, start, length) and the A/B layout, per DI.
fn layouts_of(plan: &Plan, inputs: &[Audio]) -> (Vec<(usize, usize, usize)>, Vec<abclip::Layout>) {
    let scopes = inputs
        .iter()
        .map(|a| {
            let len = ((SCOPE_SECONDS * a.rate as f64).round() as usize).min(a.frames());
            let (c, start) = loudest_window(a, len);
            (c, start, len)
        })
        .collect();
    let layouts = inputs
        .iter()
        .enumerate()
        .map(|(i, a)| {
            abclip::layout(
                a.frames(),
                a.rate,
                plan.segment_seconds,
                plan.variants.len(),
                plan.marker,
                0x5EED_0000 + i as u64,
            )
        })
        .collect();
    (scopes, layouts)
}

/// The work list, longest renders first and the short tones last (so the cores finish together), and the
/// total progress count (host samples).
fn schedule(plan: &Plan, inputs: &[Audio]) -> (Vec<Job>, u64, u64) {
    let mut jobs: Vec<(u64, Job)> = Vec::new();
    for (di, a) in inputs.iter().enumerate() {
        for variant in 0..plan.variants.len() {
            let cost = (a.frames() * a.channels.len()) as u64
                * plan.variants[variant].quality.factor() as u64;
            jobs.push((cost, Job::Render { di, variant }));
        }
    }
    jobs.sort_by_key(|j| std::cmp::Reverse(j.0));
    for variant in 0..plan.variants.len() {
        jobs.push((0, Job::Tone { variant }));
    }
    let rendered: u64 = inputs
        .iter()
        .map(|a| (a.frames() * a.channels.len()) as u64)
        .sum::<u64>()
        * plan.variants.len() as u64;
    let tones = (tone::TONE_SECONDS * tone::TONE_RATE) as u64 * plan.variants.len() as u64;
    (
        jobs.into_iter().map(|j| j.1).collect(),
        rendered + tones,
        rendered,
    )
}

fn progress_bar(total: u64) -> ProgressBar {
    // Hidden at first: `execute` shows it once the run has taken PROGRESS_AFTER.
    let bar = ProgressBar::with_draw_target(Some(total), ProgressDrawTarget::hidden());
    bar.set_style(
        ProgressStyle::with_template(
            "{spinner} rendering [{bar:40}] {percent:>3}%  {elapsed} (eta {eta})",
        )
        .unwrap_or_else(|_| ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    bar
}

/// Run every job over `threads` workers; the first real error stops the rest.
fn execute(
    shared: &Shared,
    jobs: &[Job],
    threads: usize,
    show_progress: bool,
) -> Result<Vec<JobResult>, String> {
    let next = AtomicUsize::new(0);
    let results: Mutex<Vec<Option<Result<JobResult, String>>>> =
        Mutex::new((0..jobs.len()).map(|_| None).collect());
    let started = Instant::now();
    std::thread::scope(|scope| {
        let workers: Vec<_> = (0..threads)
            .map(|_| {
                scope.spawn(|| loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    if i >= jobs.len() || shared.cancel.load(Ordering::Relaxed) {
                        break;
                    }
                    let r = run_job(shared, &jobs[i]);
                    if r.is_err() {
                        shared.cancel.store(true, Ordering::Relaxed);
                    }
                    if let Ok(mut all) = results.lock() {
                        all[i] = Some(r);
                    }
                })
            })
            .collect();
        let mut shown = false;
        while !workers.iter().all(|w| w.is_finished()) {
            if show_progress && !shown && started.elapsed() >= PROGRESS_AFTER {
                shared
                    .progress
                    .set_draw_target(ProgressDrawTarget::stderr());
                shown = true;
            }
            std::thread::sleep(Duration::from_millis(50));
        }
    });
    shared.progress.finish_and_clear();
    let results = results
        .into_inner()
        .map_err(|_| "a render thread failed".to_string())?;
    // Report the first real error (not the "cancelled" of the workers stopped because of it).
    let mut first_error = None;
    for r in results.iter().flatten() {
        if let Err(e) = r {
            if e != "cancelled" || first_error.is_none() {
                first_error = Some(e.clone());
                if e != "cancelled" {
                    break;
                }
            }
        }
    }
    if let Some(e) = first_error {
        return Err(e);
    }
    results
        .into_iter()
        .map(|r| match r {
            Some(Ok(r)) => Ok(r),
            _ => Err("a render job did not finish".to_string()),
        })
        .collect()
}

/// The A/B clip of one DI, its key (text and JSON) and the DI's entry in the report.
fn finish_di(
    plan: &Plan,
    index: usize,
    input: &Audio,
    results: Vec<DiResult>,
    shared: &Shared,
) -> Result<DiInfo, String> {
    let entry = &plan.di[index];
    let layout = &shared.layouts[index];
    let temp = shared.temp;
    let mut clip = shared.clips[index]
        .lock()
        .map(|c| c.clone())
        .map_err(|_| "A/B clip lock poisoned".to_string())?;
    abclip::add_markers(&mut clip, layout, input.rate);
    let clip_name = format!("{}_ab-blind.wav", entry.stem);
    let key: Vec<AbSegment> = layout
        .segments
        .iter()
        .enumerate()
        .map(|(k, s)| AbSegment {
            index: k,
            variant: plan.variants[s.variant].name.clone(),
            start_seconds: s.start as f64 / input.rate as f64,
            end_seconds: s.end as f64 / input.rate as f64,
        })
        .collect();
    audio::write_wav_i24(
        temp.join(&clip_name),
        &Audio {
            rate: input.rate,
            channels: clip,
        },
    )?;
    let mut text = format!(
        "Key for {clip_name} (blind A/B clip of {}): listen first, then check.\n\
         Heard at: {}.\n\
         Segments of {} s; {}.\n\n",
        entry.name,
        plan.listening.describe(&plan.variants[0].circuit),
        plan.segment_seconds,
        match plan.marker {
            plan::Marker::Tick => "a 20 ms crossfade with a short tick between segments",
            plan::Marker::Silence => "a 150 ms gap of silence between segments",
        }
    );
    for s in &key {
        text.push_str(&format!(
            "{:>3}  {:>8.3} s - {:>8.3} s  {}\n",
            s.index + 1,
            s.start_seconds,
            s.end_seconds,
            s.variant
        ));
    }
    let write = |name: String, body: String| {
        std::fs::write(temp.join(&name), body).map_err(|e| format!("cannot write {name}: {e}"))
    };
    write(format!("{}_ab-key.txt", entry.stem), text)?;
    write(
        format!("{}_ab-key.json", entry.stem),
        serde_json::to_string_pretty(&key).unwrap_or_default(),
    )?;
    let (channel, start, len) = shared.scopes[index];
    Ok(DiInfo {
        name: entry.stem.clone(),
        file: entry.name.clone(),
        seconds: input.seconds(),
        sample_rate: input.rate,
        channels: input.channels.len(),
        input_peak_volts: input.peak().value * plan.calibration.volts_at_full_scale,
        scope_start_seconds: start as f64 / input.rate as f64,
        scope_seconds: len as f64 / input.rate as f64,
        scope_channel: channel,
        results,
        ab_clip: clip_name,
        ab_key: key,
    })
}

/// The report's data model from the finished parts.
fn build_report(
    plan: &Plan,
    options: &Options,
    variants: Vec<VariantInfo>,
    preamp_parts: Vec<PreampParts>,
    di: Vec<DiInfo>,
) -> Report {
    Report {
        tool: format!("Breakdown {}", env!("CARGO_PKG_VERSION")),
        plan: options
            .plan_label
            .clone()
            .unwrap_or_else(|| plan.path.display().to_string()),
        circuit: plan.circuit_label.clone(),
        listening: plan.listening.describe(&plan.variants[0].circuit),
        listen: plan.listening.names().0.into(),
        cabinet: plan.listening.names().1,
        target_lufs: plan.target_lufs,
        true_peak_ceiling_dbtp: loudness::TRUE_PEAK_CEILING_DBTP,
        loudness_method: "EBU R128 integrated loudness (ITU-R BS.1770-4 K-weighting and gating), true peak \
                          by 4x oversampling, via the ebur128 crate; mono files are measured as one channel"
            .into(),
        input_volts_at_full_scale: plan.calibration.volts_at_full_scale,
        input_dbu_at_full_scale: plan.calibration.dbu(),
        input_calibration_source: plan.calibration.source.clone(),
        tone: report::ToneSetup {
            frequency_hz: tone::TONE_HZ,
            peak_volts_at_jack: plan.tone_peak_volts,
            sample_rate: tone::TONE_RATE,
            seconds: tone::TONE_SECONDS,
            analysed_seconds: tone::ANALYSED_SECONDS,
            highest_harmonic: *breakdown_dsp::measure::THD_F_HARMONICS.end(),
            method: tone::method(),
        },
        threshold_current_amps: THRESHOLD_CURRENT,
        clamped_current_amps: CLAMPED_CURRENT,
        variants,
        preamp_parts,
        di,
        safety: report::SAFETY.into(),
    }
}

/// Write the report three ways, the caller's extra files and the manifest into the temporary folder.
fn write_report(temp: &Path, report: &Report, options: &Options) -> Result<(), String> {
    let html = report::html::render(report)?;
    for (name, body) in [
        ("report.html", html),
        ("report.json", report.to_json()),
        ("report.csv", report.to_csv()),
    ] {
        std::fs::write(temp.join(name), body).map_err(|e| format!("cannot write {name}: {e}"))?;
    }
    for (rel, bytes) in &options.extra_files {
        let path = temp.join(rel);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)
                .map_err(|e| format!("cannot create '{}': {e}", parent.display()))?;
        }
        std::fs::write(&path, bytes)
            .map_err(|e| format!("cannot write '{}': {e}", path.display()))?;
    }
    write_manifest(temp)
}

/// Run a plan file. All checks happen before the first sample is rendered.
pub fn run_plan(plan_path: &Path, options: Options) -> Result<Outcome, String> {
    let started = Instant::now();
    let mut plan = plan::load(plan_path, options.output.as_deref())?;
    if let Some(c) = &options.calibration {
        plan.set_calibration(c.clone())?;
    }
    check_size_of_run(&plan)?;
    check_output(&plan.output, &plan_inputs(&plan)).map_err(|e| match plan.output_line {
        Some(line) => format!("{} line {line}: {e}", plan.path.display()),
        None => e,
    })?;
    let inputs = read_inputs(&plan)?;
    let mut variants = variant_infos(&plan)?;
    let preamp_parts = preamp_parts(&plan)?;

    files::remove_stale(&plan.output);
    let mut temp = Temporary::new(files::sibling(&plan.output, files::PARTIAL_TAG));
    let _ = std::fs::remove_dir_all(&temp.path);
    std::fs::create_dir_all(temp.path.join("unmatched"))
        .map_err(|e| format!("cannot create '{}': {e}", temp.path.display()))?;

    let (scopes, layouts) = layouts_of(&plan, &inputs);
    let clips: Vec<Mutex<Vec<Vec<f32>>>> = inputs
        .iter()
        .map(|a| {
            let channels = a.channels.len().max(plan_output_channels(&plan));
            Mutex::new(vec![vec![0.0f32; a.frames()]; channels])
        })
        .collect();
    let (jobs, total, rendered_samples) = schedule(&plan, &inputs);
    let progress = progress_bar(total);
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let threads = options.jobs.unwrap_or(cores).min(jobs.len()).max(1);
    let cancel = AtomicBool::new(false);
    let shared = Shared {
        plan: &plan,
        inputs: &inputs,
        scopes: &scopes,
        layouts: &layouts,
        clips: &clips,
        temp: &temp.path,
        progress: &progress,
        cancel: &cancel,
    };
    let show = !options.quiet && std::io::stderr().is_terminal();
    let results = execute(&shared, &jobs, threads, show)?;

    let mut per_di: Vec<Vec<Option<DiResult>>> = inputs
        .iter()
        .map(|_| plan.variants.iter().map(|_| None).collect())
        .collect();
    for (job, r) in jobs.iter().zip(results) {
        match (job, r) {
            (Job::Tone { variant }, JobResult::Tone(t)) => variants[*variant].tone = t,
            (Job::Render { di, variant }, JobResult::Render(d)) => per_di[*di][*variant] = Some(*d),
            _ => return Err("a render job gave the wrong kind of result".into()),
        }
    }
    let mut di_infos = Vec::new();
    for (i, (input, results)) in inputs.iter().zip(per_di).enumerate() {
        let results = results.into_iter().flatten().collect();
        di_infos.push(finish_di(&plan, i, input, results, &shared)?);
    }
    let report = build_report(&plan, &options, variants, preamp_parts, di_infos);
    write_report(&temp.path, &report, &options)?;
    install(&mut temp, &plan.output)?;
    Ok(Outcome {
        output: plan.output.clone(),
        report,
        seconds: started.elapsed().as_secs_f64(),
        rendered_samples,
        threads,
    })
}
