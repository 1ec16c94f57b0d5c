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
    /// Samples in flight before waiting for the device's reports. With 1
    /// (the default) a sample lost on the link is detected and sent again,
    /// so the device sees exactly the host's sequence; with more, a loss
    /// can only be counted (the samples after it were already taken in its
    /// place).
    pub window: usize,
    /// Restart the device's statistics first (warm-up, sample index 0), so
    /// the run is comparable with a replay of the same log.
    pub reset: bool,
    /// Turn score reports off again at the end.
    pub reports_off_after: bool,
    /// Answers and retries.
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
    /// Samples sent again because the device had not taken them.
    pub resent: u64,
    /// Samples the device took, by its own count.
    pub taken: u64,
    /// Score reports that never arrived (the sample was taken).
    pub reports_missing: u64,
    /// Status queries sent to find out where the device stood.
    pub status_queries: u64,
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
    // Samples [acked, next) are in flight, oldest first.
    let mut inflight: std::collections::VecDeque<Vec<f32>> = Default::default();
    let mut acked = 0u64;
    let mut next = 0u64;
    let mut query_sent: Option<Instant> = None;
    let mut last_heard = Instant::now();
    let mut silent_tries = 0u32;

    loop {
        while !exhausted && (next - acked) < window {
            match source.next() {
                Some(x) => {
                    let x = x?;
                    send_sample(link, &x)?;
                    sum.frames_sent += 1;
                    inflight.push_back(x);
                    next += 1;
                    sum.samples += 1;
                }
                None => exhausted = true,
            }
        }
        if exhausted && acked == next {
            break;
        }
        let wait = patience.reply.saturating_sub(last_heard.elapsed());
        let got = if wait.is_zero() {
            None
        } else {
            link.recv(wait)?
        };
        let Some(r) = got else {
            if link.is_closed() {
                return Err(closed(link));
            }
            // No progress for a reply time: ask where the device stands.
            silent_tries += 1;
            if silent_tries > patience.tries.max(1) {
                return Err(Error::input(format!(
                    "{} stopped answering after {} of {} samples",
                    link.describe(),
                    acked,
                    sum.samples
                )));
            }
            link.send(&HostMsg::StatusQuery)?;
            sum.status_queries += 1;
            query_sent = Some(Instant::now());
            last_heard = Instant::now();
            continue;
        };
        sink(&r);
        if r.recovered {
            continue;
        }
        last_heard = Instant::now();
        silent_tries = 0;
        match &r.frame.msg {
            DeviceMsg::ScoreReport(rep) => {
                let Some(idx) = rep.sample.checked_sub(base) else {
                    continue;
                };
                if idx >= acked && idx < next {
                    sum.reports_missing += idx - acked;
                    for _ in acked..=idx {
                        inflight.pop_front();
                    }
                    acked = idx + 1;
                }
            }
            DeviceMsg::Status(st) => {
                let taken = st.samples.saturating_sub(base);
                if taken > acked && taken <= next {
                    sum.reports_missing += taken - acked;
                    for _ in acked..taken {
                        inflight.pop_front();
                    }
                    acked = taken;
                }
                // Only the answer to our own query (sent after a silence, so
                // every sample before it had time to arrive) says that the
                // samples it does not count were lost on the way.
                if query_sent.take().is_some() && taken == acked && acked < next {
                    for x in inflight.iter() {
                        send_sample(link, x)?;
                        sum.frames_sent += 1;
                        sum.resent += 1;
                    }
                }
            }
            _ => {}
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

fn send_sample(link: &mut Link, x: &[f32]) -> Result<()> {
    let features: heapless::Vec<f32, { plumb_model::MAX_FEATURES }> = heapless::Vec::from_slice(x)
        .map_err(|_| {
            Error::input(format!(
                "a sample of {} features does not fit a frame (at most {})",
                x.len(),
                plumb_model::MAX_FEATURES
            ))
        })?;
    link.send(&HostMsg::Sample { features })
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
