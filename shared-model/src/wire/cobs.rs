//! Consistent Overhead Byte Stuffing (COBS; Cheshire & Baker, IEEE/ACM
//! Transactions on Networking 7(2), 1999): removes every zero byte from a
//! block so that a zero can delimit frames on a byte stream.
//!
//! The encoding is a sequence of blocks. Each block starts with a code byte
//! `c` in `1..=255` followed by `c − 1` data bytes. A block with `c < 255`
//! stands for its data followed by one zero byte, except the last block of
//! the encoding, whose zero is dropped; a block with `c = 255` stands for its
//! 254 data bytes alone. Examples: `[]` → `01`, `[00]` → `01 01`,
//! `[11 22 00 33]` → `03 11 22 02 33`.
//!
//! Worst case, `n` bytes encode to `n + 1 + n / 254` bytes
//! ([`max_encoded_len`]). Everything here works in caller-provided buffers,
//! never allocates, and returns an error instead of panicking on any input.

/// Why a COBS operation failed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum CobsError {
    /// The output buffer is too small.
    BufferTooSmall,
    /// The encoded input contains a zero byte.
    ZeroInInput,
    /// The encoded input ends inside a block.
    Truncated,
}

impl core::fmt::Display for CobsError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        f.write_str(match self {
            CobsError::BufferTooSmall => "COBS output buffer too small",
            CobsError::ZeroInInput => "zero byte inside COBS data",
            CobsError::Truncated => "COBS data ends inside a block",
        })
    }
}

impl core::error::Error for CobsError {}

/// An upper bound of the encoded length of `n` bytes (without delimiter).
pub const fn max_encoded_len(n: usize) -> usize {
    n + 1 + n / 254
}

/// How far ahead of the output the input may start when encoding in place
/// (see [`encode_in_place`]).
pub const fn in_place_offset(n: usize) -> usize {
    1 + n / 254
}

/// Encodes `src` into `dst`; returns the encoded length. `dst` must hold
/// [`max_encoded_len`]`(src.len())` bytes, even when the actual encoding is
/// shorter.
pub fn encode(src: &[u8], dst: &mut [u8]) -> Result<usize, CobsError> {
    let offset = in_place_offset(src.len());
    let end = offset
        .checked_add(src.len())
        .ok_or(CobsError::BufferTooSmall)?;
    dst.get_mut(offset..end)
        .ok_or(CobsError::BufferTooSmall)?
        .copy_from_slice(src);
    encode_in_place(dst, offset, src.len())
}

/// Encodes the `len` bytes at `buf[start..start + len]` into `buf[0..]`;
/// returns the encoded length.
///
/// `start` must be at least [`in_place_offset`]`(len)`: the write position
/// then never overtakes the read position (before data byte `i` is read,
/// at most `1 + i / 254` code bytes have been reserved), so every byte is read
/// before it is overwritten. A smaller `start` is refused.
pub fn encode_in_place(buf: &mut [u8], start: usize, len: usize) -> Result<usize, CobsError> {
    if start < in_place_offset(len) {
        return Err(CobsError::BufferTooSmall);
    }
    let mut code_at = 0usize; // where the open block's code byte goes
    let mut w = 1usize; // next write position
    let mut code: u8 = 1; // code of the open block (data bytes + 1)
    let mut open = true; // a block is open (false right after a full block)
    for i in 0..len {
        let b = *buf.get(start + i).ok_or(CobsError::BufferTooSmall)?;
        if !open {
            code_at = w;
            w += 1;
            code = 1;
            open = true;
        }
        if b == 0 {
            *buf.get_mut(code_at).ok_or(CobsError::BufferTooSmall)? = code;
            code_at = w;
            w += 1;
            code = 1;
        } else {
            *buf.get_mut(w).ok_or(CobsError::BufferTooSmall)? = b;
            w += 1;
            code += 1;
            if code == 0xFF {
                *buf.get_mut(code_at).ok_or(CobsError::BufferTooSmall)? = code;
                open = false;
            }
        }
    }
    if open {
        *buf.get_mut(code_at).ok_or(CobsError::BufferTooSmall)? = code;
    }
    Ok(w)
}

/// Decodes `src` (without the delimiter) into `dst`; returns the decoded
/// length. `dst` needs at most `src.len()` bytes.
pub fn decode(src: &[u8], dst: &mut [u8]) -> Result<usize, CobsError> {
    let mut dec = Decoder::new();
    let mut n = 0usize;
    for &b in src {
        match dec.byte(b)? {
            Step::Skip => {}
            Step::Data(v) => {
                *dst.get_mut(n).ok_or(CobsError::BufferTooSmall)? = v;
                n += 1;
            }
            Step::Zero => {
                *dst.get_mut(n).ok_or(CobsError::BufferTooSmall)? = 0;
                n += 1;
            }
        }
    }
    dec.finish()?;
    Ok(n)
}

/// What one encoded byte contributes to the decoded output.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Step {
    /// Nothing: the first code byte, or a code byte after a full block.
    Skip,
    /// A zero: a code byte after a short block, which ends that block's zero.
    Zero,
    /// One data byte.
    Data(u8),
}

/// Byte-at-a-time COBS decoder state, shared by [`decode`] and the stream
/// decoder of frames.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) struct Decoder {
    /// Data bytes left in the current block.
    left: u8,
    /// The current block's code was below 255, so a zero follows it unless
    /// it is the last block.
    short: bool,
    /// At least one code byte was read.
    started: bool,
}

impl Decoder {
    pub(crate) const fn new() -> Self {
        Decoder {
            left: 0,
            short: false,
            started: false,
        }
    }

    /// Whether any byte was fed since the last reset.
    pub(crate) fn started(&self) -> bool {
        self.started
    }

    /// Feeds one encoded (non-delimiter) byte.
    pub(crate) fn byte(&mut self, b: u8) -> Result<Step, CobsError> {
        if b == 0 {
            return Err(CobsError::ZeroInInput);
        }
        if self.left > 0 {
            self.left -= 1;
            return Ok(Step::Data(b));
        }
        // A code byte: the previous block (if any, and short) ends in a zero
        // that is now known not to be the last.
        let step = if self.started && self.short {
            Step::Zero
        } else {
            Step::Skip
        };
        self.started = true;
        self.left = b - 1;
        self.short = b < 0xFF;
        Ok(step)
    }

    /// Checks that the encoding ended on a block boundary.
    pub(crate) fn finish(&self) -> Result<(), CobsError> {
        if self.left > 0 {
            Err(CobsError::Truncated)
        } else {
            Ok(())
        }
    }
}
