//! The detector and the fit against published tables and exact identities
//! (each check names the source of its values: the publication, or how
//! they were computed).
#![allow(clippy::needless_range_loop)] // index loops mirror the published tables

use plumb::pca::{symmetric_eigen, Moments};
use plumb_checks::{data, read_csv};
use plumb_firmware::Detector;
use plumb_model::{Dims, ModelMeta, ModelOwned, MonitorParams, ScoreLimits};

/// A detector for raw-data PCA (no standardisation: scale 1) with `m`
/// components and one mixture component matching the latent covariance.
fn raw_pca_model(rows: &[f64], d: usize, m: usize) -> (ModelOwned, Vec<f64>) {
    let mom = Moments::from_rows(rows, d);
    let cov = {
        let full = mom.symmetric();
        let n = mom.n as f64;
        full.iter().map(|v| v / (n - 1.0)).collect::<Vec<_>>()
    };
    let (values, vectors) = symmetric_eigen(&cov, d);
    let mut loadings = Vec::new();
    for i in 0..d {
        for j in 0..m {
            loadings.push(vectors[i * d + j] as f32);
        }
    }
    let lim = ScoreLimits {
        sample_limit: 1.0,
        center: 0.0,
        spread: 1.0,
        cusum_slack: 0.5,
        cusum_limit: 5.0,
        ewma_limit: 1.0,
    };
    let theta = {
        let rest = &values[m..];
        [1, 2, 3].map(|p| rest.iter().map(|l| l.powi(p)).sum::<f64>() as f32)
    };
    let model = ModelOwned {
        meta: ModelMeta {
            id: 1,
            schema: 0,
            created_unix_s: 0,
            train_rows: mom.n,
            calib_rows: 0,
            sample_period_us: 0,
        },
        dims: Dims {
            features: d as u16,
            components: m as u16,
            mixture: 1,
        },
        mean: mom.mean.iter().map(|v| *v as f32).collect(),
        scale: vec![1.0; d],
        loadings,
        eigenvalues: values[..m].iter().map(|v| *v as f32).collect(),
        theta,
        weights: vec![1.0],
        mix_means: vec![0.0; m],
        mix_variances: values[..m].iter().map(|v| *v as f32).collect(),
        monitor: MonitorParams {
            fault_z: 1e6,
            warmup: 0,
            ewma_lambda: 0.1,
            raise_dwell: 1,
            clear_dwell: 1,
            min_hold: 0,
            clear_fraction: 0.5,
            spe: lim,
            t2: lim,
            nll: lim,
        },
        spe_center_by_mode: vec![0.0],
        spe_spread_by_mode: vec![1.0],
        // The residual chart off: these checks are about the scores.
        resid_center: vec![0.0; d],
        resid_gain: vec![0.0; d],
        resid_limit: 1.0,
        resid_whiten: Vec::new(),
        slow_charts: Vec::new(),
        slow_limit: 1.0,
    };
    (model, values)
}

#[test]
fn iris_covariance_eigenvalues_match_published() {
    // Iris (Fisher 1936), raw data, covariance with ddof = 1: eigenvalues
    // 4.22824171, 0.24267075, 0.07820950, 0.02383509 and explained variance
    // ratios 0.92461872, 0.05306648, 0.01710261, 0.00521218 (scikit-learn's
    // PCA-vs-LDA example output; also computed).
    // Tolerance 1e-7 relative: the Jacobi sweep stops at 1e-15 of the
    // matrix norm, the table has 8-9 significant digits.
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let (_, values) = raw_pca_model(&rows, d, 2);
    let want = [4.22824171, 0.24267075, 0.07820950, 0.02383509];
    let total: f64 = values.iter().sum();
    let ratios = [0.92461872, 0.05306648, 0.01710261, 0.00521218];
    for j in 0..4 {
        assert!(
            (values[j] - want[j]).abs() <= 1e-7 * want[j] + 5e-9,
            "λ{j} {}",
            values[j]
        );
        assert!((values[j] / total - ratios[j]).abs() <= 5e-9, "ratio {j}");
    }
}

#[test]
fn iris_standardised_ratios_match_published() {
    // Standardised iris: explained variance ratios 0.72962445, 0.22850762,
    // 0.03668922, 0.00517871 (R princomp(cor = TRUE); also computed).
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let pca = plumb::pca::fit(&rows, d).expect("pca");
    let want = [0.72962445, 0.22850762, 0.03668922, 0.00517871];
    for j in 0..4 {
        assert!(
            (pca.ratios[j] - want[j]).abs() <= 5e-9,
            "ratio {j}: {}",
            pca.ratios[j]
        );
    }
    // Correlation-matrix eigenvalues 2.91849782, 0.91403047, 0.14675688,
    // 0.02071484; the fit reports them on the ddof = 1 scale, i.e. × 150/149
    // (dividing by the ddof = 0 deviation scales the eigenvalues by 150/149;
    // the ratios are unchanged).
    let corr = [2.91849782, 0.91403047, 0.14675688, 0.02071484];
    for j in 0..4 {
        let got = pca.eigenvalues[j] * 149.0 / 150.0;
        assert!((got - corr[j]).abs() <= 1e-7 * corr[j] + 5e-9, "λ{j} {got}");
    }
}

#[test]
fn iris_sample_zero_scores_and_training_identities() {
    // Iris, raw data, 2 components: sample 0 has Q = 0.00078436 and
    // T² = 2.12428971 (computed, not published). Σ Q over the training set
    // = (n − 1) Σ residual eigenvalues = 15.204644; mean T² = k (n − 1)/n
    // = 1.986667 (exact identities).
    //
    // Tolerances: the detector works in f32. For sample 0, ‖z‖ ≈ 2.7, so each
    // residual r_i carries an absolute error of a few ulp(2.7) ≈ 1e-6 against
    // |r| ≈ 0.028: Q is good to ≈ 1e-4 relative; we allow 1e-3. T² has no
    // cancellation: 1e-5 relative. The sums add 150 f32 values in f64: 1e-4.
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let (model, _) = raw_pca_model(&rows, d, 2);
    let det = Detector::new(model.to_device().unwrap()).unwrap();
    let score = |row: &[f64]| {
        let x: Vec<f32> = row.iter().map(|v| *v as f32).collect();
        det.score(&x).expect("iris row scores").scores
    };
    let s0 = score(&rows[..4]);
    assert!(
        ((s0.spe as f64) - 0.00078436).abs() <= 1e-3 * 0.00078436,
        "Q {}",
        s0.spe
    );
    assert!(
        ((s0.t2 as f64) - 2.12428971).abs() <= 1e-5 * 2.12428971,
        "T² {}",
        s0.t2
    );
    let (mut sum_q, mut sum_t2) = (0.0f64, 0.0f64);
    for row in rows.chunks_exact(4) {
        let s = score(row);
        sum_q += s.spe as f64;
        sum_t2 += s.t2 as f64;
    }
    assert!((sum_q - 15.204644).abs() <= 1e-4 * 15.204644, "ΣQ {sum_q}");
    assert!(
        (sum_t2 / 150.0 - 1.986667).abs() <= 1e-4 * 1.986667,
        "mean T² {}",
        sum_t2 / 150.0
    );
}

#[test]
fn iris_jackson_mudholkar_limits_match_computed_values() {
    // Iris, raw data, 2 components kept: Jackson–Mudholkar Q limits
    // 0.334464 (α = 0.05) and 0.571355 (α = 0.01) (Jackson & Mudholkar 1979
    // formula; computed with scipy 1.17.1 norm.ppf on the numpy 2.4.6
    // eigenvalues of the ddof = 1 covariance: 0.334464046, 0.571355036).
    // θ here is the test's raw-data PCA's (plumb's Moments and
    // symmetric_eigen, not its fit, which standardises: see the next test),
    // stored in the model in f32. 1e-5 relative: θ in f32 (≈ 6e-8 relative)
    // and the six printed digits (≤ 1.5e-6 relative).
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let (model, _) = raw_pca_model(&rows, d, 2);
    let theta = model.theta.map(f64::from);
    for (alpha, want) in [(0.05, 0.334464), (0.01, 0.571355)] {
        let got = plumb::calibrate::jackson_mudholkar(theta, alpha).expect("defined");
        assert!((got - want).abs() <= 1e-5 * want, "alpha {alpha}: {got}");
    }
}

#[test]
fn iris_jackson_mudholkar_limits_from_the_fit() {
    // Standardised iris, 2 components kept, θ from plumb's own PCA fit
    // (Pca::theta), so the fit and the formula are checked together.
    // Reference: the Jackson & Mudholkar (1979) formula on the discarded
    // correlation-matrix eigenvalues (0.14675688 and 0.02071484) gives
    // 0.584851672923 (α = 0.05) and 1.030202630820 (α = 0.01) (computed with
    // scipy 1.17.1 norm.ppf on numpy 2.4.6 eigvalsh of the correlation
    // matrix; 0.584852 and 1.030203 to six decimals). The fit reports eigenvalues on the ddof = 1 scale, i.e. the
    // correlation eigenvalues × 150/149, so θ_i is scaled back by
    // (149/150)^i.
    //
    // Tolerance: the references are printed to 12 decimals (5e-13); plumb's
    // eigenvalues agree with numpy's and scikit-learn's to ~3e-14 relative on
    // iris (reference.rs), which moves Q (∂Q/∂λ of order 1-3 here) by
    // < 1e-13; the normal quantile is good to ~1e-16 (AS 241) and the
    // formula's ~20 f64 operations add ~1e-14: 1e-12 covers the sum.
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let pca = plumb::pca::fit(&rows, d).expect("pca");
    let th = pca.theta(2);
    let back = 149.0 / 150.0;
    let theta = [
        th[0] * back,
        th[1] * back * back,
        th[2] * back * back * back,
    ];
    for (alpha, want) in [(0.05, 0.584851672923), (0.01, 1.030202630820)] {
        let got = plumb::calibrate::jackson_mudholkar(theta, alpha).expect("defined");
        assert!(
            (got - want).abs() <= 1e-12,
            "alpha {alpha}: {got} vs {want}"
        );
    }
    // Without the rescale the limits are those of the ddof = 1 eigenvalues
    // (0.588776851936 and 1.037116742436, computed the same way): the scale
    // convention is part of what is checked.
    for (alpha, want) in [(0.05, 0.588776851936), (0.01, 1.037116742436)] {
        let got = plumb::calibrate::jackson_mudholkar(th, alpha).expect("defined");
        assert!(
            (got - want).abs() <= 1e-12,
            "alpha {alpha} (ddof = 1): {got} vs {want}"
        );
    }
}
