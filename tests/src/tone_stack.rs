//! Closed-form response of the passive three-knob tone stack (docs/model.md section 3.1), the test-side
//! reference the stack built from components in the model is checked against.
//!
//! Source: D. T. Yeh and J. O. Smith, "Discretization of the '59 Fender Bassman tone stack", Proc. DAFx-06,
//! Montreal, 2006: the third-order continuous-time transfer function of the stack driven by an ideal source and
//! unloaded,
//!
//!   H(s) = (b1 s + b2 s^2 + b3 s^3) / (a0 + a1 s + a2 s^2 + a3 s^3),
//!
//! with every coefficient a polynomial in the component values and the three pot positions t (treble),
//! m (middle), l (bass), each 0..1. The coefficients below are written out term by term in the paper's order
//! and names (C1, C2, C3, R1..R4). They were typed from memory of the paper's coefficient list [memory]: the
//! stored copies at hand showed only the paper's first page. The transcription is confirmed independently:
//! `tests/tests/tone_stack_reference.rs` holds it to ngspice AC analyses of the network of docs/model.md
//! section 3.1 at fourteen settings (two part sets, seven knob settings), where the two agree within 3e-6 dB
//! (the 1e12 ohm "open" output of the netlists accounts for that much). A wrong sign or a missing term would
//! show as a mismatch at one of those settings.
//!
//! The paper's circuit in Breakdown's names (docs/model.md section 3.1):
//!
//! | paper | Breakdown | where |
//! |---|---|---|
//! | C1 | `treble_cap` | input to the treble pot's top lug |
//! | C2 | `bass_cap` | slope node to the treble pot's bottom lug (= the bass pot's top lug and wiper) |
//! | C3 | `middle_cap` | slope node to the middle pot's wiper |
//! | R1, t | `treble_pot`, y(treble) | full pot: t R1 wiper to bottom lug, (1 - t) R1 top lug to wiper; output = wiper |
//! | R2, l | `bass_pot`, y(bass) | variable resistor l R2 from the treble pot's bottom lug to the middle pot's top lug |
//! | R3, m | `middle_pot`, y(middle) | full pot: m R3 wiper to ground, (1 - m) R3 top lug to wiper |
//! | R4 | `slope_resistor` | input to the slope node |

use realfft::num_complex::Complex;
use std::f64::consts::PI;

/// Smallest resistance of either leg of a pot (ohm), docs/model.md section 3.
pub const POT_END_RESISTANCE: f64 = 1.0;

/// Component values in the paper's names (farad, ohm).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PaperParts {
    pub c1: f64,
    pub c2: f64,
    pub c3: f64,
    pub r1: f64,
    pub r2: f64,
    pub r3: f64,
    pub r4: f64,
}

/// Pot positions in the paper's names: the share of each pot's track on the side the paper scales
/// (t R1 treble wiper to bottom lug, l R2 bass, m R3 middle wiper to ground), each 0..1.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PaperControls {
    pub t: f64,
    pub m: f64,
    pub l: f64,
}

/// Continuous-time coefficients: `b[k]` and `a[k]` multiply s^k (b[0] is 0: the stack blocks DC).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Coefficients {
    pub b: [f64; 4],
    pub a: [f64; 4],
}

impl Coefficients {
    /// Yeh and Smith's coefficients, term by term as in the paper.
    pub fn new(p: &PaperParts, k: &PaperControls) -> Coefficients {
        let PaperParts {
            c1,
            c2,
            c3,
            r1,
            r2,
            r3,
            r4,
        } = *p;
        let PaperControls { t, m, l } = *k;

        let b1 = t * c1 * r1 + m * c3 * r3 + l * (c1 * r2 + c2 * r2) + (c1 * r3 + c2 * r3);
        let b2 = t * (c1 * c2 * r1 * r4 + c1 * c3 * r1 * r4)
            - m * m * (c1 * c3 * r3 * r3 + c2 * c3 * r3 * r3)
            + m * (c1 * c3 * r1 * r3 + c1 * c3 * r3 * r3 + c2 * c3 * r3 * r3)
            + l * (c1 * c2 * r1 * r2 + c1 * c2 * r2 * r4 + c1 * c3 * r2 * r4)
            + l * m * (c1 * c3 * r2 * r3 + c2 * c3 * r2 * r3)
            + (c1 * c2 * r1 * r3 + c1 * c2 * r3 * r4 + c1 * c3 * r3 * r4);
        let b3 = l * m * (c1 * c2 * c3 * r1 * r2 * r3 + c1 * c2 * c3 * r2 * r3 * r4)
            - m * m * (c1 * c2 * c3 * r1 * r3 * r3 + c1 * c2 * c3 * r3 * r3 * r4)
            + m * (c1 * c2 * c3 * r1 * r3 * r3 + c1 * c2 * c3 * r3 * r3 * r4)
            + t * c1 * c2 * c3 * r1 * r3 * r4
            - t * m * c1 * c2 * c3 * r1 * r3 * r4
            + t * l * c1 * c2 * c3 * r1 * r2 * r4;

        let a0 = 1.0;
        let a1 = (c1 * r1 + c1 * r3 + c2 * r3 + c2 * r4 + c3 * r4)
            + m * c3 * r3
            + l * (c1 * r2 + c2 * r2);
        let a2 = m
            * (c1 * c3 * r1 * r3 - c2 * c3 * r3 * r4 + c1 * c3 * r3 * r3 + c2 * c3 * r3 * r3)
            + l * m * (c1 * c3 * r2 * r3 + c2 * c3 * r2 * r3)
            - m * m * (c1 * c3 * r3 * r3 + c2 * c3 * r3 * r3)
            + l * (c1 * c2 * r2 * r4 + c1 * c2 * r1 * r2 + c1 * c3 * r2 * r4 + c2 * c3 * r2 * r4)
            + (c1 * c2 * r1 * r4
                + c1 * c3 * r1 * r4
                + c1 * c2 * r3 * r4
                + c1 * c2 * r1 * r3
                + c1 * c3 * r3 * r4
                + c2 * c3 * r3 * r4);
        let a3 = l * m * (c1 * c2 * c3 * r1 * r2 * r3 + c1 * c2 * c3 * r2 * r3 * r4)
            - m * m * (c1 * c2 * c3 * r1 * r3 * r3 + c1 * c2 * c3 * r3 * r3 * r4)
            + m * (c1 * c2 * c3 * r3 * r3 * r4 + c1 * c2 * c3 * r1 * r3 * r3
                - c1 * c2 * c3 * r1 * r3 * r4)
            + l * c1 * c2 * c3 * r1 * r2 * r4
            + c1 * c2 * c3 * r1 * r3 * r4;

        Coefficients {
            b: [0.0, b1, b2, b3],
            a: [a0, a1, a2, a3],
        }
    }

    /// H(j 2 pi f): output volts at the treble wiper per input volt.
    pub fn response(&self, freq: f64) -> Complex<f64> {
        let s = Complex::new(0.0, 2.0 * PI * freq);
        let poly = |c: &[f64; 4]| ((Complex::from(c[3]) * s + c[2]) * s + c[1]) * s + c[0];
        poly(&self.b) / poly(&self.a)
    }
}

/// H(j 2 pi f) of the unloaded stack driven by an ideal source.
pub fn response(p: &PaperParts, k: &PaperControls, freq: f64) -> Complex<f64> {
    Coefficients::new(p, k).response(freq)
}

/// 20 log10 |H(j 2 pi f)|.
pub fn magnitude_db(p: &PaperParts, k: &PaperControls, freq: f64) -> f64 {
    20.0 * response(p, k, freq).norm().log10()
}

/// Pot taper (docs/model.md section 3), typed again here rather than taken from the model.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Law {
    /// y = x.
    Linear,
    /// y = (81^x - 1) / 80 [common practice].
    Log,
}

impl Law {
    /// Share of the track below the wiper at rotation `x` (0..1).
    pub fn fraction(self, x: f64) -> f64 {
        match self {
            Law::Linear => x,
            Law::Log => (81f64.powf(x) - 1.0) / 80.0,
        }
    }

    /// "linear" or "log", as in the circuit file.
    pub fn parse(name: &str) -> Option<Law> {
        match name {
            "linear" => Some(Law::Linear),
            "log" => Some(Law::Log),
            _ => None,
        }
    }
}

/// A pot: total resistance (ohm) and taper.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Pot {
    pub resistance: f64,
    pub law: Law,
}

impl Pot {
    /// (top lug to wiper, wiper to bottom lug) = (R (1 - y), R y), each at least 1 ohm (docs/model.md section 3).
    pub fn legs(&self, x: f64) -> (f64, f64) {
        let y = self.law.fraction(x);
        (
            (self.resistance * (1.0 - y)).max(POT_END_RESISTANCE),
            (self.resistance * y).max(POT_END_RESISTANCE),
        )
    }
}

/// The stack under Breakdown's `[tone_stack]` keys (docs/model.md section 5), without the load.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Stack {
    pub slope_resistor: f64,
    pub treble_cap: f64,
    pub bass_cap: f64,
    pub middle_cap: f64,
    pub treble_pot: Pot,
    pub bass_pot: Pot,
    pub middle_pot: Pot,
}

/// Resistance of every pot leg in the stack's circuit at one knob setting (ohm).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct StackLegs {
    pub treble_top_leg: f64,
    pub treble_bottom_leg: f64,
    /// The bass pot's wiper-to-bottom leg R y: its top lug and wiper are joined, so this is all of it.
    pub bass_leg: f64,
    pub middle_top_leg: f64,
    pub middle_bottom_leg: f64,
}

impl Stack {
    /// Pot legs at knob rotations `treble`, `middle`, `bass` (0..1).
    pub fn legs(&self, treble: f64, middle: f64, bass: f64) -> StackLegs {
        let (treble_top_leg, treble_bottom_leg) = self.treble_pot.legs(treble);
        let (_, bass_leg) = self.bass_pot.legs(bass);
        let (middle_top_leg, middle_bottom_leg) = self.middle_pot.legs(middle);
        StackLegs {
            treble_top_leg,
            treble_bottom_leg,
            bass_leg,
            middle_top_leg,
            middle_bottom_leg,
        }
    }

    /// The paper's parts and controls that put exactly these legs in its circuit: R1 = the treble legs' sum,
    /// t = bottom leg / R1; R3 and m likewise for the middle pot; R2 = the bass pot's resistance,
    /// l = bass leg / R2 (l enters the coefficients only as l R2). Away from the 1 ohm floor this is
    /// t = y(treble), m = y(middle), l = y(bass) with the pots' own resistances.
    pub fn paper(&self, treble: f64, middle: f64, bass: f64) -> (PaperParts, PaperControls) {
        let legs = self.legs(treble, middle, bass);
        let r1 = legs.treble_top_leg + legs.treble_bottom_leg;
        let r3 = legs.middle_top_leg + legs.middle_bottom_leg;
        let r2 = self.bass_pot.resistance;
        (
            PaperParts {
                c1: self.treble_cap,
                c2: self.bass_cap,
                c3: self.middle_cap,
                r1,
                r2,
                r3,
                r4: self.slope_resistor,
            },
            PaperControls {
                t: legs.treble_bottom_leg / r1,
                m: legs.middle_bottom_leg / r3,
                l: legs.bass_leg / r2,
            },
        )
    }

    /// H(j 2 pi f) of this stack, unloaded and driven by an ideal source, at the given knob rotations.
    pub fn response(&self, treble: f64, middle: f64, bass: f64, freq: f64) -> Complex<f64> {
        let (p, k) = self.paper(treble, middle, bass);
        response(&p, &k, freq)
    }
}
