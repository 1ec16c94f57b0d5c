//! The model file (`.plumb`): header, postcard payload, label section, CRC-32.
//!
//! ```text
//! offset  size  field
//! 0       4     magic "PLMD"
//! 4       2     format version, u16 little-endian (FORMAT_VERSION)
//! 6       2     flags, u16 little-endian (bit 0: signed; others must be 0)
//! 8       4     payload length P, u32 little-endian
//! 12      4     label section length L, u32 little-endian
//! 16      P     payload: postcard encoding of the model
//! 16+P    L     labels: postcard encoding of the feature names and units (host only)
//! 16+P+L  S     signature block, S = 72 when flag bit 0 is set, else 0 (`signature`)
//! 16+P+L+S 4    CRC-32/ISO-HDLC of bytes [0, 16+P+L+S), u32 little-endian
//! ```
//! See `FORMAT.md` for the full specification and its stability rules.

use crate::error::ModelError;
use crate::signature::{SignatureBlock, BLOCK_LEN, FLAG_SIGNED, KNOWN_FLAGS};
use crate::{Capacity, Dims, Model, ModelMeta};

/// The four bytes every model file starts with.
pub const MAGIC: [u8; 4] = *b"PLMD";
/// The model format version this crate reads and writes.
pub const FORMAT_VERSION: u16 = 5;
/// Header length in bytes.
pub const HEADER_LEN: usize = 16;
/// CRC trailer length in bytes.
pub const CRC_LEN: usize = 4;
/// The CRC of model files (and of wire frames): CRC-32/ISO-HDLC, the CRC of
/// zlib and Ethernet (reflected polynomial 0xEDB88320, initial value and
/// final XOR 0xFFFFFFFF; check value 0xCBF43926 for "123456789").
///
/// Four bits at a time from a 16-entry table: 64 bytes of flash where a
/// table for whole bytes takes 1 KiB, for two lookups per byte.
pub fn crc32(bytes: &[u8]) -> u32 {
    let mut crc = !0u32;
    for &b in bytes {
        crc ^= u32::from(b);
        crc = (crc >> 4) ^ CRC_NIBBLES[(crc & 0xF) as usize];
        crc = (crc >> 4) ^ CRC_NIBBLES[(crc & 0xF) as usize];
    }
    !crc
}

/// `CRC_NIBBLES[i]`: the CRC register after shifting the four bits of `i`
/// through the reflected polynomial.
const CRC_NIBBLES: [u32; 16] = {
    let mut table = [0u32; 16];
    let mut i = 0;
    while i < 16 {
        let mut c = i as u32;
        let mut bit = 0;
        while bit < 4 {
            c = if c & 1 != 0 {
                (c >> 1) ^ 0xEDB8_8320
            } else {
                c >> 1
            };
            bit += 1;
        }
        table[i] = c;
        i += 1;
    }
    table
};

/// The parts of a model file after the framing was checked.
#[derive(Debug, Clone, Copy)]
pub struct Sections<'a> {
    /// Format version.
    pub version: u16,
    /// The postcard-encoded model.
    pub payload: &'a [u8],
    /// The postcard-encoded label section (may be empty).
    pub labels: &'a [u8],
    /// The signature block, when the header's signed flag is set (not yet
    /// verified: see [`crate::signature::verify`]).
    pub signature: Option<SignatureBlock<'a>>,
}

/// Checks magic, version, flags, lengths and CRC; returns the sections. A
/// signed file's signature is located, not verified. Every byte is read
/// through a checked slice or a fixed-size header, so no input can panic.
pub fn split(bytes: &[u8]) -> Result<Sections<'_>, ModelError> {
    split_versions(bytes, |v| v == FORMAT_VERSION)
}

/// Format versions the host reads ([`ModelFile::from_bytes`]; a version 1
/// file gets the global SPE centre and spread for every mode, versions 1 and
/// 2 the residual chart off, version 3 no whitening matrix, versions 1–4 no
/// slow charts). Devices read [`FORMAT_VERSION`] only.
pub const HOST_VERSIONS: [u16; 5] = [1, 2, 3, 4, FORMAT_VERSION];

/// [`split`] for a host reader: any of [`HOST_VERSIONS`].
pub fn split_host(bytes: &[u8]) -> Result<Sections<'_>, ModelError> {
    split_versions(bytes, |v| HOST_VERSIONS.contains(&v))
}

/// [`split`], accepting the versions `known` says yes to.
fn split_versions(bytes: &[u8], known: impl Fn(u16) -> bool) -> Result<Sections<'_>, ModelError> {
    let got = bytes.len() as u32;
    let short = ModelError::Truncated {
        needed: HEADER_LEN as u32,
        got,
    };
    if *bytes.first_chunk::<4>().ok_or(short)? != MAGIC {
        return Err(ModelError::BadMagic);
    }
    let [_, _, _, _, v0, v1, f0, f1, p0, p1, p2, p3, l0, l1, l2, l3] =
        *bytes.first_chunk::<HEADER_LEN>().ok_or(short)?;
    let version = u16::from_le_bytes([v0, v1]);
    if !known(version) {
        return Err(ModelError::UnknownVersion { found: version });
    }
    let flags = u16::from_le_bytes([f0, f1]);
    if flags & !KNOWN_FLAGS != 0 {
        return Err(ModelError::UnknownFlags { found: flags });
    }
    let block_len = if flags & FLAG_SIGNED != 0 {
        BLOCK_LEN as u64
    } else {
        0
    };
    let payload_len = u32::from_le_bytes([p0, p1, p2, p3]) as u64;
    let labels_len = u32::from_le_bytes([l0, l1, l2, l3]) as u64;
    let total = HEADER_LEN as u64 + payload_len + labels_len + block_len + CRC_LEN as u64;
    let truncated = ModelError::Truncated {
        needed: total.min(u32::MAX as u64) as u32,
        got,
    };
    if (bytes.len() as u64) < total {
        return Err(truncated);
    }
    if (bytes.len() as u64) > total {
        return Err(ModelError::TrailingBytes {
            extra: (bytes.len() as u64 - total) as u32,
        });
    }
    // The length is now exactly `total`, so none of these can fail.
    let (body, stored) = bytes.split_last_chunk::<CRC_LEN>().ok_or(truncated)?;
    let stored = u32::from_le_bytes(*stored);
    let computed = crc32(body);
    if stored != computed {
        return Err(ModelError::BadCrc { stored, computed });
    }
    let payload_end = HEADER_LEN + payload_len as usize;
    let labels_end = body.len() - block_len as usize;
    Ok(Sections {
        version,
        payload: bytes.get(HEADER_LEN..payload_end).ok_or(truncated)?,
        labels: bytes.get(payload_end..labels_end).ok_or(truncated)?,
        signature: if block_len > 0 {
            SignatureBlock::at(bytes, labels_end)
        } else {
            None
        },
    })
}

/// Reads only the identity and dimensions of a payload (they are encoded first).
pub fn peek(payload: &[u8]) -> Result<(ModelMeta, Dims), ModelError> {
    postcard::take_from_bytes::<(ModelMeta, Dims)>(payload)
        .map(|(head, _)| head)
        .map_err(|_| ModelError::Undecodable)
}

/// Decodes a model file into fixed-capacity storage and validates it, refusing
/// a model over `cap`. Never panics, for any input.
///
/// Returns the model by value (about 22 KiB): convenient on a host. A device
/// decodes into a place it already has with [`decode_into`].
pub fn decode(bytes: &[u8], cap: &Capacity) -> Result<Model, ModelError> {
    let mut model = Model::EMPTY;
    decode_into(bytes, cap, &mut model)?;
    Ok(model)
}

/// Decodes and validates a bare payload (no header, no CRC); by value, as
/// [`decode`].
pub fn decode_payload(payload: &[u8], cap: &Capacity) -> Result<Model, ModelError> {
    let mut model = Model::EMPTY;
    decode_payload_into(payload, cap, &mut model)?;
    Ok(model)
}

/// [`decode`] into `model`, in place: the file's framing and CRC are checked
/// first, then the payload is decoded field by field into `model`'s own
/// storage (no model-sized value is built or moved) and validated. The same
/// checks and errors as [`decode`]; never panics.
///
/// On success `model` holds the file's model, validated. On error `model` is
/// [`Model::EMPTY`] (whatever it held before, and whatever part of the
/// payload was read, is gone): it fails validation, so it cannot be run by
/// mistake.
//
// Out of line: inlined into `Detector::decode_model` it was compiled with
// the caller's crate settings (the boards build this crate at
// `opt-level = "z"` and the firmware crate at "s"), 124 bytes more.
#[inline(never)]
pub fn decode_into(bytes: &[u8], cap: &Capacity, model: &mut Model) -> Result<(), ModelError> {
    match split(bytes) {
        Ok(sections) => decode_payload_into(sections.payload, cap, model),
        Err(e) => {
            model.clear();
            Err(e)
        }
    }
}

/// [`decode_payload`] into `model`, in place; on error `model` is
/// [`Model::EMPTY`], as with [`decode_into`].
pub fn decode_payload_into(
    payload: &[u8],
    cap: &Capacity,
    model: &mut Model,
) -> Result<(), ModelError> {
    let result = fill(payload, cap, model);
    if result.is_err() {
        model.clear();
    }
    result
}

/// The steps of [`decode_payload_into`]; on error `model` may hold part of
/// the payload.
fn fill(payload: &[u8], cap: &Capacity, model: &mut Model) -> Result<(), ModelError> {
    use serde::de::DeserializeSeed;
    let (_, dims) = peek(payload)?;
    cap.admits(&dims)?;
    Capacity::DEVICE.admits(&dims)?;
    let mut de = postcard::Deserializer::from_bytes(payload);
    crate::inplace::ModelSeed(model)
        .deserialize(&mut de)
        .map_err(|_| ModelError::Undecodable)?;
    let rest = de.finalize().map_err(|_| ModelError::Undecodable)?;
    if !rest.is_empty() {
        return Err(ModelError::Undecodable);
    }
    model.validate()
}

/// Writes the framing around an already encoded payload and label section
/// into `out`; returns the length written.
pub fn frame_into(payload: &[u8], labels: &[u8], out: &mut [u8]) -> Result<usize, ModelError> {
    let total = HEADER_LEN + payload.len() + labels.len() + CRC_LEN;
    if out.len() < total {
        return Err(ModelError::BufferTooSmall);
    }
    out[..4].copy_from_slice(&MAGIC);
    out[4..6].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
    out[6..8].copy_from_slice(&0u16.to_le_bytes());
    out[8..12].copy_from_slice(&(payload.len() as u32).to_le_bytes());
    out[12..16].copy_from_slice(&(labels.len() as u32).to_le_bytes());
    let p_end = HEADER_LEN + payload.len();
    out[HEADER_LEN..p_end].copy_from_slice(payload);
    out[p_end..p_end + labels.len()].copy_from_slice(labels);
    let body_end = p_end + labels.len();
    let crc = crc32(&out[..body_end]);
    out[body_end..total].copy_from_slice(&crc.to_le_bytes());
    Ok(total)
}

/// Encodes a device model (with an empty label section) into `out`.
pub fn encode_into(model: &Model, out: &mut [u8]) -> Result<usize, ModelError> {
    // Encode the payload in place after the header, then frame around it.
    if out.len() < HEADER_LEN + CRC_LEN {
        return Err(ModelError::BufferTooSmall);
    }
    let cap = out.len() - CRC_LEN;
    let payload_len = postcard::to_slice(model, &mut out[HEADER_LEN..cap])
        .map_err(|_| ModelError::BufferTooSmall)?
        .len();
    out[..4].copy_from_slice(&MAGIC);
    out[4..6].copy_from_slice(&FORMAT_VERSION.to_le_bytes());
    out[6..8].copy_from_slice(&0u16.to_le_bytes());
    out[8..12].copy_from_slice(&(payload_len as u32).to_le_bytes());
    out[12..16].copy_from_slice(&0u32.to_le_bytes());
    let body_end = HEADER_LEN + payload_len;
    let crc = crc32(&out[..body_end]);
    out[body_end..body_end + CRC_LEN].copy_from_slice(&crc.to_le_bytes());
    Ok(body_end + CRC_LEN)
}

#[cfg(feature = "alloc")]
mod owned {
    use super::*;
    use crate::ModelOwned;
    use alloc::string::String;
    use alloc::vec::Vec;
    use serde::{Deserialize, Serialize};

    /// Name and unit of one feature, as kept in the label section.
    #[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
    pub struct Label {
        /// Column name in the logs.
        pub name: String,
        /// Unit, empty when unitless.
        pub unit: String,
    }

    /// The payload of format version 1: the model without the SPE's centre
    /// and spread per mode, and without the residual chart. Read by the
    /// host only.
    #[derive(Deserialize)]
    struct ModelV1 {
        meta: crate::ModelMeta,
        dims: crate::Dims,
        mean: Vec<f32>,
        scale: Vec<f32>,
        loadings: Vec<f32>,
        eigenvalues: Vec<f32>,
        theta: [f32; 3],
        weights: Vec<f32>,
        mix_means: Vec<f32>,
        mix_variances: Vec<f32>,
        monitor: crate::MonitorParams,
    }

    /// The payload of format version 2: version 1 and the SPE's centre and
    /// spread per mode, without the residual chart. Read by the host only.
    #[derive(Deserialize)]
    struct ModelV2 {
        v1: ModelV1,
        spe_center_by_mode: Vec<f32>,
        spe_spread_by_mode: Vec<f32>,
    }

    /// The payload of format version 3: version 2 and the residual chart,
    /// without its whitening matrix. Read by the host only.
    #[derive(Deserialize)]
    struct ModelV3 {
        v2: ModelV2,
        resid_center: Vec<f32>,
        resid_gain: Vec<f32>,
        resid_limit: f32,
    }

    /// The payload of format version 4: version 3 and the whitening matrix,
    /// without the slow charts. Read by the host only.
    #[derive(Deserialize)]
    struct ModelV4 {
        v3: ModelV3,
        resid_whiten: Vec<f32>,
    }

    impl ModelV4 {
        /// No slow chart: the model flags as a version 4 detector did.
        fn upgrade(self) -> ModelOwned {
            ModelOwned {
                resid_whiten: self.resid_whiten,
                ..self.v3.upgrade()
            }
        }
    }

    impl ModelV3 {
        /// No whitening matrix (the identity): the chart smooths each raw
        /// residual, as a version 3 detector did, bit for bit.
        fn upgrade(self) -> ModelOwned {
            ModelOwned {
                resid_center: self.resid_center,
                resid_gain: self.resid_gain,
                resid_limit: self.resid_limit,
                ..self.v2.upgrade()
            }
        }
    }

    impl ModelV1 {
        /// Every mode with the global SPE centre and spread: the SPE's EWMA
        /// then sees exactly the values a version 1 detector smoothed, so
        /// the model flags as it did.
        fn upgrade(self) -> ModelOwned {
            let k = self.weights.len();
            let spe = self.monitor.spe;
            ModelV2 {
                v1: self,
                spe_center_by_mode: alloc::vec![spe.center; k],
                spe_spread_by_mode: alloc::vec![spe.spread; k],
            }
            .upgrade()
        }
    }

    impl ModelV2 {
        /// The residual chart off (every gain 0, so every feature's EWMA
        /// stays 0 and never reaches the limit): the model flags as a
        /// version 2 detector did.
        fn upgrade(self) -> ModelOwned {
            let v = self.v1;
            let d = v.mean.len();
            ModelOwned {
                meta: v.meta,
                dims: v.dims,
                mean: v.mean,
                scale: v.scale,
                loadings: v.loadings,
                eigenvalues: v.eigenvalues,
                theta: v.theta,
                weights: v.weights,
                mix_means: v.mix_means,
                mix_variances: v.mix_variances,
                monitor: v.monitor,
                spe_center_by_mode: self.spe_center_by_mode,
                spe_spread_by_mode: self.spe_spread_by_mode,
                resid_center: alloc::vec![0.0; d],
                resid_gain: alloc::vec![0.0; d],
                resid_limit: 1.0,
                resid_whiten: Vec::new(),
                slow_charts: Vec::new(),
                slow_limit: 1.0,
            }
        }
    }

    /// A model file as the host sees it: the model and its labels.
    #[derive(Debug, Clone, PartialEq)]
    pub struct ModelFile {
        /// The model.
        pub model: ModelOwned,
        /// One label per feature, in model order.
        pub labels: Vec<Label>,
    }

    impl ModelFile {
        /// Encodes header, payload, labels and CRC. The model is validated and
        /// the labels must match its schema fingerprint.
        pub fn to_bytes(&self) -> Result<Vec<u8>, ModelError> {
            self.check_labels()?;
            self.model.validate()?;
            let payload =
                postcard::to_allocvec(&self.model).map_err(|_| ModelError::BufferTooSmall)?;
            // No labels: an empty section (not an encoded empty list), so a
            // label-less host file equals the device encoding byte for byte.
            let labels = if self.labels.is_empty() {
                Vec::new()
            } else {
                postcard::to_allocvec(&self.labels).map_err(|_| ModelError::BufferTooSmall)?
            };
            let mut out = alloc::vec![0u8; HEADER_LEN + payload.len() + labels.len() + CRC_LEN];
            frame_into(&payload, &labels, &mut out)?;
            Ok(out)
        }

        /// Decodes and validates a model file without device capacity limits.
        /// Version 1–4 files are read too, a version 1 file with every
        /// mode at the global SPE centre and spread, both with the residual
        /// chart off, a version 3 file with the chart unwhitened, versions
        /// 1–4 without slow charts (each then flags as it did); devices read
        /// only [`FORMAT_VERSION`].
        pub fn from_bytes(bytes: &[u8]) -> Result<ModelFile, ModelError> {
            let sections = split_host(bytes)?;
            fn whole<T: serde::de::DeserializeOwned>(b: &[u8]) -> Result<T, ModelError> {
                match postcard::take_from_bytes::<T>(b) {
                    Ok((v, [])) => Ok(v),
                    _ => Err(ModelError::Undecodable),
                }
            }
            let model = if sections.version == 1 {
                whole::<ModelV1>(sections.payload)?.upgrade()
            } else if sections.version == 2 {
                whole::<ModelV2>(sections.payload)?.upgrade()
            } else if sections.version == 3 {
                whole::<ModelV3>(sections.payload)?.upgrade()
            } else if sections.version == 4 {
                whole::<ModelV4>(sections.payload)?.upgrade()
            } else {
                whole::<ModelOwned>(sections.payload)?
            };
            model.validate()?;
            let labels: Vec<Label> = if sections.labels.is_empty() {
                Vec::new()
            } else {
                postcard::from_bytes(sections.labels).map_err(|_| ModelError::Undecodable)?
            };
            let file = ModelFile { model, labels };
            file.check_labels()?;
            Ok(file)
        }

        /// Labels, if present, must be one per feature and match the fingerprint.
        fn check_labels(&self) -> Result<(), ModelError> {
            if self.labels.is_empty() {
                return Ok(());
            }
            let d = usize::from(self.model.dims.features);
            if self.labels.len() != d {
                return Err(ModelError::Inconsistent {
                    field: crate::Field::Labels,
                    expected: d as u32,
                    found: self.labels.len() as u32,
                });
            }
            let fp = crate::schema::fingerprint(
                self.labels
                    .iter()
                    .map(|l| (l.name.as_str(), l.unit.as_str())),
            );
            if fp != self.model.meta.schema {
                return Err(ModelError::OutOfRange {
                    field: crate::Field::Labels,
                });
            }
            Ok(())
        }
    }
}

#[cfg(feature = "alloc")]
pub use owned::{Label, ModelFile};
