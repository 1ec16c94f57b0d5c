//! `plumb-board-mps2-echo`: a UART echo that proves the emulator path
//! (`../check.sh` runs it byte for byte, with and without `-icount`).
//!
//! Protocol on UART0 (all lines end with `\n`):
//! 1. The board prints [`GREETING`].
//! 2. Every received byte other than [`END`] (0x04) is sent back unchanged.
//! 3. On [`END`] (not echoed) the board prints one report line
//!    `plumb-echo-done echoed=N overruns=N stack_hwm=N stack_size=N calib_ticks=N tick_overhead=N calib_expect=N`
//!    and the run ends with exit status 0 (status 1 after an overrun).
//!
//! `calib_ticks` is the tick count measured for a fixed loop of
//! [`CALIB_INSTRUCTIONS`] instructions and `calib_expect` is
//! `CALIB_INSTRUCTIONS / 40`; under QEMU `-icount shift=0` the two agree
//! (within `tick_overhead`, normally 0), which checks the measurement method
//! on every run. Without `-icount` both timing fields follow host time.

#![no_std]
#![no_main]

use cortex_m_rt::entry;
use embedded_io::{Read, Write};

use plumb_board_mps2::text::write_field;
use plumb_board_mps2::ticks::INSTRUCTIONS_PER_TICK;
use plumb_board_mps2::uart::UartError;
use plumb_board_mps2::{semihost, Board};

/// First line printed after reset.
pub const GREETING: &[u8] = b"plumb-board-mps2 echo: send bytes, 0x04 ends\n";
/// End-of-input byte.
pub const END: u8 = 0x04;
/// Calibration loop: `cortex_m::asm::delay(n)` runs `2 * (n + 1)` instructions.
const CALIB_LOOPS: u32 = 1_999_999;
/// Instructions executed by the calibration loop.
pub const CALIB_INSTRUCTIONS: u64 = 2 * (CALIB_LOOPS as u64 + 1);

#[entry]
fn main() -> ! {
    let mut board = Board::take();
    // A UART error other than an overrun cannot happen on this board; treat
    // any as failure.
    let ok = echo(&mut board).unwrap_or(false);
    semihost::exit(ok)
}

fn echo(board: &mut Board) -> Result<bool, UartError> {
    let Board { uart, ticks, stack } = board;

    let tick_overhead = ticks.overhead();
    let ((), calib_ticks) = ticks.measure(|| cortex_m::asm::delay(CALIB_LOOPS));

    uart.write_all(GREETING)?;

    let mut echoed: u64 = 0;
    let mut overruns: u64 = 0;
    let mut buf = [0u8; 32];
    'session: loop {
        let n = match uart.read(&mut buf) {
            Ok(n) => n,
            Err(UartError::RxOverrun) => {
                overruns += 1;
                continue;
            }
        };
        for (i, &byte) in buf[..n].iter().enumerate() {
            if byte == END {
                uart.write_all(&buf[..i])?;
                echoed += i as u64;
                break 'session;
            }
        }
        uart.write_all(&buf[..n])?;
        echoed += n as u64;
    }

    uart.write_all(b"plumb-echo-done")?;
    write_field(uart, "echoed", echoed)?;
    write_field(uart, "overruns", overruns)?;
    write_field(uart, "stack_hwm", stack.high_water() as u64)?;
    write_field(uart, "stack_size", stack.size() as u64)?;
    write_field(uart, "calib_ticks", calib_ticks)?;
    write_field(uart, "tick_overhead", tick_overhead)?;
    write_field(
        uart,
        "calib_expect",
        CALIB_INSTRUCTIONS / u64::from(INSTRUCTIONS_PER_TICK),
    )?;
    uart.write_all(b"\n")?;
    uart.flush()?;
    Ok(overruns == 0)
}
