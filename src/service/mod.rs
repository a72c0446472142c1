//! The service: pollard's operations with core types, whoever calls them. Transport-free:
//! no protobuf and no gRPC status here. `rpc/` converts a request, calls an operation and
//! converts the answer; the scheduler and the worker call the same operations.
//!
//! - [`error`]     `ServiceError`, what every operation fails with
//! - [`frames`]    parsed datasets cached by id within a memory budget
//! - [`runs`]      run admission (one operation for StartRun and scheduled fires), get, list,
//!                 cancel, and the events after a sequence number
//! - [`datasets`]  put, get, list and delete datasets
//! - [`models`]    a finished run's model in a format, and predictions
//! - [`schedules`] create, get, list, pause, resume and delete schedules, and their fires
//!
//! Concurrency: CPU work of calls (reading uploads, checking specs, predicting) runs on the
//! `calls` pool through [`cpu`], sweeps on `pool` (see [`crate::worker`]); a std `Mutex`
//! guards the state here, since no `.await` is held while one is locked.

pub mod datasets;
pub mod error;
pub mod frames;
pub mod models;
pub mod outcomes;
pub mod runs;
pub mod schedules;

use std::collections::{HashMap, VecDeque};
use std::panic::AssertUnwindSafe;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use tokio::sync::{watch, Notify};

use crate::clock::Clock;
use crate::config::Config;
use crate::store::Storage;

pub use error::ServiceError;
pub use runs::{DatasetRef, RunRequest, SchemeDefaults};

/// What every handler, worker and the scheduler share: the store, the pools, the queue's
/// signals and the cancel flags.
pub struct Service {
    /// Every read and write of stored state (see [`crate::store`]).
    pub store: Arc<dyn Storage>,
    pub config: Config,
    /// Runs sweeps.
    pub pool: rayon::ThreadPool,
    /// Runs the CPU work of calls, apart from sweeps (see the module notes).
    pub calls: rayon::ThreadPool,
    /// Bumped after events are stored, so followers know to read.
    pub changed: watch::Sender<u64>,
    /// Signalled when a run is queued.
    pub queued: Notify,
    /// Cancel flags of the runs being executed.
    pub cancels: Mutex<HashMap<String, Arc<AtomicBool>>>,
    /// Set when the server stops: running runs stop at the next unit and stay `running`, to
    /// be resumed from their stored units at the next start.
    pub stopping: AtomicBool,
    /// Flips to true when the server stops (for tasks that wait).
    pub shutdown: watch::Sender<bool>,
    /// Where every time the server records comes from.
    pub clock: Arc<dyn Clock>,
    /// Signalled when a schedule is created, resumed or deleted, so the scheduler looks again.
    pub schedules_changed: Notify,
    /// Runs left running by an earlier process, oldest first: workers take them before the
    /// queue, so resumed runs hold worker slots like any other.
    pub resumable: Mutex<VecDeque<String>>,
    /// Bytes estimated for the runs being executed (see [`crate::sweep::memory`]).
    pub memory_in_use: Mutex<u64>,
    /// Held while the queue is counted and a run is added, so the queue cap holds exactly.
    pub admit: Mutex<()>,
    /// Parsed datasets by id, within `frame_cache_bytes`.
    pub frames: frames::FrameCache,
    /// Decoded outcomes of finished runs (see [`outcomes`]).
    pub outcomes: outcomes::OutcomeCache,
    /// What `/metrics` reports (see [`crate::metrics`]).
    pub metrics: crate::metrics::Metrics,
    /// Runs checked for admission ([`Service::admit_run`]), StartRun and scheduled fires
    /// alike: read by tests.
    pub admissions: AtomicU64,
}

impl Service {
    pub fn with_clock(store: Arc<dyn Storage>, config: Config, clock: Arc<dyn Clock>) -> Result<Arc<Service>, String> {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(config.cpu_threads)
            .thread_name(|i| format!("pollard-cpu-{i}"))
            .build()
            .map_err(|e| format!("cannot start the CPU pool: {e}"))?;
        let calls = rayon::ThreadPoolBuilder::new()
            .num_threads(config.cpu_threads)
            .thread_name(|i| format!("pollard-calls-{i}"))
            .build()
            .map_err(|e| format!("cannot start the CPU pool for calls: {e}"))?;
        let frames = frames::FrameCache::new(config.frame_cache_bytes);
        Ok(Arc::new(Service {
            store,
            config,
            pool,
            calls,
            changed: watch::channel(0).0,
            queued: Notify::new(),
            cancels: Mutex::new(HashMap::new()),
            stopping: AtomicBool::new(false),
            shutdown: watch::channel(false).0,
            clock,
            schedules_changed: Notify::new(),
            resumable: Mutex::new(VecDeque::new()),
            memory_in_use: Mutex::new(0),
            admit: Mutex::new(()),
            frames,
            outcomes: outcomes::OutcomeCache::new(outcomes::OUTCOME_CACHE_BYTES),
            metrics: crate::metrics::Metrics::new(),
            admissions: AtomicU64::new(0),
        }))
    }

    /// Now, by the server's clock, in Unix milliseconds.
    pub fn now(&self) -> i64 {
        self.clock.now_ms()
    }

    /// Tells followers that events were stored.
    pub fn announce(&self) {
        self.changed.send_modify(|v| *v += 1);
    }

    /// Raises a running run's cancel flag; false when this server is not executing it.
    pub fn request_cancel(&self, run_id: &str) -> bool {
        match self.cancels.lock().unwrap().get(run_id) {
            Some(flag) => {
                flag.store(true, Ordering::SeqCst);
                true
            }
            None => false,
        }
    }
}

/// Runs `f` on the CPU pool for calls and awaits its result; a panic in `f` fails this call
/// (`Internal`), not the process.
pub async fn cpu<T: Send + 'static>(service: &Arc<Service>, f: impl FnOnce() -> T + Send + 'static) -> Result<T, ServiceError> {
    on_pool(&service.calls, f).await.map_err(|panic| ServiceError::panicked(&panic))
}

/// Runs `f` on `pool`, catching a panic (whose message comes back as the error): a panic
/// in a rayon job would otherwise abort the process.
pub async fn on_pool<T: Send + 'static>(pool: &rayon::ThreadPool, f: impl FnOnce() -> T + Send + 'static) -> Result<T, String> {
    let (tx, rx) = tokio::sync::oneshot::channel();
    pool.spawn(move || {
        let _ = tx.send(std::panic::catch_unwind(AssertUnwindSafe(f)).map_err(|p| panic_message(&*p)));
    });
    rx.await.unwrap_or_else(|_| Err("the CPU pool dropped a job".into()))
}

fn panic_message(p: &(dyn std::any::Any + Send)) -> String {
    p.downcast_ref::<&str>().map(|s| s.to_string()).or_else(|| p.downcast_ref::<String>().cloned()).unwrap_or_else(|| "a panic without a message".into())
}
