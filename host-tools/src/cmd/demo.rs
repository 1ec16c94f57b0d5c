//! `plumb demo`: the whole loop on the bundled demo scenario.

use crate::cli::OutputArgs;
use crate::error::{Error, Result, EXIT_CLEAN};
use crate::events::ChartCrossing;
use crate::fit::{self, FitConfig, Holdout, MixtureChoice};
use crate::logs::{self, BadCells, LogSet, ReadOptions};
use crate::progress::Progress;
use crate::replay::{self, LogReplay};
use crate::tailor::{TailorConfig, TailorReport};
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
5. Tailor the model to each robot a drift log comes from, as `plumb tailor` does: --robot-rows
   rows of that robot's own nominal logs (one log per day on days of its own, made on demand
   under demo-logs/generated/ and reused); every other day (the 1st, 3rd, ...) sets its slow
   charts, the rest counts its false alarms. Replay the robot's drift logs through its
   tailored model and print, per scenario, its first flag and delay beside the fleet
   model's and the baseline's, with the charts that raised it, and per robot the false
   alarms per 10⁵ samples on the days it was not tailored on. --robot-rows 0 skips this.
6. Write the models (tugger.plumb, robot<N>.plumb) and an HTML report to --out.

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

    /// Rows of each drifting robot's own nominal logs (days of its own): every other day
    /// tailors the model to the robot, the rest counts its false alarms (0: no per-robot
    /// step; else at least 4000). The default gives the slow charts 10⁶ rows to be set on
    #[arg(long, value_name = "N", default_value_t = DEFAULT_ROBOT_ROWS, value_parser = parse_robot_rows)]
    pub robot_rows: usize,

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

/// Default `--robot-rows`: 10⁶ rows to tailor on (with 5 × 10⁵ the slow
/// charts' limit came out too low on the demo's robots) and as many to count
/// false alarms on.
pub const DEFAULT_ROBOT_ROWS: usize = 2_000_000;

/// Fewest `--robot-rows` (other than 0): four logs of 1000 rows, two to
/// tailor on (tailoring needs several days) and two to count on.
pub const MIN_ROBOT_ROWS: usize = 4000;

/// Rows of one day's log of a robot's own set (as the hand-measured runs).
const ROBOT_LOG_ROWS: usize = 31_250;

/// Most logs (days) of one robot's own set.
const MAX_ROBOT_LOGS: usize = 256;

/// First day of the robots' own logs: no other demo set uses days from here
/// on (the committed logs use days 1-5, the bulk sets 1000 to 1063).
const ROBOT_FIRST_DAY: u32 = 2000;

/// Parses `--robot-rows`.
fn parse_robot_rows(s: &str) -> std::result::Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(n) if n == 0 || n >= MIN_ROBOT_ROWS => Ok(n),
        Ok(n) => Err(format!(
            "expected 0 (no per-robot step) or at least {MIN_ROBOT_ROWS} rows (two days to \
             tailor on and two to count false alarms on), found {n}"
        )),
        Err(_) => Err(format!("expected a count of rows, found {s:?}")),
    }
}

/// Days (logs) of a robot's own set of `rows` rows: an even number, at least
/// 4, about [`ROBOT_LOG_ROWS`] rows each.
fn robot_days(rows: usize) -> usize {
    let n = rows.div_ceil(ROBOT_LOG_ROWS).clamp(4, MAX_ROBOT_LOGS);
    n + n % 2
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
    /// The first flag after the onset (fields of their own in JSON).
    #[serde(flatten)]
    pub flag: FirstFlag,
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
    /// The robot whose log this is.
    pub robot: Option<u32>,
    /// The same log through that robot's tailored model (null: no
    /// per-robot step).
    pub tailored: Option<TailoredResult>,
}

/// One scenario through the tailored model of its robot.
#[derive(Debug, Clone, Serialize)]
pub struct TailoredResult {
    /// The tailored model.
    pub model: PathBuf,
    /// The first flag after the onset (fields of their own in JSON).
    #[serde(flatten)]
    pub flag: FirstFlag,
}

/// A scenario's log through one model: its first flag after the onset.
#[derive(Debug, Clone, Serialize)]
pub struct FirstFlag {
    /// First flag at or after the onset (none for a fault scenario).
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
    /// replay` and a board's drift raised message list them; statistic
    /// `slow` for a slow chart).
    pub crossed: Vec<ChartCrossing>,
}

impl FirstFlag {
    /// The first flag of `rep` at or after `t`'s onset, and the flags
    /// before it (a fault scenario: no first flag, every flag counted).
    fn of<'a>(t: &Truth, rep: &'a LogReplay) -> (Self, Option<&'a replay::Flag>) {
        let onset = t.onset_row as u64;
        let fault = t.kind == TruthKind::Fault;
        let first = rep
            .flags
            .iter()
            .find(|f| f.raised_at >= onset)
            .filter(|_| !fault);
        let delay = first.map(|f| f.raised_at - onset);
        let flag = FirstFlag {
            first_flag: first.map(|f| f.raised_at),
            delay,
            delay_s: delay.map(|d| d as f64 * SAMPLE_PERIOD_S),
            false_alarms: rep
                .flags
                .iter()
                .filter(|f| fault || f.raised_at < onset)
                .count(),
            faults: rep.faults,
            drivers: first.map(|f| f.scores.clone()).unwrap_or_default(),
            crossed: first.map(|f| f.crossed.clone()).unwrap_or_default(),
        };
        (flag, first)
    }
}

/// One robot's tailored model.
#[derive(Debug, Clone, Serialize)]
pub struct RobotResult {
    /// Robot number.
    pub robot: u32,
    /// The tailored model written.
    pub model: PathBuf,
    /// The scenarios whose logs come from this robot.
    pub scenarios: Vec<String>,
    /// Days of the logs the model was tailored on.
    pub tailor_days: Vec<u32>,
    /// Days of the logs its false alarms were counted on.
    pub count_days: Vec<u32>,
    /// What tailoring found (as `plumb tailor --json` prints it).
    pub tailoring: TailorReport,
    /// The tailored model on the robot's other days (every flag is a false
    /// alarm; baseline flags against the fleet baseline's limit).
    pub nominal: NominalResult,
    /// Of those flags, the ones a slow chart was among the charts of.
    pub slow_flags: usize,
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
    /// The fit's warnings (as `plumb fit` prints them), then the demo's
    /// own (a per-robot step skipped).
    pub warnings: Vec<String>,
    /// Rows of each robot's own nominal logs (`--robot-rows`; 0: no
    /// per-robot step).
    pub robot_rows: usize,
    /// The tailored model of each robot a drift log comes from, by robot.
    pub robots: Vec<RobotResult>,
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

/// A generated set in `dir`, reused when its `complete` marker says `want`
/// (a previous run made the same set); otherwise the folder is emptied,
/// `write` makes the set, and the marker is written last.
fn ensure_set(
    dir: &Path,
    want: &str,
    what: &str,
    quiet: bool,
    write: impl FnOnce() -> std::io::Result<Vec<PathBuf>>,
) -> Result<Option<Vec<PathBuf>>> {
    let marker = dir.join("complete");
    if std::fs::read_to_string(&marker).ok().as_deref() == Some(want) {
        return Ok(None);
    }
    say(quiet, &format!("generating {what} in {}", dir.display()));
    let _ = std::fs::remove_dir_all(dir);
    std::fs::create_dir_all(dir).map_err(|e| io_err(dir, e))?;
    let paths = write().map_err(|e| io_err(dir, e))?;
    std::fs::write(&marker, want).map_err(|e| io_err(&marker, e))?;
    Ok(Some(paths))
}

/// Generated nominal logs, reused when a previous run made the same set.
fn ensure_nominal(dir: &Path, seed: u64, rows: usize, quiet: bool) -> Result<Vec<PathBuf>> {
    let files = rows.div_ceil(125_000).clamp(1, 64);
    let want = format!("seed {seed} rows {rows} files {files}\n");
    let made = ensure_set(dir, &want, &format!("{rows} nominal rows"), quiet, || {
        plumb_scenario::write_bulk_holdout(dir, seed, rows, files)
    })?;
    match made {
        Some(paths) => Ok(paths),
        None => logs::expand_paths(&[dir.to_path_buf()]),
    }
}

/// One robot's own nominal logs (one per day, in day order, from
/// [`ROBOT_FIRST_DAY`]), reused when a previous run made the same set. The
/// seed is the committed demo's: the robots of its drift logs.
fn ensure_robot(dir: &Path, robot: u32, rows: usize, quiet: bool) -> Result<Vec<(u32, PathBuf)>> {
    let seed = plumb_scenario::DEMO_SEED;
    let days = ROBOT_FIRST_DAY..ROBOT_FIRST_DAY + robot_days(rows) as u32;
    let want = format!(
        "seed {seed} robot {robot} days {}-{} rows {rows}\n",
        days.start,
        days.end - 1
    );
    let what = format!("{rows} nominal rows of robot {robot}");
    let made = ensure_set(dir, &want, &what, quiet, || {
        plumb_scenario::write_robot_logs(dir, seed, robot, days.clone(), rows)
    })?;
    let paths = match made {
        Some(paths) => paths,
        None => days
            .clone()
            .map(|d| dir.join(format!("robot{robot}_day{d}.csv")))
            .collect(),
    };
    Ok(days.zip(paths).collect())
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
    // The sets read for the fit are not needed again (their memory is the
    // per-robot step's).
    drop(calib);
    drop(train);
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
    let mut warnings = outcome.report.warnings;
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
    let mut scenarios: Vec<ScenarioResult> = truth
        .iter()
        .zip(&drift_reps)
        .zip(&drift_tr)
        .map(|((t, rep), tr)| scenario_row(t, rep, tr, baseline, target))
        .collect();

    // 5. Tailor to each robot a drift log comes from.
    let mut robots = Vec::new();
    // Slow charts extend the SPE's residual chart: with that off (a
    // calibration set of one log) there is nothing to tailor.
    let resid_on = file.model.resid_gain.iter().any(|g| *g > 0.0);
    if args.robot_rows > 0 && !resid_on {
        let w = "the per-robot step is skipped: the fleet model's residual chart is off \
                 (the calibration set is one log; --nominal-rows above 125000 gives it \
                 several)"
            .to_string();
        if !args.output.quiet {
            eprintln!("demo: warning: {w}");
        }
        warnings.push(w);
    }
    if args.robot_rows > 0 && resid_on {
        let mut ids: Vec<u32> = truth
            .iter()
            .filter(|t| t.kind == TruthKind::Drift)
            .filter_map(|t| plumb_scenario::drift_robot(&t.scenario))
            .collect();
        ids.sort_unstable();
        ids.dedup();
        // Each robot's logs are generated first (one at a time: the disk),
        // then the robots are tailored and replayed side by side (each its
        // own thread; the results do not depend on the order).
        let mut sets = Vec::new();
        for &robot in &ids {
            let dir = gen.join(format!("robot{robot}"));
            sets.push(ensure_robot(&dir, robot, args.robot_rows, quiet)?);
        }
        let found: Vec<Result<RobotStep>> = std::thread::scope(|scope| {
            let workers: Vec<_> = ids
                .iter()
                .zip(sets)
                .map(|(&robot, days)| {
                    let (file, args, truth, read) = (&file, &args, &truth, &replay_read);
                    scope.spawn(move || {
                        tailor_robot(file, robot, days, args, truth, read, baseline, quiet)
                    })
                })
                .collect();
            workers
                .into_iter()
                .map(|w| w.join().expect("per-robot thread"))
                .collect()
        });
        for step in found {
            let (robot, tailored) = step?;
            for (i, t) in tailored {
                scenarios[i].tailored = Some(t);
            }
            robots.push(robot);
        }
    }

    // 6. Report: the drift logs and the committed held-out logs, with the
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
        robot_rows: args.robot_rows,
        robots,
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

/// What step 5 found for one robot: its result, and its scenarios' (by
/// index in truth.csv) through its model.
type RobotStep = (RobotResult, Vec<(usize, TailoredResult)>);

/// Step 5 for one robot, given its own logs `days` (day, path) in day order:
/// its tailored model (written to `--out`), its other days and its
/// scenarios' logs through that model.
#[allow(clippy::too_many_arguments)]
fn tailor_robot(
    fleet: &plumb_model::file::ModelFile,
    robot: u32,
    days: Vec<(u32, PathBuf)>,
    args: &DemoArgs,
    truth: &[Truth],
    replay_read: &ReadOptions,
    baseline: f32,
    quiet: bool,
) -> Result<RobotStep> {
    // Every other day tailors; the days between count false alarms.
    let (tailor_set, count_set): (Vec<_>, Vec<_>) =
        days.into_iter().enumerate().partition(|(i, _)| i % 2 == 0);
    let (tailor_days, tailor_paths): (Vec<u32>, Vec<PathBuf>) =
        tailor_set.into_iter().map(|(_, dp)| dp).unzip();
    let (count_days, count_paths): (Vec<u32>, Vec<PathBuf>) =
        count_set.into_iter().map(|(_, dp)| dp).unzip();
    say(
        quiet,
        &format!(
            "tailoring the model to robot {robot} on {} of its own logs",
            tailor_paths.len()
        ),
    );
    let mut file = fleet.clone();
    let read = ReadOptions {
        bad_cells: BadCells::SkipRow,
        ..ReadOptions::default()
    };
    // No bars: the robots run side by side (their steps are said instead).
    let tailoring = crate::tailor::tailor(
        &mut file,
        &tailor_paths,
        read,
        &TailorConfig::default(),
        &crate::progress::Stage::hidden(),
    )?;
    file.model.meta.id = fit::model_id(&file)?;
    let model = args.out.join(format!("robot{robot}.plumb"));
    let bytes = file
        .to_bytes()
        .map_err(|e| Error::input(format!("the tailored model does not encode: {e}")))?;
    fit::write_atomic(&model, &bytes)?;
    say(
        quiet,
        &format!(
            "replaying robot {robot}'s other {} logs and its drift logs through {}",
            count_paths.len(),
            model.display()
        ),
    );
    let (reps, traces) = replay_traced(&file, &count_paths, replay_read, false)?;
    let over = |v: &[f32]| v.iter().filter(|s| **s > baseline).count() as u64;
    let nominal = nominal_row(
        &format!("robot {robot}, other days (tailored)"),
        &reps,
        &traces,
        &over,
    );
    let slow_flags = reps
        .iter()
        .flat_map(|r| &r.flags)
        .filter(|f| f.crossed.iter().any(|c| c.statistic == "slow"))
        .count();
    let mine: Vec<usize> = truth
        .iter()
        .enumerate()
        .filter(|(_, t)| plumb_scenario::drift_robot(&t.scenario) == Some(robot))
        .map(|(i, _)| i)
        .collect();
    let paths: Vec<PathBuf> = mine.iter().map(|&i| truth[i].file.clone()).collect();
    let (drift_reps, _) = replay_traced(&file, &paths, replay_read, false)?;
    let tailored = mine
        .iter()
        .zip(&drift_reps)
        .map(|(&i, rep)| (i, tailored_row(&truth[i], rep, &model)))
        .collect();
    say(quiet, &format!("robot {robot} done"));
    let result = RobotResult {
        robot,
        model: model.clone(),
        scenarios: mine.iter().map(|&i| truth[i].scenario.clone()).collect(),
        tailor_days,
        count_days,
        tailoring,
        nominal,
        slow_flags,
    };
    Ok((result, tailored))
}

/// A scenario's log through a tailored model.
fn tailored_row(t: &Truth, rep: &LogReplay, model: &Path) -> TailoredResult {
    TailoredResult {
        model: model.to_path_buf(),
        flag: FirstFlag::of(t, rep).0,
    }
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
    let (flag, first) = FirstFlag::of(t, rep);
    let top: Vec<String> = first
        .map(|f| f.top_features.iter().map(|c| c.name.clone()).collect())
        .unwrap_or_default();
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
    let score = flag
        .drivers
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
        flag,
        top_features: top,
        top_in_truth,
        changed_features: t.features.clone(),
        baseline_delay,
        baseline_false_alarms,
        shift,
        lorden_bound,
        robot: plumb_scenario::drift_robot(&t.scenario),
        tailored: None,
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
        let delay = match (c.flag.delay, c.flag.delay_s) {
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
            opt(c.flag.first_flag),
            delay,
            c.flag.false_alarms,
            c.flag.faults,
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
        .filter(|c| !c.flag.crossed.is_empty())
        .map(|c| {
            let charts: Vec<String> = c.flag.crossed.iter().map(ToString::to_string).collect();
            format!("  {:<15} {}\n", c.scenario, charts.join(", "))
        })
        .collect();
    if !raised.is_empty() {
        s.push_str("\nCharts over their limits at each first flag\n");
        s.push_str(&raised.concat());
    }
    if !r.robots.is_empty() {
        s.push_str(&robots_text(r));
    }
    s.push_str(&format!("\nmodel: {}\n", r.model.display()));
    for m in &r.robots {
        s.push_str(&format!(
            "model of robot {}: {}\n",
            m.robot,
            m.model.display()
        ));
    }
    if let Some(p) = &r.report {
        s.push_str(&format!("report: {}\n", p.display()));
    }
    s
}

/// The per-robot part of the human summary.
fn robots_text(r: &DemoResult) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "\nPer robot: the model tailored on the robot's own nominal logs ({} rows, every other day; the rest counts false alarms)\n",
        r.robot_rows
    ));
    s.push_str(&format!(
        "  {:<5} {:>12} {:>5} {:>6} {:>6} {:>10} {:>6} {:>8} {:>5}  {}\n",
        "robot",
        "tailor rows",
        "logs",
        "slow",
        "limit",
        "samples",
        "flags",
        "per 1e5",
        "slow",
        "slow charts (feature λ)"
    ));
    for m in &r.robots {
        let t = &m.tailoring;
        let charts: Vec<String> = t
            .charts
            .iter()
            .map(|c| format!("{} {}", c.name, c.lambda))
            .collect();
        s.push_str(&format!(
            "  {:<5} {:>12} {:>5} {:>6} {:>6.3} {:>10} {:>6} {:>8.3} {:>5}  {}\n",
            m.robot,
            t.rows,
            t.logs,
            t.charts.len(),
            t.limit,
            m.nominal.samples,
            m.nominal.flags,
            m.nominal.per_1e5,
            m.slow_flags,
            if charts.is_empty() {
                "-".to_string()
            } else {
                charts.join(", ")
            }
        ));
    }
    s.push_str(
        "\nScenarios on the model each robot runs (delay in samples; - = not flagged; false = flags before the onset)\n",
    );
    s.push_str(&format!(
        "  {:<15} {:>5} {:>6} {:>10} {:>7} {:>10} {:>7} {:>6} {:>9}  {}\n",
        "scenario",
        "robot",
        "onset",
        "fleet flag",
        "delay",
        "tailored",
        "delay",
        "false",
        "baseline",
        "charts over their limits at the tailored model's flag"
    ));
    for c in &r.scenarios {
        let Some(t) = &c.tailored else { continue };
        let charts: Vec<String> = t.flag.crossed.iter().map(ToString::to_string).collect();
        s.push_str(&format!(
            "  {:<15} {:>5} {:>6} {:>10} {:>7} {:>10} {:>7} {:>6} {:>9}  {}\n",
            c.scenario,
            opt(c.robot),
            c.onset,
            opt(c.flag.first_flag),
            opt(c.flag.delay),
            opt(t.flag.first_flag),
            opt(t.flag.delay),
            t.flag.false_alarms,
            opt(c.baseline_delay),
            if charts.is_empty() {
                "-".to_string()
            } else {
                charts.join(", ")
            }
        ));
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

    #[test]
    fn robot_rows_are_zero_or_enough_for_two_days_each_way() {
        assert_eq!(parse_robot_rows("0"), Ok(0));
        assert_eq!(parse_robot_rows("4000"), Ok(4000));
        assert!(parse_robot_rows("3999")
            .unwrap_err()
            .contains("at least 4000"));
        assert!(parse_robot_rows("x").is_err());
        // An even number of days, at least four, about 31 250 rows each.
        assert_eq!(robot_days(4000), 4);
        assert_eq!(robot_days(DEFAULT_ROBOT_ROWS), 64);
        assert_eq!(robot_days(DEFAULT_ROBOT_ROWS + 1), 66);
        assert_eq!(robot_days(usize::MAX), MAX_ROBOT_LOGS);
    }

    fn crossing(statistic: &'static str, feature: &str) -> ChartCrossing {
        ChartCrossing {
            score: "spe",
            statistic,
            feature: Some(feature.to_string()),
            index: Some(0),
            value: 1.5,
            limit: 1.25,
        }
    }

    fn result(robots: bool) -> DemoResult {
        let tailored = TailoredResult {
            model: "out/robot2.plumb".into(),
            flag: FirstFlag {
                first_flag: Some(3090),
                delay: Some(90),
                delay_s: Some(9.0),
                false_alarms: 0,
                faults: 0,
                drivers: vec!["spe"],
                crossed: vec![crossing("slow", "motor_current_left")],
            },
        };
        let scenario = ScenarioResult {
            scenario: "gain_change".into(),
            kind: "drift",
            file: "drift/gain_change.csv".into(),
            onset: 3000,
            flag: FirstFlag {
                first_flag: None,
                delay: None,
                delay_s: None,
                false_alarms: 0,
                faults: 0,
                drivers: Vec::new(),
                crossed: Vec::new(),
            },
            top_features: Vec::new(),
            top_in_truth: 0,
            changed_features: vec!["motor_current_left".into()],
            baseline_delay: None,
            baseline_false_alarms: 0,
            shift: None,
            lorden_bound: None,
            robot: Some(2),
            tailored: robots.then_some(tailored),
        };
        let robot = RobotResult {
            robot: 2,
            model: "out/robot2.plumb".into(),
            scenarios: vec!["gain_change".into()],
            tailor_days: vec![2000, 2002],
            count_days: vec![2001, 2003],
            tailoring: TailorReport {
                logs: 2,
                rows: 20_000,
                charts: Vec::new(),
                left_out: Vec::new(),
                limit: 1.25,
                alarms: 0,
                allowed: 0,
                budget: 0.02,
                at_floor: false,
                warnings: Vec::new(),
            },
            nominal: NominalResult {
                name: "robot 2, other days (tailored)".into(),
                samples: 20_000,
                flags: 1,
                per_1e5: 5.0,
                baseline_flags: 0,
            },
            slow_flags: 1,
        };
        DemoResult {
            model: "out/tugger.plumb".into(),
            report: None,
            target_rate: 1e-5,
            baseline_spe_limit: 40.0,
            nominal: Vec::new(),
            scenarios: vec![scenario],
            warnings: Vec::new(),
            robot_rows: if robots { 40_000 } else { 0 },
            robots: if robots { vec![robot] } else { Vec::new() },
        }
    }

    #[test]
    fn the_summary_shows_each_robots_model_beside_the_fleets() {
        let s = text(&result(true));
        assert!(s.contains("Per robot: the model tailored"), "{s}");
        assert!(s.contains("model of robot 2: out/robot2.plumb"), "{s}");
        // The scenario's row: robot, onset, fleet flag and delay (none),
        // tailored flag and delay, flags before the onset, baseline (none),
        // the chart that raised it.
        let row = s
            .lines()
            .rfind(|l| l.trim_start().starts_with("gain_change"))
            .unwrap();
        let cells: Vec<&str> = row.split_whitespace().collect();
        assert_eq!(
            cells,
            [
                "gain_change",
                "2",
                "3000",
                "-",
                "-",
                "3090",
                "90",
                "0",
                "-",
                "spe/slow(motor_current_left):1.5>1.25"
            ],
            "{row}"
        );
        // The robot's row: its false alarms per 10⁵ on its other days.
        let row = s
            .lines()
            .find(|l| l.trim_start().starts_with("2 "))
            .unwrap();
        let cells: Vec<&str> = row.split_whitespace().collect();
        assert_eq!(
            cells,
            ["2", "20000", "2", "0", "1.250", "20000", "1", "5.000", "1", "-"],
            "{row}"
        );
        let off = text(&result(false));
        assert!(!off.contains("Per robot"), "{off}");
        assert!(!off.contains("model of robot"), "{off}");
    }
}
