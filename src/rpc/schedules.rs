//! The Schedules service: convert, call the service ([`crate::service::schedules`]),
//! convert. The scheduler task ([`crate::scheduler`]) starts the runs.

use tonic::{Request, Response, Status};

use super::{convert, page_size, token, Api};
use crate::pb;
use crate::service::schedules::{ScheduleRequest, ScheduleView};
use crate::service::DatasetRef;

pub use crate::service::schedules::new_schedule_id;

fn reply(v: &ScheduleView) -> pb::ScheduleInfo {
    convert::schedule_info(&v.schedule, v.next_fire, v.last_fire.as_ref())
}

#[tonic::async_trait]
impl pb::schedules_server::Schedules for Api {
    async fn create_schedule(&self, request: Request<pb::CreateScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let r = request.into_inner();
        let catch_up = convert::catch_up_from(r.catch_up)?;
        let drift = convert::thresholds_from(r.drift.as_ref())?;
        let retention = convert::retention_from(r.retention.as_ref());
        let wire = r.spec.unwrap_or_default();
        let (spec, defaults) = convert::spec_request(&wire)?;
        let request = ScheduleRequest {
            name: r.name,
            cron: r.cron,
            time_zone: r.time_zone,
            dataset: DatasetRef::of(&r.dataset_id, &r.dataset_name),
            target: crate::job::given(wire.target),
            spec,
            default_fold_scheme: defaults.folds,
            default_outer_scheme: defaults.outer,
            labels: r.labels.into_iter().collect(),
            retention,
            catch_up,
            skip_unchanged: r.skip_unchanged,
            drift,
        };
        Ok(Response::new(reply(&self.shared.create_schedule(request).await?)))
    }

    async fn get_schedule(&self, request: Request<pb::GetScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        let s = self.shared.schedule("id", &request.into_inner().id)?;
        Ok(Response::new(reply(&self.shared.schedule_view(s)?)))
    }

    async fn list_schedules(&self, request: Request<pb::ListSchedulesRequest>) -> Result<Response<pb::ListSchedulesReply>, Status> {
        let r = request.into_inner();
        let (found, next) = self.shared.list_schedules(token(&r.page_token), page_size(r.page_size))?;
        Ok(Response::new(pb::ListSchedulesReply { schedules: found.iter().map(reply).collect(), next_page_token: next.unwrap_or_default() }))
    }

    async fn pause_schedule(&self, request: Request<pb::PauseScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        Ok(Response::new(reply(&self.shared.pause_schedule(&request.into_inner().id)?)))
    }

    async fn resume_schedule(&self, request: Request<pb::ResumeScheduleRequest>) -> Result<Response<pb::ScheduleInfo>, Status> {
        Ok(Response::new(reply(&self.shared.resume_schedule(&request.into_inner().id)?)))
    }

    async fn delete_schedule(&self, request: Request<pb::DeleteScheduleRequest>) -> Result<Response<pb::DeleteScheduleReply>, Status> {
        self.shared.delete_schedule(&request.into_inner().id)?;
        Ok(Response::new(pb::DeleteScheduleReply {}))
    }

    async fn list_fires(&self, request: Request<pb::ListFiresRequest>) -> Result<Response<pb::ListFiresReply>, Status> {
        let r = request.into_inner();
        let (fires, next) = self.shared.list_fires(&r.schedule_id, token(&r.page_token), page_size(r.page_size))?;
        Ok(Response::new(pb::ListFiresReply { fires: fires.iter().map(convert::fire_to).collect(), next_page_token: next.unwrap_or_default() }))
    }
}
