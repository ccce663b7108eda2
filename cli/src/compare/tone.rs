//! The test-tone readout: THD_F of a steady 1 kHz tone at the wiper, with the harmonic count and band stated.

use super::plan::Variant;
use crate::report::ToneResult;
use breakdown_dsp::measure::{self, Distortion};
use breakdown_dsp::{Engine, Probe};

/// Test tone frequency (Hz), sample rate (Hz), length and the analysed tail (s): the start is left out so the
/// coupling and bypass capacitors have settled.
pub const TONE_HZ: f64 = 1000.0;
pub const TONE_RATE: f64 = 48_000.0;
pub const TONE_SECONDS: f64 = 1.0;
pub const ANALYSED_SECONDS: f64 = 0.25;
/// Harmonics are counted up to this frequency (Hz): the audio band.
pub const BAND_HZ: f64 = 20_000.0;

/// Method text for the report.
pub fn method() -> String {
    format!(
        "THD_F = sqrt(sum of harmonic amplitudes squared) / fundamental amplitude (IEC 61000-2-2 style), \
         harmonics 2 to {} (every harmonic up to {} Hz), measured at the level pot wiper on the last {} s of a \
         {} s, {} Hz tone rendered at {} kHz, by single-bin DFTs over a whole number of periods.",
        (BAND_HZ / TONE_HZ).floor(),
        BAND_HZ,
        ANALYSED_SECONDS,
        TONE_SECONDS,
        TONE_HZ,
        TONE_RATE / 1e3
    )
}

/// THD_F readout of a steady tone: every harmonic of `fundamental` below `band_hz` (and below Nyquist), plus
/// the level of harmonics 1..=N relative to the fundamental (dB).
pub fn readout(
    signal: &[f64],
    rate: f64,
    fundamental: f64,
    band_hz: f64,
) -> (Distortion, Vec<f64>) {
    let d = measure::distortion(signal, rate, fundamental, usize::MAX, band_hz);
    let amps = measure::harmonic_amplitudes(signal, rate, fundamental, d.harmonics);
    let first = amps.first().copied().unwrap_or(0.0);
    let db = amps
        .iter()
        .map(|a| {
            if first > 0.0 && *a > 0.0 {
                20.0 * (a / first).log10()
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
    let (d, harmonics_db) = readout(&wiper, TONE_RATE, TONE_HZ, BAND_HZ);
    Ok(ToneResult {
        thd_f_percent: d.thd_f * 100.0,
        highest_harmonic: d.harmonics,
        band_hz: d.band_hz,
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

    // Sampled at 200 kHz with 200 samples per period, so every aliased component falls on a harmonic bin and
    // counting all harmonics below Nyquist gives the full series.
    const RATE: f64 = 200_000.0;

    fn wave(shape: impl Fn(f64) -> f64) -> Vec<f64> {
        (0..20_000)
            .map(|n| shape(2.0 * PI * TONE_HZ * n as f64 / RATE))
            .collect()
    }

    #[test]
    fn hard_clipped_sine_reads_23_29_percent() {
        // BRIEF section 6 (computed from the Fourier series): a sine hard-clipped at +/-0.5 of its peak has
        // THD_F = 23.29 %; a symmetric clip has no even harmonics.
        let (d, db) = readout(
            &wave(|p| p.sin().clamp(-0.5, 0.5)),
            RATE,
            TONE_HZ,
            RATE / 2.0,
        );
        assert!(
            (d.thd_f * 100.0 - 23.29).abs() < 0.05,
            "{}",
            d.thd_f * 100.0
        );
        assert!(d.even_share < 1e-6);
        assert_eq!(d.harmonics, 100);
        assert_eq!(db[0], 0.0);
    }

    #[test]
    fn square_wave_reads_48_34_percent() {
        // Square wave: harmonics 4/(pi k) for odd k, THD_F = sqrt(pi^2/8 - 1) = 48.34 % (BRIEF section 6).
        // Built from the sample index (100 samples high, 100 low) so no sample lands on a rounding-noise zero.
        let square: Vec<f64> = (0..20_000)
            .map(|n| if n % 200 < 100 { 1.0 } else { -1.0 })
            .collect();
        let (d, _) = readout(&square, RATE, TONE_HZ, RATE / 2.0);
        assert!(
            (d.thd_f * 100.0 - 48.34).abs() < 0.05,
            "{}",
            d.thd_f * 100.0
        );
    }

    #[test]
    fn band_limit_counts_only_harmonics_in_band() {
        // At 48 kHz with a 20 kHz band, harmonics 2..=20 of 1 kHz are counted (20 kHz / 1 kHz).
        let s: Vec<f64> = (0..48_000)
            .map(|n| (2.0 * PI * TONE_HZ * n as f64 / TONE_RATE).sin())
            .collect();
        let (d, _) = readout(&s, TONE_RATE, TONE_HZ, BAND_HZ);
        assert_eq!(d.harmonics, 20);
        assert!(d.thd_f < 1e-6);
    }
}
