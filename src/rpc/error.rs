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
