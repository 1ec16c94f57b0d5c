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

#[path = "support/scores.rs"]
mod scores;
use scores::{draw, reference, reference_parts, rounding_bounds};

#[test]
fn f32_scores_match_f64_reference() {
    // Each score against its f64 value within the a-priori f32 rounding
    // bound of that very sample (`scores::rounding_bounds`: worst-case
    // forward error, u = 2⁻²⁴, Higham §3.1). The bounds are relative to the
    // score itself for T² and NLL (γ_{m+3}·T² plus the projection error
    // γ_{d+3}·Σ|z_i p_ij| carried through t_j², and about (m + 4)·u of the
    // log terms for NLL), and scale with |r|·‖z‖ for SPE, whose residual
    // r = z − Pt cancels. Typical size: T² 1e-6 relative, NLL 1e-6 of
    // 1 + |NLL|; a score 1e-4 off would fail. Measured worst error / bound:
    // printed below.
    let mut rng = Rng(7);
    let mut worst = [0.0f64; 3];
    let mut worst_rel = [0.0f64; 3];
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
                let bounds = rounding_bounds(&model, &xr);
                let got = det.score(&xf).expect("finite sample").scores;
                assert!(got.nll >= det.nll_floor() - 1e-4 * (1.0 + got.nll.abs()));
                let errs = [
                    (got.spe as f64 - spe).abs(),
                    (got.t2 as f64 - t2).abs(),
                    (got.nll as f64 - nll).abs(),
                ];
                let scale = [zz, t2.abs(), 1.0 + nll.abs()];
                for (i, name) in ["spe", "t2", "nll"].iter().enumerate() {
                    assert!(
                        errs[i] <= bounds[i],
                        "{name} (d {d}, m {m}, k {k}, seed {seed}, sample {n}): \
                         error {:e} above its rounding bound {:e}",
                        errs[i],
                        bounds[i]
                    );
                    worst[i] = worst[i].max(errs[i] / bounds[i]);
                    worst_rel[i] = worst_rel[i].max(errs[i] / scale[i]);
                }
            }
        }
    }
    println!(
        "worst error / bound: SPE {:.2e}, T² {:.2e}, NLL {:.2e}; \
         SPE / ‖z‖² {:.2e}, T² relative {:.2e}, NLL / (1 + |NLL|) {:.2e}",
        worst[0], worst[1], worst[2], worst_rel[0], worst_rel[1], worst_rel[2]
    );
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
        // The premise of the tolerance below: the f32 SPE is within its
        // rounding bound b of this one (f32_scores_match_f64_reference), so
        // its cube root is within b / (3 (SPE − b)^⅔) (mean value theorem),
        // which is below 1e-4 for every sample here.
        let [b_spe, ..] = rounding_bounds(&model, &xr);
        let b_cbrt = b_spe / (3.0 * (spe - b_spe).max(0.0).powf(2.0 / 3.0));
        assert!(b_cbrt <= 1e-4, "sample {n}: ∛SPE bound {b_cbrt:e}");
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
        // Tolerance: ∛SPE within 1e-4 (asserted above; the f32 cube root
        // adds at most 2 ulp, < 1e-6 here), over a spread ≥ 0.1: ≤ 1e-3 per
        // term, and
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
    // Every mode as the whole, the residual chart off: the state tests are
    // about the states.
    let k = cal.weights.len();
    cal.spe_center_by_mode = vec![cal.monitor.spe.center; k];
    cal.spe_spread_by_mode = vec![cal.monitor.spe.spread; k];
    cal.resid_gain.iter_mut().for_each(|g| *g = 0.0);
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

/// The SPE's residual chart: one EWMA per feature of
/// `(v_i − center_i) · gain_i`, `v_i = r_i` or with a whitening matrix
/// `v_i = Σ_j W_ij r_j`, `r_i = z_i − (P Pᵀ z)_i` (Roberts 1959 for the
/// EWMA), against an f64 recursion written from that definition, with a
/// first-order a-priori bound on the f32 error carried through the same
/// recursion (Higham §3.1, u = 2⁻²⁴):
///
/// * `z_i`: within `γ₃ |z_i|` (subtract, multiply by the rounded reciprocal);
/// * `t_j`: within `δ_j = γ_{d+3} Σ_i |z_i p_ij|` (as for the scores);
/// * `(P t)_i`: within `γ_m Σ_j |p_ij t_j| + Σ_j |p_ij| δ_j`;
/// * `r_i`: the sum of those and `u |r_i|` for the subtraction;
/// * `v_i`: `Δr_i`, or whitened `γ_d Σ_j |W_ij r_j| + Σ_j |W_ij| Δr_j`
///   (an inner product of inexact inputs);
/// * `w_i = (v_i − c_i) g_i`: `g_i (Δv_i + γ₂ |v_i − c_i|)`;
/// * the EWMA averages the errors of its inputs and adds `γ₃ (|e| + |w|)`
///   of its own per step: `b ← (1 − λ) b + λ Δw + γ₃ (|e| + λ |w|)`.
///
/// The slow charts (model format 5) are held to the same recursion and
/// bound with their own constant, centre and gain on the same `v_i`.
///
/// A chart off by 1e-4 of its limit would fail; the measured worst error
/// over its bound is printed.
#[test]
fn residual_chart_is_an_ewma_of_each_scaled_residual() {
    use scores::{gamma, U};
    let mut worst = 0.0f64;
    let cases = [(12, 3, 3, 5), (32, 8, 4, 2), (64, 16, 8, 1)];
    for ((d, m, k, seed), whiten) in cases.into_iter().flat_map(|c| [(c, false), (c, true)]) {
        let mut model = example_model(d, m, k, seed);
        if whiten {
            // A dense matrix: unit diagonal, off-diagonal N(0, 0.3²).
            let mut rng = Rng(77 + seed);
            model.resid_whiten = (0..d * d)
                .map(|ij| {
                    if ij / d == ij % d {
                        1.0
                    } else {
                        0.3 * rng.normal() as f32
                    }
                })
                .collect();
        }
        // Slow charts on three features: a slow, a middling and a
        // memoryless constant, centres and gains of their own.
        model.slow_charts = vec![
            1.0,
            0.005,
            0.25,
            1.5, //
            (d / 2) as f32,
            0.05,
            -0.5,
            0.75, //
            (d - 1) as f32,
            1.0,
            0.0,
            2.0,
        ];
        let slow: Vec<(usize, f64, f64, f64)> = model
            .slow_charts
            .chunks_exact(4)
            .map(|c| (c[0] as usize, c[1] as f64, c[2] as f64, c[3] as f64))
            .collect();
        let mut se = vec![0.0f64; slow.len()];
        let mut sb = vec![0.0f64; slow.len()];
        let w_at = |i: usize, j: usize| -> f64 {
            if model.resid_whiten.is_empty() {
                f64::from(u8::from(i == j))
            } else {
                model.resid_whiten[i * d + j] as f64
            }
        };
        let lambda = model.monitor.ewma_lambda as f64;
        let mut det = Detector::new(model.to_device().unwrap()).unwrap();
        let mut rng = Rng(31 + seed);
        let mut e = vec![0.0f64; d];
        let mut b = vec![0.0f64; d];
        for n in 0..400 {
            let x = draw(&model, &mut rng, [0.05, 0.5, 2.0][n % 3]);
            let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
            let xr: Vec<f64> = xf.iter().map(|v| *v as f64).collect();
            let (z, t, _) = reference_parts(&model, &xr);
            let p = |i: usize, j: usize| model.loadings[i * m + j] as f64;
            let delta: Vec<f64> = (0..m)
                .map(|j| gamma(d + 3) * (0..d).map(|i| (z[i] * p(i, j)).abs()).sum::<f64>())
                .collect();
            let out = det.update(&xf);
            assert!(out.scores.is_some(), "sample {n}");
            let chart = det.residual_chart();
            let mut peak = (0.0f64, 0usize);
            let (mut r, mut dr) = (vec![0.0f64; d], vec![0.0f64; d]);
            for i in 0..d {
                let recon: f64 = (0..m).map(|j| p(i, j) * t[j]).sum();
                r[i] = z[i] - recon;
                dr[i] = gamma(3) * z[i].abs()
                    + gamma(m) * (0..m).map(|j| (p(i, j) * t[j]).abs()).sum::<f64>()
                    + (0..m).map(|j| p(i, j).abs() * delta[j]).sum::<f64>()
                    + U * r[i].abs();
            }
            for i in 0..d {
                let v: f64 = (0..d).map(|j| w_at(i, j) * r[j]).sum();
                let dv = if model.resid_whiten.is_empty() {
                    dr[i]
                } else {
                    gamma(d) * (0..d).map(|j| (w_at(i, j) * r[j]).abs()).sum::<f64>()
                        + (0..d).map(|j| w_at(i, j).abs() * dr[j]).sum::<f64>()
                };
                for (s, &(f, sl, sc, sg)) in slow.iter().enumerate().filter(|(_, c)| c.0 == i) {
                    let w = (v - sc) * sg;
                    let dw = sg * (dv + gamma(2) * (v - sc).abs());
                    sb[s] = (1.0 - sl) * sb[s] + sl * dw + gamma(3) * (se[s].abs() + sl * w.abs());
                    se[s] += sl * (w - se[s]);
                    let got = chart.slow[s] as f64;
                    let err = (got - se[s]).abs();
                    assert!(
                        err <= sb[s],
                        "(d {d}, whitened {whiten}) sample {n}, slow chart {s} (feature {f}): {got} vs {} (error {err:e} > bound {:e})",
                        se[s],
                        sb[s]
                    );
                    worst = worst.max(err / sb[s]);
                }
                let (c, g) = (model.resid_center[i] as f64, model.resid_gain[i] as f64);
                let w = (v - c) * g;
                let dw = g * (dv + gamma(2) * (v - c).abs());
                b[i] = (1.0 - lambda) * b[i]
                    + lambda * dw
                    + gamma(3) * (e[i].abs() + lambda * w.abs());
                e[i] += lambda * (w - e[i]);
                let got = chart.ewma[i] as f64;
                let err = (got - e[i]).abs();
                assert!(
                    err <= b[i],
                    "(d {d}, whitened {whiten}) sample {n}, feature {i}: EWMA {got} vs {} (error {err:e} > bound {:e})",
                    e[i],
                    b[i]
                );
                worst = worst.max(err / b[i]);
                if e[i].abs() > peak.0 {
                    peak = (e[i].abs(), i);
                }
            }
            // The peak is the largest |EWMA| (its feature may differ from
            // the f64 one only on a near tie).
            let got_peak = chart.ewma[..d].iter().fold(0.0f32, |a, v| a.max(v.abs()));
            assert_eq!(chart.peak, got_peak, "sample {n}");
            assert!((chart.peak as f64 - peak.0).abs() <= b.iter().cloned().fold(0.0, f64::max));
            assert_eq!(
                chart.ewma[usize::from(chart.peak_feature)].abs(),
                chart.peak
            );
            // The slow peak: the largest |slow EWMA| and its feature.
            let (got_slow, at) = chart.slow[..slow.len()].iter().zip(&slow).fold(
                (0.0f32, 0usize),
                |(a, at), (v, c)| {
                    if v.abs() > a {
                        (v.abs(), c.0)
                    } else {
                        (a, at)
                    }
                },
            );
            assert_eq!(chart.slow_peak, got_slow, "sample {n}");
            assert_eq!(usize::from(chart.slow_peak_feature), at, "sample {n}");
        }
    }
    println!("residual chart: worst error / bound {worst:.2e}");
}

/// `score::chart_step` sums the whitened inputs four rows at a time and
/// steps each slow chart as its walk over the features meets it. Its values
/// must have the bits of the plain computation, one row at a time through
/// `score::chart_input` and `score::chart_next` (what the host calibration
/// and `plumb tailor` compute), and its peaks those values' largest
/// magnitudes (first of equal ones): for every `d` from 1 to 9 (groups of
/// four and the rows left over) and 24, 64, with and without a matrix, slow
/// charts on the first, a middle and the last feature. Exact equality (no
/// tolerance): both sums run over the same terms in the same order. A sum
/// in another order, or a slow chart given another feature's input, fails.
#[test]
fn chart_step_has_the_bits_of_one_row_at_a_time() {
    use plumb_firmware::score::{chart_input, chart_next, chart_step};
    use plumb_model::{MAX_FEATURES, MAX_SLOW};
    let mut rng = Rng(4711);
    for d in (1..=9).chain([24, 64]) {
        for whiten in [false, true] {
            let mut model = example_model(d, 1, 1, d as u64);
            if whiten {
                model.resid_whiten = (0..d * d).map(|_| rng.normal() as f32).collect();
            }
            let mut features = vec![0, d / 2, d - 1];
            features.dedup();
            model.slow_charts = features
                .iter()
                .enumerate()
                .flat_map(|(s, &f)| {
                    [
                        f as f32,
                        [0.01, 0.2, 1.0][s],
                        0.1 * s as f32,
                        1.0 + s as f32,
                    ]
                })
                .collect();
            let dev = model.to_device().expect("fits");
            let lambda = dev.monitor.ewma_lambda;
            let (mut ewma, mut slow) = ([0.0f32; MAX_FEATURES], [0.0f32; MAX_SLOW]);
            let (mut want, mut want_slow) = (vec![0.0f32; d], vec![0.0f32; features.len()]);
            for n in 0..60 {
                let r: Vec<f32> = (0..d).map(|_| (3.0 * rng.normal()) as f32).collect();
                let step = chart_step(&dev, &r, &mut ewma, &mut slow);
                let v: Vec<f32> = (0..d)
                    .map(|i| chart_input(&dev.resid_whiten, &r, i))
                    .collect();
                for i in 0..d {
                    want[i] = chart_next(
                        want[i],
                        v[i],
                        dev.resid_center[i],
                        dev.resid_gain[i],
                        lambda,
                    );
                }
                for (s, c) in dev.slow_charts.chunks_exact(4).enumerate() {
                    want_slow[s] = chart_next(want_slow[s], v[c[0] as usize], c[2], c[3], c[1]);
                }
                let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                let case = format!("d {d}, whitened {whiten}, sample {n}");
                assert_eq!(bits(&ewma[..d]), bits(&want), "{case}: the charts");
                assert_eq!(
                    bits(&slow[..want_slow.len()]),
                    bits(&want_slow),
                    "{case}: the slow charts"
                );
                assert!(ewma[d..]
                    .iter()
                    .chain(&slow[want_slow.len()..])
                    .all(|v| *v == 0.0));
                let first_max = |v: &[f32]| {
                    v.iter().enumerate().fold((0.0f32, 0), |(a, at), (i, x)| {
                        if x.abs() > a {
                            (x.abs(), i)
                        } else {
                            (a, at)
                        }
                    })
                };
                let (peak, at) = first_max(&want);
                assert_eq!(
                    (step.peak, usize::from(step.feature)),
                    (peak, at),
                    "{case}: peak"
                );
                let (slow_peak, s) = first_max(&want_slow);
                assert_eq!(
                    (step.slow_peak, usize::from(step.slow_feature)),
                    (slow_peak, if slow_peak > 0.0 { features[s] } else { 0 }),
                    "{case}: slow peak"
                );
            }
        }
    }
}

/// A drift that keeps to the model's subspace except in one feature: only
/// that feature's residual moves. Its chart rises, a flag is raised by the
/// SPE with the residual chart over its limit (the peak naming that
/// feature), and once the shift is gone the flag clears; a model with the
/// chart off (every gain 0) does not flag the same shift through the chart.
#[test]
fn a_shift_in_one_residual_raises_the_residual_chart() {
    let d = 12;
    let mut model = example_model(d, 3, 3, 5);
    // Quiet every other chart: only the residual chart may raise.
    for lim in [
        &mut model.monitor.spe,
        &mut model.monitor.t2,
        &mut model.monitor.nll,
    ] {
        lim.sample_limit = 1e30;
        lim.cusum_limit = 1e30;
        lim.ewma_limit = 1e30;
    }
    model.monitor.warmup = 20;
    let feature = 7;
    let run = |model: &ModelOwned| {
        let mut det = Detector::new(model.to_device().unwrap()).unwrap();
        let mut rng = Rng(99);
        let mut raised = None;
        let mut cleared = None;
        for n in 0..1500 {
            let mut x = draw(model, &mut rng, 0.05);
            if (300..600).contains(&n) {
                // Five scales on one feature.
                x[feature] += 5.0 * model.scale[feature] as f64;
            }
            let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
            let out = det.update(&xf);
            match out.event {
                Some(Event::Raised { drivers }) if raised.is_none() => {
                    assert!(drivers.contains(Score::Spe), "{drivers:?}");
                    let chart = det.residual_chart();
                    assert!(chart.peak > det.model().resid_limit);
                    assert_eq!(usize::from(chart.peak_feature), feature);
                    raised = Some(n);
                }
                Some(Event::Cleared) if raised.is_some() => cleared = Some(n),
                _ => {}
            }
        }
        (raised, cleared)
    };
    let (raised, cleared) = run(&model);
    let raised = raised.expect("the residual chart raises a flag");
    assert!((300..340).contains(&raised), "raised at {raised}");
    assert!(cleared.expect("and the flag clears") > 600);
    let mut off = model.clone();
    off.resid_gain.iter_mut().for_each(|g| *g = 0.0);
    assert_eq!(run(&off), (None, None));
    // The same shift seen by a slow chart alone (format 5): every residual
    // chart off, a slow chart on the feature (λ 0.05, its residual chart's
    // centre and gain) raises later than the λ 0.1 chart did, its peak
    // names the feature, and the flag clears after the shift.
    let mut slow = off.clone();
    slow.slow_charts = vec![
        feature as f32,
        0.05,
        model.resid_center[feature],
        model.resid_gain[feature],
    ];
    slow.slow_limit = model.resid_limit;
    let mut det = Detector::new(slow.to_device().unwrap()).unwrap();
    let mut rng = Rng(99);
    let (mut slow_raised, mut slow_cleared) = (None, None);
    for n in 0..1500 {
        let mut x = draw(&slow, &mut rng, 0.05);
        if (300..600).contains(&n) {
            x[feature] += 5.0 * slow.scale[feature] as f64;
        }
        let xf: Vec<f32> = x.iter().map(|v| *v as f32).collect();
        match det.update(&xf).event {
            Some(Event::Raised { drivers }) if slow_raised.is_none() => {
                assert!(drivers.contains(Score::Spe), "{drivers:?}");
                let chart = det.residual_chart();
                assert!(chart.slow_peak > det.model().slow_limit);
                assert!(chart.peak <= det.model().resid_limit);
                assert_eq!(usize::from(chart.slow_peak_feature), feature);
                slow_raised = Some(n);
            }
            Some(Event::Cleared) if slow_raised.is_some() => slow_cleared = Some(n),
            _ => {}
        }
    }
    let slow_raised = slow_raised.expect("the slow chart raises a flag");
    assert!(
        slow_raised > raised && slow_raised < 600,
        "slow chart raised at {slow_raised}, the λ 0.1 chart at {raised}"
    );
    assert!(slow_cleared.expect("and the flag clears") > 600);
}

/// The residual chart's range check (`plumb_model::CHART_INPUT_MAX`): a
/// model whose whitening matrix is as large as validation lets it be (found
/// here by bisection, so the test follows the bound, whatever it is), fed
/// samples whose residuals are as large as a finite SPE allows, keeps every
/// chart value finite and faults no sample; a matrix 1 % larger is refused.
/// The residual is `r = (1.2e19, −1.2e19)` (SPE 2.9e38, just under
/// `f32::MAX`; T² 0 since `r` is orthogonal to the loadings), and row `i`
/// of `W` is `±a (1, −1)`, so `v = ±2.4e19 · a`.
#[test]
fn the_residual_chart_stays_finite_at_the_edge_of_the_range_check() {
    let s = std::f32::consts::FRAC_1_SQRT_2;
    let mut model = example_model(2, 1, 1, 3);
    model.mean = vec![0.0, 0.0];
    model.scale = vec![1.0, 1.0];
    model.loadings = vec![s, s];
    model.monitor.fault_z = 2e19;
    model.resid_center = vec![0.0, 0.0];
    model.resid_gain = vec![1.0, 1.0];
    let with = |a: f32| {
        let mut m = model.clone();
        m.resid_whiten = vec![a, -a, -a, a];
        m
    };
    // The largest accepted a, by bisection on a log scale.
    let (mut lo, mut hi) = (1.0f64, 1e38f64);
    assert!(with(lo as f32).validate().is_ok() && with(hi as f32).validate().is_err());
    for _ in 0..200 {
        let mid = (lo * hi).sqrt();
        if with(mid as f32).validate().is_ok() {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let a = lo as f32;
    assert_eq!(
        with(a * 1.01).to_device().map(|_| ()),
        Err(ModelError::OutOfRange {
            field: plumb_model::Field::ResidualChart
        })
    );
    let model = with(a);
    let mut det = Detector::new(model.to_device().unwrap()).unwrap();
    for n in 0..2000 {
        // Blocks of 50 samples of one sign: each block's EWMA swings by the
        // full 2 · 6.5e36.
        let sign = if (n / 50) % 2 == 0 { 1.0 } else { -1.0 };
        let out = det.update(&[1.2e19 * sign, -1.2e19 * sign]);
        assert!(out.fault.is_none(), "sample {n}: {:?}", out.fault);
        let chart = det.residual_chart();
        assert!(chart.ewma[..2].iter().all(|e| e.is_finite()), "sample {n}");
        assert!(chart.peak.is_finite(), "sample {n}");
        if n % 50 == 49 {
            // Within 2 % of |v| = 2.4e19 · a (50 steps from −v reach
            // (1 − 2 · 0.9⁵⁰) v = 0.9897 v): the chart sits at the edge.
            assert!(chart.peak > 0.98 * 2.4e19 * a, "sample {n}: {}", chart.peak);
        }
    }
}
