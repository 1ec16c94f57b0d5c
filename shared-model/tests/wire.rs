//! The wire protocol: COBS, exact frame bytes, round trips, and a decoder
//! that survives any byte stream.

use plumb_model::signature::KeyId;
use plumb_model::wire::{
    self, cobs, decode_frame, encode_frame, Ack, Crossing, DeviceFrame, DeviceFrameDecoder,
    DeviceMsg, DriftCleared, DriftRaised, EchoValues, FaultKind, FaultTally, FeatureEcho,
    FrameDecoder, FrameError, Greeting, HostFrameDecoder, HostMsg, Level, LinkCounters, Reason,
    Refusal, Request, ResendDone, ScoreKind, ScoreReport, ScoreTriple, SensorFault, Share, Slot,
    State, Statistic, Status, ECHO_CHUNK, MAX_CHUNK, MAX_CROSSINGS, MAX_DEVICE_FRAME,
    MAX_DEVICE_MESSAGE, MAX_HOST_FRAME, MAX_HOST_MESSAGE,
};
use plumb_model::{Capacity, Dim, Dims, Field, ModelError, MAX_FEATURES};
use proptest::prelude::*;

/// Encodes a frame into a vector (the crate's own `encode_frame_vec` needs
/// the `alloc` feature; this works in any build).
fn encode_frame_vec<M: serde::Serialize>(msg: &M) -> Vec<u8> {
    let mut out = vec![0u8; 1024];
    let n = encode_frame(msg, &mut out).expect("room");
    out.truncate(n);
    out
}

fn hex(s: &str) -> Vec<u8> {
    s.split_whitespace()
        .map(|b| u8::from_str_radix(b, 16).expect("hex byte"))
        .collect()
}

fn show(bytes: &[u8]) -> String {
    bytes
        .iter()
        .map(|b| format!("{b:02x}"))
        .collect::<Vec<_>>()
        .join(" ")
}

/// A COBS encoder written as plainly as possible, to check the in-place one.
fn reference_cobs(data: &[u8]) -> Vec<u8> {
    let mut out = Vec::new();
    let mut block: Vec<u8> = Vec::new();
    let mut last_full = false;
    for &b in data {
        last_full = false;
        if b == 0 {
            out.push(block.len() as u8 + 1);
            out.append(&mut block);
        } else {
            block.push(b);
            if block.len() == 254 {
                out.push(0xFF);
                out.append(&mut block);
                last_full = true;
            }
        }
    }
    if !last_full {
        out.push(block.len() as u8 + 1);
        out.extend_from_slice(&block);
    }
    out
}

fn cobs_roundtrip(data: &[u8]) {
    let mut enc = vec![0u8; cobs::max_encoded_len(data.len())];
    let n = cobs::encode(data, &mut enc).expect("room");
    let enc = &enc[..n];
    assert_eq!(enc, &reference_cobs(data)[..], "input {}", show(data));
    assert!(!enc.contains(&0), "zero in encoding of {}", show(data));
    let mut dec = vec![0u8; data.len().max(1)];
    let m = cobs::decode(enc, &mut dec).expect("decodes");
    assert_eq!(&dec[..m], data);
}

mod cobs_codec {
    use super::*;

    #[test]
    fn hand_vectors() {
        // Worked from the block definition in wire/cobs.rs.
        let cases: [(&[u8], &str); 6] = [
            (&[], "01"),
            (&[0x00], "01 01"),
            (&[0x00, 0x00], "01 01 01"),
            (&[0x11, 0x22, 0x00, 0x33], "03 11 22 02 33"),
            (&[0x11, 0x22, 0x33, 0x44], "05 11 22 33 44"),
            (&[0x11, 0x00, 0x00, 0x00], "02 11 01 01 01"),
        ];
        for (raw, enc) in cases {
            let mut out = [0u8; 16];
            let n = cobs::encode(raw, &mut out).unwrap();
            assert_eq!(show(&out[..n]), enc);
        }
    }

    #[test]
    fn long_runs_at_block_boundaries() {
        // 254 non-zero bytes fill one block exactly: code FF, no trailer.
        let run: Vec<u8> = (1..=254u8).collect();
        let mut out = vec![0u8; 300];
        let n = cobs::encode(&run, &mut out).unwrap();
        assert_eq!(n, 255);
        assert_eq!(out[0], 0xFF);
        // A zero right after a full block: FF block, then two empty blocks.
        let mut with_zero = run.clone();
        with_zero.push(0);
        let n = cobs::encode(&with_zero, &mut out).unwrap();
        assert_eq!(&out[254..n], &[254, 0x01, 0x01]);
        // 255 non-zero bytes: FF block then a one-byte block.
        let mut longer = run.clone();
        longer.push(0x42);
        let n = cobs::encode(&longer, &mut out).unwrap();
        assert_eq!(&out[253..n], &[253, 254, 0x02, 0x42]);
        for len in [0, 1, 253, 254, 255, 256, 507, 508, 509, 1000] {
            for fill in [0u8, 1, 0xFF] {
                cobs_roundtrip(&vec![fill; len]);
            }
            let mixed: Vec<u8> = (0..len).map(|i| (i * 37 % 251) as u8).collect();
            cobs_roundtrip(&mixed);
        }
    }

    #[test]
    fn every_input_up_to_two_bytes() {
        cobs_roundtrip(&[]);
        for a in 0..=255u8 {
            cobs_roundtrip(&[a]);
            for b in 0..=255u8 {
                cobs_roundtrip(&[a, b]);
            }
        }
    }

    #[test]
    fn every_three_byte_input_over_edge_values() {
        let edges = [0x00, 0x01, 0x02, 0x7F, 0xFE, 0xFF];
        for a in edges {
            for b in edges {
                for c in edges {
                    cobs_roundtrip(&[a, b, c]);
                }
            }
        }
    }

    #[test]
    fn decoder_refuses_damage() {
        let mut out = [0u8; 8];
        assert_eq!(
            cobs::decode(&[0x03, 0x11], &mut out),
            Err(cobs::CobsError::Truncated)
        );
        assert_eq!(
            cobs::decode(&[0x02, 0x00], &mut out),
            Err(cobs::CobsError::ZeroInInput)
        );
        assert_eq!(
            cobs::decode(&[0x05, 1, 2, 3, 4], &mut out[..2]),
            Err(cobs::CobsError::BufferTooSmall)
        );
        assert_eq!(
            cobs::encode(&[1, 2, 3], &mut out[..3]),
            Err(cobs::CobsError::BufferTooSmall)
        );
    }

    proptest! {
        #[test]
        fn arbitrary_roundtrip(data in proptest::collection::vec(any::<u8>(), 0..1200)) {
            cobs_roundtrip(&data);
        }

        #[test]
        fn zero_heavy_roundtrip(data in proptest::collection::vec(prop_oneof![Just(0u8), Just(1u8), any::<u8>()], 0..600)) {
            cobs_roundtrip(&data);
        }

        #[test]
        fn decode_never_panics(data in proptest::collection::vec(any::<u8>(), 0..600), cap in 0usize..700) {
            let mut out = vec![0u8; cap];
            let _ = cobs::decode(&data, &mut out);
        }
    }
}

/// Feeds `bytes` in one go and collects every result.
fn decode_all<M: serde::de::DeserializeOwned, const N: usize>(
    dec: &mut FrameDecoder<N>,
    bytes: &[u8],
) -> Vec<Result<M, FrameError>> {
    let mut out = Vec::new();
    let mut rest = bytes;
    loop {
        rest = dec.feed(rest);
        match dec.take_message::<M>() {
            Some(r) => out.push(r),
            None if rest.is_empty() => return out,
            None => {}
        }
    }
}

/// Feeds `bytes` cut at `cuts` (offsets, any order) and collects results.
fn decode_chunked<M: serde::de::DeserializeOwned, const N: usize>(
    dec: &mut FrameDecoder<N>,
    bytes: &[u8],
    cuts: &[usize],
) -> Vec<Result<M, FrameError>> {
    let mut cuts: Vec<usize> = cuts.iter().map(|c| c % (bytes.len() + 1)).collect();
    cuts.push(0);
    cuts.push(bytes.len());
    cuts.sort_unstable();
    let mut out = Vec::new();
    for w in cuts.windows(2) {
        out.extend(decode_all::<M, N>(dec, &bytes[w[0]..w[1]]));
    }
    out
}

mod exact_bytes {
    use super::*;

    // Expected bytes were worked out by hand from the postcard wire format
    // (varint LEB128 integers, enums as a varint variant index, f32 as four
    // little-endian bytes, u8 and bool as one byte, Option as 00 / 01 + value,
    // sequences as a varint length + items), the CRC-32 computed with an
    // independent implementation (zlib's crc32), and COBS applied by hand.
    fn check<M: serde::Serialize + serde::de::DeserializeOwned + PartialEq + std::fmt::Debug>(
        msg: M,
        payload: &str,
        frame: &str,
    ) {
        let bytes = postcard::to_allocvec(&msg).unwrap();
        assert_eq!(show(&bytes), payload, "postcard bytes of {msg:?}");
        let mut out = [0u8; 300];
        let n = encode_frame(&msg, &mut out).unwrap();
        assert_eq!(show(&out[..n]), frame, "frame of {msg:?}");
        assert_eq!(encode_frame_vec(&msg), hex(frame));
        #[cfg(feature = "alloc")]
        assert_eq!(wire::encode_frame_vec(&msg), hex(frame));
        let mut scratch = [0u8; 300];
        assert_eq!(decode_frame::<M>(&hex(frame), &mut scratch), Ok(msg));
    }

    #[test]
    fn status_query() {
        // variant 1; CRC-32 of [01] = 0xA505DF1B.
        check(HostMsg::StatusQuery, "01", "06 01 1b df 05 a5 00");
    }

    #[test]
    fn resend_from() {
        // variant 2, seq 300 = varint ac 02.
        check(
            HostMsg::ResendFrom { seq: 300 },
            "02 ac 02",
            "08 02 ac 02 b5 9f 79 10 00",
        );
    }

    #[test]
    fn sample_with_zero_bytes() {
        // variant 0, at 5, length 2, 1.0 = 00 00 80 3f, -2.5 = 00 00 20 c0.
        let features = heapless::Vec::from_slice(&[1.0f32, -2.5]).unwrap();
        check(
            HostMsg::Sample { at: 5, features },
            "00 05 02 00 00 80 3f 00 00 20 c0",
            "01 03 05 02 01 03 80 3f 01 07 20 c0 b3 8f 79 90 00",
        );
    }

    #[test]
    fn upload_begin() {
        // variant 4, total 1000 = e8 07, crc 0xDEADBEEF = ef fd b6 f5 0d.
        check(
            HostMsg::UploadBegin {
                total: 1000,
                crc: 0xDEAD_BEEF,
            },
            "04 e8 07 ef fd b6 f5 0d",
            "0d 04 e8 07 ef fd b6 f5 0d c8 7c 03 c4 00",
        );
    }

    #[test]
    fn drift_cleared() {
        // seq 7, variant 3, sample 1234 = d2 09.
        check(
            DeviceFrame {
                seq: 7,
                msg: DeviceMsg::DriftCleared(DriftCleared { sample: 1234 }),
            },
            "07 03 d2 09",
            "09 07 03 d2 09 c5 46 07 74 00",
        );
    }

    #[test]
    fn refusal() {
        // seq 0, variant 7, request UploadCommit = 2, reason TransferCrc = 20
        // with expected 1, computed 2.
        check(
            DeviceFrame {
                seq: 0,
                msg: DeviceMsg::Refused(Refusal {
                    request: Request::UploadCommit,
                    reason: Reason::TransferCrc {
                        expected: 1,
                        computed: 2,
                    },
                }),
            },
            "00 07 02 14 01 02",
            "01 0a 07 02 14 01 02 f9 ee d1 45 00",
        );
    }

    #[test]
    fn signature_refusals() {
        // seq 3, variant 7, request UploadCommit = 2, reason UnknownKey = 24
        // (0x18) with the key id's 8 bytes as they are (no length).
        check(
            DeviceFrame {
                seq: 3,
                msg: DeviceMsg::Refused(Refusal {
                    request: Request::UploadCommit,
                    reason: Reason::UnknownKey {
                        key_id: KeyId([0x01, 0x23, 0x45, 0x67, 0x89, 0xab, 0xcd, 0xef]),
                    },
                }),
            },
            "03 07 02 18 01 23 45 67 89 ab cd ef",
            "11 03 07 02 18 01 23 45 67 89 ab cd ef 8f 3f 78 7b 00",
        );
        // Unsigned = 23 (0x17), BadSignature = 25 (0x19): no fields.
        check(
            DeviceFrame {
                seq: 4,
                msg: DeviceMsg::Refused(Refusal {
                    request: Request::UploadCommit,
                    reason: Reason::Unsigned,
                }),
            },
            "04 07 02 17",
            "09 04 07 02 17 8b b9 8c 1a 00",
        );
        check(
            DeviceFrame {
                seq: 5,
                msg: DeviceMsg::Refused(Refusal {
                    request: Request::UploadCommit,
                    reason: Reason::BadSignature,
                }),
            },
            "05 07 02 19",
            "09 05 07 02 19 e9 f3 88 45 00",
        );
    }

    #[test]
    fn chunk_ack() {
        // seq 1, variant 6, Ack variant 3 (ChunkTaken), next 128 = 80 01.
        check(
            DeviceFrame {
                seq: 1,
                msg: DeviceMsg::Ack(Ack::ChunkTaken { next: 128 }),
            },
            "01 06 03 80 01",
            "0a 01 06 03 80 01 f5 97 eb 90 00",
        );
    }

    #[test]
    fn sample_not_taken() {
        // seq 3, variant 6, Ack variant 5 (NotTaken), at 7, next 5.
        check(
            DeviceFrame {
                seq: 3,
                msg: DeviceMsg::Ack(Ack::NotTaken { at: 7, next: 5 }),
            },
            "03 06 05 07 05",
            "0a 03 06 05 07 05 b2 72 09 9d 00",
        );
    }

    #[test]
    fn drift_raised_by_the_per_sample_limit() {
        // seq 2, variant 2, sample 300 = ac 02, drivers 01 (SPE), scores
        // 12.5 = 00 00 48 41, 1.0 = 00 00 80 3f, -2.0 = 00 00 00 c0; one
        // crossing: Spe = 00, Sample = 02, 12.5, limit 10.0 = 00 00 20 41;
        // top: feature 1 with 8.0 = 00 00 00 41, feature 0 with 4.0 = 00 00
        // 80 40, unused ff with 0.0. CRC-32 of the 43 bytes = 0xEA8C278F.
        let mut crossed = heapless::Vec::new();
        crossed
            .push(Crossing {
                score: ScoreKind::Spe,
                statistic: Statistic::Sample,
                value: 12.5,
                limit: 10.0,
            })
            .unwrap();
        check(
            DeviceFrame {
                seq: 2,
                msg: DeviceMsg::DriftRaised(DriftRaised {
                    sample: 300,
                    drivers: 0x01,
                    scores: ScoreTriple {
                        spe: 12.5,
                        t2: 1.0,
                        nll: -2.0,
                    },
                    crossed,
                    top: [
                        Share {
                            feature: 1,
                            value: 8.0,
                        },
                        Share {
                            feature: 0,
                            value: 4.0,
                        },
                        Share {
                            feature: 255,
                            value: 0.0,
                        },
                    ],
                }),
            },
            "02 02 ac 02 01 00 00 48 41 00 00 80 3f 00 00 00 c0 01 00 02 00 00 48 41 \
             00 00 20 41 01 00 00 00 41 00 00 00 80 40 ff 00 00 00 00",
            "06 02 02 ac 02 01 01 03 48 41 01 03 80 3f 01 01 03 c0 01 02 02 01 03 48 41 \
             01 04 20 41 01 01 01 02 41 01 01 04 80 40 ff 01 01 01 05 8f 27 8c ea 00",
        );
    }

    #[test]
    fn chart_indices() {
        // The wire tag of each chart (PROTOCOL.md, "Shared types").
        for (stat, tag) in [
            (Statistic::Ewma, 0u8),
            (Statistic::Cusum, 1),
            (Statistic::Sample, 2),
        ] {
            assert_eq!(postcard::to_allocvec(&stat).unwrap(), vec![tag], "{stat:?}");
        }
        assert_eq!(
            Statistic::ALL,
            [Statistic::Ewma, Statistic::Cusum, Statistic::Sample]
        );
        // The residual chart (appended with model format 3): variant 3,
        // then the feature index as one byte.
        assert_eq!(
            postcard::to_allocvec(&Statistic::Residual { feature: 17 }).unwrap(),
            vec![3, 17]
        );
        // The slow charts (appended with model format 5, protocol 5):
        // variant 4, then the feature index as one byte.
        assert_eq!(
            postcard::to_allocvec(&Statistic::Slow { feature: 17 }).unwrap(),
            vec![4, 17]
        );
        // An index past the last chart is refused, not misread.
        assert!(postcard::from_bytes::<Statistic>(&[5]).is_err());
        assert!(postcard::from_bytes::<Statistic>(&[3]).is_err());
        assert!(postcard::from_bytes::<Statistic>(&[4]).is_err());
    }

    #[test]
    fn score_report() {
        // seq 5, variant 5, sample 70000 = f0 a2 04, Some = 01, 0.5 = 00 00
        // 00 3f, 2.0 = 00 00 00 40, -1.25 = 00 00 a0 bf, Drifting = 02.
        check(
            DeviceFrame {
                seq: 5,
                msg: DeviceMsg::ScoreReport(ScoreReport {
                    sample: 70_000,
                    scores: Some(ScoreTriple {
                        spe: 0.5,
                        t2: 2.0,
                        nll: -1.25,
                    }),
                    state: State::Drifting,
                }),
            },
            "05 05 f0 a2 04 01 00 00 00 3f 00 00 00 40 00 00 a0 bf 02",
            "07 05 05 f0 a2 04 01 01 01 02 3f 01 01 02 40 01 08 a0 bf 02 b4 4a da c7 00",
        );
    }

    #[test]
    fn set_echo() {
        // variant 9, true = 01; CRC-32 of [09 01] = 0xE71C9920.
        check(
            HostMsg::SetEcho { on: true },
            "09 01",
            "07 09 01 20 99 1c e7 00",
        );
    }

    #[test]
    fn echo_ack() {
        // seq 3, variant 6 (Ack), Ack variant 6 (Echo), false = 00.
        check(
            DeviceFrame {
                seq: 3,
                msg: DeviceMsg::Ack(Ack::Echo { on: false }),
            },
            "03 06 06 00",
            "04 03 06 06 05 c6 ab 26 61 00",
        );
    }

    #[test]
    fn feature_echo() {
        // seq 12 = 0c, variant 9, sample 300 = ac 02, first 31 = 1f, the
        // values as a byte string: length 8, then 1.0 = 00 00 80 3f and
        // -2.5 = 00 00 20 c0.
        check(
            DeviceFrame {
                seq: 12,
                msg: DeviceMsg::Features(FeatureEcho {
                    sample: 300,
                    first: 31,
                    values: EchoValues::new(&[1.0, -2.5]),
                }),
            },
            "0c 09 ac 02 1f 08 00 00 80 3f 00 00 20 c0",
            "07 0c 09 ac 02 1f 08 01 03 80 3f 01 07 20 c0 ba 07 17 07 00",
        );
    }
}

fn top3() -> [Share; 3] {
    [
        Share {
            feature: 2,
            value: 9.5,
        },
        Share {
            feature: 0,
            value: 0.25,
        },
        Share {
            feature: 255,
            value: 0.0,
        },
    ]
}

fn every_host_msg() -> Vec<HostMsg> {
    let full: heapless::Vec<f32, MAX_FEATURES> =
        (0..MAX_FEATURES).map(|i| i as f32 * -0.5).collect();
    let chunk: heapless::Vec<u8, MAX_CHUNK> = (0..MAX_CHUNK).map(|i| i as u8).collect();
    vec![
        HostMsg::Sample {
            at: 0,
            features: heapless::Vec::from_slice(&[0.0, f32::NAN, f32::INFINITY, -0.0]).unwrap(),
        },
        HostMsg::Sample {
            at: u32::MAX,
            features: full,
        },
        HostMsg::Sample {
            at: 1 << 30,
            features: heapless::Vec::new(),
        },
        HostMsg::StatusQuery,
        HostMsg::ResendFrom { seq: u32::MAX },
        HostMsg::SetReports { on: true },
        HostMsg::SetReports { on: false },
        HostMsg::UploadBegin {
            total: u32::MAX,
            crc: 0,
        },
        HostMsg::UploadChunk {
            offset: u32::MAX,
            data: chunk,
        },
        HostMsg::UploadChunk {
            offset: 0,
            data: heapless::Vec::new(),
        },
        HostMsg::UploadCommit,
        HostMsg::ResetStats,
        HostMsg::GreetingQuery,
        HostMsg::SetEcho { on: true },
        HostMsg::SetEcho { on: false },
    ]
}

fn every_device_msg() -> Vec<DeviceMsg> {
    let residual = Crossing {
        score: ScoreKind::Spe,
        statistic: Statistic::Residual { feature: u8::MAX },
        value: 7.5,
        limit: 3.25,
    };
    let crossed: heapless::Vec<Crossing, MAX_CROSSINGS> =
        [ScoreKind::Spe, ScoreKind::T2, ScoreKind::Nll]
            .into_iter()
            .flat_map(|score| {
                Statistic::ALL.map(move |statistic| Crossing {
                    score,
                    statistic,
                    value: 7.5,
                    limit: 3.25,
                })
            })
            .chain([residual])
            .collect();
    let reasons = every_reason();
    let mut msgs = vec![
        DeviceMsg::Greeting(Greeting {
            protocol: u16::MAX,
            firmware: heapless::String::try_from("0123456789abcdef").unwrap(),
            model_id: u32::MAX,
            schema: u64::MAX,
            dims: Dims {
                features: u16::MAX,
                components: u16::MAX,
                mixture: u16::MAX,
            },
            capacity: Capacity {
                features: u16::MAX,
                components: u16::MAX,
                mixture: u16::MAX,
            },
            active: Some(Slot::B),
            generation: u32::MAX,
            status_every: u32::MAX,
        }),
        DeviceMsg::Status(Status {
            samples: u64::MAX,
            state: State::Priming,
            hot: 0x07,
            faults: FaultTally {
                wrong_length: u32::MAX,
                non_finite: u32::MAX,
                out_of_range: u32::MAX,
                overflow: u32::MAX,
            },
            levels: [Level {
                ewma: f32::MAX,
                cusum: -0.0,
            }; 3],
            link: LinkCounters {
                frames_ok: u32::MAX,
                crc_errors: u32::MAX,
                framing_errors: u32::MAX,
                overflows: u32::MAX,
                undecodable: u32::MAX,
            },
            last_event: Some(u32::MAX),
            model_id: u32::MAX,
        }),
        DeviceMsg::DriftRaised(DriftRaised {
            sample: u64::MAX,
            drivers: 0x07,
            scores: ScoreTriple {
                spe: 1.0,
                t2: 2.0,
                nll: 3.0,
            },
            crossed,
            top: top3(),
        }),
        DeviceMsg::DriftCleared(DriftCleared { sample: u64::MAX }),
        DeviceMsg::ScoreReport(ScoreReport {
            sample: u64::MAX,
            scores: Some(ScoreTriple::default()),
            state: State::Watching,
        }),
        DeviceMsg::ScoreReport(ScoreReport {
            sample: 3,
            scores: None,
            state: State::Priming,
        }),
        DeviceMsg::Ack(Ack::Reports { on: true }),
        DeviceMsg::Ack(Ack::StatsReset),
        DeviceMsg::Ack(Ack::UploadOpen {
            slot: Slot::A,
            total: u32::MAX,
        }),
        DeviceMsg::Ack(Ack::ChunkTaken { next: u32::MAX }),
        DeviceMsg::Ack(Ack::NotTaken {
            at: u32::MAX,
            next: u64::MAX,
        }),
        DeviceMsg::Ack(Ack::ModelSwitched {
            slot: Slot::B,
            model_id: u32::MAX,
            generation: u32::MAX,
        }),
        DeviceMsg::ResendDone(ResendDone {
            from: u32::MAX,
            count: u16::MAX,
            oldest: Some(u32::MAX),
            dropped: u32::MAX,
        }),
        DeviceMsg::Ack(Ack::Echo { on: true }),
        DeviceMsg::Features(FeatureEcho {
            sample: u64::MAX,
            first: u8::MAX,
            values: EchoValues::new(&[f32::MIN_POSITIVE; ECHO_CHUNK + 5]),
        }),
        DeviceMsg::Features(FeatureEcho {
            sample: 0,
            first: 0,
            values: EchoValues::new(&[]),
        }),
    ];
    for fault in [
        FaultKind::WrongLength { got: u16::MAX },
        FaultKind::NonFinite { feature: 255 },
        FaultKind::OutOfRange { feature: 3 },
        FaultKind::Overflow,
    ] {
        msgs.push(DeviceMsg::SensorFault(SensorFault {
            sample: u64::MAX,
            fault,
        }));
    }
    for reason in reasons {
        for request in [
            Request::UploadBegin,
            Request::UploadChunk,
            Request::UploadCommit,
        ] {
            msgs.push(DeviceMsg::Refused(Refusal { request, reason }));
        }
    }
    msgs
}

fn every_model_error() -> Vec<ModelError> {
    let m = u32::MAX;
    vec![
        ModelError::BadMagic,
        ModelError::UnknownVersion { found: u16::MAX },
        ModelError::UnknownFlags { found: u16::MAX },
        ModelError::Truncated { needed: m, got: m },
        ModelError::TrailingBytes { extra: m },
        ModelError::BadCrc {
            stored: m,
            computed: m,
        },
        ModelError::Undecodable,
        ModelError::Inconsistent {
            field: Field::Labels,
            expected: m,
            found: m,
        },
        ModelError::BadDimensions,
        ModelError::OverCapacity {
            dim: Dim::Mixture,
            found: u16::MAX,
            max: u16::MAX,
        },
        ModelError::NonFinite {
            field: Field::Mean,
            index: u16::MAX,
        },
        ModelError::NotPositive {
            field: Field::Scale,
            index: u16::MAX,
        },
        ModelError::OutOfRange {
            field: Field::Monitor,
        },
        ModelError::BufferTooSmall,
    ]
}

fn every_reason() -> Vec<Reason> {
    let m = u32::MAX;
    let mut v: Vec<Reason> = every_model_error().into_iter().map(Reason::from).collect();
    v.extend([
        Reason::NoUpload,
        Reason::UnexpectedOffset {
            expected: m,
            got: m,
        },
        Reason::TooLarge { total: m, max: m },
        Reason::Empty,
        Reason::Overrun { end: m, total: m },
        Reason::Incomplete {
            received: m,
            total: m,
        },
        Reason::TransferCrc {
            expected: m,
            computed: m,
        },
        Reason::Abandoned {
            received: m,
            total: m,
        },
        Reason::Storage,
        Reason::Unsigned,
        Reason::UnknownKey {
            key_id: KeyId([0xff; 8]),
        },
        Reason::BadSignature,
    ]);
    v
}

mod messages {
    use super::*;

    #[test]
    fn every_host_message_round_trips_within_the_limits() {
        let mut longest = 0;
        for msg in every_host_msg() {
            let bytes = postcard::to_allocvec(&msg).unwrap();
            longest = longest.max(bytes.len());
            assert!(bytes.len() <= MAX_HOST_MESSAGE, "{msg:?}");
            let mut out = [0u8; MAX_HOST_FRAME];
            let n = encode_frame(&msg, &mut out).unwrap();
            let mut dec = HostFrameDecoder::new();
            let got = decode_all::<HostMsg, _>(&mut dec, &out[..n]);
            assert_eq!(got.len(), 1);
            // NaN != NaN: compare encodings.
            let back = got[0].clone().unwrap();
            assert_eq!(postcard::to_allocvec(&back).unwrap(), bytes);
        }
        // The constant is exact: a full sample is the longest host message.
        assert_eq!(longest, MAX_HOST_MESSAGE);
        assert_eq!(MAX_HOST_MESSAGE, 1 + 5 + 1 + 4 * MAX_FEATURES);
    }

    #[test]
    fn every_device_message_round_trips_within_the_limits() {
        let mut longest = 0;
        for msg in every_device_msg() {
            let frame = DeviceFrame { seq: u32::MAX, msg };
            let bytes = postcard::to_allocvec(&frame).unwrap();
            longest = longest.max(bytes.len());
            assert!(bytes.len() <= MAX_DEVICE_MESSAGE, "{frame:?}");
            let mut out = [0u8; MAX_DEVICE_FRAME];
            let n = encode_frame(&frame, &mut out).unwrap();
            let mut dec = DeviceFrameDecoder::new();
            let got = decode_all::<DeviceFrame, _>(&mut dec, &out[..n]);
            assert_eq!(got, vec![Ok(frame.clone())]);
            assert_eq!(dec.counters().frames_ok, 1);
        }
        // A drift raised message with ten crossings, three charts of three
        // scores and the SPE's residual chart, is the longest: seq 5 +
        // variant 1 + sample 10 + drivers 1 + scores 12 + length 1 + 9 × 10
        // + (score 1, variant 1, feature 1, 8) + top 3 × 5 = 146 (a feature
        // echo of ECHO_CHUNK values takes seq 5 + variant 1 + sample 10 +
        // first 1 + length 1 + 31 × 4 = 142).
        assert_eq!(longest, 146);
        assert_eq!(longest, MAX_DEVICE_MESSAGE);
        assert_eq!(ECHO_CHUNK, 31);
        assert_eq!(MAX_CROSSINGS, 10);
    }

    /// The frame encoder has its own serializer (`wire/ser.rs`); its bytes
    /// are postcard's: every message variant, with sequence numbers of each
    /// varint length, against `postcard::to_allocvec` framed by hand.
    #[test]
    fn frames_carry_postcards_bytes() {
        for seq in [0, 127, 128, 16_383, 16_384, 2_097_152, u32::MAX] {
            for msg in every_device_msg() {
                let frame = DeviceFrame { seq, msg };
                let reference = framed(&postcard::to_allocvec(&frame).unwrap());
                assert_eq!(encode_frame_vec(&frame), reference, "{frame:?}");
            }
        }
        for msg in every_host_msg() {
            let reference = framed(&postcard::to_allocvec(&msg).unwrap());
            assert_eq!(encode_frame_vec(&msg), reference, "{msg:?}");
        }
    }

    proptest! {
        /// The same for any values of every kind serde has (but 128-bit
        /// integers, which the encoder refuses).
        #[test]
        fn any_values_encode_as_postcard_does(
            unsigned in any::<(u8, u16, u32, u64, usize, bool)>(),
            signed in any::<(i8, i16, i32, i64, f32, f64)>(),
            text in ("\\PC{0,40}", any::<char>()),
            nested in (
                any::<Option<u32>>(),
                proptest::collection::vec(any::<u16>(), 0..80),
                proptest::collection::vec(any::<u8>(), 0..300),
                any::<((), Option<()>)>(),
            ),
        ) {
            let value = (unsigned, signed, text, nested);
            let mut out = vec![0u8; 2048];
            let n = encode_frame(&value, &mut out).unwrap();
            let reference = framed(&postcard::to_allocvec(&value).unwrap());
            prop_assert_eq!(&out[..n], &reference[..]);
        }
    }

    #[test]
    fn reason_codes_are_distinct_and_map_back() {
        let reasons = every_reason();
        let mut codes: Vec<u8> = reasons.iter().map(|r| r.code()).collect();
        assert_eq!(codes, (0..26).collect::<Vec<u8>>());
        codes.dedup();
        assert_eq!(codes.len(), reasons.len());
        for r in &reasons {
            // The code is the variant index: the first byte on the wire.
            let bytes = postcard::to_allocvec(r).unwrap();
            assert_eq!(bytes[0], r.code(), "{r:?}");
            assert!(!r.to_string().is_empty());
        }
        for e in every_model_error() {
            assert_eq!(Reason::from(e).model_error(), Some(e));
        }
        for r in &reasons {
            let sig = r.signature_error();
            assert_eq!(sig.is_some(), (23..=25).contains(&r.code()), "{r:?}");
            if let Some(e) = sig {
                assert_eq!(Reason::from(e), *r);
                assert_eq!(r.model_error(), None);
            }
        }
        for f in wire::FIELDS {
            assert_eq!(wire::field_from_code(wire::field_code(f)), Some(f));
        }
        assert_eq!(
            wire::field_from_code(13),
            Some(plumb_model::Field::SpeByMode)
        );
        assert_eq!(
            wire::field_from_code(14),
            Some(plumb_model::Field::ResidualChart)
        );
        assert_eq!(wire::field_from_code(15), None);
        assert_eq!(
            Reason::OutOfRange { field: 200 }.to_string(),
            "model refused (reason code 12)"
        );
    }

    #[test]
    fn encode_refuses_a_small_buffer() {
        let msg = HostMsg::UploadBegin { total: 5, crc: 6 };
        let need = encode_frame_vec(&msg).len();
        let mut out = [0u8; 64];
        for len in 0..need {
            assert!(encode_frame(&msg, &mut out[..len]).is_err(), "len {len}");
        }
        assert!(encode_frame(&msg, &mut out[..wire::max_frame_len(8)]).is_ok());
    }

    #[test]
    fn documented_sizes() {
        // PROTOCOL.md, "Framing".
        assert_eq!(wire::PROTOCOL_VERSION, 5);
        assert_eq!(MAX_HOST_MESSAGE, 263);
        assert_eq!(MAX_HOST_FRAME, 270);
        assert_eq!(MAX_DEVICE_MESSAGE, 146);
        assert_eq!(MAX_DEVICE_FRAME, 152);
        assert_eq!(MAX_CHUNK, 128);
        assert_eq!(wire::FIRMWARE_LEN, 16);
    }

    #[test]
    fn sequence_order_wraps() {
        assert!(wire::seq_at_or_after(5, 5));
        assert!(wire::seq_at_or_after(6, 5));
        assert!(!wire::seq_at_or_after(4, 5));
        assert!(wire::seq_at_or_after(2, u32::MAX - 1));
        assert!(!wire::seq_at_or_after(u32::MAX, 1));
    }

    #[test]
    fn oversized_vectors_and_strings_are_undecodable() {
        // A sample with MAX_FEATURES + 1 values and a chunk of MAX_CHUNK + 1
        // bytes, hand-built, pass the CRC but not the decoder.
        let mut sample = vec![0u8, (MAX_FEATURES + 1) as u8];
        sample.extend(std::iter::repeat_n(0x3f, 4 * (MAX_FEATURES + 1)));
        let mut chunk = vec![5u8, 0, 0x81, 0x01];
        chunk.extend(std::iter::repeat_n(7u8, MAX_CHUNK + 1));
        let mut greeting = vec![0u8, 0, 1, 17];
        greeting.extend(std::iter::repeat_n(b'a', 17));
        for raw in [sample, chunk] {
            let frame = framed(&raw);
            let mut dec = FrameDecoder::<600>::new();
            assert_eq!(
                decode_all::<HostMsg, _>(&mut dec, &frame),
                vec![Err(FrameError::Undecodable)]
            );
        }
        let mut dec = FrameDecoder::<600>::new();
        assert_eq!(
            decode_all::<DeviceFrame, _>(&mut dec, &framed(&greeting)),
            vec![Err(FrameError::Undecodable)]
        );
        // A feature echo whose byte string is not whole `f32`s, or longer
        // than ECHO_CHUNK of them, is refused.
        for raw in [
            vec![0u8, 9, 0, 0, 3, 1, 2, 3],
            [vec![0u8, 9, 0, 0, 128], vec![0x3f; 128]].concat(),
        ] {
            let mut dec = FrameDecoder::<600>::new();
            assert_eq!(
                decode_all::<DeviceFrame, _>(&mut dec, &framed(&raw)),
                vec![Err(FrameError::Undecodable)]
            );
        }
        // ECHO_CHUNK of them pass.
        let good = [vec![0u8, 9, 0, 0, 124], vec![0x3f; 124]].concat();
        let mut dec = FrameDecoder::<600>::new();
        let got = decode_all::<DeviceFrame, _>(&mut dec, &framed(&good));
        let Ok(DeviceFrame {
            msg: DeviceMsg::Features(echo),
            ..
        }) = &got[0]
        else {
            panic!("{got:?}")
        };
        assert_eq!(echo.values.len(), ECHO_CHUNK);
        // Trailing bytes after a complete message are refused too.
        let mut dec = FrameDecoder::<600>::new();
        assert_eq!(
            decode_all::<HostMsg, _>(&mut dec, &framed(&[1, 1])),
            vec![Err(FrameError::Undecodable)]
        );
        assert_eq!(dec.counters().undecodable, 1);
    }
}

/// Frames raw message bytes (CRC + COBS) without going through serde.
fn framed(raw: &[u8]) -> Vec<u8> {
    let mut body = raw.to_vec();
    body.extend(wire::crc32(raw).to_le_bytes());
    let mut out = reference_cobs(&body);
    out.push(0);
    out
}

fn sample_frames() -> Vec<Vec<u8>> {
    every_host_msg().iter().map(encode_frame_vec).collect()
}

mod stream {
    use super::*;

    #[test]
    fn frames_back_to_back_and_empty_frames() {
        let frames = sample_frames();
        let mut stream = vec![0u8, 0, 0];
        for f in &frames {
            stream.extend_from_slice(f);
            stream.push(0); // an extra flush between frames is harmless
        }
        let mut dec = HostFrameDecoder::new();
        let got = decode_all::<HostMsg, _>(&mut dec, &stream);
        assert_eq!(got.len(), frames.len());
        assert!(got.iter().all(|r| r.is_ok()));
        assert_eq!(
            dec.counters(),
            LinkCounters {
                frames_ok: frames.len() as u32,
                ..LinkCounters::default()
            }
        );
    }

    #[test]
    fn each_error_has_its_own_value_and_counter() {
        let good = encode_frame_vec(&HostMsg::StatusQuery);
        let mut bad_crc = good.clone();
        bad_crc[2] ^= 0x01;
        let mut stream = Vec::new();
        stream.extend_from_slice(&bad_crc);
        stream.extend_from_slice(&[0x05, 0x11, 0x00]); // block cut short
        stream.extend_from_slice(&[0x03, 0x11, 0x22, 0x00]); // 2 bytes: no room for a CRC
        stream.extend(std::iter::repeat_n(0x42, 400)); // longer than the buffer
        stream.push(0);
        stream.extend_from_slice(&framed(&[0x63])); // unknown variant 99
        stream.extend_from_slice(&good);
        let mut dec = HostFrameDecoder::new();
        let got = decode_all::<HostMsg, _>(&mut dec, &stream);
        assert_eq!(
            got,
            vec![
                Err(FrameError::Crc),
                Err(FrameError::Cobs),
                Err(FrameError::Short),
                Err(FrameError::Overflow),
                Err(FrameError::Undecodable),
                Ok(HostMsg::StatusQuery),
            ]
        );
        assert_eq!(
            dec.counters(),
            LinkCounters {
                frames_ok: 1,
                crc_errors: 1,
                framing_errors: 2,
                overflows: 1,
                undecodable: 1,
            }
        );
    }

    #[test]
    fn a_pending_frame_holds_back_input() {
        let one = encode_frame_vec(&HostMsg::StatusQuery);
        let two = encode_frame_vec(&HostMsg::ResetStats);
        let both = [one.clone(), two].concat();
        let mut dec = HostFrameDecoder::new();
        let rest = dec.feed(&both);
        assert_eq!(rest.len(), both.len() - one.len());
        assert!(dec.is_ready());
        // Nothing more is consumed until the frame is taken.
        assert_eq!(dec.feed(rest).len(), rest.len());
        assert_eq!(
            dec.take_message::<HostMsg>(),
            Some(Ok(HostMsg::StatusQuery))
        );
        let rest = dec.feed(rest);
        assert!(rest.is_empty());
        assert_eq!(dec.take().map(|r| r.map(<[u8]>::to_vec)), Some(Ok(vec![7])));
        assert_eq!(dec.take(), None);
    }

    #[test]
    fn overflow_drops_until_the_next_zero() {
        // Capacity 8 decoded bytes: a 5-byte message (+4 CRC) overflows.
        let mut dec = FrameDecoder::<8>::new();
        let long = framed(&[1, 2, 3, 4, 5]);
        let short = encode_frame_vec(&HostMsg::StatusQuery);
        let got = decode_all::<HostMsg, _>(&mut dec, &[long, short].concat());
        assert_eq!(
            got,
            vec![Err(FrameError::Overflow), Ok(HostMsg::StatusQuery)]
        );
    }

    proptest! {
        #![proptest_config(ProptestConfig::with_cases(512))]

        #[test]
        fn any_bytes_any_chunking_never_panic_and_agree(
            bytes in proptest::collection::vec(prop_oneof![Just(0u8), any::<u8>()], 0..1500),
            cuts in proptest::collection::vec(any::<usize>(), 0..20),
        ) {
            let mut whole = HostFrameDecoder::new();
            let a = decode_all::<HostMsg, _>(&mut whole, &bytes);
            let mut pieces = HostFrameDecoder::new();
            let b = decode_chunked::<HostMsg, _>(&mut pieces, &bytes, &cuts);
            prop_assert_eq!(format!("{a:?}"), format!("{b:?}"));
            prop_assert_eq!(whole.counters(), pieces.counters());
            let mut tiny = FrameDecoder::<3>::new();
            let _ = decode_chunked::<DeviceFrame, _>(&mut tiny, &bytes, &cuts);
        }

        #[test]
        fn a_frame_inside_garbage_is_recovered(
            before in proptest::collection::vec(any::<u8>(), 0..600),
            after in proptest::collection::vec(any::<u8>(), 0..600),
            which in 0usize..13,
            cuts in proptest::collection::vec(any::<usize>(), 0..10),
        ) {
            let msg = every_host_msg().swap_remove(which);
            let frame = encode_frame_vec(&msg);
            // Garbage, then the zero a sender puts before a frame, the frame,
            // more garbage.
            let mut stream = before.clone();
            stream.push(0);
            stream.extend_from_slice(&frame);
            stream.extend_from_slice(&after);
            let mut dec = HostFrameDecoder::new();
            let got = decode_chunked::<HostMsg, _>(&mut dec, &stream, &cuts);
            let want = postcard::to_allocvec(&msg).unwrap();
            let found = got.iter().filter_map(|r| r.as_ref().ok())
                .filter(|m| postcard::to_allocvec(m).unwrap() == want)
                .count();
            prop_assert!(found >= 1, "frame lost: {:?}", got);
        }

        #[test]
        fn any_two_bit_flips_are_rejected(
            which in 0usize..13,
            a in any::<usize>(),
            b in any::<usize>(),
        ) {
            let frame = &sample_frames()[which];
            let bits = frame.len() * 8;
            let (a, b) = (a % bits, b % bits);
            prop_assume!(a != b);
            let mut bad = frame.clone();
            bad[a / 8] ^= 1 << (a % 8);
            bad[b / 8] ^= 1 << (b % 8);
            let mut dec = HostFrameDecoder::new();
            let got = decode_all::<HostMsg, _>(&mut dec, &bad);
            prop_assert!(got.iter().all(|r| r.is_err()), "accepted {:?}", got);
        }
    }

    #[test]
    fn every_single_bit_flip_is_rejected() {
        // CRC-32/ISO-HDLC has Hamming distance 4 or more for messages up to
        // about 91k bits (from memory: published CRC studies), so every one-,
        // two- and three-bit error of the decoded bytes is caught. A flip in
        // a COBS code byte moves or removes zeros instead; this test checks
        // all of those cases exhaustively.
        let mut frames = sample_frames();
        frames.extend(
            every_device_msg()
                .into_iter()
                .map(|msg| encode_frame_vec(&DeviceFrame { seq: 9, msg })),
        );
        let mut flips = 0;
        for frame in &frames {
            for bit in 0..frame.len() * 8 {
                let mut bad = frame.clone();
                bad[bit / 8] ^= 1 << (bit % 8);
                let mut host = FrameDecoder::<600>::new();
                let got = decode_all::<HostMsg, _>(&mut host, &bad);
                assert!(got.iter().all(|r| r.is_err()), "bit {bit}: {got:?}");
                let mut dev = FrameDecoder::<600>::new();
                let got = decode_all::<DeviceFrame, _>(&mut dev, &bad);
                assert!(got.iter().all(|r| r.is_err()), "bit {bit}: {got:?}");
                flips += 1;
            }
        }
        assert!(flips > 15_000, "{flips}");
    }
}
