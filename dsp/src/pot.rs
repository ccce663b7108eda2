//! Potentiometers: taper laws and the split of the track at the wiper.

use serde::{Deserialize, Serialize};

/// Smallest resistance of either leg of a pot (ohm): real tracks have a few ohms of end resistance, and a
/// zero-ohm leg would be an infinite conductance in the network.
pub const POT_END_RESISTANCE: f64 = 1.0;

/// Taper of a pot track.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum PotLaw {
    /// y = x.
    Linear,
    /// y = (81^x - 1) / 80: 10% at mid-travel (docs/model.md section 3).
    Log,
}

impl PotLaw {
    /// Fraction of the track below the wiper for a rotation `x` in 0..1.
    pub fn fraction(self, x: f64) -> f64 {
        let x = x.clamp(0.0, 1.0);
        match self {
            PotLaw::Linear => x,
            PotLaw::Log => (81f64.powf(x) - 1.0) / 80.0,
        }
    }

    /// Resistances (top leg, bottom leg) of a pot of `total` ohms at rotation `x`: R(1-y) and R y.
    pub fn legs(self, total: f64, x: f64) -> (f64, f64) {
        let y = self.fraction(x);
        (
            (total * (1.0 - y)).max(POT_END_RESISTANCE),
            (total * y).max(POT_END_RESISTANCE),
        )
    }
}
