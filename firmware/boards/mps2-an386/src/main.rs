//! plumbline firmware on the QEMU `mps2-an386` machine (Cortex-M4F).
//!
//! Board support lives in modules ([`uart`], [`ticks`], [`stack`],
//! [`semihost`]; all `unsafe` code is in [`mmio`]); the application in
//! [`app`] is a placeholder echo that can be swapped for the detector.

#![no_std]
#![no_main]

mod app;
mod mmio;
mod panic;
mod semihost;
mod stack;
mod text;
#[allow(dead_code)] // board API: not every application uses every item
mod ticks;
mod uart;

use cortex_m_rt::entry;

// Linked already so that wiring the detector in later is a small change.
use plumb_firmware as _;

/// Baud rate programmed into UART0 (irrelevant under QEMU, correct on an
/// MPS2 FPGA board with its 25 MHz UART clock).
pub const BAUD: u32 = 115_200;

/// Everything the application gets from the board.
pub struct Board {
    /// UART0: the detector link.
    pub uart: uart::Uart0,
    /// SysTick-based tick counter.
    pub ticks: ticks::Ticks,
    /// Stack paint taken at reset, for the high-water mark.
    pub stack: stack::StackPaint,
}

#[entry]
fn main() -> ! {
    // Paint first, so the high-water mark covers everything after reset.
    let stack = stack::paint();
    let Some(cp) = cortex_m::Peripherals::take() else {
        semihost::exit_failure()
    };
    let Some(uart) = uart::Uart0::take(BAUD) else {
        semihost::exit_failure()
    };
    let ticks = ticks::Ticks::start(cp.SYST);
    let mut board = Board { uart, ticks, stack };
    let ok = app::run(&mut board);
    semihost::exit(ok)
}
