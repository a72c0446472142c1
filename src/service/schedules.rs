//! Schedules: create, get, list, pause, resume and delete recurring sweeps, and list their
//! fires. The scheduler task ([`crate::scheduler`]) starts their runs through the same
//! admission as StartRun.

use std::collections::BTreeMap;
use std::sync::Arc;

use tracing::info;

use super::error::{Result, ServiceError};
use super::runs::{check_labels, DatasetRef};
use super::Service;
use crate::drift::DriftThresholds;
use crate::job::{Fire, IdKind, Retention, Schedule};
use crate::schedule::{CatchUp, Cron};
use crate::sweep::SweepSpec;

/// A new schedule id: "sch_" + a version 7 UUID, which sorts by creation time.
pub fn new_schedule_id() -> String {
    format!("sch_{}", uuid::Uuid::now_v7().simple())
}

/// A schedule to create, in core types.
pub struct ScheduleRequest {
    pub name: String,
    pub cron: String,
    /// Empty for UTC.
    pub time_zone: String,
    /// A name (its latest version at each fire) or one dataset id; `None` is refused.
    pub dataset: Option<DatasetRef>,
    /// `None` for the dataset's own target.
    pub target: Option<String>,
    pub spec: SweepSpec,
    /// See [`super::RunRequest::default_fold_scheme`].
    pub default_fold_scheme: bool,
    /// The same for the outer plan of a nested sweep.
    pub default_outer_scheme: bool,
    pub labels: BTreeMap<String, String>,
    pub retention: Retention,
    pub catch_up: CatchUp,
    pub skip_unchanged: bool,
    pub drift: DriftThresholds,
}

/// A schedule with its next fire instant and its last fire record.
pub struct ScheduleView {
    pub schedule: Schedule,
    pub next_fire: Option<i64>,
    pub last_fire: Option<Fire>,
}

impl Service {
    /// Checks the crontab expression and the template against the latest version of the
    /// data it will sweep, and stores the schedule.
    pub async fn create_schedule(self: &Arc<Self>, r: ScheduleRequest) -> Result<ScheduleView> {
        let time_zone = if r.time_zone.is_empty() { "UTC".to_string() } else { r.time_zone.clone() };
        let cron = Cron::parse(&r.cron, &time_zone).and_then(|c| c.check_fires().map(|_| c)).map_err(|e| ServiceError::invalid("", e.to_string()))?;
        let Some(dataset) = r.dataset else {
            return Err(ServiceError::invalid("dataset_name", "a schedule sweeps the latest version of a dataset name (or one dataset_id); name it"));
        };
        // The template must fit the data it will sweep: check it against the latest version.
        let latest = self.resolve_dataset(Some(&dataset))?;
        check_labels(&self.config, &r.labels)?;
        let (spec, target, _) = self.check_sweep(&latest, r.target.as_deref(), r.spec, super::runs::SchemeDefaults { folds: r.default_fold_scheme, outer: r.default_outer_scheme }).await?;
        let now = self.now();
        let (dataset_name, dataset_id) = match dataset {
            DatasetRef::Id(id) => (latest.name.clone(), Some(id)),
            DatasetRef::Name(name) => (name, None),
        };
        let schedule = Schedule {
            id: new_schedule_id(),
            name: r.name,
            cron: cron.expr().to_string(),
            time_zone,
            dataset_name,
            dataset_id,
            target,
            spec,
            labels: r.labels,
            retention: r.retention,
            catch_up: r.catch_up,
            skip_unchanged: r.skip_unchanged,
            drift: r.drift,
            paused: false,
            created_at: now,
            considered_until: now,
            last_run_id: None,
            last_dataset_id: None,
            next_fire_sequence: 1,
        };
        if !self.store.create_schedule(&schedule)? {
            return Err(ServiceError::Conflict(format!("schedule id '{}' is taken; try again", schedule.id)));
        }
        info!(schedule_id = %schedule.id, cron = %schedule.cron, time_zone = %schedule.time_zone, "schedule created");
        self.schedules_changed.notify_one();
        self.schedule_view(schedule)
    }

    /// A schedule with its next fire and its last fire record.
    pub fn schedule_view(&self, schedule: Schedule) -> Result<ScheduleView> {
        // Fires up to considered_until are handled; the next one may already be due.
        let next_fire = Cron::parse(&schedule.cron, &schedule.time_zone).ok().and_then(|c| c.next_after(schedule.considered_until));
        let (last, _) = self.store.fires(&schedule.id, None, 1)?;
        Ok(ScheduleView { schedule, next_fire, last_fire: last.into_iter().next() })
    }

    /// A schedule by id (`field` names the request field in messages).
    pub fn schedule(&self, field: &str, id: &str) -> Result<Schedule> {
        ServiceError::check_id(field, IdKind::Schedule, id)?;
        self.store.schedule(id)?.ok_or_else(|| ServiceError::not_found("schedule", id))
    }

    pub fn list_schedules(&self, page_token: Option<&str>, page_size: usize) -> Result<(Vec<ScheduleView>, Option<String>)> {
        let (found, next) = self.store.list_schedules(page_token, page_size)?;
        Ok((found.into_iter().map(|s| self.schedule_view(s)).collect::<Result<_>>()?, next))
    }

    pub fn pause_schedule(&self, id: &str) -> Result<ScheduleView> {
        ServiceError::check_id("id", IdKind::Schedule, id)?;
        let s = self.store.update_schedule(id, &|s| s.paused = true)?.ok_or_else(|| ServiceError::not_found("schedule", id))?;
        info!(schedule_id = %id, "schedule paused");
        self.schedule_view(s)
    }

    pub fn resume_schedule(&self, id: &str) -> Result<ScheduleView> {
        ServiceError::check_id("id", IdKind::Schedule, id)?;
        let now = self.now();
        // Fires that fell in the pause were paused on purpose: they are not caught up.
        let s = self
            .store
            .update_schedule(id, &|s| {
                if s.paused {
                    s.paused = false;
                    s.considered_until = s.considered_until.max(now);
                }
            })?
            .ok_or_else(|| ServiceError::not_found("schedule", id))?;
        info!(schedule_id = %id, "schedule resumed");
        self.schedules_changed.notify_one();
        self.schedule_view(s)
    }

    pub fn delete_schedule(&self, id: &str) -> Result<()> {
        ServiceError::check_id("id", IdKind::Schedule, id)?;
        if !self.store.delete_schedule(id)? {
            return Err(ServiceError::not_found("schedule", id));
        }
        info!(schedule_id = %id, "schedule deleted");
        self.schedules_changed.notify_one();
        Ok(())
    }

    /// A page of a schedule's fires, newest first, below the page token's fire.
    pub fn list_fires(&self, schedule_id: &str, page_token: Option<&str>, page_size: usize) -> Result<(Vec<Fire>, Option<String>)> {
        self.schedule("schedule_id", schedule_id)?;
        let after = match page_token {
            None => None,
            Some(t) => Some(crate::store::paging::fire_token(t).ok_or_else(|| ServiceError::invalid("page_token", format!("'{}' is not a token this listing gave out", t.chars().take(100).collect::<String>())))?),
        };
        Ok(self.store.fires(schedule_id, after, page_size)?)
    }
}
