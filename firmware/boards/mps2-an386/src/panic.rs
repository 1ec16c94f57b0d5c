//! Panic handler: report the panic location on UART0, then end the QEMU run
//! with a failing exit status.

use core::panic::PanicInfo;

use embedded_io::Write;

use crate::{semihost, text, uart::Uart0};

#[panic_handler]
fn panic(info: &PanicInfo<'_>) -> ! {
    cortex_m::interrupt::disable();
    let mut uart = Uart0::for_panic();
    let _ = uart.write_all(b"\nPANIC");
    if let Some(loc) = info.location() {
        let _ = uart.write_all(b" at ");
        let _ = uart.write_all(loc.file().as_bytes());
        let _ = uart.write_all(b":");
        let _ = text::write_dec(&mut uart, u64::from(loc.line()));
    }
    let _ = uart.write_all(b"\n");
    let _ = uart.flush();
    semihost::exit_failure()
}
