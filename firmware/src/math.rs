//! The transcendental functions of the per-sample path, in one place.
//!
//! `exp` and `ln` go through `libm` (a pure-Rust port of musl's libm), never
//! `std` or compiler intrinsics, so that a host build and a Cortex-M build give
//! the same bits; the cube root is our own, in plain `f32` arithmetic (see
//! [`cbrt`]), for the same reason and because it is ten times cheaper on a
//! single-precision FPU. With the `fast-math` feature, `exp` and `ln` come from
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

/// Cube root in `f32` arithmetic only.
///
/// libm's `cbrtf` refines its estimate in double precision, which a
/// single-precision FPU (Cortex-M4F) runs in software at several hundred
/// instructions a call. This one starts from the exponent-thirding bit
/// estimate (relative error below 1/32, as in the FreeBSD/musl `cbrtf` seed)
/// and takes three Newton steps `y ← (2y + x/y²)/3`, each of which roughly
/// squares the relative error, using only IEEE-754 `+ − × ÷` on `f32`: the
/// result is the same bits on every IEEE platform. Measured against libm's
/// `cbrtf` over 10⁻³⁰…10³⁰ and subnormals: within 2 ulp
/// (`firmware/tests/fast_math.rs`).
#[inline]
pub fn cbrt(x: f32) -> f32 {
    if x == 0.0 || !x.is_finite() {
        return x;
    }
    let neg = x < 0.0;
    let mut a = if neg { -x } else { x };
    // Subnormal inputs: scale by 2^24 first (cube root 2^8), undone below.
    let mut post = 1.0f32;
    if a < f32::MIN_POSITIVE {
        a *= 16_777_216.0;
        post = 1.0 / 256.0;
    }
    const SEED: u32 = 709_958_130;
    let mut y = f32::from_bits(a.to_bits() / 3 + SEED);
    for _ in 0..3 {
        y = (y + y + a / (y * y)) / 3.0;
    }
    let y = y * post;
    if neg {
        -y
    } else {
        y
    }
}

/// Natural logarithm at model load time (always libm, full accuracy).
#[inline]
pub fn ln_exact(x: f32) -> f32 {
    libm::logf(x)
}
