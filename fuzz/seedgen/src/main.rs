//! Writes the seed corpora under `fuzz/corpus/<target>/`: a valid model
//! file, valid frames, endpoint runs, detector inputs, a CSV snippet and
//! small `.npy` arrays.
//! Deterministic; run it again after a format change:
//!
//! ```sh
//! cargo run --manifest-path fuzz/Cargo.toml -p plumb-fuzz-seedgen
//! ```

use plumb_fuzz::ops::{FileKind, Input, Op};
use plumb_fuzz::{builtin_model, file_of, other_model};
use plumb_model::file::{Label, ModelFile};
use plumb_model::wire::{
    encode_frame_vec, Ack, Crossing, DeviceFrame, DeviceMsg, DriftCleared, DriftRaised, HostMsg,
    Level, LinkCounters, ScoreKind, ScoreReport, ScoreTriple, Share, State, Statistic, Status,
};
use std::path::{Path, PathBuf};

fn write(dir: &Path, name: &str, bytes: &[u8]) {
    std::fs::create_dir_all(dir).expect("corpus folder");
    std::fs::write(dir.join(name), bytes).expect("seed file");
}

fn labelled_file() -> Vec<u8> {
    let labels: Vec<Label> = ["a", "b", "c", "d"]
        .iter()
        .map(|n| Label {
            name: n.to_string(),
            unit: "V".into(),
        })
        .collect();
    let mut model = builtin_model();
    model.meta.schema =
        plumb_model::schema::fingerprint(labels.iter().map(|l| (l.name.as_str(), l.unit.as_str())));
    ModelFile { model, labels }.to_bytes().expect("valid")
}

fn main() {
    let root: PathBuf = Path::new(env!("CARGO_MANIFEST_DIR")).join("../corpus");
    let builtin = builtin_model();

    // model_decode: mode byte 1 and a model file as written by the host, or
    // mode byte 0, payload length, payload and labels (framed by the target).
    let dir = root.join("model_decode");
    for (name, file) in [("valid", file_of(&builtin)), ("labelled", labelled_file())] {
        let mut bytes = vec![1];
        bytes.extend(&file);
        write(&dir, &format!("{name}.bin"), &bytes);
        let sections = plumb_model::file::split(&file).expect("valid");
        let mut bytes = vec![0];
        bytes.extend((sections.payload.len() as u16).to_le_bytes());
        bytes.extend(sections.payload);
        bytes.extend(sections.labels);
        write(&dir, &format!("{name}_payload.bin"), &bytes);
    }

    // frame_decoder: two bytes of chunking, then frames of both directions.
    let dir = root.join("frame_decoder");
    let host = [
        HostMsg::StatusQuery,
        HostMsg::Sample {
            at: 0,
            features: heapless::Vec::from_slice(&[1.0, -2.5, 0.0, 3.25]).expect("fits"),
        },
        HostMsg::UploadBegin {
            total: 300,
            crc: 0xDEAD_BEEF,
        },
        HostMsg::UploadChunk {
            offset: 0,
            data: heapless::Vec::from_slice(b"PLMD\x01\x00").expect("fits"),
        },
        HostMsg::ResendFrom { seq: 7 },
    ];
    let mut bytes = vec![3, 17];
    for m in &host {
        bytes.extend(encode_frame_vec(m));
    }
    write(&dir, "host.bin", &bytes);
    let device = [
        DeviceFrame {
            seq: 0,
            msg: DeviceMsg::Ack(Ack::Reports { on: true }),
        },
        DeviceFrame {
            seq: 1,
            msg: DeviceMsg::ScoreReport(ScoreReport {
                sample: 12,
                scores: Some(ScoreTriple {
                    spe: 0.5,
                    t2: 1.5,
                    nll: 3.0,
                }),
                state: State::Watching,
            }),
        },
        DeviceFrame {
            seq: 2,
            msg: DeviceMsg::Status(Status {
                samples: 12,
                state: State::Watching,
                hot: 0,
                faults: Default::default(),
                levels: [Level::default(); 3],
                link: LinkCounters::default(),
                last_event: Some(1),
                model_id: 7,
            }),
        },
        DeviceFrame {
            seq: 3,
            msg: DeviceMsg::DriftCleared(DriftCleared { sample: 40 }),
        },
        // Every chart of SPE and the per-sample limit of the NLL.
        DeviceFrame {
            seq: 4,
            msg: DeviceMsg::DriftRaised(DriftRaised {
                sample: 41,
                drivers: 0b101,
                scores: ScoreTriple {
                    spe: 12.5,
                    t2: 1.5,
                    nll: 9.0,
                },
                crossed: [
                    (ScoreKind::Spe, Statistic::Ewma, 2.5, 1.5),
                    (ScoreKind::Spe, Statistic::Cusum, 6.0, 4.0),
                    (ScoreKind::Spe, Statistic::Sample, 12.5, 10.0),
                    (ScoreKind::Nll, Statistic::Sample, 9.0, 8.0),
                ]
                .into_iter()
                .map(|(score, statistic, value, limit)| Crossing {
                    score,
                    statistic,
                    value,
                    limit,
                })
                .collect(),
                top: [
                    Share {
                        feature: 2,
                        value: 6.0,
                    },
                    Share {
                        feature: 0,
                        value: 1.0,
                    },
                    Share {
                        feature: 255,
                        value: 0.0,
                    },
                ],
            }),
        },
    ];
    let mut bytes = vec![9, 5];
    for f in &device {
        bytes.extend(encode_frame_vec(f));
    }
    write(&dir, "device.bin", &bytes);
    // Framed mode (top bit of the second byte): `len, message bytes` pieces.
    let mut bytes = vec![5, 0x80 | 9];
    for m in &host {
        let msg = postcard::to_allocvec(m).expect("encodes");
        bytes.push(msg.len() as u8);
        bytes.extend(msg);
    }
    for f in &device {
        let msg = postcard::to_allocvec(f).expect("encodes");
        bytes.push(msg.len() as u8);
        bytes.extend(msg);
    }
    bytes.push(255);
    bytes.extend([0x11, 0x00, 0x22, 0x05, 0x05, 0x05, 0x05, 0x00]);
    write(&dir, "framed.bin", &bytes);

    // endpoint: operation lists (see `plumb_fuzz::ops`).
    let dir = root.join("endpoint");
    let mut near: Vec<Op> = (0..30)
        .map(|i| Op::Near([(i % 7) as i8, -3, 2, (i % 3) as i8]))
        .collect();
    let mut run = vec![Op::SetReports(true), Op::SetEcho(true), Op::GreetingQuery];
    run.append(&mut near);
    run.extend([
        Op::Sample(vec![f32::NAN, 0.0, 0.0, 0.0]),
        Op::Sample(vec![1.0; 3]),
        Op::StatusQuery,
        Op::ResendFrom(0),
    ]);
    let seeds = [
        (
            "upload_other.bin",
            Input {
                read_seed: 1,
                max_read: 40,
                ops: vec![
                    Op::Upload {
                        file: FileKind::Other,
                        flip: None,
                        wrong_crc: false,
                        chunk: 127,
                        no_commit: false,
                        signed: false,
                    },
                    Op::Near([1, 2, 3, 4]),
                    Op::GreetingQuery,
                ],
            },
        ),
        (
            "upload_refused.bin",
            Input {
                read_seed: 2,
                max_read: 7,
                ops: vec![
                    Op::Upload {
                        file: FileKind::Invalid,
                        flip: None,
                        wrong_crc: false,
                        chunk: 63,
                        no_commit: false,
                        signed: false,
                    },
                    Op::Begin { total: 10, crc: 0 },
                    Op::Chunk {
                        offset: 0,
                        data: vec![1, 2, 3],
                    },
                    Op::Commit,
                    Op::Corrupt { at: 3, xor: 0x40 },
                    Op::StatusQuery,
                    Op::Zero,
                    Op::Raw(vec![0x55; 20]),
                    Op::Zero,
                ],
            },
        ),
        (
            "upload_flash.bin",
            Input {
                // Bit 6: the slots are FlashSlots on a simulated NOR flash.
                read_seed: 0x45,
                max_read: 29,
                ops: vec![
                    Op::Upload {
                        file: FileKind::Other,
                        flip: None,
                        wrong_crc: false,
                        chunk: 127,
                        no_commit: false,
                        signed: false,
                    },
                    Op::Near([1, -1, 2, 0]),
                    Op::Upload {
                        file: FileKind::Labelled,
                        flip: None,
                        wrong_crc: false,
                        chunk: 60,
                        no_commit: false,
                        signed: false,
                    },
                    Op::Upload {
                        file: FileKind::Same,
                        flip: None,
                        wrong_crc: false,
                        chunk: 90,
                        no_commit: true,
                        signed: false,
                    },
                    Op::GreetingQuery,
                ],
            },
        ),
        (
            "upload_trusted.bin",
            Input {
                // Bit 7: the device trusts only the target's key.
                read_seed: 0x84,
                max_read: 33,
                ops: vec![
                    Op::Upload {
                        file: FileKind::Other,
                        flip: None,
                        wrong_crc: false,
                        chunk: 100,
                        no_commit: false,
                        signed: false,
                    },
                    Op::Upload {
                        file: FileKind::Labelled,
                        flip: None,
                        wrong_crc: false,
                        chunk: 127,
                        no_commit: false,
                        signed: true,
                    },
                    Op::Upload {
                        file: FileKind::Other,
                        flip: Some((120, 0x01)),
                        wrong_crc: false,
                        chunk: 90,
                        no_commit: false,
                        signed: true,
                    },
                    Op::Near([3, -2, 1, 0]),
                ],
            },
        ),
        (
            "samples.bin",
            Input {
                read_seed: 3,
                max_read: 64,
                ops: run,
            },
        ),
    ];
    for (name, input) in &seeds {
        let bytes = input.to_bytes();
        assert_eq!(Input::parse(&bytes).to_bytes(), bytes, "ops round trip");
        write(&dir, name, &input.to_bytes());
    }

    // detector: mode, payload length, payload, samples.
    let dir = root.join("detector");
    let payload = postcard::to_allocvec(&builtin).expect("encodes");
    let specials = [
        0.0f32,
        0.1,
        -0.2,
        1.0,
        f32::NAN,
        f32::INFINITY,
        f32::NEG_INFINITY,
        f32::MIN_POSITIVE / 2.0,
        -0.0,
        1e30,
        0.3,
        -0.7,
    ];
    let mut bytes = vec![3];
    bytes.extend((payload.len() as u16).to_le_bytes());
    bytes.extend(&payload);
    for v in specials.iter().cycle().take(48) {
        bytes.extend(v.to_le_bytes());
    }
    write(&dir, "payload_relative.bin", &bytes);
    let file = file_of(&other_model(9));
    let mut bytes = vec![4];
    bytes.extend((file.len() as u16).to_le_bytes());
    bytes.extend(&file);
    for (i, v) in specials.iter().enumerate() {
        bytes.push(if i % 3 == 0 { 4 } else { 3 });
        for _ in 0..4 {
            bytes.extend(v.to_le_bytes());
        }
    }
    write(&dir, "file_lengths.bin", &bytes);

    // csv_reader: mode byte, then a small log.
    let dir = root.join("csv_reader");
    let csv = "t[s],a[V],b\n0.0,1.5,2\n0.1,-2e-3,3\n\n0.2,NaN,4\r\n0.3,,5\n";
    let mut bytes = vec![0x01];
    bytes.extend(csv.as_bytes());
    write(&dir, "log.csv", &bytes);
    let csv = "\u{feff}\"a[V]\",b,\"x y[m/s]\"\n1,2,3\n4,5,6";
    let mut bytes = vec![0x0C];
    bytes.extend(csv.as_bytes());
    write(&dir, "quoted.csv", &bytes);

    // array_reader: NumPy .npy files as `np.save` lays them out (version 1.0
    // and 2.0 headers padded to 64 bytes), with a NaN and an infinity.
    let dir = root.join("array_reader");
    let rows: [[f64; 3]; 4] = [
        [0.0, 1.5, -2.0],
        [0.1, f64::NAN, 3.0],
        [0.2, 4.0, f64::INFINITY],
        [0.3, 5.0, 6.0],
    ];
    let f8: Vec<u8> = rows
        .iter()
        .flatten()
        .flat_map(|v| v.to_le_bytes())
        .collect();
    let f4: Vec<u8> = rows
        .iter()
        .flatten()
        .flat_map(|&v| (v as f32).to_le_bytes())
        .collect();
    write(&dir, "plain_f8.npy", &npy(1, "'<f8'", "(4, 3)", &f8));
    write(&dir, "plain_f4.npy", &npy(1, "'<f4'", "(4, 3)", &f4));
    let fields = "[('t[s]', '<f8'), ('a', '<f8'), ('b', '<f8')]";
    write(&dir, "structured.npy", &npy(1, fields, "(4,)", &f8));
    write(&dir, "version2.npy", &npy(2, "'<f8'", "(4, 3)", &f8));
}

/// An `.npy` file: magic, version `major`.0, header length, the header
/// dictionary padded with spaces to a multiple of 64 bytes, the values.
fn npy(major: u8, descr: &str, shape: &str, payload: &[u8]) -> Vec<u8> {
    let prefix = if major == 1 { 10 } else { 12 };
    let mut h = format!("{{'descr': {descr}, 'fortran_order': False, 'shape': {shape}, }}");
    let pad = (64 - (prefix + h.len() + 1) % 64) % 64;
    h.push_str(&" ".repeat(pad));
    h.push('\n');
    let mut out = b"\x93NUMPY".to_vec();
    out.extend_from_slice(&[major, 0]);
    if major == 1 {
        out.extend_from_slice(&(h.len() as u16).to_le_bytes());
    } else {
        out.extend_from_slice(&(h.len() as u32).to_le_bytes());
    }
    out.extend_from_slice(h.as_bytes());
    out.extend_from_slice(payload);
    out
}
