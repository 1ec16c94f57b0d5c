//! plumbline firmware on an STM32F411CE "black pill" board (Cortex-M4F).
//!
//! - Detector link: USART1, PA9 = TX, PA10 = RX, 115200 8N1, 3.3 V logic.
//! - Drift line: PB0 push-pull output, active high; mirrored on the user LED
//!   (PC13, active low).
//! - Logs: defmt over RTT (read with `probe-rs run`).
//! - Clocks: 25 MHz HSE crystal, 100 MHz system clock.
//!
//! - Model slots: flash sectors 6 and 7 ([`slots`]).
//!
//! Board support is in [`link`], [`drift_line`], [`slots`] and [`cycles`];
//! the application in [`app`] runs the detector endpoint.

#![no_std]
#![no_main]

mod app;
#[allow(dead_code)] // board API: not every application uses every item
mod cycles;
#[allow(dead_code)] // board API: not every application uses every item
mod drift_line;
mod link;
mod slots;
#[allow(dead_code)] // board API: not every application uses every item
mod text;

use cortex_m_rt::entry;
use defmt_rtt as _;
use panic_probe as _;
use stm32f4xx_hal::{
    flash::LockedFlash, pac, prelude::*, rcc::Config, serial::config::Config as SerialConfig,
};

/// Detector link baud rate.
pub const BAUD: u32 = 115_200;

/// Everything the application gets from the board.
pub struct Board {
    /// USART1 on PA9 (TX) / PA10 (RX).
    pub link: link::Link<pac::USART1>,
    /// Drift output on PB0 (+ LED on PC13).
    pub drift: drift_line::DriftLine,
    /// DWT cycle counter.
    pub cycles: cycles::Cycles,
    /// Model slots in flash sectors 6 and 7.
    pub slots: slots::BoardSlots,
}

#[entry]
fn main() -> ! {
    let dp = pac::Peripherals::take().expect("device peripherals taken once");
    let cp = cortex_m::Peripherals::take().expect("core peripherals taken once");

    let mut rcc = dp.RCC.freeze(Config::hse(25.MHz()).sysclk(100.MHz()));
    defmt::info!(
        "plumb-board-f411: sysclk {=u32} Hz",
        rcc.clocks.sysclk().raw()
    );

    let gpioa = dp.GPIOA.split(&mut rcc);
    let gpiob = dp.GPIOB.split(&mut rcc);
    let gpioc = dp.GPIOC.split(&mut rcc);

    let drift = drift_line::DriftLine::new(
        gpiob.pb0.into_push_pull_output(),
        gpioc.pc13.into_push_pull_output(),
    );

    let serial = dp
        .USART1
        .serial(
            (gpioa.pa9, gpioa.pa10),
            SerialConfig::default().baudrate(BAUD.bps()),
            &mut rcc,
        )
        .expect("valid USART1 configuration");
    let link = link::Link::new(serial);

    let cycles = cycles::Cycles::start(cp.DCB, cp.DWT);

    let slots = slots::slots(LockedFlash::new(dp.FLASH));

    app::run(Board {
        link,
        drift,
        cycles,
        slots,
    })
}
