//! The one map from pollard's errors to gRPC statuses.
//!
//! Text a caller sent is echoed only through [`echo`], which cuts it to [`ECHO_CHARS`]
//! characters, so a message stays small whatever was sent.

use tonic::Status;

use crate::data::csv::{DataError, DataErrorKind};
use crate::job::IdKind;
use crate::store::StoreError;
use crate::sweep::{SpecError, SpecErrorKind, SweepError};

/// The most characters of a caller's text quoted back in a message.
pub const ECHO_CHARS: usize = 100;

/// A caller's text as quoted in messages: cut at [`ECHO_CHARS`] characters with an ellipsis.
pub fn echo(text: &str) -> String {
    match text.char_indices().nth(ECHO_CHARS) {
        None => text.to_string(),
        Some((cut, _)) => format!("{}… ({} bytes in all)", &text[..cut], text.len()),
    }
}

/// Bad table data: INVALID_ARGUMENT with the row and column in the message, or
/// RESOURCE_EXHAUSTED for the row and column caps.
pub fn data(e: &DataError) -> Status {
    match e.kind {
        DataErrorKind::TooManyRows | DataErrorKind::TooManyColumns => Status::resource_exhausted(e.to_string()),
        DataErrorKind::Io => Status::internal(e.to_string()),
        _ => Status::invalid_argument(e.to_string()),
    }
}

/// A bad sweep spec: INVALID_ARGUMENT with the field path, or RESOURCE_EXHAUSTED naming the
/// cap and its value.
pub fn spec(e: &SpecError) -> Status {
    match e.kind {
        SpecErrorKind::OverCap { .. } => Status::resource_exhausted(format!("spec.{e}")),
        SpecErrorKind::Invalid => Status::invalid_argument(format!("spec.{e}")),
    }
}

pub fn sweep(e: &SweepError) -> Status {
    match e {
        SweepError::Spec(s) => spec(s),
        SweepError::Fit(f) => Status::invalid_argument(f.to_string()),
        SweepError::Cancelled => Status::cancelled("the sweep was cancelled"),
    }
}

/// A request above a server cap: RESOURCE_EXHAUSTED naming the field, the cap (its
/// configuration key) and its value.
pub fn cap(field: &str, detail: &str, cap: &str, limit: u64) -> Status {
    Status::resource_exhausted(format!("{field}: {detail}, more than the cap {cap} = {limit}"))
}

/// A panic in a call's CPU work: the call fails, the server goes on.
pub fn panicked(message: &str) -> Status {
    Status::internal(format!("the call failed on an internal error: {message}"))
}

/// Storage failures are the server's, never the caller's.
/// A store failure: UNAVAILABLE when the backend cannot be reached now (a retry may
/// succeed), INTERNAL otherwise.
pub fn store(e: StoreError) -> Status {
    match e {
        StoreError::Unavailable(_) => Status::unavailable(format!("storage: {e}")),
        StoreError::Io(_) | StoreError::Corrupt(_) => Status::internal(format!("storage: {e}")),
    }
}

pub fn not_found(what: &str, id: &str) -> Status {
    Status::not_found(format!("no {what} with id '{}'", echo(id)))
}

/// Checks an id's shape before it is looked up: INVALID_ARGUMENT naming the field when it
/// cannot be an id of that kind.
pub fn check_id(field: &str, kind: IdKind, id: &str) -> Result<(), Status> {
    if kind.is_well_formed(id) {
        Ok(())
    } else {
        Err(Status::invalid_argument(format!("{field}: '{}' is not a {} id ({})", echo(id), kind.noun(), kind.shape())))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn echoes_are_cut() {
        assert_eq!(echo("short"), "short");
        let long = "é".repeat(10_000);
        let e = echo(&long);
        assert!(e.starts_with(&"é".repeat(ECHO_CHARS)) && e.contains("… (20000 bytes in all)"), "{e}");
        assert!(e.len() < 250);
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

/// An upload could not be staged (the server's disk, not the caller).
pub fn staging(e: std::io::Error) -> Status {
    Status::internal(format!("staging the upload: {e}"))
}
