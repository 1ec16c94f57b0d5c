//! The transcendental functions of the per-sample path, in one place.
//!
//! Everything goes through `libm` (a pure-Rust port of musl's libm), never
//! `std` or compiler intrinsics, so that a host build and a Cortex-M build give
//! the same bits. With the `fast-math` feature, `exp` and `ln` come from
//! `micromath` instead; both sides of a replay must then use the feature.

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
