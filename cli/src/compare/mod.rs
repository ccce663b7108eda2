//! `breakdown compare PLAN.toml`: render DI files through several variants of the clamp, in parallel over the
//! cores, into loudness-matched clips, blind A/B clips and a report (HTML with SVG plots, JSON, CSV).
//!
//! Everything is written into a temporary folder beside the output folder and moved into place at the end,
//! so an error never leaves a half-written output behind.

pub mod abclip;
pub mod loudness;
pub mod plan;
pub mod tone;

use crate::audio::{self, Audio};
use crate::report::{
    self, AbSegment, DiInfo, DiResult, PartInfo, PartLoad, Report, VariantInfo, ZenerLoad,
};
use breakdown_dsp::engine::CLAMPED_CURRENT;
use breakdown_dsp::oversampling::decimator_memory;
use breakdown_dsp::parts::FAMILY_1N47XXA;
use breakdown_dsp::{Engine, Meters, Probe};
use indicatif::{ProgressBar, ProgressStyle};
use plan::{DiEntry, Plan, Variant};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::Instant;

/// Pair current at which the clamp thresholds are read (A).
pub const THRESHOLD_CURRENT: f64 = 1e-3;
/// Length of the scope window (s).
pub const SCOPE_SECONDS: f64 = 0.02;
/// Shortest DI accepted (s): integrated loudness needs several 400 ms blocks.
const MIN_DI_SECONDS: f64 = 1.0;
/// Progress is reported every this many samples.
const PROGRESS_STEP: usize = 8192;

#[derive(clap::Args)]
pub struct CompareArgs {
    /// Comparison plan (TOML): DI files, circuit, output folder, loudness target, variants.
    pub plan: PathBuf,
    /// Write into this folder instead of the plan's `output`.
    #[arg(long)]
    pub output: Option<PathBuf>,
    /// Worker threads (default: every core).
    #[arg(long)]
    pub jobs: Option<usize>,
    /// No progress bar.
    #[arg(long)]
    pub quiet: bool,
}

/// How to run a plan.
#[derive(Default)]
pub struct Options {
    pub output: Option<PathBuf>,
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
    let options = Options {
        output: args.output,
        jobs: args.jobs,
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
            println!(
                "  {:<28} {:>9.2} {:>9.2} {:>9.2} {:>9.2} {:>8.2} {:>9.1}  {}",
                res.variant,
                res.clamp_peak_positive_volts,
                res.clamp_peak_negative_volts,
                res.clamp_peak_to_peak_volts,
                res.share_clamped_percent,
                thd,
                m.loudness_before_lufs,
                if m.limited {
                    format!("yes, up to {:.1} dB", m.limiter_max_reduction_db)
                } else {
                    "no".into()
                }
            );
        }
    }
    println!(
        "THD_F: 1 kHz tone at {} V peak, harmonics 2-{} up to {} Hz, at the level pot wiper.",
        r.tone.peak_volts_at_jack, r.tone.highest_harmonic, r.tone.band_hz
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

/// A folder removed on drop unless kept.
struct TempFolder {
    path: PathBuf,
    keep: bool,
}

impl Drop for TempFolder {
    fn drop(&mut self) {
        if !self.keep {
            let _ = std::fs::remove_dir_all(&self.path);
        }
    }
}

fn sibling(output: &Path, tag: &str) -> PathBuf {
    let name = output
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "output".into());
    let parent = match output.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    parent.join(format!(".{name}.{tag}-{}", std::process::id()))
}

/// An existing output folder is replaced only if it is empty or holds an earlier report.
fn check_output(output: &Path) -> Result<(), String> {
    if !output.exists() {
        return Ok(());
    }
    let empty = std::fs::read_dir(output)
        .map_err(|e| format!("cannot read output folder '{}': {e}", output.display()))?
        .next()
        .is_none();
    if empty || output.join("report.json").is_file() {
        Ok(())
    } else {
        Err(format!(
            "output folder '{}' exists and does not hold an earlier Breakdown report; choose another folder \
             or empty it",
            output.display()
        ))
    }
}

/// Move the finished folder into place (replacing an earlier report).
fn install(temp: &mut TempFolder, output: &Path) -> Result<(), String> {
    let shown = output.display();
    if output.exists() {
        let old = sibling(output, "old");
        std::fs::rename(output, &old)
            .map_err(|e| format!("cannot replace the earlier output '{shown}': {e}"))?;
        if let Err(e) = std::fs::rename(&temp.path, output) {
            let _ = std::fs::rename(&old, output);
            return Err(format!("cannot move the results into '{shown}': {e}"));
        }
        let _ = std::fs::remove_dir_all(&old);
    } else {
        std::fs::rename(&temp.path, output)
            .map_err(|e| format!("cannot move the results into '{shown}': {e}"))?;
    }
    temp.keep = true;
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

fn combine(meters: &[Meters]) -> Meters {
    let mut m = meters[0];
    for n in &meters[1..] {
        m.samples += n.samples;
        m.clamped_samples += n.clamped_samples;
        m.clamp_peak_positive = m.clamp_peak_positive.max(n.clamp_peak_positive);
        m.clamp_peak_negative = m.clamp_peak_negative.min(n.clamp_peak_negative);
        m.zener_peak_current = m.zener_peak_current.max(n.zener_peak_current);
        m.zener_current_square_sum += n.zener_current_square_sum;
        m.positive_part_peak_watts = m.positive_part_peak_watts.max(n.positive_part_peak_watts);
        m.negative_part_peak_watts = m.negative_part_peak_watts.max(n.negative_part_peak_watts);
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

fn render_job(s: &Shared, di_index: usize, vi: usize) -> Result<DiResult, String> {
    let plan = s.plan;
    let variant = &plan.variants[vi];
    let input = &s.inputs[di_index];
    let entry = &plan.di[di_index];
    let (scope_channel, scope_start, scope_len) = s.scopes[di_index];
    let frames = input.frames();
    let mut outputs: Vec<Vec<f32>> = Vec::with_capacity(input.channels.len());
    let mut meters = Vec::new();
    let mut average_watts = (0.0f64, 0.0f64);
    let mut scope = Vec::with_capacity(scope_len);
    for (c, samples) in input.channels.iter().enumerate() {
        let mut engine = Engine::new(
            &variant.circuit,
            input.rate as f64,
            variant.quality,
            variant.settings,
        )
        .map_err(|e| format!("variant '{}': {e}", variant.name))?;
        // Only the listening output is read throughout; the clamp node only for the scope passage, so its
        // decimator runs from `decimator_memory` samples before the passage (its output is then exact) to the
        // passage's end. The other probes' decimators never run.
        let latency = engine.latency();
        let (clamp_on, clamp_off) = if c == scope_channel {
            let first = scope_start + latency;
            (
                (first + 1).saturating_sub(decimator_memory(variant.quality)),
                first + scope_len,
            )
        } else {
            (usize::MAX, usize::MAX)
        };
        engine.set_active_probes(&[Probe::Listen]);
        let _flush = breakdown_dsp::denormals::FlushGuard::new();
        let mut out = Vec::with_capacity(frames);
        for n in 0..frames + latency {
            if n == clamp_on {
                engine.set_active_probes(&[Probe::Listen, Probe::Clamp]);
            } else if n == clamp_off {
                engine.set_active_probes(&[Probe::Listen]);
            }
            let x = samples.get(n).copied().unwrap_or(0.0);
            let frame = engine.process_sample(x);
            if n >= latency {
                out.push(frame.listen as f32);
                let m = n - latency;
                if c == scope_channel && m >= scope_start && m < scope_start + scope_len {
                    scope.push(frame.clamp_volts as f32);
                }
            }
            if n % PROGRESS_STEP == PROGRESS_STEP - 1 {
                s.progress.inc(PROGRESS_STEP as u64);
                if s.cancel.load(Ordering::Relaxed) {
                    return Err("cancelled".into());
                }
            }
        }
        s.progress.inc(((frames + latency) % PROGRESS_STEP) as u64);
        let m = *engine.meters();
        let (p, q) = m.average_watts();
        average_watts = (average_watts.0.max(p), average_watts.1.max(q));
        meters.push(m);
        outputs.push(out);
    }
    let m = combine(&meters);

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
        20.0 * (peak / rms).log10()
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
        volts.map(|_| PartLoad {
            average_watts: average,
            peak_watts: peak,
            rating_watts: rating,
            average_share_of_rating_percent: average / rating * 100.0,
        })
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
            let r = tone::run(v, s.plan.tone_peak_volts, s.plan.volts_at_full_scale)?;
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
            let audio = audio::read_wav(&entry.path).map_err(|e| format!("{shown} line {}: {e}", entry.line))?;
            if !(22_050..=384_000).contains(&audio.rate) {
                return Err(format!(
                    "{shown} line {}: DI '{}' is at {} Hz; Breakdown renders 22050 to 384000 Hz",
                    entry.line,
                    entry.path.display(),
                    audio.rate
                ));
            }
            if audio.seconds() < MIN_DI_SECONDS {
                return Err(format!(
                    "{shown} line {}: DI '{}' is {:.2} s long; give at least {MIN_DI_SECONDS} s (loudness needs it)",
                    entry.line,
                    entry.path.display(),
                    audio.seconds()
                ));
            }
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
                    band_hz: tone::BAND_HZ,
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

/// Run a plan file. All checks happen before the first sample is rendered.
pub fn run_plan(plan_path: &Path, options: Options) -> Result<Outcome, String> {
    let started = Instant::now();
    let plan = plan::load(plan_path, options.output.as_deref())?;
    let inputs = read_inputs(&plan)?;
    let mut variants = variant_infos(&plan)?;
    check_output(&plan.output).map_err(|e| match plan.output_line {
        Some(line) => format!("{} line {line}: {e}", plan.path.display()),
        None => e,
    })?;
    if options.jobs == Some(0) {
        return Err("--jobs 0: give at least one worker thread".into());
    }

    let temp_path = sibling(&plan.output, "partial");
    let _ = std::fs::remove_dir_all(&temp_path);
    let mut temp = TempFolder {
        path: temp_path.clone(),
        keep: false,
    };
    std::fs::create_dir_all(temp_path.join("unmatched"))
        .map_err(|e| format!("cannot create '{}': {e}", temp_path.display()))?;

    let scopes: Vec<(usize, usize, usize)> = inputs
        .iter()
        .map(|a| {
            let len = ((SCOPE_SECONDS * a.rate as f64).round() as usize).min(a.frames());
            let (c, start) = loudest_window(a, len);
            (c, start, len)
        })
        .collect();
    let layouts: Vec<abclip::Layout> = inputs
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
    let clips: Vec<Mutex<Vec<Vec<f32>>>> = inputs
        .iter()
        .map(|a| Mutex::new(vec![vec![0.0f32; a.frames()]; a.channels.len()]))
        .collect();

    // Work list: the long renders first, then the short tones, so the cores finish together.
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
    let total: u64 = inputs
        .iter()
        .map(|a| (a.frames() * a.channels.len()) as u64)
        .sum::<u64>()
        * plan.variants.len() as u64
        + (tone::TONE_SECONDS * tone::TONE_RATE) as u64 * plan.variants.len() as u64;
    let rendered_samples: u64 = inputs
        .iter()
        .map(|a| (a.frames() * a.channels.len()) as u64)
        .sum::<u64>()
        * plan.variants.len() as u64;

    let progress = if options.quiet {
        ProgressBar::hidden()
    } else {
        let bar = ProgressBar::new(total);
        bar.set_style(
            ProgressStyle::with_template(
                "{spinner} rendering [{bar:40}] {percent:>3}%  {elapsed} (eta {eta})",
            )
            .unwrap_or_else(|_| ProgressStyle::default_bar())
            .progress_chars("=> "),
        );
        bar
    };
    let cores = std::thread::available_parallelism().map_or(1, |n| n.get());
    let threads = options.jobs.unwrap_or(cores).min(jobs.len()).max(1);
    let cancel = AtomicBool::new(false);
    let next = AtomicUsize::new(0);
    let results: Mutex<Vec<Option<Result<JobResult, String>>>> =
        Mutex::new((0..jobs.len()).map(|_| None).collect());
    let shared = Shared {
        plan: &plan,
        inputs: &inputs,
        scopes: &scopes,
        layouts: &layouts,
        clips: &clips,
        temp: &temp_path,
        progress: &progress,
        cancel: &cancel,
    };
    std::thread::scope(|scope| {
        for _ in 0..threads {
            scope.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= jobs.len() || cancel.load(Ordering::Relaxed) {
                    break;
                }
                let r = run_job(&shared, &jobs[i].1);
                if r.is_err() {
                    cancel.store(true, Ordering::Relaxed);
                }
                if let Ok(mut all) = results.lock() {
                    all[i] = Some(r);
                }
            });
        }
    });
    progress.finish_and_clear();

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
    let mut per_di: Vec<Vec<Option<DiResult>>> = inputs
        .iter()
        .map(|_| plan.variants.iter().map(|_| None).collect())
        .collect();
    for ((_, job), r) in jobs.iter().zip(results) {
        match (job, r) {
            (Job::Tone { variant }, Some(Ok(JobResult::Tone(t)))) => variants[*variant].tone = t,
            (Job::Render { di, variant }, Some(Ok(JobResult::Render(d)))) => {
                per_di[*di][*variant] = Some(*d)
            }
            _ => return Err("a render job did not finish".into()),
        }
    }

    // A/B clips and their keys.
    let mut di_infos = Vec::new();
    for (i, ((entry, input), results)) in plan.di.iter().zip(&inputs).zip(per_di).enumerate() {
        let layout = &layouts[i];
        let mut clip = clips[i]
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
            temp_path.join(&clip_name),
            &Audio {
                rate: input.rate,
                channels: clip,
            },
        )?;
        let mut text = format!(
            "Key for {clip_name} (blind A/B clip of {}): listen first, then check.\n\
             Segments of {} s; {}.\n\n",
            entry.name,
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
            std::fs::write(temp_path.join(&name), body)
                .map_err(|e| format!("cannot write {name}: {e}"))
        };
        write(format!("{}_ab-key.txt", entry.stem), text)?;
        write(
            format!("{}_ab-key.json", entry.stem),
            serde_json::to_string_pretty(&key).unwrap_or_default(),
        )?;
        let (channel, start, len) = scopes[i];
        let input_peak = input
            .channels
            .iter()
            .flat_map(|c| c.iter())
            .fold(0.0f64, |m, x| m.max(x.abs() as f64));
        di_infos.push(DiInfo {
            name: entry.stem.clone(),
            file: entry.name.clone(),
            seconds: input.seconds(),
            sample_rate: input.rate,
            channels: input.channels.len(),
            input_peak_volts: input_peak * plan.volts_at_full_scale,
            scope_start_seconds: start as f64 / input.rate as f64,
            scope_seconds: len as f64 / input.rate as f64,
            scope_channel: channel,
            results: results.into_iter().flatten().collect(),
            ab_clip: clip_name,
            ab_key: key,
        });
    }

    let report = Report {
        tool: format!("Breakdown {}", env!("CARGO_PKG_VERSION")),
        plan: options
            .plan_label
            .clone()
            .unwrap_or_else(|| plan.path.display().to_string()),
        circuit: plan.circuit_label.clone(),
        target_lufs: plan.target_lufs,
        true_peak_ceiling_dbtp: loudness::TRUE_PEAK_CEILING_DBTP,
        loudness_method: "EBU R128 integrated loudness (ITU-R BS.1770-4 K-weighting and gating), true peak \
                          by 4x oversampling, via the ebur128 crate; mono files are measured as one channel"
            .into(),
        input_volts_at_full_scale: plan.volts_at_full_scale,
        tone: report::ToneSetup {
            frequency_hz: tone::TONE_HZ,
            peak_volts_at_jack: plan.tone_peak_volts,
            sample_rate: tone::TONE_RATE,
            seconds: tone::TONE_SECONDS,
            analysed_seconds: tone::ANALYSED_SECONDS,
            highest_harmonic: variants.first().map_or(0, |v| v.tone.highest_harmonic),
            band_hz: tone::BAND_HZ,
            method: tone::method(),
        },
        threshold_current_amps: THRESHOLD_CURRENT,
        clamped_current_amps: CLAMPED_CURRENT,
        variants,
        di: di_infos,
        safety: report::SAFETY.into(),
    };
    let html = report::html::render(&report)?;
    for (name, body) in [
        ("report.html", html),
        ("report.json", report.to_json()),
        ("report.csv", report.to_csv()),
    ] {
        std::fs::write(temp_path.join(name), body)
            .map_err(|e| format!("cannot write {name}: {e}"))?;
    }
    for (rel, bytes) in &options.extra_files {
        let path = temp_path.join(rel);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)
                .map_err(|e| format!("cannot create '{}': {e}", parent.display()))?;
        }
        std::fs::write(&path, bytes)
            .map_err(|e| format!("cannot write '{}': {e}", path.display()))?;
    }
    install(&mut temp, &plan.output)?;
    Ok(Outcome {
        output: plan.output.clone(),
        report,
        seconds: started.elapsed().as_secs_f64(),
        rendered_samples,
        threads,
    })
}
