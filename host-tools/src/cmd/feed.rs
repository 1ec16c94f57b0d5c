//! `plumb feed`: stream a log to a board as samples and print what it says.

use crate::cli::LogArgs;
use crate::cmd::connect::{self, LinkArgs};
use crate::cmd::inspect::read_model;
use crate::device::{self, FeedConfig, FeedSummary};
use crate::error::{Error, Result, EXIT_CLEAN, EXIT_DRIFT};
use crate::events::{EventSink, Fan, LineFormat, LinePrinter, Names, Recorder};
use crate::files::{self, AtomicWriter, Input, Output, TempOutput};
use crate::link::Received;
use crate::logs::{BadCells, LogSet, Selection};
use crate::progress::Stage;
use clap::Args;
use plumb_model::file::ModelFile;
use plumb_model::wire::{DeviceMsg, State};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::mpsc;

/// Long help of `plumb feed`.
pub const LONG_ABOUT: &str = "\
Stream a CSV log to a board as samples, in the model's feature order (columns are matched
by name, extra columns ignored; empty and NaN cells travel as NaN, so the board counts them
as sensor faults), and print what the board says: drift raised and cleared, faults, status.

The board's statistics are reset first (--keep-stats to continue where it was), so a run
is comparable with `plumb replay` of the same log. Flow control: the board is asked to send
a score report for every sample, and feed waits for it before sending the next (--window N
keeps N samples in flight: faster on a clean link). Every sample carries its index, and the
board takes a sample only at its next index, so a sample lost on the way (or whose report
was lost) is simply sent again: the board takes each sample once and in order, whatever the
window. Events lost on the way are asked for again (see `plumb listen --help`).

--reports prints the score reports and --trace writes them as CSV with the exact f32 bit
patterns (put in place only when the feed succeeds: a failed feed leaves an existing file
as it was); --record-samples writes the samples sent as a log `plumb fit` reads, and
--record the events received: both are kept however the feed ends once the link is open.
No output may be the model, the log or another output.

Exit code 1 if the board raised a drift flag, 0 otherwise, 2 on bad input or a link error,
and 2 when no sample was fed (a log without data rows, or --rows past its end): nothing was
checked.";

/// Arguments of `plumb feed`.
#[derive(Debug, Clone, Args)]
pub struct FeedArgs {
    /// The model file (.plumb) the board runs: its labels order the columns
    #[arg(value_name = "MODEL")]
    pub model: PathBuf,

    /// The log (CSV) to stream
    #[arg(value_name = "LOG")]
    pub log: PathBuf,

    #[command(flatten)]
    pub link: LinkArgs,

    #[command(flatten)]
    pub read: LogArgs,

    /// Only data rows A..B of the log (0-based, B excluded; `A..` to the end)
    #[arg(long, value_name = "A..B", value_parser = parse_rows)]
    pub rows: Option<std::ops::Range<u64>>,

    /// Samples in flight before waiting for the board's reports (at least 1)
    #[arg(long, value_name = "N", default_value_t = 1, value_parser = parse_window)]
    pub window: usize,

    /// Do not reset the board's statistics first
    #[arg(long)]
    pub keep_stats: bool,

    /// Feed even if the board runs a model of another schema (feature names and order)
    #[arg(long)]
    pub any_model: bool,

    /// Print the per-sample score reports
    #[arg(long)]
    pub reports: bool,

    /// Write the score reports to FILE as CSV: sample, spe, t2, nll as f32 bits in hex and as
    /// decimals that read back to the same bits, state
    #[arg(long, value_name = "FILE")]
    pub trace: Option<PathBuf>,

    /// Write every event received to FILE as CSV (as `plumb listen --record`)
    #[arg(long, value_name = "FILE")]
    pub record: Option<PathBuf>,

    /// Write the samples sent to FILE as a log (`t[s],name[unit],...`) that `plumb fit` reads
    #[arg(long, value_name = "FILE")]
    pub record_samples: Option<PathBuf>,

    /// One JSON object per line
    #[arg(long)]
    pub json: bool,

    /// Print only the summary and the counters
    #[arg(short, long)]
    pub quiet: bool,
}

/// Parses `--window`: a count of at least 1.
fn parse_window(s: &str) -> std::result::Result<usize, String> {
    match s.trim().parse::<usize>() {
        Ok(n) if n >= 1 => Ok(n),
        _ => Err(format!("expected a count of at least 1, found {s:?}")),
    }
}

/// Parses `A..B` or `A..`.
pub fn parse_rows(s: &str) -> std::result::Result<std::ops::Range<u64>, String> {
    let (a, b) = s
        .split_once("..")
        .ok_or_else(|| format!("expected A..B, found {s:?}"))?;
    let a: u64 = a
        .trim()
        .parse()
        .map_err(|_| format!("bad start row in {s:?}"))?;
    let b: u64 = if b.trim().is_empty() {
        u64::MAX
    } else {
        b.trim()
            .parse()
            .map_err(|_| format!("bad end row in {s:?}"))?
    };
    if b <= a {
        return Err(format!("empty row range {s:?}"));
    }
    Ok(a..b)
}

/// Header of `--trace` files.
pub const TRACE_HEADER: &str = "sample,spe_bits,t2_bits,nll_bits,spe,t2,nll,state";

/// One `--trace` row of a score report (`sample` is the host's index).
pub fn trace_row(
    sample: u64,
    scores: Option<plumb_model::wire::ScoreTriple>,
    state: State,
) -> String {
    let state = match state {
        State::Priming => "priming",
        State::Watching => "watching",
        State::Drifting => "drifting",
    };
    match scores {
        Some(s) => format!(
            "{sample},{:#010x},{:#010x},{:#010x},{},{},{},{state}",
            s.spe.to_bits(),
            s.t2.to_bits(),
            s.nll.to_bits(),
            s.spe,
            s.t2,
            s.nll
        ),
        None => format!("{sample},,,,,,,{state}"),
    }
}

/// One row as the reader thread hands it over.
struct Row {
    time: Option<f64>,
    x: Vec<f32>,
}

/// Streams the selected rows of `set` through a bounded channel from a
/// reader thread; memory stays flat however long the log.
fn stream_rows(set: LogSet, select: Selection) -> mpsc::Receiver<Result<Row>> {
    let (tx, rx) = mpsc::sync_channel::<Result<Row>>(1024);
    std::thread::spawn(move || {
        let res = set.for_each(&select, &Stage::hidden(), |chunk| {
            for i in 0..chunk.rows() {
                let x = chunk.row(i).iter().map(|&v| v as f32).collect();
                let time = chunk.times.get(i).copied();
                tx.send(Ok(Row { time, x }))
                    .map_err(|_| Error::input("feeding stopped"))?;
            }
            Ok(())
        });
        if let Err(e) = res {
            let _ = tx.send(Err(e));
        }
    });
    rx
}

/// A recording: written beside `path` until the link is open, then put in
/// place (an early failure leaves an existing file as it was; what a
/// session recorded is kept however it ends).
fn create(path: &Path, places: &mut Vec<TempOutput>) -> Result<std::io::BufWriter<std::fs::File>> {
    let (place, f) = TempOutput::create(path)?;
    places.push(place);
    Ok(std::io::BufWriter::new(f))
}

/// Counts of what the board said during a feed.
#[derive(Debug, Default, Clone, Copy)]
struct Tally {
    raised: u64,
    cleared: u64,
    faults: u64,
}

/// Runs `plumb feed`.
pub fn run(args: FeedArgs) -> Result<u8> {
    let mut outputs = Vec::new();
    for (option, p) in [
        ("--trace", &args.trace),
        ("--record", &args.record),
        ("--record-samples", &args.record_samples),
    ] {
        if let Some(path) = p {
            outputs.push(Output { option, path });
        }
    }
    let mut inputs = vec![
        Input {
            what: "model",
            path: &args.model,
        },
        Input {
            what: "log",
            path: &args.log,
        },
    ];
    inputs.extend(args.read.units.as_deref().map(|p| Input {
        what: "units",
        path: p,
    }));
    files::check_outputs(&outputs, &inputs)?;
    let file: ModelFile = read_model(&args.model)?;
    let set = LogSet::open_for_labels(
        std::slice::from_ref(&args.log),
        &file.labels,
        args.read.options(BadCells::PassAsNan)?,
    )?;
    let names = Names::from_labels(&file.labels);
    let format = if args.json {
        LineFormat::Json
    } else {
        LineFormat::Text
    };
    let mut printer = LinePrinter::new(std::io::stdout(), format, names.clone());
    printer.scores = args.reports;
    let mut places = Vec::new();
    let mut recorder = match &args.record {
        Some(p) => Some(
            Recorder::new(create(p, &mut places)?, names).map_err(|e| Error::io(p, "write", &e))?,
        ),
        None => None,
    };
    // The trace is all or nothing: in place only when the feed succeeds.
    let mut trace = match &args.trace {
        Some(p) => {
            let mut w = AtomicWriter::create(p)?;
            writeln!(w, "{TRACE_HEADER}").map_err(|e| Error::io(p, "write", &e))?;
            Some(w)
        }
        None => None,
    };
    let mut samples_out = match &args.record_samples {
        Some(p) => {
            let mut w = create(p, &mut places)?;
            let time = set
                .options()
                .time_column
                .as_deref()
                .map(|t| (t, set.time_unit()));
            writeln!(w, "{}", crate::logs::header_line(&file.labels, time))
                .map_err(|e| Error::io(p, "write", &e))?;
            Some(w)
        }
        None => None,
    };
    let select = match &args.rows {
        Some(r) => Selection(vec![r.clone()]),
        None => Selection::all(1),
    };

    let mut link = args.link.open()?;
    for place in places {
        place.commit()?;
    }
    let patience = args.link.patience();
    let quiet = args.quiet;
    let mut tally = Tally::default();
    let base = std::cell::Cell::new(0u64);
    let mut trace_err: Option<std::io::Error> = None;
    let outcome: Result<FeedSummary> = {
        let mut sinks: Vec<&mut dyn EventSink> = Vec::new();
        if !quiet {
            sinks.push(&mut printer);
        }
        if let Some(r) = recorder.as_mut() {
            sinks.push(r);
        }
        let mut fan = Fan(sinks);
        let res = (|| {
            let mut sink = |r: &Received| {
                match &r.frame.msg {
                    DeviceMsg::DriftRaised(_) => tally.raised += 1,
                    DeviceMsg::DriftCleared(_) => tally.cleared += 1,
                    DeviceMsg::SensorFault(_) => tally.faults += 1,
                    DeviceMsg::ScoreReport(rep) => {
                        if let Some(w) = trace.as_mut() {
                            let idx = rep.sample.wrapping_sub(base.get());
                            if let Err(e) = writeln!(w, "{}", trace_row(idx, rep.scores, rep.state))
                            {
                                trace_err.get_or_insert(e);
                            }
                        }
                    }
                    _ => {}
                }
                fan.frame(r);
            };
            let g = device::greeting(&mut link, patience, &mut sink)?;
            device::check_protocol(&g)?;
            if g.schema != file.model.meta.schema && !args.any_model {
                return Err(Error::input(format!(
                    "the board runs model {:#010x} with schema {:#018x}, but {} has schema {:#018x} \
                     (other features or order): upload it first, or pass --any-model",
                    g.model_id,
                    g.schema,
                    args.model.display(),
                    file.model.meta.schema
                )));
            }
            if g.model_id != file.model.meta.id && !quiet {
                eprintln!(
                    "plumb: note: the board runs model {:#010x}, {} is {:#010x}: same features, other limits",
                    g.model_id,
                    args.model.display(),
                    file.model.meta.id
                );
            }
            if args.keep_stats {
                base.set(device::status(&mut link, patience, &mut sink)?.samples);
            }
            let rows = stream_rows(set.clone(), select.clone());
            let mut sample_err: Option<std::io::Error> = None;
            let samples = rows.iter().map(|row| {
                let row = row?;
                if let Some(w) = samples_out.as_mut() {
                    let mut line = String::new();
                    if let Some(t) = row.time {
                        line.push_str(&t.to_string());
                    }
                    for (j, v) in row.x.iter().enumerate() {
                        if j > 0 || row.time.is_some() {
                            line.push(',');
                        }
                        line.push_str(&v.to_string());
                    }
                    if let Err(e) = writeln!(w, "{line}") {
                        sample_err.get_or_insert(e);
                    }
                }
                Ok(row.x)
            });
            let cfg = FeedConfig {
                window: args.window,
                reset: !args.keep_stats,
                reports_off_after: true,
                patience,
            };
            let sum = device::feed(&mut link, samples, cfg, &mut sink)?;
            if let Some(e) = sample_err {
                let p = args
                    .record_samples
                    .as_deref()
                    .unwrap_or(Path::new("samples"));
                return Err(Error::io(p, "write", &e));
            }
            Ok(sum)
        })();
        let fin = connect::finish(&mut link, &mut fan, format, quiet);
        res.and_then(|s| fin.map(|()| s))
    };
    // Samples sent are kept however the feed ended.
    let flushed = match (samples_out.as_mut(), &args.record_samples) {
        (Some(w), Some(p)) => w.flush().map_err(|e| Error::io(p, "write", &e)),
        _ => Ok(()),
    };
    let sum = outcome?;
    flushed?;
    if sum.samples == 0 {
        eprintln!(
            "plumb: warning: 0 samples in {}{}",
            args.log.display(),
            match &args.rows {
                Some(r) if r.end == u64::MAX => format!(" (rows {}..)", r.start),
                Some(r) => format!(" (rows {}..{})", r.start, r.end),
                None => String::new(),
            }
        );
        return Err(Error::input(
            "0 samples fed: nothing was checked (the log has no data rows there)",
        ));
    }
    if let (Some(e), Some(p)) = (trace_err, &args.trace) {
        return Err(Error::io(p, "write", &e));
    }
    if let Some(w) = trace {
        w.finish()?;
    }
    if let (Some(r), Some(p)) = (recorder.as_mut(), &args.record) {
        if let Some(e) = r.take_error() {
            return Err(Error::io(p, "write", &e));
        }
    }
    let summary = format!(
        "fed samples={} taken={} frames_sent={} resent={} reports_missing={} raised={} cleared={} faults={}",
        sum.samples, sum.taken, sum.frames_sent, sum.resent, sum.reports_missing,
        tally.raised, tally.cleared, tally.faults
    );
    if args.json {
        crate::outln!(
            "{}",
            serde_json::json!({"event": "fed", "samples": sum.samples, "taken": sum.taken,
                "frames_sent": sum.frames_sent, "resent": sum.resent, "reports_missing": sum.reports_missing,
                "raised": tally.raised, "cleared": tally.cleared,
                "faults": tally.faults})
        );
    } else {
        crate::outln!("{summary}");
    }
    if sum.taken != sum.samples {
        eprintln!(
            "plumb: warning: the board took {} of {} samples (samples lost on the link)",
            sum.taken, sum.samples
        );
    }
    Ok(if tally.raised > 0 {
        EXIT_DRIFT
    } else {
        EXIT_CLEAN
    })
}
