//! `plumb tailor`: add slow charts to a model from one robot's own logs.

use crate::cli::{LogArgs, OutputArgs};
use crate::cmd::inspect::read_model;
use crate::error::{Error, Result, EXIT_CLEAN};
use crate::files::{self, Output};
use crate::logs::{self, BadCells};
use crate::progress::Progress;
use crate::tailor::{self, TailorConfig, CANDIDATES};
use clap::Args;
use std::path::PathBuf;

/// Long help of `plumb tailor`.
pub const LONG_ABOUT: &str = "\
Add slow charts to a model, set on one robot's own nominal logs (model format 5).

A fleet model's limits must tolerate how every robot's residual levels differ; one robot's
own levels sit in a narrower band. For each feature, tailor tries a slower EWMA of the
residual chart's input (constants 0.1 0.05 0.02 0.01 0.005 0.002), scaled to the robot's
own nominal tail by the residual chart's rules, and keeps it where its design delay for a
shift of --design-shift spreads is shorter than at the model's own constant (up to 16
features). One limit for all of them is set on the robot's rows for --false-alarm-rate
(the same budget rule as `plumb fit`). Everything else in the model is kept.

The constant each feature takes is the one whose EWMA crosses soonest for that shift against
a limit equal to the model's residual chart limit; rows the model faults (bad cells, out of
range) are left out, as in calibration. The logs must be the robot's own, nominal, and long:
on the demo, 10^6 rows of a robot (32 days) held the false-alarm rate on its other days and
500,000 did not; with fewer rows than that the budget is under one false alarm and tailor
warns (BENCHMARKS.md, Detection, attempt 15). The output is written atomically.";

/// Arguments of `plumb tailor`.
#[derive(Debug, Args)]
pub struct TailorArgs {
    /// The model to tailor (a fleet model from `plumb fit`)
    pub model: PathBuf,

    /// The robot's own nominal logs (files or folders)
    #[arg(required = true)]
    pub logs: Vec<PathBuf>,

    /// Where to write the tailored model
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,

    /// Target false alarms per sample of the slow charts' budget
    #[arg(long, value_name = "RATE", default_value_t = 1e-5)]
    pub false_alarm_rate: f64,

    /// Shift, in spreads of the chart input, that the constants are chosen for
    #[arg(long, value_name = "SPREADS", default_value_t = 1.0)]
    pub design_shift: f64,

    #[command(flatten)]
    pub read: LogArgs,

    #[command(flatten)]
    pub output: OutputArgs,
}

/// Runs `plumb tailor`.
pub fn run(args: TailorArgs) -> Result<u8> {
    let paths = logs::expand_paths(&args.logs)?;
    // The model, the logs and the units sidecar, as replay lists them.
    let inputs = crate::cmd::replay::inputs(&args.model, &paths, &args.read);
    files::check_outputs(
        &[Output {
            option: "--out",
            path: &args.out,
        }],
        &inputs,
    )?;
    let mut file = read_model(&args.model)?;
    let cfg = TailorConfig {
        rate: args.false_alarm_rate,
        shift: args.design_shift,
    };
    let progress = Progress::stderr(args.output.quiet);
    let stage = progress.stage("score", 0, true);
    let report = tailor::tailor(
        &mut file,
        &paths,
        args.read.options(BadCells::PassAsNan)?,
        &cfg,
        &stage,
    )?;
    drop(stage);
    for w in &report.warnings {
        eprintln!("tailor: warning: {w}");
    }
    file.model.meta.id = crate::fit::model_id(&file)?;
    let bytes = file
        .to_bytes()
        .map_err(|e| Error::input(format!("the tailored model does not encode: {e}")))?;
    crate::fit::write_atomic(&args.out, &bytes)?;
    if args.output.json {
        crate::outln!(
            "{}",
            serde_json::to_string_pretty(&report).map_err(|e| Error::input(e.to_string()))?
        );
    } else if !args.output.quiet {
        crate::outln!(
            "{} rows of {} logs; candidates {:?}",
            report.rows,
            report.logs,
            CANDIDATES
        );
        crate::outln!("| feature | λ | centre | spread | scale | design delay (base) |");
        for c in &report.charts {
            crate::outln!(
                "| {} | {} | {:.4} | {:.4} | {:.3} | {:.0} ({}) |",
                c.name,
                c.lambda,
                c.center,
                c.spread,
                c.tail,
                c.design_delay,
                c.base_design_delay
                    .map_or("never".to_string(), |n| format!("{n:.0}"))
            );
        }
        if !report.left_out.is_empty() {
            crate::outln!("left out (over 16): {}", report.left_out.join(", "));
        }
        crate::outln!(
            "slow limit {} ({} alarms on these rows, {} allowed, budget {:.2}{})",
            report.limit,
            report.alarms,
            report.allowed,
            report.budget,
            if report.at_floor {
                ", at the floor"
            } else {
                ""
            }
        );
        crate::outln!("wrote {} ({} bytes)", args.out.display(), bytes.len());
    }
    Ok(EXIT_CLEAN)
}
