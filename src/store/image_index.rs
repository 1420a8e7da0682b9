//! The registered images nearest a vector, for `among: images` queries: an
//! exact scan over one bundle's image vectors, kept in memory and caught up
//! from the store (by row id) before each search, so images registered since
//! the last search are found without rescanning the whole store.

use std::collections::HashMap;
use std::sync::{Arc, Mutex};

use super::images::{ImageStore, StoreError};
use crate::vectors::dot;

/// One image and its cosine with the query.
#[derive(Debug, Clone, PartialEq)]
pub struct ImageHit {
    pub id: String,
    pub cosine: f32,
}

/// Image vectors of every digest asked for so far.
#[derive(Default)]
pub struct ImageIndex {
    by_digest: Mutex<HashMap<String, Arc<Mutex<Rows>>>>,
}

#[derive(Default)]
struct Rows {
    /// Highest store row id read.
    seen: i64,
    ids: Vec<String>,
    /// Row `i` of the flat matrix is `ids[i]`'s vector.
    flat: Vec<f32>,
    position: HashMap<String, usize>,
}

impl Rows {
    fn keep(&mut self, id: String, vector: &[f32]) {
        let dim = vector.len();
        match self.position.get(&id) {
            Some(&i) => self.flat[i * dim..(i + 1) * dim].copy_from_slice(vector),
            None => {
                self.position.insert(id.clone(), self.ids.len());
                self.ids.push(id);
                self.flat.extend_from_slice(vector);
            }
        }
    }
}

impl ImageIndex {
    /// The `k` images of `digest` nearest `query` (a unit vector), best first;
    /// ties go to the smaller id so answers are reproducible.
    pub fn nearest(
        &self,
        store: &ImageStore,
        digest: &str,
        query: &[f32],
        k: usize,
    ) -> Result<Vec<ImageHit>, StoreError> {
        let rows = {
            let mut map = self.by_digest.lock().unwrap_or_else(|p| p.into_inner());
            Arc::clone(map.entry(digest.to_string()).or_default())
        };
        let mut rows = rows.lock().unwrap_or_else(|p| p.into_inner());
        for (rowid, id, vector) in store.vectors_after(digest, rows.seen)? {
            if vector.len() == query.len() {
                rows.keep(id, &vector);
            }
            rows.seen = rowid;
        }
        let dim = query.len().max(1);
        let mut hits: Vec<ImageHit> = rows
            .flat
            .chunks_exact(dim)
            .zip(&rows.ids)
            .map(|(v, id)| ImageHit {
                id: id.clone(),
                cosine: dot(query, v),
            })
            .collect();
        let order = |a: &ImageHit, b: &ImageHit| {
            b.cosine.total_cmp(&a.cosine).then_with(|| a.id.cmp(&b.id))
        };
        if hits.len() > k && k > 0 {
            hits.select_nth_unstable_by(k - 1, order);
            hits.truncate(k);
        }
        hits.sort_by(order);
        hits.truncate(k);
        Ok(hits)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn finds_images_added_after_the_first_search() {
        let store = ImageStore::in_memory().unwrap();
        let index = ImageIndex::default();
        for (id, v) in [("a", [1.0, 0.0]), ("b", [0.6, 0.8]), ("c", [0.0, 1.0])] {
            store.put_image(id, id.as_bytes(), 1, 1).unwrap();
            store.put_vector(id, "d", &v).unwrap();
        }
        let hits = index.nearest(&store, "d", &[1.0, 0.0], 2).unwrap();
        // Cosines with (1, 0) are the first coordinates: a 1.0, b 0.6, c 0.0.
        let ids: Vec<&str> = hits.iter().map(|h| h.id.as_str()).collect();
        assert_eq!(ids, ["a", "b"]);
        assert!((hits[1].cosine - 0.6).abs() < 1e-6);
        store.put_image("e", b"e", 1, 1).unwrap();
        store.put_vector("e", "d", &[0.8, 0.6]).unwrap();
        let ids: Vec<String> = index
            .nearest(&store, "d", &[1.0, 0.0], 3)
            .unwrap()
            .into_iter()
            .map(|h| h.id)
            .collect();
        assert_eq!(ids, ["a", "e", "b"]);
        // Another digest's vectors are not mixed in.
        assert!(index
            .nearest(&store, "other", &[1.0, 0.0], 3)
            .unwrap()
            .is_empty());
    }
}
