//! Workers: claim a queued run, run its sweep on the CPU pool, persist every finished unit
//! before announcing it, and end the run.
//!
//! Concurrency: tree fitting runs on a dedicated rayon pool sized by the config, never on
//! tokio's threads; async code hands work over with [`crate::service::cpu`] and awaits a oneshot. Sweeps and
//! the short CPU work of calls (reading uploads, checking specs, predicting) get one pool
//! each: a rayon worker busy in a sweep's parallel loop takes its own queued work before a
//! job injected from outside, so a call sharing the sweep pool would wait for the whole
//! sweep. A std `Mutex` guards the cancel flags, since no `.await` is held while it is locked.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{mpsc, Arc, Condvar, Mutex};
use std::time::Duration;

use tracing::{error, info, info_span, warn};

use crate::drift::{self, DriftThresholds, RunSide};
use crate::job::{EventKind, Run, RunOutcome, RunState};
use crate::service::{on_pool, ServiceError};
use crate::store::{Claim, Resumed, RunFilter};
use crate::sweep::{self, Flow, SweepError};

/// What every handler and worker shares: the service's state (see [`crate::service`]).
pub use crate::service::Service as Shared;

/// A worker: executes runs one at a time until shutdown: first the runs an earlier process
/// left running, then queued runs, oldest first, as the memory budget admits them.
pub async fn worker_loop(shared: Arc<Shared>) {
    let mut shutdown = shared.shutdown.subscribe();
    loop {
        if *shutdown.borrow() {
            return;
        }
        let resumable = shared.resumable.lock().unwrap().pop_front();
        if let Some(id) = resumable {
            match shared.store.resume(&id, shared.now()) {
                Ok(Resumed::Again(run)) => {
                    info!(run_id = %run.id, units_done = run.units_done, "resuming run");
                    *shared.memory_in_use.lock().unwrap() += run.memory_estimate;
                    execute(&shared, run).await;
                }
                Ok(Resumed::GaveUp(reason)) => {
                    warn!(run_id = %id, "run failed instead of resumed: {reason}");
                    shared.announce();
                }
                Ok(Resumed::NotRunning) => {}
                Err(e) => error!(run_id = %id, "cannot resume the run: {e}"),
            }
            continue;
        }
        let budget = shared.config.run_memory_bytes;
        let claimed = {
            let mut used = shared.memory_in_use.lock().unwrap();
            let claim = shared.store.claim_next_within(shared.now(), &|run| used.saturating_add(run.memory_estimate) <= budget);
            if let Ok(Claim::Claimed(run)) = &claim {
                *used += run.memory_estimate;
            }
            claim
        };
        match claimed {
            Ok(Claim::Claimed(run)) => {
                shared.announce();
                execute(&shared, run).await;
                continue;
            }
            Ok(Claim::Waiting(run)) if run.memory_estimate > budget => {
                // Queued under a larger budget: it can never run under this one.
                let reason = format!("the run needs about {} bytes, more than the cap run_memory_bytes = {budget}", run.memory_estimate);
                warn!(run_id = %run.id, "{reason}");
                if let Err(e) = shared.store.end_run(&run.id, RunState::Failed, &reason, shared.now()) {
                    error!(run_id = %run.id, "cannot fail the run: {e}");
                }
                shared.announce();
                continue;
            }
            Ok(Claim::Waiting(run)) => info!(run_id = %run.id, needs = run.memory_estimate, "queued run waits for memory"),
            Ok(Claim::Empty) => {}
            Err(e) => error!("cannot read the queue: {e}"),
        }
        // Wake on a new run or freed memory, on shutdown, or every few seconds as a safety net.
        tokio::select! {
            _ = shared.queued.notified() => {}
            _ = shutdown.changed() => {}
            _ = tokio::time::sleep(Duration::from_secs(2)) => {}
        }
    }
}

/// Lines up the runs a previous process left running, for the workers to take first.
pub fn queue_resumes(shared: &Shared) {
    // A shared store's running runs may be other replicas' work: only the abandoned ones.
    let left = if shared.store.shared() { shared.store.take_abandoned() } else { shared.store.running_runs() };
    match left {
        Ok(runs) => shared.resumable.lock().unwrap().extend(runs.into_iter().map(|r| r.id)),
        Err(e) => error!("cannot list running runs: {e}"),
    }
}

/// Executes one running run to its end (or to shutdown) on the CPU pool.
pub async fn execute(shared: &Arc<Shared>, run: Run) {
    let flag = Arc::new(AtomicBool::new(false));
    shared.cancels.lock().unwrap().insert(run.id.clone(), flag.clone());
    if shared.stopping.load(Ordering::SeqCst) {
        flag.store(true, Ordering::SeqCst);
    }
    let s = shared.clone();
    let id = run.id.clone();
    let schedule_id = run.schedule_id.clone();
    let memory = run.memory_estimate;
    let began = std::time::Instant::now();
    let end = on_pool(&shared.pool, move || {
        let span = info_span!("run", run_id = %run.id);
        span.in_scope(|| execute_blocking(&s, &run, &flag))
    })
    .await
    .unwrap_or_else(|panic| Ending::Failed(format!("the run stopped on an internal error: {panic}")));
    shared.cancels.lock().unwrap().remove(&id);
    {
        let mut used = shared.memory_in_use.lock().unwrap();
        *used = used.saturating_sub(memory);
    }
    // A queued run may have waited for this memory.
    shared.queued.notify_one();
    let now = shared.now();
    let state = match &end {
        Ending::Finished(_) => Some("finished"),
        Ending::Failed(_) => Some("failed"),
        Ending::Cancelled => Some("cancelled"),
        Ending::Checkpointed => None,
    };
    if let Some(state) = state {
        shared.metrics.runs_ended.with_label_values(&[state]).inc();
        shared.metrics.run_seconds.with_label_values(&[state]).observe(began.elapsed().as_secs_f64());
    }
    let ended = match end {
        Ending::Finished(outcome) => {
            let drift = schedule_id.and_then(|schedule_id| drift_report(shared, &id, &schedule_id, &outcome));
            shared.store.finish_run(&id, &outcome, drift, now).map(|_| ())
        }
        Ending::Failed(reason) => {
            warn!(run_id = %id, "run failed: {reason}");
            shared.store.end_run(&id, RunState::Failed, &reason, now).map(|_| ())
        }
        Ending::Cancelled => shared.store.end_run(&id, RunState::Cancelled, "cancelled by request", now).map(|_| ()),
        Ending::Checkpointed => {
            info!(run_id = %id, "stopped for shutdown; finished units are kept");
            shared.store.stopped_cleanly(&id)
        }
    };
    if let Err(e) = ended {
        error!(run_id = %id, "cannot record the end of the run: {e}");
    }
    shared.announce();
}

enum Ending {
    Finished(RunOutcome),
    Failed(String),
    Cancelled,
    /// Stopped by shutdown: the run stays running and resumes at the next start.
    Checkpointed,
}

fn execute_blocking(shared: &Shared, run: &Run, cancel: &AtomicBool) -> Ending {
    let cfg = &shared.config;
    let meta = match shared.store.dataset(&run.dataset_id) {
        Ok(Some(m)) => m,
        Ok(None) => return Ending::Failed(format!("dataset {} no longer exists", run.dataset_id)),
        Err(e) => return Ending::Failed(e.to_string()),
    };
    // Through the frame cache: the run's admission parsed it already, most of the time.
    let data = match shared.frames.load(shared.store.as_ref(), &meta, &run.target, run.spec.task, cfg.max_rows, cfg.max_columns) {
        Ok(d) => d,
        Err(ServiceError::Storage(e)) => return Ending::Failed(e.to_string()),
        Err(e) => return Ending::Failed(e.to_string()),
    };
    let spec = run.spec.clone();
    let plan = match sweep::plan_with(&data, &spec, &cfg.spec_caps()) {
        Ok(p) => p,
        Err(e) => return Ending::Failed(e.to_string()),
    };
    if let Err(e) = shared.store.set_plan_size(&run.id, plan.settings.len() as u32, plan.units.len() as u32) {
        return Ending::Failed(e.to_string());
    }
    let done = match shared.store.units(&run.id) {
        Ok(u) => u,
        Err(e) => return Ending::Failed(e.to_string()),
    };
    info!(settings = plan.settings.len(), units = plan.units.len(), resumed_units = done.len(), "sweep planned");
    // Units so far, to score a shaping key's settings once all its splits are in.
    let so_far: Mutex<Vec<sweep::UnitResult>> = Mutex::new(done.clone());
    let store_failed: Mutex<Option<String>> = Mutex::new(None);
    let stored = Stored::default();
    // Set when a batch stored nothing because the run ended meanwhile (on a shared store,
    // perhaps cancelled through another replica): the sweep stops.
    let ended_elsewhere = AtomicBool::new(false);
    let hooks = &cfg.test_hooks;
    let units = std::thread::scope(|scope| {
        // Owned here, so a panic out of the sweep drops it and the committer ends.
        let (hand_over, handed) = mpsc::channel::<(sweep::UnitResult, Vec<EventKind>)>();
        scope.spawn(|| commit(shared, &run.id, handed, &store_failed, &stored, &ended_elsewhere));
        let sink = |unit: &sweep::UnitResult, progress: sweep::Progress, took: Option<Duration>| {
            if let Some(t) = took {
                shared.metrics.unit_seconds.observe(t.as_secs_f64());
            }
            if store_failed.lock().unwrap().is_some() || ended_elsewhere.load(Ordering::SeqCst) {
                return Flow::Stop;
            }
            if hooks.unit_delay_ms > 0 {
                std::thread::sleep(Duration::from_millis(hooks.unit_delay_ms));
            }
            if hooks.abort_unit.is_some_and(|h| h.matches(unit.unit)) {
                // Every unit handed over before this one is stored first, as if units were
                // stored one by one.
                stored.wait_for(progress.units_done - 1 - done.len());
                error!(unit = unit.unit, "POLLARD_TEST_ABORT_UNIT: aborting the process on purpose");
                std::process::abort();
            }
            if hooks.panic_unit.is_some_and(|h| h.matches(unit.unit)) {
                panic!("POLLARD_TEST_PANIC_UNIT: work unit {} panics on purpose", unit.unit);
            }
            let key = plan.units[unit.unit].1;
            let scored = {
                let mut all = so_far.lock().unwrap();
                all.push(unit.clone());
                sweep::key_scores(&plan, &all, key)
            };
            let mut events = vec![EventKind::Progress(progress)];
            for (index, score) in scored.into_iter().flatten() {
                events.push(EventKind::Scored { index: index as u32, score: Box::new(score) });
            }
            // Stored by the committer, in this order, before anyone hears of it.
            match hand_over.send((unit.clone(), events)) {
                Ok(()) => Flow::Continue,
                Err(_) => Flow::Stop,
            }
        };
        shared.pool.install(|| sweep::run_timed(&plan, done.clone(), &sink, cancel, &|| Some(std::time::Instant::now())))
    });
    if let Some(e) = store_failed.lock().unwrap().take() {
        return Ending::Failed(format!("cannot store a finished unit: {e}"));
    }
    if ended_elsewhere.load(Ordering::SeqCst) {
        // Its end is stored already; recording another changes nothing.
        return Ending::Cancelled;
    }
    let units = match units {
        Ok(u) => u,
        Err(SweepError::Cancelled) if shared.stopping.load(Ordering::SeqCst) => return Ending::Checkpointed,
        Err(SweepError::Cancelled) => return Ending::Cancelled,
        Err(e) => return Ending::Failed(e.to_string()),
    };
    let result = sweep::summarize(&plan, &units);
    let model = if spec.fit_final {
        match shared.pool.install(|| sweep::fit_final(&plan, &result.scores[result.picked].setting)) {
            Ok(t) => Some(t),
            Err(e) => return Ending::Failed(e.to_string()),
        }
    } else {
        None
    };
    // Permutation importance of the picked setting on the validation folds (k more fits).
    let permutation = match shared.pool.install(|| sweep::permutation_importance(&plan, &result.scores[result.picked].setting, spec.seed, sweep::PERMUTATION_REPEATS)) {
        Ok(p) => Some(p),
        Err(e) => return Ending::Failed(e.to_string()),
    };
    info!(picked = result.picked, valid_mean = result.scores[result.picked].valid_mean, "sweep finished");
    Ending::Finished(RunOutcome {
        scores: result.scores,
        picked: result.picked as u32,
        best: result.best as u32,
        model,
        fold_assignment: plan.folds.assignment.clone(),
        nested: result.nested,
        permutation,
    })
}

/// How many units the committer has stored (or given up on) in this execution.
#[derive(Default)]
struct Stored {
    count: Mutex<usize>,
    changed: Condvar,
}

impl Stored {
    fn add(&self, n: usize) {
        *self.count.lock().unwrap() += n;
        self.changed.notify_all();
    }

    /// Waits until at least `n` units are stored.
    fn wait_for(&self, n: usize) {
        let mut count = self.count.lock().unwrap();
        while *count < n {
            count = self.changed.wait(count).unwrap();
        }
    }
}

/// Most units stored in one change.
const MAX_BATCH: usize = 256;

/// Stores the units a sweep hands over, off the sweep's threads: everything handed over
/// since the last write goes into one change (one flush for many units, so a sweep of small
/// units is not paced by the disk's sync time), then followers are woken. Order is kept,
/// and no one hears of a unit before it is stored. After a store failure nothing more is
/// written and the sweep is told to stop.
fn commit(shared: &Shared, run_id: &str, handed: mpsc::Receiver<(sweep::UnitResult, Vec<EventKind>)>, failed: &Mutex<Option<String>>, stored: &Stored, ended: &AtomicBool) {
    while let Ok(first) = handed.recv() {
        let mut batch = vec![first];
        batch.extend(handed.try_iter().take(MAX_BATCH - 1));
        let n = batch.len();
        if failed.lock().unwrap().is_none() {
            match shared.store.record_units(run_id, batch, shared.now()) {
                // Nothing stored: the units were stored already, or the run ended meanwhile.
                Ok(events) if events.is_empty() && shared.store.run(run_id).is_ok_and(|r| r.is_none_or(|r| r.state != RunState::Running)) => ended.store(true, Ordering::SeqCst),
                Ok(_) => {
                    shared.metrics.units_computed.inc_by(n as u64);
                    shared.announce();
                }
                Err(e) => *failed.lock().unwrap() = Some(e.to_string()),
            }
        }
        stored.add(n);
    }
}

/// What a finished run used and picked, for a drift report; `None` for a run without a
/// metric or a picked score (never the case for runs this build finished).
fn run_side<'a>(run: &'a Run, o: &'a RunOutcome) -> Option<RunSide<'a>> {
    let picked = o.scores.get(o.picked as usize)?;
    Some(RunSide {
        run_id: &run.id,
        dataset_id: &run.dataset_id,
        dataset_version: run.dataset_version,
        rows: run.dataset_rows,
        metric: run.spec.metric?,
        picked,
        leaves: o.model.as_ref().map_or(picked.mean_leaves, |m| m.n_leaves() as f64),
    })
}

/// Compares a finished run of a schedule with the previous finished run of that schedule
/// (the newest one created before it); `None` for the schedule's first finished run. A
/// failure to read the store only costs the report, so it is logged, not fatal.
fn drift_report(shared: &Shared, run_id: &str, schedule_id: &str, outcome: &RunOutcome) -> Option<drift::DriftReport> {
    let read = || -> Result<Option<drift::DriftReport>, crate::store::StoreError> {
        let Some(current) = shared.store.run(run_id)? else { return Ok(None) };
        let filter = RunFilter { schedule_id: Some(schedule_id.to_string()), state: Some(RunState::Finished), ..RunFilter::default() };
        // Run ids are time-ordered: the listing below `run_id` starts with the runs before it.
        let (before, _) = shared.store.list_runs(&filter, Some(run_id), 1)?;
        let Some(previous) = before.into_iter().next() else { return Ok(None) };
        let Some(prev_outcome) = shared.store.outcome(&previous.id)? else { return Ok(None) };
        let thresholds = shared.store.schedule(schedule_id)?.map_or(DriftThresholds::default(), |s| s.drift);
        let (Some(before), Some(now)) = (run_side(&previous, &prev_outcome), run_side(&current, outcome)) else { return Ok(None) };
        Ok(Some(drift::compare(&before, &now, thresholds)))
    };
    match read() {
        Ok(r) => r,
        Err(e) => {
            warn!(run_id, "no drift report: {e}");
            None
        }
    }
}
