//! The run watch: per run and step, durable aggregates of the captions a
//! training run sends for rewards (reward and cosine spread, repetition,
//! distinct-n, vocabulary, guard flags, copies of bank captions), warnings
//! when a step crosses its run's thresholds, and Prometheus gauges for the
//! latest step of the most recently active runs.
//!
//! - [`checks`]: run names, steps and thresholds, checked before scoring.
//! - [`store`]: the SQLite file in the data folder.
//!
//! [`RunWatch`] is blocking (SQLite): call it off the async runtime.

pub mod checks;
pub mod store;

use std::collections::{HashSet, VecDeque};
use std::path::Path;
use std::sync::{Arc, Mutex, MutexGuard};

use serde::Serialize;

use crate::bank::ModelBank;
use crate::metrics::Registry;
use crate::scoring::{GroupScores, RewardGroup};
pub use checks::{RunError, RunTag, Thresholds, MAX_RUN_NAME, STEP_WINDOW};
use store::RunStore;
pub use store::{RunInfo, SampleRecord, StepSummary, MAX_LISTED_RUNS, MAX_SERIES_STEPS};

/// Runs with Prometheus gauges at once, the most recently updated: each run
/// is a label value, and a label set must stay bounded.
pub const MAX_GAUGED_RUNS: usize = 8;

/// A threshold a step crossed.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Warning {
    pub run: String,
    pub step: u64,
    /// `repeated_words`, `repeated_bigrams`, `distinct_1` or `distinct_2`.
    pub signal: &'static str,
    pub value: f64,
    pub threshold: f64,
}

/// A recently updated run as the live page shows it: its last steps and the
/// warnings of its latest step.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RecentRun {
    #[serde(flatten)]
    pub run: RunInfo,
    /// Up to the last `steps` steps asked for, oldest first.
    pub series: Vec<StepSummary>,
    /// The thresholds the latest step crossed (under the run's own thresholds).
    pub warnings: Vec<Warning>,
}

/// What recording a request's samples says back.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct RunReport {
    pub name: String,
    pub step: u64,
    /// Samples of the step so far, this request's included.
    pub step_samples: u64,
}

/// The watch over every run; cheap to clone.
#[derive(Clone)]
pub struct RunWatch {
    shared: Arc<Shared>,
}

struct Shared {
    store: Mutex<RunStore>,
    /// (run, signal) pairs already logged, so a warning is logged once.
    logged: Mutex<HashSet<(String, &'static str)>>,
    /// Runs with gauges, the most recently updated last.
    gauged: Mutex<VecDeque<String>>,
    metrics: Arc<Registry>,
}

fn lock<T>(m: &Mutex<T>) -> MutexGuard<'_, T> {
    m.lock().unwrap_or_else(|e| e.into_inner())
}

/// The gauges of a run's latest step, with what they show.
const GAUGES: [&str; 5] = [
    "befit_run_step",
    "befit_run_step_samples",
    "befit_run_reward_mean",
    "befit_run_repeated_words",
    "befit_run_distinct_2",
];

/// The warnings of a step summary under `t`.
pub fn warnings_of(run: &str, s: &StepSummary, t: &Thresholds) -> Vec<Warning> {
    if s.samples < t.min_samples {
        return Vec::new();
    }
    let warn = |signal, value, threshold| Warning {
        run: run.to_string(),
        step: s.step,
        signal,
        value,
        threshold,
    };
    let mut out = Vec::new();
    if s.repeated_words > t.repeated_words_above {
        out.push(warn(
            "repeated_words",
            s.repeated_words,
            t.repeated_words_above,
        ));
    }
    if s.repeated_bigrams > t.repeated_bigrams_above {
        out.push(warn(
            "repeated_bigrams",
            s.repeated_bigrams,
            t.repeated_bigrams_above,
        ));
    }
    if s.distinct_1 < t.distinct_1_below {
        out.push(warn("distinct_1", s.distinct_1, t.distinct_1_below));
    }
    if s.distinct_2 < t.distinct_2_below {
        out.push(warn("distinct_2", s.distinct_2, t.distinct_2_below));
    }
    out
}

impl RunWatch {
    /// Opens (creating) the watch's file.
    pub fn open(path: &Path, metrics: Arc<Registry>) -> Result<RunWatch, RunError> {
        Ok(RunWatch {
            shared: Arc::new(Shared {
                store: Mutex::new(RunStore::open(path)?),
                logged: Mutex::new(HashSet::new()),
                gauged: Mutex::new(VecDeque::new()),
                metrics,
            }),
        })
    }

    /// Adds a request's samples to its run's step (on disk on return) and
    /// returns the step's warnings; a warning is logged the first time its
    /// run crosses it in this process.
    pub fn record(
        &self,
        tag: &RunTag,
        samples: &[SampleRecord],
    ) -> Result<(RunReport, Vec<Warning>), RunError> {
        let now_ms = std::time::SystemTime::now()
            .duration_since(std::time::UNIX_EPOCH)
            .map_or(0, |d| i64::try_from(d.as_millis()).unwrap_or(i64::MAX));
        let (summary, thresholds, latest) =
            lock(&self.shared.store).record(tag, samples, now_ms)?;
        let warnings = warnings_of(&tag.run, &summary, &thresholds);
        {
            let mut logged = lock(&self.shared.logged);
            for w in &warnings {
                if logged.insert((w.run.clone(), w.signal)) {
                    tracing::warn!(run = %w.run, step = w.step, signal = w.signal, value = w.value, threshold = w.threshold, "run crossed a warning threshold");
                }
            }
        }
        if summary.step == latest {
            self.gauge(&tag.run, &summary);
        }
        Ok((
            RunReport {
                name: tag.run.clone(),
                step: tag.step,
                step_samples: summary.samples,
            },
            warnings,
        ))
    }

    fn gauge(&self, run: &str, s: &StepSummary) {
        let metrics = &self.shared.metrics;
        let mut gauged = lock(&self.shared.gauged);
        gauged.retain(|r| r != run);
        gauged.push_back(run.to_string());
        while gauged.len() > MAX_GAUGED_RUNS {
            if let Some(old) = gauged.pop_front() {
                for name in GAUGES {
                    metrics.remove(name, &[("run", &old)]);
                }
            }
        }
        let values = [
            s.step as f64,
            s.samples as f64,
            s.reward.mean,
            s.repeated_words,
            s.distinct_2,
        ];
        for (name, value) in GAUGES.into_iter().zip(values) {
            metrics.set(name, &[("run", run)], value);
        }
    }

    /// Every run, the most recently updated first.
    pub fn list(&self) -> Result<Vec<RunInfo>, RunError> {
        lock(&self.shared.store).list()
    }

    /// The `runs` most recently updated runs, each with its last `steps`
    /// steps (the range `latest - steps + 1 ..= latest`, so a run whose
    /// steps skip numbers shows fewer) and its latest step's warnings.
    pub fn recent(&self, runs: usize, steps: u64) -> Result<Vec<RecentRun>, RunError> {
        let store = lock(&self.shared.store);
        let mut out = Vec::new();
        for run in store.list()?.into_iter().take(runs) {
            let from = run.latest_step.saturating_sub(steps.saturating_sub(1));
            let Some((run, series)) = store.series(&run.name, from, run.latest_step)? else {
                continue;
            };
            let warnings = series
                .last()
                .filter(|s| s.step == run.latest_step)
                .map(|s| warnings_of(&run.name, s, &run.thresholds))
                .unwrap_or_default();
            out.push(RecentRun {
                run,
                series,
                warnings,
            });
        }
        Ok(out)
    }

    /// A run's steps from `from` to `to`, inclusive.
    pub fn series(
        &self,
        name: &str,
        from: u64,
        to: u64,
    ) -> Result<(RunInfo, Vec<StepSummary>), RunError> {
        if from > to {
            return Err(RunError::Range { from, to });
        }
        lock(&self.shared.store)
            .series(name, from, to)?
            .ok_or_else(|| RunError::UnknownRun(name.to_string()))
    }
}

/// The samples of scored groups as the watch counts them: each group's
/// sampled captions (not references or greedy captions) with their rewards
/// and guard flags, and, with a bank, whether each is one of its captions.
/// Blocking (the bank is SQLite).
pub fn samples_of(
    captions: &[Vec<String>],
    scores: &[GroupScores],
    bank: Option<&ModelBank>,
) -> Result<Vec<SampleRecord>, RunError> {
    let mut out = Vec::new();
    for (texts, group) in captions.iter().zip(scores) {
        for (text, s) in texts.iter().zip(&group.samples) {
            out.push(SampleRecord {
                text: text.clone(),
                reward: s.reward,
                cosine: s.cosine,
                flagged: s.guard.as_ref().map(|g| g.flagged.clone()),
                in_bank: None,
            });
        }
    }
    if let Some(bank) = bank {
        let texts: Vec<&str> = out.iter().map(|s| s.text.as_str()).collect();
        let found = bank
            .has_vector(&texts)
            .map_err(|e| RunError::Task(format!("bank lookup: {e}")))?;
        for (s, f) in out.iter_mut().zip(found) {
            s.in_bank = Some(f);
        }
    }
    Ok(out)
}

/// Counts scored groups in their run's step, off the async runtime: the
/// groups' sampled captions, their scores, and (with the bundle's bank)
/// whether each is a bank caption.
pub async fn record_scored(
    watch: &RunWatch,
    tag: RunTag,
    groups: Vec<RewardGroup>,
    scores: &[GroupScores],
    bank: Option<Arc<ModelBank>>,
) -> Result<(RunReport, Vec<Warning>), RunError> {
    let captions: Vec<Vec<String>> = groups.into_iter().map(|g| g.captions).collect();
    let watch = watch.clone();
    let scores = scores.to_vec();
    tokio::task::spawn_blocking(move || {
        let samples = samples_of(&captions, &scores, bank.as_deref())?;
        watch.record(&tag, &samples)
    })
    .await
    .map_err(|e| RunError::Task(e.to_string()))?
}

#[cfg(test)]
mod tests;
