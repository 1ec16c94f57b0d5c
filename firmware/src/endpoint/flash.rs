//! Model slots in NOR flash: the layout and checks every flash board shares,
//! over a three-call [`Flash`] driver that a board writes for its part.
//!
//! Each slot owns one erase unit (a *region*). The 16-byte [`SlotRecord`]
//! sits at the start of the region and the model file at
//! [`FILE_OFFSET`]:
//!
//! | region offset | contents |
//! | --- | --- |
//! | `0x000` | [`SlotRecord::to_bytes`], programmed last |
//! | `0x100` | the model file, at most `region_len − 0x100` bytes |
//!
//! An upload erases the region, programs the file in ascending chunks and,
//! after the endpoint's checks passed, the record; every program is read
//! back. Power can fail at any of these steps: an erase cut short leaves old
//! bytes whose CRC no longer matches, a file cut short has no record, a
//! record cut short fails its own CRC. In each case the slot reads as not
//! valid and the other slot (or the built-in model) boots; the tests cut the
//! power at every step of an upload to show it.
//!
//! [`Flash::program`] must leave the bytes readable when it returns (every
//! program is read back), which byte-programmable parts such as the
//! STM32F4 family do. A part whose program unit is wider (a word or double
//! word, often with ECC that forbids programming a unit twice) needs chunks
//! gathered into whole units first; this module does not do that yet.

use super::slots::{ModelSlots, SlotError, SlotRecord, FILE_OFFSET, RECORD_LEN};
use plumb_model::wire::Slot;

/// A NOR flash as the slots need it. Implemented by each flash board over
/// its HAL; reads are memory-mapped (internal flash on Cortex-M is).
pub trait Flash {
    /// The flash, or the part of it holding both regions, as bytes; the
    /// offsets of [`FlashLayout::regions`] and [`Flash::program`] count from
    /// its first byte.
    fn memory(&self) -> &[u8];

    /// Erases the region of `slot`: afterwards each of its bytes reads
    /// `0xFF`.
    fn erase(&mut self, slot: Slot) -> Result<(), SlotError>;

    /// Programs `bytes` at `offset` (programming can only clear bits); they
    /// read back when this returns.
    fn program(&mut self, offset: usize, bytes: &[u8]) -> Result<(), SlotError>;
}

/// Where the two regions are.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FlashLayout {
    /// Offset of slot A's and slot B's region in [`Flash::memory`].
    pub regions: [usize; 2],
    /// Bytes per region (one erase unit).
    pub region_len: usize,
}

/// Two model slots in NOR flash (see the module documentation).
#[derive(Debug)]
pub struct FlashSlots<F> {
    flash: F,
    layout: FlashLayout,
}

impl<F: Flash> FlashSlots<F> {
    /// The slots of `layout` on `flash`.
    pub const fn new(flash: F, layout: FlashLayout) -> Self {
        FlashSlots { flash, layout }
    }

    /// The flash driver.
    pub fn flash(&self) -> &F {
        &self.flash
    }

    /// Gives the driver back.
    pub fn release(self) -> F {
        self.flash
    }

    /// Offset in [`Flash::memory`] of byte `at` of `slot`'s region.
    fn offset(&self, slot: Slot, at: usize) -> Option<usize> {
        self.layout.regions.get(slot.index())?.checked_add(at)
    }

    /// `len` bytes from byte `at` of `slot`'s region; empty when outside
    /// the region or the memory.
    fn bytes(&self, slot: Slot, at: usize, len: usize) -> &[u8] {
        let range = at
            .checked_add(len)
            .filter(|end| *end <= self.layout.region_len)
            .and_then(|_| {
                let start = self.offset(slot, at)?;
                Some(start..start.checked_add(len)?)
            });
        range
            .and_then(|r| self.flash.memory().get(r))
            .unwrap_or(&[])
    }

    /// Programs `data` at byte `at` of `slot`'s region and reads it back:
    /// programming can only clear bits, so a mismatch is a failed program
    /// or a region that was not erased.
    fn program(&mut self, slot: Slot, at: usize, data: &[u8]) -> Result<(), SlotError> {
        let end = at.checked_add(data.len()).ok_or(SlotError::OutOfBounds)?;
        if end > self.layout.region_len {
            return Err(SlotError::OutOfBounds);
        }
        let start = self.offset(slot, at).ok_or(SlotError::OutOfBounds)?;
        self.flash.program(start, data)?;
        // Compared a byte at a time (the same answer as `!=` on the slices,
        // without linking `memcmp` for this one comparison).
        if !self.bytes(slot, at, data.len()).iter().eq(data) {
            return Err(SlotError::Device);
        }
        Ok(())
    }
}

impl<F: Flash> ModelSlots for FlashSlots<F> {
    fn capacity(&self) -> u32 {
        let cap = self.layout.region_len.saturating_sub(FILE_OFFSET);
        u32::try_from(cap).unwrap_or(u32::MAX)
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        self.flash.erase(slot)
    }

    fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError> {
        let at = usize::try_from(offset)
            .ok()
            .and_then(|o| o.checked_add(FILE_OFFSET))
            .ok_or(SlotError::OutOfBounds)?;
        self.program(slot, at, data)
    }

    fn read(&self, slot: Slot) -> &[u8] {
        let len = self.layout.region_len.saturating_sub(FILE_OFFSET);
        self.bytes(slot, FILE_OFFSET, len)
    }

    fn record(&self, slot: Slot) -> Option<SlotRecord> {
        SlotRecord::from_bytes(self.bytes(slot, 0, RECORD_LEN))
    }

    fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError> {
        self.program(slot, 0, &record.to_bytes())
    }
}
