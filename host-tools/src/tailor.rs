//! `plumb tailor`: slow charts for one robot, set on its own nominal logs
//! (model format 5).
//!
//! A fleet model's residual chart is scaled to the spread of many robots'
//! residual levels; one robot's own levels sit in a much narrower band
//! (on the demo, 2,000-sample block means of the left motor current's
//! whitened residual spread 0.14 over another fleet and 0.04 within one
//! robot: BENCHMARKS.md, "Detection", attempt 14). A slow EWMA centred and
//! scaled on that robot's own logs sees a shift the fleet chart must
//! tolerate. `tailor` keeps every part of the base model and adds, for up to
//! [`plumb_model::MAX_SLOW`] features, a second EWMA of the residual chart's
//! input `v_i` (the same whitened residual) with a constant, centre and gain
//! of its own, and one limit for them all:
//!
//! 1. Score every row of the robot's logs with the base model (the device
//!    detector) and keep each scored row's chart inputs `v` (the detector's
//!    own f32 arithmetic, [`plumb_firmware::score::chart_input`]).
//! 2. For each candidate constant λ, each feature's centre, spread and scale
//!    by the residual chart's own rules ([`crate::residual`], steps 1–3).
//! 3. Each feature takes the λ that crosses soonest for a persistent shift of
//!    `shift` spreads: an EWMA from 0 reaches `δ (1 − (1 − λ)ⁿ)` after `n`
//!    samples, so with the chart's limit near `L` (in units of the scale
//!    `s_i(λ)`) it crosses after `n_i(λ) = ln(1 − L s_i(λ) / δ) / ln(1 − λ)`
//!    samples, or never when `L s_i(λ) ≥ δ` (the usual EWMA design argument,
//!    e.g. Lucas & Saccucci 1990; reference from memory). `L` is the base
//!    model's residual chart limit; ties go to the larger λ. A feature whose
//!    choice is the base model's own λ (or none crosses) gets no slow chart;
//!    of the rest, the [`plumb_model::MAX_SLOW`] with the shortest `n_i` are
//!    kept.
//! 4. The limit on every slow chart's `|EWMA|`: the smallest meeting the
//!    chart's false-alarm allowance on these rows (as every chart,
//!    [`crate::calibrate::chart_allowance`]), never below 1.
//!
//! The robot's logs must be nominal and long: with 250,000 rows the demo's
//! robot raised 3.2 false alarms per 10⁵ on its other logs, with 500,000
//! at most 0.2 (attempt 14).

use crate::calibrate::{chart_allowance, smallest_limit_with};
use crate::error::{Error, Result};
use crate::logs::ReadOptions;
use crate::progress::Stage;
use crate::residual::{Residuals, LIMIT_FLOOR};
use plumb_firmware::score::{chart_input, chart_next};
use plumb_model::file::ModelFile;
use plumb_model::{MAX_FEATURES, MAX_SLOW, SLOW_PARAMS};
use serde::Serialize;
use std::path::PathBuf;

/// The constants a feature's slow chart may take (the base model's λ is
/// the fleet chart's and means no slow chart). Our choice: a factor of
/// about 2 between neighbours, down to a memory of about 500 samples.
pub const CANDIDATES: [f64; 6] = [0.1, 0.05, 0.02, 0.01, 0.005, 0.002];

/// Settings of [`tailor`].
#[derive(Debug, Clone, PartialEq)]
pub struct TailorConfig {
    /// Target false alarms per sample (the slow charts' budget is this
    /// rate's share of one chart, as in `plumb fit`).
    pub rate: f64,
    /// Design shift δ, in spreads of the chart input.
    pub shift: f64,
}

impl Default for TailorConfig {
    fn default() -> Self {
        TailorConfig {
            rate: 1e-5,
            shift: 1.0,
        }
    }
}

/// One slow chart as chosen.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SlowChoice {
    /// Feature index in model order.
    pub feature: usize,
    /// Its name.
    pub name: String,
    /// The constant chosen.
    pub lambda: f64,
    /// Centre of the input on the robot's rows.
    pub center: f64,
    /// Its spread (ddof = 1).
    pub spread: f64,
    /// The scale at that constant (units of the spread).
    pub tail: f64,
    /// The stored gain.
    pub gain: f32,
    /// Design delay at that constant (samples).
    pub design_delay: f64,
    /// Design delay at the base model's constant (samples; null: never).
    pub base_design_delay: Option<f64>,
}

/// What [`tailor`] found.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct TailorReport {
    /// Logs read.
    pub logs: usize,
    /// Rows scored (faulted rows are left out).
    pub rows: u64,
    /// The slow charts, in feature order.
    pub charts: Vec<SlowChoice>,
    /// Features that asked for a slow chart but were left out (over the
    /// device's capacity).
    pub left_out: Vec<String>,
    /// The slow charts' limit.
    pub limit: f32,
    /// Their alarms on the robot's rows at that limit.
    pub alarms: u64,
    /// The alarms allowed there.
    pub allowed: u64,
    /// The budget those came from (`rate / 10 × rows`).
    pub budget: f64,
    /// Whether the limit is the floor (1).
    pub at_floor: bool,
    /// What the user should know (too few rows, nothing chosen).
    pub warnings: Vec<String>,
}

/// Design delay `n(λ)` of step 3 (`None`: never crosses).
pub fn design_delay(limit: f64, scale: f64, shift: f64, lambda: f64) -> Option<f64> {
    let q = limit * scale / shift;
    (q < 1.0 && q.is_finite()).then(|| (1.0 - q).ln() / (1.0 - lambda).ln())
}

/// Alarms of the slow charts `charts` (the model's packing) alone on `r`
/// with `limit`, in the detector's arithmetic; with `limit` = ∞ also the
/// highest peak at a row that may alarm.
fn slow_alarms(r: &Residuals<'_>, charts: &[f32], limit: f32) -> (u64, f32) {
    r.chart_alarms(limit, charts.len() / SLOW_PARAMS, |e, v| {
        let mut peak = 0.0f32;
        for (e, c) in e.iter_mut().zip(charts.chunks_exact(SLOW_PARAMS)) {
            *e = chart_next(*e, v[c[0] as usize], c[2], c[3], c[1]);
            peak = peak.max(e.abs());
        }
        peak
    })
}

/// Adds slow charts to `file`'s model from the robot's own nominal logs
/// `paths` (module docs). Any slow charts the model had are replaced.
pub fn tailor(
    file: &mut ModelFile,
    paths: &[PathBuf],
    read: ReadOptions,
    cfg: &TailorConfig,
    stage: &Stage,
) -> Result<TailorReport> {
    if !(cfg.rate > 0.0 && cfg.rate < 1.0) {
        return Err(Error::input("--false-alarm-rate must be in (0, 1)"));
    }
    if !(cfg.shift > 0.0 && cfg.shift.is_finite()) {
        return Err(Error::input("--design-shift must be a positive number"));
    }
    let paths = crate::logs::expand_paths(paths)?;
    let paths = &paths[..];
    let model = &mut file.model;
    model.slow_charts.clear();
    model.slow_limit = 1.0;
    if !model.resid_gain.iter().any(|g| *g > 0.0) {
        return Err(Error::input(
            "the base model's residual chart is off (a model calibrated on one log, or of \
             format 1 or 2): refit it on logs of several robots or days first",
        ));
    }
    let d = usize::from(model.dims.features);
    let base_lambda = f64::from(model.monitor.ewma_lambda);
    let base_limit = f64::from(model.resid_limit);
    let whiten = model.resid_whiten.clone();
    // 1. The chart inputs of every scored row.
    let mut rows: Vec<f32> = Vec::new();
    let mut starts: Vec<usize> = Vec::new();
    let mut resid = [0.0f32; MAX_FEATURES];
    let reps = crate::replay::replay(file, paths, read, stage, |step| {
        // A log with no sample gets an empty range.
        while starts.len() <= step.log {
            starts.push(rows.len() / d.max(1));
        }
        if step.outcome.scores.is_some()
            && step.detector.score_residuals(step.x, &mut resid).is_ok()
        {
            let r = &resid[..d];
            rows.extend((0..d).map(|i| chart_input(&whiten, r, i)));
        }
        Ok(())
    })?;
    let model = &mut file.model;
    let r = Residuals {
        d,
        rows: &rows,
        starts: &starts,
        warmup: model.monitor.warmup,
        dwell: model.monitor.raise_dwell,
    };
    let n = r.n() as u64;
    if starts.len() < 2 {
        return Err(Error::input(
            "tailoring needs several logs of the robot (days): with one, how its level \
             differs from day to day is unknown",
        ));
    }
    // 2. Scales per candidate; 3. the choice per feature.
    let by_lambda: Vec<(f64, Vec<crate::residual::FeatureResidual>)> = CANDIDATES
        .iter()
        .copied()
        .zip(crate::residual::scales_for(&r, &CANDIDATES)?)
        .map(|(lam, s)| (lam, s.features))
        .collect();
    let names: Vec<String> = file.labels.iter().map(|l| l.name.clone()).collect();
    let mut wanted: Vec<SlowChoice> = Vec::new();
    for i in 0..d {
        let base = by_lambda
            .iter()
            .find(|(lam, _)| (*lam - base_lambda).abs() < 1e-9)
            .and_then(|(lam, f)| design_delay(base_limit, f[i].tail, cfg.shift, *lam));
        let mut best: Option<(f64, f64, &crate::residual::FeatureResidual)> = None;
        for (lam, f) in &by_lambda {
            let fr = &f[i];
            if fr.gain <= 0.0 {
                continue;
            }
            if let Some(n) = design_delay(base_limit, fr.tail, cfg.shift, *lam) {
                // Ties (within a sample) go to the larger λ: CANDIDATES
                // run from large to small, so only a strictly shorter delay
                // replaces.
                if best.is_none_or(|(bn, _, _)| n < bn - 1.0) {
                    best = Some((n, *lam, fr));
                }
            }
        }
        if let Some((n, lam, fr)) = best {
            if lam < base_lambda {
                wanted.push(SlowChoice {
                    feature: i,
                    name: names.get(i).cloned().unwrap_or_else(|| format!("#{i}")),
                    lambda: lam,
                    center: fr.center,
                    spread: fr.spread,
                    tail: fr.tail,
                    gain: fr.gain,
                    design_delay: n,
                    base_design_delay: base,
                });
            }
        }
    }
    wanted.sort_by(|a, b| a.design_delay.total_cmp(&b.design_delay));
    let left_out: Vec<String> = wanted
        .iter()
        .skip(MAX_SLOW)
        .map(|c| c.name.clone())
        .collect();
    wanted.truncate(MAX_SLOW);
    wanted.sort_by_key(|c| c.feature);
    let charts: Vec<f32> = wanted
        .iter()
        .flat_map(|c| [c.feature as f32, c.lambda as f32, c.center as f32, c.gain])
        .collect();
    // 4. The limit.
    let (budget, allowed) = chart_allowance(cfg.rate, n);
    let (limit, alarms, at_floor) = if charts.is_empty() {
        (1.0, 0, true)
    } else {
        let s = smallest_limit_with(
            |l| slow_alarms(&r, &charts, l).0,
            || slow_alarms(&r, &charts, f32::INFINITY).1,
            LIMIT_FLOOR,
            allowed,
        );
        (s.limit, s.alarms, s.at_floor)
    };
    let mut warnings = Vec::new();
    if wanted.is_empty() {
        warnings.push(
            "no feature crosses sooner with a slower chart on these logs: the model gets no \
             slow chart"
                .to_string(),
        );
    } else if budget < 1.0 {
        warnings.push(format!(
            "the slow charts' budget on {n} rows is {budget:.2} false alarms (under one): their \
             limit is the highest value these rows reach, and other logs of the robot may cross \
             it more often than the target rate; give about {} rows of the robot's own logs \
             (BENCHMARKS.md, Detection, attempt 15)",
            (10.0 / cfg.rate).ceil() as u64
        ));
    }
    model.slow_charts = charts;
    model.slow_limit = limit;
    model
        .to_device()
        .map_err(|e| Error::input(format!("the tailored model does not fit the device: {e}")))?;
    Ok(TailorReport {
        logs: reps.len(),
        rows: n,
        charts: wanted,
        left_out,
        limit,
        alarms,
        allowed,
        budget,
        at_floor,
        warnings,
    })
}
