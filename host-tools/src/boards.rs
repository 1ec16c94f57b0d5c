//! Memory maps of the boards' model slots, and flashable images of a slot.
//!
//! Each board reserves two slot regions in its `memory.x`. A region holds
//! the slot record ([`SlotRecord::to_bytes`], 16 bytes) at offset 0 and the
//! model file at [`DATA_OFFSET`]; bytes in between stay erased. The board
//! boots from the valid slot with the highest generation
//! (`shared-model/PROTOCOL.md`, "Model slots and boot"). The addresses here
//! must agree with the boards' `memory.x` files (a test in
//! `tests/tests/boards.rs` checks it).

use crate::error::{Error, Result};
use plumb_firmware::endpoint::{SlotRecord, FILE_OFFSET, RECORD_LEN};
use plumb_model::wire::{crc32, Slot};
use std::fmt::Write;

/// Offset of the model file in a slot region (the record is at 0): the
/// firmware's [`FILE_OFFSET`].
pub const DATA_OFFSET: u32 = FILE_OFFSET as u32;

/// A board's slot layout.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BoardMap {
    /// Board name, as `--board` takes it.
    pub name: &'static str,
    /// Base addresses of the regions of slot A and slot B.
    pub regions: [u32; 2],
    /// Bytes per region.
    pub region_len: u32,
    /// Value of erased storage (padding in raw images).
    pub erased: u8,
    /// How the image gets onto the board.
    pub how: &'static str,
}

impl BoardMap {
    /// Largest model file a slot holds.
    pub const fn capacity(&self) -> u32 {
        self.region_len - DATA_OFFSET
    }

    /// Base address of a slot's region.
    pub const fn base(&self, slot: Slot) -> u32 {
        self.regions[slot.index()]
    }
}

/// The boards with model slots.
pub const BOARDS: [BoardMap; 2] = [
    BoardMap {
        name: "mps2-an386",
        regions: [0x0004_0000, 0x0004_8000],
        region_len: 0x8000,
        erased: 0x00,
        how: "qemu-system-arm ... -device loader,file=IMAGE.hex -kernel plumb-board-mps2 \
              (a .bin image: -device loader,file=IMAGE.bin,addr=BASE,force-raw=on)",
    },
    BoardMap {
        name: "blackpill-f411",
        regions: [0x0804_0000, 0x0806_0000],
        region_len: 0x2_0000,
        erased: 0xFF,
        how: "probe-rs download --chip STM32F411CEUx --binary-format hex IMAGE.hex \
              (a .bin image: --binary-format bin --base-address BASE)",
    },
];

/// The board called `name`.
pub fn board(name: &str) -> Result<&'static BoardMap> {
    BOARDS.iter().find(|b| b.name == name).ok_or_else(|| {
        let names: Vec<&str> = BOARDS.iter().map(|b| b.name).collect();
        Error::input(format!(
            "unknown board {name:?}; known boards: {}",
            names.join(", ")
        ))
    })
}

/// A slot image: bytes to place at `base`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SlotImage {
    /// Address of the region.
    pub base: u32,
    /// The record, bytes at `base .. base + 16`.
    pub record: [u8; RECORD_LEN],
    /// The model file, at `base + DATA_OFFSET`.
    pub file: Vec<u8>,
    /// Erased value for the gap between them.
    pub erased: u8,
}

impl SlotImage {
    /// Builds the image of `file` in `slot` of `board` with `generation`.
    pub fn new(board: &BoardMap, slot: Slot, file: &[u8], generation: u32) -> Result<Self> {
        let len = u32::try_from(file.len())
            .ok()
            .filter(|&n| n <= board.capacity())
            .ok_or_else(|| {
                Error::input(format!(
                    "a model file of {} bytes does not fit a {} slot ({} bytes)",
                    file.len(),
                    board.name,
                    board.capacity()
                ))
            })?;
        if file.is_empty() {
            return Err(Error::input("the model file is empty"));
        }
        let record = SlotRecord {
            generation,
            len,
            crc: crc32(file),
        }
        .to_bytes();
        Ok(SlotImage {
            base: board.base(slot),
            record,
            file: file.to_vec(),
            erased: board.erased,
        })
    }

    /// Raw bytes from `base`: record, erased padding, file.
    pub fn to_bin(&self) -> Vec<u8> {
        let mut out = vec![self.erased; DATA_OFFSET as usize + self.file.len()];
        out[..RECORD_LEN].copy_from_slice(&self.record);
        out[DATA_OFFSET as usize..].copy_from_slice(&self.file);
        out
    }

    /// Intel HEX: the record and the file as data records at their
    /// addresses (the gap is left out), extended linear address records
    /// where the upper 16 bits change, and the end-of-file record.
    pub fn to_hex(&self) -> String {
        intel_hex(&[
            (self.base, &self.record[..]),
            (self.base + DATA_OFFSET, &self.file[..]),
        ])
    }
}

/// Intel HEX of `segments` (address, bytes): 16 data bytes per record,
/// type 04 (extended linear address) records before the first record and
/// whenever the upper 16 address bits change, type 01 at the end.
pub fn intel_hex(segments: &[(u32, &[u8])]) -> String {
    fn record(out: &mut String, addr: u16, kind: u8, data: &[u8]) {
        let mut sum = data.len() as u8;
        sum = sum
            .wrapping_add((addr >> 8) as u8)
            .wrapping_add(addr as u8)
            .wrapping_add(kind);
        let _ = write!(out, ":{:02X}{:04X}{:02X}", data.len(), addr, kind);
        for &b in data {
            let _ = write!(out, "{b:02X}");
            sum = sum.wrapping_add(b);
        }
        let _ = writeln!(out, "{:02X}", sum.wrapping_neg());
    }
    let mut out = String::new();
    let mut upper: Option<u16> = None;
    for &(start, bytes) in segments {
        let mut addr = start;
        let mut rest = bytes;
        while !rest.is_empty() {
            let hi = (addr >> 16) as u16;
            if upper != Some(hi) {
                record(&mut out, 0, 0x04, &hi.to_be_bytes());
                upper = Some(hi);
            }
            // A data record must not cross a 64 KiB boundary.
            let to_boundary = 0x1_0000 - (addr & 0xFFFF);
            let n = rest.len().min(16).min(to_boundary as usize);
            record(&mut out, addr as u16, 0x00, &rest[..n]);
            rest = &rest[n..];
            addr = addr.wrapping_add(n as u32);
        }
    }
    record(&mut out, 0, 0x01, &[]);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn hex_records_have_valid_checksums_and_addresses() {
        // A segment crossing a 64 KiB boundary.
        let data: Vec<u8> = (0..40u8).collect();
        let hex = intel_hex(&[(0x0800_FFF0, &data)]);
        let lines: Vec<&str> = hex.lines().collect();
        assert_eq!(lines[0], ":020000040800F2");
        assert_eq!(lines[1].get(..9), Some(":10FFF000"));
        assert_eq!(lines[2], ":020000040801F1");
        assert_eq!(lines.last(), Some(&":00000001FF"));
        for l in &lines {
            let bytes: Vec<u8> = (1..l.len())
                .step_by(2)
                .map(|i| u8::from_str_radix(&l[i..i + 2], 16).unwrap())
                .collect();
            assert_eq!(bytes.iter().fold(0u8, |a, b| a.wrapping_add(*b)), 0, "{l}");
        }
    }

    #[test]
    fn bin_image_puts_record_and_file_in_place() {
        let b = board("blackpill-f411").unwrap();
        let img = SlotImage::new(b, Slot::B, b"PLMDxyz", 7).unwrap();
        assert_eq!(img.base, 0x0806_0000);
        let bin = img.to_bin();
        assert_eq!(bin.len(), 0x100 + 7);
        let rec = SlotRecord::from_bytes(&bin[..16]).unwrap();
        assert_eq!(
            (rec.generation, rec.len, rec.crc),
            (7, 7, crc32(b"PLMDxyz"))
        );
        assert!(bin[16..0x100].iter().all(|&x| x == 0xFF));
        assert_eq!(&bin[0x100..], b"PLMDxyz");
    }

    #[test]
    fn oversize_and_unknown_board_are_refused() {
        let b = board("mps2-an386").unwrap();
        assert!(SlotImage::new(b, Slot::A, &vec![1u8; 0x8000], 1).is_err());
        assert!(board("nope").is_err());
    }
}
