//! Editor-side analysis (GUI thread, may allocate): a triggered scope window, a windowed spectrum for the
//! display and the strongest tone's frequency, and THD_F with the even/odd balance of the harmonics from
//! `breakdown_dsp::measure::distortion` (the project's one definition).

use breakdown_dsp::measure::distortion;
use breakdown_dsp::units::gain_to_db;
use realfft::{RealFftPlanner, RealToComplex};
use std::sync::Arc;

/// Index in `signal` where a triggered window of `window` samples starts: the latest rising crossing of the
/// mid level (with hysteresis) that still leaves a whole window after it; None if there is none.
pub fn trigger(signal: &[f32], window: usize) -> Option<usize> {
    if signal.len() < window + 2 {
        return None;
    }
    let (lo, hi) = signal
        .iter()
        .fold((f32::INFINITY, f32::NEG_INFINITY), |(a, b), &x| {
            (a.min(x), b.max(x))
        });
    if (hi - lo).is_nan() || hi - lo <= 1e-6 {
        return None;
    }
    let mid = 0.5 * (lo + hi);
    let hysteresis = 0.1 * (hi - lo);
    let last = signal.len() - window;
    // Walk backwards from the latest start allowed; a crossing counts once the signal was below mid - hysteresis.
    let mut k = last;
    while k > 0 {
        if signal[k - 1] < mid && signal[k] >= mid {
            let back = k.saturating_sub(window);
            if signal[back..k].iter().any(|&x| x < mid - hysteresis) {
                return Some(k);
            }
        }
        k -= 1;
    }
    None
}

/// A spectrum of the listening point and the harmonic analysis of its strongest tone.
#[derive(Clone, Debug, Default)]
pub struct Spectrum {
    /// Magnitude per bin (dB relative to a full-scale sine).
    pub magnitude_db: Vec<f32>,
    pub bin_hz: f64,
    /// Strongest tone between 40 Hz and 5 kHz (Hz), if any.
    pub fundamental_hz: Option<f64>,
    /// Amplitude of the fundamental (full-scale units).
    pub fundamental_amplitude: f64,
    /// THD_F = sqrt(sum of the squared amplitudes of harmonics 2..=harmonic_count) / fundamental
    /// (`breakdown_dsp::measure::distortion`).
    pub thd_f: f64,
    /// Share of harmonic energy in the even harmonics (0..1).
    pub even_share: f64,
    /// Highest harmonic counted and the band edge used (Hz).
    pub harmonic_count: usize,
    pub band_hz: f64,
}

/// Windowed FFT analyser of a fixed size.
pub struct Analyser {
    size: usize,
    fft: Arc<dyn RealToComplex<f64>>,
    window: Vec<f64>,
    input: Vec<f64>,
    output: Vec<realfft::num_complex::Complex<f64>>,
    scratch: Vec<realfft::num_complex::Complex<f64>>,
    signal: Vec<f64>,
}

impl Analyser {
    pub fn new(size: usize) -> Self {
        let mut planner = RealFftPlanner::<f64>::new();
        let fft = planner.plan_fft_forward(size);
        let window = (0..size)
            .map(|n| 0.5 - 0.5 * (2.0 * std::f64::consts::PI * n as f64 / size as f64).cos())
            .collect();
        Analyser {
            input: fft.make_input_vec(),
            output: fft.make_output_vec(),
            scratch: fft.make_scratch_vec(),
            signal: Vec::with_capacity(size),
            fft,
            window,
            size,
        }
    }

    pub fn size(&self) -> usize {
        self.size
    }

    /// Analyse the newest `size` samples of `signal` at `rate`, counting harmonics 2..=`max_harmonic` below
    /// `band_hz`.
    pub fn analyse(
        &mut self,
        signal: &[f32],
        rate: f64,
        max_harmonic: usize,
        band_hz: f64,
    ) -> Spectrum {
        let n = self.size;
        let start = signal.len().saturating_sub(n);
        let used = &signal[start..];
        let mean = used.iter().map(|&x| x as f64).sum::<f64>() / used.len().max(1) as f64;
        for (k, x) in self.input.iter_mut().enumerate() {
            *x = used.get(k).map(|&v| v as f64 - mean).unwrap_or(0.0) * self.window[k];
        }
        let mut spectrum = Spectrum {
            bin_hz: rate / n as f64,
            ..Default::default()
        };
        if self
            .fft
            .process_with_scratch(&mut self.input, &mut self.output, &mut self.scratch)
            .is_err()
        {
            return spectrum;
        }
        // Hann window coherent gain is 0.5: a full-scale sine peaks at |X| = n / 4.
        let scale = 4.0 / n as f64;
        let power: Vec<f64> = self.output.iter().map(|c| c.norm_sqr()).collect();
        spectrum.magnitude_db = power
            .iter()
            .map(|p| gain_to_db((p.sqrt() * scale).max(1e-12)) as f32)
            .collect();
        let bin_of = |hz: f64| hz / spectrum.bin_hz;
        let lo = bin_of(40.0).ceil() as usize;
        let hi = (bin_of(5000.0).floor() as usize).min(power.len().saturating_sub(2));
        if lo + 2 >= hi {
            return spectrum;
        }
        let peak = (lo..=hi)
            .max_by(|&a, &b| power[a].total_cmp(&power[b]))
            .unwrap_or(lo);
        if power[peak] <= 0.0 {
            return spectrum;
        }
        // Parabolic interpolation on log magnitude around the peak.
        let (a, b, c) = (
            power[peak - 1].max(1e-300).ln(),
            power[peak].max(1e-300).ln(),
            power[peak + 1].max(1e-300).ln(),
        );
        let denom = a - 2.0 * b + c;
        let offset = if denom.abs() > 1e-12 {
            (0.5 * (a - c) / denom).clamp(-0.5, 0.5)
        } else {
            0.0
        };
        let f0 = (peak as f64 + offset) * spectrum.bin_hz;
        spectrum.fundamental_hz = Some(f0);
        // THD_F and the even/odd balance: the dsp crate's definition (docs/model.md section 6), over the same
        // samples the spectrum shows.
        self.signal.clear();
        self.signal.extend(used.iter().map(|&v| v as f64 - mean));
        let d = distortion(&self.signal, rate, f0, max_harmonic, band_hz);
        spectrum.thd_f = d.thd_f;
        spectrum.even_share = d.even_share;
        spectrum.harmonic_count = d.harmonics;
        spectrum.band_hz = d.band_hz;
        spectrum.fundamental_amplitude = d.fundamental_amplitude;
        spectrum
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    #[test]
    fn hard_clipped_sine_reads_the_computed_thd() {
        // docs/model.md section 6: a sine hard-clipped at +/-0.5 of its peak has THD_F 23.29% (computed, all harmonics;
        // 40 harmonics carry all but a negligible part of it).
        let rate = 96_000.0;
        let f = 1000.0;
        let s: Vec<f32> = (0..16_384)
            .map(|n| (2.0 * PI * f * n as f64 / rate).sin().clamp(-0.5, 0.5) as f32)
            .collect();
        let mut a = Analyser::new(16_384);
        let sp = a.analyse(&s, rate, 40, 48_000.0);
        assert!((sp.fundamental_hz.unwrap() - f).abs() < 2.0);
        assert!((sp.thd_f - 0.2329).abs() < 0.004, "{}", sp.thd_f);
        assert!(sp.even_share < 1e-3, "{}", sp.even_share);
    }

    #[test]
    fn pure_sine_amplitude_and_no_distortion() {
        // A sine of amplitude 0.5 reads 0.5 (-6.02 dBFS) and THD_F near 0 (general reference math).
        let rate = 48_000.0;
        let s: Vec<f32> = (0..8192)
            .map(|n| (0.5 * (2.0 * PI * 440.0 * n as f64 / rate).sin()) as f32)
            .collect();
        let mut a = Analyser::new(8192);
        let sp = a.analyse(&s, rate, 10, 20_000.0);
        assert!(
            (sp.fundamental_amplitude - 0.5).abs() < 0.01,
            "{}",
            sp.fundamental_amplitude
        );
        assert!(sp.thd_f < 1e-3);
    }

    #[test]
    fn half_wave_asymmetry_shows_even_harmonics() {
        // A half-wave rectified sine has only even harmonics besides the fundamental (Fourier series).
        let rate = 48_000.0;
        let s: Vec<f32> = (0..8192)
            .map(|n| (2.0 * PI * 500.0 * n as f64 / rate).sin().max(0.0) as f32)
            .collect();
        let mut a = Analyser::new(8192);
        let sp = a.analyse(&s, rate, 10, 20_000.0);
        assert!(sp.even_share > 0.99, "{}", sp.even_share);
    }

    #[test]
    fn scope_trigger_finds_a_rising_crossing() {
        let s: Vec<f32> = (0..2000).map(|n| (n as f32 * 0.05).sin()).collect();
        let k = trigger(&s, 500).unwrap();
        assert!(k <= 1500);
        assert!(s[k - 1] < 0.0 && s[k] >= 0.0);
    }
}
