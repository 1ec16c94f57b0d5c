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

#[cfg(feature = "fast-math")]
#[path = "../../shared-model/tests/support/mod.rs"]
mod support;

#[cfg(feature = "fast-math")]
#[path = "support/scores.rs"]
mod scores;

/// With `fast-math` on, the detector's scores against the f64 formulas:
/// SPE and T² use no exp or ln, so they stay within their f32 rounding
/// bounds (`scores::rounding_bounds`); the NLL may move by the documented
/// ≈ 2.5e-3 (firmware/src/math.rs) on top of its rounding bound. Run with
/// `cargo test -p plumb-firmware --features fast-math --test fast_math`.
#[cfg(feature = "fast-math")]
#[test]
fn fast_math_scores_within_the_documented_nll_bound() {
    use plumb_firmware::Detector;
    use scores::{draw, reference, rounding_bounds};
    use support::{example_model, Rng};
    // The documented bound: exp within 2.4e-3 relative moves the sum
    // Σ_c e^{a_c − max} (≥ 1) by at most 2.4e-3 relative, hence its log by
    // at most −ln(1 − 2.4e-3) = 2.403e-3; ln within 6.2e-5 absolute on
    // [1, 8] (the sum lies in [1, k], k ≤ 8). Total 2.47e-3, documented as
    // ≈ 2.5e-3.
    const DOCUMENTED: f64 = 2.5e-3;
    let mut rng = Rng(7);
    let mut worst_nll = 0.0f64;
    let mut count = 0usize;
    for (d, m, k) in [(4, 2, 2), (12, 3, 3), (32, 8, 4), (64, 16, 8)] {
        for seed in 0..4 {
            let model = example_model(d, m, k, seed);
            let det = Detector::new(model.to_device().unwrap()).unwrap();
            for n in 0..300 {
                let noise = [0.05, 0.5, 3.0][n % 3];
                let x = draw(&model, &mut rng, noise);
                let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
                let xr: Vec<f64> = xf.iter().map(|v| *v as f64).collect();
                let (spe, t2, nll, _) = reference(&model, &xr);
                let [b_spe, b_t2, b_nll] = rounding_bounds(&model, &xr);
                let got = det.score(&xf).expect("finite sample").scores;
                let ctx = format!("d {d}, m {m}, k {k}, seed {seed}, sample {n}");
                assert!((got.spe as f64 - spe).abs() <= b_spe, "SPE ({ctx})");
                assert!((got.t2 as f64 - t2).abs() <= b_t2, "T² ({ctx})");
                let e = (got.nll as f64 - nll).abs();
                assert!(
                    e <= DOCUMENTED + b_nll,
                    "NLL ({ctx}): {} vs {nll}, error {e:e} above {DOCUMENTED:e} + {b_nll:e}",
                    got.nll
                );
                worst_nll = worst_nll.max(e);
                count += 1;
            }
        }
    }
    println!("fast-math: worst NLL error {worst_nll:.3e} over {count} samples");
    assert_eq!(count, 4 * 4 * 300);
}
