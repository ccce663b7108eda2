//! Blind A/B clips: the loudness-matched variants take turns every few seconds on the same timeline, in a
//! shuffled order, joined by short crossfades with a tick (or by a short gap of silence), with a key saying
//! which variant plays when.

use super::plan::Marker;
use std::f64::consts::PI;

/// Crossfade / fade length (s).
pub const FADE_SECONDS: f64 = 0.02;
/// Gap of silence between segments for `Marker::Silence` (s).
pub const GAP_SECONDS: f64 = 0.15;
/// Tick: a Hann-windowed tone burst.
const TICK_SECONDS: f64 = 0.006;
const TICK_HZ: f64 = 2500.0;
const TICK_PEAK: f64 = 0.2;

/// One segment of the clip (frames).
#[derive(Clone, Debug, PartialEq)]
pub struct Segment {
    pub variant: usize,
    /// Where the variant is fully audible ... until (the key's times).
    pub start: usize,
    pub end: usize,
    /// Span including the fades.
    pub fade_in_from: usize,
    pub fade_out_to: usize,
}

/// The whole clip plan for one DI.
#[derive(Clone, Debug)]
pub struct Layout {
    pub segments: Vec<Segment>,
    /// Frames where a marker tick is centred.
    pub ticks: Vec<usize>,
}

/// Small deterministic generator (SplitMix64) so a clip (or the demo DI) can be rebuilt identically.
pub(crate) struct Mix(pub(crate) u64);

impl Mix {
    pub(crate) fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Uniform in -1..1.
    pub(crate) fn signed_unit(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0
    }
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
}

/// Variant order: rounds in which every variant plays once, shuffled, never the same variant twice in a row.
fn order(segments: usize, variants: usize, shuffle_key: u64) -> Vec<usize> {
    let mut mix = Mix(shuffle_key);
    let mut out: Vec<usize> = Vec::with_capacity(segments);
    while out.len() < segments {
        let mut round: Vec<usize> = (0..variants).collect();
        for i in (1..round.len()).rev() {
            round.swap(i, mix.below(i + 1));
        }
        if variants > 1 && out.last() == round.first() {
            round.swap(0, 1 + mix.below(variants - 1));
        }
        out.extend(round);
    }
    out.truncate(segments);
    out
}

/// Lay out a clip of `frames` frames.
pub fn layout(
    frames: usize,
    rate: u32,
    segment_seconds: f64,
    variants: usize,
    marker: Marker,
    shuffle_key: u64,
) -> Layout {
    let rate_f = rate as f64;
    let seg = ((segment_seconds * rate_f).round() as usize).max(1);
    let fade = ((FADE_SECONDS * rate_f).round() as usize).max(1);
    let gap = (GAP_SECONDS * rate_f).round() as usize;
    let count = frames.div_ceil(seg).max(1);
    let who = order(count, variants.max(1), shuffle_key);
    let mut segments = Vec::with_capacity(count);
    let mut ticks = Vec::new();
    for (k, &variant) in who.iter().enumerate() {
        let (b0, b1) = (k * seg, ((k + 1) * seg).min(frames));
        let first = k == 0;
        let last = k + 1 == count;
        let s = match marker {
            Marker::Tick => Segment {
                variant,
                start: if first { 0 } else { b0 + fade / 2 },
                end: if last {
                    b1
                } else {
                    b1.saturating_sub(fade / 2)
                },
                fade_in_from: if first {
                    0
                } else {
                    b0.saturating_sub(fade / 2)
                },
                fade_out_to: if last {
                    b1
                } else {
                    (b1 + fade / 2).min(frames)
                },
            },
            Marker::Silence => {
                let start = if first {
                    0
                } else {
                    (b0 + gap / 2 + fade).min(b1)
                };
                let end = if last {
                    b1
                } else {
                    b1.saturating_sub(gap / 2 + fade).max(start)
                };
                Segment {
                    variant,
                    start,
                    end,
                    fade_in_from: if first { 0 } else { start - fade.min(start) },
                    fade_out_to: if last { b1 } else { (end + fade).min(frames) },
                }
            }
        };
        if !first && marker == Marker::Tick {
            ticks.push(b0);
        }
        segments.push(s);
    }
    Layout { segments, ticks }
}

/// Weight of segment `s` at frame `n`: raised-cosine ramps, so crossfading weights add to exactly 1.
fn weight(s: &Segment, n: usize) -> f64 {
    if n < s.fade_in_from || n >= s.fade_out_to {
        0.0
    } else if n < s.start {
        let t = (n - s.fade_in_from) as f64 / (s.start - s.fade_in_from).max(1) as f64;
        0.5 - 0.5 * (PI * t).cos()
    } else if n < s.end {
        1.0
    } else {
        let t = (n - s.end) as f64 / (s.fade_out_to - s.end).max(1) as f64;
        0.5 + 0.5 * (PI * t).cos()
    }
}

/// Add variant `variant`'s share of the clip from its matched audio.
pub fn add_variant(clip: &mut [Vec<f32>], layout: &Layout, variant: usize, source: &[Vec<f32>]) {
    for s in layout.segments.iter().filter(|s| s.variant == variant) {
        for (c, src) in clip.iter_mut().zip(source) {
            for n in s.fade_in_from..s.fade_out_to.min(src.len()).min(c.len()) {
                c[n] += (weight(s, n) * src[n] as f64) as f32;
            }
        }
    }
}

/// Add the marker ticks (nothing to add for a gap of silence).
pub fn add_markers(clip: &mut [Vec<f32>], layout: &Layout, rate: u32) {
    let len = (TICK_SECONDS * rate as f64).round() as usize;
    for &centre in &layout.ticks {
        let from = centre.saturating_sub(len / 2);
        for k in 0..len {
            let n = from + k;
            let w = 0.5 - 0.5 * (2.0 * PI * k as f64 / len as f64).cos();
            let v = (TICK_PEAK * w * (2.0 * PI * TICK_HZ * k as f64 / rate as f64).sin()) as f32;
            for c in clip.iter_mut() {
                if n < c.len() {
                    c[n] += v;
                }
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crossfade_weights_sum_to_one_and_every_variant_plays() {
        let rate = 48_000;
        let frames = rate as usize * 30;
        let l = layout(frames, rate, 4.0, 3, Marker::Tick, 7);
        for n in (0..frames).step_by(37) {
            let sum: f64 = l.segments.iter().map(|s| weight(s, n)).sum();
            assert!((sum - 1.0).abs() < 1e-9, "frame {n}: {sum}");
        }
        for v in 0..3 {
            assert!(l.segments.iter().any(|s| s.variant == v));
        }
        for pair in l.segments.windows(2) {
            assert_ne!(pair[0].variant, pair[1].variant);
        }
    }

    #[test]
    fn silence_marker_leaves_a_gap() {
        let rate = 48_000;
        let l = layout(rate as usize * 12, rate, 4.0, 2, Marker::Silence, 1);
        let boundary = 4 * rate as usize;
        let sum: f64 = l.segments.iter().map(|s| weight(s, boundary)).sum();
        assert_eq!(sum, 0.0);
    }
}
