//! The application: the plumbline detector endpoint.
//!
//! 1. `Endpoint::idle_in` on static places, then `Endpoint::start` in
//!    place: the newest valid flash slot, else the model compiled into the
//!    image (`PLUMB_MODEL` at build time, see `build.rs`); built with
//!    the `trusted-key` feature and `PLUMB_TRUSTED_KEY`, slots and uploads
//!    must be signed by that key.
//! 2. A greeting on the link, then the wire protocol
//!    (`shared-model/PROTOCOL.md`) forever; the drift line follows the
//!    drift state.
//!
//! Real hardware has no end of run: link errors are counted and logged over
//! defmt, and the loop goes on.

use plumb_firmware::endpoint::{
    BootError, Config, Endpoint, Places, DEFAULT_RING_BYTES, DEFAULT_STATUS_EVERY,
};
#[cfg(feature = "trusted-key")]
use plumb_firmware::plumb_model::signature::TrustedKey;

// `TRUSTED_KEY`: the public key of `PLUMB_TRUSTED_KEY` at build time (the
// build script requires it with the `trusted-key` feature).
#[cfg(feature = "trusted-key")]
include!(concat!(env!("OUT_DIR"), "/trusted_key.rs"));

use crate::drift_line::DriftLine;
use crate::slots::BoardSlots;
use crate::Board;

/// The model file compiled into the image.
static BUILTIN_MODEL: &[u8] = include_bytes!(concat!(env!("OUT_DIR"), "/builtin.plumb"));

/// Firmware version in the greeting.
const FIRMWARE: &str = concat!("f411 ", env!("CARGO_PKG_VERSION"));

/// The endpoint of this board; its places (detector, resend ring) are lent
/// from a static.
type Ep = Endpoint<BoardSlots, DriftLine, DEFAULT_RING_BYTES, &'static mut Places>;

/// Builds the endpoint in a static and boots it there: the places
/// (`Places::EMPTY`, zero and uninitialised bytes only) go into a static of
/// their own, the rest of the idle endpoint is a few hundred bytes, and the
/// model is decoded in place (`Endpoint::start`). Not measured on this
/// board; on the emulated mps2-an386 the same steps need under 2 KiB of
/// stack (BENCHMARKS.md).
#[inline(never)]
fn boot(slots: BoardSlots, drift: DriftLine) -> Option<&'static mut Ep> {
    let config = Config {
        firmware: FIRMWARE,
        status_every: DEFAULT_STATUS_EVERY,
        #[cfg(feature = "trusted-key")]
        trusted_key: Some(TrustedKey::new(TRUSTED_KEY)),
    };
    let places = cortex_m::singleton!(: Places = Places::EMPTY)?;
    let ep = cortex_m::singleton!(: Ep = Endpoint::idle_in(places, slots, drift))?;
    match ep.start(Some(BUILTIN_MODEL), config) {
        Ok(()) => Some(ep),
        Err(BootError::NoModel) => {
            defmt::error!("no valid slot and no built-in model");
            None
        }
        Err(BootError::Builtin(_)) => {
            defmt::error!("no valid slot, and the built-in model was refused");
            None
        }
    }
}

/// Runs the endpoint forever.
pub fn run(board: Board) -> ! {
    let Board {
        mut link,
        drift,
        slots,
        ..
    } = board;
    let Some(ep) = boot(slots, drift) else {
        loop {
            cortex_m::asm::wfi();
        }
    };
    defmt::info!(
        "running model {=u32:#x} from {}",
        ep.detector().model().meta.id,
        match ep.active_slot() {
            Some(plumb_firmware::plumb_model::wire::Slot::A) => "slot A",
            Some(plumb_firmware::plumb_model::wire::Slot::B) => "slot B",
            None => "the image",
        }
    );
    if ep.greet(&mut link).is_err() {
        defmt::warn!("greeting not sent");
    }
    let mut errors: u32 = 0;
    loop {
        if ep.poll(&mut link).is_err() {
            errors = errors.wrapping_add(1);
            defmt::warn!("link error ({=u32} so far)", errors);
        }
    }
}
