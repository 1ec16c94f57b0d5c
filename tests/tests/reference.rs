//! The fit against scikit-learn, run side by side through the reference venv
//! (tests/python/*.py), and the Old Faithful mixture against a reference fit.

use plumb::gmm::{self, EmOptions, FitOptions, Mixture};
use plumb_checks::{data, floats, read_csv, reference};
use serde_json::json;

fn rows_of(v: &serde_json::Value) -> (Vec<f64>, usize) {
    let rows = v.as_array().expect("rows");
    let d = rows[0].as_array().expect("row").len();
    (rows.iter().flat_map(floats).collect(), d)
}

#[test]
fn pca_matches_scikit_learn_on_iris_wine_breast_cancer() {
    // scikit-learn StandardScaler + PCA (ddof = 0 standardisation, ddof = 1
    // explained variance), every component checked.
    //
    // Tolerance, from the method. Both sides decompose (in effect) the
    // correlation matrix A of the n × d standardised data: plumb forms A from
    // sums of n products and runs Jacobi; scikit-learn takes the SVD of the
    // data. Each entry of A is a sum of n terms whose magnitudes sum to at
    // most n (|correlation| ≤ 1, Cauchy–Schwarz), so recursive summation
    // errs by at most about n·ε per entry and ‖ΔA‖₂ ≤ ‖ΔA‖_F ≤ d·n·ε; the
    // solvers' own backward errors (a small multiple of d·ε·‖A‖, ‖A‖ ≤ d)
    // are below that. Counting both sides, E = 2·d·n·ε:
    // * eigenvalues (Weyl): |Δλ_j| ≤ E (times n/(n−1), < 1.01 here);
    // * ratios λ_j / Σλ: |Δ| ≤ 2E / Σλ;
    // * loadings (Davis–Kahan, first order): ‖Δv_j‖ ≤ E / gap_j, gap_j the
    //   distance from λ_j to its nearest neighbour.
    // E is 2.7e-13 (iris), 1.0e-12 (wine), 7.6e-12 (breast_cancer); the
    // loading bound is at most 1.3e-8 (breast_cancer components 28-29, gap
    // 6.2e-4) and 1e-13 to 5.3e-10 where gaps exceed 1e-2. Measured worst
    // (scikit-learn 1.9.1): |Δλ| 4.8e-14, loadings 8.6e-13 (at most 3.4e-3
    // of their bound).
    for set in ["iris", "wine", "breast_cancer"] {
        let r = reference("ref_pca.py", &json!({ "dataset": set }));
        let (rows, d) = rows_of(&r["rows"]);
        let n = rows.len() / d;
        let pca = plumb::pca::fit(&rows, d).expect("pca");
        let ev = floats(&r["explained_variance"]);
        let ratio = floats(&r["ratio"]);
        let comps: Vec<Vec<f64>> = r["components"]
            .as_array()
            .unwrap()
            .iter()
            .map(floats)
            .collect();
        assert_eq!(ev.len(), d, "{set}: eigenvalues");
        assert_eq!(ratio.len(), d, "{set}: ratios");
        assert_eq!(comps.len(), d, "{set}: components");
        assert!(
            comps.iter().all(|c| c.len() == d),
            "{set}: component length"
        );
        assert_eq!(pca.eigenvalues.len(), d);
        assert_eq!(pca.loadings.len(), d * d);
        let e = 2.0 * (d * n) as f64 * f64::EPSILON * n as f64 / (n - 1) as f64;
        let total: f64 = ev.iter().sum();
        for j in 0..d {
            let (a, b) = (pca.eigenvalues[j], ev[j]);
            assert!((a - b).abs() <= e, "{set} λ{j}: {a} vs {b} (bound {e:e})");
            assert!(
                (pca.ratios[j] - ratio[j]).abs() <= 2.0 * e / total,
                "{set} ratio {j}: {} vs {}",
                pca.ratios[j],
                ratio[j]
            );
            let gap = [j.checked_sub(1), Some(j + 1)]
                .into_iter()
                .flatten()
                .filter(|&i| i < d)
                .map(|i| (ev[i] - ev[j]).abs())
                .fold(f64::INFINITY, f64::min);
            let bound = e / gap;
            // Every component here has a gap of at least 6e-4, so no bound
            // exceeds 1.3e-8: the check never degenerates to "anything goes".
            assert!(bound <= 1e-7, "{set} component {j}: gap {gap:e}");
            let ours: Vec<f64> = (0..d).map(|i| pca.loadings[i * d + j]).collect();
            let dot: f64 = ours.iter().zip(&comps[j]).map(|(a, b)| a * b).sum();
            let sign = dot.signum();
            for i in 0..d {
                assert!(
                    (sign * ours[i] - comps[j][i]).abs() <= bound,
                    "{set} component {j} feature {i}: {} vs {} (bound {bound:e})",
                    sign * ours[i],
                    comps[j][i]
                );
            }
        }
    }
}

fn em_case(rows: &[f64], d: usize, init: &Mixture, tol: f64, max_iter: usize) {
    let m = init.m;
    let chunk = |v: &[f64]| v.chunks(m).map(|c| c.to_vec()).collect::<Vec<_>>();
    let r = reference(
        "ref_gmm.py",
        &json!({
            "rows": rows.chunks(d).map(|c| c.to_vec()).collect::<Vec<_>>(),
            "weights": init.weights,
            "means": chunk(&init.means),
            "variances": chunk(&init.variances),
            "tol": tol, "max_iter": max_iter, "reg_covar": 1e-6,
        }),
    );
    let opts = EmOptions {
        tol,
        max_iter,
        reg_covar: 1e-6,
        floor: Vec::new(),
        threads: 2,
    };
    let ours = gmm::em_from(rows, init.clone(), &opts);
    assert_eq!(
        ours.iterations as u64,
        r["n_iter"].as_u64().unwrap(),
        "iterations"
    );
    assert_eq!(ours.converged, r["converged"].as_bool().unwrap());
    let weights = floats(&r["weights"]);
    let means: Vec<f64> = r["means"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(floats)
        .collect();
    let vars: Vec<f64> = r["variances"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(floats)
        .collect();
    let k = init.weights.len();
    assert_eq!(weights.len(), k, "reference weights");
    assert_eq!(means.len(), k * m, "reference means");
    assert_eq!(vars.len(), k * m, "reference variances");
    assert_eq!(ours.mixture.weights.len(), k, "weights");
    assert_eq!(ours.mixture.means.len(), k * m, "means");
    assert_eq!(ours.mixture.variances.len(), k * m, "variances");
    // Same start, same updates: the paths differ only by rounding. Each M
    // step sums n rows (relative error at most about n·ε, recursive
    // summation); scikit-learn's diagonal variance is E[x²] − μ², which
    // cancels and scales that by κ = max (v + μ²) / v over components and
    // dimensions (taken at the start and at the end); a variance error moves
    // every responsibility, hence every quantity, of the next step by about
    // the same relative amount. Without assuming EM contracts, the errors of
    // the iterations add: tolerance = iterations · n · ε · κ, relative to
    // max(|value|, 1). Old Faithful: 7 · 272 · ε · 180 = 7.6e-11 (measured
    // worst 7.6e-14, a variance); iris: 7 · 150 · ε · κ (measured 3.5e-15).
    let kappa = |mu: &[f64], v: &[f64]| {
        mu.iter()
            .zip(v)
            .map(|(u, v)| (v + u * u) / v)
            .fold(1.0, f64::max)
    };
    let kappa = kappa(&init.means, &init.variances).max(kappa(&means, &vars));
    let n = rows.len() / d;
    let tol_rel = ours.iterations as f64 * n as f64 * f64::EPSILON * kappa;
    let close = |a: f64, b: f64, what: &str| {
        assert!(
            (a - b).abs() <= tol_rel * b.abs().max(1.0),
            "{what}: {a} vs {b} (tolerance {tol_rel:e} relative)"
        );
    };
    close(
        ours.lower_bound,
        r["lower_bound"].as_f64().unwrap(),
        "lower bound",
    );
    for (a, b) in ours.mixture.weights.iter().zip(&weights) {
        close(*a, *b, "weight");
    }
    for (a, b) in ours.mixture.means.iter().zip(&means) {
        close(*a, *b, "mean");
    }
    for (a, b) in ours.mixture.variances.iter().zip(&vars) {
        close(*a, *b, "variance");
    }
    let mean_ll = gmm::mean_log_likelihood(rows, &ours.mixture, 1);
    let ref_mean_ll = r["mean_log_likelihood"].as_f64().unwrap();
    close(mean_ll, ref_mean_ll, "mean log-likelihood");
    // BIC = −2 n ℓ̄ + p ln n on both sides: this checks the parameter count
    // p (scikit-learn's `_n_parameters` for "diag") and the formula. p ln n
    // is the same to a few ulps, so |ΔBIC| ≤ 2 n |Δℓ̄| + 4 ε |BIC| (measured
    // 4.5e-12 on Old Faithful's 2346.06).
    let ours_bic = gmm::bic(n, mean_ll, ours.mixture.parameters());
    let ref_bic = r["bic"].as_f64().unwrap();
    let tol_bic =
        2.0 * n as f64 * tol_rel * ref_mean_ll.abs().max(1.0) + 4.0 * f64::EPSILON * ref_bic.abs();
    assert!(
        (ours_bic - ref_bic).abs() <= tol_bic,
        "BIC: {ours_bic} vs {ref_bic} (tolerance {tol_bic:e})"
    );
}

#[test]
fn em_from_same_start_matches_scikit_learn() {
    // Old Faithful, 2 components, from a deliberately poor start.
    let (_, rows, d) = read_csv(&data("faithful.csv"));
    let init = Mixture {
        m: 2,
        weights: vec![0.5, 0.5],
        means: vec![2.5, 60.0, 4.0, 75.0],
        variances: vec![1.0, 100.0, 1.0, 100.0],
    };
    em_case(&rows, d, &init, 1e-6, 200);
    // Standardised iris, 3 components, stopped early by max_iter.
    let (_, rows, d) = read_csv(&data("iris.csv"));
    let pca = plumb::pca::fit(&rows, d).unwrap();
    let z: Vec<f64> = rows
        .chunks(d)
        .flat_map(|r| {
            r.iter()
                .zip(&pca.mean)
                .zip(&pca.scale)
                .map(|((x, m), s)| (x - m) / s)
                .collect::<Vec<_>>()
        })
        .collect();
    let init = Mixture {
        m: 4,
        weights: vec![0.2, 0.3, 0.5],
        means: vec![
            -1.0, 1.0, -1.0, -1.0, 0.0, 0.0, 0.0, 0.0, 1.0, 0.0, 1.0, 1.0,
        ],
        variances: vec![1.0; 12],
    };
    em_case(&z, d, &init, 1e-3, 7);
}

#[test]
fn old_faithful_diagonal_mixture_matches_reference_fit() {
    // Old Faithful (data: Azzalini & Bowman 1990), 2 diagonal components, at
    // the maximum-likelihood fixed point. Reference values computed with
    // scikit-learn 1.9.1: GaussianMixture(2, covariance_type="diag",
    // n_init=20, tol=0, max_iter=5000, reg_covar=1e-6, random_state=0) run to
    // its fixed point, components sorted by descending weight, printed to 5
    // decimals: total log-likelihood −1147.80635; weights 0.64348 / 0.35652;
    // means (4.29107, 79.98562) and (2.03792, 54.49295); variances
    // (0.16815, 35.77335) and (0.07034, 33.75585).
    //
    // Tolerance: the table rounds to 5 decimals, so the fixed point is within
    // 5e-6 of each entry; plumb's EM stops at tol 1e-14, whose distance to
    // the fixed point is far below that (scikit-learn stopped at the same
    // tol is within 1.1e-11 of its 5000-iteration values, measured with
    // scikit-learn 1.9.1), allowed for by 1e-9. Measured worst: 4.3e-6 (the
    // mean 2.0379157; the rounding itself).
    let (_, rows, _) = read_csv(&data("faithful.csv"));
    let opts = FitOptions {
        k: 2,
        restarts: 20,
        seed: 1,
        em: EmOptions {
            tol: 1e-14,
            max_iter: 5000,
            reg_covar: 1e-6,
            floor: Vec::new(),
            threads: 1,
        },
    };
    let fit = gmm::fit(&rows, 2, &opts, &mut |_, _, _| {});
    const TOL: f64 = 5e-6 + 1e-9;
    let total = fit.mean_ll * 272.0;
    assert!(
        (total - (-1147.80635)).abs() <= TOL,
        "total log-likelihood {total}"
    );
    let mix = &fit.best.mixture;
    let want = Mixture {
        m: 2,
        weights: vec![0.64348, 0.35652],
        means: vec![4.29107, 79.98562, 2.03792, 54.49295],
        variances: vec![0.16815, 35.77335, 0.07034, 33.75585],
    };
    assert_eq!(mix.weights.len(), 2, "{mix:?}");
    assert_eq!(mix.means.len(), 4, "{mix:?}");
    assert_eq!(mix.variances.len(), 4, "{mix:?}");
    for (what, got, want) in [
        ("weight", &mix.weights, &want.weights),
        ("mean", &mix.means, &want.means),
        ("variance", &mix.variances, &want.variances),
    ] {
        for (g, w) in got.iter().zip(want) {
            assert!((g - w).abs() <= TOL, "{what} {g} vs {w}: {mix:?}");
        }
    }
}

#[test]
fn array_logs_written_by_numpy_read_as_their_csv() {
    // NumPy writes the wine data set in every array form plumb reads (2-D f8
    // and f4, structured f8 and f4, format version 2) and in forms it
    // refuses; the values must come out bit for bit as the CSV of the same
    // numbers (f4 values widened to f8; printed with 17 significant digits,
    // which round-trip; the CSV reader is held to correct rounding in its own
    // tests).
    use plumb::logs::{LogSet, ReadOptions, Selection};
    use plumb::progress::Stage;
    let dir = std::env::temp_dir().join(format!("plumb-npy-ref-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    std::fs::create_dir_all(&dir).unwrap();
    let r = reference("write_npy.py", &json!({ "dir": dir }));
    let opts = ReadOptions {
        time_column: None,
        ..ReadOptions::default()
    };
    let values = |path: &str| -> plumb::error::Result<Vec<f64>> {
        let set = LogSet::open(&[path.into()], opts.clone())?;
        let mut v = Vec::new();
        set.for_each(&Selection::all(1), &Stage::hidden(), |c| {
            v.extend_from_slice(&c.values);
            Ok(())
        })?;
        Ok(v)
    };
    let csv = values(r["csv"].as_str().unwrap()).unwrap();
    let csv_f4 = values(r["csv_f4"].as_str().unwrap()).unwrap();
    assert_eq!(csv.len(), 178 * 13);
    let read = r["read"].as_object().unwrap();
    assert_eq!(read.len(), 5);
    for (name, path) in read {
        let want = if name.ends_with("f4") { &csv_f4 } else { &csv };
        let got = values(path.as_str().unwrap()).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert!(
            got.len() == want.len()
                && got
                    .iter()
                    .zip(want)
                    .all(|(a, b)| a.to_bits() == b.to_bits()),
            "{name}: values differ from the CSV"
        );
    }
    for (name, needle) in [
        ("fortran", "found Fortran order"),
        ("big_endian", "found big-endian \">f8\""),
        ("integers", "found element type \"<i8\""),
        ("three_d", "found shape (2, 89, 13)"),
    ] {
        let e = values(r["refused"][name].as_str().unwrap()).expect_err(name);
        assert!(e.to_string().contains(needle), "{name}: {e}");
    }
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn residual_whitening_matches_numpy_pinv() {
    // The residual chart's whitening matrix (`plumb::residual::whitening`,
    // model format 4) against numpy's `pinv(S, rcond=1e-8, hermitian=True)`
    // on the same float32 residuals (tests/python/ref_whiten.py): the
    // residuals of a PCA keeping m components, so S has rank d − m and the
    // pseudo-inverse must drop exactly the m null directions.
    //
    // Tolerance, from the method. Both sides form S in f64 from the same
    // rows; each entry is a sum of n products, so ‖ΔS‖₂ ≤ ‖ΔS‖_F ≤
    // E = 2·d·n·ε·s_max (both sides' summation errors; s_max the largest
    // variance). To first order the pseudo-inverse on the kept subspace
    // moves by ‖ΔS⁺‖ ≤ 3·E / λ_min² (the inverse of the kept eigenvalues,
    // and the tilt of the null space by E / λ_min; Stewart & Sun,
    // *Matrix Perturbation Theory*, 1990, ch. III; reference from memory),
    // λ_min the smallest kept eigenvalue. Then W_ij = S⁺_ij / √a_i,
    // a_i = S⁺_ii, moves by at most ‖ΔS⁺‖ (1/√a_i + |S⁺_ij| / (2 a_i^{3/2}))
    // = ‖ΔS⁺‖ (1 + |W_ij| / (2 √a_i)) / √a_i, and plumb stores W in f32
    // (2⁻²⁴ relative).
    let mut worst = 0.0f64;
    for (set, m) in [("wine", 3usize), ("breast_cancer", 6)] {
        let r = reference("ref_whiten.py", &json!({ "dataset": set, "components": m }));
        let (rows, d) = rows_of(&r["residuals"]);
        let n = rows.len() / d;
        let w_ref: Vec<f64> = r["w"].as_array().unwrap().iter().flat_map(floats).collect();
        let eig = floats(&r["eigenvalues"]);
        assert_eq!(w_ref.len(), d * d);
        // The m null directions are dropped, the d − m real ones kept: the
        // check is not degenerate.
        let lambda_min = eig[d - m - 1];
        assert!(
            eig[d - m] < 1e-8 * eig[0] && lambda_min > 1e-8 * eig[0],
            "{set}: {eig:?}"
        );
        // The residuals are float32 values; JSON carries them as decimals,
        // which serde_json reads to within an f64 ulp, so rounding to f32
        // gives back the values numpy used.
        let rows32: Vec<f32> = rows.iter().map(|v| *v as f32).collect();
        assert!(rows32
            .iter()
            .zip(&rows)
            .all(|(a, b)| (f64::from(*a) - b).abs() <= 2.0 * f64::EPSILON * b.abs()));
        let starts = [0usize];
        let res = plumb::residual::Residuals {
            d,
            rows: &rows32,
            starts: &starts,
            warmup: 0,
            dwell: 1,
        };
        let w = plumb::residual::whitening(&res);
        let s_max = (0..d)
            .map(|j| (0..n).map(|i| rows[i * d + j].powi(2)).sum::<f64>() / n as f64)
            .fold(0.0, f64::max);
        let e = 2.0 * (d * n) as f64 * f64::EPSILON * s_max;
        let dsp = 3.0 * e / (lambda_min * lambda_min);
        for i in 0..d {
            // √a_i from the reference: W_ii = a_i / √a_i.
            let sqrt_a = w_ref[i * d + i];
            for j in 0..d {
                let (ours, theirs) = (f64::from(w[i * d + j]), w_ref[i * d + j]);
                let bound = dsp * (1.0 + theirs.abs() / (2.0 * sqrt_a)) / sqrt_a
                    + theirs.abs() * 2f64.powi(-24);
                let err = (ours - theirs).abs();
                assert!(
                    err <= bound,
                    "{set} W[{i}][{j}]: {ours} vs {theirs} (error {err:e} > bound {bound:e})"
                );
                worst = worst.max(err / bound);
            }
        }
    }
    println!("whitening: worst error / bound {worst:.2e}");
}
