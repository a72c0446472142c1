//! [`PostgresStore`], the [`Storage`] backend on a PostgreSQL database that several pollard
//! processes (replicas) may share. The tables are in `migrations/` ([`migrate`]); each
//! `record` column holds the bytes of [`records`], the one encoding both backends share.
//!
//! Consistency: every change is one transaction (READ COMMITTED) that first locks the rows
//! it changes (`SELECT … FOR UPDATE`): a run's row serialises every change of that run
//! (units, events, ends), a schedule's row every fire of that schedule; datasets are locked
//! `FOR SHARE` by a run's creation and `FOR UPDATE` by their deletion, so a run is never
//! created for a dataset being deleted. Uploads to one name (and of one id) take an advisory
//! lock, so versions under a name are given once. The queue is claimed with
//! `FOR UPDATE SKIP LOCKED`: two replicas never claim one run, nor wait for each other. A
//! transaction that loses a race (a unique key taken meanwhile, a serialisation failure, a
//! deadlock) is rolled back and run again from the start, as the sled backend starts over
//! when what it scanned went stale. Committed means durable (the server's own settings
//! decide how: `synchronous_commit`).
//!
//! Bridge: [`Storage`] is synchronous and is called from tokio tasks and rayon threads
//! alike. The store owns a small tokio runtime that drives the connections (deadpool keeps
//! them; each one's I/O task runs there); a call enters that runtime's context and waits on
//! its transaction with `futures_executor::block_on`, which parks the calling thread and
//! never starts a runtime of its own (a tokio `block_on` would panic inside the server's
//! runtime). A caller thus blocks for its round trips, as it blocks for sled's disk writes.
//! Calls fail with [`StoreError::Unavailable`] within [`CONNECT_TIMEOUT`] +
//! [`POOL_WAIT`] while the database cannot be reached, rather than hang.
//!
//! Dataset bytes are stored in 1 MiB chunks in the same transaction as the dataset's
//! record; a reader gets them copied into an unlinked temporary file (read in one snapshot),
//! so a delete after it was handed out does not cut the reading short.

pub mod migrate;

use std::future::Future;
use std::io::{Read, Seek, Write};
use std::path::{Path, PathBuf};
use std::time::Duration;

use deadpool_postgres::{Manager, ManagerConfig, Pool, RecyclingMethod, Runtime, Transaction};
use tokio_postgres::error::SqlState;
use tokio_postgres::types::ToSql;
use tokio_postgres::config::SslMode;
use tokio_postgres::{NoTls, Row};
use tokio_postgres_rustls::MakeRustlsConnect;

use super::paging::{dataset_position, page};
use super::{announced, fire_run, keys, number_fire, records, same_version, Change, Claim, CreateRun, DeleteDataset, PutDataset, Recorded, Resumed, RunFilter, Storage, StoreError, UnitLog, CHUNK_BYTES};
use crate::drift::DriftReport;
use crate::job::{DatasetMeta, Event, EventKind, Fire, Run, RunOutcome, RunState, Schedule};
use crate::sweep::UnitResult;

/// How long a new connection may take before the call fails as unavailable.
pub const CONNECT_TIMEOUT: Duration = Duration::from_secs(5);
/// How long a call waits for a free connection of the pool.
pub const POOL_WAIT: Duration = Duration::from_secs(10);
/// How long a run's lease lasts without renewal, unless configured (`lease_secs`).
pub const DEFAULT_LEASE: Duration = Duration::from_secs(15);
/// The channel of change notifications (payload: a run id).
const CHANGES: &str = "pollard_changes";
/// The database's clock in milliseconds since the epoch: leases never depend on the
/// replicas' clocks agreeing.
const DB_NOW_MS: &str = "(extract(epoch from clock_timestamp()) * 1000)::bigint";
/// Connections per process.
const POOL_SIZE: usize = 16;
/// Times a transaction that lost a race is run again before the loss is an error.
const RETRIES: usize = 20;
/// Runs read per query while a listing filters them.
const LIST_BATCH: i64 = 256;

/// The PostgreSQL backend. Cloning is cheap: clones share the pool and the runtime.
#[derive(Clone)]
pub struct PostgresStore {
    inner: std::sync::Arc<Inner>,
}

struct Inner {
    /// Drives the connections; shut down in the background on drop (a store may be dropped
    /// inside the server's runtime, where waiting is not allowed).
    rt: Option<tokio::runtime::Runtime>,
    pool: Pool,
    /// A local folder for uploads still arriving (see [`Storage::staging_dir`]).
    staging: PathBuf,
    /// Who computes units here: recorded with each unit this process stores.
    worker: String,
    /// The database's host, port and name, for the log.
    place: String,
    /// How long a run's lease lasts without renewal, in milliseconds.
    lease_ms: i64,
    /// The connection settings (the change watcher connects on its own).
    config: tokio_postgres::Config,
    /// TLS to the database, when the URL asks for it.
    tls: Option<MakeRustlsConnect>,
}

/// The TLS connector a URL asks for: none unless `sslmode=require`, which needs the PEM file
/// of the certificate authority that signed the database's certificate (`ca_file`); the
/// certificate and the host name are then verified.
fn tls_for(config: &tokio_postgres::Config, ca_file: Option<&Path>) -> Result<Option<MakeRustlsConnect>, StoreError> {
    match (config.get_ssl_mode(), ca_file) {
        (SslMode::Require, Some(ca)) => {
            let mut roots = tokio_rustls::rustls::RootCertStore::empty();
            for cert in crate::access::tls::certs(&ca.to_path_buf()).map_err(StoreError::Io)? {
                roots.add(cert).map_err(|e| StoreError::Io(format!("{}: {e}", ca.display())))?;
            }
            let provider = std::sync::Arc::new(tokio_rustls::rustls::crypto::ring::default_provider());
            let tls = tokio_rustls::rustls::ClientConfig::builder_with_provider(provider)
                .with_safe_default_protocol_versions()
                .map_err(|e| StoreError::Io(format!("TLS to the database: {e}")))?
                .with_root_certificates(roots)
                .with_no_client_auth();
            Ok(Some(MakeRustlsConnect::new(tls)))
        }
        (SslMode::Require, None) => Err(StoreError::Io("database_url asks for TLS (sslmode=require): set database_ca_file to the PEM file of the certificate authority that signed the database's certificate".into())),
        (_, Some(_)) => Err(StoreError::Io("database_ca_file is set but database_url does not ask for TLS: add sslmode=require to it".into())),
        (_, None) => Ok(None),
    }
}

/// Listens for change notifications on one connection until it fails.
async fn listen<T>(config: &tokio_postgres::Config, tls: T, wake: &(dyn Fn(Change) + Send + Sync)) -> String
where
    T: tokio_postgres::tls::MakeTlsConnect<tokio_postgres::Socket>,
    T::Stream: Send + 'static,
{
    let (client, mut connection) = match config.connect(tls).await {
        Ok(c) => c,
        Err(e) => return format!("cannot listen for changes: {e}"),
    };
    let listening = async {
        client.batch_execute(&format!("LISTEN {CHANGES}")).await?;
        // Changes made while no one listened: look once.
        wake(Change::Runs);
        wake(Change::Schedules);
        std::future::pending::<()>().await;
        Ok::<(), tokio_postgres::Error>(())
    };
    let messages = async {
        while let Some(m) = std::future::poll_fn(|cx| connection.poll_message(cx)).await {
            match m {
                Ok(tokio_postgres::AsyncMessage::Notification(n)) if n.payload().starts_with(SCHEDULE_CHANGE) => wake(Change::Schedules),
                Ok(tokio_postgres::AsyncMessage::Notification(_)) => wake(Change::Runs),
                Ok(_) => {}
                Err(e) => return e.to_string(),
            }
        }
        "the connection closed".to_string()
    };
    tokio::select! {
        r = listening => match r {
            Err(e) => format!("listening for changes failed: {e}"),
            Ok(()) => "listening for changes ended".to_string(),
        },
        e = messages => format!("the change notifications stopped: {e}"),
    }
}

impl Drop for Inner {
    fn drop(&mut self) {
        if let Some(rt) = self.rt.take() {
            rt.shutdown_background();
        }
        let _ = std::fs::remove_dir_all(&self.staging);
    }
}

/// Why a transaction stopped: the database's error (perhaps a lost race, run again), or the
/// store's own.
pub(super) enum Fail {
    Db(tokio_postgres::Error),
    Store(StoreError),
}

impl From<tokio_postgres::Error> for Fail {
    fn from(e: tokio_postgres::Error) -> Self {
        Fail::Db(e)
    }
}

impl From<StoreError> for Fail {
    fn from(e: StoreError) -> Self {
        Fail::Store(e)
    }
}

impl Fail {
    /// A race lost to another transaction: running it again may succeed.
    fn retryable(&self) -> bool {
        let Fail::Db(e) = self else { return false };
        [SqlState::T_R_SERIALIZATION_FAILURE, SqlState::T_R_DEADLOCK_DETECTED, SqlState::UNIQUE_VIOLATION].iter().any(|c| e.code() == Some(c))
    }

    pub(super) fn into_store(self) -> StoreError {
        match self {
            Fail::Db(e) => db(e),
            Fail::Store(e) => e,
        }
    }
}

/// A database error as the store reports it: the server's own errors are I/O errors of the
/// store; everything else (no connection, a timeout, a closed socket) means unreachable.
pub(super) fn db(e: tokio_postgres::Error) -> StoreError {
    match e.as_db_error() {
        Some(d) => StoreError::Io(format!("database: {} ({})", d.message(), d.code().code())),
        None if e.to_string().starts_with("error deserializing") => StoreError::Corrupt(format!("database: {e}")),
        None => StoreError::Unavailable(format!("the database cannot be reached: {e}")),
    }
}

type Tx<'a> = Transaction<'a>;
type Params<'a> = &'a [&'a (dyn ToSql + Sync)];

async fn query(tx: &Tx<'_>, sql: &str, params: Params<'_>) -> Result<Vec<Row>, Fail> {
    let st = tx.prepare_cached(sql).await?;
    Ok(tx.query(&st, params).await?)
}

async fn query_opt(tx: &Tx<'_>, sql: &str, params: Params<'_>) -> Result<Option<Row>, Fail> {
    let st = tx.prepare_cached(sql).await?;
    Ok(tx.query_opt(&st, params).await?)
}

async fn execute(tx: &Tx<'_>, sql: &str, params: Params<'_>) -> Result<u64, Fail> {
    let st = tx.prepare_cached(sql).await?;
    Ok(tx.execute(&st, params).await?)
}

fn seq(n: u64) -> Result<i64, Fail> {
    i64::try_from(n).map_err(|_| Fail::Store(StoreError::Corrupt(format!("sequence number {n} does not fit the database"))))
}

/// The `record` column (first) of each row, decoded.
fn decoded<T>(rows: &[Row], decode: fn(&[u8]) -> Result<T, StoreError>) -> Result<Vec<T>, Fail> {
    rows.iter().map(|r| decode(r.get::<_, &[u8]>(0)).map_err(Fail::Store)).collect()
}

// -----------------------------------------------------------------------------------------
// Changes inside one transaction

async fn run_of(tx: &Tx<'_>, id: &str, lock: bool) -> Result<Option<Run>, Fail> {
    let sql = if lock { "SELECT record FROM runs WHERE id = $1 FOR UPDATE" } else { "SELECT record FROM runs WHERE id = $1" };
    match query_opt(tx, sql, &[&id]).await? {
        None => Ok(None),
        Some(row) => Ok(Some(records::decode_run(row.get(0))?)),
    }
}

/// Rewrites a stored run (its state column and record).
async fn put_run(tx: &Tx<'_>, run: &Run) -> Result<(), Fail> {
    execute(tx, "UPDATE runs SET state = $2, record = $3 WHERE id = $1", &[&run.id, &run.state.as_str(), &records::encode_run(run)]).await?;
    Ok(())
}

/// Numbers and stores an event of `run` (which the caller saves afterwards); its time never
/// falls before the run's previous event (a clock stepped back).
async fn append(tx: &Tx<'_>, run: &mut Run, kind: EventKind, now: i64) -> Result<Event, Fail> {
    let sequence = run.take_sequence();
    let previous = match sequence.checked_sub(1).filter(|&s| s > 0) {
        Some(s) => query_opt(tx, "SELECT at FROM events WHERE run_id = $1 AND sequence = $2", &[&run.id, &seq(s)?]).await?.map(|r| r.get::<_, i64>(0)),
        None => None,
    };
    let event = Event { sequence, at: previous.map_or(now, |p| p.max(now)), kind };
    execute(tx, "INSERT INTO events (run_id, sequence, at, record) VALUES ($1, $2, $3, $4)", &[&run.id, &seq(sequence)?, &event.at, &records::encode_event(&event)]).await?;
    Ok(event)
}

/// The payload of a schedule's change (a run's is its id).
const SCHEDULE_CHANGE: &str = "schedule:";

/// Tells every replica's scheduler, at commit, that schedule `id` changed.
async fn notify_schedule(tx: &Tx<'_>, id: &str) -> Result<(), Fail> {
    execute(tx, "SELECT pg_notify($1, $2)", &[&CHANGES, &format!("{SCHEDULE_CHANGE}{id}")]).await?;
    Ok(())
}

/// Tells every replica's followers and workers, at commit, that `run_id` changed.
async fn notify(tx: &Tx<'_>, run_id: &str) -> Result<(), Fail> {
    execute(tx, "SELECT pg_notify($1, $2)", &[&CHANGES, &run_id]).await?;
    Ok(())
}

/// Leases a running run to `owner` for `lease_ms` from now (by the database's clock).
async fn lease(tx: &Tx<'_>, run_id: &str, owner: &str, lease_ms: i64) -> Result<(), Fail> {
    let sql = format!("UPDATE runs SET lease_owner = $2, lease_expires = {DB_NOW_MS} + $3 WHERE id = $1");
    execute(tx, &sql, &[&run_id, &owner, &lease_ms]).await?;
    Ok(())
}

/// A queued or running run → failed or cancelled, with its event; returns the event.
async fn end(tx: &Tx<'_>, run: &mut Run, state: RunState, reason: &str, now: i64) -> Result<Event, Fail> {
    let kind = if state == RunState::Cancelled { EventKind::Cancelled(reason.to_string()) } else { EventKind::Failed(reason.to_string()) };
    let event = append(tx, run, kind, now).await?;
    run.end(state, now, Some(reason));
    put_run(tx, run).await?;
    drop_claims(tx, &run.id).await?;
    notify(tx, &run.id).await?;
    Ok(event)
}

/// An ended run's units are no longer claimed.
async fn drop_claims(tx: &Tx<'_>, run_id: &str) -> Result<(), Fail> {
    execute(tx, "DELETE FROM unit_claims WHERE run_id = $1", &[&run_id]).await?;
    Ok(())
}

/// The index of a work unit as the database keeps it.
fn unit_index(unit: usize) -> Result<i64, StoreError> {
    i64::try_from(unit).map_err(|_| StoreError::Corrupt(format!("unit index {unit} does not fit the database")))
}

/// Stores one computed unit of a locked running `run` unless it is stored already (a second
/// writer is refused by the key, and its work discarded); releases its claim. Whether it
/// was stored (then `run.units_done` counts it).
async fn store_unit(tx: &Tx<'_>, run: &mut Run, index: i64, worker: &str, bytes: &[u8]) -> Result<bool, Fail> {
    execute(tx, "DELETE FROM unit_claims WHERE run_id = $1 AND unit = $2", &[&run.id, &index]).await?;
    let order = i64::from(run.units_done) + 1;
    let stored = execute(tx, "INSERT INTO units (run_id, unit, worker, stored_seq, record) VALUES ($1, $2, $3, $4, $5) ON CONFLICT DO NOTHING", &[&run.id, &index, &worker, &order, &bytes]).await?;
    if stored == 1 {
        run.units_done += 1;
    }
    Ok(stored == 1)
}

/// Stores a queued run unless its idempotency key or id names a stored run (returned) or
/// its dataset is not stored (the dataset row is locked against deletion meanwhile).
async fn insert_run(tx: &Tx<'_>, run: &Run, queue_full: bool) -> Result<CreateRun, Fail> {
    let idempotency = run.idempotency_key.as_deref().map(|key| keys::idempotency(run.owner.as_deref(), key));
    if let Some(idempotency) = &idempotency {
        if let Some(row) = query_opt(tx, "SELECT run_id FROM idempotency_keys WHERE key = $1", &[idempotency]).await? {
            if let Some(existing) = run_of(tx, row.get(0), false).await? {
                return Ok(CreateRun::Existing(existing));
            }
        }
    }
    if let Some(existing) = run_of(tx, &run.id, false).await? {
        return Ok(CreateRun::Existing(existing));
    }
    if queue_full {
        return Ok(CreateRun::QueueFull);
    }
    if query_opt(tx, "SELECT 1 FROM datasets WHERE id = $1 FOR SHARE", &[&run.dataset_id]).await?.is_none() {
        return Ok(CreateRun::DatasetMissing);
    }
    execute(tx, "INSERT INTO runs (id, state, dataset_id, owner, record) VALUES ($1, $2, $3, $4, $5)", &[&run.id, &run.state.as_str(), &run.dataset_id, &run.owner, &records::encode_run(run)]).await?;
    if let Some(idempotency) = &idempotency {
        execute(tx, "INSERT INTO idempotency_keys (key, run_id) VALUES ($1, $2)", &[idempotency, &run.id]).await?;
    }
    notify(tx, &run.id).await?;
    Ok(CreateRun::Created(run.clone()))
}

async fn delete_dataset(tx: &Tx<'_>, id: &str, only_unused: bool) -> Result<DeleteDataset, Fail> {
    let Some(row) = query_opt(tx, "SELECT name, version FROM datasets WHERE id = $1 FOR UPDATE", &[&id]).await? else { return Ok(DeleteDataset::NotFound) };
    let (name, version): (String, i64) = (row.get(0), row.get(1));
    if let Some(r) = query_opt(tx, "SELECT id FROM runs WHERE dataset_id = $1 AND state IN ('queued', 'running') ORDER BY id LIMIT 1", &[&id]).await? {
        return Ok(DeleteDataset::InUse { run_id: r.get(0) });
    }
    if only_unused && query_opt(tx, "SELECT 1 FROM runs WHERE dataset_id = $1 LIMIT 1", &[&id]).await?.is_some() {
        return Ok(DeleteDataset::InUse { run_id: String::new() });
    }
    execute(tx, "DELETE FROM datasets WHERE id = $1", &[&id]).await?;
    execute(tx, "UPDATE dataset_versions SET dataset_id = NULL WHERE name = $1 AND version = $2 AND dataset_id = $3", &[&name, &version, &id]).await?;
    Ok(DeleteDataset::Deleted)
}

async fn schedule_of(tx: &Tx<'_>, id: &str, lock: bool) -> Result<Option<Schedule>, Fail> {
    let sql = if lock { "SELECT record FROM schedules WHERE id = $1 FOR UPDATE" } else { "SELECT record FROM schedules WHERE id = $1" };
    match query_opt(tx, sql, &[&id]).await? {
        None => Ok(None),
        Some(row) => Ok(Some(records::decode_schedule(row.get(0))?)),
    }
}

async fn put_schedule(tx: &Tx<'_>, s: &Schedule) -> Result<(), Fail> {
    execute(tx, "UPDATE schedules SET record = $2 WHERE id = $1", &[&s.id, &records::encode_schedule(s)]).await?;
    notify_schedule(tx, &s.id).await
}

/// Where a dataset's bytes come from: opened once per attempt of the transaction.
type Source<'a> = &'a mut dyn FnMut() -> Result<Box<dyn Read + 'a>, StoreError>;

impl PostgresStore {
    /// Connects to the database at `url` (a `postgres://` URL), and brings its schema up to
    /// date ([`migrate`]). Fails as [`StoreError::Unavailable`] when the database cannot be
    /// reached.
    pub fn open(url: &str) -> Result<PostgresStore, StoreError> {
        PostgresStore::open_with_lease(url, DEFAULT_LEASE)
    }

    /// [`PostgresStore::open`] with runs leased for `lease` at a time (see
    /// [`Storage::renew_leases`]).
    pub fn open_with_lease(url: &str, lease: Duration) -> Result<PostgresStore, StoreError> {
        PostgresStore::open_with(url, lease, None)
    }

    /// [`PostgresStore::open_with_lease`], over TLS when the URL says `sslmode=require`,
    /// trusting the certificate authority in the PEM file `ca_file`.
    pub fn open_with(url: &str, lease: Duration, ca_file: Option<&Path>) -> Result<PostgresStore, StoreError> {
        let mut config: tokio_postgres::Config = url.parse().map_err(|e| StoreError::Io(format!("database_url does not parse: {e}")))?;
        let tls = tls_for(&config, ca_file)?;
        config.connect_timeout(CONNECT_TIMEOUT).keepalives(true).keepalives_idle(Duration::from_secs(30)).application_name("pollard");
        let rt = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(2)
            .thread_name("pollard-store")
            .enable_all()
            .build()
            .map_err(|e| StoreError::Io(format!("cannot start the store's runtime: {e}")))?;
        let manager_config = ManagerConfig { recycling_method: RecyclingMethod::Fast };
        let manager = match &tls {
            Some(tls) => Manager::from_config(config.clone(), tls.clone(), manager_config),
            None => Manager::from_config(config.clone(), NoTls, manager_config),
        };
        let pool = Pool::builder(manager)
            .max_size(POOL_SIZE)
            .runtime(Runtime::Tokio1)
            .wait_timeout(Some(POOL_WAIT))
            .create_timeout(Some(CONNECT_TIMEOUT))
            .recycle_timeout(Some(CONNECT_TIMEOUT))
            .build()
            .map_err(|e| StoreError::Io(format!("cannot make the connection pool: {e}")))?;
        let staging = std::env::temp_dir().join(format!("pollard-uploads-{}", uuid::Uuid::now_v7().simple()));
        std::fs::create_dir_all(&staging).map_err(|e| StoreError::Io(format!("cannot create the upload folder {}: {e}", staging.display())))?;
        let host = std::fs::read_to_string("/proc/sys/kernel/hostname").map(|h| h.trim().to_string()).unwrap_or_default();
        // One store per process in a server; a test holding several stores (several
        // replicas in one process) tells them apart by a suffix.
        static OPENED: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let worker = match OPENED.fetch_add(1, std::sync::atomic::Ordering::Relaxed) {
            0 => format!("{host}:{}", std::process::id()),
            n => format!("{host}:{}.{n}", std::process::id()),
        };
        let hosts: Vec<String> = config.get_hosts().iter().map(|h| match h {
            tokio_postgres::config::Host::Tcp(name) => name.clone(),
            tokio_postgres::config::Host::Unix(path) => path.display().to_string(),
        }).collect();
        let place = format!("{}:{}/{}", hosts.join(","), config.get_ports().first().copied().unwrap_or(5432), config.get_dbname().unwrap_or(""));
        let store = PostgresStore { inner: std::sync::Arc::new(Inner { rt: Some(rt), pool, staging, worker, place, lease_ms: lease.as_millis().min(i64::MAX as u128) as i64, config, tls }) };
        store.block(async {
            let mut client = store.inner.pool.get().await.map_err(unreachable)?;
            migrate::migrate(&mut client).await
        })?;
        Ok(store)
    }

    /// The name this process records as the worker of the units it stores.
    pub fn worker(&self) -> &str {
        &self.inner.worker
    }

    /// Whether the database answers now (for health checks).
    pub fn ping(&self) -> Result<(), StoreError> {
        self.block(async {
            let client = self.inner.pool.get().await.map_err(unreachable)?;
            client.simple_query("SELECT 1").await.map_err(db)?;
            Ok(())
        })
    }

    /// Waits for `f` on this thread, with the store's runtime as the context of what it starts.
    fn block<F: Future>(&self, f: F) -> F::Output {
        let _context = self.inner.rt.as_ref().expect("the runtime lives as long as the store").enter();
        futures_executor::block_on(f)
    }

    /// Runs `body` in one transaction, again from the start when it lost a race.
    fn transact<A>(&self, mut body: impl AsyncFnMut(&Tx<'_>) -> Result<A, Fail>) -> Result<A, StoreError> {
        self.block(async {
            let mut attempt = 0;
            loop {
                attempt += 1;
                let mut client = self.inner.pool.get().await.map_err(unreachable)?;
                let result = async {
                    let tx = client.transaction().await?;
                    let a = body(&tx).await?;
                    tx.commit().await?;
                    Ok::<A, Fail>(a)
                }
                .await;
                match result {
                    Ok(a) => return Ok(a),
                    Err(f) if f.retryable() && attempt < RETRIES => continue,
                    Err(f) => return Err(f.into_store()),
                }
            }
        })
    }

    /// One read-only statement, outside any change.
    fn read(&self, sql: &str, params: Params<'_>) -> Result<Vec<Row>, StoreError> {
        self.block(async {
            let client = self.inner.pool.get().await.map_err(unreachable)?;
            let st = client.prepare_cached(sql).await.map_err(db)?;
            client.query(&st, params).await.map_err(db)
        })
    }

    fn read_records<T>(&self, sql: &str, params: Params<'_>, decode: fn(&[u8]) -> Result<T, StoreError>) -> Result<Vec<T>, StoreError> {
        decoded(&self.read(sql, params)?, decode).map_err(Fail::into_store)
    }

    fn read_record<T>(&self, sql: &str, params: Params<'_>, decode: fn(&[u8]) -> Result<T, StoreError>) -> Result<Option<T>, StoreError> {
        Ok(self.read_records(sql, params, decode)?.into_iter().next())
    }

    /// Stores a dataset with its bytes in one transaction (see [`Storage::put_dataset`]).
    fn put(&self, meta: DatasetMeta, source: Source<'_>) -> Result<PutDataset, StoreError> {
        self.transact(async |tx| {
            // One upload of an id, and one new version of a name, at a time.
            execute(tx, "SELECT pg_advisory_xact_lock(hashtextextended('pollard.dataset:' || $1, 0))", &[&meta.id]).await?;
            if !meta.name.is_empty() {
                execute(tx, "SELECT pg_advisory_xact_lock(hashtextextended('pollard.name:' || $1, 0))", &[&meta.name]).await?;
            }
            if let Some(row) = query_opt(tx, "SELECT record FROM datasets WHERE id = $1", &[&meta.id]).await? {
                return Ok(PutDataset::Unchanged(records::decode_dataset(row.get(0))?));
            }
            let latest: i64 = if meta.name.is_empty() {
                0
            } else {
                query(tx, "SELECT coalesce(max(version), 0) FROM dataset_versions WHERE name = $1", &[&meta.name]).await?[0].get(0)
            };
            if latest > 0 {
                let newest = query_opt(tx, "SELECT d.record FROM dataset_versions v JOIN datasets d ON d.id = v.dataset_id WHERE v.name = $1 AND v.version = $2", &[&meta.name, &latest]).await?;
                if let Some(row) = newest {
                    let newest = records::decode_dataset(row.get(0))?;
                    if same_version(&newest, &meta) {
                        return Ok(PutDataset::Unchanged(newest));
                    }
                }
            }
            let mut m = meta.clone();
            m.version = u32::try_from(latest + 1).map_err(|_| StoreError::Corrupt(format!("dataset '{}' has {latest} versions", m.name)))?;
            execute(tx, "INSERT INTO datasets (id, name, version, created_at, record) VALUES ($1, $2, $3, $4, $5)", &[&m.id, &m.name, &i64::from(m.version), &m.created_at, &records::encode_dataset(&m)]).await?;
            if !m.name.is_empty() {
                execute(tx, "INSERT INTO dataset_versions (name, version, dataset_id) VALUES ($1, $2, $3)", &[&m.name, &i64::from(m.version), &m.id]).await?;
            }
            let mut reader = source()?;
            let mut buf = vec![0u8; CHUNK_BYTES];
            for index in 0i32.. {
                let n = fill(&mut *reader, &mut buf).map_err(|e| StoreError::Io(format!("reading the bytes of dataset {}: {e}", m.id)))?;
                if n == 0 {
                    break;
                }
                execute(tx, "INSERT INTO dataset_chunks (dataset_id, index, bytes) VALUES ($1, $2, $3)", &[&m.id, &index, &&buf[..n]]).await?;
                if n < buf.len() {
                    break;
                }
            }
            Ok(PutDataset::Created(m))
        })
    }

    /// Copies a dataset's chunks, read in one snapshot, into an unlinked temporary file.
    fn spool(&self, id: &str) -> Result<Option<std::fs::File>, StoreError> {
        let path = self.inner.staging.join(format!("read-{}", uuid::Uuid::now_v7().simple()));
        let mut file = std::fs::OpenOptions::new().read(true).write(true).create_new(true).open(&path).map_err(|e| StoreError::Io(format!("{}: {e}", path.display())))?;
        let _ = std::fs::remove_file(&path);
        let found = self.block(async {
            let mut client = self.inner.pool.get().await.map_err(unreachable)?;
            let copy = async {
                let tx = client.build_transaction().isolation_level(tokio_postgres::IsolationLevel::RepeatableRead).read_only(true).start().await?;
                if query_opt(&tx, "SELECT 1 FROM datasets WHERE id = $1", &[&id]).await?.is_none() {
                    return Ok(false);
                }
                for index in 0i32.. {
                    let Some(row) = query_opt(&tx, "SELECT bytes FROM dataset_chunks WHERE dataset_id = $1 AND index = $2", &[&id, &index]).await? else { break };
                    file.write_all(row.get::<_, &[u8]>(0)).map_err(|e| StoreError::Io(format!("copying the bytes of dataset {id}: {e}")))?;
                }
                tx.commit().await?;
                Ok::<bool, Fail>(true)
            };
            copy.await.map_err(Fail::into_store)
        })?;
        if !found {
            return Ok(None);
        }
        file.rewind().map_err(|e| StoreError::Io(e.to_string()))?;
        Ok(Some(file))
    }
}

/// Reads until `buf` is full or the input ends; the bytes read.
fn fill(r: &mut dyn Read, buf: &mut [u8]) -> std::io::Result<usize> {
    let mut n = 0;
    while n < buf.len() {
        match r.read(&mut buf[n..]) {
            Ok(0) => break,
            Ok(k) => n += k,
            Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
            Err(e) => return Err(e),
        }
    }
    Ok(n)
}

fn unreachable(e: deadpool_postgres::PoolError) -> StoreError {
    match e {
        deadpool_postgres::PoolError::Backend(e) => db(e),
        other => StoreError::Unavailable(format!("the database cannot be reached: {other}")),
    }
}

impl Storage for PostgresStore {
    fn staging_dir(&self) -> &Path {
        &self.inner.staging
    }

    fn check(&self) -> Result<(), StoreError> {
        self.ping()
    }

    fn describe(&self) -> String {
        format!("postgres at {}", self.inner.place)
    }

    fn shared(&self) -> bool {
        true
    }

    fn renew_leases(&self) -> Result<(), StoreError> {
        let runs = format!("UPDATE runs SET lease_expires = {DB_NOW_MS} + $2 WHERE state = 'running' AND lease_owner = $1");
        let units = format!("UPDATE unit_claims SET expires_at = {DB_NOW_MS} + $2 WHERE owner = $1");
        self.transact(async |tx| {
            execute(tx, &runs, &[&self.inner.worker, &self.inner.lease_ms]).await?;
            execute(tx, &units, &[&self.inner.worker, &self.inner.lease_ms]).await?;
            Ok(())
        })
    }

    fn take_abandoned(&self) -> Result<Vec<Run>, StoreError> {
        let sql = format!("SELECT record FROM runs WHERE state = 'running' AND (lease_expires IS NULL OR lease_expires < {DB_NOW_MS}) ORDER BY id FOR UPDATE SKIP LOCKED");
        self.transact(async |tx| {
            let runs = decoded(&query(tx, &sql, &[]).await?, records::decode_run)?;
            for run in &runs {
                lease(tx, &run.id, &self.inner.worker, self.inner.lease_ms).await?;
            }
            Ok(runs)
        })
    }

    fn watch_changes(&self, wake: std::sync::Arc<dyn Fn(Change) + Send + Sync>) {
        let config = self.inner.config.clone();
        let tls = self.inner.tls.clone();
        let rt = self.inner.rt.as_ref().expect("the runtime lives as long as the store");
        rt.spawn(async move {
            loop {
                let why = match &tls {
                    Some(tls) => listen(&config, tls.clone(), wake.as_ref()).await,
                    None => listen(&config, NoTls, wake.as_ref()).await,
                };
                tracing::warn!(error = %why, "listening for changes again");
                // Followers poll meanwhile (the safety net), so nothing is lost while away.
                tokio::time::sleep(Duration::from_secs(1)).await;
            }
        });
    }

    /// Every change is committed before it returns: nothing to write out.
    fn flush(&self) -> Result<(), StoreError> {
        Ok(())
    }

    fn put_dataset_from(&self, meta: DatasetMeta, bytes: &mut dyn Read) -> Result<PutDataset, StoreError> {
        // A stream can be read once: a transaction that lost a race after reading it fails.
        let mut bytes = Some(bytes);
        self.put(meta, &mut || bytes.take().map(|b| Box::new(b) as Box<dyn Read>).ok_or_else(|| StoreError::Io("the upload met a concurrent change after its bytes were read; send it again".into())))
    }

    /// The staged file is read (again, if a race made the transaction start over); the
    /// caller removes it.
    fn put_dataset_staged(&self, meta: DatasetMeta, staged: &Path) -> Result<PutDataset, StoreError> {
        self.put(meta, &mut || {
            let f = std::fs::File::open(staged).map_err(|e| StoreError::Io(format!("staged upload {}: {e}", staged.display())))?;
            Ok(Box::new(std::io::BufReader::new(f)) as Box<dyn Read>)
        })
    }

    fn dataset(&self, id: &str) -> Result<Option<DatasetMeta>, StoreError> {
        self.read_record("SELECT record FROM datasets WHERE id = $1", &[&id], records::decode_dataset)
    }

    fn dataset_reader(&self, id: &str) -> Result<Option<Box<dyn Read + Send>>, StoreError> {
        Ok(self.spool(id)?.map(|f| Box::new(std::io::BufReader::new(f)) as Box<dyn Read + Send>))
    }

    fn latest_dataset(&self, name: &str) -> Result<Option<DatasetMeta>, StoreError> {
        self.read_record("SELECT record FROM datasets WHERE name = $1 AND name <> '' ORDER BY version DESC LIMIT 1", &[&name], records::decode_dataset)
    }

    fn list_datasets(&self, name: Option<&str>, page_token: Option<&str>, limit: usize) -> Result<(Vec<DatasetMeta>, Option<String>), StoreError> {
        let all = match name {
            Some(name) => self.read_records("SELECT record FROM datasets WHERE name = $1 AND name <> ''", &[&name], records::decode_dataset)?,
            None => self.read_records("SELECT record FROM datasets", &[], records::decode_dataset)?,
        };
        let mut all: Vec<(String, DatasetMeta)> = all.into_iter().map(|m| (dataset_position(&m), m)).collect();
        all.sort_by(|a, b| a.0.cmp(&b.0));
        let after: Vec<(String, DatasetMeta)> = all.into_iter().filter(|(p, _)| page_token.is_none_or(|t| p.as_str() > t)).collect();
        Ok(page(after, limit, |(p, _)| p.clone(), |(_, m)| m))
    }

    fn delete_dataset(&self, id: &str) -> Result<DeleteDataset, StoreError> {
        self.transact(async |tx| delete_dataset(tx, id, false).await)
    }

    fn delete_dataset_if_unused(&self, id: &str) -> Result<DeleteDataset, StoreError> {
        self.transact(async |tx| delete_dataset(tx, id, true).await)
    }

    fn create_run_within(&self, run: Run, queue_full: bool) -> Result<CreateRun, StoreError> {
        debug_assert_eq!(run.state, RunState::Queued, "create_run takes a queued run");
        self.transact(async |tx| insert_run(tx, &run, queue_full).await)
    }

    fn run_by_idempotency(&self, owner: Option<&str>, key: &str) -> Result<Option<Run>, StoreError> {
        self.read_record("SELECT r.record FROM idempotency_keys k JOIN runs r ON r.id = k.run_id WHERE k.key = $1", &[&keys::idempotency(owner, key)], records::decode_run)
    }

    fn queued_by(&self, owner: &str) -> Result<usize, StoreError> {
        let rows = self.read("SELECT count(*) FROM runs WHERE state = 'queued' AND owner = $1", &[&owner])?;
        Ok(rows[0].get::<_, i64>(0) as usize)
    }

    fn queued_count(&self) -> Result<usize, StoreError> {
        let rows = self.read("SELECT count(*) FROM runs WHERE state = 'queued'", &[])?;
        Ok(rows[0].get::<_, i64>(0) as usize)
    }

    fn run(&self, id: &str) -> Result<Option<Run>, StoreError> {
        self.read_record("SELECT record FROM runs WHERE id = $1", &[&id], records::decode_run)
    }

    fn list_runs(&self, filter: &RunFilter, page_token: Option<&str>, limit: usize) -> Result<(Vec<Run>, Option<String>), StoreError> {
        let limit = limit.max(1);
        let state = filter.state.map(|s| s.as_str());
        let mut below = page_token.map(str::to_string);
        let mut found = Vec::new();
        loop {
            let rows = self.read("SELECT record, id FROM runs WHERE ($1::text IS NULL OR id < $1) AND ($2::text IS NULL OR state = $2) ORDER BY id DESC LIMIT $3", &[&below, &state, &LIST_BATCH])?;
            let batch = decoded(&rows, records::decode_run).map_err(Fail::into_store)?;
            let full = rows.len() as i64 == LIST_BATCH;
            below = rows.last().map(|r| r.get(1));
            for run in batch {
                if filter.admits(&run) {
                    found.push(run);
                    if found.len() > limit {
                        return Ok(page(found, limit, |r| r.id.clone(), |r| r));
                    }
                }
            }
            if !full {
                return Ok(page(found, limit, |r| r.id.clone(), |r| r));
            }
        }
    }

    /// The oldest queued run that no other process is claiming (`SKIP LOCKED`).
    fn claim_next_within(&self, now: i64, fits: &dyn Fn(&Run) -> bool) -> Result<Claim, StoreError> {
        self.transact(async |tx| {
            let Some(row) = query_opt(tx, "SELECT record FROM runs WHERE state = 'queued' ORDER BY id LIMIT 1 FOR UPDATE SKIP LOCKED", &[]).await? else { return Ok(Claim::Empty) };
            let mut run = records::decode_run(row.get(0))?;
            if run.state != RunState::Queued {
                return Err(StoreError::Corrupt(format!("queued run {} is {}", run.id, run.state.as_str())).into());
            }
            if !fits(&run) {
                return Ok(Claim::Waiting(run));
            }
            run.start(now, 0, 0);
            put_run(tx, &run).await?;
            lease(tx, &run.id, &self.inner.worker, self.inner.lease_ms).await?;
            notify(tx, &run.id).await?;
            Ok(Claim::Claimed(run))
        })
    }

    fn set_plan_size(&self, run_id: &str, settings: u32, units_total: u32) -> Result<(), StoreError> {
        self.transact(async |tx| {
            if let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) {
                // Every plan lays out the units to claim that are neither stored nor laid out
                // yet: the first plan all of them; a later plan (another replica's, or a
                // resume) none, as claims go only when their unit is stored; and a run that
                // was running before units were claimed one by one (it has no claims) the
                // ones it still needs, so it finishes.
                if units_total > 0 {
                    execute(
                        tx,
                        "INSERT INTO unit_claims (run_id, unit) SELECT $1, g FROM generate_series(0::bigint, $2::bigint - 1) g \
                         WHERE NOT EXISTS (SELECT 1 FROM units u WHERE u.run_id = $1 AND u.unit = g) ON CONFLICT DO NOTHING",
                        &[&run_id, &i64::from(units_total)],
                    )
                    .await?;
                }
                run.settings = settings;
                run.units_total = units_total;
                put_run(tx, &run).await?;
            }
            Ok(())
        })
    }

    fn running_runs(&self) -> Result<Vec<Run>, StoreError> {
        self.read_records("SELECT record FROM runs WHERE state = 'running' ORDER BY id", &[], records::decode_run)
    }

    fn record_unit(&self, run_id: &str, unit: &UnitResult, events: Vec<EventKind>, now: i64) -> Result<Vec<Event>, StoreError> {
        self.record_units(run_id, vec![(unit.clone(), events)], now)
    }

    /// The whole batch in one transaction. A unit's row is written once: a second writer of
    /// the same unit (another replica) finds it stored and stores nothing for it.
    fn record_units(&self, run_id: &str, batch: Vec<(UnitResult, Vec<EventKind>)>, now: i64) -> Result<Vec<Event>, StoreError> {
        let mut encoded = Vec::with_capacity(batch.len());
        for (unit, events) in &batch {
            let index = unit_index(unit.unit)?;
            encoded.push((index, records::encode_unit(unit), events));
        }
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) else { return Ok(Vec::new()) };
            let (mut out, before) = (Vec::new(), run.units_done);
            for (index, bytes, events) in &encoded {
                if !store_unit(tx, &mut run, *index, &self.inner.worker, bytes).await? {
                    continue;
                }
                for kind in events.iter() {
                    let kind = announced(kind, run.units_done);
                    out.push(append(tx, &mut run, kind, now).await?);
                }
            }
            if run.units_done != before {
                put_run(tx, &run).await?;
                notify(tx, run_id).await?;
            }
            Ok(out)
        })
    }

    fn units(&self, run_id: &str) -> Result<Vec<UnitResult>, StoreError> {
        self.read_records("SELECT record FROM units WHERE run_id = $1 ORDER BY unit", &[&run_id], records::decode_unit)
    }

    /// The lowest unclaimed units (never claimed, or their lease expired), skipping rows
    /// another replica is claiming this instant; this process leases them.
    fn claim_units(&self, run_id: &str, total: u32, max: usize) -> Result<Vec<usize>, StoreError> {
        let _ = total;
        let max = i64::try_from(max.max(1)).unwrap_or(i64::MAX);
        let sql = format!(
            "UPDATE unit_claims SET owner = $2, expires_at = {DB_NOW_MS} + $3 WHERE run_id = $1 AND unit IN \
             (SELECT unit FROM unit_claims WHERE run_id = $1 AND (owner IS NULL OR expires_at < {DB_NOW_MS}) ORDER BY unit LIMIT $4 FOR UPDATE SKIP LOCKED) RETURNING unit"
        );
        self.transact(async |tx| {
            if query_opt(tx, "SELECT 1 FROM runs WHERE id = $1 AND state = 'running'", &[&run_id]).await?.is_none() {
                return Ok(Vec::new());
            }
            let rows = query(tx, &sql, &[&run_id, &self.inner.worker, &self.inner.lease_ms, &max]).await?;
            let mut units: Vec<usize> = rows.iter().map(|r| r.get::<_, i64>(0) as usize).collect();
            units.sort_unstable();
            Ok(units)
        })
    }

    fn join_running(&self, busy: &[String]) -> Result<Option<Run>, StoreError> {
        let busy: Vec<&str> = busy.iter().map(String::as_str).collect();
        let sql = format!(
            "SELECT r.record FROM runs r WHERE r.state = 'running' AND NOT (r.id = ANY($1)) AND EXISTS \
             (SELECT 1 FROM unit_claims c WHERE c.run_id = r.id AND (c.owner IS NULL OR c.expires_at < {DB_NOW_MS})) ORDER BY r.id LIMIT 1"
        );
        self.read_record(&sql, &[&busy], records::decode_run)
    }

    /// The whole batch in one transaction that holds the run's row: the units others stored
    /// since `since` are told to `log` first, so the events of each unit are made from
    /// every unit stored before it; the writer of the last unit takes the run's lease (it
    /// summarises the run; if it dies first, the run is taken over once the lease expires).
    fn record_computed(&self, run_id: &str, batch: Vec<UnitResult>, since: u32, log: &dyn UnitLog, now: i64) -> Result<Recorded, StoreError> {
        let mut encoded = Vec::with_capacity(batch.len());
        for unit in &batch {
            encoded.push((unit_index(unit.unit)?, records::encode_unit(unit), unit));
        }
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) else { return Ok(Recorded::default()) };
            let others = query(tx, "SELECT record FROM units WHERE run_id = $1 AND stored_seq > $2 ORDER BY stored_seq", &[&run_id, &i64::from(since)]).await?;
            log.learn(decoded(&others, records::decode_unit)?);
            let mut recorded = Recorded { running: true, ..Recorded::default() };
            for (index, bytes, unit) in &encoded {
                if !store_unit(tx, &mut run, *index, &self.inner.worker, bytes).await? {
                    continue;
                }
                recorded.stored += 1;
                for kind in log.announce(unit, run.units_done) {
                    recorded.events.push(append(tx, &mut run, kind, now).await?);
                }
            }
            recorded.units_done = run.units_done;
            if recorded.stored > 0 {
                put_run(tx, &run).await?;
                if recorded.stored_last(run.units_total) {
                    lease(tx, run_id, &self.inner.worker, self.inner.lease_ms).await?;
                }
                notify(tx, run_id).await?;
            }
            Ok(recorded)
        })
    }

    fn finish_run(&self, run_id: &str, outcome: &RunOutcome, drift: Option<DriftReport>, now: i64) -> Result<Option<Event>, StoreError> {
        let bytes = records::encode_outcome(outcome);
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) else { return Ok(None) };
            execute(tx, "INSERT INTO outcomes (run_id, record) VALUES ($1, $2) ON CONFLICT (run_id) DO UPDATE SET record = EXCLUDED.record", &[&run_id, &bytes]).await?;
            run.drift = drift.clone();
            let event = append(tx, &mut run, EventKind::Finished { picked: outcome.picked, best: outcome.best }, now).await?;
            run.end(RunState::Finished, now, None);
            put_run(tx, &run).await?;
            drop_claims(tx, run_id).await?;
            notify(tx, run_id).await?;
            Ok(Some(event))
        })
    }

    fn end_run(&self, run_id: &str, state: RunState, reason: &str, now: i64) -> Result<Option<(Run, Event)>, StoreError> {
        if !matches!(state, RunState::Failed | RunState::Cancelled) {
            debug_assert!(false, "end_run ends a run as failed or cancelled, not {}", state.as_str());
            return Ok(None);
        }
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| !r.state.is_terminal()) else { return Ok(None) };
            let event = end(tx, &mut run, state, reason, now).await?;
            Ok(Some((run, event)))
        })
    }

    fn resume(&self, run_id: &str, now: i64) -> Result<Resumed, StoreError> {
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) else { return Ok(Resumed::NotRunning) };
            match run.resume() {
                crate::job::Resume::Again => {
                    put_run(tx, &run).await?;
                    lease(tx, run_id, &self.inner.worker, self.inner.lease_ms).await?;
                    Ok(Resumed::Again(run))
                }
                crate::job::Resume::GiveUp(reason) => {
                    end(tx, &mut run, RunState::Failed, &reason, now).await?;
                    Ok(Resumed::GaveUp(reason))
                }
            }
        })
    }

    fn stopped_cleanly(&self, run_id: &str) -> Result<(), StoreError> {
        self.transact(async |tx| {
            if let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) {
                run.units_at_start = None;
                run.crash_strikes = 0;
                put_run(tx, &run).await?;
                // Another replica may take it, and the units this one had claimed, at once.
                execute(tx, "UPDATE runs SET lease_expires = 0 WHERE id = $1 AND lease_owner = $2", &[&run_id, &self.inner.worker]).await?;
                execute(tx, "UPDATE unit_claims SET owner = NULL, expires_at = 0 WHERE run_id = $1 AND owner = $2", &[&run_id, &self.inner.worker]).await?;
            }
            Ok(())
        })
    }

    fn append_event(&self, run_id: &str, kind: EventKind, now: i64) -> Result<Option<Event>, StoreError> {
        if matches!(kind, EventKind::Finished { .. } | EventKind::Failed(_) | EventKind::Cancelled(_)) {
            debug_assert!(false, "append_event takes non-terminal events");
            return Ok(None);
        }
        self.transact(async |tx| {
            let Some(mut run) = run_of(tx, run_id, true).await?.filter(|r| r.state == RunState::Running) else { return Ok(None) };
            let event = append(tx, &mut run, kind.clone(), now).await?;
            put_run(tx, &run).await?;
            notify(tx, run_id).await?;
            Ok(Some(event))
        })
    }

    fn events(&self, run_id: &str, after: u64) -> Result<Vec<Event>, StoreError> {
        let Ok(after) = i64::try_from(after) else { return Ok(Vec::new()) };
        self.read_records("SELECT record FROM events WHERE run_id = $1 AND sequence > $2 ORDER BY sequence", &[&run_id, &after], records::decode_event)
    }

    fn outcome(&self, run_id: &str) -> Result<Option<RunOutcome>, StoreError> {
        self.read_record("SELECT record FROM outcomes WHERE run_id = $1", &[&run_id], records::decode_outcome)
    }

    fn delete_run(&self, run_id: &str) -> Result<bool, StoreError> {
        self.transact(async |tx| {
            let Some(run) = run_of(tx, run_id, true).await?.filter(|r| r.state.is_terminal()) else { return Ok(false) };
            for sql in ["DELETE FROM events WHERE run_id = $1", "DELETE FROM units WHERE run_id = $1", "DELETE FROM outcomes WHERE run_id = $1", "DELETE FROM unit_claims WHERE run_id = $1", "DELETE FROM runs WHERE id = $1"] {
                execute(tx, sql, &[&run_id]).await?;
            }
            if let Some(key) = &run.idempotency_key {
                let key = keys::idempotency(run.owner.as_deref(), key);
                execute(tx, "DELETE FROM idempotency_keys WHERE key = $1 AND run_id = $2", &[&key, &run_id]).await?;
            }
            Ok(true)
        })
    }

    fn create_schedule(&self, schedule: &Schedule) -> Result<bool, StoreError> {
        let bytes = records::encode_schedule(schedule);
        self.transact(async |tx| {
            let created = execute(tx, "INSERT INTO schedules (id, record) VALUES ($1, $2) ON CONFLICT DO NOTHING", &[&schedule.id, &bytes]).await? == 1;
            notify_schedule(tx, &schedule.id).await?;
            Ok(created)
        })
    }

    fn schedule(&self, id: &str) -> Result<Option<Schedule>, StoreError> {
        self.read_record("SELECT record FROM schedules WHERE id = $1", &[&id], records::decode_schedule)
    }

    fn list_schedules(&self, page_token: Option<&str>, limit: usize) -> Result<(Vec<Schedule>, Option<String>), StoreError> {
        let limit = limit.max(1);
        let found = self.read_records("SELECT record FROM schedules WHERE ($1::text IS NULL OR id < $1) ORDER BY id DESC LIMIT $2", &[&page_token, &(limit as i64 + 1)], records::decode_schedule)?;
        Ok(page(found, limit, |s| s.id.clone(), |s| s))
    }

    fn all_schedules(&self) -> Result<Vec<Schedule>, StoreError> {
        self.read_records("SELECT record FROM schedules ORDER BY id", &[], records::decode_schedule)
    }

    fn update_schedule(&self, id: &str, change: &dyn Fn(&mut Schedule)) -> Result<Option<Schedule>, StoreError> {
        self.transact(async |tx| {
            let Some(mut s) = schedule_of(tx, id, true).await? else { return Ok(None) };
            change(&mut s);
            put_schedule(tx, &s).await?;
            Ok(Some(s))
        })
    }

    fn delete_schedule(&self, id: &str) -> Result<bool, StoreError> {
        self.transact(async |tx| {
            if schedule_of(tx, id, true).await?.is_none() {
                return Ok(false);
            }
            execute(tx, "DELETE FROM fires WHERE schedule_id = $1", &[&id]).await?;
            execute(tx, "DELETE FROM schedules WHERE id = $1", &[&id]).await?;
            notify_schedule(tx, id).await?;
            Ok(true)
        })
    }

    /// As the sled backend's: the schedule's row is locked, so of replicas handling the same
    /// fire one records it and the others find `considered_until` moved on (`None`).
    fn record_fire(&self, id: &str, seen_considered: i64, considered: i64, draft: &Fire, run: Option<&Run>) -> Result<Option<(Schedule, Fire, Option<Run>)>, StoreError> {
        self.transact(async |tx| {
            let Some(mut s) = schedule_of(tx, id, true).await?.filter(|s| s.considered_until == seen_considered && !s.paused) else { return Ok(None) };
            let mut fire = draft.clone();
            let mut created = None;
            if let Some(run) = run {
                let last = match &s.last_run_id {
                    Some(id) => run_of(tx, id, false).await?,
                    None => None,
                };
                if let Some(busy) = last.filter(|r| r.state.is_active()) {
                    fire.skip_busy(busy);
                } else {
                    created = fire_run(&mut s, &mut fire, run, insert_run(tx, run, false).await?);
                }
            }
            number_fire(&mut s, &mut fire, considered);
            execute(tx, "INSERT INTO fires (schedule_id, sequence, record) VALUES ($1, $2, $3)", &[&id, &seq(fire.sequence)?, &records::encode_fire(&fire)]).await?;
            put_schedule(tx, &s).await?;
            Ok(Some((s, fire, created)))
        })
    }

    fn fires(&self, id: &str, page_token: Option<u64>, limit: usize) -> Result<(Vec<Fire>, Option<String>), StoreError> {
        let limit = limit.max(1);
        let upper = i64::try_from(page_token.unwrap_or(u64::MAX)).unwrap_or(i64::MAX);
        let found = self.read_records("SELECT record FROM fires WHERE schedule_id = $1 AND sequence < $2 ORDER BY sequence DESC LIMIT $3", &[&id, &upper, &(limit as i64 + 1)], records::decode_fire)?;
        Ok(page(found, limit, |f| f.sequence.to_string(), |f| f))
    }
}
