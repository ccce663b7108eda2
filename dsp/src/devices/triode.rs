//! Triode: Koren plate current plus Dempwolf-Zoelzer grid current.

use crate::fastmath;
use serde::{Deserialize, Serialize};

/// Valve types with published (or stated) Koren parameter sets.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum TubeType {
    #[serde(rename = "12AX7")]
    Ax7,
    #[serde(rename = "12AT7")]
    At7,
    #[serde(rename = "12AU7")]
    Au7,
}

impl TubeType {
    /// Trade name of the valve.
    pub fn name(self) -> &'static str {
        match self {
            TubeType::Ax7 => "12AX7",
            TubeType::At7 => "12AT7",
            TubeType::Au7 => "12AU7",
        }
    }

    /// Koren 1996 parameter set for this type.
    pub fn triode(self) -> Triode {
        match self {
            // N. Koren, "Improved vacuum tube models for SPICE simulations", Glass Audio 8(5), 1996.
            TubeType::Ax7 => Triode::koren(100.0, 1.4, 1060.0, 600.0, 300.0),
            // Same author's 12AT7 and 12AU7 sets (from memory, see BRIEF section 4).
            TubeType::At7 => Triode::koren(60.0, 1.35, 460.0, 300.0, 300.0),
            TubeType::Au7 => Triode::koren(21.5, 1.3, 1180.0, 84.0, 300.0),
        }
    }
}

/// Grid current parameters of Dempwolf and Zoelzer, "A physically-motivated triode model for circuit
/// simulations", DAFx-11 (their 12AX7 set, used for every type until per-type values are sourced).
const GRID_GG: f64 = 6.177e-4;
const GRID_XI: f64 = 1.314;
const GRID_CG: f64 = 9.901;
const GRID_IG0: f64 = 8.025e-8;

/// Currents of one triode and their partial derivatives at an operating point.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct TriodeCurrents {
    /// Plate current, plate to cathode (A).
    pub plate: f64,
    /// d plate / d Vpk (S).
    pub plate_dvpk: f64,
    /// d plate / d Vgk (S).
    pub plate_dvgk: f64,
    /// Grid current, grid to cathode (A).
    pub grid: f64,
    /// d grid / d Vgk (S).
    pub grid_dvgk: f64,
}

/// Triode, Ip = 2 E1^ex / kg1 with E1 = (Vpk/kp) ln(1 + exp(kp (1/mu + Vgk / sqrt(kvb + Vpk^2)))) (Koren 1996).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Triode {
    pub mu: f64,
    pub ex: f64,
    pub kg1: f64,
    pub kp: f64,
    pub kvb: f64,
}

impl Triode {
    pub const fn koren(mu: f64, ex: f64, kg1: f64, kp: f64, kvb: f64) -> Self {
        Triode {
            mu,
            ex,
            kg1,
            kp,
            kvb,
        }
    }

    /// Plate current only (A), for readouts and tests.
    pub fn plate_current(&self, vpk: f64, vgk: f64) -> f64 {
        self.currents(vpk, vgk).plate
    }

    /// Grid current Ig = Gg (ln(1 + exp(Cg Vgk)) / Cg)^xi + Ig0 (Dempwolf and Zoelzer, DAFx-11), and dIg/dVgk.
    #[inline]
    pub fn grid_current(vgk: f64) -> (f64, f64) {
        let z = GRID_CG * vgk;
        if z < -10.0 {
            // Far below conduction ln(1 + e^z) = e^z to 2e-5 relative, so the power needs one exponential;
            // the current here is below 1e-12 A.
            let powed = fastmath::exp(GRID_XI * (z - GRID_CG.ln()));
            return (
                GRID_GG * powed + GRID_IG0,
                GRID_GG * GRID_XI * powed * GRID_CG,
            );
        }
        let (sp, sigma) = fastmath::softplus_logistic(z);
        let base = sp / GRID_CG;
        let powed = fastmath::powf(base, GRID_XI);
        let current = GRID_GG * powed + GRID_IG0;
        let slope = GRID_GG * GRID_XI * powed / base * sigma;
        (current, slope)
    }

    /// Plate and grid currents with their derivatives.
    #[inline]
    pub fn currents(&self, vpk: f64, vgk: f64) -> TriodeCurrents {
        let (grid, grid_dvgk) = Self::grid_current(vgk);
        let mut out = TriodeCurrents {
            grid,
            grid_dvgk,
            ..Default::default()
        };
        if vpk <= 0.0 {
            return out;
        }
        let root = (self.kvb + vpk * vpk).sqrt();
        let z = self.kp * (1.0 / self.mu + vgk / root);
        let (sp, sigma) = fastmath::softplus_logistic(z);
        let e1 = vpk / self.kp * sp;
        if e1 <= 0.0 {
            return out;
        }
        let powed = fastmath::powf(e1, self.ex);
        out.plate = 2.0 * powed / self.kg1;
        let dip_de1 = 2.0 * self.ex * powed / (e1 * self.kg1);
        let de1_dvgk = vpk * sigma / root;
        let de1_dvpk = sp / self.kp - vpk * vpk * vgk * sigma / (root * root * root);
        out.plate_dvgk = dip_de1 * de1_dvgk;
        out.plate_dvpk = dip_de1 * de1_dvpk;
        out
    }
}
