//! `plumb replay`: run logs through the firmware detector on the host.

use crate::cli::{LogArgs, OutputArgs};
use crate::cmd::inspect::read_model;
use crate::error::{Error, Result, EXIT_CLEAN, EXIT_DRIFT};
use crate::logs::{expand_paths, BadCells};
use crate::progress::Progress;
use crate::replay::{self, event_name, fault_name, state_name, LogReplay, Step};
use clap::Args;
use plumb_firmware::Score;
use std::io::Write;
use std::path::PathBuf;

/// Long help of `plumb replay`.
pub const LONG_ABOUT: &str = "\
Run logs through the very same detector the boards run (the firmware crate, built for
the host), sample by sample, and report every drift flag: when it rose and cleared
(0-based sample index and log time), which scores drove it, and the features with the
largest residual share. Each log starts from a fresh detector, warm-up included.
Empty or NaN cells are passed to the detector, which counts them as sensor faults.

--trace writes one CSV row per sample: scores, EWMA and CUSUM of each score, state,
event and fault, for plotting or for comparing with a board bit for bit.

Exit code 1 when any flag was raised, 0 when none, 2 on bad input.";

/// Arguments of `plumb replay`.
#[derive(Debug, Clone, Args)]
pub struct ReplayArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Logs (CSV files, or directories of *.csv)
    #[arg(value_name = "LOG", required = true)]
    pub logs: Vec<PathBuf>,

    /// Write per-sample scores, statistics and states to this CSV
    #[arg(long, value_name = "FILE")]
    pub trace: Option<PathBuf>,

    #[command(flatten)]
    pub read: LogArgs,

    #[command(flatten)]
    pub output: OutputArgs,
}

/// Writes the trace header.
fn trace_header(w: &mut impl Write) -> std::io::Result<()> {
    writeln!(
        w,
        "log,sample,t,spe,t2,nll,ewma_spe,ewma_t2,ewma_nll,cusum_spe,cusum_t2,cusum_nll,state,event,fault"
    )
}

fn trace_row(w: &mut impl Write, s: &Step<'_>) -> std::io::Result<()> {
    let o = s.outcome;
    write!(w, "{},{},", s.log, o.index)?;
    if let Some(t) = s.t {
        write!(w, "{t}")?;
    }
    match o.scores {
        Some(v) => write!(w, ",{},{},{}", v.spe, v.t2, v.nll)?,
        None => write!(w, ",,,")?,
    }
    for stat in 0..2 {
        for sc in Score::ALL {
            let tr = s.detector.track(sc);
            let v = if stat == 0 {
                tr.ewma.value()
            } else {
                tr.cusum.value()
            };
            write!(w, ",{v}")?;
        }
    }
    writeln!(
        w,
        ",{},{},{}",
        state_name(o.state),
        event_name(o.event),
        fault_name(o.fault)
    )
}

fn fmt_at(idx: u64, t: Option<f64>) -> String {
    match t {
        Some(t) => format!("{idx} ({t:.1} s)"),
        None => idx.to_string(),
    }
}

/// The human table.
pub fn text(reps: &[LogReplay]) -> String {
    let mut s = String::new();
    let width = reps
        .iter()
        .map(|r| r.path.display().to_string().len())
        .max()
        .unwrap_or(3)
        .max(3);
    s.push_str(&format!(
        "{:<width$}  {:>9}  {:>7}  {:>5}\n",
        "log", "samples", "faults", "flags"
    ));
    for r in reps {
        s.push_str(&format!(
            "{:<width$}  {:>9}  {:>7}  {:>5}\n",
            r.path.display(),
            r.samples,
            r.faults,
            r.flags.len()
        ));
        for (i, f) in r.flags.iter().enumerate() {
            let cleared = match f.cleared_at {
                Some(c) => fmt_at(c, f.cleared_t),
                None => "still raised".to_string(),
            };
            let top: Vec<String> = f
                .top_features
                .iter()
                .map(|c| format!("{} {:.3}", c.name, c.value))
                .collect();
            s.push_str(&format!(
                "  flag {}: raised at {} by {}; cleared {}; top residuals: {}\n",
                i + 1,
                fmt_at(f.raised_at, f.raised_t),
                f.scores.join("+"),
                cleared,
                top.join(", ")
            ));
        }
    }
    let flagged = reps.iter().filter(|r| !r.flags.is_empty()).count();
    s.push_str(&format!(
        "{} of {} logs raised a drift flag\n",
        flagged,
        reps.len()
    ));
    s
}

/// Runs `plumb replay`.
pub fn run(args: ReplayArgs) -> Result<u8> {
    let file = read_model(&args.model)?;
    let paths = expand_paths(&args.logs)?;
    let opts = args.read.options(BadCells::PassAsNan)?;
    let progress = Progress::stderr(args.output.quiet || args.output.json);
    let total: u64 = paths
        .iter()
        .map(|p| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))
        .sum();
    let stage = progress.stage("replay", total, true);
    let mut trace = match &args.trace {
        Some(p) => {
            let f = std::fs::File::create(p).map_err(|e| Error::io(p, "create", &e))?;
            let mut w = std::io::BufWriter::new(f);
            trace_header(&mut w).map_err(|e| Error::io(p, "write", &e))?;
            Some((p.clone(), w))
        }
        None => None,
    };
    let reps = replay::replay(&file, &paths, opts, &stage, |step| {
        if let Some((p, w)) = trace.as_mut() {
            trace_row(w, &step).map_err(|e| Error::io(p, "write", &e))?;
        }
        Ok(())
    })?;
    if let Some((p, mut w)) = trace {
        w.flush().map_err(|e| Error::io(&p, "write", &e))?;
    }
    if args.output.json {
        println!("{}", serde_json::json!({ "logs": reps }));
    } else if !args.output.quiet {
        print!("{}", text(&reps));
    }
    Ok(if reps.iter().any(|r| !r.flags.is_empty()) {
        EXIT_DRIFT
    } else {
        EXIT_CLEAN
    })
}
