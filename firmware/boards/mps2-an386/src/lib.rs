//! Board support for the QEMU `mps2-an386` machine (Cortex-M4F), shared by
//! the programs of this crate:
//!
//! | program | source | what |
//! | --- | --- | --- |
//! | `plumb-board-mps2` | `src/main.rs` | the detector endpoint: model slots, drift line, wire protocol on UART0 |
//! | `plumb-board-mps2-echo` | `src/bin/echo.rs` | UART echo that proves the emulator path (used by `../check.sh`) |
//! | `plumb-board-mps2-bench` | `src/bin/bench.rs` | instructions per sample on synthetic models (`bench.sh`) |
//!
//! Modules: [`uart`] (CMSDK APB UART), [`link`] (UART0 as the detector link,
//! with idle sleep and the end-of-run marker), [`drift_line`] (FPGAIO LED 0
//! as an `embedded-hal` output pin), [`slots`] (the two model slots in code
//! memory, the emulated board's flash), [`ticks`] (SysTick), [`stack`] (painting),
//! [`semihost`] (ending the run), and [`endpoint_places`] (the endpoint's
//! detector place and resend ring, a static in `.bss`). All `unsafe` code
//! is in `mmio`.

#![no_std]

pub mod drift_line;
pub mod link;
mod mmio;
pub use mmio::endpoint_places;
mod panic;
pub mod semihost;
pub mod slots;
pub mod stack;
pub mod text;
pub mod ticks;
pub mod uart;

/// Baud rate programmed into UART0 (irrelevant under QEMU, correct on an
/// MPS2 FPGA board with its 25 MHz UART clock).
pub const BAUD: u32 = 115_200;

/// Everything a program gets from the board.
pub struct Board {
    /// UART0: the detector link.
    pub uart: uart::Uart0,
    /// SysTick-based tick counter.
    pub ticks: ticks::Ticks,
    /// Stack paint taken at reset, for the high-water mark.
    pub stack: stack::StackPaint,
}

impl Board {
    /// Paints the stack, then claims UART0 and SysTick. Call once, first
    /// thing in `main`; a second call (or a missing peripheral) ends the run
    /// with exit status 1.
    pub fn take() -> Board {
        // Paint first, so the high-water mark covers everything after reset.
        let stack = stack::paint();
        let Some(cp) = cortex_m::Peripherals::take() else {
            semihost::exit_failure()
        };
        let Some(uart) = uart::Uart0::take(BAUD) else {
            semihost::exit_failure()
        };
        let ticks = ticks::Ticks::start(cp.SYST);
        Board { uart, ticks, stack }
    }
}
