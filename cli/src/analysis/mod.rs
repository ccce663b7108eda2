//! `breakdown onset`, `suggest` and `parts`: the builder's questions answered with the model.
//! Reusable logic lives in the submodules as plain functions; this file only parses arguments and prints.

pub mod common;
pub mod onset;
pub mod partslist;
pub mod ratings;
pub mod suggest;
#[cfg(test)]
mod tests;

use common::{load_circuit, parse_quality, parse_settings, Rig};
use std::path::PathBuf;

/// Safety text (docs/model.md section 8), printed with every analysis.
pub const SAFETY: &str = concat!("Safety: ", safety_text!());

#[derive(clap::Args)]
pub struct OnsetArgs {
    /// Circuit file (TOML); the built-in reference circuit without it.
    #[arg(long)]
    circuit: Option<PathBuf>,
    /// Setting name=value (gain, level, position); gain marks the row of the summary line.
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Oversampling factor of the renders (1, 2, 4, 8, 16).
    #[arg(long, default_value = "2")]
    quality: String,
    /// Output folder for onset.csv and onset.svg.
    #[arg(long, default_value = "breakdown-onset")]
    out: PathBuf,
    /// Gain steps from 0.1 to 1.
    #[arg(long, default_value_t = 12)]
    gain_steps: usize,
    /// Input level steps from 0.02 to 2 V peak (log-spaced).
    #[arg(long, default_value_t = 16)]
    level_steps: usize,
    /// Tone burst frequency (Hz).
    #[arg(long, default_value_t = 1000.0)]
    tone_hz: f64,
}

#[derive(clap::Args)]
pub struct SuggestArgs {
    /// Circuit file (TOML); the built-in reference circuit without it.
    #[arg(long)]
    circuit: Option<PathBuf>,
    /// Setting name=value (gain, level); the position is replaced by the candidates.
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Goal: clamp=+V,-V (peak clamp-node volts), share=FRACTION (time clamped) or before-valve.
    #[arg(long)]
    goal: String,
    /// A recorded DI (WAV) to judge on, scaled by the circuit's [drive] volts_at_full_scale.
    #[arg(long, conflicts_with = "input_volts")]
    di: Option<PathBuf>,
    /// Or a steady tone of this many peak volts at the jack.
    #[arg(long)]
    input_volts: Option<f64>,
    #[command(flatten)]
    ratings: RatingArgs,
    /// Oversampling factor of the renders (1, 2, 4, 8, 16).
    #[arg(long, default_value = "2")]
    quality: String,
    /// Tone frequency (Hz) for --input-volts and the onset checks.
    #[arg(long, default_value_t = 1000.0)]
    tone_hz: f64,
    /// Use at most this many seconds of the DI.
    #[arg(long, default_value_t = 20.0)]
    seconds: f64,
}

#[derive(clap::Args)]
pub struct PartsArgs {
    /// Circuit file (TOML); the built-in reference circuit without it.
    #[arg(long)]
    circuit: Option<PathBuf>,
    /// Setting name=value; position=N lists only that switch position (all positions with parts otherwise).
    #[arg(long = "set", value_name = "NAME=VALUE")]
    set: Vec<String>,
    /// Worst-case input: peak volts of a steady tone at the jack.
    #[arg(long, default_value_t = 2.0)]
    input_volts: f64,
    /// Worst-case gain pot rotation.
    #[arg(long, default_value_t = 1.0)]
    worst_gain: f64,
    #[command(flatten)]
    ratings: RatingArgs,
    /// Oversampling factor of the renders (1, 2, 4, 8, 16).
    #[arg(long, default_value = "2")]
    quality: String,
    /// Worst-case tone frequency (Hz).
    #[arg(long, default_value_t = 1000.0)]
    tone_hz: f64,
    /// Output folder for parts.txt and parts.csv.
    #[arg(long, default_value = "breakdown-parts")]
    out: PathBuf,
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
    if !(2..=64).contains(&a.gain_steps) || !(2..=64).contains(&a.level_steps) {
        return Err("--gain-steps and --level-steps must each be 2 .. 64".into());
    }
    if !(a.tone_hz.is_finite() && (20.0..=5000.0).contains(&a.tone_hz)) {
        return Err(format!("--tone-hz {}: choose 20 .. 5000 Hz", a.tone_hz));
    }
    std::fs::create_dir_all(&a.out)
        .map_err(|e| format!("cannot create {}: {e}", a.out.display()))?;
    let sweep = onset::Sweep::standard(a.gain_steps, a.level_steps, a.tone_hz);
    let map = onset::map(&rig, &sweep)?;
    let title = format!(
        "First element to limit: position {} ({})",
        rig.settings.position,
        rig.position_name()
    );
    write(&a.out.join("onset.csv"), &onset::to_csv(&map))?;
    write(&a.out.join("onset.svg"), &onset::to_svg(&map, &title)?)?;
    let onsets = onset::onsets_at_gain(&rig, a.tone_hz, 100.0)?;
    println!(
        "{} at gain {:.2}, {:.0} Hz tone bursts:",
        title, rig.settings.gain, a.tone_hz
    );
    println!("{}", onset::summary(&rig, &onsets));
    let c = &map.criteria;
    println!(
        "  criteria: pair current > {:.0} uA; gain grid current > {:.2} uA; plate current below 2% of idle \
         (gain valve < {:.1} uA, follower < {:.1} uA)",
        c.zener_current * 1e6,
        c.gain_grid_current * 1e6,
        c.gain_cutoff_current * 1e6,
        c.follower_cutoff_current * 1e6
    );
    for (l, v) in &onsets {
        match v {
            Some(v) => println!("  {:<26} starts at {:.3} V peak at the jack", l.label(), v),
            None => println!("  {:<26} not reached up to 100 V peak", l.label()),
        }
    }
    println!(
        "wrote {} and {}",
        a.out.join("onset.csv").display(),
        a.out.join("onset.svg").display()
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
    /// Power rating to judge the parts against instead of the family's (W).
    #[arg(long)]
    pub rating_watts: Option<f64>,
    /// Coupling capacitor voltage rating (V).
    #[arg(long, default_value_t = 400.0)]
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
            "--rating-watts {w}: give a power rating above 0 W (up to 100 W)"
        )),
    }
}

fn check_volts(name: &str, v: f64, high: f64) -> Result<(), String> {
    if !(v.is_finite() && v > 0.0 && v <= high) {
        return Err(format!(
            "{name} {v}: give a value above 0 and at most {high}"
        ));
    }
    Ok(())
}

fn check_tone(hz: f64) -> Result<(), String> {
    if !(hz.is_finite() && (20.0..=5000.0).contains(&hz)) {
        return Err(format!("--tone-hz {hz}: choose 20 .. 5000 Hz"));
    }
    Ok(())
}

/// A DI file as volts at the jack (channels averaged), at most `seconds` long.
pub fn di_stimulus(
    path: &std::path::Path,
    volts_at_full_scale: f64,
    seconds: f64,
) -> Result<common::Stimulus, String> {
    let audio = crate::audio::read_wav(path)?;
    let frames = audio.frames();
    if frames == 0 || audio.channels.is_empty() {
        return Err(format!("{}: the file holds no audio", path.display()));
    }
    let rate = audio.rate as f64;
    if !(22_050.0..=384_000.0).contains(&rate) {
        return Err(format!(
            "{}: sample rate {rate} Hz is outside 22050 .. 384000 Hz",
            path.display()
        ));
    }
    let keep = frames.min((seconds * rate) as usize).max(1);
    let scale = volts_at_full_scale / audio.channels.len() as f64;
    let volts = (0..keep)
        .map(|n| (audio.channels.iter().map(|c| c[n] as f64).sum::<f64>() * scale) as f32)
        .collect();
    Ok(common::Stimulus::recording(volts, rate))
}

pub fn suggest(a: SuggestArgs) -> Result<(), String> {
    let rig = rig_from(a.circuit.as_deref(), &a.set, &a.quality)?;
    let goal = suggest::parse_goal(&a.goal)?;
    let family = ratings::family_by_name(&a.ratings.family)?;
    let source = a.ratings.source()?;
    check_tone(a.tone_hz)?;
    let stimulus = match (&a.di, a.input_volts) {
        (Some(p), _) => {
            check_volts("--seconds", a.seconds, 3600.0)?;
            di_stimulus(p, rig.circuit.input.volts_at_full_scale, a.seconds)?
        }
        (None, Some(v)) => {
            check_volts("--input-volts", v, breakdown_dsp::engine::INPUT_LIMIT_VOLTS)?;
            common::Stimulus::sustained(v, a.tone_hz)
        }
        (None, None) => {
            return Err("give --di FILE or --input-volts V (peak volts at the jack)".into())
        }
    };
    let s = suggest::suggest(&rig, &stimulus, family, goal, a.tone_hz)?;
    println!(
        "Suggestions from {} at gain {:.2}, level {:.2} ({}):",
        family.name,
        rig.settings.gain,
        rig.settings.level,
        match (&a.di, a.input_volts) {
            (Some(p), _) => format!("DI {}", p.display()),
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
    std::fs::create_dir_all(&a.out)
        .map_err(|e| format!("cannot create {}: {e}", a.out.display()))?;
    write(&a.out.join("parts.txt"), &text)?;
    write(&a.out.join("parts.csv"), &partslist::to_csv(&lines))?;
    print!("{text}");
    println!(
        "wrote {} and {}",
        a.out.join("parts.txt").display(),
        a.out.join("parts.csv").display()
    );
    Ok(())
}
