//! [`ModelBank`]: the caption bank as seen by one bundle: append captions
//! with that bundle's vectors, search them, look them up.

use std::collections::HashSet;
use std::sync::Arc;

use serde::Serialize;

use super::index::{
    self, check_search_bounds, Answered, DumpReport, IndexStats, Search, SearchMode, VectorIndex,
};
use super::store::{self, Caption, CaptionStore};
use super::validation::EntryProblem;
use super::validation::{check_caption, check_tag};
use super::{read, write, BankError, Core, RowId};

/// A caption to add, with its vector from the bundle of the [`ModelBank`].
#[derive(Debug, Clone, PartialEq)]
pub struct NewCaption {
    /// Caption text, stored exactly as given.
    pub text: String,
    /// Optional tag (say, the data set it came from).
    pub tag: Option<String>,
    /// Its embedding (scaled to unit length before it is stored).
    pub vector: Vec<f32>,
}

/// What an append did with one caption.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
pub struct Appended {
    /// The caption's id.
    pub id: RowId,
    /// False when the bank already had this text with a vector for this
    /// bundle (nothing but the tag was added).
    pub new: bool,
}

/// One nearest-caption search.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct BankQuery {
    /// Captions wanted (1 to [`index::MAX_K`]).
    pub k: usize,
    /// Search breadth; the bank's default ([`index::DEFAULT_EF_SEARCH`]) if `None`.
    pub ef_search: Option<usize>,
    /// Only captions with this tag.
    pub tag: Option<String>,
    /// Graph, exact, or by size.
    pub mode: SearchMode,
}

impl BankQuery {
    /// Checks `k` and the breadth against the index's bounds
    /// ([`index::MAX_K`], [`index::MAX_EF_SEARCH`]); [`ModelBank::search`]
    /// does too, callers run it first to refuse before embedding a query.
    pub fn check(&self) -> Result<(), BankError> {
        Ok(check_search_bounds(self.k, self.ef_search)?)
    }
}

/// One hit of a search.
#[derive(Debug, Clone, PartialEq, Serialize, utoipa::ToSchema)]
pub struct BankHit {
    /// Caption id.
    pub id: RowId,
    /// Caption text.
    pub text: String,
    /// Its tags, sorted.
    pub tags: Vec<String>,
    /// Cosine to the query.
    pub cosine: f32,
}

/// The answer to a [`BankQuery`].
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct BankAnswer {
    /// Best first.
    pub hits: Vec<BankHit>,
    /// Graph or exact.
    pub answered: Answered,
    /// Breadth used (0 for exact).
    pub ef_search: usize,
}

/// The bank as seen by one bundle: append, search, look up.
pub struct ModelBank {
    core: Arc<Core>,
    index: VectorIndex,
}

impl std::fmt::Debug for ModelBank {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ModelBank")
            .field("index", &self.index)
            .finish()
    }
}

impl ModelBank {
    pub(super) fn new(core: Arc<Core>, index: VectorIndex) -> Self {
        Self { core, index }
    }

    /// The bundle digest.
    pub fn digest(&self) -> &str {
        self.index.digest()
    }

    /// Vector length of the bundle.
    pub fn dimension(&self) -> usize {
        self.index.dimension()
    }

    /// The index (exact and graph search on row ids, stats).
    pub fn index(&self) -> &VectorIndex {
        &self.index
    }

    /// Adds captions with their vectors in one transaction. When this returns
    /// they are on disk and found by every search. A text already in the bank
    /// is not stored again (its first vector is kept; a new tag is added).
    pub fn append(&self, captions: &[NewCaption]) -> Result<Vec<Appended>, BankError> {
        if captions.len() > self.core.config.max_append {
            return Err(BankError::TooMany {
                got: captions.len(),
                limit: self.core.config.max_append,
            });
        }
        let mut units = Vec::with_capacity(captions.len());
        for (position, c) in captions.iter().enumerate() {
            let invalid = |problem| BankError::Invalid { position, problem };
            self.check_text(&c.text).map_err(invalid)?;
            if let Some(tag) = &c.tag {
                check_tag(tag).map_err(invalid)?;
            }
            let unit = index::unit_vector(&c.vector, self.dimension(), self.digest())
                .map_err(|source| BankError::Vector { position, source })?;
            units.push(unit);
        }
        let rows: Vec<store::StoreRow<'_>> = captions
            .iter()
            .zip(&units)
            .map(|(c, v)| store::StoreRow {
                text: &c.text,
                tag: c.tag.as_deref(),
                vector: Some(v),
            })
            .collect();
        self.commit(&rows)
    }

    /// Checks a caption against the bank's limits (see [`check_caption`]).
    pub(super) fn check_text(&self, text: &str) -> Result<(), EntryProblem> {
        check_caption(text, self.core.config.max_caption_bytes)
    }

    /// Commits rows (vectors already unit length), then updates the tag sets
    /// and the index.
    pub(super) fn commit(&self, rows: &[store::StoreRow<'_>]) -> Result<Vec<Appended>, BankError> {
        let stored = self.core.store.append(self.digest(), rows)?;
        {
            let mut tags = write(&self.core.tags);
            for (row, s) in rows.iter().zip(&stored) {
                if let Some(tag) = row.tag {
                    tags.entry(tag.to_string()).or_default().insert(s.id);
                }
            }
        }
        let fresh: Vec<(RowId, Vec<f32>)> = rows
            .iter()
            .zip(&stored)
            .filter(|(_, s)| s.new_vector)
            .filter_map(|(r, s)| r.vector.map(|v| (s.id, v.to_vec())))
            .collect();
        // After the commit the store has the rows; should the index fail here,
        // the next start replays them, so the append still succeeded.
        if let Err(e) = self.index.insert(&fresh) {
            tracing::error!(digest = self.digest(), error = %e, "caption index insert failed after commit");
        }
        Ok(stored
            .iter()
            .map(|s| Appended {
                id: s.id,
                new: s.new_vector,
            })
            .collect())
    }

    /// For each text: whether the bank already has it with a vector for this
    /// bundle (import skips those without embedding them again).
    pub fn has_vector(&self, texts: &[&str]) -> Result<Vec<bool>, BankError> {
        Ok(self.core.store.has_vector(self.digest(), texts)?)
    }

    /// Records tags for texts already in the bank with a vector (no embedding).
    pub(super) fn add_tags(&self, rows: &[(&str, Option<&str>)]) -> Result<(), BankError> {
        let rows: Vec<store::StoreRow<'_>> = rows
            .iter()
            .filter(|(_, tag)| tag.is_some())
            .map(|(text, tag)| store::StoreRow {
                text,
                tag: *tag,
                vector: None,
            })
            .collect();
        if !rows.is_empty() {
            self.commit(&rows)?;
        }
        Ok(())
    }

    /// The captions nearest `query` (a vector of this bundle's space).
    pub fn search(&self, query: &[f32], q: &BankQuery) -> Result<BankAnswer, BankError> {
        let answer = self.filtered(q, |search| self.index.search(query, search))?;
        let mut answers = self.with_captions(vec![answer])?;
        answers
            .pop()
            .ok_or(BankError::Index(index::IndexError::Internal(
                "a search that lost its answer",
            )))
    }

    /// The captions nearest each of `queries`, answered in order: each
    /// answer is the one [`Self::search`] gives that query. Exact searches
    /// share matrix products (see [`VectorIndex::search_many`]), and the
    /// captions of every answer are read from the store in one go.
    pub fn search_many(
        &self,
        queries: &[Vec<f32>],
        q: &BankQuery,
    ) -> Result<Vec<BankAnswer>, BankError> {
        let answers = self.filtered(q, |search| self.index.search_many(queries, search))?;
        self.with_captions(answers)
    }

    /// Runs `f` with the index search `q` describes, its tag turned into the
    /// set of tagged rows (held under the tags' read lock meanwhile).
    fn filtered<T>(
        &self,
        q: &BankQuery,
        f: impl FnOnce(&Search<'_>) -> Result<T, index::IndexError>,
    ) -> Result<T, BankError> {
        let tags = read(&self.core.tags);
        let empty = HashSet::new();
        let only = q.tag.as_ref().map(|tag| tags.get(tag).unwrap_or(&empty));
        let search = Search {
            k: q.k,
            ef_search: q.ef_search,
            mode: q.mode,
            only,
        };
        Ok(f(&search)?)
    }

    /// Index answers with their captions' texts and tags, read in one go.
    fn with_captions(
        &self,
        answers: Vec<index::SearchAnswer>,
    ) -> Result<Vec<BankAnswer>, BankError> {
        let ids: Vec<RowId> = answers
            .iter()
            .flat_map(|a| a.hits.iter().map(|h| h.id))
            .collect();
        let mut captions = self.core.store.captions(&ids)?.into_iter();
        Ok(answers
            .into_iter()
            .map(|answer| {
                let hits = answer
                    .hits
                    .iter()
                    .zip(captions.by_ref())
                    .filter_map(|(h, c)| {
                        c.map(|c| BankHit {
                            id: h.id,
                            text: c.text,
                            tags: c.tags,
                            cosine: h.cosine,
                        })
                    })
                    .collect();
                BankAnswer {
                    hits,
                    answered: answer.answered,
                    ef_search: answer.ef_search,
                }
            })
            .collect())
    }

    /// The exact nearest captions (a full scan), optionally with a tag.
    pub fn exact(
        &self,
        query: &[f32],
        k: usize,
        tag: Option<&str>,
    ) -> Result<BankAnswer, BankError> {
        self.search(
            query,
            &BankQuery {
                k,
                ef_search: None,
                tag: tag.map(str::to_string),
                mode: SearchMode::Exact,
            },
        )
    }

    /// The caption with this id, if it has a vector for this bundle.
    pub fn get(&self, id: RowId) -> Result<Option<Caption>, BankError> {
        if !self.index.contains(id) {
            return Ok(None);
        }
        Ok(self.core.store.captions(&[id])?.pop().flatten())
    }

    /// Writes the index to disk if it changed (see [`VectorIndex::dump`]).
    pub fn dump(&self) -> Result<DumpReport, BankError> {
        Ok(self.index.dump()?)
    }

    /// Index numbers of this bundle.
    pub fn stats(&self) -> IndexStats {
        self.index.stats()
    }

    pub(super) fn store(&self) -> &CaptionStore {
        &self.core.store
    }
}
