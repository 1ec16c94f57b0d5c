//! The summary of a model, for `plumb fit` and `plumb inspect`: a plain
//! struct that serialises to JSON, and a human rendering.
//!
//! [`Summary::from_file`] shows what a model file stores; a fit adds its
//! [`FitReport`] (BIC table, calibration results, timings).
//!
//! Device memory estimate: RAM is `size_of::<plumb_firmware::Detector>()`
//! (the detector holds the fixed-capacity `plumb_model::Model`, so it does
//! not depend on the model's dimensions) in this host build; a 32-bit target
//! differs by a few bytes of length fields and padding. Flash for one model
//! slot is the encoded file without its label section.

use crate::calibrate::JM_ALPHA;
use crate::error::{Error, Result};
use crate::fit::FitReport;
use plumb_model::file::ModelFile;
use plumb_model::ScoreLimits;
use serde::Serialize;
use std::fmt::Write as _;

/// Identity and provenance.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelInfo {
    /// Model id, hex.
    pub id: String,
    /// Schema fingerprint, hex.
    pub schema: String,
    /// Model file format version.
    pub format_version: u16,
    /// Creation time, seconds since the Unix epoch.
    pub created_unix_s: u64,
    /// Creation time, UTC, `YYYY-MM-DD hh:mm:ss`.
    pub created_utc: String,
    /// Training rows.
    pub train_rows: u64,
    /// Calibration rows.
    pub calib_rows: u64,
    /// Sample period in microseconds (0: unknown).
    pub sample_period_us: u32,
    /// Features.
    pub d: usize,
    /// Components kept.
    pub m: usize,
    /// Mixture components.
    pub k: usize,
}

/// One feature.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureRow {
    /// Name (empty when the file has no labels).
    pub name: String,
    /// Unit.
    pub unit: String,
    /// Mean.
    pub mean: f32,
    /// Scale (ddof = 0 standard deviation).
    pub scale: f32,
    /// Centre of the feature's PCA residual (the SPE's residual chart).
    pub resid_center: f32,
    /// Gain of the feature's residual chart (0: off).
    pub resid_gain: f32,
    /// The constant bias on this feature alone, in its own units, that moves
    /// the residual chart's settled value to its limit: flagged within a few
    /// times `1/λ` samples from this size on ([`crate::residual::bias_at_limit`]);
    /// `None` when no chart sees it.
    pub bias_at_limit: Option<f64>,
}

/// One kept component.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ComponentRow {
    /// 1-based.
    pub component: usize,
    /// Eigenvalue.
    pub eigenvalue: f32,
    /// Share of the total variance.
    pub ratio: f64,
    /// Cumulative share.
    pub cumulative: f64,
}

/// One mixture component.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MixRow {
    /// 1-based.
    pub component: usize,
    /// Weight.
    pub weight: f32,
    /// Mean per latent dimension.
    pub means: Vec<f32>,
    /// Variance per latent dimension.
    pub variances: Vec<f32>,
    /// Centre of the transformed SPE in this operating mode.
    pub spe_center: f32,
    /// Spread of the transformed SPE in this operating mode.
    pub spe_spread: f32,
}

/// Limits of one score.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LimitRow {
    /// `spe`, `t2`, `nll`.
    pub score: &'static str,
    /// Stored limits.
    #[serde(flatten)]
    pub limits: LimitsJson,
}

/// [`ScoreLimits`] as JSON.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LimitsJson {
    /// Per-sample limit on the raw score.
    pub sample_limit: f32,
    /// Centre of the transformed score.
    pub center: f32,
    /// Spread of the transformed score.
    pub spread: f32,
    /// CUSUM `k`.
    pub cusum_slack: f32,
    /// CUSUM `h`.
    pub cusum_limit: f32,
    /// EWMA limit on `u`.
    pub ewma_limit: f32,
}

impl From<&ScoreLimits> for LimitsJson {
    fn from(l: &ScoreLimits) -> Self {
        LimitsJson {
            sample_limit: l.sample_limit,
            center: l.center,
            spread: l.spread,
            cusum_slack: l.cusum_slack,
            cusum_limit: l.cusum_limit,
            ewma_limit: l.ewma_limit,
        }
    }
}

/// The state-machine parameters.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MonitorInfo {
    /// Warm-up samples.
    pub warmup: u32,
    /// Hot samples to raise.
    pub raise_dwell: u16,
    /// Calm samples to clear.
    pub clear_dwell: u16,
    /// Fewest samples raised.
    pub min_hold: u32,
    /// Calm threshold fraction.
    pub clear_fraction: f32,
    /// EWMA λ.
    pub ewma_lambda: f32,
    /// Fault threshold in scales.
    pub fault_z: f32,
}

/// Sizes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SizeInfo {
    /// The model file with labels.
    pub file_bytes: usize,
    /// The model as a device stores it (no labels): flash per model slot.
    pub device_image_bytes: usize,
    /// `size_of::<plumb_model::Model>()`.
    pub model_struct_bytes: usize,
    /// `size_of::<plumb_firmware::Detector>()` (includes the model): RAM.
    pub detector_ram_bytes: usize,
}

/// One slow chart (format 5).
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SlowRow {
    /// Feature name.
    pub feature: String,
    /// EWMA constant.
    pub lambda: f32,
    /// Centre of its input.
    pub center: f32,
    /// Gain.
    pub gain: f32,
}

/// Everything `fit` and `inspect` print.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Summary {
    /// Identity.
    pub model: ModelInfo,
    /// Features.
    pub features: Vec<FeatureRow>,
    /// Kept components.
    pub components: Vec<ComponentRow>,
    /// θ1, θ2, θ3 of the discarded components.
    pub theta: [f32; 3],
    /// Share of the variance left in the residual.
    pub residual_ratio: f64,
    /// Mixture.
    pub mixture: Vec<MixRow>,
    /// State machine.
    pub monitor: MonitorInfo,
    /// Limits per score.
    pub limits: Vec<LimitRow>,
    /// Limit of the SPE's residual chart on `|EWMA|` of every feature.
    pub resid_limit: f32,
    /// Whether the residual chart smooths whitened residuals (the model has
    /// a whitening matrix, format 4).
    pub resid_whitened: bool,
    /// The SPE's slow charts (format 5, `plumb tailor`), in feature order.
    pub slow_charts: Vec<SlowRow>,
    /// Their limit on `|EWMA|`.
    pub slow_limit: f32,
    /// Jackson–Mudholkar SPE limit at α = 0.001 from θ (None if θ1 = 0).
    pub spe_limit_jm: Option<f64>,
    /// Sizes.
    pub size: SizeInfo,
    /// What the fit found (absent for `inspect`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub fit: Option<FitReport>,
    /// What changed from a base model (`plumb fit --base`).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub changes: Option<ModelDiff>,
}

/// An ARL for a table: one decimal, or `>1e9` at [`crate::arl::ARL_CEILING`].
fn fmt_arl(a: f64) -> String {
    if a >= crate::arl::ARL_CEILING {
        ">1e9".to_string()
    } else {
        format!("{a:.1}")
    }
}

/// `bias` as a percentage of `|mean|`, for a feature whose mean is at
/// least one scale from 0 (a reading whose gain change is a bias of about
/// the change times its mean); `None` otherwise.
pub fn percent_of_mean(bias: f64, mean: f32, scale: f32) -> Option<f64> {
    let mean = f64::from(mean).abs();
    (mean >= f64::from(scale) && mean > 0.0).then(|| 100.0 * bias / mean)
}

/// `YYYY-MM-DD hh:mm:ss` (UTC) for seconds since the epoch, by the civil
/// calendar algorithm of Hinnant ("days_from_civil", public domain).
pub fn utc_string(secs: u64) -> String {
    let days = (secs / 86_400) as i64;
    let rem = secs % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let day = doy - (153 * mp + 2) / 5 + 1;
    let month = if mp < 10 { mp + 3 } else { mp - 9 };
    let year = yoe + era * 400 + i64::from(month <= 2);
    format!(
        "{year:04}-{month:02}-{day:02} {:02}:{:02}:{:02}",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

impl Summary {
    /// What a model file stores.
    pub fn from_file(file: &ModelFile) -> Result<Summary> {
        let model = &file.model;
        let d = usize::from(model.dims.features);
        let m = usize::from(model.dims.components);
        let k = usize::from(model.dims.mixture);
        let file_bytes = file
            .to_bytes()
            .map_err(|e| Error::input(format!("model does not encode: {e}")))?
            .len();
        let bare = ModelFile {
            model: model.clone(),
            labels: Vec::new(),
        };
        let device_image_bytes = bare
            .to_bytes()
            .map_err(|e| Error::input(format!("model does not encode: {e}")))?
            .len();
        let total: f64 = model.eigenvalues.iter().map(|l| f64::from(*l)).sum::<f64>()
            + f64::from(model.theta[0]);
        let mut cum = 0.0;
        let components = model
            .eigenvalues
            .iter()
            .enumerate()
            .map(|(j, l)| {
                let ratio = f64::from(*l) / total;
                cum += ratio;
                ComponentRow {
                    component: j + 1,
                    eigenvalue: *l,
                    ratio,
                    cumulative: cum,
                }
            })
            .collect();
        let features = (0..d)
            .map(|i| FeatureRow {
                name: file
                    .labels
                    .get(i)
                    .map(|l| l.name.clone())
                    .unwrap_or_default(),
                unit: file
                    .labels
                    .get(i)
                    .map(|l| l.unit.clone())
                    .unwrap_or_default(),
                mean: model.mean[i],
                scale: model.scale[i],
                resid_center: model.resid_center[i],
                resid_gain: model.resid_gain[i],
                bias_at_limit: crate::residual::bias_at_limit(&model.view(), i),
            })
            .collect();
        let mixture = (0..k)
            .map(|c| MixRow {
                component: c + 1,
                weight: model.weights[c],
                means: model.mix_means[c * m..(c + 1) * m].to_vec(),
                variances: model.mix_variances[c * m..(c + 1) * m].to_vec(),
                spe_center: model.spe_center_by_mode[c],
                spe_spread: model.spe_spread_by_mode[c],
            })
            .collect();
        let mp = &model.monitor;
        Ok(Summary {
            model: ModelInfo {
                id: format!("{:08x}", model.meta.id),
                schema: format!("{:016x}", model.meta.schema),
                format_version: plumb_model::file::FORMAT_VERSION,
                created_unix_s: model.meta.created_unix_s,
                created_utc: utc_string(model.meta.created_unix_s),
                train_rows: model.meta.train_rows,
                calib_rows: model.meta.calib_rows,
                sample_period_us: model.meta.sample_period_us,
                d,
                m,
                k,
            },
            features,
            components,
            theta: model.theta,
            residual_ratio: f64::from(model.theta[0]) / total,
            mixture,
            monitor: MonitorInfo {
                warmup: mp.warmup,
                raise_dwell: mp.raise_dwell,
                clear_dwell: mp.clear_dwell,
                min_hold: mp.min_hold,
                clear_fraction: mp.clear_fraction,
                ewma_lambda: mp.ewma_lambda,
                fault_z: mp.fault_z,
            },
            resid_limit: model.resid_limit,
            resid_whitened: !model.resid_whiten.is_empty(),
            slow_charts: model
                .slow_charts
                .chunks_exact(plumb_model::SLOW_PARAMS)
                .map(|c| SlowRow {
                    feature: file
                        .labels
                        .get(c[0] as usize)
                        .map_or_else(|| format!("#{}", c[0]), |l| l.name.clone()),
                    lambda: c[1],
                    center: c[2],
                    gain: c[3],
                })
                .collect(),
            slow_limit: model.slow_limit,
            limits: vec![
                LimitRow {
                    score: "spe",
                    limits: (&mp.spe).into(),
                },
                LimitRow {
                    score: "t2",
                    limits: (&mp.t2).into(),
                },
                LimitRow {
                    score: "nll",
                    limits: (&mp.nll).into(),
                },
            ],
            spe_limit_jm: crate::calibrate::jackson_mudholkar(model.theta.map(f64::from), JM_ALPHA),
            size: SizeInfo {
                file_bytes,
                device_image_bytes,
                model_struct_bytes: std::mem::size_of::<plumb_model::Model>(),
                detector_ram_bytes: std::mem::size_of::<plumb_firmware::Detector>(),
            },
            fit: None,
            changes: None,
        })
    }

    /// Adds what a fit found.
    pub fn with_fit(mut self, report: FitReport) -> Summary {
        self.fit = Some(report);
        self
    }

    /// Adds what changed from a base model.
    pub fn with_changes(mut self, changes: ModelDiff) -> Summary {
        self.changes = Some(changes);
        self
    }

    /// Pretty JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
    }

    /// The human rendering.
    pub fn to_text(&self) -> String {
        let mut o = String::new();
        let mi = &self.model;
        let _ = writeln!(
            o,
            "plumbline model {}  (schema {}, format {})",
            mi.id, mi.schema, mi.format_version
        );
        if mi.format_version < plumb_model::file::FORMAT_VERSION {
            let how = match mi.format_version {
                1 => {
                    "with every mode at the global SPE centre and spread and with the SPE's \
                     residual chart off"
                }
                2 => "with the SPE's residual chart off",
                3 => "with the SPE's residual chart on unwhitened residuals",
                _ => "without slow charts",
            };
            let _ = writeln!(
                o,
                "  format {} file: read {how} (it flags as it did); boards read format {} only: \
                 refit it (plumb fit --base) or write it again (plumb tailor)",
                mi.format_version,
                plumb_model::file::FORMAT_VERSION
            );
        }
        let _ = writeln!(
            o,
            "  {} features -> {} components -> {} mixture components",
            mi.d, mi.m, mi.k
        );
        let _ = writeln!(
            o,
            "  fitted on {} rows, calibrated on {} held-out rows; logs dated {} UTC",
            mi.train_rows, mi.calib_rows, mi.created_utc
        );
        if mi.sample_period_us > 0 {
            let _ = writeln!(
                o,
                "  sample period {} us ({:.4} Hz)",
                mi.sample_period_us,
                1e6 / f64::from(mi.sample_period_us)
            );
        } else {
            let _ = writeln!(o, "  sample period unknown");
        }

        let _ = writeln!(
            o,
            "\nFeatures (standardised with these means and scales; the SPE's residual chart \
             smooths (v - centre) x gain, v the feature's PCA residual{})",
            if self.resid_whitened {
                " whitened by the residuals' nominal covariance"
            } else {
                ""
            }
        );
        let width = self
            .features
            .iter()
            .map(|f| f.name.chars().count() + f.unit.chars().count() + 2)
            .max()
            .unwrap_or(4)
            .max(7);
        let _ = writeln!(
            o,
            "  {:>4}  {:<width$}  {:>12}  {:>12}  {:>12}  {:>12}  {:>13}  {:>9}",
            "#",
            "feature",
            "mean",
            "scale",
            "resid centre",
            "resid gain",
            "bias at limit",
            "of mean"
        );
        for (i, f) in self.features.iter().enumerate() {
            let label = if f.unit.is_empty() {
                f.name.clone()
            } else {
                format!("{}[{}]", f.name, f.unit)
            };
            let (bias, share) = match f.bias_at_limit {
                Some(b) => (
                    format!("{b:>13.5}"),
                    percent_of_mean(b, f.mean, f.scale)
                        .map_or_else(|| format!("{:>9}", "-"), |p| format!("{p:>8.1}%")),
                ),
                None => (format!("{:>13}", "-"), format!("{:>9}", "-")),
            };
            let _ = writeln!(
                o,
                "  {:>4}  {:<width$}  {:>12.5}  {:>12.5}  {:>12.5}  {:>12.5}  {bias}  {share}",
                i + 1,
                label,
                f.mean,
                f.scale,
                f.resid_center,
                f.resid_gain
            );
        }
        let _ = writeln!(
            o,
            "  (bias at limit: a constant bias on that feature alone, in its units, that moves the \
             residual chart's settled value to its limit, so it is flagged within a few times \
             1/lambda samples; smaller ones only when the nominal wander adds the rest. Of mean: the same as \
             a share of the mean, about the gain change of that size, where the mean is at least one \
             scale from 0)"
        );

        let _ = writeln!(o, "\nPrincipal components (standardised features)");
        let _ = writeln!(
            o,
            "  {:>4}  {:>12}  {:>9}  {:>10}",
            "#", "eigenvalue", "explained", "cumulative"
        );
        for c in &self.components {
            let _ = writeln!(
                o,
                "  {:>4}  {:>12.5}  {:>8.2}%  {:>9.2}%",
                c.component,
                c.eigenvalue,
                100.0 * c.ratio,
                100.0 * c.cumulative
            );
        }
        let _ = writeln!(
            o,
            "  residual ({} discarded): {:.2}% of the variance; theta = {:.5}, {:.5}, {:.5}",
            mi.d - mi.m,
            100.0 * self.residual_ratio,
            self.theta[0],
            self.theta[1],
            self.theta[2]
        );

        let _ = writeln!(
            o,
            "\nMixture (diagonal Gaussian over the {} latent scores)",
            mi.m
        );
        let _ = writeln!(
            o,
            "  {:>4}  {:>8}  {:>10}  {:>10}   (SPE: centre and spread of g(SPE) in this mode)",
            "#", "weight", "SPE centre", "SPE spread"
        );
        for c in &self.mixture {
            let _ = writeln!(
                o,
                "  {:>4}  {:>8.4}  {:>10.5}  {:>10.5}",
                c.component, c.weight, c.spe_center, c.spe_spread
            );
        }
        if let Some(fit) = &self.fit {
            let mx = &fit.mixture;
            if mx.auto {
                let _ = writeln!(
                    o,
                    "  chosen by BIC (lower is better) on {} rows:",
                    mx.bic_rows
                );
                let _ = writeln!(
                    o,
                    "  {:>4}  {:>16}  {:>14}  {:>5}",
                    "k", "BIC", "mean loglik", "iters"
                );
                for r in &mx.bic {
                    let mark = if r.k == mx.k { "  <" } else { "" };
                    let _ = writeln!(
                        o,
                        "  {:>4}  {:>16.2}  {:>14.5}  {:>5}{mark}",
                        r.k, r.bic, r.mean_ll, r.iterations
                    );
                }
            } else if let Some(r) = mx.bic.first() {
                let _ = writeln!(
                    o,
                    "  BIC {:.2}, mean log-likelihood {:.5}",
                    r.bic, r.mean_ll
                );
            }
            let per_iter = if mx.em_iterations > 0 {
                mx.em_seconds / mx.em_iterations as f64
            } else {
                0.0
            };
            let _ = writeln!(
                o,
                "  EM: {} iterations in {:.2} s ({:.1} ms per iteration with initialisations, \
                 fastest {:.1} ms); runs of k = {}: {}",
                mx.em_iterations,
                mx.em_seconds,
                1e3 * per_iter,
                1e3 * mx.em_fastest_iteration_seconds,
                mx.k,
                mx.runs
                    .iter()
                    .map(|r| format!("{:.5}{}", r.lower_bound, if r.converged { "" } else { "*" }))
                    .collect::<Vec<_>>()
                    .join(", ")
            );
        }

        let _ = writeln!(
            o,
            "\nLimits (u = (g(score) - center) / spread; g = cube root)"
        );
        let _ = writeln!(
            o,
            "  {:<5} {:>13} {:>11} {:>10} {:>8} {:>9} {:>10}",
            "score", "sample limit", "center", "spread", "CUSUM k", "CUSUM h", "EWMA limit"
        );
        for l in &self.limits {
            let x = &l.limits;
            let _ = writeln!(
                o,
                "  {:<5} {:>13.5} {:>11.5} {:>10.5} {:>8.3} {:>9.4} {:>10.5}",
                l.score,
                x.sample_limit,
                x.center,
                x.spread,
                x.cusum_slack,
                x.cusum_limit,
                x.ewma_limit
            );
        }
        let _ = writeln!(
            o,
            "  spe EWMA: of g(SPE) standardised with the centre and spread of the sample's \
             mode (its most likely mixture component; Mixture above)"
        );
        let on = self.features.iter().filter(|f| f.resid_gain > 0.0).count();
        if on == 0 {
            let _ = writeln!(
                o,
                "  spe residual chart: off (every gain 0; a model of format 1 or 2)"
            );
        } else {
            let _ = writeln!(
                o,
                "  spe residual chart: hot when any feature's EWMA of (v - centre) x gain is \
                 beyond {:.4} in absolute value ({on} of {} features on; v the {} residual; \
                 Features above)",
                self.resid_limit,
                self.features.len(),
                if self.resid_whitened {
                    "whitened"
                } else {
                    "plain"
                }
            );
        }
        if self.slow_charts.is_empty() {
            let _ = writeln!(o, "  spe slow charts: none (plumb tailor adds them)");
        } else {
            let list: Vec<String> = self
                .slow_charts
                .iter()
                .map(|c| {
                    format!(
                        "{} (lambda {}, centre {:.4}, gain {:.4})",
                        c.feature, c.lambda, c.center, c.gain
                    )
                })
                .collect();
            let _ = writeln!(
                o,
                "  spe slow charts: hot when any EWMA of (v - centre) x gain is beyond {:.4} in \
                 absolute value: {}",
                self.slow_limit,
                list.join(", ")
            );
        }
        match self.spe_limit_jm {
            Some(q) => {
                let _ = writeln!(
                    o,
                    "  SPE per-sample limit: Jackson-Mudholkar {q:.5} at alpha = {JM_ALPHA} (independent Gaussian residuals); calibrated {:.5} (held-out data, all charts together at the target rate)",
                    self.limits[0].limits.sample_limit
                );
            }
            None => {
                let _ = writeln!(
                    o,
                    "  SPE limit (Jackson-Mudholkar): not defined, no residual variance"
                );
            }
        }
        let mo = &self.monitor;
        let _ = writeln!(
            o,
            "  monitor: warm-up {} samples; raise after {} hot; clear after {} calm (below {} of each limit) \
             and at least {} raised; EWMA lambda {}; fault beyond {} scales",
            mo.warmup, mo.raise_dwell, mo.clear_dwell, mo.clear_fraction, mo.min_hold, mo.ewma_lambda, mo.fault_z
        );

        if let Some(fit) = &self.fit {
            let c = &fit.calibration;
            let _ = writeln!(o, "\nCalibration on held-out logs");
            let _ = writeln!(
                o,
                "  {} rows scored ({} faulted, {} skipped). Each of the {} charts has a budget of \
                 {:.3} false alarms on its {} samples (rate / {}) and may alarm {} time{} there \
                 (budget rounded down, less one: a limit that alarms a times on held-out data \
                 alarms about a + 1 times on new data). Limits never below the design for \
                 independent input (ARL0 = {:.0} per chart). Delays: ARL at a shift of {} \
                 spreads, independent input; a flag rises {} samples later (raise dwell).",
                c.scored,
                c.faults,
                c.skipped,
                crate::calibrate::CHARTS,
                c.chart_budget,
                c.chart_samples,
                crate::calibrate::CHARTS,
                c.allowed_per_chart,
                if c.allowed_per_chart == 1 { "" } else { "s" },
                c.chart_arl,
                c.design_shift,
                self.monitor.raise_dwell.saturating_sub(1)
            );
            let _ = writeln!(
                o,
                "  {:<5} {:>6} {:>8} {:>9} {:>6} {:>8}   {:>7} {:>8} {:>6} {:>8}",
                "score",
                "CUSUM k",
                "h iid",
                "h",
                "alarms",
                "delay",
                "EWMA L iid",
                "L",
                "alarms",
                "delay"
            );
            for s in &c.scores {
                let _ = writeln!(
                    o,
                    "  {:<5} {:>7.2} {:>8.3} {:>9.3} {:>6} {:>8}   {:>10.3} {:>8.3} {:>6} {:>8}",
                    s.score,
                    s.cusum_slack,
                    s.cusum_limit_iid,
                    s.cusum_limit,
                    s.cusum_alarms,
                    fmt_arl(s.cusum_arl_at_shift),
                    s.ewma_l_iid,
                    s.ewma_l,
                    s.ewma_alarms,
                    fmt_arl(s.ewma_arl_at_shift)
                );
            }
            if c.scores.iter().any(|s| s.cusum_candidates.len() > 1) {
                let _ = writeln!(
                    o,
                    "  CUSUM h by reference value k (delay at {} spreads; * kept):",
                    c.design_shift
                );
                let mut head = format!("  {:>6}", "k");
                for s in &c.scores {
                    head.push_str(&format!("  {:>20}", s.score));
                }
                let _ = writeln!(o, "{head}");
                let rows = c.scores.first().map_or(0, |s| s.cusum_candidates.len());
                for j in 0..rows {
                    let mut line = format!("  {:>6.2}", c.scores[0].cusum_candidates[j].k);
                    for s in &c.scores {
                        let cand = &s.cusum_candidates[j];
                        let mark = if cand.k == s.cusum_slack { "*" } else { " " };
                        let cell = format!("{:.3} ({}){mark}", cand.h, fmt_arl(cand.arl_at_shift));
                        line.push_str(&format!("  {cell:>20}"));
                    }
                    let _ = writeln!(o, "{line}");
                }
            }
            if let Some(r) = &c.residual {
                let _ = writeln!(
                    o,
                    "  spe residual chart: each feature's standardised {}residual EWMA scaled to its \
                     {:.6} quantile on the held-out rows, or to the 99% prediction bound of a new \
                     log's level from the {} held-out logs (t = {:.3}) where that is larger \
                     ({} feature{}); limit {:.4}{} ({} alarm{})",
                    if self.resid_whitened { "whitened " } else { "" },
                    r.tail_level,
                    r.logs,
                    r.level_t,
                    r.level_bound_features,
                    if r.level_bound_features == 1 { "" } else { "s" },
                    r.limit,
                    if r.at_floor { " (the floor, 1)" } else { "" },
                    r.alarms,
                    if r.alarms == 1 { "" } else { "s" }
                );
            }
            if c.end_to_end {
                let _ = writeln!(
                    o,
                    "  end-to-end detector run: {} flags in {} watched samples (target allows {}){}",
                    c.flags,
                    c.watched,
                    c.allowed,
                    if c.widened {
                        format!("; fallback widening over {} more runs", c.rounds - 1)
                    } else {
                        String::new()
                    }
                );
                for s in &c.scores {
                    if s.cusum_widened > 1.0 || s.ewma_widened > 1.0 {
                        let _ = writeln!(
                            o,
                            "    {} widened: CUSUM x{:.3}, EWMA x{:.3}",
                            s.score, s.cusum_widened, s.ewma_widened
                        );
                    }
                }
                if let Some(r) = c.residual.as_ref().filter(|r| r.widened > 1.0) {
                    let _ = writeln!(o, "    spe residual chart widened: x{:.3}", r.widened);
                }
                let _ = writeln!(
                    o,
                    "  false-alarm rate {:.3e} per sample, 95% interval [{:.3e}, {:.3e}] ({}); target {:.1e}: {}",
                    c.rate,
                    c.rate_ci95[0],
                    c.rate_ci95[1],
                    c.ci_method,
                    c.target_rate,
                    if c.met_target { "met" } else { "NOT met" }
                );
            }
            let _ = writeln!(
                o,
                "  calibration time: scoring {:.2} s, limit search {:.2} s ({} chart passes), \
                 end-to-end {:.2} s",
                c.seconds.score, c.seconds.design, c.search_passes, c.seconds.check
            );
            let _ = writeln!(
                o,
                "  rows: {} training ({} skipped), {} held out ({} skipped)",
                fit.rows.train, fit.rows.train_skipped, fit.rows.holdout, fit.rows.holdout_skipped
            );
            let _ = writeln!(
                o,
                "  time: {}",
                fit.timings
                    .iter()
                    .map(|t| format!("{} {:.2} s", t.stage, t.seconds))
                    .collect::<Vec<_>>()
                    .join(", ")
            );
        }

        if let Some(c) = &self.changes {
            o.push_str(&c.to_text());
        }

        let s = &self.size;
        let _ = writeln!(o, "\nSize");
        let _ = writeln!(
            o,
            "  model file {} bytes; device image {} bytes (flash per model slot, no labels)",
            s.file_bytes, s.device_image_bytes
        );
        let _ = writeln!(
            o,
            "  device RAM ~{} bytes: the detector with its fixed-capacity model ({} bytes of it), host layout",
            s.detector_ram_bytes, s.model_struct_bytes
        );
        if let Some(fit) = &self.fit {
            if !fit.warnings.is_empty() {
                let _ = writeln!(o, "\nWarnings");
                for w in &fit.warnings {
                    let _ = writeln!(o, "  - {w}");
                }
            }
        }
        o
    }
}

/// One number before and after a refit.
pub type Pair<T> = [T; 2];

/// Limits of one score before and after.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LimitChange {
    /// `spe`, `t2`, `nll`.
    pub score: &'static str,
    /// The base model's limits.
    pub old: LimitsJson,
    /// The new model's limits.
    pub new: LimitsJson,
}

/// One feature's standardisation before and after.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FeatureChange {
    /// Name.
    pub name: String,
    /// Mean, old and new.
    pub mean: Pair<f32>,
    /// Scale, old and new.
    pub scale: Pair<f32>,
    /// `(new mean − old mean) / old scale`.
    pub shift: f64,
}

/// What changed between a base model and its refit (`plumb fit --base`).
/// Every pair is `[old, new]`.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelDiff {
    /// The base model file.
    pub base: String,
    /// Model ids.
    pub id: Pair<String>,
    /// Schema fingerprints (a refit keeps it).
    pub schema: Pair<String>,
    /// Training rows.
    pub train_rows: Pair<u64>,
    /// Calibration rows.
    pub calib_rows: Pair<u64>,
    /// Components kept.
    pub components: Pair<usize>,
    /// Explained variance ratio per component (1-based order; `None` where a
    /// model keeps fewer).
    pub explained: Vec<Pair<Option<f64>>>,
    /// Share of the variance left in the residual.
    pub residual: Pair<f64>,
    /// Mixture components.
    pub mixture: Pair<usize>,
    /// Mixture weights, largest first (components have no identity across
    /// fits, so they are not matched).
    pub weights: Pair<Vec<f32>>,
    /// Limits per score.
    pub limits: Vec<LimitChange>,
    /// The SPE's residual chart: its limit, how many features have it on,
    /// and whether it smooths whitened residuals.
    /// on (gain > 0).
    pub residual_chart: Pair<(f32, usize, bool)>,
    /// State-machine settings.
    pub monitor: Pair<MonitorInfo>,
    /// Standardisation per feature, in model order.
    pub features: Vec<FeatureChange>,
}

impl ModelDiff {
    /// The changes from `old` (read from `base`) to `new`.
    pub fn between(base: &str, old: &Summary, new: &Summary) -> ModelDiff {
        let m = old.components.len().max(new.components.len());
        let ratio = |s: &Summary, j: usize| s.components.get(j).map(|c| c.ratio);
        let weights = |s: &Summary| {
            let mut w: Vec<f32> = s.mixture.iter().map(|c| c.weight).collect();
            w.sort_by(|a, b| b.total_cmp(a));
            w
        };
        ModelDiff {
            base: base.to_string(),
            id: [old.model.id.clone(), new.model.id.clone()],
            schema: [old.model.schema.clone(), new.model.schema.clone()],
            train_rows: [old.model.train_rows, new.model.train_rows],
            calib_rows: [old.model.calib_rows, new.model.calib_rows],
            components: [old.model.m, new.model.m],
            explained: (0..m).map(|j| [ratio(old, j), ratio(new, j)]).collect(),
            residual: [old.residual_ratio, new.residual_ratio],
            mixture: [old.model.k, new.model.k],
            weights: [weights(old), weights(new)],
            limits: old
                .limits
                .iter()
                .zip(&new.limits)
                .map(|(a, b)| LimitChange {
                    score: a.score,
                    old: a.limits.clone(),
                    new: b.limits.clone(),
                })
                .collect(),
            residual_chart: [old, new].map(|s| {
                let on = s.features.iter().filter(|f| f.resid_gain > 0.0).count();
                (s.resid_limit, on, s.resid_whitened)
            }),
            monitor: [old.monitor.clone(), new.monitor.clone()],
            features: old
                .features
                .iter()
                .zip(&new.features)
                .map(|(a, b)| FeatureChange {
                    name: a.name.clone(),
                    mean: [a.mean, b.mean],
                    scale: [a.scale, b.scale],
                    shift: (f64::from(b.mean) - f64::from(a.mean)) / f64::from(a.scale),
                })
                .collect(),
        }
    }

    /// The human rendering (a section of the fit summary).
    pub fn to_text(&self) -> String {
        let mut o = String::new();
        let _ = writeln!(
            o,
            "\nChanges from the base model {} ({} -> {})",
            self.base, self.id[0], self.id[1]
        );
        if self.schema[0] == self.schema[1] {
            let _ = writeln!(
                o,
                "  schema {} kept ({} features, same names, order and units)",
                self.schema[1],
                self.features.len()
            );
        } else {
            let _ = writeln!(
                o,
                "  schema CHANGED: {} -> {}",
                self.schema[0], self.schema[1]
            );
        }
        let _ = writeln!(
            o,
            "  rows: training {} -> {}; calibration {} -> {}",
            self.train_rows[0], self.train_rows[1], self.calib_rows[0], self.calib_rows[1]
        );
        let _ = writeln!(
            o,
            "  components kept: {} -> {}; residual {:.2}% -> {:.2}% of the variance",
            self.components[0],
            self.components[1],
            100.0 * self.residual[0],
            100.0 * self.residual[1]
        );
        let _ = writeln!(
            o,
            "  {:>4}  {:>13}  {:>13}",
            "#", "old explained", "new explained"
        );
        let pct = |r: Option<f64>| r.map_or("-".to_string(), |r| format!("{:.2}%", 100.0 * r));
        for (j, [a, b]) in self.explained.iter().enumerate() {
            let _ = writeln!(o, "  {:>4}  {:>13}  {:>13}", j + 1, pct(*a), pct(*b));
        }
        let ws = |w: &[f32]| {
            w.iter()
                .map(|x| format!("{x:.3}"))
                .collect::<Vec<_>>()
                .join(" ")
        };
        let _ = writeln!(
            o,
            "  mixture: k {} -> {}; weights, largest first: old {}; new {}",
            self.mixture[0],
            self.mixture[1],
            ws(&self.weights[0]),
            ws(&self.weights[1])
        );
        let _ = writeln!(o, "  limits (old -> new):");
        let _ = writeln!(
            o,
            "  {:<5} {:>23} {:>23} {:>15} {:>23} {:>21}",
            "score", "sample limit", "center", "CUSUM k", "CUSUM h", "EWMA limit"
        );
        for l in &self.limits {
            let (a, b) = (&l.old, &l.new);
            let _ = writeln!(
                o,
                "  {:<5} {:>23} {:>23} {:>15} {:>23} {:>21}",
                l.score,
                format!("{:.4} -> {:.4}", a.sample_limit, b.sample_limit),
                format!("{:.4} -> {:.4}", a.center, b.center),
                format!("{:.2} -> {:.2}", a.cusum_slack, b.cusum_slack),
                format!("{:.3} -> {:.3}", a.cusum_limit, b.cusum_limit),
                format!("{:.4} -> {:.4}", a.ewma_limit, b.ewma_limit)
            );
        }
        let chart = |(limit, on, whitened): (f32, usize, bool)| {
            if on == 0 {
                "off".to_string()
            } else {
                let input = if whitened { "whitened" } else { "plain" };
                format!("limit {limit:.4} on {on} features, {input}")
            }
        };
        let _ = writeln!(
            o,
            "  spe residual chart: {} -> {}",
            chart(self.residual_chart[0]),
            chart(self.residual_chart[1])
        );
        let [ma, mb] = &self.monitor;
        if ma == mb {
            let _ = writeln!(o, "  drift-state settings unchanged");
        } else {
            let mut parts = Vec::new();
            let mut cmp = |name: &str, a: String, b: String| {
                if a != b {
                    parts.push(format!("{name} {a} -> {b}"));
                }
            };
            cmp("warm-up", ma.warmup.to_string(), mb.warmup.to_string());
            cmp(
                "raise dwell",
                ma.raise_dwell.to_string(),
                mb.raise_dwell.to_string(),
            );
            cmp(
                "clear dwell",
                ma.clear_dwell.to_string(),
                mb.clear_dwell.to_string(),
            );
            cmp(
                "minimum hold",
                ma.min_hold.to_string(),
                mb.min_hold.to_string(),
            );
            cmp(
                "clear fraction",
                ma.clear_fraction.to_string(),
                mb.clear_fraction.to_string(),
            );
            cmp(
                "EWMA lambda",
                ma.ewma_lambda.to_string(),
                mb.ewma_lambda.to_string(),
            );
            cmp("fault z", ma.fault_z.to_string(), mb.fault_z.to_string());
            let _ = writeln!(o, "  drift-state settings changed: {}", parts.join(", "));
        }
        let mut moved: Vec<&FeatureChange> = self.features.iter().collect();
        moved.sort_by(|a, b| b.shift.abs().total_cmp(&a.shift.abs()));
        let top: Vec<String> = moved
            .iter()
            .take(3)
            .map(|f| format!("{} {:+.3}", f.name, f.shift))
            .collect();
        if !top.is_empty() {
            let _ = writeln!(
                o,
                "  feature means that moved most, in old scales: {}",
                top.join(", ")
            );
        }
        o
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_dates() {
        assert_eq!(utc_string(0), "1970-01-01 00:00:00");
        // 2000-03-01 is day 11017; 951868800 s.
        assert_eq!(utc_string(951_868_800 + 3661), "2000-03-01 01:01:01");
        assert_eq!(utc_string(1_709_164_800), "2024-02-29 00:00:00");
    }
}
