//! K-weighted short-term loudness (ITU-R BS.1770-4, EBU R128 "short-term": 3 s window), allocation-free, for the
//! level match and the loudness readouts. One channel; a stereo pair reads 3.01 dB louder than one channel.

use std::f64::consts::PI;

/// Direct-form-I biquad (a0 normalised to 1).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Biquad {
    pub b: [f64; 3],
    pub a: [f64; 2],
    x: [f64; 2],
    y: [f64; 2],
}

impl Biquad {
    pub fn new(b: [f64; 3], a: [f64; 2]) -> Self {
        Biquad {
            b,
            a,
            ..Default::default()
        }
    }
    #[inline]
    pub fn process(&mut self, x: f64) -> f64 {
        let y = self.b[0] * x + self.b[1] * self.x[0] + self.b[2] * self.x[1]
            - self.a[0] * self.y[0]
            - self.a[1] * self.y[1];
        self.x = [x, self.x[0]];
        self.y = [y, self.y[0]];
        y
    }
    pub fn reset(&mut self) {
        self.x = [0.0; 2];
        self.y = [0.0; 2];
    }
}

/// The two K-weighting stages for `rate` Hz: the high-shelf "pre-filter" and the "RLB" high-pass, from the
/// analog prototype that reproduces the 48 kHz coefficient table of ITU-R BS.1770-4 (prototype parameters as
/// commonly derived from that table, e.g. in libebur128).
pub fn k_weighting(rate: f64) -> (Biquad, Biquad) {
    // Stage 1: high shelf.
    let f0 = 1681.974450955533;
    let gain_db = 3.999843853973347;
    let q = 0.7071752369554196;
    let k = (PI * f0 / rate).tan();
    let vh = 10f64.powf(gain_db / 20.0);
    let vb = vh.powf(0.4996667741545416);
    let a0 = 1.0 + k / q + k * k;
    let shelf = Biquad::new(
        [
            (vh + vb * k / q + k * k) / a0,
            2.0 * (k * k - vh) / a0,
            (vh - vb * k / q + k * k) / a0,
        ],
        [2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0],
    );
    // Stage 2: high pass.
    let f0 = 38.13547087602444;
    let q = 0.5003270373238773;
    let k = (PI * f0 / rate).tan();
    let a0 = 1.0 + k / q + k * k;
    let highpass = Biquad::new(
        [1.0, -2.0, 1.0],
        [2.0 * (k * k - 1.0) / a0, (1.0 - k / q + k * k) / a0],
    );
    (shelf, highpass)
}

/// Number of 100 ms sub-blocks in the 3 s short-term window.
const SUB_BLOCKS: usize = 30;

/// Short-term loudness meter: K-weighted mean square over the last 3 s, updated every 100 ms.
#[derive(Clone, Debug)]
pub struct ShortTerm {
    shelf: Biquad,
    highpass: Biquad,
    block_len: usize,
    block_fill: usize,
    block_sum: f64,
    blocks: [f64; SUB_BLOCKS],
    next_block: usize,
    filled_blocks: usize,
    window_sum: f64,
}

impl ShortTerm {
    pub fn new(rate: f64) -> Self {
        let (shelf, highpass) = k_weighting(rate);
        ShortTerm {
            shelf,
            highpass,
            block_len: ((rate * 0.1).round() as usize).max(1),
            block_fill: 0,
            block_sum: 0.0,
            blocks: [0.0; SUB_BLOCKS],
            next_block: 0,
            filled_blocks: 0,
            window_sum: 0.0,
        }
    }

    pub fn reset(&mut self) {
        self.shelf.reset();
        self.highpass.reset();
        self.block_fill = 0;
        self.block_sum = 0.0;
        self.blocks = [0.0; SUB_BLOCKS];
        self.next_block = 0;
        self.filled_blocks = 0;
        self.window_sum = 0.0;
    }

    /// Feed one sample; returns true when a 100 ms sub-block completed (a new reading is available).
    #[inline]
    pub fn push(&mut self, x: f64) -> bool {
        let y = self.highpass.process(self.shelf.process(x));
        self.block_sum += y * y;
        self.block_fill += 1;
        if self.block_fill < self.block_len {
            return false;
        }
        let old = self.blocks[self.next_block];
        self.blocks[self.next_block] = self.block_sum;
        self.next_block = (self.next_block + 1) % SUB_BLOCKS;
        self.filled_blocks = (self.filled_blocks + 1).min(SUB_BLOCKS);
        // Recompute the window sum from the blocks now and then to stop rounding drift.
        if self.next_block == 0 {
            self.window_sum = self.blocks.iter().sum();
        } else {
            self.window_sum += self.block_sum - old;
        }
        self.block_sum = 0.0;
        self.block_fill = 0;
        true
    }

    /// Mean square of the K-weighted signal over the window (over what has arrived, before 3 s have passed).
    pub fn mean_square(&self) -> f64 {
        if self.filled_blocks == 0 {
            return 0.0;
        }
        (self.window_sum / (self.filled_blocks * self.block_len) as f64).max(0.0)
    }

    /// Short-term loudness of this one channel (LUFS): -0.691 + 10 log10(mean square) (BS.1770-4 eq. 2).
    pub fn lufs(&self) -> f64 {
        let ms = self.mean_square();
        if ms <= 0.0 {
            f64::NEG_INFINITY
        } else {
            -0.691 + 10.0 * ms.log10()
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn coefficients_match_the_bs1770_table_at_48k() {
        // ITU-R BS.1770-4, Annex 1, Tables 1 and 2 (48 kHz coefficients).
        let (shelf, hp) = k_weighting(48_000.0);
        let table_b = [1.53512485958697, -2.69169618940638, 1.19839281085285];
        let table_a = [-1.69065929318241, 0.73248077421585];
        for (x, y) in shelf.b.iter().zip(table_b) {
            assert!((x - y).abs() < 1e-8, "{x} vs {y}");
        }
        for (x, y) in shelf.a.iter().zip(table_a) {
            assert!((x - y).abs() < 1e-8, "{x} vs {y}");
        }
        assert_eq!(hp.b, [1.0, -2.0, 1.0]);
        let table_a = [-1.99004745483398, 0.99007225036621];
        for (x, y) in hp.a.iter().zip(table_a) {
            assert!((x - y).abs() < 1e-8, "{x} vs {y}");
        }
    }

    fn sine_loudness(rate: f64, dbfs: f64) -> f64 {
        let amp = 10f64.powf(dbfs / 20.0);
        let mut m = ShortTerm::new(rate);
        for n in 0..(rate as usize * 5) {
            m.push(amp * (2.0 * PI * 1000.0 * n as f64 / rate).sin());
        }
        m.lufs()
    }

    #[test]
    fn tech3341_case1_reads_minus_23_lufs() {
        // EBU Tech 3341, case 1: a stereo 1 kHz sine at -23 dBFS (each channel) reads -23.0 LUFS +/- 0.1.
        // Both channels carry the same signal with weight 1, so stereo = one channel + 10 log10(2).
        for rate in [44_100.0, 48_000.0, 96_000.0] {
            let stereo = sine_loudness(rate, -23.0) + 10.0 * 2f64.log10();
            assert!((stereo + 23.0).abs() < 0.1, "{rate}: {stereo}");
        }
    }
}
