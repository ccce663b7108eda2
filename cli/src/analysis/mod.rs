//! `breakdown onset`, `suggest` and `parts`: the builder's questions answered with the model.
//! Reusable logic lives in the submodules as plain functions; this file only parses arguments and prints.

pub mod common;
pub mod onset;
pub mod partslist;
pub mod ratings;
pub mod suggest;
#[cfg(test)]
mod tests;

use crate::options::{circuit_source, load_circuit, parse_quality, pick, CalibrationArgs};
use common::{parse_settings, Rig};
use std::path::PathBuf;

/// Safety text (docs/model.md section 8), printed with every analysis.
pub const SAFETY: &str = concat!("Safety: ", safety_text!());

/// Why the analyses render at 2x by default (render and compare use 4x): their questions are peaks, onsets and
/// average powers of tones, which 2x reads as well as 4x (the analysis tests check them against direct
/// renders), in half the time, over many renders.
const ANALYSIS_QUALITY_HELP: &str = "Oversampling factor of the renders: 1, 2, 4, 8 or 16 (default 2, not the 4 of \
render and compare: peaks, onsets and average power of tones read the same at 2x, in half the time over many renders)";

/// Bounds on what one analysis may ask for (renders grow with the product).
pub const MAX_STEPS: i64 = 64;
pub const MAX_SECONDS: f64 = 600.0;

#[derive(clap::Args)]
pub struct OnsetArgs {
    /// Circuit file (TOML); the built-in preamp without it.
    #[arg(long, value_name = "FILE")]
    circuit: Option<PathBuf>,
    /// Setting name=value (gain, level, position counted from 0, treble, middle, bass); gain marks the row of
    /// the summary line.
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    #[arg(long, default_value = "2", help = ANALYSIS_QUALITY_HELP)]
    quality: String,
    /// Output folder for onset.csv and onset.svg.
    #[arg(long, value_name = "FOLDER", default_value = "breakdown-onset")]
    output: PathBuf,
    #[arg(long, hide = true)]
    out: Option<PathBuf>,
    /// Gain pot steps from 0.1 to 1 (2 .. 64).
    #[arg(long, default_value_t = 12, allow_negative_numbers = true)]
    gain_steps: i64,
    /// Input volts steps: peak volts of the tone bursts at the jack, log-spaced from 0.02 to 2 V (2 .. 64;
    /// these are volts at the input, not the level pot).
    #[arg(long, default_value_t = 16, allow_negative_numbers = true)]
    input_volts_steps: i64,
    #[arg(long, hide = true, allow_negative_numbers = true)]
    level_steps: Option<i64>,
    /// Tone burst frequency (Hz), 20 .. 5000.
    #[arg(long, default_value_t = 1000.0, allow_negative_numbers = true)]
    tone_hz: f64,
}

#[derive(clap::Args)]
pub struct SuggestArgs {
    /// Circuit file (TOML); the built-in preamp without it.
    #[arg(long, value_name = "FILE")]
    circuit: Option<PathBuf>,
    /// Setting name=value (gain, level, treble, middle, bass); the switch position is replaced by the candidates.
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Goal: clamp-level=+V,-V (the clamp node's peak volts, each sign naming its side; clamp-level=V for both),
    /// share=FRACTION (of time clamped) or before-valve.
    #[arg(long, allow_hyphen_values = true)]
    goal: String,
    /// A recorded DI (WAV) to judge on, in volts at the jack by the input calibration.
    #[arg(long, value_name = "DI.wav", conflicts_with = "input_volts")]
    input: Option<PathBuf>,
    #[arg(long, hide = true, conflicts_with_all = ["input", "input_volts"])]
    di: Option<PathBuf>,
    /// Or a steady tone of this many peak volts at the jack.
    #[arg(long, value_name = "V", allow_negative_numbers = true)]
    input_volts: Option<f64>,
    #[command(flatten)]
    calibration: CalibrationArgs,
    #[command(flatten)]
    ratings: RatingArgs,
    #[arg(long, default_value = "2", help = ANALYSIS_QUALITY_HELP)]
    quality: String,
    /// Tone frequency (Hz) for --input-volts and the onset checks, 20 .. 5000.
    #[arg(long, default_value_t = 1000.0, allow_negative_numbers = true)]
    tone_hz: f64,
    /// Use at most this many seconds of the DI (above 0, up to 600).
    #[arg(long, default_value_t = 20.0, allow_negative_numbers = true)]
    seconds: f64,
}

#[derive(clap::Args)]
pub struct PartsArgs {
    /// Circuit file (TOML); the built-in preamp without it.
    #[arg(long, value_name = "FILE")]
    circuit: Option<PathBuf>,
    /// Setting name=value; position=N (counted from 0) lists only that switch position (all positions with
    /// parts otherwise).
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Worst-case input: peak volts of a steady tone at the jack.
    #[arg(
        long,
        value_name = "V",
        default_value_t = 2.0,
        allow_negative_numbers = true
    )]
    input_volts: f64,
    /// Worst-case gain pot rotation, 0 .. 1.
    #[arg(long, default_value_t = 1.0, allow_negative_numbers = true)]
    worst_gain: f64,
    #[command(flatten)]
    ratings: RatingArgs,
    #[arg(long, default_value = "2", help = ANALYSIS_QUALITY_HELP)]
    quality: String,
    /// Worst-case tone frequency (Hz), 20 .. 5000.
    #[arg(long, default_value_t = 1000.0, allow_negative_numbers = true)]
    tone_hz: f64,
    /// Output folder for parts.txt and parts.csv.
    #[arg(long, value_name = "FOLDER", default_value = "breakdown-parts")]
    output: PathBuf,
    #[arg(long, hide = true)]
    out: Option<PathBuf>,
}

/// The output folder: --output, or the old --out (with a note).
fn output_folder(output: &std::path::Path, out: &Option<PathBuf>) -> PathBuf {
    pick(None, out.as_ref(), "--out", "--output").unwrap_or_else(|| output.to_path_buf())
}

/// Create the output folder; refuse one that is an input file.
fn prepare_folder(folder: &std::path::Path, circuit: Option<&PathBuf>) -> Result<(), String> {
    if let Some(c) = circuit {
        crate::files::refuse_overwriting_inputs("--output", folder, &[("circuit", c.as_path())])?;
    }
    if folder.is_file() {
        return Err(format!(
            "--output '{}' is a file; give a folder",
            folder.display()
        ));
    }
    std::fs::create_dir_all(folder)
        .map_err(|e| format!("cannot create the folder '{}': {e}", folder.display()))
}

fn rig_from(
    circuit: Option<&std::path::Path>,
    sets: &[String],
    quality: &str,
) -> Result<Rig, String> {
    let circuit = load_circuit(circuit)?;
    let settings = parse_settings(sets)?;
    Rig::new(circuit, settings, parse_quality(quality)?)
}

fn write(path: &std::path::Path, text: &str) -> Result<(), String> {
    crate::files::write_text(path, text)
}

pub fn onset(a: OnsetArgs) -> Result<(), String> {
    let rig = rig_from(a.circuit.as_deref(), &a.set, &a.quality)?;
    let volts_steps = pick(
        None,
        a.level_steps.as_ref(),
        "--level-steps",
        "--input-volts-steps",
    )
    .unwrap_or(a.input_volts_steps);
    for (name, v) in [
        ("--gain-steps", a.gain_steps),
        ("--input-volts-steps", volts_steps),
    ] {
        if !(2..=MAX_STEPS).contains(&v) {
            return Err(format!(
                "{name} {v}: give 2 .. {MAX_STEPS} steps (the map renders one burst per gain step and input step)"
            ));
        }
    }
    check_tone(a.tone_hz)?;
    let folder = output_folder(&a.output, &a.out);
    prepare_folder(&folder, a.circuit.as_ref())?;
    let a_out = folder;
    let sweep = onset::Sweep::standard(a.gain_steps as usize, volts_steps as usize, a.tone_hz);
    let map = onset::map(&rig, &sweep)?;
    let title = format!(
        "First element to limit: position {} ({})",
        rig.settings.position,
        rig.position_name()
    );
    write(&a_out.join("onset.csv"), &onset::to_csv(&map))?;
    write(&a_out.join("onset.svg"), &onset::to_svg(&map, &title)?)?;
    let onsets = onset::onsets_at_gain(&rig, a.tone_hz, 100.0)?;
    println!(
        "{} at gain {:.2}, {:.0} Hz tone bursts:",
        title, rig.settings.gain, a.tone_hz
    );
    let c = &map.criteria;
    println!("{}", onset::summary(&rig, c, &onsets));
    let grids: Vec<String> = c
        .names
        .iter()
        .zip(&c.grid_current)
        .filter_map(|(n, g)| g.map(|g| format!("{n} > {:.2} uA", g * 1e6)))
        .collect();
    let cutoffs: Vec<String> = c
        .names
        .iter()
        .zip(&c.cutoff_current)
        .map(|(n, i)| format!("{n} < {:.1} uA", i * 1e6))
        .collect();
    println!(
        "  criteria: pair current > {:.0} uA; grid current: {}; plate current below 2% of idle: {}",
        c.zener_current * 1e6,
        grids.join(", "),
        cutoffs.join(", ")
    );
    for (l, v) in &onsets {
        match v {
            Some(v) if *v <= onset::ONSET_LOW => println!(
                "  {:<38} already at {} peak at the jack (the quietest level tried)",
                c.label(*l),
                onset::volts_text(*v)
            ),
            Some(v) => println!(
                "  {:<38} starts at {} peak at the jack",
                c.label(*l),
                onset::volts_text(*v)
            ),
            None => println!("  {:<38} not reached up to 100 V peak", c.label(*l)),
        }
    }
    println!(
        "wrote {} and {}",
        a_out.join("onset.csv").display(),
        a_out.join("onset.svg").display()
    );
    println!("{SAFETY}");
    Ok(())
}
/// How a command judges the parts' load: shared by `render`, `suggest` and `parts`.
#[derive(clap::Args)]
pub struct RatingArgs {
    /// Part family the ratings are judged against: 1n47xxa (1 W glass) or 1n52xxb (1/2 W glass).
    #[arg(long, default_value = "1n47xxa")]
    pub family: String,
    /// Power rating to judge the parts against instead of the family's (W), above 0 up to 100.
    #[arg(long, value_name = "W", allow_negative_numbers = true)]
    pub rating_watts: Option<f64>,
    /// Coupling capacitor voltage rating (V), above 0 up to 10000.
    #[arg(
        long,
        value_name = "V",
        default_value_t = 400.0,
        allow_negative_numbers = true
    )]
    pub cap_rating_volts: f64,
}

impl RatingArgs {
    /// The rating to judge the Zeners against; checks the capacitor rating as well.
    pub fn source(&self) -> Result<ratings::RatingSource, String> {
        check_volts("--cap-rating-volts", self.cap_rating_volts, 10_000.0)?;
        rating_source(&self.family, self.rating_watts)
    }
}

fn rating_source(family: &str, watts: Option<f64>) -> Result<ratings::RatingSource, String> {
    let f = ratings::family_by_name(family)?;
    match watts {
        None => Ok(ratings::RatingSource::Family(f)),
        Some(w) if w.is_finite() && w > 0.0 && w <= 100.0 => Ok(ratings::RatingSource::Watts(w)),
        Some(w) => Err(format!(
            "--rating-watts {}: a power rating must be above 0 W, up to 100 W (a part's rated dissipation)",
            breakdown_dsp::units::significant(w, 4)
        )),
    }
}

fn check_volts(name: &str, v: f64, high: f64) -> Result<(), String> {
    if !(v.is_finite() && v > 0.0 && v <= high) {
        return Err(format!(
            "{name} {}: give a value above 0, at most {}",
            breakdown_dsp::units::significant(v, 4),
            breakdown_dsp::units::significant(high, 4)
        ));
    }
    Ok(())
}

fn check_tone(hz: f64) -> Result<(), String> {
    if !(hz.is_finite() && (20.0..=5000.0).contains(&hz)) {
        return Err(format!(
            "--tone-hz {}: choose 20 .. 5000 Hz (the guitar's fundamentals and the first harmonics)",
            breakdown_dsp::units::significant(hz, 4)
        ));
    }
    Ok(())
}

/// A DI file as volts at the jack (channels averaged), at most `seconds` long.
pub fn di_stimulus(
    path: &std::path::Path,
    volts_at_full_scale: f64,
    seconds: f64,
) -> Result<common::Stimulus, String> {
    let shown = path.display().to_string();
    let audio = crate::audio::read_input(
        path,
        &shown,
        Some(volts_at_full_scale),
        crate::audio::Silence::Refuse(
            "a silent DI never reaches the Zeners: nothing to suggest parts for",
        ),
    )?;
    let frames = audio.frames();
    if !(crate::render::MIN_RATE..=crate::render::MAX_RATE).contains(&audio.rate) {
        return Err(format!(
            "'{shown}' is at {} Hz; Breakdown renders {} .. {} Hz",
            audio.rate,
            crate::render::MIN_RATE,
            crate::render::MAX_RATE
        ));
    }
    let rate = audio.rate as f64;
    let keep = frames.min((seconds * rate) as usize).max(1);
    let scale = volts_at_full_scale / audio.channels.len() as f64;
    let volts = (0..keep)
        .map(|n| (audio.channels.iter().map(|c| c[n] as f64).sum::<f64>() * scale) as f32)
        .collect();
    Ok(common::Stimulus::recording(volts, rate))
}

pub fn suggest(a: SuggestArgs) -> Result<(), String> {
    let mut rig = rig_from(a.circuit.as_deref(), &a.set, &a.quality)?;
    let calibration = a
        .calibration
        .apply(&mut rig.circuit, &circuit_source(a.circuit.as_ref()))?;
    let goal = suggest::parse_goal(&a.goal)?;
    let family = ratings::family_by_name(&a.ratings.family)?;
    let source = a.ratings.source()?;
    check_tone(a.tone_hz)?;
    let di = pick(a.input.as_ref(), a.di.as_ref(), "--di", "--input");
    let stimulus = match (&di, a.input_volts) {
        (Some(p), _) => {
            check_volts("--seconds", a.seconds, MAX_SECONDS)?;
            di_stimulus(p, calibration.volts_at_full_scale, a.seconds)?
        }
        (None, Some(v)) => {
            check_volts("--input-volts", v, breakdown_dsp::engine::INPUT_LIMIT_VOLTS)?;
            common::Stimulus::sustained(v, a.tone_hz)
        }
        (None, None) => {
            return Err("give --input DI.wav or --input-volts V (peak volts at the jack)".into())
        }
    };
    let s = suggest::suggest(&rig, &stimulus, family, goal, a.tone_hz)?;
    println!(
        "Suggestions from {} at gain {:.2}, level {:.2} ({}):",
        family.name,
        rig.settings.gain,
        rig.settings.level,
        match (&di, a.input_volts) {
            (Some(p), _) => format!(
                "DI '{}', calibration {}",
                p.display(),
                calibration.describe()
            ),
            (_, Some(v)) => format!("{v} V peak {:.0} Hz tone at the jack", a.tone_hz),
            _ => String::new(),
        }
    );
    print!("{}", suggest::suggestion_text(&s));
    if let Some(best) = s.candidates.first() {
        let top = rig.with_pair(Some(best.positive.spec), Some(best.negative.spec));
        let (r, _) = ratings::ratings(&top, &stimulus, source, a.ratings.cap_rating_volts)?;
        println!("\nBest pair {}:", best.name());
        print!("{}", ratings::ratings_text(&r));
        let spread = ratings::tolerance_spread(&top, &stimulus, 0.05)?;
        println!("{}", ratings::spread_text(&spread));
    }
    println!("\nPaste into a compare plan:\n");
    for c in s.candidates.iter().filter(|c| c.meets).take(3) {
        println!("{}", suggest::variant_toml(c));
    }
    if !s.candidates.iter().any(|c| c.meets) {
        if let Some(c) = s.candidates.first() {
            println!("{}", suggest::variant_toml(c));
        }
    }
    println!("{SAFETY}");
    Ok(())
}

pub fn parts(a: PartsArgs) -> Result<(), String> {
    let rig = rig_from(a.circuit.as_deref(), &a.set, &a.quality)?;
    let source = a.ratings.source()?;
    check_volts(
        "--input-volts",
        a.input_volts,
        breakdown_dsp::engine::INPUT_LIMIT_VOLTS,
    )?;
    check_tone(a.tone_hz)?;
    if !(0.0..=1.0).contains(&a.worst_gain) {
        return Err(format!(
            "--worst-gain {}: a pot position runs from 0 to 1",
            a.worst_gain
        ));
    }
    let chosen = a.set.iter().any(|s| s.trim_start().starts_with("position"));
    let positions: Vec<usize> = if chosen {
        vec![rig.settings.position]
    } else {
        (0..rig.circuit.clamp.position.len()).collect()
    };
    let worst = partslist::WorstCase {
        gain: a.worst_gain,
        input_volts: a.input_volts,
        tone_hz: a.tone_hz,
    };
    let (lines, _) =
        partslist::parts_list(&rig, &positions, worst, source, a.ratings.cap_rating_volts)?;
    let text = format!("{}\n{SAFETY}\n", partslist::to_text(&lines, worst));
    let out = output_folder(&a.output, &a.out);
    prepare_folder(&out, a.circuit.as_ref())?;
    write(&out.join("parts.txt"), &text)?;
    write(&out.join("parts.csv"), &partslist::to_csv(&lines))?;
    print!("{text}");
    println!(
        "wrote {} and {}",
        out.join("parts.txt").display(),
        out.join("parts.csv").display()
    );
    Ok(())
}
