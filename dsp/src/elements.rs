//! The linear parts of the circuit, one small type per kind, each with its defining formula. Every part joins two
//! (a pot: three) terminals; a terminal is a node the solver finds the voltage of, ground, or a source whose
//! voltage is given (a supply rail, the input jack). Each kind adds its own terms to the node equations
//! (`stamp`): a conductance between its terminals and, for a capacitor, a current from its history.

use crate::pot::PotLaw;

/// Where a part's lead goes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Terminal {
    Ground,
    /// A node of the circuit, by its index in the node list (one Newton unknown each).
    Node(usize),
    /// A given voltage: a supply rail or the input jack, by its index in the source list.
    Source(usize),
}

impl Terminal {
    /// The node index, when the terminal is a node.
    pub fn node(self) -> Option<usize> {
        match self {
            Terminal::Node(i) => Some(i),
            _ => None,
        }
    }
}

/// Resistor: i = (v_a - v_b) / R (Ohm's law), a conductance G = 1/R between its terminals.
#[derive(Clone, Debug, PartialEq)]
pub struct Resistor {
    pub name: String,
    pub a: Terminal,
    pub b: Terminal,
    /// R (ohm).
    pub resistance: f64,
}

/// Capacitor: i = C dv/dt, discretised by the trapezoidal rule (the bilinear transform):
/// i[n] = G (v[n] - v[n-1]) - i[n-1] with G = 2 C / T, which is a conductance G in parallel with a current
/// h[n] = G v[n-1] + i[n-1] from its history (h[n+1] = 2 G v[n] - h[n]). Open at DC (G = 0).
#[derive(Clone, Debug, PartialEq)]
pub struct Capacitor {
    pub name: String,
    pub a: Terminal,
    pub b: Terminal,
    /// C (F).
    pub capacitance: f64,
}

impl Capacitor {
    /// G = 2 C / T for sample period `period` (s), or 0 (open) for the DC operating point.
    pub fn conductance(&self, period: Option<f64>) -> f64 {
        match period {
            Some(t) => 2.0 * self.capacitance / t,
            None => 0.0,
        }
    }
}

/// The settings a pot can follow.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Knob {
    Gain,
    Level,
    Treble,
    Middle,
    Bass,
}

impl Knob {
    pub const ALL: [Knob; 5] = [
        Knob::Gain,
        Knob::Level,
        Knob::Treble,
        Knob::Middle,
        Knob::Bass,
    ];

    /// The setting's name in circuit files, plans and `--set`.
    pub fn name(self) -> &'static str {
        match self {
            Knob::Gain => "gain",
            Knob::Level => "level",
            Knob::Treble => "treble",
            Knob::Middle => "middle",
            Knob::Bass => "bass",
        }
    }

    pub fn index(self) -> usize {
        self as usize
    }
}

/// Potentiometer: a track of resistance R with a wiper at rotation x; the law y(x) gives the share of the track
/// below the wiper, so the pot is R (1 - y) from the top lug to the wiper and R y from the wiper to the bottom lug
/// (each at least `POT_END_RESISTANCE`, the end resistance of a real track). Wired as a variable resistor, one of
/// the lugs is simply left open (`top` or `bottom` None).
#[derive(Clone, Debug, PartialEq)]
pub struct Pot {
    pub name: String,
    pub top: Option<Terminal>,
    pub wiper: Terminal,
    pub bottom: Option<Terminal>,
    /// R (ohm).
    pub resistance: f64,
    pub law: PotLaw,
    /// The setting that turns it, or None for a pot that stays where it is set.
    pub knob: Option<Knob>,
    /// Rotation 0..1.
    pub rotation: f64,
}

impl Pot {
    /// (top leg, bottom leg) resistances at the pot's rotation.
    pub fn legs(&self) -> (f64, f64) {
        self.law.legs(self.resistance, self.rotation)
    }
}

/// Adds conductances and given currents to node equations written as "current leaving each node".
pub trait Stamper {
    /// A conductance `g` between two terminals.
    fn conductance(&mut self, a: Terminal, b: Terminal, g: f64);
}

impl Resistor {
    pub fn stamp(&self, s: &mut impl Stamper) {
        s.conductance(self.a, self.b, 1.0 / self.resistance);
    }
}

impl Capacitor {
    pub fn stamp(&self, s: &mut impl Stamper, period: Option<f64>) {
        s.conductance(self.a, self.b, self.conductance(period));
    }
}

impl Pot {
    pub fn stamp(&self, s: &mut impl Stamper) {
        let (top, bottom) = self.legs();
        if let Some(t) = self.top {
            s.conductance(t, self.wiper, 1.0 / top);
        }
        if let Some(b) = self.bottom {
            s.conductance(self.wiper, b, 1.0 / bottom);
        }
    }
}
