//! Hostile callers against a real `pollard serve` process (the spawned binary): every request
//! that could crash, stall or exhaust the server gets a clear status, the server stays alive
//! and answering, and the store holds exactly what it held before.
//!
//! The cases are grouped by what they attack:
//! - [`caps`]: sizes computed from a request (grids, repeats, spans, labels, ids, the queue)
//! - [`transport`]: message sizes, uploads, shutdown, bytes that are not gRPC at all
//! - [`input`]: bad tables and unknown ids, the cases that were already refused cleanly
//!
//! Data: the open datasets in tests/data (sources and licences in tests/data/SOURCES.md).

#[path = "../support/process.rs"]
mod process;

mod caps;
mod input;
mod transport;

use process::{Out, Serve};
use serde_json::Value;

/// What a caller can see of the store: every dataset, run and schedule, as the listings give
/// them. Two snapshots are equal when a refused request stored nothing.
pub fn snapshot(server: &Serve) -> Value {
    let datasets = server.run(&["datasets", "--json"]).json();
    let runs = server.run(&["runs", "--json", "--limit", "1000"]).json();
    let schedules = server.run(&["schedule", "list", "--json"]).json();
    serde_json::json!({ "datasets": datasets, "runs": runs, "schedules": schedules })
}

/// Asserts the server process is running and answers a listing.
pub fn assert_alive(server: &mut Serve) {
    assert!(server.alive(), "the server process died:\n{}", server.log());
    let out: Out = server.run(&["datasets", "--json"]);
    assert_eq!(out.code, Some(0), "the server does not answer: {}", out.describe());
}
