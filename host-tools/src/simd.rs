//! Wider vectors where the processor has them, with the same results.
//!
//! The numeric kernels (EM statistics, moments, projection) are written
//! lane by lane so that the compiler vectorises them without changing the
//! order of any operation. Built for the x86-64 baseline they use 2-wide
//! SSE2 vectors; a function defined with `kernel!` runs the very same
//! code compiled with AVX2 (4-wide) when the processor has it, chosen at run
//! time. AVX2 alone does not allow fused multiply-add, and LLVM never
//! re-associates floating-point arithmetic on its own, so every result is
//! bit for bit the one of the baseline build: a fit is byte-identical on any
//! x86-64 machine (`fit_is_the_same_with_and_without_avx2` in
//! `host-tools/tests/cli.rs` compares the two builds' model files).

/// Whether `kernel!` functions take the AVX2 path: the processor has AVX2 and
/// the environment variable `PLUMB_SIMD` is not `baseline` (which keeps the
/// baseline build, to compare the two).
pub fn avx2() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        static BASELINE: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
        let baseline = *BASELINE
            .get_or_init(|| std::env::var_os("PLUMB_SIMD").is_some_and(|v| v == "baseline"));
        !baseline && std::arch::is_x86_feature_detected!("avx2")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

/// Defines a function whose body runs compiled for AVX2 when the processor
/// has it, else as the baseline build compiles it:
///
/// ```ignore
/// simd::kernel! {
///     /// Docs.
///     fn name(a: &[f64], n: usize) -> f64 { /* body */ }
/// }
/// ```
///
/// The body is an `#[inline(always)]` inner function, so it is compiled
/// into each of the two callers with that caller's target features.
macro_rules! kernel {
    (
        $(#[$meta:meta])*
        $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty $body:block
    ) => {
        $(#[$meta])*
        $vis fn $name($($arg: $ty),*) -> $ret {
            #[inline(always)]
            fn generic($($arg: $ty),*) -> $ret $body
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                fn wide($($arg: $ty),*) -> $ret {
                    generic($($arg),*)
                }
                if $crate::simd::avx2() {
                    #[allow(unsafe_code)]
                    // SAFETY: `wide` only needs AVX2, and the processor has
                    // it (checked at run time just above).
                    return unsafe { wide($($arg),*) };
                }
            }
            generic($($arg),*)
        }
    };
}
pub(crate) use kernel;

/// Asks the processor to bring `data` into its caches ahead of use: a hint
/// that changes no value. A kernel that walks a large array tile by tile
/// calls it on the next tile while it works on this one, so the first touch
/// of each tile does not wait for memory.
#[inline(always)]
pub fn prefetch(data: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    for line in data.chunks(8) {
        #[allow(unsafe_code)]
        // SAFETY: PREFETCHT0 belongs to SSE, which every x86-64 processor
        // has; it is a hint that never faults and writes nothing, and the
        // address is inside a live slice.
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
                line.as_ptr().cast(),
            )
        };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = data;
}
