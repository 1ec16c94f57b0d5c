//! The transcendental functions of the per-sample path, in one place.
//!
//! Everything goes through `libm` (a pure-Rust port of musl's libm), never
//! `std` or compiler intrinsics, so that a host build and a Cortex-M build give
//! the same bits. With the `fast-math` feature, `exp` and `ln` come from
//! `micromath` instead; both sides of a replay must then use the feature.
//!
//! Measured error of the `fast-math` pair against libm (`firmware/tests/fast_math.rs`,
//! 200 001 points each): `exp` within 2.4e-3 relative on [−30, 0] (the
//! log-sum-exp arguments), `ln` within 6.2e-5 absolute on [1, 8] (the sum it
//! is applied to). The mixture NLL therefore moves by at most ≈ 2.5e-3
//! (absolute) per sample — small beside its in-control spread, but not zero:
//! limits calibrated without the feature are slightly off with it.

/// e^x.
#[inline]
pub fn exp(x: f32) -> f32 {
    #[cfg(feature = "fast-math")]
    {
        micromath::F32Ext::exp(x)
    }
    #[cfg(not(feature = "fast-math"))]
    {
        libm::expf(x)
    }
}

/// Natural logarithm.
#[inline]
pub fn ln(x: f32) -> f32 {
    #[cfg(feature = "fast-math")]
    {
        micromath::F32Ext::ln(x)
    }
    #[cfg(not(feature = "fast-math"))]
    {
        libm::logf(x)
    }
}

/// Cube root (always libm: it runs once per sample per score).
#[inline]
pub fn cbrt(x: f32) -> f32 {
    libm::cbrtf(x)
}

/// Natural logarithm at model load time (always libm, full accuracy).
#[inline]
pub fn ln_exact(x: f32) -> f32 {
    libm::logf(x)
}
