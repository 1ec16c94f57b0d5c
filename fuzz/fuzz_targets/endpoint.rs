//! The serial endpoint booted on a valid built-in model with two slots, fed a
//! byte stream through an in-memory `embedded-io` link with random read
//! sizes. The stream is built from operations: raw bytes, well-formed host
//! frames (samples, queries, upload steps, whole uploads of good and bad
//! files) and corrupted frames, read from the input by `plumb_fuzz::ops`.
//!
//! * Nothing panics; `poll` never fails on a link that never fails.
//! * Everything the device writes decodes as device frames, with sequence
//!   numbers in order (a resent event keeps its old number).
//! * The running model changes only when a shadow of the upload protocol,
//!   fed the same bytes, saw a complete upload whose whole-file CRC matched
//!   and whose file passes every check; it then runs that file's model.
//! * With bit 6 of the first input byte set the slots are `FlashSlots` on a
//!   simulated NOR flash (erase to `0xFF`, programming only clears bits)
//!   instead of `RamSlots`; every check above holds the same.
//! * With bit 7 of the first input byte set the device trusts only files
//!   signed by the target's key (uploads may be sent signed, and damaged
//!   after signing): the shadow then also needs a valid signature, and every
//!   switch must be to a file the target signed itself (a fuzzer cannot
//!   forge ed25519).
//! * The drift line follows the drift state.
#![no_main]

use libfuzzer_sys::fuzz_target;
use plumb_firmware::endpoint::{Config, Endpoint, FlashSlots, ModelSlots, RamSlots, FILE_OFFSET};
use plumb_firmware::{Detector, DriftState};
use plumb_fuzz::ops::{FileKind, Input, Op};
use plumb_fuzz::{
    builtin_model, file_of, file_unchecked, other_model, Chunker, Line, Pipe, SimNor,
};
use plumb_model::file::{self, Label, ModelFile};
use plumb_model::signature::{self, TrustedKey};
use plumb_model::wire::{
    crc32, encode_frame_vec, Ack, DeviceFrame, DeviceFrameDecoder, DeviceMsg, HostFrameDecoder,
    HostMsg, Slot, MAX_CHUNK,
};
use std::collections::VecDeque;
use std::sync::OnceLock;

/// Bytes per RAM slot.
const SLOT: usize = 2048;

/// Seed of the key a trusting device accepts (fixed: the target checks the
/// policy, not keys).
const SEED: [u8; 32] = [9; 32];

/// Derived once: deriving a public key is a scalar multiplication, as dear as
/// a signature check, and every trusting run and signed commit needs it.
fn trusted_key() -> TrustedKey {
    static KEY: OnceLock<TrustedKey> = OnceLock::new();
    *KEY.get_or_init(|| TrustedKey::new(signature::public_key(&SEED)))
}

struct Files {
    same: Vec<u8>,
    other: Vec<u8>,
    labelled: Vec<u8>,
    invalid: Vec<u8>,
    too_wide: Vec<u8>,
    /// The five above signed with [`SEED`], in `FileKind` order.
    signed: [Vec<u8>; 5],
}

impl Files {
    fn get(&self, kind: FileKind, signed: bool) -> &[u8] {
        let i = match kind {
            FileKind::Same => 0,
            FileKind::Other => 1,
            FileKind::Labelled => 2,
            FileKind::Invalid => 3,
            FileKind::TooWide => 4,
        };
        if signed {
            return &self.signed[i];
        }
        [
            &self.same,
            &self.other,
            &self.labelled,
            &self.invalid,
            &self.too_wide,
        ][i]
    }
}

fn files() -> &'static Files {
    static FILES: OnceLock<Files> = OnceLock::new();
    FILES.get_or_init(|| {
        let mut labelled = other_model(0x0B0B_0002);
        let labels: Vec<Label> = (0..4)
            .map(|i| Label {
                name: format!("f{i}"),
                unit: "V".into(),
            })
            .collect();
        labelled.meta.schema = plumb_model::schema::fingerprint(
            labels.iter().map(|l| (l.name.as_str(), l.unit.as_str())),
        );
        let labelled = ModelFile {
            model: labelled,
            labels,
        }
        .to_bytes()
        .expect("valid");
        let mut invalid = other_model(0x0B0B_0003);
        invalid.scale[1] = 0.0;
        let mut wide = plumb_fuzz::support::example_model(65, 1, 1, 3);
        wide.meta.id = 0x0B0B_0004;
        let (same, other, invalid, too_wide) = (
            file_of(&builtin_model()),
            file_of(&other_model(0x0B0B_0001)),
            file_unchecked(&invalid),
            file_of(&wide),
        );
        let sign = |f: &[u8]| signature::sign(f, &SEED).expect("a framed file signs");
        let signed = [
            sign(&same),
            sign(&other),
            sign(&labelled),
            sign(&invalid),
            sign(&too_wide),
        ];
        Files {
            same,
            other,
            labelled,
            invalid,
            too_wide,
            signed,
        }
    })
}

fn frame(msg: &HostMsg, corrupt: &mut Option<(u16, u8)>, out: &mut Vec<u8>) {
    let mut f = encode_frame_vec(msg);
    if let Some((at, xor)) = corrupt.take() {
        let body = f.len() - 1;
        f[usize::from(at) % body] ^= xor;
    }
    out.extend_from_slice(&f);
}

/// The built-in model's detector, built once (for its dimensions).
fn builtin_detector() -> &'static Detector {
    static DET: OnceLock<Detector> = OnceLock::new();
    DET.get_or_init(|| Detector::new(builtin_model().to_device().expect("fits")).expect("valid"))
}

fn stream(ops: &[Op]) -> Vec<u8> {
    let builtin = builtin_detector().model();
    let mut out = Vec::new();
    let mut corrupt = None;
    // The index each sample is sent at: the device's count if every earlier
    // sample arrived and no model switched since the last reset; otherwise
    // the device drops the sample and answers with a status (both paths).
    let mut at = 0u64;
    for op in ops {
        let msg = match op {
            Op::Raw(bytes) => {
                out.extend_from_slice(bytes);
                continue;
            }
            Op::Zero => {
                out.push(0);
                continue;
            }
            Op::Corrupt { at, xor } => {
                corrupt = Some((*at, *xor));
                continue;
            }
            Op::Sample(v) => {
                at += 1;
                HostMsg::Sample {
                    at: (at - 1) as u32,
                    features: v.iter().copied().take(64).collect(),
                }
            }
            Op::Near(t) => {
                at += 1;
                HostMsg::Sample {
                    at: (at - 1) as u32,
                    features: t
                        .iter()
                        .zip(builtin.mean.iter().zip(&builtin.scale))
                        .map(|(t, (mu, s))| mu + f32::from(*t) * 0.1 * s)
                        .collect(),
                }
            }
            Op::StatusQuery => HostMsg::StatusQuery,
            Op::ResendFrom(seq) => HostMsg::ResendFrom { seq: *seq },
            Op::SetReports(on) => HostMsg::SetReports { on: *on },
            Op::SetEcho(on) => HostMsg::SetEcho { on: *on },
            Op::ResetStats => {
                at = 0;
                HostMsg::ResetStats
            }
            Op::GreetingQuery => HostMsg::GreetingQuery,
            Op::Begin { total, crc } => HostMsg::UploadBegin {
                total: u32::from(*total),
                crc: *crc,
            },
            Op::Chunk { offset, data } => HostMsg::UploadChunk {
                offset: u32::from(*offset),
                data: data.iter().copied().take(MAX_CHUNK).collect(),
            },
            Op::Commit => HostMsg::UploadCommit,
            Op::Upload {
                file,
                flip,
                wrong_crc,
                chunk,
                no_commit,
                signed,
            } => {
                let mut bytes = files().get(*file, *signed).to_vec();
                let crc = crc32(&bytes) ^ u32::from(*wrong_crc);
                if let Some((at, xor)) = flip {
                    let i = usize::from(*at) % bytes.len();
                    bytes[i] ^= xor;
                }
                let total = bytes.len() as u32;
                frame(&HostMsg::UploadBegin { total, crc }, &mut corrupt, &mut out);
                let size = usize::from(*chunk) % MAX_CHUNK + 1;
                for (i, c) in bytes.chunks(size).enumerate() {
                    let data = heapless::Vec::from_slice(c).expect("≤ MAX_CHUNK");
                    let offset = (i * size) as u32;
                    frame(
                        &HostMsg::UploadChunk { offset, data },
                        &mut corrupt,
                        &mut out,
                    );
                }
                if *no_commit {
                    continue;
                }
                HostMsg::UploadCommit
            }
        };
        frame(&msg, &mut corrupt, &mut out);
    }
    out
}

/// The upload protocol as PROTOCOL.md states it, on the host messages the
/// device received.
struct Shadow {
    /// The device trusts only [`trusted_key`].
    trusted: bool,
    rx: HostFrameDecoder,
    upload: Option<(u32, u32, Vec<u8>)>,
    model_id: u32,
    active: Option<Slot>,
    /// Model id of every switch, in order.
    switches: Vec<u32>,
}

impl Shadow {
    fn feed(&mut self, mut bytes: &[u8]) {
        loop {
            bytes = self.rx.feed(bytes);
            match self.rx.take_message::<HostMsg>() {
                Some(Ok(msg)) => self.handle(msg),
                Some(Err(_)) => {}
                None if bytes.is_empty() => return,
                None => {}
            }
        }
    }

    fn handle(&mut self, msg: HostMsg) {
        match msg {
            HostMsg::UploadBegin { total, crc } => {
                self.upload =
                    (total > 0 && total as usize <= SLOT).then(|| (total, crc, Vec::new()));
            }
            HostMsg::UploadChunk { offset, data } => {
                if let Some((total, _, got)) = &mut self.upload {
                    if offset as usize == got.len() {
                        if got.len() + data.len() > *total as usize {
                            self.upload = None;
                        } else {
                            got.extend_from_slice(&data);
                        }
                    }
                }
            }
            HostMsg::UploadCommit => {
                let complete = matches!(&self.upload, Some((t, _, g)) if *t as usize == g.len());
                if complete {
                    let (_, crc, file) = self.upload.take().expect("checked");
                    let signed_ok = || {
                        let ok = file::split(&file)
                            .is_ok_and(|s| signature::verify(&s, &trusted_key()).is_ok());
                        if ok {
                            // Only the target holds the key.
                            assert!(
                                files().signed.iter().any(|f| *f == file),
                                "a file the target never signed verifies"
                            );
                        }
                        ok
                    };
                    if crc32(&file) == crc && (!self.trusted || signed_ok()) {
                        if let Ok(det) = Detector::from_file(&file) {
                            self.model_id = det.model().meta.id;
                            self.active = Some(self.active.map_or(Slot::A, Slot::other));
                            self.switches.push(self.model_id);
                        }
                    }
                }
            }
            _ => {}
        }
    }
}

fuzz_target!(|data: &[u8]| {
    let input = Input::parse(data);
    if input.read_seed & 0x40 != 0 {
        let flash = SimNor::new(SLOT + FILE_OFFSET);
        let layout = flash.layout();
        let slots = FlashSlots::new(flash, layout);
        assert_eq!(slots.capacity() as usize, SLOT);
        run(&input, slots);
    } else {
        run(&input, RamSlots::<SLOT>::new());
    }
});

fn run<S: ModelSlots>(input: &Input, slots: S) {
    let first_id = builtin_detector().model().meta.id;
    // Fresh slots: the endpoint boots on the built-in file, which it keeps to
    // decode again when a checked upload fails over the running model.
    let mut ep: Endpoint<S, Line> =
        Endpoint::boot(slots, Line::default(), Some(&files().same)).expect("built-in model");
    let trusted = input.trusted();
    if trusted {
        ep.set_config(Config {
            trusted_key: Some(trusted_key()),
            ..Config::DEFAULT
        });
    }
    let bytes = stream(&input.ops);
    let mut pipe = Pipe {
        to_device: VecDeque::from(bytes.clone()),
        from_device: Vec::new(),
        chunker: Chunker::new(u64::from(input.read_seed), usize::from(input.max_read)),
    };
    let mut shadow = Shadow {
        trusted,
        rx: HostFrameDecoder::new(),
        upload: None,
        model_id: first_id,
        active: None,
        switches: Vec::new(),
    };
    let mut rx = DeviceFrameDecoder::new();
    let mut next_seq = 0u32;
    let mut switched_acks = 0usize;
    let mut done = 0usize;
    ep.greet(&mut pipe).expect("in-memory link");
    while !pipe.to_device.is_empty() || done == 0 {
        let polled = ep.poll(&mut pipe).expect("in-memory link never fails");
        shadow.feed(&bytes[done..done + polled.bytes]);
        done += polled.bytes;

        // Device output: whole, valid frames in sequence.
        let out = std::mem::take(&mut pipe.from_device);
        let mut rest = &out[..];
        loop {
            rest = rx.feed(rest);
            match rx.take_message::<DeviceFrame>() {
                Some(Ok(f)) => {
                    if f.seq == next_seq {
                        next_seq = next_seq.wrapping_add(1);
                    } else {
                        assert!(f.msg.is_retained(), "out of sequence: {f:?}");
                        assert!(f.seq < next_seq, "resent from the future: {f:?}");
                    }
                    if let DeviceMsg::Ack(Ack::ModelSwitched { model_id, .. }) = f.msg {
                        assert_eq!(Some(&model_id), shadow.switches.get(switched_acks));
                        switched_acks += 1;
                    }
                }
                Some(Err(e)) => panic!("device sent a bad frame: {e}"),
                None if rest.is_empty() => break,
                None => {}
            }
        }

        // The running model only moves with a complete, checked upload.
        assert_eq!(ep.detector().model().meta.id, shadow.model_id);
        assert_eq!(ep.active_slot(), shadow.active);
        assert_eq!(switched_acks, shadow.switches.len());
        assert_eq!(
            ep.pin().0,
            ep.detector().state() == DriftState::Drifting,
            "drift line"
        );
        if polled.bytes == 0 {
            break;
        }
    }
    assert!(pipe.to_device.is_empty());
}
