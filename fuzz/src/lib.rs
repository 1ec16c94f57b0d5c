//! Pieces the fuzz targets share: the small valid models of the workspace
//! tests, model files, an in-memory serial link, a drift line, a
//! deterministic chunker that turns a seed into read sizes, and the checks of
//! the two log-reader targets ([`logs`]).

#![forbid(unsafe_code)]

pub mod logs;
pub mod ops;

#[path = "../../shared-model/tests/support/mod.rs"]
pub mod support;

use plumb_model::file::ModelFile;
use plumb_model::ModelOwned;
use std::collections::VecDeque;
use std::convert::Infallible;

/// The model every endpoint run boots on, and the fallback of the detector
/// target: d = 4, m = 2, k = 2, with a whitening matrix (format 4) and two
/// slow charts (format 5).
pub fn builtin_model() -> ModelOwned {
    whitened(support::example_model(4, 2, 2, 7))
}

/// A second valid model (another id, mean and mixture) to upload.
pub fn other_model(id: u32) -> ModelOwned {
    let mut m = whitened(support::example_model(4, 2, 2, 11));
    m.meta.id = id;
    m
}

/// `m` with a dense whitening matrix: unit diagonal, off-diagonal entries
/// of ±0.25 and ±0.5, so the fuzzer starts from models whose chart mixes
/// every residual; and slow charts on features 1 and 3 (λ 0.05 and 0.5,
/// each at its residual chart's centre and twice its gain).
fn whitened(mut m: ModelOwned) -> ModelOwned {
    let d = usize::from(m.dims.features);
    m.resid_whiten = (0..d * d)
        .map(|ij| match (ij / d, ij % d) {
            (i, j) if i == j => 1.0,
            (i, j) if (i + j) % 2 == 0 => 0.25,
            _ => -0.5,
        })
        .collect();
    m.slow_charts = [(1usize, 0.05f32), (3, 0.5)]
        .iter()
        .flat_map(|&(i, l)| [i as f32, l, m.resid_center[i], 2.0 * m.resid_gain[i]])
        .collect();
    m.slow_limit = m.resid_limit;
    m
}

/// The model file of `m`, without labels.
pub fn file_of(m: &ModelOwned) -> Vec<u8> {
    ModelFile {
        model: m.clone(),
        labels: vec![],
    }
    .to_bytes()
    .expect("a valid model")
}

/// Frames a payload that `ModelFile::to_bytes` would refuse.
pub fn file_unchecked(m: &ModelOwned) -> Vec<u8> {
    let payload = postcard::to_allocvec(m).expect("encodes");
    frame_payload(&payload)
}

/// Header, payload, empty label section and a correct CRC around `payload`.
pub fn frame_payload(payload: &[u8]) -> Vec<u8> {
    let mut out = vec![0u8; payload.len() + 64];
    let n = plumb_model::file::frame_into(payload, &[], &mut out).expect("room");
    out.truncate(n);
    out
}

/// Read sizes from a seed: 1 ..= `max` bytes, by SplitMix64.
pub struct Chunker {
    rng: support::Rng,
    max: usize,
}

impl Chunker {
    /// `max` 0 is taken as 1.
    pub fn new(seed: u64, max: usize) -> Self {
        Chunker {
            rng: support::Rng(seed),
            max: max.max(1),
        }
    }

    /// The next read size.
    pub fn next_len(&mut self) -> usize {
        1 + (self.rng.next_u64() % self.max as u64) as usize
    }
}

/// An in-memory serial link: what the host wrote waits in `to_device`, what
/// the device writes lands in `from_device`; reads hand out the sizes a
/// [`Chunker`] picks.
pub struct Pipe {
    /// Bytes not yet read by the device.
    pub to_device: VecDeque<u8>,
    /// Bytes the device wrote.
    pub from_device: Vec<u8>,
    /// Read sizes.
    pub chunker: Chunker,
}

impl embedded_io::ErrorType for Pipe {
    type Error = Infallible;
}

impl embedded_io::Read for Pipe {
    fn read(&mut self, buf: &mut [u8]) -> Result<usize, Infallible> {
        let n = buf
            .len()
            .min(self.chunker.next_len())
            .min(self.to_device.len());
        for (dst, src) in buf.iter_mut().zip(self.to_device.drain(..n)) {
            *dst = src;
        }
        Ok(n)
    }
}

impl embedded_io::ReadReady for Pipe {
    fn read_ready(&mut self) -> Result<bool, Infallible> {
        Ok(!self.to_device.is_empty())
    }
}

impl embedded_io::Write for Pipe {
    fn write(&mut self, buf: &[u8]) -> Result<usize, Infallible> {
        self.from_device.extend_from_slice(buf);
        Ok(buf.len())
    }

    fn flush(&mut self) -> Result<(), Infallible> {
        Ok(())
    }
}

/// A drift line that remembers its level.
#[derive(Debug, Default)]
pub struct Line(pub bool);

impl embedded_hal::digital::ErrorType for Line {
    type Error = Infallible;
}

impl embedded_hal::digital::OutputPin for Line {
    fn set_low(&mut self) -> Result<(), Infallible> {
        self.0 = false;
        Ok(())
    }

    fn set_high(&mut self) -> Result<(), Infallible> {
        self.0 = true;
        Ok(())
    }
}

/// NOR flash in memory for `plumb_firmware::endpoint::FlashSlots`: erase
/// sets a region to `0xFF`, programming ANDs bytes in (it can only clear
/// bits), reads are the bytes as they are.
#[derive(Debug, Clone)]
pub struct SimNor {
    /// The whole flash.
    pub mem: Vec<u8>,
    /// Offsets of slot A's and slot B's regions.
    pub regions: [usize; 2],
    /// Bytes per region.
    pub region_len: usize,
}

impl SimNor {
    /// Two erased regions of `region_len` bytes, back to back.
    pub fn new(region_len: usize) -> Self {
        SimNor {
            mem: vec![0xFF; 2 * region_len],
            regions: [0, region_len],
            region_len,
        }
    }

    /// The layout of its two regions.
    pub fn layout(&self) -> plumb_firmware::endpoint::FlashLayout {
        plumb_firmware::endpoint::FlashLayout {
            regions: self.regions,
            region_len: self.region_len,
        }
    }
}

impl plumb_firmware::endpoint::Flash for SimNor {
    fn memory(&self) -> &[u8] {
        &self.mem
    }

    fn erase(
        &mut self,
        slot: plumb_model::wire::Slot,
    ) -> Result<(), plumb_firmware::endpoint::SlotError> {
        let at = self.regions[slot.index()];
        self.mem[at..at + self.region_len].fill(0xFF);
        Ok(())
    }

    fn program(
        &mut self,
        offset: usize,
        bytes: &[u8],
    ) -> Result<(), plumb_firmware::endpoint::SlotError> {
        let dst = self
            .mem
            .get_mut(offset..offset + bytes.len())
            .ok_or(plumb_firmware::endpoint::SlotError::OutOfBounds)?;
        for (d, b) in dst.iter_mut().zip(bytes) {
            *d &= b;
        }
        Ok(())
    }
}
