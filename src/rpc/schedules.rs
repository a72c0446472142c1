//! The Schedules service: create, get, list, pause, resume and delete recurring sweeps, and
//! list their fires. The scheduler task ([`crate::scheduler`]) starts the runs.

use tonic::{Request, Response, Status};
use tracing::info;

use super::runs::{check_labels, check_sweep, resolve_dataset};
use super::{convert, error, page_size, token, Api};
use crate::job::{IdKind, Schedule};
use crate::pb;
use crate::schedule::Cron;

/// A new schedule id: "sch_" + a version 7 UUID, which sorts by creation time.
pub fn new_schedule_id() -> String {
    format!("sch_{}", uuid::Uuid::now_v7().simple())
}

impl Api {
    fn schedule_or_not_found(&self, id: &str) -> Result<Schedule, Status> {
        error::check_id("id", IdKind::Schedule, id)?;
        self.shared.store.schedule(id).map_err(error::store)?.ok_or_else(|| error::not_found("schedule", id))
    }

    /// A schedule for the wire, with its next fire and its last fire record.
    fn schedule_reply(&self, s: &Schedule) -> Result<pb::ScheduleInfo, Status> {
        // Fires up to considered_until are handled; the next one may already be due.
        let next = Cron::parse(&s.cron, &s.time_zone).ok().and_then(|c| c.next_after(s.considered_until));
        let (last, _) = self.shared.store.fires(&s.id, None, 1).map_err(error::store)?;
        Ok(convert::schedule_info(s, next, last.first()))
    }
}

#[tonic::async_trait]
impl pb::schedules_server::Schedules for Api {
    async fn create_schedule(&self, request: Request<pb::CreateScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let r = request.into_inner();
        let time_zone = if r.time_zone.is_empty() { "UTC".to_string() } else { r.time_zone.clone() };
        let cron = Cron::parse(&r.cron, &time_zone).and_then(|c| c.check_fires().map(|_| c)).map_err(|e| Status::invalid_argument(e.to_string()))?;
        if r.dataset_name.is_empty() && r.dataset_id.is_empty() {
            return Err(Status::invalid_argument("dataset_name: a schedule sweeps the latest version of a dataset name (or one dataset_id); name it"));
        }
        let catch_up = convert::catch_up_from(r.catch_up)?;
        let drift = convert::thresholds_from(r.drift.as_ref())?;
        // The template must fit the data it will sweep: check it against the latest version.
        let latest = resolve_dataset(&self.shared, &r.dataset_id, &r.dataset_name)?;
        check_labels(&self.shared.config, &r.labels)?;
        let (spec, target, _) = check_sweep(&self.shared, &latest, r.spec.unwrap_or_default()).await?;
        let now = self.shared.now();
        let schedule = Schedule {
            id: new_schedule_id(),
            name: r.name,
            cron: cron.expr().to_string(),
            time_zone,
            dataset_name: if r.dataset_id.is_empty() { r.dataset_name } else { latest.name.clone() },
            dataset_id: (!r.dataset_id.is_empty()).then_some(r.dataset_id),
            target,
            spec,
            labels: r.labels.into_iter().collect(),
            retention: convert::retention_from(r.retention.as_ref()),
            catch_up,
            skip_unchanged: r.skip_unchanged,
            drift,
            paused: false,
            created_at: now,
            considered_until: now,
            last_run_id: None,
            last_dataset_id: None,
            next_fire_sequence: 1,
        };
        if !self.shared.store.create_schedule(&schedule).map_err(error::store)? {
            return Err(Status::already_exists(format!("schedule id '{}' is taken; try again", schedule.id)));
        }
        info!(schedule_id = %schedule.id, cron = %schedule.cron, time_zone = %schedule.time_zone, "schedule created");
        self.shared.schedules_changed.notify_one();
        Ok(Response::new(self.schedule_reply(&schedule)?))
    }

    async fn get_schedule(&self, request: Request<pb::GetScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let s = self.schedule_or_not_found(&request.into_inner().id)?;
        Ok(Response::new(self.schedule_reply(&s)?))
    }

    async fn list_schedules(&self, request: Request<pb::ListSchedulesRequest>) -> Result<Response<pb::ListSchedulesReply>, Status> {
        let r = request.into_inner();
        let (found, next) = self.shared.store.list_schedules(token(&r.page_token), page_size(r.page_size)).map_err(error::store)?;
        let schedules = found.iter().map(|s| self.schedule_reply(s)).collect::<Result<_, _>>()?;
        Ok(Response::new(pb::ListSchedulesReply { schedules, next_page_token: next.unwrap_or_default() }))
    }

    async fn pause_schedule(&self, request: Request<pb::PauseScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let id = request.into_inner().id;
        error::check_id("id", IdKind::Schedule, &id)?;
        let s = self.shared.store.update_schedule(&id, &|s| s.paused = true).map_err(error::store)?.ok_or_else(|| error::not_found("schedule", &id))?;
        info!(schedule_id = %id, "schedule paused");
        Ok(Response::new(self.schedule_reply(&s)?))
    }

    async fn resume_schedule(&self, request: Request<pb::ResumeScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let id = request.into_inner().id;
        error::check_id("id", IdKind::Schedule, &id)?;
        let now = self.shared.now();
        // Fires that fell in the pause were paused on purpose: they are not caught up.
        let s = self
            .shared
            .store
            .update_schedule(&id, &|s| {
                if s.paused {
                    s.paused = false;
                    s.considered_until = s.considered_until.max(now);
                }
            })
            .map_err(error::store)?
            .ok_or_else(|| error::not_found("schedule", &id))?;
        info!(schedule_id = %id, "schedule resumed");
        self.shared.schedules_changed.notify_one();
        Ok(Response::new(self.schedule_reply(&s)?))
    }

    async fn delete_schedule(&self, request: Request<pb::DeleteScheduleRequest>) -> Result<Response<pb::DeleteScheduleReply>, Status> {
        let id = request.into_inner().id;
        error::check_id("id", IdKind::Schedule, &id)?;
        if !self.shared.store.delete_schedule(&id).map_err(error::store)? {
            return Err(error::not_found("schedule", &id));
        }
        info!(schedule_id = %id, "schedule deleted");
        self.shared.schedules_changed.notify_one();
        Ok(Response::new(pb::DeleteScheduleReply {}))
    }

    async fn list_fires(&self, request: Request<pb::ListFiresRequest>) -> Result<Response<pb::ListFiresReply>, Status> {
        let r = request.into_inner();
        error::check_id("schedule_id", IdKind::Schedule, &r.schedule_id)?;
        self.schedule_or_not_found(&r.schedule_id)?;
        let after = match token(&r.page_token) {
            None => None,
            Some(t) => Some(t.parse::<u64>().map_err(|_| Status::invalid_argument(format!("page_token: '{t}' is not a token this listing gave out")))?),
        };
        let (fires, next) = self.shared.store.fires(&r.schedule_id, after, page_size(r.page_size)).map_err(error::store)?;
        Ok(Response::new(pb::ListFiresReply { fires: fires.iter().map(convert::fire_to).collect(), next_page_token: next.unwrap_or_default() }))
    }
}
