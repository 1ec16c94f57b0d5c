//! Model slots in code memory: two regions that `memory.x` reserves, used
//! as the emulated board's flash through the firmware crate's
//! [`FlashSlots`].
//!
//! | region | address | bytes | record (16 B) | model file |
//! | --- | --- | --- | --- | --- |
//! | `SLOT_A` | `0x0004_0000` | 32 KiB | `+0x000` | `+0x100`, at most 32,512 B |
//! | `SLOT_B` | `0x0004_8000` | 32 KiB | `+0x000` | `+0x100`, at most 32,512 B |
//!
//! The layout, the order of writes and the read-back checks are
//! [`FlashSlots`]'s, the same as on the flash boards (tested in the
//! firmware crate with the power cut at every step of an upload); this file
//! is only the [`Flash`] driver. Code memory on the MPS2 is SSRAM that the
//! core can write, so the driver's erase and program are stores that behave
//! as NOR flash does (erased bytes read `0xFF`, programming only clears
//! bits: `mmio::SlotMemory`). The model runs from the slot where it was
//! written or loaded: no copy of a slot is kept in RAM.
//!
//! The emulator has no persistent storage, so an upload over the link lives
//! until QEMU exits. What a reset starts from is what QEMU's loader put into
//! the regions before it:
//! `plumb image MODEL --board mps2-an386 --slot a|b --out FILE` writes an
//! image of one region (a slot record and the model file):
//!
//! ```text
//! qemu-system-arm ... -device loader,file=slot-a.hex -kernel plumb-board-mps2
//! ```
//!
//! Code memory the loader did not fill reads `0x00`, which has no valid
//! record; `Endpoint::start` picks the newest valid slot as on any board.

use plumb_firmware::endpoint::{Flash, FlashLayout, FlashSlots, SlotError, FILE_OFFSET};
use plumb_firmware::plumb_model::wire::Slot;

use crate::mmio::{SlotMemory, SLOT_MEMORY_BASE};

/// Size of one slot region in code memory.
pub const REGION_LEN: usize = 0x8000;
/// Offset of the model file in a region (the record is at offset 0).
pub const DATA_OFFSET: usize = FILE_OFFSET;
/// Bytes one slot holds.
pub const SLOT_CAPACITY: usize = REGION_LEN - DATA_OFFSET;
/// Base addresses of the regions of slot A and slot B (see `memory.x`).
pub const REGIONS: [usize; 2] = [SLOT_MEMORY_BASE, SLOT_MEMORY_BASE + REGION_LEN];

/// The two regions as offsets in [`SlotMemory::bytes`].
const LAYOUT: FlashLayout = FlashLayout {
    regions: [REGIONS[0] - SLOT_MEMORY_BASE, REGIONS[1] - SLOT_MEMORY_BASE],
    region_len: REGION_LEN,
};

/// The slot regions of code memory as a [`Flash`].
pub struct CodeFlash(SlotMemory);

impl Flash for CodeFlash {
    fn memory(&self) -> &[u8] {
        self.0.bytes()
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        let start = LAYOUT.regions[slot.index()];
        self.0
            .erase(start, REGION_LEN)
            .then_some(())
            .ok_or(SlotError::OutOfBounds)
    }

    fn program(&mut self, offset: usize, bytes: &[u8]) -> Result<(), SlotError> {
        self.0
            .program(offset, bytes)
            .then_some(())
            .ok_or(SlotError::OutOfBounds)
    }
}

/// The two model slots of this board.
pub type BoardSlots = FlashSlots<CodeFlash>;

/// Takes the slot regions (once; `None` after that).
pub fn take() -> Option<BoardSlots> {
    Some(FlashSlots::new(CodeFlash(SlotMemory::take()?), LAYOUT))
}
