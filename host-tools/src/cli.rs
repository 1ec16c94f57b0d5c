//! The command line: a top-level [`Cli`] with one variant per subcommand,
//! and [`run`], which dispatches. A subcommand lives in `cmd/<name>.rs` with
//! an `Args` struct (clap derive) and a `run(args) -> Result<u8>`; adding one
//! is a new file, a variant here and a match arm in [`run`].

use crate::cmd;
use crate::error::{Error, Result};
use crate::logs::{self, BadCells, ReadOptions};
use clap::{Args, Parser, Subcommand};
use std::path::PathBuf;

const ABOUT: &str =
    "Know on the robot when sensor data stops resembling the data it was validated on";

const LONG_ABOUT: &str = "\
plumbline watches vectors of sensor features on a robot and says when they drift away
from the data the robot was validated on.

On the host, `plumb fit` reads logs of nominal operation (CSV, or NumPy `.npy` arrays),
standardises the features, fits a PCA and a small diagonal Gaussian mixture on the latent
scores, and calibrates alarm limits on held-out rows for a stated false-alarm rate. It
writes a model file (.plumb) that the no_std firmware loads. On the device, every sample
gets three scores: SPE (Q, the residual off the PCA plane), Hotelling T² (distance within
it) and the mixture negative log-likelihood. Each score has a per-sample limit and feeds
an EWMA and a CUSUM chart; a state machine with warm-up, dwell and hold times raises and
clears a drift flag.

Logs: a header row of feature names, `name[unit]` or bare `name`; a time column
(default `t`, as in `t[s]`); one row per sample; NaN or empty cells for dropouts. An
`.npy` array log takes its names from a `.header` file beside it (2-D arrays) or from its
fields (structured arrays).

Exit codes: 0 clean, 1 drift found (subcommands that look for drift),
2 bad input or usage.";

/// The safety statement every `--help` ends with.
pub const SAFETY: &str = "\
SAFETY: plumbline is an advisory monitor, not a safety function. It was not developed
to any functional-safety standard and must not stop, start or limit a machine on its
own. Its flags inform people and maintenance systems. Always defer to the machine's own
safety system, local codes and licensed practice.";

/// The `plumb` command line.
#[derive(Debug, Parser)]
#[command(
    name = "plumb",
    version,
    about = ABOUT,
    long_about = LONG_ABOUT,
    after_help = SAFETY,
    after_long_help = SAFETY,
    propagate_version = true
)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The subcommands.
#[derive(Debug, Subcommand)]
#[allow(clippy::large_enum_variant)] // parsed once per process
pub enum Command {
    /// Run the whole loop on the bundled demo scenario: fit, replay every scenario, report.
    #[command(long_about = cmd::demo::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Demo(cmd::demo::DemoArgs),
    /// Fit a model from nominal logs and calibrate its alarm limits.
    #[command(long_about = cmd::fit::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Fit(cmd::fit::FitArgs),
    /// Stream a log to a board as samples and print what it says.
    #[command(long_about = cmd::feed::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Feed(cmd::feed::FeedArgs),
    /// Write a flashable image of a board's model slot (Intel HEX or binary).
    #[command(long_about = cmd::image::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Image(cmd::image::ImageArgs),
    /// Show what a model file holds.
    #[command(long_about = cmd::inspect::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Inspect(cmd::inspect::InspectArgs),
    /// Make an ed25519 key pair for signing model files.
    #[command(long_about = cmd::keygen::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Keygen(cmd::keygen::KeygenArgs),
    /// Listen to a board: greeting, drift raised and cleared, faults, status, link health.
    #[command(long_about = cmd::listen::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Listen(cmd::listen::ListenArgs),
    /// Upload a model file to a board over the link (it switches only if every check passes).
    #[command(long_about = cmd::upload::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Upload(cmd::upload::UploadArgs),
    /// Sign a model file with a secret key (boards built to trust the key run only signed models).
    #[command(long_about = cmd::sign::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Sign(cmd::sign::SignArgs),
    /// Run logs through the firmware detector on the host and report drift flags.
    #[command(long_about = cmd::replay::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Replay(cmd::replay::ReplayArgs),
    /// Add slow charts to a model, set on one robot's own nominal logs.
    #[command(long_about = cmd::tailor::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Tailor(cmd::tailor::TailorArgs),
    /// Replay logs and write one self-contained HTML report with plots.
    #[command(long_about = cmd::report::LONG_ABOUT, after_help = SAFETY, after_long_help = SAFETY)]
    Report(cmd::report::ReportArgs),
}

/// Runs a parsed command line; returns the process exit code.
pub fn run(cli: Cli) -> Result<u8> {
    match cli.command {
        Command::Demo(args) => cmd::demo::run(args),
        Command::Fit(args) => cmd::fit::run(args),
        Command::Feed(args) => cmd::feed::run(args),
        Command::Image(args) => cmd::image::run(args),
        Command::Inspect(args) => cmd::inspect::run(args),
        Command::Keygen(args) => cmd::keygen::run(args),
        Command::Listen(args) => cmd::listen::run(args),
        Command::Upload(args) => cmd::upload::run(args),
        Command::Sign(args) => cmd::sign::run(args),
        Command::Replay(args) => cmd::replay::run(args),
        Command::Tailor(args) => cmd::tailor::run(args),
        Command::Report(args) => cmd::report::run(args),
    }
}

/// How to read logs; shared by every subcommand that reads them.
#[derive(Debug, Clone, Args)]
pub struct LogArgs {
    /// Units sidecar: a CSV of `name,unit` rows; its units win over the header's
    #[arg(long, value_name = "FILE")]
    pub units: Option<PathBuf>,

    /// Name of the time column (not a feature), or `none` when the logs have none
    #[arg(long, value_name = "NAME", default_value = "t")]
    pub time_column: String,

    /// Skip rows with empty, NaN or infinite cells and count them, instead of stopping (fit) or
    /// passing them on as sensor faults (replay, report, feed)
    #[arg(long)]
    pub skip_bad_rows: bool,

    /// Worker threads for parsing and EM (1 or 2); results do not depend on it
    #[arg(long, value_name = "N", default_value_t = 2, value_parser = clap::value_parser!(u8).range(1..=2))]
    pub threads: u8,
}

impl LogArgs {
    /// Reading options; `bad_default` applies when `--skip-bad-rows` is off.
    pub fn options(&self, bad_default: BadCells) -> Result<ReadOptions> {
        let units = match &self.units {
            Some(p) => logs::read_units(p)?,
            None => Default::default(),
        };
        let time = self.time_column.trim();
        if time.is_empty() {
            return Err(Error::input("--time-column needs a name, or `none`"));
        }
        Ok(ReadOptions {
            time_column: (time != "none").then(|| time.to_string()),
            units,
            bad_cells: if self.skip_bad_rows {
                BadCells::SkipRow
            } else {
                bad_default
            },
            threads: usize::from(self.threads),
            ..ReadOptions::default()
        })
    }
}

/// Output format flags; shared by every subcommand that prints a summary.
#[derive(Debug, Clone, Args)]
pub struct OutputArgs {
    /// Print the summary as JSON (for scripts) instead of text
    #[arg(long)]
    pub json: bool,

    /// No progress bars and no text summary (errors still go to stderr; --json still prints)
    #[arg(short, long)]
    pub quiet: bool,
}
