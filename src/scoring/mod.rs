//! From cosines to what a policy-gradient step consumes: a reward scale, a
//! baseline per sample, and the advantage `reward - baseline`.
//!
//! - [`scale`]: raw cosine, CLIP-S, RefCLIP-S (Hessel et al. 2021), affine.
//! - [`baseline`]: none, mean of the other samples (Luo 2020), the greedy
//!   caption's reward (self-critical, Rennie et al. 2017).

pub mod baseline;
pub mod scale;

pub use baseline::{advantages, Baseline, BaselineError};
pub use scale::Scale;
