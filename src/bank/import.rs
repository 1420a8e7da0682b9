//! Import of captions from JSON Lines into a [`ModelBank`], and embedding of
//! captions a new bundle lacks.
//!
//! Each line is either `{"text": "...", "tag": "..."}` (tag optional, other
//! fields ignored) or a plain JSON string. Lines are embedded in batches and
//! each batch is committed on its own, so an import that stops (Ctrl-C, an
//! encoder failure, a crash) keeps what it committed; running it again skips
//! every text already stored with a vector for this bundle, without
//! embedding it again, and carries on.

use std::fs::File;
use std::io::{BufRead, BufReader, Read};
use std::path::{Path, PathBuf};
use std::time::Instant;

use serde::Serialize;

use super::index::IndexError;
use super::progress::{EmbedReporter, ImportProgress, ImportReporter};
use super::validation::EntryProblem;
use super::{check_tag, BankError, ModelBank, RowId};
use crate::vectors::{EmbedError, Embedder};

/// Captions embedded and committed together. Large enough to keep an encoder
/// busy, small enough that an interruption loses little work.
pub const DEFAULT_IMPORT_BATCH: usize = 256;

/// Longest line read; a longer one is reported as bad and skipped.
pub const MAX_LINE_BYTES: usize = 1 << 20;

/// Bad lines listed one by one in the report (all are counted).
pub const MAX_BAD_LINES_LISTED: usize = 100;

/// Why an import stopped.
#[derive(Debug, thiserror::Error)]
pub enum ImportError {
    /// The file could not be read.
    #[error("cannot read {path}: {source}")]
    Read {
        /// The file.
        path: PathBuf,
        /// The I/O error.
        #[source]
        source: std::io::Error,
    },
    /// The encoder failed on a batch; earlier batches are committed.
    #[error("embedding the captions of lines {first_line}-{last_line} failed: {source}; fix the encoder and run the import again, it resumes after the last committed batch")]
    Embed {
        /// First line of the batch.
        first_line: u64,
        /// Last line of the batch.
        last_line: u64,
        /// The encoder's error.
        #[source]
        source: EmbedError,
    },
    /// The encoder returned the wrong shape.
    #[error("the encoder returned {rows} x {cols} for {asked} captions of a {dim}-dimensional bundle; it does not match the bank's bundle")]
    Shape {
        /// Rows returned.
        rows: usize,
        /// Columns returned.
        cols: usize,
        /// Captions asked.
        asked: usize,
        /// Dimension expected.
        dim: usize,
    },
    /// Storing a batch failed.
    #[error(transparent)]
    Bank(#[from] BankError),
    /// Batch size 0.
    #[error("batch size must be at least 1")]
    BatchSize,
    /// The encoder returned an unusable vector (NaN, all zeros).
    #[error(
        "the encoder's vector for line {line} is unusable: {source}; the encoder output is broken"
    )]
    Vector {
        /// Line of the caption.
        line: u64,
        /// What is wrong with the vector.
        #[source]
        source: IndexError,
    },
    /// The tag given for the whole import is invalid.
    #[error("the import tag is invalid: {0}")]
    Tag(EntryProblem),
}

/// One line that could not be used.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct BadLine {
    /// 1-based line number.
    pub line: u64,
    /// What is wrong with it.
    pub reason: String,
}

/// What an import did.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ImportReport {
    /// Lines read (blank ones included).
    pub lines: u64,
    /// Captions embedded and stored.
    pub added: u64,
    /// Captions already there for this bundle (skipped, not re-embedded).
    pub present: u64,
    /// Lines that could not be used.
    pub bad: u64,
    /// The first [`MAX_BAD_LINES_LISTED`] of them.
    pub bad_lines: Vec<BadLine>,
    /// Batches committed.
    pub batches: u64,
    /// Wall time, in milliseconds.
    pub millis: u64,
}

#[derive(serde::Deserialize)]
struct LineObject {
    text: String,
    #[serde(default)]
    tag: Option<String>,
}

#[derive(serde::Deserialize)]
#[serde(untagged)]
enum Line {
    Plain(String),
    Object(LineObject),
}

/// One usable line.
struct Entry {
    line: u64,
    text: String,
    tag: Option<String>,
}

/// Parses one line into text and tag, or says what is wrong.
fn parse_line(
    bytes: &[u8],
    default_tag: Option<&str>,
    bank: &ModelBank,
) -> Result<Option<(String, Option<String>)>, String> {
    let text = std::str::from_utf8(bytes).map_err(|e| format!("not UTF-8 ({e})"))?;
    // Editors on some systems start a UTF-8 file with a byte-order mark.
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let text = text.trim_end_matches(['\n', '\r']);
    if text.trim().is_empty() {
        return Ok(None);
    }
    let line: Line = serde_json::from_str(text).map_err(|_| {
        "not a JSON string nor an object with a \"text\" string (and an optional \"tag\" string)".to_string()
    })?;
    let (caption, tag) = match line {
        Line::Plain(s) => (s, None),
        Line::Object(o) => (o.text, o.tag),
    };
    let tag = tag.or_else(|| default_tag.map(str::to_string));
    bank.check_text(&caption).map_err(|p| p.to_string())?;
    if let Some(t) = &tag {
        check_tag(t).map_err(|p| p.to_string())?;
    }
    Ok(Some((caption, tag)))
}

/// Reads a line of at most [`MAX_LINE_BYTES`]; returns bytes consumed and
/// whether it was too long (its rest is skipped).
fn read_line(reader: &mut impl BufRead, buf: &mut Vec<u8>) -> std::io::Result<(u64, bool)> {
    buf.clear();
    let n = reader
        .by_ref()
        .take(MAX_LINE_BYTES as u64 + 1)
        .read_until(b'\n', buf)?;
    let mut consumed = n as u64;
    let too_long = n > MAX_LINE_BYTES && buf.last() != Some(&b'\n');
    if too_long {
        let mut sink = Vec::new();
        loop {
            sink.clear();
            let m = reader.by_ref().take(1 << 16).read_until(b'\n', &mut sink)?;
            consumed += m as u64;
            if m == 0 || sink.last() == Some(&b'\n') {
                break;
            }
        }
    }
    Ok((consumed, too_long))
}

/// Imports the captions of a JSON Lines file into `bank`, embedding with
/// `embedder` (which must be the bank's bundle) `batch_size` captions at a
/// time ([`DEFAULT_IMPORT_BATCH`] is a good choice) and committing each batch.
///
/// `tag` applies to lines that do not carry their own. Bad lines (not JSON,
/// empty text, too long...) are counted and listed with their line number,
/// and the import goes on. Texts already stored with a vector for this bundle
/// are skipped without embedding (their tag is still recorded), so running
/// the same import again adds nothing and an interrupted one resumes.
/// `progress` is called after every batch.
pub fn import_jsonl(
    bank: &ModelBank,
    embedder: &dyn Embedder,
    path: &Path,
    tag: Option<&str>,
    batch_size: usize,
    progress: &mut ImportReporter<'_>,
) -> Result<ImportReport, ImportError> {
    let start = Instant::now();
    if batch_size == 0 {
        return Err(ImportError::BatchSize);
    }
    if let Some(t) = tag {
        check_tag(t).map_err(ImportError::Tag)?;
    }
    let read_err = |source| ImportError::Read {
        path: path.to_path_buf(),
        source,
    };
    let file = File::open(path).map_err(read_err)?;
    let total_bytes = file.metadata().map(|m| m.len()).unwrap_or(0);
    let mut reader = BufReader::with_capacity(1 << 16, file);
    let mut state = ImportProgress {
        total_bytes,
        ..Default::default()
    };
    let mut report = ImportReport {
        lines: 0,
        added: 0,
        present: 0,
        bad: 0,
        bad_lines: Vec::new(),
        batches: 0,
        millis: 0,
    };
    let mut batch: Vec<Entry> = Vec::with_capacity(batch_size);
    let mut buf = Vec::new();
    loop {
        let (consumed, too_long) = read_line(&mut reader, &mut buf).map_err(read_err)?;
        if consumed == 0 {
            break;
        }
        state.bytes_read += consumed;
        state.lines += 1;
        let parsed = if too_long {
            Err(format!("longer than {MAX_LINE_BYTES} bytes"))
        } else {
            parse_line(&buf, tag, bank)
        };
        match parsed {
            Ok(Some((text, tag))) => batch.push(Entry {
                line: state.lines,
                text,
                tag,
            }),
            Ok(None) => {}
            Err(reason) => {
                state.bad += 1;
                if report.bad_lines.len() < MAX_BAD_LINES_LISTED {
                    report.bad_lines.push(BadLine {
                        line: state.lines,
                        reason,
                    });
                }
            }
        }
        if batch.len() >= batch_size {
            run_batch(bank, embedder, &mut batch, &mut state)?;
            report.batches += 1;
            progress(&state);
        }
    }
    if !batch.is_empty() {
        run_batch(bank, embedder, &mut batch, &mut state)?;
        report.batches += 1;
    }
    progress(&state);
    report.lines = state.lines;
    report.added = state.added;
    report.present = state.present;
    report.bad = state.bad;
    report.millis = start.elapsed().as_millis() as u64;
    Ok(report)
}

/// Embeds the entries whose text the bank lacks for this bundle and commits
/// the batch; records tags of the others.
fn run_batch(
    bank: &ModelBank,
    embedder: &dyn Embedder,
    batch: &mut Vec<Entry>,
    state: &mut ImportProgress,
) -> Result<(), ImportError> {
    let first_line = batch.first().map_or(0, |e| e.line);
    let last_line = batch.last().map_or(0, |e| e.line);
    let texts: Vec<&str> = batch.iter().map(|e| e.text.as_str()).collect();
    let present = bank.has_vector(&texts)?;
    // A text repeated inside the batch is embedded once.
    let mut seen = std::collections::HashSet::new();
    let mut to_embed: Vec<usize> = Vec::new();
    let mut known: Vec<(&str, Option<&str>)> = Vec::new();
    for (i, e) in batch.iter().enumerate() {
        if present[i] || !seen.insert(e.text.as_str()) {
            known.push((&e.text, e.tag.as_deref()));
        } else {
            to_embed.push(i);
        }
    }
    state.present += known.len() as u64;
    if !to_embed.is_empty() {
        let texts: Vec<String> = to_embed.iter().map(|i| batch[*i].text.clone()).collect();
        let vectors = embedder
            .embed_texts(&texts)
            .map_err(|source| ImportError::Embed {
                first_line,
                last_line,
                source,
            })?;
        let dim = bank.dimension();
        if vectors.nrows() != texts.len() || vectors.ncols() != dim {
            return Err(ImportError::Shape {
                rows: vectors.nrows(),
                cols: vectors.ncols(),
                asked: texts.len(),
                dim,
            });
        }
        let mut units = Vec::with_capacity(texts.len());
        for (n, row) in vectors.outer_iter().enumerate() {
            let row: Vec<f32> = row.iter().copied().collect();
            let unit = super::index::unit_vector(&row, dim, bank.digest()).map_err(|source| {
                ImportError::Vector {
                    line: batch[to_embed[n]].line,
                    source,
                }
            })?;
            units.push(unit);
        }
        // The tags of repeated texts go in the same transaction as the text.
        let mut rows: Vec<super::store::StoreRow<'_>> = to_embed
            .iter()
            .zip(&units)
            .map(|(i, v)| super::store::StoreRow {
                text: &batch[*i].text,
                tag: batch[*i].tag.as_deref(),
                vector: Some(v),
            })
            .collect();
        rows.extend(
            known
                .iter()
                .filter(|(_, t)| t.is_some())
                .map(|(text, tag)| super::store::StoreRow {
                    text,
                    tag: *tag,
                    vector: None,
                }),
        );
        let stored = bank.commit(&rows)?;
        state.added += stored.iter().take(to_embed.len()).filter(|s| s.new).count() as u64;
    } else {
        bank.add_tags(&known)?;
    }
    batch.clear();
    Ok(())
}

/// Embeds, `batch_size` at a time, every caption of the store that has no
/// vector for this bank's bundle (after a new bundle is loaded, its bank is
/// empty until this runs). Resumable like [`import_jsonl`]. Returns how many
/// captions were embedded.
pub fn embed_missing(
    bank: &ModelBank,
    embedder: &dyn Embedder,
    batch_size: usize,
    progress: &mut EmbedReporter<'_>,
) -> Result<u64, ImportError> {
    if batch_size == 0 {
        return Err(ImportError::BatchSize);
    }
    let mut after: RowId = 0;
    let mut done = 0u64;
    loop {
        let rows = bank
            .store()
            .without_vector(bank.digest(), after, batch_size)
            .map_err(BankError::from)?;
        let Some(last) = rows.last() else { break };
        after = last.0;
        let texts: Vec<String> = rows.iter().map(|(_, t)| t.clone()).collect();
        let vectors = embedder
            .embed_texts(&texts)
            .map_err(|source| ImportError::Embed {
                first_line: 0,
                last_line: 0,
                source,
            })?;
        if vectors.nrows() != texts.len() || vectors.ncols() != bank.dimension() {
            return Err(ImportError::Shape {
                rows: vectors.nrows(),
                cols: vectors.ncols(),
                asked: texts.len(),
                dim: bank.dimension(),
            });
        }
        let captions: Vec<super::NewCaption> = texts
            .into_iter()
            .zip(vectors.outer_iter())
            .map(|(text, v)| super::NewCaption {
                text,
                tag: None,
                vector: v.to_vec(),
            })
            .collect();
        done += bank.append(&captions)?.iter().filter(|a| a.new).count() as u64;
        progress(done);
    }
    Ok(done)
}
