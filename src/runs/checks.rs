//! What a request may say about its run: the name, the step, and the
//! warning thresholds, checked before any scoring.

use serde::{Deserialize, Serialize};

/// Longest run name: long enough for a date, a model and a seed.
pub const MAX_RUN_NAME: usize = 64;

/// How far a step may lag behind the run's latest step. Asynchronous
/// trainers score rollouts of a few steps back; a larger lag is a
/// mislabelled run (two trainers writing one name, a restart from 0).
pub const STEP_WINDOW: u64 = 16;

/// Largest step (SQLite stores integers as signed 64-bit).
pub const MAX_STEP: u64 = i64::MAX as u64;

/// Why a run's part of a request cannot be used.
#[derive(Debug, thiserror::Error)]
pub enum RunError {
    #[error("run names must match [A-Za-z0-9._-]+ (1 to {MAX_RUN_NAME} characters), got {0:?}")]
    BadName(String),
    #[error("give \"step\" with \"run\": the step of the training loop the samples come from")]
    NoStep,
    #[error("\"step\" needs a \"run\" to belong to")]
    NoRun,
    #[error("step must be at most {MAX_STEP}, got {0}")]
    StepTooLarge(u64),
    #[error("step {step} is more than {STEP_WINDOW} steps behind run {run:?}'s latest step {latest}; start a new run name when a run restarts")]
    StepBack { run: String, step: u64, latest: u64 },
    #[error("{name} must be between {min} and {max}, got {got}")]
    Threshold {
        name: &'static str,
        min: f64,
        max: f64,
        got: f64,
    },
    #[error("from must not be above to ({from} > {to})")]
    Range { from: u64, to: u64 },
    #[error("no run named {0:?}; runs are created by the first rewards request naming them")]
    UnknownRun(String),
    #[error("run watch store: {0}")]
    Store(#[from] rusqlite::Error),
    #[error("run watch task failed: {0}")]
    Task(String),
}

impl RunError {
    /// The request field to blame, for the errors a request causes.
    pub fn field(&self) -> Option<String> {
        match self {
            RunError::BadName(_) | RunError::NoRun => Some("run".into()),
            RunError::NoStep | RunError::StepTooLarge(_) | RunError::StepBack { .. } => {
                Some("step".into())
            }
            RunError::Threshold { name, .. } => Some(format!("run_thresholds.{name}")),
            RunError::Range { .. } => Some("from".into()),
            RunError::UnknownRun(_) | RunError::Store(_) | RunError::Task(_) => None,
        }
    }
}

/// Whether `name` can name a run.
pub fn valid_run_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= MAX_RUN_NAME
        && name
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'))
}

/// When a step's aggregates make rewards answers of the run carry warnings.
/// The defaults suit captions of a few to twenty words; the blocks captions
/// of the demo, for example, repeat "a" once in eight words (0.125).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
#[serde(deny_unknown_fields, default)]
pub struct Thresholds {
    /// Mean share of words repeating an earlier word of their caption.
    pub repeated_words_above: f64,
    /// Mean share of bigrams repeating an earlier bigram of their caption.
    pub repeated_bigrams_above: f64,
    /// distinct-1 of the step (Li et al. 2016); 0 switches it off.
    pub distinct_1_below: f64,
    /// distinct-2 of the step (Li et al. 2016); 0 switches it off.
    pub distinct_2_below: f64,
    /// Samples a step needs before it is judged: distinct-n of a handful of
    /// captions says nothing.
    pub min_samples: u64,
}

/// Default [`Thresholds::repeated_words_above`].
pub const DEFAULT_REPEATED_WORDS_ABOVE: f64 = 0.3;
/// Default [`Thresholds::repeated_bigrams_above`].
pub const DEFAULT_REPEATED_BIGRAMS_ABOVE: f64 = 0.2;
/// Default [`Thresholds::distinct_2_below`]: a step whose captions are one
/// caption repeated has distinct-2 near 1 / samples.
pub const DEFAULT_DISTINCT_2_BELOW: f64 = 0.1;
/// Default [`Thresholds::min_samples`].
pub const DEFAULT_MIN_SAMPLES: u64 = 16;
/// Largest [`Thresholds::min_samples`].
pub const MAX_MIN_SAMPLES: u64 = 1_000_000;

impl Default for Thresholds {
    fn default() -> Thresholds {
        Thresholds {
            repeated_words_above: DEFAULT_REPEATED_WORDS_ABOVE,
            repeated_bigrams_above: DEFAULT_REPEATED_BIGRAMS_ABOVE,
            distinct_1_below: 0.0,
            distinct_2_below: DEFAULT_DISTINCT_2_BELOW,
            min_samples: DEFAULT_MIN_SAMPLES,
        }
    }
}

impl Thresholds {
    /// Refuses shares outside [0, 1] and a sample floor outside its bounds.
    pub fn check(&self) -> Result<(), RunError> {
        for (name, got) in [
            ("repeated_words_above", self.repeated_words_above),
            ("repeated_bigrams_above", self.repeated_bigrams_above),
            ("distinct_1_below", self.distinct_1_below),
            ("distinct_2_below", self.distinct_2_below),
        ] {
            if !(0.0..=1.0).contains(&got) {
                return Err(RunError::Threshold {
                    name,
                    min: 0.0,
                    max: 1.0,
                    got,
                });
            }
        }
        if !(1..=MAX_MIN_SAMPLES).contains(&self.min_samples) {
            return Err(RunError::Threshold {
                name: "min_samples",
                min: 1.0,
                max: MAX_MIN_SAMPLES as f64,
                got: self.min_samples as f64,
            });
        }
        Ok(())
    }
}

/// A request's run, step and thresholds, checked.
#[derive(Debug, Clone, PartialEq)]
pub struct RunTag {
    pub run: String,
    pub step: u64,
    /// New thresholds for the run (kept for its later requests too).
    pub thresholds: Option<Thresholds>,
}

impl RunTag {
    /// The run part of a request: none when it names no run.
    pub fn from_request(
        run: Option<String>,
        step: Option<u64>,
        thresholds: Option<Thresholds>,
    ) -> Result<Option<RunTag>, RunError> {
        let (run, step) = match (run, step) {
            (None, None) if thresholds.is_none() => return Ok(None),
            (None, _) => return Err(RunError::NoRun),
            (Some(_), None) => return Err(RunError::NoStep),
            (Some(run), Some(step)) => (run, step),
        };
        if !valid_run_name(&run) {
            return Err(RunError::BadName(run));
        }
        if step > MAX_STEP {
            return Err(RunError::StepTooLarge(step));
        }
        if let Some(t) = &thresholds {
            t.check()?;
        }
        Ok(Some(RunTag {
            run,
            step,
            thresholds,
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_steps_and_thresholds() {
        assert!(valid_run_name("ppo-2026.12.03_seed1"));
        for bad in ["", "a b", "ü", "a/b", &"x".repeat(MAX_RUN_NAME + 1)] {
            assert!(!valid_run_name(bad), "{bad:?}");
        }
        assert!(RunTag::from_request(None, None, None).unwrap().is_none());
        let e = RunTag::from_request(None, Some(3), None).unwrap_err();
        assert_eq!(e.field().as_deref(), Some("run"));
        let e = RunTag::from_request(Some("r".into()), None, None).unwrap_err();
        assert_eq!(e.field().as_deref(), Some("step"));
        let bad = Thresholds {
            distinct_2_below: 1.5,
            ..Thresholds::default()
        };
        let e = RunTag::from_request(Some("r".into()), Some(1), Some(bad)).unwrap_err();
        assert_eq!(
            e.field().as_deref(),
            Some("run_thresholds.distinct_2_below")
        );
        let e = RunTag::from_request(Some("r".into()), Some(u64::MAX), None).unwrap_err();
        assert!(matches!(e, RunError::StepTooLarge(_)));
    }
}
