//! Runs: admission (one operation for StartRun and a schedule's fire), get, list, cancel,
//! and the events after a sequence number for followers.

use std::collections::BTreeMap;
use std::sync::atomic::Ordering;
use std::sync::Arc;

use tracing::info;

use super::error::{echo, Result, ServiceError};
use super::{cpu, Service};
use crate::access::Caller;
use crate::config::Config;
use crate::drift::DriftReport;
use crate::job::{DatasetMeta, Event, EventKind, IdKind, Run, RunOutcome, RunState};
use crate::store::{CreateRun, RunFilter};
use crate::sweep::{FoldPlan, RunSize, SweepSpec};

/// A new run id: "run_" + a version 7 UUID, which sorts by creation time.
pub fn new_run_id() -> String {
    format!("run_{}", uuid::Uuid::now_v7().simple())
}

/// The dataset a request names: an exact id, or the latest version under a name.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum DatasetRef {
    Id(String),
    Name(String),
}

impl DatasetRef {
    /// From a request's two fields: the id when given, else the name, else none.
    pub fn of(id: &str, name: &str) -> Option<DatasetRef> {
        if !id.is_empty() {
            Some(DatasetRef::Id(id.to_string()))
        } else if !name.is_empty() {
            Some(DatasetRef::Name(name.to_string()))
        } else {
            None
        }
    }
}

/// Which fold schemes of a request are left to the data's task (see
/// [`RunRequest::default_fold_scheme`]).
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct SchemeDefaults {
    pub folds: bool,
    pub outer: bool,
}

/// A sweep to queue, in core types.
#[derive(Clone, Debug, PartialEq)]
pub struct RunRequest {
    /// `None` is refused (the caller named no dataset).
    pub dataset: Option<DatasetRef>,
    /// The column to predict; `None` for the dataset's own target.
    pub target: Option<String>,
    pub spec: SweepSpec,
    /// The caller gave fold counts but no scheme: the scheme is the default of the data's
    /// task, known once the data is read.
    pub default_fold_scheme: bool,
    /// The same for the outer plan of a nested sweep.
    pub default_outer_scheme: bool,
    /// Scoped to the caller's token.
    pub idempotency_key: Option<String>,
    pub labels: BTreeMap<String, String>,
}

impl RunRequest {
    /// A digest of what the request asks for (all but its idempotency key), so a key
    /// reused for another request is told apart from a retry.
    pub fn digest(&self) -> String {
        use sha2::{Digest, Sha256};
        // The text digests were first taken of: the target "" for none, so a retry matches
        // runs stored before the field was optional; the spec field by field (see
        // `SweepSpec::digest_text`), fields added since only when set.
        let RunRequest { dataset, target, spec, default_fold_scheme, default_outer_scheme: _, idempotency_key: _, labels } = self;
        let mut what = format!("({dataset:?}, {:?}, {}, {default_fold_scheme:?}, {labels:?})", target.as_deref().unwrap_or(""), spec.digest_text());
        if self.default_outer_scheme {
            what.push_str(" default outer scheme");
        }
        crate::access::tokens::hex(&Sha256::digest(what.as_bytes()))
    }
}

/// Labels within the caps on their count and on the bytes of each key and value.
pub fn check_labels<'a>(cfg: &Config, labels: impl IntoIterator<Item = (&'a String, &'a String)> + Clone) -> Result<()> {
    let n = labels.clone().into_iter().count();
    if n > cfg.max_labels {
        return Err(ServiceError::cap("labels", &format!("{n} labels"), "max_labels", cfg.max_labels as u64));
    }
    for (k, v) in labels {
        if k.len() > cfg.max_label_key_bytes {
            return Err(ServiceError::cap(&format!("labels['{}']", echo(k)), &format!("the key has {} bytes", k.len()), "max_label_key_bytes", cfg.max_label_key_bytes as u64));
        }
        if v.len() > cfg.max_label_value_bytes {
            return Err(ServiceError::cap(&format!("labels['{}']", echo(k)), &format!("the value has {} bytes", v.len()), "max_label_value_bytes", cfg.max_label_value_bytes as u64));
        }
    }
    Ok(())
}

/// The events of a run after a sequence number, for a follower: `ended` is read before
/// the events, so an empty read of an ended run means the follower has seen them all. The
/// outcome and drift report come with a page holding the `finished` event.
pub struct EventsAfter {
    pub events: Vec<Event>,
    pub ended: bool,
    pub outcome: Option<Arc<RunOutcome>>,
    pub drift: Option<DriftReport>,
}

impl Service {
    /// The dataset a request names: NOT_FOUND for an unknown id or name, `Invalid` when it
    /// names none.
    pub fn resolve_dataset(&self, dataset: Option<&DatasetRef>) -> Result<DatasetMeta> {
        match dataset {
            Some(DatasetRef::Id(id)) => {
                ServiceError::check_id("dataset_id", IdKind::Dataset, id)?;
                self.store.dataset(id)?.ok_or_else(|| ServiceError::not_found("dataset", id))
            }
            Some(DatasetRef::Name(name)) => self.store.latest_dataset(name)?.ok_or_else(|| ServiceError::NotFound(format!("no dataset named '{}'", echo(name)))),
            None => Err(ServiceError::invalid("dataset_id or dataset_name", "name the dataset to sweep")),
        }
    }

    /// Checks a sweep against a stored dataset on the CPU pool for calls, once, so a bad
    /// spec fails now, not in the queue: every cap of the spec, and the run's memory
    /// estimate against the budget. Returns the spec with its defaults made explicit (task,
    /// metric, folds), so a run reads the same later, the target column, and the memory
    /// estimate in bytes. The dataset is parsed through the frame cache, so the run that
    /// follows does not parse it again.
    pub async fn check_sweep(self: &Arc<Self>, meta: &DatasetMeta, target: Option<&str>, spec: SweepSpec, defaults: SchemeDefaults) -> Result<(SweepSpec, String, u64)> {
        let Some(target) = target.or(meta.target.as_deref()).map(str::to_string) else {
            return Err(ServiceError::invalid("spec.target", format!("dataset '{}' has no default target; name the column to predict", meta.id)));
        };
        let service = self.clone();
        let (meta, target2) = (meta.clone(), target.clone());
        let threads = self.pool.current_num_threads();
        let (spec, estimate) = cpu(self, move || -> Result<(SweepSpec, u64)> {
            let cfg = &service.config;
            let data = service.frames.load(service.store.as_ref(), &meta, &target2, spec.task, cfg.max_rows, cfg.max_columns)?;
            let mut spec = spec;
            let task_default = FoldPlan::default_for(spec.task.unwrap_or(data.task())).scheme;
            if defaults.folds {
                if let Some(f) = spec.folds.as_mut() {
                    f.scheme = task_default.clone();
                }
            }
            if defaults.outer {
                if let Some(f) = spec.outer.as_mut() {
                    f.scheme = task_default;
                }
            }
            let checked = spec.check_with(&data, &cfg.spec_caps()).map_err(|e| ServiceError::spec(&e))?;
            let size = RunSize::of(&data, &checked, meta.bytes, threads, cfg.max_settings);
            let estimate = size.bytes();
            if estimate > cfg.run_memory_bytes {
                let detail = format!(
                    "the run needs about {estimate} bytes ({} rows × {} features, {} units in flight, {} splits, {} settings)",
                    size.rows, size.features, size.units_in_flight, size.splits, size.settings
                );
                return Err(ServiceError::cap("memory", &detail, "run_memory_bytes", cfg.run_memory_bytes));
            }
            Ok((SweepSpec { task: Some(checked.task), metric: Some(checked.metric), folds: Some(checked.folds), ..spec }, estimate))
        })
        .await??;
        Ok((spec, target, estimate))
    }

    /// Admission: the checked, queued run a request makes, not yet stored. StartRun and a
    /// schedule's fire both come through here (counted in `admissions`): labels within
    /// their caps, the dataset resolved, the spec checked once against the data.
    pub async fn admit_run(self: &Arc<Self>, request: RunRequest, schedule_id: Option<String>) -> Result<Run> {
        self.admissions.fetch_add(1, Ordering::SeqCst);
        check_labels(&self.config, &request.labels)?;
        let meta = self.resolve_dataset(request.dataset.as_ref())?;
        let (spec, target, estimate) = self.check_sweep(&meta, request.target.as_deref(), request.spec, SchemeDefaults { folds: request.default_fold_scheme, outer: request.default_outer_scheme }).await?;
        let mut run = Run::queued(new_run_id(), &meta, target, spec, self.now());
        run.labels = request.labels;
        run.idempotency_key = request.idempotency_key;
        run.schedule_id = schedule_id;
        run.memory_estimate = estimate;
        Ok(run)
    }

    /// Checks a sweep against its dataset and queues it for `caller`: a retry with the same
    /// idempotency key (scoped to the caller's token) returns the first run; the same key
    /// with another request is `Conflict`. The queue's total cap and the caller's own cap
    /// are checked under one lock with the insert, so they hold under concurrent calls.
    pub async fn queue_run(self: &Arc<Self>, caller: &Caller, request: RunRequest) -> Result<Run> {
        let digest = request.digest();
        let key = request.idempotency_key.clone();
        let same = |run: Run| -> Result<Run> {
            if run.request_digest.as_ref().is_none_or(|d| *d == digest) {
                Ok(run)
            } else {
                Err(ServiceError::Conflict(format!("idempotency_key '{}' was used for a different request (run {}); use a new key", key.as_deref().unwrap_or("").chars().take(100).collect::<String>(), run.id)))
            }
        };
        if let Some(key) = &key {
            if let Some(run) = self.store.run_by_idempotency(caller.name.as_deref(), key)? {
                return same(run);
            }
        }
        let mut run = self.admit_run(request, None).await?;
        run.owner = caller.name.clone();
        run.request_digest = Some(digest.clone());
        let dataset_id = run.dataset_id.clone();
        let cap = self.config.max_queued_runs;
        let created = {
            let _admit = self.admit.lock().unwrap_or_else(|e| e.into_inner());
            if let Some(owner) = &run.owner {
                let own_cap = self.config.access.max_queued_per_token;
                if self.store.queued_by(owner)? >= own_cap {
                    return Err(ServiceError::cap("queue", &format!("token '{owner}' has {own_cap} queued runs; wait for some to start or cancel them"), "max_queued_per_token", own_cap as u64));
                }
            }
            let queued = self.store.queued_count()?;
            self.store.create_run_within(run, queued >= cap)?
        };
        match created {
            CreateRun::Created(run) => {
                info!(run_id = %run.id, dataset = %run.dataset_id, owner = caller.label(), "run queued");
                self.queued.notify_one();
                Ok(run)
            }
            CreateRun::Existing(run) => same(run),
            CreateRun::DatasetMissing => Err(ServiceError::not_found("dataset", &dataset_id)),
            CreateRun::QueueFull => Err(ServiceError::cap("queue", &format!("{} runs are queued", self.store.queued_count()?), "max_queued_runs", cap as u64)),
        }
    }

    /// A run by id (`field` names the request field in messages).
    pub fn run(&self, field: &str, id: &str) -> Result<Run> {
        ServiceError::check_id(field, IdKind::Run, id)?;
        self.store.run(id)?.ok_or_else(|| ServiceError::not_found("run", id))
    }

    /// A run and its outcome, once it has one.
    pub fn run_with_outcome(&self, id: &str) -> Result<(Run, Option<Arc<RunOutcome>>)> {
        let run = self.run("id", id)?;
        let outcome = self.outcomes.get(self.store.as_ref(), id)?;
        Ok((run, outcome))
    }

    /// A page of runs that pass the filter, and the token of the next page.
    pub fn list_runs(&self, filter: &RunFilter, page_token: Option<&str>, page_size: usize) -> Result<(Vec<Run>, Option<String>)> {
        Ok(self.store.list_runs(filter, page_token, page_size)?)
    }

    /// Cancels a queued or running run of the caller's (an admin may cancel any); a run
    /// already ended is left as it is. Returns the run as it is now.
    pub fn cancel_run(&self, caller: &Caller, id: &str) -> Result<Run> {
        let run = self.run("id", id)?;
        if !caller.owns(run.owner.as_deref()) {
            let by = run.owner.as_deref().map_or("without a token or by a schedule".to_string(), |o| format!("by token '{o}'"));
            return Err(ServiceError::Denied(format!("run '{id}' was started {by}; cancelling another token's run needs the admin role")));
        }
        info!(run_id = %id, caller = caller.label(), "cancel requested");
        match run.state {
            RunState::Queued => {
                self.store.end_run(id, RunState::Cancelled, "cancelled by request", self.now())?;
                self.announce();
            }
            RunState::Running => {
                // The worker stops before its next unit and records the cancellation.
                if !self.request_cancel(id) {
                    self.store.end_run(id, RunState::Cancelled, "cancelled by request", self.now())?;
                    self.announce();
                }
            }
            _ => {}
        }
        self.run("id", id)
    }

    /// The events of a run after sequence number `after` (see [`EventsAfter`]). A follower
    /// marks `changed` seen before it reads, and waits on it when a read brings nothing new.
    pub fn events_after(&self, run_id: &str, after: u64) -> Result<EventsAfter> {
        // Read the state before the events: a run already terminal has stored all its
        // events, so an empty read after it means the caller has seen them all. (Read after
        // the events, a run that ended in between would end the stream without its terminal
        // event.)
        let ended = matches!(self.store.run(run_id), Ok(Some(run)) if run.state.is_terminal());
        let events = self.store.events(run_id, after)?;
        let finished = events.iter().any(|e| matches!(e.kind, EventKind::Finished { .. }));
        let outcome = if finished { self.outcomes.get(self.store.as_ref(), run_id).ok().flatten() } else { None };
        let drift = if finished { self.store.run(run_id).ok().flatten().and_then(|run| run.drift) } else { None };
        Ok(EventsAfter { events, ended, outcome, drift })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tree::Monotone;

    /// A request without monotone limits or costs digests the text it did before they existed (so a
    /// retry matches runs stored then); one with them digests differently.
    #[test]
    fn monotone_limits_enter_the_digest_only_when_set() {
        let plain = RunRequest {
            dataset: Some(DatasetRef::Name("d".into())),
            target: None,
            spec: SweepSpec::default(),
            default_fold_scheme: false,
            default_outer_scheme: false,
            idempotency_key: None,
            labels: BTreeMap::new(),
        };
        let before = format!("{:?}", (&plain.dataset, "", &plain.spec, false, &plain.labels)).replacen(", outer: None, monotone: [], costs: None }", " }", 1);
        assert!(!before.contains("monotone") && !before.contains("outer") && !before.contains("costs"), "{before}");
        use sha2::{Digest, Sha256};
        assert_eq!(plain.digest(), crate::access::tokens::hex(&Sha256::digest(before.as_bytes())));
        let limited = RunRequest { spec: SweepSpec { monotone: vec![("x".into(), Monotone::Increasing)], ..SweepSpec::default() }, ..plain.clone() };
        assert_ne!(limited.digest(), plain.digest());
    }
}
