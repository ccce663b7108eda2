//! Flush-to-zero / denormals-are-zero while processing (x86 MXCSR bits 15 and 6), restored on drop.

/// Sets FTZ and DAZ for its lifetime on x86-64; does nothing elsewhere (AArch64 flushes with FZ by default
/// in most hosts, and the model's f64 state decays to exact zeros through its DC terms).
pub struct FlushGuard {
    #[cfg(target_arch = "x86_64")]
    saved: u32,
}

impl FlushGuard {
    #[inline]
    #[allow(deprecated)]
    pub fn new() -> Self {
        #[cfg(target_arch = "x86_64")]
        {
            // SAFETY: reading and writing MXCSR only changes floating-point modes of this thread.
            unsafe {
                use std::arch::x86_64::{_mm_getcsr, _mm_setcsr};
                let saved = _mm_getcsr();
                _mm_setcsr(saved | 0x8040);
                FlushGuard { saved }
            }
        }
        #[cfg(not(target_arch = "x86_64"))]
        FlushGuard {}
    }
}

impl Default for FlushGuard {
    fn default() -> Self {
        Self::new()
    }
}

impl Drop for FlushGuard {
    #[inline]
    #[allow(deprecated)]
    fn drop(&mut self) {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: restores the mode saved in `new`.
        unsafe {
            std::arch::x86_64::_mm_setcsr(self.saved);
        }
    }
}
