//! Outcomes of finished runs, decoded once and kept, so the service's reads of them (GetRun,
//! the model calls with Predict, a follower's `finished` event, the run and schedule pages,
//! the drift report against the previous run) do not decode a stored outcome again on every
//! call (for a run of 900 settings the decode was about half of GetRun's time).
//!
//! A run's outcome is written once, when the run finishes, and never changed, so a kept
//! outcome is never stale. A deleted run is looked up before its outcome, so a kept outcome
//! of a deleted run is never served; it leaves the cache as the least recently used. The
//! cache holds at most [`OUTCOME_CACHE_BYTES`] of estimated size and drops the least
//! recently used outcome first; an outcome larger than the whole budget is decoded and not
//! kept.

use std::collections::HashMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use crate::job::RunOutcome;
use crate::store::{Storage, StoreError};

/// Estimated bytes of decoded outcomes the cache keeps at most.
pub const OUTCOME_CACHE_BYTES: u64 = 64 << 20;

/// The cache; see the module notes.
pub struct OutcomeCache {
    budget: u64,
    inner: Mutex<Inner>,
    decodes: AtomicU64,
}

#[derive(Default)]
struct Inner {
    kept: HashMap<String, Entry>,
    bytes: u64,
    tick: u64,
}

struct Entry {
    outcome: Arc<RunOutcome>,
    bytes: u64,
    used: u64,
}

/// A decoded outcome's size in bytes, estimated from what grows with the request: the
/// setting scores with their fold scores, the fold assignment, the model's nodes and the
/// importances.
pub fn outcome_bytes(o: &RunOutcome) -> u64 {
    let score = std::mem::size_of::<crate::sweep::SettingScore>() as u64;
    let scores = o.scores.iter().map(|s| score.saturating_add(8 * s.fold_scores.len() as u64)).fold(0u64, u64::saturating_add);
    let folds = o.fold_assignment.iter().map(|f| 4 * f.len() as u64).fold(0u64, u64::saturating_add);
    let model = o.model.as_ref().map_or(0, |t| (t.nodes.len() as u64).saturating_mul(std::mem::size_of::<crate::tree::Node>() as u64).saturating_add(8 * t.values.len() as u64));
    let nested = o.nested.as_ref().map_or(0, |n| 64 * n.folds.len() as u64);
    let permutation = o.permutation.as_ref().map_or(0, |p| (32 * p.features.len() as u64).saturating_add(p.per_fold.iter().map(|d| 8 * d.len() as u64).fold(0u64, u64::saturating_add)));
    [scores, folds, model, nested, permutation].into_iter().fold(256, u64::saturating_add)
}

impl OutcomeCache {
    pub fn new(budget: u64) -> OutcomeCache {
        OutcomeCache { budget, inner: Mutex::new(Inner::default()), decodes: AtomicU64::new(0) }
    }

    /// How many outcomes were read from the store and decoded through this cache (read by
    /// tests).
    pub fn decodes(&self) -> u64 {
        self.decodes.load(Ordering::SeqCst)
    }

    /// The outcome of run `run_id`: kept, or read from the store (and kept when it fits);
    /// `None` while the run has none.
    pub fn get(&self, store: &dyn Storage, run_id: &str) -> Result<Option<Arc<RunOutcome>>, StoreError> {
        {
            let mut inner = self.inner.lock().unwrap();
            inner.tick += 1;
            let tick = inner.tick;
            if let Some(e) = inner.kept.get_mut(run_id) {
                e.used = tick;
                return Ok(Some(e.outcome.clone()));
            }
        }
        // Read and decoded outside the lock: other calls go on meanwhile.
        let Some(outcome) = store.outcome(run_id)? else { return Ok(None) };
        self.decodes.fetch_add(1, Ordering::SeqCst);
        let outcome = Arc::new(outcome);
        let bytes = outcome_bytes(&outcome);
        if bytes <= self.budget {
            let mut inner = self.inner.lock().unwrap();
            let tick = inner.tick;
            if let Some(old) = inner.kept.insert(run_id.to_string(), Entry { outcome: outcome.clone(), bytes, used: tick }) {
                inner.bytes -= old.bytes;
            }
            inner.bytes += bytes;
            while inner.bytes > self.budget {
                let Some(oldest) = inner.kept.iter().min_by_key(|(_, e)| e.used).map(|(k, _)| k.clone()) else { break };
                if let Some(e) = inner.kept.remove(&oldest) {
                    inner.bytes -= e.bytes;
                }
            }
        }
        Ok(Some(outcome))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::job::Run;
    use crate::store::tests::{meta, outcome};
    use crate::store::SledStore;
    use crate::sweep::SweepSpec;

    /// A store holding finished runs `run_0` .. `run_{n-1}`, each with the same outcome.
    fn finished_runs(n: usize) -> (SledStore, RunOutcome) {
        let store = SledStore::open_temporary().unwrap();
        store.put_dataset(meta("ds_a", "reefer", 1, 3), b"abc").unwrap();
        let ds = store.dataset("ds_a").unwrap().unwrap();
        let o = outcome(None);
        for i in 0..n {
            store.create_run(Run::queued(format!("run_{i}"), &ds, "spoiled".into(), SweepSpec::default(), 10 + i as i64)).unwrap();
            let run = store.claim_next(20 + i as i64).unwrap().unwrap();
            store.finish_run(&run.id, &o, None, 30 + i as i64).unwrap().unwrap();
        }
        (store, o)
    }

    #[test]
    fn an_outcome_is_decoded_once_and_served_as_stored() {
        let (store, stored) = finished_runs(1);
        let cache = OutcomeCache::new(OUTCOME_CACHE_BYTES);
        let first = cache.get(&store, "run_0").unwrap().unwrap();
        let again = cache.get(&store, "run_0").unwrap().unwrap();
        assert_eq!(cache.decodes(), 1);
        assert!(Arc::ptr_eq(&first, &again));
        // What the store holds, field by field (scores with NaN compared as text).
        assert_eq!(format!("{:?}", *first), format!("{stored:?}"));
        assert!(cache.get(&store, "run_9").unwrap().is_none(), "no such run, no outcome");
    }

    #[test]
    fn the_cache_keeps_within_its_budget_least_recently_used_out_first() {
        let (store, o) = finished_runs(3);
        let one = outcome_bytes(&o);
        // Room for two outcomes: reading a third drops the least recently used.
        let cache = OutcomeCache::new(2 * one);
        for id in ["run_0", "run_1", "run_0", "run_2"] {
            cache.get(&store, id).unwrap().unwrap();
        }
        assert_eq!(cache.decodes(), 3);
        assert!(cache.inner.lock().unwrap().bytes <= 2 * one);
        cache.get(&store, "run_0").unwrap();
        assert_eq!(cache.decodes(), 3, "run_0 was used last but one: kept");
        cache.get(&store, "run_1").unwrap();
        assert_eq!(cache.decodes(), 4, "run_1 was the least recently used: dropped");
        // An outcome larger than the whole budget is served and not kept.
        let tiny = OutcomeCache::new(one - 1);
        tiny.get(&store, "run_0").unwrap().unwrap();
        tiny.get(&store, "run_0").unwrap().unwrap();
        assert_eq!((tiny.decodes(), tiny.inner.lock().unwrap().bytes), (2, 0));
    }
}
