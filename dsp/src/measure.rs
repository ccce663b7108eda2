//! Signal measurements shared by the tests, the renderer's reports and the plugin's readouts.

use std::f64::consts::PI;

/// Amplitude of the component at `freq` (Hz) in `signal` sampled at `rate`, by a single-bin DFT over the
/// whole signal (exact for a whole number of periods; otherwise use [`harmonic_amplitudes`] which windows).
pub fn tone_amplitude(signal: &[f64], rate: f64, freq: f64) -> f64 {
    let w = 2.0 * PI * freq / rate;
    let (mut re, mut im) = (0.0, 0.0);
    for (n, &x) in signal.iter().enumerate() {
        let phase = w * n as f64;
        re += x * phase.cos();
        im -= x * phase.sin();
    }
    2.0 * (re * re + im * im).sqrt() / signal.len() as f64
}

/// Amplitudes of the fundamental (index 0) and harmonics 2..=count of `fundamental` Hz, measured over the
/// largest whole number of periods in `signal`.
pub fn harmonic_amplitudes(signal: &[f64], rate: f64, fundamental: f64, count: usize) -> Vec<f64> {
    let period = rate / fundamental;
    let periods = (signal.len() as f64 / period).floor();
    let len = ((periods * period).round() as usize)
        .min(signal.len())
        .max(1);
    let used = &signal[signal.len() - len..];
    (1..=count)
        .map(|h| {
            let f = fundamental * h as f64;
            if f < rate / 2.0 {
                tone_amplitude(used, rate, f)
            } else {
                0.0
            }
        })
        .collect()
}

/// Harmonic distortion of one tone.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Distortion {
    /// THD_F = sqrt(sum of harmonic amplitudes squared) / fundamental (IEC 61000-2-2 style), as a ratio.
    pub thd_f: f64,
    /// Number of harmonics counted (2..=harmonics).
    pub harmonics: usize,
    /// Upper edge of the band searched (Hz).
    pub band_hz: f64,
    /// Energy share of even harmonics among all harmonics (0..1); 0.5 means equal.
    pub even_share: f64,
    pub fundamental_amplitude: f64,
}

/// THD_F of a steady tone at `fundamental` Hz using harmonics 2..=`harmonics` below `band_hz`.
pub fn distortion(
    signal: &[f64],
    rate: f64,
    fundamental: f64,
    harmonics: usize,
    band_hz: f64,
) -> Distortion {
    let count = harmonics
        .min((band_hz.min(rate / 2.0) / fundamental).floor() as usize)
        .max(1);
    let amps = harmonic_amplitudes(signal, rate, fundamental, count);
    let fundamental_amplitude = amps[0];
    let (mut even, mut odd) = (0.0, 0.0);
    for (k, a) in amps.iter().enumerate().skip(1) {
        if (k + 1) % 2 == 0 {
            even += a * a;
        } else {
            odd += a * a;
        }
    }
    let total = even + odd;
    Distortion {
        thd_f: if fundamental_amplitude > 0.0 {
            total.sqrt() / fundamental_amplitude
        } else {
            0.0
        },
        harmonics: count,
        band_hz: band_hz.min(rate / 2.0),
        even_share: if total > 0.0 { even / total } else { 0.0 },
        fundamental_amplitude,
    }
}

/// The harmonics THD_F counts, everywhere in Breakdown (the command line, the report, the plugin): 2 to 10.
pub const THD_F_HARMONICS: std::ops::RangeInclusive<usize> = 2..=10;

/// The definition in words, for reports and help texts.
pub const THD_F_DEFINITION: &str = "THD_F = sqrt(A2^2 + A3^2 + ... + A10^2) / A1: the harmonics 2 to 10 against \
the fundamental (IEC 61000-2-2 style, the fundamental as reference; harmonics above Nyquist are left out)";

/// THD_F of a steady tone at `fundamental` Hz by [`THD_F_DEFINITION`]: harmonics [`THD_F_HARMONICS`] (those
/// below Nyquist), measured over the largest whole number of periods in `signal`. This is the definition the
/// whole project uses.
pub fn thd_f(signal: &[f64], rate: f64, fundamental: f64) -> Distortion {
    distortion(
        signal,
        rate,
        fundamental,
        *THD_F_HARMONICS.end(),
        rate / 2.0,
    )
}

/// Crest factor: peak over RMS (ratio).
pub fn crest_factor(signal: &[f64]) -> f64 {
    let peak = signal.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    let rms = (signal.iter().map(|x| x * x).sum::<f64>() / signal.len().max(1) as f64).sqrt();
    if rms > 0.0 {
        peak / rms
    } else {
        0.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Square wave: odd harmonics 4 / (pi k) (its Fourier series), so THD_F over harmonics 2-10 is
    /// sqrt(1/9 + 1/25 + 1/49 + 1/81) = 42.88 %.
    #[test]
    fn thd_f_counts_harmonics_2_to_10_of_a_square_wave() {
        let rate = 200_000.0;
        let square: Vec<f64> = (0..20_000)
            .map(|n| if n % 200 < 100 { 1.0 } else { -1.0 })
            .collect();
        let d = thd_f(&square, rate, 1000.0);
        let expected = [3.0f64, 5.0, 7.0, 9.0]
            .iter()
            .map(|k| 1.0 / (k * k))
            .sum::<f64>()
            .sqrt();
        assert_eq!(d.harmonics, 10);
        assert!(
            (d.thd_f - expected).abs() < 5e-4,
            "{} against {expected}",
            d.thd_f
        );
    }

    /// A sine hard-clipped at +/-c = sin(a) of its peak: the Fourier coefficients in closed form,
    /// b_n = (4/pi) [ (sin((n-1)a)/(n-1) - sin((n+1)a)/(n+1)) / 2 + c cos(n a) / n ] for odd n > 1 and
    /// b_1 = (4/pi) [ a/2 - sin(2a)/4 + c cos(a) ]; the readout over harmonics 2-10 must match them.
    #[test]
    fn thd_f_of_a_clipped_sine_matches_its_fourier_series() {
        let c: f64 = 0.5;
        let a = c.asin();
        let b = |n: f64| {
            if n == 1.0 {
                4.0 / PI * (a / 2.0 - (2.0 * a).sin() / 4.0 + c * a.cos())
            } else {
                4.0 / PI
                    * ((((n - 1.0) * a).sin() / (n - 1.0) - ((n + 1.0) * a).sin() / (n + 1.0))
                        / 2.0
                        + c * (n * a).cos() / n)
            }
        };
        let expected = [3.0, 5.0, 7.0, 9.0]
            .iter()
            .map(|&n| b(n).powi(2))
            .sum::<f64>()
            .sqrt()
            / b(1.0);
        let rate = 200_000.0;
        let s: Vec<f64> = (0..20_000)
            .map(|n| (2.0 * PI * 1000.0 * n as f64 / rate).sin().clamp(-c, c))
            .collect();
        let d = thd_f(&s, rate, 1000.0);
        assert!(
            (d.thd_f - expected).abs() < 2e-4,
            "{} against {expected}",
            d.thd_f
        );
        // Only harmonics 2-10 are counted at 48 kHz too (the 10th, 10 kHz, is below Nyquist).
        assert_eq!(thd_f(&s[..4800], 48_000.0, 1000.0).harmonics, 10);
    }

    #[test]
    fn hard_clipped_sine_thd_matches_computed_value() {
        // BRIEF section 6: a sine hard-clipped at +/-0.5 of its peak has THD_F 23.29% (computed).
        let rate = 96_000.0;
        let f = 1000.0;
        let s: Vec<f64> = (0..96_000)
            .map(|n| (2.0 * PI * f * n as f64 / rate).sin().clamp(-0.5, 0.5))
            .collect();
        let d = distortion(&s, rate, f, 47, 48_000.0);
        assert!((d.thd_f - 0.2329).abs() < 0.002, "{}", d.thd_f);
        assert!(d.even_share < 1e-6);
    }
}
