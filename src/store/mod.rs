//! The store: datasets, runs, their events, work units and outcomes, schedules and their
//! fires, and the run queue, behind one interface, [`Storage`]. The rest of the program holds
//! an `Arc<dyn Storage>` and never sees a backend's types; [`SledStore`] ([`sled_store`]) is
//! the backend on one sled database with the dataset bytes in files ([`files`]).
//!
//! Every operation is one whole change of state (one transaction in the backend): a change
//! is whole or absent after a crash, and what returned `Ok` is durable. A backend that several
//! processes share keeps these promises with its own transactions; nothing here assumes one
//! process (the queue cap and claims are decided inside the operations).
//!
//! Expected outcomes are values ([`PutDataset`], [`DeleteDataset`], [`CreateRun`], `None`
//! for a run that is unknown or no longer in the state a change needs); `Err` is for I/O,
//! corruption and an unreachable backend only ([`StoreError`]).
//!
//! A new backend implements [`Storage`] and joins the factory of the model test in
//! `tests.rs` (`backends()`), which checks every operation against an in-memory model.

pub mod files;
pub mod keys;
pub mod paging;
pub mod postgres;
pub mod records;
pub mod sled_store;

#[cfg(test)]
pub(crate) mod tests;

use std::fmt;
use std::io::Read;
use std::path::Path;

use crate::drift::DriftReport;
use crate::job::{DatasetMeta, Event, EventKind, Fire, Run, RunOutcome, RunState, Schedule};
use crate::sweep::UnitResult;

pub use postgres::PostgresStore;
pub use sled_store::{store_in_use, SledStore, CHUNK_BYTES, REFS_COUNTED, STAGING_DIR};

/// Why the store could not do what it was asked.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum StoreError {
    /// The database could not be read or written.
    Io(String),
    /// Stored bytes that this build cannot read, or that contradict each other.
    Corrupt(String),
    /// The backend cannot be reached now (a database server down or out of connections);
    /// the same call may succeed later. The sled backend never returns it.
    Unavailable(String),
}

impl fmt::Display for StoreError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            StoreError::Io(m) => write!(f, "store I/O error: {m}"),
            StoreError::Corrupt(m) => write!(f, "store data is corrupt: {m}"),
            StoreError::Unavailable(m) => write!(f, "store unavailable: {m}"),
        }
    }
}

impl std::error::Error for StoreError {}

/// What [`Storage::claim_next_within`] found.
#[derive(Clone, Debug, PartialEq)]
pub enum Claim {
    /// The oldest queued run, now running.
    Claimed(Run),
    /// The oldest queued run does not fit now (it stays queued, first in line).
    Waiting(Run),
    /// The queue is empty.
    Empty,
}

/// What [`Storage::resume`] did with a run left running.
#[derive(Clone, Debug, PartialEq)]
pub enum Resumed {
    /// Execute it again (the run as now stored).
    Again(Run),
    /// It was failed instead, with this reason.
    GaveUp(String),
    /// It is no longer running (or unknown).
    NotRunning,
}

/// A worker's knowledge of one run's stored units, which the store keeps current inside the
/// transaction that stores the worker's units: the events announcing a unit are made from
/// every unit stored before it, whichever process computed them.
pub trait UnitLog: Sync {
    /// Units of the run that other processes stored since this worker last looked.
    fn learn(&self, others: Vec<UnitResult>);
    /// The events announcing `unit`, just stored as the `units_done`-th unit of its run
    /// (`units_done` is 0 when the backend numbers progress itself, see [`announced`]). May
    /// be called again for the same unit when the transaction starts over.
    fn announce(&self, unit: &UnitResult, units_done: u32) -> Vec<EventKind>;
}

/// What [`Storage::record_computed`] did.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Recorded {
    /// The stored events of every stored unit.
    pub events: Vec<Event>,
    /// How many units of the batch were stored (a unit stored already is refused).
    pub stored: usize,
    /// The run's count of stored units after the change.
    pub units_done: u32,
    /// Whether the run is still running (when not, nothing was stored).
    pub running: bool,
}

impl Recorded {
    /// Whether this change stored the run's last unit: its writer summarises the run.
    pub fn stored_last(&self, units_total: u32) -> bool {
        self.running && self.stored > 0 && self.units_done >= units_total
    }
}

/// What another process changed ([`Storage::watch_changes`]).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Change {
    /// A run, its events or units, or the queue (or the notification was lost: look at all).
    Runs,
    /// A schedule or its fires.
    Schedules,
}

/// What [`Storage::put_dataset`] did.
#[derive(Clone, Debug, PartialEq)]
pub enum PutDataset {
    /// Stored, with its assigned version.
    Created(DatasetMeta),
    /// Nothing changed: a dataset with this id is stored, or the newest version of the name
    /// has the same content, target and categorical columns (that version is returned).
    Unchanged(DatasetMeta),
}

/// Whether two datasets are one version: same bytes, read the same way.
pub(crate) fn same_version(a: &DatasetMeta, b: &DatasetMeta) -> bool {
    a.content == b.content && a.target == b.target && a.categorical == b.categorical
}

/// What a fire's attempt to queue `run` means for the fire and its schedule (inside the
/// fire's transaction); the run created, if any.
pub(crate) fn fire_run(s: &mut Schedule, fire: &mut Fire, run: &Run, created: CreateRun) -> Option<Run> {
    match created {
        CreateRun::Created(r) => {
            s.last_run_id = Some(r.id.clone());
            s.last_dataset_id = Some(r.dataset_id.clone());
            fire.run_id = Some(r.id.clone());
            return Some(r);
        }
        CreateRun::Existing(r) => fire.run_id = Some(r.id),
        CreateRun::DatasetMissing => fire.fail(format!("dataset {} was deleted before the run could be queued", run.dataset_id)),
        // Not returned here: the scheduler checks the queue cap before it records a fire.
        CreateRun::QueueFull => fire.fail("the queue is full".into()),
    }
    None
}

/// An event a unit announces, with the store's count of stored units in a progress event.
pub(crate) fn announced(kind: &EventKind, units_done: u32) -> EventKind {
    let mut kind = kind.clone();
    if let EventKind::Progress(p) = &mut kind {
        p.units_done = units_done as usize;
    }
    kind
}

/// Numbers a fire and moves its schedule past the instants it considered.
pub(crate) fn number_fire(s: &mut Schedule, fire: &mut Fire, considered: i64) {
    fire.sequence = s.next_fire_sequence;
    s.next_fire_sequence += 1;
    s.considered_until = considered;
}

/// What [`Storage::delete_dataset`] did.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum DeleteDataset {
    Deleted,
    NotFound,
    /// A queued or running run uses the dataset (the oldest such run is named).
    InUse { run_id: String },
}

/// What [`Storage::create_run`] did.
#[derive(Clone, Debug, PartialEq)]
pub enum CreateRun {
    /// Stored and queued.
    Created(Run),
    /// The idempotency key (or the run id) already names this run; nothing changed.
    Existing(Run),
    /// The run's dataset is not stored.
    DatasetMissing,
    /// The queue is full (the run is new: neither its idempotency key nor its id is stored).
    QueueFull,
}

/// Which runs [`Storage::list_runs`] returns; the default lets every run through.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct RunFilter {
    pub dataset_name: Option<String>,
    pub state: Option<RunState>,
    /// A label the run carries with this value.
    pub label: Option<(String, String)>,
    pub schedule_id: Option<String>,
    /// `created_at >= created_from`.
    pub created_from: Option<i64>,
    /// `created_at < created_to`.
    pub created_to: Option<i64>,
    /// Only runs whose drift report says the score fell.
    pub score_fell: bool,
    /// Only runs whose drift report raised a flag.
    pub drift_flagged: bool,
}

impl RunFilter {
    pub fn admits(&self, run: &Run) -> bool {
        self.dataset_name.as_ref().is_none_or(|n| *n == run.dataset_name)
            && self.state.is_none_or(|s| s == run.state)
            && self.label.as_ref().is_none_or(|(k, v)| run.labels.get(k) == Some(v))
            && self.schedule_id.as_ref().is_none_or(|s| run.schedule_id.as_ref() == Some(s))
            && self.created_from.is_none_or(|t| run.created_at >= t)
            && self.created_to.is_none_or(|t| run.created_at < t)
            && (!self.score_fell || run.drift.as_ref().is_some_and(|d| d.score_fell))
            && (!self.drift_flagged || run.drift.as_ref().is_some_and(|d| d.flagged()))
    }
}

/// Every read and write of stored state. Each method that changes something is one
/// transaction; reads of one record see whole changes, listings may see a change half done.
/// Ids, page tokens and orders are the backend's promise to callers, the same for every
/// backend: see [`paging`].
pub trait Storage: Send + Sync {
    // -- files and lifetime

    /// A local directory for files of uploads still arriving; they become a dataset only
    /// through [`Storage::put_dataset_staged`].
    fn staging_dir(&self) -> &Path;

    /// Writes everything out (changes already are, when they return; this is for shutdown).
    fn flush(&self) -> Result<(), StoreError>;

    /// Whether the store can be used now (health checks); a backend on a local disk always can.
    fn check(&self) -> Result<(), StoreError> {
        Ok(())
    }

    /// What the store is and where, for the log (no secrets).
    fn describe(&self) -> String;

    // -- several processes on one store

    /// Whether other processes may share this store (then runs are leased, see below).
    fn shared(&self) -> bool {
        false
    }

    /// Renews the leases of the running runs this process executes; a shared backend's
    /// heartbeat. Nothing for a backend that one process owns.
    fn renew_leases(&self) -> Result<(), StoreError> {
        Ok(())
    }

    /// Running runs whose process is gone (their lease expired, or was never taken), now
    /// leased to this process, oldest first: to resume. Nothing for a backend that one
    /// process owns (its running runs at start are [`Storage::running_runs`]).
    fn take_abandoned(&self) -> Result<Vec<Run>, StoreError> {
        Ok(Vec::new())
    }

    /// Calls `wake` whenever another process may have changed runs or events, or schedules
    /// (a shared backend's notifications); nothing for a backend that one process owns.
    fn watch_changes(&self, wake: std::sync::Arc<dyn Fn(Change) + Send + Sync>) {
        let _ = wake;
    }

    // -- datasets

    /// Stores a dataset as the next version of its name, unless nothing changed
    /// ([`PutDataset::Unchanged`]: a dataset with this id exists, or the newest version of the
    /// name has the same content, target and categorical columns). `meta.version` is ignored
    /// and assigned: 1 + the latest version under `meta.name` (deleted versions count); an
    /// empty name gets version 1. `meta.bytes` is kept as given.
    fn put_dataset(&self, meta: DatasetMeta, bytes: &[u8]) -> Result<PutDataset, StoreError> {
        self.put_dataset_from(meta, &mut &bytes[..])
    }

    /// [`Storage::put_dataset`] with the bytes read from `bytes` (streamed, never whole in memory).
    fn put_dataset_from(&self, meta: DatasetMeta, bytes: &mut dyn Read) -> Result<PutDataset, StoreError>;

    /// [`Storage::put_dataset`] with the bytes of a finished file in [`Storage::staging_dir`]
    /// (moved, not copied, when the dataset is new; left alone when nothing changed).
    fn put_dataset_staged(&self, meta: DatasetMeta, staged: &Path) -> Result<PutDataset, StoreError>;

    fn dataset(&self, id: &str) -> Result<Option<DatasetMeta>, StoreError>;

    /// The stored bytes of a dataset, whole (see [`Storage::dataset_reader`]).
    fn dataset_bytes(&self, id: &str) -> Result<Option<Vec<u8>>, StoreError> {
        let Some(mut reader) = self.dataset_reader(id)? else { return Ok(None) };
        let mut out = Vec::new();
        reader.read_to_end(&mut out).map_err(|e| StoreError::Io(format!("reading the bytes of dataset {id}: {e}")))?;
        Ok(Some(out))
    }

    /// The bytes of a stored dataset, to read; `None` when the dataset is not stored. A
    /// delete after this returns does not cut the reading short. A record whose bytes are
    /// missing is [`StoreError::Corrupt`].
    fn dataset_reader(&self, id: &str) -> Result<Option<Box<dyn Read + Send>>, StoreError>;

    /// The highest stored (not deleted) version under `name`.
    fn latest_dataset(&self, name: &str) -> Result<Option<DatasetMeta>, StoreError>;

    /// Datasets newest first, optionally only the versions of one name; `limit` is at least
    /// 1; the token is the position after the last dataset returned (any string is valid).
    fn list_datasets(&self, name: Option<&str>, page_token: Option<&str>, limit: usize) -> Result<(Vec<DatasetMeta>, Option<String>), StoreError>;

    /// Deletes a dataset unless a queued or running run uses it (checked in the same transaction).
    fn delete_dataset(&self, id: &str) -> Result<DeleteDataset, StoreError>;

    /// Deletes a dataset only when no stored run of any state used it; for retention.
    fn delete_dataset_if_unused(&self, id: &str) -> Result<DeleteDataset, StoreError>;

    // -- runs and the queue

    /// Stores a queued run (as [`Run::queued`] makes it) and enqueues it; an idempotency key
    /// or run id already stored returns that run. The dataset must exist.
    fn create_run(&self, run: Run) -> Result<CreateRun, StoreError> {
        self.create_run_within(run, false)
    }

    /// [`Storage::create_run`], refusing a new run ([`CreateRun::QueueFull`]) when the caller
    /// found the queue full; an idempotent retry still gets its run.
    fn create_run_within(&self, run: Run, queue_full: bool) -> Result<CreateRun, StoreError>;

    /// The run an owner's idempotency key names, if any.
    fn run_by_idempotency(&self, owner: Option<&str>, key: &str) -> Result<Option<Run>, StoreError>;

    /// How many queued runs `owner` started.
    fn queued_by(&self, owner: &str) -> Result<usize, StoreError>;

    /// How many runs are queued.
    fn queued_count(&self) -> Result<usize, StoreError>;

    fn run(&self, id: &str) -> Result<Option<Run>, StoreError>;

    /// Runs newest first, filtered; `limit` is at least 1; the token is the last id returned.
    fn list_runs(&self, filter: &RunFilter, page_token: Option<&str>, limit: usize) -> Result<(Vec<Run>, Option<String>), StoreError>;

    /// Takes the oldest queued run off the queue and marks it running (plan size 0).
    fn claim_next(&self, now: i64) -> Result<Option<Run>, StoreError> {
        match self.claim_next_within(now, &|_| true)? {
            Claim::Claimed(run) => Ok(Some(run)),
            Claim::Waiting(_) | Claim::Empty => Ok(None),
        }
    }

    /// [`Storage::claim_next`] when `fits` admits the oldest queued run; otherwise it stays
    /// queued, first in line.
    fn claim_next_within(&self, now: i64, fits: &dyn Fn(&Run) -> bool) -> Result<Claim, StoreError>;

    /// Records the plan size of a running run; nothing when it is not running.
    fn set_plan_size(&self, run_id: &str, settings: u32, units_total: u32) -> Result<(), StoreError>;

    /// Runs left running (after a crash or shutdown), oldest first.
    fn running_runs(&self) -> Result<Vec<Run>, StoreError>;

    /// A finished work unit of a running run with the events it announces, in one change;
    /// the stored events (none when the unit was stored already or the run is not running).
    fn record_unit(&self, run_id: &str, unit: &UnitResult, events: Vec<EventKind>, now: i64) -> Result<Vec<Event>, StoreError>;

    /// Several finished units of one run, in order, each with its events, as
    /// [`Storage::record_unit`] stores one. A backend may store the whole batch in one change
    /// (one flush for many units, so small units are not bound by the disk's sync time); each
    /// unit with its events is whole or absent either way. The stored events of all units.
    fn record_units(&self, run_id: &str, batch: Vec<(UnitResult, Vec<EventKind>)>, now: i64) -> Result<Vec<Event>, StoreError> {
        let mut out = Vec::new();
        for (unit, events) in batch {
            out.extend(self.record_unit(run_id, &unit, events, now)?);
        }
        Ok(out)
    }

    /// Work units of a running run for this process to compute, at most `max` when other
    /// processes share the run, from a plan of `total` units; empty when none is left to
    /// claim (or the run is not running). A shared backend leases them to this process
    /// ([`Storage::renew_leases`] renews the lease); another process gets a unit again only
    /// once its lease expired. A backend one process owns hands out every unit not stored,
    /// at once: one sweep over the whole run, as the run's only worker.
    fn claim_units(&self, run_id: &str, total: u32, max: usize) -> Result<Vec<usize>, StoreError> {
        let _ = max;
        let Some(run) = self.run(run_id)? else { return Ok(Vec::new()) };
        if run.state != RunState::Running {
            return Ok(Vec::new());
        }
        let mut stored = vec![false; total as usize];
        for u in self.units(run_id)? {
            if let Some(s) = stored.get_mut(u.unit) {
                *s = true;
            }
        }
        Ok((0..total as usize).filter(|&u| !stored[u]).collect())
    }

    /// A running run another process started, with units left to claim (their lease
    /// expired, or they were never claimed), that this process does not work on yet
    /// (`busy`): to help with. Never one for a backend that one process owns.
    fn join_running(&self, busy: &[String]) -> Result<Option<Run>, StoreError> {
        let _ = busy;
        Ok(None)
    }

    /// Computed units of one run, in order, stored as [`Storage::record_units`] stores them,
    /// with the events `log` announces for each. A shared backend first tells `log` the
    /// units other processes stored after the `since`-th (by [`Recorded::units_done`] of the
    /// worker's previous call, 0 at first), then numbers each unit and its events in the same
    /// transaction. A backend one process owns has nothing to tell.
    fn record_computed(&self, run_id: &str, batch: Vec<UnitResult>, since: u32, log: &dyn UnitLog, now: i64) -> Result<Recorded, StoreError> {
        let _ = since;
        let before = self.run(run_id)?.map_or(0, |r| r.units_done);
        let handed = batch.into_iter().map(|u| {
            let events = log.announce(&u, 0);
            (u, events)
        });
        let events = self.record_units(run_id, handed.collect(), now)?;
        let Some(run) = self.run(run_id)? else { return Ok(Recorded::default()) };
        let running = run.state == RunState::Running;
        Ok(Recorded { events, stored: if running { run.units_done.saturating_sub(before) as usize } else { 0 }, units_done: run.units_done, running })
    }

    /// The stored work units of a run, by unit index.
    fn units(&self, run_id: &str) -> Result<Vec<UnitResult>, StoreError>;

    /// Running → finished with its outcome and drift report; `None` when not running.
    fn finish_run(&self, run_id: &str, outcome: &RunOutcome, drift: Option<DriftReport>, now: i64) -> Result<Option<Event>, StoreError>;

    /// Queued or running → failed or cancelled with a reason; `None` when unknown or terminal.
    fn end_run(&self, run_id: &str, state: RunState, reason: &str, now: i64) -> Result<Option<(Run, Event)>, StoreError>;

    /// A run left running by an earlier process, about to run again (crash strikes, see [`Run::resume`]).
    fn resume(&self, run_id: &str, now: i64) -> Result<Resumed, StoreError>;

    /// A running run stopped cleanly (shutdown): its next resume counts no crash strike.
    fn stopped_cleanly(&self, run_id: &str) -> Result<(), StoreError>;

    /// Appends a non-terminal event to a running run; `None` when it is not running.
    fn append_event(&self, run_id: &str, kind: EventKind, now: i64) -> Result<Option<Event>, StoreError>;

    /// Events with sequence > `after`, in order.
    fn events(&self, run_id: &str, after: u64) -> Result<Vec<Event>, StoreError>;

    fn outcome(&self, run_id: &str) -> Result<Option<RunOutcome>, StoreError>;

    /// Deletes a terminal run with everything it owns; `false` when unknown or not terminal.
    fn delete_run(&self, run_id: &str) -> Result<bool, StoreError>;

    // -- schedules

    /// Stores a new schedule; `false` when its id is taken.
    fn create_schedule(&self, schedule: &Schedule) -> Result<bool, StoreError>;

    fn schedule(&self, id: &str) -> Result<Option<Schedule>, StoreError>;

    /// Schedules newest first; the token is the last id returned.
    fn list_schedules(&self, page_token: Option<&str>, limit: usize) -> Result<(Vec<Schedule>, Option<String>), StoreError>;

    /// Every schedule, oldest first.
    fn all_schedules(&self) -> Result<Vec<Schedule>, StoreError>;

    /// Changes a schedule in one transaction (`change` may run more than once); `None` when unknown.
    fn update_schedule(&self, id: &str, change: &dyn Fn(&mut Schedule)) -> Result<Option<Schedule>, StoreError>;

    /// Deletes a schedule and its fires (its runs stay); `false` when unknown.
    fn delete_schedule(&self, id: &str) -> Result<bool, StoreError>;

    /// One fire of a schedule with the run it starts, in one transaction (see the backend's notes).
    fn record_fire(&self, id: &str, seen_considered: i64, considered: i64, draft: &Fire, run: Option<&Run>) -> Result<Option<(Schedule, Fire, Option<Run>)>, StoreError>;

    /// A schedule's fires newest first; the token is the last sequence returned.
    fn fires(&self, id: &str, page_token: Option<u64>, limit: usize) -> Result<(Vec<Fire>, Option<String>), StoreError>;
}
