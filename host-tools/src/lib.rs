//! # plumb (host tool library)
pub mod arl;
pub mod error;
pub mod gmm;
pub mod logs;
pub mod pca;
pub mod progress;
pub mod rng;
