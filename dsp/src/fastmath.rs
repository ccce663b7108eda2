//! Cheap exp and ln for the device equations (relative error below 1e-9 over the ranges used, checked
//! against the standard library in the tests below). Polynomials: Taylor series of 2^f on |f| <= 1/2 and
//! the atanh series of ln on [sqrt(1/2), sqrt(2)] (Abramowitz and Stegun 4.1.27).

const LOG2_E: f64 = std::f64::consts::LOG2_E;
const LN_2: f64 = std::f64::consts::LN_2;

/// e^x; saturates to 0 below -700 and to e^700 above 700.
#[inline(always)]
pub fn exp(x: f64) -> f64 {
    let x = x.clamp(-700.0, 700.0);
    let y = x * LOG2_E;
    // Round to nearest by the 1.5 * 2^52 trick (no libm call on baseline x86-64).
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    let shifted = y + SHIFT;
    let n = shifted - SHIFT;
    let f = (y - n) * LN_2;
    // e^f, |f| <= 0.347: Taylor to degree 9 (error < 1e-11 relative).
    let p = 1.0
        + f * (1.0
            + f * (0.5
                + f * (1.0 / 6.0
                    + f * (1.0 / 24.0
                        + f * (1.0 / 120.0
                            + f * (1.0 / 720.0
                                + f * (1.0 / 5040.0
                                    + f * (1.0 / 40320.0 + f * (1.0 / 362880.0)))))))));
    let bits = ((shifted.to_bits() as i64 as i32 as i64 + 1023) as u64) << 52;
    p * f64::from_bits(bits)
}

/// ln x for finite x > 0 (returns -745 for x <= 0 rather than NaN).
#[inline(always)]
pub fn ln(x: f64) -> f64 {
    if x <= 0.0 || !x.is_finite() {
        return if x.is_finite() { -745.0 } else { 709.0 };
    }
    let bits = x.to_bits();
    let mut exponent = ((bits >> 52) & 0x7ff) as i64 - 1023;
    let mut mantissa = f64::from_bits((bits & 0x000f_ffff_ffff_ffff) | 0x3ff0_0000_0000_0000);
    if exponent == -1023 {
        // Subnormal input: fall back (never on the hot path).
        return x.ln();
    }
    if mantissa > std::f64::consts::SQRT_2 {
        mantissa *= 0.5;
        exponent += 1;
    }
    let t = (mantissa - 1.0) / (mantissa + 1.0);
    let t2 = t * t;
    let series = 2.0
        * t
        * (1.0
            + t2 * (1.0 / 3.0
                + t2 * (1.0 / 5.0
                    + t2 * (1.0 / 7.0 + t2 * (1.0 / 9.0 + t2 * (1.0 / 11.0 + t2 / 13.0))))));
    series + exponent as f64 * LN_2
}

/// (sinh x, cosh x).
#[inline(always)]
pub fn sinh_cosh(x: f64) -> (f64, f64) {
    if x.abs() < 1e-3 {
        let x2 = x * x;
        (x * (1.0 + x2 / 6.0), 1.0 + 0.5 * x2)
    } else {
        let e = exp(x);
        let inv = 1.0 / e;
        (0.5 * (e - inv), 0.5 * (e + inv))
    }
}

/// Lower end of the tabulated range of `ln_softplus` (below it ln softplus z = z to double precision).
const LSP_START: f64 = -40.0;
/// Upper end of the tabulated range (above it ln softplus z = ln z to double precision).
const LSP_END: f64 = 40.0;
/// Table points per unit of z: cubic Hermite error below 1e-8 in ln softplus (h^4/384 times the fourth
/// derivative's largest magnitude).
const LSP_PER_UNIT: f64 = 32.0;
const LSP_POINTS: usize = ((LSP_END - LSP_START) * LSP_PER_UNIT) as usize + 1;

/// Table of (ln softplus z, its derivative logistic(z)/softplus(z)) at LSP_PER_UNIT points per unit.
fn ln_softplus_table() -> &'static [[f64; 2]] {
    static TABLE: std::sync::OnceLock<Vec<[f64; 2]>> = std::sync::OnceLock::new();
    TABLE.get_or_init(|| {
        (0..LSP_POINTS)
            .map(|k| {
                let z = LSP_START + k as f64 / LSP_PER_UNIT;
                let (sp, logistic) = if z > 0.0 {
                    let e = (-z).exp();
                    (z + e.ln_1p(), 1.0 / (1.0 + e))
                } else {
                    let e = z.exp();
                    (e.ln_1p(), e / (1.0 + e))
                };
                [sp.ln(), logistic / sp]
            })
            .collect()
    })
}

/// Build the tables used by the device equations (call outside the audio path; later calls are free).
pub fn prepare_tables() {
    let _ = ln_softplus_table();
}

/// L(z) = ln(ln(1 + e^z)) and dL/dz = logistic(z) / softplus(z), from a cubic Hermite table (absolute error
/// below 1e-8 in L, checked against the standard library in the tests below); exact limits outside it.
#[inline(always)]
pub fn ln_softplus(z: f64) -> (f64, f64) {
    let pos = (z - LSP_START) * LSP_PER_UNIT;
    if pos.is_nan() || pos <= 0.0 {
        // ln(ln(1 + e^z)) = z + ln(1 - e^z/2 + ...) = z to double precision below -40.
        return (if z.is_nan() { LSP_START } else { z }, 1.0);
    }
    if pos >= (LSP_POINTS - 1) as f64 {
        // softplus z = z + e^-z: ln z to double precision above 40.
        return (ln(z), 1.0 / z);
    }
    let table = ln_softplus_table();
    // floor(pos) by the round-to-nearest shift trick on pos - 1/2 (pos is in (0, LSP_POINTS - 1) here).
    const SHIFT: f64 = 6_755_399_441_055_744.0;
    let idx = (((pos - 0.5) + SHIFT).to_bits() as u32 as usize).min(LSP_POINTS - 2);
    let t = pos - idx as f64;
    let [y0, d0] = table[idx];
    let [y1, d1] = table[idx + 1];
    const H: f64 = 1.0 / LSP_PER_UNIT;
    let (m0, m1) = (d0 * H, d1 * H);
    let dy = y1 - y0;
    // Hermite form: y0 + t (m0 + t (c2 + t c3)).
    let c2 = 3.0 * dy - 2.0 * m0 - m1;
    let c3 = m0 + m1 - 2.0 * dy;
    let value = y0 + t * (m0 + t * (c2 + t * c3));
    let deriv = (m0 + t * (2.0 * c2 + t * 3.0 * c3)) * LSP_PER_UNIT;
    (value, deriv)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rel(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    #[test]
    fn exp_and_ln_match_the_standard_library() {
        let mut x = -600.0;
        while x < 600.0 {
            assert!(rel(exp(x), x.exp()) < 1e-10, "exp {x}");
            x += 0.0137;
        }
        let mut x = 1e-300;
        while x < 1e300 {
            assert!(
                (ln(x) - x.ln()).abs() < 1e-12 * (1.0 + x.ln().abs()),
                "ln {x}"
            );
            x *= 1.37;
        }
        for &x in &[-40.0, -3.0, -1e-4, 0.0, 1e-4, 2.0, 30.0] {
            let (s, c) = sinh_cosh(x / 2.0);
            assert!((s - (x / 2.0).sinh()).abs() <= 1e-10 * (x / 2.0).sinh().abs().max(1e-12));
            assert!(rel(c, (x / 2.0).cosh()) < 1e-10);
        }
    }

    #[test]
    fn ln_softplus_matches_the_standard_library() {
        let mut z: f64 = -60.0;
        while z < 60.0 {
            let sp = if z > 0.0 {
                z + (-z).exp().ln_1p()
            } else {
                z.exp().ln_1p()
            };
            let logistic = 1.0 / (1.0 + (-z).exp());
            let (l, dl) = ln_softplus(z);
            assert!(
                (l - sp.ln()).abs() < 1e-8,
                "ln softplus {z}: {l} vs {}",
                sp.ln()
            );
            assert!(rel(dl, logistic / sp) < 1e-5, "derivative {z}");
            z += 0.00731;
        }
    }
}
