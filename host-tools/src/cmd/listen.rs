//! `plumb listen`: print what a device says, one line per event.

use crate::cmd::connect::{self, LinkArgs};
use crate::cmd::inspect::read_model;
use crate::device;
use crate::error::{Error, Result, EXIT_CLEAN, EXIT_DRIFT};
use crate::events::{EventSink, Fan, LineFormat, LinePrinter, Names, Recorder, SampleRecorder};
use crate::files::{self, Input, Output, TempOutput};
use crate::link::{Link, LinkStats, Notice, Received};
use crate::live;
use clap::Args;
use plumb_model::file::ModelFile;
use plumb_model::wire::{Ack, DeviceMsg, Greeting, HostMsg};
use std::cell::Cell;
use std::path::PathBuf;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// Long help of `plumb listen`.
pub const LONG_ABOUT: &str = "\
Listen to a board: print its greeting, drift raised and cleared, sensor faults, status and
(with --scores) per-sample score reports, one line per event. Text lines start with a fixed
word (greeting, raised, cleared, fault, status, score, ack, refused, resend) followed by
key=value fields; --json prints one JSON object per line instead.

The link is checked as it goes: every frame carries a CRC-32 and the device numbers its
messages, so a gap in the numbers means a frame was lost; listen then asks the device to
send its retained events again (drift raised/cleared and faults) and marks what came back
`recovered=1`. The last line (`link ...`) counts good frames, CRC and framing errors,
resend requests, events recovered and events lost.

On a terminal (and without --json) listen draws a live view instead: the board's identity,
its drift state (waiting, priming, watching, drifting), each score's EWMA and CUSUM as a
gauge against its limit (limits from --model), the last flags and sensor faults, and link
health; it is printed once more when listening ends. --plain prints lines on a terminal.

The link itself is watched too, one `notice` line each: bytes of noise before the first
frame (`what=garbage`), a device that restarted (`what=restart`: a greeting, or any other
message, numbered behind what came before; the numbering starts again), and a serial port
or TCP connection that went away (`what=disconnected`), the attempts to reopen it with a
pause growing from 0.1 s to 5 s (`what=reconnecting`) and its return (`what=reconnected`;
a greeting is then asked for, so a restart or a gap shows). --no-reconnect ends listening
when the port goes away instead.

The board's greeting names its protocol version: listen stops with an error (exit code 2)
when it is one this host does not know, at the start or in any later greeting (a board
restarted on other firmware).

--record-samples FILE asks the board to echo the features of every sample it takes and
writes them as a log `plumb fit` reads (`t[s]`, the sample's index on the board times the
model's sample period, then the model's features; --model is required and must be the board's model): record a robot
while it runs as it should, then refit with `plumb fit --base MODEL FILE`. Echoes are not
kept for resend, so a sample with a frame lost on the link is left out (and counted).

Runs until the device closes the link (a spawned program ends, or the port goes away with
--no-reconnect), --for elapses, or Ctrl-C. Exit code 1 if a drift flag was raised while
listening, 0 otherwise, 2 on a link or usage error.";

/// Arguments of `plumb listen`.
#[derive(Debug, Clone, Args)]
pub struct ListenArgs {
    #[command(flatten)]
    pub link: LinkArgs,

    /// Model file (.plumb) whose feature names label the messages
    #[arg(long, value_name = "MODEL")]
    pub model: Option<PathBuf>,

    /// Stop after this many seconds (more than 0, at most 10^9)
    #[arg(long = "for", value_name = "SECONDS", value_parser = parse_seconds)]
    pub duration: Option<f64>,

    /// Also print per-sample score reports (turn them on with `plumb feed --reports`)
    #[arg(long)]
    pub scores: bool,

    /// Do not ask for a greeting at the start
    #[arg(long)]
    pub no_greeting: bool,

    /// Write every event received to FILE as CSV (seq,event,sample,state,spe,t2,nll,detail,recovered)
    #[arg(long, value_name = "FILE")]
    pub record: Option<PathBuf>,

    /// Ask the board to echo the features of every sample and write them to FILE as a log
    /// `plumb fit` reads (needs --model, the board's model)
    #[arg(long, value_name = "FILE", requires = "model")]
    pub record_samples: Option<PathBuf>,

    /// One JSON object per line
    #[arg(long)]
    pub json: bool,

    /// Full-screen live view (the default when standard output is a terminal)
    #[arg(long, conflicts_with_all = ["plain", "json"])]
    pub live: bool,

    /// One line per event, even on a terminal
    #[arg(long)]
    pub plain: bool,

    /// Stop when the serial port or TCP connection goes away (default: reopen it)
    #[arg(long)]
    pub no_reconnect: bool,
}

/// Longest `--for`: about 31 years, far below what a deadline can hold.
pub const MAX_SECONDS: f64 = 1e9;

/// Parses `--for`: a finite number of seconds above 0 and at most
/// [`MAX_SECONDS`].
pub fn parse_seconds(s: &str) -> std::result::Result<f64, String> {
    let v: f64 = s
        .trim()
        .parse()
        .map_err(|_| format!("expected a number of seconds, found {s:?}"))?;
    if !v.is_finite() || !(v > 0.0) || v > MAX_SECONDS {
        return Err(format!(
            "expected seconds above 0 and at most {MAX_SECONDS:e}, found {s:?}"
        ));
    }
    Ok(v)
}

/// Runs `plumb listen`.
pub fn run(args: ListenArgs) -> Result<u8> {
    let mut outputs = Vec::new();
    for (option, p) in [
        ("--record", &args.record),
        ("--record-samples", &args.record_samples),
    ] {
        if let Some(path) = p {
            outputs.push(Output { option, path });
        }
    }
    let inputs: Vec<Input<'_>> = args
        .model
        .as_deref()
        .map(|p| Input {
            what: "model",
            path: p,
        })
        .into_iter()
        .collect();
    files::check_outputs(&outputs, &inputs)?;
    let model = args.model.as_deref().map(read_model).transpose()?;
    let names = model
        .as_ref()
        .map_or_else(Names::default, |m| Names::from_labels(&m.labels));
    let format = if args.json {
        LineFormat::Json
    } else {
        LineFormat::Text
    };
    let mut printer = LinePrinter::new(std::io::stdout(), format, names.clone());
    printer.scores = args.scores;
    // Recordings are written beside their files until the link is open,
    // then put in place: an early failure leaves an existing file as it
    // was, and what a session recorded is kept however it ends.
    let mut places = Vec::new();
    let mut recorder = match &args.record {
        Some(p) => {
            let (place, f) = TempOutput::create(p)?;
            places.push(place);
            Some(
                Recorder::new(std::io::BufWriter::new(f), names.clone())
                    .map_err(|e| Error::io(p, "write", &e))?,
            )
        }
        None => None,
    };
    let mut samples = match (&args.record_samples, &model) {
        (Some(p), Some(m)) => {
            let (place, f) = TempOutput::create(p)?;
            places.push(place);
            Some(
                SampleRecorder::new(
                    std::io::BufWriter::new(f),
                    &m.labels,
                    m.model.meta.sample_period_us,
                )
                .map_err(|e| Error::io(p, "write", &e))?,
            )
        }
        _ => None,
    };
    let stop = Arc::new(AtomicBool::new(false));
    {
        let stop = Arc::clone(&stop);
        // A second handler cannot be installed in one process; listening
        // then just runs without it.
        let _ = ctrlc::set_handler(move || stop.store(true, Ordering::SeqCst));
    }

    let mut link = args.link.open()?;
    for place in places {
        place.commit()?;
    }
    if !args.no_reconnect {
        if let Some(reopen) = args.link.reopener() {
            link.set_reopen(reopen);
        }
    }
    let mut live = live::wanted(args.live, args.plain, args.json).then(|| {
        let info = model.as_ref().map(live::ModelInfo::of);
        live::LiveView::start(live::LiveState::new(link.describe(), names.clone(), info))
    });
    let mut watch = live.as_ref().map(|v| v.watcher());
    let mut drift = false;
    let result = {
        let mut sinks: Vec<&mut dyn EventSink> = match live.as_mut() {
            Some(v) => vec![v],
            None => vec![&mut printer],
        };
        if let Some(r) = recorder.as_mut() {
            sinks.push(r);
        }
        if let Some(r) = samples.as_mut() {
            sinks.push(r);
        }
        // Frames and the link's notices go to the same sinks.
        let fan = std::cell::RefCell::new(Fan(sinks));
        let mut sink = |r: &Received| {
            if matches!(r.frame.msg, DeviceMsg::DriftRaised(_)) {
                drift = true;
            }
            fan.borrow_mut().frame(r);
        };
        let mut note = |n: &Notice| fan.borrow_mut().notice(n);
        let mut tick = |s: &LinkStats| watch.iter_mut().for_each(|w| w(s));
        let foreign = Cell::new(false);
        let echo = match (&args.record_samples, &model) {
            (Some(_), Some(m)) => Some(m),
            _ => None,
        };
        let res = listen(
            &args, echo, &mut link, &stop, &foreign, &mut sink, &mut note, &mut tick,
        );
        // Frames still arriving from a board of another protocol version
        // are not shown: this host cannot tell what they mean.
        let fin = if foreign.get() {
            connect::finish(
                &mut link,
                &mut Unread(&mut *fan.borrow_mut()),
                format,
                false,
            )
        } else {
            connect::finish(&mut link, &mut *fan.borrow_mut(), format, false)
        };
        res.and(fin)
    };
    if let Some(r) = recorder.as_mut() {
        if let Some(e) = r.take_error() {
            let p = args
                .record
                .as_deref()
                .unwrap_or_else(|| std::path::Path::new("record"));
            return Err(Error::io(p, "write", &e));
        }
    }
    if let (Some(r), Some(p)) = (samples.as_mut(), &args.record_samples) {
        if let Some(e) = r.take_error() {
            return Err(Error::io(p, "write", &e));
        }
        eprintln!(
            "plumb: recorded {} samples to {} ({} left out: a part lost on the link{})",
            r.rows,
            p.display(),
            r.incomplete,
            if r.misfits > 0 {
                format!("; {} echo parts past the model's features", r.misfits)
            } else {
                String::new()
            }
        );
    }
    result?;
    Ok(if drift { EXIT_DRIFT } else { EXIT_CLEAN })
}

/// A sink that drops frames and passes on the rest.
struct Unread<'a>(&'a mut dyn EventSink);

impl EventSink for Unread<'_> {
    fn frame(&mut self, _r: &Received) {}
    fn notice(&mut self, n: &Notice) {
        self.0.notice(n);
    }
    fn finish(&mut self, stats: &LinkStats) {
        self.0.finish(stats);
    }
}

/// Refuses a greeting of a protocol version this host does not know, and
/// says so in `foreign`.
fn check_version(g: &Greeting, foreign: &Cell<bool>) -> Result<()> {
    let checked = device::check_protocol(g);
    if checked.is_err() {
        foreign.set(true);
    }
    checked
}

/// Hands the link's notices to `note`; after a reconnect, asks for a
/// greeting (its number shows a restart, or a gap to resend).
fn notices(link: &mut Link, note: &mut dyn FnMut(&Notice)) -> Result<()> {
    for n in link.take_notices() {
        note(&n);
        if matches!(n, Notice::Reconnected { .. }) {
            link.send(&HostMsg::GreetingQuery)?;
        }
    }
    Ok(())
}

/// Whether the board runs `model` (same features, in the same order): the
/// samples it echoes are then rows of `model`'s logs.
fn check_echo_model(g: &Greeting, model: &ModelFile, path: &std::path::Path) -> Result<()> {
    if g.schema != model.model.meta.schema || usize::from(g.dims.features) != model.labels.len() {
        return Err(Error::input(format!(
            "--record-samples: the board runs a model of {} features (schema {:#018x}), {} has {} (schema {:#018x}); give --model the board's model",
            g.dims.features,
            g.schema,
            path.display(),
            model.labels.len(),
            model.model.meta.schema
        )));
    }
    Ok(())
}

#[allow(clippy::too_many_arguments)]
fn listen(
    args: &ListenArgs,
    echo: Option<&ModelFile>,
    link: &mut Link,
    stop: &AtomicBool,
    foreign: &Cell<bool>,
    sink: &mut dyn FnMut(&Received),
    note: &mut dyn FnMut(&Notice),
    tick: &mut dyn FnMut(&LinkStats),
) -> Result<()> {
    if !args.no_greeting {
        // Frames are held until the greeting is in, so that a notice (noise
        // before the first frame, say) prints before the frames after it.
        let mut held = Vec::new();
        let g = device::greeting(link, args.link.patience(), &mut |r| held.push(r.clone()));
        notices(link, note)?;
        for r in &held {
            sink(r);
            // Nothing after a greeting of a version this host cannot read.
            if let DeviceMsg::Greeting(h) = &r.frame.msg {
                check_version(h, foreign)?;
            }
        }
        let g = g?;
        check_version(&g, foreign)?;
        if let (Some(m), Some(p)) = (echo, &args.model) {
            check_echo_model(&g, m, p)?;
        }
    }
    if echo.is_some() {
        device::request(
            link,
            &HostMsg::SetEcho { on: true },
            args.link.patience(),
            sink,
            |m| matches!(m, DeviceMsg::Ack(Ack::Echo { on: true })).then_some(()),
        )?;
    }
    let end = args
        .duration
        .and_then(|s| Duration::try_from_secs_f64(s).ok())
        .and_then(|d| Instant::now().checked_add(d));
    while !stop.load(Ordering::SeqCst) {
        if end.is_some_and(|e| Instant::now() >= e) {
            break;
        }
        let got = link.recv(Duration::from_millis(200))?;
        notices(link, note)?;
        match got {
            Some(r) => {
                sink(&r);
                // A board that restarted (or came back) on firmware of
                // another protocol version cannot be read any further.
                if let DeviceMsg::Greeting(g) = &r.frame.msg {
                    check_version(g, foreign)?;
                    // A board that restarted echoes nothing until asked.
                    if let (Some(m), Some(p)) = (echo, &args.model) {
                        check_echo_model(g, m, p)?;
                        link.send(&HostMsg::SetEcho { on: true })?;
                    }
                }
            }
            None if link.is_closed() => break,
            None => {}
        }
        tick(&link.stats());
    }
    if echo.is_some() && !link.is_closed() {
        // Best effort: the board stops echoing when the host stops listening.
        let _ = link.send(&HostMsg::SetEcho { on: false });
    }
    Ok(())
}
