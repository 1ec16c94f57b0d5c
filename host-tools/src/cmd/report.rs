//! `plumb report`: replay logs and write one self-contained HTML report.

use crate::cli::{LogArgs, OutputArgs};
use crate::cmd::inspect::read_model;
use crate::error::{Result, EXIT_CLEAN, EXIT_DRIFT};
use crate::files::{self, Input, Output};
use crate::logs::{expand_paths, BadCells};
use crate::progress::Progress;
use crate::report::{read_truth, write_report};
use clap::Args;
use std::path::PathBuf;

/// Long help of `plumb report`.
pub const LONG_ABOUT: &str = "\
Run logs through the firmware detector (as `plumb replay` does) and write one HTML file
that opens in any browser, offline: no scripts, nothing fetched, all drawings inline SVG.

For each log, a timeline per score (SPE, T², mixture NLL) on the detector's own scale
u = (cube root of the score − centre)/spread, with the raw score on the right axis: the
per-sample values (lightly), the detector's EWMA of u, its CUSUM, the per-sample limit and
the chart limits, flags shaded from raise to clear, faulted samples marked and, with
--truth, the known onset. Below them, the SPE's residual chart (model format 3): the
largest |EWMA| of a feature's scaled residual, its limit and the same flags and marks; a
model whose chart is off (every gain 0) gets a one-line note instead. Long logs are
reduced to one column per pixel keeping each column's minimum and maximum, so spikes stay
visible and each log adds about 170 kB to the file whatever its length (a million
samples included).

For each flag, the features behind it: the mean squared residual r² of every feature over
the first 50 scored samples from the raise, with the training mean beside it (--train);
its caption lists the score charts that were over their limits as it rose (as `plumb
replay` and the board's drift raised message list them), and a flag raised while the
residual chart was over its limit also names the chart and the feature of its largest EWMA. Then the latent plane (t1, t2) of training rows (--train)
and field rows, coloured by the detector's state, with each mixture component's 1σ and
2σ ellipse; the explained variance per component; and tables of flags and faults.

--truth reads a CSV with the header `scenario,file,onset_row,onset_t_s,kind,features`
(file relative to the truth file; onset_row 0-based, header not counted; kind `drift` or
`fault`; features `;`-separated), as demo-logs/truth.csv. A row applies to a log with the
same path, or else the only row with the same file name.

Empty or NaN cells reach the detector as sensor faults, as in `plumb replay`; with
--skip-bad-rows such rows are left out and counted.

The report is written atomically. Exit code 1 when any flag was raised, 0 when none,
2 on bad input, and 2 (no report written) when the logs gave no sample at all.";

/// Arguments of `plumb report`.
#[derive(Debug, Clone, Args)]
pub struct ReportArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Logs to replay and draw (CSV files, .npy arrays, or folders of them)
    #[arg(value_name = "LOG", required = true)]
    pub logs: Vec<PathBuf>,

    /// Where to write the report (HTML)
    #[arg(long, short, value_name = "FILE")]
    pub out: PathBuf,

    /// Nominal logs for the latent plane and the contribution reference (files or folders)
    #[arg(long, value_name = "LOG", num_args = 1..)]
    pub train: Vec<PathBuf>,

    /// Ground truth: onset row and kind per log (CSV, see the long help)
    #[arg(long, value_name = "FILE")]
    pub truth: Option<PathBuf>,

    #[command(flatten)]
    pub read: LogArgs,

    #[command(flatten)]
    pub output: OutputArgs,
}

/// Runs `plumb report`.
pub fn run(args: ReportArgs) -> Result<u8> {
    let logs = expand_paths(&args.logs)?;
    let train = if args.train.is_empty() {
        Vec::new()
    } else {
        expand_paths(&args.train)?
    };
    let mut inputs = crate::cmd::replay::inputs(&args.model, &logs, &args.read);
    inputs.extend(train.iter().map(|p| Input {
        what: "training log",
        path: p,
    }));
    inputs.extend(args.truth.as_deref().map(|p| Input {
        what: "truth",
        path: p,
    }));
    files::check_outputs(
        &[Output {
            option: "--out",
            path: &args.out,
        }],
        &inputs,
    )?;
    let file = read_model(&args.model)?;
    crate::replay::check_model(&file, &args.model)?;
    let truth = match &args.truth {
        Some(p) => read_truth(p)?,
        None => Vec::new(),
    };
    let opts = args.read.options(BadCells::PassAsNan)?;
    let progress = Progress::stderr(args.output.quiet || args.output.json);
    let reps = write_report(
        &args.model,
        &file,
        &args.logs,
        &args.train,
        &truth,
        opts,
        &args.out,
        &progress,
    )?;
    let bytes = std::fs::metadata(&args.out).map(|m| m.len()).unwrap_or(0);
    if args.output.json {
        crate::outln!(
            "{}",
            serde_json::json!({ "report": args.out, "bytes": bytes, "logs": reps })
        );
    } else if !args.output.quiet {
        crate::out!("{}", crate::cmd::replay::text(&reps));
        crate::outln!(
            "report written to {} ({:.0} kB)",
            args.out.display(),
            bytes as f64 / 1e3
        );
    }
    Ok(if reps.iter().any(|r| !r.flags.is_empty()) {
        EXIT_DRIFT
    } else {
        EXIT_CLEAN
    })
}
