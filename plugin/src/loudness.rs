//! Short-term loudness (ITU-R BS.1770-4 K-weighting, EBU R128 "short-term": the last 3 s) of one channel, for
//! the level match and the loudness readouts: the `ebur128` crate, the same implementation the command line
//! measures with, fed in small chunks. After `new` nothing here allocates (`EbuR128` in mode S keeps a fixed
//! 3 s buffer; `add_frames_f64`, `loudness_window` and `reset` only write into it; plugin/tests/processor.rs
//! counts allocations while the processor runs). One channel; a stereo pair of the same signal reads 3.01 dB
//! louder.

use ebur128::{EbuR128, Mode};

/// Samples gathered before they are handed to the meter.
const CHUNK: usize = 64;
/// The short-term window (ms).
const WINDOW_MS: usize = 3000;

/// Short-term loudness of one channel, a new reading every 100 ms.
pub struct ShortTerm {
    meter: EbuR128,
    chunk: [f64; CHUNK],
    fill: usize,
    /// Samples in 100 ms, and how far into the current 100 ms the input is.
    block_len: usize,
    block_fill: usize,
    /// Whole 100 ms blocks since the last reset (up to the window's 30).
    blocks: usize,
}

impl ShortTerm {
    /// A meter for `rate` Hz (allocates its 3 s buffer: call off the audio thread).
    pub fn new(rate: f64) -> Result<ShortTerm, String> {
        let rate_hz = rate.round().clamp(8_000.0, 2_822_400.0) as u32;
        let meter = EbuR128::new(1, rate_hz, Mode::S)
            .map_err(|e| format!("loudness meter at {rate_hz} Hz: {e:?}"))?;
        Ok(ShortTerm {
            meter,
            chunk: [0.0; CHUNK],
            fill: 0,
            block_len: ((rate * 0.1).round() as usize).max(1),
            block_fill: 0,
            blocks: 0,
        })
    }

    /// Back to silence (no history).
    pub fn reset(&mut self) {
        self.meter.reset();
        self.fill = 0;
        self.block_fill = 0;
        self.blocks = 0;
    }

    fn flush(&mut self) {
        if self.fill > 0 {
            // Cannot fail for one channel and a whole number of frames.
            let _ = self.meter.add_frames_f64(&self.chunk[..self.fill]);
            self.fill = 0;
        }
    }

    /// Feed one sample; true when a 100 ms block completed (a new reading is available).
    #[inline]
    pub fn push(&mut self, x: f64) -> bool {
        self.chunk[self.fill] = if x.is_finite() { x } else { 0.0 };
        self.fill += 1;
        if self.fill == CHUNK {
            self.flush();
        }
        self.block_fill += 1;
        if self.block_fill < self.block_len {
            return false;
        }
        self.block_fill = 0;
        self.blocks = (self.blocks + 1).min(WINDOW_MS / 100);
        self.flush();
        true
    }

    /// Short-term loudness (LUFS) over the last 3 s, or over what has arrived since the last reset when that is
    /// shorter (so a position just started from rest does not read quiet); -inf for silence.
    pub fn lufs(&self) -> f64 {
        if self.blocks == 0 {
            return f64::NEG_INFINITY;
        }
        let window = if self.blocks * 100 >= WINDOW_MS {
            self.meter.loudness_shortterm()
        } else {
            self.meter.loudness_window((self.blocks * 100) as u32)
        };
        window.unwrap_or(f64::NEG_INFINITY)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    fn sine_loudness(rate: f64, dbfs: f64, seconds: f64) -> f64 {
        let amp = breakdown_dsp::units::db_to_gain(dbfs);
        let mut m = ShortTerm::new(rate).unwrap();
        for n in 0..(rate * seconds) as usize {
            m.push(amp * (2.0 * PI * 1000.0 * n as f64 / rate).sin());
        }
        m.lufs()
    }

    #[test]
    fn tech3341_case1_reads_minus_23_lufs() {
        // EBU Tech 3341, case 1: a stereo 1 kHz sine at -23 dBFS (each channel) reads -23.0 LUFS +/- 0.1.
        // Both channels carry the same signal with weight 1, so stereo = one channel + 10 log10(2).
        for rate in [44_100.0, 48_000.0, 96_000.0] {
            let stereo = sine_loudness(rate, -23.0, 5.0) + 10.0 * 2f64.log10();
            assert!((stereo + 23.0).abs() < 0.1, "{rate}: {stereo}");
            // Before the 3 s window has filled, the reading covers what has arrived: the same level.
            let early = sine_loudness(rate, -23.0, 1.0) + 10.0 * 2f64.log10();
            assert!((early + 23.0).abs() < 0.1, "{rate}, after 1 s: {early}");
        }
    }
}
