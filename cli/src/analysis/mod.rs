//! `breakdown onset`, `suggest` and `parts`: the builder's questions answered with the model.
//! Reusable logic lives in the submodules as plain functions; this file only parses arguments and prints.

#[allow(dead_code)] // parts used by suggest and parts (next commits)
pub mod common;
#[allow(dead_code)]
pub mod onset;

use common::{load_circuit, parse_quality, parse_settings, Rig};
use std::path::PathBuf;

/// Safety text (BRIEF section 8), printed with every analysis.
pub const SAFETY: &str = "Safety: valve amplifiers run at several hundred volts and their filter capacitors \
stay charged after power-off; the numbers this tool prints are a simulation, not a measurement of a live \
chassis. Work on a live amp only with the training to do so; drain and verify capacitors; follow local \
electrical codes; when in doubt, have a qualified technician do the work. Check part voltage and power ratings \
against the values the tool reports with margin.";

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
pub struct SuggestArgs {}
#[derive(clap::Args)]
pub struct PartsArgs {}

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
    std::fs::write(path, text).map_err(|e| format!("cannot write {}: {e}", path.display()))
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
pub fn suggest(_a: SuggestArgs) -> Result<(), String> {
    Err("'suggest' is not written yet".into())
}
pub fn parts(_a: PartsArgs) -> Result<(), String> {
    Err("'parts' is not written yet".into())
}
