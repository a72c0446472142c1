//! What a service operation can fail with, whoever called it (a gRPC handler, the
//! scheduler, the command line). Transport-free: the one map to a gRPC status is
//! `impl From<ServiceError> for tonic::Status` in `rpc/error.rs`.
//!
//! Messages are built here once, so every caller shows the same words. Text a caller sent is
//! echoed only through [`echo`], cut at [`ECHO_CHARS`] characters.

use std::fmt;

use crate::data::csv::{DataError, DataErrorKind};
use crate::job::IdKind;
use crate::store::StoreError;
use crate::sweep::{SpecError, SpecErrorKind};

/// The most characters of a caller's text quoted back in a message.
pub const ECHO_CHARS: usize = 100;

/// A caller's text as quoted in messages: cut at [`ECHO_CHARS`] characters with an ellipsis.
pub fn echo(text: &str) -> String {
    match text.char_indices().nth(ECHO_CHARS) {
        None => text.to_string(),
        Some((cut, _)) => format!("{}… ({} bytes in all)", &text[..cut], text.len()),
    }
}

/// Why a service operation failed.
#[derive(Debug, Clone, PartialEq)]
pub enum ServiceError {
    /// No such dataset, run or schedule; the message names it.
    NotFound(String),
    /// The request is wrong: `field` is the path of the value at fault (empty when the
    /// message locates it itself, as a table's row and column do).
    Invalid { field: String, message: String },
    /// The request asks for more than a cap allows: `what` is the field or resource, `limit`
    /// the cap's value; `message` names the cap by its configuration key.
    TooLarge { what: String, limit: u64, message: String },
    /// The server cannot take it now (it is shutting down); try again later.
    Busy(String),
    /// The thing is not in a state that allows the call (a run without a model yet, a
    /// dataset a live run uses, a model ONNX cannot express).
    Precondition(String),
    /// Another request already holds this name or key.
    Conflict(String),
    /// The caller's role or token does not allow it.
    Denied(String),
    /// The store failed: the server's fault, never the caller's.
    Storage(StoreError),
    /// Anything else that is the server's fault (a panic in a call, a staging file).
    Internal(String),
}

pub type Result<T, E = ServiceError> = std::result::Result<T, E>;

impl ServiceError {
    pub fn invalid(field: impl Into<String>, message: impl Into<String>) -> ServiceError {
        ServiceError::Invalid { field: field.into(), message: message.into() }
    }

    /// A request above a server cap, naming the field, the cap (its configuration key) and
    /// its value.
    pub fn cap(field: &str, detail: &str, cap: &str, limit: u64) -> ServiceError {
        ServiceError::TooLarge { what: field.to_string(), limit, message: format!("{field}: {detail}, more than the cap {cap} = {limit}") }
    }

    pub fn not_found(what: &str, id: &str) -> ServiceError {
        ServiceError::NotFound(format!("no {what} with id '{}'", echo(id)))
    }

    /// A panic in a call's CPU work: the call fails, the server goes on.
    pub fn panicked(message: &str) -> ServiceError {
        ServiceError::Internal(format!("the call failed on an internal error: {message}"))
    }

    /// Bad table data: the row and column are in the message; the row and column caps are
    /// `TooLarge`, a read failure is the server's.
    pub fn data(e: &DataError, max_rows: usize, max_columns: usize) -> ServiceError {
        match e.kind {
            DataErrorKind::TooManyRows => ServiceError::TooLarge { what: "rows".into(), limit: max_rows as u64, message: e.to_string() },
            DataErrorKind::TooManyColumns => ServiceError::TooLarge { what: "columns".into(), limit: max_columns as u64, message: e.to_string() },
            DataErrorKind::Io => ServiceError::Internal(e.to_string()),
            _ => ServiceError::invalid("", e.to_string()),
        }
    }

    /// A bad sweep spec, with the field path under `spec.`.
    pub fn spec(e: &SpecError) -> ServiceError {
        let field = format!("spec.{}", e.field);
        match e.kind {
            SpecErrorKind::OverCap { limit, .. } => ServiceError::TooLarge { what: field, limit, message: format!("spec.{e}") },
            SpecErrorKind::Invalid => ServiceError::Invalid { field, message: e.message.clone() },
        }
    }

    /// Checks an id's shape before it is looked up: `Invalid` naming the field when it
    /// cannot be an id of that kind.
    pub fn check_id(field: &str, kind: IdKind, id: &str) -> Result<()> {
        if kind.is_well_formed(id) {
            Ok(())
        } else {
            Err(ServiceError::invalid(field, format!("'{}' is not a {} id ({})", echo(id), kind.noun(), kind.shape())))
        }
    }
}

impl From<StoreError> for ServiceError {
    fn from(e: StoreError) -> ServiceError {
        ServiceError::Storage(e)
    }
}

impl fmt::Display for ServiceError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ServiceError::Invalid { field, message } if field.is_empty() => f.write_str(message),
            ServiceError::Invalid { field, message } => write!(f, "{field}: {message}"),
            ServiceError::TooLarge { message, .. } => f.write_str(message),
            ServiceError::Storage(e) => write!(f, "storage: {e}"),
            ServiceError::NotFound(m) | ServiceError::Busy(m) | ServiceError::Precondition(m) | ServiceError::Conflict(m) | ServiceError::Denied(m) | ServiceError::Internal(m) => f.write_str(m),
        }
    }
}

impl std::error::Error for ServiceError {}

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
        let s = ServiceError::not_found("run", &"x".repeat(10_000)).to_string();
        assert!(s.len() < 200, "{s}");
    }

    #[test]
    fn messages_keep_their_words() {
        assert_eq!(ServiceError::cap("labels", "40 labels", "max_labels", 32).to_string(), "labels: 40 labels, more than the cap max_labels = 32");
        assert_eq!(ServiceError::invalid("spec.task", "'x' is not classify or regress").to_string(), "spec.task: 'x' is not classify or regress");
        assert_eq!(ServiceError::Storage(StoreError::Io("disk gone".into())).to_string(), "storage: store I/O error: disk gone");
    }
}
