//! Stack high-water measurement by painting.
//!
//! [`paint`] fills the unused part of the stack (from the bottom of the
//! stack region up to a guard band below the current stack pointer) with
//! [`PATTERN`]. Later, [`StackPaint::high_water`] scans upwards from the
//! bottom for the first word that no longer holds the pattern: everything
//! from there to the top of the stack has been used at some point.
//! The result is an upper bound (off by at most the guard band only if the
//! stack never grew past the point where painting started).

use crate::mmio;

/// Paint pattern (the bytes `P L M B` in memory).
pub const PATTERN: u32 = 0x424D_4C50;

/// Bytes left unpainted directly below the stack pointer at paint time, so
/// the painting code never overwrites its own frame.
const GUARD: usize = 64;

/// Result of painting, used to read the high-water mark later.
#[derive(Debug, Clone, Copy)]
pub struct StackPaint {
    bottom: usize,
    top: usize,
}

/// Paint the free stack. Call once, as early as possible in `main`.
#[inline(never)]
pub fn paint() -> StackPaint {
    let (bottom, top) = mmio::stack_bounds();
    let sp = cortex_m::register::msp::read() as usize;
    let limit = sp.saturating_sub(GUARD);
    mmio::fill_unused_stack(bottom, limit, PATTERN);
    StackPaint { bottom, top }
}

impl StackPaint {
    /// Size of the stack region in bytes.
    pub fn size(&self) -> usize {
        self.top - self.bottom
    }

    /// Deepest stack use seen since painting, in bytes from the top.
    pub fn high_water(&self) -> usize {
        self.top - mmio::first_word_not(self.bottom, self.top, PATTERN)
    }
}
