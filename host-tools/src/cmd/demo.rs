//! `plumb demo`: the whole loop on the bundled demo scenario.

use crate::cli::OutputArgs;
use crate::error::{Error, Result, EXIT_CLEAN};
use crate::events::ChartCrossing;
use crate::fit::{self, FitConfig, Holdout, MixtureChoice};
use crate::logs::{self, BadCells, LogSet, ReadOptions};
use crate::progress::Progress;
use crate::replay::{self, LogReplay};
use clap::Args;
use plumb_firmware::Score;
use plumb_scenario::{Truth, TruthKind, SAMPLE_PERIOD_S};
use serde::Serialize;
use std::path::{Path, PathBuf};

/// Long help of `plumb demo`.
pub const LONG_ABOUT: &str = "\
Run the whole loop on the invented demo scenario: a warehouse tugger robot's drive module,
24 features per 100 ms window (currents, speeds, temperatures, vibration bands, IMU
statistics), five operating modes.

1. Fit a model on the nominal training logs (demo-logs/train: three robots, two days), and
   on --train-rows rows of generated nominal logs from four more robots on more days if
   asked (made on demand under demo-logs/generated/ and reused).
2. Calibrate its limits on generated nominal logs (--nominal-rows rows, made on demand under
   demo-logs/generated/ and reused), through the very same detector the boards run.
3. Replay a second, independent generated nominal set, the committed held-out logs, and
   every drift log (demo-logs/drift, onsets in demo-logs/truth.csv) through the detector.
4. Print, per scenario: onset, first flag, delay in samples and seconds, false alarms, the
   features with the largest residual share at the flag, and, beside them, a plain
   baseline (a flag on every sample whose SPE exceeds a per-sample limit set to the same
   false-alarm rate) and, for step changes, the Lorden bound ln(ARL0)/KL on the delay of
   any detector with that false-alarm rate (KL = δ²/2 for a shift of δ spreads).
5. Write the model and an HTML report to --out.

Missing demo logs are regenerated from the fixed seed.";

/// Arguments of `plumb demo`.
#[derive(Debug, Clone, Args)]
pub struct DemoArgs {
    /// Folder of the demo logs (train/, holdout/, drift/, truth.csv); made if missing
    #[arg(long, value_name = "DIR", default_value = "demo-logs")]
    pub logs: PathBuf,

    /// Folder for the model and the report
    #[arg(long, value_name = "DIR", default_value = "out/demo")]
    pub out: PathBuf,

    /// Rows of generated nominal data for calibration, and as many again for counting false
    /// alarms (at least 1000). The default is the fewest `plumb fit` asks for at the target
    /// rate: each of its ten charts then has a budget of at least one false alarm in them
    #[arg(long, value_name = "N", default_value_t = DEFAULT_NOMINAL_ROWS, value_parser = parse_nominal_rows)]
    pub nominal_rows: usize,

    /// Rows of generated nominal training data fitted together with demo-logs/train (0: the
    /// committed training logs alone, the default)
    #[arg(long, value_name = "N", default_value_t = 0)]
    pub train_rows: usize,

    /// Skip the HTML report
    #[arg(long)]
    pub no_report: bool,

    #[command(flatten)]
    pub output: OutputArgs,
}

/// Default `--nominal-rows`: `2 × CHARTS / rate` at the default target rate of
/// 10⁻⁵, the held-out size `plumb fit` asks for when it warns that a chart's
/// budget is under one alarm (as it is at 10⁶ rows less the warm-up);
/// BENCHMARKS.md, "Detection on the demo scenario", has the figures at 10⁶,
/// 2 × 10⁶ and 4 × 10⁶ rows.
pub const DEFAULT_NOMINAL_ROWS: usize = 2_000_000;

/// Fewest `--nominal-rows`: calibration needs the warm-up plus 100 scored
/// rows at the very least, and a few hundred more to set limits on.
pub const MIN_NOMINAL_ROWS: usize = 1000;

/// Parses `--nominal-rows` (checked before the cached sets are touched).
fn parse_nominal_rows(s: &str) -> std::result::Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(n) if n >= MIN_NOMINAL_ROWS => Ok(n),
        Ok(n) => Err(format!(
            "expected at least {MIN_NOMINAL_ROWS} rows (calibration sets its limits on them), found {n}"
        )),
        Err(_) => Err(format!("expected a count of rows, found {s:?}")),
    }
}

/// Seeds of the generated nominal sets (never the committed demo's seed).
const CALIB_SEED: u64 = 1001;
const EVAL_SEED: u64 = 2002;
const TRAIN_SEED: u64 = 3003;

/// Results for one drift or fault scenario.
#[derive(Debug, Clone, Serialize)]
pub struct ScenarioResult {
    /// Scenario name.
    pub scenario: String,
    /// `drift` or `fault`.
    pub kind: &'static str,
    /// The log.
    pub file: PathBuf,
    /// Ground-truth onset (0-based sample).
    pub onset: u64,
    /// First flag at or after the onset.
    pub first_flag: Option<u64>,
    /// Delay in samples.
    pub delay: Option<u64>,
    /// Delay in seconds.
    pub delay_s: Option<f64>,
    /// Flags raised before the onset (or, for a fault scenario, at all).
    pub false_alarms: usize,
    /// Sensor faults counted.
    pub faults: u64,
    /// Scores that drove the first flag.
    pub drivers: Vec<&'static str>,
    /// The charts over their limits when the first flag rose (as `plumb
    /// replay` and a board's drift raised message list them).
    pub crossed: Vec<ChartCrossing>,
    /// Features with the largest residual share at the first flag.
    pub top_features: Vec<String>,
    /// How many of those are among the features the scenario changes.
    pub top_in_truth: usize,
    /// The features the scenario changes (ground truth).
    pub changed_features: Vec<String>,
    /// Delay of the baseline (per-sample SPE limit) in samples.
    pub baseline_delay: Option<u64>,
    /// Samples over the baseline limit before the onset.
    pub baseline_false_alarms: u64,
    /// Shift of the driving score after the onset, in spreads (δ).
    pub shift: Option<f64>,
    /// Lorden bound ln(ARL0)/KL in samples, for step changes.
    pub lorden_bound: Option<f64>,
}

/// Results on nominal data.
#[derive(Debug, Clone, Serialize)]
pub struct NominalResult {
    /// What was replayed.
    pub name: String,
    /// Samples.
    pub samples: u64,
    /// Drift flags (all false alarms: the data is nominal).
    pub flags: usize,
    /// Flags per 10⁵ samples.
    pub per_1e5: f64,
    /// Samples over the baseline limit.
    pub baseline_flags: u64,
}

/// Everything `plumb demo` found.
#[derive(Debug, Clone, Serialize)]
pub struct DemoResult {
    /// The model written.
    pub model: PathBuf,
    /// The report written.
    pub report: Option<PathBuf>,
    /// Target false-alarm rate per sample.
    pub target_rate: f64,
    /// Baseline SPE limit.
    pub baseline_spe_limit: f32,
    /// Nominal data.
    pub nominal: Vec<NominalResult>,
    /// Scenarios.
    pub scenarios: Vec<ScenarioResult>,
    /// The fit's warnings (as `plumb fit` prints them).
    pub warnings: Vec<String>,
}

fn say(quiet: bool, msg: &str) {
    if !quiet {
        eprintln!("demo: {msg}");
    }
}

fn io_err(path: &Path, e: std::io::Error) -> Error {
    Error::io(path, "write", &e)
}

/// Makes the committed demo set if it is missing.
fn ensure_demo(dir: &Path, quiet: bool) -> Result<()> {
    if dir.join("train").is_dir() && dir.join("truth.csv").is_file() {
        return Ok(());
    }
    say(
        quiet,
        &format!("generating the demo logs in {}", dir.display()),
    );
    plumb_scenario::write_demo(dir, &plumb_scenario::Config::default())
        .map_err(|e| io_err(dir, e))?;
    Ok(())
}

/// Generated nominal logs, reused when a previous run made the same set.
fn ensure_nominal(dir: &Path, seed: u64, rows: usize, quiet: bool) -> Result<Vec<PathBuf>> {
    let files = rows.div_ceil(125_000).clamp(1, 64);
    let marker = dir.join("complete");
    let want = format!("seed {seed} rows {rows} files {files}\n");
    if std::fs::read_to_string(&marker).ok().as_deref() == Some(want.as_str()) {
        return logs::expand_paths(&[dir.to_path_buf()]);
    }
    say(
        quiet,
        &format!("generating {rows} nominal rows in {}", dir.display()),
    );
    let _ = std::fs::remove_dir_all(dir);
    std::fs::create_dir_all(dir).map_err(|e| io_err(dir, e))?;
    let paths =
        plumb_scenario::write_bulk_holdout(dir, seed, rows, files).map_err(|e| io_err(dir, e))?;
    std::fs::write(&marker, want).map_err(|e| io_err(&marker, e))?;
    Ok(paths)
}

/// Per-sample traces of one replayed log kept for the analysis.
#[derive(Default)]
struct LogTrace {
    spe: Vec<f32>,
    u: [Vec<f32>; 3],
}

/// Replays `paths`, keeping SPE and the standardised u of each score per sample.
fn replay_traced(
    file: &plumb_model::file::ModelFile,
    paths: &[PathBuf],
    read: &ReadOptions,
    keep: bool,
) -> Result<(Vec<LogReplay>, Vec<LogTrace>)> {
    let mut traces: Vec<LogTrace> = Vec::new();
    let stage = crate::progress::Stage::hidden();
    let reps = replay::replay(file, paths, read.clone(), &stage, |step| {
        if step.log >= traces.len() {
            traces.push(LogTrace::default());
        }
        let tr = &mut traces[step.log];
        match step.outcome.scores {
            Some(s) => {
                tr.spe.push(s.spe);
                if keep {
                    let g = step.detector.transformed(&s);
                    let mp = &step.detector.model().monitor;
                    for ((u, gv), lim) in tr.u.iter_mut().zip(g).zip([&mp.spe, &mp.t2, &mp.nll]) {
                        u.push((gv - lim.center) / lim.spread);
                    }
                }
            }
            None => {
                tr.spe.push(f32::NAN);
                if keep {
                    for u in tr.u.iter_mut() {
                        u.push(f32::NAN);
                    }
                }
            }
        }
        Ok(())
    })?;
    Ok((reps, traces))
}

fn mean(v: &[f32]) -> Option<f64> {
    let ok: Vec<f64> = v
        .iter()
        .filter(|x| x.is_finite())
        .map(|x| *x as f64)
        .collect();
    (!ok.is_empty()).then(|| ok.iter().sum::<f64>() / ok.len() as f64)
}

/// Scenarios whose change is a step (the Lorden bound applies).
fn is_step(scenario: &str) -> bool {
    matches!(scenario, "gain_change" | "loose_mount" | "new_floor")
}

/// Runs `plumb demo`.
pub fn run(args: DemoArgs) -> Result<u8> {
    let quiet = args.output.quiet || args.output.json;
    ensure_demo(&args.logs, quiet)?;
    std::fs::create_dir_all(&args.out).map_err(|e| io_err(&args.out, e))?;
    let gen = args.logs.join("generated");
    let calib_paths = ensure_nominal(
        &gen.join("calibration"),
        CALIB_SEED,
        args.nominal_rows,
        quiet,
    )?;
    let eval_paths = ensure_nominal(&gen.join("evaluation"), EVAL_SEED, args.nominal_rows, quiet)?;
    let extra_train = if args.train_rows == 0 {
        Vec::new()
    } else {
        ensure_nominal(&gen.join("training"), TRAIN_SEED, args.train_rows, quiet)?
    };

    // 1–2. Fit and calibrate.
    say(
        quiet,
        &format!(
            "fitting on {}{}, calibrating on the generated nominal set",
            args.logs.join("train").display(),
            if extra_train.is_empty() {
                ""
            } else {
                " and the generated training set"
            }
        ),
    );
    let read = ReadOptions::default();
    let train_paths = logs::expand_paths(&[args.logs.join("train")])?;
    let mut fit_paths = train_paths.clone();
    fit_paths.extend(extra_train.iter().cloned());
    let train = LogSet::open(&fit_paths, read.clone())?;
    let calib = LogSet::open_for_labels(&calib_paths, train.labels(), read.clone())?;
    let cfg = FitConfig {
        mixture: MixtureChoice::Auto { max: 8 },
        ..FitConfig::default()
    };
    let progress = Progress::stderr(quiet);
    let outcome = fit::fit(&train, Holdout::Logs(&calib), &cfg, &progress)?;
    let model_path = args.out.join("tugger.plumb");
    let bytes = outcome
        .file
        .to_bytes()
        .map_err(|e| Error::input(format!("the fitted model does not encode: {e}")))?;
    fit::write_atomic(&model_path, &bytes)?;
    // What `plumb fit` would warn of (too few held-out rows, say) is said
    // here too: on standard error unless --quiet, and in the JSON.
    if !args.output.quiet {
        for w in &outcome.report.warnings {
            eprintln!("demo: warning: {w}");
        }
    }
    let warnings = outcome.report.warnings;
    let file = outcome.file;
    let target = cfg.calib.false_alarm_rate;

    // 3. Replay.
    let mut replay_read = read.clone();
    replay_read.bad_cells = BadCells::PassAsNan;
    say(
        quiet,
        "replaying the calibration set for the baseline limit",
    );
    let (_, calib_tr) = replay_traced(&file, &calib_paths, &replay_read, false)?;
    say(
        quiet,
        "replaying the evaluation set, the held-out logs and the drift logs",
    );
    let (eval_reps, eval_tr) = replay_traced(&file, &eval_paths, &replay_read, false)?;
    let hold_paths = logs::expand_paths(&[args.logs.join("holdout")])?;
    let (hold_reps, hold_tr) = replay_traced(&file, &hold_paths, &replay_read, false)?;
    let truth = plumb_scenario::read_truth(&args.logs.join("truth.csv"))
        .map_err(|e| Error::input(e.to_string()))?;
    let drift_paths: Vec<PathBuf> = truth.iter().map(|t| t.file.clone()).collect();
    let (drift_reps, drift_tr) = replay_traced(&file, &drift_paths, &replay_read, true)?;

    // Baseline: a per-sample SPE limit with the same false-alarm rate as the
    // detector achieved on the evaluation set (at least one in the
    // calibration sample count), set on the calibration set.
    let eval_samples: u64 = eval_reps.iter().map(|r| r.samples).sum();
    let eval_flags: usize = eval_reps.iter().map(|r| r.flags.len()).sum();
    let mut calib_spe: Vec<f32> = calib_tr
        .iter()
        .flat_map(|t| t.spe.iter().copied())
        .filter(|v| v.is_finite())
        .collect();
    calib_spe.sort_by(f32::total_cmp);
    let n = calib_spe.len().max(1);
    let rate = (eval_flags as f64 / eval_samples.max(1) as f64).max(1.0 / n as f64);
    let idx = ((1.0 - rate) * n as f64).ceil() as usize;
    let baseline = calib_spe
        .get(idx.min(n - 1))
        .copied()
        .unwrap_or(f32::INFINITY);
    let over = |v: &[f32]| v.iter().filter(|s| **s > baseline).count() as u64;

    let nominal = vec![
        nominal_row("generated evaluation set", &eval_reps, &eval_tr, &over),
        nominal_row("committed held-out logs", &hold_reps, &hold_tr, &over),
    ];
    let scenarios: Vec<ScenarioResult> = truth
        .iter()
        .zip(&drift_reps)
        .zip(&drift_tr)
        .map(|((t, rep), tr)| scenario_row(t, rep, tr, baseline, target))
        .collect();

    // 5. Report: the drift logs and the committed held-out logs, with the
    // training rows in the latent plane.
    let report = if args.no_report {
        None
    } else {
        let out = args.out.join("report.html");
        say(quiet, &format!("writing {}", out.display()));
        let mut logs = drift_paths.clone();
        logs.extend(hold_paths.iter().cloned());
        crate::report::write_report(
            &model_path,
            &file,
            &logs,
            &train_paths,
            &truth,
            replay_read.clone(),
            &out,
            &Progress::stderr(quiet),
        )?;
        Some(out)
    };
    let result = DemoResult {
        model: model_path,
        report,
        target_rate: target,
        baseline_spe_limit: baseline,
        nominal,
        scenarios,
        warnings,
    };
    if args.output.json {
        crate::outln!(
            "{}",
            serde_json::to_string_pretty(&result).expect("serialisable")
        );
    } else if !args.output.quiet {
        crate::out!("{}", text(&result));
    }
    Ok(EXIT_CLEAN)
}

fn nominal_row(
    name: &str,
    reps: &[LogReplay],
    traces: &[LogTrace],
    over: &dyn Fn(&[f32]) -> u64,
) -> NominalResult {
    let samples: u64 = reps.iter().map(|r| r.samples).sum();
    let flags: usize = reps.iter().map(|r| r.flags.len()).sum();
    NominalResult {
        name: name.to_string(),
        samples,
        flags,
        per_1e5: flags as f64 * 1e5 / samples.max(1) as f64,
        baseline_flags: traces.iter().map(|t| over(&t.spe)).sum(),
    }
}

fn scenario_row(
    t: &Truth,
    rep: &LogReplay,
    tr: &LogTrace,
    baseline: f32,
    target: f64,
) -> ScenarioResult {
    let onset = t.onset_row as u64;
    let fault = t.kind == TruthKind::Fault;
    let first = rep.flags.iter().find(|f| f.raised_at >= onset);
    let false_alarms = rep
        .flags
        .iter()
        .filter(|f| fault || f.raised_at < onset)
        .count();
    let (first_flag, delay, drivers, crossed, top) = match (first, fault) {
        (Some(f), false) => (
            Some(f.raised_at),
            Some(f.raised_at - onset),
            f.scores.clone(),
            f.crossed.clone(),
            f.top_features
                .iter()
                .map(|c| c.name.clone())
                .collect::<Vec<_>>(),
        ),
        _ => (None, None, Vec::new(), Vec::new(), Vec::new()),
    };
    let top_in_truth = top.iter().filter(|n| t.features.contains(n)).count();
    let on = onset as usize;
    let baseline_delay = (!fault)
        .then(|| {
            tr.spe
                .iter()
                .skip(on)
                .position(|s| *s > baseline)
                .map(|p| p as u64)
        })
        .flatten();
    let baseline_false_alarms = tr.spe.iter().take(on).filter(|s| **s > baseline).count() as u64;
    // δ: mean shift of u for the first driving score over 500 samples after
    // the onset against 500 before, in spreads (u is standardised).
    let score = drivers
        .first()
        .and_then(|d| Score::ALL.into_iter().find(|s| s.name() == *d));
    let shift = score.and_then(|s| {
        let u = &tr.u[s as usize];
        let after = mean(u.get(on..(on + 500).min(u.len()))?)?;
        let before = mean(u.get(on.saturating_sub(500)..on)?)?;
        Some(after - before)
    });
    let lorden_bound = shift
        .filter(|d| *d > 0.0 && is_step(&t.scenario))
        .map(|d| (1.0 / target).ln() / (d * d / 2.0));
    ScenarioResult {
        scenario: t.scenario.clone(),
        kind: t.kind.as_str(),
        file: t.file.clone(),
        onset,
        first_flag,
        delay,
        delay_s: delay.map(|d| d as f64 * SAMPLE_PERIOD_S),
        false_alarms,
        faults: rep.faults,
        drivers,
        crossed,
        top_features: top,
        top_in_truth,
        changed_features: t.features.clone(),
        baseline_delay,
        baseline_false_alarms,
        shift,
        lorden_bound,
    }
}

fn opt<T: std::fmt::Display>(v: Option<T>) -> String {
    v.map(|x| x.to_string()).unwrap_or_else(|| "-".into())
}

/// The human summary.
pub fn text(r: &DemoResult) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "Demo scenario: tugger drive module, one sample per {:.0} ms; target false-alarm rate {:.0e} per sample\n\n",
        SAMPLE_PERIOD_S * 1000.0,
        r.target_rate
    ));
    s.push_str("Nominal data (every flag is a false alarm)\n");
    s.push_str(&format!(
        "  {:<28} {:>9} {:>6} {:>10} {:>14}\n",
        "set", "samples", "flags", "per 1e5", "baseline flags"
    ));
    for n in &r.nominal {
        s.push_str(&format!(
            "  {:<28} {:>9} {:>6} {:>10.3} {:>14}\n",
            n.name, n.samples, n.flags, n.per_1e5, n.baseline_flags
        ));
    }
    s.push_str(&format!(
        "\nScenarios (onset from truth.csv; delay = first flag − onset; baseline = per-sample SPE limit {:.4})\n",
        r.baseline_spe_limit
    ));
    s.push_str(&format!(
        "  {:<15} {:<6} {:>6} {:>7} {:>16} {:>6} {:>7} {:>9} {:>9}  {}\n",
        "scenario",
        "kind",
        "onset",
        "flag",
        "delay",
        "false",
        "faults",
        "baseline",
        "bound",
        "top features at the flag (★ = changed by the scenario)"
    ));
    for c in &r.scenarios {
        let delay = match (c.delay, c.delay_s) {
            (Some(d), Some(sec)) => format!("{d} ({sec:.1} s)"),
            _ => "-".into(),
        };
        let top: Vec<String> = c
            .top_features
            .iter()
            .map(|f| {
                if c.changed_features.contains(f) {
                    format!("{f}★")
                } else {
                    f.clone()
                }
            })
            .collect();
        s.push_str(&format!(
            "  {:<15} {:<6} {:>6} {:>7} {:>16} {:>6} {:>7} {:>9} {:>9}  {}\n",
            c.scenario,
            c.kind,
            c.onset,
            opt(c.first_flag),
            delay,
            c.false_alarms,
            c.faults,
            opt(c.baseline_delay),
            c.lorden_bound
                .map(|b| format!("{b:.1}"))
                .unwrap_or_else(|| "-".into()),
            if top.is_empty() {
                "-".to_string()
            } else {
                top.join(", ")
            }
        ));
    }
    // Which charts raised each first flag (`spe/residual(vib_band6):1.89>1.83`).
    let raised: Vec<String> = r
        .scenarios
        .iter()
        .filter(|c| !c.crossed.is_empty())
        .map(|c| {
            let charts: Vec<String> = c.crossed.iter().map(ToString::to_string).collect();
            format!("  {:<15} {}\n", c.scenario, charts.join(", "))
        })
        .collect();
    if !raised.is_empty() {
        s.push_str("\nCharts over their limits at each first flag\n");
        s.push_str(&raised.concat());
    }
    s.push_str(&format!("\nmodel: {}\n", r.model.display()));
    if let Some(p) = &r.report {
        s.push_str(&format!("report: {}\n", p.display()));
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::calibrate::{CalibConfig, CHARTS};

    #[test]
    fn the_default_calibration_set_is_as_large_as_fit_asks() {
        // plumb fit warns below 2 × CHARTS / rate held-out rows (each chart's
        // budget under one alarm once the warm-up rows are left out); the
        // demo's default must not be a case it warns about.
        let rate = CalibConfig::default().false_alarm_rate;
        assert!(DEFAULT_NOMINAL_ROWS as f64 >= 2.0 * CHARTS as f64 / rate);
    }
}
