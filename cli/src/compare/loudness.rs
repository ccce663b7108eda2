//! Loudness matching: EBU R128 / ITU-R BS.1770-4 integrated loudness (the `ebur128` crate), a gain to the
//! target, and true-peak limiting only when the matched file would exceed the true-peak ceiling.

use breakdown_dsp::units::{db_to_gain, gain_to_db};
use ebur128::{EbuR128, Mode};

/// True-peak ceiling of matched files (dBTP), EBU R128's maximum permitted true-peak level of -1 dBTP.
pub const TRUE_PEAK_CEILING_DBTP: f64 = -1.0;
/// The limiter aims a little below the ceiling so the re-measured true peak lands under it.
const LIMITER_MARGIN_DB: f64 = 0.3;
/// Limiter look-ahead (s) and release time constant (s).
const LOOKAHEAD_SECONDS: f64 = 0.0015;
const RELEASE_SECONDS: f64 = 0.08;

/// Integrated loudness (LUFS) and the largest true peak over the channels (dBTP) of planar audio.
/// Mono is measured as one channel (BS.1770 weight 1.0). Silence reads -inf.
pub fn measure(channels: &[Vec<f32>], rate: u32) -> Result<(f64, f64), String> {
    let mut meter = EbuR128::new(channels.len() as u32, rate, Mode::I | Mode::TRUE_PEAK)
        .map_err(|e| format!("loudness meter: {e:?}"))?;
    // Feed in blocks so the meter's internal buffers stay small.
    let frames = channels.first().map_or(0, Vec::len);
    let block = 1 << 16;
    let mut start = 0;
    while start < frames {
        let end = (start + block).min(frames);
        let planes: Vec<&[f32]> = channels.iter().map(|c| &c[start..end]).collect();
        meter
            .add_frames_planar_f32(&planes)
            .map_err(|e| format!("loudness meter: {e:?}"))?;
        start = end;
    }
    let loudness = meter
        .loudness_global()
        .map_err(|e| format!("loudness meter: {e:?}"))?;
    let mut peak: f64 = 0.0;
    for c in 0..channels.len() as u32 {
        peak = peak.max(
            meter
                .true_peak(c)
                .map_err(|e| format!("loudness meter: {e:?}"))?,
        );
    }
    Ok((loudness, gain_to_db(peak)))
}

/// What matching did to one file.
#[derive(Clone, Copy, Debug, Default, serde::Serialize)]
pub struct MatchReport {
    /// Integrated loudness before matching (LUFS).
    pub loudness_before_lufs: f64,
    /// True peak before matching (dBTP).
    pub true_peak_before_dbtp: f64,
    /// Gain applied (dB), not counting limiting.
    pub gain_db: f64,
    /// True-peak limiting was needed.
    pub limited: bool,
    /// Largest limiter gain reduction (dB, positive), 0 when not limited.
    pub limiter_max_reduction_db: f64,
    /// Share of samples where the limiter reduced the gain by more than 0.1 dB (0..1).
    pub limiter_active_share: f64,
    /// Re-measured after matching: integrated loudness (LUFS) and true peak (dBTP).
    pub loudness_after_lufs: f64,
    pub true_peak_after_dbtp: f64,
    /// The file was too quiet to measure (below the -70 LUFS absolute gate) and was left as it is.
    pub silent: bool,
}

/// Bring `channels` to `target_lufs` integrated loudness, in place, limiting true peaks only if needed.
pub fn match_loudness(
    channels: &mut [Vec<f32>],
    rate: u32,
    target_lufs: f64,
) -> Result<MatchReport, String> {
    let (before, peak_before) = measure(channels, rate)?;
    let mut report = MatchReport {
        loudness_before_lufs: before,
        true_peak_before_dbtp: peak_before,
        ..Default::default()
    };
    if !before.is_finite() || before < -70.0 {
        report.silent = true;
        report.loudness_after_lufs = before;
        report.true_peak_after_dbtp = peak_before;
        return Ok(report);
    }
    let mut gain_db = target_lufs - before;
    report.gain_db = gain_db;
    if peak_before + gain_db <= TRUE_PEAK_CEILING_DBTP {
        let g = db_to_gain(gain_db) as f32;
        for c in channels.iter_mut() {
            c.iter_mut().for_each(|x| *x *= g);
        }
        let (after, peak) = measure(channels, rate)?;
        report.loudness_after_lufs = after;
        report.true_peak_after_dbtp = peak;
        return Ok(report);
    }
    // Limiting lowers the loudness a little: raise the gain by what is lost and limit again.
    let original: Vec<Vec<f32>> = channels.to_vec();
    let mut ceiling_db = TRUE_PEAK_CEILING_DBTP - LIMITER_MARGIN_DB;
    report.limited = true;
    // Gain search by the secant method: under limiting, each dB of gain buys less than a dB of loudness.
    let mut previous: Option<(f64, f64)> = None;
    for _ in 0..16 {
        let g = db_to_gain(gain_db) as f32;
        for (c, o) in channels.iter_mut().zip(&original) {
            for (x, y) in c.iter_mut().zip(o) {
                *x = y * g;
            }
        }
        let (reduction, share) = limit(channels, rate, db_to_gain(ceiling_db));
        let (after, peak) = measure(channels, rate)?;
        report.gain_db = gain_db;
        report.limiter_max_reduction_db = reduction;
        report.limiter_active_share = share;
        report.loudness_after_lufs = after;
        report.true_peak_after_dbtp = peak;
        let loudness_ok = (after - target_lufs).abs() < 0.05;
        let peak_ok = peak <= TRUE_PEAK_CEILING_DBTP;
        if loudness_ok && peak_ok {
            break;
        }
        if !peak_ok {
            // The gain changes themselves made new inter-sample peaks: aim lower and start the search afresh.
            ceiling_db -= peak - TRUE_PEAK_CEILING_DBTP + 0.05;
            previous = None;
            continue;
        }
        let slope = match previous {
            Some((g0, l0)) if (after - l0).abs() > 1e-3 => {
                ((gain_db - g0) / (after - l0)).clamp(1.0, 8.0)
            }
            _ => 1.5,
        };
        previous = Some((gain_db, after));
        gain_db += (target_lufs - after) * slope;
    }
    if report.true_peak_after_dbtp > TRUE_PEAK_CEILING_DBTP {
        // Extreme material: keep the ceiling and accept a quieter file (the report shows the loudness).
        let trim = db_to_gain(TRUE_PEAK_CEILING_DBTP - 0.05 - report.true_peak_after_dbtp) as f32;
        for c in channels.iter_mut() {
            c.iter_mut().for_each(|x| *x *= trim);
        }
        let (after, peak) = measure(channels, rate)?;
        report.loudness_after_lufs = after;
        report.true_peak_after_dbtp = peak;
    }
    Ok(report)
}

/// 4x polyphase interpolator for the true-peak estimate: Hann-windowed sinc, 12 taps per phase.
struct Interpolator {
    phases: [[f32; 12]; 3],
}

impl Interpolator {
    fn new() -> Self {
        let mut phases = [[0f32; 12]; 3];
        for (p, phase) in phases.iter_mut().enumerate() {
            let frac = (p + 1) as f64 / 4.0;
            for (k, tap) in phase.iter_mut().enumerate() {
                // Tap k multiplies x[n - 5 + k]; the interpolated point sits at n + frac.
                let t = (k as f64 - 5.0) - frac;
                let sinc = if t.abs() < 1e-12 {
                    1.0
                } else {
                    (std::f64::consts::PI * t).sin() / (std::f64::consts::PI * t)
                };
                let w = 0.5 + 0.5 * (std::f64::consts::PI * t / 6.5).cos();
                *tap = (sinc * w) as f32;
            }
        }
        Interpolator { phases }
    }

    /// Largest absolute value of the sample and its three interpolated points toward the next sample.
    fn peak_at(&self, x: &[f32], n: usize) -> f32 {
        let mut peak = x[n].abs();
        for phase in &self.phases {
            let mut acc = 0.0f32;
            for (k, tap) in phase.iter().enumerate() {
                let i = n as isize - 5 + k as isize;
                if i >= 0 && (i as usize) < x.len() {
                    acc += tap * x[i as usize];
                }
            }
            peak = peak.max(acc.abs());
        }
        peak
    }
}

/// Look-ahead limiter on the linked true-peak estimate of all channels, in place. Returns the largest gain
/// reduction (dB) and the share of samples reduced by more than 0.1 dB.
fn limit(channels: &mut [Vec<f32>], rate: u32, ceiling: f64) -> (f64, f64) {
    let frames = channels.first().map_or(0, Vec::len);
    if frames == 0 {
        return (0.0, 0.0);
    }
    let interp = Interpolator::new();
    // Required gain per frame.
    let mut required = vec![1.0f32; frames];
    for c in channels.iter() {
        for (n, r) in required.iter_mut().enumerate() {
            let p = interp.peak_at(c, n) as f64;
            if p > ceiling {
                *r = r.min((ceiling / p) as f32);
            }
        }
    }
    let look = ((LOOKAHEAD_SECONDS * rate as f64).round() as usize).max(1);
    // Forward-looking minimum over [n, n + look] (monotonic deque).
    let mut forward_min = vec![1.0f32; frames];
    let mut deque: std::collections::VecDeque<usize> = std::collections::VecDeque::new();
    let mut next = 0;
    for (n, m) in forward_min.iter_mut().enumerate() {
        while next < frames && next <= n + look {
            while deque.back().is_some_and(|&b| required[b] >= required[next]) {
                deque.pop_back();
            }
            deque.push_back(next);
            next += 1;
        }
        while deque.front().is_some_and(|&f| f < n) {
            deque.pop_front();
        }
        *m = required[*deque.front().unwrap_or(&n)];
    }
    // Moving average over the past `look + 1` values: every term covers n, so the result never exceeds
    // required[n]; then a release that only slows rises.
    let release = 1.0 - (-1.0 / (RELEASE_SECONDS * rate as f64)).exp();
    let mut sum = 0.0f64;
    let mut gain = vec![1.0f32; frames];
    let mut held = 1.0f64;
    for n in 0..frames {
        sum += forward_min[n] as f64;
        if n > look {
            sum -= forward_min[n - look - 1] as f64;
        }
        let count = (n.min(look) + 1) as f64;
        let padded = (sum + (look + 1) as f64 - count) / (look + 1) as f64;
        let g = padded.min(1.0);
        held = if g < held {
            g
        } else {
            held + (g - held) * release
        };
        gain[n] = held.min(required[n] as f64) as f32;
    }
    let mut deepest = 1.0f32;
    let mut active = 0usize;
    for &g in &gain {
        deepest = deepest.min(g);
        if g < 0.98855 {
            active += 1;
        }
    }
    for c in channels.iter_mut() {
        for (x, g) in c.iter_mut().zip(&gain) {
            *x *= g;
        }
    }
    (-gain_to_db(deepest as f64), active as f64 / frames as f64)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::f64::consts::PI;

    fn sine(rate: u32, freq: f64, dbfs: f64, seconds: f64) -> Vec<f32> {
        let a = db_to_gain(dbfs);
        (0..(rate as f64 * seconds) as usize)
            .map(|n| (a * (2.0 * PI * freq * n as f64 / rate as f64).sin()) as f32)
            .collect()
    }

    #[test]
    fn ebu_tech_3341_case_1_reads_minus_23_lufs() {
        // EBU Tech 3341 (2016), test case 1: stereo 1 kHz sine at -23 dBFS (each channel) reads -23.0 LUFS
        // integrated, +/- 0.1 LU.
        for rate in [44_100, 48_000] {
            let s = sine(rate, 1000.0, -23.0, 20.0);
            let (lufs, _) = measure(&[s.clone(), s], rate).unwrap();
            assert!((lufs + 23.0).abs() <= 0.1, "{rate} Hz: {lufs} LUFS");
        }
    }

    #[test]
    fn matching_reaches_target_and_limits_only_when_needed() {
        // Target and ceiling from EBU R128: integrated loudness within 0.2 LU, true peak at most -1 dBTP.
        let rate = 48_000;
        // A sine has a crest factor of 3 dB: -18 LUFS needs no limiting.
        let mut quiet = vec![sine(rate, 440.0, -30.0, 8.0)];
        let r = match_loudness(&mut quiet, rate, -18.0).unwrap();
        assert!(!r.limited);
        assert!((r.loudness_after_lufs + 18.0).abs() < 0.2, "{r:?}");
        // Plucked-like notes (sharp attack, 30 ms decay, one a second) have a crest factor above 20 dB: at
        // -18 LUFS their attacks would pass -1 dBTP, so matching must limit.
        let spiky: Vec<f32> = (0..rate as usize * 8)
            .map(|n| {
                let t = n as f64 / rate as f64;
                let since = t % 1.0;
                (0.5 * (-since / 0.03).exp() * (2.0 * PI * 220.0 * t).sin()) as f32
            })
            .collect();
        let mut spiky = vec![spiky];
        let r = match_loudness(&mut spiky, rate, -18.0).unwrap();
        assert!(r.limited, "{r:?}");
        assert!(
            r.true_peak_after_dbtp <= TRUE_PEAK_CEILING_DBTP + 1e-6,
            "{r:?}"
        );
        assert!((r.loudness_after_lufs + 18.0).abs() < 0.2, "{r:?}");
    }
}
