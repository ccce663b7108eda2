//! The speaker cabinet of the listening chain: convolution with an impulse response, mono or stereo.
//!
//! ```text
//! decoded samples + rate ──► Cabinet::new (checks, resampling, normalisation, partition spectra; allocates)
//!                                │
//! model output, one sample ──► Cabinet::process ──► [left, right]      (no allocation, latency 0)
//! ```
//!
//! - **Loading** (`Cabinet::new`, `Cabinet::builtin`) runs off the audio thread. A response is refused, with a
//!   message naming the problem, when it has no samples, is not 1 or 2 channels or has channels of unequal
//!   length, has a sample rate outside `IR_RATE_RANGE`, is longer than `MAX_SECONDS` (checked from the
//!   length and rate alone, before anything is allocated), holds NaN or infinity (the first such sample is
//!   named by channel, index and time), is silent (largest sample below `SILENCE_DBFS`), or passes almost
//!   nothing in the normalisation band.
//! - **Resampling** to the session rate with `rubato` (see `resample.rs` for which resampler and why).
//! - **Normalisation** (see `normalise`): the response is scaled so that pink noise band-limited to
//!   100 Hz-5 kHz comes out at the level it went in (unit power gain, averaged over both channels of a stereo
//!   response with one gain, so their balance is kept). Switching between two cabinets then changes the tone,
//!   not the loudness of a guitar-like signal, which keeps an A/B comparison fair: a response with a big
//!   sub-bass or fizz region outside the band is not made quieter in the band for it, and a single narrow
//!   resonance (which would set a peak-based level) does not drag the rest of the response down. Equal power
//!   per octave (pink) is the usual weighting for matching loudspeaker levels with noise [common practice].
//! - **Processing** (`convolver.rs`): zero-latency uniformly partitioned FFT convolution with `realfft`, one
//!   sample at a time, no allocation; `latency()` is 0 and a test measures it. Non-finite input counts as
//!   silence (it never reaches the state), input is limited to `INPUT_LIMIT`, tiny input is flushed so no
//!   state is subnormal, output is always finite.
//! - **Channels**: a mono signal through a stereo response gives two outputs (sharing the input's
//!   transforms); a stereo signal through a mono response uses it on both sides.
//! - **Built-in response** (`builtin.rs`): our own documented speaker-in-a-box shape, minimum phase, for when
//!   none is loaded.
//! - **Bypass**: choosing "no cabinet" is the caller's. To leave the cabinet out, stop calling `process`;
//!   before calling it again call `reset()` (no allocation) so no stale tail plays. A cabinet fed silence
//!   costs almost nothing once its response has rung out (work is skipped while its state is all zeros), so
//!   feeding it zeros while bypassed is cheap too.

mod builtin;
mod convolver;
mod resample;

pub use builtin::{
    coefficients as builtin_coefficients, Section, SectionKind, SECTIONS as BUILTIN_SECTIONS,
};
pub use convolver::{Convolver, INPUT_FLOOR, INPUT_LIMIT, PARTITION_RANGE};
pub use resample::{method as resample_method, Method as ResampleMethod, MAX_FFT_BLOCK};

use realfft::RealFftPlanner;
use std::fmt;

/// Longest response accepted (s). A speaker cabinet's response dies away within a few hundred
/// milliseconds; two seconds leaves room for a captured room or a long fade, and bounds memory and load time.
pub const MAX_SECONDS: f64 = 2.0;
/// Sample rates accepted for a response (Hz).
pub const IR_RATE_RANGE: (f64, f64) = (8_000.0, 384_000.0);
/// Session (host) sample rates accepted (Hz), as the engine's.
pub const SESSION_RATE_RANGE: (f64, f64) = (22_050.0, 384_000.0);
/// A response whose largest sample is below this (dB re full scale) is refused as silent.
pub const SILENCE_DBFS: f64 = -120.0;
/// Band over which the normalisation's pink-noise power gain is unity (Hz).
pub const NORMALISATION_BAND_HZ: (f64, f64) = (100.0, 5_000.0);
/// A response whose level in the band is further than this below its own spectral peak is refused (dB):
/// normalising it would take more gain than this.
pub const MAX_BAND_DEFICIT_DB: f64 = 60.0;
/// Trailing samples below this level relative to the largest sample are cut after normalisation (dB).
pub const TRIM_DB: f64 = -140.0;

/// A decoded impulse response: one `Vec` per channel (1 or 2, equal lengths), at `sample_rate` Hz.
#[derive(Clone, Debug, PartialEq)]
pub struct ImpulseResponse {
    pub channels: Vec<Vec<f32>>,
    pub sample_rate: f64,
}

/// Why a cabinet could not be made. `Display` gives a message a user can act on.
#[derive(Clone, Debug, PartialEq)]
pub enum CabinetError {
    /// No channels at all, or channels with no samples.
    Empty { channels: usize },
    /// More than two channels.
    ChannelCount { channels: usize },
    /// Channel 1 has `first` samples, channel `channel` (from 1) has `length`.
    UnequalChannels {
        first: usize,
        channel: usize,
        length: usize,
    },
    /// The signal to process has neither 1 nor 2 channels.
    SignalChannels { channels: usize },
    /// The response's sample rate is not finite or outside `IR_RATE_RANGE`.
    SampleRate { rate: f64 },
    /// The session's sample rate is not finite or outside `SESSION_RATE_RANGE`.
    SessionRate { rate: f64 },
    /// Longer than `MAX_SECONDS`.
    TooLong { samples: usize, rate: f64 },
    /// NaN or infinity at `index` of `channel` (from 1); `seconds` is its time when the rate is known.
    NotFinite {
        channel: usize,
        index: usize,
        seconds: Option<f64>,
        value: f32,
    },
    /// Largest sample (dB re full scale; minus infinity when all are zero) below `SILENCE_DBFS`.
    Silent { peak_dbfs: f64 },
    /// Level in `NORMALISATION_BAND_HZ` relative to the spectral peak (dB), below `-MAX_BAND_DEFICIT_DB`.
    NoBand { band_db: f64 },
    /// A partition size that is not a power of two in `PARTITION_RANGE`.
    Partition { partition: usize },
    /// A library call failed (should not happen; the text says which).
    Internal(String),
}

impl fmt::Display for CabinetError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            CabinetError::Empty { channels: 0 } => write!(
                f,
                "the impulse response has no channels; a cabinet takes 1 (mono) or 2 (stereo)"
            ),
            CabinetError::Empty { .. } => write!(f, "the impulse response is empty (0 samples)"),
            CabinetError::ChannelCount { channels } => write!(
                f,
                "the impulse response has {channels} channels; a cabinet takes 1 (mono) or 2 (stereo)"
            ),
            CabinetError::UnequalChannels {
                first,
                channel,
                length,
            } => write!(
                f,
                "the impulse response's channels differ in length: channel 1 has {first} samples, \
                 channel {channel} has {length}"
            ),
            CabinetError::SignalChannels { channels } => write!(
                f,
                "a cabinet processes 1 (mono) or 2 (stereo) signal channels, not {channels}"
            ),
            CabinetError::SampleRate { rate } => write!(
                f,
                "the impulse response's sample rate {rate} Hz is outside {} .. {} Hz",
                IR_RATE_RANGE.0, IR_RATE_RANGE.1
            ),
            CabinetError::SessionRate { rate } => write!(
                f,
                "the session sample rate {rate} Hz is outside {} .. {} Hz",
                SESSION_RATE_RANGE.0, SESSION_RATE_RANGE.1
            ),
            CabinetError::TooLong { samples, rate } => write!(
                f,
                "the impulse response is {:.3} s long ({samples} samples at {rate} Hz); the longest \
                 accepted is {MAX_SECONDS:.3} s (a speaker cabinet's response dies away well within that: \
                 trim the file)",
                *samples as f64 / rate
            ),
            CabinetError::NotFinite {
                channel,
                index,
                seconds,
                value,
            } => {
                let what = if value.is_nan() {
                    "NaN (not a number)"
                } else if *value > 0.0 {
                    "+infinity"
                } else {
                    "-infinity"
                };
                write!(f, "the impulse response holds {what} at channel {channel}, sample {index}")?;
                if let Some(t) = seconds {
                    write!(f, " ({t:.6} s)")?;
                }
                write!(f, "; every sample must be a finite number")
            }
            CabinetError::Silent { peak_dbfs } => {
                if peak_dbfs.is_finite() {
                    write!(
                        f,
                        "the impulse response is silent: its largest sample is {peak_dbfs:.1} dBFS, below \
                         the {SILENCE_DBFS} dBFS floor"
                    )
                } else {
                    write!(f, "the impulse response is silent: every sample is zero")
                }
            }
            CabinetError::NoBand { band_db } => write!(
                f,
                "the impulse response passes almost nothing between {} Hz and {} Hz: its level there is \
                 {:.1} dB below its own peak, more than the {MAX_BAND_DEFICIT_DB} dB a cabinet response may \
                 be (normalising it would take that much gain)",
                NORMALISATION_BAND_HZ.0,
                NORMALISATION_BAND_HZ.1,
                -band_db
            ),
            CabinetError::Partition { partition } => write!(
                f,
                "partition size {partition} must be a power of two in {} .. {}",
                PARTITION_RANGE.0, PARTITION_RANGE.1
            ),
            CabinetError::Internal(text) => write!(f, "internal error: {text}"),
        }
    }
}

impl std::error::Error for CabinetError {}

/// Where a cabinet's response came from.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Source {
    /// The built-in response of `builtin.rs`.
    BuiltIn,
    /// A loaded response, at this rate with this many samples per channel before resampling.
    Loaded { rate: f64, samples: usize },
}

/// A speaker cabinet: a normalised response at the session rate and its convolver.
pub struct Cabinet {
    convolver: Convolver,
    response: Vec<Vec<f64>>,
    gain: f64,
    session_rate: f64,
    source: Source,
}

impl Cabinet {
    /// Load `ir` for a signal of `channels` (1 or 2) at `session_rate` Hz: check it, resample it, normalise
    /// it, prepare the convolver. Allocates (at most a few times the resampled response's size); call off
    /// the audio thread. A response longer than `MAX_SECONDS` is refused before anything is allocated.
    pub fn new(
        ir: &ImpulseResponse,
        session_rate: f64,
        channels: usize,
    ) -> Result<Cabinet, CabinetError> {
        check_session(session_rate, channels)?;
        let n = ir.channels.len();
        if n == 0 {
            return Err(CabinetError::Empty { channels: 0 });
        }
        if n > 2 {
            return Err(CabinetError::ChannelCount { channels: n });
        }
        let len = ir.channels[0].len();
        if let Some((c, other)) = ir.channels.iter().enumerate().find(|(_, c)| c.len() != len) {
            return Err(CabinetError::UnequalChannels {
                first: len,
                channel: c + 1,
                length: other.len(),
            });
        }
        if len == 0 {
            return Err(CabinetError::Empty { channels: n });
        }
        let rate = ir.sample_rate;
        if !(rate.is_finite() && (IR_RATE_RANGE.0..=IR_RATE_RANGE.1).contains(&rate)) {
            return Err(CabinetError::SampleRate { rate });
        }
        if len as f64 > MAX_SECONDS * rate {
            return Err(CabinetError::TooLong { samples: len, rate });
        }
        // The earliest non-finite sample over both channels.
        let mut first_bad: Option<(usize, usize, f32)> = None;
        for (c, samples) in ir.channels.iter().enumerate() {
            let limit = first_bad.map_or(len, |(i, _, _)| i);
            if let Some(i) = samples[..limit].iter().position(|v| !v.is_finite()) {
                first_bad = Some((i, c, samples[i]));
            }
        }
        if let Some((index, c, value)) = first_bad {
            return Err(CabinetError::NotFinite {
                channel: c + 1,
                index,
                seconds: Some(index as f64 / rate),
                value,
            });
        }
        let peak = ir
            .channels
            .iter()
            .flat_map(|c| c.iter())
            .fold(0.0f32, |m, v| m.max(v.abs())) as f64;
        let floor = 10f64.powf(SILENCE_DBFS / 20.0);
        if peak < floor {
            return Err(CabinetError::Silent {
                peak_dbfs: 20.0 * peak.log10(),
            });
        }
        let wide: Vec<Vec<f64>> = ir
            .channels
            .iter()
            .map(|c| c.iter().map(|&v| v as f64).collect())
            .collect();
        let at_session = resample::resample(&wide, rate, session_rate)?;
        drop(wide);
        Self::prepare(
            at_session,
            session_rate,
            channels,
            Source::Loaded { rate, samples: len },
        )
    }

    /// The built-in response (`builtin.rs`) at `session_rate`, for a signal of `channels` (1 or 2), normalised
    /// like a loaded one. Allocates; call off the audio thread.
    pub fn builtin(session_rate: f64, channels: usize) -> Result<Cabinet, CabinetError> {
        check_session(session_rate, channels)?;
        Self::prepare(
            vec![builtin::response(session_rate)],
            session_rate,
            channels,
            Source::BuiltIn,
        )
    }

    fn prepare(
        mut response: Vec<Vec<f64>>,
        session_rate: f64,
        channels: usize,
        source: Source,
    ) -> Result<Cabinet, CabinetError> {
        let gain = normalise(&mut response, session_rate)?;
        let peak = response
            .iter()
            .flat_map(|c| c.iter())
            .fold(0.0f64, |m, v| m.max(v.abs()));
        let floor = peak * 10f64.powf(TRIM_DB / 20.0);
        let keep = response
            .iter()
            .filter_map(|c| c.iter().rposition(|v| v.abs() > floor))
            .max()
            .map_or(1, |i| i + 1);
        for c in &mut response {
            c.truncate(keep);
            c.shrink_to_fit();
        }
        let convolver = Convolver::new(&response, channels, partition_for(keep))?;
        Ok(Cabinet {
            convolver,
            response,
            gain,
            session_rate,
            source,
        })
    }

    /// Delay from input to output in samples: 0.
    pub fn latency(&self) -> usize {
        self.convolver.latency()
    }

    /// Partition size of the convolver (taps convolved directly; FFT block of the rest).
    pub fn partition(&self) -> usize {
        self.convolver.partition()
    }

    /// Length of the response at the session rate (taps per channel).
    pub fn taps(&self) -> usize {
        self.convolver.taps()
    }

    pub fn input_channels(&self) -> usize {
        self.convolver.input_channels()
    }

    /// 1 for a mono signal through a mono response, else 2.
    pub fn output_channels(&self) -> usize {
        self.convolver.output_channels()
    }

    /// The response as convolved: at the session rate, normalised, one `Vec` per response channel.
    pub fn response(&self) -> &[Vec<f64>] {
        &self.response
    }

    /// The linear gain normalisation applied to the (resampled) response.
    pub fn normalisation_gain(&self) -> f64 {
        self.gain
    }

    pub fn session_rate(&self) -> f64 {
        self.session_rate
    }

    pub fn source(&self) -> Source {
        self.source
    }

    /// Clear the convolver's state (no allocation; cost proportional to the response's length).
    pub fn reset(&mut self) {
        self.convolver.reset();
    }

    /// One sample per signal channel in (`input[1]` ignored for a mono signal), `[left, right]` out; with
    /// one output channel both carry it. Real-time safe: no allocation, locks or panics; non-finite input
    /// is taken as silence; the output is always finite.
    #[inline]
    pub fn process(&mut self, input: [f64; 2]) -> [f64; 2] {
        self.convolver.process(input)
    }

    /// `process` for a mono signal.
    #[inline]
    pub fn process_mono(&mut self, x: f64) -> [f64; 2] {
        self.convolver.process([x, 0.0])
    }

    /// Offline: the whole signal (`input_channels()` channels of equal length) through the cabinet, one
    /// output per `output_channels()`, as long as the input (latency is 0, nothing to remove). Allocates.
    pub fn render(&mut self, input: &[Vec<f32>]) -> Vec<Vec<f32>> {
        let len = input.first().map_or(0, Vec::len);
        let outputs = self.output_channels();
        let mut out = vec![Vec::with_capacity(len); outputs];
        for n in 0..len {
            let x = [
                input.first().and_then(|c| c.get(n)).copied().unwrap_or(0.0) as f64,
                input.get(1).and_then(|c| c.get(n)).copied().unwrap_or(0.0) as f64,
            ];
            let y = self.process(x);
            for (o, channel) in out.iter_mut().enumerate() {
                channel.push(y[o] as f32);
            }
        }
        out
    }
}

fn check_session(session_rate: f64, channels: usize) -> Result<(), CabinetError> {
    if !(session_rate.is_finite()
        && (SESSION_RATE_RANGE.0..=SESSION_RATE_RANGE.1).contains(&session_rate))
    {
        return Err(CabinetError::SessionRate { rate: session_rate });
    }
    if !(1..=2).contains(&channels) {
        return Err(CabinetError::SignalChannels { channels });
    }
    Ok(())
}

/// Partition size for a response of `taps`: `sqrt(taps)` rounded up to a power of two, between 32 and 1024.
///
/// Per sample the direct head costs about `B` multiply-adds and the tail's spectral products about `L / B`
/// complex multiply-adds, so the sum is least where `B` is near `sqrt(c L)` with `c` the cost of a complex
/// product against a real one. Measured with this convolver (release build, 2048, 24 000 and 96 000 taps,
/// partitions 32 to 1024), the fastest partition was the power of two nearest `sqrt(L)`: 64, 128-256 and 512.
/// A 2048-tap response gets 64.
pub fn partition_for(taps: usize) -> usize {
    let ideal = (taps.max(1) as f64).sqrt();
    (ideal.ceil() as usize).next_power_of_two().clamp(32, 1024)
}

/// Scale `response` (at `rate`) so that its power gain for pink noise in `NORMALISATION_BAND_HZ` is 1, one
/// gain for all channels (the mean of their band powers); returns the gain.
///
/// The band power is `sum |H(f_k)|^2 / f_k / sum 1 / f_k` over the FFT bins `f_k` in the band (pink noise
/// has power density proportional to `1 / f`), from a transform long enough for bins at most 2 Hz apart.
/// Refused (`NoBand`) when the band level is more than `MAX_BAND_DEFICIT_DB` below the spectral peak.
pub fn normalise(response: &mut [Vec<f64>], rate: f64) -> Result<f64, CabinetError> {
    let len = response.first().map_or(0, Vec::len);
    let size = len.max((rate / 2.0).ceil() as usize).next_power_of_two();
    let mut planner = RealFftPlanner::<f64>::new();
    let fft = planner.plan_fft_forward(size);
    let mut time = fft.make_input_vec();
    let mut spectrum = fft.make_output_vec();
    let (lo, hi) = NORMALISATION_BAND_HZ;
    let mut band_power = 0.0;
    let mut peak_power = 0.0f64;
    for channel in response.iter() {
        time.fill(0.0);
        time[..len].copy_from_slice(channel);
        fft.process(&mut time, &mut spectrum)
            .map_err(|e| CabinetError::Internal(format!("normalisation transform: {e}")))?;
        let (mut weighted, mut weights) = (0.0, 0.0);
        for (k, c) in spectrum.iter().enumerate() {
            let power = c.norm_sqr();
            peak_power = peak_power.max(power);
            let f = k as f64 * rate / size as f64;
            if (lo..=hi).contains(&f) {
                weighted += power / f;
                weights += 1.0 / f;
            }
        }
        band_power += weighted / weights / response.len() as f64;
    }
    let band_db = 10.0 * (band_power / peak_power).log10();
    if band_db.is_nan() || band_db < -MAX_BAND_DEFICIT_DB {
        return Err(CabinetError::NoBand { band_db });
    }
    let gain = 1.0 / band_power.sqrt();
    for channel in response.iter_mut() {
        for v in channel.iter_mut() {
            *v *= gain;
        }
    }
    Ok(gain)
}
