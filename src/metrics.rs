//! What the server counts for Prometheus, served as `/metrics` on the web listener in the
//! Prometheus text format (the `prometheus` crate's encoder). Counters and histograms are
//! bumped where things happen (the worker, the scheduler, the follow streams, the gRPC
//! layer `rpc/calls.rs`); gauges that describe the store (queue depth, runs executing, bytes
//! on disk) are read at each scrape.
//!
//! Names start with `pollard_`; units are in the names (`_seconds`, `_bytes`).

use std::path::Path;

use prometheus::{Encoder, Histogram, HistogramOpts, HistogramVec, IntCounter, IntCounterVec, IntGauge, IntGaugeVec, Opts, Registry, TextEncoder};

/// The server's metrics, registered once per server.
pub struct Metrics {
    registry: Registry,
    /// Work units stored, over every run.
    pub units_computed: IntCounter,
    /// Runs that ended, by end state (`finished`, `failed`, `cancelled`).
    pub runs_ended: IntCounterVec,
    /// Seconds a run executed in this process, by end state.
    pub run_seconds: HistogramVec,
    /// Events sent to followers (gRPC FollowRun and the web view's live pages).
    pub events_streamed: IntCounter,
    /// Schedule fires handled, by outcome.
    pub fires: IntCounterVec,
    /// Seconds one work unit took to compute (every run, on the CPU pool).
    pub unit_seconds: Histogram,
    /// gRPC calls answered, by service, method and status (`rpc/calls.rs` counts them).
    pub grpc_calls: IntCounterVec,
    /// Seconds from a gRPC call's arrival to its status, by service and method.
    pub grpc_seconds: HistogramVec,
    /// Runs by state as the store holds them now: `queued` and `running` (read at scrape).
    runs: IntGaugeVec,
    store_bytes: IntGauge,
}

impl Metrics {
    pub fn new() -> Metrics {
        let registry = Registry::new();
        let units_computed = IntCounter::new("pollard_units_computed_total", "Work units computed and stored.").unwrap();
        let runs_ended = IntCounterVec::new(Opts::new("pollard_runs_ended_total", "Runs that ended in this process, by end state."), &["state"]).unwrap();
        let run_seconds = HistogramVec::new(HistogramOpts::new("pollard_run_seconds", "Seconds a run executed in this process, by end state.").buckets(prometheus::exponential_buckets(0.1, 4.0, 10).unwrap()), &["state"]).unwrap();
        let events_streamed = IntCounter::new("pollard_events_streamed_total", "Run events sent to followers (gRPC and the web view).").unwrap();
        let fires = IntCounterVec::new(Opts::new("pollard_schedule_fires_total", "Schedule fires handled, by outcome."), &["outcome"]).unwrap();
        let unit_seconds = Histogram::with_opts(HistogramOpts::new("pollard_unit_seconds", "Seconds one work unit took to compute.").buckets(prometheus::exponential_buckets(0.001, 4.0, 10).unwrap())).unwrap();
        let grpc_calls = IntCounterVec::new(Opts::new("pollard_grpc_calls_total", "gRPC calls answered, by service, method and status."), &["service", "method", "status"]).unwrap();
        let grpc_seconds = HistogramVec::new(HistogramOpts::new("pollard_grpc_call_seconds", "Seconds from a gRPC call's arrival to its status (a stream: its whole life), by service and method.").buckets(prometheus::exponential_buckets(0.0005, 4.0, 11).unwrap()), &["service", "method"]).unwrap();
        let runs = IntGaugeVec::new(Opts::new("pollard_runs", "Runs queued and running now."), &["state"]).unwrap();
        let store_bytes = IntGauge::new("pollard_store_bytes", "Bytes of the data directory on disk.").unwrap();
        for c in [Box::new(units_computed.clone()) as Box<dyn prometheus::core::Collector>, Box::new(runs_ended.clone()), Box::new(run_seconds.clone()), Box::new(events_streamed.clone()), Box::new(fires.clone()), Box::new(unit_seconds.clone()), Box::new(grpc_calls.clone()), Box::new(grpc_seconds.clone()), Box::new(runs.clone()), Box::new(store_bytes.clone())] {
            registry.register(c).expect("metric names are unique");
        }
        for state in ["finished", "failed", "cancelled"] {
            runs_ended.with_label_values(&[state]);
        }
        for outcome in crate::job::FireOutcome::ALL {
            fires.with_label_values(&[outcome.as_str()]);
        }
        Metrics { registry, units_computed, runs_ended, run_seconds, events_streamed, fires, unit_seconds, grpc_calls, grpc_seconds, runs, store_bytes }
    }

    /// Counts one answered gRPC call.
    pub fn grpc_call(&self, service: &str, method: &str, status: &str, seconds: f64) {
        self.grpc_calls.with_label_values(&[service, method, status]).inc();
        self.grpc_seconds.with_label_values(&[service, method]).observe(seconds);
    }

    /// The text a scrape gets, with the gauges read now.
    pub fn render(&self, queued: usize, running: usize, data_dir: &Path) -> String {
        self.runs.with_label_values(&["queued"]).set(queued as i64);
        self.runs.with_label_values(&["running"]).set(running as i64);
        self.store_bytes.set(i64::try_from(dir_bytes(data_dir)).unwrap_or(i64::MAX));
        let mut out = Vec::new();
        TextEncoder::new().encode(&self.registry.gather(), &mut out).expect("encoding to memory");
        String::from_utf8(out).expect("the text format is UTF-8")
    }
}

impl Default for Metrics {
    fn default() -> Self {
        Metrics::new()
    }
}

/// Bytes of the files under `dir` (unreadable entries count nothing).
fn dir_bytes(dir: &Path) -> u64 {
    let mut total = 0u64;
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&d) else { continue };
        for e in entries.flatten() {
            match e.file_type() {
                Ok(t) if t.is_dir() => stack.push(e.path()),
                Ok(t) if t.is_file() => total = total.saturating_add(e.metadata().map(|m| m.len()).unwrap_or(0)),
                _ => {}
            }
        }
    }
    total
}
