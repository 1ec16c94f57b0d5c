//! UART0 as the detector link: the `embedded-io` traits the endpoint speaks,
//! a sleep while the line is idle, and the emulator's end-of-run marker.
//!
//! # End of run
//!
//! A run under QEMU has to end with a semihosting exit so that a test gets
//! the firmware's verdict and its stack high-water mark. The host ends a
//! run by sending [`END_RUN`] zero bytes in a row. To the wire protocol
//! these are empty frames, which every receiver ignores (a sender may flush
//! with a zero at any time, `PROTOCOL.md`, "Framing"), so the marker needs
//! no protocol change and no other endpoint notices it; a real frame never
//! contains a zero byte, and random line noise does not produce sixteen in a
//! row. `plumb` sends it when it closes a `--exec` session.

use embedded_io::{ErrorType, Read, ReadReady, Write, WriteReady};

use crate::uart::{Uart0, UartError};

/// Zero bytes in a row that end an emulator run.
pub const END_RUN: u32 = 16;

/// UART0 wrapped for the endpoint.
pub struct Link {
    uart: Uart0,
    zeros: u32,
    ended: bool,
    received: u64,
    errors: u32,
}

impl Link {
    /// Wraps the UART.
    pub fn new(uart: Uart0) -> Self {
        Link {
            uart,
            zeros: 0,
            ended: false,
            received: 0,
            errors: 0,
        }
    }

    /// Whether the end-of-run marker has been received.
    pub fn ended(&self) -> bool {
        self.ended
    }

    /// Bytes received.
    pub fn received(&self) -> u64 {
        self.received
    }

    /// Receive errors (UART overruns) seen.
    pub fn errors(&self) -> u32 {
        self.errors
    }

    /// Sleeps until a byte is waiting (or any interrupt arrives).
    pub fn wait(&mut self) {
        self.uart.sleep_until_rx();
    }

    fn observe(&mut self, bytes: &[u8]) {
        self.received += bytes.len() as u64;
        for &b in bytes {
            if b == 0 {
                self.zeros = self.zeros.saturating_add(1);
                if self.zeros >= END_RUN {
                    self.ended = true;
                }
            } else {
                self.zeros = 0;
            }
        }
    }
}

impl ErrorType for Link {
    type Error = UartError;
}

impl Read for Link {
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Self::Error> {
        match self.uart.read(buf) {
            Ok(n) => {
                self.observe(buf.get(..n).unwrap_or(&[]));
                Ok(n)
            }
            Err(e) => {
                self.errors = self.errors.saturating_add(1);
                Err(e)
            }
        }
    }
}

impl ReadReady for Link {
    fn read_ready(&mut self) -> Result<bool, Self::Error> {
        self.uart.read_ready()
    }
}

impl Write for Link {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        self.uart.write(buf)
    }

    fn write_all(&mut self, buf: &[u8]) -> Result<(), Self::Error> {
        self.uart.write_all(buf)
    }

    fn flush(&mut self) -> Result<(), Self::Error> {
        self.uart.flush()
    }
}

impl WriteReady for Link {
    fn write_ready(&mut self) -> Result<bool, Self::Error> {
        self.uart.write_ready()
    }
}
