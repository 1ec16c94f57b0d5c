//! Conversations with a device over a [`Link`]: requests with retries, the
//! greeting, feeding samples with flow control, and model uploads.
//!
//! Every function hands each frame it receives to a caller's `sink` (the
//! line printer, a recorder, a live view), including the ones it was waiting
//! for, so nothing the device says is hidden.

use crate::error::{Error, Result};
use crate::link::{Link, Received};
use plumb_model::wire::{
    self, Ack, DeviceMsg, Greeting, HostMsg, Reason, Request, Slot, Status, MAX_CHUNK,
};
use std::time::{Duration, Instant};

/// How long to wait for an answer, and how often to ask.
#[derive(Debug, Clone, Copy)]
pub struct Patience {
    /// Wait for one answer.
    pub reply: Duration,
    /// Times a request is sent before giving up.
    pub tries: u32,
}

impl Default for Patience {
    fn default() -> Self {
        Patience {
            reply: Duration::from_millis(1000),
            tries: 10,
        }
    }
}

/// Reply timeout of a sample stream that follows the measured round trip:
/// the smoothed round-trip time and its variation of RFC 6298 (TCP's
/// retransmission timer), `SRTT + max(G, 4·RTTVAR)`, doubled after each
/// timeout until the next measurement or the next sample the device takes
/// ([`ReplyTimer::progressed`]), and kept within
/// [[`MIN_REPLY`], `ceiling`]. Karn's rule: a sample sent more than once
/// gives no measurement. Before the first measurement the timeout is the
/// ceiling.
#[derive(Debug, Clone, Copy)]
pub struct ReplyTimer {
    srtt: Option<f64>,
    rttvar: f64,
    backoff: u32,
    ceiling: Duration,
}

/// Shortest reply timeout of a sample stream, and the clock granularity `G`
/// of [`ReplyTimer`].
pub const MIN_REPLY: Duration = Duration::from_millis(2);

impl ReplyTimer {
    /// A timer that never waits longer than `ceiling`.
    pub fn new(ceiling: Duration) -> Self {
        ReplyTimer {
            srtt: None,
            rttvar: 0.0,
            backoff: 0,
            ceiling,
        }
    }

    /// The current timeout.
    pub fn timeout(&self) -> Duration {
        let floor = MIN_REPLY.min(self.ceiling);
        let Some(srtt) = self.srtt else {
            return self.ceiling;
        };
        let base = srtt + (4.0 * self.rttvar).max(MIN_REPLY.as_secs_f64());
        let t = base * f64::from(1u32 << self.backoff.min(16));
        Duration::from_secs_f64(t.min(self.ceiling.as_secs_f64())).max(floor)
    }

    /// A measured round trip (RFC 6298, section 2: α = 1/8, β = 1/4).
    pub fn observe(&mut self, rtt: Duration) {
        let r = rtt.as_secs_f64();
        match self.srtt {
            None => {
                self.srtt = Some(r);
                self.rttvar = r / 2.0;
            }
            Some(s) => {
                self.rttvar = 0.75 * self.rttvar + 0.25 * (s - r).abs();
                self.srtt = Some(0.875 * s + 0.125 * r);
            }
        }
        self.backoff = 0;
    }

    /// A timeout passed without an answer: back off (RFC 6298, 5.5).
    pub fn expired(&mut self) {
        self.backoff = (self.backoff + 1).min(16);
    }

    /// The device took a sample again after a timeout, with no round trip to
    /// measure (Karn's rule): the back-off ends, back to the measured
    /// timeout. TCP keeps the backed-off timeout until a fresh measurement,
    /// because there a timeout may mean a congested path; on a serial line it
    /// means a damaged frame, and at 1 % of bytes damaged two sample frames
    /// in three are, so without this the wait climbs to the ceiling and
    /// stays there (RELIABILITY.md, "Without back-off on noise").
    pub fn progressed(&mut self) {
        self.backoff = 0;
    }
}

/// Sends `msg` and waits for the first frame `pick` accepts, sending `msg`
/// again after each `patience.reply` without one.
pub fn request<T>(
    link: &mut Link,
    msg: &HostMsg,
    patience: Patience,
    sink: &mut dyn FnMut(&Received),
    mut pick: impl FnMut(&DeviceMsg) -> Option<T>,
) -> Result<T> {
    for _ in 0..patience.tries.max(1) {
        link.send(msg)?;
        let deadline = Instant::now() + patience.reply;
        while let Some(left) = deadline.checked_duration_since(Instant::now()) {
            match link.recv(left)? {
                Some(r) => {
                    sink(&r);
                    if r.recovered {
                        continue;
                    }
                    if let Some(t) = pick(&r.frame.msg) {
                        return Ok(t);
                    }
                }
                None if link.is_closed() => return Err(closed(link)),
                None => break,
            }
        }
    }
    Err(no_answer(link, msg, patience))
}

fn closed(link: &Link) -> Error {
    let diag = link.diagnostics();
    let mut msg = format!("the link to {} closed", link.describe());
    if !diag.trim().is_empty() {
        msg.push_str(&format!(":\n{}", diag.trim_end()));
    }
    Error::input(msg)
}

fn no_answer(link: &Link, msg: &HostMsg, patience: Patience) -> Error {
    Error::input(format!(
        "no answer from {} to {} after {} tries of {} ms",
        link.describe(),
        request_name(msg),
        patience.tries.max(1),
        patience.reply.as_millis()
    ))
}

/// A short name of a host message, for messages.
pub fn request_name(msg: &HostMsg) -> &'static str {
    match msg {
        HostMsg::Sample { .. } => "a sample",
        HostMsg::StatusQuery => "a status query",
        HostMsg::ResendFrom { .. } => "a resend request",
        HostMsg::SetReports { .. } => "a score-report switch",
        HostMsg::UploadBegin { .. } => "an upload begin",
        HostMsg::UploadChunk { .. } => "an upload chunk",
        HostMsg::UploadCommit => "an upload commit",
        HostMsg::ResetStats => "a statistics reset",
        HostMsg::GreetingQuery => "a greeting query",
        HostMsg::SetEcho { .. } => "a feature-echo switch",
    }
}

/// Asks for the device's greeting.
pub fn greeting(
    link: &mut Link,
    patience: Patience,
    sink: &mut dyn FnMut(&Received),
) -> Result<Greeting> {
    request(link, &HostMsg::GreetingQuery, patience, sink, |m| match m {
        DeviceMsg::Greeting(g) => Some(g.clone()),
        _ => None,
    })
}

/// Asks for a status.
pub fn status(
    link: &mut Link,
    patience: Patience,
    sink: &mut dyn FnMut(&Received),
) -> Result<Status> {
    request(link, &HostMsg::StatusQuery, patience, sink, |m| match m {
        DeviceMsg::Status(s) => Some(*s),
        _ => None,
    })
}

/// Protocol versions this host understands.
pub const PROTOCOLS: [u16; 1] = [wire::PROTOCOL_VERSION];

/// Refuses a device whose greeting carries a protocol version this host
/// does not know.
pub fn check_protocol(g: &Greeting) -> Result<()> {
    if PROTOCOLS.contains(&g.protocol) {
        Ok(())
    } else {
        let known: Vec<String> = PROTOCOLS.iter().map(u16::to_string).collect();
        Err(Error::input(format!(
            "the device speaks protocol version {}; this host knows version {} \
             (use a plumb and a board firmware of the same protocol version)",
            g.protocol,
            known.join(", ")
        )))
    }
}

/// Settings of [`feed`].
#[derive(Debug, Clone, Copy)]
pub struct FeedConfig {
    /// Samples in flight before waiting for the device's reports (default
    /// 1). Whatever the window, the device takes each sample once and in
    /// order (each carries its index): after a loss it drops those behind
    /// it until the feed sends again from the lost one.
    pub window: usize,
    /// Restart the device's statistics first (warm-up, sample index 0), so
    /// the run is comparable with a replay of the same log.
    pub reset: bool,
    /// Turn score reports off again at the end.
    pub reports_off_after: bool,
    /// Answers and retries. While samples stream, the wait for a report
    /// follows the measured round trip ([`ReplyTimer`]) and `reply` is only
    /// its ceiling; the feed ends after `reply × tries` in which the device
    /// took no sample.
    pub patience: Patience,
}

impl Default for FeedConfig {
    fn default() -> Self {
        FeedConfig {
            window: 1,
            reset: true,
            reports_off_after: true,
            patience: Patience::default(),
        }
    }
}

/// What a [`feed`] did.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct FeedSummary {
    /// Device sample index of the first sample fed (0 after a reset).
    pub base: u64,
    /// Samples the host had.
    pub samples: u64,
    /// Sample frames sent, resends included.
    pub frames_sent: u64,
    /// Sample frames sent again (a sample or its report was lost, or the
    /// device dropped samples behind a lost one).
    pub resent: u64,
    /// Samples the device took, by its own count.
    pub taken: u64,
    /// Score reports that never arrived (the sample was taken).
    pub reports_missing: u64,
}

/// Streams `samples` (features in model order) to the device, pacing on its
/// per-sample score reports (turned on for the run). `sink` sees every
/// frame; a score report's `sample` minus [`FeedSummary::base`] is the
/// host's sample index.
pub fn feed<I>(
    link: &mut Link,
    samples: I,
    cfg: FeedConfig,
    sink: &mut dyn FnMut(&Received),
) -> Result<FeedSummary>
where
    I: IntoIterator<Item = Result<Vec<f32>>>,
{
    let patience = cfg.patience;
    let window = cfg.window.max(1) as u64;
    if cfg.reset {
        request(link, &HostMsg::ResetStats, patience, sink, |m| {
            matches!(m, DeviceMsg::Ack(Ack::StatsReset)).then_some(())
        })?;
    }
    request(
        link,
        &HostMsg::SetReports { on: true },
        patience,
        sink,
        |m| matches!(m, DeviceMsg::Ack(Ack::Reports { on: true })).then_some(()),
    )?;
    let base = if cfg.reset {
        0
    } else {
        status(link, patience, sink)?.samples
    };

    let mut sum = FeedSummary {
        base,
        ..FeedSummary::default()
    };
    let mut source = samples.into_iter();
    let mut exhausted = false;
    // Samples [acked, next) are in flight, oldest first, with the time each
    // was sent if it was sent once (a round-trip measurement, Karn's rule).
    // Each carries its device index (`base` + its host index), so the device
    // takes it once and in order however often it is sent
    // (PROTOCOL.md, "Which samples are taken").
    let mut inflight = InFlight::new();
    let mut acked = 0u64;
    let mut next = 0u64;
    // Whether the samples in flight were sent again since the last progress:
    // another sign of a gap then only repeats what the resend answers.
    let mut resent_since_progress = false;
    let mut last_heard = Instant::now();
    // This long without the device taking a sample ends the feed (as `tries`
    // unanswered requests would), whether the line is silent or busy with
    // frames that bring no progress.
    let give_up = patience.reply * patience.tries.max(1);
    let mut last_progress = Instant::now();
    let mut timer = ReplyTimer::new(patience.reply);

    loop {
        while !exhausted && (next - acked) < window {
            match source.next() {
                Some(x) => {
                    let x = x?;
                    send_sample(link, base + next, &x)?;
                    sum.frames_sent += 1;
                    inflight.push_back((x, Some(Instant::now())));
                    next += 1;
                    sum.samples += 1;
                }
                None => exhausted = true,
            }
        }
        if exhausted && acked == next {
            break;
        }
        if last_progress.elapsed() > give_up {
            return Err(Error::input(format!(
                "{} took no sample for {:.1} s: stopped after {} of {} samples",
                link.describe(),
                give_up.as_secs_f64(),
                acked,
                sum.samples
            )));
        }
        let wait = timer.timeout().saturating_sub(last_heard.elapsed());
        let got = if wait.is_zero() {
            None
        } else {
            link.recv(wait)?
        };
        let Some(r) = got else {
            if link.is_closed() {
                return Err(closed(link));
            }
            // Nothing for a reply time: the oldest sample or its report was
            // lost. Sending again is safe either way: a sample the device
            // already took is answered with `Ack::NotTaken`, which says so.
            timer.expired();
            resend(link, &mut inflight, base + acked, &mut sum)?;
            resent_since_progress = true;
            last_heard = Instant::now();
            continue;
        };
        sink(&r);
        if r.recovered {
            continue;
        }
        last_heard = Instant::now();
        // How many of the host's samples the device has taken, if the frame
        // says; and whether it dropped a sample sent ahead of its next one,
        // i.e. one behind a lost sample.
        let (taken, gap) = match &r.frame.msg {
            DeviceMsg::ScoreReport(rep) => match rep.sample.checked_sub(base) {
                Some(idx) if idx >= acked && idx < next => (Some(idx + 1), false),
                _ => (None, false),
            },
            DeviceMsg::Status(st) => (Some(st.samples.saturating_sub(base)), false),
            DeviceMsg::Ack(Ack::NotTaken { at, next: want }) => {
                // Indices travel modulo 2³²: ahead means less than 2³¹ ahead.
                let ahead = at.wrapping_sub(*want as u32) as i32 > 0;
                (Some(want.saturating_sub(base)), ahead)
            }
            _ => (None, false),
        };
        if let Some(taken) = taken.filter(|t| *t > acked && *t <= next) {
            let reported = matches!(r.frame.msg, DeviceMsg::ScoreReport(_));
            sum.reports_missing += taken - acked - u64::from(reported);
            for _ in acked..taken - 1 {
                inflight.pop_front();
            }
            match inflight.pop_front() {
                Some((_, Some(sent))) if reported => timer.observe(sent.elapsed()),
                _ => timer.progressed(),
            }
            acked = taken;
            last_progress = Instant::now();
            resent_since_progress = false;
        }
        // The device dropped a sample because the one before it never
        // arrived: send again from the oldest not taken, once per progress
        // (the rest of the window behind the loss brings the same answer).
        if gap && acked < next && !resent_since_progress {
            resend(link, &mut inflight, base + acked, &mut sum)?;
            resent_since_progress = true;
        }
    }
    // A closing status: its sequence number shows any gap at the end, and
    // the link then asks for what it missed.
    let st = status(link, patience, sink)?;
    sum.taken = st.samples.saturating_sub(base);
    if cfg.reports_off_after {
        request(
            link,
            &HostMsg::SetReports { on: false },
            patience,
            sink,
            |m| matches!(m, DeviceMsg::Ack(Ack::Reports { on: false })).then_some(()),
        )?;
    }
    link.drain(
        patience.reply,
        patience.reply * patience.tries.max(1),
        |r| sink(r),
    )?;
    Ok(sum)
}

/// Samples sent and not yet taken, oldest first, each with the time it was
/// sent if it was sent only once.
type InFlight = std::collections::VecDeque<(Vec<f32>, Option<Instant>)>;

/// Sends every sample in flight again, the oldest as the device's sample
/// `at`; each counts as resent and loses its round-trip measurement.
fn resend(link: &mut Link, inflight: &mut InFlight, at: u64, sum: &mut FeedSummary) -> Result<()> {
    for (i, (x, sent)) in inflight.iter_mut().enumerate() {
        *sent = None;
        send_sample(link, at + i as u64, x)?;
        sum.frames_sent += 1;
        sum.resent += 1;
    }
    Ok(())
}

/// Sends `x` as the device's sample `at` (modulo 2³² on the wire).
fn send_sample(link: &mut Link, at: u64, x: &[f32]) -> Result<()> {
    let features: heapless::Vec<f32, { plumb_model::MAX_FEATURES }> = heapless::Vec::from_slice(x)
        .map_err(|_| {
            Error::input(format!(
                "a sample of {} features does not fit a frame (at most {})",
                x.len(),
                plumb_model::MAX_FEATURES
            ))
        })?;
    link.send(&HostMsg::Sample {
        at: at as u32,
        features,
    })
}

/// How an upload ended.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UploadOutcome {
    /// The device checked the file and runs it.
    Switched {
        /// Slot written.
        slot: Slot,
        /// Id of the model now running.
        model_id: u32,
        /// Generation written beside the slot.
        generation: u32,
    },
    /// The device refused; the running model is unchanged.
    Refused {
        /// The request refused.
        request: Request,
        /// Why.
        reason: Reason,
    },
    /// The host stopped on purpose before committing (`stop_after`).
    Interrupted {
        /// Bytes the device acknowledged.
        acknowledged: u32,
    },
}

/// Settings of [`upload`].
#[derive(Debug, Clone, Copy)]
pub struct UploadConfig {
    /// Bytes per chunk (1..=128).
    pub chunk: usize,
    /// Stop without committing once this many bytes are acknowledged
    /// (tests of interrupted uploads).
    pub stop_after: Option<usize>,
    /// Answers and retries.
    pub patience: Patience,
}

impl Default for UploadConfig {
    fn default() -> Self {
        UploadConfig {
            chunk: MAX_CHUNK,
            stop_after: None,
            patience: Patience::default(),
        }
    }
}

enum Answer<T> {
    Done(T),
    Refused(Request, Reason),
}

/// Uploads a model file: begin, acknowledged chunks, commit. `progress`
/// gets the bytes acknowledged so far.
pub fn upload(
    link: &mut Link,
    file: &[u8],
    cfg: UploadConfig,
    sink: &mut dyn FnMut(&Received),
    progress: &mut dyn FnMut(u64),
) -> Result<UploadOutcome> {
    let patience = cfg.patience;
    let total = u32::try_from(file.len())
        .map_err(|_| Error::input("the model file is larger than 4 GiB"))?;
    let crc = wire::crc32(file);
    let begin = HostMsg::UploadBegin { total, crc };
    let opened = request(link, &begin, patience, sink, |m| match m {
        DeviceMsg::Ack(Ack::UploadOpen { slot, total: t }) if *t == total => {
            Some(Answer::Done(*slot))
        }
        DeviceMsg::Refused(r) if r.request == Request::UploadBegin => match r.reason {
            // The first answer when an older upload was still open; the
            // answer to this begin follows.
            Reason::Abandoned { .. } => None,
            reason => Some(Answer::Refused(r.request, reason)),
        },
        _ => None,
    })?;
    let slot = match opened {
        Answer::Done(slot) => slot,
        Answer::Refused(request, reason) => return Ok(UploadOutcome::Refused { request, reason }),
    };

    let chunk = cfg.chunk.clamp(1, MAX_CHUNK);
    let mut offset = 0u32;
    while offset < total {
        if let Some(stop) = cfg.stop_after {
            if offset as usize >= stop {
                return Ok(UploadOutcome::Interrupted {
                    acknowledged: offset,
                });
            }
        }
        let start = offset as usize;
        let end = (start + chunk).min(file.len());
        let data = heapless::Vec::from_slice(&file[start..end])
            .map_err(|_| Error::input("upload chunk over the protocol's limit"))?;
        let msg = HostMsg::UploadChunk { offset, data };
        let here = offset;
        let answer = request(link, &msg, patience, sink, |m| match m {
            DeviceMsg::Ack(Ack::ChunkTaken { next }) if *next > here => Some(Answer::Done(*next)),
            DeviceMsg::Refused(r) if r.request == Request::UploadChunk => match r.reason {
                // The chunk before this one was taken twice, or an ack was
                // lost: continue where the device is.
                Reason::UnexpectedOffset { expected, .. } => Some(Answer::Done(expected)),
                reason => Some(Answer::Refused(r.request, reason)),
            },
            _ => None,
        })?;
        match answer {
            Answer::Done(next) => {
                offset = next.min(total);
                progress(u64::from(offset));
            }
            Answer::Refused(request, reason) => {
                return Ok(UploadOutcome::Refused { request, reason })
            }
        }
    }

    let committed = request(link, &HostMsg::UploadCommit, patience, sink, |m| match m {
        DeviceMsg::Ack(Ack::ModelSwitched {
            slot,
            model_id,
            generation,
        }) => Some(Answer::Done(UploadOutcome::Switched {
            slot: *slot,
            model_id: *model_id,
            generation: *generation,
        })),
        DeviceMsg::Refused(r) if r.request == Request::UploadCommit => {
            Some(Answer::Refused(r.request, r.reason))
        }
        _ => None,
    })?;
    match committed {
        Answer::Done(outcome) => Ok(outcome),
        // A commit sent twice (its answer was lost): the first one may have
        // switched. The greeting says what runs.
        Answer::Refused(Request::UploadCommit, Reason::NoUpload) => {
            let g = greeting(link, patience, sink)?;
            let id = plumb_model::file::split(file)
                .ok()
                .and_then(|s| plumb_model::file::peek(s.payload).ok())
                .map(|(meta, _)| meta.id);
            if g.active == Some(slot) && Some(g.model_id) == id {
                Ok(UploadOutcome::Switched {
                    slot,
                    model_id: g.model_id,
                    generation: g.generation,
                })
            } else {
                Ok(UploadOutcome::Refused {
                    request: Request::UploadCommit,
                    reason: Reason::NoUpload,
                })
            }
        }
        Answer::Refused(request, reason) => Ok(UploadOutcome::Refused { request, reason }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::link::{Chunk, Transport};
    use plumb_model::wire::{DeviceFrame, FaultTally, Level, LinkCounters, State};
    use std::collections::VecDeque;

    /// A device that acknowledges the feed's set-up and answers every status
    /// query, but never takes a sample: frames keep coming, progress never.
    struct Stuck {
        out: VecDeque<Vec<u8>>,
        seq: u32,
    }

    impl Stuck {
        fn reply(&mut self, msg: DeviceMsg) {
            self.out
                .push_back(wire::encode_frame_vec(&DeviceFrame { seq: self.seq, msg }));
            self.seq += 1;
        }
    }

    impl Transport for Stuck {
        fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
            for frame in bytes.split(|b| *b == 0).filter(|f| !f.is_empty()) {
                let mut scratch = [0u8; 512];
                match wire::decode_frame::<HostMsg>(frame, &mut scratch) {
                    Ok(HostMsg::ResetStats) => self.reply(DeviceMsg::Ack(Ack::StatsReset)),
                    Ok(HostMsg::SetReports { on }) => {
                        self.reply(DeviceMsg::Ack(Ack::Reports { on }))
                    }
                    Ok(HostMsg::StatusQuery) => self.reply(DeviceMsg::Status(Status {
                        samples: 0,
                        state: State::Priming,
                        hot: 0,
                        faults: FaultTally::default(),
                        levels: [Level::default(); 3],
                        link: LinkCounters::default(),
                        last_event: None,
                        model_id: 1,
                    })),
                    _ => {}
                }
            }
            Ok(())
        }
        fn recv(&mut self, timeout: Duration) -> Chunk {
            match self.out.pop_front() {
                Some(b) => Chunk::Bytes(b),
                None => {
                    std::thread::sleep(timeout.min(Duration::from_millis(2)));
                    Chunk::Timeout
                }
            }
        }
        fn describe(&self) -> String {
            "stuck device".into()
        }
    }

    /// A device that answers but takes no sample ends the feed with an
    /// error after `reply × tries`, instead of a feed that never returns.
    #[test]
    fn feed_ends_when_the_device_takes_no_sample() {
        let mut link = Link::new(Box::new(Stuck {
            out: VecDeque::new(),
            seq: 0,
        }));
        let cfg = FeedConfig {
            patience: Patience {
                reply: Duration::from_millis(20),
                tries: 10,
            },
            ..FeedConfig::default()
        };
        let start = Instant::now();
        let samples = vec![Ok(vec![1.0f32, 2.0])];
        let err = feed(&mut link, samples, cfg, &mut |_| {}).unwrap_err();
        let took = start.elapsed();
        let msg = err.to_string();
        assert!(msg.contains("took no sample for 0.2 s"), "{msg}");
        assert!(msg.contains("stopped after 0 of 1 samples"), "{msg}");
        assert!(took < Duration::from_secs(5), "{took:?}");
    }

    fn ms(v: f64) -> Duration {
        Duration::from_secs_f64(v / 1e3)
    }

    fn close(a: Duration, b: Duration) -> bool {
        (a.as_secs_f64() - b.as_secs_f64()).abs() < 1e-9
    }

    /// RFC 6298, section 2: the first measurement R gives SRTT = R,
    /// RTTVAR = R/2, RTO = SRTT + max(G, 4·RTTVAR) = 3R; each later one
    /// RTTVAR ← ¾RTTVAR + ¼|SRTT − R|, SRTT ← ⅞SRTT + ⅛R; section 5.5: the
    /// timeout doubles after each expiry until the next measurement.
    #[test]
    fn reply_timer_follows_rfc_6298() {
        let mut t = ReplyTimer::new(ms(1000.0));
        assert!(
            close(t.timeout(), ms(1000.0)),
            "no measurement yet: the ceiling"
        );
        t.observe(ms(10.0));
        assert!(close(t.timeout(), ms(30.0)), "{:?}", t.timeout());
        t.observe(ms(10.0));
        // RTTVAR = 0.75 × 5 = 3.75 ms; RTO = 10 + 15 = 25 ms.
        assert!(close(t.timeout(), ms(25.0)), "{:?}", t.timeout());
        t.observe(ms(18.0));
        // RTTVAR = 0.75 × 3.75 + 0.25 × 8 = 4.8125; SRTT = 8.75 + 2.25 = 11.
        assert!(close(t.timeout(), ms(11.0 + 19.25)), "{:?}", t.timeout());
        t.expired();
        assert!(close(t.timeout(), ms(2.0 * 30.25)));
        t.expired();
        assert!(close(t.timeout(), ms(4.0 * 30.25)));
        for _ in 0..40 {
            t.expired();
        }
        assert!(close(t.timeout(), ms(1000.0)), "capped at the ceiling");
        t.observe(ms(11.0));
        assert!(t.timeout() < ms(40.0), "a measurement ends the back-off");
    }

    /// Progress without a measurement (a sample taken after being sent
    /// again) ends the back-off but leaves the estimate as it was.
    #[test]
    fn reply_timer_progress_ends_the_back_off() {
        let mut t = ReplyTimer::new(ms(1000.0));
        t.observe(ms(10.0));
        assert!(close(t.timeout(), ms(30.0)));
        t.expired();
        t.expired();
        assert!(close(t.timeout(), ms(120.0)));
        t.progressed();
        assert!(close(t.timeout(), ms(30.0)), "{:?}", t.timeout());
        // Before any measurement it is still the ceiling.
        let mut fresh = ReplyTimer::new(ms(1000.0));
        fresh.expired();
        fresh.progressed();
        assert!(close(fresh.timeout(), ms(1000.0)));
    }

    /// A very fast link: the variation term never drops below the clock
    /// granularity, and the timeout never below the floor.
    #[test]
    fn reply_timer_floor_and_granularity() {
        let mut t = ReplyTimer::new(ms(1000.0));
        for _ in 0..50 {
            t.observe(ms(0.1));
        }
        assert!(close(t.timeout(), ms(2.1)), "{:?}", t.timeout());
        let mut tiny = ReplyTimer::new(ms(1.0));
        tiny.observe(ms(0.1));
        assert!(
            close(tiny.timeout(), ms(1.0)),
            "ceiling below the floor wins"
        );
    }
}
