//! The built-in response, used when no impulse response is loaded: our own synthetic speaker-in-a-box
//! shape, generated at the session rate, not a copy of any product's or any measured speaker's response.
//!
//! It is the impulse response of a cascade of seven second-order sections (the biquads of R. Bristow-Johnson's
//! "Cookbook formulae for audio EQ biquad filter coefficients", bilinear transform with the centre frequency
//! prewarped, so each section's frequency is exact at any session rate):
//!
//! | # | section   | frequency | Q     | gain   | why |
//! |---|-----------|-----------|-------|--------|-----|
//! | 1 | high-pass | 80 Hz     | 1.1   |        | a closed box: the cone's resonance on the air spring; 12 dB/octave below it, a little peaked (Q above 0.707) as a small sealed box is |
//! | 2 | peaking   | 100 Hz    | 1.4   | +4 dB  | the low "thump" near 100 Hz, where a guitar's low E (82 Hz) and its second harmonic sit |
//! | 3 | peaking   | 550 Hz    | 0.8   | -2 dB  | a mild low-mid dip, so the low resonance and the presence rise stand out |
//! | 4 | peaking   | 2.5 kHz   | 1.4   | +6 dB  | the presence rise of a cone whose stiff centre still moves as a piston at 2-3 kHz |
//! | 5 | low-pass  | 5.2 kHz   | 0.518 |        | with 6 and 7 a sixth-order Butterworth low-pass (Q values 1/(2 sin((2k-1) pi/12))): |
//! | 6 | low-pass  | 5.2 kHz   | 0.707 |        | the steep (36 dB/octave) fall above about 5 kHz of a large cone breaking up, |
//! | 7 | low-pass  | 5.2 kHz   | 1.932 |        | which keeps the clamp's upper harmonics from sounding like fizz |
//!
//! Measured on this cascade (magnitude relative to 1 kHz, by FFT in `dsp/tests/cabinet.rs`, which checks the
//! stated bounds at 44.1, 48 and 96 kHz): +6.0 dB at 101 Hz, +6.1 dB at most in 2-3 kHz, at most -25 dB in
//! 8-10 kHz (-23 dB at 96 kHz) and at most -40 dB from 10 kHz up (-35 dB at 96 kHz, where the bilinear
//! transform's zero at Nyquist is further away). Stated bounds: the low peak lies in 80-130 Hz and is at least
//! 4 dB above 1 kHz, the 2-3 kHz rise is at least 4 dB above 1 kHz, 8-10 kHz is at least 20 dB and everything
//! from 10 kHz up at least 30 dB below 1 kHz.
//!
//! Every section is stable (poles inside the unit circle) and minimum phase: the high-pass's zeros are the
//! double zero at z = 1 and the low-passes' at z = -1 (on the circle, which a minimum-phase response may have),
//! and a peaking section's zeros have radius sqrt(|1 - alpha A| / (1 + alpha A)) < 1. A cascade of
//! minimum-phase sections is minimum phase, so the response's energy comes as early as its magnitude allows.
//!
//! The impulse response is computed until it has stayed below -90 dB of its peak, then ends with a 2 ms
//! raised-cosine fade over samples already below that level, so truncation changes nothing audible.

/// Kind of a second-order section.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum SectionKind {
    HighPass,
    Peaking { gain_db: f64 },
    LowPass,
}

/// One section of the built-in response's cascade.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Section {
    pub kind: SectionKind,
    pub hz: f64,
    pub q: f64,
}

/// The cascade (see the module's table for why each section is there).
pub const SECTIONS: [Section; 7] = [
    Section {
        kind: SectionKind::HighPass,
        hz: 80.0,
        q: 1.1,
    },
    Section {
        kind: SectionKind::Peaking { gain_db: 4.0 },
        hz: 100.0,
        q: 1.4,
    },
    Section {
        kind: SectionKind::Peaking { gain_db: -2.0 },
        hz: 550.0,
        q: 0.8,
    },
    Section {
        kind: SectionKind::Peaking { gain_db: 6.0 },
        hz: 2_500.0,
        q: 1.4,
    },
    Section {
        kind: SectionKind::LowPass,
        hz: 5_200.0,
        q: 0.517_638,
    },
    Section {
        kind: SectionKind::LowPass,
        hz: 5_200.0,
        q: std::f64::consts::FRAC_1_SQRT_2,
    },
    Section {
        kind: SectionKind::LowPass,
        hz: 5_200.0,
        q: 1.931_852,
    },
];

/// Level below the peak after which the response is cut (dB).
pub const TRUNCATION_DB: f64 = -90.0;
/// Length of the closing fade (s).
pub const FADE_SECONDS: f64 = 0.002;
/// Longest the response is computed for before truncation (s); it is far below -90 dB long before.
const MAX_SECONDS: f64 = 0.5;

/// Normalised coefficients `[b0, b1, b2, a1, a2]` (a0 = 1) of a section at `rate`.
pub fn coefficients(section: &Section, rate: f64) -> [f64; 5] {
    let w = std::f64::consts::TAU * section.hz / rate;
    let (s, c) = w.sin_cos();
    let alpha = s / (2.0 * section.q);
    let (b, a) = match section.kind {
        SectionKind::HighPass => (
            [(1.0 + c) / 2.0, -(1.0 + c), (1.0 + c) / 2.0],
            [1.0 + alpha, -2.0 * c, 1.0 - alpha],
        ),
        SectionKind::LowPass => (
            [(1.0 - c) / 2.0, 1.0 - c, (1.0 - c) / 2.0],
            [1.0 + alpha, -2.0 * c, 1.0 - alpha],
        ),
        SectionKind::Peaking { gain_db } => {
            let a = 10f64.powf(gain_db / 40.0);
            (
                [1.0 + alpha * a, -2.0 * c, 1.0 - alpha * a],
                [1.0 + alpha / a, -2.0 * c, 1.0 - alpha / a],
            )
        }
    };
    [
        b[0] / a[0],
        b[1] / a[0],
        b[2] / a[0],
        a[1] / a[0],
        a[2] / a[0],
    ]
}

/// The built-in response at `rate` (Hz), truncated and faded, not yet normalised (the cabinet normalises
/// it like any loaded response). Allocates; call off the audio thread.
pub fn response(rate: f64) -> Vec<f64> {
    let n = (MAX_SECONDS * rate).ceil() as usize;
    let mut h = vec![0.0f64; n];
    if n == 0 {
        return h;
    }
    h[0] = 1.0;
    for section in &SECTIONS {
        let [b0, b1, b2, a1, a2] = coefficients(section, rate);
        // Transposed direct form II, in place.
        let (mut s1, mut s2) = (0.0f64, 0.0f64);
        for v in h.iter_mut() {
            let x = *v;
            let y = b0 * x + s1;
            s1 = b1 * x - a1 * y + s2;
            s2 = b2 * x - a2 * y;
            *v = y;
        }
    }
    let peak = h.iter().fold(0.0f64, |m, v| m.max(v.abs()));
    let floor = peak * 10f64.powf(TRUNCATION_DB / 20.0);
    let last_loud = h.iter().rposition(|v| v.abs() > floor).unwrap_or(0);
    let fade = ((FADE_SECONDS * rate).round() as usize).max(1);
    let end = (last_loud + 1 + fade).min(n);
    h.truncate(end);
    for (i, v) in h[last_loud + 1..].iter_mut().enumerate() {
        // Raised cosine from 1 down towards 0 over `fade` samples.
        let t = (i + 1) as f64 / (fade + 1) as f64;
        *v *= 0.5 * (1.0 + (std::f64::consts::PI * t).cos());
    }
    h
}
