//! The "drift line": a push-pull GPIO output that the detector drives high
//! while drift is reported, mirrored on the board's user LED.

use core::convert::Infallible;

use embedded_hal::digital::{ErrorType, OutputPin};
use stm32f4xx_hal::gpio::{Output, PinState, PushPull, PB0, PC13};

/// Drift output on PB0 (active high, 3.3 V) plus the on-board LED on PC13
/// (active low).
pub struct DriftLine {
    pin: PB0<Output<PushPull>>,
    led: PC13<Output<PushPull>>,
}

impl DriftLine {
    /// Take the pins and drive the line inactive (low, LED off).
    pub fn new(pin: PB0<Output<PushPull>>, led: PC13<Output<PushPull>>) -> Self {
        let mut line = Self { pin, led };
        line.set(false);
        line
    }

    /// Drive the line: `true` = drift reported.
    pub fn set(&mut self, drift: bool) {
        self.pin.set_state(PinState::from(drift));
        self.led.set_state(PinState::from(!drift));
    }

    /// Current state of the line.
    pub fn is_set(&self) -> bool {
        self.pin.is_set_high()
    }
}

impl ErrorType for DriftLine {
    type Error = Infallible;
}

/// The endpoint drives the line through `embedded-hal`.
impl OutputPin for DriftLine {
    fn set_low(&mut self) -> Result<(), Self::Error> {
        self.set(false);
        Ok(())
    }

    fn set_high(&mut self) -> Result<(), Self::Error> {
        self.set(true);
        Ok(())
    }
}
