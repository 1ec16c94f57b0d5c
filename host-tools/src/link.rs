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
    /// Greetings that showed the device had restarted.
    pub restarts: u64,
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
        }
    }

    /// Sets how long to wait for the answer to a resend request.
    pub fn set_resend_timeout(&mut self, t: Duration) {
        self.resend_timeout = t;
    }

    /// What the link is connected to.
    pub fn describe(&self) -> String {
        self.transport.describe()
    }

    /// Sends one host message as a frame.
    pub fn send(&mut self, msg: &HostMsg) -> Result<()> {
        let frame = wire::encode_frame_vec(msg);
        self.transport
            .send(&frame)
            .map_err(|e| self.link_error(format!("cannot send to the device: {e}")))
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
            match self.transport.recv(wait) {
                Chunk::Bytes(b) => self.ingest(&b)?,
                Chunk::Timeout => {}
                Chunk::Closed => self.closed = true,
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
            rest = self.decoder.feed(rest);
            match self.decoder.take_message::<DeviceFrame>() {
                Some(Ok(frame)) => self.accept(frame)?,
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
        // A greeting numbered below what we expect: the device restarted.
        if let (DeviceMsg::Greeting(_), Some(next)) = (&frame.msg, self.next) {
            if !wire::seq_at_or_after(seq, next) && !self.missing.contains(&seq) {
                self.stats.restarts += 1;
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
        // had left the ring before the request.
        let gone: Vec<u32> = self
            .missing
            .iter()
            .copied()
            .filter(|&s| wire::seq_at_or_after(s, p.from) && !wire::seq_at_or_after(s, done_seq))
            .collect();
        for s in gone {
            self.missing.remove(&s);
            if let Some(oldest) = done.oldest {
                if !wire::seq_at_or_after(s, oldest) {
                    self.stats.lost += 1;
                }
            } else if done.dropped > 0 {
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
