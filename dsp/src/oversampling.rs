//! Oversampling: a cascade of linear-phase half-band FIR interpolators and decimators, 2x per stage.
//!
//! A half-band low-pass (cut-off at a quarter of its own sample rate) has every even-offset tap zero except
//! the centre tap, which is exactly 1/2 (P. P. Vaidyanathan, "Multirate Systems and Filter Banks",
//! Prentice Hall 1993, half-band filters; the zero phase response obeys A(f) + A(fs/2 - f) = 1). In polyphase
//! form one branch of each stage is then a pure delay and the other a symmetric FIR, so a 2x stage of 4K - 1
//! taps costs K multiplies per low-rate sample (pairs of taps share one coefficient by symmetry). Factors
//! above 2 chain stages (multistage sample-rate conversion, R. E. Crochiere and L. R. Rabiner, "Multirate
//! Digital Signal Processing", Prentice Hall 1983): only the stage next to the base rate needs a steep
//! transition; each later stage may let through everything that a lower-rate stage removes afterwards, so its
//! transition band is wide and it is short.
//!
//! Each stage is an ideal half-band sinc under a Kaiser window (J. F. Kaiser, "Nonrecursive digital filter
//! design using the I0-sinh window function", ISCAS 1974) that spans 4K + 1 samples, whose end samples fall on
//! the half-band zeros. The designs in `STAGES` meet, for the whole chain at every factor (the unit tests
//! measure it): passband within 0.1 dB up to 0.45 of the base rate (0.9 of the base Nyquist frequency, 19.8 kHz
//! at 44.1 kHz) and images / aliases at least 100 dB down from 0.57 of the base rate upwards (so an alias that
//! is not 100 dB down lands above 0.43 of the base rate, 19.0 kHz at 44.1 kHz and 20.6 kHz at 48 kHz).
//!
//! Cost at 4x per base sample: 24 + 2 x 8 multiplies to interpolate, 24 + 2 x 8 (+ 3 centre taps) to decimate.
//!
//! Latency: each stage's filter delays by 2K - 1 samples at its high rate. A decimation stage may take its
//! output at the second sample of each input pair instead of the first (one sample less delay at that rate);
//! choosing this per stage makes the round trip an exact whole number of base samples with no added delay
//! line: 47 base samples at 2x, 54 at 4x, 56 at 8x and 57 at 16x (see `latency`).

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

    /// Number of 2x stages.
    fn stages(self) -> usize {
        self.factor().trailing_zeros() as usize
    }
}

/// One half-band stage: 4 `k` - 1 taps (2 `k` non-zero off the centre) under a Kaiser window of shape `beta`.
#[derive(Clone, Copy, Debug)]
struct StageDesign {
    k: usize,
    beta: f64,
}

/// K of each stage, from the stage next to the base rate (base to 2x base) upwards.
const K1: usize = 24;
const K2: usize = 8;
const K3: usize = 5;
const K4: usize = 4;

/// Stage designs, from the stage next to the base rate upwards. Each is the shortest K (with its window shape)
/// that meets the chain targets in the module comment. The stop band a stage must cover is everything that
/// folds below 0.57 fs after its own decimation (what lands higher, a lower-rate stage removes): for stage s,
/// running at 2^s fs, from 2^(s-1) fs - 0.57 fs up. Stage 1: transition 0.45 .. 0.57 fs, 95 taps. Stage 2:
/// stop band from 1.43 fs at 4 fs, 31 taps. Stage 3: from 3.43 fs at 8 fs, 19 taps. Stage 4: from 7.43 fs at
/// 16 fs, 15 taps.
const STAGES: [StageDesign; 4] = [
    StageDesign { k: K1, beta: 10.2 },
    StageDesign { k: K2, beta: 10.78 },
    StageDesign { k: K3, beta: 11.2 },
    StageDesign { k: K4, beta: 9.7 },
];

fn bessel_i0(x: f64) -> f64 {
    let mut sum = 1.0;
    let mut term = 1.0;
    let half = x / 2.0;
    for k in 1..100 {
        term *= (half / k as f64) * (half / k as f64);
        sum += term;
        if term < 1e-17 * sum {
            break;
        }
    }
    sum
}

/// The 2K non-zero off-centre taps of a half-band stage, h[2j] for j = 0 .. 2K - 1 of the 4K - 1 tap filter
/// h (centre h[2K - 1] = 1/2, odd indices otherwise zero). They are symmetric, h[2j] = h[2(2K - 1 - j)], and
/// sum to exactly 1/2 (unity gain at DC). Returns the first K (the outer half first), times `gain`.
fn halfband_taps<const K: usize>(beta: f64, gain: f64) -> [f64; K] {
    // Offset from the centre of h[2j] is 2j - (2K - 1): odd. The window spans +/- 2K (where the sinc is zero).
    let span = 2.0 * K as f64;
    let norm = bessel_i0(beta);
    let mut taps: [f64; K] = std::array::from_fn(|j| {
        let m = 2.0 * j as f64 - (2 * K - 1) as f64;
        let sinc = (std::f64::consts::FRAC_PI_2 * m).sin() / (std::f64::consts::PI * m);
        let r = m / span;
        let window = bessel_i0(beta * (1.0 - r * r).max(0.0).sqrt()) / norm;
        sinc * window
    });
    // Unity gain at DC needs the K taps (half of the 2K non-zero ones) to sum to exactly 1/4. The window
    // leaves an error of about 1e-6; it goes on the tap next to the centre, whose response cos(2 pi f) is small
    // at the stop-band edge (scaling every tap instead would lift the whole stop band by the error).
    let sum: f64 = taps.iter().sum();
    taps[K - 1] += 0.25 - sum;
    taps.map(|t| t * gain)
}

/// The last 2K inputs of one stage's symmetric branch, kept so that both members of each tap pair read
/// forwards: `near` holds lags 0 .. K - 1 newest first, `far` lags 2K - 1 .. K oldest first, so near[j] and
/// far[j] share tap j. Each is a ring of K written twice (at i and i + K), so its window is one contiguous
/// slice, which the compiler turns into vector loads; every index is provably in range (`step`, `step_back`,
/// `min`), so no bounds check is left either.
#[derive(Clone, Debug)]
struct SymmetricWindow<const K: usize> {
    near: Box<[[f64; K]; 2]>,
    far: Box<[[f64; K]; 2]>,
    /// Start of the newest-first window in `near` (lag 0).
    near_pos: usize,
    /// Slot of the newest sample in `far` (lag K); the window starts one after it.
    far_pos: usize,
}

impl<const K: usize> SymmetricWindow<K> {
    fn new() -> Self {
        SymmetricWindow {
            near: Box::new([[0.0; K]; 2]),
            far: Box::new([[0.0; K]; 2]),
            near_pos: 0,
            far_pos: 0,
        }
    }

    #[inline(always)]
    fn push(&mut self, x: f64) {
        let near = self.near.as_flattened_mut();
        // Lag K - 1 becomes lag K: it moves to the far ring.
        let leaving = near[self.near_pos.min(K - 1) + K - 1];
        self.near_pos = step_back(self.near_pos, K);
        near[self.near_pos] = x;
        near[self.near_pos + K] = x;
        let far = self.far.as_flattened_mut();
        self.far_pos = step(self.far_pos, K);
        far[self.far_pos] = leaving;
        far[self.far_pos + K] = leaving;
    }

    /// (lags 0 .. K - 1, lags 2K - 1 .. K).
    #[inline(always)]
    fn halves(&self) -> (&[f64; K], &[f64; K]) {
        let n = self.near_pos.min(K - 1);
        let f = self.far_pos.min(K - 1) + 1;
        let near = &self.near.as_flattened()[n..n + K];
        let far = &self.far.as_flattened()[f..f + K];
        (
            near.try_into().unwrap_or(&[0.0; K]),
            far.try_into().unwrap_or(&[0.0; K]),
        )
    }

    fn fill(&mut self, value: f64) {
        *self.near = [[value; K]; 2];
        *self.far = [[value; K]; 2];
    }
}

/// A plain delay line for the centre tap of a decimation stage: a ring of 2K samples read at a fixed lag (up
/// to 2K - 1) through an index that moves with the write index.
#[derive(Clone, Debug)]
struct CentreDelay<const K: usize> {
    data: Box<[[f64; K]; 2]>,
    write: usize,
    read: usize,
}

impl<const K: usize> CentreDelay<K> {
    fn new(lag: usize) -> Self {
        CentreDelay {
            data: Box::new([[0.0; K]; 2]),
            write: 0,
            read: (2 * K - lag) % (2 * K),
        }
    }

    /// Push one sample and return the one `lag` samples before it.
    #[inline(always)]
    fn push(&mut self, x: f64) -> f64 {
        let data = self.data.as_flattened_mut();
        self.write = step(self.write, 2 * K);
        self.read = step(self.read, 2 * K);
        data[self.write] = x;
        data[self.read]
    }

    fn fill(&mut self, value: f64) {
        *self.data = [[value; K]; 2];
    }
}

/// i + 1 modulo n, for i < n (the result is below n whatever i is, which lets the compiler drop bounds checks).
#[inline(always)]
fn step(i: usize, n: usize) -> usize {
    if i + 1 >= n {
        0
    } else {
        i + 1
    }
}

/// i - 1 modulo n, for i < n (the result is below n whatever i is).
#[inline(always)]
fn step_back(i: usize, n: usize) -> usize {
    if i == 0 || i > n {
        n - 1
    } else {
        i - 1
    }
}

/// sum_j taps[j] (near[j] + far[j]): a symmetric FIR, one multiply per pair of taps. Four partial sums keep
/// several additions in flight (and map onto vector lanes).
#[inline(always)]
fn symmetric_dot<const K: usize>(taps: &[f64; K], near: &[f64; K], far: &[f64; K]) -> f64 {
    let mut s = [0.0f64; 4];
    for j in 0..K {
        s[j % 4] += taps[j] * (near[j] + far[j]);
    }
    (s[0] + s[2]) + (s[1] + s[3])
}

/// One 2x interpolation stage. For input x[m] it writes y[2m] (the symmetric branch over x[m] .. x[m - 2K + 1])
/// and y[2m + 1] = x[m - K + 1] (the centre tap alone): a delay of 2K - 1 samples at the high rate.
#[derive(Clone, Debug)]
struct UpStage<const K: usize> {
    /// The taps times 2 (the interpolation gain).
    taps: [f64; K],
    history: SymmetricWindow<K>,
}

impl<const K: usize> UpStage<K> {
    fn new(beta: f64) -> Self {
        UpStage {
            taps: halfband_taps(beta, 2.0),
            history: SymmetricWindow::new(),
        }
    }

    #[inline(always)]
    fn process(&mut self, x: f64) -> (f64, f64) {
        self.history.push(x);
        let (near, far) = self.history.halves();
        (symmetric_dot(&self.taps, near, far), near[K - 1])
    }

    /// Each input in turn becomes two outputs: `out` is twice as long as `input`.
    #[inline(always)]
    fn interpolate(&mut self, input: &[f64], out: &mut [f64]) {
        for (x, pair) in input.iter().zip(out.chunks_exact_mut(2)) {
            let (even, odd) = self.process(*x);
            pair[0] = even;
            pair[1] = odd;
        }
    }
}

/// One 2x decimation stage. Input pairs (v[2m], v[2m + 1]), output y[m] = (h * v)[2m + late]: with `late`
/// false the delay is 2K - 1 input samples, with `late` true one less (the output is taken at the second
/// sample of the pair).
#[derive(Clone, Debug)]
struct DownStage<const K: usize> {
    taps: [f64; K],
    late: bool,
    /// The pair member the symmetric branch reads.
    branch: SymmetricWindow<K>,
    /// The other pair member, for the centre tap.
    centre: CentreDelay<K>,
}

impl<const K: usize> DownStage<K> {
    fn new(beta: f64, late: bool) -> Self {
        // The centre tap sits 2K - 1 input samples back: with the output at v[2m] that is v[2m - 2K + 1], the
        // second member of the pair K back; with the output at v[2m + 1] it is v[2m + 2 - 2K], the first member
        // of the pair K - 1 back.
        let centre_lag = if late { K - 1 } else { K };
        DownStage {
            taps: halfband_taps(beta, 1.0),
            late,
            branch: SymmetricWindow::new(),
            centre: CentreDelay::new(centre_lag),
        }
    }

    #[inline(always)]
    fn process(&mut self, first: f64, second: f64) -> f64 {
        let (b, c) = if self.late {
            (second, first)
        } else {
            (first, second)
        };
        self.branch.push(b);
        let centre = self.centre.push(c);
        let (near, far) = self.branch.halves();
        symmetric_dot(&self.taps, near, far) + 0.5 * centre
    }

    /// Each pair of inputs in turn becomes one output: `out` is half as long as `input`.
    #[inline(always)]
    fn decimate(&mut self, input: &[f64], out: &mut [f64]) {
        for (pair, y) in input.chunks_exact(2).zip(out.iter_mut()) {
            *y = self.process(pair[0], pair[1]);
        }
    }

    fn fill(&mut self, value: f64) {
        self.branch.fill(value);
        self.centre.fill(value);
    }
}

/// Round-trip delay of the up / down cascade at `quality` in high-rate samples before the decimators' late
/// picks, as (delay, factor).
fn cascade_delay(quality: Quality) -> (usize, usize) {
    let factor = quality.factor();
    let delay = STAGES[..quality.stages()]
        .iter()
        .enumerate()
        // Stage s (0-based) runs at 2^(s+1) times the base rate: one of its samples is factor / 2^(s+1)
        // high-rate samples. Interpolator and decimator each delay 2K - 1 of them.
        .map(|(s, d)| 2 * (2 * d.k - 1) * (factor >> (s + 1)))
        .sum();
    (delay, factor)
}

/// Whether the decimator of each stage (from the base rate up) takes its output late (one stage sample less
/// delay): the binary digits of the round trip's excess over a whole number of base samples.
fn late_picks(quality: Quality) -> [bool; 4] {
    let (delay, factor) = cascade_delay(quality);
    let excess = delay % factor;
    std::array::from_fn(|s| s < quality.stages() && excess & (factor >> (s + 1)) != 0)
}

/// Interpolator from the base rate to `factor` times the base rate.
#[derive(Clone, Debug)]
pub struct Upsampler {
    factor: usize,
    /// Stages from the base rate up; only the first log2(factor) of them run.
    s1: UpStage<K1>,
    s2: UpStage<K2>,
    s3: UpStage<K3>,
    s4: UpStage<K4>,
}

impl Upsampler {
    pub fn new(quality: Quality) -> Self {
        Upsampler {
            factor: quality.factor(),
            s1: UpStage::new(STAGES[0].beta),
            s2: UpStage::new(STAGES[1].beta),
            s3: UpStage::new(STAGES[2].beta),
            s4: UpStage::new(STAGES[3].beta),
        }
    }

    /// Fill the history as if `value` had always been the input.
    pub fn reset(&mut self, value: f64) {
        self.s1.history.fill(value);
        self.s2.history.fill(value);
        self.s3.history.fill(value);
        self.s4.history.fill(value);
    }

    /// Push one base-rate sample and write `factor` high-rate samples to `out`.
    #[inline]
    pub fn process(&mut self, input: f64, out: &mut [f64]) {
        let Some(out) = out.get_mut(..self.factor) else {
            return;
        };
        // Stage by stage over the block: each stage sees its inputs in time order.
        let (mut a, mut b) = ([0.0; 8], [0.0; 8]);
        match self.factor {
            2 => self.s1.interpolate(&[input], out),
            4 => {
                self.s1.interpolate(&[input], &mut a[..2]);
                self.s2.interpolate(&a[..2], out);
            }
            8 => {
                self.s1.interpolate(&[input], &mut a[..2]);
                self.s2.interpolate(&a[..2], &mut b[..4]);
                self.s3.interpolate(&b[..4], out);
            }
            16 => {
                self.s1.interpolate(&[input], &mut a[..2]);
                self.s2.interpolate(&a[..2], &mut b[..4]);
                self.s3.interpolate(&b[..4], &mut a[..8]);
                self.s4.interpolate(&a[..8], out);
            }
            _ => out[0] = input,
        }
    }
}

/// Decimator from `factor` times the base rate back to the base rate.
#[derive(Clone, Debug)]
pub struct Downsampler {
    factor: usize,
    /// Stages from the base rate up; only the first log2(factor) of them run.
    s1: DownStage<K1>,
    s2: DownStage<K2>,
    s3: DownStage<K3>,
    s4: DownStage<K4>,
}

impl Downsampler {
    pub fn new(quality: Quality) -> Self {
        let late = late_picks(quality);
        Downsampler {
            factor: quality.factor(),
            s1: DownStage::new(STAGES[0].beta, late[0]),
            s2: DownStage::new(STAGES[1].beta, late[1]),
            s3: DownStage::new(STAGES[2].beta, late[2]),
            s4: DownStage::new(STAGES[3].beta, late[3]),
        }
    }

    /// Fill the history as if `value` had always been the input.
    pub fn reset(&mut self, value: f64) {
        self.s1.fill(value);
        self.s2.fill(value);
        self.s3.fill(value);
        self.s4.fill(value);
    }

    /// Push `factor` high-rate samples and return one base-rate sample.
    #[inline]
    pub fn process(&mut self, input: &[f64]) -> f64 {
        let Some(input) = input.get(..self.factor) else {
            return 0.0;
        };
        // Stage by stage over the block, from the high rate down: each stage sees its inputs in time order.
        let (mut a, mut b) = ([0.0; 8], [0.0; 8]);
        let mut y = [0.0];
        match self.factor {
            2 => self.s1.decimate(input, &mut y),
            4 => {
                self.s2.decimate(input, &mut a[..2]);
                self.s1.decimate(&a[..2], &mut y);
            }
            8 => {
                self.s3.decimate(input, &mut a[..4]);
                self.s2.decimate(&a[..4], &mut b[..2]);
                self.s1.decimate(&b[..2], &mut y);
            }
            16 => {
                self.s4.decimate(input, &mut a[..8]);
                self.s3.decimate(&a[..8], &mut b[..4]);
                self.s2.decimate(&b[..4], &mut a[..2]);
                self.s1.decimate(&a[..2], &mut y);
            }
            _ => y[0] = input[0],
        }
        y[0]
    }
}

/// Base-rate latency of an up/down pair at `quality` (exact, in samples).
pub fn latency(quality: Quality) -> usize {
    let (delay, factor) = cascade_delay(quality);
    delay / factor
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

    /// Base samples of impulse response captured (every stage's response has ended well before).
    const IMPULSE_BASE_SAMPLES: usize = 160;

    /// The upsampler's impulse response at the high rate, divided by the factor (unity passband gain).
    fn up_response(q: Quality) -> Vec<f64> {
        let f = q.factor();
        let mut up = Upsampler::new(q);
        let mut out = vec![0.0; f * IMPULSE_BASE_SAMPLES];
        for (n, block) in out.chunks_exact_mut(f).enumerate() {
            up.process(if n == 0 { 1.0 } else { 0.0 }, block);
        }
        out.iter().map(|v| v / f as f64).collect()
    }

    /// The decimator's equivalent single filter at the high rate (the noble identities make a cascade of
    /// filter-and-keep-every-other stages one filter followed by keeping every factor-th sample): an impulse in
    /// slot p of the first block comes out as h[f m - p] at base sample m.
    fn down_response(q: Quality) -> Vec<f64> {
        let f = q.factor();
        let mut h = vec![0.0; f * IMPULSE_BASE_SAMPLES];
        for p in 0..f {
            let mut down = Downsampler::new(q);
            let mut block = vec![0.0; f];
            for m in 0..IMPULSE_BASE_SAMPLES {
                block.iter_mut().for_each(|b| *b = 0.0);
                if m == 0 {
                    block[p] = 1.0;
                }
                h[f * m + (f - 1) - p] = down.process(&block);
            }
        }
        h
    }

    /// |H| at `cycles` per sample, by the direct DFT sum (a rotating phasor: no FFT grid involved).
    fn magnitude(h: &[f64], cycles: f64) -> f64 {
        let (step_im, step_re) = (-2.0 * std::f64::consts::PI * cycles).sin_cos();
        let (mut re, mut im) = (0.0, 0.0);
        let (mut pr, mut pi) = (1.0f64, 0.0f64);
        for &x in h {
            re += x * pr;
            im += x * pi;
            (pr, pi) = (pr * step_re - pi * step_im, pr * step_im + pi * step_re);
        }
        re.hypot(im)
    }

    fn db(x: f64) -> f64 {
        20.0 * x.max(1e-300).log10()
    }

    /// The design targets in the module comment, measured on the whole chain. Method: Kaiser-windowed half-band
    /// stages (Kaiser 1974; half-band property per Vaidyanathan 1993) cascaded as in Crochiere and Rabiner 1983;
    /// the response is the DFT of each direction's impulse response. Targets: passband (interpolator times
    /// decimator, what a linear stage in between hears) within 0.1 dB up to 0.45 fs; every image of the
    /// interpolator and every alias band of the decimator at least 100 dB down from 0.57 fs up to the high rate's
    /// Nyquist frequency.
    #[test]
    fn chain_meets_passband_and_stopband_targets() {
        const PASSBAND_EDGE: f64 = 0.45;
        const PASSBAND_DB: f64 = 0.1;
        const STOPBAND_EDGE: f64 = 0.57;
        const STOPBAND_DB: f64 = 100.0;
        for q in Quality::ALL.into_iter().filter(|q| q.factor() > 1) {
            let f = q.factor() as f64;
            let up = up_response(q);
            let down = down_response(q);
            // Both responses end inside the capture (FIR): the last base sample's worth is zero.
            let tail = q.factor() * 8;
            assert!(up[up.len() - tail..].iter().all(|v| *v == 0.0), "{q:?}");
            assert!(down[down.len() - tail..].iter().all(|v| *v == 0.0), "{q:?}");

            // Frequencies in units of the base rate; `cycles` per high-rate sample is that over the factor.
            let mut worst_pass: f64 = 0.0;
            let steps = 900;
            for i in 0..=steps {
                let fb = PASSBAND_EDGE * i as f64 / steps as f64;
                let gain = db(magnitude(&up, fb / f) * magnitude(&down, fb / f));
                worst_pass = worst_pass.max(gain.abs());
            }
            let (mut worst_up, mut worst_down) = (f64::NEG_INFINITY, f64::NEG_INFINITY);
            let step = 0.0005;
            let mut fb = STOPBAND_EDGE;
            while fb <= f / 2.0 {
                worst_up = worst_up.max(db(magnitude(&up, fb / f)));
                worst_down = worst_down.max(db(magnitude(&down, fb / f)));
                fb += step;
            }
            println!(
                "{q:?}: passband deviation {worst_pass:.4} dB to {PASSBAND_EDGE} fs; worst image {worst_up:.1} dB, worst alias {worst_down:.1} dB from {STOPBAND_EDGE} fs"
            );
            assert!(worst_pass <= PASSBAND_DB, "{q:?}: passband {worst_pass} dB");
            assert!(worst_up <= -STOPBAND_DB, "{q:?}: image {worst_up} dB");
            assert!(worst_down <= -STOPBAND_DB, "{q:?}: alias {worst_down} dB");
        }
    }

    /// A half-band interpolator is a Nyquist(2) filter: its centre tap is 1/2 and its other even-offset taps are
    /// zero, so at 2x every other output is an input sample passed through unchanged (Vaidyanathan 1993).
    #[test]
    fn two_times_interpolator_keeps_the_input_samples() {
        let mut up = Upsampler::new(Quality::X2);
        let input: Vec<f64> = (0..300)
            .map(|n| ((n * 7919) % 211) as f64 - 105.0)
            .collect();
        let mut out = Vec::new();
        let mut pair = [0.0; 2];
        for &x in &input {
            up.process(x, &mut pair);
            out.extend_from_slice(&pair);
        }
        let lag = K1 - 1;
        for m in lag..input.len() {
            assert_eq!(out[2 * m + 1], input[m - lag], "m = {m}");
        }
    }

    /// After reset(v) a constant input v is the steady state: the outputs are v at once (unity DC gain).
    #[test]
    fn reset_is_the_steady_state_of_a_constant() {
        for q in Quality::ALL {
            let f = q.factor();
            let value = -3.25;
            let mut up = Upsampler::new(q);
            let mut down = Downsampler::new(q);
            up.reset(value);
            down.reset(value);
            let mut high = vec![0.0; f];
            for _ in 0..10 {
                up.process(value, &mut high);
                for h in &high {
                    assert!((h - value).abs() < 1e-12, "{q:?} up {h}");
                }
                let y = down.process(&high);
                assert!((y - value).abs() < 1e-12, "{q:?} down {y}");
            }
        }
    }

    /// The latency figures quoted in the module comment, worked by hand from the tap counts: a linear-phase FIR
    /// of N taps delays (N - 1) / 2 samples at its own rate, here 2K - 1; the up / down pair doubles it. In base
    /// samples: stage 1 (95 taps at 2 fs) 2 x 47 / 2 = 47; stage 2 (31 taps at 4 fs) 2 x 15 / 4 = 7.5; stage 3
    /// (19 taps at 8 fs) 2 x 9 / 8 = 2.25; stage 4 (15 taps at 16 fs) 2 x 7 / 16 = 0.875. Sums 47, 54.5, 56.75,
    /// 57.625, and the decimators' late picks remove the fraction.
    #[test]
    fn latency_per_quality() {
        let got: Vec<usize> = Quality::ALL.iter().map(|&q| latency(q)).collect();
        assert_eq!(got, [0, 47, 54, 56, 57]);
    }
}
