//! gRPC handlers: convert the request, call the core or the store, convert the answer.
//! Every error a caller can cause maps to a status here, in [`error`].

pub mod calls;
pub mod convert;
pub mod datasets;
pub mod error;
pub mod limits;
pub mod models;
pub mod runs;
pub mod schedules;

use std::sync::Arc;

use crate::worker::Shared;

/// The handler state: one per server, shared by the four services.
#[derive(Clone)]
pub struct Api {
    pub shared: Arc<Shared>,
}

/// Page sizes: the default, and the most a caller may ask for.
pub const DEFAULT_PAGE: usize = 50;
pub const MAX_PAGE: usize = 500;

pub fn page_size(asked: u32) -> usize {
    match asked {
        0 => DEFAULT_PAGE,
        n => (n as usize).min(MAX_PAGE),
    }
}

pub fn token(t: &str) -> Option<&str> {
    (!t.is_empty()).then_some(t)
}
