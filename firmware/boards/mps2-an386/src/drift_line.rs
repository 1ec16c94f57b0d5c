//! The drift line: user LED 0 of the MPS2 FPGA I/O block (`LED0` register at
//! `0x4002_8000`, bit 0), driven as an `embedded-hal` [`OutputPin`].
//!
//! QEMU emulates the register (a read returns what was written), so the pin
//! is real as far as the emulator goes: [`DriftLine::is_set_high`] reads the
//! register back, and the line also counts its rising edges, which the
//! end-of-run report prints (`drift_line`, `drift_rises`) for tests to
//! compare with the drift raised messages.

use core::convert::Infallible;
use core::sync::atomic::{AtomicBool, Ordering};

use embedded_hal::digital::{ErrorType, OutputPin, StatefulOutputPin};

use crate::mmio;

const LED0: u32 = 1 << 0;

static TAKEN: AtomicBool = AtomicBool::new(false);

/// FPGAIO LED 0 as the drift line.
#[derive(Debug)]
pub struct DriftLine {
    rises: u32,
}

impl DriftLine {
    /// Claims the line and drives it low; `None` if already claimed.
    pub fn take() -> Option<Self> {
        if TAKEN.swap(true, Ordering::AcqRel) {
            return None;
        }
        mmio::set_fpgaio_led0(mmio::fpgaio_led0() & !LED0);
        Some(DriftLine { rises: 0 })
    }

    /// Rising edges driven since [`DriftLine::take`].
    pub fn rises(&self) -> u32 {
        self.rises
    }

    /// Level of the line, read back from the register.
    pub fn level(&self) -> bool {
        mmio::fpgaio_led0() & LED0 != 0
    }
}

impl ErrorType for DriftLine {
    type Error = Infallible;
}

impl OutputPin for DriftLine {
    fn set_low(&mut self) -> Result<(), Self::Error> {
        mmio::set_fpgaio_led0(mmio::fpgaio_led0() & !LED0);
        Ok(())
    }

    fn set_high(&mut self) -> Result<(), Self::Error> {
        if !self.level() {
            self.rises = self.rises.saturating_add(1);
        }
        mmio::set_fpgaio_led0(mmio::fpgaio_led0() | LED0);
        Ok(())
    }
}

impl StatefulOutputPin for DriftLine {
    fn is_set_high(&mut self) -> Result<bool, Self::Error> {
        Ok(self.level())
    }

    fn is_set_low(&mut self) -> Result<bool, Self::Error> {
        Ok(!self.level())
    }
}
