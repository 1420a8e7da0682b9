//! The caption bank as the guard's measure of closeness: each caption's
//! cosine to its nearest bank caption of the same bundle (the bank's usual
//! search: exact when small, the graph when large).

use std::sync::Arc;

use super::guard::NearestCaption;
use crate::bank::{BankQuery, ModelBank, SearchMode};

/// One bundle's bank, asked for one nearest caption per vector.
#[derive(Debug, Clone)]
pub struct BankNearest(pub Arc<ModelBank>);

impl BankNearest {
    /// The guard's measure for a bundle's bank, when there is one.
    pub fn of(bank: Option<Arc<ModelBank>>) -> Option<Arc<dyn NearestCaption>> {
        bank.map(|b| Arc::new(BankNearest(b)) as Arc<dyn NearestCaption>)
    }
}

impl NearestCaption for BankNearest {
    fn nearest(&self, vectors: &[&[f32]]) -> Result<Vec<Option<f32>>, String> {
        let query = BankQuery {
            k: 1,
            ef_search: None,
            tag: None,
            mode: SearchMode::Auto,
        };
        vectors
            .iter()
            .map(|v| {
                self.0
                    .search(v, &query)
                    .map(|answer| answer.hits.first().map(|hit| hit.cosine))
                    .map_err(|e| e.to_string())
            })
            .collect()
    }
}
