//! The Runs service: start, follow, get, list and cancel sweeps. Convert the request, call
//! the service ([`crate::service::runs`]), convert the answer.

use std::pin::Pin;

use tokio_stream::wrappers::ReceiverStream;
use tokio_stream::Stream;
use tonic::{Request, Response, Status};

use super::{convert, error, page_size, token, Api};
use std::sync::Arc;

use crate::access::Caller;
use crate::job::Run;
use crate::pb;
use crate::service::Service;
use crate::store::RunFilter;

pub use crate::service::runs::new_run_id;

/// A checked, queued run for a request, not yet stored (the service's admission).
pub async fn prepare_run(shared: &Arc<Service>, r: pb::StartRunRequest, schedule_id: Option<String>) -> Result<Run, Status> {
    Ok(shared.admit_run(convert::run_request(r)?, schedule_id).await?)
}

/// How often a follower looks for events of a shared store with no notification.
const SHARED_STORE_POLL: std::time::Duration = std::time::Duration::from_secs(1);

impl Api {
    /// StartRun in core terms: see [`Service::queue_run`].
    pub async fn queue_run(&self, caller: &Caller, r: pb::StartRunRequest) -> Result<Run, Status> {
        Ok(self.shared.queue_run(caller, convert::run_request(r)?).await?)
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
        self.shared.run("id", &r.id)?;
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
                let page = match shared.events_after(&r.id, after) {
                    Ok(p) => p,
                    Err(e) => {
                        let _ = tx.send(Err(e.into())).await;
                        return;
                    }
                };
                let (events, ended) = (&page.events, page.ended);
                for e in events {
                    after = e.sequence;
                    let msg = convert::event_to(&r.id, e, page.outcome.as_ref(), page.drift.as_ref());
                    if tx.send(Ok(msg)).await.is_err() {
                        return;
                    }
                    shared.metrics.events_streamed.inc();
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
                    // Another replica's events arrive by notification; this is the safety net.
                    _ = tokio::time::sleep(SHARED_STORE_POLL), if shared.store.shared() => {}
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
        let (run, outcome) = self.shared.run_with_outcome(&request.into_inner().id)?;
        Ok(Response::new(convert::run_info(&run, outcome.as_ref())))
    }

    async fn list_runs(&self, request: Request<pb::ListRunsRequest>) -> Result<Response<pb::ListRunsReply>, Status> {
        let r = request.into_inner();
        let label = match r.label.as_str() {
            "" => None,
            l => {
                let (k, v) = l.split_once('=').ok_or_else(|| Status::from(error::ServiceError::invalid("label", format!("'{}' is not key=value", error::echo(l)))))?;
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
        let (runs, next) = self.shared.list_runs(&filter, token(&r.page_token), page_size(r.page_size))?;
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
        let run = self.shared.cancel_run(&caller, &request.into_inner().id)?;
        Ok(Response::new(convert::run_info(&run, None)))
    }
}
