//! Two model slots (A/B) and the record that makes a slot valid.

use plumb_model::wire::{crc32, Slot};

/// Why a slot operation failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum SlotError {
    /// Offset or length outside the slot.
    OutOfBounds,
    /// The storage device reported an error (erase, program, verify).
    Device,
}

/// What makes a slot valid: written last, after every byte of the file, so
/// a slot whose upload was interrupted has no record (or a stale one that
/// fails its checks).
///
/// At boot a slot is valid when its record is intact, `len` fits the slot,
/// the CRC-32 of its first `len` bytes is `crc`, and the file decodes; the
/// valid slot with the highest `generation` runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct SlotRecord {
    /// One more than the highest generation of either slot when written.
    pub generation: u32,
    /// Length of the model file in bytes.
    pub len: u32,
    /// CRC-32/ISO-HDLC of the whole model file.
    pub crc: u32,
}

/// Length of [`SlotRecord::to_bytes`].
pub const RECORD_LEN: usize = 16;

/// Offset of the model file in a slot region of a board's memory map: the
/// region starts with the record ([`SlotRecord::to_bytes`]), the file
/// follows here; bytes in between stay erased. [`FlashSlots`](super::FlashSlots)
/// (on every board with slots) and the host's `plumb image` share it.
pub const FILE_OFFSET: usize = 0x100;

impl SlotRecord {
    /// A fixed 16-byte layout for storages that keep the record beside the
    /// slot: generation, length and file CRC as `u32` little-endian, then the
    /// CRC-32 of those 12 bytes. Erased flash (all `0xFF`) and a torn write
    /// fail the check in [`Self::from_bytes`].
    pub fn to_bytes(&self) -> [u8; RECORD_LEN] {
        let mut out = [0u8; RECORD_LEN];
        let fields = [self.generation, self.len, self.crc];
        for (dst, v) in out.chunks_exact_mut(4).zip(fields) {
            dst.copy_from_slice(&v.to_le_bytes());
        }
        let check = crc32(out.get(..12).unwrap_or(&[]));
        if let Some(tail) = out.get_mut(12..) {
            tail.copy_from_slice(&check.to_le_bytes());
        }
        out
    }

    /// Reads the layout of [`Self::to_bytes`]; `None` when the check fails.
    pub fn from_bytes(bytes: &[u8]) -> Option<SlotRecord> {
        let head = bytes.get(..12)?;
        let tail = bytes.get(12..RECORD_LEN)?;
        if crc32(head).to_le_bytes() != *tail {
            return None;
        }
        let word = |i: usize| -> Option<u32> {
            Some(u32::from_le_bytes(head.get(i..i + 4)?.try_into().ok()?))
        };
        Some(SlotRecord {
            generation: word(0)?,
            len: word(4)?,
            crc: word(8)?,
        })
    }
}

/// Storage for two model files. A board implements it over internal flash
/// (two sectors plus a record each); [`RamSlots`] is the in-memory version
/// for tests and for boards that receive their model over the link at every
/// boot.
///
/// The endpoint only ever writes the slot that is not running, in this
/// order: [`erase`](Self::erase), [`write`](Self::write) with ascending
/// contiguous offsets from 0, [`flush`](Self::flush), then — after the file
/// passed every check — [`commit`](Self::commit).
pub trait ModelSlots {
    /// Bytes one slot holds.
    fn capacity(&self) -> u32;

    /// Erases a slot's data and its record, so the slot is no longer valid.
    fn erase(&mut self, slot: Slot) -> Result<(), SlotError>;

    /// Writes `data` at `offset`. Offsets ascend without gaps from 0 after an
    /// erase; an implementation bound to a write granularity may hold back a
    /// partial word until the next write or [`flush`](Self::flush).
    fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError>;

    /// Makes every written byte visible to [`read`](Self::read).
    fn flush(&mut self, _slot: Slot) -> Result<(), SlotError> {
        Ok(())
    }

    /// The slot's bytes (its whole capacity; bytes never written are
    /// unspecified). Must be addressable memory: internal flash is
    /// memory-mapped on Cortex-M.
    fn read(&self, slot: Slot) -> &[u8];

    /// The slot's record, if one is present and intact.
    fn record(&self, slot: Slot) -> Option<SlotRecord>;

    /// Writes the record: the last step of an upload, after which the slot
    /// is valid. Should be a single program operation, or protected by a
    /// check (see [`SlotRecord::to_bytes`]) so a torn write reads as absent.
    fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError>;
}

/// Two slots of `N` bytes in RAM.
#[derive(Debug, Clone)]
pub struct RamSlots<const N: usize> {
    data: [[u8; N]; 2],
    records: [Option<SlotRecord>; 2],
}

impl<const N: usize> Default for RamSlots<N> {
    fn default() -> Self {
        Self::new()
    }
}

impl<const N: usize> RamSlots<N> {
    /// Two empty slots, every byte zero: the same as [`RamSlots::new`] to
    /// every reader (bytes never written are unspecified), and all zero, so
    /// a `static` of it lives in `.bss` and is never built on the stack.
    pub const EMPTY: Self = RamSlots {
        data: [[0; N]; 2],
        records: [None; 2],
    };

    /// Two empty (invalid) slots, bytes `0xFF` as in erased flash.
    pub const fn new() -> Self {
        RamSlots {
            data: [[0xFF; N]; 2],
            records: [None; 2],
        }
    }

    /// Erases `slot`, writes `file` and commits it with `generation`, as a
    /// completed upload would (for tests and host-side endpoints).
    pub fn store(&mut self, slot: Slot, file: &[u8], generation: u32) -> Result<(), SlotError> {
        self.erase(slot)?;
        self.write(slot, 0, file)?;
        let len = u32::try_from(file.len()).map_err(|_| SlotError::OutOfBounds)?;
        self.commit(
            slot,
            SlotRecord {
                generation,
                len,
                crc: crc32(file),
            },
        )
    }

    /// Mutable access to a slot's bytes (tests use it to damage a slot).
    pub fn bytes_mut(&mut self, slot: Slot) -> &mut [u8] {
        match self.data.get_mut(slot.index()) {
            Some(d) => d,
            None => &mut [],
        }
    }
}

impl<const N: usize> ModelSlots for RamSlots<N> {
    fn capacity(&self) -> u32 {
        u32::try_from(N).unwrap_or(u32::MAX)
    }

    fn erase(&mut self, slot: Slot) -> Result<(), SlotError> {
        let i = slot.index();
        self.data
            .get_mut(i)
            .ok_or(SlotError::OutOfBounds)?
            .fill(0xFF);
        *self.records.get_mut(i).ok_or(SlotError::OutOfBounds)? = None;
        Ok(())
    }

    fn write(&mut self, slot: Slot, offset: u32, data: &[u8]) -> Result<(), SlotError> {
        let start = usize::try_from(offset).map_err(|_| SlotError::OutOfBounds)?;
        let end = start
            .checked_add(data.len())
            .ok_or(SlotError::OutOfBounds)?;
        self.data
            .get_mut(slot.index())
            .and_then(|d| d.get_mut(start..end))
            .ok_or(SlotError::OutOfBounds)?
            .copy_from_slice(data);
        Ok(())
    }

    fn read(&self, slot: Slot) -> &[u8] {
        match self.data.get(slot.index()) {
            Some(d) => d,
            None => &[],
        }
    }

    fn record(&self, slot: Slot) -> Option<SlotRecord> {
        self.records.get(slot.index()).copied().flatten()
    }

    fn commit(&mut self, slot: Slot, record: SlotRecord) -> Result<(), SlotError> {
        *self
            .records
            .get_mut(slot.index())
            .ok_or(SlotError::OutOfBounds)? = Some(record);
        Ok(())
    }
}

/// The valid slot with the highest generation, if any, checked as at boot:
/// intact record, length within the slot, CRC-32 of the file, and a file
/// that decodes into a detector. Returns the slot and its record.
pub fn newest_valid<S: ModelSlots + ?Sized>(slots: &S) -> Option<(Slot, SlotRecord)> {
    let mut best: Option<(Slot, SlotRecord)> = None;
    for slot in [Slot::A, Slot::B] {
        let Some(rec) = valid_record(slots, slot) else {
            continue;
        };
        if best.is_none_or(|(_, b)| rec.generation > b.generation) {
            best = Some((slot, rec));
        }
    }
    best
}

/// The slot's file, if its record is intact and the CRC matches (the file
/// itself is not decoded).
pub fn slot_file<S: ModelSlots + ?Sized>(slots: &S, slot: Slot) -> Option<&[u8]> {
    let rec = slots.record(slot)?;
    let len = usize::try_from(rec.len).ok()?;
    let bytes = slots.read(slot).get(..len)?;
    (crc32(bytes) == rec.crc).then_some(bytes)
}

fn valid_record<S: ModelSlots + ?Sized>(slots: &S, slot: Slot) -> Option<SlotRecord> {
    let bytes = slot_file(slots, slot)?;
    plumb_model::file::decode(bytes, &plumb_model::Capacity::DEVICE).ok()?;
    slots.record(slot)
}
