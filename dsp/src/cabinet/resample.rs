//! Bringing a response to the session rate with `rubato`, off the audio thread.
//!
//! Choice of resampler:
//!
//! - **`rubato::Fft`** (synchronous: the exact rational ratio, each block transformed, its spectrum cut or
//!   extended and multiplied by a windowed-sinc anti-aliasing filter, transformed back) wherever both rates are
//!   whole hertz and their reduced ratio `p/q` is small (at most `MAX_FFT_BLOCK` on each side). That covers
//!   every rate a WAV file or host uses in practice (44.1 k to 48 k is 147/160, 96 k to 48 k is 2/1). It is
//!   rubato's highest-quality mode, fast, and its delay is an exact whole number of output samples when the
//!   block sizes are even (we choose them so), so the resampled response keeps its timing to the sample.
//!   The block is at least `FFT_BLOCK_TARGET` input samples, which puts the filter's cutoff within about 2% of
//!   the lower Nyquist frequency.
//! - **`rubato::Async` with sinc interpolation** (256-tap Blackman-Harris windowed sinc, 256 sub-sample
//!   phases, cubic interpolation between them: the quality rubato documents as equal to its FFT resampler) for
//!   any other pair (a rate such as 44 101 Hz, or a host rate that is not a whole number). The FFT
//!   resampler's block would there grow with `rate / gcd` to hundreds of thousands of samples; the sinc
//!   resampler's memory and cost do not depend on the pair. rubato trims its delay to a whole output sample,
//!   so on this path the response may be shifted by a constant fraction of a sample: a pure delay under
//!   21 us at 48 kHz, which changes no magnitude and nothing audible.

use super::CabinetError;
use rubato::audioadapter_buffers::direct::SequentialSliceOfVecs;
use rubato::{
    Async, FixedAsync, FixedSync, Resampler, SincInterpolationParameters, SincInterpolationType,
    WindowFunction,
};

/// Largest reduced-ratio block (`rate / gcd`) on either side for the FFT resampler.
pub const MAX_FFT_BLOCK: usize = 8192;
/// Smallest FFT block (input samples) aimed for.
const FFT_BLOCK_TARGET: usize = 2048;

/// Which resampler a pair of rates gets.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Method {
    /// Same rate: samples copied.
    None,
    /// `rubato::Fft` with input and output blocks of these sizes.
    Fft { block_in: usize, block_out: usize },
    /// `rubato::Async` with sinc interpolation.
    Sinc,
}

fn gcd(mut a: usize, mut b: usize) -> usize {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// The resampler used from `from` to `to` (both positive and finite).
pub fn method(from: f64, to: f64) -> Method {
    if from == to {
        return Method::None;
    }
    let whole = |r: f64| r.fract() == 0.0 && (1.0..=1e7).contains(&r);
    if whole(from) && whole(to) {
        let (a, b) = (from as usize, to as usize);
        let g = gcd(a, b);
        let (p, q) = (a / g, b / g);
        if p <= MAX_FFT_BLOCK && q <= MAX_FFT_BLOCK {
            // An even number of minimum blocks, at least FFT_BLOCK_TARGET input samples.
            let mut chunks = FFT_BLOCK_TARGET.div_ceil(p).max(2);
            chunks += chunks % 2;
            return Method::Fft {
                block_in: chunks * p,
                block_out: chunks * q,
            };
        }
    }
    Method::Sinc
}

/// Length of a response of `len` samples at `from` once at `to`: the same duration, rounded up.
pub fn resampled_len(len: usize, from: f64, to: f64) -> usize {
    ((len as f64) * to / from).ceil() as usize
}

/// `channels` (equal lengths, finite) from rate `from` to rate `to`, each `resampled_len` long, aligned so
/// that sample 0 stays at time 0.
pub fn resample(channels: &[Vec<f64>], from: f64, to: f64) -> Result<Vec<Vec<f64>>, CabinetError> {
    let len = channels.first().map_or(0, Vec::len);
    let out_len = resampled_len(len, from, to);
    let n = channels.len();
    let internal = |e: &dyn std::fmt::Display| CabinetError::Internal(format!("resampling: {e}"));
    let mut resampler: Box<dyn Resampler<f64>> = match method(from, to) {
        Method::None => return Ok(channels.to_vec()),
        Method::Fft { block_in, .. } => Box::new(
            rubato::Fft::<f64>::new_custom(
                from as usize,
                to as usize,
                block_in,
                1,
                n,
                WindowFunction::BlackmanHarris2,
                FixedSync::Both,
            )
            .map_err(|e| internal(&e))?,
        ),
        Method::Sinc => {
            let parameters = SincInterpolationParameters::new(256, WindowFunction::BlackmanHarris2)
                .oversampling_factor(256)
                .interpolation(SincInterpolationType::Cubic);
            Box::new(
                Async::<f64>::new_sinc(to / from, 1.0, &parameters, 1024, n, FixedAsync::Input)
                    .map_err(|e| internal(&e))?,
            )
        }
    };
    let input = SequentialSliceOfVecs::new(channels, n, len).map_err(|e| internal(&e))?;
    let needed = resampler.process_all_needed_output_len(len).max(out_len);
    let mut output = vec![vec![0.0f64; needed]; n];
    {
        let mut adapter =
            SequentialSliceOfVecs::new_mut(&mut output, n, needed).map_err(|e| internal(&e))?;
        resampler
            .process_all_into_buffer(&input, &mut adapter, len, None)
            .map_err(|e| internal(&e))?;
    }
    for c in &mut output {
        c.truncate(out_len);
        c.shrink_to_fit();
    }
    Ok(output)
}
