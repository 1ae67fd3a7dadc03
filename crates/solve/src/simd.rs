//! A four-lane `f32` vector for the hot kernel: SSE on x86-64 (part of the baseline, so
//! always present), plain arrays elsewhere. Only what the kernel needs.

#[cfg(target_arch = "x86_64")]
mod imp {
    use std::arch::x86_64::*;

    /// Four `f32` lanes in one SSE register.
    #[derive(Clone, Copy)]
    pub struct F4(__m128);

    impl F4 {
        /// All lanes zero.
        #[inline(always)]
        pub fn zero() -> F4 {
            // SAFETY: SSE is part of the x86-64 baseline.
            F4(unsafe { _mm_setzero_ps() })
        }
        /// All lanes `v`.
        #[inline(always)]
        pub fn splat(v: f32) -> F4 {
            // SAFETY: SSE is part of the x86-64 baseline.
            F4(unsafe { _mm_set1_ps(v) })
        }
        /// Loads four lanes.
        #[inline(always)]
        pub fn load(s: &[f32; 4]) -> F4 {
            // SAFETY: `s` holds four readable floats; unaligned load.
            F4(unsafe { _mm_loadu_ps(s.as_ptr()) })
        }
        /// `self + a·b`, lane-wise.
        #[inline(always)]
        pub fn add_mul(self, a: F4, b: F4) -> F4 {
            // SAFETY: SSE is part of the x86-64 baseline.
            F4(unsafe { _mm_add_ps(self.0, _mm_mul_ps(a.0, b.0)) })
        }
        /// `self − b`, lane-wise.
        #[inline(always)]
        pub fn sub(self, b: F4) -> F4 {
            // SAFETY: SSE is part of the x86-64 baseline.
            F4(unsafe { _mm_sub_ps(self.0, b.0) })
        }
        /// Sum of the lanes, `(l0 + l1) + (l2 + l3)`.
        #[inline(always)]
        pub fn sum(self) -> f32 {
            let mut a = [0.0f32; 4];
            // SAFETY: `a` holds four writable floats; unaligned store.
            unsafe { _mm_storeu_ps(a.as_mut_ptr(), self.0) };
            (a[0] + a[1]) + (a[2] + a[3])
        }
    }
}

#[cfg(not(target_arch = "x86_64"))]
mod imp {
    /// Four `f32` lanes.
    #[derive(Clone, Copy)]
    pub struct F4([f32; 4]);

    impl F4 {
        /// All lanes zero.
        #[inline(always)]
        pub fn zero() -> F4 {
            F4([0.0; 4])
        }
        /// All lanes `v`.
        #[inline(always)]
        pub fn splat(v: f32) -> F4 {
            F4([v; 4])
        }
        /// Loads four lanes.
        #[inline(always)]
        pub fn load(s: &[f32; 4]) -> F4 {
            F4(*s)
        }
        /// `self + a·b`, lane-wise.
        #[inline(always)]
        pub fn add_mul(self, a: F4, b: F4) -> F4 {
            F4(std::array::from_fn(|l| self.0[l] + a.0[l] * b.0[l]))
        }
        /// `self − b`, lane-wise.
        #[inline(always)]
        pub fn sub(self, b: F4) -> F4 {
            F4(std::array::from_fn(|l| self.0[l] - b.0[l]))
        }
        /// Sum of the lanes, `(l0 + l1) + (l2 + l3)`.
        #[inline(always)]
        pub fn sum(self) -> f32 {
            (self.0[0] + self.0[1]) + (self.0[2] + self.0[3])
        }
    }
}

pub use imp::F4;
