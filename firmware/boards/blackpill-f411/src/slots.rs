//! Model slots in the STM32F411's internal flash: sector 6 (slot A) and
//! sector 7 (slot B), 128 KiB each, reserved in `memory.x`.
//!
//! | slot | sector | address | record (16 B) | model file |
//! | --- | --- | --- | --- | --- |
//! | A | 6 | `0x0804_0000` | `+0x000` | `+0x100`, at most 130,816 B |
//! | B | 7 | `0x0806_0000` | `+0x000` | `+0x100`, at most 130,816 B |
//!
//! Reading is a plain memory-mapped read (the HAL's `FlashExt::read`);
//! erasing and programming go through the HAL's flash API (`erase(sector)`,
//! byte-wise `program`). The record is [`SlotRecord::to_bytes`], programmed
//! last, after every byte of the file; erased flash (all `0xFF`) reads as
//! "no record". `plumb image MODEL --board blackpill-f411 --slot a|b` writes
//! an image of the same layout for a probe to flash.
//!
//! Erasing a 128 KiB sector stalls the core for one to two seconds (data
//! sheet typical); the host waits for the upload-open acknowledgement before
//! sending chunks, so nothing arrives meanwhile.

use plumb_firmware::endpoint::{ModelSlots, SlotError, SlotRecord, RECORD_LEN};
use plumb_firmware::plumb_model::wire::Slot;
use stm32f4xx_hal::flash::{FlashExt, LockedFlash};

/// Start of the flash memory map.
const FLASH_BASE: usize = 0x0800_0000;
/// Bytes per slot region (one sector).
pub const REGION_LEN: usize = 0x2_0000;
/// Offset of the model file in a region (the record is at offset 0).
pub const DATA_OFFSET: usize = 0x100;
/// Bytes one slot holds.
pub const SLOT_CAPACITY: usize = REGION_LEN - DATA_OFFSET;
/// Base address and sector number of slot A and slot B (see `memory.x`).
pub const REGIONS: [(usize, u8); 2] = [(0x0804_0000, 6), (0x0806_0000, 7)];

/// The two flash slots.
pub struct FlashSlots {
    flash: LockedFlash,
}

impl FlashSlots {
    /// Takes the flash controller.
    pub fn new(flash: LockedFlash) -> Self {
        FlashSlots { flash }
    }

    fn region(slot: Slot) -> (usize, u8) {
        REGIONS[slot.index()]
    }

    /// Offset from the start of flash of byte `at` of a slot's region.
    fn offset(slot: Slot, at: usize) -> usize {
        Self::region(slot).0 - FLASH_BASE + at
    }

    fn bytes(&self, slot: Slot, at: usize, len: usize) -> &[u8] {
        let start = Self::offset(slot, at);
        self.flash.read().get(start..start + len).unwrap_or(&[])
    }
}

impl ModelSlots for FlashSlots {
    fn capacity(&self) -> u32 {
        SLOT_CAPACITY as u32
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        let (_, sector) = Self::region(slot);
        self.flash
            .unlocked()
            .erase(sector)
            .map_err(|_| SlotError::Device)
    }

    fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError> {
        let at = usize::try_from(offset).map_err(|_| SlotError::OutOfBounds)?;
        let end = at.checked_add(data.len()).ok_or(SlotError::OutOfBounds)?;
        if end > SLOT_CAPACITY {
            return Err(SlotError::OutOfBounds);
        }
        let start = Self::offset(slot, DATA_OFFSET + at);
        self.flash
            .unlocked()
            .program(start, data.iter())
            .map_err(|_| SlotError::Device)?;
        // Read back: programming can only clear bits.
        if self.bytes(slot, DATA_OFFSET + at, data.len()) != data {
            return Err(SlotError::Device);
        }
        Ok(())
    }

    fn read(&self, slot: Slot) -> &[u8] {
        self.bytes(slot, DATA_OFFSET, SLOT_CAPACITY)
    }

    fn record(&self, slot: Slot) -> Option<SlotRecord> {
        SlotRecord::from_bytes(self.bytes(slot, 0, RECORD_LEN))
    }

    fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError> {
        let bytes = record.to_bytes();
        self.flash
            .unlocked()
            .program(Self::offset(slot, 0), bytes.iter())
            .map_err(|_| SlotError::Device)?;
        if self.record(slot) != Some(record) {
            return Err(SlotError::Device);
        }
        Ok(())
    }
}
