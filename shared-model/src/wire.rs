//! Wire messages between a board and the host, and their framing (see
//! `PROTOCOL.md` beside this crate for the full specification).
//!
//! * A **message** is a postcard-encoded [`HostMsg`] (host → device) or
//!   [`DeviceFrame`] (device → host: a `u32` sequence number and a
//!   [`DeviceMsg`]).
//! * A **frame** is `COBS(message ‖ CRC-32 little-endian of message)`
//!   followed by one `0x00` delimiter. The CRC is CRC-32/ISO-HDLC
//!   ([`crc32`]), the same as the model file's.
//! * [`encode_frame`] writes a frame into a caller's buffer;
//!   [`FrameDecoder`] turns a byte stream back into messages, counting every
//!   kind of damage it drops.
//!
//! Everything here is `no_std`, allocation-free (the `alloc` feature adds
//! `encode_frame_vec`) and returns errors instead of panicking.

pub mod cobs;
mod frame;
mod message;
mod reason;
mod ser;

#[cfg(feature = "alloc")]
pub use frame::encode_frame_vec;
pub use frame::{
    decode_frame, encode_device_frame, encode_frame, max_frame_len, EncodeError, FrameDecoder,
    FrameError,
};
pub use message::*;
pub use reason::{dim_code, dim_from_code, field_code, field_from_code, Reason, FIELDS};

use crate::MAX_FEATURES;

/// Version of this protocol, sent in every [`Greeting`]. Bumped by any change
/// that an older peer would misread (see `PROTOCOL.md`, "Stability").
pub const PROTOCOL_VERSION: u16 = 5;

/// Bytes of CRC after each message.
pub const CRC_LEN: usize = 4;

/// Length of the LEB128 varint encoding of `v`, as postcard writes
/// `u16`/`u32`/`u64` and lengths.
pub const fn varint_len(v: u64) -> usize {
    let mut n = 1;
    let mut v = v >> 7;
    while v != 0 {
        n += 1;
        v >>= 7;
    }
    n
}

const fn max(a: usize, b: usize) -> usize {
    if a > b {
        a
    } else {
        b
    }
}

/// Longest postcard encoding of a [`HostMsg`]: a full sample (variant,
/// index, length, `MAX_FEATURES` × 4 bytes) or a full chunk (variant,
/// offset, length, `MAX_CHUNK` bytes), whichever is longer.
pub const MAX_HOST_MESSAGE: usize = max(
    1 + varint_len(u32::MAX as u64) + varint_len(MAX_FEATURES as u64) + 4 * MAX_FEATURES,
    1 + varint_len(u32::MAX as u64) + varint_len(MAX_CHUNK as u64) + MAX_CHUNK,
);

/// Bound on the postcard encoding of a [`DeviceFrame`] (the longest, a drift
/// raised message with all ten crossings, takes 146 bytes, and a feature echo
/// of [`ECHO_CHUNK`] values 142; tests check every variant at its worst).
pub const MAX_DEVICE_MESSAGE: usize = 146;

/// Longest host → device frame, delimiter included.
pub const MAX_HOST_FRAME: usize = max_frame_len(MAX_HOST_MESSAGE);
/// Longest device → host frame, delimiter included.
pub const MAX_DEVICE_FRAME: usize = max_frame_len(MAX_DEVICE_MESSAGE);

/// Stream decoder a device uses for host frames.
pub type HostFrameDecoder = FrameDecoder<{ MAX_HOST_MESSAGE + CRC_LEN }>;
/// Stream decoder a host uses for device frames.
pub type DeviceFrameDecoder = FrameDecoder<{ MAX_DEVICE_MESSAGE + CRC_LEN }>;

/// CRC-32/ISO-HDLC of `bytes` (frames and whole-file upload checks): the
/// model file's CRC.
pub use crate::file::crc32;

/// Serial-number order on wrapping `u32` sequence numbers: whether `seq`
/// is `from` or comes after it, i.e. `seq − from (mod 2³²) < 2³¹`.
pub const fn seq_at_or_after(seq: u32, from: u32) -> bool {
    seq.wrapping_sub(from) < 0x8000_0000
}
