//! Regression tests, each named after what it pins. Found by the fuzz
//! targets in `fuzz/` (see RELIABILITY.md); the inputs are rebuilt here by
//! hand so each test reads on its own.

#[path = "support/mod.rs"]
mod support;

use plumb_model::file::{self, ModelFile};
use plumb_model::wire::{self, cobs, HostFrameDecoder, HostMsg};
use plumb_model::{Capacity, ModelOwned};

/// Frames `message` bytes as a sender would: COBS(message ‖ CRC-32) 0x00.
fn frame_bytes(message: &[u8]) -> Vec<u8> {
    let mut body = message.to_vec();
    body.extend_from_slice(&wire::crc32(message).to_le_bytes());
    let mut out = vec![0u8; cobs::max_encoded_len(body.len()) + 1];
    let n = cobs::encode(&body, &mut out).unwrap();
    out.truncate(n);
    out.push(0);
    out
}

/// postcard reads a varint with redundant continuation bytes (`FA 00` for
/// 122) as the same number. The `frame_decoder` and `model_decode` fuzz
/// targets first assumed that every accepted message re-encodes to the very
/// bytes it came from, and found this. It is accepted on purpose: the value
/// is the same, nothing compares encodings, and the CRC (and a signature)
/// covers the bytes as sent. Pinned: such a frame decodes to the same
/// message, and re-encoding gives the shortest form.
#[test]
fn overlong_varint_in_a_frame_reads_as_the_same_message() {
    let msg = HostMsg::ResendFrom { seq: 122 };
    let canonical = postcard::to_allocvec(&msg).unwrap();
    assert_eq!(canonical, [2, 122]);
    let padded = [2u8, 0xFA, 0x00];
    let mut dec = HostFrameDecoder::new();
    let frame = frame_bytes(&padded);
    let rest = dec.feed(&frame);
    assert!(rest.is_empty());
    assert_eq!(dec.take_message::<HostMsg>(), Some(Ok(msg.clone())));
    assert_eq!(wire::encode_frame_vec(&msg), frame_bytes(&canonical));
}

/// The same in a model file: `dims.features` (4) written as `84 00` gives
/// the same model through both readers, and re-encoding gives the file a
/// host writes (one byte shorter).
#[test]
fn overlong_varint_in_a_model_payload_reads_as_the_same_model() {
    let model = support::example_model(4, 2, 2, 7);
    let canonical = ModelFile {
        model: model.clone(),
        labels: vec![],
    }
    .to_bytes()
    .unwrap();
    let payload = postcard::to_allocvec(&model).unwrap();
    let at = postcard::to_allocvec(&model.meta).unwrap().len();
    assert_eq!(payload[at], 4, "dims.features follows the metadata");
    let mut padded = payload[..at].to_vec();
    padded.extend([0x84, 0x00]);
    padded.extend(&payload[at + 1..]);
    let mut bytes = vec![0u8; padded.len() + 64];
    let n = file::frame_into(&padded, &[], &mut bytes).unwrap();
    bytes.truncate(n);

    let device = file::decode(&bytes, &Capacity::DEVICE).unwrap();
    assert_eq!(ModelOwned::from(&device), model);
    let host = ModelFile::from_bytes(&bytes).unwrap();
    assert_eq!(host.model, model);
    assert_eq!(host.to_bytes().unwrap(), canonical);
    let mut out = vec![0u8; bytes.len()];
    let k = file::encode_into(&device, &mut out).unwrap();
    assert_eq!(&out[..k], &canonical[..]);
    assert_eq!(k + 1, bytes.len());
}
