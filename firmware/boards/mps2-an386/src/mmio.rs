//! The only module of this crate that contains `unsafe` code.
//!
//! Everything that touches memory-mapped registers or memory that Rust does
//! not own (the unused part of the stack, the model-slot regions of code
//! memory), and the one `static mut` (the endpoint's places: its detector
//! place and resend ring), goes through the small safe API below. Each
//! unsafe block states why it is sound for this board.

use core::ptr;
use core::sync::atomic::{AtomicBool, Ordering};
use plumb_firmware::endpoint::Places;

/// The endpoint's detector place and resend ring (about 8 KiB).
/// `Places::EMPTY` is zero and uninitialised bytes only, so this lives in
/// `.bss`: zeroed at reset, never built on the stack, no flash.
static mut PLACES: Places = Places::EMPTY;

/// Set by the first [`endpoint_places`] call.
static PLACES_TAKEN: AtomicBool = AtomicBool::new(false);

/// Set by the first [`SlotMemory::take`] call.
static SLOT_MEMORY_TAKEN: AtomicBool = AtomicBool::new(false);

/// The endpoint's places, lent for the program's lifetime: `Some` once,
/// `None` on every later call.
pub fn endpoint_places() -> Option<&'static mut Places> {
    if PLACES_TAKEN.swap(true, Ordering::AcqRel) {
        return None;
    }
    // SAFETY: the atomic swap above lets exactly one call past, so this is
    // the only reference to `PLACES` ever made; no other code names the
    // static (it is private to this module) and no interrupt handler uses
    // it. `addr_of_mut!` takes the address without an intermediate
    // reference.
    Some(unsafe { &mut *ptr::addr_of_mut!(PLACES) })
}

/// Start of the two model-slot regions in code memory (`SLOT_A`, then
/// `SLOT_B` right after it, in `memory.x`).
pub const SLOT_MEMORY_BASE: usize = 0x0004_0000;
/// Bytes of both regions together.
pub const SLOT_MEMORY_LEN: usize = 0x1_0000;

/// The model-slot regions of code memory, owned: the emulated board's
/// flash for models. Code memory on the MPS2 (and in QEMU) is SSRAM the
/// core can write, so [`SlotMemory::erase`] and [`SlotMemory::program`]
/// are plain stores that behave as NOR flash does: erased bytes read
/// `0xFF`, programming only clears bits.
pub struct SlotMemory(());

impl SlotMemory {
    /// The regions: `Some` once, `None` on every later call.
    pub fn take() -> Option<Self> {
        if SLOT_MEMORY_TAKEN.swap(true, Ordering::AcqRel) {
            return None;
        }
        Some(SlotMemory(()))
    }

    /// Both regions as bytes.
    pub fn bytes(&self) -> &[u8] {
        // SAFETY: `SLOT_A` and `SLOT_B` of `memory.x`: always-mapped code
        // memory, non-null, that the linker places nothing in. Only this
        // handle writes it (one exists: `take` lets one call past), and only
        // through `&mut self`, so no write happens while this slice, which
        // borrows `self`, lives.
        unsafe { core::slice::from_raw_parts(SLOT_MEMORY_BASE as *const u8, SLOT_MEMORY_LEN) }
    }

    /// Sets `len` bytes from `offset` to `0xFF`; `false` (nothing written)
    /// when the range is not inside the regions.
    pub fn erase(&mut self, offset: usize, len: usize) -> bool {
        if !Self::inside(offset, len) {
            return false;
        }
        for i in offset..offset + len {
            // SAFETY: `i` is inside the regions (checked above), which this
            // handle owns (see `bytes`); `&mut self` rules out a live slice.
            unsafe { ptr::write_volatile((SLOT_MEMORY_BASE + i) as *mut u8, 0xFF) };
        }
        true
    }

    /// Clears in the bytes from `offset` the bits that are clear in `data`
    /// (a NOR program); `false` (nothing written) when the range is not
    /// inside the regions.
    pub fn program(&mut self, offset: usize, data: &[u8]) -> bool {
        if !Self::inside(offset, data.len()) {
            return false;
        }
        for (i, b) in data.iter().enumerate() {
            let addr = (SLOT_MEMORY_BASE + offset + i) as *mut u8;
            // SAFETY: as in `erase`: inside the owned regions, no live slice.
            unsafe { ptr::write_volatile(addr, ptr::read_volatile(addr) & b) };
        }
        true
    }

    fn inside(offset: usize, len: usize) -> bool {
        offset
            .checked_add(len)
            .is_some_and(|end| end <= SLOT_MEMORY_LEN)
    }
}

/// Base address of UART0 on the mps2-an386 machine (a CMSDK APB UART).
pub const UART0_BASE: usize = 0x4000_4000;

/// Register block of one CMSDK APB UART.
///
/// Register offsets (all 32 bit wide):
/// `DATA` +0x00, `STATE` +0x04, `CTRL` +0x08, `INTSTATUS/INTCLEAR` +0x0C,
/// `BAUDDIV` +0x10.
#[derive(Debug)]
pub struct CmsdkUartRegs {
    base: usize,
}

impl CmsdkUartRegs {
    const DATA: usize = 0x00;
    const STATE: usize = 0x04;
    const CTRL: usize = 0x08;
    const INTCLEAR: usize = 0x0C;
    const BAUDDIV: usize = 0x10;

    /// The register block of UART0. Only fixed, board-defined bases can be
    /// named, so every address this type touches is a valid UART register.
    /// Exclusive use is enforced one level up, in `uart::Uart0::take`.
    pub(crate) const fn uart0() -> Self {
        Self { base: UART0_BASE }
    }

    fn read(&self, offset: usize) -> u32 {
        let addr = (self.base + offset) as *const u32;
        // SAFETY: `base` is one of the fixed CMSDK UART bases of this board and
        // `offset` one of the register offsets above, so `addr` is an aligned,
        // always-mapped device register; a volatile read has no side effect on
        // Rust-visible memory.
        unsafe { ptr::read_volatile(addr) }
    }

    fn write(&self, offset: usize, value: u32) {
        let addr = (self.base + offset) as *mut u32;
        // SAFETY: as in `read`: an aligned, always-mapped UART register that
        // does not alias any Rust object.
        unsafe { ptr::write_volatile(addr, value) }
    }

    /// Read `DATA` (pops the received byte).
    pub fn data(&self) -> u8 {
        (self.read(Self::DATA) & 0xFF) as u8
    }

    /// Write `DATA` (queues one byte for transmission).
    pub fn set_data(&self, byte: u8) {
        self.write(Self::DATA, u32::from(byte));
    }

    /// Read `STATE`: bit0 TX buffer full, bit1 RX buffer full,
    /// bit2 TX overrun, bit3 RX overrun.
    pub fn state(&self) -> u32 {
        self.read(Self::STATE)
    }

    /// Write `STATE`: writing 1 to an overrun bit clears it.
    pub fn set_state(&self, value: u32) {
        self.write(Self::STATE, value);
    }

    /// Read `CTRL`.
    pub fn ctrl(&self) -> u32 {
        self.read(Self::CTRL)
    }

    /// Write `CTRL`: bit0 TX enable, bit1 RX enable (interrupt enables above).
    pub fn set_ctrl(&self, value: u32) {
        self.write(Self::CTRL, value);
    }

    /// Write `INTCLEAR`: writing 1 clears an interrupt flag (bit0 TX, bit1
    /// RX, bit2 TX overrun, bit3 RX overrun).
    pub fn clear_interrupts(&self, mask: u32) {
        self.write(Self::INTCLEAR, mask);
    }

    /// Write `BAUDDIV` (baud rate = UART clock / BAUDDIV, must be >= 16).
    pub fn set_bauddiv(&self, value: u32) {
        self.write(Self::BAUDDIV, value);
    }
}

/// Stack region as laid out by cortex-m-rt: `(lowest address, top address)`.
/// The stack grows downwards from `top` (`_stack_start`) towards `bottom`
/// (`_stack_end`, the end of `.bss`/`.uninit`).
pub fn stack_bounds() -> (usize, usize) {
    extern "C" {
        static _stack_start: u32;
        static _stack_end: u32;
    }
    // Taking the address of a linker-defined symbol never reads it, so these
    // `&raw const` expressions need no unsafe block.
    let top = (&raw const _stack_start) as usize;
    let bottom = (&raw const _stack_end) as usize;
    (bottom, top)
}

/// Fill the words in `[from, to)` with `pattern`.
///
/// Only for the unused part of the stack: the caller (`stack::paint`) passes
/// `from` = bottom of the stack region and `to` = an address safely below the
/// current stack pointer.
pub(crate) fn fill_unused_stack(from: usize, to: usize, pattern: u32) {
    let (bottom, top) = stack_bounds();
    let from = from.max(bottom) & !3;
    let to = to.min(top) & !3;
    let mut addr = from;
    while addr < to {
        // SAFETY: `addr` is 4-byte aligned and lies inside the RAM stack region
        // reserved by the linker script, below the live stack (see the caller
        // contract), so no Rust object lives there and nothing else writes to it
        // concurrently (single core, interrupts only use stack below the
        // current SP, which is above `to` plus a guard band).
        unsafe { ptr::write_volatile(addr as *mut u32, pattern) };
        addr += 4;
    }
}

/// Return the lowest address in `[from, to)` whose word differs from
/// `pattern`, or `to` if every word still holds it.
pub(crate) fn first_word_not(from: usize, to: usize, pattern: u32) -> usize {
    let (bottom, top) = stack_bounds();
    let from = from.max(bottom) & !3;
    let to = to.min(top) & !3;
    let mut addr = from;
    while addr < to {
        // SAFETY: `addr` is 4-byte aligned, inside the linker-reserved stack
        // region in always-mapped RAM; a volatile read of a plain word there
        // has no side effects and does not create a reference to any object.
        let word = unsafe { ptr::read_volatile(addr as *const u32) };
        if word != pattern {
            return addr;
        }
        addr += 4;
    }
    to
}

/// Base address of the FPGA I/O block of the MPS2 images (LEDs, buttons,
/// counters). Register `LED0` at +0x00: bit 0 and bit 1 drive the two user
/// LEDs; a read returns the last value written.
pub const FPGAIO_BASE: usize = 0x4002_8000;

/// Reads the FPGAIO `LED0` register.
pub(crate) fn fpgaio_led0() -> u32 {
    let addr = FPGAIO_BASE as *const u32;
    // SAFETY: `FPGAIO_BASE + 0x00` is the aligned, always-mapped LED0
    // register of the MPS2 FPGA I/O block; a volatile read has no side effect
    // on Rust-visible memory.
    unsafe { ptr::read_volatile(addr) }
}

/// Writes the FPGAIO `LED0` register.
pub(crate) fn set_fpgaio_led0(value: u32) {
    let addr = FPGAIO_BASE as *mut u32;
    // SAFETY: as in `fpgaio_led0`: an aligned device register that does not
    // alias any Rust object. Only `drift_line::DriftLine` (one instance,
    // claimed through an atomic flag) writes it.
    unsafe { ptr::write_volatile(addr, value) }
}

/// Interrupt number of UART0's receive interrupt on the mps2-an386 image.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Uart0RxIrq;

// SAFETY: 0 is the NVIC line of UART0 RX on the AN385/AN386 images (TX is 1),
// a valid interrupt number of this device.
unsafe impl cortex_m::interrupt::InterruptNumber for Uart0RxIrq {
    fn number(self) -> u16 {
        0
    }
}

/// Enables UART0's receive interrupt line in the NVIC. It is only ever
/// *pending* with interrupts masked (see `link::Link::wait`), which wakes a
/// `wfi`; should it be taken anyway, `DefaultHandler` clears it.
pub(crate) fn unmask_uart0_rx() {
    // SAFETY: unmasking can break a critical section that relies on this
    // line being masked; nothing in this crate does, and the line's handler
    // (`DefaultHandler` in `link`) only clears the UART interrupt flags.
    unsafe { cortex_m::peripheral::NVIC::unmask(Uart0RxIrq) }
}

/// Clears a pending UART0 receive interrupt in the NVIC.
pub(crate) fn unpend_uart0_rx() {
    cortex_m::peripheral::NVIC::unpend(Uart0RxIrq);
}

/// Device interrupt lines in the vector table: only UART0 RX (line 0, the
/// one line the program unmasks). cortex-m-rt's `device` feature leaves this
/// table to the board; without it the crate emits all 240 lines of an
/// ARMv7-M part (960 bytes of flash). The NVIC only takes enabled lines, so
/// no entry past the table is ever fetched.
// SAFETY: `__INTERRUPTS` is the name and section cortex-m-rt's `link.x`
// places right after the 16 exception vectors (`EXTERN(__INTERRUPTS)`,
// `.vector_table.interrupts`); no other object in the program has either.
// Its one entry is `DefaultHandler` below, whose symbol the `exception`
// attribute exports with the `extern "C"` signature declared here.
#[unsafe(link_section = ".vector_table.interrupts")]
#[unsafe(no_mangle)]
pub static __INTERRUPTS: [unsafe extern "C" fn(); 1] = {
    extern "C" {
        fn DefaultHandler();
    }
    [DefaultHandler]
};

/// Any device interrupt. Only UART0's receive line is unmasked, and it is
/// normally only pending while interrupts are masked (see
/// `uart::Uart0::sleep_until_rx`); if it is ever taken, clearing the UART's
/// flags is all there is to do. (cortex-m-rt requires the `unsafe fn`
/// signature; the body does nothing unsafe.)
#[cortex_m_rt::exception]
unsafe fn DefaultHandler(_irqn: i16) {
    crate::uart::Uart0::clear_all_interrupts();
}

extern "C" {
    fn __aeabi_memclr4(dest: *mut u8, n: usize);
}

/// The run-time ABI's "clear `n` bytes at an 8-aligned address", as a jump
/// to its 4-aligned twin: an 8-aligned address is 4-aligned, so the twin
/// clears the same bytes. The library's own copy is 174 bytes of code that
/// would do the same work.
///
/// # Safety
///
/// As for `__aeabi_memclr8`: `dest` is valid for `n` bytes of writes and
/// 8-aligned.
#[no_mangle]
pub unsafe extern "C" fn __aeabi_memclr8(dest: *mut u8, n: usize) {
    // SAFETY: the caller's contract (valid for `n` bytes of writes, aligned
    // to 8 and so to 4) is the contract of `__aeabi_memclr4`.
    unsafe { __aeabi_memclr4(dest, n) }
}
