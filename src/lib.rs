//! pollard: tunes the complexity limits of decision trees by cross-validated sweeps.
//!
//! Code map, in reading order. The pure core knows nothing of networks, disks or clocks:
//! - [`data`]   columnar frames read from CSV, targets and tasks
//! - [`tree`]   CART growth with the six complexity limits, pruning path, predict and apply
//! - [`export`] model files: the versioned JSON format, ONNX, DOT and plain text
//! - [`sweep`]  cross-validated scores for a grid of settings from one growth per fold
//! - [`job`]    runs, events, datasets and schedules as plain values with pure state transitions
//! - [`drift`]  the drift report: a scheduled run compared with the run before it
//! - [`schedule`] crontab expressions in IANA zones: fire instants across DST, what is due
//! - [`reefer`] the demo's invented, SYNTHETIC reefer-container voyages (CSV text or a dataset)
//! - [`onnx_pb`] prost messages of the vendored ONNX schema, which [`export::onnx`] builds
//!
//! The shell:
//! - [`store`]  the `Storage` interface (datasets, runs, events, the queue, schedules) and its
//!   backends: sled (one process) and PostgreSQL (replicas sharing one database)
//! - [`service`] the operations with core types (datasets, runs, models, schedules), one
//!   error enum; `rpc` converts and calls them, the scheduler calls them directly
//! - [`access`] tokens and roles, the role each RPC needs, TLS, reloads, owner-only data
//! - [`clock`]  the system clock, or a test clock moved by hand
//! - [`metrics`] the Prometheus metrics the server counts, served by [`web`] as `/metrics`
//! - [`scheduler`] the task that starts schedules' runs at their fire times
//! - [`web`]    the web view: HTML pages of runs, datasets and schedules, live progress
//! - [`cli`]    command-line entry point
//! - [`pb`]     generated protobuf types (only the shell sees them)

pub mod access;
pub mod cli;
pub mod clock;
pub mod config;
pub mod data;
pub mod drift;
pub mod export;
pub mod job;
pub mod metrics;
pub mod reefer;
pub mod rpc;
pub mod schedule;
pub mod scheduler;
pub mod server;
pub mod service;
pub mod store;
pub mod sweep;
pub mod tree;
pub mod web;
pub mod worker;

/// Generated protobuf and gRPC code for `proto/pollard/v1`.
pub mod pb {
    tonic::include_proto!("pollard.v1");

    /// Encoded descriptors of every pollard proto, for server reflection.
    pub const DESCRIPTOR: &[u8] = tonic::include_file_descriptor_set!("pollard_descriptor");
}

/// Generated prost messages for the vendored ONNX schema `proto/onnx/onnx-ml.proto` (onnx
/// 1.23.2): plain data, part of the core. [`export::onnx`] builds a `ModelProto` from them.
pub mod onnx_pb {
    #![allow(clippy::all, missing_docs)]
    include!(concat!(env!("OUT_DIR"), "/onnx.rs"));

    #[cfg(test)]
    mod tests {
        use super::*;
        use crate::data::csv::{read_dataset, CsvOptions};
        use crate::tree::{fit, FitOptions, SplitRule, TrainSet, Tree};
        use prost::Message;

        /// An open dataset from tests/data (sources in tests/data/SOURCES.md), with the named
        /// columns read as categorical.
        fn tree_of(file: &str, categorical: &[&str]) -> Tree {
            let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data").join(file);
            let mut opts = CsvOptions::new("target");
            opts.categorical = categorical.iter().map(|s| s.to_string()).collect();
            let data = read_dataset(std::fs::File::open(path).unwrap(), &opts).unwrap();
            let options = FitOptions::default().check(data.task()).unwrap();
            fit(&TrainSet::of(&data), &options).unwrap()
        }

        /// ONNX nodes the export must write: one per pollard node, except that a set split
        /// becomes one equality test per known category on the side missing cells do not take.
        fn expected_nodes(tree: &Tree) -> usize {
            tree.nodes
                .iter()
                .map(|n| match n.split.as_ref() {
                    Some(s) => match &s.rule {
                        SplitRule::Categories(bits) => {
                            let levels = tree.columns[s.feature as usize].levels.len() as u32;
                            (0..levels).filter(|&c| SplitRule::category_left(bits, c) != s.missing_left).count()
                        }
                        SplitRule::Threshold(_) => 1,
                    },
                    None => 1,
                })
                .sum()
        }

        fn attr<'a>(node: &'a NodeProto, name: &str) -> &'a AttributeProto {
            node.attribute.iter().find(|a| a.name() == name).unwrap_or_else(|| panic!("no attribute {name}"))
        }

        fn len_of(a: &AttributeProto) -> usize {
            a.ints.len() + a.floats.len() + a.strings.len()
        }

        #[test]
        fn exported_models_decode_and_match_the_tree() {
            // iris with petal_width read as categorical gives set splits; diabetes regresses.
            for (file, categorical) in [("iris.csv", vec!["petal_width_cm"]), ("wine.csv", vec![]), ("diabetes.csv", vec!["age"])] {
                let tree = tree_of(file, &categorical);
                let bytes = crate::export::to_onnx(&tree).unwrap();
                let model = ModelProto::decode(bytes.as_slice()).unwrap();
                assert_eq!(model.ir_version(), crate::export::onnx::IR_VERSION);
                let opsets: Vec<(&str, i64)> = model.opset_import.iter().map(|o| (o.domain(), o.version())).collect();
                assert_eq!(opsets, vec![("", crate::export::onnx::DEFAULT_OPSET), ("ai.onnx.ml", crate::export::onnx::ML_OPSET)]);
                let graph = model.graph.as_ref().unwrap();
                let classify = tree.n_classes > 0;
                assert_eq!(graph.node.len(), if classify { 2 } else { 1 }, "{file}");
                let ens = &graph.node[0];
                assert_eq!(ens.domain(), "ai.onnx.ml");
                assert_eq!(ens.op_type(), if classify { "TreeEnsembleClassifier" } else { "TreeEnsembleRegressor" });
                let want = expected_nodes(&tree);
                if !categorical.is_empty() {
                    assert!(want > tree.nodes.len(), "{file}: expected set splits with chains");
                }
                let node_attrs = ["nodes_treeids", "nodes_nodeids", "nodes_featureids", "nodes_modes", "nodes_values", "nodes_truenodeids", "nodes_falsenodeids", "nodes_missing_value_tracks_true"];
                for a in node_attrs {
                    assert_eq!(len_of(attr(ens, a)), want, "{file}: {a}");
                }
                let leaves = attr(ens, "nodes_modes").strings.iter().filter(|s| s.as_slice() == b"LEAF").count();
                assert_eq!(leaves, tree.n_leaves(), "{file}");
                let prefix = if classify { "class" } else { "target" };
                let weights = tree.n_leaves() * tree.width();
                for a in ["treeids", "nodeids", "ids", "weights"] {
                    assert_eq!(len_of(attr(ens, &format!("{prefix}_{a}"))), weights, "{file}: {prefix}_{a}");
                }
                let input = &graph.input[0];
                assert_eq!(input.name(), "X");
                let Some(type_proto::Value::TensorType(t)) = &input.r#type.as_ref().unwrap().value else { panic!("X is not a tensor") };
                let dims = &t.shape.as_ref().unwrap().dim;
                assert_eq!(dims[1].value, Some(tensor_shape_proto::dimension::Value::DimValue(tree.n_features as i64)));
                let outputs: Vec<&str> = graph.output.iter().map(|o| o.name()).collect();
                assert_eq!(outputs, if classify { vec!["label", "probabilities"] } else { vec!["variable"] });
            }
        }
    }
}

#[cfg(test)]
mod layering;
