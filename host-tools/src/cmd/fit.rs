//! `plumb fit`: fit a model from nominal logs and write it.

use crate::calibrate::{self, CalibConfig};
use crate::cli::{LogArgs, OutputArgs};
use crate::cmd::inspect::read_model;
use crate::error::{Error, Result, EXIT_CLEAN};
use crate::files::{self, Input, Output};
use crate::fit::{self, FitConfig, Holdout, MixtureChoice};
use crate::logs::{self, BadCells, LogSet};
use crate::pca::Keep;
use crate::progress::Progress;
use crate::summary::{ModelDiff, Summary};
use clap::Args;
use std::path::PathBuf;

/// Long help of `plumb fit`.
pub const LONG_ABOUT: &str = "\
Fit a model from logs of nominal operation and calibrate its alarm limits.

Stages: standardise each feature (mean, ddof = 0 deviation); PCA on the correlation
matrix, keeping enough components for --variance (or exactly --components); a diagonal
Gaussian mixture on the latent scores by EM (--mixture N, or auto: the lowest BIC over
1..=8); then calibration on held-out rows (by default the last 20 % of every log, or
--holdout LOG...): each row is scored once by the same detector the board runs, every
chart's limit is set on those scores for --false-alarm-rate, and the full drift state
machine is run once over the held-out logs to check the result.

Limits: per score, centre and spread are the mean and standard deviation of the
transformed held-out score. Each score has three charts: an upper CUSUM and an upper EWMA
of u, and a per-sample (Shewhart) limit on u itself, combined as in Lucas (1982); a score
is hot when any of its charts is over its limit. The false-alarm rate is split evenly
over the nine charts: each has a budget of
B = rate / 9 × n false alarms on the n held-out samples it watches, and may alarm there at
most ⌊B⌋ − 1 times (a limit that alarms a times on held-out data alarms about a + 1 times
on new data of the same length; with B < 1 it may not alarm at all, and the fit warns),
run alone as the detector runs it (from 0 in each log, no alarm in warm-up, --raise-dwell samples over
the limit, restart from 0 after an alarm). Real scores are autocorrelated, so each limit
is the smallest meeting that allowance (bisection), never below the design for
independent N(0, 1) input (in-control ARL 9 / rate, Markov-chain method of Brook & Evans
1972). The CUSUM tries every reference value k of --cusum-slack and keeps the (k, h) with
the shortest ARL at --design-shift spreads (the usual way to trade k against h; the
default shift 2 is common practice, no source). Only if the end-to-end run still raises
more flags than the target allows are the charts behind them widened, round by round
(reported). The summary reports, per chart, the limits for independent input and as
set, the held-out alarms and the delay at the design shift, the rate achieved on the
held-out logs with a 95 % Wilson score interval, and the Jackson–Mudholkar SPE limit at
α = 0.001 beside the empirical 0.999 quantile (inverted distribution function). The drift-state defaults (warm-up 50, raise
dwell 3, clear dwell 50, minimum hold 100, clear fraction 0.5, fault beyond 50 scales)
and the EM variance floor (a fraction of each latent score's variance) are common
practice, no source.

Memory: the logs stream from disk in 4 MiB blocks; the latent scores of the training
rows are held in memory, about 8·m bytes per training row (m = components kept), e.g.
4 million rows × 6 components ≈ 190 MB, plus 24 bytes per held-out row (raw scores for
their quantiles, monitored values for the limit search). Measured: 36 000 training rows
and 1 million held-out rows × 24 features, peak 46 MB.

Disk: CSV logs are parsed once. The training rows go to a binary spill file (8 bytes per
value, e.g. 1 million rows × 32 features ≈ 256 MB) in --spill-dir (default: the system's
temporary folder), which the projection pass reads instead of parsing again; it is removed
when the fit ends. --no-spill parses the logs twice and writes nothing; a spill folder that
cannot be written falls back to that with a warning. The model is the same bytes either way.

Refit (--base OLD.plumb): the logs must have exactly the base model's feature columns
(names, order and units; the first mismatch is refused, naming the log and the column);
the model is fitted anew with the options given here (nothing is carried over from the
base but its schema), and the summary ends with what changed: components kept and the
variance each explains, mixture size and weights, limits per score, drift-state settings,
the features whose means moved most, and the model id (in --json: `changes`, every pair
[old, new]). Compare the two on logs with `plumb replay --compare OLD NEW LOG...`.

The output is written atomically: nothing is left half-written on any error. The same
logs and options always give the same bytes (--seed fixes the EM initialisation).";

/// Parses `auto` or a positive count.
fn parse_mixture(s: &str) -> std::result::Result<MixtureChoice, String> {
    if s.eq_ignore_ascii_case("auto") {
        return Ok(MixtureChoice::Auto { max: 8 });
    }
    match s.parse::<usize>() {
        Ok(k) if k >= 1 => Ok(MixtureChoice::Fixed(k)),
        _ => Err(format!("expected `auto` or a count ≥ 1, found {s:?}")),
    }
}

/// CUSUM reference values to choose from.
#[derive(Debug, Clone, PartialEq)]
pub struct Slacks(pub Vec<f64>);

/// Parses `auto` or a comma-separated list of reference values.
fn parse_slacks(s: &str) -> std::result::Result<Slacks, String> {
    if s.eq_ignore_ascii_case("auto") {
        return Ok(Slacks(calibrate::SLACK_GRID.to_vec()));
    }
    let mut out = Vec::new();
    for part in s.split(',') {
        match part.trim().parse::<f64>() {
            Ok(k) if (0.0..=calibrate::MAX_SLACK).contains(&k) => out.push(k),
            _ => {
                return Err(format!(
                    "expected `auto` or values in [0, {}] separated by commas, found {part:?}",
                    calibrate::MAX_SLACK
                ))
            }
        }
    }
    Ok(Slacks(out))
}

/// Arguments of `plumb fit`.
#[derive(Debug, Clone, Args)]
pub struct FitArgs {
    /// Logs of nominal operation: CSV files, NumPy .npy arrays (column names in NAME.header
    /// beside a 2-D array), or folders (every *.csv and *.npy inside, sorted by name)
    #[arg(value_name = "LOG", required = true)]
    pub logs: Vec<PathBuf>,

    /// Where to write the model file (.plumb)
    #[arg(short, long, value_name = "FILE")]
    pub out: PathBuf,

    #[command(flatten)]
    pub read: LogArgs,

    /// Keep exactly N principal components
    #[arg(long, value_name = "N", help_heading = "PCA")]
    pub components: Option<usize>,

    /// Keep the fewest components explaining this fraction of the variance
    #[arg(
        long,
        value_name = "FRACTION",
        default_value_t = 0.95,
        conflicts_with = "components",
        help_heading = "PCA"
    )]
    pub variance: f64,

    /// Mixture components: a count, or `auto` for the lowest BIC over 1..=8
    #[arg(long, value_name = "N|auto", default_value = "auto", value_parser = parse_mixture, help_heading = "Mixture")]
    pub mixture: MixtureChoice,

    /// EM runs from different k-means++ starts; the best log-likelihood wins
    #[arg(long, value_name = "N", default_value_t = 4, help_heading = "Mixture")]
    pub restarts: usize,

    /// EM stops when the mean log-likelihood per row changes by less than this
    #[arg(
        long,
        value_name = "TOL",
        default_value_t = 1e-3,
        help_heading = "Mixture"
    )]
    pub tol: f64,

    /// Most EM iterations per run
    #[arg(
        long,
        value_name = "N",
        default_value_t = 100,
        help_heading = "Mixture"
    )]
    pub max_iter: usize,

    /// Seed of the EM starts (same seed, same logs: same bytes)
    #[arg(long, value_name = "N", default_value_t = FitConfig::default().seed, help_heading = "Mixture")]
    pub seed: u64,

    /// Added to every mixture variance in each EM step
    #[arg(
        long,
        value_name = "V",
        default_value_t = 1e-6,
        help_heading = "Mixture"
    )]
    pub reg_covar: f64,

    /// Variance floor, as a fraction (0 to 1) of each latent score's variance (stops collapse onto repeated points)
    #[arg(
        long,
        value_name = "FRACTION",
        default_value_t = 1e-3,
        help_heading = "Mixture"
    )]
    pub var_floor: f64,

    /// Refit: keep the schema of this model (feature names, order and units; logs that do not match it are refused) and print what changed
    #[arg(long, value_name = "OLD.plumb")]
    pub base: Option<PathBuf>,

    /// Calibrate on these logs instead of the tail of each training log
    #[arg(long, value_name = "LOG", num_args = 1.., help_heading = "Calibration")]
    pub holdout: Vec<PathBuf>,

    /// Fraction at the end of each log held out for calibration
    #[arg(
        long,
        value_name = "FRACTION",
        default_value_t = 0.2,
        conflicts_with = "holdout",
        help_heading = "Calibration"
    )]
    pub holdout_fraction: f64,

    /// Target false alarms per sample, all nine charts together
    #[arg(
        long,
        value_name = "RATE",
        default_value_t = 1e-5,
        help_heading = "Calibration"
    )]
    pub false_alarm_rate: f64,

    /// CUSUM reference values k to choose from, in spreads of the monitored value: `auto` (0.25, 0.5, 0.75, 1, 1.5, 2, 3) or a comma-separated list; one value fixes k
    #[arg(
        long,
        value_name = "K[,K...]|auto",
        default_value = "auto",
        value_parser = parse_slacks,
        help_heading = "Calibration"
    )]
    pub cusum_slack: Slacks,

    /// Shift of the monitored value, in spreads, at which CUSUM designs are compared (the shortest delay there wins)
    #[arg(
        long,
        value_name = "SPREADS",
        default_value_t = calibrate::DESIGN_SHIFT,
        help_heading = "Calibration"
    )]
    pub design_shift: f64,

    /// What the SPE's residual chart smooths: each feature's residual
    /// whitened by the residuals' nominal covariance (model format 4), or
    /// as it is
    #[arg(
        long,
        value_enum,
        value_name = "INPUT",
        default_value_t = calibrate::ResidualInput::Whitened,
        help_heading = "Calibration"
    )]
    pub residual_input: calibrate::ResidualInput,

    /// EWMA smoothing constant λ in (0, 1]
    #[arg(
        long,
        value_name = "LAMBDA",
        default_value_t = 0.1,
        help_heading = "Calibration"
    )]
    pub ewma_lambda: f64,

    /// Samples after a reset before a flag may rise
    #[arg(
        long,
        value_name = "N",
        default_value_t = 50,
        help_heading = "Drift states"
    )]
    pub warmup: u32,

    /// Consecutive samples over a limit before a flag rises
    #[arg(
        long,
        value_name = "N",
        default_value_t = 3,
        help_heading = "Drift states"
    )]
    pub raise_dwell: u16,

    /// Consecutive calm samples before a flag clears
    #[arg(
        long,
        value_name = "N",
        default_value_t = 50,
        help_heading = "Drift states"
    )]
    pub clear_dwell: u16,

    /// Fewest samples a raised flag stays raised
    #[arg(
        long,
        value_name = "N",
        default_value_t = 100,
        help_heading = "Drift states"
    )]
    pub min_hold: u32,

    /// Calm means every chart below this fraction of its limit
    #[arg(
        long,
        value_name = "FRACTION",
        default_value_t = 0.5,
        help_heading = "Drift states"
    )]
    pub clear_fraction: f64,

    /// A feature further than this many scales from its mean is a sensor fault
    #[arg(
        long,
        value_name = "Z",
        default_value_t = 50.0,
        help_heading = "Drift states"
    )]
    pub fault_z: f64,

    /// Allow a model over the device capacities (64 features, 16 components, 8 mixture
    /// components): no board loads it, and `plumb replay` and `plumb report` refuse it too (they
    /// run the boards' detector, with the boards' capacities); `plumb inspect` reads it
    #[arg(long)]
    pub no_device_check: bool,

    /// Folder for a binary copy of the training rows, read by the projection pass instead of
    /// parsing CSV logs a second time (8 bytes per value, removed at the end) [default: the
    /// system's temporary folder]
    #[arg(long, value_name = "DIR")]
    pub spill_dir: Option<PathBuf>,

    /// Parse CSV logs twice instead of keeping a binary copy of the training rows on disk
    #[arg(long, conflicts_with = "spill_dir")]
    pub no_spill: bool,

    #[command(flatten)]
    pub output: OutputArgs,
}

impl FitArgs {
    /// The fit configuration these arguments ask for.
    pub fn config(&self) -> FitConfig {
        FitConfig {
            keep: match self.components {
                Some(n) => Keep::Count(n),
                None => Keep::Variance(self.variance),
            },
            mixture: self.mixture,
            restarts: self.restarts,
            tol: self.tol,
            max_iter: self.max_iter,
            seed: self.seed,
            reg_covar: self.reg_covar,
            var_floor: self.var_floor,
            calib: CalibConfig {
                false_alarm_rate: self.false_alarm_rate,
                cusum_slacks: self.cusum_slack.0.clone(),
                design_shift: self.design_shift,
                ewma_lambda: self.ewma_lambda,
                warmup: self.warmup,
                raise_dwell: self.raise_dwell,
                clear_dwell: self.clear_dwell,
                min_hold: self.min_hold,
                clear_fraction: self.clear_fraction,
                fault_z: self.fault_z,
                threads: usize::from(self.read.threads),
                residual_input: self.residual_input,
            },
            device_check: !self.no_device_check,
            threads: usize::from(self.read.threads),
            spill: match (&self.spill_dir, self.no_spill) {
                (_, true) => None,
                (Some(dir), false) => Some(dir.clone()),
                (None, false) => Some(std::env::temp_dir()),
            },
        }
    }
}

/// Runs `plumb fit`.
pub fn run(args: FitArgs) -> Result<u8> {
    let cfg = args.config();
    if args.out.is_dir() {
        return Err(Error::input(format!(
            "--out {} is a folder; expected a file name",
            args.out.display()
        )));
    }
    // Fail before the work, not after it, when the output cannot be placed.
    if let Some(parent) = args.out.parent().filter(|p| !p.as_os_str().is_empty()) {
        if !parent.is_dir() {
            return Err(Error::input(format!(
                "--out {}: folder {} does not exist",
                args.out.display(),
                parent.display()
            )));
        }
    }
    let base = match &args.base {
        Some(p) => Some((p, read_model(p)?)),
        None => None,
    };
    let opts = args.read.options(BadCells::Reject)?;
    let paths = logs::expand_paths(&args.logs)?;
    let hpaths = if args.holdout.is_empty() {
        Vec::new()
    } else {
        logs::expand_paths(&args.holdout)?
    };
    let mut inputs: Vec<Input<'_>> = paths
        .iter()
        .map(|p| Input {
            what: "log",
            path: p,
        })
        .collect();
    inputs.extend(hpaths.iter().map(|p| Input {
        what: "held-out log",
        path: p,
    }));
    inputs.extend(args.base.as_deref().map(|p| Input {
        what: "base model",
        path: p,
    }));
    inputs.extend(args.read.units.as_deref().map(|p| Input {
        what: "units",
        path: p,
    }));
    files::check_outputs(
        &[Output {
            option: "--out",
            path: &args.out,
        }],
        &inputs,
    )?;
    let train = LogSet::open(&paths, opts.clone())?;
    if let Some((p, old)) = &base {
        fit::check_schema(&train, &old.labels, p)?;
    }
    let hold_set = if hpaths.is_empty() {
        None
    } else {
        Some(LogSet::open_for_labels(&hpaths, train.labels(), opts)?)
    };
    let holdout = match &hold_set {
        Some(set) => Holdout::Logs(set),
        None => Holdout::Tail(args.holdout_fraction),
    };
    let progress = Progress::stderr(args.output.quiet);
    let outcome = fit::fit(&train, holdout, &cfg, &progress)?;
    let bytes = outcome
        .file
        .to_bytes()
        .map_err(|e| Error::input(format!("the fitted model does not encode: {e}")))?;
    fit::write_atomic(&args.out, &bytes)?;
    let mut summary = Summary::from_file(&outcome.file)?.with_fit(outcome.report);
    if let Some((p, old)) = &base {
        let before = Summary::from_file(old)?;
        let changes = ModelDiff::between(&p.display().to_string(), &before, &summary);
        summary = summary.with_changes(changes);
    }
    if args.output.json {
        crate::outln!("{}", summary.to_json());
    } else if !args.output.quiet {
        crate::out!("{}", summary.to_text());
        crate::outln!("\nwrote {} ({} bytes)", args.out.display(), bytes.len());
    }
    Ok(EXIT_CLEAN)
}
