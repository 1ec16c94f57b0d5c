//! Frames: `COBS(postcard(message) ‖ CRC-32 LE) 0x00`, an encoder into a
//! caller's buffer and a stream decoder with a fixed buffer.

use super::cobs::{self, Step};
use super::ser;
use super::{crc32, LinkCounters, CRC_LEN};
use core::fmt;
use serde::{de::DeserializeOwned, Serialize};

/// Longest frame, delimiter included, for a message of at most `message`
/// postcard bytes.
pub const fn max_frame_len(message: usize) -> usize {
    cobs::max_encoded_len(message + CRC_LEN) + 1
}

/// Why a frame could not be written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum EncodeError {
    /// The output buffer is too small for this message.
    BufferTooSmall,
}

impl fmt::Display for EncodeError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("frame buffer too small for the message")
    }
}

impl core::error::Error for EncodeError {}

/// Writes `msg` as one complete frame (delimiter included) into `out`;
/// returns the frame length. No allocation and no copy: the message is
/// serialised [`cobs::in_place_offset`]`(out.len())` bytes into `out`, far
/// enough for any body that fits `out`, its CRC appended, and the whole
/// stuffed in place towards the front.
pub fn encode_frame<M: Serialize + ?Sized>(msg: &M, out: &mut [u8]) -> Result<usize, EncodeError> {
    let start = cobs::in_place_offset(out.len());
    let room = out.get_mut(start..).ok_or(EncodeError::BufferTooSmall)?;
    let n = ser::to_slice(msg, room).map_err(|_| EncodeError::BufferTooSmall)?;
    if out.len() < max_frame_len(n) {
        return Err(EncodeError::BufferTooSmall);
    }
    // `out.len() − start ≥ n + CRC_LEN` whenever `out` holds the longest
    // frame of `n` bytes, so the CRC fits behind the message.
    let body = n + CRC_LEN;
    let message = out
        .get(start..start + n)
        .ok_or(EncodeError::BufferTooSmall)?;
    let crc = crc32(message);
    out.get_mut(start + n..start + body)
        .ok_or(EncodeError::BufferTooSmall)?
        .copy_from_slice(&crc.to_le_bytes());
    let len = cobs::encode_in_place(out, start, body).map_err(|_| EncodeError::BufferTooSmall)?;
    *out.get_mut(len).ok_or(EncodeError::BufferTooSmall)? = 0;
    Ok(len + 1)
}

/// [`encode_frame`] of a device frame `(seq, msg)` (encoded exactly like
/// `DeviceFrame { seq, msg }`). Not generic, so it is compiled once, with
/// this crate's settings, whichever crate calls it.
#[inline(never)]
pub fn encode_device_frame(
    seq: u32,
    msg: &super::DeviceMsg,
    out: &mut [u8],
) -> Result<usize, EncodeError> {
    encode_frame(&(seq, msg), out)
}

/// Encodes a frame into a new vector (host convenience).
#[cfg(feature = "alloc")]
pub fn encode_frame_vec<M: Serialize + ?Sized>(msg: &M) -> alloc::vec::Vec<u8> {
    // A postcard encoding can only fail for lack of room, and the buffer is
    // sized from the exact length.
    let n = postcard::experimental::serialized_size(msg).unwrap_or(0);
    let mut out = alloc::vec![0u8; max_frame_len(n)];
    let len = encode_frame(msg, &mut out).unwrap_or(0);
    out.truncate(len);
    out
}

/// Why an incoming frame was dropped. Each has its own counter in
/// [`LinkCounters`].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum FrameError {
    /// The frame is longer than the receive buffer; bytes up to the next zero
    /// are discarded.
    Overflow,
    /// The COBS encoding ends inside a block.
    Cobs,
    /// The frame is too short to hold a CRC.
    Short,
    /// The CRC-32 does not match.
    Crc,
    /// The CRC matches but the bytes are not a valid message (unknown
    /// variant, bad length, trailing bytes, ...).
    Undecodable,
}

impl fmt::Display for FrameError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(match self {
            FrameError::Overflow => "frame longer than the receive buffer",
            FrameError::Cobs => "broken COBS encoding",
            FrameError::Short => "frame too short for its CRC",
            FrameError::Crc => "frame CRC-32 mismatch",
            FrameError::Undecodable => "frame does not decode to a message",
        })
    }
}

impl core::error::Error for FrameError {}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Mode {
    /// Collecting bytes of a frame.
    Collecting,
    /// After an overflow: dropping bytes up to the next zero.
    Discarding,
}

/// Stream decoder of frames: feed bytes as they arrive, take frames as they
/// complete.
///
/// `N` is the largest decoded frame (message bytes plus the 4 CRC bytes).
/// Bytes are un-stuffed as they arrive, so the buffer holds decoded bytes
/// only. After garbage or an error the decoder resynchronises at the next
/// zero byte. Empty frames (two zeros in a row) are ignored, so a sender may
/// start with a zero to flush a half-received frame. No input, in any
/// chunking, makes it panic.
///
/// ```
/// use plumb_model::wire::{encode_frame, FrameDecoder, HostMsg};
/// let mut buf = [0u8; 32];
/// let n = encode_frame(&HostMsg::StatusQuery, &mut buf).unwrap();
/// let mut dec = FrameDecoder::<64>::new();
/// let mut rest = &buf[..n];
/// loop {
///     rest = dec.feed(rest);
///     match dec.take_message::<HostMsg>() {
///         Some(msg) => assert_eq!(msg, Ok(HostMsg::StatusQuery)),
///         None if rest.is_empty() => break,
///         None => {}
///     }
/// }
/// ```
#[derive(Debug, Clone)]
pub struct FrameDecoder<const N: usize> {
    buf: [u8; N],
    len: usize,
    cobs: cobs::Decoder,
    mode: Mode,
    ready: Option<Result<usize, FrameError>>,
    counters: LinkCounters,
}

impl<const N: usize> Default for FrameDecoder<N> {
    fn default() -> Self {
        Self::new()
    }
}

impl<const N: usize> FrameDecoder<N> {
    /// An empty decoder.
    pub const fn new() -> Self {
        FrameDecoder {
            buf: [0; N],
            len: 0,
            cobs: cobs::Decoder::new(),
            mode: Mode::Collecting,
            ready: None,
            counters: LinkCounters {
                frames_ok: 0,
                crc_errors: 0,
                framing_errors: 0,
                overflows: 0,
                undecodable: 0,
            },
        }
    }

    /// Consumes bytes from `input` until a frame (or a frame error) is ready
    /// or the input is used up; returns the unconsumed rest. While a result
    /// waits to be taken, nothing is consumed.
    pub fn feed<'a>(&mut self, input: &'a [u8]) -> &'a [u8] {
        for (i, &b) in input.iter().enumerate() {
            if self.ready.is_some() {
                return input.get(i..).unwrap_or(&[]);
            }
            self.byte(b);
        }
        &[]
    }

    /// Whether a frame or an error waits to be taken.
    pub fn is_ready(&self) -> bool {
        self.ready.is_some()
    }

    /// Takes the completed frame's message bytes (CRC checked and removed),
    /// or the error that ended it. Counts a good frame in
    /// [`LinkCounters::frames_ok`].
    pub fn take(&mut self) -> Option<Result<&[u8], FrameError>> {
        let r = self.take_raw()?;
        if r.is_ok() {
            self.counters.frames_ok = self.counters.frames_ok.wrapping_add(1);
        }
        Some(r.and_then(|n| self.buf.get(..n).ok_or(FrameError::Overflow)))
    }

    /// Takes the completed frame decoded as a message `M`. A frame whose
    /// bytes are not exactly one `M` is [`FrameError::Undecodable`].
    pub fn take_message<M: DeserializeOwned>(&mut self) -> Option<Result<M, FrameError>> {
        let n = match self.take_raw()? {
            Ok(n) => n,
            Err(e) => return Some(Err(e)),
        };
        let bytes = self.buf.get(..n).unwrap_or(&[]);
        match postcard::take_from_bytes::<M>(bytes) {
            Ok((msg, [])) => {
                self.counters.frames_ok = self.counters.frames_ok.wrapping_add(1);
                Some(Ok(msg))
            }
            _ => {
                self.counters.undecodable = self.counters.undecodable.wrapping_add(1);
                Some(Err(FrameError::Undecodable))
            }
        }
    }

    /// Counts a frame as undecodable; for callers of [`Self::take`] that
    /// decode the bytes themselves. (The frame was counted as good by
    /// `take`; this moves it.)
    pub fn note_undecodable(&mut self) {
        self.counters.frames_ok = self.counters.frames_ok.wrapping_sub(1);
        self.counters.undecodable = self.counters.undecodable.wrapping_add(1);
    }

    /// Counters since creation.
    pub fn counters(&self) -> LinkCounters {
        self.counters
    }

    /// Drops any partial frame and pending result (counters are kept).
    pub fn clear(&mut self) {
        self.restart();
        self.mode = Mode::Collecting;
        self.ready = None;
    }

    fn take_raw(&mut self) -> Option<Result<usize, FrameError>> {
        self.ready.take()
    }

    fn restart(&mut self) {
        self.len = 0;
        self.cobs = cobs::Decoder::new();
    }

    fn fail(&mut self, e: FrameError) {
        let c = &mut self.counters;
        let slot = match e {
            FrameError::Overflow => &mut c.overflows,
            FrameError::Cobs | FrameError::Short => &mut c.framing_errors,
            FrameError::Crc => &mut c.crc_errors,
            FrameError::Undecodable => &mut c.undecodable,
        };
        *slot = slot.wrapping_add(1);
        self.ready = Some(Err(e));
    }

    fn push(&mut self, v: u8) -> bool {
        match self.buf.get_mut(self.len) {
            Some(slot) => {
                *slot = v;
                self.len += 1;
                true
            }
            None => false,
        }
    }

    fn byte(&mut self, b: u8) {
        if self.mode == Mode::Discarding {
            if b == 0 {
                self.mode = Mode::Collecting;
                self.restart();
            }
            return;
        }
        if b == 0 {
            self.end_frame();
            return;
        }
        let fits = match self.cobs.byte(b) {
            Ok(Step::Skip) => true,
            Ok(Step::Zero) => self.push(0),
            Ok(Step::Data(v)) => self.push(v),
            // Unreachable: zero bytes are handled above.
            Err(_) => true,
        };
        if !fits {
            self.mode = Mode::Discarding;
            self.restart();
            self.fail(FrameError::Overflow);
        }
    }

    fn end_frame(&mut self) {
        let started = self.cobs.started();
        let complete = self.cobs.finish().is_ok();
        let len = self.len;
        self.restart();
        if !started {
            return; // empty frame: a flush, not an error
        }
        if !complete {
            return self.fail(FrameError::Cobs);
        }
        let Some(body) = len.checked_sub(CRC_LEN) else {
            return self.fail(FrameError::Short);
        };
        let (Some(msg), Some(tail)) = (self.buf.get(..body), self.buf.get(body..len)) else {
            return self.fail(FrameError::Short);
        };
        let Ok(stored) = <[u8; CRC_LEN]>::try_from(tail) else {
            return self.fail(FrameError::Short);
        };
        if crc32(msg) != u32::from_le_bytes(stored) {
            return self.fail(FrameError::Crc);
        }
        self.ready = Some(Ok(body));
    }
}

/// Decodes one complete frame held in `frame` (with or without its trailing
/// zero) as a message `M`, using `scratch` for the un-stuffed bytes.
pub fn decode_frame<M: DeserializeOwned>(
    frame: &[u8],
    scratch: &mut [u8],
) -> Result<M, FrameError> {
    let frame = match frame.split_last() {
        Some((0, body)) => body,
        _ => frame,
    };
    let n = cobs::decode(frame, scratch).map_err(|e| match e {
        cobs::CobsError::BufferTooSmall => FrameError::Overflow,
        _ => FrameError::Cobs,
    })?;
    let body = n.checked_sub(CRC_LEN).ok_or(FrameError::Short)?;
    let (msg, tail) = scratch.get(..n).ok_or(FrameError::Overflow)?.split_at(body);
    let stored = <[u8; CRC_LEN]>::try_from(tail).map_err(|_| FrameError::Short)?;
    if crc32(msg) != u32::from_le_bytes(stored) {
        return Err(FrameError::Crc);
    }
    match postcard::take_from_bytes::<M>(msg) {
        Ok((m, [])) => Ok(m),
        _ => Err(FrameError::Undecodable),
    }
}
