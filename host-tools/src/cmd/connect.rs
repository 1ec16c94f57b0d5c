//! Options shared by the commands that talk to a device (`listen`, `feed`,
//! `upload`): where the link is and how patient to be.

use crate::device::Patience;
use crate::error::{Error, Result};
use crate::events::{EventSink, LineFormat};
use crate::link::{ExecTransport, Link, Reopen, SerialTransport, TcpTransport, Transport};
use clap::{ArgGroup, Args};
use std::io::Write;
use std::time::Duration;

/// Where the device is.
#[derive(Debug, Clone, Args)]
#[command(group(ArgGroup::new("link").required(true).args(["port", "exec", "tcp"])))]
pub struct LinkArgs {
    /// Serial port of the device, e.g. /dev/ttyUSB0 (8N1, no flow control)
    #[arg(long, value_name = "PATH", help_heading = "Link")]
    pub port: Option<String>,

    /// Baud rate of --port
    #[arg(
        long,
        value_name = "N",
        default_value_t = 115_200,
        value_parser = clap::value_parser!(u32).range(1..),
        help_heading = "Link"
    )]
    pub baud: u32,

    /// Start COMMAND (through `sh -c`) and talk over its standard input and output,
    /// e.g. "qemu-system-arm -machine mps2-an386 ... -serial stdio -kernel ELF"; at the end
    /// it gets 16 zero bytes (empty frames; the emulator board's end-of-run marker), the end
    /// of its input, and 10 s to exit before it is killed
    #[arg(long, value_name = "COMMAND", help_heading = "Link")]
    pub exec: Option<String>,

    /// Connect to a TCP address on this machine (loopback only), e.g. 127.0.0.1:4555
    #[arg(long, value_name = "ADDR", help_heading = "Link")]
    pub tcp: Option<String>,

    /// Milliseconds to wait for each answer before asking again. While `feed` streams samples
    /// the wait follows the measured round trip (RFC 6298) and this is its ceiling (1 to
    /// 3600000, an hour)
    #[arg(long, value_name = "MS", default_value_t = 1000, help_heading = "Link",
          value_parser = clap::value_parser!(u64).range(1..=MAX_REPLY_MS))]
    pub reply_ms: u64,

    /// Times a request is sent before giving up (at least 1)
    #[arg(long, value_name = "N", default_value_t = 10, help_heading = "Link",
          value_parser = clap::value_parser!(u32).range(1..))]
    pub tries: u32,
}

/// Longest `--reply-ms`: an hour.
pub const MAX_REPLY_MS: u64 = 3_600_000;

/// Seconds a spawned program gets to exit after the session.
pub const EXIT_GRACE: Duration = Duration::from_secs(10);

impl LinkArgs {
    /// Opens the link.
    pub fn open(&self) -> Result<Link> {
        let transport: Box<dyn Transport> = if let Some(p) = &self.port {
            Box::new(SerialTransport::open(p, self.baud)?)
        } else if let Some(c) = &self.exec {
            Box::new(ExecTransport::spawn(c)?)
        } else if let Some(a) = &self.tcp {
            Box::new(TcpTransport::connect(a, Duration::from_secs(10))?)
        } else {
            return Err(Error::input("give --port, --exec or --tcp"));
        };
        let mut link = Link::new(transport);
        link.set_resend_timeout(self.reply());
        Ok(link)
    }

    /// How to open the transport again after it went away: a serial path
    /// or a TCP address (`None` for a spawned program: its end is the end).
    pub fn reopener(&self) -> Option<Reopen> {
        if let Some(p) = &self.port {
            let (p, baud) = (p.clone(), self.baud);
            Some(Box::new(move || {
                Ok(Box::new(SerialTransport::open(&p, baud)?) as Box<dyn Transport>)
            }))
        } else if let Some(a) = &self.tcp {
            let a = a.clone();
            Some(Box::new(move || {
                Ok(
                    Box::new(TcpTransport::connect(&a, Duration::from_millis(200))?)
                        as Box<dyn Transport>,
                )
            }))
        } else {
            None
        }
    }

    /// Wait for one answer.
    pub fn reply(&self) -> Duration {
        Duration::from_millis(self.reply_ms.max(1))
    }

    /// Answer time and tries.
    pub fn patience(&self) -> Patience {
        Patience {
            reply: self.reply(),
            tries: self.tries.max(1),
        }
    }
}

/// Ends a session: every frame still arriving goes to `sink`, a spawned
/// program's closing text is printed as a `text` line, then the counters.
pub fn finish(
    link: &mut Link,
    sink: &mut dyn EventSink,
    format: LineFormat,
    quiet: bool,
) -> Result<()> {
    link.close(EXIT_GRACE, |r| sink.frame(r))?;
    let tail = link.tail_text();
    let tail = tail.trim();
    if !tail.is_empty() && !quiet {
        let mut out = std::io::stdout().lock();
        let _ = match format {
            LineFormat::Text => writeln!(out, "text line={tail:?}"),
            LineFormat::Json => writeln!(
                out,
                "{}",
                serde_json::json!({"event": "text", "line": tail})
            ),
        };
    }
    sink.finish(&link.stats());
    if let Some(st) = link.exit_status() {
        if !st.success() {
            let diag = link.diagnostics();
            eprintln!(
                "plumb: warning: {} ended with {st}{}",
                link.describe(),
                if diag.trim().is_empty() {
                    String::new()
                } else {
                    format!(":\n{}", diag.trim_end())
                }
            );
        }
    }
    Ok(())
}
