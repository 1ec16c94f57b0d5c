//! `plumb replay`: run logs through the firmware detector on the host.

use crate::cli::{LogArgs, OutputArgs};
use crate::cmd::inspect::read_model;
use crate::error::{Error, Result, EXIT_CLEAN, EXIT_DRIFT};
use crate::files::{self, AtomicWriter, Input, Output};
use crate::logs::{expand_paths, BadCells};
use crate::progress::Progress;
use crate::replay::{self, event_name, fault_name, state_name, Flag, LogReplay, Step};
use clap::Args;
use plumb_firmware::Score;
use serde::Serialize;
use std::io::Write;
use std::path::{Path, PathBuf};

/// Long help of `plumb replay`.
pub const LONG_ABOUT: &str = "\
Run logs through the very same detector the boards run (the firmware crate, built for
the host), sample by sample, and report every drift flag: when it rose and cleared
(0-based sample index and log time), which scores drove it and which of their charts
were over their limits (`spe/residual(vib_band6):2.08>2.05`: score, chart, value, limit,
as a board's drift raised message lists them; the SPE's residual chart names its feature),
and the features with the largest residual share. Each log starts from a fresh detector,
warm-up included. With --json: `logs`, one per log with `path`, `samples`, `faults` and
`flags` (`raised_at`, `cleared_at` (null while still raised), `scores`, `crossed`,
`values`, `top_features`).
Empty or NaN cells are passed to the detector, which counts them as sensor faults (as a
board does); --skip-bad-rows leaves such rows out instead: they never reach the detector,
are counted per log (`skipped`), and sample indices then count the rows replayed.

--trace writes one CSV row per sample: scores, EWMA and CUSUM of each score, state,
event and fault, for plotting or for comparing with a board bit for bit.

--compare OLD NEW LOG... replays every log under both models (a refit and its base, say)
and shows their flags side by side per log: raise and clear indices and the scores that
drove each, a note on what differs, and a summary line (how many logs differ, which model
flagged which, whether the new model raises earlier or later). With --json: `old`, `new`,
`logs` (both flag lists per log) and `summary`.

Exit code 1 when any flag was raised (under either model with --compare), 0 when none,
2 on bad input, and 2 when the logs gave no sample at all: nothing was checked. A log with
no sample, or with every sample a sensor fault, is warned about on standard error.";

/// Arguments of `plumb replay`.
#[derive(Debug, Clone, Args)]
pub struct ReplayArgs {
    /// The model file (.plumb)
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// Logs (CSV files, .npy arrays, or directories of them)
    #[arg(value_name = "LOG", required = true)]
    pub logs: Vec<PathBuf>,

    /// Write per-sample scores, statistics and states to this CSV
    #[arg(long, value_name = "FILE")]
    pub trace: Option<PathBuf>,

    /// Compare two models on the same logs: `plumb replay --compare OLD NEW LOG...` (MODEL is the old model, the first LOG the new one)
    #[arg(long, conflicts_with = "trace")]
    pub compare: bool,

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
        if r.skipped > 0 {
            s.push_str(&format!(
                "  {} rows skipped (empty or non-finite cells; --skip-bad-rows)\n",
                r.skipped
            ));
        }
        for (i, f) in r.flags.iter().enumerate() {
            let cleared = match f.cleared_at {
                Some(c) => format!("cleared at {}", fmt_at(c, f.cleared_t)),
                None => "still raised at the end of the log".to_string(),
            };
            let top: Vec<String> = f
                .top_features
                .iter()
                .map(|c| format!("{} {:.3}", c.name, c.value))
                .collect();
            // The charts over their limits (`spe/residual(vib_band6):2.08>2.05`),
            // as `plumb listen` prints them; the scores alone if none is listed.
            let by = if f.crossed.is_empty() {
                f.scores.join("+")
            } else {
                let c: Vec<String> = f.crossed.iter().map(ToString::to_string).collect();
                c.join(", ")
            };
            s.push_str(&format!(
                "  flag {}: raised at {} by {}; {}; top residuals: {}\n",
                i + 1,
                fmt_at(f.raised_at, f.raised_t),
                by,
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

/// The files `replay` and `report` read: the model, the logs and the
/// units sidecar.
pub fn inputs<'a>(model: &'a Path, logs: &'a [PathBuf], read: &'a LogArgs) -> Vec<Input<'a>> {
    let mut v = vec![Input {
        what: "model",
        path: model,
    }];
    v.extend(logs.iter().map(|p| Input {
        what: "log",
        path: p,
    }));
    v.extend(read.units.as_deref().map(|p| Input {
        what: "units",
        path: p,
    }));
    v
}

/// Runs `plumb replay`.
pub fn run(args: ReplayArgs) -> Result<u8> {
    if args.compare {
        return run_compare(args);
    }
    let file = read_model(&args.model)?;
    replay::check_model(&file, &args.model)?;
    let paths = expand_paths(&args.logs)?;
    let opts = args.read.options(BadCells::PassAsNan)?;
    let progress = Progress::stderr(args.output.quiet || args.output.json);
    let total: u64 = paths
        .iter()
        .map(|p| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))
        .sum();
    let stage = progress.stage("replay", total, true);
    if let Some(t) = &args.trace {
        files::check_outputs(
            &[Output {
                option: "--trace",
                path: t,
            }],
            &inputs(&args.model, &paths, &args.read),
        )?;
    }
    // Written beside the trace and renamed into place when the replay
    // succeeds: a failure leaves an existing file as it was.
    let mut trace = match &args.trace {
        Some(p) => {
            let mut w = AtomicWriter::create(p)?;
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
    drop(stage);
    replay::require_samples(&reps)?;
    if let Some((_, w)) = trace {
        w.finish()?;
    }
    if args.output.json {
        crate::outln!("{}", serde_json::json!({ "logs": reps }));
    } else if !args.output.quiet {
        crate::out!("{}", text(&reps));
    }
    Ok(if reps.iter().any(|r| !r.flags.is_empty()) {
        EXIT_DRIFT
    } else {
        EXIT_CLEAN
    })
}

/// One model of a comparison.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModelRef {
    /// The model file.
    pub path: PathBuf,
    /// Its model id, hex.
    pub id: String,
}

/// One log under both models.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct LogCompare {
    /// The log.
    pub path: PathBuf,
    /// Samples replayed.
    pub samples: u64,
    /// Faulted samples under the old and the new model.
    pub faults: [u64; 2],
    /// Flags under the old model.
    pub old: Vec<Flag>,
    /// Flags under the new model.
    pub new: Vec<Flag>,
    /// Whether the flags differ (a raise or clear index, or the scores
    /// behind a raise).
    pub differs: bool,
    /// First raise under the new model minus first raise under the old one,
    /// in samples (negative: the new model is earlier); when both raised.
    pub first_raise_shift: Option<i64>,
    /// What differs, in words.
    pub note: String,
}

/// The comparison over all logs.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct CompareSummary {
    /// Logs replayed.
    pub logs: usize,
    /// Logs whose flags differ.
    pub differ: usize,
    /// Logs with a flag under the old model.
    pub old_flagged: usize,
    /// Logs with a flag under the new model.
    pub new_flagged: usize,
    /// Flags under the old model.
    pub old_flags: usize,
    /// Flags under the new model.
    pub new_flags: usize,
    /// Logs flagged only under the old model.
    pub only_old: usize,
    /// Logs flagged only under the new model.
    pub only_new: usize,
    /// Logs whose first raise is earlier under the new model.
    pub new_earlier: usize,
    /// Logs whose first raise is later under the new model.
    pub new_later: usize,
}

impl CompareSummary {
    /// The one-line human rendering.
    pub fn line(&self) -> String {
        format!(
            "{} logs, flags differ in {}: old model raised in {} logs ({} flags), new in {} \
             ({} flags); only old {}, only new {}; first raise earlier under the new model in \
             {}, later in {}",
            self.logs,
            self.differ,
            self.old_flagged,
            self.old_flags,
            self.new_flagged,
            self.new_flags,
            self.only_old,
            self.only_new,
            self.new_earlier,
            self.new_later
        )
    }
}

/// Compares the flags of one log under two models.
pub fn compare_log(old: &LogReplay, new: &LogReplay) -> LogCompare {
    let key = |f: &Flag| (f.raised_at, f.cleared_at, f.scores.clone());
    let differs = old.flags.len() != new.flags.len()
        || old
            .flags
            .iter()
            .zip(&new.flags)
            .any(|(a, b)| key(a) != key(b));
    let first_raise_shift = match (old.flags.first(), new.flags.first()) {
        (Some(a), Some(b)) => Some(b.raised_at as i64 - a.raised_at as i64),
        _ => None,
    };
    let note = match (old.flags.len(), new.flags.len()) {
        (0, 0) => "no flag under either model".to_string(),
        _ if !differs => "same flags".to_string(),
        (n, 0) => format!("only the old model raised ({n} flag{})", plural(n)),
        (0, n) => format!("only the new model raised ({n} flag{})", plural(n)),
        (a, b) => {
            let mut parts = Vec::new();
            if a != b {
                parts.push(format!("old {a} flag{}, new {b}", plural(a)));
            }
            match first_raise_shift {
                Some(d) if d < 0 => parts.push(format!("new raises {} samples earlier", -d)),
                Some(d) if d > 0 => parts.push(format!("new raises {d} samples later")),
                _ => {}
            }
            if old.flags[0].scores != new.flags[0].scores {
                parts.push(format!(
                    "first raise by {} (old) and {} (new)",
                    old.flags[0].scores.join("+"),
                    new.flags[0].scores.join("+")
                ));
            }
            if parts.is_empty() {
                parts.push("later flags differ".to_string());
            }
            parts.join("; ")
        }
    };
    LogCompare {
        path: old.path.clone(),
        samples: old.samples,
        faults: [old.faults, new.faults],
        old: old.flags.clone(),
        new: new.flags.clone(),
        differs,
        first_raise_shift,
        note,
    }
}

fn plural(n: usize) -> &'static str {
    if n == 1 {
        ""
    } else {
        "s"
    }
}

/// Sums up per-log comparisons.
pub fn compare_summary(logs: &[LogCompare]) -> CompareSummary {
    let count = |f: &dyn Fn(&LogCompare) -> bool| logs.iter().filter(|l| f(l)).count();
    CompareSummary {
        logs: logs.len(),
        differ: count(&|l| l.differs),
        old_flagged: count(&|l| !l.old.is_empty()),
        new_flagged: count(&|l| !l.new.is_empty()),
        old_flags: logs.iter().map(|l| l.old.len()).sum(),
        new_flags: logs.iter().map(|l| l.new.len()).sum(),
        only_old: count(&|l| !l.old.is_empty() && l.new.is_empty()),
        only_new: count(&|l| l.old.is_empty() && !l.new.is_empty()),
        new_earlier: count(&|l| l.first_raise_shift.is_some_and(|d| d < 0)),
        new_later: count(&|l| l.first_raise_shift.is_some_and(|d| d > 0)),
    }
}

fn flag_cell(f: Option<&Flag>) -> String {
    match f {
        None => String::new(),
        Some(f) => format!(
            "raised {} by {}, cleared {}",
            f.raised_at,
            f.scores.join("+"),
            f.cleared_at.map_or("-".to_string(), |c| c.to_string())
        ),
    }
}

/// The human side-by-side table.
pub fn compare_text(old: &ModelRef, new: &ModelRef, logs: &[LogCompare]) -> String {
    let mut s = format!(
        "old model {} ({}), new model {} ({})\n",
        old.id,
        old.path.display(),
        new.id,
        new.path.display()
    );
    for l in logs {
        let faults = if l.faults[0] == l.faults[1] {
            format!("{} faults", l.faults[0])
        } else {
            format!("{} / {} faults (old / new)", l.faults[0], l.faults[1])
        };
        s.push_str(&format!(
            "{}  {} samples, {faults}: {}\n",
            l.path.display(),
            l.samples,
            l.note
        ));
        let rows = l.old.len().max(l.new.len());
        if rows > 0 {
            s.push_str(&format!("  {:>4}  {:<42}  {}\n", "flag", "old", "new"));
        }
        for i in 0..rows {
            s.push_str(&format!(
                "  {:>4}  {:<42}  {}\n",
                i + 1,
                flag_cell(l.old.get(i)),
                flag_cell(l.new.get(i))
            ));
        }
    }
    s.push_str(&compare_summary(logs).line());
    s.push('\n');
    s
}

/// Runs `plumb replay --compare OLD NEW LOG...`.
fn run_compare(args: ReplayArgs) -> Result<u8> {
    let (new_path, log_args) = match args.logs.split_first() {
        Some((n, rest)) if !rest.is_empty() => (n.clone(), rest.to_vec()),
        _ => {
            return Err(Error::input(
                "--compare needs two models and at least one log: plumb replay --compare OLD \
                 NEW LOG...",
            ))
        }
    };
    let old_file = read_model(&args.model)?;
    let new_file = read_model(&new_path)?;
    replay::check_model(&old_file, &args.model)?;
    replay::check_model(&new_file, &new_path)?;
    let paths = expand_paths(&log_args)?;
    let opts = args.read.options(BadCells::PassAsNan)?;
    let progress = Progress::stderr(args.output.quiet || args.output.json);
    let total: u64 = paths
        .iter()
        .map(|p| std::fs::metadata(p).map(|m| m.len()).unwrap_or(0))
        .sum();
    let mut runs = Vec::with_capacity(2);
    for (label, file) in [("old", &old_file), ("new", &new_file)] {
        let stage = progress.stage(label, total, true);
        runs.push(replay::replay(file, &paths, opts.clone(), &stage, |_| {
            Ok(())
        })?);
    }
    replay::require_samples(&runs[0])?;
    let logs: Vec<LogCompare> = runs[0]
        .iter()
        .zip(&runs[1])
        .map(|(a, b)| compare_log(a, b))
        .collect();
    let old = ModelRef {
        path: args.model.clone(),
        id: format!("{:08x}", old_file.model.meta.id),
    };
    let new = ModelRef {
        path: new_path,
        id: format!("{:08x}", new_file.model.meta.id),
    };
    if args.output.json {
        crate::outln!(
            "{}",
            serde_json::json!({
                "old": old,
                "new": new,
                "logs": logs,
                "summary": compare_summary(&logs),
            })
        );
    } else if !args.output.quiet {
        crate::out!("{}", compare_text(&old, &new, &logs));
    }
    Ok(
        if logs.iter().any(|l| !l.old.is_empty() || !l.new.is_empty()) {
            EXIT_DRIFT
        } else {
            EXIT_CLEAN
        },
    )
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::events::ChartCrossing;
    use crate::replay::{Faults, ScoreValues};

    fn flag(raised: u64, cleared: Option<u64>, scores: &[&'static str]) -> Flag {
        Flag {
            raised_at: raised,
            cleared_at: cleared,
            scores: scores.to_vec(),
            crossed: Vec::new(),
            values: ScoreValues {
                spe: 0.0,
                t2: 0.0,
                nll: 0.0,
            },
            top_features: Vec::new(),
            raised_t: None,
            cleared_t: None,
        }
    }

    fn rep(flags: Vec<Flag>) -> LogReplay {
        LogReplay {
            path: PathBuf::from("a.csv"),
            samples: 100,
            skipped: 0,
            faults: 0,
            fault_kinds: Faults::default(),
            flags,
            over_sample_limit: [0; 3],
            period_s: None,
        }
    }

    #[test]
    fn the_table_says_when_each_flag_cleared_or_that_it_did_not() {
        let mut f = flag(40, Some(90), &["spe"]);
        f.raised_t = Some(4.0);
        f.cleared_t = Some(9.0);
        let text = text(&[rep(vec![f, flag(95, None, &["t2", "nll"])])]);
        assert!(
            text.contains("flag 1: raised at 40 (4.0 s) by spe; cleared at 90 (9.0 s); "),
            "{text}"
        );
        assert!(
            text.contains("flag 2: raised at 95 by t2+nll; still raised at the end of the log; "),
            "{text}"
        );
        assert!(
            text.ends_with("1 of 1 logs raised a drift flag\n"),
            "{text}"
        );
    }

    #[test]
    fn the_table_names_the_charts_that_raised_a_flag() {
        let mut f = flag(40, None, &["spe"]);
        f.crossed = vec![
            ChartCrossing {
                score: "spe",
                statistic: "ewma",
                feature: None,
                index: None,
                value: 7.5,
                limit: 3.25,
            },
            ChartCrossing {
                score: "spe",
                statistic: "residual",
                feature: Some("vib_band6".into()),
                index: Some(17),
                value: 2.5,
                limit: 2.0,
            },
        ];
        let text = text(&[rep(vec![f])]);
        assert!(
            text.contains(
                "flag 1: raised at 40 by spe/ewma:7.5>3.25, spe/residual(vib_band6):2.5>2; \
                 still raised"
            ),
            "{text}"
        );
    }

    #[test]
    fn notes_say_what_differs() {
        let none = compare_log(&rep(vec![]), &rep(vec![]));
        assert!(!none.differs && none.note == "no flag under either model");
        let a = rep(vec![flag(40, Some(90), &["spe"])]);
        let same = compare_log(&a, &a.clone());
        assert!(!same.differs && same.note == "same flags");
        assert_eq!(same.first_raise_shift, Some(0));
        let only_old = compare_log(&a, &rep(vec![]));
        assert_eq!(only_old.note, "only the old model raised (1 flag)");
        let only_new = compare_log(&rep(vec![]), &a);
        assert_eq!(only_new.note, "only the new model raised (1 flag)");
        let b = rep(vec![
            flag(30, None, &["spe", "nll"]),
            flag(95, None, &["t2"]),
        ]);
        let c = compare_log(&a, &b);
        assert!(c.differs);
        assert_eq!(c.first_raise_shift, Some(-10));
        assert_eq!(
            c.note,
            "old 1 flag, new 2; new raises 10 samples earlier; first raise by spe (old) and \
             spe+nll (new)"
        );
        // Same raise, another clear: differs, said so.
        let d = rep(vec![flag(40, Some(99), &["spe"])]);
        let c2 = compare_log(&a, &d);
        assert!(c2.differs && c2.note == "later flags differ");
        let s = compare_summary(&[none, same, only_old, only_new, c, c2]);
        assert_eq!((s.logs, s.differ), (6, 4));
        assert_eq!((s.old_flagged, s.new_flagged), (4, 4));
        assert_eq!((s.old_flags, s.new_flags), (4, 5));
        assert_eq!((s.only_old, s.only_new), (1, 1));
        assert_eq!((s.new_earlier, s.new_later), (1, 0));
        let text = compare_text(
            &ModelRef {
                path: "o.plumb".into(),
                id: "0000000a".into(),
            },
            &ModelRef {
                path: "n.plumb".into(),
                id: "0000000b".into(),
            },
            &[compare_log(&a, &b)],
        );
        assert!(text.contains("raised 40 by spe, cleared 90"), "{text}");
        assert!(text.contains("raised 95 by t2, cleared -"), "{text}");
        assert!(text.ends_with("later in 0\n"), "{text}");
    }
}
