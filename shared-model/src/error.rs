//! The one error type of model decoding and validation.

use core::fmt;

/// Which array or parameter of a model an error is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
#[non_exhaustive]
pub enum Field {
    /// Per-feature means.
    Mean,
    /// Per-feature scales (standard deviations).
    Scale,
    /// PCA loadings.
    Loadings,
    /// Eigenvalues of the kept components.
    Eigenvalues,
    /// Sums of powers of the discarded eigenvalues.
    Theta,
    /// Mixture weights.
    Weights,
    /// Mixture component means.
    MixMeans,
    /// Mixture component variances.
    MixVariances,
    /// A parameter of the streaming monitor.
    Monitor,
    /// The SPE (Q) limits.
    SpeLimits,
    /// The Hotelling T² limits.
    T2Limits,
    /// The mixture negative log-likelihood limits.
    NllLimits,
    /// The label section or the schema fingerprint.
    Labels,
    /// The SPE's centre and spread per mixture component.
    SpeByMode,
    /// The residual chart: each feature's residual centre and gain, and the
    /// chart's limit.
    ResidualChart,
}

impl Field {
    /// A short fixed name, used in messages.
    pub const fn name(self) -> &'static str {
        match self {
            Field::Mean => "mean",
            Field::Scale => "scale",
            Field::Loadings => "loadings",
            Field::Eigenvalues => "eigenvalues",
            Field::Theta => "theta",
            Field::Weights => "mixture weights",
            Field::MixMeans => "mixture means",
            Field::MixVariances => "mixture variances",
            Field::Monitor => "monitor parameters",
            Field::SpeLimits => "SPE limits",
            Field::T2Limits => "T² limits",
            Field::NllLimits => "NLL limits",
            Field::Labels => "labels",
            Field::SpeByMode => "SPE by mode",
            Field::ResidualChart => "residual chart",
        }
    }
}

/// A model dimension.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub enum Dim {
    /// Feature count `d`.
    Features,
    /// Latent component count `m`.
    Components,
    /// Mixture component count `k`.
    Mixture,
}

impl Dim {
    /// A short fixed name, used in messages.
    pub const fn name(self) -> &'static str {
        match self {
            Dim::Features => "features",
            Dim::Components => "components",
            Dim::Mixture => "mixture components",
        }
    }
}

/// Why a model file or a model was refused. Every variant is a distinct cause.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
#[non_exhaustive]
pub enum ModelError {
    /// The first four bytes are not the model magic.
    BadMagic,
    /// The format version is not one this reader knows.
    UnknownVersion {
        /// Version found in the file.
        found: u16,
    },
    /// Header flags this reader does not understand are set.
    UnknownFlags {
        /// Flags found in the file.
        found: u16,
    },
    /// The bytes end before the lengths in the header say they should.
    Truncated {
        /// Bytes the header asks for.
        needed: u32,
        /// Bytes present.
        got: u32,
    },
    /// Bytes follow the CRC.
    TrailingBytes {
        /// Count of extra bytes.
        extra: u32,
    },
    /// The stored CRC-32 does not match the bytes.
    BadCrc {
        /// CRC stored in the file.
        stored: u32,
        /// CRC computed over the file.
        computed: u32,
    },
    /// The payload is not a valid postcard encoding of a model.
    Undecodable,
    /// An array's length does not match the dimensions.
    Inconsistent {
        /// The array.
        field: Field,
        /// Length the dimensions call for.
        expected: u32,
        /// Length found.
        found: u32,
    },
    /// A dimension is zero or the components outnumber the features.
    BadDimensions,
    /// A dimension is larger than this reader can hold.
    OverCapacity {
        /// The dimension.
        dim: Dim,
        /// Value in the model.
        found: u16,
        /// Largest value this reader holds.
        max: u16,
    },
    /// A value is NaN or infinite.
    NonFinite {
        /// Where.
        field: Field,
        /// Index inside the array (0 for scalars).
        index: u16,
    },
    /// A value that must be strictly positive is not.
    NotPositive {
        /// Where.
        field: Field,
        /// Index inside the array (0 for scalars).
        index: u16,
    },
    /// A value is outside its meaningful range (weights not summing to one,
    /// a smoothing constant outside (0, 1], ...).
    OutOfRange {
        /// Where.
        field: Field,
    },
    /// The output buffer is too small for the encoded model.
    BufferTooSmall,
}

impl fmt::Display for ModelError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match *self {
            ModelError::BadMagic => f.write_str("not a plumbline model file (bad magic)"),
            ModelError::UnknownVersion { found } => write!(
                f,
                "unknown model format version {found} (this reader knows version {})",
                crate::file::FORMAT_VERSION
            ),
            ModelError::UnknownFlags { found } => {
                write!(f, "unknown header flags {found:#06x}")
            }
            ModelError::Truncated { needed, got } => {
                write!(f, "model file truncated: needs {needed} bytes, got {got}")
            }
            ModelError::TrailingBytes { extra } => {
                write!(f, "{extra} unexpected bytes after the model's CRC")
            }
            ModelError::BadCrc { stored, computed } => write!(
                f,
                "model CRC-32 mismatch: stored {stored:#010x}, computed {computed:#010x}"
            ),
            ModelError::Undecodable => f.write_str("model payload does not decode"),
            ModelError::Inconsistent {
                field,
                expected,
                found,
            } => write!(
                f,
                "{} has {found} values, dimensions call for {expected}",
                field.name()
            ),
            ModelError::BadDimensions => {
                f.write_str("model dimensions are invalid (zero, or more components than features)")
            }
            ModelError::OverCapacity { dim, found, max } => write!(
                f,
                "model has {found} {}, this build holds at most {max}",
                dim.name()
            ),
            ModelError::NonFinite { field, index } => {
                write!(f, "{}[{index}] is not finite", field.name())
            }
            ModelError::NotPositive { field, index } => {
                write!(f, "{}[{index}] must be > 0", field.name())
            }
            ModelError::OutOfRange { field } => {
                write!(f, "{} out of range", field.name())
            }
            ModelError::BufferTooSmall => f.write_str("output buffer too small for the model"),
        }
    }
}

impl core::error::Error for ModelError {}
