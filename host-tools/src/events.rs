//! What the device says, for people and scripts: one line per frame in a
//! plain `word key=value ...` form (stable and grep-able) or one JSON object
//! per line, a CSV recorder, and the [`EventSink`] seam a live view plugs
//! into.
//!
//! # Line format
//!
//! Every line starts with a fixed word naming the event, then `key=value`
//! fields (values never contain spaces, except the quoted `reason` and
//! `firmware`):
//!
//! | word | when | fields |
//! |---|---|---|
//! | `greeting` | device identity | `seq protocol firmware model schema features components mixture capacity slot generation status_every` |
//! | `raised` | a drift flag rose | `seq sample drivers spe t2 nll top crossed` |
//! | `cleared` | the flag cleared | `seq sample` |
//! | `fault` | a sensor fault began | `seq sample kind feature` |
//! | `status` | health | `seq samples state hot faults levels link last_event model` |
//! | `score` | per-sample report | `seq sample state spe t2 nll` (or `faulted`) |
//! | `features` | a sample's features echoed (or part of them) | `seq sample first values` (comma-separated) |
//! | `ack` | a request done | `seq what ...` |
//! | `refused` | a request refused | `seq request code reason` |
//! | `resend` | end of a resend | `seq from count oldest dropped` |
//! | `notice` | the link itself: noise before the first frame, a device restart, the port gone and back | `what` (`garbage`, `restart`, `disconnected`, `reconnecting`, `reconnected`) and its fields, see [`notice_line`] |
//! | `link` | counters, at the end | see [`link_line`] |
//!
//! A frame that arrived through a resend carries ` recovered=1`. Scores are
//! printed as the shortest decimal that reads back to the same `f32`.
//!
//! `crossed` lists each chart over its limit as `score/chart:value>limit`,
//! chart `ewma`, `cusum` or `per-sample` (`spe/per-sample:12.5>10`: the
//! sample's raw SPE over its per-sample limit; EWMA and CUSUM values and
//! limits are on the standardised scale), or `none`.

use crate::link::{LinkStats, Notice, Received};
use plumb_model::file::Label;
use plumb_model::wire::{
    Ack, Crossing, DeviceMsg, FaultKind, Greeting, Request, ScoreKind, ScoreTriple, Slot, State,
    Statistic, Status,
};
use serde::Serialize;
use serde_json::{json, Value};
use std::io::Write;

/// Where interpreted frames go: the line printer, the CSV recorder, and a
/// future full-screen live view all implement this.
pub trait EventSink {
    /// One frame from the device.
    fn frame(&mut self, r: &Received);
    /// Something that happened to the link itself.
    fn notice(&mut self, _n: &Notice) {}
    /// The session ended; final counters.
    fn finish(&mut self, _stats: &LinkStats) {}
}

/// Text or JSON lines.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LineFormat {
    /// `word key=value ...`.
    Text,
    /// One JSON object per line.
    Json,
}

/// Feature names for indices in messages (empty: print indices).
#[derive(Debug, Clone, Default)]
pub struct Names(pub Vec<String>);

impl Names {
    /// From a model file's labels.
    pub fn from_labels(labels: &[Label]) -> Self {
        Names(labels.iter().map(|l| l.name.clone()).collect())
    }

    /// Name of feature `i`.
    pub fn feature(&self, i: u8) -> String {
        match self.0.get(usize::from(i)) {
            Some(n) => n.clone(),
            None => format!("#{i}"),
        }
    }
}

/// Prints every frame as a line on a writer (standard output by default).
pub struct LinePrinter<W: Write> {
    out: W,
    format: LineFormat,
    names: Names,
    /// Print per-sample score reports and feature echoes (they can be many).
    pub scores: bool,
}

impl<W: Write> LinePrinter<W> {
    /// A printer.
    pub fn new(out: W, format: LineFormat, names: Names) -> Self {
        LinePrinter {
            out,
            format,
            names,
            scores: true,
        }
    }
}

impl<W: Write> EventSink for LinePrinter<W> {
    fn frame(&mut self, r: &Received) {
        if !self.scores
            && matches!(
                r.frame.msg,
                DeviceMsg::ScoreReport(_) | DeviceMsg::Features(_)
            )
        {
            return;
        }
        let line = match self.format {
            LineFormat::Text => text_line(r, &self.names),
            LineFormat::Json => json_line(r, &self.names).to_string(),
        };
        let _ = writeln!(self.out, "{line}");
        let _ = self.out.flush();
    }

    fn notice(&mut self, n: &Notice) {
        let line = match self.format {
            LineFormat::Text => notice_line(n),
            LineFormat::Json => notice_json(n).to_string(),
        };
        let _ = writeln!(self.out, "{line}");
        let _ = self.out.flush();
    }

    fn finish(&mut self, stats: &LinkStats) {
        let line = match self.format {
            LineFormat::Text => link_line(stats),
            LineFormat::Json => link_json(stats).to_string(),
        };
        let _ = writeln!(self.out, "{line}");
        let _ = self.out.flush();
    }
}

/// Hands every frame to several sinks.
pub struct Fan<'a>(pub Vec<&'a mut dyn EventSink>);

impl EventSink for Fan<'_> {
    fn frame(&mut self, r: &Received) {
        for s in self.0.iter_mut() {
            s.frame(r);
        }
    }

    fn notice(&mut self, n: &Notice) {
        for s in self.0.iter_mut() {
            s.notice(n);
        }
    }

    fn finish(&mut self, stats: &LinkStats) {
        for s in self.0.iter_mut() {
            s.finish(stats);
        }
    }
}

/// One line for a [`Notice`]:
///
/// * `notice what=garbage bytes=N frames=K`: N bytes that made no frame
///   (K damaged frames among them) before the first good one;
/// * `notice what=restart seq=S last=L by=greeting|sequence`: the device's
///   numbering began again at S after L (it restarted);
/// * `notice what=disconnected from="..."`: the port or connection went away;
/// * `notice what=reconnecting attempt=N wait_ms=M error="..."`: attempt N
///   failed, the next in M ms;
/// * `notice what=reconnected to="..." attempts=N after_ms=M`: back after M ms.
pub fn notice_line(n: &Notice) -> String {
    match n {
        Notice::Garbage { bytes, frames } => {
            format!("notice what=garbage bytes={bytes} frames={frames}")
        }
        Notice::Restarted {
            seq,
            last,
            by_greeting,
        } => format!(
            "notice what=restart seq={seq} last={last} by={}",
            if *by_greeting { "greeting" } else { "sequence" }
        ),
        Notice::Disconnected { what } => format!("notice what=disconnected from={what:?}"),
        Notice::Reconnecting {
            attempt,
            wait,
            error,
        } => format!(
            "notice what=reconnecting attempt={attempt} wait_ms={} error={error:?}",
            wait.as_millis()
        ),
        Notice::Reconnected {
            what,
            attempts,
            after,
        } => format!(
            "notice what=reconnected to={what:?} attempts={attempts} after_ms={}",
            after.as_millis()
        ),
    }
}

/// A [`Notice`] as JSON (`event: "notice"` and the fields of [`notice_line`]).
pub fn notice_json(n: &Notice) -> Value {
    match n {
        Notice::Garbage { bytes, frames } => {
            json!({"event": "notice", "what": "garbage", "bytes": bytes, "frames": frames})
        }
        Notice::Restarted {
            seq,
            last,
            by_greeting,
        } => json!({"event": "notice", "what": "restart", "seq": seq, "last": last,
            "by": if *by_greeting { "greeting" } else { "sequence" }}),
        Notice::Disconnected { what } => {
            json!({"event": "notice", "what": "disconnected", "from": what})
        }
        Notice::Reconnecting {
            attempt,
            wait,
            error,
        } => json!({"event": "notice", "what": "reconnecting", "attempt": attempt,
            "wait_ms": wait.as_millis() as u64, "error": error}),
        Notice::Reconnected {
            what,
            attempts,
            after,
        } => json!({"event": "notice", "what": "reconnected", "to": what,
            "attempts": attempts, "after_ms": after.as_millis() as u64}),
    }
}

fn state_name(s: State) -> &'static str {
    match s {
        State::Priming => "priming",
        State::Watching => "watching",
        State::Drifting => "drifting",
    }
}

fn score_name(s: ScoreKind) -> &'static str {
    match s {
        ScoreKind::Spe => "spe",
        ScoreKind::T2 => "t2",
        ScoreKind::Nll => "nll",
    }
}

/// Name of a chart in lines and JSON: `ewma`, `cusum`, `per-sample` (the
/// per-sample limit on the raw score), `residual` (the SPE's residual
/// chart; its feature is given beside it) or `slow` (the SPE's slow charts,
/// model format 5; the same).
fn statistic_name(s: Statistic) -> &'static str {
    match s {
        Statistic::Ewma => "ewma",
        Statistic::Cusum => "cusum",
        Statistic::Sample => "per-sample",
        Statistic::Residual { .. } => "residual",
        Statistic::Slow { .. } => "slow",
    }
}

/// The feature a crossing names (the residual or slow chart's), if any.
fn crossing_feature(c: &Crossing) -> Option<u8> {
    match c.statistic {
        Statistic::Residual { feature } | Statistic::Slow { feature } => Some(feature),
        _ => None,
    }
}

/// Score bits (bit 0 SPE, 1 T², 2 NLL) as `spe+nll`, or `none`.
pub fn score_set(bits: u8) -> String {
    let names: Vec<&str> = [ScoreKind::Spe, ScoreKind::T2, ScoreKind::Nll]
        .into_iter()
        .enumerate()
        .filter(|(i, _)| bits & (1 << i) != 0)
        .map(|(_, s)| score_name(s))
        .collect();
    if names.is_empty() {
        "none".into()
    } else {
        names.join("+")
    }
}

fn slot_name(s: Option<Slot>) -> &'static str {
    match s {
        Some(Slot::A) => "a",
        Some(Slot::B) => "b",
        None => "builtin",
    }
}

fn request_name(r: Request) -> &'static str {
    match r {
        Request::UploadBegin => "upload-begin",
        Request::UploadChunk => "upload-chunk",
        Request::UploadCommit => "upload-commit",
    }
}

/// A fault's kind name and feature index.
pub fn fault_parts(f: FaultKind) -> (&'static str, Option<u8>, Option<u16>) {
    match f {
        FaultKind::WrongLength { got } => ("wrong-length", None, Some(got)),
        FaultKind::NonFinite { feature } => ("non-finite", Some(feature), None),
        FaultKind::OutOfRange { feature } => ("out-of-range", Some(feature), None),
        FaultKind::Overflow => ("overflow", None, None),
    }
}

/// One chart over its limit, with the feature's name where it has one: what
/// event lines, JSON and `plumb replay` print of a drift raised message's
/// crossings.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ChartCrossing {
    /// `spe`, `t2` or `nll`.
    pub score: &'static str,
    /// `ewma`, `cusum`, `per-sample` or `residual`.
    pub statistic: &'static str,
    /// The residual chart's feature, by name.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub feature: Option<String>,
    /// The residual chart's feature, by index in model order.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub index: Option<u8>,
    /// The chart's value.
    pub value: f32,
    /// Its limit.
    pub limit: f32,
}

impl ChartCrossing {
    /// Names a crossing.
    pub fn new(c: &Crossing, names: &Names) -> Self {
        let index = crossing_feature(c);
        Self {
            score: score_name(c.score),
            statistic: statistic_name(c.statistic),
            feature: index.map(|i| names.feature(i)),
            index,
            value: c.value,
            limit: c.limit,
        }
    }
}

/// `spe/ewma:7.5>3.25`; the residual chart names its feature:
/// `spe/residual(vib_band6):1.2>1`.
impl std::fmt::Display for ChartCrossing {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}/{}", self.score, self.statistic)?;
        if let Some(name) = &self.feature {
            write!(f, "({name})")?;
        }
        write!(f, ":{}>{}", self.value, self.limit)
    }
}

fn greeting_text(g: &Greeting) -> String {
    format!(
        "protocol={} firmware={:?} model={:#010x} schema={:#018x} features={} components={} mixture={} capacity={}x{}x{} slot={} generation={} status_every={}",
        g.protocol,
        g.firmware.as_str(),
        g.model_id,
        g.schema,
        g.dims.features,
        g.dims.components,
        g.dims.mixture,
        g.capacity.features,
        g.capacity.components,
        g.capacity.mixture,
        slot_name(g.active),
        g.generation,
        g.status_every
    )
}

fn status_text(s: &Status) -> String {
    let f = s.faults;
    let l = s.link;
    format!(
        "samples={} state={} hot={} faults={}/{}/{}/{} levels={}/{},{}/{},{}/{} link={}/{}/{}/{}/{} last_event={} model={:#010x}",
        s.samples,
        state_name(s.state),
        score_set(s.hot),
        f.wrong_length,
        f.non_finite,
        f.out_of_range,
        f.overflow,
        s.levels[0].ewma,
        s.levels[0].cusum,
        s.levels[1].ewma,
        s.levels[1].cusum,
        s.levels[2].ewma,
        s.levels[2].cusum,
        l.frames_ok,
        l.crc_errors,
        l.framing_errors,
        l.overflows,
        l.undecodable,
        s.last_event.map_or("none".to_string(), |e| e.to_string()),
        s.model_id
    )
}

fn scores_text(s: &ScoreTriple) -> String {
    format!("spe={} t2={} nll={}", s.spe, s.t2, s.nll)
}

/// The text line of a frame.
pub fn text_line(r: &Received, names: &Names) -> String {
    let seq = r.frame.seq;
    let mut line = match &r.frame.msg {
        DeviceMsg::Greeting(g) => format!("greeting seq={seq} {}", greeting_text(g)),
        DeviceMsg::Status(s) => format!("status seq={seq} {}", status_text(s)),
        DeviceMsg::DriftRaised(d) => {
            let top: Vec<String> = d
                .top
                .iter()
                .filter(|s| s.feature != u8::MAX)
                .map(|s| format!("{}:{}", names.feature(s.feature), s.value))
                .collect();
            let crossed: Vec<String> = d
                .crossed
                .iter()
                .map(|c| ChartCrossing::new(c, names).to_string())
                .collect();
            format!(
                "raised seq={seq} sample={} drivers={} {} top={} crossed={}",
                d.sample,
                score_set(d.drivers),
                scores_text(&d.scores),
                if top.is_empty() {
                    "none".into()
                } else {
                    top.join(",")
                },
                if crossed.is_empty() {
                    "none".into()
                } else {
                    crossed.join(",")
                }
            )
        }
        DeviceMsg::DriftCleared(c) => format!("cleared seq={seq} sample={}", c.sample),
        DeviceMsg::SensorFault(f) => {
            let (kind, feature, got) = fault_parts(f.fault);
            let mut s = format!("fault seq={seq} sample={} kind={kind}", f.sample);
            if let Some(i) = feature {
                s.push_str(&format!(" feature={}", names.feature(i)));
            }
            if let Some(g) = got {
                s.push_str(&format!(" got={g}"));
            }
            s
        }
        DeviceMsg::ScoreReport(rep) => match &rep.scores {
            Some(sc) => format!(
                "score seq={seq} sample={} state={} {}",
                rep.sample,
                state_name(rep.state),
                scores_text(sc)
            ),
            None => format!(
                "score seq={seq} sample={} state={} faulted",
                rep.sample,
                state_name(rep.state)
            ),
        },
        DeviceMsg::Features(e) => {
            let values: Vec<String> = e.values.iter().map(|v| v.to_string()).collect();
            format!(
                "features seq={seq} sample={} first={} values={}",
                e.sample,
                e.first,
                values.join(",")
            )
        }
        DeviceMsg::Ack(a) => format!("ack seq={seq} {}", ack_text(a)),
        DeviceMsg::Refused(r) => format!(
            "refused seq={seq} request={} code={} reason={:?}",
            request_name(r.request),
            r.reason.code(),
            r.reason.to_string()
        ),
        DeviceMsg::ResendDone(d) => format!(
            "resend seq={seq} from={} count={} oldest={} dropped={}",
            d.from,
            d.count,
            d.oldest.map_or("none".to_string(), |o| o.to_string()),
            d.dropped
        ),
    };
    if r.recovered {
        line.push_str(" recovered=1");
    }
    line
}

fn ack_text(a: &Ack) -> String {
    match a {
        Ack::Reports { on } => format!("what=reports on={}", u8::from(*on)),
        Ack::StatsReset => "what=stats-reset".into(),
        Ack::UploadOpen { slot, total } => {
            format!(
                "what=upload-open slot={} total={total}",
                slot_name(Some(*slot))
            )
        }
        Ack::ChunkTaken { next } => format!("what=chunk-taken next={next}"),
        Ack::NotTaken { at, next } => format!("what=sample-not-taken at={at} next={next}"),
        Ack::Echo { on } => format!("what=echo on={}", u8::from(*on)),
        Ack::ModelSwitched {
            slot,
            model_id,
            generation,
        } => format!(
            "what=model-switched slot={} model={model_id:#010x} generation={generation}",
            slot_name(Some(*slot))
        ),
    }
}

fn scores_json(s: &ScoreTriple) -> Value {
    json!({"spe": s.spe, "t2": s.t2, "nll": s.nll})
}

/// The JSON object of a frame.
pub fn json_line(r: &Received, names: &Names) -> Value {
    let seq = r.frame.seq;
    let mut v = match &r.frame.msg {
        DeviceMsg::Greeting(g) => json!({
            "event": "greeting", "seq": seq, "protocol": g.protocol, "firmware": g.firmware.as_str(),
            "model": g.model_id, "schema": format!("{:#018x}", g.schema),
            "features": g.dims.features, "components": g.dims.components, "mixture": g.dims.mixture,
            "capacity": [g.capacity.features, g.capacity.components, g.capacity.mixture],
            "slot": slot_name(g.active), "generation": g.generation, "status_every": g.status_every,
        }),
        DeviceMsg::Status(s) => json!({
            "event": "status", "seq": seq, "samples": s.samples, "state": state_name(s.state),
            "hot": score_set(s.hot),
            "faults": {"wrong_length": s.faults.wrong_length, "non_finite": s.faults.non_finite,
                       "out_of_range": s.faults.out_of_range, "overflow": s.faults.overflow},
            "levels": s.levels.iter().map(|l| json!({"ewma": l.ewma, "cusum": l.cusum})).collect::<Vec<_>>(),
            "link": {"frames_ok": s.link.frames_ok, "crc_errors": s.link.crc_errors,
                     "framing_errors": s.link.framing_errors, "overflows": s.link.overflows,
                     "undecodable": s.link.undecodable},
            "last_event": s.last_event, "model": s.model_id,
        }),
        DeviceMsg::DriftRaised(d) => json!({
            "event": "raised", "seq": seq, "sample": d.sample, "drivers": score_set(d.drivers),
            "scores": scores_json(&d.scores),
            "top": d.top.iter().filter(|s| s.feature != u8::MAX)
                .map(|s| json!({"feature": names.feature(s.feature), "index": s.feature, "value": s.value}))
                .collect::<Vec<_>>(),
            "crossed": d.crossed.iter().map(|c| ChartCrossing::new(c, names))
                .collect::<Vec<_>>(),
        }),
        DeviceMsg::DriftCleared(c) => json!({"event": "cleared", "seq": seq, "sample": c.sample}),
        DeviceMsg::SensorFault(f) => {
            let (kind, feature, got) = fault_parts(f.fault);
            json!({"event": "fault", "seq": seq, "sample": f.sample, "kind": kind,
                   "feature": feature.map(|i| names.feature(i)), "index": feature, "got": got})
        }
        DeviceMsg::ScoreReport(rep) => json!({
            "event": "score", "seq": seq, "sample": rep.sample, "state": state_name(rep.state),
            "scores": rep.scores.as_ref().map(scores_json),
        }),
        DeviceMsg::Features(e) => json!({
            "event": "features", "seq": seq, "sample": e.sample, "first": e.first,
            "values": e.values.iter().collect::<Vec<f32>>(),
        }),
        DeviceMsg::Ack(a) => json!({"event": "ack", "seq": seq, "detail": ack_text(a)}),
        DeviceMsg::Refused(r) => json!({
            "event": "refused", "seq": seq, "request": request_name(r.request),
            "code": r.reason.code(), "reason": r.reason.to_string(),
        }),
        DeviceMsg::ResendDone(d) => json!({
            "event": "resend", "seq": seq, "from": d.from, "count": d.count,
            "oldest": d.oldest, "dropped": d.dropped,
        }),
    };
    if r.recovered {
        v["recovered"] = json!(true);
    }
    v
}

/// The closing counters line.
pub fn link_line(s: &LinkStats) -> String {
    let f = s.frames;
    format!(
        "link frames_ok={} crc_errors={} framing_errors={} overflows={} undecodable={} bytes={} gaps={} missing={} resend_requests={} recovered={} lost={} duplicates={} restarts={} reconnects={}",
        f.frames_ok,
        f.crc_errors,
        f.framing_errors,
        f.overflows,
        f.undecodable,
        s.bytes,
        s.gaps,
        s.missing,
        s.resend_requests,
        s.recovered,
        s.lost,
        s.duplicates,
        s.restarts,
        s.reconnects
    )
}

/// The closing counters as JSON.
pub fn link_json(s: &LinkStats) -> Value {
    let f = s.frames;
    json!({
        "event": "link", "frames_ok": f.frames_ok, "crc_errors": f.crc_errors,
        "framing_errors": f.framing_errors, "overflows": f.overflows, "undecodable": f.undecodable,
        "bytes": s.bytes, "gaps": s.gaps, "missing": s.missing, "resend_requests": s.resend_requests,
        "recovered": s.recovered, "lost": s.lost, "duplicates": s.duplicates, "restarts": s.restarts,
        "reconnects": s.reconnects,
    })
}

/// Writes what arrived as CSV: `seq,event,sample,state,spe,t2,nll,detail,recovered`
/// (scores as the shortest decimal that reads back to the same `f32`;
/// `detail` is the rest of the text line, quoted).
pub struct Recorder<W: Write> {
    out: W,
    names: Names,
    error: Option<std::io::Error>,
}

/// Header of [`Recorder`] files.
pub const RECORD_HEADER: &str = "seq,event,sample,state,spe,t2,nll,detail,recovered";

impl<W: Write> Recorder<W> {
    /// Starts a recording (writes the header).
    pub fn new(mut out: W, names: Names) -> std::io::Result<Self> {
        writeln!(out, "{RECORD_HEADER}")?;
        Ok(Recorder {
            out,
            names,
            error: None,
        })
    }

    /// The first write error, if any.
    pub fn take_error(&mut self) -> Option<std::io::Error> {
        self.error.take()
    }

    fn row(&mut self, r: &Received) -> std::io::Result<()> {
        let text = text_line(r, &self.names);
        let (word, rest) = text.split_once(' ').unwrap_or((text.as_str(), ""));
        let (sample, state, scores): (Option<u64>, Option<State>, Option<ScoreTriple>) =
            match &r.frame.msg {
                DeviceMsg::ScoreReport(rep) => (Some(rep.sample), Some(rep.state), rep.scores),
                DeviceMsg::DriftRaised(d) => (Some(d.sample), None, Some(d.scores)),
                DeviceMsg::DriftCleared(c) => (Some(c.sample), None, None),
                DeviceMsg::SensorFault(f) => (Some(f.sample), None, None),
                DeviceMsg::Status(s) => (Some(s.samples), Some(s.state), None),
                _ => (None, None, None),
            };
        let opt = |v: Option<f32>| v.map_or(String::new(), |x| x.to_string());
        writeln!(
            self.out,
            "{},{},{},{},{},{},{},\"{}\",{}",
            r.frame.seq,
            word,
            sample.map_or(String::new(), |s| s.to_string()),
            state.map_or("", state_name),
            opt(scores.map(|s| s.spe)),
            opt(scores.map(|s| s.t2)),
            opt(scores.map(|s| s.nll)),
            rest.replace('"', "\"\""),
            u8::from(r.recovered)
        )
    }
}

impl<W: Write> EventSink for Recorder<W> {
    fn frame(&mut self, r: &Received) {
        // Feature echoes are samples, not events (`SampleRecorder`).
        if self.error.is_some() || matches!(r.frame.msg, DeviceMsg::Features(_)) {
            return;
        }
        if let Err(e) = self.row(r) {
            self.error = Some(e);
        }
    }

    fn finish(&mut self, _stats: &LinkStats) {
        if let Err(e) = self.out.flush() {
            self.error.get_or_insert(e);
        }
    }
}

/// Writes the samples a device echoes ([`DeviceMsg::Features`]) as a log
/// `plumb fit` reads: a header `t[s],<feature>[<unit>],...` (the model's
/// labels), then one row per sample whose every feature arrived: its time,
/// the device's sample index times the model's sample period (a gap in the
/// times is a gap in the samples; with no period in the model, the seconds
/// since recording began), and its features as the shortest decimals that
/// read back to the same `f32`. A sample with a part missing (a frame lost
/// on the link: echoes are not kept for resend) is left out and counted.
pub struct SampleRecorder<W: Write> {
    out: W,
    features: usize,
    period_us: u32,
    start: std::time::Instant,
    /// The sample being put together: its index and its values so far.
    pending: Option<(u64, Vec<Option<f32>>)>,
    /// Rows written.
    pub rows: u64,
    /// Samples left out because a part never arrived.
    pub incomplete: u64,
    /// Echo parts that do not fit the model (past its last feature).
    pub misfits: u64,
    error: Option<std::io::Error>,
}

impl<W: Write> SampleRecorder<W> {
    /// Starts a recording of samples of a model with `labels` and a sample
    /// period of `period_us` microseconds (0: unknown); writes the header.
    pub fn new(mut out: W, labels: &[Label], period_us: u32) -> std::io::Result<Self> {
        let header = crate::logs::header_line(labels, Some(("t", "s")));
        writeln!(out, "{header}")?;
        Ok(SampleRecorder {
            out,
            features: labels.len(),
            period_us,
            start: std::time::Instant::now(),
            pending: None,
            rows: 0,
            incomplete: 0,
            misfits: 0,
            error: None,
        })
    }

    /// The first write error, if any.
    pub fn take_error(&mut self) -> Option<std::io::Error> {
        self.error.take()
    }

    fn part(&mut self, sample: u64, first: usize, values: impl Iterator<Item = f32>) {
        if self.pending.as_ref().is_some_and(|(s, _)| *s != sample) {
            // A new sample before the last was whole: a part was lost.
            self.pending = None;
            self.incomplete += 1;
        }
        let d = self.features;
        let (_, row) = self.pending.get_or_insert_with(|| (sample, vec![None; d]));
        for (j, v) in values.enumerate() {
            match row.get_mut(first + j) {
                Some(slot) => *slot = Some(v),
                None => {
                    self.misfits += 1;
                    return;
                }
            }
        }
        if row.iter().all(Option::is_some) {
            let mut line = if self.period_us > 0 {
                // In whole microseconds: exact.
                let us = u128::from(sample) * u128::from(self.period_us);
                format!("{}.{:06}", us / 1_000_000, us % 1_000_000)
            } else {
                format!("{:.3}", self.start.elapsed().as_secs_f64())
            };
            for v in row.iter().flatten() {
                line.push(',');
                line.push_str(&v.to_string());
            }
            self.pending = None;
            match writeln!(self.out, "{line}") {
                Ok(()) => self.rows += 1,
                Err(e) => {
                    self.error.get_or_insert(e);
                }
            }
        }
    }
}

impl<W: Write> EventSink for SampleRecorder<W> {
    fn frame(&mut self, r: &Received) {
        if let DeviceMsg::Features(e) = &r.frame.msg {
            self.part(e.sample, usize::from(e.first), e.values.iter());
        }
    }

    fn finish(&mut self, _stats: &LinkStats) {
        if self.pending.take().is_some() {
            self.incomplete += 1;
        }
        if let Err(e) = self.out.flush() {
            self.error.get_or_insert(e);
        }
    }
}
