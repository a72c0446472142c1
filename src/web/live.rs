//! A run's progress as server-sent events, read from the same event log that FollowRun
//! reads ([`Service::events_after`]). Each message carries the sequence number of the last
//! stored event it covers as its `id`, so a browser that reconnects (sending
//! `Last-Event-ID`), or a page that asks with `?after=N`, resumes where it was. One
//! `progress` message per batch of stored events (`{"state", "done", "total"}` as JSON),
//! then one `end` message when the run has ended; the stream closes at shutdown.

use std::collections::HashMap;
use std::convert::Infallible;

use axum::extract::{Path, Query, State};
use axum::http::HeaderMap;
use axum::response::sse::{Event as Sse, KeepAlive};
use axum::response::{IntoResponse, Response};
use tokio_stream::wrappers::ReceiverStream;

use super::{admit, Failure, Web};
use crate::access::Rpc;
use crate::service::Service;

pub async fn events(State(web): State<Web>, headers: HeaderMap, Path(id): Path<String>, Query(q): Query<HashMap<String, String>>) -> Result<Response, Failure> {
    admit(&web, &headers, Rpc::FollowRun)?;
    web.service.run("id", &id)?;
    let resume = headers.get("last-event-id").and_then(|v| v.to_str().ok()).and_then(|v| v.parse::<u64>().ok());
    let after = resume.or_else(|| q.get("after").and_then(|v| v.parse().ok())).unwrap_or(0);
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<Sse, Infallible>>(16);
    let service = web.service.clone();
    tokio::spawn(follow(service, id, after, tx));
    Ok(axum::response::Sse::new(ReceiverStream::new(rx)).keep_alive(KeepAlive::default()).into_response())
}

/// Sends one message per batch of new events until the run ends, the page goes away or the
/// server stops. Marks the change counter seen before each read, as FollowRun does, so no
/// event slips between a read and the wait.
async fn follow(service: std::sync::Arc<Service>, id: String, mut after: u64, tx: tokio::sync::mpsc::Sender<Result<Sse, Infallible>>) {
    let mut changed = service.changed.subscribe();
    let mut shutdown = service.shutdown.subscribe();
    loop {
        if *shutdown.borrow_and_update() {
            return;
        }
        changed.borrow_and_update();
        let Ok(page) = service.events_after(&id, after) else { return };
        let ended = page.ended || page.events.iter().any(|e| e.is_terminal());
        if let Some(last) = page.events.last() {
            after = last.sequence;
            service.metrics.events_streamed.inc_by(page.events.len() as u64);
            let Ok(run) = service.run("id", &id) else { return };
            let data = serde_json::json!({"state": run.state.as_str(), "done": run.units_done, "total": run.units_total}).to_string();
            if tx.send(Ok(Sse::default().event("progress").id(after.to_string()).data(data))).await.is_err() {
                return;
            }
        }
        if ended {
            let _ = tx.send(Ok(Sse::default().event("end").id(after.to_string()).data("ended"))).await;
            return;
        }
        tokio::select! {
            _ = changed.changed() => {}
            _ = shutdown.changed() => return,
            _ = tx.closed() => return,
        }
    }
}
