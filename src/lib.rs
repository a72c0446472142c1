//! pollard: tunes the complexity limits of decision trees by cross-validated sweeps.
//!
//! Code map, in reading order. The pure core knows nothing of networks, disks or clocks:
//! - [`data`]   columnar frames read from CSV, targets and tasks
//! - [`tree`]   CART growth with the six complexity limits, pruning path, predict and apply
//! - [`export`] model files: the versioned JSON format, DOT and plain text
//! - [`sweep`]  cross-validated scores for a grid of settings from one growth per fold
//! - [`job`]    runs, events and datasets as plain values with pure state transitions
//!
//! The shell:
//! - [`store`]  the only module that names sled: datasets, runs, events, the queue
//! - [`cli`]    command-line entry point
//! - [`pb`]     generated protobuf types (only the shell sees them)

pub mod cli;
pub mod config;
pub mod data;
pub mod export;
pub mod job;
pub mod rpc;
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
