//! Workers: claim a queued run, run its sweep on the CPU pool, persist every finished unit
//! before announcing it, and end the run.
//!
//! Units: a worker computes the units the store hands it ([`Storage::claim_units`]), a batch
//! at a time, until none is left to claim. On a store one process owns that is every unit of
//! the run at once; on a shared store it is a few leased units at a time, so replicas that
//! join the run ([`Storage::join_running`]) share its units. Whoever stores the run's last
//! unit summarises it (and fits its final tree); the others leave it.
//!
//! Concurrency: tree fitting runs on a dedicated rayon pool sized by the config, never on
//! tokio's threads; async code hands work over with [`crate::service::cpu`] and awaits a oneshot. Sweeps and
//! the short CPU work of calls (reading uploads, checking specs, predicting) get one pool
//! each: a rayon worker busy in a sweep's parallel loop takes its own queued work before a
//! job injected from outside, so a call sharing the sweep pool would wait for the whole
//! sweep. A std `Mutex` guards the cancel flags, since no `.await` is held while it is locked.

use std::sync::atomic::{AtomicBool, AtomicU32, Ordering};
use std::sync::{mpsc, Arc, Condvar, Mutex};
use std::time::Duration;

use tracing::{error, info, info_span, warn};

use crate::drift::{self, DriftThresholds, RunSide};
use crate::job::{EventKind, Run, RunOutcome, RunState};
use crate::service::{on_pool, ServiceError};
use crate::store::{Claim, Recorded, Resumed, RunFilter, Storage, UnitLog};
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
                    execute(&shared, run, true).await;
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
                execute(&shared, run, false).await;
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
            Ok(Claim::Empty) => match join(&shared) {
                Ok(Some(run)) => {
                    info!(run_id = %run.id, units_done = run.units_done, units_total = run.units_total, "joining a run another replica started");
                    execute(&shared, run, false).await;
                    continue;
                }
                Ok(None) => {}
                Err(e) => error!("cannot look for runs to join: {e}"),
            },
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

/// A running run of another process with units left to claim that fits the memory budget,
/// now marked as executed here (its cancel flag set up, its memory counted).
fn join(shared: &Shared) -> Result<Option<Run>, crate::store::StoreError> {
    let mut cancels = shared.cancels.lock().unwrap();
    let busy: Vec<String> = cancels.keys().cloned().collect();
    let Some(run) = shared.store.join_running(&busy)? else { return Ok(None) };
    let mut used = shared.memory_in_use.lock().unwrap();
    if used.saturating_add(run.memory_estimate) > shared.config.run_memory_bytes {
        return Ok(None);
    }
    *used += run.memory_estimate;
    cancels.insert(run.id.clone(), Arc::new(AtomicBool::new(false)));
    Ok(Some(run))
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

/// Executes one running run to its end (or to shutdown, or until its units are all taken)
/// on the CPU pool; `resumed` when an earlier process left it running.
pub async fn execute(shared: &Arc<Shared>, run: Run, resumed: bool) {
    let flag = shared.cancels.lock().unwrap().entry(run.id.clone()).or_insert_with(|| Arc::new(AtomicBool::new(false))).clone();
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
        span.in_scope(|| execute_blocking(&s, &run, resumed, &flag))
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
        Ending::Checkpointed | Ending::Left => None,
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
        Ending::Left => {
            info!(run_id = %id, "no unit of the run left to claim; the replica that stores the last one ends it");
            Ok(())
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
    /// Every unit is stored or claimed by other processes, which end the run.
    Left,
}

fn execute_blocking(shared: &Shared, run: &Run, resumed: bool, cancel: &AtomicBool) -> Ending {
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
    let Ok(total) = u32::try_from(plan.units.len()) else { return Ending::Failed(format!("{} work units are more than a run can count", plan.units.len())) };
    if let Err(e) = shared.store.set_plan_size(&run.id, plan.settings.len() as u32, total) {
        return Ending::Failed(e.to_string());
    }
    let done = match shared.store.units(&run.id) {
        Ok(u) => u,
        Err(e) => return Ending::Failed(e.to_string()),
    };
    info!(settings = plan.settings.len(), units = plan.units.len(), resumed_units = done.len(), "sweep planned");
    // Every unit stored already: its process stopped between the last unit and the end.
    let mut summarise = resumed && done.len() == plan.units.len();
    let known = Known::new(&plan, done);
    let since = AtomicU32::new(0);
    // Units claimed at a time on a shared store: at first enough to keep the pool busy,
    // then doubled while a claim's units take less than CLAIM_WORK (small units cost a
    // round trip each otherwise), so a replica's death still costs about that much work.
    let mut claim = shared.pool.current_num_threads().max(1) * 2;
    loop {
        let began = std::time::Instant::now();
        let todo = match shared.store.claim_units(&run.id, total, claim) {
            Ok(t) => t,
            Err(e) => return Ending::Failed(format!("cannot claim work units: {e}")),
        };
        if todo.is_empty() {
            break;
        }
        match compute(shared, run, &plan, &todo, &known, &since, cancel) {
            Ok(last) => summarise |= last,
            Err(ending) => return ending,
        }
        if began.elapsed() < CLAIM_WORK {
            claim = (claim * 2).min(MAX_BATCH);
        }
    }
    if !summarise {
        return Ending::Left;
    }
    let units = known.all();
    if units.len() != plan.units.len() {
        return Ending::Failed(format!("the run's last unit is stored but {} of its {} units are known here", units.len(), plan.units.len()));
    }
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

/// Computes the claimed units `todo` on the pool, each stored (by the committer) before it
/// is announced; whether this process stored the run's last unit. An `Err` ends the run's
/// execution here.
fn compute(shared: &Shared, run: &Run, plan: &sweep::Plan, todo: &[usize], known: &Known, since: &AtomicU32, cancel: &AtomicBool) -> Result<bool, Ending> {
    let hooks = &shared.config.test_hooks;
    let committer = Committer { shared, run_id: &run.id, units_total: plan.units.len() as u32, known, since, failed: Mutex::new(None), stored: Stored::default(), ended_elsewhere: AtomicBool::new(false), last: AtomicBool::new(false) };
    let units = std::thread::scope(|scope| {
        // Owned here, so a panic out of the sweep drops it and the committer ends.
        let (hand_over, handed) = mpsc::channel::<sweep::UnitResult>();
        scope.spawn(|| committer.run(handed));
        let sink = |unit: &sweep::UnitResult, progress: sweep::Progress, took: Option<Duration>| {
            if let Some(t) = took {
                shared.metrics.unit_seconds.observe(t.as_secs_f64());
            }
            if committer.failed.lock().unwrap().is_some() || committer.ended_elsewhere.load(Ordering::SeqCst) {
                return Flow::Stop;
            }
            if hooks.unit_delay_ms > 0 {
                std::thread::sleep(Duration::from_millis(hooks.unit_delay_ms));
            }
            if hooks.abort_unit.is_some_and(|h| h.matches(unit.unit)) {
                // Every unit handed over before this one is stored first, as if units were
                // stored one by one.
                committer.stored.wait_for(progress.units_done - 1);
                error!(unit = unit.unit, "POLLARD_TEST_ABORT_UNIT: aborting the process on purpose");
                std::process::abort();
            }
            if hooks.panic_unit.is_some_and(|h| h.matches(unit.unit)) {
                panic!("POLLARD_TEST_PANIC_UNIT: work unit {} panics on purpose", unit.unit);
            }
            // Stored by the committer, in this order, before anyone hears of it.
            match hand_over.send(unit.clone()) {
                Ok(()) => Flow::Continue,
                Err(_) => Flow::Stop,
            }
        };
        shared.pool.install(|| sweep::run_some_timed(plan, todo, &[], &sink, cancel, &|| Some(std::time::Instant::now())))
    });
    if let Some(e) = committer.failed.lock().unwrap().take() {
        return Err(Ending::Failed(format!("cannot store a finished unit: {e}")));
    }
    if committer.ended_elsewhere.load(Ordering::SeqCst) {
        // Its end is stored already; recording another changes nothing.
        return Err(Ending::Cancelled);
    }
    match units {
        Ok(_) => Ok(committer.last.load(Ordering::SeqCst)),
        Err(SweepError::Cancelled) if shared.stopping.load(Ordering::SeqCst) => Err(Ending::Checkpointed),
        Err(SweepError::Cancelled) => Err(Ending::Cancelled),
        Err(e) => Err(Ending::Failed(e.to_string())),
    }
}

/// What this worker knows of a run's stored units (its own and, on a shared store, those
/// others stored, learned inside each storing transaction): the events of a unit are made
/// from it, so a shaping key's scores are announced once, by whoever stores its last split.
struct Known<'a> {
    plan: &'a sweep::Plan,
    /// Setting × split scores of each unit.
    sizes: Vec<usize>,
    scores_total: usize,
    units: Mutex<KnownUnits>,
}

struct KnownUnits {
    seen: Vec<bool>,
    /// Per shaping key, its known units.
    by_key: Vec<Vec<sweep::UnitResult>>,
    scores_done: usize,
}

impl<'a> Known<'a> {
    fn new(plan: &'a sweep::Plan, done: Vec<sweep::UnitResult>) -> Known<'a> {
        let sizes: Vec<usize> = (0..plan.units.len()).map(|u| plan.unit_size(u)).collect();
        let scores_total = sizes.iter().sum();
        let known = Known { plan, sizes, scores_total, units: Mutex::new(KnownUnits { seen: vec![false; plan.units.len()], by_key: vec![Vec::new(); plan.spec.keys.len()], scores_done: 0 }) };
        known.learn(done);
        known
    }

    /// Adds a unit unless known (a unit index out of the plan is ignored).
    fn add(&self, g: &mut KnownUnits, unit: &sweep::UnitResult) {
        let Some(&(_, key)) = self.plan.units.get(unit.unit) else { return };
        if std::mem::replace(&mut g.seen[unit.unit], true) {
            return;
        }
        g.scores_done += self.sizes[unit.unit];
        g.by_key[key].push(unit.clone());
    }

    /// Every known unit, by unit index.
    fn all(&self) -> Vec<sweep::UnitResult> {
        let g = self.units.lock().unwrap();
        let mut all: Vec<sweep::UnitResult> = g.by_key.iter().flatten().cloned().collect();
        all.sort_by_key(|u| u.unit);
        all
    }
}

impl UnitLog for Known<'_> {
    fn learn(&self, others: Vec<sweep::UnitResult>) {
        let mut g = self.units.lock().unwrap();
        for unit in &others {
            self.add(&mut g, unit);
        }
    }

    fn announce(&self, unit: &sweep::UnitResult, units_done: u32) -> Vec<EventKind> {
        let mut g = self.units.lock().unwrap();
        self.add(&mut g, unit);
        let progress = sweep::Progress { units_done: units_done as usize, units_total: self.plan.units.len(), scores_done: g.scores_done, scores_total: self.scores_total };
        let mut events = vec![EventKind::Progress(progress)];
        if let Some(&(_, key)) = self.plan.units.get(unit.unit) {
            for (index, score) in sweep::key_scores(self.plan, &g.by_key[key], key).into_iter().flatten() {
                events.push(EventKind::Scored { index: index as u32, score: Box::new(score) });
            }
        }
        events
    }
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

/// Most units stored in one change (and claimed at once).
const MAX_BATCH: usize = 256;

/// About how much work a replica claims at once, once it knows how long its units take.
const CLAIM_WORK: Duration = Duration::from_secs(1);

/// Stores the units a sweep hands over, off the sweep's threads: everything handed over
/// since the last write goes into one change (one flush for many units, so a sweep of small
/// units is not paced by the disk's sync time), then followers are woken. Order is kept,
/// and no one hears of a unit before it is stored. After a store failure nothing more is
/// written and the sweep is told to stop.
struct Committer<'a> {
    shared: &'a Shared,
    run_id: &'a str,
    units_total: u32,
    known: &'a Known<'a>,
    /// The run's count of stored units after this worker's last change.
    since: &'a AtomicU32,
    failed: Mutex<Option<String>>,
    /// Units stored (or given up on) in this batch.
    stored: Stored,
    /// Set when a change stored nothing because the run ended meanwhile (on a shared store,
    /// perhaps cancelled through another replica): the sweep stops.
    ended_elsewhere: AtomicBool,
    /// Set when this worker stored the run's last unit.
    last: AtomicBool,
}

impl Committer<'_> {
    fn run(&self, handed: mpsc::Receiver<sweep::UnitResult>) {
        while let Ok(first) = handed.recv() {
            let mut batch = vec![first];
            batch.extend(handed.try_iter().take(MAX_BATCH - 1));
            let n = batch.len();
            if self.failed.lock().unwrap().is_none() {
                let store: &dyn Storage = self.shared.store.as_ref();
                match store.record_computed(self.run_id, batch, self.since.load(Ordering::SeqCst), self.known, self.shared.now()) {
                    Ok(Recorded { running: false, .. }) => self.ended_elsewhere.store(true, Ordering::SeqCst),
                    Ok(recorded) => {
                        self.since.store(recorded.units_done, Ordering::SeqCst);
                        if recorded.stored_last(self.units_total) {
                            self.last.store(true, Ordering::SeqCst);
                        }
                        self.shared.metrics.units_computed.inc_by(n as u64);
                        self.shared.announce();
                    }
                    Err(e) => *self.failed.lock().unwrap() = Some(e.to_string()),
                }
            }
            self.stored.add(n);
        }
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
        let Some(prev_outcome) = shared.outcomes.get(shared.store.as_ref(), &previous.id)? else { return Ok(None) };
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
