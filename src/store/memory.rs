//! Bounded in-memory caches: image embeddings in front of the SQLite store,
//! and caption embeddings (RL samples repeat, so most captions are seen again).

use std::hash::Hash;
use std::num::NonZeroUsize;
use std::sync::{Arc, Mutex};

use lru::LruCache;

/// Default number of caption embeddings kept per model (64-d: about 40 MB).
pub const DEFAULT_CAPTION_CACHE: usize = 100_000;
/// Default number of image embeddings kept in memory per model.
pub const DEFAULT_IMAGE_CACHE: usize = 100_000;

/// A thread-safe LRU map with shared values; a capacity of 0 caches nothing.
pub struct SharedLru<K: Hash + Eq, V> {
    inner: Option<Mutex<LruCache<K, Arc<V>>>>,
}

impl<K: Hash + Eq, V> SharedLru<K, V> {
    pub fn new(capacity: usize) -> Self {
        SharedLru {
            inner: NonZeroUsize::new(capacity).map(|c| Mutex::new(LruCache::new(c))),
        }
    }

    pub fn get(&self, key: &K) -> Option<Arc<V>> {
        let inner = self.inner.as_ref()?;
        inner
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .get(key)
            .cloned()
    }

    pub fn put(&self, key: K, value: Arc<V>) {
        if let Some(inner) = &self.inner {
            inner
                .lock()
                .unwrap_or_else(|p| p.into_inner())
                .put(key, value);
        }
    }

    pub fn len(&self) -> usize {
        self.inner
            .as_ref()
            .map_or(0, |i| i.lock().unwrap_or_else(|p| p.into_inner()).len())
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn evicts_the_least_recently_used() {
        let cache = SharedLru::new(2);
        cache.put("a", Arc::new(1));
        cache.put("b", Arc::new(2));
        assert_eq!(*cache.get(&"a").unwrap(), 1);
        cache.put("c", Arc::new(3));
        assert!(cache.get(&"b").is_none());
        assert_eq!(cache.len(), 2);
        let off: SharedLru<&str, i32> = SharedLru::new(0);
        off.put("a", Arc::new(1));
        assert!(off.get(&"a").is_none());
    }
}
