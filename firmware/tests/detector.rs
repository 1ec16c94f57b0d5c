//! The detector against an f64 reference, published run lengths, its states,
//! and "never panics / faults never touch the statistics" properties.
#![allow(clippy::needless_range_loop)] // index loops mirror the formulas

#[path = "../../shared-model/tests/support/mod.rs"]
mod support;

use plumb_firmware::stats::{Cusum, Ewma};
use plumb_firmware::{Detector, DriftState, Event, Fault, Score};
use plumb_model::{ModelError, ModelOwned};
use proptest::prelude::*;
use support::{example_model, Rng};

/// f64 reference of a sample's standardised features `z`, latent scores
/// `t = Pᵀz` and per-component log terms `ln π_c + ln N(t; ν_c, v_c)`,
/// written from the formulas in the crate docs, independent of the f32 code
/// path.
fn reference_parts(model: &ModelOwned, x: &[f64]) -> (Vec<f64>, Vec<f64>, Vec<f64>) {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let k = model.dims.mixture as usize;
    let z: Vec<f64> = (0..d)
        .map(|i| (x[i] - model.mean[i] as f64) / model.scale[i] as f64)
        .collect();
    let t: Vec<f64> = (0..m)
        .map(|j| {
            (0..d)
                .map(|i| z[i] * model.loadings[i * m + j] as f64)
                .sum()
        })
        .collect();
    let logs: Vec<f64> = (0..k)
        .map(|c| {
            let mut a = (model.weights[c] as f64).ln();
            for j in 0..m {
                let v = model.mix_variances[c * m + j] as f64;
                let e = t[j] - model.mix_means[c * m + j] as f64;
                a -= 0.5 * ((2.0 * std::f64::consts::PI * v).ln() + e * e / v);
            }
            a
        })
        .collect();
    (z, t, logs)
}

/// f64 reference of the per-sample scores ([`reference_parts`]).
fn reference(model: &ModelOwned, x: &[f64]) -> (f64, f64, f64, f64) {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let (z, t, logs) = reference_parts(model, x);
    let p = |i: usize, j: usize| model.loadings[i * m + j] as f64;
    let spe: f64 = (0..d)
        .map(|i| {
            let r = z[i] - (0..m).map(|j| p(i, j) * t[j]).sum::<f64>();
            r * r
        })
        .sum();
    let t2: f64 = (0..m)
        .map(|j| t[j] * t[j] / model.eigenvalues[j] as f64)
        .sum();
    let best = logs.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    let nll = -(best + logs.iter().map(|a| (a - best).exp()).sum::<f64>().ln());
    let znorm2 = z.iter().map(|v| v * v).sum();
    (spe, t2, nll, znorm2)
}

/// Draws a sample near the model: latent point from a mixture component,
/// pushed back through the loadings, plus residual noise of size `noise`.
fn draw(model: &ModelOwned, rng: &mut Rng, noise: f64) -> Vec<f64> {
    let d = model.dims.features as usize;
    let m = model.dims.components as usize;
    let k = model.dims.mixture as usize;
    let c = (rng.next_u64() % k as u64) as usize;
    let t: Vec<f64> = (0..m)
        .map(|j| {
            model.mix_means[c * m + j] as f64
                + rng.normal() * (model.mix_variances[c * m + j] as f64).sqrt()
        })
        .collect();
    (0..d)
        .map(|i| {
            let z: f64 = (0..m)
                .map(|j| model.loadings[i * m + j] as f64 * t[j])
                .sum::<f64>()
                + noise * rng.normal();
            model.mean[i] as f64 + model.scale[i] as f64 * z
        })
        .collect()
}

#[test]
fn f32_scores_match_f64_reference() {
    // Tolerance: the f32 inner products of length n ≤ 64 carry a forward
    // error of at most γ_n · Σ|a_i b_i| with γ_n ≈ n·2⁻²⁴ (Higham, *Accuracy and
    // Stability of Numerical Algorithms*, 2nd ed., §3.1): ≈ 3.8e-6 for n = 64.
    // Projection, reconstruction and squaring chain about four of them, so the
    // error in SPE and T² is below ≈ 2e-5 · ‖z‖² (relative to the energy of
    // the sample, since r = z − Pt cancels). We allow 1e-4 · ‖z‖² + 1e-4 · |ref|.
    // NLL adds k exponentials and one logarithm (libm expf/logf are within
    // 1 ulp) on log-scale values: 1e-4 · (1 + |ref| + T²-like quad) suffices.
    let mut rng = Rng(7);
    let mut worst = [0.0f64; 3];
    for (d, m, k) in [(4, 2, 2), (12, 3, 3), (32, 8, 4), (64, 16, 8)] {
        for seed in 0..4 {
            let model = example_model(d, m, k, seed);
            let det = Detector::new(model.to_device().unwrap()).unwrap();
            for n in 0..300 {
                let noise = [0.05, 0.5, 3.0][n % 3];
                let x = draw(&model, &mut rng, noise);
                let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
                let xr: Vec<f64> = xf.iter().map(|v| *v as f64).collect();
                let (spe, t2, nll, zz) = reference(&model, &xr);
                let got = det.score(&xf).expect("finite sample").scores;
                assert!(got.nll >= det.nll_floor() - 1e-4 * (1.0 + got.nll.abs()));
                let errs = [
                    (got.spe as f64 - spe).abs() / (zz + spe.abs()),
                    (got.t2 as f64 - t2).abs() / (zz + t2.abs()),
                    (got.nll as f64 - nll).abs() / (1.0 + nll.abs() + zz),
                ];
                for (w, e) in worst.iter_mut().zip(errs) {
                    *w = w.max(e);
                }
            }
        }
    }
    for (name, w) in ["spe", "t2", "nll"].iter().zip(worst) {
        assert!(w < 1e-4, "{name}: worst scaled error {w:e}");
    }
}

/// The first of the most likely mixture components by the f64 formulas,
/// and how far ahead of the runner-up it is (log scale).
fn reference_mode(model: &ModelOwned, x: &[f64]) -> (usize, f64) {
    let (_, _, logs) = reference_parts(model, x);
    let mut ranked: Vec<(f64, usize)> = logs.into_iter().zip(0..).collect();
    ranked.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    let gap = ranked.get(1).map_or(f64::INFINITY, |r| ranked[0].0 - r.0);
    (ranked[0].1, gap)
}

/// The SPE's EWMA smooths the SPE standardised within each sample's mode
/// (`(∛SPE − centre_c) / spread_c`, c the most likely component), its CUSUM
/// the SPE standardised with the global centre and spread: both against an
/// f64 recursion written from those definitions (Roberts 1959 for the EWMA,
/// Page 1954 for the CUSUM).
#[test]
fn spe_ewma_is_standardised_within_the_mode() {
    let mut model = example_model(12, 3, 3, 5);
    model.spe_center_by_mode = vec![0.2, 0.5, 0.9];
    model.spe_spread_by_mode = vec![0.1, 0.3, 0.6];
    let mp = model.monitor;
    let (lambda, slack, cap) = (
        mp.ewma_lambda as f64,
        mp.spe.cusum_slack as f64,
        2.0 * mp.spe.cusum_limit as f64,
    );
    let mut det = Detector::new(model.to_device().unwrap()).unwrap();
    let mut rng = Rng(11);
    let (mut ewma, mut cusum) = (0.0f64, 0.0f64);
    let mut seen = [0usize; 3];
    for n in 0..600 {
        let x = draw(&model, &mut rng, [0.05, 0.3][n % 2]);
        let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
        let xr: Vec<f64> = xf.iter().map(|v| *v as f64).collect();
        let (spe, ..) = reference(&model, &xr);
        let (mode, gap) = reference_mode(&model, &xr);
        let scored = det.score(&xf).expect("a sample near the model");
        // f32 and f64 may disagree only on a near tie (none at this seed).
        assert!(gap < 1e-3 || scored.mode == mode, "sample {n}: mode");
        seen[mode] += 1;
        let g = spe.cbrt();
        let v = (g - model.spe_center_by_mode[mode] as f64) / model.spe_spread_by_mode[mode] as f64;
        let u = (g - mp.spe.center as f64) / mp.spe.spread as f64;
        ewma += lambda * (v - ewma);
        cusum = (cusum + u - slack).clamp(0.0, cap);
        let out = det.update(&xf);
        assert!(out.scores.is_some());
        let tr = det.track(Score::Spe);
        // Tolerance: ∛ of an SPE with relative error ≤ 1e-4 (see
        // f32_scores_match_f64_reference) moves by ≤ 1e-4/3 relative, i.e. by
        // < 1e-4 here (∛SPE < 3), over a spread ≥ 0.1: ≤ 1e-3 per term, and
        // the recursions only average (EWMA) or add up to the cap (CUSUM,
        // bounded by the terms summed since its last zero).
        assert!(
            (tr.ewma.value() as f64 - ewma).abs() < 2e-3,
            "sample {n}: EWMA {} vs {ewma}",
            tr.ewma.value()
        );
        assert!(
            (tr.cusum.value() as f64 - cusum).abs() < 2e-3 * (1.0 + cusum),
            "sample {n}: CUSUM {} vs {cusum}",
            tr.cusum.value()
        );
        assert!((tr.last_u as f64 - u).abs() < 2e-3, "sample {n}: u");
    }
    // Every mode took part, so every centre and spread was used.
    assert!(seen.iter().all(|c| *c > 50), "{seen:?}");
}

#[test]
fn top_contributions_are_the_largest_residuals() {
    let model = example_model(10, 3, 2, 3);
    let det = Detector::new(model.to_device().unwrap()).unwrap();
    let mut rng = Rng(11);
    for _ in 0..50 {
        let x: Vec<f32> = draw(&model, &mut rng, 1.0)
            .iter()
            .map(|v| *v as f32)
            .collect();
        let s = det.score(&x).unwrap();
        // Recompute r_i² in f64 and compare the ranking of the top three.
        let xr: Vec<f64> = x.iter().map(|v| *v as f64).collect();
        let mut r2: Vec<(usize, f64)> = (0..10)
            .map(|i| {
                let mut one = model.clone();
                // Residual of feature i alone: SPE of a model that only
                // looks at feature i is awkward; recompute directly instead.
                one.dims.features = 10;
                let z: Vec<f64> = (0..10)
                    .map(|f| (xr[f] - model.mean[f] as f64) / model.scale[f] as f64)
                    .collect();
                let t: Vec<f64> = (0..3)
                    .map(|j| {
                        (0..10)
                            .map(|f| z[f] * model.loadings[f * 3 + j] as f64)
                            .sum()
                    })
                    .collect();
                let r = z[i]
                    - (0..3)
                        .map(|j| model.loadings[i * 3 + j] as f64 * t[j])
                        .sum::<f64>();
                (i, r * r)
            })
            .collect();
        r2.sort_by(|a, b| b.1.partial_cmp(&a.1).unwrap());
        for (c, (i, v)) in s.top.iter().zip(&r2) {
            assert_eq!(c.feature as usize, *i);
            assert!((c.value as f64 - v).abs() <= 1e-4 * (1.0 + v));
        }
        assert!(s.top[0].value >= s.top[1].value && s.top[1].value >= s.top[2].value);
    }
}

fn detector(seed: u64) -> (ModelOwned, Detector) {
    let model = example_model(6, 2, 2, seed);
    let det = Detector::new(model.to_device().unwrap()).unwrap();
    (model, det)
}

/// Sets each score's centre and spread from clean samples (a miniature of
/// the host calibration) so the state tests run on a calibrated model.
fn calibrated(model: &ModelOwned, rng: &mut Rng) -> ModelOwned {
    let det = Detector::new(model.to_device().unwrap()).unwrap();
    let n = 4000;
    let mut sums = [(0.0f64, 0.0f64); 3];
    for _ in 0..n {
        let x: Vec<f32> = draw(model, rng, 0.05).iter().map(|v| *v as f32).collect();
        let s = det.score(&x).unwrap().scores;
        for (acc, y) in sums.iter_mut().zip(det.transformed(&s)) {
            acc.0 += y as f64;
            acc.1 += (y as f64) * (y as f64);
        }
    }
    let mut cal = model.clone();
    let m = &mut cal.monitor;
    for (lim, (s, ss)) in [&mut m.spe, &mut m.t2, &mut m.nll].into_iter().zip(sums) {
        let mean = s / n as f64;
        lim.center = mean as f32;
        lim.spread = (ss / n as f64 - mean * mean).sqrt() as f32;
        // h = 8 and L = 1.0 (≈ 4.4 EWMA sd at λ = 0.1): rare false alarms.
        lim.cusum_limit = 8.0;
        lim.ewma_limit = 1.0;
    }
    // Every mode as the whole: the state tests are about the states.
    let k = cal.weights.len();
    cal.spe_center_by_mode = vec![cal.monitor.spe.center; k];
    cal.spe_spread_by_mode = vec![cal.monitor.spe.spread; k];
    cal
}

/// Feeds `n` samples with feature 0 shifted by `shift` scales; collects events.
fn feed(
    det: &mut Detector,
    model: &ModelOwned,
    rng: &mut Rng,
    n: usize,
    shift: f64,
    events: &mut Vec<(u64, Event)>,
) {
    for _ in 0..n {
        let mut x = draw(model, rng, 0.05);
        x[0] += shift * model.scale[0] as f64;
        let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
        let o = det.update(&xf);
        if let Some(e) = o.event {
            events.push((o.index, e));
        }
    }
}

#[test]
fn states_prime_raise_hold_and_clear_once() {
    let mut rng = Rng(99);
    let model = calibrated(&example_model(6, 2, 2, 5), &mut rng);
    let mut det = Detector::new(model.to_device().unwrap()).unwrap();
    assert_eq!(det.state(), DriftState::Priming);
    let mut events = Vec::new();
    feed(&mut det, &model, &mut rng, 2000, 0.0, &mut events);
    assert_eq!(
        events.first(),
        Some(&(9, Event::Primed)),
        "warm-up of 10 valid samples"
    );
    assert_eq!(events.len(), 1, "no flag on nominal data: {events:?}");
    feed(&mut det, &model, &mut rng, 400, 8.0, &mut events);
    let raised: Vec<_> = events
        .iter()
        .filter(|e| matches!(e.1, Event::Raised { .. }))
        .collect();
    assert_eq!(
        raised.len(),
        1,
        "one flag for one step, no flicker: {events:?}"
    );
    let (at, Event::Raised { drivers }) = *raised[0] else {
        unreachable!()
    };
    assert!((2000..2020).contains(&at), "raised at {at}");
    assert!(drivers.contains(Score::Spe), "an off-model step drives SPE");
    assert_eq!(det.state(), DriftState::Drifting);
    feed(&mut det, &model, &mut rng, 1000, 0.0, &mut events);
    let cleared: Vec<_> = events.iter().filter(|e| e.1 == Event::Cleared).collect();
    assert_eq!(cleared.len(), 1, "{events:?}");
    assert!(cleared[0].0 >= at + 30, "min_hold respected");
    assert_eq!(det.state(), DriftState::Watching);
}

#[test]
fn faults_are_counted_and_never_touch_statistics() {
    let (model, mut det) = detector(1);
    let mut rng = Rng(3);
    for _ in 0..50 {
        let x: Vec<f32> = draw(&model, &mut rng, 0.1)
            .iter()
            .map(|v| *v as f32)
            .collect();
        det.update(&x);
    }
    let before = det.clone();
    let good: Vec<f32> = draw(&model, &mut rng, 0.1)
        .iter()
        .map(|v| *v as f32)
        .collect();
    let cases: Vec<(Vec<f32>, Fault)> = vec![
        (vec![1.0; 5], Fault::WrongLength { got: 5 }),
        (vec![], Fault::WrongLength { got: 0 }),
        (
            {
                let mut x = good.clone();
                x[2] = f32::NAN;
                x
            },
            Fault::NonFinite { feature: 2 },
        ),
        (
            {
                let mut x = good.clone();
                x[0] = f32::NEG_INFINITY;
                x
            },
            Fault::NonFinite { feature: 0 },
        ),
        (
            {
                let mut x = good.clone();
                x[5] = 1e30;
                x
            },
            Fault::OutOfRange { feature: 5 },
        ),
        // A non-finite feature is the fault even after an out-of-range one.
        (
            {
                let mut x = good.clone();
                x[1] = 1e30;
                x[4] = f32::INFINITY;
                x
            },
            Fault::NonFinite { feature: 4 },
        ),
    ];
    for (x, want) in &cases {
        let o = det.update(x);
        assert_eq!(o.fault, Some(*want));
        assert!(o.scores.is_none() && o.event.is_none());
    }
    for s in Score::ALL {
        assert_eq!(det.track(s), before.track(s));
    }
    assert_eq!(det.state(), before.state());
    assert_eq!(det.samples(), before.samples() + cases.len() as u64);
    let f = det.faults();
    assert_eq!((f.wrong_length, f.non_finite, f.out_of_range), (2, 3, 1));
    assert_eq!(f.total(), 6);
}

#[test]
fn refused_model_keeps_the_running_one() {
    let (model, mut det) = detector(2);
    let mut rng = Rng(5);
    let xs: Vec<Vec<f32>> = (0..20)
        .map(|_| {
            draw(&model, &mut rng, 0.3)
                .iter()
                .map(|v| *v as f32)
                .collect()
        })
        .collect();
    for x in &xs[..10] {
        det.update(x);
    }
    let twin = det.clone();
    let mut bad = model.clone();
    bad.scale[3] = 0.0;
    // `to_device` already refuses it; build the device model by hand to
    // reach `install`'s own check.
    let mut dev = model.to_device().unwrap();
    dev.scale[3] = 0.0;
    assert!(bad.to_device().is_err());
    assert!(matches!(
        det.install(dev),
        Err(ModelError::NotPositive { .. })
    ));
    let mut over = model.to_device().unwrap();
    over.dims.features = 65;
    assert!(matches!(
        det.install(over),
        Err(ModelError::OverCapacity { .. })
    ));
    let mut twin = twin;
    for x in &xs[10..] {
        let a = det.update(x);
        let b = twin.update(x);
        assert_eq!(format!("{a:?}"), format!("{b:?}"));
    }
}

/// Normal deviates as f32 for the run-length checks.
fn file_bytes(model: &ModelOwned) -> Vec<u8> {
    plumb_model::file::ModelFile {
        model: model.clone(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap()
}

#[test]
fn loading_in_place_equals_a_fresh_detector() {
    // One place, reused for models of shrinking and growing size: nothing of
    // the previous model may survive a load.
    let models = [
        example_model(64, 16, 8, 1),
        example_model(5, 2, 2, 2),
        example_model(12, 4, 3, 3),
    ];
    let mut place = Detector::EMPTY;
    assert!(!place.is_loaded());
    let mut rng = Rng(77);
    for model in &models {
        place.load(&file_bytes(model)).unwrap();
        assert!(place.is_loaded());
        let mut fresh = Detector::new(model.to_device().unwrap()).unwrap();
        assert_eq!(place.model(), fresh.model());
        assert_eq!(place.state(), DriftState::Priming);
        for i in 0..300 {
            // A drifted tail, so states and events move too.
            let noise = if i < 200 { 0.1 } else { 3.0 };
            let x: Vec<f32> = draw(model, &mut rng, noise)
                .iter()
                .map(|v| *v as f32)
                .collect();
            let a = place.update(&x);
            let b = fresh.update(&x);
            assert_eq!(format!("{a:?}"), format!("{b:?}"));
        }
    }
}

#[test]
fn a_failed_load_leaves_no_model() {
    let model = example_model(6, 3, 2, 4);
    let good = file_bytes(&model);
    let mut det = Detector::from_file(&good).unwrap();
    let x: Vec<f32> = model.mean.clone();
    assert!(det.update(&x).scores.is_some());

    // Damaged (CRC), invalid (a zero scale) and truncated files: each an
    // error, after which the detector holds no model and scores nothing.
    let mut damaged = good.clone();
    damaged[30] ^= 1;
    let mut invalid = model.clone();
    invalid.scale[1] = 0.0;
    let payload = postcard::to_allocvec(&invalid).unwrap();
    let mut invalid_file = vec![0u8; payload.len() + 20];
    plumb_model::file::frame_into(&payload, &[], &mut invalid_file).unwrap();
    for bad in [&damaged[..], &invalid_file[..], &good[..good.len() / 2]] {
        let mut det = det.clone();
        assert!(det.load(bad).is_err());
        assert!(!det.is_loaded());
        assert_eq!(det.model(), &plumb_model::Model::EMPTY);
        let o = det.update(&x);
        assert_eq!(o.scores, None);
        assert_eq!(o.fault, Some(Fault::WrongLength { got: 6 }));
        assert_eq!(o.state, DriftState::Priming);
        // Loading a good file afterwards works as on a fresh place.
        det.load(&good).unwrap();
        assert!(det.update(&x).scores.is_some());
    }
}

#[test]
fn an_empty_detector_never_scores_or_panics() {
    let mut det = Detector::EMPTY;
    let inputs: [&[f32]; 4] = [&[], &[1.0], &[f32::NAN; 64], &[0.0; 65]];
    for x in inputs {
        assert!(det.score(x).is_err());
        let o = det.update(x);
        assert!(matches!(o.fault, Some(Fault::WrongLength { .. })), "{o:?}");
        assert_eq!(o.state, DriftState::Priming);
        assert_eq!(o.event, None);
    }
    assert_eq!(det.faults().wrong_length, 4);
    det.reset();
    det.unload();
    assert_eq!(det.samples(), 0);
    assert!(!det.is_loaded());
}

fn n32(rng: &mut Rng) -> f32 {
    rng.normal() as f32
}

/// Average run length of a two-sided tabular CUSUM (two upper CUSUMs on u and
/// −u), signal when either exceeds h, starting at 0; returns (mean, standard error).
fn cusum_arl(h: f32, shift: f32, runs: usize, seed: u64) -> (f64, f64) {
    let mut rng = Rng(seed);
    let mut lens = Vec::with_capacity(runs);
    for _ in 0..runs {
        let mut hi = Cusum::new(0.5, f32::MAX);
        let mut lo = Cusum::new(0.5, f32::MAX);
        let mut n = 0u64;
        loop {
            n += 1;
            let u = n32(&mut rng) + shift;
            if hi.push(u) > h || lo.push(-u) > h {
                break;
            }
        }
        lens.push(n as f64);
    }
    mean_se(&lens)
}

fn mean_se(v: &[f64]) -> (f64, f64) {
    let n = v.len() as f64;
    let mean = v.iter().sum::<f64>() / n;
    let var = v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0);
    (mean, (var / n).sqrt())
}

#[test]
fn cusum_run_lengths_match_lucas_crosier() {
    // Two-sided tabular CUSUM, k = 0.5, h = 4: ARL 168 in control and 8.38 at
    // a 1σ shift (Lucas & Crosier 1982, Table 1).
    // Accept within 3 Monte Carlo standard errors.
    for (shift, want, runs) in [(0.0, 168.0, 3000), (1.0, 8.38, 3000)] {
        let (mean, se) = cusum_arl(4.0, shift, runs, 17);
        assert!(
            (mean - want).abs() < 3.0 * se,
            "shift {shift}: {mean:.2} ± {se:.2} vs {want}"
        );
    }
}

#[test]
fn one_sided_cusum_matches_brook_evans() {
    // One-sided, k = 0.5, h = 3: ARL0 117.59 and 3.75 at a 1.5σ shift
    // (Brook & Evans 1972).
    for (shift, want) in [(0.0f32, 117.59), (1.5, 3.75)] {
        let mut rng = Rng(23);
        let lens: Vec<f64> = (0..4000)
            .map(|_| {
                let mut c = Cusum::new(0.5, f32::MAX);
                let mut n = 0u64;
                loop {
                    n += 1;
                    if c.push(n32(&mut rng) + shift) > 3.0 {
                        break n as f64;
                    }
                }
            })
            .collect();
        let (mean, se) = mean_se(&lens);
        assert!(
            (mean - want).abs() < 3.0 * se,
            "shift {shift}: {mean:.2} ± {se:.2} vs {want}"
        );
    }
}

#[test]
fn ewma_run_lengths_match_lucas_saccucci() {
    // EWMA with fixed asymptotic limits ±L·sqrt(λ/(2−λ)), start 0, λ = 0.1,
    // L = 2.814: ARL 500 in control and 10.3 at a 1σ shift (Lucas & Saccucci
    // 1990). Within 3 Monte Carlo standard errors.
    let lambda = 0.1f32;
    let limit = 2.814 * (lambda / (2.0 - lambda)).sqrt();
    for (shift, want, runs) in [(0.0f32, 500.0, 2000), (1.0, 10.3, 3000)] {
        let mut rng = Rng(31);
        let lens: Vec<f64> = (0..runs)
            .map(|_| {
                let mut e = Ewma::new(lambda, 0.0);
                let mut n = 0u64;
                loop {
                    n += 1;
                    if e.push(n32(&mut rng) + shift).abs() > limit {
                        break n as f64;
                    }
                }
            })
            .collect();
        let (mean, se) = mean_se(&lens);
        assert!(
            (mean - want).abs() < 3.0 * se,
            "shift {shift}: {mean:.2} ± {se:.2} vs {want}"
        );
    }
}

fn special_f32() -> impl Strategy<Value = f32> {
    prop_oneof![
        Just(f32::NAN),
        Just(f32::INFINITY),
        Just(f32::NEG_INFINITY),
        Just(f32::MIN_POSITIVE / 2.0),
        Just(-f32::MIN_POSITIVE / 4.0),
        Just(1e38f32),
        Just(-1e38f32),
        Just(0.0f32),
        Just(-0.0f32),
        any::<f32>(),
        -5.0f32..5.0,
    ]
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(1500))]

    #[test]
    fn any_input_never_panics_and_faults_leave_stats(
        xs in proptest::collection::vec(proptest::collection::vec(special_f32(), 0..9), 1..40)
    ) {
        let (_, mut det) = detector(9);
        for x in &xs {
            let before = det.clone();
            let o = det.update(x);
            if x.len() != 6 || x.iter().any(|v| !v.is_finite()) {
                prop_assert!(o.fault.is_some());
            }
            if o.fault.is_some() {
                for s in Score::ALL {
                    prop_assert_eq!(det.track(s), before.track(s));
                }
                prop_assert_eq!(det.state(), before.state());
            } else {
                let s = o.scores.unwrap();
                prop_assert!(s.spe.is_finite() && s.t2.is_finite() && s.nll.is_finite());
            }
        }
    }
}

#[test]
fn one_sample_over_the_per_sample_limit_raises_at_once() {
    // The Shewhart part of the combined scheme: no dwell for a spike.
    let mut rng = Rng(41);
    let mut model = calibrated(&example_model(6, 2, 2, 5), &mut rng);
    // SPE per-sample limit 30 (the nominal SPE here is below 1).
    model.monitor.spe.sample_limit = 30.0;
    let mut det = Detector::new(model.to_device().unwrap()).unwrap();
    let mut events = Vec::new();
    feed(&mut det, &model, &mut rng, 300, 0.0, &mut events);
    assert_eq!(events, vec![(9, Event::Primed)]);
    // One sample far off the PCA plane (feature 0 moved by 10 scales).
    feed(&mut det, &model, &mut rng, 1, 10.0, &mut events);
    assert_eq!(det.track(Score::Spe).over_sample_limit, 1);
    assert_eq!(
        events.last(),
        Some(&(
            300,
            Event::Raised {
                drivers: plumb_firmware::ScoreSet(1)
            }
        ))
    );
}
