//! Regression tests, each named after what it pins. Found by the fuzz
//! targets in `fuzz/` (see RELIABILITY.md); the input that found each one is
//! rebuilt here by hand so the test reads on its own.

#[path = "../../shared-model/tests/support/mod.rs"]
mod support;

use plumb_firmware::{Detector, DriftState, Fault, Score};

/// Samples near the model mean, a little apart.
fn near_mean(model: &plumb_model::Model, n: usize) -> Vec<Vec<f32>> {
    (0..n)
        .map(|i| {
            model
                .mean
                .iter()
                .zip(&model.scale)
                .enumerate()
                .map(|(j, (mu, s))| mu + s * 0.1 * ((i + j) % 5) as f32)
                .collect()
        })
        .collect()
}

fn assert_levels_finite(det: &Detector) {
    for s in Score::ALL {
        let t = det.track(s);
        assert!(t.ewma.value().is_finite(), "{s:?} EWMA {}", t.ewma.value());
        assert!(
            t.cusum.value().is_finite(),
            "{s:?} CUSUM {}",
            t.cusum.value()
        );
    }
}

/// A model passes validation with any positive `spread`, a subnormal one
/// too. Its standardised NLL was then ±∞, the EWMA went to −∞ and, on the
/// next sample, to NaN for good: a raised flag could never clear (NaN is
/// never calm). Found by the `detector` fuzz target. Such a sample is now a
/// score overflow: counted, and no statistic moves.
#[test]
fn subnormal_spread_is_an_overflow_fault_not_a_nan_ewma() {
    let mut m = support::example_model(4, 2, 2, 7);
    m.monitor.nll.spread = 3.59e-43;
    m.monitor.nll.cusum_slack = 0.0;
    let model = m.to_device().expect("fits");
    model.validate().expect("a subnormal spread is still valid");
    let mut det = Detector::new(model.clone()).expect("valid");
    let xs = near_mean(&model, 40);
    for x in &xs {
        let o = det.update(x);
        assert_eq!(o.fault, Some(Fault::Overflow), "{o:?}");
        assert_eq!(o.scores, None);
        assert_levels_finite(&det);
    }
    assert_eq!(det.faults().overflow, 40);
    assert_eq!(
        det.state(),
        DriftState::Priming,
        "no valid sample, no warm-up"
    );
    // `score` alone still gives the raw scores: they are finite.
    assert!(det.score(&xs[0]).is_ok());
}

/// With a finite but tiny spread the standardised score can stay finite
/// (about ±1.7e38 here), yet the EWMA update `e + λ(u − e)` leaves the f32
/// range when `u` and `e` are huge and of opposite signs: the EWMA became
/// +∞, then NaN. That sample is an overflow too, and the EWMA keeps its last
/// finite value.
#[test]
fn ewma_update_that_would_overflow_is_an_overflow_fault() {
    let mut m = support::example_model(4, 2, 2, 7);
    m.monitor.nll.spread = 1e-38;
    m.monitor.nll.center = 3.35;
    m.monitor.ewma_lambda = 1.0;
    m.monitor.fault_z = 1e3;
    let model = m.to_device().expect("fits");
    let mut det = Detector::new(model.clone()).expect("valid");
    let near = near_mean(&model, 1).remove(0);
    let mut scored = 0;
    let mut overflow = 0;
    for i in 0..400 {
        // Alternately near the mean and further out along every feature.
        let k = if i % 2 == 0 {
            0.0
        } else {
            (i % 40) as f32 * 0.5
        };
        let x: Vec<f32> = near
            .iter()
            .zip(&model.scale)
            .enumerate()
            .map(|(j, (v, s))| v + k * s * if j % 2 == 0 { 1.0 } else { -0.7 })
            .collect();
        let o = det.update(&x);
        match o.fault {
            None => scored += 1,
            Some(Fault::Overflow) => overflow += 1,
            Some(f) => panic!("unexpected fault {f:?}"),
        }
        assert_levels_finite(&det);
    }
    assert!(
        scored > 0 && overflow > 0,
        "{scored} scored, {overflow} overflowed"
    );
}

/// The check costs ordinary models nothing: scores and statistics are those
/// of the arithmetic without it (recomputed here step by step).
#[test]
fn ordinary_model_statistics_unchanged_by_the_overflow_check() {
    let model = support::example_model(6, 3, 2, 5)
        .to_device()
        .expect("fits");
    let mut det = Detector::new(model.clone()).expect("valid");
    let mp = model.monitor;
    let mut ewma = [0.0f32; 3];
    for x in near_mean(&model, 100) {
        let o = det.update(&x);
        let s = o.scores.expect("an ordinary sample scores");
        let limits = [mp.spe, mp.t2, mp.nll];
        let g = det.transformed(&s);
        for k in 0..3 {
            let u = (g[k] - limits[k].center) / limits[k].spread;
            ewma[k] += mp.ewma_lambda * (u - ewma[k]);
            let got = det.track(Score::ALL[k]).ewma.value();
            assert_eq!(got.to_bits(), ewma[k].to_bits());
        }
    }
    assert_eq!(det.faults().total(), 0);
}
