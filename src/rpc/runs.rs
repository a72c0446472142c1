//! The Runs service: start, follow, get, list and cancel sweeps.

use std::pin::Pin;

use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::Stream;
use tonic::{Request, Response, Status};
use tracing::info;

use super::{convert, error, page_size, token, Api};
use std::sync::Arc;

use crate::access::Caller;
use crate::config::Config;
use crate::job::{DatasetMeta, EventKind, IdKind, Run, RunState};
use crate::pb;
use crate::store::{CreateRun, RunFilter};
use crate::sweep::{RunSize, SweepSpec};
use crate::worker::{cpu, load_dataset, Shared};

/// A new run id: "run_" + a version 7 UUID, which sorts by creation time.
pub fn new_run_id() -> String {
    format!("run_{}", uuid::Uuid::now_v7().simple())
}

/// The dataset a request names: an exact id, or the latest version under a name.
pub fn resolve_dataset(shared: &Shared, dataset_id: &str, dataset_name: &str) -> Result<DatasetMeta, Status> {
    let store = &shared.store;
    if !dataset_id.is_empty() {
        error::check_id("dataset_id", IdKind::Dataset, dataset_id)?;
        store.dataset(dataset_id).map_err(error::store)?.ok_or_else(|| error::not_found("dataset", dataset_id))
    } else if !dataset_name.is_empty() {
        store.latest_dataset(dataset_name).map_err(error::store)?.ok_or_else(|| Status::not_found(format!("no dataset named '{}'", error::echo(dataset_name))))
    } else {
        Err(Status::invalid_argument("dataset_id or dataset_name: name the dataset to sweep"))
    }
}

/// Checks a wire spec against a stored dataset on the CPU pool for calls, so a bad spec fails
/// now, not in the queue: every cap of the spec, and the run's memory estimate against the
/// budget. Returns the spec with its defaults made explicit (task, metric, folds), so a run
/// reads the same later, the target column, and the memory estimate in bytes.
pub async fn check_sweep(shared: &Arc<Shared>, meta: &DatasetMeta, wire: pb::SweepSpec) -> Result<(SweepSpec, String, u64), Status> {
    let target = if wire.target.is_empty() { meta.target.clone() } else { wire.target.clone() };
    if target.is_empty() {
        return Err(Status::invalid_argument(format!("spec.target: dataset '{}' has no default target; name the column to predict", meta.id)));
    }
    let (store, cfg) = (shared.store.clone(), shared.config.clone());
    let (meta, target2) = (meta.clone(), target.clone());
    let threads = shared.pool.current_num_threads();
    let (spec, estimate) = cpu(shared, move || -> Result<(SweepSpec, u64), Status> {
        let task = match wire.task.as_str() {
            "" => None,
            t => Some(crate::data::Task::parse(t).ok_or_else(|| Status::invalid_argument(format!("spec.task: '{}' is not classify or regress", error::echo(t))))?),
        };
        let data = load_dataset(&store, &meta, &target2, task, cfg.max_rows, cfg.max_columns).map_err(Status::invalid_argument)?;
        let spec = convert::spec_from(&wire, data.task())?;
        let checked = spec.check_with(&data, &cfg.spec_caps()).map_err(|e| error::spec(&e))?;
        let size = RunSize::of(&data, &checked, meta.bytes, threads, cfg.max_settings);
        let estimate = size.bytes();
        if estimate > cfg.run_memory_bytes {
            let detail = format!(
                "the run needs about {estimate} bytes ({} rows × {} features, {} units in flight, {} splits, {} settings)",
                size.rows, size.features, size.units_in_flight, size.splits, size.settings
            );
            return Err(error::cap("memory", &detail, "run_memory_bytes", cfg.run_memory_bytes));
        }
        Ok((SweepSpec { task: Some(checked.task), metric: Some(checked.metric), folds: Some(checked.folds), ..spec }, estimate))
    })
    .await??;
    Ok((spec, target, estimate))
}

/// Labels within the caps on their count and on the bytes of each key and value.
pub fn check_labels<'a>(cfg: &Config, labels: impl IntoIterator<Item = (&'a String, &'a String)> + Clone) -> Result<(), Status> {
    let n = labels.clone().into_iter().count();
    if n > cfg.max_labels {
        return Err(error::cap("labels", &format!("{n} labels"), "max_labels", cfg.max_labels as u64));
    }
    for (k, v) in labels {
        if k.len() > cfg.max_label_key_bytes {
            return Err(error::cap(&format!("labels['{}']", error::echo(k)), &format!("the key has {} bytes", k.len()), "max_label_key_bytes", cfg.max_label_key_bytes as u64));
        }
        if v.len() > cfg.max_label_value_bytes {
            return Err(error::cap(&format!("labels['{}']", error::echo(k)), &format!("the value has {} bytes", v.len()), "max_label_value_bytes", cfg.max_label_value_bytes as u64));
        }
    }
    Ok(())
}

/// A checked, queued run for a request, not yet stored (shared by StartRun and schedules).
pub async fn prepare_run(shared: &Arc<Shared>, r: pb::StartRunRequest, schedule_id: Option<String>) -> Result<Run, Status> {
    check_labels(&shared.config, &r.labels)?;
    let meta = resolve_dataset(shared, &r.dataset_id, &r.dataset_name)?;
    let (spec, target, estimate) = check_sweep(shared, &meta, r.spec.unwrap_or_default()).await?;
    let mut run = Run::queued(new_run_id(), &meta, target, spec, shared.now());
    run.labels = r.labels.into_iter().collect();
    run.idempotency_key = r.idempotency_key;
    run.schedule_id = schedule_id;
    run.memory_estimate = estimate;
    Ok(run)
}

/// A digest of what a StartRun request asks for (all but its idempotency key), so a key
/// reused for another request is told apart from a retry. The spec has no map fields, so
/// its encoding is deterministic; labels go in key order.
pub fn request_digest(r: &pb::StartRunRequest) -> String {
    use sha2::{Digest, Sha256};
    let mut h = Sha256::new();
    let mut field = |b: &[u8]| {
        h.update((b.len() as u64).to_be_bytes());
        h.update(b);
    };
    field(r.dataset_id.as_bytes());
    field(r.dataset_name.as_bytes());
    field(&prost::Message::encode_to_vec(&r.spec.clone().unwrap_or_default()));
    let labels: std::collections::BTreeMap<_, _> = r.labels.iter().collect();
    for (k, v) in labels {
        field(k.as_bytes());
        field(v.as_bytes());
    }
    crate::access::tokens::hex(&h.finalize())
}

impl Api {
    /// Checks a sweep against its dataset and queues it for `caller`: a retry with the same
    /// idempotency key (scoped to the caller's token) returns the first run; the same key
    /// with another request is ALREADY_EXISTS. The queue's total cap and the caller's own cap
    /// are checked under one lock with the insert, so they hold under concurrent calls.
    pub async fn queue_run(&self, caller: &Caller, r: pb::StartRunRequest) -> Result<Run, Status> {
        let digest = request_digest(&r);
        let key = r.idempotency_key.clone();
        let same = |run: Run| -> Result<Run, Status> {
            if run.request_digest.is_empty() || run.request_digest == digest {
                Ok(run)
            } else {
                Err(Status::already_exists(format!("idempotency_key '{}' was used for a different request (run {}); use a new key", key.chars().take(100).collect::<String>(), run.id)))
            }
        };
        if !key.is_empty() {
            if let Some(run) = self.shared.store.run_by_idempotency(caller.name.as_deref(), &key).map_err(error::store)? {
                return same(run);
            }
        }
        let mut run = prepare_run(&self.shared, r, None).await?;
        run.owner = caller.name.clone();
        run.request_digest = digest.clone();
        let dataset_id = run.dataset_id.clone();
        let cap = self.shared.config.max_queued_runs;
        let created = {
            let _admit = self.shared.admit.lock().unwrap_or_else(|e| e.into_inner());
            if let Some(owner) = &run.owner {
                let own_cap = self.shared.config.access.max_queued_per_token;
                if self.shared.store.queued_by(owner).map_err(error::store)? >= own_cap {
                    return Err(error::cap("queue", &format!("token '{owner}' has {own_cap} queued runs; wait for some to start or cancel them"), "max_queued_per_token", own_cap as u64));
                }
            }
            let queued = self.shared.store.queued_count();
            self.shared.store.create_run_within(run, queued >= cap).map_err(error::store)?
        };
        match created {
            CreateRun::Created(run) => {
                info!(run_id = %run.id, dataset = %run.dataset_id, owner = caller.label(), "run queued");
                self.shared.queued.notify_one();
                Ok(run)
            }
            CreateRun::Existing(run) => same(run),
            CreateRun::DatasetMissing => Err(error::not_found("dataset", &dataset_id)),
            CreateRun::QueueFull => Err(error::cap("queue", &format!("{} runs are queued", self.shared.store.queued_count()), "max_queued_runs", cap as u64)),
        }
    }

    fn run_or_not_found(&self, id: &str) -> Result<Run, Status> {
        error::check_id("id", IdKind::Run, id)?;
        self.shared.store.run(id).map_err(error::store)?.ok_or_else(|| error::not_found("run", id))
    }
}

type EventStream = Pin<Box<dyn Stream<Item = Result<pb::RunEvent, Status>> + Send>>;

#[tonic::async_trait]
impl pb::runs_server::Runs for Api {
    async fn start_run(&self, request: Request<pb::StartRunRequest>) -> Result<Response<pb::RunInfo>, Status> {
        let caller = Caller::of(&request);
        let run = self.queue_run(&caller, request.into_inner()).await?;
        Ok(Response::new(convert::run_info(&run, None)))
    }

    type FollowRunStream = EventStream;

    async fn follow_run(&self, request: Request<pb::FollowRunRequest>) -> Result<Response<Self::FollowRunStream>, Status> {
        let r = request.into_inner();
        self.run_or_not_found(&r.id)?;
        let shared = self.shared.clone();
        let (tx, rx) = tokio::sync::mpsc::channel(64);
        // Subscribed before the task starts, and the flag read on every turn: a shutdown that
        // begins before the task first runs still ends the stream with its status.
        let mut changed = shared.changed.subscribe();
        let mut shutdown = shared.shutdown.subscribe();
        tokio::spawn(async move {
            let mut after = r.after_sequence;
            loop {
                if *shutdown.borrow_and_update() {
                    let _ = tx.send(Err(error::shutting_down("follow again with after_sequence to resume"))).await;
                    return;
                }
                // Mark the version seen before reading, so no event slips between read and wait.
                changed.borrow_and_update();
                // Read the state before the events: a run already terminal has stored all its
                // events, so an empty read after it means the caller has seen them all. (Read
                // after the events, a run that ended in between would end the stream without
                // its terminal event.)
                let ended = matches!(shared.store.run(&r.id), Ok(Some(run)) if run.state.is_terminal());
                let events = match shared.store.events(&r.id, after) {
                    Ok(e) => e,
                    Err(e) => {
                        let _ = tx.send(Err(error::store(e))).await;
                        return;
                    }
                };
                let finished = events.iter().any(|e| matches!(e.kind, EventKind::Finished { .. }));
                let outcome = if finished { shared.store.outcome(&r.id).ok().flatten() } else { None };
                let drift = if finished { shared.store.run(&r.id).ok().flatten().and_then(|run| run.drift) } else { None };
                for e in &events {
                    after = e.sequence;
                    let msg = convert::event_to(&r.id, e, outcome.as_ref(), drift.as_ref());
                    if tx.send(Ok(msg)).await.is_err() {
                        return;
                    }
                    if e.is_terminal() {
                        return;
                    }
                }
                if events.is_empty() && ended {
                    // A terminal run whose events the caller has all seen: end the stream.
                    return;
                }
                tokio::select! {
                    _ = changed.changed() => {}
                    _ = shutdown.changed() => {
                        let _ = tx.send(Err(error::shutting_down("follow again with after_sequence to resume"))).await;
                        return;
                    }
                    _ = tx.closed() => return,
                }
            }
        });
        Ok(Response::new(Box::pin(ReceiverStream::new(rx))))
    }

    async fn get_run(&self, request: Request<pb::GetRunRequest>) -> Result<Response<pb::RunInfo>, Status> {
        let id = request.into_inner().id;
        let run = self.run_or_not_found(&id)?;
        let outcome = self.shared.store.outcome(&id).map_err(error::store)?;
        Ok(Response::new(convert::run_info(&run, outcome.as_ref())))
    }

    async fn list_runs(&self, request: Request<pb::ListRunsRequest>) -> Result<Response<pb::ListRunsReply>, Status> {
        let r = request.into_inner();
        let label = match r.label.as_str() {
            "" => None,
            l => {
                let (k, v) = l.split_once('=').ok_or_else(|| Status::invalid_argument(format!("label: '{}' is not key=value", error::echo(l))))?;
                Some((k.to_string(), v.to_string()))
            }
        };
        let filter = RunFilter {
            dataset_name: (!r.dataset_name.is_empty()).then_some(r.dataset_name),
            state: convert::state_from(r.state)?,
            label,
            schedule_id: (!r.schedule_id.is_empty()).then_some(r.schedule_id),
            created_from: convert::parse_time("created_from", &r.created_from)?,
            created_to: convert::parse_time("created_to", &r.created_to)?,
            score_fell: r.score_fell,
            drift_flagged: r.drift_flagged,
        };
        let (runs, next) = self.shared.store.list_runs(&filter, token(&r.page_token), page_size(r.page_size)).map_err(error::store)?;
        // A page also ends before it passes list_page_bytes (it always holds one run), and
        // then continues after its last run.
        let budget = self.shared.config.list_page_bytes;
        let (mut infos, mut bytes) = (Vec::with_capacity(runs.len()), 0usize);
        let mut next = next;
        for run in &runs {
            let info = convert::run_info(run, None);
            bytes = bytes.saturating_add(prost::Message::encoded_len(&info));
            if !infos.is_empty() && bytes > budget {
                next = infos.last().map(|i: &pb::RunInfo| i.id.clone());
                break;
            }
            infos.push(info);
        }
        Ok(Response::new(pb::ListRunsReply { runs: infos, next_page_token: next.unwrap_or_default() }))
    }

    async fn cancel_run(&self, request: Request<pb::CancelRunRequest>) -> Result<Response<pb::RunInfo>, Status> {
        let caller = Caller::of(&request);
        let id = request.into_inner().id;
        let run = self.run_or_not_found(&id)?;
        if !caller.owns(run.owner.as_deref()) {
            let by = run.owner.as_deref().map_or("without a token or by a schedule".to_string(), |o| format!("by token '{o}'"));
            return Err(Status::permission_denied(format!("run '{id}' was started {by}; cancelling another token's run needs the admin role")));
        }
        info!(run_id = %id, caller = caller.label(), "cancel requested");
        match run.state {
            RunState::Queued => {
                self.shared.store.end_run(&id, RunState::Cancelled, "cancelled by request", self.shared.now()).map_err(error::store)?;
                self.shared.announce();
            }
            RunState::Running => {
                // The worker stops before its next unit and records the cancellation.
                if !self.shared.request_cancel(&id) {
                    self.shared.store.end_run(&id, RunState::Cancelled, "cancelled by request", self.shared.now()).map_err(error::store)?;
                    self.shared.announce();
                }
            }
            _ => {}
        }
        let run = self.run_or_not_found(&id)?;
        Ok(Response::new(convert::run_info(&run, None)))
    }
}
