//! Zener diode: exponential forward and breakdown junction with series resistance, and the antiseries pair.

use crate::arith::{Arith, Separate};

/// Thermal voltage used throughout (V), docs/model.md section 4.
pub const THERMAL_VOLTAGE: f64 = 0.025852;
/// Saturation current of the forward junction (A), docs/model.md section 4.
pub const SATURATION_CURRENT: f64 = 1e-14;
/// Current scale of the asinh map used by the junction tables (A).
pub const CURRENT_SCALE: f64 = 1e-12;
/// Conductance across each junction (S), as SPICE puts across every pn junction (GMIN, 1e12 ohm), and as the
/// ngspice reference netlists do. It sets the pair's leakage while both parts are off.
pub const JUNCTION_GMIN: f64 = 1e-12;
/// Exponent above which the junction exponentials continue linearly (as the ngspice reference does).
const FORWARD_LIMIT_VOLTS: f64 = 1.0;
const BREAKDOWN_EXPONENT_LIMIT: f64 = 12.0;

/// Datasheet figures of one Zener part: Vz at Izt, Zzt at Izt, Zzk at Izk.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct ZenerDatasheet {
    pub volts: f64,
    pub izt: f64,
    pub zzt: f64,
    pub izk: f64,
    pub zzk: f64,
}

/// Zener, Ij = Is (exp(Vj/Vt) - 1) - Izt (exp(-(Vj + Vzj)/(nbv Vt)) - exp(-Vzj/(nbv Vt))) + GMIN Vj, V = Vj + rs I
/// (docs/model.md section 4; GMIN as in SPICE).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Zener {
    /// Breakdown voltage at the test current (V).
    pub volts: f64,
    /// Test current (A).
    pub izt: f64,
    /// Breakdown emission coefficient.
    pub nbv: f64,
    /// Series resistance (ohm).
    pub rs: f64,
    /// Junction breakdown voltage, Vz - Izt rs (V).
    pub vzj: f64,
}

impl Zener {
    /// Fit to datasheet figures: nbv = (Zzk - Zzt) / (Vt (1/Izk - 1/Izt)), rs = Zzt - nbv Vt / Izt,
    /// falling back to rs = 0, nbv = Zzk Izk / Vt when rs would be negative (docs/model.md section 4).
    pub fn fit(sheet: &ZenerDatasheet) -> Zener {
        let vt = THERMAL_VOLTAGE;
        let mut nbv = (sheet.zzk - sheet.zzt) / (vt * (1.0 / sheet.izk - 1.0 / sheet.izt));
        let mut rs = sheet.zzt - nbv * vt / sheet.izt;
        if rs < 0.0 {
            rs = 0.0;
            nbv = sheet.zzk * sheet.izk / vt;
        }
        Zener {
            volts: sheet.volts,
            izt: sheet.izt,
            nbv,
            rs,
            vzj: sheet.volts - sheet.izt * rs,
        }
    }

    /// Junction current (A, anode to cathode) and its slope (S) at junction voltage `vj`.
    #[inline]
    pub fn junction_current(&self, vj: f64) -> (f64, f64) {
        let vt = THERMAL_VOLTAGE;
        let nvt = self.nbv * vt;
        let (fwd, dfwd) = if vj < FORWARD_LIMIT_VOLTS {
            let e = (vj / vt).exp();
            (SATURATION_CURRENT * (e - 1.0), SATURATION_CURRENT * e / vt)
        } else {
            let e = (FORWARD_LIMIT_VOLTS / vt).exp();
            (
                SATURATION_CURRENT * (e * (1.0 + (vj - FORWARD_LIMIT_VOLTS) / vt) - 1.0),
                SATURATION_CURRENT * e / vt,
            )
        };
        let x = -(vj + self.vzj) / nvt;
        let (brk, dbrk) = if x < BREAKDOWN_EXPONENT_LIMIT {
            let e = x.exp();
            (e, -e / nvt)
        } else {
            let e = BREAKDOWN_EXPONENT_LIMIT.exp();
            (e * (1.0 + x - BREAKDOWN_EXPONENT_LIMIT), -e / nvt)
        };
        let zero_bias = (-self.vzj / nvt).exp();
        (
            fwd - self.izt * (brk - zero_bias) + JUNCTION_GMIN * vj,
            dfwd - self.izt * dbrk + JUNCTION_GMIN,
        )
    }

    /// Terminal voltage (anode to cathode) of the part carrying `current` (A), solved exactly.
    pub fn voltage_at(&self, current: f64) -> f64 {
        self.junction_voltage_at(current, 0.0) + self.rs * current
    }

    /// Junction voltage carrying `current`, by safeguarded Newton from `guess`.
    pub fn junction_voltage_at(&self, current: f64, guess: f64) -> f64 {
        let mut lo = -self.vzj - 200.0;
        let mut hi = FORWARD_LIMIT_VOLTS + 50.0;
        let mut v = guess.clamp(lo, hi);
        for _ in 0..200 {
            let (i, g) = self.junction_current(v);
            let r = i - current;
            if r > 0.0 {
                hi = v;
            } else {
                lo = v;
            }
            let mut next = v - r / g;
            if !(next > lo && next < hi) {
                next = 0.5 * (lo + hi);
            }
            if (next - v).abs() < 1e-13 * (1.0 + v.abs()) {
                return next;
            }
            v = next;
        }
        v
    }

    /// Small-signal resistance dV/dI (ohm) at `current` (A, anode to cathode).
    pub fn dynamic_resistance(&self, current: f64) -> f64 {
        let vj = self.junction_voltage_at(current, 0.0);
        1.0 / self.junction_current(vj).1 + self.rs
    }
}

/// Junction voltage as a function of s = asinh(I / CURRENT_SCALE), tabulated uniformly in s.
#[derive(Clone, Debug)]
pub struct JunctionTable {
    start: f64,
    step: f64,
    inv_step: f64,
    /// (voltage, dV/ds) at each point.
    points: Vec<[f64; 2]>,
}

const TABLE_HALF_SPAN: f64 = 32.0;
const TABLE_POINTS: usize = 2049;

impl JunctionTable {
    /// Tabulate the inverse of the junction law of `part` (built once per part, not in the audio path).
    pub fn build(part: &Zener) -> JunctionTable {
        let step = 2.0 * TABLE_HALF_SPAN / (TABLE_POINTS - 1) as f64;
        let mut points = vec![[0.0; 2]; TABLE_POINTS];
        let centre = TABLE_POINTS / 2;
        // March outward from zero current so each solve starts next to its answer.
        for half in [0, 1] {
            let mut guess = 0.0;
            for k in 0..=centre {
                let idx = if half == 0 { centre + k } else { centre - k };
                let s = -TABLE_HALF_SPAN + idx as f64 * step;
                let current = CURRENT_SCALE * s.sinh();
                let vj = part.junction_voltage_at(current, guess);
                let (_, g) = part.junction_current(vj);
                points[idx] = [vj, CURRENT_SCALE * s.cosh() / g];
                guess = vj;
            }
        }
        JunctionTable {
            start: -TABLE_HALF_SPAN,
            step,
            inv_step: 1.0 / step,
            points,
        }
    }

    /// Junction voltage and dV/ds at s (cubic Hermite inside, linear outside the table).
    #[inline]
    pub fn eval(&self, s: f64) -> (f64, f64) {
        let ([v], [d]) = hermite(&self.points, self.start, self.step, self.inv_step, s);
        (v, d)
    }
}

/// Cubic Hermite interpolation of K tabulated functions sharing one uniform grid in s, from each point's
/// values (first K entries) and s-derivatives (last K entries); linear continuation outside the grid.
/// Returns (values, derivatives).
#[inline(always)]
fn hermite<const K: usize, const W: usize>(
    points: &[[f64; W]],
    start: f64,
    step: f64,
    inv_step: f64,
    s: f64,
) -> ([f64; K], [f64; K]) {
    let mut values = [0.0; K];
    let mut slopes = [0.0; K];
    let pos = (s - start) * inv_step;
    let last = points.len() - 1;
    if pos.is_nan() || pos <= 0.0 {
        let ds = if s.is_nan() { 0.0 } else { s - start };
        for k in 0..K {
            let (v, d) = (points[0][k], points[0][K + k]);
            values[k] = v + ds * d;
            slopes[k] = d;
        }
        return (values, slopes);
    }
    if pos >= last as f64 {
        let ds = s - (start + last as f64 * step);
        for k in 0..K {
            let (v, d) = (points[last][k], points[last][K + k]);
            values[k] = v + ds * d;
            slopes[k] = d;
        }
        return (values, slopes);
    }
    // floor(pos) by the round-to-nearest shift trick on pos - 1/2 (pos is in (0, last) here).
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    let idx = (((pos - 0.5) + SHIFT).to_bits() as u32 as usize).min(last - 1);
    let t = pos - idx as f64;
    let (p0, p1) = (&points[idx], &points[idx + 1]);
    for k in 0..K {
        let (y0, y1) = (p0[k], p1[k]);
        let (m0, m1) = (p0[K + k] * step, p1[K + k] * step);
        let dy = y1 - y0;
        // Hermite form: y0 + t (m0 + t (c2 + t c3)).
        let c2 = 3.0 * dy - 2.0 * m0 - m1;
        let c3 = m0 + m1 - 2.0 * dy;
        values[k] = y0 + t * (m0 + t * (c2 + t * c3));
        slopes[k] = (m0 + t * (2.0 * c2 + t * 3.0 * c3)) * inv_step;
    }
    (values, slopes)
}

/// Interval count of the junction tables (a power of two, so an interval index is masked into range).
const TABLE_INTERVALS: usize = TABLE_POINTS - 1;
/// Grid spacing in s and its inverse (exact powers of two).
const TABLE_STEP: f64 = 2.0 * TABLE_HALF_SPAN / TABLE_INTERVALS as f64;
const TABLE_INV_STEP: f64 = TABLE_INTERVALS as f64 / (2.0 * TABLE_HALF_SPAN);
const _: () = assert!(TABLE_INTERVALS.is_power_of_two());

/// One grid point of the pair table and the cubics on the interval to its right.
#[derive(Clone, Copy, Debug, Default)]
#[repr(C, align(16))]
struct PairRow {
    /// Pair volts and the negative part's volts on [s_k, s_k+1], each as [value, d/ds] polynomials in
    /// t = (s - s_k) / step: [value, slope] = c[0] + t (c[1] + t (c[2] + t c[3])), the cubic Hermite
    /// interpolant of the points' values and s-derivatives in the first lane and its s-derivative in the
    /// second (so the two lanes run the same operations).
    volts: [[[f64; 2]; 4]; 2],
    /// CURRENT_SCALE sinh s_k and CURRENT_SCALE cosh s_k.
    sinh_cosh: [f64; 2],
    /// s_k.
    s: f64,
}

/// Both junctions of a pair on one grid in s: the pair's junction voltage Vn(s) - Vp(-s) and the negative-clamp
/// part's own Vn(s) as cubics per interval, and the current's sinh and cosh at each grid point, so one lookup
/// gives the pair, the split between its parts and the current.
///
/// Current: I(s) = CURRENT_SCALE sinh(s_k + d) = CURRENT_SCALE (sinh s_k cosh d + cosh s_k sinh d), with the
/// grid point s_k taken on the side of s nearer zero, so d = s - s_k has the sign of s_k, |d| <= step = 1/32,
/// both products share one sign (no cancellation) and d itself is exact (Sterbenz lemma). sinh d and cosh d
/// by their Taylor series to d^7 and d^6: the first terms left out, d^9/9! and d^8/8!, are below 3e-18
/// relative, so I and dI/ds = CURRENT_SCALE cosh s carry only a few roundings of relative error at every
/// current (the relative error is what counts: the currents span 1e-12 .. 1 A and more), against about 1e-11
/// for the exp-based sinh used before. (A cubic Hermite table
/// of sinh on this grid would be off by up to h^4/384 max|d^4 sinh/ds^4| = h^4/384 |sinh| = 2.5e-9 relative.)
#[derive(Clone, Debug)]
struct PairTable {
    rows: Box<[PairRow; TABLE_POINTS]>,
    /// [pair volts, negative-part volts, their dV/ds] at the two ends, for the linear continuation outside.
    ends: [[f64; 4]; 2],
}

impl PairTable {
    /// The pair's table for the negative-clamp part `negative` carrying I = CURRENT_SCALE sinh s and the
    /// positive-clamp part `positive` carrying -I (either may be absent). The grid is symmetric about s = 0,
    /// so the mirrored positive-part table interpolates exactly as a separate lookup at -s would.
    fn new(negative: Option<&JunctionTable>, positive: Option<&JunctionTable>) -> PairTable {
        let last = TABLE_POINTS - 1;
        let points: Vec<[f64; 4]> = (0..TABLE_POINTS)
            .map(|i| {
                let [vn, dn] = negative.map_or([0.0; 2], |t| t.points[i]);
                let [vp, dp] = positive.map_or([0.0; 2], |t| t.points[last - i]);
                [vn - vp, vn, dn + dp, dn]
            })
            .collect();
        let rows: Vec<PairRow> = (0..TABLE_POINTS)
            .map(|i| {
                let s = -TABLE_HALF_SPAN + i as f64 * TABLE_STEP;
                let mut row = PairRow {
                    sinh_cosh: [CURRENT_SCALE * s.sinh(), CURRENT_SCALE * s.cosh()],
                    s,
                    ..Default::default()
                };
                let p0 = points[i];
                let p1 = points[(i + 1).min(last)];
                for (k, c) in row.volts.iter_mut().enumerate() {
                    // Hermite form on t in [0, 1] (the same operations as `hermite`).
                    let (y0, y1) = (p0[k], p1[k]);
                    let (m0, m1) = (p0[2 + k] * TABLE_STEP, p1[2 + k] * TABLE_STEP);
                    let dy = y1 - y0;
                    let c2 = 3.0 * dy - 2.0 * m0 - m1;
                    let c3 = m0 + m1 - 2.0 * dy;
                    *c = [
                        [y0, m0 * TABLE_INV_STEP],
                        [m0, 2.0 * c2 * TABLE_INV_STEP],
                        [c2, 3.0 * c3 * TABLE_INV_STEP],
                        [c3, 0.0],
                    ];
                }
                row
            })
            .collect();
        PairTable {
            rows: rows
                .into_boxed_slice()
                .try_into()
                .expect("one row per grid point"),
            ends: [points[0], points[last]],
        }
    }

    /// ([pair volts, its dV/ds], [negative-part volts, its dV/ds], [current, dI/ds]) for
    /// |s| < TABLE_HALF_SPAN: straight-line code on one interval and one grid point of the table, each pair
    /// of lanes running the same operations.
    #[inline(always)]
    fn inside<A: Arith>(&self, s: f64) -> ([f64; 2], [f64; 2], [f64; 2]) {
        // pos in (0, TABLE_INTERVALS) for |s| < TABLE_HALF_SPAN (s + 32 is exact near -32 and stays below 64).
        let pos = (s + TABLE_HALF_SPAN) * TABLE_INV_STEP;
        // floor(pos) by the round-to-nearest shift trick on pos - 1/2; the mask only guards the indexing.
        const SHIFT: f64 = 6_755_399_441_055_744.0;
        let shifted = (pos - 0.5) + SHIFT;
        let idx = (shifted.to_bits() as u32 as usize) & (TABLE_INTERVALS - 1);
        let t = pos - (shifted - SHIFT);
        let rows = &*self.rows;
        // Estrin's scheme, (c0 + c1 t) + t^2 (c2 + c3 t): a shorter chain than Horner's.
        let t2 = t * t;
        let cubic = |c: &[[f64; 2]; 4]| -> [f64; 2] {
            let mut y = [0.0; 2];
            for j in 0..2 {
                y[j] = A::madd(
                    t2,
                    A::madd(c[3][j], t, c[2][j]),
                    A::madd(c[1][j], t, c[0][j]),
                );
            }
            y
        };
        let pair = cubic(&rows[idx].volts[0]);
        let negative = cubic(&rows[idx].volts[1]);
        // Grid point on the side of s nearer zero: s_k for s >= 0, s_k+1 for s < 0 unless pos came out on s_k
        // itself (t = 0: s within a rounding of s_k, so s_k is between s and zero, or is s_k+1 = 0 for a tiny
        // negative s that s_k+1 = step would cancel).
        let base = &rows[idx + usize::from((s < 0.0) & (t > 0.0))];
        let d = s - base.s;
        let d2 = d * d;
        let d4 = d2 * d2;
        // [sinh d / d, cosh d] as polynomials in d^2 (Estrin's scheme), then [sinh d, cosh d].
        const TAYLOR: [[f64; 2]; 4] = [
            [1.0, 1.0],
            [1.0 / 6.0, 1.0 / 2.0],
            [1.0 / 120.0, 1.0 / 24.0],
            [1.0 / 5040.0, 1.0 / 720.0],
        ];
        let scale = [d, 1.0];
        let mut series = [0.0; 2];
        for j in 0..2 {
            series[j] = scale[j]
                * A::madd(
                    d4,
                    A::madd(d2, TAYLOR[3][j], TAYLOR[2][j]),
                    A::madd(d2, TAYLOR[1][j], TAYLOR[0][j]),
                );
        }
        let [sinh_d, cosh_d] = series;
        let [sinh_k, cosh_k] = base.sinh_cosh;
        let current = [
            A::madd(sinh_k, cosh_d, cosh_k * sinh_d),
            A::madd(cosh_k, cosh_d, sinh_k * sinh_d),
        ];
        (pair, negative, current)
    }

    /// Linear continuation of [pair volts, negative-part volts] and their s-derivatives outside the grid
    /// (|s| >= TABLE_HALF_SPAN).
    fn outside(&self, s: f64) -> ([f64; 2], [f64; 2]) {
        let (end, ds) = if s < 0.0 {
            (&self.ends[0], s + TABLE_HALF_SPAN)
        } else {
            (&self.ends[1], s - TABLE_HALF_SPAN)
        };
        (
            [end[0] + ds * end[2], end[1] + ds * end[3]],
            [end[2], end[3]],
        )
    }
}

/// One part of the pair with its precomputed junction table.
#[derive(Clone, Debug)]
pub struct TabulatedZener {
    pub part: Zener,
    table: JunctionTable,
}

impl TabulatedZener {
    pub fn new(part: Zener) -> Self {
        TabulatedZener {
            table: JunctionTable::build(&part),
            part,
        }
    }
}

/// State of the pair at one operating point, parametrised by s = asinh(I / CURRENT_SCALE).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct PairPoint {
    /// Pair voltage, clamp node to ground (V).
    pub volts: f64,
    /// dV/ds (V).
    pub volts_ds: f64,
    /// Pair current, clamp node to ground (A).
    pub current: f64,
    /// dI/ds (A).
    pub current_ds: f64,
    /// Voltage across the positive-clamp part, its cathode (clamp side) to anode (V).
    pub positive_part_volts: f64,
    /// Voltage across the negative-clamp part, its anode (middle) to cathode (ground side) (V).
    pub negative_part_volts: f64,
    /// d(negative_part_volts)/ds (V); filled by `port`.
    pub negative_part_volts_ds: f64,
}

/// Antiseries pair, clamp node -> positive part (cathode to the node) -> negative part (cathode to ground).
/// Either part may be absent (a wire), so one part alone is a single Zener to ground.
#[derive(Clone, Debug, Default)]
pub struct ZenerPair {
    pub positive: Option<TabulatedZener>,
    pub negative: Option<TabulatedZener>,
    /// Both junctions in one table (None when the position is open), and the two series resistances summed.
    combined: Option<PairTable>,
    series_resistance: f64,
    /// The negative part's series resistance (0 without it).
    negative_rs: f64,
    /// All ones for a part that is present, zero for one that is absent: (positive, negative), for `split`.
    split_masks: [u64; 2],
}

impl ZenerPair {
    pub fn new(positive: Option<Zener>, negative: Option<Zener>) -> Self {
        let positive = positive.map(TabulatedZener::new);
        let negative = negative.map(TabulatedZener::new);
        let combined = if positive.is_none() && negative.is_none() {
            None
        } else {
            Some(PairTable::new(
                negative.as_ref().map(|z| &z.table),
                positive.as_ref().map(|z| &z.table),
            ))
        };
        let negative_rs = negative.as_ref().map_or(0.0, |z| z.part.rs);
        let series_resistance = positive.as_ref().map_or(0.0, |z| z.part.rs) + negative_rs;
        let present = |some: bool| if some { u64::MAX } else { 0 };
        let split_masks = [present(positive.is_some()), present(negative.is_some())];
        ZenerPair {
            positive,
            negative,
            combined,
            series_resistance,
            negative_rs,
            split_masks,
        }
    }

    /// Pair voltage and current with their s-derivatives at s, and the negative-clamp part's voltage, from
    /// the combined table (one lookup); the positive part's voltage is left at zero (see `split`).
    /// A NaN s reads as the table's lower end, and |s| is held at 700 at most, so the results stay finite.
    #[inline(always)]
    pub fn port(&self, s: f64) -> PairPoint {
        self.port_as::<Separate>(s)
    }

    /// `port` with `A`'s multiply-add.
    #[inline(always)]
    pub(crate) fn port_as<A: Arith>(&self, s: f64) -> PairPoint {
        match &self.combined {
            Some(table) if s.abs() < TABLE_HALF_SPAN => {
                let (pair, negative, [current, current_ds]) = table.inside::<A>(s);
                let (r, rn) = (self.series_resistance, self.negative_rs);
                PairPoint {
                    volts: A::madd(r, current, pair[0]),
                    volts_ds: A::madd(r, current_ds, pair[1]),
                    current,
                    current_ds,
                    positive_part_volts: 0.0,
                    negative_part_volts: A::madd(rn, current, negative[0]),
                    negative_part_volts_ds: A::madd(rn, current_ds, negative[1]),
                }
            }
            _ => self.port_outside(s),
        }
    }

    /// `port` off the table, for a NaN s and for an open position (rare on the audio path).
    #[cold]
    #[inline(never)]
    fn port_outside(&self, s: f64) -> PairPoint {
        let s = if s.is_nan() {
            -TABLE_HALF_SPAN
        } else {
            s.clamp(-700.0, 700.0)
        };
        let (sinh, cosh) = crate::fastmath::sinh_cosh(s);
        // With a table, s is off it here (|s| >= TABLE_HALF_SPAN, a NaN having become its lower end).
        let (v, dv) = match &self.combined {
            Some(table) => table.outside(s),
            None => ([0.0; 2], [0.0; 2]),
        };
        let (current, current_ds) = (CURRENT_SCALE * sinh, CURRENT_SCALE * cosh);
        let rn = self.negative_rs;
        PairPoint {
            volts: v[0] + self.series_resistance * current,
            volts_ds: dv[0] + self.series_resistance * current_ds,
            current,
            current_ds,
            positive_part_volts: 0.0,
            negative_part_volts: v[1] + rn * current,
            negative_part_volts_ds: dv[1] + rn * current_ds,
        }
    }

    /// (positive-part, negative-part) voltages as in `PairPoint`, given the pair's total voltage and the
    /// negative part's voltage from `port`: the positive part takes the rest of the total.
    #[inline]
    pub fn split(&self, total_volts: f64, negative_part_volts: f64) -> (f64, f64) {
        // An absent part reads +0.0 (its mask clears every bit); the positive part takes total - negative,
        // which is the total itself when the negative part is absent.
        let [keep_positive, keep_negative] = self.split_masks;
        let negative = f64::from_bits(negative_part_volts.to_bits() & keep_negative);
        let positive = f64::from_bits((total_volts - negative).to_bits() & keep_positive);
        (positive, negative)
    }

    /// True when the switch position holds no part (the clamp node is left open).
    #[inline]
    pub fn is_open(&self) -> bool {
        self.combined.is_none()
    }

    /// Voltage and current of the pair at s (current I = CURRENT_SCALE sinh s flows clamp node to ground).
    /// The positive part carries -I anode to cathode, the negative part +I; V = Vneg(I) - Vpos(-I).
    #[inline]
    pub fn at(&self, s: f64) -> PairPoint {
        let (sinh, cosh) = crate::fastmath::sinh_cosh(s);
        let current = CURRENT_SCALE * sinh;
        let current_ds = CURRENT_SCALE * cosh;
        let mut point = PairPoint {
            current,
            current_ds,
            ..Default::default()
        };
        if let Some(neg) = &self.negative {
            let (vj, dvj) = neg.table.eval(s);
            point.negative_part_volts = vj + neg.part.rs * current;
            point.volts += point.negative_part_volts;
            point.volts_ds += dvj + neg.part.rs * current_ds;
        }
        if let Some(pos) = &self.positive {
            let (vj, dvj) = pos.table.eval(-s);
            // Anode-to-cathode voltage of the positive part is vj - rs I; across it cathode to anode is the negative.
            point.positive_part_volts = -(vj - pos.part.rs * current);
            point.volts += point.positive_part_volts;
            point.volts_ds += dvj + pos.part.rs * current_ds;
        }
        point
    }

    /// Clamp thresholds (V) where the pair carries `current` (A) each way: (positive, negative).
    pub fn thresholds_at(&self, current: f64) -> (f64, f64) {
        let s_of = |i: f64| (i / CURRENT_SCALE).asinh();
        (self.at(s_of(current)).volts, self.at(s_of(-current)).volts)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn table_matches_exact_inverse() {
        let part = Zener::fit(&ZenerDatasheet {
            volts: 5.1,
            izt: 0.049,
            zzt: 7.0,
            izk: 0.001,
            zzk: 550.0,
        });
        let table = JunctionTable::build(&part);
        for &i in &[-0.05, -1e-3, -1e-6, -1e-9, 0.0, 1e-9, 1e-6, 1e-3, 0.05] {
            let s: f64 = (i / CURRENT_SCALE).asinh();
            let exact = part.junction_voltage_at(i, 0.0);
            let (tab, _) = table.eval(s);
            assert!((tab - exact).abs() < 1e-6, "i={i} exact={exact} tab={tab}");
        }
    }

    /// 1N47xxA datasheet limits (Vz, Izt, Zzt, Izk, Zzk), docs/model.md section 4: 1N4733A, 1N4747A, 1N4749A.
    fn part(volts: f64) -> Zener {
        let sheet = match volts {
            5.1 => (5.1, 0.049, 7.0, 0.001, 550.0),
            20.0 => (20.0, 0.0125, 22.0, 0.00025, 750.0),
            24.0 => (24.0, 0.0105, 25.0, 0.00025, 750.0),
            _ => unreachable!(),
        };
        Zener::fit(&ZenerDatasheet {
            volts: sheet.0,
            izt: sheet.1,
            zzt: sheet.2,
            izk: sheet.3,
            zzk: sheet.4,
        })
    }

    /// `port` against the device equation itself (docs/model.md section 4): the pair carries I = CURRENT_SCALE sinh s
    /// (f64::sinh, and f64::cosh for dI/ds), the negative part drops Vn(I) = Vj(I) + rs I and the positive
    /// part Vp(-I), each Vj solved exactly by `Zener::junction_voltage_at`, and dV/ds = dI/ds (1/g + rs) per
    /// part with g = dIj/dVj of the device equation.
    #[test]
    fn port_matches_the_device_equation() {
        let pairs = [
            (Some(part(20.0)), Some(part(20.0))),
            (Some(part(24.0)), Some(part(5.1))),
            (None, Some(part(5.1))),
            (Some(part(20.0)), None),
        ];
        // Largest errors: relative for I and dI/ds; for the voltages (V) and dV/ds (relative) split at 0.1 nA,
        // below which the tabulated inverse has a sharp corner (the breakdown exponential taking over from the
        // GMIN leakage near 15 pA in the 20 V and 24 V parts).
        let (mut current_err, mut slope_err) = (0.0f64, 0.0f64);
        let mut volts_err = [0.0f64; 2];
        let mut volts_ds_err = [0.0f64; 2];
        let mut legacy_err = 0.0f64;
        let relative = |a: f64, b: f64| if a == b { 0.0 } else { ((a - b) / b).abs() };
        for (positive, negative) in pairs {
            let pair = ZenerPair::new(positive, negative);
            let mut s: f64 = -32.0;
            while s <= 32.0 {
                let p = pair.port(s);
                let (current, current_ds) = (CURRENT_SCALE * s.sinh(), CURRENT_SCALE * s.cosh());
                current_err = current_err.max(relative(p.current, current));
                slope_err = slope_err.max(relative(p.current_ds, current_ds));
                let drop = |z: &Option<Zener>, i: f64| {
                    z.as_ref().map_or((0.0, 0.0), |z| {
                        let vj = z.junction_voltage_at(i, 0.0);
                        (vj + z.rs * i, 1.0 / z.junction_current(vj).1 + z.rs)
                    })
                };
                let (vn, rn) = drop(&negative, current);
                let (vp, rp) = drop(&positive, -current);
                let region = usize::from(current.abs() >= 1e-10);
                volts_err[region] = volts_err[region]
                    .max((p.volts - (vn - vp)).abs())
                    .max((p.negative_part_volts - vn).abs());
                volts_ds_err[region] = volts_ds_err[region]
                    .max(relative(p.volts_ds, current_ds * (rn + rp)))
                    .max(relative(p.negative_part_volts_ds, current_ds * rn));
                // The per-part lookups of `at` (with an exp-based current) agree with the combined table.
                let q = pair.at(s);
                legacy_err = legacy_err
                    .max((p.volts - q.volts).abs() / (1.0 + q.volts.abs()))
                    .max(relative(p.volts_ds, q.volts_ds))
                    .max(relative(p.current, q.current))
                    .max(relative(p.current_ds, q.current_ds));
                s += 0.000_731;
            }
        }
        // Near zero and on both sides of grid points (where pos rounds onto the grid point).
        let pair = ZenerPair::new(Some(part(24.0)), Some(part(5.1)));
        let mut special = vec![
            0.0,
            -0.0,
            1e-250,
            1e-20,
            3e-15,
            1e-13,
            1e-10,
            TABLE_STEP / 2.0,
        ];
        for k in [1, 2, 31, 32, 33, 500, 1023] {
            let g = k as f64 * TABLE_STEP;
            special.extend([
                g,
                g.next_down(),
                g.next_up(),
                g * (1.0 - 1e-15),
                g * (1.0 + 1e-15),
            ]);
        }
        for s in special.iter().flat_map(|&s| [s, -s]) {
            let p = pair.port(s);
            let (current, current_ds) = (CURRENT_SCALE * s.sinh(), CURRENT_SCALE * s.cosh());
            assert!(
                relative(p.current, current) < 1e-14,
                "s = {s:e}: I {} vs {current}",
                p.current
            );
            assert!(
                relative(p.current_ds, current_ds) < 1e-14,
                "s = {s:e}: dI/ds"
            );
            current_err = current_err.max(relative(p.current, current));
        }
        assert!(
            current_err < 1e-14,
            "current relative error {current_err:e}"
        );
        assert!(slope_err < 1e-14, "dI/ds relative error {slope_err:e}");
        assert!(
            volts_err[1] < 1e-6,
            "voltage error {:e} V above 0.1 nA",
            volts_err[1]
        );
        assert!(
            volts_err[0] < 1e-3,
            "voltage error {:e} V below 0.1 nA",
            volts_err[0]
        );
        assert!(
            volts_ds_err[1] < 1e-3,
            "dV/ds relative error {:e} above 0.1 nA",
            volts_ds_err[1]
        );
        assert!(
            volts_ds_err[0] < 1e-2,
            "dV/ds relative error {:e} below 0.1 nA",
            volts_ds_err[0]
        );
        assert!(legacy_err < 1e-9, "port against at: {legacy_err:e}");
        eprintln!(
            "port: I {current_err:.1e}, dI/ds {slope_err:.1e} (relative); V {:.1e} / {:.1e} V, dV/ds {:.1e} / \
             {:.1e} (relative) above / below 0.1 nA; against at {legacy_err:.1e}",
            volts_err[1], volts_err[0], volts_ds_err[1], volts_ds_err[0]
        );
    }

    /// `split` as documented on `PairPoint`: the positive part takes the total less the negative part's
    /// voltage, and an absent part reads 0 V (as +0.0, whatever the inputs).
    #[test]
    fn split_gives_each_part_its_share() {
        let cases = [(true, true), (false, true), (true, false), (false, false)];
        for (has_positive, has_negative) in cases {
            let pair = ZenerPair::new(
                has_positive.then(|| part(20.0)),
                has_negative.then(|| part(5.1)),
            );
            assert_eq!(pair.is_open(), !has_positive && !has_negative);
            for (total, negative) in [(17.5, -0.7), (-6.1, -5.4), (-0.0, -0.0), (0.3, 0.0)] {
                let (p, n) = pair.split(total, negative);
                let want_n = if has_negative { negative } else { 0.0 };
                let want_p = match (has_positive, has_negative) {
                    (true, true) => total - negative,
                    (true, false) => total,
                    _ => 0.0,
                };
                assert_eq!(
                    (p.to_bits(), n.to_bits()),
                    (want_p.to_bits(), want_n.to_bits())
                );
            }
        }
    }

    /// The cubic pieces join with equal slopes at every grid point (a continuous Jacobian for Newton), and
    /// NaN or infinite s give finite values without panicking.
    #[test]
    fn port_is_smooth_and_finite() {
        let pair = ZenerPair::new(Some(part(24.0)), Some(part(5.1)));
        for k in 1..TABLE_INTERVALS {
            let s = -TABLE_HALF_SPAN + k as f64 * TABLE_STEP;
            let (below, above) = (pair.port(s - 1e-12), pair.port(s + 1e-12));
            for (a, b) in [
                (below.volts_ds, above.volts_ds),
                (below.negative_part_volts_ds, above.negative_part_volts_ds),
                (below.current_ds, above.current_ds),
            ] {
                assert!(
                    (a - b).abs() <= 1e-9 * a.abs().max(b.abs()),
                    "s = {s}: {a} vs {b}"
                );
            }
        }
        for s in [
            f64::NAN,
            f64::INFINITY,
            f64::NEG_INFINITY,
            1e300,
            -1e300,
            32.0,
            -32.0,
        ] {
            let p = pair.port(s);
            for v in [
                p.volts,
                p.volts_ds,
                p.current,
                p.current_ds,
                p.negative_part_volts,
                p.negative_part_volts_ds,
            ] {
                assert!(v.is_finite(), "s = {s}: {p:?}");
            }
        }
    }
}
