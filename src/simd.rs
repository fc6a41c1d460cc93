//! Element-wise loops compiled twice, for the baseline target and for
//! AVX2 + FMA, with the wide version chosen at run time: the flow's
//! compute core and the optimizer run their per-element passes through
//! [`elementwise!`] so that a portable build still uses the wide registers.

/// Whether this CPU runs the AVX2 + FMA versions of the element-wise loops.
#[cfg(target_arch = "x86_64")]
pub fn has_avx2() -> bool {
    static FLAG: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *FLAG.get_or_init(|| is_x86_feature_detected!("avx2") && is_x86_feature_detected!("fma"))
}

/// Defines an element-wise function twice: for the baseline target and,
/// on x86-64, compiled for AVX2 + FMA (8 lanes) and chosen at run time.
macro_rules! elementwise {
    ($(#[$meta:meta])* fn $name:ident($($arg:ident : $ty:ty),* $(,)?) $(-> $ret:ty)? $body:block) => {
        $(#[$meta])*
        fn $name($($arg: $ty),*) $(-> $ret)? {
            #[inline(always)]
            fn body($($arg: $ty),*) $(-> $ret)? $body
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2,fma")]
                unsafe fn wide($($arg: $ty),*) $(-> $ret)? {
                    body($($arg),*)
                }
                if $crate::simd::has_avx2() {
                    // SAFETY: the CPU has AVX2 and FMA (checked above).
                    return unsafe { wide($($arg),*) };
                }
            }
            body($($arg),*)
        }
    };
}
pub(crate) use elementwise;
