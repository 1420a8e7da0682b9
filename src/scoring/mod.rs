//! Rewards: from a request's groups to what a policy-gradient step consumes.
//!
//! - [`scale`]: raw cosine, CLIP-S, RefCLIP-S (Hessel et al. 2021), affine.
//! - [`baseline`]: none, mean of the other samples (Luo 2020), the greedy
//!   caption's reward (self-critical, Rennie et al. 2017).
//! - [`spec`]: the validated reward spec (scale, baseline, remap) and the
//!   groups to score, checked once for the HTTP route and `befit score`.
//! - [`group`]: one group's cosines, rewards and advantages from its vectors.
//! - [`signals`]: what a caption's text says of degeneration (repetition,
//!   distinct-n), shared by the guard and the run watch.
//! - [`bank_nearest`]: the caption bank as the guard's nearest-caption measure.
//! - [`guard`]: the optional guard: per-sample signals, penalties and the
//!   combined reward, applied before the baseline.
//! - [`run`]: whole requests scored through the engine.

pub mod bank_nearest;
pub mod baseline;
pub mod group;
pub mod guard;
pub mod run;
pub mod scale;
pub mod signals;
pub mod spec;

pub use baseline::{advantages, Baseline, BaselineError};
pub use group::{score_group, GroupScores, GroupVectors, Sample, Scored};
pub use guard::{FluencyHead, Guard, GuardError, GuardJson, Guarded, NearestCaption, Signals};
pub use run::{score_groups, ScoreError};
pub use scale::{Scale, ScaleError};
pub use spec::{check_group, check_groups, GroupJson, Remap, RewardGroup, RewardSpec};
