//! Zener diode: exponential forward and breakdown junction with series resistance, and the antiseries pair.

/// Thermal voltage used throughout (V), BRIEF section 4.
pub const THERMAL_VOLTAGE: f64 = 0.025852;
/// Saturation current of the forward junction (A), BRIEF section 4.
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
/// (BRIEF section 4; GMIN as in SPICE).
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
    /// falling back to rs = 0, nbv = Zzk Izk / Vt when rs would be negative (BRIEF section 4).
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

/// Both junctions of a pair on one grid in s: the pair's junction voltage Vn(s) - Vp(-s) and the negative-clamp
/// part's own Vn(s), with their s-derivatives, so one lookup gives the pair and the split between its parts.
#[derive(Clone, Debug)]
struct PairTable {
    start: f64,
    step: f64,
    inv_step: f64,
    /// (pair volts, negative-part volts, their dV/ds) at each point.
    points: Vec<[f64; 4]>,
}

impl PairTable {
    /// The pair's table for the negative-clamp part `negative` carrying I = CURRENT_SCALE sinh s and the
    /// positive-clamp part `positive` carrying -I (either may be absent). The grid is symmetric about s = 0,
    /// so the mirrored positive-part table interpolates exactly as a separate lookup at -s would.
    fn new(negative: Option<&JunctionTable>, positive: Option<&JunctionTable>) -> PairTable {
        let last = TABLE_POINTS - 1;
        let step = 2.0 * TABLE_HALF_SPAN / last as f64;
        let points = (0..TABLE_POINTS)
            .map(|i| {
                let [vn, dn] = negative.map_or([0.0; 2], |t| t.points[i]);
                let [vp, dp] = positive.map_or([0.0; 2], |t| t.points[last - i]);
                [vn - vp, vn, dn + dp, dn]
            })
            .collect();
        PairTable {
            start: -TABLE_HALF_SPAN,
            step,
            inv_step: 1.0 / step,
            points,
        }
    }

    /// ([pair volts, negative-part volts], their s-derivatives) at s.
    #[inline]
    fn eval(&self, s: f64) -> ([f64; 2], [f64; 2]) {
        hermite(&self.points, self.start, self.step, self.inv_step, s)
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
        let series_resistance = positive.as_ref().map_or(0.0, |z| z.part.rs)
            + negative.as_ref().map_or(0.0, |z| z.part.rs);
        ZenerPair {
            positive,
            negative,
            combined,
            series_resistance,
        }
    }

    /// Pair voltage and current with their s-derivatives at s, and the negative-clamp part's voltage, from
    /// the combined table (one lookup); the positive part's voltage is left at zero (see `split`).
    #[inline]
    pub fn port(&self, s: f64) -> PairPoint {
        let (sinh, cosh) = crate::fastmath::sinh_cosh(s);
        let current = CURRENT_SCALE * sinh;
        let current_ds = CURRENT_SCALE * cosh;
        let ([vj, vn], [dvj, dvn]) = match &self.combined {
            Some(t) => t.eval(s),
            None => ([0.0; 2], [0.0; 2]),
        };
        let rn = self.negative.as_ref().map_or(0.0, |z| z.part.rs);
        PairPoint {
            volts: vj + self.series_resistance * current,
            volts_ds: dvj + self.series_resistance * current_ds,
            current,
            current_ds,
            positive_part_volts: 0.0,
            negative_part_volts: vn + rn * current,
            negative_part_volts_ds: dvn + rn * current_ds,
        }
    }

    /// (positive-part, negative-part) voltages as in `PairPoint`, given the pair's total voltage and the
    /// negative part's voltage from `port`: the positive part takes the rest of the total.
    #[inline]
    pub fn split(&self, total_volts: f64, negative_part_volts: f64) -> (f64, f64) {
        match (&self.positive, &self.negative) {
            (Some(_), Some(_)) => (total_volts - negative_part_volts, negative_part_volts),
            (None, Some(_)) => (0.0, negative_part_volts),
            (Some(_), None) => (total_volts, 0.0),
            (None, None) => (0.0, 0.0),
        }
    }

    /// True when the switch position holds no part (the clamp node is left open).
    pub fn is_open(&self) -> bool {
        self.positive.is_none() && self.negative.is_none()
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
}
