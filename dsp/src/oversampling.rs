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
//! line: 47 base samples at 2x, 54 at 4x, 56 at 8x and 57 at 16x (see `latency`). A decimator's output
//! depends on its last `decimator_memory` input blocks, one more than the latency (a linear-phase FIR reaches
//! back twice its delay, and the decimator's delay is half the round trip's).

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

    pub const fn factor(self) -> usize {
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
    const fn stages(self) -> usize {
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

/// Ring sizes of each stage's history (`SymmetricWindow`): stage s takes blocks of 2^(s-1) pushes and reads
/// each push's window and centre tap (up to lag K) after the whole block is written, so its ring must reach
/// K + 2^(s-1) - 1 pushes back; the next power of two above that.
const M1: usize = (K1 + 1).next_power_of_two();
const M2: usize = (K2 + 2).next_power_of_two();
const M3: usize = (K3 + 4).next_power_of_two();
const M4: usize = (K4 + 8).next_power_of_two();

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

/// The last inputs of one stage's symmetric branch, kept so that both members of each tap pair read forwards:
/// a window of 2K has `near` = lags 0 .. K - 1 newest first and `far` = lags 2K - 1 .. K oldest first, so
/// near[j] and far[j] share tap j. Each half is a ring of M slots (a power of two) written twice, at i and
/// i + M, so that any K consecutive slots are one contiguous fixed-size slice, which vector loads read. One
/// counter `count` (the pushes so far) places both: `near` fills downwards from slot !count mod M and `far`
/// upwards to slot count mod M. Every index is the masked counter plus less than M, so no bounds check or
/// wrap-around test is left. M holds the windows of the last M - K + 1 pushes.
///
/// A vector load that covers a sample stored a moment before waits until the store has completed (a narrow
/// store cannot be forwarded to a wider load: Intel 64 and IA-32 Architectures Optimization Reference Manual,
/// "store forwarding"); that wait costs more than the whole sum, and it chains one push to the next. So a
/// stage reads each window either before the push that completes it is written (`pending`: the two samples the
/// push adds come beside the slices as values), or after all of its pushes of one block are written (`window`),
/// so that the reads wait for the writes once per block instead of once per push.
#[derive(Clone, Debug)]
struct SymmetricWindow<const K: usize, const M: usize> {
    near: [[f64; M]; 2],
    far: [[f64; M]; 2],
    count: usize,
}

/// The window that pushing `newest` makes, read before the push is written: near[0] (lag 0) stands for
/// `newest` and far[K - 1] (lag K, the sample moving from the near half to the far half) for `moving`; the
/// slices hold stale values there.
struct Pending<'a, const K: usize> {
    near: &'a [f64; K],
    far: &'a [f64; K],
    newest: f64,
    moving: f64,
    /// `count` once the push is written.
    count: usize,
}

impl<const K: usize, const M: usize> SymmetricWindow<K, M> {
    const FITS: () = assert!(M.is_power_of_two() && M >= K && K > 0);

    fn new() -> Self {
        let () = Self::FITS;
        SymmetricWindow {
            near: [[0.0; M]; 2],
            far: [[0.0; M]; 2],
            count: 0,
        }
    }

    /// Slot of the newest sample in `near` after `count` pushes (lag j sits j slots above it).
    #[inline(always)]
    fn slot(count: usize) -> usize {
        !count & (M - 1)
    }

    /// The window after pushing `newest`, before the push is written (`write` completes it).
    #[inline(always)]
    fn pending(&self, newest: f64) -> Pending<'_, K> {
        // Lag K - 1 becomes lag K. It was written one push or more ago.
        let moving = self.near.as_flattened()[Self::slot(self.count) + K - 1];
        let count = self.count.wrapping_add(1);
        let (near, far) = self.window_at(count, 0);
        Pending {
            near,
            far,
            newest,
            moving,
            count,
        }
    }

    /// Write a push that `pending` described.
    #[inline(always)]
    fn write(&mut self, count: usize, newest: f64, moving: f64) {
        let slot = Self::slot(count);
        let top = count & (M - 1);
        let near = self.near.as_flattened_mut();
        near[slot] = newest;
        near[slot + M] = newest;
        let far = self.far.as_flattened_mut();
        far[top] = moving;
        far[top + M] = moving;
        self.count = count;
    }

    #[inline(always)]
    fn push(&mut self, newest: f64) {
        let p = self.pending(newest);
        let (count, moving) = (p.count, p.moving);
        self.write(count, newest, moving);
    }

    /// The window of the push `back` pushes before the last one written (`back` below M - K + 1).
    #[inline(always)]
    fn window(&self, back: usize) -> (&[f64; K], &[f64; K]) {
        self.window_at(self.count, back)
    }

    #[inline(always)]
    fn window_at(&self, count: usize, back: usize) -> (&[f64; K], &[f64; K]) {
        // Older windows start higher in `near` and lower in `far`. The far window ends at the top slot
        // (count mod M) in the upper copy.
        let slot = Self::slot(count) + back;
        let start = (count & (M - 1)) + M + 1 - K - back;
        let near = self.near.as_flattened()[slot..].first_chunk::<K>();
        let far = self.far.as_flattened()[start..].first_chunk::<K>();
        (near.unwrap_or(&[0.0; K]), far.unwrap_or(&[0.0; K]))
    }

    fn fill(&mut self, value: f64) {
        self.near = [[value; M]; 2];
        self.far = [[value; M]; 2];
    }
}

/// A stage's K taps, aligned so that vector multiplies can read them from memory directly.
#[derive(Clone, Copy, Debug)]
#[repr(C, align(16))]
struct Taps<const K: usize>([f64; K]);

/// sum_j taps[j] (near[j] + far[j]): a symmetric FIR, one multiply per pair of taps. Four partial sums (tap j
/// adds into sum j mod 4) keep several additions in flight and map onto vector lanes; they combine as
/// (s0 + s2) + (s1 + s3). With `PENDING`, near[0] is `newest` and far[K - 1] is `moving` (see `Pending`).
/// Kept out of line: inlined into a stage, the compiler pairs its result with the stage's other output and
/// leaves the loop scalar; on its own it becomes vector code.
#[inline(never)]
fn symmetric_sum<const K: usize, const PENDING: bool>(
    taps: &Taps<K>,
    near: &[f64; K],
    far: &[f64; K],
    newest: f64,
    moving: f64,
) -> f64 {
    let mut s = [0.0f64; 4];
    let (t4, t_rest) = taps.0.as_chunks::<4>();
    let (n4, n_rest) = near.as_chunks::<4>();
    let (f4, f_rest) = far.as_chunks::<4>();
    for (c, ((t, n), f)) in t4.iter().zip(n4).zip(f4).enumerate() {
        let (mut n, mut f) = (*n, *f);
        if PENDING && c == 0 {
            n[0] = newest;
        }
        if PENDING && 4 * c + 3 == K - 1 {
            f[3] = moving;
        }
        for l in 0..4 {
            s[l] += t[l] * (n[l] + f[l]);
        }
    }
    for (l, ((t, n), f)) in t_rest.iter().zip(n_rest).zip(f_rest).enumerate() {
        let j = K - t_rest.len() + l;
        let n = if PENDING && j == 0 { newest } else { *n };
        let f = if PENDING && j == K - 1 { moving } else { *f };
        s[l] += t * (n + f);
    }
    (s[0] + s[2]) + (s[1] + s[3])
}

/// The symmetric sum over a window that `SymmetricWindow::pending` gave.
#[inline(always)]
fn pending_sum<const K: usize>(taps: &Taps<K>, w: &Pending<'_, K>) -> f64 {
    symmetric_sum::<K, true>(taps, w.near, w.far, w.newest, w.moving)
}

/// The symmetric sum over a window that `SymmetricWindow::window` gave.
#[inline(always)]
fn written_sum<const K: usize>(taps: &Taps<K>, (near, far): (&[f64; K], &[f64; K])) -> f64 {
    symmetric_sum::<K, false>(taps, near, far, 0.0, 0.0)
}

/// One 2x interpolation stage. For input x[m] it gives y[2m] (the symmetric branch over x[m] .. x[m - 2K + 1])
/// and y[2m + 1] = x[m - K + 1] (the centre tap alone): a delay of 2K - 1 samples at the high rate.
#[derive(Clone, Debug)]
struct UpStage<const K: usize, const M: usize> {
    /// The taps times 2 (the interpolation gain).
    taps: Taps<K>,
    history: SymmetricWindow<K, M>,
}

impl<const K: usize, const M: usize> UpStage<K, M> {
    fn new(beta: f64) -> Self {
        UpStage {
            taps: Taps(halfband_taps(beta, 2.0)),
            history: SymmetricWindow::new(),
        }
    }

    /// A block of N inputs in time order becomes 2N outputs (`N2` = 2N).
    #[inline(always)]
    fn interpolate<const N: usize, const N2: usize>(&mut self, input: [f64; N]) -> [f64; N2] {
        const { assert!(N2 == 2 * N && M > K + N - 1) };
        let mut out = [0.0; N2];
        let pairs = out.as_chunks_mut::<2>().0;
        if N == 1 {
            // Each window is read before its push is written.
            for (x, pair) in input.into_iter().zip(pairs) {
                let w = self.history.pending(x);
                *pair = [pending_sum(&self.taps, &w), w.near[K - 1]];
                let (count, moving) = (w.count, w.moving);
                self.history.write(count, x, moving);
            }
        } else {
            // All pushes are written first, then every window is read.
            for x in input {
                self.history.push(x);
            }
            for (i, pair) in pairs.iter_mut().enumerate() {
                let w = self.history.window(N - 1 - i);
                *pair = [written_sum(&self.taps, w), w.0[K - 1]];
            }
        }
        out
    }
}

/// One 2x decimation stage. Input pairs (v[2m], v[2m + 1]), output y[m] = (h * v)[2m + LATE]: with `LATE`
/// false the delay is 2K - 1 input samples, with `LATE` true one less (the output is taken at the second
/// sample of the pair). `LATE` is fixed per quality (`late_picks`), so it is a compile-time choice.
#[derive(Clone, Debug)]
struct DownStage<const K: usize, const M: usize> {
    taps: Taps<K>,
    /// The pair member the symmetric branch reads (the second with `LATE`).
    branch: SymmetricWindow<K, M>,
    /// The other pair member, for the centre tap: a ring written twice at the same slots as the branch's
    /// `near` ring, so that the newest sample's slot plus j holds lag j, for j below M.
    centre: [[f64; M]; 2],
}

impl<const K: usize, const M: usize> DownStage<K, M> {
    fn new(beta: f64) -> Self {
        DownStage {
            taps: Taps(halfband_taps(beta, 1.0)),
            branch: SymmetricWindow::new(),
            centre: [[0.0; M]; 2],
        }
    }

    #[inline(always)]
    fn write_centre(&mut self, count: usize, c: f64) {
        let slot = SymmetricWindow::<K, M>::slot(count);
        let centre = self.centre.as_flattened_mut();
        centre[slot] = c;
        centre[slot + M] = c;
    }

    /// A block of N inputs in time order (N / 2 pairs) becomes H = N / 2 outputs.
    #[inline(always)]
    fn decimate<const N: usize, const H: usize, const LATE: bool>(
        &mut self,
        input: [f64; N],
    ) -> [f64; H] {
        const { assert!(N == 2 * H && M > K + H - 1) };
        // The centre tap sits 2K - 1 input samples back: with the output at v[2m] that is v[2m - 2K + 1], the
        // second member of the pair K back; with the output at v[2m + 1] it is v[2m + 2 - 2K], the first member
        // of the pair K - 1 back.
        let centre_lag = if LATE { K - 1 } else { K };
        let split = |[first, second]: [f64; 2]| {
            if LATE {
                (second, first)
            } else {
                (first, second)
            }
        };
        let pairs = input.as_chunks::<2>().0;
        let mut out = [0.0; H];
        if H == 1 {
            // Each window is read before its push is written; the centre ring's slot for the push plus j holds
            // lag j until then.
            for (&pair, y) in pairs.iter().zip(out.iter_mut()) {
                let (b, c) = split(pair);
                let w = self.branch.pending(b);
                let slot = SymmetricWindow::<K, M>::slot(w.count);
                let delayed = self.centre.as_flattened()[slot + centre_lag];
                *y = pending_sum(&self.taps, &w) + 0.5 * delayed;
                let (count, moving) = (w.count, w.moving);
                self.branch.write(count, b, moving);
                self.write_centre(count, c);
            }
        } else {
            // All pushes are written first, then every window is read.
            for &pair in pairs {
                let (b, c) = split(pair);
                self.branch.push(b);
                self.write_centre(self.branch.count, c);
            }
            let slot = SymmetricWindow::<K, M>::slot(self.branch.count);
            for (i, y) in out.iter_mut().enumerate() {
                let back = H - 1 - i;
                let delayed = self.centre.as_flattened()[slot + back + centre_lag];
                *y = written_sum(&self.taps, self.branch.window(back)) + 0.5 * delayed;
            }
        }
        out
    }

    fn fill(&mut self, value: f64) {
        self.branch.fill(value);
        self.centre = [[value; M]; 2];
    }
}

/// Round-trip delay of the up / down cascade at `quality` in high-rate samples before the decimators' late
/// picks, as (delay, factor).
const fn cascade_delay(quality: Quality) -> (usize, usize) {
    let factor = quality.factor();
    let mut delay = 0;
    let mut s = 0;
    while s < quality.stages() {
        // Stage s (0-based) runs at 2^(s+1) times the base rate: one of its samples is factor / 2^(s+1)
        // high-rate samples. Interpolator and decimator each delay 2K - 1 of them.
        delay += 2 * (2 * STAGES[s].k - 1) * (factor >> (s + 1));
        s += 1;
    }
    (delay, factor)
}

/// Whether the decimator of each stage (from the base rate up) takes its output late (one stage sample less
/// delay): the binary digits of the round trip's excess over a whole number of base samples.
const fn late_picks(quality: Quality) -> [bool; 4] {
    let (delay, factor) = cascade_delay(quality);
    let excess = delay % factor;
    let mut late = [false; 4];
    let mut s = 0;
    while s < quality.stages() {
        late[s] = excess & (factor >> (s + 1)) != 0;
        s += 1;
    }
    late
}

/// Base samples that one output of a Downsampler at `quality` depends on, the current block included: after
/// that many blocks of input its state holds nothing older (a decimator switched on mid-stream gives exact
/// output from then on). Stage s (from the base rate up) takes its output m from input pairs m - 2K_s + 1 .. m,
/// the earliest through the symmetric branch (the first member of the pair, or the second when it picks
/// late; the centre tap reaches back at most K_s pairs). Chained from the base rate up, output n reaches back
/// to high-rate sample factor n - D, D = sum over stages of 2^(S - s) (4 K_s - 2 - late_s) with S stages;
/// that sample lies ceil(D / factor) blocks before block n.
pub const fn decimator_memory(quality: Quality) -> usize {
    let late = late_picks(quality);
    let stages = quality.stages();
    let mut reach = 0;
    let mut s = 0;
    while s < stages {
        reach += (4 * STAGES[s].k - 2 - late[s] as usize) << (stages - 1 - s);
        s += 1;
    }
    reach.div_ceil(quality.factor()) + 1
}

/// Interpolator from the base rate to `factor` times the base rate.
#[derive(Clone, Debug)]
pub struct Upsampler {
    quality: Quality,
    /// Stages from the base rate up; only the first log2(factor) of them run.
    s1: UpStage<K1, M1>,
    s2: UpStage<K2, M2>,
    s3: UpStage<K3, M3>,
    s4: UpStage<K4, M4>,
}

impl Upsampler {
    pub fn new(quality: Quality) -> Self {
        Upsampler {
            quality,
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

    /// Push one base-rate sample and write `factor` high-rate samples to `out` (nothing happens if `out` is
    /// shorter than that).
    #[inline]
    pub fn process(&mut self, input: f64, out: &mut [f64]) {
        // Stage by stage over the block: each stage sees its inputs in time order.
        match self.quality {
            Quality::X1 => put(out, || [input]),
            Quality::X2 => put(out, || self.s1.interpolate::<1, 2>([input])),
            Quality::X4 => put(out, || {
                let a = self.s1.interpolate::<1, 2>([input]);
                self.s2.interpolate::<2, 4>(a)
            }),
            Quality::X8 => put(out, || {
                let a = self.s1.interpolate::<1, 2>([input]);
                let b = self.s2.interpolate::<2, 4>(a);
                self.s3.interpolate::<4, 8>(b)
            }),
            Quality::X16 => put(out, || {
                let a = self.s1.interpolate::<1, 2>([input]);
                let b = self.s2.interpolate::<2, 4>(a);
                let c = self.s3.interpolate::<4, 8>(b);
                self.s4.interpolate::<8, 16>(c)
            }),
        }
    }
}

/// Write the block `make` gives to the front of `out`, if it fits (if not, `make` does not run).
#[inline(always)]
fn put<const N: usize>(out: &mut [f64], make: impl FnOnce() -> [f64; N]) {
    if let Some(out) = out.first_chunk_mut::<N>() {
        *out = make();
    }
}

/// Decimator from `factor` times the base rate back to the base rate.
#[derive(Clone, Debug)]
pub struct Downsampler {
    quality: Quality,
    /// Stages from the base rate up; only the first log2(factor) of them run.
    s1: DownStage<K1, M1>,
    s2: DownStage<K2, M2>,
    s3: DownStage<K3, M3>,
    s4: DownStage<K4, M4>,
}

/// The late picks of each quality's decimation stages, as constants for `DownStage::decimate`.
const LATE2: [bool; 4] = late_picks(Quality::X2);
const LATE4: [bool; 4] = late_picks(Quality::X4);
const LATE8: [bool; 4] = late_picks(Quality::X8);
const LATE16: [bool; 4] = late_picks(Quality::X16);

impl Downsampler {
    pub fn new(quality: Quality) -> Self {
        Downsampler {
            quality,
            s1: DownStage::new(STAGES[0].beta),
            s2: DownStage::new(STAGES[1].beta),
            s3: DownStage::new(STAGES[2].beta),
            s4: DownStage::new(STAGES[3].beta),
        }
    }

    /// Fill the history as if `value` had always been the input.
    pub fn reset(&mut self, value: f64) {
        self.s1.fill(value);
        self.s2.fill(value);
        self.s3.fill(value);
        self.s4.fill(value);
    }

    /// Push `factor` high-rate samples and return one base-rate sample (0, and nothing happens, if `input` is
    /// shorter than that).
    #[inline]
    pub fn process(&mut self, input: &[f64]) -> f64 {
        // Stage by stage over the block, from the high rate down: each stage sees its inputs in time order.
        let y = match self.quality {
            Quality::X1 => input.first_chunk::<1>().copied(),
            Quality::X2 => input
                .first_chunk::<2>()
                .map(|&v| self.s1.decimate::<2, 1, { LATE2[0] }>(v)),
            Quality::X4 => input.first_chunk::<4>().map(|&v| {
                let a = self.s2.decimate::<4, 2, { LATE4[1] }>(v);
                self.s1.decimate::<2, 1, { LATE4[0] }>(a)
            }),
            Quality::X8 => input.first_chunk::<8>().map(|&v| {
                let a = self.s3.decimate::<8, 4, { LATE8[2] }>(v);
                let b = self.s2.decimate::<4, 2, { LATE8[1] }>(a);
                self.s1.decimate::<2, 1, { LATE8[0] }>(b)
            }),
            Quality::X16 => input.first_chunk::<16>().map(|&v| {
                let a = self.s4.decimate::<16, 8, { LATE16[3] }>(v);
                let b = self.s3.decimate::<8, 4, { LATE16[2] }>(a);
                let c = self.s2.decimate::<4, 2, { LATE16[1] }>(b);
                self.s1.decimate::<2, 1, { LATE16[0] }>(c)
            }),
        };
        y.map_or(0.0, |[y]| y)
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

    /// A decimator forgets everything older than `decimator_memory` blocks: two decimators with different
    /// histories (different garbage, different lengths, so their rings sit at different positions) give the same
    /// output, to the bit, from the block that completes `decimator_memory` common blocks on; one block
    /// earlier they still differ. That is the defining property of an FIR filter's memory (its output is a
    /// fixed combination of the last span of inputs, nothing else), checked here on the running code.
    #[test]
    fn decimator_forgets_after_its_memory() {
        let mut state = 0x2545_f491_4f6c_dd1du64;
        let mut noise = move |scale: f64| {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            scale * ((state >> 11) as f64 / (1u64 << 53) as f64 - 0.5)
        };
        for q in Quality::ALL {
            let f = q.factor();
            let memory = decimator_memory(q);
            let mut a = Downsampler::new(q);
            let mut b = Downsampler::new(q);
            let mut block = vec![0.0; f];
            // Garbage: large, and of different lengths (a prime number of blocks apart).
            let (mut last_a, mut last_b) = (0.0, 0.0);
            for _ in 0..211 {
                block.iter_mut().for_each(|v| *v = noise(1e6));
                last_a = a.process(&block);
            }
            for _ in 0..97 {
                block.iter_mut().for_each(|v| *v = noise(1e6));
                last_b = b.process(&block);
            }
            // The common input: outputs[i] comes out with common block i + 1.
            let mut outputs = Vec::new();
            for _ in 0..memory + 40 {
                block.iter_mut().for_each(|v| *v = noise(2.0));
                outputs.push((a.process(&block), b.process(&block)));
            }
            for (i, (ya, yb)) in outputs.iter().enumerate().skip(memory - 1) {
                assert_eq!(
                    ya.to_bits(),
                    yb.to_bits(),
                    "{q:?}: block {} of {memory}",
                    i + 1
                );
            }
            let (ya, yb) = if memory >= 2 {
                outputs[memory - 2]
            } else {
                (last_a, last_b)
            };
            assert_ne!(
                ya,
                yb,
                "{q:?}: {} common blocks already suffice",
                memory - 1
            );
        }
    }

    /// The memory in blocks, worked by hand from the tap counts and late picks: a stage of K reaches back
    /// 4K - 2 input samples (one less when it picks late), so the reach at the high rate is
    /// 2x: 94 = 47 x 2; 4x: 93 x 2 + 30 = 216 = 54 x 4; 8x: 93 x 4 + 29 x 2 + 18 = 448 = 56 x 8;
    /// 16x: 93 x 8 + 30 x 4 + 17 x 2 + 14 = 912 = 57 x 16 base samples, plus the current block. Each is the
    /// latency plus one: the round trip's delay equals the decimator's reach.
    #[test]
    fn decimator_memory_per_quality() {
        let got: Vec<usize> = Quality::ALL.iter().map(|&q| decimator_memory(q)).collect();
        assert_eq!(got, [1, 48, 55, 57, 58]);
        for q in Quality::ALL {
            assert_eq!(decimator_memory(q), latency(q) + 1, "{q:?}");
        }
    }

    /// One stage's symmetric branch evaluated straight from its definition over a plain history (lags 0 ..
    /// 2K - 1 of `x`, newest last): sum_j h_j (x[m - j] + x[m - 2K + 1 + j]), tap j into partial sum j mod 4,
    /// combined as (s0 + s2) + (s1 + s3): the order the module documents, so the result must match to the bit.
    fn direct_sum(taps: &[f64], x: &[f64]) -> f64 {
        let k = taps.len();
        let m = x.len() - 1;
        let mut s = [0.0f64; 4];
        for (j, t) in taps.iter().enumerate() {
            s[j % 4] += t * (x[m - j] + x[m + 1 + j - 2 * k]);
        }
        (s[0] + s[2]) + (s[1] + s[3])
    }

    /// The whole cascade evaluated directly from the filter definitions (half-band polyphase form, Vaidyanathan
    /// 1993): each stage keeps its full input history in a vector, zeros before the start. The interpolator
    /// gives (branch, x[m - K + 1]) for each input x[m]; the decimator gives branch(v[2m + late]) + v[centre] / 2
    /// for each pair. The rings, the reads ahead of the writes and the block-wise reads must reproduce it to the
    /// bit at every quality, for long enough that every ring wraps many times.
    #[test]
    fn cascade_matches_the_direct_filters_to_the_bit() {
        let taps = |s: usize, gain: f64| -> Vec<f64> {
            let beta = STAGES[s].beta;
            match s {
                0 => halfband_taps::<K1>(beta, gain).to_vec(),
                1 => halfband_taps::<K2>(beta, gain).to_vec(),
                2 => halfband_taps::<K3>(beta, gain).to_vec(),
                _ => halfband_taps::<K4>(beta, gain).to_vec(),
            }
        };
        let mut state = 0x9e37_79b9_7f4a_7c15u64;
        let mut noise = move || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64 - 0.5
        };
        for q in Quality::ALL {
            let (f, stages) = (q.factor(), q.stages());
            let late = late_picks(q);
            let mut up = Upsampler::new(q);
            let mut down = Downsampler::new(q);
            // Direct histories: per up stage its inputs; per down stage its branch and centre members.
            let pad = |v: &mut Vec<f64>| v.extend(std::iter::repeat_n(0.0, 2 * K1));
            let mut up_hist: Vec<Vec<f64>> = vec![Vec::new(); stages];
            let mut branch_hist: Vec<Vec<f64>> = vec![Vec::new(); stages];
            let mut centre_hist: Vec<Vec<f64>> = vec![Vec::new(); stages];
            for v in up_hist
                .iter_mut()
                .chain(&mut branch_hist)
                .chain(&mut centre_hist)
            {
                pad(v);
            }
            let mut high = vec![0.0; f];
            for n in 0..700 {
                let x = noise();
                up.process(x, &mut high);
                let mut block = vec![x];
                for (s, hist) in up_hist.iter_mut().enumerate() {
                    let h = taps(s, 2.0);
                    let k = h.len();
                    let mut next = Vec::new();
                    for &v in &block {
                        hist.push(v);
                        next.push(direct_sum(&h, &hist[hist.len() - 2 * k..]));
                        next.push(hist[hist.len() - k]);
                    }
                    block = next;
                }
                for (a, b) in high.iter().zip(&block) {
                    assert_eq!(a.to_bits(), b.to_bits(), "{q:?} up, n = {n}");
                }

                let input: Vec<f64> = (0..f).map(|_| noise()).collect();
                let y = down.process(&input);
                let mut block = input;
                for s in (0..stages).rev() {
                    let h = taps(s, 1.0);
                    let k = h.len();
                    let (b_hist, c_hist) = (&mut branch_hist[s], &mut centre_hist[s]);
                    let mut next = Vec::new();
                    for pair in block.chunks_exact(2) {
                        let (b, c) = if late[s] {
                            (pair[1], pair[0])
                        } else {
                            (pair[0], pair[1])
                        };
                        b_hist.push(b);
                        c_hist.push(c);
                        let lag = if late[s] { k - 1 } else { k };
                        let centre = c_hist[c_hist.len() - 1 - lag];
                        next.push(direct_sum(&h, &b_hist[b_hist.len() - 2 * k..]) + 0.5 * centre);
                    }
                    block = next;
                }
                assert_eq!(y.to_bits(), block[0].to_bits(), "{q:?} down, n = {n}");
            }
        }
    }
}
