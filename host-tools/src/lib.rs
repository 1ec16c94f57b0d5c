//! # plumb: the plumbline host tool, as a library
//!
//! The `plumb` binary is a thin shell over [`cli::run`]. Everything it does is
//! here, usable from other crates (the cross-check crate calls [`pca::fit`]
//! and [`gmm::em_from`] directly):
//!
//! | module | role |
//! |---|---|
//! | [`logs`] | streaming CSV log reader (fit, replay) |
//! | [`pca`] | moments with pairwise merging, standardisation, PCA |
//! | [`gmm`] | diagonal Gaussian mixture by EM, k-means++ start, BIC |
//! | [`arl`] | run lengths of CUSUM and EWMA charts (Markov chain), limit search |
//! | [`calibrate`] | limits from held-out rows through the device detector |
//! | [`fit`] | the fit pipeline, model id, atomic output |
//! | [`replay`] | logs through the firmware detector on the host |
//! | [`summary`] | human and JSON summary of a model (fit, inspect) |
//! | [`cli`], [`cmd`] | the command line |
//! | [`error`] | the error type: message, location, exit code |
//!
//! plumbline is an advisory monitor, not a safety function: defer to the
//! machine's own safety system, local codes and licensed practice.
#![forbid(unsafe_code)]
// Numeric kernels index several parallel arrays; indices read clearer there.
#![allow(clippy::needless_range_loop)]
// `!(x > 0.0)` is used on purpose: it also rejects NaN.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod arl;
pub mod calibrate;
pub mod cli;
pub mod cmd;
pub mod error;
pub mod fit;
pub mod gmm;
pub mod logs;
pub mod pca;
pub mod progress;
pub mod replay;
pub mod rng;
pub mod summary;
