//! The detector link: a HAL USART wrapped in the `embedded-io` 0.7 blocking
//! traits (`Read`, `Write`, `ReadReady`, `WriteReady`) that the plumbline
//! firmware speaks, so the application code is the same on every board.

use embedded_hal_nb::serial::{Read as _, Write as _};
use stm32f4xx_hal::serial::{self, Instance, Rx, RxISR, Serial, Tx, TxISR};

/// Receive errors reported by the USART.
#[derive(Debug, Clone, Copy, PartialEq, Eq, defmt::Format)]
pub enum LinkError {
    /// A byte arrived before the previous one was read.
    Overrun,
    /// Stop bit missing: baud rate or wiring mismatch.
    Framing,
    /// Parity error.
    Parity,
    /// Noise detected on the line.
    Noise,
    /// Any other USART error.
    Other,
}

impl From<serial::Error> for LinkError {
    fn from(e: serial::Error) -> Self {
        match e {
            serial::Error::Overrun => LinkError::Overrun,
            serial::Error::FrameFormat => LinkError::Framing,
            serial::Error::Parity => LinkError::Parity,
            serial::Error::Noise => LinkError::Noise,
            _ => LinkError::Other,
        }
    }
}

impl core::fmt::Display for LinkError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.write_str(match self {
            LinkError::Overrun => "USART receive overrun",
            LinkError::Framing => "USART framing error",
            LinkError::Parity => "USART parity error",
            LinkError::Noise => "USART noise error",
            LinkError::Other => "USART error",
        })
    }
}

impl core::error::Error for LinkError {}

impl embedded_io::Error for LinkError {
    fn kind(&self) -> embedded_io::ErrorKind {
        match self {
            LinkError::Framing | LinkError::Parity | LinkError::Noise => {
                embedded_io::ErrorKind::InvalidData
            }
            LinkError::Overrun | LinkError::Other => embedded_io::ErrorKind::Other,
        }
    }
}

/// Polling, blocking link over one USART.
pub struct Link<U: Instance> {
    tx: Tx<U, u8>,
    rx: Rx<U, u8>,
}

impl<U: Instance> Link<U> {
    /// Wrap a configured 8-bit HAL serial port.
    pub fn new(serial: Serial<U, u8>) -> Self {
        let (tx, rx) = serial.split();
        Self { tx, rx }
    }

    fn try_read(&mut self) -> nb::Result<u8, LinkError> {
        self.rx.read().map_err(|e| e.map(LinkError::from))
    }
}

impl<U: Instance> embedded_io::ErrorType for Link<U> {
    type Error = LinkError;
}

impl<U: Instance> embedded_io::Read for Link<U> {
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Self::Error> {
        let Some((first, rest)) = buf.split_first_mut() else {
            return Ok(0);
        };
        *first = nb::block!(self.try_read())?;
        let mut n = 1;
        for slot in rest {
            match self.try_read() {
                Ok(byte) => *slot = byte,
                Err(nb::Error::WouldBlock) => break,
                Err(nb::Error::Other(e)) => return Err(e),
            }
            n += 1;
        }
        Ok(n)
    }
}

impl<U: Instance> embedded_io::ReadReady for Link<U> {
    fn read_ready(&mut self) -> Result<bool, Self::Error> {
        Ok(self.rx.is_rx_not_empty())
    }
}

impl<U: Instance> embedded_io::Write for Link<U> {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        let Some((&first, rest)) = buf.split_first() else {
            return Ok(0);
        };
        nb::block!(self.tx.write(first)).map_err(LinkError::from)?;
        let mut n = 1;
        for &byte in rest {
            match self.tx.write(byte) {
                Ok(()) => n += 1,
                Err(nb::Error::WouldBlock) => break,
                Err(nb::Error::Other(e)) => return Err(e.into()),
            }
        }
        Ok(n)
    }

    /// Blocks until the last byte has left the shift register.
    fn flush(&mut self) -> Result<(), Self::Error> {
        nb::block!(self.tx.flush()).map_err(LinkError::from)
    }
}

impl<U: Instance> embedded_io::WriteReady for Link<U> {
    fn write_ready(&mut self) -> Result<bool, Self::Error> {
        Ok(self.tx.is_tx_empty())
    }
}
