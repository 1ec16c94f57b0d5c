//! # plumb: the plumbline host tool, as a library
//!
//! The `plumb` binary is a thin shell over [`cli::run`]. Everything it does is
//! here, usable from other crates (the cross-check crate calls [`pca::fit`]
//! and [`gmm::em_from`] directly):
//!
//! | module | role |
//! |---|---|
//! | [`logs`] | streaming log reader, CSV and NumPy `.npy` arrays (fit, replay) |
//! | [`npy`] | the header of a NumPy `.npy` array file |
//! | [`pca`] | moments with pairwise merging, standardisation, PCA |
//! | [`gmm`] | diagonal Gaussian mixture by EM, k-means++ start, BIC |
//! | [`simd`] | the numeric kernels compiled for AVX2 when the processor has it (same bits) |
//! | [`arl`] | run lengths of CUSUM and EWMA charts (Markov chain), limit search |
//! | [`calibrate`] | limits from held-out rows through the device detector |
//! | [`fit`] | the fit pipeline, model id |
//! | [`files`] | output files: never an input, written atomically |
//! | [`replay`] | logs through the firmware detector on the host |
//! | [`report`] | the HTML drift report (timelines, contributions, latent plane) |
//! | [`summary`] | human and JSON summary of a model (fit, inspect) |
//! | [`link`] | the serial link on the host: transports (serial port, spawned program, loopback TCP), framing, sequence gaps and resends |
//! | [`device`] | conversations with a board: requests with retries, feeding samples, uploads |
//! | [`events`] | text, JSON and CSV views of what a board says; the seam for a live view |
//! | [`live`] | the full-screen live view of `plumb listen` (state, rendering, terminal) |
//! | [`keys`] | ed25519 key files, signing model files, what a file's signature says |
//! | [`boards`] | boards' model-slot memory maps and flashable slot images (Intel HEX, binary) |
//! | [`cli`], [`cmd`] | the command line |
//! | [`error`] | the error type: message, location, exit code |
//! | [`mod@out`] | results on standard output; a closed pipe ends the process quietly |
//!
//! plumbline is an advisory monitor, not a safety function: defer to the
//! machine's own safety system, local codes and licensed practice.
// One exception, in `simd`: calling code compiled for AVX2 after checking
// that the processor has it.
#![deny(unsafe_code)]
// Numeric kernels index several parallel arrays; indices read clearer there.
#![allow(clippy::needless_range_loop)]
// `!(x > 0.0)` is used on purpose: it also rejects NaN.
#![allow(clippy::neg_cmp_op_on_partial_ord)]

pub mod arl;
pub mod boards;
pub mod calibrate;
pub mod cli;
pub mod cmd;
pub mod device;
pub mod error;
pub mod events;
pub mod files;
pub mod fit;
pub mod gmm;
pub mod keys;
pub mod link;
pub mod live;
pub mod logs;
pub mod npy;
pub mod out;
pub mod pca;
pub mod progress;
pub mod replay;
pub mod report;
pub mod residual;
pub mod rng;
pub mod simd;
pub mod summary;
pub mod tailor;
