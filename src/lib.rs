//! pollard: tunes the complexity limits of decision trees by cross-validated sweeps.
//!
//! Code map, in reading order. The pure core knows nothing of networks, disks or clocks:
//! - [`data`]   columnar frames read from CSV, targets and tasks
//! - [`tree`]   CART growth with the six complexity limits, pruning path, predict and apply
//! - [`export`] model files: the versioned JSON format, DOT and plain text
//! - [`sweep`]  cross-validated scores for a grid of settings from one growth per fold
//! - [`job`]    runs, events, datasets and schedules as plain values with pure state transitions
//! - [`drift`]  the drift report: a scheduled run compared with the run before it
//! - [`schedule`] crontab expressions in IANA zones: fire instants across DST, what is due
//! - [`reefer`] the demo's invented, SYNTHETIC reefer-container voyages (CSV text or a dataset)
//!
//! The shell:
//! - [`store`]  the only module that names sled: datasets, runs, events, the queue, schedules
//! - [`clock`]  the system clock, or a test clock moved by hand
//! - [`scheduler`] the task that starts schedules' runs at their fire times
//! - [`cli`]    command-line entry point
//! - [`pb`]     generated protobuf types (only the shell sees them)

pub mod cli;
pub mod clock;
pub mod config;
pub mod data;
pub mod drift;
pub mod export;
pub mod job;
pub mod reefer;
pub mod rpc;
pub mod schedule;
pub mod scheduler;
pub mod server;
pub mod store;
pub mod sweep;
pub mod tree;
pub mod worker;

/// Generated protobuf and gRPC code for `proto/pollard/v1`.
pub mod pb {
    tonic::include_proto!("pollard.v1");

    /// Encoded descriptors of every pollard proto, for server reflection.
    pub const DESCRIPTOR: &[u8] = tonic::include_file_descriptor_set!("pollard_descriptor");
}

#[cfg(test)]
mod layering {
    /// The pure core names no network, storage, runtime or logging crate and no shell module.
    #[test]
    fn core_modules_stay_pure() {
        let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
        let forbidden = ["tokio", "tonic", "prost", "sled", "tracing", "crate::store", "crate::rpc", "crate::worker", "crate::server", "crate::cli", "crate::pb", "crate::config"];
        let mut files = Vec::new();
        for core in ["data", "tree", "sweep", "export"] {
            for e in std::fs::read_dir(root.join(core)).unwrap() {
                files.push(e.unwrap().path());
            }
        }
        files.push(root.join("job.rs"));
        files.push(root.join("drift.rs"));
        files.push(root.join("schedule.rs"));
        files.push(root.join("reefer.rs"));
        let mut bad = Vec::new();
        for f in &files {
            let text = std::fs::read_to_string(f).unwrap();
            for (i, line) in text.lines().enumerate() {
                let code = line.split("//").next().unwrap();
                if forbidden.iter().any(|w| code.contains(&format!("{w}::")) || code.contains(&format!("use {w}"))) {
                    bad.push(format!("{}:{}: {}", f.display(), i + 1, line.trim()));
                }
            }
        }
        assert!(files.len() > 10, "scanned only {} files", files.len());
        assert!(bad.is_empty(), "core files reach into the shell:\n{}", bad.join("\n"));
    }
}
