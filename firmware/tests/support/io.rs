//! Test doubles for running a `plumb_firmware` endpoint inside a host test:
//! a drift line that goes nowhere and a link that keeps what is written.
//! Included with `#[path = ...] mod io;` from other crates' tests.

/// A drift line that goes nowhere.
pub struct NoPin;

impl embedded_hal::digital::ErrorType for NoPin {
    type Error = core::convert::Infallible;
}

impl embedded_hal::digital::OutputPin for NoPin {
    fn set_low(&mut self) -> Result<(), Self::Error> {
        Ok(())
    }
    fn set_high(&mut self) -> Result<(), Self::Error> {
        Ok(())
    }
}

/// What the endpoint writes.
#[derive(Default)]
pub struct Sink(pub Vec<u8>);

impl embedded_io::ErrorType for Sink {
    type Error = core::convert::Infallible;
}

impl embedded_io::Write for Sink {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Self::Error> {
        self.0.extend_from_slice(buf);
        Ok(buf.len())
    }
    fn flush(&mut self) -> Result<(), Self::Error> {
        Ok(())
    }
}
