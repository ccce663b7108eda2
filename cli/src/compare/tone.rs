//! The test-tone readout: THD_F of a steady 1 kHz tone at the wiper, counting harmonics 2-10
//! (`breakdown_dsp::measure::thd_f`, the project's one definition).

use super::plan::Variant;
use crate::report::ToneResult;
use breakdown_dsp::measure::{self, Distortion, THD_F_DEFINITION};
use breakdown_dsp::units::gain_to_db;
use breakdown_dsp::{Engine, Probe};

/// Test tone frequency (Hz), sample rate (Hz), length and the analysed tail (s): the start is left out so the
/// coupling and bypass capacitors have settled.
pub const TONE_HZ: f64 = 1000.0;
pub const TONE_RATE: f64 = 48_000.0;
pub const TONE_SECONDS: f64 = 1.0;
pub const ANALYSED_SECONDS: f64 = 0.25;

/// Method text for the report.
pub fn method() -> String {
    format!(
        "{THD_F_DEFINITION}; measured at the level pot wiper on the last {} s of a {} s, {} Hz tone rendered at \
         {} kHz, by single-bin DFTs over a whole number of periods.",
        ANALYSED_SECONDS,
        TONE_SECONDS,
        TONE_HZ,
        TONE_RATE / 1e3
    )
}

/// THD_F readout of a steady tone (harmonics 2-10), plus the level of harmonics 1..=10 relative to the
/// fundamental (dB; -inf for a harmonic above Nyquist or absent).
pub fn readout(signal: &[f64], rate: f64, fundamental: f64) -> (Distortion, Vec<f64>) {
    let d = measure::thd_f(signal, rate, fundamental);
    let amps =
        measure::harmonic_amplitudes(signal, rate, fundamental, *measure::THD_F_HARMONICS.end());
    let first = amps.first().copied().unwrap_or(0.0);
    let db = amps
        .iter()
        .map(|a| {
            if first > 0.0 {
                gain_to_db(a / first)
            } else {
                f64::NEG_INFINITY
            }
        })
        .collect();
    (d, db)
}

/// Render the test tone through one variant and read it out.
pub fn run(
    variant: &Variant,
    tone_peak_volts: f64,
    volts_at_full_scale: f64,
) -> Result<ToneResult, String> {
    let mut engine = Engine::new(
        &variant.circuit,
        TONE_RATE,
        variant.quality,
        variant.settings,
    )
    .map_err(|e| format!("variant '{}': {e}", variant.name))?;
    let amplitude = tone_peak_volts / volts_at_full_scale;
    let total = (TONE_SECONDS * TONE_RATE) as usize;
    let analysed = (ANALYSED_SECONDS * TONE_RATE) as usize;
    engine.set_active_probes(&[Probe::Wiper]);
    let latency = engine.latency();
    let _flush = breakdown_dsp::denormals::FlushGuard::new();
    let mut wiper = Vec::with_capacity(analysed);
    for n in 0..total + latency {
        let x = if n < total {
            (amplitude * (2.0 * std::f64::consts::PI * TONE_HZ * n as f64 / TONE_RATE).sin()) as f32
        } else {
            0.0
        };
        if n == total - analysed {
            engine.reset_meters();
        }
        let frame = engine.process_sample(x);
        let aligned = n as isize - latency as isize;
        if aligned >= (total - analysed) as isize && aligned < total as isize {
            wiper.push(frame.wiper_volts);
        }
    }
    let meters = *engine.meters();
    let (d, harmonics_db) = readout(&wiper, TONE_RATE, TONE_HZ);
    Ok(ToneResult {
        thd_f_percent: d.thd_f * 100.0,
        highest_harmonic: d.harmonics,
        even_share_percent: d.even_share * 100.0,
        fundamental_wiper_volts: d.fundamental_amplitude,
        harmonics_db,
        clamp_peak_positive_volts: meters.clamp_peak_positive,
        clamp_peak_negative_volts: meters.clamp_peak_negative,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    #[test]
    fn readout_counts_harmonics_2_to_10_and_levels_them() {
        // Square wave: odd harmonics 4 / (pi k) (its Fourier series), so harmonic 3 sits at 20 log10(1/3) =
        // -9.54 dB, harmonic 2 is absent, and THD_F over 2-10 is sqrt(1/9 + 1/25 + 1/49 + 1/81) = 42.88 %.
        let rate = 200_000.0;
        let square: Vec<f64> = (0..20_000)
            .map(|n| if n % 200 < 100 { 1.0 } else { -1.0 })
            .collect();
        let (d, db) = readout(&square, rate, TONE_HZ);
        assert_eq!(d.harmonics, 10);
        assert_eq!(db.len(), 10);
        assert!((db[2] + 9.542).abs() < 0.01, "{}", db[2]);
        assert!(db[1] < -100.0, "{}", db[1]);
        assert!(
            (d.thd_f * 100.0 - 42.88).abs() < 0.05,
            "{}",
            d.thd_f * 100.0
        );
    }

    #[test]
    fn pure_sine_reads_no_distortion_at_48_khz() {
        let s: Vec<f64> = (0..48_000)
            .map(|n| (2.0 * PI * TONE_HZ * n as f64 / TONE_RATE).sin())
            .collect();
        let (d, _) = readout(&s, TONE_RATE, TONE_HZ);
        assert_eq!(d.harmonics, 10);
        assert!(d.thd_f < 1e-6);
    }
}
