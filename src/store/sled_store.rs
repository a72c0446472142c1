//! [`SledStore`], the [`Storage`] backend on one sled database, with each dataset's bytes in
//! a file of its own beside it ([`files`]: `datasets/<id>.csv`, so a delete erases them).
//! This is the only file that names sled.
//!
//! Trees (keys → values; values are [`records`], one format byte then JSON):
//!
//! | tree | key | value |
//! | --- | --- | --- |
//! | `datasets` | dataset id | dataset record |
//! | `dataset_chunks` | dataset id ++ be u32 index | empty: where stores written before dataset files kept the bytes, 1 MiB per chunk; [`SledStore::open`] moves them to files |
//! | `dataset_names` | name ++ 0x00 ++ be u32 version | dataset id; empty once deleted |
//! | `dataset_holds` | dataset id | ids of the queued and running runs that use it |
//! | `runs` | run id | run record |
//! | `run_progress` | run id | `units_done` and `next_sequence`, when they moved on since the run record was written |
//! | `results` | run id | outcome record |
//! | `events` | run id ++ be u64 sequence | event record |
//! | `units` | run id ++ be u32 unit | unit record |
//! | `queue` | run id | empty (run ids are time-ordered: key order is creation order) |
//! | `idempotency` | idempotency key | run id |
//! | `dataset_refs` | dataset id | be u64 count of stored runs (any state) that used it |
//! | `schedules` | schedule id | schedule record |
//! | `fires` | schedule id ++ be u64 sequence | fire record |
//!
//! `dataset_refs` also holds the key [`REFS_COUNTED`]: its absence (a store written before
//! the counts existed) makes [`SledStore::open`] count the stored runs once.
//!
//! A deleted dataset leaves an empty value at its name and version, so versions under a
//! name only ever grow and a run's `dataset_version` never comes to name another table.
//!
//! Consistency: every change is one sled transaction over all the trees, so a crash leaves
//! each change whole or absent; every change is flushed before it returns, so what returned
//! `Ok` survives a crash. sled cannot scan inside a transaction, so the few changes that need
//! a scan (the queue head, the latest version of a name, the keys of a finished run) scan
//! first and check inside the transaction that what they saw still holds, starting over when
//! it does not. sled serialises transactions behind one lock, and a plain `get` waits for
//! it, so single-key reads see whole changes; scans (listings) may see a change half done.
//!
//! A dataset's file is written and synced before its record's transaction, and removed after
//! its delete transaction commits, both under [`files::Files::lock`]: a stored record always
//! has its file. Files without a record (a crash between the two) are removed at open; a
//! record whose file is missing anyway is a [`StoreError::Corrupt`] when its bytes are read.

use std::io::Write as _;
use std::path::Path;
use std::sync::Arc;

use sled::transaction::{ConflictableTransactionError, TransactionError, TransactionalTree, UnabortableTransactionError};
use sled::{IVec, Transactional};

use super::paging::{dataset_position, page};
use super::records::{self, HoldsRecord};
use super::{announced, files, fire_run, keys, number_fire, same_version, Claim, CreateRun, DeleteDataset, PutDataset, Resumed, RunFilter, Storage, StoreError};
use crate::drift::DriftReport;
use crate::job::{DatasetMeta, Event, EventKind, Fire, Run, RunOutcome, RunState, Schedule};
use crate::sweep::UnitResult;

/// The directory inside the store directory where uploads are staged.
pub const STAGING_DIR: &str = "uploads";

/// Bytes per dataset chunk, in stores written before dataset files.
pub const CHUNK_BYTES: usize = 1 << 20;

impl From<sled::Error> for StoreError {
    fn from(e: sled::Error) -> Self {
        match e {
            sled::Error::Corruption { .. } => StoreError::Corrupt(e.to_string()),
            other => StoreError::Io(other.to_string()),
        }
    }
}

/// The sled backend. Cloning is cheap: clones share one database.
#[derive(Clone)]
pub struct SledStore {
    db: sled::Db,
    /// Every tree, indexed by the constants below; transactions take them all.
    trees: Vec<sled::Tree>,
    /// Where uploads are staged as files while they arrive (see [`Storage::staging_dir`]).
    staging: std::path::PathBuf,
    /// The dataset files.
    files: Arc<files::Files>,
}

pub(super) const DATASETS: usize = 0;
pub(super) const CHUNKS: usize = 1;
pub(super) const NAMES: usize = 2;
pub(super) const HOLDS: usize = 3;
pub(super) const RUNS: usize = 4;
pub(super) const RESULTS: usize = 5;
pub(super) const EVENTS: usize = 6;
pub(super) const UNITS: usize = 7;
pub(super) const QUEUE: usize = 8;
pub(super) const IDEMPOTENCY: usize = 9;
pub(super) const REFS: usize = 10;
pub(super) const SCHEDULES: usize = 11;
pub(super) const FIRES: usize = 12;
pub(super) const PROGRESS: usize = 13;
pub(super) const TREE_NAMES: [&str; 14] = [
    "datasets",
    "dataset_chunks",
    "dataset_names",
    "dataset_holds",
    "runs",
    "results",
    "events",
    "units",
    "queue",
    "idempotency",
    "dataset_refs",
    "schedules",
    "fires",
    "run_progress",
];

/// The marker key of `dataset_refs` saying the counts are complete (no dataset id starts with 0x00).
pub const REFS_COUNTED: &[u8] = b"\0counted";

/// Why a transaction stopped without committing.
enum Abort {
    Store(StoreError),
    /// What the caller scanned before the transaction changed meanwhile: scan again.
    Stale,
}

type TxResult<A> = Result<A, ConflictableTransactionError<Abort>>;

fn fail<A>(e: StoreError) -> TxResult<A> {
    Err(ConflictableTransactionError::Abort(Abort::Store(e)))
}

fn stale<A>() -> TxResult<A> {
    Err(ConflictableTransactionError::Abort(Abort::Stale))
}

/// Decodes inside a transaction.
fn read<T>(r: Result<T, StoreError>) -> TxResult<T> {
    r.map_err(|e| ConflictableTransactionError::Abort(Abort::Store(e)))
}

/// The trees as one transaction sees them.
struct Tx<'a>(&'a [TransactionalTree]);

impl Tx<'_> {
    fn get(&self, tree: usize, key: impl AsRef<[u8]>) -> Result<Option<IVec>, UnabortableTransactionError> {
        self.0[tree].get(key)
    }
    fn insert(&self, tree: usize, key: impl AsRef<[u8]>, value: impl Into<IVec>) -> Result<(), UnabortableTransactionError> {
        self.0[tree].insert(key.as_ref(), value.into()).map(|_| ())
    }
    fn remove(&self, tree: usize, key: impl AsRef<[u8]>) -> Result<Option<IVec>, UnabortableTransactionError> {
        self.0[tree].remove(key.as_ref())
    }

    fn run(&self, id: &str) -> TxResult<Option<Run>> {
        match self.get(RUNS, id)? {
            None => Ok(None),
            Some(v) => {
                let mut run = read(records::decode_run(&v))?;
                if let Some(p) = self.get(PROGRESS, id)? {
                    read(with_progress(&mut run, &p))?;
                }
                Ok(Some(run))
            }
        }
    }

    /// Writes the whole run record (its progress included, so a progress record is dropped).
    fn put_run(&self, run: &Run) -> TxResult<()> {
        self.remove(PROGRESS, &run.id)?;
        Ok(self.insert(RUNS, &run.id, records::encode_run(run))?)
    }

    /// Writes only the fields that move with each unit and event.
    fn put_progress(&self, run: &Run) -> TxResult<()> {
        let p = records::ProgressRecord { units_done: run.units_done, next_sequence: run.next_sequence };
        Ok(self.insert(PROGRESS, &run.id, records::encode_progress(&p))?)
    }

    /// A queued or running run → failed or cancelled: off the queue, the event appended, the
    /// dataset released. Returns the event.
    fn end(&self, run: &mut Run, state: RunState, reason: &str, now: i64) -> TxResult<Event> {
        let kind = if state == RunState::Cancelled { EventKind::Cancelled(reason.to_string()) } else { EventKind::Failed(reason.to_string()) };
        if run.state == RunState::Queued {
            self.remove(QUEUE, &run.id)?;
        }
        let event = self.append(run, kind, now)?;
        run.end(state, now, Some(reason));
        self.put_run(run)?;
        self.release(&run.dataset_id, &run.id)?;
        Ok(event)
    }

    fn holds(&self, dataset_id: &str) -> TxResult<HoldsRecord> {
        match self.get(HOLDS, dataset_id)? {
            None => Ok(HoldsRecord::default()),
            Some(v) => read(records::decode_holds(&v)),
        }
    }

    fn hold(&self, dataset_id: &str, run_id: &str) -> TxResult<()> {
        let mut h = self.holds(dataset_id)?;
        h.runs.push(run_id.to_string());
        Ok(self.insert(HOLDS, dataset_id, records::encode_holds(&h))?)
    }

    fn release(&self, dataset_id: &str, run_id: &str) -> TxResult<()> {
        let mut h = self.holds(dataset_id)?;
        h.runs.retain(|r| r != run_id);
        if h.runs.is_empty() {
            self.remove(HOLDS, dataset_id)?;
        } else {
            self.insert(HOLDS, dataset_id, records::encode_holds(&h))?;
        }
        Ok(())
    }

    /// How many stored runs used a dataset.
    fn refs(&self, dataset_id: &str) -> TxResult<u64> {
        match self.get(REFS, dataset_id)? {
            None => Ok(0),
            Some(v) => read(count_of(&v)),
        }
    }

    fn add_ref(&self, dataset_id: &str, delta: i64) -> TxResult<()> {
        let n = (self.refs(dataset_id)? as i64 + delta).max(0) as u64;
        if n == 0 {
            self.remove(REFS, dataset_id)?;
        } else {
            self.insert(REFS, dataset_id, &n.to_be_bytes())?;
        }
        Ok(())
    }

    /// Stores a queued run and enqueues it, unless its idempotency key or id names a stored
    /// run (that run is returned) or its dataset is not stored.
    fn insert_run(&self, run: &Run, queue_full: bool) -> TxResult<CreateRun> {
        let idempotency = run.idempotency_key.as_deref().map(|key| keys::idempotency(run.owner.as_deref(), key));
        if let Some(idempotency) = &idempotency {
            if let Some(id) = self.get(IDEMPOTENCY, idempotency)? {
                let id = read(String::from_utf8(id.to_vec()).map_err(|_| StoreError::Corrupt("idempotency entry is not UTF-8".into())))?;
                if let Some(existing) = self.run(&id)? {
                    return Ok(CreateRun::Existing(existing));
                }
            }
        }
        if let Some(existing) = self.run(&run.id)? {
            return Ok(CreateRun::Existing(existing));
        }
        if queue_full {
            return Ok(CreateRun::QueueFull);
        }
        if self.get(DATASETS, &run.dataset_id)?.is_none() {
            return Ok(CreateRun::DatasetMissing);
        }
        self.put_run(run)?;
        self.insert(QUEUE, &run.id, IVec::default())?;
        if let Some(idempotency) = idempotency {
            self.insert(IDEMPOTENCY, idempotency, run.id.as_bytes())?;
        }
        self.hold(&run.dataset_id, &run.id)?;
        self.add_ref(&run.dataset_id, 1)?;
        Ok(CreateRun::Created(run.clone()))
    }

    fn delete_dataset(&self, id: &str, only_unused: bool) -> TxResult<DeleteDataset> {
        let Some(v) = self.get(DATASETS, id)? else { return Ok(DeleteDataset::NotFound) };
        let meta = read(records::decode_dataset(&v))?;
        if let Some(run_id) = self.holds(id)?.runs.first() {
            return Ok(DeleteDataset::InUse { run_id: run_id.clone() });
        }
        if only_unused && self.refs(id)? > 0 {
            return Ok(DeleteDataset::InUse { run_id: String::new() });
        }
        // (Its file is removed once this commits; no chunks are left after open.)
        self.remove(DATASETS, id)?;
        if !meta.name.is_empty() {
            let key = keys::name_version(&meta.name, meta.version);
            if self.get(NAMES, &key)?.is_some_and(|v| v == id.as_bytes()) {
                self.insert(NAMES, key, IVec::default())?;
            }
        }
        Ok(DeleteDataset::Deleted)
    }

    fn schedule(&self, id: &str) -> TxResult<Option<Schedule>> {
        match self.get(SCHEDULES, id)? {
            None => Ok(None),
            Some(v) => read(records::decode_schedule(&v)).map(Some),
        }
    }

    fn put_schedule(&self, s: &Schedule) -> TxResult<()> {
        Ok(self.insert(SCHEDULES, &s.id, records::encode_schedule(s))?)
    }

    /// Numbers and stores an event of `run` (which the caller saves afterwards). Its time is
    /// `now`, or the previous event's time if that is later (a clock stepped back): times
    /// never go backwards within a run.
    fn append(&self, run: &mut Run, kind: EventKind, now: i64) -> TxResult<Event> {
        let sequence = run.take_sequence();
        let previous = match sequence.checked_sub(1).filter(|&s| s > 0) {
            Some(s) => self.get(EVENTS, keys::event(&run.id, s))?.map(|v| records::decode_event(&v)).transpose(),
            None => Ok(None),
        };
        let at = read(previous)?.map_or(now, |p| p.at.max(now));
        let event = Event { sequence, at, kind };
        self.insert(EVENTS, keys::event(&run.id, event.sequence), records::encode_event(&event))?;
        Ok(event)
    }
}

/// Runs `attempt` until it does not come back stale.
fn retrying<A>(mut attempt: impl FnMut() -> Result<A, Abort>) -> Result<A, StoreError> {
    loop {
        match attempt() {
            Ok(a) => return Ok(a),
            Err(Abort::Stale) => continue,
            Err(Abort::Store(e)) => return Err(e),
        }
    }
}

impl SledStore {
    /// Opens (or creates) the database in `dir`.
    ///
    /// A store that another process holds is refused at once ([`store_in_use`]). sled releases
    /// its file lock only when the last thread of a closed database lets go, which can lag the
    /// close by a moment: when this process opened `dir` before (a restart in the same
    /// process), the lock may still be its own, so it waits a little while for it.
    pub fn open(dir: &Path) -> Result<SledStore, StoreError> {
        static OPENED: std::sync::Mutex<Vec<std::path::PathBuf>> = std::sync::Mutex::new(Vec::new());
        let canonical = || std::fs::canonicalize(dir).unwrap_or_else(|_| dir.to_path_buf());
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
        loop {
            // No background flusher: every change is flushed before it returns anyway, and the
            // flusher thread is what keeps a closed database's lock alive.
            match sled::Config::new().path(dir).flush_every_ms(None).open() {
                Ok(db) => {
                    let mut opened = OPENED.lock().unwrap_or_else(|e| e.into_inner());
                    let here = canonical();
                    if !opened.contains(&here) {
                        opened.push(here);
                    }
                    drop(opened);
                    // Staged uploads of an earlier process never finished: nothing names them.
                    let staging = dir.join(STAGING_DIR);
                    let _ = std::fs::remove_dir_all(&staging);
                    return SledStore::with(db, staging, files::Files::open(dir, false)?);
                }
                // sled reports the taken lock as an I/O error whose text says so.
                Err(sled::Error::Io(e)) if e.kind() == std::io::ErrorKind::WouldBlock || e.to_string().contains("could not acquire lock") => {
                    let ours = OPENED.lock().unwrap_or_else(|e| e.into_inner()).contains(&canonical());
                    if !ours || std::time::Instant::now() >= deadline {
                        return Err(store_in_use(dir));
                    }
                    std::thread::sleep(std::time::Duration::from_millis(20));
                }
                Err(e) => return Err(StoreError::Io(format!("cannot open the store at {}: {e}", dir.display()))),
            }
        }
    }

    /// A database that lives only as long as its last handle (for tests and the demo), with
    /// its dataset files and staged uploads in a directory of its own under the system
    /// temporary directory, removed with the last handle.
    pub fn open_temporary() -> Result<SledStore, StoreError> {
        let root = std::env::temp_dir().join(format!("pollard-store-{}", uuid::Uuid::now_v7().simple()));
        let files = files::Files::open(&root, true)?;
        SledStore::with(sled::Config::new().temporary(true).open()?, root.join(STAGING_DIR), files)
    }

    fn with(db: sled::Db, staging: std::path::PathBuf, files: files::Files) -> Result<SledStore, StoreError> {
        let trees = TREE_NAMES.iter().map(|n| db.open_tree(n)).collect::<Result<_, _>>()?;
        let store = SledStore { db, trees, staging, files: Arc::new(files) };
        store.count_refs_once()?;
        store.move_chunks_to_files()?;
        let datasets = store.tree(DATASETS);
        let removed = store.files.tidy(|id| Ok(datasets.contains_key(id)?))?;
        if removed > 0 {
            tracing::info!(files = removed, "removed dataset files that no dataset record names (an upload or delete a crash cut short)");
        }
        Ok(store)
    }

    /// Fills `dataset_refs` from the stored runs when it was never filled (see the module
    /// notes). Cleared first and marked last, so a crash in between counts again.
    fn count_refs_once(&self) -> Result<(), StoreError> {
        let refs = self.tree(REFS);
        if refs.contains_key(REFS_COUNTED)? {
            return Ok(());
        }
        refs.clear()?;
        let mut counts: std::collections::BTreeMap<String, u64> = std::collections::BTreeMap::new();
        for kv in self.tree(RUNS).iter() {
            *counts.entry(records::decode_run(&kv?.1)?.dataset_id).or_default() += 1;
        }
        let mut batch = sled::Batch::default();
        for (id, n) in counts {
            batch.insert(id.as_bytes(), &n.to_be_bytes());
        }
        batch.insert(REFS_COUNTED, &[]);
        refs.apply_batch(batch)?;
        self.db.flush()?;
        Ok(())
    }

    /// One transaction over every tree, flushed before it returns.
    fn transact<A>(&self, f: impl Fn(&Tx) -> TxResult<A>) -> Result<A, Abort> {
        self.trees
            .as_slice()
            .transaction(|view: &Vec<TransactionalTree>| {
                view[0].flush();
                f(&Tx(view))
            })
            .map_err(|e| match e {
                TransactionError::Abort(a) => a,
                TransactionError::Storage(e) => Abort::Store(e.into()),
            })
    }

    /// The folder of the dataset files (`datasets` in the store directory).
    pub fn datasets_dir(&self) -> &Path {
        self.files.dir()
    }

    pub(super) fn tree(&self, t: usize) -> &sled::Tree {
        &self.trees[t]
    }

    /// The stored dataset an upload of `meta` would not change: the one with its id, or the
    /// newest version of its name when that is the same version.
    fn unchanged(&self, meta: &DatasetMeta) -> Result<Option<DatasetMeta>, StoreError> {
        if let Some(existing) = self.dataset(&meta.id)? {
            return Ok(Some(existing));
        }
        Ok(self.newest_version(&meta.name)?.filter(|n| same_version(n, meta)))
    }

    /// Places a dataset's synced file and stores its record, under the files lock. A file
    /// placed for a record that then is not stored (a failure, or an equal version stored
    /// meanwhile) is removed again.
    fn record_dataset(&self, meta: DatasetMeta, ready: files::Ready) -> Result<PutDataset, StoreError> {
        let _files = self.files.lock.lock().unwrap_or_else(|p| p.into_inner());
        // Records of datasets are created and removed only under this lock: this check holds.
        if let Some(existing) = self.dataset(&meta.id)? {
            return Ok(PutDataset::Unchanged(existing));
        }
        self.files.place(&meta.id, ready)?;
        let stored = retrying(|| {
            let latest = if meta.name.is_empty() { 0 } else { self.latest_version(&meta.name).map_err(Abort::Store)? };
            self.transact(|tx| {
                // An equal upload to the same name may have won meanwhile.
                if latest > 0 {
                    let id = tx.get(NAMES, keys::name_version(&meta.name, latest))?.unwrap_or_default();
                    if let Some(v) = tx.get(DATASETS, &id)? {
                        let newest = read(records::decode_dataset(&v))?;
                        if same_version(&newest, &meta) {
                            return Ok(PutDataset::Unchanged(newest));
                        }
                    }
                }
                let mut m = meta.clone();
                m.version = latest + 1;
                if !m.name.is_empty() {
                    let key = keys::name_version(&m.name, m.version);
                    if tx.get(NAMES, &key)?.is_some() {
                        return stale();
                    }
                    tx.insert(NAMES, key, m.id.as_bytes())?;
                }
                tx.insert(DATASETS, &m.id, records::encode_dataset(&m))?;
                Ok(PutDataset::Created(m))
            })
        });
        if !matches!(&stored, Ok(PutDataset::Created(_))) {
            let _ = self.files.remove(&meta.id);
        }
        stored
    }

    /// The record at the highest version of `name`, unless that version was deleted.
    fn newest_version(&self, name: &str) -> Result<Option<DatasetMeta>, StoreError> {
        if name.is_empty() {
            return Ok(None);
        }
        match self.tree(NAMES).get(keys::name_version(name, self.latest_version(name)?))? {
            Some(id) if !id.is_empty() => self.dataset(&String::from_utf8_lossy(&id)),
            _ => Ok(None),
        }
    }

    /// Moves dataset bytes kept as chunks (stores written before dataset files) to files, and
    /// removes chunks that no dataset record names (left by a crash during an upload). Each
    /// dataset's file is placed before its chunks are removed, so a crash in between only
    /// moves it again at the next open. For open, before any other handle exists.
    fn move_chunks_to_files(&self) -> Result<(), StoreError> {
        let chunks = self.tree(CHUNKS);
        while let Some(kv) = chunks.iter().next() {
            let (key, _) = kv?;
            let Some(id) = key.len().checked_sub(4).and_then(|n| std::str::from_utf8(&key[..n]).ok()).map(str::to_string) else {
                return Err(StoreError::Corrupt(format!("a dataset chunk key of {} bytes names no dataset", key.len())));
            };
            let mut n = 0u32;
            if self.tree(DATASETS).contains_key(&id)? {
                let ready = self.files.write(&id, |f| {
                    // Chunks are numbered from 0 without gaps.
                    while let Some(chunk) = chunks.get(keys::chunk(&id, n)).map_err(std::io::Error::other)? {
                        f.write_all(&chunk)?;
                        n += 1;
                    }
                    Ok(())
                })?;
                self.files.place(&id, ready)?;
                tracing::info!(dataset = %id, chunks = n, "moved a dataset's bytes from the database to its file");
            } else {
                while chunks.contains_key(keys::chunk(&id, n))? {
                    n += 1;
                }
                tracing::info!(dataset = %id, chunks = n, "removed the chunks of an upload that did not finish");
            }
            let mut batch = sled::Batch::default();
            for i in 0..n {
                batch.remove(keys::chunk(&id, i));
            }
            // A key past a gap would be found again forever: remove the one that was seen.
            batch.remove(key);
            chunks.apply_batch(batch)?;
            self.db.flush()?;
        }
        Ok(())
    }

    /// The highest version under `name`, deleted ones included (0 when none).
    fn latest_version(&self, name: &str) -> Result<u32, StoreError> {
        for kv in self.tree(NAMES).scan_prefix(keys::name_prefix(name)).rev() {
            let (k, _) = kv?;
            if let Some(v) = keys::version_of(name, &k) {
                return Ok(v);
            }
        }
        Ok(0)
    }

    /// Ids of the stored versions of `name`, oldest first.
    fn name_ids(&self, name: &str) -> Result<Vec<String>, StoreError> {
        let mut out = Vec::new();
        for kv in self.tree(NAMES).scan_prefix(keys::name_prefix(name)) {
            let (k, v) = kv?;
            if keys::version_of(name, &k).is_some() && !v.is_empty() {
                out.push(String::from_utf8(v.to_vec()).map_err(|_| StoreError::Corrupt(format!("dataset name entry of '{name}' is not UTF-8")))?);
            }
        }
        Ok(out)
    }

    /// The delete transaction, then (once it committed) the dataset's file, under the files
    /// lock. A file that cannot be removed is logged and left to the next open, which removes
    /// files no record names: the dataset is deleted either way.
    fn delete_dataset_and_file(&self, id: &str, only_unused: bool) -> Result<DeleteDataset, StoreError> {
        let _files = self.files.lock.lock().unwrap_or_else(|p| p.into_inner());
        let done = retrying(|| self.transact(|tx| tx.delete_dataset(id, only_unused)))?;
        if done == DeleteDataset::Deleted {
            if let Err(e) = self.files.remove(id) {
                tracing::warn!(dataset = %id, error = %e, "the deleted dataset's file stays until the next start");
            }
        }
        Ok(done)
    }

    /// A stored run record with its progress record, if any, laid over it.
    fn decode_run(&self, bytes: &[u8]) -> Result<Run, StoreError> {
        let mut run = records::decode_run(bytes)?;
        if let Some(p) = self.tree(PROGRESS).get(&run.id)? {
            with_progress(&mut run, &p)?;
        }
        Ok(run)
    }
}

impl Storage for SledStore {

    fn describe(&self) -> String {
        format!("sled in {}", self.files.dir().parent().map_or_else(|| self.files.dir().display().to_string(), |d| d.display().to_string()))
    }

    /// Writes everything to disk (changes already are, when they return; this is for shutdown).
    fn flush(&self) -> Result<(), StoreError> {
        self.db.flush()?;
        Ok(())
    }

    /// A directory for files of uploads still arriving (`uploads` in the store directory,
    /// emptied at each open; the system temp dir for a temporary store). The files are not
    /// part of the store: a dataset exists once [`Storage::put_dataset_from`] returns.
    fn staging_dir(&self) -> &Path {
        &self.staging
    }

    /// [`Storage::put_dataset`] with the bytes read from `bytes` (streamed to a temporary file,
    /// never whole in memory), then placed and recorded (see the module notes).
    fn put_dataset_from(&self, meta: DatasetMeta, bytes: &mut dyn std::io::Read) -> Result<PutDataset, StoreError> {
        if let Some(same) = self.unchanged(&meta)? {
            return Ok(PutDataset::Unchanged(same));
        }
        let ready = self.files.write(&meta.id, |f| std::io::copy(bytes, f).map(|_| ()))?;
        self.record_dataset(meta, ready)
    }

    /// [`Storage::put_dataset`] with the bytes of a finished file in [`Storage::staging_dir`],
    /// which is moved into place (not copied) when the dataset is new, and left alone when
    /// nothing changed.
    fn put_dataset_staged(&self, meta: DatasetMeta, staged: &Path) -> Result<PutDataset, StoreError> {
        if let Some(same) = self.unchanged(&meta)? {
            return Ok(PutDataset::Unchanged(same));
        }
        let ready = self.files.adopt(&meta.id, staged)?;
        self.record_dataset(meta, ready)
    }

    fn dataset(&self, id: &str) -> Result<Option<DatasetMeta>, StoreError> {
        self.tree(DATASETS).get(id)?.map(|v| records::decode_dataset(&v)).transpose()
    }

    /// The file of a stored dataset, open for reading; `None` when the dataset is not stored.
    /// A delete after this returns does not cut the reading short. A record whose file is
    /// missing is [`StoreError::Corrupt`].
    fn dataset_reader(&self, id: &str) -> Result<Option<Box<dyn std::io::Read + Send>>, StoreError> {
        let _files = self.files.lock.lock().unwrap_or_else(|p| p.into_inner());
        if !self.tree(DATASETS).contains_key(id)? {
            return Ok(None);
        }
        self.files.open_file(id).map(|f| Some(Box::new(f) as Box<dyn std::io::Read + Send>))
    }

    /// The highest stored (not deleted) version under `name`.
    fn latest_dataset(&self, name: &str) -> Result<Option<DatasetMeta>, StoreError> {
        for id in self.name_ids(name)?.into_iter().rev() {
            if let Some(m) = self.dataset(&id)? {
                return Ok(Some(m));
            }
        }
        Ok(None)
    }

    /// Datasets newest first (by `created_at` descending, then id ascending), optionally only
    /// the versions of one name. `limit` is at least 1. The page token is the position after
    /// the last dataset returned; any string is a valid position.
    fn list_datasets(&self, name: Option<&str>, page_token: Option<&str>, limit: usize) -> Result<(Vec<DatasetMeta>, Option<String>), StoreError> {
        let mut all: Vec<(String, DatasetMeta)> = Vec::new();
        match name {
            Some(name) => {
                for id in self.name_ids(name)? {
                    if let Some(m) = self.dataset(&id)? {
                        all.push((dataset_position(&m), m));
                    }
                }
            }
            None => {
                for kv in self.tree(DATASETS).iter() {
                    let (_, v) = kv?;
                    let m = records::decode_dataset(&v)?;
                    all.push((dataset_position(&m), m));
                }
            }
        }
        all.sort_by(|a, b| a.0.cmp(&b.0));
        let after: Vec<(String, DatasetMeta)> = all.into_iter().filter(|(p, _)| page_token.is_none_or(|t| p.as_str() > t)).collect();
        Ok(page(after, limit, |(p, _)| p.clone(), |(_, m)| m))
    }

    /// Deletes a dataset unless a queued or running run uses it; checked and deleted in one
    /// transaction, so no run can be created for it in between.
    fn delete_dataset(&self, id: &str) -> Result<DeleteDataset, StoreError> {
        self.delete_dataset_and_file(id, false)
    }

    /// Deletes a dataset only when no stored run (of any state) used it, checked in the same
    /// transaction; `InUse` names no run then. For retention.
    fn delete_dataset_if_unused(&self, id: &str) -> Result<DeleteDataset, StoreError> {
        self.delete_dataset_and_file(id, true)
    }

    /// [`Storage::create_run`], except that a new run is refused ([`CreateRun::QueueFull`])
    /// when the caller found the queue full; an idempotent retry still gets its run.
    fn create_run_within(&self, run: Run, queue_full: bool) -> Result<CreateRun, StoreError> {
        debug_assert_eq!(run.state, RunState::Queued, "create_run takes a queued run");
        retrying(|| self.transact(|tx| tx.insert_run(&run, queue_full)))
    }

    /// The run an owner's idempotency key names, if any.
    fn run_by_idempotency(&self, owner: Option<&str>, key: &str) -> Result<Option<Run>, StoreError> {
        match self.tree(IDEMPOTENCY).get(keys::idempotency(owner, key))? {
            None => Ok(None),
            Some(id) => self.run(&String::from_utf8_lossy(&id)),
        }
    }

    /// How many queued runs `owner` started.
    fn queued_by(&self, owner: &str) -> Result<usize, StoreError> {
        let mut n = 0;
        for kv in self.tree(QUEUE).iter() {
            let (id, _) = kv?;
            if self.run(&String::from_utf8_lossy(&id))?.is_some_and(|r| r.state == RunState::Queued && r.owner.as_deref() == Some(owner)) {
                n += 1;
            }
        }
        Ok(n)
    }

    fn run(&self, id: &str) -> Result<Option<Run>, StoreError> {
        self.tree(RUNS).get(id)?.map(|v| self.decode_run(&v)).transpose()
    }

    /// Runs newest first (run ids are time-ordered), filtered. `limit` is at least 1. The page
    /// token is the id of the last run returned; the next page starts below it.
    fn list_runs(&self, filter: &RunFilter, page_token: Option<&str>, limit: usize) -> Result<(Vec<Run>, Option<String>), StoreError> {
        let limit = limit.max(1);
        let iter = match page_token {
            Some(t) => self.tree(RUNS).range(..t.as_bytes()),
            None => self.tree(RUNS).iter(),
        };
        let mut found = Vec::new();
        for kv in iter.rev() {
            let (_, v) = kv?;
            let run = self.decode_run(&v)?;
            if filter.admits(&run) {
                found.push(run);
                if found.len() > limit {
                    break;
                }
            }
        }
        Ok(page(found, limit, |r| r.id.clone(), |r| r))
    }

    /// [`Storage::claim_next`] when `fits` admits the oldest queued run; otherwise that run
    /// stays queued (first in line, so later runs do not overtake it).
    fn claim_next_within(&self, now: i64, fits: &dyn Fn(&Run) -> bool) -> Result<Claim, StoreError> {
        retrying(|| {
            let head = match self.tree(QUEUE).iter().next() {
                None => return Ok(Claim::Empty),
                Some(kv) => kv.map_err(|e| Abort::Store(e.into()))?.0,
            };
            self.transact(|tx| {
                let id = String::from_utf8_lossy(&head);
                if tx.get(QUEUE, &head)?.is_none() {
                    return stale();
                }
                let Some(mut run) = tx.run(&id)? else { return fail(StoreError::Corrupt(format!("queued run {id} has no run record"))) };
                if run.state != RunState::Queued {
                    return fail(StoreError::Corrupt(format!("queued run {id} is {}", run.state.as_str())));
                }
                if !fits(&run) {
                    return Ok(Claim::Waiting(run));
                }
                tx.remove(QUEUE, &head)?;
                run.start(now, 0, 0);
                tx.put_run(&run)?;
                Ok(Claim::Claimed(run))
            })
        })
    }

    /// Records the plan size of a running run; does nothing when the run is not running
    /// (it may have been cancelled while it was planned).
    fn set_plan_size(&self, run_id: &str, settings: u32, units_total: u32) -> Result<(), StoreError> {
        retrying(|| {
            self.transact(|tx| {
                if let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) {
                    run.settings = settings;
                    run.units_total = units_total;
                    tx.put_run(&run)?;
                }
                Ok(())
            })
        })
    }

    /// Runs left in state running (after a crash or shutdown), oldest first.
    fn running_runs(&self) -> Result<Vec<Run>, StoreError> {
        let mut out = Vec::new();
        for kv in self.tree(RUNS).iter() {
            let run = self.decode_run(&kv?.1)?;
            if run.state == RunState::Running {
                out.push(run);
            }
        }
        Ok(out)
    }

    /// Records a finished work unit of a running run and the (non-terminal) events it
    /// announces, in one transaction: stores the unit, bumps `units_done` (which a progress
    /// event then carries), numbers and stores each event, saves the run. Returns the stored events; none when the unit was already
    /// stored or the run is not running (nothing is stored then).
    fn record_unit(&self, run_id: &str, unit: &UnitResult, events: Vec<EventKind>, now: i64) -> Result<Vec<Event>, StoreError> {
        self.record_units(run_id, vec![(unit.clone(), events)], now)
    }

    /// The whole batch in one transaction, flushed once.
    fn record_units(&self, run_id: &str, batch: Vec<(UnitResult, Vec<EventKind>)>, now: i64) -> Result<Vec<Event>, StoreError> {
        let mut encoded = Vec::with_capacity(batch.len());
        for (unit, events) in &batch {
            let index = u32::try_from(unit.unit).map_err(|_| StoreError::Corrupt(format!("unit index {} does not fit a key", unit.unit)))?;
            encoded.push((keys::unit(run_id, index), records::encode_unit(unit), events));
        }
        retrying(|| {
            self.transact(|tx| {
                let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) else { return Ok(Vec::new()) };
                let (mut out, before) = (Vec::new(), run.units_done);
                for (key, bytes, events) in &encoded {
                    if tx.get(UNITS, key)?.is_some() {
                        continue;
                    }
                    tx.insert(UNITS, key, bytes.clone())?;
                    run.units_done += 1;
                    for kind in events.iter() {
                        let kind = announced(kind, run.units_done);
                        out.push(tx.append(&mut run, kind, now)?);
                    }
                }
                if run.units_done != before {
                    tx.put_progress(&run)?;
                }
                Ok(out)
            })
        })
    }

    /// The stored work units of a run, by unit index.
    fn units(&self, run_id: &str) -> Result<Vec<UnitResult>, StoreError> {
        let mut out = Vec::new();
        for kv in self.tree(UNITS).scan_prefix(run_id) {
            let (k, v) = kv?;
            if keys::belongs(run_id, 4, &k) {
                out.push(records::decode_unit(&v)?);
            }
        }
        Ok(out)
    }

    /// Running → finished: stores the outcome and the drift report, appends the finished
    /// event, sets `finished_at`; one transaction. `None` when the run is not running (it was cancelled
    /// or failed meanwhile, or is unknown): nothing is stored then.
    fn finish_run(&self, run_id: &str, outcome: &RunOutcome, drift: Option<DriftReport>, now: i64) -> Result<Option<Event>, StoreError> {
        let bytes = records::encode_outcome(outcome);
        retrying(|| {
            self.transact(|tx| {
                let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) else { return Ok(None) };
                tx.insert(RESULTS, run_id, bytes.clone())?;
                run.drift = drift.clone();
                let event = tx.append(&mut run, EventKind::Finished { picked: outcome.picked, best: outcome.best }, now)?;
                run.end(RunState::Finished, now, None);
                tx.put_run(&run)?;
                tx.release(&run.dataset_id, run_id)?;
                Ok(Some(event))
            })
        })
    }

    /// Queued or running → `state` (failed or cancelled) with a reason: takes a queued run
    /// off the queue, appends the failed or cancelled event; one transaction. `None` when the
    /// run is unknown or already terminal (so cancelling twice is harmless), or when `state`
    /// is neither failed nor cancelled.
    fn end_run(&self, run_id: &str, state: RunState, reason: &str, now: i64) -> Result<Option<(Run, Event)>, StoreError> {
        if !matches!(state, RunState::Failed | RunState::Cancelled) {
            debug_assert!(false, "end_run ends a run as failed or cancelled, not {}", state.as_str());
            return Ok(None);
        }
        retrying(|| {
            self.transact(|tx| {
                let Some(mut run) = tx.run(run_id)?.filter(|r| !r.state.is_terminal()) else { return Ok(None) };
                let event = tx.end(&mut run, state, reason, now)?;
                Ok(Some((run, event)))
            })
        })
    }

    /// A run left running by an earlier process, about to be executed again: counts a crash
    /// strike or clears them ([`Run::resume`]), and fails the run when it gives up; one
    /// transaction.
    fn resume(&self, run_id: &str, now: i64) -> Result<Resumed, StoreError> {
        retrying(|| {
            self.transact(|tx| {
                let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) else { return Ok(Resumed::NotRunning) };
                match run.resume() {
                    crate::job::Resume::Again => {
                        tx.put_run(&run)?;
                        Ok(Resumed::Again(run))
                    }
                    crate::job::Resume::GiveUp(reason) => {
                        tx.end(&mut run, RunState::Failed, &reason, now)?;
                        Ok(Resumed::GaveUp(reason))
                    }
                }
            })
        })
    }

    /// A running run stopped cleanly (shutdown): its next resume counts no crash strike.
    fn stopped_cleanly(&self, run_id: &str) -> Result<(), StoreError> {
        retrying(|| {
            self.transact(|tx| {
                if let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) {
                    run.units_at_start = None;
                    run.crash_strikes = 0;
                    tx.put_run(&run)?;
                }
                Ok(())
            })
        })
    }

    /// How many runs are queued.
    fn queued_count(&self) -> Result<usize, StoreError> {
        Ok(self.tree(QUEUE).len())
    }

    /// Appends a non-terminal event (progress) to a running run; one transaction. `None`
    /// when the run is not running (or the event is terminal: those belong to
    /// [`Storage::finish_run`] and [`Storage::end_run`]).
    fn append_event(&self, run_id: &str, kind: EventKind, now: i64) -> Result<Option<Event>, StoreError> {
        if matches!(kind, EventKind::Finished { .. } | EventKind::Failed(_) | EventKind::Cancelled(_)) {
            debug_assert!(false, "append_event takes non-terminal events");
            return Ok(None);
        }
        retrying(|| {
            self.transact(|tx| {
                let Some(mut run) = tx.run(run_id)?.filter(|r| r.state == RunState::Running) else { return Ok(None) };
                let event = tx.append(&mut run, kind.clone(), now)?;
                tx.put_progress(&run)?;
                Ok(Some(event))
            })
        })
    }

    /// Events with sequence > `after`, in order.
    fn events(&self, run_id: &str, after: u64) -> Result<Vec<Event>, StoreError> {
        let Some(first) = after.checked_add(1) else { return Ok(Vec::new()) };
        let mut out = Vec::new();
        for kv in self.tree(EVENTS).range(keys::event(run_id, first)..=keys::event(run_id, u64::MAX)) {
            let (k, v) = kv?;
            if keys::belongs(run_id, 8, &k) {
                out.push(records::decode_event(&v)?);
            }
        }
        Ok(out)
    }

    fn outcome(&self, run_id: &str) -> Result<Option<RunOutcome>, StoreError> {
        self.tree(RESULTS).get(run_id)?.map(|v| records::decode_outcome(&v)).transpose()
    }

    /// Deletes a terminal run with its events, units, outcome and idempotency entry. `false`
    /// when the run is unknown or not terminal.
    fn delete_run(&self, run_id: &str) -> Result<bool, StoreError> {
        // A terminal run gains no events or units, so keys scanned after seeing it terminal
        // are all of them.
        match self.run(run_id)? {
            Some(r) if r.state.is_terminal() => {}
            _ => return Ok(false),
        }
        let scan = |tree: usize, suffix: usize| -> Result<Vec<IVec>, StoreError> {
            let mut out = Vec::new();
            for kv in self.tree(tree).scan_prefix(run_id) {
                let (k, _) = kv?;
                if keys::belongs(run_id, suffix, &k) {
                    out.push(k);
                }
            }
            Ok(out)
        };
        let events = scan(EVENTS, 8)?;
        let units = scan(UNITS, 4)?;
        retrying(|| {
            self.transact(|tx| {
                let Some(run) = tx.run(run_id)?.filter(|r| r.state.is_terminal()) else { return Ok(false) };
                tx.remove(RUNS, run_id)?;
                tx.remove(PROGRESS, run_id)?;
                tx.remove(RESULTS, run_id)?;
                for k in events.iter() {
                    tx.remove(EVENTS, k)?;
                }
                for k in units.iter() {
                    tx.remove(UNITS, k)?;
                }
                if let Some(key) = &run.idempotency_key {
                    let idempotency = keys::idempotency(run.owner.as_deref(), key);
                    if tx.get(IDEMPOTENCY, &idempotency)?.is_some_and(|v| v == run_id.as_bytes()) {
                        tx.remove(IDEMPOTENCY, idempotency)?;
                    }
                }
                tx.add_ref(&run.dataset_id, -1)?;
                Ok(true)
            })
        })
    }

    // -------------------------------------------------------------------------------------
    // Schedules

    /// Stores a new schedule; `false` (nothing changed) when its id is taken.
    fn create_schedule(&self, schedule: &Schedule) -> Result<bool, StoreError> {
        retrying(|| {
            self.transact(|tx| {
                if tx.get(SCHEDULES, &schedule.id)?.is_some() {
                    return Ok(false);
                }
                tx.put_schedule(schedule)?;
                Ok(true)
            })
        })
    }

    fn schedule(&self, id: &str) -> Result<Option<Schedule>, StoreError> {
        self.tree(SCHEDULES).get(id)?.map(|v| records::decode_schedule(&v)).transpose()
    }

    /// Schedules newest first (ids are time-ordered); the page token is the last id returned.
    fn list_schedules(&self, page_token: Option<&str>, limit: usize) -> Result<(Vec<Schedule>, Option<String>), StoreError> {
        let iter = match page_token {
            Some(t) => self.tree(SCHEDULES).range(..t.as_bytes()),
            None => self.tree(SCHEDULES).iter(),
        };
        let mut found = Vec::new();
        for kv in iter.rev() {
            found.push(records::decode_schedule(&kv?.1)?);
            if found.len() > limit.max(1) {
                break;
            }
        }
        Ok(page(found, limit, |s| s.id.clone(), |s| s))
    }

    /// Every schedule, oldest first.
    fn all_schedules(&self) -> Result<Vec<Schedule>, StoreError> {
        self.tree(SCHEDULES).iter().map(|kv| records::decode_schedule(&kv?.1)).collect()
    }

    /// Changes a schedule in one transaction; `None` when it is unknown.
    fn update_schedule(&self, id: &str, change: &dyn Fn(&mut Schedule)) -> Result<Option<Schedule>, StoreError> {
        retrying(|| {
            self.transact(|tx| {
                let Some(mut s) = tx.schedule(id)? else { return Ok(None) };
                change(&mut s);
                tx.put_schedule(&s)?;
                Ok(Some(s))
            })
        })
    }

    /// Deletes a schedule and its fire records (its runs stay); `false` when unknown.
    fn delete_schedule(&self, id: &str) -> Result<bool, StoreError> {
        retrying(|| {
            let Some(seen) = self.schedule(id).map_err(Abort::Store)? else { return Ok(false) };
            let mut fire_keys = Vec::new();
            for kv in self.tree(FIRES).scan_prefix(id) {
                let (k, _) = kv.map_err(|e| Abort::Store(e.into()))?;
                if keys::belongs(id, 8, &k) {
                    fire_keys.push(k);
                }
            }
            self.transact(|tx| {
                let Some(s) = tx.schedule(id)? else { return Ok(false) };
                // A fire recorded after the scan would be left behind: scan again.
                if s.next_fire_sequence != seen.next_fire_sequence {
                    return stale();
                }
                tx.remove(SCHEDULES, id)?;
                for k in &fire_keys {
                    tx.remove(FIRES, k)?;
                }
                Ok(true)
            })
        })
    }

    /// Records one fire of a schedule in one transaction, with the run it starts:
    /// - `None` (nothing stored) when the schedule is unknown, paused, or its
    ///   `considered_until` is no longer `seen_considered` (another change came first);
    /// - with a run, it is queued unless the schedule's last run is still queued or running
    ///   (the fire becomes [`crate::job::FireOutcome::SkippedBusy`]) or the dataset is gone
    ///   ([`crate::job::FireOutcome::Failed`]); a run whose idempotency key is already stored is not
    ///   queued again.
    ///
    /// The fire gets its sequence number here, and `considered_until` becomes `considered`.
    /// Returns the schedule, the stored fire and the run created, if any.
    fn record_fire(&self, id: &str, seen_considered: i64, considered: i64, draft: &Fire, run: Option<&Run>) -> Result<Option<(Schedule, Fire, Option<Run>)>, StoreError> {
        retrying(|| {
            self.transact(|tx| {
                let Some(mut s) = tx.schedule(id)?.filter(|s| s.considered_until == seen_considered && !s.paused) else { return Ok(None) };
                let mut fire = draft.clone();
                let mut created = None;
                if let Some(run) = run {
                    let last = match &s.last_run_id {
                        Some(id) => tx.run(id)?,
                        None => None,
                    };
                    if let Some(busy) = last.filter(|r| r.state.is_active()) {
                        fire.skip_busy(busy);
                    } else {
                        created = fire_run(&mut s, &mut fire, run, tx.insert_run(run, false)?);
                    }
                }
                number_fire(&mut s, &mut fire, considered);
                tx.insert(FIRES, keys::fire(id, fire.sequence), records::encode_fire(&fire))?;
                tx.put_schedule(&s)?;
                Ok(Some((s, fire, created.clone())))
            })
        })
    }

    /// A schedule's fires newest first; the page token is the last sequence returned.
    fn fires(&self, id: &str, page_token: Option<u64>, limit: usize) -> Result<(Vec<Fire>, Option<String>), StoreError> {
        let upper = page_token.unwrap_or(u64::MAX);
        let mut found = Vec::new();
        for kv in self.tree(FIRES).range(keys::fire(id, 0)..keys::fire(id, upper)).rev() {
            let (k, v) = kv?;
            if keys::belongs(id, 8, &k) {
                found.push(records::decode_fire(&v)?);
                if found.len() > limit.max(1) {
                    break;
                }
            }
        }
        Ok(page(found, limit, |f| f.sequence.to_string(), |f| f))
    }
}

/// The error of a store whose lock another process (or a database still open) holds.
pub fn store_in_use(dir: &Path) -> StoreError {
    StoreError::Io(format!("the store at {} is in use by another process (is another `pollard serve` running on it?); stop that one or give another data directory", dir.display()))
}

/// Lays a stored progress record over a run.
fn with_progress(run: &mut Run, bytes: &[u8]) -> Result<(), StoreError> {
    let p = records::decode_progress(bytes)?;
    run.units_done = p.units_done;
    run.next_sequence = p.next_sequence;
    Ok(())
}

/// A stored big-endian u64 count.
fn count_of(v: &[u8]) -> Result<u64, StoreError> {
    <[u8; 8]>::try_from(v).map(u64::from_be_bytes).map_err(|_| StoreError::Corrupt(format!("a dataset reference count has {} bytes, not 8", v.len())))
}
