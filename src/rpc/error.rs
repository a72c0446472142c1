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
pub fn store(e: StoreError) -> Status {
    Status::internal(format!("storage: {e}"))
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
