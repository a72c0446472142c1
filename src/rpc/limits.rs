//! The transport guard: one tower layer around every service that
//! - gives the calls that store a dataset (Upload, PutTable) one of `max_concurrent_uploads`
//!   slots, waiting up to `upload_wait_secs` for one (then RESOURCE_EXHAUSTED);
//! - counts the request bytes of the calls that send a table (those two and Predict) against
//!   `max_upload_bytes_in_flight` (held until the reply is sent; a call that would go over
//!   gets RESOURCE_EXHAUSTED at once, since waiting while holding bytes could deadlock) and
//!   ends such a call when its data stops arriving for `upload_idle_secs` (DEADLINE_EXCEEDED);
//!   these checks run as the bytes arrive, before tonic decodes a message, since a unary
//!   message is decoded whole before its handler runs;
//! - turns tonic's OUT_OF_RANGE for a message over a size limit into RESOURCE_EXHAUSTED
//!   naming the limit ([`error::message_too_large`]), in trailers-only replies (a refused
//!   request) and in trailers (a reply over its limit).

use std::future::Future;
use std::pin::Pin;
use std::sync::{Arc, Mutex};
use std::task::{Context, Poll};
use std::time::Duration;

use bytes::Bytes;
use http::{HeaderMap, Request, Response};
use http_body::Frame;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};
use tonic::body::Body;
use tonic::Status;

use super::error;
use crate::config::{Config, MessageLimits};

/// The calls whose requests may be as large as a table: their bytes are counted and they end
/// when data stops arriving.
const TABLE_CALLS: [&str; 3] = ["/pollard.v1.Datasets/Upload", "/pollard.v1.Datasets/PutTable", "/pollard.v1.Models/Predict"];
/// The calls that store a dataset: they also take an upload slot.
const UPLOAD_CALLS: [&str; 2] = ["/pollard.v1.Datasets/Upload", "/pollard.v1.Datasets/PutTable"];

/// What the guard shares across calls.
struct Gate {
    messages: MessageLimits,
    slots: Arc<Semaphore>,
    max_slots: usize,
    /// How long a call waits for a slot before it is refused.
    slot_wait: Duration,
    bytes: Arc<Semaphore>,
    max_bytes: u64,
    idle: Duration,
}

/// The layer to give `tonic::transport::Server::builder().layer`.
#[derive(Clone)]
pub struct GuardLayer(Arc<Gate>);

impl GuardLayer {
    pub fn new(config: &Config) -> GuardLayer {
        let max_bytes = config.max_upload_bytes_in_flight.min(Semaphore::MAX_PERMITS as u64);
        GuardLayer(Arc::new(Gate {
            messages: config.messages,
            slots: Arc::new(Semaphore::new(config.max_concurrent_uploads.min(Semaphore::MAX_PERMITS))),
            max_slots: config.max_concurrent_uploads,
            slot_wait: Duration::from_secs(config.upload_wait_secs),
            bytes: Arc::new(Semaphore::new(max_bytes as usize)),
            max_bytes,
            idle: Duration::from_secs(config.upload_idle_secs),
        }))
    }
}

impl<S> tower_layer::Layer<S> for GuardLayer {
    type Service = Guard<S>;
    fn layer(&self, inner: S) -> Guard<S> {
        Guard { inner, gate: self.0.clone() }
    }
}

#[derive(Clone)]
pub struct Guard<S> {
    inner: S,
    gate: Arc<Gate>,
}

/// A table call's slot and the request bytes it holds; released when the reply is dropped.
struct Ticket {
    _slot: Option<OwnedSemaphorePermit>,
    bytes: Mutex<Option<OwnedSemaphorePermit>>,
}

impl<S> tower_service::Service<Request<Body>> for Guard<S>
where
    S: tower_service::Service<Request<Body>, Response = Response<Body>> + Clone + Send + 'static,
    S::Future: Send + 'static,
{
    type Response = Response<Body>;
    type Error = S::Error;
    type Future = Pin<Box<dyn Future<Output = Result<Response<Body>, S::Error>> + Send>>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, request: Request<Body>) -> Self::Future {
        // The clone that was made ready is the one to call.
        let clone = self.inner.clone();
        let mut inner = std::mem::replace(&mut self.inner, clone);
        let gate = self.gate.clone();
        let path = request.uri().path().to_string();
        let service = path.trim_start_matches('/').split('/').next().unwrap_or_default().to_string();
        Box::pin(async move {
            let mut ticket = None;
            let request = if TABLE_CALLS.contains(&path.as_str()) {
                let slot = if UPLOAD_CALLS.contains(&path.as_str()) {
                    // Waiting costs a stream and no body bytes: HTTP/2 flow control holds the
                    // caller's data until the body is read.
                    match tokio::time::timeout(gate.slot_wait, gate.slots.clone().acquire_owned()).await {
                        Ok(Ok(slot)) => Some(slot),
                        _ => return Ok(trailers_only(Response::new(Body::empty()), error::uploads_busy(gate.max_slots, gate.slot_wait.as_secs()))),
                    }
                } else {
                    None
                };
                let t = Arc::new(Ticket { _slot: slot, bytes: Mutex::new(None) });
                ticket = Some(t.clone());
                let (parts, body) = request.into_parts();
                let counted = Counted { inner: body, gate: gate.clone(), ticket: t, idle: Box::pin(tokio::time::sleep(gate.idle)) };
                Request::from_parts(parts, Body::new(counted))
            } else {
                request
            };
            let response = inner.call(request).await?;
            let (mut parts, body) = response.into_parts();
            rewrite(&mut parts.headers, &service, &gate.messages);
            Ok(Response::from_parts(parts, Body::new(Rewritten { inner: body, service, gate, _ticket: ticket })))
        })
    }
}

/// A reply that carries only `status`, in its headers.
fn trailers_only(mut response: Response<Body>, status: Status) -> Response<Body> {
    response.headers_mut().insert(http::header::CONTENT_TYPE, http::HeaderValue::from_static("application/grpc"));
    let _ = status.add_header(response.headers_mut());
    response
}

/// Rewrites a size-limit status in headers or trailers (see the module notes).
fn rewrite(headers: &mut HeaderMap, service: &str, limits: &MessageLimits) {
    if headers.get("grpc-status").is_none_or(|v| v.as_bytes() != b"11") {
        return;
    }
    if let Some(better) = Status::from_header_map(headers).and_then(|s| error::message_too_large(&s, service, limits)) {
        headers.remove("grpc-message");
        let _ = better.add_header(headers);
    }
}

/// A table call's request body: counts bytes against the shared budget and ends the call when
/// data stops arriving.
struct Counted {
    inner: Body,
    gate: Arc<Gate>,
    ticket: Arc<Ticket>,
    idle: Pin<Box<tokio::time::Sleep>>,
}

impl http_body::Body for Counted {
    type Data = Bytes;
    type Error = Status;

    fn poll_frame(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Result<Frame<Bytes>, Status>>> {
        let this = &mut *self;
        let frame = match Pin::new(&mut this.inner).poll_frame(cx) {
            Poll::Pending => {
                return match this.idle.as_mut().poll(cx) {
                    Poll::Ready(()) => Poll::Ready(Some(Err(error::upload_idle(this.gate.idle.as_secs())))),
                    Poll::Pending => Poll::Pending,
                };
            }
            Poll::Ready(f) => f,
        };
        let deadline = tokio::time::Instant::now() + this.gate.idle;
        this.idle.as_mut().reset(deadline);
        if let Some(Ok(f)) = &frame {
            if let Some(data) = f.data_ref() {
                let n = u32::try_from(data.len()).unwrap_or(u32::MAX);
                match this.gate.bytes.clone().try_acquire_many_owned(n) {
                    Ok(permit) => {
                        let mut held = this.ticket.bytes.lock().unwrap();
                        match held.as_mut() {
                            Some(h) => h.merge(permit),
                            None => *held = Some(permit),
                        }
                    }
                    Err(_) => return Poll::Ready(Some(Err(error::upload_bytes_busy(this.gate.max_bytes)))),
                }
            }
        }
        Poll::Ready(frame)
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}

/// A reply body whose trailers get the same rewrite as headers, holding the call's ticket.
struct Rewritten {
    inner: Body,
    service: String,
    gate: Arc<Gate>,
    _ticket: Option<Arc<Ticket>>,
}

impl http_body::Body for Rewritten {
    type Data = Bytes;
    type Error = Status;

    fn poll_frame(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Result<Frame<Bytes>, Status>>> {
        let this = &mut *self;
        match Pin::new(&mut this.inner).poll_frame(cx) {
            Poll::Ready(Some(Ok(frame))) => {
                let frame = match frame.into_trailers() {
                    Ok(mut trailers) => {
                        rewrite(&mut trailers, &this.service, &this.gate.messages);
                        Frame::trailers(trailers)
                    }
                    Err(frame) => frame,
                };
                Poll::Ready(Some(Ok(frame)))
            }
            other => other,
        }
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}
