//! Fitting a model from logs: the stages behind `plumb fit`.
//!
//! 1. (default hold-out) count the lines of every log, so the last fraction
//!    of each can be held out;
//! 2. pass 1 over the training rows: mean and covariance ([`crate::pca::Moments`],
//!    per chunk on the parser threads, merged in file order);
//! 3. PCA on the correlation matrix; keep `m` components;
//! 4. pass 2: project the training rows to latent scores (kept in memory:
//!    8·m bytes per row);
//! 5. diagonal Gaussian mixture on the latent scores ([`gmm`]), `k` fixed or
//!    chosen by BIC (on an evenly spaced subsample of at most
//!    [`AUTO_SAMPLE`] rows; the chosen `k` is then fitted on every row);
//! 6. calibration on the held-out rows through the device detector
//!    ([`calibrate`]): per-chart limits set on the held-out scores, then one
//!    end-to-end run of the state machine;
//! 7. metadata: schema fingerprint, model id, creation time, row counts,
//!    sample period.
//!
//! Everything is deterministic: the same logs and options give the same bytes.

use crate::calibrate::{self, CalibConfig, CalibReport, RowSource};
use crate::error::{Error, Location, Result};
use crate::gmm::{self, EmOptions, RunInfo};
use crate::logs::{LogSet, Selection, Spill};
use crate::pca::{Keep, Moments, Pca, PcaError};
use crate::progress::{Progress, Stage};
use plumb_model::file::{Label, ModelFile};
use plumb_model::{Capacity, Dims, ModelMeta, ModelOwned};
use serde::Serialize;
use std::path::{Path, PathBuf};
use std::time::Instant;

/// Most time steps kept to take the median sample period.
pub const PERIOD_STEPS: usize = 1_000_000;
/// Most rows used to choose `k` by BIC (`--mixture auto`).
pub const AUTO_SAMPLE: usize = 200_000;

/// How many mixture components.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MixtureChoice {
    /// Exactly this many.
    Fixed(usize),
    /// The lowest BIC over 1..=max.
    Auto {
        /// Largest `k` tried.
        max: usize,
    },
}

/// Where the held-out rows come from.
#[derive(Debug, Clone, Copy)]
pub enum Holdout<'a> {
    /// The last fraction of every training log.
    Tail(f64),
    /// Separate logs (mapped to the training columns by name).
    Logs(&'a LogSet),
}

/// Options of a fit.
#[derive(Debug, Clone, PartialEq)]
pub struct FitConfig {
    /// Components kept.
    pub keep: Keep,
    /// Mixture components.
    pub mixture: MixtureChoice,
    /// EM restarts per `k`.
    pub restarts: usize,
    /// EM tolerance on the mean log-likelihood.
    pub tol: f64,
    /// Most EM iterations.
    pub max_iter: usize,
    /// Seed of the initialisations.
    pub seed: u64,
    /// Added to every mixture variance (scikit-learn's `reg_covar`).
    pub reg_covar: f64,
    /// Variance floor as a fraction of each latent dimension's variance.
    pub var_floor: f64,
    /// Calibration and state-machine settings.
    pub calib: CalibConfig,
    /// Refuse models over the device capacities.
    pub device_check: bool,
    /// Threads (1 or 2).
    pub threads: usize,
    /// Folder for a binary copy of the training rows, so the projection
    /// pass reads it instead of parsing CSV logs again (8 bytes per value,
    /// removed at the end); `None` parses them twice.
    pub spill: Option<PathBuf>,
}

impl Default for FitConfig {
    fn default() -> Self {
        FitConfig {
            keep: Keep::Variance(0.95),
            mixture: MixtureChoice::Fixed(3),
            restarts: 4,
            tol: 1e-3,
            max_iter: 100,
            seed: 0x0070_6c75_6d62, // "plumb" in ASCII
            reg_covar: 1e-6,
            var_floor: 1e-3,
            calib: CalibConfig::default(),
            device_check: true,
            threads: 2,
            spill: Some(std::env::temp_dir()),
        }
    }
}

/// One row of the BIC table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BicRow {
    /// Components.
    pub k: usize,
    /// BIC (lower is better).
    pub bic: f64,
    /// Mean log-likelihood per row.
    pub mean_ll: f64,
    /// EM iterations of the best run.
    pub iterations: usize,
}

/// Rows used.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RowCounts {
    /// Training rows.
    pub train: u64,
    /// Training rows skipped for empty or non-finite cells.
    pub train_skipped: u64,
    /// Held-out rows read.
    pub holdout: u64,
    /// Held-out rows skipped.
    pub holdout_skipped: u64,
}

/// PCA part of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct PcaReport {
    /// Features.
    pub d: usize,
    /// Components kept.
    pub m: usize,
    /// How `m` was chosen.
    pub rule: String,
    /// All eigenvalues (ddof = 1 scale of the standardised data).
    pub eigenvalues: Vec<f64>,
    /// All explained variance ratios.
    pub ratios: Vec<f64>,
}

/// Mixture part of the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct MixtureReport {
    /// Components chosen.
    pub k: usize,
    /// Whether `k` was chosen by BIC.
    pub auto: bool,
    /// BIC per `k` tried.
    pub bic: Vec<BicRow>,
    /// Rows the BIC table was computed on (an evenly spaced subsample of at
    /// most [`AUTO_SAMPLE`] rows when choosing `k`).
    pub bic_rows: u64,
    /// Runs of the chosen `k`.
    pub runs: Vec<RunInfo>,
    /// Mean log-likelihood of the final mixture on the training rows.
    pub mean_ll: f64,
    /// EM iterations over all runs and all `k`.
    pub em_iterations: usize,
    /// Wall time of all EM runs, seconds (initialisations included).
    pub em_seconds: f64,
    /// Wall time of the fastest single EM iteration (one pass over the rows
    /// and an M step, from the end of one iteration to the end of the next
    /// within a run), seconds; 0 when no run had two iterations.
    pub em_fastest_iteration_seconds: f64,
}

/// Wall time of one stage.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Timing {
    /// Stage name.
    pub stage: &'static str,
    /// Seconds.
    pub seconds: f64,
}

/// Everything a fit found beyond the model itself.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FitReport {
    /// Rows used.
    pub rows: RowCounts,
    /// PCA.
    pub pca: PcaReport,
    /// Mixture.
    pub mixture: MixtureReport,
    /// Calibration.
    pub calibration: CalibReport,
    /// Stage timings.
    pub timings: Vec<Timing>,
    /// Warnings.
    pub warnings: Vec<String>,
}

/// A fitted model and its report.
#[derive(Debug, Clone)]
pub struct FitOutcome {
    /// The model with its labels, ready to encode.
    pub file: ModelFile,
    /// The report.
    pub report: FitReport,
}

/// Held-out rows of a [`LogSet`], replayable for calibration.
pub struct LogRows<'a> {
    /// The logs.
    pub set: &'a LogSet,
    /// Which rows.
    pub select: Selection,
}

impl RowSource for LogRows<'_> {
    fn progress_total(&self) -> u64 {
        self.set.total_bytes()
    }

    fn for_each_row(&self, stage: &Stage, f: &mut dyn FnMut(usize, &[f64])) -> Result<u64> {
        let stats = self.set.for_each(&self.select, stage, |c| {
            for row in c.iter_rows() {
                f(c.file, row);
            }
            Ok(())
        })?;
        Ok(stats.total_skipped())
    }
}

fn newest_mtime(sets: &[&LogSet]) -> u64 {
    sets.iter()
        .flat_map(|s| s.files())
        .filter_map(|f| std::fs::metadata(&f.path).ok()?.modified().ok())
        .filter_map(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map(|d| d.as_secs())
        .max()
        .unwrap_or(0)
}

fn capacity_error(dims: &Dims) -> Option<Error> {
    Capacity::DEVICE.admits(dims).err().map(|e| {
        let c = Capacity::DEVICE;
        Error::input(format!(
            "{e}: the model would have {} features, {} components and {} mixture components; \
             a device holds at most {}, {} and {}. Use fewer features, --components or \
             --variance for fewer components, --mixture for fewer mixture components, or \
             --no-device-check to write a model only `plumb inspect` reads (no board, nor replay, runs it)",
            dims.features, dims.components, dims.mixture, c.features, c.components, c.mixture
        ))
    })
}

/// Fits a model on `train`, calibrating on `holdout`.
pub fn fit(
    train: &LogSet,
    holdout: Holdout<'_>,
    cfg: &FitConfig,
    progress: &Progress,
) -> Result<FitOutcome> {
    cfg.calib.validate()?;
    if cfg.restarts == 0 || cfg.max_iter == 0 {
        return Err(Error::input("--restarts and --max-iter must be at least 1"));
    }
    if !(cfg.tol > 0.0) || !cfg.tol.is_finite() {
        return Err(Error::input(format!(
            "--tol must be a number above 0, found {}",
            cfg.tol
        )));
    }
    if !(cfg.reg_covar >= 0.0) || !cfg.reg_covar.is_finite() {
        return Err(Error::input(format!(
            "--reg-covar must be a number ≥ 0, found {}",
            cfg.reg_covar
        )));
    }
    if !(0.0..=1.0).contains(&cfg.var_floor) {
        return Err(Error::input(format!(
            "--var-floor is a fraction of each latent score's variance: expected 0 to 1, found {}",
            cfg.var_floor
        )));
    }
    let d = train.features();
    let first = &train.files()[0].path;
    if d < 2 {
        return Err(Error::at(
            train.files()[0].header_location(),
            "expected at least 2 feature columns (one feature leaves no residual to monitor)",
        ));
    }
    if d > usize::from(u16::MAX) {
        return Err(Error::at(
            train.files()[0].header_location(),
            "too many feature columns",
        ));
    }
    if cfg.device_check && d > Capacity::DEVICE.features as usize {
        return Err(capacity_error(&Dims {
            features: d as u16,
            components: 1,
            mixture: 1,
        })
        .expect("over capacity"));
    }
    let mut timings = Vec::new();
    let mut warnings = Vec::new();
    let mut clock = Instant::now();
    let mut lap = |name: &'static str, timings: &mut Vec<Timing>| {
        timings.push(Timing {
            stage: name,
            seconds: clock.elapsed().as_secs_f64(),
        });
        clock = Instant::now();
    };
    let bytes = train.total_bytes();

    // 1. Split.
    let (train_sel, hold_rows): (Selection, LogRows<'_>) = match holdout {
        Holdout::Tail(frac) => {
            if !(frac > 0.0 && frac < 1.0) {
                return Err(Error::input("--holdout-fraction must be in (0, 1)"));
            }
            let lines = train.count_lines(&progress.stage("count", bytes, true))?;
            let (head, tail) = Selection::split_tail(&lines, frac);
            (
                head,
                LogRows {
                    set: train,
                    select: tail,
                },
            )
        }
        Holdout::Logs(set) => (
            Selection::all(train.files().len()),
            LogRows {
                set,
                select: Selection::all(set.files().len()),
            },
        ),
    };
    lap("count", &mut timings);

    // 2. Moments and time steps; CSV rows also go to the spill file.
    let mut spill = match &cfg.spill {
        Some(dir) if train.files().iter().any(|f| f.array_rows().is_none()) => {
            match Spill::create(dir, d) {
                Ok(s) => Some(s),
                Err(e) => {
                    warnings.push(format!("no spill file ({e}): the logs are parsed twice"));
                    None
                }
            }
        }
        _ => None,
    };
    let spilling = spill.is_some();
    let mut moments = Moments::new(d);
    let mut steps: Vec<f64> = Vec::new();
    let mut last: Option<(usize, f64)> = None;
    let stats = train.scan(
        &train_sel,
        &progress.stage("moments", bytes, true),
        |c| {
            let bytes = if spilling {
                Spill::encode(&c.values)
            } else {
                Vec::new()
            };
            Ok((Moments::from_rows(&c.values, d), bytes))
        },
        |(m, bytes), c| {
            moments.merge(&m);
            if let Some(s) = spill.as_mut() {
                if let Err(e) = s.push(&bytes) {
                    warnings.push(format!(
                        "spill file dropped ({e}): the logs are parsed twice"
                    ));
                    spill = None;
                }
            }
            for &t in &c.times {
                if let Some((f, prev)) = last {
                    if f == c.file && steps.len() < PERIOD_STEPS {
                        steps.push(t - prev);
                    }
                }
                last = Some((c.file, t));
            }
            Ok(())
        },
    )?;
    lap("moments", &mut timings);
    let n_train = stats.total_rows();
    let min_train = (10 * d as u64).max(100);
    if n_train < min_train {
        return Err(Error::at(
            Location::file(first),
            format!(
                "expected at least {min_train} training rows (10 per feature, at least 100), \
                 the logs give {n_train}{}",
                skipped_note(stats.total_skipped())
            ),
        ));
    }

    // 3. PCA.
    let pca = Pca::from_moments(&moments).map_err(|e| match e {
        PcaError::Constant { feature, value } => {
            let file = &train.files()[0];
            Error::at(
                file.feature_location(feature, &train.labels()[feature].name),
                format!(
                    "column is constant over the training rows (always {value}); \
                     a feature that never varies cannot be standardised"
                ),
            )
        }
        other => Error::input(other.to_string()),
    })?;
    let (m, rule) = match cfg.keep {
        Keep::Count(c) => {
            if c == 0 || c >= d {
                return Err(Error::input(format!(
                    "--components must be in 1..={} (fewer than the {d} features, so a \
                     residual is left to monitor)",
                    d - 1
                )));
            }
            (c, format!("--components {c}"))
        }
        Keep::Variance(f) => {
            if !(f > 0.0 && f <= 1.0) {
                return Err(Error::input("--variance must be in (0, 1]"));
            }
            let m = pca.choose(Keep::Variance(f)).min(d - 1);
            (m, format!("--variance {f}"))
        }
    };
    if let Some(j) = pca.eigenvalues[..m].iter().position(|l| !(*l > 1e-9)) {
        return Err(Error::input(format!(
            "component {} explains no variance (the features are collinear): keep fewer \
             components",
            j + 1
        )));
    }
    if cfg.device_check && m > Capacity::DEVICE.components as usize {
        return Err(capacity_error(&Dims {
            features: d as u16,
            components: m as u16,
            mixture: 1,
        })
        .expect("over capacity"));
    }
    lap("pca", &mut timings);

    // 4. Latent scores, from the spill file when there is one.
    let spilled = match spill.as_mut() {
        Some(s) if s.rows() == n_train => match s.finish(train.labels(), train.options()) {
            Ok(set) => Some(set),
            Err(e) => {
                warnings.push(format!(
                    "spill file dropped ({e}): the logs are parsed twice"
                ));
                None
            }
        },
        _ => None,
    };
    let latent = match &spilled {
        Some(set) => project_rows(
            set,
            &Selection::all(1),
            &progress.stage("project", set.total_bytes(), true),
            &pca,
            m,
            n_train as usize,
        )?,
        None => project_rows(
            train,
            &train_sel,
            &progress.stage("project", bytes, true),
            &pca,
            m,
            n_train as usize,
        )?,
    };
    drop(spilled);
    drop(spill);
    lap("project", &mut timings);

    // 5. Mixture.
    let var = gmm::column_variances(&latent, m);
    let em = EmOptions {
        tol: cfg.tol,
        max_iter: cfg.max_iter,
        reg_covar: cfg.reg_covar,
        floor: var.iter().map(|v| v * cfg.var_floor).collect(),
        threads: cfg.threads,
    };
    let ks: Vec<usize> = match cfg.mixture {
        MixtureChoice::Fixed(k) => {
            if k == 0 {
                return Err(Error::input("--mixture must be at least 1"));
            }
            vec![k]
        }
        MixtureChoice::Auto { max } => (1..=max).collect(),
    };
    if let Some(&kmax) = ks.last() {
        if cfg.device_check && kmax > Capacity::DEVICE.mixture as usize {
            return Err(capacity_error(&Dims {
                features: d as u16,
                components: m as u16,
                mixture: kmax.min(usize::from(u16::MAX)) as u16,
            })
            .expect("over capacity"));
        }
    }
    let em_start = Instant::now();
    let mut em_iterations = 0;
    let n_latent = latent.len() / m;
    // BIC selection runs on an evenly spaced subsample of large logs; the
    // chosen k is then fitted on every row.
    let sub: Option<Vec<f64>> = match cfg.mixture {
        MixtureChoice::Auto { .. } if n_latent > AUTO_SAMPLE => Some(
            (0..AUTO_SAMPLE)
                .flat_map(|i| {
                    let r = i * n_latent / AUTO_SAMPLE;
                    latent[r * m..(r + 1) * m].iter().copied()
                })
                .collect(),
        ),
        _ => None,
    };
    // The EM passes read the scores tile by tile: rearranged once, in place.
    let sub = sub.map(|s| gmm::Tiled::from_rows(s, m));
    let latent = gmm::Tiled::from_rows(latent, m);
    let select_data: &gmm::Tiled = sub.as_ref().unwrap_or(&latent);
    let runs_total = (ks.len() + usize::from(sub.is_some())) * cfg.restarts * cfg.max_iter;
    let bar = progress.stage("mixture", runs_total as u64, false);
    let mut fastest = f64::INFINITY;
    let mut run_k = |data: &gmm::Tiled, k: usize, em_iterations: &mut usize| {
        let opts = gmm::FitOptions {
            k,
            restarts: cfg.restarts,
            seed: cfg.seed,
            em: em.clone(),
        };
        let mut run_iters = 0;
        let mut last = Instant::now();
        let res = gmm::fit_tiled(data, &opts, &mut |r, it, ll| {
            let now = Instant::now();
            if it >= 2 {
                fastest = fastest.min((now - last).as_secs_f64());
            }
            last = now;
            bar.message(format!("k={k} run {} it {it} ll {ll:.4}", r + 1));
            bar.advance(1);
            run_iters += 1;
        });
        // Move the bar to the end of this k's share.
        bar.advance((cfg.restarts * cfg.max_iter - run_iters) as u64);
        *em_iterations += run_iters;
        res
    };
    let mut best: Option<(gmm::FitResult, usize)> = None;
    let mut table = Vec::new();
    for &k in &ks {
        let res = run_k(select_data, k, &mut em_iterations);
        table.push(BicRow {
            k,
            bic: res.bic,
            mean_ll: res.mean_ll,
            iterations: res.best.iterations,
        });
        if best.as_ref().is_none_or(|(b, _)| res.bic < b.bic) {
            best = Some((res, k));
        }
    }
    let select_rows = select_data.rows();
    let (mut gfit, k) = best.expect("at least one k");
    if sub.is_some() {
        gfit = run_k(&latent, k, &mut em_iterations);
    }
    drop(bar);
    let em_seconds = em_start.elapsed().as_secs_f64();
    if gfit.runs.iter().any(|r| !r.converged) {
        warnings.push(format!(
            "{} of {} EM runs for k = {k} stopped at --max-iter {} before converging",
            gfit.runs.iter().filter(|r| !r.converged).count(),
            gfit.runs.len(),
            cfg.max_iter
        ));
    }
    drop(latent);
    lap("mixture", &mut timings);

    // 6. Assemble and calibrate.
    let labels: Vec<Label> = train.labels().to_vec();
    let schema =
        plumb_model::schema::fingerprint(labels.iter().map(|l| (l.name.as_str(), l.unit.as_str())));
    let f32s = |v: &[f64]| v.iter().map(|x| *x as f32).collect::<Vec<f32>>();
    let theta = pca.theta(m);
    let mix = &gfit.best.mixture;
    let dims = Dims {
        features: d as u16,
        components: m as u16,
        mixture: k as u16,
    };
    let mut model = ModelOwned {
        meta: ModelMeta {
            id: 0,
            schema,
            created_unix_s: 0,
            train_rows: n_train,
            calib_rows: 0,
            sample_period_us: 0,
        },
        dims,
        mean: f32s(&pca.mean),
        scale: f32s(&pca.scale),
        loadings: f32s(&pca.loadings_kept(m)),
        eigenvalues: f32s(&pca.eigenvalues[..m]),
        theta: [theta[0] as f32, theta[1] as f32, theta[2] as f32],
        weights: f32s(&mix.weights),
        mix_means: f32s(&mix.means),
        mix_variances: f32s(&mix.variances),
        monitor: cfg.calib.placeholder(),
        // Set by the calibration.
        spe_center_by_mode: Vec::new(),
        spe_spread_by_mode: Vec::new(),
        resid_center: Vec::new(),
        resid_gain: Vec::new(),
        resid_limit: 0.0,
        resid_whiten: Vec::new(),
        // `plumb tailor` adds slow charts; a fitted model has none.
        slow_charts: Vec::new(),
        slow_limit: 1.0,
    };
    let device = Capacity::DEVICE.admits(&dims).is_ok();
    let calib_stage = |label: &str, total: u64| progress.stage(label, total, true);
    let calibration =
        calibrate::calibrate(&mut model, &hold_rows, &cfg.calib, device, &calib_stage).map_err(
            |e| match (&e.location, hold_rows.set.files().first()) {
                (None, Some(f)) => e.with_location(Location::file(&f.path)),
                _ => e,
            },
        )?;
    lap("calibrate", &mut timings);
    let holdout_rows = calibration.scored + calibration.faults;

    // 7. Metadata.
    model.meta.calib_rows = calibration.scored;
    let mut sets = vec![train];
    if let Holdout::Logs(h) = holdout {
        sets.push(h);
    }
    model.meta.created_unix_s = newest_mtime(&sets);
    model.meta.sample_period_us = sample_period_us(&mut steps, train, &mut warnings);
    warnings.extend(calibration.warnings.iter().cloned());
    let mut file = ModelFile { model, labels };
    file.model.meta.id = model_id(&file)?;

    Ok(FitOutcome {
        file,
        report: FitReport {
            rows: RowCounts {
                train: n_train,
                train_skipped: stats.total_skipped(),
                holdout: holdout_rows,
                holdout_skipped: calibration.skipped,
            },
            pca: PcaReport {
                d,
                m,
                rule,
                eigenvalues: pca.eigenvalues.clone(),
                ratios: pca.ratios.clone(),
            },
            mixture: MixtureReport {
                k,
                auto: matches!(cfg.mixture, MixtureChoice::Auto { .. }),
                bic: table,
                bic_rows: select_rows as u64,
                runs: gfit.runs.clone(),
                mean_ll: gfit.mean_ll,
                em_iterations,
                em_seconds,
                em_fastest_iteration_seconds: if fastest.is_finite() { fastest } else { 0.0 },
            },
            calibration,
            timings,
            warnings,
        },
    })
}

/// Checks that the feature columns of `train` are exactly `labels`, a base
/// model's (`base` is its path, for messages): same names in the same order,
/// same units. A refit (`plumb fit --base`) keeps the base model's schema, so
/// the new model is a drop-in replacement; any difference is refused, naming
/// the log and the column. [`LogSet::open`] has already held every log to the
/// first one's columns, so the first log is the one compared.
pub fn check_schema(train: &LogSet, labels: &[Label], base: &Path) -> Result<()> {
    if labels.is_empty() {
        return Err(Error::at(
            Location::file(base),
            "the base model has no labels: its feature names are unknown",
        ));
    }
    let file = &train.files()[0];
    let have = train.labels();
    let at = |j: usize| file.feature_location(j, &have[j].name);
    let base = base.display();
    for (j, l) in labels.iter().enumerate() {
        if !have.iter().any(|h| h.name == l.name) {
            return Err(Error::at(
                file.header_location().named(&l.name),
                format!(
                    "expected a column named {:?} (feature {} of the base model {base}), \
                     found none",
                    l.name,
                    j + 1
                ),
            ));
        }
    }
    for (j, h) in have.iter().enumerate() {
        let Some(k) = labels.iter().position(|l| l.name == h.name) else {
            return Err(Error::at(
                at(j),
                format!(
                    "unexpected column: the base model {base} has no feature {:?}",
                    h.name
                ),
            ));
        };
        if h.unit != labels[k].unit {
            return Err(Error::at(
                at(j),
                format!(
                    "expected unit {:?} as in the base model {base}, found {:?}",
                    labels[k].unit, h.unit
                ),
            ));
        }
        if k != j {
            return Err(Error::at(
                at(j),
                format!(
                    "feature {} of the base model {base} is {:?}, this log has {:?} (its \
                     feature {}) there: a refit keeps the base model's column order",
                    j + 1,
                    labels[j].name,
                    h.name,
                    k + 1
                ),
            ));
        }
    }
    Ok(())
}

fn skipped_note(skipped: u64) -> String {
    if skipped > 0 {
        format!(" after skipping {skipped} rows with empty or non-finite cells")
    } else {
        String::new()
    }
}

/// Median time step in microseconds (the lower middle value for an even
/// count), 0 when unknown.
fn sample_period_us(steps: &mut [f64], set: &LogSet, warnings: &mut Vec<String>) -> u32 {
    if !set.has_time() || steps.is_empty() {
        return 0;
    }
    let Some(per_unit) = set.time_unit_us() else {
        warnings.push(format!(
            "time unit {:?} not understood (s, ms, us, ns, min, h): sample period left unknown",
            set.time_unit()
        ));
        return 0;
    };
    steps.sort_by(f64::total_cmp);
    let median = steps[(steps.len() - 1) / 2];
    let us = (median * per_unit).round();
    if !(us >= 1.0 && us <= f64::from(u32::MAX)) {
        warnings.push(format!(
            "median time step {median} {} is not a usable sample period: left unknown",
            set.time_unit()
        ));
        return 0;
    }
    us as u32
}

/// Model id: CRC-32/ISO-HDLC of the postcard payload encoded with id 0.
pub fn model_id(file: &ModelFile) -> Result<u32> {
    let mut probe = file.clone();
    probe.model.meta.id = 0;
    let bytes = probe
        .to_bytes()
        .map_err(|e| Error::input(format!("the fitted model does not encode: {e}")))?;
    let sections = plumb_model::file::split(&bytes)
        .map_err(|e| Error::input(format!("the fitted model does not frame: {e}")))?;
    Ok(plumb_model::file::crc32(sections.payload))
}

/// Writes `bytes` to `path` atomically ([`crate::files::write_atomic`]).
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<()> {
    crate::files::write_atomic(path, bytes)
}

crate::simd::kernel! {
/// The first `m` latent scores of every row of a chunk.
fn project_chunk(pca: &Pca, c: &crate::logs::Chunk, m: usize) -> Vec<f64> {
    let mut out = vec![0.0; c.rows() * m];
    pca.project_rows(&c.values[..c.rows() * c.d], m, &mut out);
    out
}
}

/// The second pass over the logs: the first `m` latent scores of every
/// selected row, `m` values per row in row order (the only per-row data a
/// fit keeps; `rows_hint` sizes the buffer).
pub fn project_rows(
    set: &LogSet,
    select: &Selection,
    stage: &Stage,
    pca: &Pca,
    m: usize,
    rows_hint: usize,
) -> Result<Vec<f64>> {
    let mut latent: Vec<f64> = Vec::with_capacity(rows_hint * m);
    set.scan(
        select,
        stage,
        |c| Ok(project_chunk(pca, c, m)),
        |t, _| {
            latent.extend_from_slice(&t);
            Ok(())
        },
    )?;
    Ok(latent)
}
