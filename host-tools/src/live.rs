//! The live view of `plumb listen`: one full terminal screen that keeps what
//! a board said in view instead of scrolling it away.
//!
//! Two halves, kept apart so the picture can be tested without a terminal:
//!
//! * [`LiveState`] takes frames ([`LiveState::frame`]) and the host's link
//!   counters ([`LiveState::link`]) and remembers what the screen needs: the
//!   board's identity from its greeting, the drift state, each score's EWMA
//!   and CUSUM from the newest status, the last flags and sensor faults, and
//!   link health. [`LiveState::render`] turns it into a [`Screen`] of styled
//!   lines for a given size and time; [`Screen::text`] is the plain text a
//!   test reads, [`Screen::ansi`] what a terminal gets.
//! * [`LiveView`] is the [`EventSink`] that owns the terminal: it switches
//!   to the alternate screen, redraws from a painter thread at most
//!   [`FRAMES_PER_SECOND`] times a second (and once a second when nothing
//!   arrives, so "last frame … ago" moves), and gives the terminal back on
//!   [`EventSink::finish`], on drop and on a panic. The last picture is then
//!   printed once on the normal screen, so it stays in the scrollback.
//!
//! Limits of the charts come from the model file given with `--model` when
//! it is the model the board runs; without it a limit is known only once a
//! drift flag reported a crossing of it.

use crate::events::{fault_parts, EventSink, Names};
use crate::link::{LinkStats, Notice, Received};
use plumb_model::file::ModelFile;
use plumb_model::wire::{
    Ack, Crossing, DeviceMsg, FaultKind, Greeting, Request, ScoreKind, ScoreTriple, Slot, State,
    Statistic, Status,
};
use plumb_model::MonitorParams;
use std::collections::VecDeque;
use std::io::{IsTerminal, Write};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Condvar, Mutex, MutexGuard, Once};
use std::thread;
use std::time::{Duration, Instant, SystemTime, UNIX_EPOCH};

/// Most redraws a second.
pub const FRAMES_PER_SECOND: u32 = 10;

/// Flags (raised and cleared) kept for the screen.
const KEEP_FLAGS: usize = 64;
/// Sensor-fault events kept.
const KEEP_FAULTS: usize = 32;
/// Per-sample scores kept for the sparklines.
const KEEP_SCORES: usize = 256;
/// Notices (acknowledgements, refusals, resends, restarts) kept.
const KEEP_NOTES: usize = 8;
/// Seconds without a frame after which the link line says the board is quiet
/// (when the board announced no status period, or it is shorter).
const QUIET_AFTER: f64 = 5.0;

// ------------------------------------------------------------------ styles

/// A terminal colour (the 8 basic ones, and grey).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Colour {
    /// Red.
    Red,
    /// Green.
    Green,
    /// Yellow.
    Yellow,
    /// Blue.
    Blue,
    /// Cyan.
    Cyan,
    /// White.
    White,
    /// Black.
    Black,
    /// Bright black.
    Grey,
}

impl Colour {
    fn code(self) -> u8 {
        match self {
            Colour::Black => 0,
            Colour::Red => 1,
            Colour::Green => 2,
            Colour::Yellow => 3,
            Colour::Blue => 4,
            Colour::Cyan => 6,
            Colour::White => 7,
            Colour::Grey => 8,
        }
    }
}

/// How a span looks.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct Style {
    /// Text colour.
    pub fg: Option<Colour>,
    /// Background colour.
    pub bg: Option<Colour>,
    /// Bold.
    pub bold: bool,
    /// Faint.
    pub dim: bool,
    /// Swapped colours (what a banner falls back to without colour).
    pub reverse: bool,
}

impl Style {
    const PLAIN: Style = Style {
        fg: None,
        bg: None,
        bold: false,
        dim: false,
        reverse: false,
    };

    fn fg(c: Colour) -> Style {
        Style {
            fg: Some(c),
            ..Style::PLAIN
        }
    }

    fn dim() -> Style {
        Style {
            dim: true,
            ..Style::PLAIN
        }
    }

    fn bold() -> Style {
        Style {
            bold: true,
            ..Style::PLAIN
        }
    }

    fn sgr(self, colour: bool) -> String {
        let mut codes: Vec<String> = Vec::new();
        if self.bold {
            codes.push("1".into());
        }
        if self.dim {
            codes.push("2".into());
        }
        if colour {
            if let Some(c) = self.fg {
                codes.push(colour_code(30, 90, c));
            }
            if let Some(c) = self.bg {
                codes.push(colour_code(40, 100, c));
            }
            if self.reverse {
                codes.push("7".into());
            }
        } else if self.reverse || self.bg.is_some() {
            codes.push("7".into());
        }
        if codes.is_empty() {
            String::new()
        } else {
            format!("\x1b[{}m", codes.join(";"))
        }
    }
}

fn colour_code(base: u8, bright: u8, c: Colour) -> String {
    match c {
        Colour::Grey => bright.to_string(),
        _ => (base + c.code()).to_string(),
    }
}

/// A run of text in one style.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Span {
    /// The text (no control characters).
    pub text: String,
    /// Its look.
    pub style: Style,
}

/// One screen row.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Line {
    /// Its spans, left to right.
    pub spans: Vec<Span>,
}

impl Line {
    fn new() -> Self {
        Line::default()
    }

    fn push(&mut self, text: impl Into<String>, style: Style) -> &mut Self {
        let text: String = text.into();
        if !text.is_empty() {
            self.spans.push(Span { text, style });
        }
        self
    }

    fn plain(&mut self, text: impl Into<String>) -> &mut Self {
        self.push(text, Style::PLAIN)
    }

    fn with(text: impl Into<String>, style: Style) -> Line {
        let mut l = Line::new();
        l.push(text, style);
        l
    }

    /// Characters in the row.
    pub fn width(&self) -> usize {
        self.spans.iter().map(|s| s.text.chars().count()).sum()
    }

    /// The row's text.
    pub fn text(&self) -> String {
        self.spans.iter().map(|s| s.text.as_str()).collect()
    }

    /// Cut to `width` characters.
    fn fit(mut self, width: usize) -> Line {
        let mut left = width;
        let mut out = Vec::new();
        for mut s in self.spans.drain(..) {
            if left == 0 {
                break;
            }
            let n = s.text.chars().count();
            if n > left {
                s.text = s.text.chars().take(left).collect();
                left = 0;
            } else {
                left -= n;
            }
            out.push(s);
        }
        Line { spans: out }
    }

    /// Padded with spaces in `style` to `width` characters.
    fn pad(mut self, width: usize, style: Style) -> Line {
        let w = self.width();
        if w < width {
            self.push(" ".repeat(width - w), style);
        }
        self
    }
}

/// A rendered screen: at most as many lines as rows, each at most as wide as
/// the terminal.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Screen {
    /// Rows from the top.
    pub lines: Vec<Line>,
}

impl Screen {
    /// The plain text, one row per line.
    pub fn text(&self) -> String {
        let mut s = String::new();
        for l in &self.lines {
            s.push_str(l.text().trim_end());
            s.push('\n');
        }
        s
    }

    /// Row `i`'s text ("" past the end).
    pub fn row(&self, i: usize) -> String {
        self.lines.get(i).map(Line::text).unwrap_or_default()
    }

    /// The first row containing `needle`.
    pub fn find(&self, needle: &str) -> Option<String> {
        self.lines
            .iter()
            .map(Line::text)
            .find(|t| t.contains(needle))
    }

    /// Each row with its styles as ANSI escapes (colours only when `colour`),
    /// every row ending with the style reset; rows joined by `sep`. With
    /// `clear_to`, a row narrower than that many columns ends by erasing the
    /// rest of the terminal row (a full one must not: with line wrap off the
    /// cursor stays on its last character, which the erase would take).
    pub fn ansi(&self, colour: bool, sep: &str, clear_to: Option<usize>) -> String {
        let mut out = String::new();
        for (i, l) in self.lines.iter().enumerate() {
            if i > 0 {
                out.push_str(sep);
            }
            for s in &l.spans {
                let sgr = s.style.sgr(colour);
                out.push_str(&sgr);
                out.push_str(&s.text);
                if !sgr.is_empty() {
                    out.push_str("\x1b[0m");
                }
            }
            if clear_to.is_some_and(|w| l.width() < w) {
                out.push_str("\x1b[K");
            }
        }
        out
    }
}

// ------------------------------------------------------------------ state

/// What the view knows of the model file given with `--model`.
#[derive(Debug, Clone, PartialEq)]
pub struct ModelInfo {
    /// Its model id.
    pub id: u32,
    /// Its limits and drift-state parameters.
    pub monitor: MonitorParams,
    /// The residual chart's limit (`None` when the chart is off: a model
    /// of format 1 or 2).
    pub resid_limit: Option<f32>,
    /// The slow charts' limit (`None` without slow charts: a model not
    /// tailored, or of format 1–4).
    pub slow_limit: Option<f32>,
}

impl ModelInfo {
    /// From a model file.
    pub fn of(file: &ModelFile) -> Self {
        let m = &file.model;
        ModelInfo {
            id: m.meta.id,
            monitor: m.monitor,
            resid_limit: m
                .resid_gain
                .iter()
                .any(|g| *g > 0.0)
                .then_some(m.resid_limit),
            slow_limit: (!m.slow_charts.is_empty()).then_some(m.slow_limit),
        }
    }
}

/// A flag that rose or cleared.
#[derive(Debug, Clone, PartialEq)]
struct Flag {
    raised: bool,
    sample: u64,
    drivers: u8,
    top: Vec<(u8, f32)>,
    crossed: Vec<Crossing>,
    at: Duration,
    recovered: bool,
}

/// A sensor fault that began.
#[derive(Debug, Clone, PartialEq)]
struct FaultSeen {
    sample: u64,
    fault: FaultKind,
    at: Duration,
    recovered: bool,
}

/// Everything the live screen shows, updated frame by frame. Times are
/// durations since the session started (the clock shown is that start plus
/// the duration, in UTC).
#[derive(Debug, Clone)]
pub struct LiveState {
    source: String,
    names: Names,
    model: Option<ModelInfo>,
    start_unix: f64,
    greeting: Option<Greeting>,
    max_seq: Option<u32>,
    /// Model the board runs, newest word (greeting, status, a switch).
    board_model: Option<u32>,
    status: Option<Status>,
    status_at: Duration,
    state: Option<State>,
    /// Newest sample index heard of.
    sample: Option<u64>,
    /// Sample and time the standing flag rose, if one stands.
    up_since: Option<(u64, Duration, u8)>,
    flags: VecDeque<Flag>,
    raised: u64,
    cleared: u64,
    faults: VecDeque<FaultSeen>,
    fault_events: u64,
    scores: VecDeque<Option<ScoreTriple>>,
    reports: u64,
    /// Limits learnt from crossings: `[score][chart]` (EWMA, CUSUM,
    /// per-sample).
    seen_limits: [[Option<f32>; 5]; 3],
    host: LinkStats,
    frames: u64,
    last_frame: Option<Duration>,
    notes: VecDeque<(Duration, String)>,
    /// Since when the transport has been gone, and reopening attempts.
    down: Option<(Duration, u32)>,
    ended: bool,
}

const SCORES: [ScoreKind; 3] = [ScoreKind::Spe, ScoreKind::T2, ScoreKind::Nll];

fn score_index(s: ScoreKind) -> usize {
    match s {
        ScoreKind::Spe => 0,
        ScoreKind::T2 => 1,
        ScoreKind::Nll => 2,
    }
}

fn score_label(s: ScoreKind) -> &'static str {
    match s {
        ScoreKind::Spe => "SPE",
        ScoreKind::T2 => "T²",
        ScoreKind::Nll => "NLL",
    }
}

fn statistic_label(s: Statistic) -> &'static str {
    match s {
        Statistic::Ewma => "EWMA",
        Statistic::Cusum => "CUSUM",
        Statistic::Sample => "per-sample",
        Statistic::Residual { .. } => "residual",
        Statistic::Slow { .. } => "slow",
    }
}

fn statistic_index(s: Statistic) -> usize {
    match s {
        Statistic::Ewma => 0,
        Statistic::Cusum => 1,
        Statistic::Sample => 2,
        Statistic::Residual { .. } => 3,
        Statistic::Slow { .. } => 4,
    }
}

/// Score bits as `SPE + NLL` ("none" when empty).
fn drivers_text(bits: u8) -> String {
    let names: Vec<&str> = SCORES
        .iter()
        .filter(|s| bits & (1 << score_index(**s)) != 0)
        .map(|s| score_label(*s))
        .collect();
    if names.is_empty() {
        "none".into()
    } else {
        names.join(" + ")
    }
}

fn triple(t: &ScoreTriple, s: ScoreKind) -> f32 {
    match s {
        ScoreKind::Spe => t.spe,
        ScoreKind::T2 => t.t2,
        ScoreKind::Nll => t.nll,
    }
}

fn push_bounded<T>(q: &mut VecDeque<T>, v: T, keep: usize) {
    q.push_back(v);
    while q.len() > keep {
        q.pop_front();
    }
}

impl LiveState {
    /// A state for a session with `source` (what the link is connected to),
    /// feature `names` and, when given, the model file's limits.
    pub fn new(source: impl Into<String>, names: Names, model: Option<ModelInfo>) -> Self {
        let start_unix = SystemTime::now()
            .duration_since(UNIX_EPOCH)
            .map_or(0.0, |d| d.as_secs_f64());
        LiveState {
            source: source.into(),
            names,
            model,
            start_unix,
            greeting: None,
            max_seq: None,
            board_model: None,
            status: None,
            status_at: Duration::ZERO,
            state: None,
            sample: None,
            up_since: None,
            flags: VecDeque::new(),
            raised: 0,
            cleared: 0,
            faults: VecDeque::new(),
            fault_events: 0,
            scores: VecDeque::new(),
            reports: 0,
            seen_limits: [[None; 5]; 3],
            host: LinkStats::default(),
            frames: 0,
            last_frame: None,
            notes: VecDeque::new(),
            down: None,
            ended: false,
        }
    }

    /// Sets the wall-clock time of the session's start (seconds since the
    /// Unix epoch); tests use it for fixed clock readings.
    pub fn set_start(&mut self, unix_seconds: f64) {
        self.start_unix = unix_seconds;
    }

    /// The drift state, when a board said it.
    pub fn state(&self) -> Option<State> {
        self.state
    }

    /// Whether the model file's limits apply: it was given, and the board
    /// runs it (or has not said what it runs yet).
    fn file_limits(&self) -> Option<&MonitorParams> {
        self.file_model().map(|m| &m.monitor)
    }

    /// The model file, when it applies (see [`LiveState::file_limits`]).
    fn file_model(&self) -> Option<&ModelInfo> {
        let m = self.model.as_ref()?;
        match self.board_model {
            Some(id) if id != m.id => None,
            _ => Some(m),
        }
    }

    /// Limit of `stat` of `score`, from the model file or a crossing seen.
    fn limit(&self, score: ScoreKind, stat: Statistic) -> Option<f32> {
        if let Some(info) = self.file_model() {
            let m = &info.monitor;
            let l = match score {
                ScoreKind::Spe => &m.spe,
                ScoreKind::T2 => &m.t2,
                ScoreKind::Nll => &m.nll,
            };
            return match stat {
                Statistic::Ewma => Some(l.ewma_limit),
                Statistic::Cusum => Some(l.cusum_limit),
                Statistic::Sample => Some(l.sample_limit),
                Statistic::Residual { .. } => info.resid_limit,
                Statistic::Slow { .. } => info.slow_limit,
            };
        }
        self.seen_limits[score_index(score)][statistic_index(stat)]
    }

    /// Per-sample limit of `score`, from the model file or a crossing seen.
    fn sample_limit(&self, score: ScoreKind) -> Option<f32> {
        self.limit(score, Statistic::Sample)
    }

    fn note(&mut self, at: Duration, text: String) {
        push_bounded(&mut self.notes, (at, text), KEEP_NOTES);
    }

    fn see_sample(&mut self, s: u64) {
        self.sample = Some(self.sample.map_or(s, |o| o.max(s)));
    }

    /// Takes one frame that arrived `at` after the session started.
    pub fn frame(&mut self, r: &Received, at: Duration) {
        self.frames += 1;
        self.last_frame = Some(at);
        let seq = r.frame.seq;
        let newer = self
            .max_seq
            .is_none_or(|m| plumb_model::wire::seq_at_or_after(seq, m));
        match &r.frame.msg {
            DeviceMsg::Greeting(g) => {
                let restarted = self
                    .max_seq
                    .is_some_and(|m| !plumb_model::wire::seq_at_or_after(seq, m));
                if restarted {
                    // (A link that noticed it first has said so already,
                    // and forgotten the numbering.)
                    self.note(at, format!("the board restarted (greeting numbered {seq})"));
                    self.forget_board();
                } else if let Some(old) = &self.greeting {
                    if old.model_id != g.model_id {
                        self.note(at, format!("the board now runs model {:#010x}", g.model_id));
                    }
                }
                self.greeting = Some(g.clone());
                self.board_model = Some(g.model_id);
            }
            DeviceMsg::Status(s) => {
                self.status = Some(*s);
                self.status_at = at;
                self.state = Some(s.state);
                self.board_model = Some(s.model_id);
                self.sample = s.samples.checked_sub(1);
                if s.state != State::Drifting {
                    self.up_since = None;
                }
            }
            DeviceMsg::DriftRaised(d) => {
                self.raised += 1;
                for c in &d.crossed {
                    self.seen_limits[score_index(c.score)][statistic_index(c.statistic)] =
                        Some(c.limit);
                }
                if newer || !r.recovered {
                    self.state = Some(State::Drifting);
                    self.up_since = Some((d.sample, at, d.drivers));
                }
                self.see_sample(d.sample);
                self.push_flag(Flag {
                    raised: true,
                    sample: d.sample,
                    drivers: d.drivers,
                    top: d
                        .top
                        .iter()
                        .filter(|s| s.feature != u8::MAX)
                        .map(|s| (s.feature, s.value))
                        .collect(),
                    crossed: d.crossed.iter().copied().collect(),
                    at,
                    recovered: r.recovered,
                });
            }
            DeviceMsg::DriftCleared(c) => {
                self.cleared += 1;
                if newer || !r.recovered {
                    self.state = Some(State::Watching);
                    self.up_since = None;
                }
                self.see_sample(c.sample);
                self.push_flag(Flag {
                    raised: false,
                    sample: c.sample,
                    drivers: 0,
                    top: Vec::new(),
                    crossed: Vec::new(),
                    at,
                    recovered: r.recovered,
                });
            }
            DeviceMsg::SensorFault(f) => {
                self.fault_events += 1;
                self.see_sample(f.sample);
                let seen = FaultSeen {
                    sample: f.sample,
                    fault: f.fault,
                    at,
                    recovered: r.recovered,
                };
                let pos = self
                    .faults
                    .iter()
                    .position(|o| o.sample > f.sample)
                    .unwrap_or(self.faults.len());
                self.faults.insert(pos, seen);
                while self.faults.len() > KEEP_FAULTS {
                    self.faults.pop_front();
                }
            }
            DeviceMsg::Features(e) => self.see_sample(e.sample),
            DeviceMsg::ScoreReport(rep) => {
                self.reports += 1;
                self.state = Some(rep.state);
                if rep.state != State::Drifting {
                    self.up_since = None;
                }
                self.see_sample(rep.sample);
                push_bounded(&mut self.scores, rep.scores, KEEP_SCORES);
            }
            DeviceMsg::Ack(a) => {
                let text = match a {
                    Ack::Reports { on } => {
                        format!("score reports {}", if *on { "on" } else { "off" })
                    }
                    Ack::StatsReset => {
                        self.up_since = None;
                        "statistics reset: warm-up starts again".into()
                    }
                    Ack::UploadOpen { slot, total } => {
                        format!(
                            "upload opened: {total} bytes into slot {}",
                            slot_text(*slot)
                        )
                    }
                    Ack::ChunkTaken { next } => format!("upload: {next} bytes taken"),
                    Ack::NotTaken { at: sent, next } => {
                        format!("sample {sent} not taken: the board takes {next} next")
                    }
                    Ack::Echo { on } => {
                        format!("feature echoes {}", if *on { "on" } else { "off" })
                    }
                    Ack::ModelSwitched {
                        slot,
                        model_id,
                        generation,
                    } => {
                        self.board_model = Some(*model_id);
                        self.up_since = None;
                        format!(
                            "switched to model {model_id:#010x} from slot {} (generation {generation})",
                            slot_text(*slot)
                        )
                    }
                };
                // Chunk acknowledgements come by the hundred, samples not
                // taken by the dozen on a lossy feed: keep the last of a run.
                let run = match a {
                    Ack::ChunkTaken { .. } => Some("upload: "),
                    Ack::NotTaken { .. } => Some("sample "),
                    _ => None,
                };
                if run.is_some_and(|p| self.notes.back().is_some_and(|(_, t)| t.starts_with(p))) {
                    self.notes.pop_back();
                }
                self.note(at, text);
            }
            DeviceMsg::Refused(f) => {
                let req = match f.request {
                    Request::UploadBegin => "upload begin",
                    Request::UploadChunk => "upload chunk",
                    Request::UploadCommit => "upload commit",
                };
                self.note(at, format!("{req} refused: {}", f.reason));
            }
            DeviceMsg::ResendDone(d) => {
                let mut t = format!("resent from {}: {} events", d.from, d.count);
                if d.oldest
                    .is_some_and(|o| o != d.from && !plumb_model::wire::seq_at_or_after(d.from, o))
                {
                    t.push_str(" (some were already gone)");
                }
                self.note(at, t);
            }
        }
        if newer {
            self.max_seq = Some(seq);
        }
    }

    fn push_flag(&mut self, f: Flag) {
        // In sample order: a recovered flag goes where it belongs.
        let pos = self
            .flags
            .iter()
            .position(|o| o.sample > f.sample)
            .unwrap_or(self.flags.len());
        self.flags.insert(pos, f);
        while self.flags.len() > KEEP_FLAGS {
            self.flags.pop_front();
        }
    }

    /// Free text about the session, shown as the newest note.
    pub fn notice(&mut self, at: Duration, text: impl Into<String>) {
        self.note(at, text.into());
    }

    /// Something that happened to the link itself, `at` after the start: a
    /// restart forgets what stood before it, a lost transport shows until it
    /// is back.
    pub fn link_notice(&mut self, n: &Notice, at: Duration) {
        match n {
            Notice::Garbage { bytes, frames } => self.note(
                at,
                format!(
                    "{} of noise before the first frame ({} dropped)",
                    plural(*bytes, "byte"),
                    plural(*frames, "damaged frame")
                ),
            ),
            Notice::Restarted { seq, last, .. } => {
                self.forget_board();
                self.note(
                    at,
                    format!("the board restarted: frame {seq} came after {last}"),
                );
            }
            Notice::Disconnected { what } => {
                self.down = Some((at, 0));
                self.note(at, format!("lost the link to {what}"));
            }
            Notice::Reconnecting {
                attempt,
                wait,
                error,
            } => {
                let since = self.down.map_or(at, |(t, _)| t);
                self.down = Some((since, *attempt));
                self.note(
                    at,
                    format!(
                        "reopening failed ({error}); attempt {} in {}",
                        attempt + 1,
                        ago(*wait)
                    ),
                );
            }
            Notice::Reconnected { what, after, .. } => {
                self.down = None;
                self.note(at, format!("back on {what} after {}", ago(*after)));
            }
        }
    }

    /// After a restart: the board's state, status and standing flag are
    /// gone with it (the flags seen stay listed).
    fn forget_board(&mut self) {
        self.state = None;
        self.status = None;
        self.up_since = None;
        self.sample = None;
        self.max_seq = None;
    }

    /// Takes the host's link counters so far.
    pub fn link(&mut self, stats: &LinkStats) {
        self.host = *stats;
    }

    /// The session ended (the board closed the link, time ran out or the
    /// user stopped it); final counters.
    pub fn end(&mut self, stats: &LinkStats) {
        self.host = *stats;
        self.ended = true;
    }

    fn clock(&self, at: Duration) -> String {
        let t = self.start_unix + at.as_secs_f64();
        let s = (t.max(0.0) as u64) % 86_400;
        format!("{:02}:{:02}:{:02}", s / 3600, s / 60 % 60, s % 60)
    }

    /// The screen for a terminal of `cols` × `rows` at `now` (since the
    /// session started). `rows` = `usize::MAX` gives every section in full
    /// (the picture printed at the end).
    pub fn render(&self, cols: usize, rows: usize, now: Duration) -> Screen {
        let cols = cols.max(20);
        // Rows are saved in turn until the screen holds a few flags and a
        // fault: first the per-sample score lines, then the note and the
        // footer; what still does not fit is cut at the bottom.
        let mut lines = Vec::new();
        for level in 0..3 {
            let (l, fits) = self.compose(cols, rows, now, level);
            lines = l;
            if fits {
                break;
            }
        }
        lines.truncate(rows);
        Screen {
            lines: lines.into_iter().map(|l| l.fit(cols)).collect(),
        }
    }

    /// The rows at a compaction `level` (0: all; 1: no per-sample score
    /// lines; 2: no note or footer either), and whether they fit `rows`
    /// with room for some flags and a fault.
    fn compose(&self, cols: usize, rows: usize, now: Duration, level: u8) -> (Vec<Line>, bool) {
        let mut head = vec![self.title(cols, now)];
        head.extend(self.identity(cols));
        head.push(self.banner(cols, now));
        let charts = self.charts(cols, level == 0);
        let link = self.link_lines(cols, now);
        let note = self.notes.back().filter(|_| level < 2).map(|(at, t)| {
            let mut l = Line::new();
            l.push(" note  ", Style::dim())
                .plain(t.clone())
                .push(format!("  {}", self.clock(*at)), Style::dim());
            l
        });
        let footer = (level < 2).then(|| {
            if self.ended {
                Line::with(" the session ended", Style::dim())
            } else {
                Line::with(" Ctrl-C stops · --plain prints lines instead", Style::dim())
            }
        });

        // Flags and faults share the rows the rest leaves (at least one
        // each).
        let flag_lines = self.flag_lines(cols);
        let fault_lines = self.fault_lines();
        let fixed = head.len()
            + charts.len()
            + 2
            + link.len()
            + usize::from(note.is_some())
            + usize::from(footer.is_some());
        let (flags_n, faults_n, fits) = if rows == usize::MAX {
            (flag_lines.len().min(12), fault_lines.len().min(6), true)
        } else {
            let avail = rows.saturating_sub(fixed + 2);
            let faults_n = fault_lines.len().saturating_sub(1).min(avail / 3);
            let flags_n = flag_lines.len().saturating_sub(1).min(avail - faults_n);
            let want = flag_lines.len().clamp(1, 3) + fault_lines.len().clamp(1, 1);
            (flags_n + 1, faults_n + 1, fixed + want <= rows)
        };

        let mut lines = head;
        lines.extend(charts);
        lines.push(rule(
            " flags ",
            cols,
            &[],
            Some(format!(
                " {} raised · {} cleared ",
                self.raised, self.cleared
            )),
        ));
        if flag_lines.is_empty() {
            lines.push(Line::with("  none so far", Style::dim()));
        } else {
            lines.extend(flag_lines.into_iter().take(flags_n));
        }
        let tally = match self.status.map(|s| s.faults) {
            Some(f) => {
                let kinds: Vec<String> = [
                    ("wrong length", f.wrong_length),
                    ("non-finite", f.non_finite),
                    ("out of range", f.out_of_range),
                    ("overflow", f.overflow),
                ]
                .iter()
                .filter(|(_, n)| *n > 0)
                .map(|(k, n)| format!("{k} {n}"))
                .collect();
                if kinds.is_empty() {
                    " no faulted samples since the reset ".to_string()
                } else {
                    format!(" faulted samples: {} ", kinds.join(" · "))
                }
            }
            None => format!(" {} reported ", self.fault_events),
        };
        lines.push(rule(" sensor faults ", cols, &[], Some(tally)));
        if fault_lines.is_empty() {
            lines.push(Line::with("  none so far", Style::dim()));
        } else {
            lines.extend(fault_lines.into_iter().take(faults_n));
        }
        lines.extend(link);
        lines.extend(note);
        lines.extend(footer);
        (lines, fits)
    }

    fn title(&self, cols: usize, now: Duration) -> Line {
        let style = Style {
            reverse: true,
            ..Style::PLAIN
        };
        let left = format!(" plumb listen · {}", self.source);
        let right = format!(
            "{}{} UTC ",
            if self.ended { "ended · " } else { "" },
            self.clock(now)
        );
        let room = cols.saturating_sub(right.chars().count() + 1);
        let left: String = if left.chars().count() > room {
            let mut s: String = left.chars().take(room.saturating_sub(1)).collect();
            s.push('…');
            s
        } else {
            left
        };
        let gap = cols.saturating_sub(left.chars().count() + right.chars().count());
        let mut l = Line::new();
        l.push(format!("{left}{}{right}", " ".repeat(gap)), style);
        l
    }

    fn identity(&self, cols: usize) -> Vec<Line> {
        let key = Style::dim();
        let Some(g) = &self.greeting else {
            let mut l = Line::new();
            l.push(" board  ", key)
                .push("no greeting yet", Style::dim());
            return vec![l];
        };
        let mut model = Line::new();
        model.plain("model ").push(
            format!("{:#010x}", self.board_model.unwrap_or(g.model_id)),
            Style::bold(),
        );
        model.plain(match g.active {
            Some(s) => format!(" (slot {}, gen {})", slot_text(s), g.generation),
            None => " (built in)".into(),
        });
        let items = vec![
            Line::with(g.firmware.as_str(), Style::bold()),
            Line::with(format!("protocol {}", g.protocol), Style::PLAIN),
            model,
            Line::with(
                format!(
                    "status every {}",
                    match g.status_every {
                        0 => "request only".to_string(),
                        1 => "sample".to_string(),
                        n => format!("{n} samples"),
                    }
                ),
                Style::PLAIN,
            ),
            Line::with(format!("schema {:#018x}", g.schema), Style::PLAIN),
            Line::with(
                format!(
                    "{} features, {} components, {} mixture (room for {}, {}, {})",
                    g.dims.features,
                    g.dims.components,
                    g.dims.mixture,
                    g.capacity.features,
                    g.capacity.components,
                    g.capacity.mixture
                ),
                Style::PLAIN,
            ),
        ];
        let mut out = flow(" board  ", items, cols, 3);
        out.extend(self.model_mismatch());
        out
    }

    /// A warning when the model file is not the board's model.
    fn model_mismatch(&self) -> Option<Line> {
        let m = self.model.as_ref()?;
        let id = self.board_model.filter(|&id| id != m.id)?;
        let mut l = Line::new();
        l.push(" model  ", Style::dim()).push(
            format!(
                "the model file is {:#010x} but the board runs {id:#010x}: its limits are not used",
                m.id
            ),
            Style::fg(Colour::Yellow),
        );
        Some(l)
    }

    fn banner(&self, cols: usize, now: Duration) -> Line {
        let down = self.down.filter(|_| !self.ended).map(|(since, attempts)| {
            (
                "LINK DOWN",
                Colour::Yellow,
                Colour::Black,
                format!(
                    "since {} ({} ago){} · last word: {}",
                    self.clock(since),
                    ago(now.saturating_sub(since)),
                    if attempts > 0 {
                        format!(", {} to reopen", plural(u64::from(attempts), "attempt"))
                    } else {
                        String::new()
                    },
                    match self.state {
                        None => "none",
                        Some(State::Priming) => "priming",
                        Some(State::Watching) => "watching",
                        Some(State::Drifting) => "drifting",
                    }
                ),
            )
        });
        let (word, bg, fg, detail) = if let Some(d) = down {
            d
        } else {
            match self.state {
                None => (
                    "WAITING",
                    Colour::Grey,
                    Colour::Black,
                    if self.frames == 0 {
                        "nothing from the board yet".to_string()
                    } else {
                        "no status from the board yet".to_string()
                    },
                ),
                Some(State::Priming) => {
                    let valid = self.sample.map_or(0, |s| s + 1);
                    let detail = match self.file_limits() {
                        Some(m) => format!(
                            "warming up: about {} of {} samples; no flag can rise yet",
                            valid.min(u64::from(m.warmup)),
                            m.warmup
                        ),
                        None => "warming up; no flag can rise yet".to_string(),
                    };
                    ("PRIMING", Colour::Yellow, Colour::Black, detail)
                }
                Some(State::Watching) => (
                    "WATCHING",
                    Colour::Green,
                    Colour::Black,
                    format!(
                        "no drift{}",
                        self.sample
                            .map_or(String::new(), |s| format!(" · sample {s}"))
                    ),
                ),
                Some(State::Drifting) => {
                    let detail = match self.up_since {
                        Some((sample, at, drivers)) => format!(
                            "drift flag up since sample {sample} ({}, {} ago) · driven by {}",
                            self.clock(at),
                            ago(now.saturating_sub(at)),
                            drivers_text(drivers)
                        ),
                        None => "drift flag up".to_string(),
                    };
                    ("DRIFTING", Colour::Red, Colour::White, detail)
                }
            }
        };
        let style = Style {
            fg: Some(fg),
            bg: Some(bg),
            bold: true,
            ..Style::PLAIN
        };
        let mut l = Line::new();
        l.push(format!("  ■ {word}  "), style).push(
            format!(" {detail} "),
            Style {
                bold: false,
                ..style
            },
        );
        l.fit(cols).pad(cols, style)
    }

    /// Cells in each half of a gauge, for a screen `cols` wide.
    fn half(cols: usize) -> usize {
        // " SPE  CUSUM " (13) + gauge (2h + 1) + "  12.34 / 5.00  over" (≤ 22).
        (cols.saturating_sub(13 + 1 + 22) / 2).clamp(4, 30)
    }

    fn charts(&self, cols: usize, sparks: bool) -> Vec<Line> {
        let h = Self::half(cols);
        let start = 13;
        let mut marks = vec![(start, "0".to_string())];
        marks.push((start + h.saturating_sub(2), "limit".to_string()));
        marks.push((start + 2 * h, "2×".to_string()));
        // Which sample the levels are from (they come with each status),
        // where the rule has room after the scale.
        let at = self
            .status
            .map(|st| format!(" levels at sample {} ", st.samples.saturating_sub(1)));
        let at = at.filter(|t| start + 2 * h + 2 + t.chars().count() + 2 <= cols);
        let mut out = vec![rule(" charts ", cols, &marks, at)];
        let clear = self.file_limits().map(|m| m.clear_fraction);
        // A missing limit or status is explained once, on the first row.
        let mut said = false;
        for s in SCORES {
            let i = score_index(s);
            let hot = self.status.is_some_and(|st| st.hot & (1 << i) != 0);
            for stat in [Statistic::Ewma, Statistic::Cusum] {
                let mut l = Line::new();
                let name = if stat == Statistic::Ewma {
                    score_label(s)
                } else {
                    ""
                };
                l.push(format!(" {name:<5}"), Style::bold())
                    .push(format!("{:<7}", statistic_label(stat)), Style::dim());
                // The status carries the two statistics; the per-sample
                // limit has the sparkline row instead.
                let value = self.status.map(|st| {
                    let lv = st.levels[i];
                    if stat == Statistic::Ewma {
                        lv.ewma
                    } else {
                        lv.cusum
                    }
                });
                let limit = self.limit(s, stat);
                match (value, limit) {
                    (Some(v), Some(lim)) => {
                        gauge(&mut l, v, lim, h, clear);
                        let over = v > lim;
                        l.plain(format!("  {} / {}", num(v), num(lim)));
                        if over {
                            l.push("  over", Style::fg(Colour::Red));
                        }
                    }
                    (Some(v), None) => {
                        let msg = if said {
                            ""
                        } else if self.model.is_none() {
                            "limit unknown: give --model"
                        } else {
                            "limit unknown: not the board's model"
                        };
                        said = true;
                        l.push(format!("{msg:<w$}", w = 2 * h + 1), Style::dim());
                        l.plain(format!("  {}", num(v)));
                        if hot {
                            l.push("  hot", Style::fg(Colour::Red));
                        }
                    }
                    (None, _) => {
                        let msg = if said {
                            String::new()
                        } else {
                            match self.greeting.as_ref().map(|g| g.status_every) {
                                Some(0) => "no status yet: this board sends it on request".into(),
                                Some(n) => format!(
                                    "no status yet: the board sends one every {}",
                                    plural(u64::from(n), "sample")
                                ),
                                None => "no status yet".into(),
                            }
                        };
                        said = true;
                        l.push(format!("{msg:<w$}", w = 2 * h + 1), Style::dim());
                        l.push("  –", Style::dim());
                    }
                }
                out.push(l);
            }
            if sparks && self.reports > 0 {
                out.push(self.score_row(s, h));
            }
        }
        out
    }

    /// Newest per-sample scores of `s` as a sparkline, scaled to twice the
    /// per-sample limit (from the model file or a per-sample crossing seen;
    /// without either, to the largest shown).
    fn score_row(&self, s: ScoreKind, h: usize) -> Line {
        let width = 2 * h + 1;
        let recent: Vec<Option<f32>> = self
            .scores
            .iter()
            .rev()
            .take(width)
            .rev()
            .map(|t| t.as_ref().map(|t| triple(t, s)))
            .collect();
        let limit = self.sample_limit(s);
        let top = match limit {
            Some(l) => 2.0 * l,
            None => recent.iter().flatten().fold(0.0f32, |a, &b| a.max(b)),
        };
        let mut l = Line::new();
        l.push("      ", Style::PLAIN)
            .push(format!("{:<7}", "sample"), Style::dim());
        let pad = width - recent.len();
        l.push(" ".repeat(pad), Style::PLAIN);
        for v in &recent {
            match v {
                None => l.push("×", Style::fg(Colour::Yellow)),
                Some(v) => {
                    let over = limit.is_some_and(|lim| *v > lim);
                    let c = spark(*v, top);
                    l.push(
                        c.to_string(),
                        if over {
                            Style::fg(Colour::Red)
                        } else {
                            Style::fg(Colour::Cyan)
                        },
                    )
                }
            };
        }
        match recent.last() {
            Some(Some(v)) => {
                l.plain(format!("  {}", num(*v)));
                if let Some(lim) = limit {
                    l.push(format!(" / {}", num(lim)), Style::PLAIN);
                }
            }
            Some(None) => {
                l.push("  faulted", Style::fg(Colour::Yellow));
            }
            None => {}
        }
        l
    }

    fn flag_lines(&self, cols: usize) -> Vec<Line> {
        let mut out = Vec::new();
        let newest_raised = self.flags.iter().rposition(|f| f.raised);
        for (k, f) in self.flags.iter().enumerate().rev() {
            let mut l = Line::new();
            if f.raised {
                l.push("  ▲ raised  ", Style::fg(Colour::Red));
            } else {
                l.push("  ▼ cleared ", Style::fg(Colour::Green));
            }
            l.plain(format!(" sample {:<7}", f.sample))
                .push(format!(" {} ", self.clock(f.at)), Style::dim());
            if f.raised {
                l.plain(format!(" by {}", drivers_text(f.drivers)));
                if !f.top.is_empty() {
                    // Names with their contributions, or names alone when
                    // the row would not hold them.
                    let with: Vec<String> = f
                        .top
                        .iter()
                        .map(|(i, v)| format!("{} {}", self.names.feature(*i), num(*v)))
                        .collect();
                    let bare: Vec<String> =
                        f.top.iter().map(|(i, _)| self.names.feature(*i)).collect();
                    let with = with.join(", ");
                    let room =
                        cols.saturating_sub(l.width() + 6 + if f.recovered { 13 } else { 0 });
                    let top = if with.chars().count() <= room {
                        with
                    } else {
                        // As many names as fit, then an ellipsis.
                        let mut t = String::new();
                        for (k, n) in bare.iter().enumerate() {
                            let next = if k == 0 {
                                n.clone()
                            } else {
                                format!("{t}, {n}")
                            };
                            let more = k + 1 < bare.len();
                            if next.chars().count() + if more { 3 } else { 0 } > room {
                                t.push_str(if t.is_empty() { "…" } else { ", …" });
                                break;
                            }
                            t = next;
                        }
                        t
                    };
                    l.push("  top ", Style::dim()).plain(top);
                }
            }
            if f.recovered {
                l.push("  (recovered)", Style::dim());
            }
            out.push(l);
            if Some(k) == newest_raised && !f.crossed.is_empty() {
                let c: Vec<String> = f
                    .crossed
                    .iter()
                    .map(|c| {
                        // The residual and slow charts name their feature.
                        let feature = match c.statistic {
                            Statistic::Residual { feature } | Statistic::Slow { feature } => {
                                format!(" ({})", self.names.feature(feature))
                            }
                            _ => String::new(),
                        };
                        format!(
                            "{} {}{feature} {} > {}",
                            score_label(c.score),
                            statistic_label(c.statistic),
                            num(c.value),
                            num(c.limit)
                        )
                    })
                    .collect();
                let mut l = Line::new();
                l.push("              crossed ", Style::dim())
                    .plain(c.join(", "));
                out.push(l);
            }
        }
        out
    }

    fn fault_lines(&self) -> Vec<Line> {
        self.faults
            .iter()
            .rev()
            .map(|f| {
                let (kind, feature, got) = fault_parts(f.fault);
                let mut l = Line::new();
                l.push("  ! ", Style::fg(Colour::Yellow))
                    .plain(format!("{:<13}", kind.replace('-', " ")));
                let what = match (feature, got) {
                    (Some(i), _) => format!(" {}", self.names.feature(i)),
                    (None, Some(g)) => format!(" {g} values"),
                    _ => String::new(),
                };
                l.plain(what)
                    .plain(format!("  sample {}", f.sample))
                    .push(format!("  {}", self.clock(f.at)), Style::dim());
                if f.recovered {
                    l.push("  (recovered)", Style::dim());
                }
                l
            })
            .collect()
    }

    /// The link: a rule with the time since the last frame and status, and
    /// a small table of counters, frames from the board as counted here and
    /// frames to the board as the board counts them (from its status).
    fn link_lines(&self, cols: usize, now: Duration) -> Vec<Line> {
        let h = &self.host;
        let f = h.frames;
        let mut right: Vec<String> = Vec::new();
        match self.last_frame {
            Some(at) => right.push(format!("last frame {} ago", ago(now.saturating_sub(at)))),
            None => right.push("no frame yet".into()),
        }
        if self.status.is_some() {
            right.push(format!(
                "last status {} ago",
                ago(now.saturating_sub(self.status_at))
            ));
        }
        for (n, word) in [
            (h.restarts, "restart"),
            (h.reconnects, "reconnect"),
            (h.gaps, "gap"),
            (h.duplicates, "duplicate"),
            (u64::from(f.overflows), "overflow"),
        ] {
            if n > 0 {
                right.push(plural(n, word));
            }
        }
        if f.undecodable > 0 {
            right.push(format!("{} undecodable", f.undecodable));
        }
        // As many as fit, most important first.
        let room = cols.saturating_sub(" link ".len() + 5);
        let mut text = String::new();
        for item in right {
            let next = if text.is_empty() {
                item
            } else {
                format!("{text} · {item}")
            };
            if next.chars().count() > room {
                break;
            }
            text = next;
        }
        let mut out = vec![rule(" link ", cols, &[], Some(format!(" {text} ")))];
        // A quiet board is worth a colour: no frame for longer than the
        // quiet time while the board sends status on its own.
        let quiet = self.last_frame.is_some_and(|at| {
            now.saturating_sub(at).as_secs_f64() > QUIET_AFTER
                && !self.ended
                && self.greeting.as_ref().is_some_and(|g| g.status_every != 0)
        });
        if quiet {
            if let Some(first) = out[0].spans.get_mut(1) {
                first.style = Style::fg(Colour::Yellow);
            }
        }

        const HEADS: [&str; 6] = [
            "frames ok",
            "CRC errors",
            "framing errors",
            "resends",
            "recovered",
            "lost",
        ];
        let mut head = Line::new();
        head.push(format!("{:<12}", ""), Style::PLAIN);
        for t in HEADS {
            head.push(format!("  {t}"), Style::dim());
        }
        out.push(head);
        let cell = |l: &mut Line, k: usize, v: Option<u64>, bad: Option<Colour>| {
            let w = HEADS[k].chars().count() + 2;
            match v {
                Some(n) => {
                    let style = match bad {
                        Some(c) if n > 0 => Style::fg(c),
                        _ => Style::PLAIN,
                    };
                    l.push(format!("{n:>w$}"), style);
                }
                None => {
                    l.push(format!("{:>w$}", "–"), Style::dim());
                }
            }
        };
        let y = Some(Colour::Yellow);
        let mut from = Line::new();
        from.push(format!("{:<12}", "  from board"), Style::PLAIN);
        cell(
            &mut from,
            0,
            Some(u64::from(f.frames_ok).max(self.frames)),
            None,
        );
        cell(&mut from, 1, Some(u64::from(f.crc_errors)), y);
        cell(&mut from, 2, Some(u64::from(f.framing_errors)), y);
        cell(&mut from, 3, Some(h.resend_requests), y);
        cell(&mut from, 4, Some(h.recovered), None);
        cell(&mut from, 5, Some(h.lost), Some(Colour::Red));
        out.push(from);
        let mut to = Line::new();
        to.push(format!("{:<12}", "  to board"), Style::PLAIN);
        match &self.status {
            Some(s) => {
                let d = s.link;
                cell(&mut to, 0, Some(u64::from(d.frames_ok)), None);
                cell(&mut to, 1, Some(u64::from(d.crc_errors)), y);
                cell(&mut to, 2, Some(u64::from(d.framing_errors)), y);
                for k in 3..6 {
                    cell(&mut to, k, None, None);
                }
                if d.overflows + d.undecodable > 0 {
                    to.push(
                        format!("  {} over · {} undecodable", d.overflows, d.undecodable),
                        Style::fg(Colour::Yellow),
                    );
                }
            }
            None => {
                to.push("  the board's counts come with its status", Style::dim());
            }
        }
        out.push(to);
        out
    }
}

/// `1 frame`, `2 frames`.
fn plural(n: u64, word: &str) -> String {
    if n == 1 {
        format!("1 {word}")
    } else {
        format!("{n} {word}s")
    }
}

fn slot_text(s: Slot) -> &'static str {
    match s {
        Slot::A => "a",
        Slot::B => "b",
    }
}

/// `items` on rows after `label` (later rows indented as far), separated by
/// " · ", a new row when the next item would pass `cols`, at most `rows`.
fn flow(label: &str, items: Vec<Line>, cols: usize, rows: usize) -> Vec<Line> {
    let indent = label.chars().count();
    let mut out: Vec<Line> = Vec::new();
    let mut cur = Line::with(label, Style::dim());
    let mut empty = true;
    for item in items {
        let w = item.width();
        if !empty && cur.width() + 3 + w > cols && out.len() + 1 < rows {
            out.push(std::mem::replace(
                &mut cur,
                Line::with(" ".repeat(indent), Style::PLAIN),
            ));
            empty = true;
        }
        if !empty {
            cur.push(" · ", Style::dim());
        }
        cur.spans.extend(item.spans);
        empty = false;
    }
    out.push(cur);
    out
}

/// A section rule: `─ title ───…── right ─`, with `marks` (column, text)
/// written into the rule.
fn rule(title: &str, width: usize, marks: &[(usize, String)], right: Option<String>) -> Line {
    let mut cells: Vec<char> = vec!['─'; width];
    let mut put = |at: usize, text: &str| {
        for (k, ch) in text.chars().enumerate() {
            if let Some(c) = cells.get_mut(at + k) {
                *c = ch;
            }
        }
    };
    put(1, title);
    for (at, t) in marks {
        put(*at, t);
    }
    if let Some(r) = &right {
        let n = r.chars().count();
        if n + title.chars().count() + 4 < width {
            put(width - n - 1, r);
        }
    }
    let mut l = Line::new();
    let text: String = cells.into_iter().collect();
    // The title stands out; the rest is faint.
    let tlen = title.chars().count() + 1;
    let head: String = text.chars().take(tlen).collect();
    let tail: String = text.chars().skip(tlen).collect();
    l.push(head, Style::bold()).push(tail, Style::dim());
    l
}

/// A horizontal gauge of `value` on 0 … 2 × `limit`: `half` cells below the
/// limit, the limit mark, `half` cells above. Calm (below the clearing
/// fraction of the limit, when known) is green, over the clearing fraction
/// yellow, over the limit red.
fn gauge(l: &mut Line, value: f32, limit: f32, half: usize, clear: Option<f32>) {
    let colour = if value > limit {
        Colour::Red
    } else if clear.is_some_and(|f| value > f * limit) {
        Colour::Yellow
    } else {
        Colour::Green
    };
    let frac = if limit > 0.0 && value.is_finite() {
        (value / limit).max(0.0)
    } else if value.is_nan() {
        0.0
    } else {
        2.0
    };
    // Eighths of a cell filled, below and above the limit.
    let eighths = |f: f32| -> usize { (f.clamp(0.0, 1.0) * (half * 8) as f32).round() as usize };
    let below = eighths(frac);
    let above = eighths(frac - 1.0);
    let cells = |l: &mut Line, filled: usize| {
        let mut s = String::new();
        let mut empty = 0usize;
        for i in 0..half {
            let n = filled.saturating_sub(8 * i).min(8);
            match n {
                0 => empty += 1,
                8 => s.push('█'),
                _ => s.push(PARTIAL[n - 1]),
            }
        }
        l.push(s, Style::fg(colour));
        l.push("·".repeat(empty), Style::dim());
    };
    cells(l, below);
    l.push(
        "┃",
        if value > limit {
            Style::fg(Colour::Red)
        } else {
            Style::bold()
        },
    );
    cells(l, above);
    l.push(if frac > 2.0 { "▶" } else { " " }, Style::fg(Colour::Red));
}

const PARTIAL: [char; 7] = ['▏', '▎', '▍', '▌', '▋', '▊', '▉'];
const SPARK: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];

fn spark(v: f32, top: f32) -> char {
    if !v.is_finite() || top <= 0.0 {
        return if v.is_nan() { '?' } else { '█' };
    }
    let k = ((v / top).clamp(0.0, 1.0) * 7.0).round() as usize;
    SPARK[k]
}

/// A number with about three significant digits.
fn num(v: f32) -> String {
    if v.is_nan() {
        return "NaN".into();
    }
    if v.is_infinite() {
        return if v > 0.0 { "∞".into() } else { "-∞".into() };
    }
    let a = v.abs();
    if a >= 10_000.0 {
        format!("{v:.3e}")
    } else if a >= 100.0 {
        format!("{v:.0}")
    } else if a >= 10.0 {
        format!("{v:.1}")
    } else if a >= 1.0 {
        format!("{v:.2}")
    } else {
        format!("{v:.3}")
    }
}

/// A duration for people: `0.4 s`, `12 s`, `3 min 4 s`, `2 h 5 min`.
fn ago(d: Duration) -> String {
    let s = d.as_secs_f64();
    if s < 10.0 {
        format!("{s:.1} s")
    } else if s < 60.0 {
        format!("{} s", s as u64)
    } else if s < 3600.0 {
        let s = s as u64;
        format!("{} min {} s", s / 60, s % 60)
    } else {
        let s = s as u64;
        format!("{} h {} min", s / 3600, s / 60 % 60)
    }
}

// ------------------------------------------------------------------ terminal

/// Whether `plumb listen` should draw the live view: not with `--plain` or
/// `--json`, and only when standard output is a terminal (with `--live` on
/// something else it says so and prints lines).
pub fn wanted(live: bool, plain: bool, json: bool) -> bool {
    if plain || json {
        return false;
    }
    let tty =
        std::io::stdout().is_terminal() && std::env::var_os("TERM").is_none_or(|t| t != "dumb");
    if live && !tty {
        eprintln!("plumb: standard output is not a terminal: printing lines, not the live view");
    }
    tty
}

/// Terminal size in columns and rows: the terminal's own, else `COLUMNS`
/// and `LINES`, else 80 × 24.
pub fn terminal_size() -> (usize, usize) {
    if let Some((terminal_size::Width(w), terminal_size::Height(h))) =
        terminal_size::terminal_size()
    {
        if w > 0 && h > 0 {
            return (usize::from(w), usize::from(h));
        }
    }
    let env = |k: &str, d: usize| {
        std::env::var(k)
            .ok()
            .and_then(|v| v.parse::<usize>().ok())
            .filter(|&n| n > 0)
            .unwrap_or(d)
    };
    (env("COLUMNS", 80), env("LINES", 24))
}

/// Enter the alternate screen, hide the cursor, no line wrap, clear.
const ENTER: &str = "\x1b[?1049h\x1b[?25l\x1b[?7l\x1b[H\x1b[2J";
/// Undo [`ENTER`].
const LEAVE: &str = "\x1b[0m\x1b[?7h\x1b[?25h\x1b[?1049l";

/// Whether the terminal is in the live view's mode (for the panic hook).
static ACTIVE: AtomicBool = AtomicBool::new(false);
static HOOK: Once = Once::new();

/// Gives the terminal back, if the view has it.
fn restore_terminal() {
    let mut out = std::io::stdout().lock();
    if ACTIVE.swap(false, Ordering::SeqCst) {
        let _ = out.write_all(LEAVE.as_bytes());
        let _ = out.flush();
    }
}

fn install_panic_hook() {
    HOOK.call_once(|| {
        let previous = std::panic::take_hook();
        std::panic::set_hook(Box::new(move |info| {
            restore_terminal();
            previous(info);
        }));
    });
}

struct Inner {
    state: LiveState,
    dirty: bool,
    stop: bool,
}

struct Shared {
    inner: Mutex<Inner>,
    wake: Condvar,
    started: Instant,
    colour: bool,
}

impl Shared {
    fn lock(&self) -> MutexGuard<'_, Inner> {
        self.inner.lock().unwrap_or_else(|e| e.into_inner())
    }

    fn now(&self) -> Duration {
        self.started.elapsed()
    }

    /// Draws `state` over the whole alternate screen.
    fn draw(&self, state: &LiveState) {
        let (cols, rows) = terminal_size();
        let screen = state.render(cols, rows, self.now());
        let mut text = String::from("\x1b[H");
        text.push_str(&screen.ansi(self.colour, "\r\n", Some(cols)));
        text.push_str("\x1b[J");
        let mut out = std::io::stdout().lock();
        if ACTIVE.load(Ordering::SeqCst) {
            let _ = out.write_all(text.as_bytes());
            let _ = out.flush();
        }
    }
}

/// The live view on the terminal: an [`EventSink`] that redraws the screen
/// from its own thread.
pub struct LiveView {
    shared: Arc<Shared>,
    painter: Option<thread::JoinHandle<()>>,
}

impl LiveView {
    /// Takes the terminal (standard output) and starts drawing `state`.
    pub fn start(state: LiveState) -> Self {
        let colour = std::env::var_os("NO_COLOR").is_none_or(|v| v.is_empty());
        let shared = Arc::new(Shared {
            inner: Mutex::new(Inner {
                state,
                dirty: true,
                stop: false,
            }),
            wake: Condvar::new(),
            started: Instant::now(),
            colour,
        });
        install_panic_hook();
        {
            let mut out = std::io::stdout().lock();
            ACTIVE.store(true, Ordering::SeqCst);
            let _ = out.write_all(ENTER.as_bytes());
            let _ = out.flush();
        }
        let painter = {
            let shared = Arc::clone(&shared);
            thread::spawn(move || paint(&shared))
        };
        LiveView {
            shared,
            painter: Some(painter),
        }
    }

    /// A function that hands the host's link counters to the view (call it
    /// now and then while listening).
    pub fn watcher(&self) -> impl FnMut(&LinkStats) + 'static {
        let shared = Arc::clone(&self.shared);
        move |s: &LinkStats| {
            let mut g = shared.lock();
            if g.state.host != *s {
                g.state.link(s);
                g.dirty = true;
            }
        }
    }

    /// Shows `text` as the newest note (see [`LiveState::notice`]).
    pub fn notice(&mut self, text: impl Into<String>) {
        let at = self.shared.now();
        let mut g = self.shared.lock();
        g.state.notice(at, text);
        g.dirty = true;
    }

    fn stop_painter(&mut self) {
        if let Some(p) = self.painter.take() {
            self.shared.lock().stop = true;
            self.shared.wake.notify_all();
            let _ = p.join();
        }
    }
}

/// The painter thread: at most [`FRAMES_PER_SECOND`] draws a second, and
/// one a second while nothing changes (the clocks move).
fn paint(shared: &Shared) {
    let frame = Duration::from_secs(1) / FRAMES_PER_SECOND;
    let mut drawn: Option<Instant> = None;
    loop {
        let mut g = shared.lock();
        if g.stop {
            return;
        }
        let since = drawn.map(|d| d.elapsed());
        let due = since.is_none_or(|e| (g.dirty && e >= frame) || e >= Duration::from_secs(1));
        if due {
            g.dirty = false;
            let state = g.state.clone();
            drop(g);
            shared.draw(&state);
            drawn = Some(Instant::now());
            g = shared.lock();
        }
        if g.stop {
            return;
        }
        // Woken early only to stop; the lock goes with the result.
        drop(shared.wake.wait_timeout(g, frame));
    }
}

impl EventSink for LiveView {
    fn notice(&mut self, n: &Notice) {
        let at = self.shared.now();
        let mut g = self.shared.lock();
        g.state.link_notice(n, at);
        g.dirty = true;
    }

    fn frame(&mut self, r: &Received) {
        let at = self.shared.now();
        let mut g = self.shared.lock();
        g.state.frame(r, at);
        g.dirty = true;
    }

    /// Draws the end, gives the terminal back and prints the last picture
    /// on the normal screen.
    fn finish(&mut self, stats: &LinkStats) {
        self.stop_painter();
        let state = {
            let mut g = self.shared.lock();
            g.state.end(stats);
            g.state.clone()
        };
        self.shared.draw(&state);
        restore_terminal();
        let (cols, _) = terminal_size();
        let screen = state.render(cols, usize::MAX, self.shared.now());
        let mut out = std::io::stdout().lock();
        let _ = writeln!(out, "{}", screen.ansi(self.shared.colour, "\n", None));
        let _ = out.flush();
    }
}

impl Drop for LiveView {
    fn drop(&mut self) {
        self.stop_painter();
        restore_terminal();
    }
}
