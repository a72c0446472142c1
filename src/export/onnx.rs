//! A fitted tree as an ONNX model (the open standard, <https://onnx.ai>), for scoring in any
//! ONNX runtime.
//!
//! The model holds one `ai.onnx.ml` tree-ensemble operator (opset [`ML_OPSET`]) with a single
//! tree:
//!
//! - input `X`: float32 tensor `[N, n_features]`, the tree's feature columns in the tree's
//!   order. A numeric column is passed as its value, a missing cell as NaN. A **categorical
//!   column is passed as its category code as a float**: the index of the category in the
//!   model's level order (the `categories` listed for the column in the metadata entry
//!   `pollard.columns`, the same order as the JSON model file). A missing cell is NaN; any
//!   value that is not one of the codes (for example a category the training data never had,
//!   written as -1) goes where the split sends missing cells, as in pollard itself.
//! - classify: `TreeEnsembleClassifier` writes `probabilities` (float32 `[N, n_classes]`, the
//!   leaf's class shares, post-transform `NONE`); `label` (int64 `[N]`) is the class index,
//!   the first largest probability (`ArgMax`, default domain, opset [`DEFAULT_OPSET`]), which
//!   is pollard's rule (lowest class code on ties). Class names are in the metadata entry
//!   `pollard.classes`, index order. The ensemble's own label output (`ensemble_label`) is
//!   left unused: for two classes its rule is not the largest share.
//! - regress: `TreeEnsembleRegressor` writes `variable` (float32 `[N, 1]`), the leaf's mean.
//!
//! Splits: a numeric `column <= threshold` is a `BRANCH_LEQ` node whose threshold is the
//! largest float32 not above pollard's (f64) threshold, so a float32 input goes the same way
//! in both; `nodes_missing_value_tracks_true` sends NaN to the side the tree learned. The
//! ensemble operators of this opset have no set-membership test, so a categorical set split
//! becomes a chain of `BRANCH_EQ` nodes over the known codes of one side: `code == c` jumps to
//! that side's subtree, otherwise the next test, and the last test falls through to the other
//! side. The chain lists the side that missing cells do *not* take, so NaN (never equal) and
//! codes outside the list land on the missing side. The chain's tests share one target
//! subtree.
//!
//! The bytes are written here with a small protobuf encoder (the core names no protobuf
//! crate); the schema is the vendored `proto/onnx/onnx-ml.proto` (onnx 1.23.2), and
//! [`crate::onnx_pb`] decodes the result in tests.

use crate::data::{ColumnKind, Task};
use crate::tree::{SplitRule, Tree};

/// ONNX IR version written (IR 10 came with onnx 1.16).
pub const IR_VERSION: i64 = 10;
/// Opset of the `ai.onnx.ml` domain: `TreeEnsembleClassifier` / `TreeEnsembleRegressor` 3.
pub const ML_OPSET: i64 = 3;
/// Opset of the default domain (for `ArgMax`).
pub const DEFAULT_OPSET: i64 = 21;

/// Largest category code that a float32 holds exactly (2^24).
const MAX_EXACT_CODE: usize = 1 << 24;

/// What an ONNX tree node does.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Mode {
    /// `x <= value` is true.
    Leq,
    /// `x == value` is true.
    Eq,
    Leaf,
}

impl Mode {
    pub fn as_str(self) -> &'static str {
        match self {
            Mode::Leq => "BRANCH_LEQ",
            Mode::Eq => "BRANCH_EQ",
            Mode::Leaf => "LEAF",
        }
    }
}

/// The tree flattened into the tree-ensemble operator's parallel attribute arrays (tree id
/// 0 throughout). Node ids run 0.. in array order, root first.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Ensemble {
    pub node_ids: Vec<i64>,
    pub feature_ids: Vec<i64>,
    pub modes: Vec<Mode>,
    pub values: Vec<f32>,
    pub true_ids: Vec<i64>,
    pub false_ids: Vec<i64>,
    pub missing_tracks_true: Vec<i64>,
    /// Leaf weights: the node, the class (classify) or target 0 (regress), the weight.
    pub weight_node_ids: Vec<i64>,
    pub weight_ids: Vec<i64>,
    pub weights: Vec<f32>,
    /// The ONNX node id of each pollard node (for a set split, the chain's first test).
    pub id_of: Vec<i64>,
}

/// The largest float32 that is not above `t`, so that for every float32 `x`,
/// `(x as f64) <= t` exactly when `x <= result`.
fn f32_at_most(t: f64) -> f32 {
    let v = t as f32;
    if (v as f64) <= t {
        return v;
    }
    // `v` rounded up: step one float32 down.
    if v == 0.0 {
        -f32::from_bits(1)
    } else if v > 0.0 {
        f32::from_bits(v.to_bits() - 1)
    } else {
        f32::from_bits(v.to_bits() + 1)
    }
}

/// Flattens `tree` into the ensemble operator's arrays.
pub fn ensemble(tree: &Tree) -> Result<Ensemble, String> {
    if tree.nodes.is_empty() {
        return Err("the tree has no nodes".into());
    }
    let width = tree.width();
    if tree.values.len() != tree.nodes.len() * width {
        return Err(format!("the tree has {} values for {} nodes of width {width}", tree.values.len(), tree.nodes.len()));
    }
    // Per node, the codes its chain tests (set splits only), and the side they jump to.
    let mut chains: Vec<Option<(Vec<u32>, bool)>> = Vec::with_capacity(tree.nodes.len());
    for (i, node) in tree.nodes.iter().enumerate() {
        let chain = match &node.split {
            Some(split) => {
                let column = tree.columns.get(split.feature as usize).ok_or_else(|| format!("node {i} splits on column {}, the tree has {}", split.feature, tree.columns.len()))?;
                match &split.rule {
                    SplitRule::Categories(bits) => {
                        if column.kind != ColumnKind::Categorical {
                            return Err(format!("node {i}: category split on numeric column '{}'", column.name));
                        }
                        let n = column.levels.len();
                        if n > MAX_EXACT_CODE {
                            return Err(format!("column '{}' has {n} categories; float32 codes are exact only up to {MAX_EXACT_CODE}", column.name));
                        }
                        // The chain lists the side missing cells do not take.
                        let jump_left = !split.missing_left;
                        let codes: Vec<u32> = (0..n as u32).filter(|&c| SplitRule::category_left(bits, c) == jump_left).collect();
                        if codes.is_empty() {
                            return Err(format!("node {i}: set split on '{}' sends no known category {}", column.name, if jump_left { "left" } else { "right" }));
                        }
                        Some((codes, jump_left))
                    }
                    SplitRule::Threshold(t) if t.is_nan() => return Err(format!("node {i}: threshold is NaN")),
                    SplitRule::Threshold(_) => None,
                }
            }
            None => None,
        };
        chains.push(chain);
    }
    // Ids in preorder, a chain's tests one after another.
    let mut id_of = Vec::with_capacity(tree.nodes.len());
    let mut next = 0i64;
    for chain in &chains {
        id_of.push(next);
        next += chain.as_ref().map_or(1, |(codes, _)| codes.len() as i64);
    }
    let mut e = Ensemble { id_of, ..Ensemble::default() };
    let push = |e: &mut Ensemble, feature: i64, mode: Mode, value: f32, t: i64, f: i64, missing: bool| {
        e.node_ids.push(e.node_ids.len() as i64);
        e.feature_ids.push(feature);
        e.modes.push(mode);
        e.values.push(value);
        e.true_ids.push(t);
        e.false_ids.push(f);
        e.missing_tracks_true.push(missing as i64);
    };
    for (i, node) in tree.nodes.iter().enumerate() {
        let Some(split) = &node.split else {
            push(&mut e, 0, Mode::Leaf, 0.0, 0, 0, false);
            let value = tree.value(i);
            for (k, &v) in value.iter().enumerate() {
                e.weight_node_ids.push(e.id_of[i]);
                e.weight_ids.push(if tree.task == Task::Classify { k as i64 } else { 0 });
                e.weights.push(v as f32);
            }
            continue;
        };
        let (left, right) = (e.id_of[node.left as usize], e.id_of[node.right as usize]);
        let feature = split.feature as i64;
        match (&split.rule, &chains[i]) {
            (SplitRule::Threshold(t), _) => push(&mut e, feature, Mode::Leq, f32_at_most(*t), left, right, split.missing_left),
            (SplitRule::Categories(_), Some((codes, jump_left))) => {
                let (jump, fall) = if *jump_left { (left, right) } else { (right, left) };
                for (j, &c) in codes.iter().enumerate() {
                    let otherwise = if j + 1 == codes.len() { fall } else { e.id_of[i] + j as i64 + 1 };
                    push(&mut e, feature, Mode::Eq, c as f32, jump, otherwise, false);
                }
            }
            (SplitRule::Categories(_), None) => unreachable!("set splits have chains"),
        }
    }
    Ok(e)
}

/// Protobuf wire-format writer for the few field kinds ONNX needs.
#[derive(Default)]
struct Msg(Vec<u8>);

impl Msg {
    fn varint(&mut self, mut v: u64) {
        while v >= 0x80 {
            self.0.push((v as u8) | 0x80);
            v >>= 7;
        }
        self.0.push(v as u8);
    }
    fn key(&mut self, field: u32, wire: u32) {
        self.varint(((field << 3) | wire) as u64);
    }
    fn int(mut self, field: u32, v: i64) -> Msg {
        self.key(field, 0);
        self.varint(v as u64);
        self
    }
    fn bytes(mut self, field: u32, b: &[u8]) -> Msg {
        self.key(field, 2);
        self.varint(b.len() as u64);
        self.0.extend_from_slice(b);
        self
    }
    fn str(self, field: u32, s: &str) -> Msg {
        self.bytes(field, s.as_bytes())
    }
    fn msg(self, field: u32, m: Msg) -> Msg {
        self.bytes(field, &m.0)
    }
    /// Packed repeated float.
    fn floats(self, field: u32, v: &[f32]) -> Msg {
        let b: Vec<u8> = v.iter().flat_map(|x| x.to_le_bytes()).collect();
        self.bytes(field, &b)
    }
    /// Packed repeated int64.
    fn ints(self, field: u32, v: &[i64]) -> Msg {
        let mut p = Msg::default();
        for &x in v {
            p.varint(x as u64);
        }
        self.bytes(field, &p.0)
    }
}

// Field numbers and enum values from proto/onnx/onnx-ml.proto.
const ATTR_FLOATS: i64 = 6;
const ATTR_INTS: i64 = 7;
const ATTR_STRING: i64 = 3;
const ATTR_STRINGS: i64 = 8;
const ATTR_INT: i64 = 2;
const ELEM_FLOAT: i64 = 1;
const ELEM_INT64: i64 = 7;

fn attr(name: &str, kind: i64) -> Msg {
    Msg::default().str(1, name).int(20, kind)
}
fn attr_ints(name: &str, v: &[i64]) -> Msg {
    attr(name, ATTR_INTS).ints(8, v)
}
fn attr_floats(name: &str, v: &[f32]) -> Msg {
    attr(name, ATTR_FLOATS).floats(7, v)
}
fn attr_string(name: &str, v: &str) -> Msg {
    attr(name, ATTR_STRING).str(4, v)
}
fn attr_strings(name: &str, v: &[&str]) -> Msg {
    v.iter().fold(attr(name, ATTR_STRINGS), |m, s| m.str(9, s))
}

/// A tensor value: element type and dimensions (`None` = the batch size `N`).
fn value_info(name: &str, elem: i64, dims: &[Option<i64>]) -> Msg {
    let shape = dims.iter().fold(Msg::default(), |m, d| {
        m.msg(1, match d {
            Some(n) => Msg::default().int(1, *n),
            None => Msg::default().str(2, "N"),
        })
    });
    let tensor = Msg::default().int(1, elem).msg(2, shape);
    Msg::default().str(1, name).msg(2, Msg::default().msg(1, tensor))
}

fn node(op: &str, domain: &str, name: &str, inputs: &[&str], outputs: &[&str], attrs: Vec<Msg>) -> Msg {
    let mut m = Msg::default();
    for i in inputs {
        m = m.str(1, i);
    }
    for o in outputs {
        m = m.str(2, o);
    }
    m = m.str(3, name).str(4, op).str(7, domain);
    attrs.into_iter().fold(m, |m, a| m.msg(5, a))
}

fn entry(key: &str, value: &str) -> Msg {
    Msg::default().str(1, key).str(2, value)
}

/// The tree as a serialized ONNX `ModelProto` (see the module documentation for inputs,
/// outputs and how splits are written).
pub fn to_onnx(tree: &Tree) -> Result<Vec<u8>, String> {
    if tree.n_features != tree.columns.len() {
        return Err(format!("the tree has {} features and {} column descriptions", tree.n_features, tree.columns.len()));
    }
    if tree.task == Task::Classify && (tree.n_classes < 2 || tree.labels.len() != tree.n_classes) {
        return Err(format!("a classification tree needs 2 or more classes with labels, this one has {} and {} labels", tree.n_classes, tree.labels.len()));
    }
    let e = ensemble(tree)?;
    let modes: Vec<&str> = e.modes.iter().map(|m| m.as_str()).collect();
    let zeros = vec![0i64; e.node_ids.len()];
    let weight_trees = vec![0i64; e.weights.len()];
    let mut attrs = vec![
        attr_ints("nodes_treeids", &zeros),
        attr_ints("nodes_nodeids", &e.node_ids),
        attr_ints("nodes_featureids", &e.feature_ids),
        attr_strings("nodes_modes", &modes),
        attr_floats("nodes_values", &e.values),
        attr_ints("nodes_truenodeids", &e.true_ids),
        attr_ints("nodes_falsenodeids", &e.false_ids),
        attr_ints("nodes_missing_value_tracks_true", &e.missing_tracks_true),
        attr_string("post_transform", "NONE"),
    ];
    let features = tree.n_features as i64;
    let input = value_info("X", ELEM_FLOAT, &[None, Some(features)]);
    let (nodes, outputs) = match tree.task {
        Task::Classify => {
            let k = tree.n_classes as i64;
            let classes: Vec<i64> = (0..k).collect();
            attrs.extend([
                attr_ints("class_treeids", &weight_trees),
                attr_ints("class_nodeids", &e.weight_node_ids),
                attr_ints("class_ids", &e.weight_ids),
                attr_floats("class_weights", &e.weights),
                attr_ints("classlabels_int64s", &classes),
            ]);
            let ensemble = node("TreeEnsembleClassifier", "ai.onnx.ml", "tree", &["X"], &["ensemble_label", "probabilities"], attrs);
            let argmax = node("ArgMax", "", "label", &["probabilities"], &["label"], vec![
                attr("axis", ATTR_INT).int(3, 1),
                attr("keepdims", ATTR_INT).int(3, 0),
                attr("select_last_index", ATTR_INT).int(3, 0),
            ]);
            (vec![ensemble, argmax], vec![value_info("label", ELEM_INT64, &[None]), value_info("probabilities", ELEM_FLOAT, &[None, Some(k)])])
        }
        Task::Regress => {
            attrs.extend([
                attr_ints("target_treeids", &weight_trees),
                attr_ints("target_nodeids", &e.weight_node_ids),
                attr_ints("target_ids", &e.weight_ids),
                attr_floats("target_weights", &e.weights),
                attr("n_targets", ATTR_INT).int(3, 1),
                attr_string("aggregate_function", "SUM"),
            ]);
            let ensemble = node("TreeEnsembleRegressor", "ai.onnx.ml", "tree", &["X"], &["variable"], attrs);
            (vec![ensemble], vec![value_info("variable", ELEM_FLOAT, &[None, Some(1)])])
        }
    };
    let mut graph = nodes.into_iter().fold(Msg::default(), |g, n| g.msg(1, n));
    graph = graph.str(2, "pollard_tree").str(10, &format!("pollard tree for '{}' ({}), {} nodes, {} leaves", tree.target, tree.task, tree.nodes.len(), tree.n_leaves())).msg(11, input);
    graph = outputs.into_iter().fold(graph, |g, o| g.msg(12, o));

    let columns: Vec<serde_json::Value> = tree
        .columns
        .iter()
        .map(|c| match c.kind {
            ColumnKind::Numeric => serde_json::json!({"name": c.name, "kind": "numeric"}),
            ColumnKind::Categorical => serde_json::json!({"name": c.name, "kind": "categorical", "categories": c.levels}),
        })
        .collect();
    let mut model = Msg::default()
        .int(1, IR_VERSION)
        .msg(8, Msg::default().str(1, "").int(2, DEFAULT_OPSET))
        .msg(8, Msg::default().str(1, "ai.onnx.ml").int(2, ML_OPSET))
        .str(2, "pollard")
        .str(3, env!("CARGO_PKG_VERSION"))
        .msg(7, graph)
        .msg(14, entry("pollard.target", &tree.target))
        .msg(14, entry("pollard.task", tree.task.as_str()))
        .msg(14, entry("pollard.columns", &serde_json::Value::Array(columns).to_string()));
    if tree.task == Task::Classify {
        model = model.msg(14, entry("pollard.classes", &serde_json::to_string(&tree.labels).map_err(|e| e.to_string())?));
    }
    Ok(model.0)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::{Column, Dataset, Feature, Frame, Target, MISSING_CODE};
    use crate::tree::{fit, FitOptions, TrainSet};

    /// Walks the flat arrays the way the ONNX operator specification describes
    /// (`BRANCH_LEQ`: x <= value, `BRANCH_EQ`: x == value, NaN takes the true branch only
    /// when tracked) and returns the leaf's weights.
    fn walk(e: &Ensemble, row: &[f32]) -> Vec<f32> {
        let mut id = 0usize;
        loop {
            let x = row[e.feature_ids[id] as usize];
            let go_true = match e.modes[id] {
                Mode::Leaf => break,
                Mode::Leq => x <= e.values[id] || (x.is_nan() && e.missing_tracks_true[id] == 1),
                Mode::Eq => x == e.values[id] || (x.is_nan() && e.missing_tracks_true[id] == 1),
            };
            id = if go_true { e.true_ids[id] } else { e.false_ids[id] } as usize;
        }
        (0..e.weights.len()).filter(|&w| e.weight_node_ids[w] == id as i64).map(|w| e.weights[w]).collect()
    }

    /// Seeded synthetic frame: a numeric column with NaNs and a 70-category column (more than
    /// one 64-bit word of categories) with missing codes; a class target that depends on both.
    fn synthetic(classify: bool) -> Dataset {
        let rows = 400;
        let mut s = 0x9e3779b97f4a7c15u64;
        let mut next = || {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            s
        };
        let (mut num, mut codes, mut y) = (Vec::new(), Vec::new(), Vec::new());
        for _ in 0..rows {
            let a = (next() % 1000) as f32 / 37.0;
            let c = (next() % 70) as u32;
            let missing_a = next() % 9 == 0;
            let missing_c = next() % 11 == 0;
            num.push(if missing_a { f32::NAN } else { a });
            codes.push(if missing_c { MISSING_CODE } else { c });
            let signal = (if missing_a { 20.0 } else { a as f64 }) + if c % 3 == 0 && !missing_c { 9.0 } else { 0.0 };
            y.push(signal + (next() % 100) as f64 / 20.0);
        }
        let levels: Vec<String> = (0..70).map(|i| format!("c{i}")).collect();
        let frame = Frame::new(vec![
            Feature { name: "a".into(), column: Column::Numeric(num) },
            Feature { name: "g".into(), column: Column::Categorical { codes, levels } },
        ])
        .unwrap();
        let target = if classify {
            Target::Classes { codes: y.iter().map(|&v| (v / 12.0).min(2.0) as u32).collect(), labels: vec!["lo".into(), "mid".into(), "hi".into()] }
        } else {
            Target::Values(y)
        };
        Dataset::new(frame, "y".into(), target).unwrap()
    }

    fn tree_of(data: &Dataset) -> Tree {
        let options = FitOptions::default().check(data.task()).unwrap();
        fit(&TrainSet::of(data), &options).unwrap()
    }

    fn row_of(data: &Dataset, r: usize) -> Vec<f32> {
        data.frame
            .features
            .iter()
            .map(|f| match &f.column {
                Column::Numeric(v) => v[r],
                Column::Categorical { codes, .. } => if codes[r] == MISSING_CODE { f32::NAN } else { codes[r] as f32 },
            })
            .collect()
    }

    #[test]
    fn flat_arrays_route_every_row_like_the_tree() {
        for classify in [true, false] {
            let data = synthetic(classify);
            let tree = tree_of(&data);
            let set_splits = tree.nodes.iter().filter(|n| matches!(n.split.as_ref().map(|s| &s.rule), Some(SplitRule::Categories(_)))).count();
            assert!(set_splits > 0 && tree.n_leaves() > 5, "the case should exercise set splits: {set_splits} set splits, {} leaves", tree.n_leaves());
            let e = ensemble(&tree).unwrap();
            for r in 0..data.rows() {
                let want: Vec<f32> = tree.value(tree.apply_row(&data.frame, r) as usize).iter().map(|&v| v as f32).collect();
                assert_eq!(walk(&e, &row_of(&data, r)), want, "row {r}");
            }
            // A code the training data never had goes where missing cells go.
            let unseen = [3.0f32, 70.0];
            let mut probe = data.frame.clone();
            if let Column::Categorical { codes, .. } = &mut probe.features[1].column {
                codes[0] = MISSING_CODE;
            }
            if let Column::Numeric(v) = &mut probe.features[0].column {
                v[0] = 3.0;
            }
            let want: Vec<f32> = tree.value(tree.apply_row(&probe, 0) as usize).iter().map(|&v| v as f32).collect();
            assert_eq!(walk(&e, &unseen), want);
            assert_eq!(walk(&e, &[3.0, -1.0]), want);
        }
    }

    #[test]
    fn thresholds_round_down_to_float32() {
        for t in [0.1f64, -0.1, 1.0, 2.5e-40, -2.5e-40, 0.0, 1e39, -1e39, f64::INFINITY, 3.000000001] {
            let v = f32_at_most(t);
            assert!((v as f64) <= t, "{t} -> {v}");
            let up = if v == f32::INFINITY { v } else if v >= 0.0 { f32::from_bits(v.to_bits() + 1) } else if v == -f32::from_bits(1) { 0.0 } else { f32::from_bits(v.to_bits() - 1) };
            assert!(up == f32::INFINITY || (up as f64) > t, "{t} -> {v}, next {up}");
        }
        // Exact float32 values stay themselves.
        assert_eq!(f32_at_most(0.5), 0.5);
        assert_eq!(f32_at_most(-0.0), 0.0);
    }
}
