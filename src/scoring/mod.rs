//! Rewards: from a request's groups to what a policy-gradient step consumes.
//!
//! - [`scale`]: raw cosine, CLIP-S, RefCLIP-S (Hessel et al. 2021), affine.
//! - [`baseline`]: none, mean of the other samples (Luo 2020), the greedy
//!   caption's reward (self-critical, Rennie et al. 2017).
//! - [`spec`]: the validated reward spec (scale, baseline, remap) and the
//!   groups to score, checked once for the HTTP route and `befit score`.
//! - [`group`]: one group's cosines, rewards and advantages from its vectors.
//! - [`run`]: whole requests scored through the engine.

pub mod baseline;
pub mod group;
pub mod run;
pub mod scale;
pub mod spec;

pub use baseline::{advantages, Baseline, BaselineError};
pub use group::{score_group, GroupScores, GroupVectors, Sample, Scored};
pub use run::{score_groups, ScoreError};
pub use scale::{Scale, ScaleError};
pub use spec::{check_group, check_groups, GroupJson, Remap, RewardGroup, RewardSpec};
