//! `breakdown render`: a WAV file through the circuit, writing the listening output or a node voltage in volts.
//!
//! Each channel gets its own engine (a stereo DI is two amps), rendered in parallel threads. The output is
//! latency-compensated: output sample n lines up with input sample n.

use crate::analysis::ratings;
use crate::analysis::{RatingArgs, SAFETY};
use crate::audio::{self, Audio, Silence};
use crate::files;
use crate::listening::{CabinetChoice, Listening};
use crate::options::{
    circuit_source, load_circuit, parse_quality, pick, Calibration, CalibrationArgs,
};
use breakdown_dsp::units::{gain_to_db, si};
use breakdown_dsp::{Circuit, Engine, Meters, Probe, Quality, Settings};
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::{Duration, Instant};

/// Lowest and highest host rates the model runs at (Hz).
pub const MIN_RATE: u32 = 22_050;
pub const MAX_RATE: u32 = 384_000;
/// Host samples processed between progress updates.
const CHUNK: usize = 8192;
/// Show a progress bar only once a render has run this long (short files finish without one).
const PROGRESS_AFTER: Duration = Duration::from_millis(700);

#[derive(clap::Args)]
pub struct RenderArgs {
    /// Circuit file (TOML; keys in docs/model.md section 5); the built-in preamp (presets-demo/builtin-preamp.toml) when left out.
    #[arg(long, value_name = "FILE")]
    pub circuit: Option<PathBuf>,
    /// Input WAV (8/16/24/32-bit integer or 32/64-bit float, mono or stereo, 22.05 to 384 kHz, at most 60
    /// minutes).
    #[arg(long, value_name = "IN.wav", required_unless_present = "di")]
    pub input: Option<PathBuf>,
    #[arg(long, hide = true, conflicts_with = "input")]
    pub di: Option<PathBuf>,
    /// Output WAV (32-bit float). A device node such as /dev/null is written in place; the output may not be
    /// the input or the circuit file.
    #[arg(long, value_name = "OUT.wav", required_unless_present = "out")]
    pub output: Option<PathBuf>,
    #[arg(long, hide = true, conflicts_with = "output")]
    pub out: Option<PathBuf>,
    /// A setting as name=value: gain, level, treble, middle, bass (pot rotations 0..1) or position (index into
    /// the circuit's switch list, counted from 0). Repeat for several.
    #[arg(long = "set", value_name = "NAME=VALUE")]
    pub set: Vec<String>,
    /// Write a node's value in volts (1.0 = 1 V; the pair's current in amps) instead of the listening output:
    /// clamp, wiper, tone (with a tone stack), plate1, plate2, ... (one per preamp stage), zener-current,
    /// positive-part, negative-part.
    #[arg(long, value_name = "NODE")]
    pub probe: Option<String>,
    /// Listening point: chain (the tone stack's output, then the cabinet; the default) or wiper (the level
    /// pot's wiper, bare). Both scaled by the circuit's [listen] volts_at_full_scale.
    #[arg(long, value_name = "chain|wiper", conflicts_with = "probe")]
    pub listen: Option<String>,
    /// Speaker cabinet at the end of the chain: builtin (the default), none, or an impulse-response WAV (mono
    /// or stereo, at most 2 s, any rate: resampled to the DI's). A stereo response makes a mono DI stereo.
    #[arg(long, value_name = "FILE|builtin|none", conflicts_with = "probe")]
    pub cabinet: Option<String>,
    /// Oversampling factor: 1, 2, 4, 8 or 16 (default 4: the alias products of a hard-clamped tone stay 60 dB
    /// down, docs/model.md section 6).
    #[arg(long, value_name = "1|2|4|8|16", default_value = "4")]
    pub quality: String,
    #[command(flatten)]
    pub calibration: CalibrationArgs,
    #[command(flatten)]
    pub ratings: RatingArgs,
}

/// Everything `render` needs, checked: the parsed form of the arguments.
pub struct Job {
    pub circuit: Circuit,
    pub settings: Settings,
    pub probe: Probe,
    pub listening: Listening,
    pub quality: Quality,
    pub calibration: Calibration,
    pub input: PathBuf,
    pub output: PathBuf,
}

/// The probe named `text` among the nodes `circuit` has (clamp, wiper, tone, plate1.., the pair's current and
/// part volts); `None` is the listening output.
pub fn parse_probe(text: Option<&str>, circuit: &Circuit) -> Result<Probe, String> {
    let Some(text) = text.map(|t| t.trim().to_ascii_lowercase()) else {
        return Ok(Probe::Listen);
    };
    let known: Vec<Probe> = Probe::available(circuit)
        .into_iter()
        .filter(|p| *p != Probe::Listen)
        .collect();
    match Probe::parse(&text) {
        Some(p) if known.contains(&p) => Ok(p),
        _ => Err(format!(
            "--probe {}: not a node of this circuit (known: {})",
            breakdown_dsp::units::clip(&text, 20),
            known
                .iter()
                .map(|p| p.name())
                .collect::<Vec<_>>()
                .join(", ")
        )),
    }
}

/// Check every argument (circuit, settings, probe, quality, calibration, file names) before any audio is read.
pub fn prepare(args: &RenderArgs) -> Result<Job, String> {
    let quality = parse_quality(&args.quality)?;
    let input = pick(args.input.as_ref(), args.di.as_ref(), "--di", "--input")
        .ok_or("give the input WAV: --input FILE")?;
    let output = pick(args.output.as_ref(), args.out.as_ref(), "--out", "--output")
        .ok_or("give the output WAV: --output FILE")?;
    let mut circuit = load_circuit(args.circuit.as_deref())?;
    let probe = parse_probe(args.probe.as_deref(), &circuit)?;
    let listening = Listening::parse(
        args.listen.as_deref(),
        args.cabinet.as_deref(),
        Path::new(""),
        "--listen",
        "--cabinet",
    )?;
    let calibration = args
        .calibration
        .apply(&mut circuit, &circuit_source(args.circuit.as_ref()))?;
    let mut settings = Settings::default();
    for s in &args.set {
        settings.set(s).map_err(|e| e.0)?;
    }
    circuit
        .check_position(settings.position)
        .map_err(|e| format!("--set position: {}", e.0))?;
    files::check_writable("--output", &output)?;
    let mut inputs: Vec<(&str, &Path)> = vec![("input", input.as_path())];
    if let Some(c) = &args.circuit {
        inputs.push(("circuit", c.as_path()));
    }
    if let CabinetChoice::File { path, .. } = &listening.cabinet {
        inputs.push(("cabinet", path.as_path()));
    }
    files::refuse_overwriting_inputs("--output", &output, &inputs)?;
    Ok(Job {
        circuit,
        settings,
        probe,
        listening,
        quality,
        calibration,
        input,
        output,
    })
}

/// Render every channel through its own engine, in parallel, latency removed. `progress` counts host samples
/// done over all channels.
pub fn render_channels(
    job: &Job,
    audio: &Audio,
    progress: &AtomicU64,
) -> Result<Vec<(Vec<f32>, Meters)>, String> {
    let rate = audio.rate as f64;
    let mut engines = Vec::with_capacity(audio.channels.len());
    for _ in &audio.channels {
        engines.push(Engine::new(&job.circuit, rate, job.quality, job.settings).map_err(|e| e.0)?);
    }
    let outputs = std::thread::scope(|scope| {
        let handles: Vec<_> = engines
            .into_iter()
            .zip(&audio.channels)
            .map(|(mut engine, input)| {
                scope.spawn(move || {
                    let out = render_one(&mut engine, input, job.engine_probe(), progress);
                    (out, *engine.meters())
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| {
                h.join()
                    .map_err(|_| "internal error: a render thread stopped".to_string())
            })
            .collect::<Result<Vec<_>, _>>()
    })?;
    Ok(outputs)
}

impl Job {
    /// What the engines write: the probe asked for, else the listening point's node.
    pub fn engine_probe(&self) -> Probe {
        if self.probe == Probe::Listen {
            self.listening.probe()
        } else {
            self.probe
        }
    }

    /// The engines' output as written: a probe as it is; the listening output scaled and through the cabinet.
    pub fn finish(&self, channels: Vec<Vec<f32>>, rate: u32) -> Result<Vec<Vec<f32>>, String> {
        if self.probe != Probe::Listen {
            return Ok(channels);
        }
        let scale = self.listening.scale(&self.circuit) as f32;
        let scaled = if scale == 1.0 {
            channels
        } else {
            channels
                .into_iter()
                .map(|c| c.into_iter().map(|v| v * scale).collect())
                .collect()
        };
        self.listening.through_cabinet(scaled, rate as f64)
    }
}

/// One channel, latency removed: output[n] lines up with input[n] (as `Engine::render` does, in chunks).
fn render_one(engine: &mut Engine, input: &[f32], probe: Probe, progress: &AtomicU64) -> Vec<f32> {
    let latency = engine.latency();
    let mut padded = Vec::with_capacity(input.len() + latency);
    padded.extend_from_slice(input);
    padded.resize(input.len() + latency, 0.0);
    let mut out = vec![0.0f32; padded.len()];
    for (x, y) in padded.chunks(CHUNK).zip(out.chunks_mut(CHUNK)) {
        engine.process_block(x, y, probe);
        progress.fetch_add(x.len() as u64, Ordering::Relaxed);
    }
    out.drain(..latency);
    out
}

fn progress_bar(total: u64) -> indicatif::ProgressBar {
    let bar = indicatif::ProgressBar::new(total);
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "rendering {wide_bar} {percent:>3}%  {elapsed_precise} (about {eta} left)",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    bar
}

pub fn run(args: RenderArgs) -> Result<(), String> {
    let job = prepare(&args)?;
    let source = args.ratings.source()?;
    let shown = job.input.display().to_string();
    let input = audio::read_input(
        &job.input,
        &shown,
        Some(job.calibration.volts_at_full_scale),
        Silence::Allow,
    )?;
    if !(MIN_RATE..=MAX_RATE).contains(&input.rate) {
        return Err(format!(
            "'{shown}' is at {} Hz; Breakdown renders from {MIN_RATE} to {MAX_RATE} Hz",
            input.rate
        ));
    }
    if input.is_silent() {
        eprintln!("note: '{shown}' is silent: the output is what the stage makes of silence");
    }
    let ir_channels = match job.listening.heard_cabinet() {
        CabinetChoice::File { ir, .. } if job.probe == Probe::Listen => ir.channels.len(),
        _ => 1,
    };
    audio::check_size(
        &job.output,
        input.frames(),
        input.channels.len().max(ir_channels),
        4,
    )?;
    let frames = input.frames();
    let total = (frames * input.channels.len()) as u64;
    let terminal = std::io::stderr().is_terminal();
    let progress = AtomicU64::new(0);
    let mut bar: Option<indicatif::ProgressBar> = None;
    let start = Instant::now();
    let outputs = std::thread::scope(|scope| {
        let worker = scope.spawn(|| render_channels(&job, &input, &progress));
        while !worker.is_finished() {
            let done = progress.load(Ordering::Relaxed);
            // A bar only for renders that take a while and still have a good part to go.
            if bar.is_none() && terminal && start.elapsed() >= PROGRESS_AFTER && done < total / 2 {
                bar = Some(progress_bar(total));
            }
            if let Some(bar) = &bar {
                bar.set_position(done);
            }
            std::thread::sleep(Duration::from_millis(50));
        }
        worker
            .join()
            .map_err(|_| "internal error: the render stopped".to_string())
    })??;
    if let Some(bar) = &bar {
        bar.finish_and_clear();
    }
    let (channels, meters): (Vec<Vec<f32>>, Vec<Meters>) = outputs.into_iter().unzip();
    let result = Audio {
        rate: input.rate,
        channels: job.finish(channels, input.rate)?,
    };
    audio::write_wav_f32(&job.output, &result)?;
    let peak = result
        .channels
        .iter()
        .flatten()
        .fold(0.0f32, |m, v| m.max(v.abs()));
    let what = match job.probe {
        Probe::Clamp => format!("clamp node volts, peak {}", si(peak as f64, "V")),
        Probe::Wiper => format!("wiper volts, peak {}", si(peak as f64, "V")),
        Probe::Listen => format!(
            "listening output ({}), peak {:.1} dBFS",
            job.listening.describe(&job.circuit),
            gain_to_db(peak as f64).max(-200.0)
        ),
        other => format!(
            "{} {}, peak {}",
            other.name(),
            other.unit(),
            si(peak as f64, other.unit())
        ),
    };
    let position = &job.circuit.clamp.position[job.settings.position].name;
    println!(
        "wrote '{}': {} channel(s), {:.2} s at {} Hz, {what}; gain {}, level {}, position {} ({position}), quality {}x",
        job.output.display(),
        result.channels.len(),
        input.seconds(),
        input.rate,
        job.settings.gain,
        job.settings.level,
        job.settings.position,
        job.quality.factor(),
    );
    // The parts' load over this render (every render answers "do these parts survive?").
    let idle = Engine::new(&job.circuit, input.rate as f64, job.quality, job.settings)
        .map_err(|e| e.0)?
        .readout();
    for (channel, m) in meters.iter().enumerate() {
        let r = ratings::ratings_from_meters(
            m,
            &idle,
            &job.circuit,
            job.settings.position,
            source,
            args.ratings.cap_rating_volts,
        );
        if meters.len() > 1 {
            println!("channel {}:", channel + 1);
        }
        print!("{}", ratings::ratings_text(&r));
    }
    println!("Input calibration: {}.", job.calibration.describe());
    println!("{SAFETY}");
    Ok(())
}
