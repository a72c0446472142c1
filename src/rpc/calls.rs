//! The outermost tower layer of the gRPC server: counts every call by service, method and
//! status, and observes its latency, in [`crate::metrics::Metrics`]. The status is read
//! where the reply carries it: in the headers of a trailers-only reply (a call refused
//! before its handler ran, by the access gate or the transport guard), else in the trailers
//! at the end of the body. A reply dropped before its trailers (the caller went away) counts
//! as CANCELLED. Its latency runs from the request's arrival to that status, so a stream's
//! is its whole life.

use std::future::Future;
use std::pin::Pin;
use std::sync::Arc;
use std::task::{Context, Poll};
use std::time::Instant;

use bytes::Bytes;
use http::{HeaderMap, Request, Response};
use http_body::Frame;
use tonic::body::Body;
use tonic::Status;

use crate::access::Rpc;
use crate::service::Service as Shared;

/// The gRPC status codes by number, as the gRPC specification names them.
const STATUS_NAMES: [&str; 17] = [
    "OK",
    "CANCELLED",
    "UNKNOWN",
    "INVALID_ARGUMENT",
    "DEADLINE_EXCEEDED",
    "NOT_FOUND",
    "ALREADY_EXISTS",
    "PERMISSION_DENIED",
    "RESOURCE_EXHAUSTED",
    "FAILED_PRECONDITION",
    "ABORTED",
    "OUT_OF_RANGE",
    "UNIMPLEMENTED",
    "INTERNAL",
    "UNAVAILABLE",
    "DATA_LOSS",
    "UNAUTHENTICATED",
];

/// Methods of the services beside pollard's own that the server registers.
const OTHER_METHODS: [(&str, &str); 3] = [("grpc.health.v1.Health", "Check"), ("grpc.health.v1.Health", "Watch"), ("grpc.reflection.v1.ServerReflection", "ServerReflectionInfo")];

/// The (service, method) labels of a request path. Paths the server does not serve are all
/// `unknown`, so a caller cannot grow the number of series.
fn labels(path: &str) -> (String, &'static str) {
    if let Some(rpc) = Rpc::from_path(path) {
        let (service, method) = rpc.name();
        return (format!("pollard.v1.{service}"), method);
    }
    let (service, method) = path.trim_start_matches('/').split_once('/').unwrap_or_default();
    match OTHER_METHODS.iter().find(|(s, m)| *s == service && *m == method) {
        Some((s, m)) => (s.to_string(), *m),
        None => ("unknown".into(), "unknown"),
    }
}

/// The name of the status in `headers` (`grpc-status`), if they carry one.
fn status_in(headers: &HeaderMap) -> Option<&'static str> {
    let code = headers.get("grpc-status")?;
    let n: usize = code.to_str().ok()?.trim().parse().ok()?;
    Some(STATUS_NAMES.get(n).copied().unwrap_or("UNKNOWN"))
}

/// The layer to give `tonic::transport::Server::builder().layer`, before any other.
#[derive(Clone)]
pub struct CallsLayer(Arc<Shared>);

impl CallsLayer {
    pub fn new(shared: Arc<Shared>) -> CallsLayer {
        CallsLayer(shared)
    }
}

impl<S> tower_layer::Layer<S> for CallsLayer {
    type Service = Calls<S>;
    fn layer(&self, inner: S) -> Calls<S> {
        Calls { inner, shared: self.0.clone() }
    }
}

#[derive(Clone)]
pub struct Calls<S> {
    inner: S,
    shared: Arc<Shared>,
}

/// One call on its way: recorded once, when its status is known.
struct Call {
    shared: Arc<Shared>,
    service: String,
    method: &'static str,
    began: Instant,
}

impl Call {
    fn record(self, status: &str) {
        self.shared.metrics.grpc_call(&self.service, self.method, status, self.began.elapsed().as_secs_f64());
    }
}

type BoxFuture<T, E> = Pin<Box<dyn Future<Output = Result<T, E>> + Send>>;

impl<S, B> tower_service::Service<Request<B>> for Calls<S>
where
    S: tower_service::Service<Request<B>, Response = Response<Body>>,
    S::Future: Send + 'static,
    S::Error: Send + 'static,
{
    type Response = Response<Body>;
    type Error = S::Error;
    type Future = BoxFuture<Response<Body>, S::Error>;

    fn poll_ready(&mut self, cx: &mut Context<'_>) -> Poll<Result<(), S::Error>> {
        self.inner.poll_ready(cx)
    }

    fn call(&mut self, request: Request<B>) -> Self::Future {
        let (service, method) = labels(request.uri().path());
        let call = Call { shared: self.shared.clone(), service, method, began: Instant::now() };
        let reply = self.inner.call(request);
        Box::pin(async move {
            let response = match reply.await {
                Ok(r) => r,
                Err(e) => {
                    call.record("UNKNOWN");
                    return Err(e);
                }
            };
            if let Some(status) = status_in(response.headers()) {
                call.record(status);
                return Ok(response);
            }
            let (parts, body) = response.into_parts();
            Ok(Response::from_parts(parts, Body::new(Observed { inner: body, call: Some(call) })))
        })
    }
}

/// A reply body that records its call at the trailers, or as CANCELLED when dropped first.
struct Observed {
    inner: Body,
    call: Option<Call>,
}

impl http_body::Body for Observed {
    type Data = Bytes;
    type Error = Status;

    fn poll_frame(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Result<Frame<Bytes>, Status>>> {
        let this = &mut *self;
        let polled = Pin::new(&mut this.inner).poll_frame(cx);
        match &polled {
            Poll::Ready(Some(Ok(frame))) => {
                if let Some(status) = frame.trailers_ref().map(|t| status_in(t).unwrap_or("UNKNOWN")) {
                    if let Some(call) = this.call.take() {
                        call.record(status);
                    }
                }
            }
            Poll::Ready(Some(Err(_))) | Poll::Ready(None) => {
                if let Some(call) = this.call.take() {
                    call.record("UNKNOWN");
                }
            }
            Poll::Pending => {}
        }
        polled
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}

impl Drop for Observed {
    fn drop(&mut self) {
        if let Some(call) = self.call.take() {
            call.record("CANCELLED");
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn labels_name_served_methods_and_nothing_else() {
        assert_eq!(labels("/pollard.v1.Runs/StartRun"), ("pollard.v1.Runs".to_string(), "StartRun"));
        assert_eq!(labels("/grpc.health.v1.Health/Check"), ("grpc.health.v1.Health".to_string(), "Check"));
        assert_eq!(labels("/pollard.v1.Runs/NoSuchMethod"), ("unknown".to_string(), "unknown"));
        assert_eq!(labels("/junk"), ("unknown".to_string(), "unknown"));
    }

    #[test]
    fn status_names_follow_the_codes() {
        let mut h = HeaderMap::new();
        assert_eq!(status_in(&h), None);
        for (code, name) in [(tonic::Code::Ok, "OK"), (tonic::Code::NotFound, "NOT_FOUND"), (tonic::Code::Unauthenticated, "UNAUTHENTICATED"), (tonic::Code::ResourceExhausted, "RESOURCE_EXHAUSTED")] {
            h.insert("grpc-status", (code as i32).to_string().parse().unwrap());
            assert_eq!(status_in(&h), Some(name));
        }
        h.insert("grpc-status", "99".parse().unwrap());
        assert_eq!(status_in(&h), Some("UNKNOWN"));
    }
}
