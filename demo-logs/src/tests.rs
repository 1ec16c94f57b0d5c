//! Structural checks on the simulated data (in memory, before printing).
#![allow(clippy::needless_range_loop)] // matrix code reads better indexed

use super::*;
use crate::features::{idx, N};
use crate::sim::Mode;

const MODES: [Mode; 5] = [
    Mode::Idle,
    Mode::Accelerating,
    Mode::Cruising,
    Mode::Towing,
    Mode::Braking,
];

fn simulate(
    seed: u64,
    robot: u32,
    day: u32,
    rows: usize,
    drift: Drift,
    onset: usize,
) -> (Vec<[f64; N]>, Vec<Mode>) {
    let mut sim = Sim::new(seed, robot, day, rows, drift, onset);
    let mut data = Vec::with_capacity(rows);
    let mut modes = Vec::with_capacity(rows);
    for _ in 0..rows {
        let mut x = [0.0; N];
        modes.push(sim.step(&mut x));
        data.push(x);
    }
    (data, modes)
}

fn training_set(rows: usize) -> (Vec<[f64; N]>, Vec<Mode>) {
    let mut data = Vec::new();
    let mut modes = Vec::new();
    for (r, d) in TRAIN {
        let (x, m) = simulate(DEMO_SEED, r, d, rows, Drift::None, rows);
        data.extend(x);
        modes.extend(m);
    }
    (data, modes)
}

struct Pca {
    mean: [f64; N],
    std: [f64; N],
    /// Eigenvalues of the correlation matrix, descending.
    values: Vec<f64>,
    /// Matching unit eigenvectors.
    vectors: Vec<[f64; N]>,
}

/// Eigen-decomposition of a symmetric matrix by cyclic Jacobi rotations.
fn jacobi(mut a: [[f64; N]; N]) -> (Vec<f64>, Vec<[f64; N]>) {
    let mut v = [[0.0; N]; N];
    for (i, row) in v.iter_mut().enumerate() {
        row[i] = 1.0;
    }
    for _sweep in 0..100 {
        let mut off = 0.0;
        for i in 0..N {
            for j in i + 1..N {
                off += a[i][j] * a[i][j];
            }
        }
        if off < 1e-22 {
            break;
        }
        for p in 0..N {
            for q in p + 1..N {
                if a[p][q].abs() < 1e-300 {
                    continue;
                }
                let theta = (a[q][q] - a[p][p]) / (2.0 * a[p][q]);
                let t = theta.signum() / (theta.abs() + (theta * theta + 1.0).sqrt());
                let t = if theta == 0.0 { 1.0 } else { t };
                let c = 1.0 / (t * t + 1.0).sqrt();
                let s = t * c;
                for k in 0..N {
                    let akp = a[k][p];
                    let akq = a[k][q];
                    a[k][p] = c * akp - s * akq;
                    a[k][q] = s * akp + c * akq;
                }
                for k in 0..N {
                    let apk = a[p][k];
                    let aqk = a[q][k];
                    a[p][k] = c * apk - s * aqk;
                    a[q][k] = s * apk + c * aqk;
                }
                for row in v.iter_mut() {
                    let vkp = row[p];
                    let vkq = row[q];
                    row[p] = c * vkp - s * vkq;
                    row[q] = s * vkp + c * vkq;
                }
            }
        }
    }
    let mut order: Vec<usize> = (0..N).collect();
    order.sort_by(|&i, &j| a[j][j].total_cmp(&a[i][i]));
    let values = order.iter().map(|&i| a[i][i]).collect();
    let vectors = order
        .iter()
        .map(|&i| {
            let mut e = [0.0; N];
            for (k, ek) in e.iter_mut().enumerate() {
                *ek = v[k][i];
            }
            e
        })
        .collect();
    (values, vectors)
}

fn pca(data: &[[f64; N]]) -> Pca {
    let n = data.len() as f64;
    let mut mean = [0.0; N];
    for x in data {
        for k in 0..N {
            mean[k] += x[k] / n;
        }
    }
    let mut std = [0.0; N];
    for x in data {
        for k in 0..N {
            std[k] += (x[k] - mean[k]) * (x[k] - mean[k]) / n;
        }
    }
    for s in &mut std {
        *s = s.sqrt();
    }
    let mut c = [[0.0; N]; N];
    for x in data {
        let z: Vec<f64> = (0..N).map(|k| (x[k] - mean[k]) / std[k]).collect();
        for i in 0..N {
            for j in 0..N {
                c[i][j] += z[i] * z[j] / n;
            }
        }
    }
    let (values, vectors) = jacobi(c);
    Pca {
        mean,
        std,
        values,
        vectors,
    }
}

impl Pca {
    fn components_for(&self, share: f64) -> usize {
        let total: f64 = self.values.iter().sum();
        let mut acc = 0.0;
        for (i, v) in self.values.iter().enumerate() {
            acc += v;
            if acc >= share * total {
                return i + 1;
            }
        }
        N
    }

    fn project(&self, x: &[f64; N], m: usize) -> Vec<f64> {
        (0..m)
            .map(|c| {
                (0..N)
                    .map(|k| (x[k] - self.mean[k]) / self.std[k] * self.vectors[c][k])
                    .sum()
            })
            .collect()
    }
}

#[test]
fn low_dimensional_structure() {
    for seed in [1, 2, 3] {
        let mut data = Vec::new();
        for (r, d) in TRAIN {
            data.extend(simulate(seed, r, d, 6000, Drift::None, 6000).0);
        }
        let k95 = pca(&data).components_for(0.95);
        println!("seed {seed}: components for 95%: {k95}");
        assert!(
            (6..=10).contains(&k95),
            "seed {seed}: 95% of the variance needs {k95} components"
        );
    }
    let (data, _) = training_set(6000);
    let p = pca(&data);
    let total: f64 = p.values.iter().sum();
    let mut acc = 0.0;
    let cum: Vec<String> = p
        .values
        .iter()
        .map(|v| {
            acc += v;
            format!("{:.3}", acc / total)
        })
        .collect();
    println!("cumulative explained variance: {}", cum.join(" "));
    let k95 = p.components_for(0.95);
    println!("components for 95%: {k95}");
    for k in 0..N {
        let explained: f64 = (0..8)
            .map(|c| p.values[c] * p.vectors[c][k] * p.vectors[c][k])
            .sum();
        println!(
            "  {:>20}: residual after 8 PCs {:.3}",
            crate::features::FEATURES[k].name,
            1.0 - explained
        );
    }
    assert!(
        (6..=10).contains(&k95),
        "95% of the variance needs {k95} components"
    );
    // Not trivially one-dimensional either.
    assert!(p.values[0] / total < 0.7);
}

#[test]
fn modes_present_with_plausible_shares_and_dwell() {
    for (r, d) in TRAIN {
        let (_, modes) = simulate(DEMO_SEED, r, d, 6000, Drift::None, 6000);
        let share = |m: Mode| modes.iter().filter(|&&x| x == m).count() as f64 / modes.len() as f64;
        let shares: Vec<String> = MODES
            .iter()
            .map(|&m| format!("{m:?}={:.2}", share(m)))
            .collect();
        let trips = modes
            .windows(2)
            .filter(|w| w[0] == Mode::Idle && w[1] != Mode::Idle)
            .count();
        println!("robot{r}_day{d}: {} trips={trips}", shares.join(" "));
        // Dwell times (s) of complete mode visits.
        let mut runs: Vec<(Mode, usize)> = Vec::new();
        for &m in &modes {
            match runs.last_mut() {
                Some((lm, n)) if *lm == m => *n += 1,
                _ => runs.push((m, 1)),
            }
        }
        let inner = &runs[1..runs.len() - 1];
        for m in MODES {
            let d: Vec<f64> = inner
                .iter()
                .filter(|(x, _)| *x == m)
                .map(|(_, n)| *n as f64 * 0.1)
                .collect();
            if !d.is_empty() {
                let lo = d.iter().copied().fold(f64::INFINITY, f64::min);
                let hi = d.iter().copied().fold(0.0, f64::max);
                println!("    {m:?}: {} visits, {lo:.1}..{hi:.1} s", d.len());
            }
        }
        for m in MODES {
            assert!(
                share(m) > 0.01,
                "robot{r}_day{d}: mode {m:?} share {}",
                share(m)
            );
        }
        assert!(share(Mode::Idle) < 0.6);
        assert!(trips >= 5, "robot{r}_day{d}: only {trips} trips");
    }
}

#[test]
fn modes_form_clusters_in_latent_space() {
    let (data, modes) = training_set(6000);
    let p = pca(&data);
    let m = 4;
    let z: Vec<Vec<f64>> = data.iter().map(|x| p.project(x, m)).collect();
    let stats = |mode: Mode| {
        let sel: Vec<&Vec<f64>> = z
            .iter()
            .zip(&modes)
            .filter(|(_, &md)| md == mode)
            .map(|(v, _)| v)
            .collect();
        let n = sel.len() as f64;
        let mut mean = vec![0.0; m];
        for v in &sel {
            for k in 0..m {
                mean[k] += v[k] / n;
            }
        }
        let mut var = 0.0;
        for v in &sel {
            for k in 0..m {
                var += (v[k] - mean[k]) * (v[k] - mean[k]) / n;
            }
        }
        (mean, var.sqrt())
    };
    let steady = [Mode::Idle, Mode::Cruising, Mode::Towing];
    let s: Vec<_> = steady.iter().map(|&md| stats(md)).collect();
    for i in 0..steady.len() {
        for j in i + 1..steady.len() {
            let d: f64 = (0..m)
                .map(|k| (s[i].0[k] - s[j].0[k]).powi(2))
                .sum::<f64>()
                .sqrt();
            let spread = (s[i].1 + s[j].1) / 2.0;
            println!(
                "{:?} vs {:?}: distance {d:.2}, spread {spread:.2}",
                steady[i], steady[j]
            );
            assert!(
                d > 1.0 * spread,
                "{:?} and {:?} overlap",
                steady[i],
                steady[j]
            );
        }
    }
}

#[test]
fn drift_logs_match_their_nominal_twin_before_onset() {
    let rows = 8000;
    let onset = 3000;
    for d in &DRIFT_LOGS {
        let (nominal, _) = simulate(7, d.robot, d.day, rows, Drift::None, rows);
        let (drifted, _) = simulate(7, d.robot, d.day, rows, d.drift, onset);
        for r in 0..onset {
            for k in 0..N {
                assert_eq!(
                    nominal[r][k].to_bits(),
                    drifted[r][k].to_bits(),
                    "{} row {r}",
                    d.scenario
                );
            }
        }
        if d.drift == Drift::BearingWear {
            // A slight, growing gearbox temperature rise.
            let rise = |r: usize| drifted[r][idx::T_GB] - nominal[r][idx::T_GB];
            println!(
                "bearing_wear: gearbox +{:.2} K mid-way, +{:.2} K at the end",
                rise((onset + rows) / 2),
                rise(rows - 1)
            );
            assert!(rise(rows - 1) > 1.0 && rise(rows - 1) < 5.0);
            assert!(rise((onset + rows) / 2) < rise(rows - 1));
        }
        // ... and it acts on the declared features after onset, and only
        // marginally (physical coupling) on the others. Some effects only
        // show while moving, so compare over the whole post-onset part.
        for k in 0..N {
            let name = crate::features::FEATURES[k].name;
            let post = &nominal[onset..];
            let n = post.len() as f64;
            let mean = post.iter().map(|x| x[k]).sum::<f64>() / n;
            let sd = (post
                .iter()
                .map(|x| (x[k] - mean) * (x[k] - mean))
                .sum::<f64>()
                / n)
                .sqrt();
            let diffs: Vec<f64> = (onset..rows)
                .filter(|&r| !drifted[r][k].is_nan())
                .map(|r| (drifted[r][k] - nominal[r][k]).abs())
                .collect();
            let nan_rows = (onset..rows).filter(|&r| drifted[r][k].is_nan()).count();
            let effect = diffs.iter().sum::<f64>() / diffs.len().max(1) as f64 / sd;
            let declared = d.features.contains(&name);
            if effect > 0.0 || nan_rows > 0 {
                println!(
                    "{}: {name}: mean |change| {effect:.3} sd, {nan_rows} NaN rows",
                    d.scenario
                );
            }
            if declared {
                assert!(
                    effect > 0.03 || nan_rows > 0,
                    "{}: {name} barely changes ({effect})",
                    d.scenario
                );
            } else {
                assert!(
                    effect < 0.05 && nan_rows == 0,
                    "{}: undeclared {name} changes ({effect})",
                    d.scenario
                );
            }
        }
    }
}

#[test]
fn new_robots_and_days_stay_inside_the_training_envelope() {
    // Held-out logs (a new robot, new days) must look like one more training
    // log: each feature's log mean lies within the range of the training
    // logs' means, give or take 0.75 pooled standard deviations
    // (a log with more towing than any training log runs a bit warmer).
    let rows = 6000;
    let train: Vec<Vec<[f64; N]>> = TRAIN
        .iter()
        .map(|&(r, d)| simulate(DEMO_SEED, r, d, rows, Drift::None, rows).0)
        .collect();
    let pooled: Vec<[f64; N]> = train.iter().flatten().copied().collect();
    let p = pca(&pooled);
    let log_mean = |x: &[[f64; N]], k: usize| x.iter().map(|v| v[k]).sum::<f64>() / x.len() as f64;
    let mut logs: Vec<(u32, u32)> = HOLDOUT.to_vec();
    for i in 0..8u32 {
        logs.push((1 + i % 4, BULK_FIRST_DAY + i));
    }
    // ... and so does every 10-minute stretch of a long (2-hour) log.
    let (long, _) = simulate(
        DEMO_SEED,
        2,
        BULK_FIRST_DAY + 99,
        20 * rows,
        Drift::None,
        20 * rows,
    );
    let mut pieces: Vec<(String, Vec<[f64; N]>)> = logs
        .iter()
        .map(|&(r, d)| {
            (
                format!("robot{r}_day{d}"),
                simulate(DEMO_SEED, r, d, rows, Drift::None, rows).0,
            )
        })
        .collect();
    for (i, chunk) in long.chunks(rows).enumerate() {
        pieces.push((format!("long log, part {i}"), chunk.to_vec()));
    }
    for (label, x) in pieces {
        let mut worst = (f64::NEG_INFINITY, "");
        for k in 0..N {
            let means: Vec<f64> = train.iter().map(|t| log_mean(t, k)).collect();
            let lo = means.iter().copied().fold(f64::INFINITY, f64::min);
            let hi = means.iter().copied().fold(f64::NEG_INFINITY, f64::max);
            let m = log_mean(&x, k);
            let outside = (lo - m).max(m - hi) / p.std[k];
            if outside > worst.0 {
                worst = (outside, crate::features::FEATURES[k].name);
            }
        }
        println!(
            "{label}: furthest outside the training log means by {:.2} sd ({})",
            worst.0, worst.1
        );
        assert!(
            worst.0 < 1.5,
            "{label}: {} mean is {:.2} sd outside",
            worst.1,
            worst.0
        );
    }
}

#[test]
fn feature_table_is_consistent() {
    assert_eq!(feature_table().len(), N);
    assert_eq!(idx::COUNT, N);
    for (name, unit, desc) in feature_table() {
        assert!(!name.is_empty() && !desc.is_empty());
        assert!(
            name.bytes()
                .all(|b| b.is_ascii_lowercase() || b.is_ascii_digit() || b == b'_'),
            "{name}"
        );
        assert!(!unit.contains(['[', ']', ',']), "{unit}");
    }
    for d in &DRIFT_LOGS {
        for f in d.features {
            assert!(
                crate::features::index_of(f).is_some(),
                "{}: unknown feature {f}",
                d.scenario
            );
        }
    }
}

/// A plain linear detector fitted on the training logs: PCA keeping 95 % of
/// the variance, Hotelling T² and squared prediction error (SPE), each with
/// its 99.5 % training quantile as the limit. Missing readings count as the
/// training mean.
struct LinearDetector {
    p: Pca,
    m: usize,
    t2_lim: f64,
    spe_lim: f64,
}

impl LinearDetector {
    fn fit(train: &[[f64; N]]) -> Self {
        let p = pca(train);
        let m = p.components_for(0.95);
        let mut d = LinearDetector {
            p,
            m,
            t2_lim: 0.0,
            spe_lim: 0.0,
        };
        let quantile = |mut v: Vec<f64>| {
            v.sort_by(f64::total_cmp);
            v[(v.len() as f64 * 0.995) as usize]
        };
        d.t2_lim = quantile(train.iter().map(|x| d.score(x).0).collect());
        d.spe_lim = quantile(train.iter().map(|x| d.score(x).1).collect());
        d
    }

    fn score(&self, x: &[f64; N]) -> (f64, f64) {
        let p = &self.p;
        let z: Vec<f64> = (0..N)
            .map(|k| {
                if x[k].is_nan() {
                    0.0
                } else {
                    (x[k] - p.mean[k]) / p.std[k]
                }
            })
            .collect();
        let mut t2 = 0.0;
        let mut rec = [0.0; N];
        for c in 0..self.m {
            let s: f64 = (0..N).map(|k| z[k] * p.vectors[c][k]).sum();
            t2 += s * s / p.values[c];
            for k in 0..N {
                rec[k] += s * p.vectors[c][k];
            }
        }
        (t2, (0..N).map(|k| (z[k] - rec[k]).powi(2)).sum())
    }

    /// Share of rows over the T² limit, over the SPE limit, over either.
    fn alarm_rates(&self, rows: &[[f64; N]]) -> (f64, f64, f64) {
        let n = rows.len() as f64;
        let (mut a, mut b, mut c) = (0.0, 0.0, 0.0);
        for x in rows {
            let (t2, spe) = self.score(x);
            a += f64::from(u8::from(t2 > self.t2_lim)) / n;
            b += f64::from(u8::from(spe > self.spe_lim)) / n;
            c += f64::from(u8::from(t2 > self.t2_lim || spe > self.spe_lim)) / n;
        }
        (a, b, c)
    }
}

fn fmt_rates((t2, spe, _): (f64, f64, f64)) -> String {
    format!("T2 {:5.1}% SPE {:5.1}%", 100.0 * t2, 100.0 * spe)
}

#[test]
fn held_out_logs_raise_few_alarms_in_a_linear_detector() {
    // Training itself is at 1 % by construction (two 0.5 % limits).
    let (train, _) = training_set(6000);
    let det = LinearDetector::fit(&train);
    let mut logs: Vec<(u32, u32)> = HOLDOUT.to_vec();
    for i in 0..4u32 {
        logs.push((1 + i % 4, BULK_FIRST_DAY + i));
    }
    let mut total = 0.0;
    for &(r, d) in &logs {
        let (x, _) = simulate(DEMO_SEED, r, d, 6000, Drift::None, 6000);
        let rates = det.alarm_rates(&x);
        println!("robot{r}_day{d}: {}", fmt_rates(rates));
        assert!(
            rates.2 < 0.04,
            "robot{r}_day{d}: {:.1}% of rows alarm",
            100.0 * rates.2
        );
        total += rates.2 / logs.len() as f64;
    }
    assert!(
        total < 0.025,
        "held-out logs alarm on {:.1}% of rows",
        100.0 * total
    );
}

/// Not a pass/fail check: prints how the plain linear detector sees the
/// held-out logs and each scenario. Run with
/// `cargo test -p plumb-scenario --lib -- --ignored --nocapture`.
#[test]
#[ignore]
fn linear_detector_report() {
    let (train, _) = training_set(6000);
    let det = LinearDetector::fit(&train);
    println!(
        "{} components; share of rows over the training 99.5% limits:",
        det.m
    );
    let mut logs: Vec<(u32, u32)> = HOLDOUT.to_vec();
    for i in 0..8u32 {
        logs.push((1 + i % 4, BULK_FIRST_DAY + i));
    }
    for (r, d) in logs {
        let (x, _) = simulate(DEMO_SEED, r, d, 6000, Drift::None, 6000);
        println!(
            "  nominal robot{r}_day{d:<5} {}",
            fmt_rates(det.alarm_rates(&x))
        );
    }
    let cfg = Config::default();
    let (o, n) = (cfg.drift_onset, cfg.drift_rows);
    let mid = o + (n - o) / 2;
    for dl in &DRIFT_LOGS {
        let (x, _) = simulate(DEMO_SEED, dl.robot, dl.day, n, dl.drift, o);
        println!(
            "  {:<15} before onset: {} | first half after: {} | second half: {}",
            dl.scenario,
            fmt_rates(det.alarm_rates(&x[..o])),
            fmt_rates(det.alarm_rates(&x[o..mid])),
            fmt_rates(det.alarm_rates(&x[mid..]))
        );
    }
}
