//! Calibration of the monitor limits on held-out nominal rows.
//!
//! 1. Every held-out row is scored by the very detector the board runs
//!    ([`plumb_firmware::Detector::score`]), after rounding the row to f32
//!    once. Faulted rows (non-finite, beyond `fault_z`) are counted and left
//!    out.
//! 2. Per score, the monitored value is `u = (g(score) − center) / spread`
//!    with `g` = [`plumb_firmware::transform`] (cube root of SPE, of T², and
//!    of the NLL above the model's NLL floor), as the detector computes it
//!    ([`plumb_firmware::Detector::transformed`]); `center` and `spread` are
//!    the mean and standard deviation (ddof = 1) of the transformed held-out
//!    scores.
//! 3. `sample_limit` is the empirical 0.999 quantile of the raw score by the
//!    inverted distribution function (R type 1): the `⌈0.999 n⌉`-th smallest
//!    value. It is reported and counted, never a flag on its own.
//! 4. The target false-alarm rate per sample is split evenly over the six
//!    charts (three scores × upper CUSUM and upper EWMA; Bonferroni). Each
//!    chart's limit gives an in-control ARL of `6 / rate` for i.i.d. N(0, 1)
//!    input, by the Markov-chain method ([`crate::arl`]).
//! 5. The full [`plumb_firmware::Detector::update`] state machine then runs
//!    over the held-out logs (reset at the start of each log). Real logs are
//!    autocorrelated, so it may raise more flags than the target allows
//!    (`⌊rate × samples watched⌋`). Then every chart that was over its limit
//!    when a flag rose is widened by [`GROWTH`] and the run repeats, at most
//!    [`MAX_ROUNDS`] times; the report says how far each chart was widened and
//!    whether the target was met.
//! 6. The achieved false-alarm rate is `flags raised / samples watched` (a
//!    sample is watched when the detector is in its watching state, so warm-up
//!    and raised periods do not count), with a 95 % Wilson score interval
//!    (Wilson 1927).
//!
//! Defaults of the state machine (warm-up 50 samples, raise dwell 3, clear
//! dwell 50, minimum hold 100, clear fraction 0.5, fault at 50 scales) are
//! common practice, no source.

use crate::arl;
use crate::error::{Error, Result};
use crate::progress::Stage;
use plumb_firmware::stats::Welford;
use plumb_firmware::{Detector, DriftState, Event, Score};
use plumb_model::{ModelOwned, MonitorParams, ScoreLimits};
use serde::Serialize;

/// Widening factor per round of the end-to-end check.
pub const GROWTH: f64 = 1.25;
/// Most rounds of the end-to-end check.
pub const MAX_ROUNDS: usize = 25;
/// Quantile of the raw held-out score used as the per-sample limit.
pub const SAMPLE_QUANTILE: f64 = 0.999;
/// Significance of the Jackson–Mudholkar SPE limit shown beside it.
pub const JM_ALPHA: f64 = 0.001;

/// Settings of the calibration and the state machine.
#[derive(Debug, Clone, PartialEq)]
pub struct CalibConfig {
    /// Target false alarms per sample, all charts together.
    pub false_alarm_rate: f64,
    /// CUSUM reference value `k` (in spreads).
    pub cusum_slack: f64,
    /// EWMA smoothing constant λ.
    pub ewma_lambda: f64,
    /// Samples of warm-up.
    pub warmup: u32,
    /// Consecutive hot samples to raise a flag.
    pub raise_dwell: u16,
    /// Consecutive calm samples to clear it.
    pub clear_dwell: u16,
    /// Fewest samples a flag stays up.
    pub min_hold: u32,
    /// Calm threshold as a fraction of each limit.
    pub clear_fraction: f64,
    /// Standardised distance beyond which a feature is a sensor fault.
    pub fault_z: f64,
}

impl Default for CalibConfig {
    fn default() -> Self {
        CalibConfig {
            false_alarm_rate: 1e-5,
            cusum_slack: 0.5,
            ewma_lambda: 0.1,
            warmup: 50,
            raise_dwell: 3,
            clear_dwell: 50,
            min_hold: 100,
            clear_fraction: 0.5,
            fault_z: 50.0,
        }
    }
}

impl CalibConfig {
    /// Checks ranges, naming the option at fault.
    pub fn validate(&self) -> Result<()> {
        let r = self.false_alarm_rate;
        if !(r > 0.0 && r < 0.1) {
            return Err(Error::input(format!(
                "--false-alarm-rate must be in (0, 0.1), got {r}"
            )));
        }
        if !(self.cusum_slack >= 0.0 && self.cusum_slack <= 3.0) {
            return Err(Error::input("--cusum-slack must be in [0, 3]"));
        }
        if !(self.ewma_lambda > 0.0 && self.ewma_lambda <= 1.0) {
            return Err(Error::input("--ewma-lambda must be in (0, 1]"));
        }
        if self.raise_dwell == 0 || self.clear_dwell == 0 {
            return Err(Error::input(
                "--raise-dwell and --clear-dwell must be at least 1",
            ));
        }
        if !(self.clear_fraction > 0.0 && self.clear_fraction <= 1.0) {
            return Err(Error::input("--clear-fraction must be in (0, 1]"));
        }
        if !(self.fault_z > 0.0 && self.fault_z.is_finite()) {
            return Err(Error::input("--fault-z must be a positive number"));
        }
        Ok(())
    }

    /// Monitor parameters with placeholder limits, for scoring.
    pub fn placeholder(&self) -> MonitorParams {
        let lim = ScoreLimits {
            sample_limit: 1.0,
            center: 0.0,
            spread: 1.0,
            cusum_slack: self.cusum_slack as f32,
            cusum_limit: 1.0,
            ewma_limit: 1.0,
        };
        MonitorParams {
            fault_z: self.fault_z as f32,
            warmup: self.warmup,
            ewma_lambda: self.ewma_lambda as f32,
            raise_dwell: self.raise_dwell,
            clear_dwell: self.clear_dwell,
            min_hold: self.min_hold,
            clear_fraction: self.clear_fraction as f32,
            spe: lim,
            t2: lim,
            nll: lim,
        }
    }
}

/// Held-out rows, replayable: calls `f(file, row)` for every row in order.
pub trait RowSource {
    /// Units a pass advances a progress stage by (bytes for logs, rows in
    /// memory).
    fn progress_total(&self) -> u64;
    /// One pass over all rows; returns the rows left out for empty or
    /// non-finite cells.
    fn for_each_row(&self, stage: &Stage, f: &mut dyn FnMut(usize, &[f64])) -> Result<u64>;
}

/// Rows held in memory, one row-major vector per log (tests, small data).
#[derive(Debug, Clone)]
pub struct MemoryRows {
    /// Features per row.
    pub d: usize,
    /// One row-major vector per log.
    pub files: Vec<Vec<f64>>,
}

impl RowSource for MemoryRows {
    fn progress_total(&self) -> u64 {
        self.files.iter().map(|f| (f.len() / self.d) as u64).sum()
    }

    fn for_each_row(&self, stage: &Stage, f: &mut dyn FnMut(usize, &[f64])) -> Result<u64> {
        for (i, file) in self.files.iter().enumerate() {
            for row in file.chunks_exact(self.d) {
                f(i, row);
            }
            stage.advance((file.len() / self.d) as u64);
        }
        Ok(0)
    }
}

/// Calibration of one score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ScoreCalib {
    /// `spe`, `t2` or `nll`.
    pub score: &'static str,
    /// Mean of the transformed score.
    pub center: f64,
    /// Standard deviation of the transformed score.
    pub spread: f64,
    /// Empirical 0.999 quantile of the raw score (the per-sample limit).
    pub quantile_999: f64,
    /// CUSUM decision limit `h` (spreads).
    pub cusum_limit: f64,
    /// EWMA limit `L` in asymptotic standard deviations.
    pub ewma_l: f64,
    /// EWMA limit on `u` (`L σ_Z`).
    pub ewma_limit: f64,
    /// Factor the CUSUM limit was widened by in the end-to-end check.
    pub cusum_widened: f64,
    /// Factor the EWMA limit was widened by.
    pub ewma_widened: f64,
}

/// What the calibration found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CalibReport {
    /// Held-out rows scored.
    pub scored: u64,
    /// Held-out rows faulted (not scored).
    pub faults: u64,
    /// Held-out rows left out for empty or non-finite cells.
    pub skipped: u64,
    /// In-control ARL each chart was designed for.
    pub chart_arl: f64,
    /// CUSUM `h` for that ARL (before widening).
    pub cusum_h: f64,
    /// EWMA `L` for that ARL (before widening).
    pub ewma_l: f64,
    /// Per score.
    pub scores: Vec<ScoreCalib>,
    /// Whether the end-to-end check ran through the device detector.
    pub end_to_end: bool,
    /// Rounds of the end-to-end check.
    pub rounds: usize,
    /// Flags raised on the held-out logs in the final round.
    pub flags: u64,
    /// Samples watched in the final round.
    pub watched: u64,
    /// Flags the target allows on those samples.
    pub allowed: u64,
    /// Whether the final round met the target.
    pub met_target: bool,
    /// Target false-alarm rate per sample.
    pub target_rate: f64,
    /// Achieved false-alarm rate per watched sample.
    pub rate: f64,
    /// 95 % Wilson score interval of the achieved rate.
    pub rate_ci95: [f64; 2],
    /// Name of the interval method.
    pub ci_method: &'static str,
    /// Jackson–Mudholkar SPE limit at α = 0.001 (None when θ1 = 0).
    pub spe_limit_jm: Option<f64>,
    /// Warnings for the summary.
    pub warnings: Vec<String>,
}

/// Wilson score interval for `x` successes in `n` trials at normal quantile
/// `z` (Wilson 1927).
pub fn wilson(x: u64, n: u64, z: f64) -> [f64; 2] {
    if n == 0 {
        return [0.0, 1.0];
    }
    let n = n as f64;
    let p = x as f64 / n;
    let z2 = z * z;
    let denom = 1.0 + z2 / n;
    let centre = (p + z2 / (2.0 * n)) / denom;
    let half = z / denom * (p * (1.0 - p) / n + z2 / (4.0 * n * n)).sqrt();
    [(centre - half).max(0.0), (centre + half).min(1.0)]
}

/// Jackson & Mudholkar (1979) SPE limit at significance `alpha` from θ1..θ3
/// (None when undefined: no residual variance, or `h0` ≈ 0).
pub fn jackson_mudholkar(theta: [f64; 3], alpha: f64) -> Option<f64> {
    let [t1, t2, t3] = theta;
    if !(t1 > 0.0 && t2 > 0.0) {
        return None;
    }
    let h0 = 1.0 - 2.0 * t1 * t3 / (3.0 * t2 * t2);
    if h0.abs() < 1e-3 {
        return None;
    }
    // (Q/θ1)^h0 is taken as normal. When one discarded eigenvalue dominates,
    // h0 < 0 and that power decreases in Q: the upper tail of Q is then the
    // lower tail of the power, so the normal quantile enters with its sign
    // flipped.
    let c = arl::phi_inv(1.0 - alpha) * h0.signum();
    let inner = c * (2.0 * t2 * h0 * h0).sqrt() / t1 + 1.0 + t2 * h0 * (h0 - 1.0) / (t1 * t1);
    let q = t1 * inner.powf(1.0 / h0);
    q.is_finite().then_some(q)
}

/// Inverted-CDF quantile (R type 1) of unsorted `v`: the `⌈p n⌉`-th
/// smallest value. Sorts `v`.
pub fn quantile_type1(v: &mut [f32], p: f64) -> f64 {
    if v.is_empty() {
        return f64::NAN;
    }
    v.sort_by(f32::total_cmp);
    let rank = ((p * v.len() as f64).ceil() as usize).clamp(1, v.len());
    f64::from(v[rank - 1])
}

/// Raw and transformed scores of one sample by the host model (f64
/// arithmetic on the stored f32 parameters), for models over the device
/// capacities; mirrors the detector's definitions.
fn host_scores(model: &ModelOwned, x: &[f64], fault_z: f64) -> Option<[[f32; 3]; 2]> {
    let d = usize::from(model.dims.features);
    let m = usize::from(model.dims.components);
    let k = usize::from(model.dims.mixture);
    let mut z = vec![0.0; d];
    for i in 0..d {
        let v = (x[i] as f32 as f64 - f64::from(model.mean[i])) / f64::from(model.scale[i]);
        if !v.is_finite() || v.abs() > fault_z {
            return None;
        }
        z[i] = v;
    }
    let mut t = vec![0.0; m];
    for i in 0..d {
        for j in 0..m {
            t[j] += z[i] * f64::from(model.loadings[i * m + j]);
        }
    }
    let mut spe = 0.0;
    for i in 0..d {
        let recon: f64 = (0..m)
            .map(|j| f64::from(model.loadings[i * m + j]) * t[j])
            .sum();
        spe += (z[i] - recon).powi(2);
    }
    let t2: f64 = (0..m)
        .map(|j| t[j] * t[j] / f64::from(model.eigenvalues[j]))
        .sum();
    let mut lp = vec![0.0; k];
    let mut norms = vec![0.0; k];
    for c in 0..k {
        let mut norm = f64::from(model.weights[c]).ln();
        let mut quad = 0.0;
        for j in 0..m {
            let v = f64::from(model.mix_variances[c * m + j]);
            let e = t[j] - f64::from(model.mix_means[c * m + j]);
            norm -= 0.5 * (2.0 * std::f64::consts::PI * v).ln();
            quad += e * e / v;
        }
        norms[c] = norm;
        lp[c] = norm - 0.5 * quad;
    }
    let lse = |v: &[f64]| {
        let best = v.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
        best + v.iter().map(|x| (x - best).exp()).sum::<f64>().ln()
    };
    let nll = -lse(&lp);
    let floor = -lse(&norms);
    Some([
        [spe as f32, t2 as f32, nll as f32],
        [
            spe.cbrt() as f32,
            t2.cbrt() as f32,
            (nll - floor).max(0.0).cbrt() as f32,
        ],
    ])
}

/// Calibrates `model.monitor` in place on `rows`. The model's PCA and
/// mixture must be final.
pub fn calibrate(
    model: &mut ModelOwned,
    rows: &dyn RowSource,
    cfg: &CalibConfig,
    device: bool,
    stage: &dyn Fn(&str, u64) -> Stage,
) -> Result<CalibReport> {
    cfg.validate()?;
    let mut warnings = Vec::new();
    model.monitor = cfg.placeholder();
    let d = usize::from(model.dims.features);

    // Pass 1: raw scores.
    let mut raw: [Vec<f32>; 3] = [Vec::new(), Vec::new(), Vec::new()];
    let mut moments = [Welford::<f64>::new(); 3];
    let mut faults = 0u64;
    let skipped: u64;
    {
        let det = if device {
            Some(
                Detector::new(model.to_device().map_err(|e| {
                    Error::input(format!("model does not fit the device detector: {e}"))
                })?)
                .map_err(|e| Error::input(format!("model refused by the detector: {e}")))?,
            )
        } else {
            None
        };
        let mut x32 = vec![0.0f32; d];
        let bar = stage("score", rows.progress_total());
        skipped = rows.for_each_row(&bar, &mut |_, row| {
            let scores = match &det {
                Some(det) => {
                    for (o, v) in x32.iter_mut().zip(row) {
                        *o = *v as f32;
                    }
                    det.score(&x32).ok().map(|s| {
                        let s = s.scores;
                        [[s.spe, s.t2, s.nll], det.transformed(&s)]
                    })
                }
                None => host_scores(model, row, cfg.fault_z),
            };
            match scores {
                Some([s, g]) => {
                    for i in 0..3 {
                        raw[i].push(s[i]);
                        moments[i].push(f64::from(g[i]));
                    }
                }
                None => faults += 1,
            }
        })?;
    }
    let scored = raw[0].len() as u64;
    let needed = u64::from(cfg.warmup) + 100;
    if scored < needed {
        return Err(Error::input(format!(
            "calibration needs at least {needed} valid held-out rows (warm-up {} + 100), \
             found {scored} ({faults} faulted)",
            cfg.warmup
        )));
    }

    // Chart limits for i.i.d. N(0, 1) input.
    let chart_arl = 6.0 / cfg.false_alarm_rate;
    let h = arl::cusum_limit_for(cfg.cusum_slack, chart_arl)
        .ok_or_else(|| Error::input("no CUSUM limit reaches the target ARL"))?;
    let l = arl::ewma_limit_for(cfg.ewma_lambda, chart_arl)
        .ok_or_else(|| Error::input("no EWMA limit reaches the target ARL"))?;
    let sigma_z = (cfg.ewma_lambda / (2.0 - cfg.ewma_lambda)).sqrt();

    let mut scores = Vec::new();
    for (i, which) in Score::ALL.into_iter().enumerate() {
        let center = moments[i].mean();
        let spread = moments[i].sample_variance().sqrt();
        if !(spread > 0.0) || !spread.is_finite() {
            return Err(Error::input(format!(
                "the held-out {} scores do not vary: cannot set its limits",
                which.name()
            )));
        }
        let q = quantile_type1(&mut raw[i], SAMPLE_QUANTILE);
        scores.push(ScoreCalib {
            score: which.name(),
            center,
            spread,
            quantile_999: q,
            cusum_limit: h,
            ewma_l: l,
            ewma_limit: l * sigma_z,
            cusum_widened: 1.0,
            ewma_widened: 1.0,
        });
    }
    drop(raw);
    let nll_q = scores[2].quantile_999;
    if !(nll_q > 0.0) {
        warnings.push(format!(
            "the NLL 0.999 quantile is {nll_q:.4} ≤ 0; the model format needs a positive \
             per-sample limit, so the stored NLL sample limit is 1e-6"
        ));
    }

    let apply = |model: &mut ModelOwned, scores: &[ScoreCalib]| {
        let lim = |s: &ScoreCalib| ScoreLimits {
            sample_limit: (s.quantile_999 as f32).max(1e-6),
            center: s.center as f32,
            spread: s.spread as f32,
            cusum_slack: cfg.cusum_slack as f32,
            cusum_limit: (s.cusum_limit * s.cusum_widened) as f32,
            ewma_limit: (s.ewma_limit * s.ewma_widened) as f32,
        };
        model.monitor.spe = lim(&scores[0]);
        model.monitor.t2 = lim(&scores[1]);
        model.monitor.nll = lim(&scores[2]);
    };
    apply(model, &scores);

    let mut report = CalibReport {
        scored,
        faults,
        skipped,
        chart_arl,
        cusum_h: h,
        ewma_l: l,
        scores: Vec::new(),
        end_to_end: device,
        rounds: 0,
        flags: 0,
        watched: 0,
        allowed: 0,
        met_target: false,
        target_rate: cfg.false_alarm_rate,
        rate: 0.0,
        rate_ci95: [0.0, 1.0],
        ci_method: "Wilson score, 95 %",
        spe_limit_jm: jackson_mudholkar(model.theta.map(f64::from), JM_ALPHA),
        warnings: Vec::new(),
    };

    if !device {
        warnings.push(
            "the model is over the device capacities: limits were set from the scores, \
             but the end-to-end detector check did not run"
                .to_string(),
        );
        report.scores = scores;
        report.warnings = warnings;
        return Ok(report);
    }

    // End-to-end: the full state machine over the held-out logs.
    for round in 1..=MAX_ROUNDS {
        let dev = model
            .to_device()
            .map_err(|e| Error::input(format!("calibrated model is invalid: {e}")))?;
        let mut det = Detector::new(dev)
            .map_err(|e| Error::input(format!("calibrated model refused: {e}")))?;
        let mut current = usize::MAX;
        let mut flags = 0u64;
        let mut watched = 0u64;
        let mut widen = [[false; 2]; 3];
        let mut x32 = vec![0.0f32; d];
        let bar = stage(&format!("check {round}"), rows.progress_total());
        rows.for_each_row(&bar, &mut |file, row| {
            if file != current {
                det.reset();
                current = file;
            }
            for (o, v) in x32.iter_mut().zip(row) {
                *o = *v as f32;
            }
            let before = det.state();
            let out = det.update(&x32);
            if out.scores.is_some() && before == DriftState::Watching {
                watched += 1;
            }
            if let Some(Event::Raised { drivers }) = out.event {
                flags += 1;
                let mp = det.model().monitor;
                let limits = [mp.spe, mp.t2, mp.nll];
                for s in drivers.iter() {
                    let tr = det.track(s);
                    let i = s as usize;
                    if tr.cusum.value() > limits[i].cusum_limit {
                        widen[i][0] = true;
                    }
                    if tr.ewma.value() > limits[i].ewma_limit {
                        widen[i][1] = true;
                    }
                }
            }
        })?;
        let allowed = (cfg.false_alarm_rate * watched as f64).floor() as u64;
        report.rounds = round;
        report.flags = flags;
        report.watched = watched;
        report.allowed = allowed;
        report.met_target = flags <= allowed;
        if report.met_target || round == MAX_ROUNDS {
            break;
        }
        for (s, w) in scores.iter_mut().zip(widen) {
            if w[0] {
                s.cusum_widened *= GROWTH;
            }
            if w[1] {
                s.ewma_widened *= GROWTH;
            }
        }
        apply(model, &scores);
    }
    if !report.met_target {
        warnings.push(format!(
            "the held-out logs still raised {} flags after {} rounds (target allows {}): \
             the logs may not be nominal, or they are strongly autocorrelated",
            report.flags, report.rounds, report.allowed
        ));
    }
    report.rate = if report.watched > 0 {
        report.flags as f64 / report.watched as f64
    } else {
        0.0
    };
    report.rate_ci95 = wilson(report.flags, report.watched, arl::phi_inv(0.975));
    report.scores = scores;
    report.warnings = warnings;
    Ok(report)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn jackson_mudholkar_reference_values() {
        // references.md, Q (SPE) limit (formula published, values computed):
        // discarded {0.14675688, 0.02071484}: 0.584852 (α = 0.05) and
        // 1.030203 (α = 0.01); {0.8, 0.5, 0.3, 0.2, 0.1, 0.07, 0.03}:
        // 4.908964 and 7.393989.
        let th = |ls: &[f64]| {
            let mut t = [0.0; 3];
            for l in ls {
                t[0] += l;
                t[1] += l * l;
                t[2] += l * l * l;
            }
            t
        };
        let a = th(&[0.14675688, 0.02071484]);
        assert!((jackson_mudholkar(a, 0.05).unwrap() - 0.584852).abs() < 1e-6);
        assert!((jackson_mudholkar(a, 0.01).unwrap() - 1.030203).abs() < 1e-6);
        let b = th(&[0.8, 0.5, 0.3, 0.2, 0.1, 0.07, 0.03]);
        assert!((jackson_mudholkar(b, 0.05).unwrap() - 4.908964).abs() < 1e-6);
        assert!((jackson_mudholkar(b, 0.01).unwrap() - 7.393989).abs() < 1e-6);
        // One dominant eigenvalue among many small ones: h0 < 0. The limit
        // must still lie above the mean θ1 and grow as α shrinks.
        let mut ls = vec![0.2];
        ls.extend(std::iter::repeat_n(0.03, 27));
        let c = th(&ls);
        assert!(1.0 - 2.0 * c[0] * c[2] / (3.0 * c[1] * c[1]) < 0.0);
        let q05 = jackson_mudholkar(c, 0.05).unwrap();
        let q001 = jackson_mudholkar(c, 0.001).unwrap();
        assert!(q05 > c[0] && q001 > q05, "{q05} {q001}");
    }

    #[test]
    fn quantile_definition() {
        // references.md, empirical quantiles: on 1..100 the 0.95 quantile is
        // 95 by the inverted CDF.
        let mut v: Vec<f32> = (1..=100).map(|i| i as f32).collect();
        assert_eq!(quantile_type1(&mut v, 0.95), 95.0);
        let mut v: Vec<f32> = (1..=1000).rev().map(|i| i as f32).collect();
        assert_eq!(quantile_type1(&mut v, 0.999), 999.0);
    }

    #[test]
    fn wilson_interval() {
        // 0 of 1000: upper bound z²/(n + z²) = 3.8415/1003.8415.
        let [lo, hi] = wilson(0, 1000, 1.959_963_984_540_054);
        assert!(lo.abs() < 1e-15);
        assert!((hi - 3.841_458_820_694_124 / 1_003.841_458_820_694_1).abs() < 1e-12);
        let [lo, hi] = wilson(50, 100, 1.959_963_984_540_054);
        assert!((lo - 0.403_831_9).abs() < 1e-6 && (hi - 0.596_168_1).abs() < 1e-6);
    }
}
