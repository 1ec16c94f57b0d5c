//! Ending a QEMU run. QEMU started with
//! `-semihosting-config enable=on,target=native` exits with status 0 for
//! [`exit_success`] and status 1 for [`exit_failure`].
//!
//! Without a debugger or emulator attached, a semihosting call halts the
//! core (breakpoint), so these are for the emulator board only.

use cortex_m_semihosting::debug;

/// Stop QEMU with exit status 0.
pub fn exit_success() -> ! {
    debug::exit(debug::EXIT_SUCCESS);
    halt()
}

/// Stop QEMU with exit status 1.
pub fn exit_failure() -> ! {
    debug::exit(debug::EXIT_FAILURE);
    halt()
}

/// Stop QEMU, with status 0 if `ok`, else 1.
pub fn exit(ok: bool) -> ! {
    if ok {
        exit_success()
    } else {
        exit_failure()
    }
}

fn halt() -> ! {
    loop {
        cortex_m::asm::wfi();
    }
}
