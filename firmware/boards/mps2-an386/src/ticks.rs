//! Monotonic tick counter built on SysTick, for measuring how much work the
//! firmware does per sample.
//!
//! SysTick is clocked from the core clock (25 MHz on the MPS2 images) and
//! reloads at `0xFF_FFFF`; every wrap raises the SysTick exception, which
//! counts wraps in a 32-bit counter. Together they form a 56-bit tick count
//! that [`Ticks::now`] reads consistently (no overflow in practice).
//!
//! # Ticks and instructions under QEMU
//!
//! With `-icount shift=0,align=off,sleep=off` QEMU advances virtual time by
//! exactly 1 ns per executed instruction. At the 25 MHz core clock one
//! SysTick tick is 40 ns, so **1 tick = 40 instructions** and a tick count
//! is a deterministic, host-independent measure of work
//! ([`INSTRUCTIONS_PER_TICK`]). Without `-icount` the ticks follow host wall
//! time and are only a rough guide. QEMU does not emulate the DWT cycle
//! counter, which is why this uses SysTick. On real silicon a tick is one
//! core clock cycle.

use core::sync::atomic::{AtomicU32, Ordering};

use cortex_m::peripheral::syst::SystClkSource;
use cortex_m::peripheral::{SCB, SYST};
use cortex_m_rt::exception;

/// SysTick reload value: the full 24-bit range.
pub const RELOAD: u32 = 0x00FF_FFFF;
/// Ticks per SysTick period (reload + 1).
pub const TICKS_PER_WRAP: u64 = RELOAD as u64 + 1;
/// SysTick input clock (the core clock of the MPS2 images).
pub const TICK_HZ: u32 = 25_000_000;
/// Instructions per tick under QEMU `-icount shift=0` (1 ns per instruction).
pub const INSTRUCTIONS_PER_TICK: u32 = 40;

static WRAPS: AtomicU32 = AtomicU32::new(0);

#[exception]
fn SysTick() {
    WRAPS.fetch_add(1, Ordering::Relaxed);
}

/// Owner of the running SysTick counter.
pub struct Ticks {
    _syst: SYST,
}

impl Ticks {
    /// Start SysTick from the core clock with the full reload value and the
    /// wrap-counting exception enabled.
    pub fn start(mut syst: SYST) -> Self {
        syst.disable_counter();
        syst.disable_interrupt();
        syst.set_clock_source(SystClkSource::Core);
        syst.set_reload(RELOAD);
        syst.clear_current();
        WRAPS.store(0, Ordering::Relaxed);
        syst.enable_interrupt();
        syst.enable_counter();
        // The cleared counter reads 0 until its first reload, which `now`
        // would take for a full period: wait (a few ticks at most) until the
        // reload value is in, so readings only ever increase.
        let mut spins = 0u32;
        while SYST::get_current() == 0 && spins < 100_000 {
            spins += 1;
        }
        Self { _syst: syst }
    }

    /// Ticks since [`Ticks::start`]. Monotonic.
    pub fn now(&self) -> u64 {
        cortex_m::interrupt::free(|_| {
            let wraps = WRAPS.load(Ordering::Relaxed);
            let current = SYST::get_current();
            // With interrupts masked a wrap that happened after the counter
            // was started but before we looked is visible only as a pending
            // SysTick exception: count it here and re-read the (reloaded)
            // counter so the two halves belong together.
            let (wraps, current) = if SCB::is_pendst_pending() {
                (wraps.wrapping_add(1), SYST::get_current())
            } else {
                (wraps, current)
            };
            u64::from(wraps) * TICKS_PER_WRAP + u64::from(RELOAD - (current & RELOAD))
        })
    }

    /// Ticks elapsed since an earlier [`Ticks::now`] reading.
    pub fn since(&self, earlier: u64) -> u64 {
        self.now().saturating_sub(earlier)
    }

    /// Run `f` and return its result with the ticks it took (including the
    /// small constant cost of two `now` calls, see [`Ticks::overhead`]).
    pub fn measure<R>(&self, f: impl FnOnce() -> R) -> (R, u64) {
        let start = self.now();
        let r = f();
        (r, self.since(start))
    }

    /// Ticks measured for an empty closure: subtract from [`Ticks::measure`]
    /// results when measuring very short work.
    pub fn overhead(&self) -> u64 {
        self.measure(|| ()).1
    }
}

/// Convert ticks to instructions executed under QEMU `-icount shift=0`.
pub const fn ticks_to_instructions(ticks: u64) -> u64 {
    ticks * INSTRUCTIONS_PER_TICK as u64
}
