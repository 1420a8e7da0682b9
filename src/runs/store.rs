//! The run watch's SQLite file: one row per run, one per run and step with
//! mergeable sums, and the distinct n-grams of the steps still open to late
//! samples (older ones are pruned: their counts are kept in the step row).
//! WAL with `synchronous=FULL`: a step's update is on disk before its
//! rewards are answered, so a killed server keeps every acknowledged step.

use std::collections::BTreeMap;
use std::path::Path;

use rusqlite::{params, Connection, OptionalExtension, Transaction};
use serde::Serialize;

use super::checks::{RunError, RunTag, Thresholds, STEP_WINDOW};
use crate::scoring::signals::{repeated_bigrams, repeated_words, words};

/// Steps one `GET /v1/runs/NAME` answers at most: a long run is read in ranges.
pub const MAX_SERIES_STEPS: usize = 10_000;

/// Runs `GET /v1/runs` lists at most, the most recently updated first.
pub const MAX_LISTED_RUNS: usize = 1_000;

/// The guards a step counts flags of, in the order answers list them.
pub const FLAG_NAMES: [&str; 5] = [
    "repeated_words",
    "repeated_bigrams",
    "unknown_tokens",
    "bank_cosine",
    "length",
];

const SCHEMA: &str = "
CREATE TABLE IF NOT EXISTS runs (
    name TEXT PRIMARY KEY,
    created_ms INTEGER NOT NULL,
    updated_ms INTEGER NOT NULL,
    latest_step INTEGER NOT NULL,
    thresholds TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS steps (
    run TEXT NOT NULL,
    step INTEGER NOT NULL,
    samples INTEGER NOT NULL,
    reward_sum REAL NOT NULL,
    reward_sq REAL NOT NULL,
    cosine_sum REAL NOT NULL,
    cosine_sq REAL NOT NULL,
    repeated_words_sum REAL NOT NULL,
    repeated_bigrams_sum REAL NOT NULL,
    words INTEGER NOT NULL,
    bigrams INTEGER NOT NULL,
    distinct_1 INTEGER NOT NULL,
    distinct_2 INTEGER NOT NULL,
    guarded INTEGER NOT NULL,
    flagged TEXT NOT NULL,
    bank_checked INTEGER NOT NULL,
    bank_equal INTEGER NOT NULL,
    PRIMARY KEY (run, step)
) WITHOUT ROWID;
CREATE TABLE IF NOT EXISTS ngrams (
    run TEXT NOT NULL,
    step INTEGER NOT NULL,
    n INTEGER NOT NULL,
    gram TEXT NOT NULL,
    PRIMARY KEY (run, step, n, gram)
) WITHOUT ROWID;
";

/// One sampled caption as the watch counts it.
#[derive(Debug, Clone)]
pub struct SampleRecord {
    pub text: String,
    pub reward: f32,
    pub cosine: f32,
    /// The guards it crossed; none when the request had no guard.
    pub flagged: Option<Vec<&'static str>>,
    /// Whether it equals a caption of the bank; none when no bank was asked.
    pub in_bank: Option<bool>,
}

/// The sums of one run's step.
#[derive(Debug, Clone, Default)]
struct StepRow {
    samples: u64,
    reward_sum: f64,
    reward_sq: f64,
    cosine_sum: f64,
    cosine_sq: f64,
    repeated_words_sum: f64,
    repeated_bigrams_sum: f64,
    words: u64,
    bigrams: u64,
    distinct_1: u64,
    distinct_2: u64,
    guarded: u64,
    flagged: BTreeMap<String, u64>,
    bank_checked: u64,
    bank_equal: u64,
}

/// A mean and population standard deviation (numpy's default, ddof = 0).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, utoipa::ToSchema)]
pub struct Spread {
    pub mean: f64,
    pub std: f64,
}

fn spread(sum: f64, sq: f64, n: u64) -> Spread {
    if n == 0 {
        return Spread {
            mean: 0.0,
            std: 0.0,
        };
    }
    let mean = sum / n as f64;
    let var = (sq / n as f64 - mean * mean).max(0.0);
    Spread {
        mean,
        std: var.sqrt(),
    }
}

fn share(part: u64, whole: u64) -> f64 {
    if whole == 0 {
        0.0
    } else {
        part as f64 / whole as f64
    }
}

/// One step of a run, as answers show it.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct StepSummary {
    pub step: u64,
    pub samples: u64,
    pub reward: Spread,
    pub cosine: Spread,
    /// Mean share of words repeating an earlier word of their caption.
    pub repeated_words: f64,
    /// Mean share of bigrams repeating an earlier bigram of their caption.
    pub repeated_bigrams: f64,
    /// Distinct words over all words of the step (Li et al. 2016).
    pub distinct_1: f64,
    /// Distinct bigrams over all bigrams of the step (Li et al. 2016).
    pub distinct_2: f64,
    /// Distinct words of the step.
    pub vocabulary: u64,
    /// Mean words per caption.
    pub mean_words: f64,
    /// Samples scored with a guard.
    pub guarded: u64,
    /// Share of guarded samples that crossed each guard.
    pub flagged: BTreeMap<String, f64>,
    /// Share of samples equal to a bank caption, of those checked (null when none were).
    pub bank_equal: Option<f64>,
}

impl StepRow {
    fn summary(&self, step: u64) -> StepSummary {
        StepSummary {
            step,
            samples: self.samples,
            reward: spread(self.reward_sum, self.reward_sq, self.samples),
            cosine: spread(self.cosine_sum, self.cosine_sq, self.samples),
            repeated_words: share_f(self.repeated_words_sum, self.samples),
            repeated_bigrams: share_f(self.repeated_bigrams_sum, self.samples),
            distinct_1: share(self.distinct_1, self.words),
            distinct_2: share(self.distinct_2, self.bigrams),
            vocabulary: self.distinct_1,
            mean_words: share(self.words, self.samples),
            guarded: self.guarded,
            flagged: FLAG_NAMES
                .iter()
                .map(|n| {
                    let c = self.flagged.get(*n).copied().unwrap_or(0);
                    (n.to_string(), share(c, self.guarded))
                })
                .collect(),
            bank_equal: (self.bank_checked > 0).then(|| share(self.bank_equal, self.bank_checked)),
        }
    }
}

fn share_f(sum: f64, n: u64) -> f64 {
    if n == 0 {
        0.0
    } else {
        sum / n as f64
    }
}

/// A run as `GET /v1/runs` lists it.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct RunInfo {
    pub name: String,
    pub created_ms: i64,
    pub updated_ms: i64,
    pub latest_step: u64,
    pub steps: u64,
    pub samples: u64,
    pub thresholds: Thresholds,
}

/// The open SQLite file.
pub struct RunStore {
    conn: Connection,
}

fn to_i64(v: u64) -> i64 {
    i64::try_from(v).unwrap_or(i64::MAX)
}

fn thresholds_of(text: &str) -> Thresholds {
    // Written by this module from a checked value; a damaged cell falls back
    // to the defaults rather than failing the run.
    serde_json::from_str(text).unwrap_or_default()
}

impl RunStore {
    /// Opens (creating) the file.
    pub fn open(path: &Path) -> Result<RunStore, RunError> {
        let conn = Connection::open(path)?;
        conn.pragma_update(None, "journal_mode", "WAL")?;
        conn.pragma_update(None, "synchronous", "FULL")?;
        conn.execute_batch(SCHEMA)?;
        Ok(RunStore { conn })
    }

    /// Adds samples to a run's step in one transaction; returns the step's
    /// new summary, the run's thresholds and its latest step.
    pub fn record(
        &mut self,
        tag: &RunTag,
        samples: &[SampleRecord],
        now_ms: i64,
    ) -> Result<(StepSummary, Thresholds, u64), RunError> {
        let tx = self
            .conn
            .transaction_with_behavior(rusqlite::TransactionBehavior::Immediate)?;
        let known: Option<(i64, String)> = tx
            .query_row(
                "SELECT latest_step, thresholds FROM runs WHERE name = ?1",
                [&tag.run],
                |r| Ok((r.get(0)?, r.get(1)?)),
            )
            .optional()?;
        let (latest, thresholds) = match &known {
            Some((latest, text)) => {
                let latest = *latest as u64;
                if tag.step.saturating_add(STEP_WINDOW) < latest {
                    return Err(RunError::StepBack {
                        run: tag.run.clone(),
                        step: tag.step,
                        latest,
                    });
                }
                (
                    latest.max(tag.step),
                    tag.thresholds.unwrap_or(thresholds_of(text)),
                )
            }
            None => (tag.step, tag.thresholds.unwrap_or_default()),
        };
        let thresholds_text =
            serde_json::to_string(&thresholds).map_err(|e| RunError::Task(e.to_string()))?;
        tx.execute(
            "INSERT INTO runs (name, created_ms, updated_ms, latest_step, thresholds)
             VALUES (?1, ?2, ?2, ?3, ?4)
             ON CONFLICT(name) DO UPDATE SET updated_ms = ?2, latest_step = ?3, thresholds = ?4",
            params![tag.run, now_ms, to_i64(latest), thresholds_text],
        )?;
        let mut row = read_step(&tx, &tag.run, tag.step)?.unwrap_or_default();
        add_samples(&tx, &mut row, &tag.run, tag.step, samples)?;
        write_step(&tx, &tag.run, tag.step, &row)?;
        // Steps older than the window can get no more samples: their distinct
        // counts are final and live in their rows.
        if let Some(closed) = latest.checked_sub(STEP_WINDOW) {
            tx.execute(
                "DELETE FROM ngrams WHERE run = ?1 AND step < ?2",
                params![tag.run, to_i64(closed)],
            )?;
        }
        tx.commit()?;
        Ok((row.summary(tag.step), thresholds, latest))
    }

    /// Every run, the most recently updated first (at most [`MAX_LISTED_RUNS`]).
    pub fn list(&self) -> Result<Vec<RunInfo>, RunError> {
        let mut stmt = self.conn.prepare(
            "SELECT name, created_ms, updated_ms, latest_step, thresholds,
                    (SELECT COUNT(*) FROM steps WHERE run = name),
                    (SELECT COALESCE(SUM(samples), 0) FROM steps WHERE run = name)
             FROM runs ORDER BY updated_ms DESC, name LIMIT ?1",
        )?;
        let rows = stmt.query_map([MAX_LISTED_RUNS as i64], |r| {
            Ok(RunInfo {
                name: r.get(0)?,
                created_ms: r.get(1)?,
                updated_ms: r.get(2)?,
                latest_step: r.get::<_, i64>(3)? as u64,
                thresholds: thresholds_of(&r.get::<_, String>(4)?),
                steps: r.get::<_, i64>(5)? as u64,
                samples: r.get::<_, i64>(6)? as u64,
            })
        })?;
        Ok(rows.collect::<Result<_, _>>()?)
    }

    /// One run and its steps from `from` to `to` (inclusive), at most
    /// [`MAX_SERIES_STEPS`]; none when the run is unknown.
    pub fn series(
        &self,
        name: &str,
        from: u64,
        to: u64,
    ) -> Result<Option<(RunInfo, Vec<StepSummary>)>, RunError> {
        let Some(info) = self.list_one(name)? else {
            return Ok(None);
        };
        let mut stmt = self.conn.prepare(&format!(
            "SELECT step, {STEP_COLUMNS} FROM steps WHERE run = ?1 AND step BETWEEN ?2 AND ?3
             ORDER BY step LIMIT ?4"
        ))?;
        let rows = stmt.query_map(
            params![name, to_i64(from), to_i64(to), MAX_SERIES_STEPS as i64],
            |r| {
                let step = r.get::<_, i64>(0)? as u64;
                Ok((step, step_row(r, 1)?))
            },
        )?;
        let mut steps = Vec::new();
        for row in rows {
            let (step, row) = row?;
            steps.push(row.summary(step));
        }
        Ok(Some((info, steps)))
    }

    fn list_one(&self, name: &str) -> Result<Option<RunInfo>, RunError> {
        Ok(self
            .conn
            .query_row(
                "SELECT created_ms, updated_ms, latest_step, thresholds,
                        (SELECT COUNT(*) FROM steps WHERE run = ?1),
                        (SELECT COALESCE(SUM(samples), 0) FROM steps WHERE run = ?1)
                 FROM runs WHERE name = ?1",
                [name],
                |r| {
                    Ok(RunInfo {
                        name: name.to_string(),
                        created_ms: r.get(0)?,
                        updated_ms: r.get(1)?,
                        latest_step: r.get::<_, i64>(2)? as u64,
                        thresholds: thresholds_of(&r.get::<_, String>(3)?),
                        steps: r.get::<_, i64>(4)? as u64,
                        samples: r.get::<_, i64>(5)? as u64,
                    })
                },
            )
            .optional()?)
    }
}

const STEP_COLUMNS: &str = "samples, reward_sum, reward_sq, cosine_sum, cosine_sq,
    repeated_words_sum, repeated_bigrams_sum, words, bigrams, distinct_1, distinct_2,
    guarded, flagged, bank_checked, bank_equal";

fn step_row(r: &rusqlite::Row<'_>, at: usize) -> rusqlite::Result<StepRow> {
    let count = |i: usize| r.get::<_, i64>(at + i).map(|v| v as u64);
    Ok(StepRow {
        samples: count(0)?,
        reward_sum: r.get(at + 1)?,
        reward_sq: r.get(at + 2)?,
        cosine_sum: r.get(at + 3)?,
        cosine_sq: r.get(at + 4)?,
        repeated_words_sum: r.get(at + 5)?,
        repeated_bigrams_sum: r.get(at + 6)?,
        words: count(7)?,
        bigrams: count(8)?,
        distinct_1: count(9)?,
        distinct_2: count(10)?,
        guarded: count(11)?,
        flagged: serde_json::from_str(&r.get::<_, String>(at + 12)?).unwrap_or_default(),
        bank_checked: count(13)?,
        bank_equal: count(14)?,
    })
}

fn read_step(tx: &Transaction<'_>, run: &str, step: u64) -> Result<Option<StepRow>, RunError> {
    Ok(tx
        .query_row(
            &format!("SELECT {STEP_COLUMNS} FROM steps WHERE run = ?1 AND step = ?2"),
            params![run, to_i64(step)],
            |r| step_row(r, 0),
        )
        .optional()?)
}

fn write_step(tx: &Transaction<'_>, run: &str, step: u64, row: &StepRow) -> Result<(), RunError> {
    let flagged = serde_json::to_string(&row.flagged).map_err(|e| RunError::Task(e.to_string()))?;
    tx.execute(
        &format!(
            "INSERT OR REPLACE INTO steps (run, step, {STEP_COLUMNS})
             VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17)"
        ),
        params![
            run,
            to_i64(step),
            to_i64(row.samples),
            row.reward_sum,
            row.reward_sq,
            row.cosine_sum,
            row.cosine_sq,
            row.repeated_words_sum,
            row.repeated_bigrams_sum,
            to_i64(row.words),
            to_i64(row.bigrams),
            to_i64(row.distinct_1),
            to_i64(row.distinct_2),
            to_i64(row.guarded),
            flagged,
            to_i64(row.bank_checked),
            to_i64(row.bank_equal),
        ],
    )?;
    Ok(())
}

fn add_samples(
    tx: &Transaction<'_>,
    row: &mut StepRow,
    run: &str,
    step: u64,
    samples: &[SampleRecord],
) -> Result<(), RunError> {
    let mut insert = tx.prepare_cached(
        "INSERT OR IGNORE INTO ngrams (run, step, n, gram) VALUES (?1, ?2, ?3, ?4)",
    )?;
    for s in samples {
        let w = words(&s.text);
        let (reward, cosine) = (f64::from(s.reward), f64::from(s.cosine));
        row.samples += 1;
        row.reward_sum += reward;
        row.reward_sq += reward * reward;
        row.cosine_sum += cosine;
        row.cosine_sq += cosine * cosine;
        row.repeated_words_sum += f64::from(repeated_words(&w));
        row.repeated_bigrams_sum += f64::from(repeated_bigrams(&w));
        row.words += w.len() as u64;
        row.bigrams += w.len().saturating_sub(1) as u64;
        for word in &w {
            row.distinct_1 += insert.execute(params![run, to_i64(step), 1, word])? as u64;
        }
        for pair in w.windows(2) {
            // Words hold no spaces, so a space joins a bigram unambiguously.
            let gram = format!("{} {}", pair[0], pair[1]);
            row.distinct_2 += insert.execute(params![run, to_i64(step), 2, gram])? as u64;
        }
        if let Some(flags) = &s.flagged {
            row.guarded += 1;
            for f in flags {
                *row.flagged.entry(f.to_string()).or_insert(0) += 1;
            }
        }
        if let Some(equal) = s.in_bank {
            row.bank_checked += 1;
            row.bank_equal += u64::from(equal);
        }
    }
    Ok(())
}
