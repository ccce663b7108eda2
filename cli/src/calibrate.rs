//! `breakdown calibrate`: what a DI means in volts at the input jack under a calibration, against the levels
//! passive pickups give, so a wrong interface gain or calibration shows before anything is rendered.

use crate::audio::{self, Silence};
use crate::options::{circuit_source, load_circuit, pick, CalibrationArgs};
use breakdown_dsp::units::{gain_to_db, si};
use std::path::PathBuf;

/// Typical peak volts of a passive guitar pickup strummed hard: about 0.1 to 1 V, hot ones up to about 2 V
/// [common practice] (docs/model.md section 7).
pub const TYPICAL_PEAK_VOLTS: (f64, f64) = (0.1, 1.0);
pub const HOT_PEAK_VOLTS: f64 = 2.0;
/// The robust high level: this percentile of the sample magnitudes (one sample in a thousand lies above it,
/// so a single click or spike does not set it).
pub const PERCENTILE: f64 = 99.9;

#[derive(clap::Args)]
pub struct CalibrateArgs {
    /// The DI to read (WAV, as for render).
    #[arg(long, value_name = "DI.wav", required_unless_present = "di")]
    pub input: Option<PathBuf>,
    #[arg(long, hide = true, conflicts_with = "input")]
    pub di: Option<PathBuf>,
    /// Circuit file whose [input] volts_at_full_scale is used when no calibration option is given (default:
    /// the built-in circuit's).
    #[arg(long, value_name = "FILE")]
    pub circuit: Option<PathBuf>,
    #[command(flatten)]
    pub calibration: CalibrationArgs,
}

/// Magnitude below which `percent` of the samples lie (all channels).
pub fn percentile(channels: &[Vec<f32>], percent: f64) -> f64 {
    let mut all: Vec<f32> = channels.iter().flatten().map(|x| x.abs()).collect();
    if all.is_empty() {
        return 0.0;
    }
    let k = (((percent / 100.0) * (all.len() - 1) as f64).round() as usize).min(all.len() - 1);
    let (_, v, _) = all.select_nth_unstable_by(k, f32::total_cmp);
    *v as f64
}

/// The verdict on a peak level at the jack: None inside the usual range, else the hint.
pub fn hint(peak_volts: f64) -> Option<String> {
    let (low, high) = TYPICAL_PEAK_VOLTS;
    if peak_volts < low / 2.0 {
        Some(format!(
            "this is below what passive pickups give ({} .. {} peak strummed hard, common practice): the \
             interface gain was low when recording, or the calibration is too small",
            si(low, "V"),
            si(high, "V")
        ))
    } else if peak_volts > HOT_PEAK_VOLTS * 1.25 {
        Some(format!(
            "this is above what even hot passive pickups give (up to about {} peak, common practice): the \
             calibration is probably too large (or the DI came through a booster or active electronics)",
            si(HOT_PEAK_VOLTS, "V")
        ))
    } else {
        None
    }
}

pub fn run(a: CalibrateArgs) -> Result<(), String> {
    let input = pick(a.input.as_ref(), a.di.as_ref(), "--di", "--input")
        .ok_or("give the DI: --input FILE")?;
    let mut circuit = load_circuit(a.circuit.as_deref())?;
    let calibration = a
        .calibration
        .apply(&mut circuit, &circuit_source(a.circuit.as_ref()))?;
    let volts = calibration.volts_at_full_scale;
    let shown = input.display().to_string();
    let audio = audio::read_input(
        &input,
        &shown,
        Some(volts),
        Silence::Refuse("a silent file says nothing about the level at the jack"),
    )?;
    let peak = audio.peak();
    let high = percentile(&audio.channels, PERCENTILE);
    println!(
        "'{shown}': {} channel(s), {:.2} s at {} Hz.",
        audio.channels.len(),
        audio.seconds(),
        audio.rate
    );
    println!("Calibration: {}.", calibration.describe());
    println!(
        "Peak: {:.1} dBFS = {} at the jack (at {} in channel {}).",
        gain_to_db(peak.value),
        si(peak.value * volts, "V"),
        breakdown_dsp::wav::time_of(peak.frame, audio.rate),
        peak.channel + 1
    );
    println!(
        "{PERCENTILE}th percentile of the sample magnitudes: {:.1} dBFS = {} at the jack (one sample in a \
         thousand lies above it).",
        gain_to_db(high),
        si(high * volts, "V")
    );
    let (low, top) = TYPICAL_PEAK_VOLTS;
    println!(
        "Passive pickups typically give {} .. {} peak at the jack when strummed hard, hot ones up to about {} \
         (common practice).",
        si(low, "V"),
        si(top, "V"),
        si(HOT_PEAK_VOLTS, "V")
    );
    match hint(peak.value * volts) {
        Some(h) => println!("Hint: {h}."),
        None => println!("The peak lies in that range."),
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn percentile_ignores_a_single_spike() {
        let mut v = vec![0.1f32; 10_000];
        v[5] = 0.9;
        assert_eq!(percentile(&[v], 99.9), 0.1f32 as f64);
    }

    #[test]
    fn hints_outside_the_usual_range_only() {
        assert!(hint(0.5).is_none());
        assert!(hint(2.0).is_none());
        assert!(hint(0.01).unwrap().contains("below"));
        assert!(hint(10.0).unwrap().contains("above"));
    }
}
