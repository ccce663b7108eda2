//! Multiply-add, a b + c, the way the model's hot path computes it. Every x86-64 processor has separate
//! multiply and add (two roundings); most made since 2013 also fuse them into one instruction (FMA3: one
//! rounding, fewer operations on the chain from one sample to the next). The hot path is written once, generic
//! over `Arith`; the engine runs the `Fused` copy, compiled with the FMA instructions enabled, where the
//! processor reports them, and the `Separate` copy elsewhere. The two differ by a rounding here and there, far
//! below anything the model resolves; on one machine the output is always the same.

/// How a b + c is computed.
pub trait Arith: Copy + 'static {
    /// True for the fused form.
    const FUSED: bool;
    /// a b + c.
    fn madd(a: f64, b: f64, c: f64) -> f64;
}

/// a b + c as a multiply then an add (two roundings); any processor.
#[derive(Clone, Copy, Debug)]
pub struct Separate;

impl Arith for Separate {
    const FUSED: bool = false;
    #[inline(always)]
    fn madd(a: f64, b: f64, c: f64) -> f64 {
        a * b + c
    }
}

/// a b + c fused (one rounding), for code compiled with the FMA instructions enabled (elsewhere `f64::mul_add`
/// is a slow library call). The model's fused copy also uses the packed FMA instruction directly, so the crate
/// runs it only where `fused_available` says the processor has it.
#[derive(Clone, Copy, Debug)]
pub struct Fused;

impl Arith for Fused {
    const FUSED: bool = true;
    #[inline(always)]
    fn madd(a: f64, b: f64, c: f64) -> f64 {
        a.mul_add(b, c)
    }
}

/// True when this processor has the fused multiply-add instructions the `Fused` copy is compiled for (set
/// `BREAKDOWN_SEPARATE_MADD=1` to run the `Separate` copy anyway, for example to compare the two).
pub fn fused_available() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        std::arch::is_x86_feature_detected!("fma")
            && std::env::var_os("BREAKDOWN_SEPARATE_MADD").is_none()
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}
