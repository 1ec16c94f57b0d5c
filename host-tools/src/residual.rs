//! Calibration of the SPE's residual chart (model formats 3 and 4).
//!
//! The chart keeps one EWMA per feature of that feature's PCA residual
//! `r_i = z_i − (P Pᵀ z)_i` ([`plumb_firmware::ResidualChart`]), whitened
//! first by default (format 4, "Whitening" below: steps 1–4 then read `r_i`
//! as the whitened `v_i`). A shift in one
//! sensor's relation to the others shows in its own residual long before it
//! moves the sum of all squared residuals (the SPE), but the features differ
//! in memory: a temperature's residual wanders for thousands of samples, a
//! vibration band's forgets within a few. One limit on the raw EWMAs is then
//! set by the slowest feature and is blind for the others; a limit per feature
//! at this false-alarm rate would need each feature's tail far beyond what the
//! held-out rows show. So each feature's EWMA is scaled to its own nominal
//! tail and one limit, set on the held-out rows like every other chart's,
//! serves them all:
//!
//! 1. `center_i` and `spread_i`: mean and standard deviation (ddof = 1) of
//!    `r_i` over the held-out rows (the detector's f32 residuals).
//! 2. `tail_i`, the larger of two scales of `w_i = (r_i − center_i) /
//!    spread_i`:
//!    * the `1 − TAIL_ROWS / n` quantile (R type 1) of `|EWMA(w_i)|` over
//!      the `n` rows that can alarm (after each log's warm-up; the EWMA from
//!      0 at each log's start, the monitor's λ, f64): the highest quantile
//!      with [`TAIL_ROWS`] rows beyond it, so it is estimated from the tail
//!      itself and not from one extreme. The choice of 100 rows is ours
//!      (common practice for a tail quantile's precision, no source);
//!    * a bound on the level of `w_i` in a log not held out: a slow feature's
//!      residual (a winding temperature's) sits at a level of its own for a
//!      whole log (robot, day), which its EWMA follows, and a few held-out
//!      logs sample few such levels. With the means `m_1 … m_L` of `w_i` over
//!      each of the `L ≥ 2` held-out logs, their mean `m̄` and standard
//!      deviation `s` (ddof = 1), the bound is `|m̄| + t_{1−α/(2d), L−1} ·
//!      s · √(1 + 1/L)`: the normal prediction interval for one future
//!      observation (the textbook interval, e.g. Hahn & Meeker, *Statistical
//!      Intervals*, 1991; reference from memory), here the level of one new
//!      log, two-sided, with [`LEVEL_ALPHA`] = 1 % split over the `d`
//!      features (Bonferroni), so a new log's levels alone take some
//!      feature beyond its scale with a chance of about 1 % (the 1 % is our
//!      choice). Few logs make it wide: for d = 24, `t` is 49 with 3 logs
//!      and 6.3 with 8. With one log there is no such bound: the calibration
//!      leaves the chart off and says so.
//! 3. `gain_i = 1 / (spread_i · tail_i)` (0, which turns the feature's chart
//!    off, when either is not positive and finite). The model stores `center`
//!    and `gain`; the detector smooths `(r_i − center_i) · gain_i`, so each
//!    feature's EWMA sits at or below 1 on all but its [`TAIL_ROWS`] most
//!    extreme held-out rows, and a new log's levels alone take some
//!    feature's beyond 1 with a chance of about 1 %.
//! 4. The limit `L` on `max_i |EWMA_i|`: the smallest that meets the chart's
//!    allowance on the held-out rows (as every chart: [`crate::calibrate`],
//!    steps 4–5, with the detector's own arithmetic,
//!    [`plumb_firmware::score::chart_next`]: each log from 0, no alarm in
//!    warm-up, `raise_dwell` samples over the limit, a restart from 0 after an
//!    alarm), by bisection to [`crate::calibrate::SEARCH_TOL`], never below 1.
//!
//! On the demo scenario this chart flags `bearing_wear` and `new_floor` far
//! sooner than the SPE's own charts (BENCHMARKS.md, "Detection", attempt 9).
//!
//! **Whitening** (model format 4, the default; `--residual-input plain`
//! turns it off). The nominal residuals move together: the operating modes
//! push both motor currents, the bus current and the duty cycles at once, so
//! each feature's residual alone wanders with that common part, and a change
//! that breaks a correlation (a rattling sensor pod) hides under it. Before
//! steps 1–4 each row's residuals become `v = W r` with
//! `W_ij = S⁺_ij / √S⁺_ii` ([`whitening`]), `S⁺` the pseudo-inverse of the
//! residuals' covariance `S` (ddof = 0) on the held-out rows: `v_i` is the
//! standardised statistic of a bias in sensor `i` alone against Gaussian
//! residuals of covariance `S` (the generalised likelihood ratio test of one
//! sensor's bias on a linear model's residuals, e.g. Gertler, *Fault
//! Detection and Diagnosis in Engineering Systems*, 1998; reference from
//! memory). `S` has rank `d − m` (the residuals lie in the complement of the
//! PCA plane); eigenvalues under [`PINV_RCOND`] of the largest are dropped.
//! Steps 1–4 then run on `v` unchanged, so the centre, gains and limit are
//! those of `v`. The rows are whitened with the detector's own arithmetic
//! ([`plumb_firmware::score::chart_input`]), so calibration and device
//! agree bit for bit. On the demo this flags `loose_mount` in 3 samples
//! instead of 8 (BENCHMARKS.md, "Detection", attempt 11).

use crate::calibrate::quantile_type1;
use crate::error::{Error, Result};
use plumb_firmware::score::chart_next;
use plumb_firmware::stats::Welford;
use plumb_model::{Model, ModelOwned, ModelView};
use serde::Serialize;

/// Held-out rows beyond each feature's tail quantile (step 2).
pub const TAIL_ROWS: f64 = 100.0;
/// Chance that a new log's levels alone take some feature's chart beyond 1
/// (step 2; split evenly over the features, two-sided). Our choice.
pub const LEVEL_ALPHA: f64 = 0.01;
/// Lowest limit: each feature's EWMA reaches 1 on its [`TAIL_ROWS`] most
/// extreme held-out rows, so a lower limit would alarm on every one of them.
pub const LIMIT_FLOOR: f32 = 1.0;

/// Eigenvalues of the residuals' covariance under this fraction of the
/// largest are dropped from its pseudo-inverse (as numpy's `pinv(rcond=…)`;
/// on the demo the `m` null directions of the PCA plane sit near 1e-13 of
/// the largest, f32 residuals being what they are, and the smallest real one
/// near 3e-4; our choice, as in the study of BENCHMARKS.md attempt 11).
pub const PINV_RCOND: f64 = 1e-8;

/// The residual chart's whitening matrix from the held-out residuals,
/// `d × d` row-major in f32: `W_ij = S⁺_ij / √S⁺_ii` (module docs), `S` in
/// f64. A feature whose residual never varies (`S⁺_ii = 0`) gets a row of
/// zeros, so its input is 0 and step 3 turns its chart off.
pub fn whitening(r: &Residuals<'_>) -> Vec<f32> {
    let d = r.d;
    // The covariance, a block of rows at a time (the moments merge).
    let mut moments = crate::pca::Moments::new(d);
    let mut block = Vec::with_capacity(4096 * d);
    for chunk in r.rows.chunks(4096 * d.max(1)) {
        block.clear();
        block.extend(chunk.iter().map(|v| f64::from(*v)));
        moments.merge(&crate::pca::Moments::from_rows(&block, d));
    }
    let (values, vectors) = crate::pca::symmetric_eigen(&moments.covariance(0), d);
    let largest = values.first().copied().unwrap_or(0.0);
    let mut pinv = vec![0.0f64; d * d];
    for (k, &l) in values.iter().enumerate() {
        if !(l > PINV_RCOND * largest) {
            continue;
        }
        for i in 0..d {
            let vi = vectors[i * d + k] / l;
            for j in 0..d {
                pinv[i * d + j] += vi * vectors[j * d + k];
            }
        }
    }
    let mut w = vec![0.0f32; d * d];
    for i in 0..d {
        let diag = pinv[i * d + i];
        if diag > 0.0 && diag.is_finite() {
            let norm = diag.sqrt();
            for j in 0..d {
                w[i * d + j] = (pinv[i * d + j] / norm) as f32;
            }
        }
    }
    w
}

/// Replaces each row's residuals by the chart's input `v_i` under the
/// matrix `whiten` (`d × d`), as the detector computes it.
pub fn whiten_rows(rows: &mut [f32], d: usize, whiten: &[f32]) {
    let mut r = vec![0.0f32; d];
    for row in rows.chunks_exact_mut(d.max(1)) {
        r.copy_from_slice(row);
        for (i, v) in row.iter_mut().enumerate() {
            *v = plumb_firmware::score::chart_input(whiten, &r, i);
        }
    }
}

/// One feature's part of the residual chart.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct FeatureResidual {
    /// Mean of the residual on the held-out rows.
    pub center: f64,
    /// Standard deviation (ddof = 1) of the residual.
    pub spread: f64,
    /// The scale used: the larger of `row_tail` and `level_bound`.
    pub tail: f64,
    /// Tail quantile of the feature's standardised residual EWMA.
    pub row_tail: f64,
    /// Prediction bound of a new log's level of the standardised residual
    /// (0 with fewer than two held-out logs).
    pub level_bound: f64,
    /// Stored gain `1 / (spread · tail)`; 0 turns the feature's chart off.
    pub gain: f32,
}

/// What the residual chart's calibration found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ResidualCalib {
    /// The quantile level of step 2, `1 − TAIL_ROWS / n`.
    pub tail_level: f64,
    /// Held-out logs whose levels bound a new log's (step 2).
    pub logs: usize,
    /// Student's t quantile of the level bound (0 with fewer than two logs).
    pub level_t: f64,
    /// Features whose scale is the level bound rather than the row tail.
    pub level_bound_features: usize,
    /// Per feature, in model order.
    pub features: Vec<FeatureResidual>,
    /// The chart's limit as searched (before any end-to-end widening).
    pub limit: f64,
    /// Alarms of the chart alone on the held-out rows at that limit.
    pub alarms: u64,
    /// Whether the limit is the floor (1).
    pub at_floor: bool,
    /// Passes over the held-out rows in the search.
    pub passes: u32,
    /// Widening factor of the end-to-end fallback (1: none).
    pub widened: f64,
}

impl ResidualCalib {
    /// The limit stored in the model.
    pub fn stored(&self) -> f32 {
        (self.limit * self.widened) as f32
    }
}

/// The held-out rows' residuals: `d` per scored row, the logs one after the
/// other, `starts` where each log begins (as [`crate::calibrate::Series`]).
pub struct Residuals<'a> {
    /// Features per row.
    pub d: usize,
    /// `d` residuals per row, row after row.
    pub rows: &'a [f32],
    /// Where each log starts, in rows.
    pub starts: &'a [usize],
    /// Rows at the start of each log that cannot alarm.
    pub warmup: u32,
    /// Consecutive rows over the limit that make an alarm.
    pub dwell: u16,
}

impl Residuals<'_> {
    pub(crate) fn n(&self) -> usize {
        self.rows.len() / self.d.max(1)
    }

    /// Row ranges of the logs.
    pub(crate) fn logs(&self) -> impl Iterator<Item = std::ops::Range<usize>> + '_ {
        let n = self.n();
        (0..self.starts.len()).map(move |i| {
            let a = self.starts[i].min(n);
            let b = self.starts.get(i + 1).copied().unwrap_or(n).min(n);
            a..b.max(a)
        })
    }

    pub(crate) fn row(&self, i: usize) -> &[f32] {
        &self.rows[i * self.d..(i + 1) * self.d]
    }

    /// Alarms of the residual chart alone with `limit`, in the detector's
    /// arithmetic; with `limit` = ∞ also the highest peak at a row that may
    /// alarm (the second value).
    fn alarms(&self, model: &Model, limit: f32) -> (u64, f32) {
        let lambda = model.monitor.ewma_lambda;
        self.chart_alarms(limit, self.d, |ewma, row| {
            // As the detector steps the chart, in place
            // (`score::chart_step`; the rows are its inputs, already
            // whitened), and the largest |value|. The model's range check
            // keeps every value finite, so no sample is dropped here.
            let mut peak = 0.0f32;
            for (((e, r), c), g) in ewma
                .iter_mut()
                .zip(row)
                .zip(&model.resid_center)
                .zip(&model.resid_gain)
            {
                *e = chart_next(*e, *r, *c, *g, lambda);
                peak = peak.max(e.abs());
            }
            peak
        })
    }

    /// Alarms of one chart alone with `limit`, as calibration counts them:
    /// its `n` EWMA values from 0 at each log's start, `step` moving them
    /// with a row and giving their peak, no alarm in the warm-up, `dwell`
    /// rows over the limit make an alarm, and the values restart from 0
    /// after one. With `limit` = ∞ also the highest peak at a row that may
    /// alarm (the second value).
    pub(crate) fn chart_alarms(
        &self,
        limit: f32,
        n: usize,
        mut step: impl FnMut(&mut [f32], &[f32]) -> f32,
    ) -> (u64, f32) {
        let warmup = self.warmup as usize;
        let dwell = u32::from(self.dwell.max(1));
        let mut alarms = 0;
        let mut highest = f32::NEG_INFINITY;
        let mut ewma = vec![0.0f32; n];
        for log in self.logs() {
            ewma.iter_mut().for_each(|e| *e = 0.0);
            let mut run = 0u32;
            for (i, row) in log.enumerate() {
                let peak = step(&mut ewma, self.row(row));
                if i < warmup {
                    continue;
                }
                highest = highest.max(peak);
                if peak > limit {
                    run += 1;
                    if run >= dwell {
                        alarms += 1;
                        ewma.iter_mut().for_each(|e| *e = 0.0);
                        run = 0;
                    }
                } else {
                    run = 0;
                }
            }
        }
        (alarms, highest)
    }
}

/// Each feature's centre, spread and scale (steps 1–3 above) for an EWMA
/// constant `lambda`.
pub struct Scales {
    /// Per feature, in model order.
    pub features: Vec<FeatureResidual>,
    /// The quantile level of step 2.
    pub tail_level: f64,
    /// Held-out logs.
    pub logs: usize,
    /// Student's t quantile of the level bound (0 with fewer than two logs).
    pub level_t: f64,
}

/// Steps 1–3 above with the EWMA constant `lambda`.
pub fn scales(r: &Residuals<'_>, lambda: f64) -> Result<Scales> {
    let mut all = scales_for(r, &[lambda])?;
    Ok(all.remove(0))
}

/// [`scales`] for each constant of `lambdas`, in one pass over each
/// feature's column for all of them (the same arithmetic per constant).
pub fn scales_for(r: &Residuals<'_>, lambdas: &[f64]) -> Result<Vec<Scales>> {
    let d = r.d;
    let n = r.n();
    // 1. Centre and spread.
    let mut moments = vec![Welford::<f64>::new(); d];
    for i in 0..n {
        for (w, v) in moments.iter_mut().zip(r.row(i)) {
            w.push(f64::from(*v));
        }
    }
    let center: Vec<f64> = moments.iter().map(|w| w.mean()).collect();
    let spread: Vec<f64> = moments.iter().map(|w| w.sample_variance().sqrt()).collect();
    // 2. The level of each log, then each feature's EWMA tail (one feature
    // at a time: n values held at once, not n × d).
    let warmup = r.warmup as usize;
    let w = |j: usize, v: f32| {
        let s = spread[j];
        if s > 0.0 {
            (f64::from(v) - center[j]) / s
        } else {
            0.0
        }
    };
    let mut levels: Vec<Vec<f64>> = vec![Vec::new(); d];
    for log in r.logs() {
        let rows = log.len();
        let mut sum = vec![0.0f64; d];
        for row in log {
            for (j, (acc, v)) in sum.iter_mut().zip(r.row(row)).enumerate() {
                *acc += w(j, *v);
            }
        }
        if rows > 0 {
            for (l, s) in levels.iter_mut().zip(sum) {
                l.push(s / rows as f64);
            }
        }
    }
    let eligible: usize = r.logs().map(|l| l.len().saturating_sub(warmup)).sum();
    if eligible == 0 {
        return Err(Error::input(
            "no held-out row after the warm-up: cannot calibrate the residual chart",
        ));
    }
    let mut tails: Vec<Vec<f32>> = lambdas
        .iter()
        .map(|_| Vec::with_capacity(eligible))
        .collect();
    // Each constant's tail quantile for feature `j`.
    let mut row_tails = |j: usize, level: f64| -> Vec<f64> {
        tails.iter_mut().for_each(Vec::clear);
        let mut e = vec![0.0f64; lambdas.len()];
        for log in r.logs() {
            e.iter_mut().for_each(|e| *e = 0.0);
            for (i, row) in log.enumerate() {
                let x = w(j, r.row(row)[j]);
                for (e, lambda) in e.iter_mut().zip(lambdas) {
                    *e += lambda * (x - *e);
                }
                if i >= warmup {
                    for (t, e) in tails.iter_mut().zip(&e) {
                        t.push(e.abs() as f32);
                    }
                }
            }
        }
        tails.iter_mut().map(|t| quantile_type1(t, level)).collect()
    };
    let tail_level = (1.0 - TAIL_ROWS / eligible as f64).max(0.5);
    let logs = levels.first().map_or(0, Vec::len);
    let level_t = if logs >= 2 {
        crate::arl::student_t_inv(1.0 - LEVEL_ALPHA / (2.0 * d as f64), (logs - 1) as f64)
    } else {
        0.0
    };
    let level_bound = |l: &[f64]| -> f64 {
        if l.len() < 2 {
            return 0.0;
        }
        let k = l.len() as f64;
        let mean = l.iter().sum::<f64>() / k;
        let sd = (l.iter().map(|m| (m - mean).powi(2)).sum::<f64>() / (k - 1.0)).sqrt();
        mean.abs() + level_t * sd * (1.0 + 1.0 / k).sqrt()
    };
    let mut features: Vec<Vec<FeatureResidual>> =
        lambdas.iter().map(|_| Vec::with_capacity(d)).collect();
    for j in 0..d {
        let level_bound = level_bound(&levels[j]);
        for (out, row_tail) in features.iter_mut().zip(row_tails(j, tail_level)) {
            let tail = row_tail.max(level_bound);
            let g = 1.0 / (spread[j] * tail);
            let gain = if g.is_finite() && g > 0.0 {
                g as f32
            } else {
                0.0
            };
            out.push(FeatureResidual {
                center: center[j],
                spread: spread[j],
                tail,
                row_tail,
                level_bound,
                gain,
            });
        }
    }
    Ok(features
        .into_iter()
        .map(|features| Scales {
            features,
            tail_level,
            logs,
            level_t,
        })
        .collect())
}

/// Sets `model.resid_center`, `resid_gain` and `resid_limit` from the
/// held-out residuals (steps 1–4 above); `allowed` alarms on them.
pub fn calibrate(model: &mut ModelOwned, r: &Residuals<'_>, allowed: u64) -> Result<ResidualCalib> {
    let Scales {
        features,
        tail_level,
        logs,
        level_t,
    } = scales(r, f64::from(model.monitor.ewma_lambda))?;
    let level_bound_features = features
        .iter()
        .filter(|f| f.level_bound > f.row_tail)
        .count();
    model.resid_center = features.iter().map(|f| f.center as f32).collect();
    model.resid_gain = features.iter().map(|f| f.gain).collect();
    model.resid_limit = LIMIT_FLOOR;
    let dev = model
        .to_device()
        .map_err(|e| Error::input(format!("model does not fit the device detector: {e}")))?;

    // 4. The limit.
    let search = crate::calibrate::smallest_limit_with(
        |l| r.alarms(&dev, l).0,
        || r.alarms(&dev, f32::INFINITY).1,
        LIMIT_FLOOR,
        allowed,
    );
    let (limit, alarms, floor, passes) =
        (search.limit, search.alarms, search.at_floor, search.passes);
    model.resid_limit = limit;
    Ok(ResidualCalib {
        tail_level,
        logs,
        level_t,
        level_bound_features,
        features,
        limit: f64::from(limit),
        alarms,
        at_floor: floor,
        passes,
        widened: 1.0,
    })
}

/// The residual chart's steady response to a bias on one feature: entry
/// `j` of `bias_response(model, i)` is how far chart `j`'s EWMA moves, in the
/// units of its limit, per unit of a constant bias added to feature `i`
/// alone (in that feature's own units), once the EWMA has settled.
///
/// In exact arithmetic (every step of the detector is linear in the sample
/// until the absolute value): a bias `b` moves `z_i` by `b / scale_i`, the
/// residual by `u = (I − P Pᵀ) e_i · b / scale_i` (`P` the loadings), the
/// chart's input by `W u` (`u` itself without a whitening matrix), and chart
/// `j`'s smoothed value `gain_j ((W r)_j − centre_j)` by `gain_j (W u)_j`: an
/// EWMA of a constant step settles at the step. Computed in f64 from the
/// model's f32 values. Empty for an `i` out of range or a model whose
/// vectors are shorter than its dimensions say (never a validated one).
pub fn bias_response(model: &ModelView<'_>, i: usize) -> Vec<f64> {
    let d = usize::from(model.dims.features);
    let m = usize::from(model.dims.components);
    let w = model.resid_whiten;
    let sized = model.loadings.len() >= d * m
        && model.resid_gain.len() >= d
        && (w.is_empty() || w.len() >= d * d);
    let (true, Some(scale), Some(row_i)) = (
        sized,
        model.scale.get(i),
        model.loadings.get(i * m..(i + 1) * m),
    ) else {
        return Vec::new();
    };
    // u = (I − P Pᵀ) e_i, per unit of z_i.
    let u: Vec<f64> = (0..d)
        .map(|k| {
            let pk = &model.loadings[k * m..(k + 1) * m];
            let ppt: f64 = pk
                .iter()
                .zip(row_i)
                .map(|(a, b)| f64::from(*a) * f64::from(*b))
                .sum();
            f64::from(u8::from(k == i)) - ppt
        })
        .collect();
    (0..d)
        .map(|j| {
            let v = if w.is_empty() {
                u[j]
            } else {
                w[j * d..(j + 1) * d]
                    .iter()
                    .zip(&u)
                    .map(|(a, b)| f64::from(*a) * b)
                    .sum()
            };
            f64::from(model.resid_gain[j]) * v / f64::from(*scale)
        })
        .collect()
}

/// The constant bias on feature `i` alone, in its own units, that moves the
/// residual chart's settled value to its limit: `limit / max_j
/// |bias_response(model, i)_j|`. A bias this large or larger takes the
/// chart's mean over the limit, so it is flagged within a few multiples of
/// `1/λ` samples; a smaller one only when the nominal wander adds the rest,
/// which on the demo happens down to about a quarter of it
/// (`bench/gain_sweep.py`, BENCHMARKS.md). `None` when no chart moves (the
/// chart off, or the feature's residual never reaches an input).
pub fn bias_at_limit(model: &ModelView<'_>, i: usize) -> Option<f64> {
    let peak = bias_response(model, i)
        .iter()
        .fold(0.0f64, |a, r| a.max(r.abs()));
    let limit = f64::from(model.resid_limit);
    (peak > 0.0 && limit > 0.0).then(|| limit / peak)
}

/// The residual chart off (a model over the device capacities, which the
/// host calibrates without the device detector): every gain 0.
pub fn off(model: &mut ModelOwned) {
    let d = usize::from(model.dims.features);
    model.resid_center = vec![0.0; d];
    model.resid_gain = vec![0.0; d];
    model.resid_limit = LIMIT_FLOOR;
    model.resid_whiten = Vec::new();
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::calibrate::SEARCH_TOL;
    use plumb_model::{Dims, ModelMeta, MonitorParams, ScoreLimits};

    /// A valid model of `d` features (one component, one mixture component);
    /// only its monitor's λ and the residual chart matter here.
    fn model(d: usize) -> ModelOwned {
        let lim = ScoreLimits {
            sample_limit: 10.0,
            center: 1.0,
            spread: 0.5,
            cusum_slack: 0.5,
            cusum_limit: 5.0,
            ewma_limit: 2.0,
        };
        ModelOwned {
            meta: ModelMeta {
                id: 1,
                schema: 0,
                created_unix_s: 0,
                train_rows: 0,
                calib_rows: 0,
                sample_period_us: 0,
            },
            dims: Dims {
                features: d as u16,
                components: 1,
                mixture: 1,
            },
            mean: vec![0.0; d],
            scale: vec![1.0; d],
            loadings: (0..d).map(|i| if i == 0 { 1.0 } else { 0.0 }).collect(),
            eigenvalues: vec![1.0],
            theta: [1.0, 1.0, 1.0],
            weights: vec![1.0],
            mix_means: vec![0.0],
            mix_variances: vec![1.0],
            monitor: MonitorParams {
                fault_z: 50.0,
                warmup: 50,
                ewma_lambda: 0.1,
                raise_dwell: 3,
                clear_dwell: 50,
                min_hold: 100,
                clear_fraction: 0.5,
                spe: lim,
                t2: lim,
                nll: lim,
            },
            spe_center_by_mode: vec![1.0],
            spe_spread_by_mode: vec![0.5],
            resid_center: vec![0.0; d],
            resid_gain: vec![0.0; d],
            resid_limit: 1.0,
            resid_whiten: Vec::new(),
            slow_charts: Vec::new(),
            slow_limit: 1.0,
        }
    }

    /// Residual rows of three features of very different memory (AR(1)
    /// with φ = 0.99, 0.9 and 0.3), offsets and spreads, in four logs.
    fn rows() -> (Vec<f32>, Vec<usize>) {
        let mut rng = crate::rng::Rng::new(5, 0);
        let (phi, offset, spread): ([f64; 3], [f64; 3], [f64; 3]) =
            ([0.99, 0.9, 0.3], [0.5, -0.2, 0.0], [0.3, 1.0, 2.0]);
        let mut out = Vec::new();
        let mut starts = Vec::new();
        for _ in 0..4 {
            starts.push(out.len() / 3);
            let mut x: Vec<f64> = (0..3).map(|_| rng.normal()).collect();
            for _ in 0..25_000 {
                for j in 0..3 {
                    out.push((offset[j] + spread[j] * x[j]) as f32);
                    let g = (1.0 - phi[j] * phi[j]).sqrt();
                    x[j] = phi[j] * x[j] + g * rng.normal();
                }
            }
        }
        (out, starts)
    }

    #[test]
    fn each_feature_is_scaled_to_its_own_tail_and_one_limit_holds_the_allowance() {
        let (data, starts) = rows();
        let r = Residuals {
            d: 3,
            rows: &data,
            starts: &starts,
            warmup: 50,
            dwell: 3,
        };
        let mut m = model(3);
        let allowed = 2;
        let c = calibrate(&mut m, &r, allowed).unwrap();
        let n = 4 * 25_000;
        let eligible = 4 * (25_000 - 50);
        assert_eq!(c.tail_level, 1.0 - TAIL_ROWS / eligible as f64);
        for j in 0..3 {
            // Centre and spread against a two-pass computation (mean, then
            // the ddof = 1 sum of squares): Welford's update differs only by
            // rounding, about n·ε relative.
            let v: Vec<f64> = (0..n).map(|i| f64::from(data[3 * i + j])).collect();
            let mean = v.iter().sum::<f64>() / n as f64;
            let sd = (v.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1) as f64).sqrt();
            let f = c.features[j];
            assert!(
                (f.center - mean).abs() <= 1e-10 * (1.0 + mean.abs()),
                "{j}: {f:?}"
            );
            assert!((f.spread - sd).abs() <= 1e-10 * sd, "{j}: {f:?}");
            assert_eq!(f.gain, (1.0 / (f.spread * f.tail)) as f32, "{j}");
            assert_eq!(m.resid_gain[j], f.gain);
            assert_eq!(m.resid_center[j], f.center as f32);
            // What the scaling is for: with the detector's arithmetic, each
            // feature's chart is beyond 1 on about TAIL_ROWS eligible rows,
            // whatever its memory (its own quantile by construction, up to
            // f32 rounding of values next to it).
            let mut over = 0;
            for (log, s) in starts.iter().enumerate() {
                let end = starts.get(log + 1).copied().unwrap_or(n);
                let mut e = 0.0f32;
                for (i, row) in (*s..end).enumerate() {
                    e = plumb_firmware::score::chart_next(
                        e,
                        data[3 * row + j],
                        m.resid_center[j],
                        m.resid_gain[j],
                        0.1,
                    );
                    if i >= 50 && e.abs() > 1.0 {
                        over += 1;
                    }
                }
            }
            assert!(
                (90..=110).contains(&over),
                "feature {j}: {over} rows beyond 1"
            );
        }
        // The slowest feature's raw EWMA spreads several times wider than the
        // fastest one's: one limit on raw values would serve only it.
        assert!(
            c.features[0].tail > 3.0 * c.features[2].tail,
            "{:?}",
            c.features
        );
        // The limit: within the allowance, and the smallest such (to the
        // search precision), never below the floor.
        let dev = m.to_device().unwrap();
        assert_eq!(m.resid_limit, c.limit as f32);
        assert!(c.limit >= f64::from(LIMIT_FLOOR));
        let (at, _) = r.alarms(&dev, m.resid_limit);
        assert_eq!(at, c.alarms);
        assert!(at <= allowed, "{c:?}");
        if !c.at_floor {
            let below = m.resid_limit * (1.0 - 2.0 * SEARCH_TOL as f32);
            assert!(r.alarms(&dev, below).0 > allowed, "{c:?}");
        }
    }

    #[test]
    fn a_feature_that_never_varies_has_its_chart_off() {
        let mut data = Vec::new();
        let mut rng = crate::rng::Rng::new(9, 0);
        for _ in 0..5_000 {
            data.push(rng.normal() as f32);
            data.push(0.25);
        }
        let r = Residuals {
            d: 2,
            rows: &data,
            starts: &[0],
            warmup: 50,
            dwell: 3,
        };
        let mut m = model(2);
        let c = calibrate(&mut m, &r, 0).unwrap();
        assert!(m.resid_gain[0] > 0.0);
        assert_eq!(m.resid_gain[1], 0.0, "{c:?}");
        m.validate().unwrap();
    }

    #[test]
    fn a_level_that_differs_between_logs_is_bounded_by_the_prediction_interval() {
        // Feature 0: white noise around a level of its own in each of four
        // logs; feature 1: white noise around 0 in all of them.
        let offsets = [0.0, 0.5, -0.5, 1.0];
        let mut rng = crate::rng::Rng::new(21, 0);
        let mut data = Vec::new();
        let mut starts = Vec::new();
        for o in offsets {
            starts.push(data.len() / 2);
            for _ in 0..5_000 {
                data.push((o + rng.normal()) as f32);
                data.push(rng.normal() as f32);
            }
        }
        let r = Residuals {
            d: 2,
            rows: &data,
            starts: &starts,
            warmup: 50,
            dwell: 3,
        };
        let mut m = model(2);
        let c = calibrate(&mut m, &r, 0).unwrap();
        assert_eq!(c.logs, 4);
        // scipy 1.17.1: scipy.stats.t.ppf(1 - 0.01 / 4, 3) (α = 1 % over
        // two features, two-sided, 3 degrees of freedom).
        let t = 7.453318505150679;
        assert!((c.level_t - t).abs() < 1e-9 * t, "{}", c.level_t);
        // The bound recomputed from its definition: each log's mean of the
        // standardised residual, their mean and ddof = 1 deviation.
        let f = c.features[0];
        let levels: Vec<f64> = (0..4)
            .map(|l| {
                let rows = &data[2 * 5_000 * l..2 * 5_000 * (l + 1)];
                rows.iter()
                    .step_by(2)
                    .map(|v| (f64::from(*v) - f.center) / f.spread)
                    .sum::<f64>()
                    / 5_000.0
            })
            .collect();
        let mean = levels.iter().sum::<f64>() / 4.0;
        let sd = (levels.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / 3.0).sqrt();
        let want = mean.abs() + t * sd * (1.25f64).sqrt();
        // Sums of 5 000 terms in another order: 1e-9 relative.
        assert!(
            (f.level_bound - want).abs() <= 1e-9 * want,
            "{f:?} vs {want}"
        );
        // For this feature the level bound is the larger scale (the levels
        // spread 0.6 of its deviation, t is 7.5), and it sets the gain.
        assert!(f.level_bound > f.row_tail, "{f:?}");
        assert_eq!(f.tail, f.level_bound);
        assert_eq!(f.gain, (1.0 / (f.spread * f.tail)) as f32);
        // The other feature's levels agree, so its row tail is the scale.
        let g = c.features[1];
        assert!(g.row_tail > g.level_bound && g.tail == g.row_tail, "{g:?}");
        assert_eq!(c.level_bound_features, 1);
    }
}

/// [`bias_response`] against the detector itself: the committed demo board
/// model (fitted on the demo's training logs, whitened), fed a constant
/// sample at the feature means and the same sample with a bias on one
/// feature through the firmware's own `score` and `chart_step` until both
/// charts have settled; the settled difference divided by the bias is the
/// response. Tolerance: each settled value is an f32 sum of about 50
/// rounded operations on terms of magnitude at most `g` (the largest
/// settled `|gain_j ((W r)_j − centre_j)|` of the two samples, about 6
/// here), so it is off by at most about 50 · 2⁻²⁴ · g; the check allows
/// twice that on the difference of the two (about 3.5e-5; the worst error
/// seen is printed). A response that leaves out the whitening matrix is off
/// by far more (checked at the end).
#[cfg(test)]
mod bias_tests {
    use super::*;
    use plumb_firmware::score::{chart_step, score, Derived};
    use plumb_model::file::ModelFile;
    use plumb_model::MAX_FEATURES;

    const MODEL: &[u8] = include_bytes!("../../firmware/boards/mps2-an386/default.plumb");

    fn settled(model: &Model, derived: &Derived, x: &[f32]) -> [f32; MAX_FEATURES] {
        let mut buf = [0.0f32; MAX_FEATURES];
        let mut ewma = [0.0f32; MAX_FEATURES];
        for _ in 0..2000 {
            score(model, derived, x, &mut buf).expect("scored");
            chart_step(model, &buf, &mut ewma, &mut [0.0; plumb_model::MAX_SLOW]);
        }
        ewma
    }

    #[test]
    fn the_bias_response_is_what_the_detector_does() {
        let file = ModelFile::from_bytes(MODEL).expect("model");
        let owned = &file.model;
        let model = &owned.to_device().expect("within the device capacities");
        assert!(
            !model.resid_whiten.is_empty(),
            "the fixture should be whitened"
        );
        let derived = Derived::new(model).expect("derived");
        let d = usize::from(model.dims.features);
        let x0: Vec<f32> = model.mean.to_vec();
        let e0 = settled(model, &derived, &x0);
        let view = owned.view();
        let mut worst = 0.0f64;
        for i in 0..d {
            let b = 0.25 * f64::from(model.scale[i]);
            let mut x = x0.clone();
            x[i] += b as f32;
            let b = f64::from(x[i]) - f64::from(x0[i]); // the bias the f32 sample carries
            let e = settled(model, &derived, &x);
            let g = e.iter().chain(&e0).fold(1.0f32, |a, v| a.max(v.abs()));
            let tol = 2.0 * 50.0 * f64::from(f32::EPSILON) / 2.0 * f64::from(g);
            let want = bias_response(&view, i);
            assert_eq!(want.len(), d);
            for j in 0..d {
                let got = (f64::from(e[j]) - f64::from(e0[j])) / b;
                let err = (got - want[j]).abs() * b;
                worst = worst.max(err);
                assert!(
                    err <= tol,
                    "feature {i}, chart {j}: detector {got}, formula {}",
                    want[j]
                );
            }
            let peak = want.iter().fold(0.0f64, |a, r| a.max(r.abs()));
            let sure = bias_at_limit(&view, i).expect("every feature is seen");
            assert!((sure * peak - f64::from(model.resid_limit)).abs() < 1e-9 * sure * peak);
        }
        eprintln!("worst settled difference off by {worst:.2e}");
        // The formula's parts matter: without the whitening matrix the
        // responses are off by far more than the tolerance.
        let mut plain = owned.clone();
        plain.resid_whiten.clear();
        let off = (0..d)
            .flat_map(|i| {
                let a = bias_response(&view, i);
                let p = bias_response(&plain.view(), i);
                let b = 0.25 * f64::from(owned.scale[i]);
                a.into_iter()
                    .zip(p)
                    .map(|(x, y)| (x - y).abs() * b)
                    .collect::<Vec<_>>()
            })
            .fold(0.0f64, f64::max);
        // 100 times the tolerance above at its largest (about 3.5e-5).
        assert!(
            off > 3.5e-3,
            "without W the settled differences move by only {off}"
        );
    }
}
