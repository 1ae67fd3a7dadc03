//! Running a hot loop in a wider instruction set when the processor has it.
//!
//! [`with_avx2`] runs a closure inside a function compiled for AVX2 (checked at run time), so
//! loops the compiler vectorises use 8 `f32` lanes instead of the baseline's 4. The
//! arithmetic stays the same: Rust never contracts a multiplication and an addition into a
//! fused multiply-add on its own, and the vectoriser keeps the order of every floating-point
//! operation (a loop whose reordering would change a sum, such as a serial total, is not
//! vectorised at all), so the AVX2 build gives the same values bit for bit.

/// Runs `f` in a function compiled with AVX2 enabled when the processor has it (detected at
/// run time, cached by the standard library), else runs it as it is. `f` should be a small
/// closure calling `#[inline(always)]` code, so that the compiler inlines the loop into the
/// AVX2 function; call it per row or per slab, not per element. Mark the closure
/// `#[inline(always)]` (`with_avx2(#[inline(always)] || …)`): without it the compiler may keep
/// the closure as a separate function built for the baseline, and nothing changes.
#[inline(always)]
pub fn with_avx2<R>(f: impl FnOnce() -> R) -> R {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") {
            // SAFETY: the feature this build needs was just detected.
            return unsafe { run_avx2(f) };
        }
    }
    f()
}

/// `f()` compiled with AVX2 enabled.
#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn run_avx2<R>(f: impl FnOnce() -> R) -> R {
    f()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn runs_the_closure_once_and_returns_its_value() {
        let mut calls = 0;
        let v = with_avx2(
            #[inline(always)]
            || {
                calls += 1;
                (0..100).map(|i| i as f32 * 0.5).sum::<f32>()
            },
        );
        assert_eq!(calls, 1);
        // Exact: 0.5 · (0 + … + 99) = 2475, every partial sum a multiple of 0.5 below 2^24.
        assert_eq!(v, 2475.0);
    }
}
