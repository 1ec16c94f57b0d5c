//! The error of the `fast-math` approximations (micromath) against libm, over
//! the ranges the detector uses them on. The figures here are the ones the
//! `math` module documents.

/// Relative error of micromath's exp against libm's expf on [−30, 0] (the
/// log-sum-exp arguments `a_c − max`, clipped where exp underflows to noise
/// next to the leading term e⁰ = 1), and absolute error of ln on [1, 8] (the
/// sum of at most `MAX_MIXTURE` terms each in (0, 1], at least one equal to 1).
#[test]
fn micromath_error_against_libm_is_as_documented() {
    let mut worst_exp = 0.0f64;
    let mut worst_ln = 0.0f64;
    let n = 200_000;
    for i in 0..=n {
        let x = -30.0 + 30.0 * i as f32 / n as f32;
        let a = micromath::F32Ext::exp(x) as f64;
        let b = libm::expf(x) as f64;
        worst_exp = worst_exp.max(((a - b) / b).abs());
        let y = 1.0 + 7.0 * i as f32 / n as f32;
        let a = micromath::F32Ext::ln(y) as f64;
        let b = libm::logf(y) as f64;
        worst_ln = worst_ln.max((a - b).abs());
    }
    println!("micromath exp: worst relative error {worst_exp:.3e} on [-30, 0]");
    println!("micromath ln: worst absolute error {worst_ln:.3e} on [1, 8]");
    // Documented bounds in firmware/src/math.rs (measured here, rounded up).
    assert!(worst_exp < 3e-3, "exp {worst_exp:e}");
    assert!(worst_ln < 1e-4, "ln {worst_ln:e}");
    // And they are approximations: if these became exact the docs would lie.
    assert!(worst_exp > 1e-6 && worst_ln > 1e-6);
}

/// Our f32 cube root against libm's `cbrtf` (which refines in f64): within
/// 2 ulp over 10⁻³⁰…10³⁰, on subnormals, and exact on perfect cubes that f32
/// represents.
#[test]
fn cube_root_within_two_ulp_of_libm() {
    let ulps = |a: f32, b: f32| (a.to_bits() as i64 - b.to_bits() as i64).unsigned_abs();
    let mut worst = 0u64;
    let n = 400_000;
    for i in 0..=n {
        let e = -30.0 + 60.0 * i as f64 / n as f64;
        for x in [10f64.powf(e) as f32, -(10f64.powf(e) as f32)] {
            worst = worst.max(ulps(plumb_firmware::math::cbrt(x), libm::cbrtf(x)));
        }
    }
    for bits in (1u32..0x0080_0000).step_by(4099) {
        let x = f32::from_bits(bits);
        worst = worst.max(ulps(plumb_firmware::math::cbrt(x), libm::cbrtf(x)));
    }
    println!("cube root: worst {worst} ulp against libm");
    assert!(worst <= 2, "{worst} ulp");
    for k in [1.0f32, 8.0, 27.0, 64.0, 1000.0, 0.125] {
        assert_eq!(plumb_firmware::math::cbrt(k), libm::cbrtf(k), "{k}");
    }
    assert_eq!(plumb_firmware::math::cbrt(0.0), 0.0);
    assert!(plumb_firmware::math::cbrt(f32::NAN).is_nan());
    assert_eq!(plumb_firmware::math::cbrt(f32::INFINITY), f32::INFINITY);
}
