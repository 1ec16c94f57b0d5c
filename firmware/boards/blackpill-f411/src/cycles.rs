//! Core cycle counter (DWT CYCCNT) for measuring per-sample cost on the
//! real chip. 32 bits wide: wraps after 2^32 cycles (about 43 s at 100 MHz),
//! so measure intervals shorter than that.

use cortex_m::peripheral::{DCB, DWT};

/// Owner of the running cycle counter.
pub struct Cycles {
    _dwt: DWT,
}

impl Cycles {
    /// Enable tracing and start the cycle counter.
    pub fn start(mut dcb: DCB, mut dwt: DWT) -> Self {
        dcb.enable_trace();
        DWT::unlock();
        dwt.enable_cycle_counter();
        Self { _dwt: dwt }
    }

    /// Current cycle count.
    pub fn now(&self) -> u32 {
        DWT::cycle_count()
    }

    /// Run `f` and return its result with the cycles it took.
    pub fn measure<R>(&self, f: impl FnOnce() -> R) -> (R, u32) {
        let start = self.now();
        let r = f();
        (r, self.now().wrapping_sub(start))
    }
}
