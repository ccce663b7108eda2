//! Triode: Koren plate current plus Dempwolf-Zoelzer grid current.
//!
//! The plate current factors as Ip = A(Vpk) S(z), with A = (2 / kg1) (Vpk / kp)^ex, S = softplus(z)^ex and
//! z = kp / mu + kp Vgk Q(Vpk), Q = 1 / sqrt(kvb + Vpk^2). A and S are read from quintic Hermite tables
//! built when the `Triode` is made (value, first and second derivative exact at every node, so the
//! interpolant and its derivative are continuous and the Newton solver sees a smooth model; the derivatives
//! returned are those of the interpolant). Q is computed directly: an error in Q reaches z multiplied by
//! |z - kp/mu| (up to about 20 where current flows), so a table for it would need more points than one
//! square root and one division cost. The grid current is the same softplus power, one table for all valves.
//! Outside the tables the closed forms are evaluated as before.
//!
//! Quintic rather than cubic segments: the device tests hold the model to 1e-9 of the published equations.
//! A cubic Hermite segment's error is at most h^4/384 max|f|; for S, max|S|/S = ex^4 (3.8 for
//! ex = 1.4), so 1e-10 needs h <= 0.01 and 5800 segments over the range below (370 KB per table). The error
//! of a two-point quintic Hermite segment of width h is at most h^6/46080 max|f^(6)| (the 6! (h/2)^6 bound of
//! Hermite interpolation with three conditions at each end), which reaches 5.5e-11 with h = 1/12.
//! Memory: 67 KB for the grid table, 67 + 21 KB for each distinct Koren set in use.

use crate::arith::{Arith, Separate};
use crate::fastmath;
use serde::{Deserialize, Serialize};
use std::sync::{Mutex, OnceLock, PoisonError};

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

/// One quintic Hermite segment, stored as the pairs (c5, e4), (c4, e3), ..., (c1, e0) and c0, where
/// p(t) = c0 + c1 t + ... + c5 t^5 on t in [0, 1] and e0 + e1 t + ... + e4 t^4 = dp/dx, the slope per unit of
/// the tabulated variable x = x0 + h t (times a constant factor folded in). Value and slope run through one
/// Horner loop over the pairs, which the compiler turns into packed arithmetic.
#[derive(Clone, Copy, Debug)]
#[repr(C, align(16))]
struct Segment {
    pairs: [[f64; 2]; 5],
    c0: f64,
}

impl Segment {
    /// The segment of width `h` taking (value, first, second derivative) `start` at its start and `end`
    /// at its end (derivatives per unit of x), with its slope multiplied by `slope_scale` and `offset` added
    /// to its value.
    fn hermite(start: [f64; 3], end: [f64; 3], h: f64, slope_scale: f64, offset: f64) -> Segment {
        let [y0, d0, s0] = start;
        let [y1, d1, s1] = end;
        let (m0, m1) = (d0 * h, d1 * h);
        let (a0, a1) = (s0 * h * h, s1 * h * h);
        let dy = y1 - y0;
        let c = [
            y0,
            m0,
            0.5 * a0,
            10.0 * dy - 6.0 * m0 - 4.0 * m1 - 0.5 * (3.0 * a0 - a1),
            -15.0 * dy + 8.0 * m0 + 7.0 * m1 + 0.5 * (3.0 * a0 - 2.0 * a1),
            6.0 * dy - 3.0 * m0 - 3.0 * m1 - 0.5 * (a0 - a1),
        ];
        let e = |k: usize| (k + 1) as f64 * c[k + 1] * slope_scale / h;
        Segment {
            pairs: [
                [c[5], e(4)],
                [c[4], e(3)],
                [c[3], e(2)],
                [c[2], e(1)],
                [c[1], e(0)],
            ],
            c0: c[0] + offset,
        }
    }

    /// (p(t), dp/dx) with `A`'s multiply-add: on x86-64 the packed evaluation, with packed fused multiply-adds
    /// for the fused copy; elsewhere the portable one.
    #[inline(always)]
    fn eval_as<A: Arith>(&self, t: f64) -> (f64, f64) {
        #[cfg(target_arch = "x86_64")]
        {
            if !A::FUSED {
                return self.eval(t);
            }
            // SAFETY: the fused copy runs only where the processor has FMA (`arith::fused_available`), inlined
            // into code compiled for it; each load reads the two f64 of one 16-byte aligned pair.
            unsafe {
                use std::arch::x86_64::{
                    _mm_cvtsd_f64, _mm_fmadd_pd, _mm_load_pd, _mm_mul_pd, _mm_set1_pd,
                    _mm_unpackhi_pd,
                };
                let tt = _mm_set1_pd(t);
                let t2 = _mm_mul_pd(tt, tt);
                let p = |k: usize| _mm_load_pd(self.pairs[k].as_ptr());
                let low = _mm_fmadd_pd(p(3), tt, p(4));
                let high = _mm_fmadd_pd(p(1), tt, p(2));
                let acc = _mm_fmadd_pd(t2, _mm_fmadd_pd(t2, p(0), high), low);
                (
                    A::madd(_mm_cvtsd_f64(acc), t, self.c0),
                    _mm_cvtsd_f64(_mm_unpackhi_pd(acc, acc)),
                )
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            self.eval_portable::<A>(t)
        }
    }

    /// (p(t), dp/dx), one lane at a time, with `A`'s multiply-add.
    #[cfg_attr(target_arch = "x86_64", allow(dead_code))]
    #[inline(always)]
    fn eval_portable<A: Arith>(&self, t: f64) -> (f64, f64) {
        // Estrin's scheme: (P4 + P3 t) + t^2 ((P2 + P1 t) + t^2 P0), a shorter chain than Horner's.
        let t2 = t * t;
        let mut acc = [0.0; 2];
        for (j, acc) in acc.iter_mut().enumerate() {
            let p = |k: usize| self.pairs[k][j];
            let low = A::madd(p(3), t, p(4));
            let high = A::madd(p(1), t, p(2));
            *acc = A::madd(t2, A::madd(t2, p(0), high), low);
        }
        (A::madd(acc[0], t, self.c0), acc[1])
    }

    /// (p(t), dp/dx): the same operations in the same order as the portable version, two lanes at a time.
    #[cfg(target_arch = "x86_64")]
    #[inline(always)]
    fn eval(&self, t: f64) -> (f64, f64) {
        use std::arch::x86_64::{
            _mm_add_pd, _mm_cvtsd_f64, _mm_load_pd, _mm_mul_pd, _mm_set1_pd, _mm_unpackhi_pd,
        };
        // SAFETY: SSE2 is part of every x86-64 target; each load reads the two f64 of one pair, which is
        // 16-byte aligned (the struct is, and the pairs sit at multiples of 16 bytes from its start).
        unsafe {
            // Estrin's scheme: (P4 + P3 t) + t^2 ((P2 + P1 t) + t^2 P0), a shorter chain than Horner's.
            let tt = _mm_set1_pd(t);
            let t2 = _mm_mul_pd(tt, tt);
            let p = |k: usize| _mm_load_pd(self.pairs[k].as_ptr());
            let low = _mm_add_pd(p(4), _mm_mul_pd(p(3), tt));
            let high = _mm_add_pd(p(2), _mm_mul_pd(p(1), tt));
            let top = _mm_add_pd(high, _mm_mul_pd(t2, p(0)));
            let acc = _mm_add_pd(low, _mm_mul_pd(t2, top));
            let value = _mm_cvtsd_f64(acc) * t + self.c0;
            (value, _mm_cvtsd_f64(_mm_unpackhi_pd(acc, acc)))
        }
    }
}

/// softplus z = ln(1 + e^z), logistic z = 1 / (1 + e^-z) and 1 - logistic z, without cancellation.
fn softplus_std(z: f64) -> (f64, f64, f64) {
    let e = (-z.abs()).exp();
    if z > 0.0 {
        (z + e.ln_1p(), 1.0 / (1.0 + e), e / (1.0 + e))
    } else {
        (e.ln_1p(), e / (1.0 + e), 1.0 / (1.0 + e))
    }
}

/// Tabulated range of the softplus powers, in z (the plate's kp (1/mu + Vgk Q)) or x = Cg Vgk (the grid).
/// Below it the grid current is Ig0 to double precision (Gg Cg^-xi e^(xi x) < 3e-24 A, under half an ulp of
/// Ig0) and the plate's softplus power is evaluated in closed form, as it is above it.
const SP_START: f64 = -34.0;
const SP_END: f64 = 24.0;
/// Segments per unit of z. max|d^6 S / dz^6| / S = p^6, reached as z -> -inf (7.53 for p = 1.4, checked
/// numerically over the range), so the relative error is below (1/12)^6 / 46080 * 7.53 = 5.5e-11.
const SP_PER_UNIT: f64 = 12.0;
const SP_SEGMENTS: usize = ((SP_END - SP_START) * SP_PER_UNIT) as usize;

/// scale softplus(z)^power + offset on [SP_START, SP_END), indexed by pos = (z - SP_START) SP_PER_UNIT
/// (696 segments, 67 KB; built once and kept for the life of the program).
#[derive(Clone, Copy)]
struct SoftplusPowTable {
    segments: &'static [Segment; SP_SEGMENTS],
}

impl SoftplusPowTable {
    /// The table with its slope per unit of z multiplied by `slope_scale`.
    fn new(power: f64, scale: f64, slope_scale: f64, offset: f64) -> Self {
        let node = |k: usize| {
            let z = SP_START + k as f64 / SP_PER_UNIT;
            let (sp, logistic, complement) = softplus_std(z);
            let value = scale * sp.powf(power);
            // S' = p S logistic / sp; S'' = p (p - 1) S (logistic / sp)^2 + p S logistic (1 - logistic) / sp.
            let ratio = logistic / sp;
            let slope = power * value * ratio;
            let curve = power * (power - 1.0) * value * ratio * ratio + slope * complement;
            [value, slope, curve]
        };
        let h = 1.0 / SP_PER_UNIT;
        let segments: Vec<Segment> = (0..SP_SEGMENTS)
            .map(|k| Segment::hermite(node(k), node(k + 1), h, slope_scale, offset))
            .collect();
        let segments: Box<[Segment; SP_SEGMENTS]> = segments
            .into_boxed_slice()
            .try_into()
            .expect("segment count");
        SoftplusPowTable {
            segments: Box::leak(segments),
        }
    }

    /// (value, slope) at pos = (z - SP_START) SP_PER_UNIT inside the table; None outside it and for NaN.
    #[inline(always)]
    fn lookup<A: Arith>(self, pos: f64) -> Option<(f64, f64)> {
        const HALF: f64 = SP_SEGMENTS as f64 / 2.0;
        // False for NaN as well.
        let inside = (pos - HALF).abs() < HALF;
        if !inside {
            return None;
        }
        // floor(pos) by the round-to-nearest shift trick on pos - 1/2 (0 < pos < 2^31 here).
        const SHIFT: f64 = 6_755_399_441_055_744.0;
        let shifted = (pos - 0.5) + SHIFT;
        let idx = (shifted.to_bits() as u32 as usize).min(SP_SEGMENTS - 1);
        let t = pos - (shifted - SHIFT);
        Some(self.segments[idx].eval_as::<A>(t))
    }
}

/// Octaves of Vpk covered by the A table: [2^A_LOG2_LO, 2^A_LOG2_HI) V = [1/16, 1024) V.
const A_LOG2_LO: i64 = -4;
const A_LOG2_HI: i64 = 10;
/// 2^A_BITS segments per octave, indexed by the exponent and the top A_BITS mantissa bits of Vpk, so a
/// segment starting at V0 has width V0 / 16 or less. |A^(6)| = |ex (ex-1) ... (ex-5)| A / Vpk^6, at most
/// 5.03 A / V0^6 for ex <= 1.4, so the relative error is below 5.03 / (16^6 46080) = 6.5e-12.
const A_BITS: u32 = 4;
const A_SEGMENTS: usize = ((A_LOG2_HI - A_LOG2_LO) as usize) << A_BITS;

/// (2 / kg1) (Vpk / kp)^ex over [1/16, 1024) V (224 segments, 21 KB; built once per parameter set and kept
/// for the life of the program).
#[derive(Clone, Copy)]
struct PowerTable {
    segments: &'static [Segment; A_SEGMENTS],
}

impl PowerTable {
    fn new(ex: f64, kg1: f64, kp: f64) -> Self {
        let node = |v: f64| {
            let value = 2.0 / kg1 * (v / kp).powf(ex);
            [value, ex * value / v, ex * (ex - 1.0) * value / (v * v)]
        };
        let per_octave = 1usize << A_BITS;
        let mut segments = Vec::with_capacity(A_SEGMENTS);
        for octave in A_LOG2_LO..A_LOG2_HI {
            let base = 2f64.powi(octave as i32);
            let h = base / per_octave as f64;
            for j in 0..per_octave {
                let v0 = base + j as f64 * h;
                segments.push(Segment::hermite(node(v0), node(v0 + h), h, 1.0, 0.0));
            }
        }
        let segments: Box<[Segment; A_SEGMENTS]> = segments
            .into_boxed_slice()
            .try_into()
            .expect("segment count");
        PowerTable {
            segments: Box::leak(segments),
        }
    }

    /// (A, dA/dVpk) inside the table; None outside it, for Vpk <= 0 and for NaN.
    #[inline(always)]
    fn lookup<A: Arith>(self, vpk: f64) -> Option<(f64, f64)> {
        const FRAC_BITS: u32 = 52 - A_BITS;
        let bits = vpk.to_bits();
        // Exponent and top mantissa bits; negative, zero, too small or too large values (and NaN) wrap or
        // land beyond the end.
        let idx = (bits >> FRAC_BITS).wrapping_sub(((1023 + A_LOG2_LO) as u64) << A_BITS);
        if idx >= A_SEGMENTS as u64 {
            return None;
        }
        let t = (bits & ((1 << FRAC_BITS) - 1)) as i64 as f64 * (1.0 / (1u64 << FRAC_BITS) as f64);
        Some(self.segments[idx as usize].eval_as::<A>(t))
    }
}

/// The A and S tables for (ex, kg1, kp), built on the first use of the set (one per distinct set: three
/// for the `TubeType`s).
fn plate_tables(ex: f64, kg1: f64, kp: f64) -> (PowerTable, SoftplusPowTable) {
    type Cache = Vec<([u64; 3], (PowerTable, SoftplusPowTable))>;
    static CACHE: Mutex<Cache> = Mutex::new(Vec::new());
    let key = [ex.to_bits(), kg1.to_bits(), kp.to_bits()];
    let mut cache = CACHE.lock().unwrap_or_else(PoisonError::into_inner);
    if let Some(&(_, tables)) = cache.iter().find(|(k, _)| *k == key) {
        return tables;
    }
    // S with its slope per unit of pos (1 / SP_PER_UNIT of z).
    let tables = (
        PowerTable::new(ex, kg1, kp),
        SoftplusPowTable::new(ex, 1.0, 1.0 / SP_PER_UNIT, 0.0),
    );
    cache.push((key, tables));
    tables
}

/// pos of the grid table per volt of Vgk, and at Vgk = 0.
const GRID_POS_SCALE: f64 = GRID_CG * SP_PER_UNIT;
const GRID_POS_OFFSET: f64 = -SP_START * SP_PER_UNIT;

/// The grid current Gg Cg^-xi softplus(x)^xi + Ig0 at x = Cg Vgk, its slope per volt of Vgk.
fn grid_table() -> SoftplusPowTable {
    static TABLE: OnceLock<SoftplusPowTable> = OnceLock::new();
    *TABLE.get_or_init(|| {
        let scale = GRID_GG * (-GRID_XI * GRID_LN_CG).exp();
        SoftplusPowTable::new(GRID_XI, scale, GRID_CG, GRID_IG0)
    })
}

/// Triode, Ip = 2 E1^ex / kg1 with E1 = (Vpk/kp) ln(1 + exp(kp (1/mu + Vgk / sqrt(kvb + Vpk^2)))) (Koren 1996).
#[derive(Clone, Copy)]
pub struct Triode {
    mu: f64,
    ex: f64,
    kg1: f64,
    kp: f64,
    kvb: f64,
    /// pos of the S table per unit of Vgk Q (kp SP_PER_UNIT), and at Vgk = 0 ((kp / mu - SP_START) SP_PER_UNIT).
    pos_scale: f64,
    pos_offset: f64,
    power: PowerTable,
    softplus: SoftplusPowTable,
    grid: SoftplusPowTable,
}

impl std::fmt::Debug for Triode {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Triode")
            .field("mu", &self.mu)
            .field("ex", &self.ex)
            .field("kg1", &self.kg1)
            .field("kp", &self.kp)
            .field("kvb", &self.kvb)
            .finish()
    }
}

impl PartialEq for Triode {
    /// Equal parameters (the tables follow from them).
    fn eq(&self, other: &Self) -> bool {
        self.parameters() == other.parameters()
    }
}

impl Triode {
    /// Koren's parameters; builds the tables of this set on its first use (not on the audio thread).
    pub fn koren(mu: f64, ex: f64, kg1: f64, kp: f64, kvb: f64) -> Self {
        let (power, softplus) = plate_tables(ex, kg1, kp);
        Triode {
            mu,
            ex,
            kg1,
            kp,
            kvb,
            pos_scale: kp * SP_PER_UNIT,
            pos_offset: (kp / mu - SP_START) * SP_PER_UNIT,
            power,
            softplus,
            grid: grid_table(),
        }
    }

    /// Amplification factor mu.
    pub fn mu(&self) -> f64 {
        self.mu
    }

    /// Exponent ex.
    pub fn ex(&self) -> f64 {
        self.ex
    }

    /// kg1.
    pub fn kg1(&self) -> f64 {
        self.kg1
    }

    /// kp.
    pub fn kp(&self) -> f64 {
        self.kp
    }

    /// kvb (V^2).
    pub fn kvb(&self) -> f64 {
        self.kvb
    }

    /// [mu, ex, kg1, kp, kvb].
    pub fn parameters(&self) -> [f64; 5] {
        [self.mu, self.ex, self.kg1, self.kp, self.kvb]
    }

    /// Plate current only (A), for readouts and tests.
    pub fn plate_current(&self, vpk: f64, vgk: f64) -> f64 {
        self.currents(vpk, vgk).plate
    }

    /// Grid current Ig = Gg (ln(1 + exp(Cg Vgk)) / Cg)^xi + Ig0 (Dempwolf and Zoelzer, DAFx-11), and dIg/dVgk.
    #[inline]
    pub fn grid_current(vgk: f64) -> (f64, f64) {
        Self::grid_current_in::<Separate>(grid_table(), vgk)
    }

    #[inline(always)]
    fn grid_current_in<A: Arith>(table: SoftplusPowTable, vgk: f64) -> (f64, f64) {
        match table.lookup::<A>(A::madd(vgk, GRID_POS_SCALE, GRID_POS_OFFSET)) {
            Some(found) => found,
            None => Self::grid_current_outside(vgk),
        }
    }

    /// The grid current outside its table: Ig0 below it (Gg Cg^-xi e^(xi Cg Vgk) < 3e-24 A adds nothing to
    /// Ig0 in double precision, and the slope is below 1e-22 S), the closed form above it.
    #[cold]
    #[inline(never)]
    fn grid_current_outside(vgk: f64) -> (f64, f64) {
        if GRID_CG * vgk <= SP_START {
            (GRID_IG0, 0.0)
        } else {
            Self::grid_current_closed_form(vgk)
        }
    }

    /// The grid current evaluated as Gg exp(xi (L(Cg Vgk) - ln Cg)) + Ig0 with L = ln softplus from
    /// `fastmath::ln_softplus`.
    fn grid_current_closed_form(vgk: f64) -> (f64, f64) {
        let (l, dl) = fastmath::ln_softplus(GRID_CG * vgk);
        let powed = fastmath::exp(GRID_XI * (l - GRID_LN_CG));
        (
            GRID_GG * powed + GRID_IG0,
            GRID_GG * GRID_XI * GRID_CG * powed * dl,
        )
    }

    /// Plate and grid currents with their derivatives.
    #[inline(always)]
    pub fn currents(&self, vpk: f64, vgk: f64) -> TriodeCurrents {
        let q = 1.0 / (self.kvb + vpk * vpk).sqrt();
        self.currents_with_q::<Separate>(vpk, vgk, q)
    }

    /// `currents` given Q = 1 / sqrt(kvb + Vpk^2).
    #[inline(always)]
    fn currents_with_q<A: Arith>(&self, vpk: f64, vgk: f64, q: f64) -> TriodeCurrents {
        let (grid, grid_dvgk) = Self::grid_current_in::<A>(self.grid, vgk);
        let Some((a, da)) = self.power.lookup::<A>(vpk) else {
            return self.currents_closed_form(vpk, vgk, q, grid, grid_dvgk);
        };
        // pos of the S table and its derivative by Vgk (S is tabulated with its slope per unit of pos).
        let dpos = self.pos_scale * q;
        let (s, ds) = match self
            .softplus
            .lookup::<A>(A::madd(vgk, dpos, self.pos_offset))
        {
            Some(found) => found,
            None => self.softplus_outside(vgk, q),
        };
        // d pos/dVgk = kp Q SP_PER_UNIT; d pos/dVpk = Vgk kp SP_PER_UNIT dQ/dVpk = -Vgk Vpk Q^2 d pos/dVgk.
        // The factor of dpos/dVpk that does not wait for the table, grouped so that it does not.
        let dpos_dvpk_by_dvgk = dpos * (vgk * vpk * q * q);
        let a_ds = a * ds;
        TriodeCurrents {
            plate: a * s,
            plate_dvpk: A::madd(da, s, -(a_ds * dpos_dvpk_by_dvgk)),
            plate_dvgk: a_ds * dpos,
            grid,
            grid_dvgk,
        }
    }

    /// softplus(z)^ex and its slope per unit of pos as exp(ex L(z)) with L = ln softplus from
    /// `fastmath::ln_softplus`, for z = kp (1/mu + Vgk Q) outside the table.
    #[cold]
    #[inline(never)]
    fn softplus_outside(&self, vgk: f64, q: f64) -> (f64, f64) {
        let z = self.kp * (1.0 / self.mu + vgk * q);
        let (l, dl) = fastmath::ln_softplus(z);
        let s = fastmath::exp(self.ex * l);
        (s, self.ex * s * dl / SP_PER_UNIT)
    }

    /// The plate current from the closed form, for Vpk outside the table (`inv_root` = Q, already computed).
    #[cold]
    #[inline(never)]
    fn currents_closed_form(
        &self,
        vpk: f64,
        vgk: f64,
        inv_root: f64,
        grid: f64,
        grid_dvgk: f64,
    ) -> TriodeCurrents {
        let mut out = TriodeCurrents {
            grid,
            grid_dvgk,
            ..Default::default()
        };
        if vpk <= 0.0 {
            return out;
        }
        // ln E1 = ln(Vpk / kp) + L(z) with L = ln softplus (tabulated), so Ip = (2 / kg1) exp(ex ln E1).
        let z = self.kp * (1.0 / self.mu + vgk * inv_root);
        let (l, dl) = fastmath::ln_softplus(z);
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

#[cfg(test)]
mod tests {
    use super::*;

    /// softplus z = ln(1 + e^z) and logistic z with standard-library functions (no cancellation).
    fn softplus_reference(z: f64) -> (f64, f64) {
        if z > 0.0 {
            (z + (-z).exp().ln_1p(), 1.0 / (1.0 + (-z).exp()))
        } else {
            (z.exp().ln_1p(), z.exp() / (1.0 + z.exp()))
        }
    }

    /// Koren 1996 (N. Koren, "Improved vacuum tube models for SPICE simulations", Glass Audio 8(5)):
    /// Ip = (2 / kg1) E1^ex, E1 = (Vpk / kp) ln(1 + exp(kp (1/mu + Vgk / sqrt(kvb + Vpk^2)))), evaluated with
    /// the standard library, with its partial derivatives in closed form:
    ///   dIp/dVgk = ex Ip logistic(z) / softplus(z) kp / sqrt(kvb + Vpk^2),
    ///   dIp/dVpk = ex Ip / Vpk - ex Ip logistic(z) / softplus(z) kp Vgk Vpk / (kvb + Vpk^2)^(3/2).
    /// Returns (Ip, dIp/dVpk, dIp/dVgk, ex Ip / Vpk): the last is the size of the first term of dIp/dVpk,
    /// against which its error is measured where the two terms cancel.
    fn koren_reference(p: [f64; 5], vpk: f64, vgk: f64) -> (f64, f64, f64, f64) {
        let [mu, ex, kg1, kp, kvb] = p;
        if vpk <= 0.0 {
            return (0.0, 0.0, 0.0, 0.0);
        }
        let root = (kvb + vpk * vpk).sqrt();
        let z = kp * (1.0 / mu + vgk / root);
        let (sp, logistic) = softplus_reference(z);
        let ip = 2.0 / kg1 * (vpk / kp * sp).powf(ex);
        let dgk = ex * ip * logistic / sp * kp / root;
        let first = ex * ip / vpk;
        let dpk = first - ex * ip * logistic / sp * kp * vgk * vpk / (root * root * root);
        (ip, dpk, dgk, first)
    }

    /// Dempwolf and Zoelzer, "A physically-motivated triode model for circuit simulations", DAFx-11:
    /// Ig = Gg (ln(1 + exp(Cg Vgk)) / Cg)^xi + Ig0, dIg/dVgk = Gg xi (softplus / Cg)^(xi - 1) logistic.
    fn grid_reference(vgk: f64) -> (f64, f64) {
        let (sp, logistic) = softplus_reference(GRID_CG * vgk);
        let powed = (sp / GRID_CG).powf(GRID_XI);
        (
            GRID_GG * powed + GRID_IG0,
            GRID_GG * GRID_XI * powed / (sp / GRID_CG) * logistic,
        )
    }

    const TYPES: [TubeType; 3] = [TubeType::Ax7, TubeType::At7, TubeType::Au7];

    #[test]
    fn plate_currents_match_the_koren_equation_for_every_type() {
        // Dense grid over Vpk 0..600 V and Vgk -60..+10 V, steps chosen to fall between table nodes.
        let mut worst = [0.0f64; 3];
        let mut worst_abs = [0.0f64; 3];
        let mut at = [(TubeType::Ax7, 0.0, 0.0); 3];
        let mut at_rel = [(TubeType::Ax7, 0.0, 0.0); 3];
        for tube in TYPES {
            let triode = tube.triode();
            let p = triode.parameters();
            let mut n = 0usize;
            let mut vpk = 0.0;
            while vpk <= 600.0 {
                let mut vgk = -60.0;
                while vgk <= 10.0 {
                    let c = triode.currents(vpk, vgk);
                    let (ip, dpk, dgk, first) = koren_reference(p, vpk, vgk);
                    if ip >= 1e-9 {
                        // Where at least 1 nA flows: relative errors.
                        let e = [
                            ((c.plate - ip) / ip).abs(),
                            (c.plate_dvpk - dpk).abs() / (dpk.abs() + first),
                            ((c.plate_dvgk - dgk) / dgk).abs(),
                        ];
                        for k in 0..3 {
                            if e[k] > worst[k] {
                                worst[k] = e[k];
                                at_rel[k] = (tube, vpk, vgk);
                            }
                        }
                        n += 1;
                    } else {
                        // Below 1 nA: absolute errors.
                        let e = [
                            (c.plate - ip).abs(),
                            (c.plate_dvpk - dpk).abs(),
                            (c.plate_dvgk - dgk).abs(),
                        ];
                        for k in 0..3 {
                            if e[k] > worst_abs[k] {
                                worst_abs[k] = e[k];
                                at[k] = (tube, vpk, vgk);
                            }
                        }
                    }
                    vgk += 0.0173;
                }
                vpk += 0.371;
            }
            assert!(n > 100_000, "{tube:?}: only {n} points above 1 nA");
        }
        println!(
            "largest relative error above 1 nA: plate {:.2e}, d/dVpk {:.2e}, d/dVgk {:.2e}",
            worst[0], worst[1], worst[2]
        );
        println!("at {at_rel:?}");
        println!(
            "largest absolute error below 1 nA: plate {:.2e} A, d/dVpk {:.2e} S, d/dVgk {:.2e} S at {at:?}",
            worst_abs[0], worst_abs[1], worst_abs[2]
        );
        // Measured: 6.0e-11, 1.5e-9, 1.7e-9 (quintic segments, bounds in the comments at the tables).
        assert!(worst[0] < 2e-10, "plate current {:e}", worst[0]);
        assert!(worst[1] < 5e-9, "dIp/dVpk {:e}", worst[1]);
        assert!(worst[2] < 5e-9, "dIp/dVgk {:e}", worst[2]);
        // Below 1 nA: measured 5.9e-20 A, 8.3e-19 S, 6.3e-17 S.
        assert!(worst_abs[0] < 1e-18, "plate current {:e} A", worst_abs[0]);
        assert!(worst_abs[1] < 1e-15, "dIp/dVpk {:e} S", worst_abs[1]);
        assert!(worst_abs[2] < 1e-15, "dIp/dVgk {:e} S", worst_abs[2]);
    }

    #[test]
    fn grid_current_matches_the_dempwolf_zoelzer_equation() {
        let (mut worst, mut worst_slope) = (0.0f64, 0.0f64);
        let triode = TubeType::Ax7.triode();
        let mut vgk = -60.0;
        while vgk <= 10.0 {
            let (ig, dig) = grid_reference(vgk);
            let (model, slope) = Triode::grid_current(vgk);
            let c = triode.currents(200.0, vgk);
            assert_eq!((c.grid, c.grid_dvgk), (model, slope));
            worst = worst.max(((model - ig) / ig).abs());
            // Relative where the slope is above 1e-20 S; absolute below (the table ends at Cg Vgk = -34,
            // where the slope is 1.5e-23 S, and returns 0 below).
            if dig > 1e-20 {
                worst_slope = worst_slope.max(((slope - dig) / dig).abs());
            } else {
                assert!((slope - dig).abs() < 2e-23, "{vgk}: {slope} vs {dig}");
            }
            vgk += 0.000_731;
        }
        println!("grid current: largest relative error {worst:.2e}, slope {worst_slope:.2e}");
        // Measured: 1.7e-11 and 1.2e-9.
        assert!(worst < 1e-10, "grid current {worst:e}");
        assert!(worst_slope < 5e-9, "grid slope {worst_slope:e}");
    }

    #[test]
    fn packed_and_portable_segment_evaluations_agree() {
        // The portable evaluation (used off x86-64) performs the same IEEE operations in the same order, so
        // the two agree bit for bit; checked over every segment of the tables, for the separate copy and,
        // where the processor has FMA, the fused one (a fused multiply-add rounds once, packed or not).
        let fused = crate::arith::fused_available();
        let triode = TubeType::Au7.triode();
        let tables: [&[Segment]; 3] = [
            &triode.power.segments[..],
            &triode.softplus.segments[..],
            &triode.grid.segments[..],
        ];
        for segments in tables {
            for segment in segments {
                for k in 0..=16 {
                    let t = k as f64 / 16.0 + 1e-3;
                    let (a, b) = (
                        segment.eval_as::<Separate>(t),
                        segment.eval_portable::<Separate>(t),
                    );
                    assert_eq!(a.0.to_bits(), b.0.to_bits());
                    assert_eq!(a.1.to_bits(), b.1.to_bits());
                    if fused {
                        use crate::arith::Fused;
                        let (a, b) = (
                            segment.eval_as::<Fused>(t),
                            segment.eval_portable::<Fused>(t),
                        );
                        assert_eq!(
                            (a.0.to_bits(), a.1.to_bits()),
                            (b.0.to_bits(), b.1.to_bits())
                        );
                    }
                }
            }
        }
    }

    #[test]
    fn tables_are_shared_per_parameter_set() {
        let a = TubeType::Ax7.triode();
        let b = Triode::koren(100.0, 1.4, 1060.0, 600.0, 300.0);
        assert!(std::ptr::eq(a.softplus.segments, b.softplus.segments));
        assert!(std::ptr::eq(a.power.segments, b.power.segments));
        assert_eq!(a, b);
        assert_ne!(a, TubeType::At7.triode());
    }
}
