//! The host end of the serial link: byte transports, framing, sequence
//! tracking and resend (`shared-model/PROTOCOL.md`).
//!
//! * A [`Transport`] moves bytes: a serial port ([`SerialTransport`]), a
//!   spawned program's standard input and output ([`ExecTransport`], how the
//!   tests talk to QEMU), or a TCP connection on a loopback address
//!   ([`TcpTransport`]). Each has a reader thread, so receiving takes a
//!   timeout and nothing blocks forever.
//! * A [`Link`] turns bytes into [`DeviceFrame`]s with the protocol's stream
//!   decoder, counts damage, watches the device's sequence numbers and asks
//!   for a resend (`ResendFrom`) on every gap, drops duplicates, and says
//!   which frames were recovered ([`Received`]).
//! * A link given a way to reopen its transport ([`Link::set_reopen`]: a
//!   serial path or a TCP address) survives the port going away: it says so,
//!   tries again with a growing pause ([`RECONNECT_FIRST`] doubling up to
//!   [`RECONNECT_MAX`]) and carries on where the device is. It notices a
//!   device that restarted (a greeting, or any unretained message, numbered
//!   behind what it expected) and bytes of noise before the first frame.
//!   Each of these is a [`Notice`] ([`Link::take_notices`]) for the caller
//!   to show.
//!
//! The flows built on it (greeting, feeding samples, uploads) are in
//! [`crate::device`]; the text, JSON and CSV views of what arrives are in
//! [`crate::events`].

use crate::error::{Error, Result};
use plumb_model::wire::{
    self, DeviceFrame, DeviceFrameDecoder, DeviceMsg, HostMsg, LinkCounters, ResendDone,
};
use std::collections::{BTreeSet, HashSet, VecDeque};
use std::io::{Read, Write};
use std::net::{SocketAddr, TcpStream, ToSocketAddrs};
use std::process::{Child, ChildStdin, Command, ExitStatus, Stdio};
use std::sync::mpsc::{self, Receiver, RecvTimeoutError};
use std::sync::{Arc, Mutex};
use std::thread;
use std::time::{Duration, Instant};

/// Zero bytes in a row that the emulator board takes as the end of its run
/// (16 empty frames: a no-op for the protocol; see
/// `firmware/boards/mps2-an386/src/link.rs`). [`ExecTransport`] sends them
/// when it closes.
pub const SIGN_OFF_ZEROS: usize = 16;

/// What a transport had for the caller.
#[derive(Debug)]
pub enum Chunk {
    /// Bytes from the device.
    Bytes(Vec<u8>),
    /// Nothing arrived in time.
    Timeout,
    /// The other side is gone (end of file, closed socket, port error).
    Closed,
}

/// A byte stream to a device.
pub trait Transport: Send {
    /// Writes every byte.
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()>;
    /// Waits up to `timeout` for bytes.
    fn recv(&mut self, timeout: Duration) -> Chunk;
    /// Says that the host will send nothing more (a spawned program gets the
    /// sign-off and the end of its input). Bytes may still arrive.
    fn end_input(&mut self) {}
    /// Ends the session; for a spawned program its exit status (after
    /// `grace`, the program is killed).
    fn close(&mut self, _grace: Duration) -> Option<ExitStatus> {
        None
    }
    /// What this is connected to, for messages.
    fn describe(&self) -> String;
    /// Anything the other side said besides the link (a spawned program's
    /// standard error), for diagnostics.
    fn diagnostics(&self) -> String {
        String::new()
    }
}

/// A reader thread that forwards whatever `source` yields.
fn spawn_reader(mut source: impl Read + Send + 'static) -> Receiver<Option<Vec<u8>>> {
    let (tx, rx) = mpsc::channel();
    thread::spawn(move || {
        let mut buf = vec![0u8; 4096];
        loop {
            match source.read(&mut buf) {
                Ok(0) => break,
                Ok(n) => {
                    if tx.send(Some(buf[..n].to_vec())).is_err() {
                        return;
                    }
                }
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(e) if e.kind() == std::io::ErrorKind::TimedOut => {}
                Err(e) if e.kind() == std::io::ErrorKind::WouldBlock => {}
                Err(_) => break,
            }
        }
        let _ = tx.send(None);
    });
    rx
}

fn recv_from(rx: &Receiver<Option<Vec<u8>>>, closed: &mut bool, timeout: Duration) -> Chunk {
    if *closed {
        return Chunk::Closed;
    }
    match rx.recv_timeout(timeout) {
        Ok(Some(bytes)) => Chunk::Bytes(bytes),
        Ok(None) | Err(RecvTimeoutError::Disconnected) => {
            *closed = true;
            Chunk::Closed
        }
        Err(RecvTimeoutError::Timeout) => Chunk::Timeout,
    }
}

/// A serial port (`serialport`), 8N1, no flow control.
pub struct SerialTransport {
    name: String,
    port: Box<dyn serialport::SerialPort>,
    rx: Receiver<Option<Vec<u8>>>,
    closed: bool,
}

impl SerialTransport {
    /// Opens `path` at `baud`.
    pub fn open(path: &str, baud: u32) -> Result<Self> {
        let port = serialport::new(path, baud)
            .timeout(Duration::from_millis(100))
            .open()
            .map_err(|e| Error::input(format!("cannot open serial port {path}: {e}")))?;
        let reader = port
            .try_clone()
            .map_err(|e| Error::input(format!("cannot share serial port {path}: {e}")))?;
        Ok(SerialTransport {
            name: format!("{path} at {baud} baud"),
            port,
            rx: spawn_reader(reader),
            closed: false,
        })
    }
}

impl Transport for SerialTransport {
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        self.port.write_all(bytes)?;
        self.port.flush()
    }

    fn recv(&mut self, timeout: Duration) -> Chunk {
        recv_from(&self.rx, &mut self.closed, timeout)
    }

    fn describe(&self) -> String {
        self.name.clone()
    }
}

/// A TCP connection to a loopback address (QEMU's
/// `-serial tcp:127.0.0.1:PORT,server=on`, say). Other addresses are
/// refused: the tool only ever talks to this machine.
pub struct TcpTransport {
    addr: SocketAddr,
    stream: TcpStream,
    rx: Receiver<Option<Vec<u8>>>,
    closed: bool,
}

impl TcpTransport {
    /// Connects to `addr` (retrying for up to `wait`, for a server that is
    /// still starting).
    pub fn connect(addr: &str, wait: Duration) -> Result<Self> {
        let addrs: Vec<SocketAddr> = addr
            .to_socket_addrs()
            .map_err(|e| Error::input(format!("--tcp {addr}: {e}")))?
            .collect();
        let Some(addr) = addrs.into_iter().find(|a| a.ip().is_loopback()) else {
            return Err(Error::input(format!(
                "--tcp {addr}: only loopback addresses (127.0.0.0/8, ::1, localhost) are allowed"
            )));
        };
        let start = Instant::now();
        let stream = loop {
            match TcpStream::connect_timeout(&addr, Duration::from_secs(1)) {
                Ok(s) => break s,
                Err(e) if start.elapsed() >= wait => {
                    return Err(Error::input(format!("cannot connect to {addr}: {e}")))
                }
                Err(_) => thread::sleep(Duration::from_millis(50)),
            }
        };
        let _ = stream.set_nodelay(true);
        let reader = stream
            .try_clone()
            .map_err(|e| Error::input(format!("cannot share the connection to {addr}: {e}")))?;
        Ok(TcpTransport {
            addr,
            stream,
            rx: spawn_reader(reader),
            closed: false,
        })
    }
}

impl Transport for TcpTransport {
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        self.stream.write_all(bytes)
    }

    fn recv(&mut self, timeout: Duration) -> Chunk {
        recv_from(&self.rx, &mut self.closed, timeout)
    }

    fn end_input(&mut self) {
        let _ = self.stream.shutdown(std::net::Shutdown::Write);
    }

    fn describe(&self) -> String {
        format!("tcp {}", self.addr)
    }
}

/// A program started with `sh -c COMMAND`, its standard input and output as
/// the link (how tests reach QEMU: `-serial stdio`). Its standard error is
/// kept for diagnostics. The program is killed when this is dropped.
pub struct ExecTransport {
    command: String,
    child: Child,
    stdin: Option<ChildStdin>,
    rx: Receiver<Option<Vec<u8>>>,
    closed: bool,
    stderr: Arc<Mutex<Vec<u8>>>,
    status: Option<ExitStatus>,
}

/// Most bytes of a program's standard error kept.
const STDERR_KEEP: usize = 16 * 1024;

impl ExecTransport {
    /// Starts `command` through `sh -c`.
    pub fn spawn(command: &str) -> Result<Self> {
        let mut cmd = Command::new("sh");
        cmd.arg("-c").arg(command);
        Self::spawn_command(cmd, command)
    }

    /// Starts a prepared command (stdin, stdout and stderr are replaced by
    /// pipes); `label` names it in messages.
    pub fn spawn_command(mut cmd: Command, label: &str) -> Result<Self> {
        let mut child = cmd
            .stdin(Stdio::piped())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .map_err(|e| Error::input(format!("cannot start `{label}`: {e}")))?;
        let stdout = child.stdout.take();
        let stderr_pipe = child.stderr.take();
        let stdin = child.stdin.take();
        let rx = match stdout {
            Some(out) => spawn_reader(out),
            None => return Err(Error::input(format!("`{label}`: no standard output"))),
        };
        let stderr = Arc::new(Mutex::new(Vec::new()));
        if let Some(mut pipe) = stderr_pipe {
            let keep = Arc::clone(&stderr);
            thread::spawn(move || {
                let mut buf = [0u8; 1024];
                while let Ok(n) = pipe.read(&mut buf) {
                    if n == 0 {
                        break;
                    }
                    if let Ok(mut k) = keep.lock() {
                        if k.len() < STDERR_KEEP {
                            k.extend_from_slice(&buf[..n]);
                        }
                    }
                }
            });
        }
        Ok(ExecTransport {
            command: label.to_string(),
            child,
            stdin,
            rx,
            closed: false,
            stderr,
            status: None,
        })
    }
}

impl Transport for ExecTransport {
    fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
        match self.stdin.as_mut() {
            Some(s) => s.write_all(bytes).and_then(|()| s.flush()),
            None => Err(std::io::Error::new(
                std::io::ErrorKind::BrokenPipe,
                "input already closed",
            )),
        }
    }

    fn recv(&mut self, timeout: Duration) -> Chunk {
        recv_from(&self.rx, &mut self.closed, timeout)
    }

    fn end_input(&mut self) {
        if let Some(mut s) = self.stdin.take() {
            let _ = s.write_all(&[0u8; SIGN_OFF_ZEROS]);
            let _ = s.flush();
        }
    }

    fn close(&mut self, grace: Duration) -> Option<ExitStatus> {
        self.end_input();
        let deadline = Instant::now() + grace;
        loop {
            match self.child.try_wait() {
                Ok(Some(st)) => {
                    self.status = Some(st);
                    return Some(st);
                }
                Ok(None) if Instant::now() < deadline => thread::sleep(Duration::from_millis(10)),
                _ => {
                    let _ = self.child.kill();
                    let st = self.child.wait().ok();
                    self.status = st;
                    return st;
                }
            }
        }
    }

    fn describe(&self) -> String {
        format!("`{}`", self.command)
    }

    fn diagnostics(&self) -> String {
        self.stderr
            .lock()
            .map(|s| String::from_utf8_lossy(&s).into_owned())
            .unwrap_or_default()
    }
}

impl Drop for ExecTransport {
    fn drop(&mut self) {
        if self.status.is_none() {
            let _ = self.child.kill();
            let _ = self.child.wait();
        }
    }
}

/// First pause before reopening a transport that went away.
pub const RECONNECT_FIRST: Duration = Duration::from_millis(100);
/// Longest pause between two attempts to reopen.
pub const RECONNECT_MAX: Duration = Duration::from_secs(5);

/// Something that happened to the link itself (not a device message), for
/// the caller to show: one line each.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Notice {
    /// Bytes that made no frame arrived before the first good frame (a boot
    /// banner, line noise, the tail of an earlier session).
    Garbage {
        /// Bytes before the first good frame.
        bytes: u64,
        /// Damaged frames dropped among them.
        frames: u64,
    },
    /// The device restarted: its numbering began again.
    Restarted {
        /// Number of the frame that showed it.
        seq: u32,
        /// Last number seen before.
        last: u32,
        /// `true`: a greeting showed it; `false`: another message.
        by_greeting: bool,
    },
    /// The transport went away (port unplugged, connection closed).
    Disconnected {
        /// What it was connected to.
        what: String,
    },
    /// An attempt to reopen failed; the next follows after `wait`.
    Reconnecting {
        /// Attempts so far.
        attempt: u32,
        /// Pause before the next.
        wait: Duration,
        /// Why it failed.
        error: String,
    },
    /// The transport is back.
    Reconnected {
        /// What it is connected to.
        what: String,
        /// Attempts it took.
        attempts: u32,
        /// Time since it went away.
        after: Duration,
    },
}

/// Opens the transport again after it went away.
pub type Reopen = Box<dyn FnMut() -> Result<Box<dyn Transport>> + Send>;

/// A transport that went away and is being reopened.
struct Down {
    since: Instant,
    attempts: u32,
    next_try: Instant,
}

/// Counters of the host's receiving side and of resends.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct LinkStats {
    /// Frames decoded (counters of the protocol's stream decoder).
    pub frames: LinkCounters,
    /// Bytes received.
    pub bytes: u64,
    /// Gaps in the device's sequence numbers.
    pub gaps: u64,
    /// Sequence numbers missing in those gaps.
    pub missing: u64,
    /// `ResendFrom` requests sent.
    pub resend_requests: u64,
    /// Events (drift raised/cleared, sensor faults) that arrived only
    /// through a resend.
    pub recovered: u64,
    /// Frames received twice (dropped).
    pub duplicates: u64,
    /// Missing sequence numbers the device could no longer resend (its ring
    /// had dropped them): they may have been events.
    pub lost: u64,
    /// Greetings (or other messages) that showed the device had restarted.
    pub restarts: u64,
    /// Times the transport went away and came back.
    pub reconnects: u64,
}

/// A frame handed to the caller.
#[derive(Debug, Clone, PartialEq)]
pub struct Received {
    /// The frame.
    pub frame: DeviceFrame,
    /// Whether it arrived through a resend (it had been lost).
    pub recovered: bool,
}

/// An outstanding `ResendFrom`.
#[derive(Debug, Clone, Copy)]
struct Pending {
    from: u32,
    sent: Instant,
    /// Frames at or after `from` and before the device's next new number
    /// received since the request (resent ones, duplicates included).
    answered: u32,
}

/// One session with a device over a transport.
pub struct Link {
    transport: Box<dyn Transport>,
    decoder: DeviceFrameDecoder,
    ready: VecDeque<Received>,
    /// Next new sequence number expected (`None` before the first frame).
    next: Option<u32>,
    /// Sequence numbers missed and not yet accounted for.
    missing: BTreeSet<u32>,
    /// Sequence numbers of the retained events received.
    events: HashSet<u32>,
    pending: Option<Pending>,
    /// How long to wait for a `ResendDone` before asking again.
    resend_timeout: Duration,
    stats: LinkStats,
    /// Bytes after the last frame delimiter (text a board prints at the end
    /// of a run, say).
    tail: Vec<u8>,
    closed: bool,
    exit: Option<ExitStatus>,
    notices: VecDeque<Notice>,
    reopen: Option<Reopen>,
    down: Option<Down>,
    /// Whether a good frame arrived yet, and the bytes before it.
    first_seen: bool,
    bytes_before_first: u64,
    /// A zero went before the first frame sent on this transport.
    flush_sent: bool,
}

/// Longest gap taken as lost frames; a longer jump is a restart or another
/// device, and the numbering starts again.
const MAX_GAP: u32 = 4096;
/// Most bytes held back after the last zero before they are decoded (and
/// counted as an overflow).
const TAIL_KEEP: usize = 4096;

impl Link {
    /// A session over `transport`.
    pub fn new(transport: Box<dyn Transport>) -> Self {
        Link {
            transport,
            decoder: DeviceFrameDecoder::new(),
            ready: VecDeque::new(),
            next: None,
            missing: BTreeSet::new(),
            events: HashSet::new(),
            pending: None,
            resend_timeout: Duration::from_millis(1000),
            stats: LinkStats::default(),
            tail: Vec::new(),
            closed: false,
            exit: None,
            notices: VecDeque::new(),
            reopen: None,
            down: None,
            first_seen: false,
            bytes_before_first: 0,
            flush_sent: false,
        }
    }

    /// Lets the link reopen its transport when it goes away (a serial path
    /// or a TCP address; not a spawned program, whose end is the end).
    pub fn set_reopen(&mut self, reopen: Reopen) {
        self.reopen = Some(reopen);
    }

    /// What happened to the link since the last call, oldest first.
    pub fn take_notices(&mut self) -> Vec<Notice> {
        self.notices.drain(..).collect()
    }

    /// Whether the transport is away and being reopened.
    pub fn is_reconnecting(&self) -> bool {
        self.down.is_some()
    }

    /// Sets how long to wait for the answer to a resend request.
    pub fn set_resend_timeout(&mut self, t: Duration) {
        self.resend_timeout = t;
    }

    /// What the link is connected to.
    pub fn describe(&self) -> String {
        self.transport.describe()
    }

    /// Sends one host message as a frame. The first frame on a transport
    /// gets a leading zero, which ends whatever half frame the device held
    /// (an empty frame to the protocol). While the transport is away the
    /// message is dropped (the caller's retries send it again).
    pub fn send(&mut self, msg: &HostMsg) -> Result<()> {
        if self.down.is_some() {
            return Ok(());
        }
        let mut frame = wire::encode_frame_vec(msg);
        if !self.flush_sent {
            frame.insert(0, 0);
            self.flush_sent = true;
        }
        match self.transport.send(&frame) {
            Ok(()) => Ok(()),
            Err(_) if self.reopen.is_some() => {
                self.went_away();
                Ok(())
            }
            Err(e) => Err(self.link_error(format!("cannot send to the device: {e}"))),
        }
    }

    /// Sends raw bytes (tests send damaged frames this way).
    pub fn send_raw(&mut self, bytes: &[u8]) -> Result<()> {
        self.transport
            .send(bytes)
            .map_err(|e| self.link_error(format!("cannot send to the device: {e}")))
    }

    fn link_error(&self, msg: String) -> Error {
        let diag = self.transport.diagnostics();
        if diag.trim().is_empty() {
            Error::input(msg)
        } else {
            Error::input(format!("{msg}\n{}", diag.trim_end()))
        }
    }

    /// Counters so far.
    pub fn stats(&self) -> LinkStats {
        let mut s = self.stats;
        s.frames = self.decoder.counters();
        s
    }

    /// Whether the other side has gone.
    pub fn is_closed(&self) -> bool {
        self.closed
    }

    /// Sequence numbers still missing (a resend may yet bring them).
    pub fn unresolved(&self) -> usize {
        self.missing.len()
    }

    /// Text that followed the last frame (a board's closing line).
    pub fn tail_text(&self) -> String {
        String::from_utf8_lossy(&self.tail).into_owned()
    }

    /// The spawned program's exit status, after [`Link::close`].
    pub fn exit_status(&self) -> Option<ExitStatus> {
        self.exit
    }

    /// Anything the transport's other side said besides the link.
    pub fn diagnostics(&self) -> String {
        self.transport.diagnostics()
    }

    /// The next frame, waiting up to `timeout`; `None` on timeout or when
    /// the link has closed (see [`Link::is_closed`]). Resend requests are
    /// sent (and repeated) as needed while waiting.
    pub fn recv(&mut self, timeout: Duration) -> Result<Option<Received>> {
        let deadline = Instant::now() + timeout;
        loop {
            if let Some(r) = self.ready.pop_front() {
                return Ok(Some(r));
            }
            self.check_resend()?;
            if self.closed {
                return Ok(None);
            }
            let now = Instant::now();
            if now >= deadline {
                return Ok(None);
            }
            let mut wait = deadline - now;
            if let Some(p) = self.pending {
                let due = p.sent + self.resend_timeout;
                wait = wait.min(
                    due.saturating_duration_since(now)
                        .max(Duration::from_millis(1)),
                );
            }
            if self.down.is_some() {
                self.try_reopen(deadline);
                continue;
            }
            match self.transport.recv(wait) {
                Chunk::Bytes(b) => self.ingest(&b)?,
                Chunk::Timeout => {}
                Chunk::Closed if self.reopen.is_some() => self.went_away(),
                Chunk::Closed => self.closed = true,
            }
        }
    }

    /// The transport went away: say so and start reopening it.
    fn went_away(&mut self) {
        if self.down.is_some() {
            return;
        }
        self.notices.push_back(Notice::Disconnected {
            what: self.transport.describe(),
        });
        let now = Instant::now();
        self.down = Some(Down {
            since: now,
            attempts: 0,
            next_try: now + RECONNECT_FIRST,
        });
        self.pending = None;
    }

    /// Waits (up to `deadline`) for the next attempt and makes it.
    fn try_reopen(&mut self, deadline: Instant) {
        let Some(down) = self.down.as_mut() else {
            return;
        };
        let now = Instant::now();
        if now < down.next_try {
            thread::sleep(down.next_try.min(deadline).saturating_duration_since(now));
            return;
        }
        down.attempts += 1;
        let Some(reopen) = self.reopen.as_mut() else {
            return;
        };
        match reopen() {
            Ok(t) => {
                let attempts = down.attempts;
                let after = down.since.elapsed();
                self.transport = t;
                self.down = None;
                self.flush_sent = false;
                self.stats.reconnects += 1;
                // Whatever half frame the old connection left ends here
                // (a damaged frame, counted): nothing of it belongs to the
                // new one.
                let mut held = std::mem::take(&mut self.tail);
                held.push(0);
                let _ = self.decode(&held);
                self.notices.push_back(Notice::Reconnected {
                    what: self.transport.describe(),
                    attempts,
                    after,
                });
            }
            Err(e) => {
                let wait = RECONNECT_FIRST
                    .saturating_mul(1 << down.attempts.min(16))
                    .min(RECONNECT_MAX);
                down.next_try = Instant::now() + wait;
                let attempt = down.attempts;
                self.notices.push_back(Notice::Reconnecting {
                    attempt,
                    wait,
                    error: e.to_string().lines().next().unwrap_or_default().to_string(),
                });
            }
        }
    }

    /// Receives until the link goes quiet for `quiet` or closes, handing
    /// every frame to `f`; gives up on resends after `limit`.
    pub fn drain(
        &mut self,
        quiet: Duration,
        limit: Duration,
        mut f: impl FnMut(&Received),
    ) -> Result<()> {
        let end = Instant::now() + limit;
        while Instant::now() < end {
            match self.recv(quiet)? {
                Some(r) => f(&r),
                None if self.closed => break,
                None if self.pending.is_none() && self.missing.is_empty() => break,
                None => {}
            }
        }
        Ok(())
    }

    /// Ends the session: the host sends nothing more, every frame still on
    /// its way is handed to `f` (up to `grace`), and a spawned program is
    /// waited for (killed after `grace`).
    pub fn close(&mut self, grace: Duration, mut f: impl FnMut(&Received)) -> Result<()> {
        self.transport.end_input();
        let end = Instant::now() + grace;
        while !self.closed && Instant::now() < end {
            let left = end.saturating_duration_since(Instant::now());
            match self.transport.recv(left.min(Duration::from_millis(200))) {
                Chunk::Bytes(b) => self.ingest(&b)?,
                Chunk::Timeout => {}
                Chunk::Closed => self.closed = true,
            }
            while let Some(r) = self.ready.pop_front() {
                f(&r);
            }
        }
        while let Some(r) = self.ready.pop_front() {
            f(&r);
        }
        self.exit = self.transport.close(grace);
        Ok(())
    }

    fn ingest(&mut self, bytes: &[u8]) -> Result<()> {
        self.stats.bytes += bytes.len() as u64;
        // Bytes after the last zero are held back until a zero ends them:
        // a frame is only complete at its delimiter anyway, and what is left
        // at the end of a session is the board's closing text, not a
        // damaged frame.
        let Some(p) = bytes.iter().rposition(|&b| b == 0) else {
            self.tail.extend_from_slice(bytes);
            if self.tail.len() > TAIL_KEEP {
                let held = std::mem::take(&mut self.tail);
                self.decode(&held)?;
            }
            return Ok(());
        };
        let mut chunk = std::mem::take(&mut self.tail);
        chunk.extend_from_slice(&bytes[..=p]);
        self.tail.extend_from_slice(&bytes[p + 1..]);
        self.decode(&chunk)
    }

    fn decode(&mut self, bytes: &[u8]) -> Result<()> {
        let mut rest = bytes;
        loop {
            let before = rest.len();
            rest = self.decoder.feed(rest);
            if !self.first_seen {
                self.bytes_before_first += (before - rest.len()) as u64;
            }
            match self.decoder.take_message::<DeviceFrame>() {
                Some(Ok(frame)) => {
                    if !self.first_seen {
                        self.first_seen = true;
                        let c = self.decoder.counters();
                        let frames = c.crc_errors + c.framing_errors + c.overflows + c.undecodable;
                        // The good frame's own bytes were counted too.
                        let own = wire::encode_frame_vec(&frame).len() as u64;
                        let bytes = self.bytes_before_first.saturating_sub(own);
                        if bytes > 0 {
                            self.notices.push_back(Notice::Garbage {
                                bytes,
                                frames: u64::from(frames),
                            });
                        }
                    }
                    self.accept(frame)?
                }
                // Counted by the decoder.
                Some(Err(_)) => {}
                None if rest.is_empty() => break,
                None => {}
            }
        }
        Ok(())
    }

    fn accept(&mut self, frame: DeviceFrame) -> Result<()> {
        let seq = frame.seq;
        let retained = frame.msg.is_retained();
        // A message numbered below what we expect that cannot be a resend:
        // the device restarted. A greeting says so itself; any other
        // unretained message (status, report, ack) is never sent twice, so
        // an old number means the numbering began again (the greeting after
        // the restart was lost).
        if let Some(next) = self.next {
            let behind = !wire::seq_at_or_after(seq, next) && !self.missing.contains(&seq);
            if behind && !retained {
                self.stats.restarts += 1;
                self.notices.push_back(Notice::Restarted {
                    seq,
                    last: next.wrapping_sub(1),
                    by_greeting: matches!(frame.msg, DeviceMsg::Greeting(_)),
                });
                self.next = None;
                self.missing.clear();
                self.events.clear();
                self.pending = None;
            }
        }
        let next = match self.next {
            None => {
                self.next = Some(seq.wrapping_add(1));
                if retained {
                    self.events.insert(seq);
                }
                self.ready.push_back(Received {
                    frame,
                    recovered: false,
                });
                return Ok(());
            }
            Some(n) => n,
        };
        if wire::seq_at_or_after(seq, next) {
            let gap = seq.wrapping_sub(next);
            if gap > MAX_GAP {
                // Not a gap we can fill: start counting again here.
                self.missing.clear();
                self.pending = None;
            } else if gap > 0 {
                self.stats.gaps += 1;
                self.stats.missing += u64::from(gap);
                for k in 0..gap {
                    self.missing.insert(next.wrapping_add(k));
                }
            }
            self.next = Some(seq.wrapping_add(1));
            if retained {
                self.events.insert(seq);
            }
            if let DeviceMsg::ResendDone(done) = &frame.msg {
                self.on_resend_done(seq, *done);
            }
            self.ready.push_back(Received {
                frame,
                recovered: false,
            });
            return Ok(());
        }
        // An older number: a resent event, or a duplicate.
        if let Some(p) = self.pending.as_mut() {
            if wire::seq_at_or_after(seq, p.from) {
                p.answered += 1;
            }
        }
        if !retained || self.events.contains(&seq) {
            self.stats.duplicates += 1;
            self.missing.remove(&seq);
            return Ok(());
        }
        self.events.insert(seq);
        let was_missing = self.missing.remove(&seq);
        if was_missing {
            self.stats.recovered += 1;
        }
        self.ready.push_back(Received {
            frame,
            recovered: was_missing,
        });
        Ok(())
    }

    fn on_resend_done(&mut self, done_seq: u32, done: ResendDone) {
        let Some(p) = self.pending else { return };
        if done.from != p.from {
            return;
        }
        self.pending = None;
        if p.answered < u32::from(done.count) {
            // Some resent frames were lost on the way: ask again (the
            // missing set still holds them).
            return;
        }
        // Every retained message from `from` on arrived; what is still
        // missing before the summary was not retained (reports, acks), or
        // had left the ring before the request. Only a ring that dropped
        // something can have lost an event: while `dropped` is 0 every
        // event since boot is still retained, so a number before the oldest
        // was a report or an acknowledgement.
        let gone: Vec<u32> = self
            .missing
            .iter()
            .copied()
            .filter(|&s| wire::seq_at_or_after(s, p.from) && !wire::seq_at_or_after(s, done_seq))
            .collect();
        for s in gone {
            self.missing.remove(&s);
            let before_oldest = done
                .oldest
                .is_none_or(|oldest| !wire::seq_at_or_after(s, oldest));
            if done.dropped > 0 && before_oldest {
                self.stats.lost += 1;
            }
        }
    }

    fn check_resend(&mut self) -> Result<()> {
        if self.closed {
            return Ok(());
        }
        if let Some(p) = self.pending {
            if p.sent.elapsed() < self.resend_timeout {
                return Ok(());
            }
            self.pending = None;
        }
        let Some(&from) = self.missing.iter().next() else {
            return Ok(());
        };
        self.stats.resend_requests += 1;
        self.pending = Some(Pending {
            from,
            sent: Instant::now(),
            answered: 0,
        });
        self.send(&HostMsg::ResendFrom { seq: from })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use plumb_model::wire::{Ack, DriftCleared, DriftRaised, Greeting, ScoreTriple, Share};
    use plumb_model::{Capacity, Dims};
    use std::sync::atomic::{AtomicU32, Ordering};

    /// A transport that plays chunks, then says `Closed` (or times out
    /// forever when `hold` is set).
    struct Script {
        chunks: VecDeque<Vec<u8>>,
        hold: bool,
        sent: Arc<Mutex<Vec<u8>>>,
    }

    impl Script {
        fn new(chunks: Vec<Vec<u8>>, hold: bool) -> (Self, Arc<Mutex<Vec<u8>>>) {
            let sent = Arc::new(Mutex::new(Vec::new()));
            (
                Script {
                    chunks: chunks.into(),
                    hold,
                    sent: Arc::clone(&sent),
                },
                sent,
            )
        }
    }

    impl Transport for Script {
        fn send(&mut self, bytes: &[u8]) -> std::io::Result<()> {
            self.sent.lock().unwrap().extend_from_slice(bytes);
            Ok(())
        }
        fn recv(&mut self, timeout: Duration) -> Chunk {
            match self.chunks.pop_front() {
                Some(c) => Chunk::Bytes(c),
                None if self.hold => {
                    thread::sleep(timeout.min(Duration::from_millis(5)));
                    Chunk::Timeout
                }
                None => Chunk::Closed,
            }
        }
        fn describe(&self) -> String {
            "script".into()
        }
    }

    fn greeting() -> DeviceMsg {
        DeviceMsg::Greeting(Greeting {
            protocol: plumb_model::wire::PROTOCOL_VERSION,
            firmware: heapless::String::try_from("test").unwrap(),
            model_id: 9,
            schema: 1,
            dims: Dims {
                features: 2,
                components: 1,
                mixture: 1,
            },
            capacity: Capacity::DEVICE,
            active: None,
            generation: 0,
            status_every: 0,
        })
    }

    fn raised(sample: u64) -> DeviceMsg {
        DeviceMsg::DriftRaised(DriftRaised {
            sample,
            drivers: 1,
            scores: ScoreTriple {
                spe: 1.0,
                t2: 2.0,
                nll: 3.0,
            },
            crossed: heapless::Vec::new(),
            top: [Share {
                feature: 255,
                value: 0.0,
            }; 3],
        })
    }

    fn f(seq: u32, msg: DeviceMsg) -> Vec<u8> {
        wire::encode_frame_vec(&DeviceFrame { seq, msg })
    }

    fn ack(seq: u32) -> Vec<u8> {
        f(seq, DeviceMsg::Ack(Ack::StatsReset))
    }

    /// Everything the link hands over, until it closes.
    fn all(link: &mut Link) -> Vec<Received> {
        let mut out = Vec::new();
        while let Some(r) = link.recv(Duration::from_millis(50)).unwrap() {
            out.push(r);
        }
        out
    }

    fn seqs(rs: &[Received]) -> Vec<(u32, bool)> {
        rs.iter()
            .map(|r| (r.frame.seq, r.frame.msg.is_retained()))
            .collect()
    }

    #[test]
    fn a_greeting_numbered_behind_is_a_restart() {
        let (t, _) = Script::new(
            vec![
                f(0, greeting()),
                ack(1),
                f(2, raised(10)),
                ack(3),
                // Reboot: greeting 0, then a new event with an old number.
                f(0, greeting()),
                f(1, DeviceMsg::DriftCleared(DriftCleared { sample: 4 })),
                f(2, raised(30)),
            ],
            false,
        );
        let mut link = Link::new(Box::new(t));
        let got = all(&mut link);
        assert_eq!(
            seqs(&got),
            [
                (0, false),
                (1, false),
                (2, true),
                (3, false),
                (0, false),
                (1, true),
                (2, true)
            ]
        );
        assert_eq!(
            link.take_notices(),
            [Notice::Restarted {
                seq: 0,
                last: 3,
                by_greeting: true
            }]
        );
        let s = link.stats();
        assert_eq!((s.restarts, s.duplicates, s.gaps), (1, 0, 0));
    }

    #[test]
    fn an_old_number_on_an_unretained_message_is_a_restart() {
        // The greeting after the reboot was lost: the acknowledgement
        // numbered 1 shows it (acks are never sent twice).
        let (t, _) = Script::new(
            vec![
                f(0, greeting()),
                ack(1),
                f(2, raised(10)),
                ack(3),
                ack(1),
                f(2, raised(30)),
            ],
            false,
        );
        let mut link = Link::new(Box::new(t));
        let got = all(&mut link);
        assert_eq!(got.len(), 6, "{:?}", seqs(&got));
        assert!(matches!(&got[5].frame.msg, DeviceMsg::DriftRaised(d) if d.sample == 30));
        assert_eq!(
            link.take_notices(),
            [Notice::Restarted {
                seq: 1,
                last: 3,
                by_greeting: false
            }]
        );
    }

    #[test]
    fn a_resent_event_is_not_a_restart() {
        let (t, sent) = Script::new(
            vec![
                f(0, greeting()),
                ack(1),
                // 2 (an event) is lost; 3 shows the gap; the resend brings 2.
                ack(3),
                f(2, raised(10)),
                f(
                    4,
                    DeviceMsg::ResendDone(ResendDone {
                        from: 2,
                        count: 1,
                        oldest: Some(2),
                        dropped: 0,
                    }),
                ),
            ],
            false,
        );
        let mut link = Link::new(Box::new(t));
        let got = all(&mut link);
        assert!(got[3].recovered);
        assert!(link.take_notices().is_empty());
        let s = link.stats();
        assert_eq!((s.restarts, s.recovered, s.lost), (0, 1, 0));
        // The request went out (after the leading zero of the first send).
        let sent = sent.lock().unwrap().clone();
        assert_eq!(sent[0], 0, "a zero before the first frame");
        assert_eq!(
            &sent[1..],
            &wire::encode_frame_vec(&HostMsg::ResendFrom { seq: 2 })[..]
        );
    }

    #[test]
    fn noise_before_the_first_frame_is_reported_once() {
        let banner = b"boot rom 1.2\r\n\xff\xfe".to_vec();
        let first = f(0, greeting());
        let mut noisy = banner.clone();
        // No zero in the banner: it runs into the first frame, which is lost.
        noisy.extend_from_slice(&first);
        let (t, _) = Script::new(vec![noisy, ack(1), b"\x07junk\x00".to_vec(), ack(2)], false);
        let mut link = Link::new(Box::new(t));
        let got = all(&mut link);
        assert_eq!(seqs(&got), [(1, false), (2, false)]);
        assert_eq!(
            link.take_notices(),
            [Notice::Garbage {
                bytes: (banner.len() + first.len()) as u64,
                frames: 1
            }]
        );
    }

    #[test]
    fn a_port_that_goes_away_is_reopened_with_backoff() {
        let (t, _) = Script::new(vec![f(0, greeting()), ack(1), vec![0x11, 0x22]], false);
        let tries = Arc::new(AtomicU32::new(0));
        let n = Arc::clone(&tries);
        let mut link = Link::new(Box::new(t));
        link.set_reopen(Box::new(move || {
            if n.fetch_add(1, Ordering::SeqCst) < 2 {
                Err(Error::input("no such port"))
            } else {
                // Back, and the device carried on (3 is an event after a
                // lost 2).
                let (t, _) = Script::new(vec![f(3, raised(5)), ack(4)], true);
                Ok(Box::new(t))
            }
        }));
        let start = Instant::now();
        let mut got = Vec::new();
        while got.len() < 4 && start.elapsed() < Duration::from_secs(5) {
            if let Some(r) = link.recv(Duration::from_millis(100)).unwrap() {
                got.push(r);
            }
        }
        assert_eq!(seqs(&got), [(0, false), (1, false), (3, true), (4, false)]);
        let notices = link.take_notices();
        assert_eq!(notices.len(), 4, "{notices:?}");
        assert_eq!(
            notices[0],
            Notice::Disconnected {
                what: "script".into()
            }
        );
        let waits: Vec<Duration> = notices[1..3]
            .iter()
            .map(|n| match n {
                Notice::Reconnecting { wait, error, .. } => {
                    assert!(error.contains("no such port"));
                    *wait
                }
                other => panic!("{other:?}"),
            })
            .collect();
        assert_eq!(
            waits,
            [Duration::from_millis(200), Duration::from_millis(400)]
        );
        assert!(matches!(
            notices[3],
            Notice::Reconnected { attempts: 3, .. }
        ));
        let s = link.stats();
        assert_eq!(s.reconnects, 1);
        assert_eq!(s.gaps, 1, "2 is missing: a resend is asked for");
        // The half frame the old connection left was dropped and counted.
        assert_eq!(s.frames.framing_errors, 1);
        assert!(!link.is_closed());
    }
}
