//! The resend ring: retained event frames, stored as the bytes sent.
//!
//! A retained message is kept as its finished frame (COBS, CRC and
//! delimiter included), so a resend writes the same bytes again and the ring
//! costs what the frames cost. With its 5-byte record header a sensor fault
//! takes 16–24 bytes, a drift cleared 14–22 and a drift raised 53–141 (one
//! to nine charts over their limits; pinned by the endpoint test
//! `retained_frames_cost_what_the_docs_say`), where a ring of decoded
//! messages would spend a `DeviceMsg` value's 176 bytes on each (the enum
//! is as large as its largest variant; encoded, a message is at most
//! `MAX_DEVICE_MESSAGE`, 144 bytes). Records
//! are `[frame length: u8][sequence number: u32 LE][frame]`, laid one after
//! the other around an `N`-byte buffer (a record may wrap past the end).
//! Room for a new record is made by dropping the oldest ones.

/// Bytes before each stored frame: its length and its sequence number.
pub(crate) const RECORD_HEADER: usize = 5;

/// Frames of retained messages in `N` bytes, oldest first.
pub(crate) struct FrameRing<const N: usize> {
    buf: [u8; N],
    /// Index of the oldest record's first byte, or of the next record's
    /// when empty (`< N`).
    start: usize,
    /// Bytes in use (`≤ N`).
    used: usize,
    /// Records in use.
    count: usize,
    /// Sequence number of the newest record, while there is one.
    newest: Option<u32>,
}

/// One stored frame: its sequence number and its bytes, in at most two
/// pieces (the second is empty unless the frame wraps).
pub(crate) struct Record<'a> {
    pub seq: u32,
    pub head: &'a [u8],
    pub tail: &'a [u8],
}

impl<const N: usize> FrameRing<N> {
    /// No records; all zero, so a static holding it lands in `.bss`.
    pub const EMPTY: Self = FrameRing {
        buf: [0; N],
        start: 0,
        used: 0,
        count: 0,
        newest: None,
    };

    /// `i` taken modulo `N`, for `i < 2N` (no division, no panic for `N = 0`).
    fn wrap(i: usize) -> usize {
        if i >= N {
            i - N
        } else {
            i
        }
    }

    fn byte(&self, rel: usize) -> u8 {
        self.buf
            .get(Self::wrap(self.start + rel))
            .copied()
            .unwrap_or(0)
    }

    fn seq_at(&self, rel: usize) -> u32 {
        u32::from_le_bytes([1, 2, 3, 4].map(|k| self.byte(rel + k)))
    }

    /// Bytes `[at, at + len)` of the buffer, `at < N`, `len ≤ N`, in at
    /// most two pieces.
    fn pieces(&self, at: usize, len: usize) -> (&[u8], &[u8]) {
        let first = len.min(N - at);
        let head = self.buf.get(at..at + first).unwrap_or(&[]);
        let tail = self.buf.get(..len - first).unwrap_or(&[]);
        (head, tail)
    }

    /// Records stored.
    pub fn len(&self) -> usize {
        self.count
    }

    /// Sequence number of the oldest record.
    pub fn oldest(&self) -> Option<u32> {
        (self.count > 0).then(|| self.seq_at(0))
    }

    /// Sequence number of the newest record.
    pub fn newest(&self) -> Option<u32> {
        self.newest
    }

    /// Drops the oldest record; `false` when there was none.
    pub fn pop_oldest(&mut self) -> bool {
        if self.count == 0 {
            return false;
        }
        let size = (RECORD_HEADER + usize::from(self.byte(0))).min(self.used);
        self.used -= size;
        self.count -= 1;
        self.start = Self::wrap(self.start + size);
        if self.count == 0 {
            self.newest = None;
        }
        true
    }

    /// Stores a frame as the newest record, dropping the oldest records
    /// until it fits; returns how many were dropped. A frame that cannot
    /// fit even in an empty ring (or is longer than 255 bytes) is not
    /// stored and nothing is dropped: `Err(())`.
    pub fn push(&mut self, seq: u32, frame: &[u8]) -> Result<u32, ()> {
        let size = RECORD_HEADER + frame.len();
        let Ok(len) = u8::try_from(frame.len()) else {
            return Err(());
        };
        if size > N {
            return Err(());
        }
        let mut dropped = 0u32;
        while N - self.used < size && self.pop_oldest() {
            dropped += 1;
        }
        let seq = seq.to_le_bytes();
        let header = [len, seq[0], seq[1], seq[2], seq[3]];
        let mut at = Self::wrap(self.start + self.used);
        for b in header.iter().chain(frame) {
            if let Some(d) = self.buf.get_mut(at) {
                *d = *b;
            }
            at = Self::wrap(at + 1);
        }
        self.used += size;
        self.count += 1;
        self.newest = Some(u32::from_le_bytes(seq));
        Ok(dropped)
    }

    /// The records, oldest first.
    pub fn iter(&self) -> impl Iterator<Item = Record<'_>> {
        let mut rel = 0usize;
        let mut left = self.count;
        core::iter::from_fn(move || {
            if left == 0 || rel + RECORD_HEADER > self.used {
                return None;
            }
            left -= 1;
            let len = usize::from(self.byte(rel));
            let seq = self.seq_at(rel);
            let at = Self::wrap(self.start + rel + RECORD_HEADER);
            let len = len.min(self.used - rel - RECORD_HEADER);
            let (head, tail) = self.pieces(at, len);
            rel += RECORD_HEADER + len;
            Some(Record { seq, head, tail })
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use heapless::{Deque, Vec};

    type Frame = (u32, Vec<u8, 64>);
    type Frames = Vec<Frame, 32>;

    fn frame(seq: u32, bytes: &[u8]) -> Frame {
        (seq, Vec::from_slice(bytes).unwrap())
    }

    fn frames<const N: usize>(r: &FrameRing<N>) -> Frames {
        let mut out = Frames::new();
        for rec in r.iter() {
            let (seq, mut bytes) = frame(rec.seq, rec.head);
            bytes.extend_from_slice(rec.tail).unwrap();
            out.push((seq, bytes)).unwrap();
        }
        out
    }

    #[test]
    fn keeps_frames_in_order_across_the_wrap() {
        // Records of 5 + 6 bytes in 40: three fit, and the fourth wraps
        // past the end.
        let mut r = FrameRing::<40>::EMPTY;
        let mut want: Deque<Frame, 4> = Deque::new();
        let mut dropped = 0;
        for i in 0..20u32 {
            let bytes = [0, 1, 2, 3, 4, 5].map(|k| (i * 7 + k) as u8);
            dropped += r.push(1000 + i, &bytes).unwrap();
            if want.is_full() {
                want.pop_front();
            }
            want.push_back(frame(1000 + i, &bytes)).unwrap();
            if want.len() > 3 {
                want.pop_front();
            }
            assert!(frames(&r).iter().eq(want.iter()), "after {i}");
            assert_eq!(r.len(), want.len());
            assert_eq!(r.oldest(), want.front().map(|f| f.0));
            assert_eq!(r.newest(), Some(1000 + i));
        }
        assert_eq!(dropped, 17);
    }

    #[test]
    fn mixed_lengths_drop_only_what_is_needed() {
        let mut r = FrameRing::<64>::EMPTY;
        assert_eq!(r.push(1, &[1; 10]), Ok(0)); // 15 bytes in use
        assert_eq!(r.push(2, &[2; 3]), Ok(0)); // 23
        assert_eq!(r.push(3, &[3; 30]), Ok(0)); // 58
                                                // 6 left: a 20-byte frame (25) drops the first two (15 + 8 → 29 free).
        assert_eq!(r.push(4, &[4; 20]), Ok(2));
        assert_eq!(frames(&r), [frame(3, &[3; 30]), frame(4, &[4; 20])]);
        // The largest frame that fits at all empties the ring.
        assert_eq!(r.push(5, &[5; 59]), Ok(2));
        assert_eq!(frames(&r), [frame(5, &[5; 59])]);
        // Too large for the ring: refused, nothing dropped.
        assert_eq!(r.push(6, &[6; 60]), Err(()));
        assert_eq!(frames(&r), [frame(5, &[5; 59])]);
        assert!(r.pop_oldest());
        assert!(!r.pop_oldest());
        assert_eq!((r.len(), r.oldest(), r.newest()), (0, None, None));
        assert!(frames(&r).is_empty());
    }

    #[test]
    fn frames_over_255_bytes_and_empty_rings_refuse() {
        let mut big = FrameRing::<600>::EMPTY;
        assert_eq!(big.push(1, &[0; 256]), Err(()));
        assert_eq!(big.push(1, &[0; 255]), Ok(0));
        let mut none = FrameRing::<0>::EMPTY;
        assert_eq!(none.push(1, &[]), Err(()));
        assert_eq!(none.len(), 0);
    }

    #[test]
    fn every_start_offset_and_length_round_trips() {
        // Against a plain model of the ring (a queue of frames and a byte
        // budget), over many pushes of lengths 0..=40 into 97 bytes.
        let mut r = FrameRing::<97>::EMPTY;
        let mut model: Deque<Frame, 32> = Deque::new();
        let mut x = 12345u32;
        for i in 0..2000u32 {
            x = x.wrapping_mul(1_103_515_245).wrapping_add(12_345);
            let len = (x >> 16) as usize % 41;
            let bytes: Vec<u8, 64> = (0..len).map(|k| (x as usize + k) as u8).collect();
            let cost = |f: &Frame| f.1.len() + RECORD_HEADER;
            let mut budget: usize = model.iter().map(cost).sum();
            let mut want_dropped = 0;
            while 97 - budget < len + RECORD_HEADER {
                let f = model.pop_front().unwrap();
                budget -= cost(&f);
                want_dropped += 1;
            }
            model.push_back((i, bytes.clone())).unwrap();
            assert_eq!(r.push(i, &bytes), Ok(want_dropped));
            assert!(frames(&r).iter().eq(model.iter()), "after {i}");
        }
    }
}
