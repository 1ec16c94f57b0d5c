//! The endpoint target's input: a byte format for a list of operations,
//! with a writer so that seeds can be generated. Reading never fails: a
//! short input reads as zeros and ends the list.

/// A model file to upload.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FileKind {
    /// The running model again (same id).
    Same,
    /// Another valid model.
    Other,
    /// A valid model with a label section.
    Labelled,
    /// Framed and CRC-correct, but not a valid model (a zero scale).
    Invalid,
    /// Valid, but over the device's feature capacity.
    TooWide,
}

impl FileKind {
    const ALL: [FileKind; 5] = [
        FileKind::Same,
        FileKind::Other,
        FileKind::Labelled,
        FileKind::Invalid,
        FileKind::TooWide,
    ];
}

/// One step of the stream sent to the device.
#[derive(Debug, Clone, PartialEq)]
pub enum Op {
    /// Bytes as they are.
    Raw(Vec<u8>),
    /// A lone zero (flush).
    Zero,
    /// The next frame gets `xor` at `at` (modulo its length, delimiter spared).
    Corrupt {
        /// Byte position.
        at: u16,
        /// Bits flipped.
        xor: u8,
    },
    /// A sample of arbitrary values and length.
    Sample(Vec<f32>),
    /// A sample near the model's mean, in tenths of a scale.
    Near([i8; 4]),
    /// Status query.
    StatusQuery,
    /// Resend from a sequence number.
    ResendFrom(u32),
    /// Reports on or off.
    SetReports(bool),
    /// Feature echoes on or off.
    SetEcho(bool),
    /// Statistics reset.
    ResetStats,
    /// Greeting query.
    GreetingQuery,
    /// Upload begin with any length and CRC.
    Begin {
        /// File length.
        total: u16,
        /// Announced CRC.
        crc: u32,
    },
    /// Upload chunk at any offset.
    Chunk {
        /// Offset.
        offset: u16,
        /// Bytes (at most `MAX_CHUNK` are sent).
        data: Vec<u8>,
    },
    /// Upload commit.
    Commit,
    /// A whole upload: begin, chunks, commit.
    Upload {
        /// Which file.
        file: FileKind,
        /// Damage one byte of the file after its CRC was taken.
        flip: Option<(u16, u8)>,
        /// Announce a wrong whole-file CRC.
        wrong_crc: bool,
        /// Chunk size − 1 (modulo `MAX_CHUNK`).
        chunk: u8,
        /// Stop before the commit.
        no_commit: bool,
        /// Send the file signed with the target's key (before any damage).
        signed: bool,
    },
}

/// A whole endpoint run.
#[derive(Debug, Clone, PartialEq)]
pub struct Input {
    /// Seed of the read sizes; with bit 7 set the device runs only models
    /// signed by the target's key ([`Input::trusted`]).
    pub read_seed: u8,
    /// Largest read (0 is taken as 1).
    pub max_read: u8,
    /// The operations, in order.
    pub ops: Vec<Op>,
}

struct Reader<'a>(&'a [u8]);

impl Reader<'_> {
    fn u8(&mut self) -> u8 {
        match self.0.split_first() {
            Some((&b, rest)) => {
                self.0 = rest;
                b
            }
            None => 0,
        }
    }
    fn u16(&mut self) -> u16 {
        u16::from_le_bytes([self.u8(), self.u8()])
    }
    fn u32(&mut self) -> u32 {
        u32::from_le_bytes([self.u8(), self.u8(), self.u8(), self.u8()])
    }
    fn bytes(&mut self) -> Vec<u8> {
        let n = usize::from(self.u8()).min(self.0.len());
        let (a, b) = self.0.split_at(n);
        self.0 = b;
        a.to_vec()
    }
}

const OPS: u8 = 14;

impl Input {
    /// Whether the device of this run trusts only signed models.
    pub fn trusted(&self) -> bool {
        self.read_seed & 0x80 != 0
    }

    /// Reads operations until the bytes run out.
    pub fn parse(data: &[u8]) -> Input {
        let mut r = Reader(data);
        let read_seed = r.u8();
        let max_read = r.u8();
        let mut ops = Vec::new();
        while !r.0.is_empty() {
            let op = match r.u8() % OPS {
                0 => Op::Raw(r.bytes()),
                1 => Op::Zero,
                2 => Op::Corrupt {
                    at: r.u16(),
                    xor: r.u8(),
                },
                3 => {
                    let n = usize::from(r.u8());
                    Op::Sample((0..n).map(|_| f32::from_bits(r.u32())).collect())
                }
                4 => Op::Near([r.u8(), r.u8(), r.u8(), r.u8()].map(|b| b as i8)),
                5 => Op::StatusQuery,
                6 => Op::ResendFrom(r.u32()),
                // Bit 1 picks the feature echo switch (older inputs have
                // 0 or 1 here and keep their meaning).
                7 => match r.u8() {
                    b if b & 2 != 0 => Op::SetEcho(b & 1 == 1),
                    b => Op::SetReports(b & 1 == 1),
                },
                8 => Op::ResetStats,
                9 => Op::GreetingQuery,
                10 => Op::Begin {
                    total: r.u16(),
                    crc: r.u32(),
                },
                11 => Op::Chunk {
                    offset: r.u16(),
                    data: r.bytes(),
                },
                12 => Op::Commit,
                _ => {
                    let flags = r.u8();
                    let file = FileKind::ALL[usize::from(flags & 7) % FileKind::ALL.len()];
                    let at = r.u16();
                    let xor = r.u8();
                    Op::Upload {
                        file,
                        flip: (flags & 8 != 0).then_some((at, xor)),
                        wrong_crc: flags & 16 != 0,
                        chunk: r.u8(),
                        no_commit: flags & 32 != 0,
                        signed: flags & 64 != 0,
                    }
                }
            };
            ops.push(op);
        }
        Input {
            read_seed,
            max_read,
            ops,
        }
    }

    /// The bytes that [`Input::parse`] reads back as `self` (raw data and
    /// sample lists are cut to 255 entries).
    pub fn to_bytes(&self) -> Vec<u8> {
        let mut out = vec![self.read_seed, self.max_read];
        for op in &self.ops {
            match op {
                Op::Raw(b) => {
                    out.push(0);
                    out.push(b.len().min(255) as u8);
                    out.extend(b.iter().take(255));
                }
                Op::Zero => out.push(1),
                Op::Corrupt { at, xor } => {
                    out.push(2);
                    out.extend(at.to_le_bytes());
                    out.push(*xor);
                }
                Op::Sample(v) => {
                    out.push(3);
                    out.push(v.len().min(255) as u8);
                    for x in v.iter().take(255) {
                        out.extend(x.to_bits().to_le_bytes());
                    }
                }
                Op::Near(t) => {
                    out.push(4);
                    out.extend(t.map(|v| v as u8));
                }
                Op::StatusQuery => out.push(5),
                Op::ResendFrom(s) => {
                    out.push(6);
                    out.extend(s.to_le_bytes());
                }
                Op::SetReports(on) => out.extend([7, u8::from(*on)]),
                Op::SetEcho(on) => out.extend([7, 2 | u8::from(*on)]),
                Op::ResetStats => out.push(8),
                Op::GreetingQuery => out.push(9),
                Op::Begin { total, crc } => {
                    out.push(10);
                    out.extend(total.to_le_bytes());
                    out.extend(crc.to_le_bytes());
                }
                Op::Chunk { offset, data } => {
                    out.push(11);
                    out.extend(offset.to_le_bytes());
                    out.push(data.len().min(255) as u8);
                    out.extend(data.iter().take(255));
                }
                Op::Commit => out.push(12),
                Op::Upload {
                    file,
                    flip,
                    wrong_crc,
                    chunk,
                    no_commit,
                    signed,
                } => {
                    let kind = FileKind::ALL.iter().position(|k| k == file).unwrap_or(0) as u8;
                    let flags = kind
                        | if flip.is_some() { 8 } else { 0 }
                        | if *wrong_crc { 16 } else { 0 }
                        | if *no_commit { 32 } else { 0 }
                        | if *signed { 64 } else { 0 };
                    let (at, xor) = flip.unwrap_or((0, 0));
                    out.push(13);
                    out.push(flags);
                    out.extend(at.to_le_bytes());
                    out.push(xor);
                    out.push(*chunk);
                }
            }
        }
        out
    }
}
