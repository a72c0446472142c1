//! The one map from pollard's errors to gRPC statuses.

use tonic::Status;

use crate::data::csv::{DataError, DataErrorKind};
use crate::store::StoreError;
use crate::sweep::{SpecError, SweepError};

/// Bad table data: INVALID_ARGUMENT with the row and column in the message, or
/// RESOURCE_EXHAUSTED for the row and column caps.
pub fn data(e: &DataError) -> Status {
    match e.kind {
        DataErrorKind::TooManyRows | DataErrorKind::TooManyColumns => Status::resource_exhausted(e.to_string()),
        DataErrorKind::Io => Status::internal(e.to_string()),
        _ => Status::invalid_argument(e.to_string()),
    }
}

/// A bad sweep spec: INVALID_ARGUMENT with the field path, or RESOURCE_EXHAUSTED for the
/// settings cap.
pub fn spec(e: &SpecError) -> Status {
    if e.field == "settings" {
        Status::resource_exhausted(format!("spec.{e}"))
    } else {
        Status::invalid_argument(format!("spec.{e}"))
    }
}

pub fn sweep(e: &SweepError) -> Status {
    match e {
        SweepError::Spec(s) => spec(s),
        SweepError::Fit(f) => Status::invalid_argument(f.to_string()),
        SweepError::Cancelled => Status::cancelled("the sweep was cancelled"),
    }
}

/// Storage failures are the server's, never the caller's.
pub fn store(e: StoreError) -> Status {
    Status::internal(format!("storage: {e}"))
}

pub fn not_found(what: &str, id: &str) -> Status {
    Status::not_found(format!("no {what} with id '{id}'"))
}

/// Which way a message went.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Direction {
    Request,
    Reply,
}

/// tonic refuses a message over a service's size limit with OUT_OF_RANGE; a caller sent (or
/// asked for) too much, so it becomes RESOURCE_EXHAUSTED naming the limit and its config key.
/// `None` for every other status.
pub fn message_too_large(status: &Status, service: &str, limits: &crate::config::MessageLimits) -> Option<Status> {
    if status.code() != tonic::Code::OutOfRange {
        return None;
    }
    let m = status.message();
    let direction = if m.starts_with("Error, decoded message length too large") {
        Direction::Request
    } else if m.starts_with("Error, encoded message length too large") {
        Direction::Reply
    } else {
        return None;
    };
    let number = |after: &str| m.split(after).nth(1).and_then(|r| r.split(' ').next()).unwrap_or("?").to_string();
    let (found, limit) = (number("found "), number("limit is: "));
    let (what, key) = match (limits.of(service), direction) {
        (Some((_, key, _)), Direction::Request) => ("request", key),
        (Some((_, _, key)), Direction::Reply) => ("reply", key),
        (None, Direction::Request) => ("request", "fixed"),
        (None, Direction::Reply) => ("reply", "fixed"),
    };
    Some(Status::resource_exhausted(format!("the {what} message is {found} bytes, over the limit of {limit} bytes for {service} ({key})")))
}

/// An upload that found `limit` uploads running for `waited` seconds.
pub fn uploads_busy(limit: usize, waited: u64) -> Status {
    Status::resource_exhausted(format!("{limit} uploads (Upload, PutTable) are running, the limit (max_concurrent_uploads), and none ended within {waited} s (upload_wait_secs); try again later"))
}

/// Request bytes that would take the calls sending tables over their shared budget.
pub fn upload_bytes_busy(limit: u64) -> Status {
    Status::resource_exhausted(format!("the calls sending tables would hold more than {limit} bytes at once, the limit (max_upload_bytes_in_flight); try again when others have finished"))
}

/// A call that sends a table went quiet for too long.
pub fn upload_idle(secs: u64) -> Status {
    Status::deadline_exceeded(format!("no data arrived for {secs} s (upload_idle_secs); the call is ended"))
}

/// An open call ended because the server stops.
pub fn shutting_down(what_next: &str) -> Status {
    Status::unavailable(format!("the server is shutting down; {what_next}"))
}

/// An upload could not be staged (the server's disk, not the caller).
pub fn staging(e: std::io::Error) -> Status {
    Status::internal(format!("staging the upload: {e}"))
}
