//! Parsed datasets cached by id, so a run parses its CSV once (its admission check and its
//! execution share the parse) and back-to-back runs on one dataset do not parse it at all.
//!
//! The cache holds at most `frame_cache_bytes` of estimated frame size and drops the least
//! recently used frame first; a frame larger than the whole budget is parsed and not kept.
//! A frame is keyed by what shapes the parse: the dataset id (its bytes and categorical
//! columns never change under one id), the target column and the task asked for (a frame
//! parsed with its task inferred also serves a request naming that task).

use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use super::error::ServiceError;
use crate::data::csv::{read_dataset, CsvOptions, DataErrorKind};
use crate::data::{Dataset, Task};
use crate::job::DatasetMeta;
use crate::store::{Storage, StoreError};

type Key = (String, String, Option<Task>);

/// The cache; see the module notes.
pub struct FrameCache {
    budget: u64,
    inner: Mutex<Inner>,
    parses: AtomicU64,
}

#[derive(Default)]
struct Inner {
    frames: HashMap<Key, Entry>,
    bytes: u64,
    tick: u64,
}

struct Entry {
    data: Arc<Dataset>,
    bytes: u64,
    used: u64,
}

/// A parsed frame's size in bytes, estimated from rows × (features + target) at 8 bytes a
/// cell (cells are 4-byte values or codes; the rest covers presort indexes and labels).
pub fn frame_bytes(data: &Dataset) -> u64 {
    (data.frame.rows as u64).saturating_mul(data.frame.features.len() as u64 + 1).saturating_mul(8)
}

impl FrameCache {
    pub fn new(budget: u64) -> FrameCache {
        FrameCache { budget, inner: Mutex::new(Inner::default()), parses: AtomicU64::new(0) }
    }

    /// How many times a CSV was parsed through this cache (read by tests).
    pub fn parses(&self) -> u64 {
        self.parses.load(Ordering::SeqCst)
    }

    /// Estimated bytes held now.
    pub fn bytes(&self) -> u64 {
        self.inner.lock().unwrap().bytes
    }

    /// A stored dataset parsed with the run's target and task: from the cache, or parsed
    /// from its bytes (blocking; call on a CPU pool). A store failure (bytes missing or
    /// unreadable) is `Storage`, never the caller's fault; a table that does not fit the
    /// target or task is `Invalid`.
    pub fn load(&self, store: &dyn Storage, meta: &DatasetMeta, target: &str, task: Option<Task>, max_rows: usize, max_columns: usize) -> Result<Arc<Dataset>, ServiceError> {
        let key = (meta.id.clone(), target.to_string(), task);
        {
            let mut inner = self.inner.lock().unwrap();
            inner.tick += 1;
            let tick = inner.tick;
            // A frame parsed with the task inferred serves a request for that same task (an
            // admission infers it, the run then names it).
            let inferred = (meta.id.clone(), target.to_string(), None);
            for k in [&key, &inferred] {
                if let Some(e) = inner.frames.get_mut(k).filter(|e| task.is_none_or(|t| e.data.task() == t)) {
                    e.used = tick;
                    return Ok(e.data.clone());
                }
            }
        }
        let data = Arc::new(parse(store, meta, target, task, max_rows, max_columns)?);
        self.parses.fetch_add(1, Ordering::SeqCst);
        self.insert(key, data.clone());
        Ok(data)
    }

    /// Drops every frame of a dataset (when it is deleted).
    pub fn forget(&self, dataset_id: &str) {
        let mut inner = self.inner.lock().unwrap();
        let gone: u64 = inner.frames.iter().filter(|(k, _)| k.0 == dataset_id).map(|(_, e)| e.bytes).sum();
        inner.frames.retain(|k, _| k.0 != dataset_id);
        inner.bytes -= gone;
    }

    fn insert(&self, key: Key, data: Arc<Dataset>) {
        let bytes = frame_bytes(&data);
        if bytes > self.budget {
            return;
        }
        let mut inner = self.inner.lock().unwrap();
        if let Some(old) = inner.frames.remove(&key) {
            inner.bytes -= old.bytes;
        }
        while inner.bytes + bytes > self.budget {
            let Some(oldest) = inner.frames.iter().min_by_key(|(_, e)| e.used).map(|(k, _)| k.clone()) else { break };
            if let Some(e) = inner.frames.remove(&oldest) {
                inner.bytes -= e.bytes;
            }
        }
        inner.tick += 1;
        let used = inner.tick;
        inner.bytes += bytes;
        inner.frames.insert(key, Entry { data, bytes, used });
    }
}

fn parse(store: &dyn Storage, meta: &DatasetMeta, target: &str, task: Option<Task>, max_rows: usize, max_columns: usize) -> Result<Dataset, ServiceError> {
    let file = store.dataset_reader(&meta.id)?.ok_or_else(|| StoreError::Corrupt(format!("dataset {} has no stored bytes", meta.id)))?;
    let mut options = CsvOptions::new(target);
    options.task = task;
    options.categorical = meta.categorical.clone();
    options.max_rows = Some(max_rows);
    options.max_columns = Some(max_columns);
    read_dataset(std::io::BufReader::with_capacity(1 << 16, file), &options).map_err(|e| match e.kind {
        // The stored file could not be read: the store's failure.
        DataErrorKind::Io => ServiceError::Storage(StoreError::Io(e.to_string())),
        _ => ServiceError::invalid("", e.to_string()),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::{Column, Feature, Frame, Target};

    fn dataset(rows: usize) -> Arc<Dataset> {
        let frame = Frame::new(vec![Feature { name: "x".into(), column: Column::Numeric(vec![0.0; rows]) }]).unwrap();
        Arc::new(Dataset::new(frame, "y".into(), Target::Values(vec![0.0; rows])).unwrap())
    }

    fn key(id: &str) -> Key {
        (id.to_string(), "y".to_string(), None)
    }

    #[test]
    fn least_recently_used_goes_first_and_the_budget_holds() {
        // Each frame: 10 rows × (1 feature + target) × 8 bytes = 160 bytes; room for two.
        let cache = FrameCache::new(400);
        cache.insert(key("a"), dataset(10));
        cache.insert(key("b"), dataset(10));
        assert_eq!(cache.bytes(), 320);
        // Touch a, so b is the least recently used when c comes.
        cache.inner.lock().unwrap().tick += 1;
        let t = cache.inner.lock().unwrap().tick;
        cache.inner.lock().unwrap().frames.get_mut(&key("a")).unwrap().used = t;
        cache.insert(key("c"), dataset(10));
        let inner = cache.inner.lock().unwrap();
        assert!(inner.frames.contains_key(&key("a")) && inner.frames.contains_key(&key("c")) && !inner.frames.contains_key(&key("b")));
        assert_eq!(inner.bytes, 320);
        drop(inner);
        // Larger than the whole budget: not kept.
        cache.insert(key("d"), dataset(100));
        assert_eq!(cache.bytes(), 320);
        cache.forget("a");
        assert_eq!(cache.bytes(), 160);
    }
}
