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
/// ln Cg.
const GRID_LN_CG: f64 = 2.292_635_762_140_377_7;

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
    /// Evaluated as Gg exp(xi (L(Cg Vgk) - ln Cg)) + Ig0 with L = ln softplus from `fastmath::ln_softplus`.
    #[inline]
    pub fn grid_current(vgk: f64) -> (f64, f64) {
        Self::grid_current_in(fastmath::LnSoftplus::get(), vgk)
    }

    #[inline(always)]
    fn grid_current_in(table: fastmath::LnSoftplus, vgk: f64) -> (f64, f64) {
        let (l, dl) = fastmath::ln_softplus_in(table, GRID_CG * vgk);
        let powed = fastmath::exp(GRID_XI * (l - GRID_LN_CG));
        (
            GRID_GG * powed + GRID_IG0,
            GRID_GG * GRID_XI * GRID_CG * powed * dl,
        )
    }

    /// Plate and grid currents with their derivatives.
    #[inline]
    pub fn currents(&self, vpk: f64, vgk: f64) -> TriodeCurrents {
        let table = fastmath::LnSoftplus::get();
        let (grid, grid_dvgk) = Self::grid_current_in(table, vgk);
        let mut out = TriodeCurrents {
            grid,
            grid_dvgk,
            ..Default::default()
        };
        if vpk <= 0.0 {
            return out;
        }
        // ln E1 = ln(Vpk / kp) + L(z) with L = ln softplus (tabulated), so Ip = (2 / kg1) exp(ex ln E1).
        let inv_root = 1.0 / (self.kvb + vpk * vpk).sqrt();
        let z = self.kp * (1.0 / self.mu + vgk * inv_root);
        let (l, dl) = fastmath::ln_softplus_in(table, z);
        let plate = 2.0 / self.kg1 * fastmath::exp(self.ex * (fastmath::ln(vpk / self.kp) + l));
        out.plate = plate;
        // d ln E1 / dVgk = L'(z) kp / root; d ln E1 / dVpk = 1 / Vpk - L'(z) kp Vgk Vpk / root^3.
        let k = self.ex * plate;
        let dz_dvgk = self.kp * inv_root;
        out.plate_dvgk = k * dl * dz_dvgk;
        out.plate_dvpk = k * (1.0 / vpk - dl * dz_dvgk * vgk * vpk * inv_root * inv_root);
        out
    }
}
