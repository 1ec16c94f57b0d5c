//! `plumb-board-mps2`: the plumbline detector endpoint on the emulated
//! mps2-an386 (Cortex-M4F).
//!
//! 1. Reset: paint the stack, claim UART0, SysTick, the drift line (FPGAIO
//!    LED 0) and the two model slots in code memory (`slots`).
//! 2. `Endpoint::idle_in` on the static places, then `Endpoint::start` in
//!    place: run the newest valid slot, else the model compiled into the
//!    image (`PLUMB_MODEL` at build time, see `build.rs`). Built with
//!    `PLUMB_TRUSTED_KEY`, slots and uploads must be signed by that key.
//! 3. Send a greeting, then serve the wire protocol (`shared-model/PROTOCOL.md`)
//!    on UART0, sleeping while the line is idle.
//! 4. On the end-of-run marker (16 zero bytes in a row, `link::END_RUN`)
//!    print one text line and end the run through semihosting:
//!
//!    `plumb-board-mps2 done samples=N frames_ok=N crc_errors=N framing_errors=N overflows=N undecodable=N uart_errors=N write_errors=N received=N drift_line=0|1 drift_rises=N model_id=N stack_hwm=N stack_size=N`
//!
//!    Exit status 0, or 1 if the UART reported a receive overrun or a write
//!    failed. A model that cannot boot prints `plumb-board-mps2 boot failed`
//!    and exits with status 1.

#![no_std]
#![no_main]

use cortex_m_rt::entry;
use embedded_io::Write;
use plumb_board_mps2::drift_line::DriftLine;
use plumb_board_mps2::link::Link;
use plumb_board_mps2::slots::{self, BoardSlots};
use plumb_board_mps2::text::write_field;
use plumb_board_mps2::{endpoint_places, semihost, Board};
use plumb_firmware::endpoint::{
    Config, Endpoint, Places, DEFAULT_RING_BYTES, DEFAULT_STATUS_EVERY,
};
#[cfg(feature = "trusted-key")]
use plumb_firmware::plumb_model::signature::TrustedKey;

// `TRUSTED_KEY`: the public key of `PLUMB_TRUSTED_KEY` at build time (the
// build script requires it with the `trusted-key` feature).
#[cfg(feature = "trusted-key")]
include!(concat!(env!("OUT_DIR"), "/trusted_key.rs"));

/// The model file compiled into the image (chosen by `PLUMB_MODEL` when
/// building; `default.plumb` otherwise).
static BUILTIN_MODEL: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/builtin.plumb"));

/// Firmware version in the greeting.
const FIRMWARE: &str = concat!("mps2 ", env!("CARGO_PKG_VERSION"));

#[entry]
fn main() -> ! {
    let Board { uart, stack, .. } = Board::take();
    let mut link = Link::new(uart);
    let (Some(pin), Some(slots)) = (DriftLine::take(), slots::take()) else {
        semihost::exit_failure()
    };

    let Some(ep) = boot(slots, pin) else {
        let _ = link.write_all(b"plumb-board-mps2 boot failed\n");
        semihost::exit_failure()
    };

    let mut write_errors: u64 = 0;
    if ep.greet(&mut link).is_err() {
        write_errors += 1;
    }
    while !link.ended() {
        match ep.poll(&mut link) {
            // Nothing was waiting: sleep until a byte (or SysTick) arrives.
            Ok(p) if p.bytes == 0 => link.wait(),
            Ok(_) => {}
            // Receive errors are counted by the link; the decoder resyncs.
            Err(_) => write_errors += 1,
        }
    }

    let counters = ep.link_counters();
    let samples = ep.detector().samples();
    let model_id = ep.detector().model().meta.id;
    let level = ep.pin().level();
    let rises = ep.pin().rises();
    let uart_errors = link.errors();
    let write_errors = write_errors.saturating_sub(u64::from(uart_errors));
    let fields = [
        ("samples", samples),
        ("frames_ok", u64::from(counters.frames_ok)),
        ("crc_errors", u64::from(counters.crc_errors)),
        ("framing_errors", u64::from(counters.framing_errors)),
        ("overflows", u64::from(counters.overflows)),
        ("undecodable", u64::from(counters.undecodable)),
        ("uart_errors", u64::from(uart_errors)),
        ("write_errors", write_errors),
        ("received", link.received()),
        ("drift_line", u64::from(level)),
        ("drift_rises", u64::from(rises)),
        ("model_id", u64::from(model_id)),
        ("stack_hwm", stack.high_water() as u64),
        ("stack_size", stack.size() as u64),
    ];
    let _ = link.write_all(b"plumb-board-mps2 done");
    for (k, v) in fields {
        let _ = write_field(&mut link, k, v);
    }
    let _ = link.write_all(b"\n");
    let _ = link.flush();
    semihost::exit(uart_errors == 0 && write_errors == 0)
}

/// The endpoint type of this board: its places (detector and resend ring)
/// are lent from a static.
type Ep = Endpoint<BoardSlots, DriftLine, DEFAULT_RING_BYTES, &'static mut Places>;

/// Builds the endpoint in a static and boots it there: the big parts are the
/// board's static places (`.bss`, never on the stack), the rest of the
/// idle endpoint is a few hundred bytes, and the model is decoded in place
/// (`Endpoint::start`). `None` when no model can run.
#[inline(never)]
fn boot(slots: BoardSlots, pin: DriftLine) -> Option<&'static mut Ep> {
    let config = Config {
        firmware: FIRMWARE,
        status_every: DEFAULT_STATUS_EVERY,
        #[cfg(feature = "trusted-key")]
        trusted_key: Some(TrustedKey::new(TRUSTED_KEY)),
    };
    let places = endpoint_places()?;
    let ep = cortex_m::singleton!(: Ep = Endpoint::idle_in(places, slots, pin))?;
    ep.start(Some(BUILTIN_MODEL), config).ok()?;
    Some(ep)
}
