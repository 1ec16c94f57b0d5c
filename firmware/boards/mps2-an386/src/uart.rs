//! Polling driver for the CMSDK APB UART, implementing the `embedded-io`
//! blocking traits (`Read`, `Write`, `ReadReady`, `WriteReady`).
//!
//! The CMSDK UART has a one-byte transmit holding register and a one-byte
//! receive register, no FIFO. Under QEMU the emulated line never loses data:
//! QEMU only hands the guest a new byte once the previous one was read. On a
//! real UART a byte that arrives before the previous one was read sets the
//! RX overrun flag, which `read` reports once as [`UartError::RxOverrun`].

use core::sync::atomic::{AtomicBool, Ordering};

use crate::mmio::CmsdkUartRegs;

const STATE_TX_FULL: u32 = 1 << 0;
const STATE_RX_FULL: u32 = 1 << 1;
const STATE_RX_OVERRUN: u32 = 1 << 3;
const CTRL_TX_EN: u32 = 1 << 0;
const CTRL_RX_EN: u32 = 1 << 1;
const CTRL_RX_IRQ_EN: u32 = 1 << 3;
const INT_RX: u32 = 1 << 1;

/// UART input clock of the MPS2 FPGA images (also the CPU clock).
pub const UART_CLOCK_HZ: u32 = 25_000_000;

/// Errors reported by the UART.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UartError {
    /// A byte arrived before the previous one was read; at least one byte
    /// was lost.
    RxOverrun,
}

impl core::fmt::Display for UartError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match self {
            UartError::RxOverrun => f.write_str("UART receive overrun"),
        }
    }
}

impl core::error::Error for UartError {}

impl embedded_io::Error for UartError {
    fn kind(&self) -> embedded_io::ErrorKind {
        embedded_io::ErrorKind::Other
    }
}

static UART0_TAKEN: AtomicBool = AtomicBool::new(false);

/// The board's UART0, the detector link.
#[derive(Debug)]
pub struct Uart0 {
    regs: CmsdkUartRegs,
}

impl Uart0 {
    /// Claim UART0 and enable transmitter and receiver at `baud`.
    /// Returns `None` if it was already claimed.
    pub fn take(baud: u32) -> Option<Self> {
        if UART0_TAKEN.swap(true, Ordering::AcqRel) {
            return None;
        }
        let uart = Self {
            regs: CmsdkUartRegs::uart0(),
        };
        uart.configure(baud);
        crate::mmio::unmask_uart0_rx();
        Some(uart)
    }

    /// Get UART0 regardless of ownership. Only for the panic handler, which
    /// runs when the application has stopped for good.
    pub(crate) fn for_panic() -> Self {
        let uart = Self {
            regs: CmsdkUartRegs::uart0(),
        };
        if uart.regs.ctrl() & (CTRL_TX_EN | CTRL_RX_EN) != (CTRL_TX_EN | CTRL_RX_EN) {
            uart.configure(115_200);
        }
        uart
    }

    fn configure(&self, baud: u32) {
        // BAUDDIV below 16 is invalid for this UART (QEMU refuses to send).
        let div = (UART_CLOCK_HZ / baud.max(1)).max(16);
        self.regs.set_ctrl(0);
        self.regs.set_bauddiv(div);
        self.regs.set_state(STATE_RX_OVERRUN | (1 << 2));
        self.regs.set_ctrl(CTRL_TX_EN | CTRL_RX_EN);
    }

    fn rx_full(&self) -> bool {
        self.regs.state() & STATE_RX_FULL != 0
    }

    fn tx_full(&self) -> bool {
        self.regs.state() & STATE_TX_FULL != 0
    }

    /// Check and clear the RX overrun flag.
    fn take_overrun(&self) -> bool {
        if self.regs.state() & STATE_RX_OVERRUN != 0 {
            self.regs.set_state(STATE_RX_OVERRUN);
            true
        } else {
            false
        }
    }

    /// Sleeps (`wfi`) until a byte has arrived, without a lost wake-up: with
    /// interrupts masked, the receive interrupt is enabled, the receive flag
    /// checked, and only then the core sleeps; a pending interrupt wakes
    /// `wfi` even while masked, and is cleared before interrupts are
    /// unmasked again. Other interrupts (SysTick) also end the sleep, so
    /// callers loop. Under QEMU this stops the emulated core from spinning
    /// a host CPU while the link is idle.
    pub fn sleep_until_rx(&mut self) {
        cortex_m::interrupt::free(|_| {
            if self.rx_full() {
                return;
            }
            let ctrl = self.regs.ctrl();
            self.regs.set_ctrl(ctrl | CTRL_RX_IRQ_EN);
            if !self.rx_full() {
                cortex_m::asm::wfi();
            }
            self.regs.set_ctrl(ctrl & !CTRL_RX_IRQ_EN);
            self.regs.clear_interrupts(INT_RX);
            crate::mmio::unpend_uart0_rx();
        });
    }

    /// Clears UART0's interrupt flags (for the interrupt handler).
    pub(crate) fn clear_all_interrupts() {
        CmsdkUartRegs::uart0().clear_interrupts(0xF);
    }

    /// Blocking: wait for one byte.
    pub fn read_byte(&mut self) -> Result<u8, UartError> {
        if self.take_overrun() {
            return Err(UartError::RxOverrun);
        }
        while !self.rx_full() {}
        Ok(self.regs.data())
    }

    /// Blocking: wait for room and queue one byte.
    pub fn write_byte(&mut self, byte: u8) {
        while self.tx_full() {}
        self.regs.set_data(byte);
    }
}

impl embedded_io::ErrorType for Uart0 {
    type Error = UartError;
}

impl embedded_io::Read for Uart0 {
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Self::Error> {
        let Some((first, rest)) = buf.split_first_mut() else {
            return Ok(0);
        };
        *first = self.read_byte()?;
        let mut n = 1;
        // Take whatever else is already waiting, without blocking again.
        for slot in rest {
            if !self.rx_full() {
                break;
            }
            *slot = self.regs.data();
            n += 1;
        }
        Ok(n)
    }
}

impl embedded_io::ReadReady for Uart0 {
    fn read_ready(&mut self) -> Result<bool, Self::Error> {
        Ok(self.rx_full())
    }
}

impl embedded_io::Write for Uart0 {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        let Some((&first, rest)) = buf.split_first() else {
            return Ok(0);
        };
        self.write_byte(first);
        let mut n = 1;
        for &byte in rest {
            if self.tx_full() {
                break;
            }
            self.regs.set_data(byte);
            n += 1;
        }
        Ok(n)
    }

    /// Blocking: queues every byte. (The provided method loops on `write`
    /// and panics if it returns 0, which this UART never does; the panic
    /// would link the formatting machinery.)
    fn write_all(&mut self, buf: &[u8]) -> Result<(), Self::Error> {
        for &byte in buf {
            self.write_byte(byte);
        }
        Ok(())
    }

    /// Waits until the holding register has been handed to the shifter.
    /// The CMSDK UART exposes no "shifter empty" flag, so the last byte may
    /// still be on the wire when this returns.
    fn flush(&mut self) -> Result<(), Self::Error> {
        while self.tx_full() {}
        Ok(())
    }
}

impl embedded_io::WriteReady for Uart0 {
    fn write_ready(&mut self) -> Result<bool, Self::Error> {
        Ok(!self.tx_full())
    }
}
