//! Refusal reasons: one per [`ModelError`] variant, then the upload protocol's
//! own. The variant index is the reason code on the wire.

use crate::signature::{KeyId, SignatureError};
use crate::{Dim, Field, ModelError};
use core::fmt;
use serde::{Deserialize, Serialize};

/// Why a request was refused. Codes 0–13 mirror [`ModelError`] variant by
/// variant (the model file did not pass); codes from 14 on belong to the
/// upload protocol; codes 23–25 refuse a file a board that trusts a signing
/// key will not run ([`SignatureError`]). Fields and dimensions travel as the
/// codes of [`field_code`] and [`dim_code`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Reason {
    /// 0: [`ModelError::BadMagic`].
    BadMagic,
    /// 1: [`ModelError::UnknownVersion`].
    UnknownVersion {
        /// Version in the file.
        found: u16,
    },
    /// 2: [`ModelError::UnknownFlags`].
    UnknownFlags {
        /// Flags in the file.
        found: u16,
    },
    /// 3: [`ModelError::Truncated`].
    Truncated {
        /// Bytes the header asks for.
        needed: u32,
        /// Bytes present.
        got: u32,
    },
    /// 4: [`ModelError::TrailingBytes`].
    TrailingBytes {
        /// Extra bytes.
        extra: u32,
    },
    /// 5: [`ModelError::BadCrc`] (the file's own trailer).
    BadCrc {
        /// CRC stored in the file.
        stored: u32,
        /// CRC computed.
        computed: u32,
    },
    /// 6: [`ModelError::Undecodable`].
    Undecodable,
    /// 7: [`ModelError::Inconsistent`].
    Inconsistent {
        /// [`field_code`] of the array.
        field: u8,
        /// Length the dimensions call for.
        expected: u32,
        /// Length found.
        found: u32,
    },
    /// 8: [`ModelError::BadDimensions`].
    BadDimensions,
    /// 9: [`ModelError::OverCapacity`].
    OverCapacity {
        /// [`dim_code`] of the dimension.
        dim: u8,
        /// Value in the model.
        found: u16,
        /// Largest value the device holds.
        max: u16,
    },
    /// 10: [`ModelError::NonFinite`].
    NonFinite {
        /// [`field_code`].
        field: u8,
        /// Index in the array.
        index: u16,
    },
    /// 11: [`ModelError::NotPositive`].
    NotPositive {
        /// [`field_code`].
        field: u8,
        /// Index in the array.
        index: u16,
    },
    /// 12: [`ModelError::OutOfRange`].
    OutOfRange {
        /// [`field_code`].
        field: u8,
    },
    /// 13: [`ModelError::BufferTooSmall`].
    BufferTooSmall,
    /// 14: a chunk or commit arrived with no upload open.
    NoUpload,
    /// 15: a chunk does not start where the previous one ended. The upload
    /// stays open; resend from `expected`.
    UnexpectedOffset {
        /// Offset the device expects.
        expected: u32,
        /// Offset received.
        got: u32,
    },
    /// 16: the announced file is larger than a slot.
    TooLarge {
        /// Length announced.
        total: u32,
        /// Slot capacity.
        max: u32,
    },
    /// 17: the announced file is empty.
    Empty,
    /// 18: a chunk runs past the announced length. The upload is dropped.
    Overrun {
        /// Where the chunk would end.
        end: u32,
        /// Length announced.
        total: u32,
    },
    /// 19: commit before every byte arrived. The upload stays open.
    Incomplete {
        /// Bytes received.
        received: u32,
        /// Length announced.
        total: u32,
    },
    /// 20: the CRC-32 of the received bytes is not the one announced at
    /// begin. The upload is dropped.
    TransferCrc {
        /// CRC announced.
        expected: u32,
        /// CRC of the bytes received.
        computed: u32,
    },
    /// 21: an open upload was dropped because a new one began.
    Abandoned {
        /// Bytes it had received.
        received: u32,
        /// Length it announced.
        total: u32,
    },
    /// 22: the slot storage failed to erase, write or record. The upload is
    /// dropped.
    Storage,
    /// 23: the board trusts a signing key and the file is not signed
    /// ([`SignatureError::Unsigned`]).
    Unsigned,
    /// 24: the file is signed by a key the board does not trust
    /// ([`SignatureError::UnknownKey`]).
    UnknownKey {
        /// Key id in the file.
        key_id: KeyId,
    },
    /// 25: the file names the trusted key but its signature does not verify
    /// ([`SignatureError::BadSignature`]).
    BadSignature,
}

/// Wire code of a model [`Field`] (its position in this list).
pub const FIELDS: [Field; 15] = [
    Field::Mean,
    Field::Scale,
    Field::Loadings,
    Field::Eigenvalues,
    Field::Theta,
    Field::Weights,
    Field::MixMeans,
    Field::MixVariances,
    Field::Monitor,
    Field::SpeLimits,
    Field::T2Limits,
    Field::NllLimits,
    Field::Labels,
    Field::SpeByMode,
    Field::ResidualChart,
];

/// Wire code of a [`Field`]: 0 mean, 1 scale, 2 loadings, 3 eigenvalues,
/// 4 theta, 5 weights, 6 mixture means, 7 mixture variances, 8 monitor,
/// 9 SPE limits, 10 T² limits, 11 NLL limits, 12 labels, 13 SPE by mode,
/// 14 residual chart.
pub const fn field_code(f: Field) -> u8 {
    match f {
        Field::Mean => 0,
        Field::Scale => 1,
        Field::Loadings => 2,
        Field::Eigenvalues => 3,
        Field::Theta => 4,
        Field::Weights => 5,
        Field::MixMeans => 6,
        Field::MixVariances => 7,
        Field::Monitor => 8,
        Field::SpeLimits => 9,
        Field::T2Limits => 10,
        Field::NllLimits => 11,
        Field::Labels => 12,
        Field::SpeByMode => 13,
        Field::ResidualChart => 14,
    }
}

/// The [`Field`] of a wire code.
pub fn field_from_code(code: u8) -> Option<Field> {
    FIELDS.get(usize::from(code)).copied()
}

/// Wire code of a [`Dim`]: 0 features, 1 components, 2 mixture.
pub const fn dim_code(d: Dim) -> u8 {
    match d {
        Dim::Features => 0,
        Dim::Components => 1,
        Dim::Mixture => 2,
    }
}

/// The [`Dim`] of a wire code.
pub fn dim_from_code(code: u8) -> Option<Dim> {
    [Dim::Features, Dim::Components, Dim::Mixture]
        .get(usize::from(code))
        .copied()
}

impl From<ModelError> for Reason {
    fn from(e: ModelError) -> Self {
        // Exhaustive on purpose: a new ModelError variant must get a code.
        match e {
            ModelError::BadMagic => Reason::BadMagic,
            ModelError::UnknownVersion { found } => Reason::UnknownVersion { found },
            ModelError::UnknownFlags { found } => Reason::UnknownFlags { found },
            ModelError::Truncated { needed, got } => Reason::Truncated { needed, got },
            ModelError::TrailingBytes { extra } => Reason::TrailingBytes { extra },
            ModelError::BadCrc { stored, computed } => Reason::BadCrc { stored, computed },
            ModelError::Undecodable => Reason::Undecodable,
            ModelError::Inconsistent {
                field,
                expected,
                found,
            } => Reason::Inconsistent {
                field: field_code(field),
                expected,
                found,
            },
            ModelError::BadDimensions => Reason::BadDimensions,
            ModelError::OverCapacity { dim, found, max } => Reason::OverCapacity {
                dim: dim_code(dim),
                found,
                max,
            },
            ModelError::NonFinite { field, index } => Reason::NonFinite {
                field: field_code(field),
                index,
            },
            ModelError::NotPositive { field, index } => Reason::NotPositive {
                field: field_code(field),
                index,
            },
            ModelError::OutOfRange { field } => Reason::OutOfRange {
                field: field_code(field),
            },
            ModelError::BufferTooSmall => Reason::BufferTooSmall,
        }
    }
}

impl From<SignatureError> for Reason {
    fn from(e: SignatureError) -> Self {
        match e {
            SignatureError::Unsigned => Reason::Unsigned,
            SignatureError::UnknownKey { found } => Reason::UnknownKey { key_id: found },
            SignatureError::BadSignature => Reason::BadSignature,
        }
    }
}

impl Reason {
    /// The signature error this reason mirrors, if it is one (codes 23–25).
    pub fn signature_error(&self) -> Option<SignatureError> {
        match *self {
            Reason::Unsigned => Some(SignatureError::Unsigned),
            Reason::UnknownKey { key_id } => Some(SignatureError::UnknownKey { found: key_id }),
            Reason::BadSignature => Some(SignatureError::BadSignature),
            _ => None,
        }
    }

    /// The model error this reason mirrors, if it is one (codes 0–13) and
    /// its field or dimension code is known.
    pub fn model_error(&self) -> Option<ModelError> {
        Some(match *self {
            Reason::BadMagic => ModelError::BadMagic,
            Reason::UnknownVersion { found } => ModelError::UnknownVersion { found },
            Reason::UnknownFlags { found } => ModelError::UnknownFlags { found },
            Reason::Truncated { needed, got } => ModelError::Truncated { needed, got },
            Reason::TrailingBytes { extra } => ModelError::TrailingBytes { extra },
            Reason::BadCrc { stored, computed } => ModelError::BadCrc { stored, computed },
            Reason::Undecodable => ModelError::Undecodable,
            Reason::Inconsistent {
                field,
                expected,
                found,
            } => ModelError::Inconsistent {
                field: field_from_code(field)?,
                expected,
                found,
            },
            Reason::BadDimensions => ModelError::BadDimensions,
            Reason::OverCapacity { dim, found, max } => ModelError::OverCapacity {
                dim: dim_from_code(dim)?,
                found,
                max,
            },
            Reason::NonFinite { field, index } => ModelError::NonFinite {
                field: field_from_code(field)?,
                index,
            },
            Reason::NotPositive { field, index } => ModelError::NotPositive {
                field: field_from_code(field)?,
                index,
            },
            Reason::OutOfRange { field } => ModelError::OutOfRange {
                field: field_from_code(field)?,
            },
            Reason::BufferTooSmall => ModelError::BufferTooSmall,
            _ => return None,
        })
    }

    /// The reason code: the variant index on the wire.
    pub const fn code(&self) -> u8 {
        match self {
            Reason::BadMagic => 0,
            Reason::UnknownVersion { .. } => 1,
            Reason::UnknownFlags { .. } => 2,
            Reason::Truncated { .. } => 3,
            Reason::TrailingBytes { .. } => 4,
            Reason::BadCrc { .. } => 5,
            Reason::Undecodable => 6,
            Reason::Inconsistent { .. } => 7,
            Reason::BadDimensions => 8,
            Reason::OverCapacity { .. } => 9,
            Reason::NonFinite { .. } => 10,
            Reason::NotPositive { .. } => 11,
            Reason::OutOfRange { .. } => 12,
            Reason::BufferTooSmall => 13,
            Reason::NoUpload => 14,
            Reason::UnexpectedOffset { .. } => 15,
            Reason::TooLarge { .. } => 16,
            Reason::Empty => 17,
            Reason::Overrun { .. } => 18,
            Reason::Incomplete { .. } => 19,
            Reason::TransferCrc { .. } => 20,
            Reason::Abandoned { .. } => 21,
            Reason::Storage => 22,
            Reason::Unsigned => 23,
            Reason::UnknownKey { .. } => 24,
            Reason::BadSignature => 25,
        }
    }
}

impl fmt::Display for Reason {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(e) = self.model_error() {
            return write!(f, "model refused: {e}");
        }
        if let Some(e) = self.signature_error() {
            return write!(f, "model refused: {e}");
        }
        match *self {
            Reason::NoUpload => f.write_str("no upload is open"),
            Reason::UnexpectedOffset { expected, got } => {
                write!(f, "chunk at offset {got}, expected {expected}")
            }
            Reason::TooLarge { total, max } => {
                write!(f, "file of {total} bytes does not fit a slot of {max}")
            }
            Reason::Empty => f.write_str("empty upload"),
            Reason::Overrun { end, total } => {
                write!(f, "chunk ends at {end}, past the announced {total} bytes")
            }
            Reason::Incomplete { received, total } => {
                write!(f, "commit after {received} of {total} bytes")
            }
            Reason::TransferCrc { expected, computed } => write!(
                f,
                "upload CRC-32 mismatch: announced {expected:#010x}, received {computed:#010x}"
            ),
            Reason::Abandoned { received, total } => write!(
                f,
                "upload abandoned after {received} of {total} bytes by a new begin"
            ),
            Reason::Storage => f.write_str("slot storage failed"),
            // Model reasons with a field or dimension code this build does
            // not know.
            other => write!(f, "model refused (reason code {})", other.code()),
        }
    }
}
