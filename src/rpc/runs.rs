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

/// The most encoded bytes of events put in one batch of FollowRunBatches (an event bigger
/// than this goes alone).
const BATCH_BYTES: usize = 1 << 20;

/// Events packed into batches of at most [`BATCH_BYTES`], in order, none empty.
fn batches(events: Vec<pb::RunEvent>) -> Vec<pb::RunEventBatch> {
    let mut out: Vec<pb::RunEventBatch> = Vec::new();
    let mut bytes = 0;
    for e in events {
        let size = prost::Message::encoded_len(&e);
        match out.last_mut() {
            Some(b) if bytes + size <= BATCH_BYTES => b.events.push(e),
            _ => {
                out.push(pb::RunEventBatch { events: vec![e] });
                bytes = 0;
            }
        }
        bytes += size;
    }
    out
}

/// How often a follower looks for events of a shared store with no notification.
const SHARED_STORE_POLL: std::time::Duration = std::time::Duration::from_secs(1);

impl Api {
    /// StartRun in core terms: see [`Service::queue_run`].
    pub async fn queue_run(&self, caller: &Caller, r: pb::StartRunRequest) -> Result<Run, Status> {
        Ok(self.shared.queue_run(caller, convert::run_request(r)?).await?)
    }

    /// The stream of a follow call: the run's events after `r.after_sequence`, then live ones
    /// until its terminal event, each page of events known at once packed into messages by
    /// `pack` (one message per event for FollowRun, few for FollowRunBatches).
    fn follow<T: Send + 'static>(&self, r: pb::FollowRunRequest, pack: fn(Vec<pb::RunEvent>) -> Vec<T>) -> Result<Messages<T>, Status> {
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
                // Up to and including a terminal event: nothing follows one.
                let last = events.iter().position(|e| e.is_terminal()).map_or(events.len(), |i| i + 1);
                let terminal = events[..last].last().is_some_and(|e| e.is_terminal());
                let msgs: Vec<pb::RunEvent> = events[..last].iter().map(|e| convert::event_to(&r.id, e, page.outcome.as_deref(), page.drift.as_ref())).collect();
                if let Some(e) = events[..last].last() {
                    after = e.sequence;
                }
                let sent = msgs.len() as u64;
                for m in pack(msgs) {
                    if tx.send(Ok(m)).await.is_err() {
                        return;
                    }
                }
                shared.metrics.events_streamed.inc_by(sent);
                if terminal || (events.is_empty() && ended) {
                    // The run's end is sent, or the caller has seen every event of an ended run.
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
        Ok(Box::pin(ReceiverStream::new(rx)))
    }
}

/// A server stream of `T` messages.
type Messages<T> = Pin<Box<dyn Stream<Item = Result<T, Status>> + Send>>;

#[tonic::async_trait]
impl pb::runs_server::Runs for Api {
    async fn start_run(&self, request: Request<pb::StartRunRequest>) -> Result<Response<pb::RunInfo>, Status> {
        let caller = Caller::of(&request);
        let run = self.queue_run(&caller, request.into_inner()).await?;
        Ok(Response::new(convert::run_info(&run, None)))
    }

    type FollowRunStream = Messages<pb::RunEvent>;

    async fn follow_run(&self, request: Request<pb::FollowRunRequest>) -> Result<Response<Self::FollowRunStream>, Status> {
        let stream = self.follow(request.into_inner(), |events| events)?;
        Ok(Response::new(stream))
    }

    type FollowRunBatchesStream = Messages<pb::RunEventBatch>;

    async fn follow_run_batches(&self, request: Request<pb::FollowRunRequest>) -> Result<Response<Self::FollowRunBatchesStream>, Status> {
        let stream = self.follow(request.into_inner(), batches)?;
        Ok(Response::new(stream))
    }

    async fn get_run(&self, request: Request<pb::GetRunRequest>) -> Result<Response<pb::RunInfo>, Status> {
        let (run, outcome) = self.shared.run_with_outcome(&request.into_inner().id)?;
        Ok(Response::new(convert::run_info(&run, outcome.as_deref())))
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

#[cfg(test)]
mod tests {
    use super::*;

    fn scored(sequence: u64, bytes: usize) -> pb::RunEvent {
        pb::RunEvent { sequence, run_id: "r".repeat(bytes), ..Default::default() }
    }

    #[test]
    fn batches_keep_order_and_stay_under_the_byte_cap() {
        assert!(batches(Vec::new()).is_empty());
        let small: Vec<pb::RunEvent> = (1..=500).map(|i| scored(i, 10)).collect();
        let b = batches(small.clone());
        assert_eq!(b.len(), 1, "500 small events fit one batch");
        assert_eq!(b[0].events, small);
        // 3 events of 0.4 MiB: two to a batch; one of 2 MiB goes alone.
        let big = vec![scored(1, 400_000), scored(2, 400_000), scored(3, 400_000), scored(4, 2 << 20), scored(5, 10)];
        let b = batches(big.clone());
        let shape: Vec<Vec<u64>> = b.iter().map(|x| x.events.iter().map(|e| e.sequence).collect()).collect();
        assert_eq!(shape, vec![vec![1, 2], vec![3], vec![4], vec![5]]);
        for x in &b {
            let size: usize = x.events.iter().map(prost::Message::encoded_len).sum();
            assert!(x.events.len() == 1 || size <= BATCH_BYTES, "{size}");
        }
    }
}
