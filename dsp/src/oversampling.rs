//! Oversampling: linear-phase polyphase FIR interpolator and decimator (Kaiser-windowed sinc, J. F. Kaiser,
//! "Nonrecursive digital filter design using the I0-sinh window function", ISCAS 1974). Each filter is
//! 2 L factor + 1 taps long, so each adds exactly L base-rate samples of delay.

use serde::{Deserialize, Serialize};

/// Oversampling factor: the quality setting.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize, Default)]
pub enum Quality {
    #[serde(rename = "1")]
    X1,
    #[serde(rename = "2")]
    X2,
    #[default]
    #[serde(rename = "4")]
    X4,
    #[serde(rename = "8")]
    X8,
    #[serde(rename = "16")]
    X16,
}

impl Quality {
    pub const ALL: [Quality; 5] = [
        Quality::X1,
        Quality::X2,
        Quality::X4,
        Quality::X8,
        Quality::X16,
    ];

    pub fn factor(self) -> usize {
        match self {
            Quality::X1 => 1,
            Quality::X2 => 2,
            Quality::X4 => 4,
            Quality::X8 => 8,
            Quality::X16 => 16,
        }
    }

    /// Quality for an oversampling factor of 1, 2, 4, 8 or 16.
    pub fn from_factor(factor: usize) -> Option<Quality> {
        Quality::ALL.into_iter().find(|q| q.factor() == factor)
    }
}

/// Base-rate samples of delay per filter (L): the filter spans 2 L base periods.
const HALF_SPAN_BASE_SAMPLES: usize = 24;
/// Kaiser window shape: about 100 dB stopband.
const KAISER_BETA: f64 = 10.0;
/// Passband edge as a fraction of the base Nyquist frequency (about 20 kHz at 44.1 kHz).
const PASSBAND_FRACTION: f64 = 0.90;

fn bessel_i0(x: f64) -> f64 {
    let mut sum = 1.0;
    let mut term = 1.0;
    let half = x / 2.0;
    for k in 1..64 {
        term *= (half / k as f64) * (half / k as f64);
        sum += term;
        if term < 1e-17 * sum {
            break;
        }
    }
    sum
}

/// Lowpass prototype at the high rate: cutoff between the passband edge and base Nyquist, unity DC gain per
/// phase times `factor` (so interpolation keeps the level).
fn design(factor: usize) -> Vec<f64> {
    let len = 2 * HALF_SPAN_BASE_SAMPLES * factor + 1;
    let centre = (len - 1) as f64 / 2.0;
    // Cutoff (cycles per high-rate sample) halfway between the passband edge and the base-rate Nyquist limit.
    let cutoff = 0.5 * (1.0 + PASSBAND_FRACTION) / 2.0 / factor as f64;
    let norm = bessel_i0(KAISER_BETA);
    let mut taps: Vec<f64> = (0..len)
        .map(|n| {
            let m = n as f64 - centre;
            let sinc = if m == 0.0 {
                2.0 * cutoff
            } else {
                (2.0 * std::f64::consts::PI * cutoff * m).sin() / (std::f64::consts::PI * m)
            };
            let r = m / centre;
            let window = bessel_i0(KAISER_BETA * (1.0 - r * r).max(0.0).sqrt()) / norm;
            sinc * window
        })
        .collect();
    let sum: f64 = taps.iter().sum();
    for t in &mut taps {
        *t /= sum;
    }
    taps
}

/// Interpolator from the base rate to `factor` times the base rate.
#[derive(Clone, Debug)]
pub struct Upsampler {
    factor: usize,
    /// phases[p][k] = factor * h[k factor + p].
    phases: Vec<Vec<f64>>,
    history: Vec<f64>,
    pos: usize,
}

impl Upsampler {
    pub fn new(quality: Quality) -> Self {
        let factor = quality.factor();
        let taps = design(factor);
        let per_phase = taps.len().div_ceil(factor);
        let phases = (0..factor)
            .map(|p| {
                (0..per_phase)
                    .map(|k| taps.get(k * factor + p).copied().unwrap_or(0.0) * factor as f64)
                    .collect()
            })
            .collect();
        Upsampler {
            factor,
            phases,
            history: vec![0.0; 2 * per_phase],
            pos: 0,
        }
    }

    /// Fill the history as if `value` had always been the input.
    pub fn reset(&mut self, value: f64) {
        self.history.iter_mut().for_each(|h| *h = value);
    }

    /// Push one base-rate sample and write `factor` high-rate samples to `out`.
    #[inline]
    pub fn process(&mut self, input: f64, out: &mut [f64]) {
        if self.factor == 1 {
            out[0] = input;
            return;
        }
        let n = self.history.len() / 2;
        self.pos = if self.pos == 0 { n - 1 } else { self.pos - 1 };
        self.history[self.pos] = input;
        self.history[self.pos + n] = input;
        let window = &self.history[self.pos..self.pos + n];
        for (o, phase) in out.iter_mut().zip(&self.phases) {
            *o = dot(phase, window);
        }
    }
}

/// Decimator from `factor` times the base rate back to the base rate.
#[derive(Clone, Debug)]
pub struct Downsampler {
    factor: usize,
    taps: Vec<f64>,
    history: Vec<f64>,
    pos: usize,
}

impl Downsampler {
    pub fn new(quality: Quality) -> Self {
        let factor = quality.factor();
        let taps = if factor == 1 {
            vec![1.0]
        } else {
            design(factor)
        };
        let span = taps.len() + factor - 1;
        Downsampler {
            factor,
            taps,
            history: vec![0.0; 2 * span],
            pos: 0,
        }
    }

    /// Fill the history as if `value` had always been the input.
    pub fn reset(&mut self, value: f64) {
        self.history.iter_mut().for_each(|h| *h = value);
    }

    /// Push `factor` high-rate samples and return one base-rate sample.
    #[inline]
    pub fn process(&mut self, input: &[f64]) -> f64 {
        if self.factor == 1 {
            return input[0];
        }
        // The output is taken at the first high-rate sample of this base period, so it lines up exactly with a
        // base-rate input sample: skip the factor - 1 newer samples.
        let span = self.history.len() / 2;
        for &x in input {
            self.pos = if self.pos == 0 {
                span - 1
            } else {
                self.pos - 1
            };
            self.history[self.pos] = x;
            self.history[self.pos + span] = x;
        }
        let start = self.pos + self.factor - 1;
        let window = &self.history[start..start + self.taps.len()];
        dot(&self.taps, window)
    }
}

/// Dot product with four partial sums (lets the compiler use SIMD lanes).
#[inline]
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let (mut s0, mut s1, mut s2, mut s3) = (0.0f64, 0.0f64, 0.0f64, 0.0f64);
    let (a4, a_rest) = a.split_at(a.len() / 4 * 4);
    let (b4, b_rest) = b.split_at(a4.len().min(b.len()));
    for (x, y) in a4.chunks_exact(4).zip(b4.chunks_exact(4)) {
        s0 += x[0] * y[0];
        s1 += x[1] * y[1];
        s2 += x[2] * y[2];
        s3 += x[3] * y[3];
    }
    let tail: f64 = a_rest.iter().zip(b_rest).map(|(x, y)| x * y).sum();
    (s0 + s1) + (s2 + s3) + tail
}

/// Base-rate latency of an up/down pair at `quality` (exact, in samples).
pub fn latency(quality: Quality) -> usize {
    if quality.factor() == 1 {
        0
    } else {
        2 * HALF_SPAN_BASE_SAMPLES
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn round_trip_delays_by_the_reported_latency() {
        for q in Quality::ALL {
            let f = q.factor();
            let mut up = Upsampler::new(q);
            let mut down = Downsampler::new(q);
            let mut high = vec![0.0; f];
            let input: Vec<f64> = (0..400).map(|n| (n as f64 * 0.05).sin()).collect();
            let out: Vec<f64> = input
                .iter()
                .map(|&x| {
                    up.process(x, &mut high);
                    down.process(&high)
                })
                .collect();
            let lat = latency(q);
            for n in 100..400 {
                assert!((out[n] - input[n - lat]).abs() < 1e-3, "{q:?} n={n}");
            }
        }
    }
}
