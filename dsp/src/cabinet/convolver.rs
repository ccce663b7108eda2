//! Zero-latency uniformly partitioned convolution, one sample at a time.
//!
//! The response `h` (length `L`) is split at the partition size `B`:
//!
//! - the **head**, taps `0 .. B`, is convolved directly in the time domain (a dot product of `B` taps with
//!   the last `B` inputs each sample), so the output needs no input from the future: no latency;
//! - the **tail**, taps `B .. L`, is cut into `P = ceil((L - B) / B)` partitions of `B` taps, each
//!   transformed once at load (real FFT of size `2B`). Input is gathered in blocks of `B`; at the end of
//!   block `k` the last `2B` inputs are transformed into `X_k` and kept in a ring of `P` spectra (the
//!   frequency-domain delay line). The tail's output for block `k` is the inverse transform of
//!   `sum_p X_{k-p} H_p`, whose last `B` samples are exact (overlap-save). Those samples are the tail
//!   convolved with the input, `B` samples early relative to where the tail's taps start, so they are
//!   played during the next block: the tail's block delay of `B` is exactly the head's length. Head plus
//!   tail is `y[n] = sum_k h[k] x[n-k]` with nothing delayed.
//!
//! The products for partitions `1 .. P` use only spectra already known when a block starts, so they are
//! spread evenly over the block's `B` samples; the block boundary itself does one forward transform per
//! input, one partition's product and one inverse transform per output. Nothing allocates after `new`.
//!
//! The hot loops (the head's dot product, the spectral multiply-accumulate) are written once, generic over
//! `crate::arith::Arith`; where the processor has AVX2 and FMA a copy compiled for them runs (four f64 lanes,
//! fused multiply-adds), elsewhere the portable copy. They differ by roundings only.
//!
//! One input lane can feed two filters (a mono signal through a stereo response): its input spectra are
//! computed once and shared.

use super::CabinetError;
use crate::arith::{Arith, Separate};
use realfft::num_complex::Complex;
use realfft::{ComplexToReal, RealFftPlanner, RealToComplex};
use std::sync::Arc;

/// Smallest and largest partition accepted (powers of two).
pub const PARTITION_RANGE: (usize, usize) = (16, 4096);

/// Input samples beyond this magnitude (full-scale units) are limited first: far above any signal, and low
/// enough that no sum of products can overflow.
pub const INPUT_LIMIT: f64 = 1e6;
/// Input samples below this magnitude are taken as zero, so no product in the state can be subnormal
/// (f64 subnormals start near 2.2e-308; products of flushed inputs and flushed taps stay above 1e-60).
pub const INPUT_FLOOR: f64 = 1e-20;
/// Taps (and tail spectra values) below this fraction of the response's largest are set to zero at load,
/// for the same reason. -400 dB is far below anything audible or representable in the output's f32.
const TAP_FLOOR: f64 = 1e-20;

/// One response, prepared: the head's taps reversed, the tail's partition spectra in split form.
struct Filter {
    /// `head[i] = h[H - 1 - i]` so the dot product runs over the history in storage order.
    head: Vec<f64>,
    /// Partition spectra, `parts * (B + 1)` bins each, real and imaginary parts apart (so the
    /// multiply-accumulate runs over plain arrays), already scaled by `1 / (2B)` for the inverse FFT.
    re: Vec<f64>,
    im: Vec<f64>,
}

/// Per-output state of a lane.
struct Output {
    filter: usize,
    acc_re: Vec<f64>,
    acc_im: Vec<f64>,
    /// The tail's samples for the current block, computed at the last boundary.
    tail_out: Vec<f64>,
}

/// One input stream.
struct Lane {
    /// Input history for the head, written twice (`history[i]` and `history[i + H]`) so the last `H` inputs
    /// are always one contiguous slice.
    history: Vec<f64>,
    /// Last `2B` inputs in time order: the previous block, then the current one as it fills.
    block: Vec<f64>,
    /// Ring of `parts` input spectra, split form; `newest` is the slot of the latest.
    fdl_re: Vec<f64>,
    fdl_im: Vec<f64>,
    newest: usize,
    outputs: Vec<Output>,
    /// Consecutive zero inputs; past `quiet_after` the whole state is exact zeros and work is skipped.
    quiet: usize,
}

/// A multi-channel FIR filter by zero-latency partitioned convolution.
pub struct Convolver {
    partition: usize,
    /// log2 of `partition` (divisions by it are shifts).
    shift: u32,
    head_len: usize,
    parts: usize,
    taps: usize,
    filters: Vec<Filter>,
    lanes: Vec<Lane>,
    /// Output channel `o` is `lanes[route[o].0].outputs[route[o].1]`.
    route: Vec<(usize, usize)>,
    /// Position in the current block (0 .. B).
    pos: usize,
    /// Write position in the head's history (0 .. H).
    hist_pos: usize,
    /// Tail partitions (1 .. parts) already accumulated in the current block.
    parts_done: usize,
    quiet_after: usize,
    /// Run the copy compiled for AVX2 and FMA (set only where the processor has both).
    fused: bool,
    forward: Arc<dyn RealToComplex<f64>>,
    inverse: Arc<dyn ComplexToReal<f64>>,
    time: Vec<f64>,
    spectrum: Vec<Complex<f64>>,
    scratch_forward: Vec<Complex<f64>>,
    scratch_inverse: Vec<Complex<f64>>,
}

impl Convolver {
    /// Prepare `taps` (one response per channel, 1 or 2, equal lengths, finite) for a signal of
    /// `input_channels` (1 or 2), with partition size `partition` (a power of two in `PARTITION_RANGE`).
    ///
    /// Routing: one input and one response gives one output; one input and two responses gives two
    /// outputs sharing the input's spectra; two inputs and one response uses it on both; two and two pair
    /// them left with left, right with right.
    pub fn new(
        taps: &[Vec<f64>],
        input_channels: usize,
        partition: usize,
    ) -> Result<Self, CabinetError> {
        if !(1..=2).contains(&input_channels) {
            return Err(CabinetError::SignalChannels {
                channels: input_channels,
            });
        }
        if taps.is_empty() || taps.len() > 2 {
            return Err(CabinetError::ChannelCount {
                channels: taps.len(),
            });
        }
        let len = taps[0].len();
        if len == 0 {
            return Err(CabinetError::Empty {
                channels: taps.len(),
            });
        }
        if let Some((c, other)) = taps.iter().enumerate().find(|(_, t)| t.len() != len) {
            return Err(CabinetError::UnequalChannels {
                first: len,
                channel: c + 1,
                length: other.len(),
            });
        }
        for (c, t) in taps.iter().enumerate() {
            if let Some(i) = t.iter().position(|v| !v.is_finite()) {
                return Err(CabinetError::NotFinite {
                    channel: c + 1,
                    index: i,
                    seconds: None,
                    value: t[i] as f32,
                });
            }
        }
        let (lo, hi) = PARTITION_RANGE;
        if !partition.is_power_of_two() || !(lo..=hi).contains(&partition) {
            return Err(CabinetError::Partition { partition });
        }

        let b = partition;
        let head_len = len.min(b);
        let parts = if len > b { (len - b).div_ceil(b) } else { 0 };
        let bins = b + 1;
        let mut planner = RealFftPlanner::<f64>::new();
        let forward = planner.plan_fft_forward(2 * b);
        let inverse = planner.plan_fft_inverse(2 * b);
        let mut time = forward.make_input_vec();
        let mut spectrum = forward.make_output_vec();
        let mut scratch_forward = forward.make_scratch_vec();
        let scratch_inverse = inverse.make_scratch_vec();

        let peak = taps
            .iter()
            .flat_map(|t| t.iter())
            .fold(0.0f64, |m, v| m.max(v.abs()));
        let floor = peak * TAP_FLOOR;
        let clean = |v: f64| if v.abs() < floor { 0.0 } else { v };
        let scale = 1.0 / (2 * b) as f64;
        let mut filters = Vec::with_capacity(taps.len());
        for t in taps {
            let head: Vec<f64> = t[..head_len].iter().rev().map(|&v| clean(v)).collect();
            let mut re = vec![0.0; parts * bins];
            let mut im = vec![0.0; parts * bins];
            for p in 0..parts {
                let start = b + p * b;
                let end = (start + b).min(len);
                time.fill(0.0);
                for (dst, &v) in time.iter_mut().zip(&t[start..end]) {
                    *dst = clean(v);
                }
                forward
                    .process_with_scratch(&mut time, &mut spectrum, &mut scratch_forward)
                    .map_err(|e| CabinetError::Internal(e.to_string()))?;
                let spectral_peak = spectrum.iter().fold(0.0f64, |m, c| m.max(c.norm()));
                let spectral_floor = spectral_peak * TAP_FLOOR;
                for (k, c) in spectrum.iter().enumerate() {
                    let keep = |v: f64| {
                        if v.abs() < spectral_floor {
                            0.0
                        } else {
                            v * scale
                        }
                    };
                    re[p * bins + k] = keep(c.re);
                    im[p * bins + k] = keep(c.im);
                }
            }
            filters.push(Filter { head, re, im });
        }

        let new_output = |filter: usize| Output {
            filter,
            acc_re: vec![0.0; bins],
            acc_im: vec![0.0; bins],
            tail_out: vec![0.0; b],
        };
        let new_lane = |outputs: Vec<Output>| Lane {
            history: vec![0.0; 2 * head_len],
            block: vec![0.0; 2 * b],
            fdl_re: vec![0.0; parts * bins],
            fdl_im: vec![0.0; parts * bins],
            newest: 0,
            outputs,
            quiet: 0,
        };
        let (lanes, route) = match (input_channels, taps.len()) {
            (1, 1) => (vec![new_lane(vec![new_output(0)])], vec![(0, 0)]),
            (1, _) => (
                vec![new_lane(vec![new_output(0), new_output(1)])],
                vec![(0, 0), (0, 1)],
            ),
            (_, 1) => (
                vec![new_lane(vec![new_output(0)]), new_lane(vec![new_output(0)])],
                vec![(0, 0), (1, 0)],
            ),
            _ => (
                vec![new_lane(vec![new_output(0)]), new_lane(vec![new_output(1)])],
                vec![(0, 0), (1, 0)],
            ),
        };
        Ok(Convolver {
            partition: b,
            shift: b.trailing_zeros(),
            head_len,
            parts,
            taps: len,
            filters,
            lanes,
            route,
            pos: 0,
            hist_pos: 0,
            parts_done: 0,
            // History, both halves of the block buffer, every ring slot and the last tail output all hold
            // only zeros once this many zero inputs have passed (with a block to spare).
            quiet_after: head_len + (parts + 3) * b,
            fused: fused_available(),
            forward,
            inverse,
            time,
            spectrum,
            scratch_forward,
            scratch_inverse,
        })
    }

    /// Samples of delay between input and output: none (the head is convolved directly).
    pub fn latency(&self) -> usize {
        0
    }

    /// The partition size `B` (taps in the direct head; block and partition size of the tail).
    pub fn partition(&self) -> usize {
        self.partition
    }

    /// Length of the response (taps).
    pub fn taps(&self) -> usize {
        self.taps
    }

    pub fn input_channels(&self) -> usize {
        self.lanes.len()
    }

    pub fn output_channels(&self) -> usize {
        self.route.len()
    }

    /// Clear all state (as if silence had been playing forever). No allocation.
    pub fn reset(&mut self) {
        for lane in &mut self.lanes {
            lane.history.fill(0.0);
            lane.block.fill(0.0);
            lane.fdl_re.fill(0.0);
            lane.fdl_im.fill(0.0);
            lane.newest = 0;
            lane.quiet = 0;
            for o in &mut lane.outputs {
                o.acc_re.fill(0.0);
                o.acc_im.fill(0.0);
                o.tail_out.fill(0.0);
            }
        }
        self.pos = 0;
        self.hist_pos = 0;
        self.parts_done = 0;
    }

    /// Run the portable copy even where the AVX2 and FMA one could run (to compare the two).
    pub fn use_portable_copy(&mut self) {
        self.fused = false;
    }

    /// One sample in on each input channel (`input[1]` is ignored with one input), one sample out on each
    /// output channel; with one output both entries carry it. Non-finite input counts as silence, input
    /// is limited to `INPUT_LIMIT`, and the output is always finite. No allocation, no locks, no panics.
    #[inline]
    pub fn process(&mut self, input: [f64; 2]) -> [f64; 2] {
        #[cfg(target_arch = "x86_64")]
        if self.fused {
            // SAFETY: `fused` is set only where the processor has AVX2 and FMA.
            return unsafe { self.process_fused(input) };
        }
        self.process_as::<Separate>(input)
    }

    /// `process_as` compiled with AVX2 and FMA.
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn process_fused(&mut self, input: [f64; 2]) -> [f64; 2] {
        self.process_as::<crate::arith::Fused>(input)
    }

    #[inline(always)]
    fn process_as<A: Arith>(&mut self, input: [f64; 2]) -> [f64; 2] {
        let b = self.partition;
        let j = self.pos;
        // Tail partitions 1 .. parts to have accumulated after this sample: all of them by the last one.
        let spread = self.parts.saturating_sub(1);
        let target = ((j + 1) * spread + b - 1) >> self.shift;
        let (from, to) = (self.parts_done, target.max(self.parts_done));
        let bins = b + 1;
        let h = self.head_len;
        let mut lane_out = [[0.0f64; 2]; 2];
        for (l, lane) in self.lanes.iter_mut().enumerate() {
            let x = sanitize(input[l]);
            if x == 0.0 {
                lane.quiet = lane.quiet.saturating_add(1);
            } else {
                lane.quiet = 0;
            }
            let quiet = lane.quiet > self.quiet_after;
            // Input into the head's history and the block.
            let w = self.hist_pos;
            if !quiet {
                lane.history[w] = x;
                lane.history[w + h] = x;
                lane.block[b + j] = x;
            }
            let recent = &lane.history[w + 1..w + 1 + h];
            for (o, out) in lane.outputs.iter_mut().enumerate() {
                if quiet {
                    continue;
                }
                let filter = &self.filters[out.filter];
                let head = dot::<A>(&filter.head, recent);
                // Spread work: partitions from .. to of the tail, with spectra known since the block began.
                for p in from + 1..to + 1 {
                    // X_{k-p} is p - 1 slots before the newest, circularly (no division).
                    let back = p - 1;
                    let slot = if lane.newest >= back {
                        lane.newest - back
                    } else {
                        lane.newest + self.parts - back
                    };
                    let xr = &lane.fdl_re[slot * bins..(slot + 1) * bins];
                    let xi = &lane.fdl_im[slot * bins..(slot + 1) * bins];
                    let hr = &filter.re[p * bins..(p + 1) * bins];
                    let hi = &filter.im[p * bins..(p + 1) * bins];
                    multiply_accumulate::<A>(&mut out.acc_re, &mut out.acc_im, xr, xi, hr, hi);
                }
                lane_out[l][o] = head + if self.parts > 0 { out.tail_out[j] } else { 0.0 };
            }
        }
        self.parts_done = to;
        self.hist_pos = if self.hist_pos + 1 == h {
            0
        } else {
            self.hist_pos + 1
        };
        self.pos += 1;
        if self.pos == b {
            self.pos = 0;
            self.parts_done = 0;
            if self.parts > 0 {
                self.block_boundary::<A>();
            }
        }
        let mut y = [0.0; 2];
        for (k, &(l, o)) in self.route.iter().enumerate() {
            let v = lane_out[l][o];
            y[k] = if v.is_finite() { v } else { 0.0 };
        }
        if self.route.len() == 1 {
            y[1] = y[0];
        }
        y
    }

    /// End of a block: transform the last `2B` inputs, add partition 0, transform back.
    #[inline(always)]
    fn block_boundary<A: Arith>(&mut self) {
        let b = self.partition;
        let bins = b + 1;
        let scale_free = 2 * b;
        for lane in &mut self.lanes {
            let quiet = lane.quiet > self.quiet_after;
            if quiet {
                continue;
            }
            self.time.copy_from_slice(&lane.block);
            lane.block.copy_within(b.., 0);
            // Lengths are the plan's own, so the transform cannot fail; a failure would leave zeros.
            if self
                .forward
                .process_with_scratch(
                    &mut self.time,
                    &mut self.spectrum,
                    &mut self.scratch_forward,
                )
                .is_err()
            {
                self.spectrum.fill(Complex::new(0.0, 0.0));
            }
            lane.newest = if lane.newest + 1 == self.parts {
                0
            } else {
                lane.newest + 1
            };
            let slot = lane.newest;
            let xr = &mut lane.fdl_re[slot * bins..(slot + 1) * bins];
            let xi = &mut lane.fdl_im[slot * bins..(slot + 1) * bins];
            for ((r, i), c) in xr.iter_mut().zip(xi.iter_mut()).zip(&self.spectrum) {
                *r = c.re;
                *i = c.im;
            }
            let xr = &lane.fdl_re[slot * bins..(slot + 1) * bins];
            let xi = &lane.fdl_im[slot * bins..(slot + 1) * bins];
            for out in &mut lane.outputs {
                let filter = &self.filters[out.filter];
                multiply_accumulate::<A>(
                    &mut out.acc_re,
                    &mut out.acc_im,
                    xr,
                    xi,
                    &filter.re[..bins],
                    &filter.im[..bins],
                );
                for ((c, r), i) in self.spectrum.iter_mut().zip(&out.acc_re).zip(&out.acc_im) {
                    *c = Complex::new(*r, *i);
                }
                // The inverse transform of a real signal's spectrum: DC and Nyquist are real.
                self.spectrum[0].im = 0.0;
                self.spectrum[b].im = 0.0;
                if self
                    .inverse
                    .process_with_scratch(
                        &mut self.spectrum,
                        &mut self.time,
                        &mut self.scratch_inverse,
                    )
                    .is_err()
                {
                    self.time.fill(0.0);
                }
                debug_assert_eq!(self.time.len(), scale_free);
                out.tail_out.copy_from_slice(&self.time[b..]);
                out.acc_re.fill(0.0);
                out.acc_im.fill(0.0);
            }
        }
    }
}

#[inline(always)]
fn sanitize(x: f64) -> f64 {
    if !x.is_finite() || x.abs() < INPUT_FLOOR {
        0.0
    } else {
        x.clamp(-INPUT_LIMIT, INPUT_LIMIT)
    }
}

/// True where the AVX2 and FMA copy can run (`crate::arith::fused_available` for FMA, and AVX2).
fn fused_available() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        crate::arith::fused_available() && std::arch::is_x86_feature_detected!("avx2")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// `sum a[i] b[i]` with sixteen running sums (four vectors of four), so the additions do not wait on each
/// other.
#[inline(always)]
fn dot<A: Arith>(a: &[f64], b: &[f64]) -> f64 {
    let mut s = [0.0f64; 16];
    let ca = a.chunks_exact(16);
    let cb = b.chunks_exact(16);
    let (ra, rb) = (ca.remainder(), cb.remainder());
    for (x, y) in ca.zip(cb) {
        for k in 0..16 {
            s[k] = A::madd(x[k], y[k], s[k]);
        }
    }
    let mut tail = 0.0;
    for (x, y) in ra.iter().zip(rb) {
        tail = A::madd(*x, *y, tail);
    }
    let mut quad = [0.0f64; 4];
    for k in 0..4 {
        quad[k] = (s[k] + s[k + 4]) + (s[k + 8] + s[k + 12]);
    }
    (quad[0] + quad[1]) + (quad[2] + quad[3]) + tail
}

/// `acc += x * h` over complex bins held as separate real and imaginary arrays.
#[inline(always)]
fn multiply_accumulate<A: Arith>(
    acc_re: &mut [f64],
    acc_im: &mut [f64],
    xr: &[f64],
    xi: &[f64],
    hr: &[f64],
    hi: &[f64],
) {
    let n = acc_re.len();
    let (acc_im, xr, xi, hr, hi) = (&mut acc_im[..n], &xr[..n], &xi[..n], &hr[..n], &hi[..n]);
    for k in 0..n {
        acc_re[k] = A::madd(xr[k], hr[k], A::madd(-xi[k], hi[k], acc_re[k]));
        acc_im[k] = A::madd(xr[k], hi[k], A::madd(xi[k], hr[k], acc_im[k]));
    }
}
