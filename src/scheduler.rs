//! The scheduler: one task that sleeps until the next fire of any schedule (or until a
//! schedule changes, or shutdown), then handles what is due and sleeps again.
//!
//! Handling one due schedule (the decision itself is [`crate::schedule::due`], pure):
//! - fires that passed while the server was down are caught up once, or recorded as
//!   skipped, by the schedule's `catch_up` rule;
//! - a fire whose previous run is still queued or running is recorded as skipped (busy);
//! - with `skip_unchanged`, a fire whose dataset name has no version newer than the last
//!   run's is recorded as skipped (unchanged);
//! - otherwise the template is checked against the latest version of the dataset by the
//!   same admission as StartRun ([`Service::admit_run`]) and queued; the run records the schedule's id.
//!
//! The fire record, the schedule's bookkeeping and the new run are stored in one transaction
//! ([`crate::store::Storage::record_fire`]), and the run's idempotency key is the schedule id
//! and the fire instant, so a crash or a restart never starts one fire twice. After each
//! fire the schedule's retention rule deletes its expired runs and the datasets no stored
//! run uses any more (the latest version of the name always stays).

use std::collections::BTreeSet;
use std::sync::Arc;

use tracing::{error, info, warn};

use crate::job::{Fire, FireOutcome, Run, Schedule};
use crate::schedule::{self, Cron, Due};
use crate::service::{DatasetRef, RunRequest, Service as Shared};
use crate::store::{DeleteDataset, RunFilter, StoreError};

/// Runs until shutdown.
pub async fn scheduler_loop(shared: Arc<Shared>) {
    let mut shutdown = shared.shutdown.subscribe();
    loop {
        if *shutdown.borrow() {
            return;
        }
        let next = tick(&shared).await;
        let clock = shared.clock.clone();
        tokio::select! {
            _ = clock.sleep_until(next.unwrap_or(i64::MAX)) => {}
            _ = shared.schedules_changed.notified() => {}
            _ = shutdown.changed() => {}
        }
    }
}

/// Handles every due schedule once; returns the earliest next fire instant.
pub async fn tick(shared: &Arc<Shared>) -> Option<i64> {
    let now = shared.now();
    let schedules = match shared.store.all_schedules() {
        Ok(s) => s,
        Err(e) => {
            error!("cannot read the schedules: {e}");
            return Some(now + 60_000);
        }
    };
    let grace = (shared.config.fire_grace_secs as i64).saturating_mul(1000);
    let mut earliest: Option<i64> = None;
    for s in schedules.into_iter().filter(|s| !s.paused) {
        let cron = match Cron::parse(&s.cron, &s.time_zone) {
            Ok(c) => c,
            Err(e) => {
                error!(schedule_id = %s.id, "stored schedule does not parse: {e}");
                continue;
            }
        };
        let catch_up = s.catch_up;
        let due = schedule::due(&cron, s.considered_until, now, grace, catch_up);
        if due.considered_until != s.considered_until {
            if let Err(e) = handle(shared, &s, &due, now).await {
                error!(schedule_id = %s.id, "cannot record a fire: {e}");
            }
        }
        if let Some(n) = due.next {
            earliest = Some(earliest.map_or(n, |e| e.min(n)));
        }
    }
    earliest
}

/// Records what one due schedule does now, then applies its retention.
async fn handle(shared: &Arc<Shared>, s: &Schedule, due: &Due, now: i64) -> Result<(), StoreError> {
    let store = &shared.store;
    let mut fire = Fire {
        sequence: 0,
        scheduled_for: due.fire_for.or(due.last_missed).unwrap_or(now),
        handled_at: now,
        outcome: FireOutcome::Started,
        run_id: None,
        missed: due.missed,
        detail: None,
    };
    let run = match due.fire_for {
        None => {
            fire.outcome = FireOutcome::SkippedMissed;
            fire.detail = Some(format!("{} fire(s) passed while the server was down; the catch-up rule is skip", count(due)));
            None
        }
        Some(at) => {
            if !due.on_time {
                fire.detail = Some(format!("catching up {} fire(s) missed while the server was down", count(due)));
            }
            run_for(shared, s, at, &mut fire).await?
        }
    };
    // Counted and recorded under the admission lock, so the queue cap holds exactly.
    let recorded = {
        let _admit = shared.admit.lock().unwrap();
        let (queued, cap) = (store.queued_count()?, shared.config.max_queued_runs);
        let run = if run.is_some() && queued >= cap {
            fire.skip_queue_full(queued, cap);
            None
        } else {
            run
        };
        store.record_fire(&s.id, s.considered_until, due.considered_until, &fire, run.as_ref())?
    };
    match recorded {
        // Another replica recorded this fire (or the schedule changed): its retention is
        // that fire's to apply, once.
        None => {
            warn!(schedule_id = %s.id, "the schedule changed while its fire was handled; it is looked at again");
            return Ok(());
        }
        Some((_, fire, created)) => {
            shared.metrics.fires.with_label_values(&[fire.outcome.as_str()]).inc();
            if let Some(r) = created {
                info!(schedule_id = %s.id, run_id = %r.id, dataset = %r.dataset_id, "scheduled run queued");
                shared.queued.notify_one();
                shared.announce();
            } else {
                info!(schedule_id = %s.id, outcome = fire.outcome.as_str(), "{}", fire.detail.as_deref().unwrap_or(""));
            }
        }
    }
    apply_retention(shared, s, now)
}

/// The checked run a due fire at `at` starts, or `None` with `fire` turned into a skip (the
/// previous run is busy, or the data is unchanged) or a failure. The store checks busy again
/// when the fire is recorded; looking first saves checking a template for nothing.
async fn run_for(shared: &Arc<Shared>, s: &Schedule, at: i64, fire: &mut Fire) -> Result<Option<Run>, StoreError> {
    let store = &shared.store;
    let last = match &s.last_run_id {
        Some(id) => store.run(id)?,
        None => None,
    };
    if let Some(busy) = last.filter(|r| r.state.is_active()) {
        fire.skip_busy(busy);
        return Ok(None);
    }
    let latest = match &s.dataset_id {
        None => store.latest_dataset(&s.dataset_name)?,
        Some(id) => store.dataset(id)?,
    };
    let Some(latest) = latest else {
        fire.fail(match &s.dataset_id {
            None => format!("no dataset named '{}' is stored", s.dataset_name),
            Some(id) => format!("dataset {id} is no longer stored"),
        });
        return Ok(None);
    };
    if s.skip_unchanged && s.last_dataset_id.as_ref() == Some(&latest.id) {
        fire.outcome = FireOutcome::SkippedUnchanged;
        fire.detail = Some(format!("dataset '{}' has no version newer than {} (version {})", s.dataset_name, latest.id, latest.version));
        return Ok(None);
    }
    let request = RunRequest {
        dataset: Some(DatasetRef::Id(latest.id.clone())),
        target: Some(s.target.clone()),
        spec: s.spec.clone(),
        default_fold_scheme: false,
        default_outer_scheme: false,
        idempotency_key: Some(format!("{}@{at}", s.id)),
        labels: s.labels.clone(),
    };
    // The same admission as StartRun's.
    match shared.admit_run(request, Some(s.id.clone())).await {
        Ok(r) => Ok(Some(r)),
        Err(e) => {
            fire.fail(format!("the template no longer fits dataset {}: {e}", latest.id));
            Ok(None)
        }
    }
}

fn count(due: &Due) -> String {
    if due.missed_capped {
        format!("at least {}", due.missed)
    } else {
        due.missed.to_string()
    }
}

/// Deletes the schedule's expired runs, then the datasets they used that no stored run
/// uses any more, apart from the latest version of each name (the next fire's data).
pub fn apply_retention(shared: &Shared, s: &Schedule, now: i64) -> Result<(), StoreError> {
    if s.retention.is_unlimited() {
        return Ok(());
    }
    let store = &shared.store;
    let filter = RunFilter { schedule_id: Some(s.id.clone()), ..RunFilter::default() };
    let mut runs = Vec::new();
    let mut token: Option<String> = None;
    loop {
        let (page, next) = store.list_runs(&filter, token.as_deref(), 500)?;
        runs.extend(page);
        match next {
            Some(t) => token = Some(t),
            None => break,
        }
    }
    let mut datasets = BTreeSet::new();
    for r in s.retention.expired(&runs, now) {
        if store.delete_run(&r.id)? {
            info!(schedule_id = %s.id, run_id = %r.id, "retention deleted a run");
            datasets.insert(r.dataset_id.clone());
        }
    }
    for id in datasets {
        let Some(meta) = store.dataset(&id)? else { continue };
        if !meta.name.is_empty() && store.latest_dataset(&meta.name)?.is_some_and(|l| l.id == id) {
            continue;
        }
        if store.delete_dataset_if_unused(&id)? == DeleteDataset::Deleted {
            info!(schedule_id = %s.id, dataset = %id, "retention deleted a dataset no run uses");
        }
    }
    Ok(())
}
