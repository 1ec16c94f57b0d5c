//! Arbitrary bytes, in arbitrary chunkings, through the device-side decoder
//! of host frames and the host-side decoder of device frames.
//!
//! * No input panics.
//! * The chunking does not matter: a decoder fed in random pieces gives the
//!   same results as one fed everything at once, and as `decode_frame` on
//!   each zero-delimited piece.
//! * Every accepted message re-encodes to canonical bytes, no longer than
//!   those it came from (equal when those were canonical), and its frame
//!   decodes back to it.
//! * The counters add up to the results handed out.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_fuzz::Chunker;
use plumb_model::wire::{
    cobs, crc32, decode_frame, encode_frame_vec, DeviceFrame, FrameDecoder, FrameError, HostMsg,
    LinkCounters, CRC_LEN, MAX_DEVICE_MESSAGE, MAX_HOST_MESSAGE,
};
use serde::{de::DeserializeOwned, Serialize};

type Raw = Result<Vec<u8>, FrameError>;

/// Everything a decoder hands out for `input` read in pieces from `chunks`
/// (`None`: all at once), through `take`.
fn raw_results<const N: usize>(
    input: &[u8],
    chunks: Option<&mut Chunker>,
) -> (Vec<Raw>, LinkCounters) {
    let mut dec = FrameDecoder::<N>::new();
    let mut out = Vec::new();
    let mut pieces: Vec<&[u8]> = Vec::new();
    match chunks {
        None => pieces.push(input),
        Some(c) => {
            let mut rest = input;
            while !rest.is_empty() {
                let n = c.next_len().min(rest.len());
                pieces.push(&rest[..n]);
                rest = &rest[n..];
            }
        }
    }
    for piece in pieces {
        let mut rest = piece;
        loop {
            rest = dec.feed(rest);
            match dec.take() {
                Some(r) => out.push(r.map(<[u8]>::to_vec)),
                None if rest.is_empty() => break,
                None => {}
            }
        }
    }
    (out, dec.counters())
}

/// Same input through `take_message::<M>`.
fn msg_results<const N: usize, M: DeserializeOwned>(input: &[u8]) -> Vec<Result<M, FrameError>> {
    let mut dec = FrameDecoder::<N>::new();
    let mut out = Vec::new();
    let mut rest = input;
    loop {
        rest = dec.feed(rest);
        match dec.take_message::<M>() {
            Some(r) => out.push(r),
            None if rest.is_empty() => break,
            None => {}
        }
    }
    out
}

fn check<const N: usize, M>(input: &[u8], seed: u64, max_chunk: usize)
where
    M: DeserializeOwned + Serialize + core::fmt::Debug,
{
    let (whole, counters) = raw_results::<N>(input, None);
    let mut chunker = Chunker::new(seed, max_chunk);
    let (pieces, counters2) = raw_results::<N>(input, Some(&mut chunker));
    assert_eq!(whole, pieces, "chunking changed the frames");
    assert_eq!(counters, counters2, "chunking changed the counters");

    // Counters: every result handed out is counted once (`take` counts a
    // good frame as ok even when it would not decode as a message).
    let errors = counters.crc_errors + counters.framing_errors + counters.overflows;
    assert_eq!(counters.undecodable, 0);
    assert_eq!((counters.frames_ok + errors) as usize, whole.len());

    // Each zero-delimited piece through the one-shot decoder. A piece that
    // overflowed is dropped up to the next zero by the stream decoder, so
    // compare only while no overflow happened.
    if counters.overflows == 0 {
        let mut scratch = vec![0u8; N];
        let complete: Vec<&[u8]> = {
            let mut v: Vec<&[u8]> = input.split(|&b| b == 0).collect();
            v.pop(); // the tail after the last zero is not a frame yet
            v.into_iter().filter(|p| !p.is_empty()).collect()
        };
        assert_eq!(complete.len(), whole.len(), "frame count");
        for (piece, got) in complete.iter().zip(&whole) {
            let one = decode_frame::<M>(piece, &mut scratch);
            match (got, one) {
                (Ok(bytes), Ok(msg)) => {
                    let re = postcard::to_allocvec(&msg).expect("encodes");
                    assert!(re.len() <= bytes.len());
                }
                (Ok(bytes), Err(FrameError::Undecodable)) => {
                    assert!(
                        postcard::from_bytes::<M>(bytes).is_err() || {
                            // Decodes, but leaves bytes over.
                            postcard::take_from_bytes::<M>(bytes)
                                .map(|(_, rest)| !rest.is_empty())
                                .unwrap_or(true)
                        }
                    );
                }
                (Err(a), Err(b)) => assert_eq!(*a, b, "error kinds differ"),
                (a, b) => panic!("stream {a:?} vs one-shot {b:?}"),
            }
        }
    }

    // Messages: whatever decodes re-encodes to the same bytes, and its frame
    // decodes to the same message again.
    let msgs = msg_results::<N, M>(input);
    assert_eq!(msgs.len(), whole.len());
    for (m, raw) in msgs.iter().zip(&whole) {
        match (m, raw) {
            (Ok(msg), Ok(bytes)) => {
                // Canonical re-encoding: no longer than the bytes read
                // (postcard also reads varints with redundant continuation
                // bytes), and decoding it gives the same canonical bytes.
                let re = postcard::to_allocvec(msg).expect("encodes");
                assert!(re.len() <= bytes.len(), "re-encoding grew: {msg:?}");
                let canon: M = postcard::from_bytes(&re).expect("own bytes");
                assert_eq!(postcard::to_allocvec(&canon).expect("encodes"), re);
                let frame = encode_frame_vec(msg);
                assert_eq!(frame.last(), Some(&0));
                assert!(frame[..frame.len() - 1].iter().all(|&b| b != 0));
                let mut scratch = vec![0u8; frame.len()];
                let back = decode_frame::<M>(&frame, &mut scratch).expect("own frame");
                let again = postcard::to_allocvec(&back).expect("encodes");
                assert_eq!(again, re, "frame round trip");
                assert!(
                    re.len() + CRC_LEN <= N,
                    "accepted a message over its buffer"
                );
            }
            (Err(FrameError::Undecodable), Ok(_)) => {}
            (Err(a), Err(b)) => assert_eq!(a, b),
            (a, b) => panic!("take_message {a:?} vs take {b:?}"),
        }
    }
}

/// A frame's CRC-32 is out of a fuzzer's reach: in this mode the input is
/// pieces `len, bytes` that become whole frames (CRC and COBS added here),
/// except `len` 255, which puts the next 8 bytes on the stream as they are.
fn framed(mut data: &[u8]) -> Vec<u8> {
    let mut out = Vec::new();
    while let Some((&len, rest)) = data.split_first() {
        let n = if len == 255 { 8 } else { usize::from(len) }.min(rest.len());
        let (piece, rest) = rest.split_at(n);
        data = rest;
        if len == 255 {
            out.extend_from_slice(piece);
            continue;
        }
        let mut body = piece.to_vec();
        body.extend_from_slice(&crc32(piece).to_le_bytes());
        let mut enc = vec![0u8; cobs::max_encoded_len(body.len())];
        let k = cobs::encode(&body, &mut enc).expect("room");
        out.extend_from_slice(&enc[..k]);
        out.push(0);
    }
    out
}

fuzz_target!(|data: &[u8]| {
    // First bytes: chunking seed and mode with the largest piece; the rest
    // is the stream (or, with the mode's top bit, pieces to frame).
    if data.len() < 2 {
        return;
    }
    let (head, rest) = data.split_at(2);
    let seed = u64::from(head[0]);
    let max_chunk = usize::from(head[1] % 64) + 1;
    let built;
    let input = if head[1] & 0x80 != 0 {
        built = framed(rest);
        &built[..]
    } else {
        rest
    };
    check::<{ MAX_HOST_MESSAGE + CRC_LEN }, HostMsg>(input, seed, max_chunk);
    check::<{ MAX_DEVICE_MESSAGE + CRC_LEN }, DeviceFrame>(input, seed, max_chunk);
});
