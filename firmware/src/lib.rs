//! # plumb-firmware
//!
//! The plumbline drift detector for Cortex-M class microcontrollers:
//! `#![no_std]`, no allocation, no `unsafe`, no panic reachable from model
//! bytes or samples. The host tool links the very same crate to replay logs,
//! so a replay on a laptop and the board agree bit for bit.
//!
//! ## Not a safety function
//!
//! plumbline is an **advisory** monitor. It is not a safety function, was not
//! developed to any functional-safety standard, and must not stop, start or
//! limit a machine on its own. Its drift line and messages inform people and
//! maintenance systems. The machine's own safety system, local codes and
//! licensed practice always take precedence.
//!
//! ## Per sample
//!
//! For a sample `x ∈ R^d` and a model (mean μ, scale s, loadings P ∈ R^{d×m},
//! eigenvalues λ, mixture weights π_c, means ν_c, variances v_c):
//!
//! * `z = (x − μ) / s`, `t = Pᵀ z`, `r = z − P t`;
//! * SPE (Q) `= Σ r_i²`, with the three largest `r_i²` named;
//! * T² `= Σ t_j² / λ_j`;
//! * NLL `= −log Σ_c exp(log π_c − ½ Σ_j [ln(2π v_cj) + (t_j − ν_cj)² / v_cj])`
//!   by log-sum-exp, with the constants precomputed when the model is loaded.
//!
//! Non-finite features, features more than `fault_z` scales from their mean,
//! and samples of the wrong length are sensor faults: counted and reported,
//! never fed into any statistic.
//!
//! ## From scores to a flag
//!
//! Each score is transformed (cube root of SPE, of T², and of the NLL above
//! the model's floor, after Wilson & Hilferty),
//! standardised with its calibrated centre and spread (`u`), and watched by
//! three charts combined (as in combined Shewhart–CUSUM schemes, Lucas 1982):
//! an EWMA of `u`, an upper CUSUM of `u`, and a per-sample limit on `u`
//! itself. A score is *hot* when its CUSUM exceeds `h`, its EWMA exceeds `L`
//! or the sample exceeds the per-sample limit. States: [`DriftState::Priming`]
//! (warm-up) → [`DriftState::Watching`] → [`DriftState::Drifting`] after
//! `raise_dwell` consecutive hot samples, or at once on a sample over a
//! per-sample limit; back to watching after `clear_dwell` consecutive calm
//! samples (every CUSUM and EWMA below `clear_fraction` of its limit and no
//! sample over its per-sample limit) and at least `min_hold` samples raised.
//! The SPE has a fourth chart, the residual chart ([`ResidualChart`], model
//! format 3): one EWMA per feature of that feature's PCA residual, centred
//! and scaled by the model, hot (with the dwell, as the other EWMAs) when any
//! is beyond one limit in absolute value; a single sensor drifting from its
//! relation to the others shows there long before it moves the SPE.
//! Every parameter comes from the model.
//!
//! ## Numbers
//!
//! All arithmetic is `f32`. The per-sample path's transcendentals go through
//! [`math`]: `exp` and `ln` from `libm`, and our own `f32` cube root. The
//! constants derived at model load use full-accuracy `libm` whatever the
//! features ([`math::ln_exact`], and one direct `libm::expf` in [`score`]).
//! Sums run in a fixed order with no fused multiply-add. The optional
//! `fast-math` feature swaps the per-sample `exp`/`ln` for `micromath`
//! approximations.
#![no_std]
#![forbid(unsafe_code)]
#![deny(missing_docs)]

mod detector;
pub mod endpoint;
pub mod math;
pub mod score;
pub mod stats;

pub use detector::*;
pub use plumb_model;
pub use score::{Contribution, Fault, Scores, TOP_FEATURES};
