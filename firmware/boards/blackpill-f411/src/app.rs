//! Placeholder application: the same UART echo as the emulator board.
//!
//! Protocol on the detector link (lines end with `\n`):
//! 1. The board prints [`GREETING`].
//! 2. Every received byte other than [`END`] (0x04) is sent back unchanged;
//!    the drift line is high while a session is open (first byte seen).
//! 3. On [`END`] (not echoed) the board prints
//!    `plumb-echo-done echoed=N errors=N calib_cycles=N`, drops the drift
//!    line and starts the next session with a new greeting.
//!
//! There is no emulator to stop on real hardware, so sessions repeat forever.
//! Replace this module to run a different application on the same board.

use embedded_io::{Read, Write};

use crate::text::write_field;
use crate::Board;

/// Greeting printed at the start of every session.
pub const GREETING: &[u8] = b"plumb-board-f411 echo: send bytes, 0x04 ends\n";
/// End-of-input byte.
pub const END: u8 = 0x04;
/// Calibration loop, as on the emulator board: about 4,000,000 instructions.
const CALIB_LOOPS: u32 = 1_999_999;

/// Run sessions forever.
pub fn run(board: &mut Board) -> ! {
    let ((), calib_cycles) = board.cycles.measure(|| cortex_m::asm::delay(CALIB_LOOPS));
    defmt::info!("calibration loop: {=u32} cycles", calib_cycles);
    loop {
        match session(board, calib_cycles) {
            Ok(echoed) => defmt::info!("session done: echoed {=u64} bytes", echoed),
            Err(e) => defmt::warn!("session aborted: {}", e),
        }
        board.drift.set(false);
    }
}

fn session(board: &mut Board, calib_cycles: u32) -> Result<u64, crate::link::LinkError> {
    let Board { link, drift, .. } = board;
    link.write_all(GREETING)?;

    let mut echoed: u64 = 0;
    let mut errors: u64 = 0;
    let mut buf = [0u8; 32];
    'session: loop {
        let n = match link.read(&mut buf) {
            Ok(n) => n,
            Err(e) => {
                defmt::warn!("link receive error: {}", e);
                errors += 1;
                continue;
            }
        };
        drift.set(true);
        for (i, &byte) in buf[..n].iter().enumerate() {
            if byte == END {
                link.write_all(&buf[..i])?;
                echoed += i as u64;
                break 'session;
            }
        }
        link.write_all(&buf[..n])?;
        echoed += n as u64;
    }

    link.write_all(b"plumb-echo-done")?;
    write_field(link, "echoed", echoed)?;
    write_field(link, "errors", errors)?;
    write_field(link, "calib_cycles", u64::from(calib_cycles))?;
    link.write_all(b"\n")?;
    link.flush()?;
    Ok(echoed)
}
