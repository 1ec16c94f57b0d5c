//! # plumb-model
//!
//! The pieces of plumbline that both sides of the link must agree on, with no
//! arithmetic beyond validation:
//!
//! * [`Model`]: everything the on-device detector needs (standardisation, PCA
//!   loadings, the diagonal Gaussian mixture, every limit of the streaming
//!   logic), stored in fixed-capacity [`heapless`] vectors;
//! * the model file (`.plumb`): magic, format version, lengths, a postcard
//!   payload, a host-only label section, an optional ed25519 signature
//!   ([`signature`]) and a CRC-32 ([`mod@file`]);
//! * the schema fingerprint that ties a model to the logs it was fitted on
//!   ([`schema`]);
//! * the capacities a device build accepts ([`Capacity`]).
//!
//! `#![no_std]` and allocation-free by default. The `alloc` feature adds
//! `ModelOwned`, the `Vec`-backed twin of [`Model`] that the host fills in and
//! encodes; both encode to the same bytes. The byte layout is specified in
//! `FORMAT.md` beside this crate.
#![no_std]
#![forbid(unsafe_code)]
#![deny(missing_docs)]

#[cfg(feature = "alloc")]
extern crate alloc;

mod error;
pub mod file;
mod inplace;
mod model;
pub mod schema;
pub mod signature;
pub mod wire;

pub use error::{Dim, Field, ModelError};
pub use model::*;

/// Most features (sensor vector length `d`) a device build accepts.
pub const MAX_FEATURES: usize = 64;
/// Most latent components (`m`, the PCA components kept) a device build accepts.
pub const MAX_COMPONENTS: usize = 16;
/// Most mixture components (`k`) a device build accepts.
pub const MAX_MIXTURE: usize = 8;
/// Capacity of the loadings matrix (`d × m`, row-major).
pub const MAX_LOADINGS: usize = MAX_FEATURES * MAX_COMPONENTS;
/// Capacity of the mixture means and variances (`k × m`, row-major).
pub const MAX_MIX_PARAMS: usize = MAX_MIXTURE * MAX_COMPONENTS;
/// Capacity of the residual chart's whitening matrix (`d × d`, row-major).
pub const MAX_WHITEN: usize = MAX_FEATURES * MAX_FEATURES;
/// Most slow charts (format 5: second EWMAs of chosen features' residual
/// chart inputs) a device build accepts.
pub const MAX_SLOW: usize = 16;
/// Values per slow chart in a model's `slow_charts`: feature index, EWMA
/// constant, centre, gain.
pub const SLOW_PARAMS: usize = 4;

/// The dimensions a reader can hold. A model over any of them is refused with
/// [`ModelError::OverCapacity`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Capacity {
    /// Most features.
    pub features: u16,
    /// Most latent components.
    pub components: u16,
    /// Most mixture components.
    pub mixture: u16,
}

impl Capacity {
    /// The capacities of this build of [`Model`].
    pub const DEVICE: Capacity = Capacity {
        features: MAX_FEATURES as u16,
        components: MAX_COMPONENTS as u16,
        mixture: MAX_MIXTURE as u16,
    };

    /// Checks `dims` against these capacities.
    pub fn admits(&self, dims: &Dims) -> Result<(), ModelError> {
        let checks = [
            (Dim::Features, dims.features, self.features),
            (Dim::Components, dims.components, self.components),
            (Dim::Mixture, dims.mixture, self.mixture),
        ];
        for (dim, found, max) in checks {
            if found > max {
                return Err(ModelError::OverCapacity { dim, found, max });
            }
        }
        Ok(())
    }
}
