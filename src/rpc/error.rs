//! The one map from pollard's errors to gRPC statuses.
//!
//! Text a caller sent is echoed only through [`echo`], which cuts it to [`ECHO_CHARS`]
//! characters, so a message stays small whatever was sent.

use tonic::Status;

use crate::data::csv::DataError;
use crate::job::IdKind;
use crate::store::StoreError;
use crate::sweep::{SpecError, SweepError};

pub use crate::service::error::{echo, ServiceError, ECHO_CHARS};

/// THE map from a service error to a gRPC status: the one place a code is chosen for a
/// failure of a service operation. A storage failure is the server's (INTERNAL), never
/// INVALID_ARGUMENT.
impl From<ServiceError> for Status {
    fn from(e: ServiceError) -> Status {
        let message = e.to_string();
        match e {
            ServiceError::NotFound(_) => Status::not_found(message),
            ServiceError::Invalid { .. } => Status::invalid_argument(message),
            ServiceError::TooLarge { .. } => Status::resource_exhausted(message),
            ServiceError::Busy(_) => Status::unavailable(message),
            ServiceError::Precondition(_) => Status::failed_precondition(message),
            ServiceError::Conflict(_) => Status::already_exists(message),
            ServiceError::Denied(_) => Status::permission_denied(message),
            ServiceError::Storage(StoreError::Unavailable(_)) => Status::unavailable(message),
            ServiceError::Storage(_) | ServiceError::Internal(_) => Status::internal(message),
        }
    }
}

/// Bad table data: INVALID_ARGUMENT with the row and column in the message, or
/// RESOURCE_EXHAUSTED for the row and column caps.
pub fn data(e: &DataError) -> Status {
    ServiceError::data(e, 0, 0).into()
}

/// A bad sweep spec: INVALID_ARGUMENT with the field path, or RESOURCE_EXHAUSTED naming the
/// cap and its value.
pub fn spec(e: &SpecError) -> Status {
    ServiceError::spec(e).into()
}

pub fn sweep(e: &SweepError) -> Status {
    match e {
        SweepError::Spec(s) => spec(s),
        SweepError::Fit(f) => ServiceError::invalid("", f.to_string()).into(),
        SweepError::Cancelled => Status::cancelled("the sweep was cancelled"),
    }
}

/// A request above a server cap: RESOURCE_EXHAUSTED naming the field, the cap (its
/// configuration key) and its value.
pub fn cap(field: &str, detail: &str, cap: &str, limit: u64) -> Status {
    ServiceError::cap(field, detail, cap, limit).into()
}

/// A panic in a call's CPU work: the call fails, the server goes on.
pub fn panicked(message: &str) -> Status {
    ServiceError::panicked(message).into()
}

/// Storage failures are the server's, never the caller's.
/// A store failure: UNAVAILABLE when the backend cannot be reached now (a retry may
/// succeed), INTERNAL otherwise.
pub fn store(e: StoreError) -> Status {
    ServiceError::Storage(e).into()
}

pub fn not_found(what: &str, id: &str) -> Status {
    ServiceError::not_found(what, id).into()
}

/// Checks an id's shape before it is looked up: INVALID_ARGUMENT naming the field when it
/// cannot be an id of that kind.
pub fn check_id(field: &str, kind: IdKind, id: &str) -> Result<(), Status> {
    Ok(ServiceError::check_id(field, kind, id)?)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn statuses_by_kind() {
        let s: Status = ServiceError::Storage(StoreError::Corrupt("x".into())).into();
        assert_eq!((s.code(), s.message()), (tonic::Code::Internal, "storage: store data is corrupt: x"));
        let s: Status = ServiceError::cap("queue", "3 runs are queued", "max_queued_runs", 3).into();
        assert_eq!((s.code(), s.message()), (tonic::Code::ResourceExhausted, "queue: 3 runs are queued, more than the cap max_queued_runs = 3"));
        let s = not_found("run", &"x".repeat(10_000));
        assert!(s.message().len() < 200, "{}", s.message());
    }
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
