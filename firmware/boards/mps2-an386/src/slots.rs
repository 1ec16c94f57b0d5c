//! Model slots: two [`RamSlots`] in RAM, preloaded at reset from two regions
//! of code memory.
//!
//! The emulator has no persistent storage, so an upload over the link lives
//! until the next reset, as with `RamSlots` on any board. What survives a
//! reset is what was *loaded* into code memory before it: `memory.x`
//! reserves two regions that the linker never fills, and `plumb image MODEL
//! --board mps2-an386 --slot a|b` writes an image of one (a slot record and
//! the model file) that QEMU's generic loader puts there:
//!
//! ```text
//! qemu-system-arm ... -device loader,file=slot-a.hex -kernel plumb-board-mps2
//! ```
//!
//! | region | address | bytes | record (16 B) | model file |
//! | --- | --- | --- | --- | --- |
//! | `SLOT_A` | `0x0004_0000` | 8 KiB | `+0x000` | `+0x100`, at most 7936 B |
//! | `SLOT_B` | `0x0004_2000` | 8 KiB | `+0x000` | `+0x100`, at most 7936 B |
//!
//! The record is [`SlotRecord::to_bytes`]: generation, length and CRC-32 of
//! the file, then the CRC-32 of those 12 bytes, so zeroed or erased memory
//! reads as "no record". At reset every region with an intact record whose
//! file has the recorded CRC is copied into its RAM slot; then
//! `Endpoint::boot` picks the newest valid slot as on any board.

use plumb_firmware::endpoint::{
    slot_file, ModelSlots, RamSlots, SlotError, SlotRecord, FILE_OFFSET, RECORD_LEN,
};
use plumb_firmware::plumb_model::wire::Slot;

use crate::mmio;

/// Size of one slot region in code memory.
pub const REGION_LEN: usize = 0x2000;
/// Offset of the model file in a region (the record is at offset 0).
pub const DATA_OFFSET: usize = FILE_OFFSET;
/// Bytes one slot holds.
pub const SLOT_CAPACITY: usize = REGION_LEN - DATA_OFFSET;
/// Base addresses of the regions of slot A and slot B (see `memory.x`).
pub const REGIONS: [usize; 2] = [0x0004_0000, 0x0004_2000];

/// The two RAM slots, borrowed for the program's lifetime (they live in a
/// static, not on the stack).
pub struct BoardSlots(&'static mut RamSlots<SLOT_CAPACITY>);

/// What [`BoardSlots::preload`] found in one region.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Preload {
    /// No intact record.
    Empty,
    /// A record whose file does not fit or does not match its CRC.
    Damaged,
    /// Copied into the RAM slot with this generation.
    Loaded(u32),
}

impl BoardSlots {
    /// Takes the static RAM slots (once; `None` after that).
    pub fn take() -> Option<Self> {
        Some(BoardSlots(mmio::slot_storage()?))
    }

    /// Copies every intact region into its RAM slot.
    pub fn preload(&mut self) -> [Preload; 2] {
        [self.preload_slot(Slot::A), self.preload_slot(Slot::B)]
    }

    /// Copies one region into its RAM slot if it is intact. Out of line, so
    /// the image holds it once, not once per slot.
    #[inline(never)]
    fn preload_slot(&mut self, slot: Slot) -> Preload {
        let region = mmio::code_region(REGIONS[slot.index()], REGION_LEN);
        let Some(record) = region.get(..RECORD_LEN).and_then(SlotRecord::from_bytes) else {
            return Preload::Empty;
        };
        let Some(file) = usize::try_from(record.len)
            .ok()
            .and_then(|len| region.get(DATA_OFFSET..DATA_OFFSET.checked_add(len)?))
        else {
            return Preload::Damaged;
        };
        if plumb_firmware::plumb_model::wire::crc32(file) != record.crc {
            return Preload::Damaged;
        }
        match self.0.store(slot, file, record.generation) {
            Ok(()) if slot_file(&*self.0, slot).is_some() => Preload::Loaded(record.generation),
            _ => Preload::Damaged,
        }
    }
}

impl ModelSlots for BoardSlots {
    fn capacity(&self) -> u32 {
        self.0.capacity()
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        self.0.erase(slot)
    }

    fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError> {
        self.0.write(slot, offset, data)
    }

    fn flush(&mut self, slot: Slot) -> Result<(), SlotError> {
        self.0.flush(slot)
    }

    fn read(&self, slot: Slot) -> &[u8] {
        self.0.read(slot)
    }

    fn record(&self, slot: Slot) -> Option<SlotRecord> {
        self.0.record(slot)
    }

    fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError> {
        self.0.commit(slot, record)
    }
}
