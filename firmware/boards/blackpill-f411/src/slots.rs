//! Model slots in the STM32F411's internal flash: sector 6 (slot A) and
//! sector 7 (slot B), 128 KiB each, reserved in `memory.x`.
//!
//! | slot | sector | address | record (16 B) | model file |
//! | --- | --- | --- | --- | --- |
//! | A | 6 | `0x0804_0000` | `+0x000` | `+0x100`, at most 130,816 B |
//! | B | 7 | `0x0806_0000` | `+0x000` | `+0x100`, at most 130,816 B |
//!
//! The layout, the order of writes and the read-back checks are the
//! firmware crate's [`FlashSlots`] (tested there with power cut at every
//! step of an upload); this file is only the [`Flash`] driver over the HAL:
//! the memory-mapped flash (`FlashExt::read`), `erase(sector)` and byte-wise
//! `program`. `plumb image MODEL --board blackpill-f411 --slot a|b --out FILE`
//! writes an image of the same layout for a probe to flash.
//!
//! Erasing a 128 KiB sector stalls the core for one to two seconds (data
//! sheet typical); the host waits for the upload-open acknowledgement before
//! sending chunks, so nothing arrives meanwhile.

use plumb_firmware::endpoint::{Flash, FlashLayout, FlashSlots, SlotError};
use plumb_firmware::plumb_model::wire::Slot;
use stm32f4xx_hal::flash::{FlashExt, LockedFlash};

/// Start of the flash memory map.
const FLASH_BASE: usize = 0x0800_0000;
/// Bytes per slot region (one sector).
pub const REGION_LEN: usize = 0x2_0000;
/// Base address and sector number of slot A and slot B (see `memory.x`).
pub const REGIONS: [(usize, u8); 2] = [(0x0804_0000, 6), (0x0806_0000, 7)];

/// The two regions as offsets from the start of flash.
const LAYOUT: FlashLayout = FlashLayout {
    regions: [REGIONS[0].0 - FLASH_BASE, REGIONS[1].0 - FLASH_BASE],
    region_len: REGION_LEN,
};

/// The internal flash as the slots need it.
pub struct InternalFlash(LockedFlash);

impl Flash for InternalFlash {
    fn memory(&self) -> &[u8] {
        self.0.read()
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        let (_, sector) = REGIONS[slot.index()];
        self.0
            .unlocked()
            .erase(sector)
            .map_err(|_| SlotError::Device)
    }

    fn program(&mut self, offset: usize, bytes: &[u8]) -> Result<(), SlotError> {
        self.0
            .unlocked()
            .program(offset, bytes.iter())
            .map_err(|_| SlotError::Device)
    }
}

/// The two flash slots.
pub type BoardSlots = FlashSlots<InternalFlash>;

/// Takes the flash controller.
pub fn slots(flash: LockedFlash) -> BoardSlots {
    FlashSlots::new(InternalFlash(flash), LAYOUT)
}
