//! The JSON model file, format `pollard.model` version 1.
//!
//! One JSON object:
//!
//! | field | meaning |
//! | --- | --- |
//! | `format` | always `"pollard.model"` |
//! | `version` | `1`; readers refuse versions they do not know |
//! | `task` | `"classify"` or `"regress"` |
//! | `target` | name of the predicted column |
//! | `classes` | class labels; a node's `value` lists class shares in this order (classify) |
//! | `columns` | the feature columns in order: `name`, `kind` (`"numeric"` or `"categorical"`), `categories` (categorical: names in code order) |
//! | `grown_with` | `criterion`, `class_weight` (`"none"` or `"balanced"`) and `limits` (`max_depth`, `min_split_rows`, `min_leaf_rows`, `max_leaves`, `min_gain`, `prune_alpha`; `null` = no limit) |
//! | `total_weight` | total training weight N |
//! | `nodes` | the nodes in preorder (left subtree first), root first |
//! | `decision` | two-class models fitted under decision costs only: `{"threshold": t, "false_alarm": c_fp, "miss": c_fn}`; the model decides class 1 (the second of `classes`) when its share is ≥ t, class 0 otherwise. Files without it decide the most likely class |
//! | `importances` | impurity-based importance per column, in column order: the column's share of the total weighted impurity decrease of the splits, summing to 1 (all 0 for a single leaf). Derived from `nodes` when written; readers check its length and otherwise ignore it. Files written before it was added have none |
//!
//! Each node: `id` (its index), `depth` (root 0), `rows`, `weighted_rows`, `impurity`,
//! `value` (class shares, or `[mean]`), `class_totals` (classify: weighted rows per class),
//! and on internal nodes `split`:
//! `{"column": i, "test": T, "missing_left": bool, "gain": g, "rank": r, "left": id, "right": id}`
//! where `test` is one of
//! - `{"at_most": x}`: a row goes left when its value is ≤ x;
//! - `{"present": true}`: a row goes left when the cell is not missing;
//! - `{"in": [names]}`: a row goes left when its category is listed.
//!
//! An `at_most` split of a fitted tree also has `"between": [lo, hi]`: the largest training
//! value at that node that went left and the smallest that went right, as 32-bit floats
//! (x is their midpoint). It only serves to show x short (`31.85`); x itself is the test.
//! Files without it (written before it was kept) read as before.
//!
//! Missing cells, and categories the training data never had, go left exactly when
//! `missing_left` is true. `gain` is the weighted impurity decrease of the split and
//! `rank` its place in best-first order (largest gain first, from 0).
//! Numbers are written in shortest round-trip form, so reading a file back gives the very
//! same tree.

use serde::{Deserialize, Serialize};

use crate::data::{ColumnKind, Task};
use crate::tree::{ClassWeight, ColumnInfo, Criterion, Decision, FitOptions, Limits, Node, Split, SplitRule, Tree, NO_NODE};

/// Name in the `format` field.
pub const FORMAT: &str = "pollard.model";
/// The version this build writes.
pub const VERSION: u32 = 1;

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct ModelFile {
    format: String,
    version: u32,
    task: String,
    target: String,
    #[serde(default)]
    classes: Vec<String>,
    columns: Vec<ColumnFile>,
    grown_with: GrownWith,
    total_weight: f64,
    nodes: Vec<NodeFile>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    importances: Vec<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    decision: Option<DecisionFile>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct DecisionFile {
    threshold: f64,
    false_alarm: f64,
    miss: f64,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct ColumnFile {
    name: String,
    kind: String,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    categories: Vec<String>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct GrownWith {
    criterion: String,
    class_weight: String,
    limits: LimitsFile,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct LimitsFile {
    max_depth: Option<u32>,
    min_split_rows: u32,
    min_leaf_rows: u32,
    max_leaves: Option<u32>,
    min_gain: f64,
    prune_alpha: f64,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct NodeFile {
    id: u32,
    depth: u32,
    rows: u32,
    weighted_rows: f64,
    impurity: f64,
    value: Vec<f64>,
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    class_totals: Vec<f64>,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    split: Option<SplitFile>,
}

#[derive(Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
struct SplitFile {
    column: u32,
    test: TestFile,
    missing_left: bool,
    gain: f64,
    rank: u32,
    left: u32,
    right: u32,
    #[serde(default, skip_serializing_if = "Option::is_none")]
    between: Option<[f32; 2]>,
}

#[derive(Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
enum TestFile {
    AtMost(f64),
    Present(bool),
    In(Vec<String>),
}

/// Writes a tree as a `pollard.model` JSON document (pretty-printed).
pub fn to_json(tree: &Tree) -> String {
    serde_json::to_string_pretty(&to_file(tree)).expect("model file serialises")
}

fn to_file(tree: &Tree) -> ModelFile {
    let l = &tree.options.limits;
    let nodes = tree
        .nodes
        .iter()
        .enumerate()
        .map(|(i, n)| NodeFile {
            id: i as u32,
            depth: n.depth,
            rows: n.rows,
            weighted_rows: n.weighted_rows,
            impurity: n.impurity,
            value: tree.value(i).to_vec(),
            class_totals: if tree.n_classes > 0 { tree.class_total(i).to_vec() } else { Vec::new() },
            split: n.split.as_ref().map(|s| SplitFile {
                column: s.feature,
                test: match &s.rule {
                    SplitRule::Threshold(t) if *t == f64::INFINITY => TestFile::Present(true),
                    SplitRule::Threshold(t) => TestFile::AtMost(*t),
                    SplitRule::Categories(bits) => TestFile::In(
                        tree.columns[s.feature as usize]
                            .levels
                            .iter()
                            .enumerate()
                            .filter(|(c, _)| SplitRule::category_left(bits, *c as u32))
                            .map(|(_, name)| name.clone())
                            .collect(),
                    ),
                },
                missing_left: s.missing_left,
                gain: n.gain,
                rank: n.rank,
                left: n.left,
                right: n.right,
                between: s.between.map(|(lo, hi)| [lo, hi]),
            }),
        })
        .collect();
    ModelFile {
        format: FORMAT.to_string(),
        version: VERSION,
        task: tree.task.as_str().to_string(),
        target: tree.target.clone(),
        classes: tree.labels.clone(),
        columns: tree
            .columns
            .iter()
            .map(|c| ColumnFile { name: c.name.clone(), kind: c.kind.as_str().to_string(), categories: c.levels.clone() })
            .collect(),
        grown_with: GrownWith {
            criterion: tree.options.criterion.map_or("default", |c| c.as_str()).to_string(),
            class_weight: tree.options.class_weight.as_str().to_string(),
            limits: LimitsFile {
                max_depth: l.max_depth,
                min_split_rows: l.min_split_rows,
                min_leaf_rows: l.min_leaf_rows,
                max_leaves: l.max_leaves,
                min_gain: l.min_gain,
                prune_alpha: l.prune_alpha,
            },
        },
        total_weight: tree.total_weight,
        nodes,
        importances: tree.impurity_importances(),
        decision: tree.decision.map(|d| DecisionFile { threshold: d.threshold, false_alarm: d.false_alarm, miss: d.miss }),
    }
}

/// Reads a `pollard.model` JSON document back into a tree, checking its structure.
pub fn from_json(text: &str) -> Result<Tree, String> {
    let file: ModelFile = serde_json::from_str(text).map_err(|e| format!("not a pollard model file: {e}"))?;
    if !file.importances.is_empty() && file.importances.len() != file.columns.len() {
        return Err(format!("importances has {} values for {} columns", file.importances.len(), file.columns.len()));
    }
    if file.format != FORMAT {
        return Err(format!("format is '{}', expected '{FORMAT}'", file.format));
    }
    if file.version != VERSION {
        return Err(format!("model file version {} is not known to this build (it reads version {VERSION})", file.version));
    }
    let task = Task::parse(&file.task).ok_or_else(|| format!("task '{}' is neither classify nor regress", file.task))?;
    let columns: Vec<ColumnInfo> = file
        .columns
        .iter()
        .map(|c| {
            let kind = match c.kind.as_str() {
                "numeric" => ColumnKind::Numeric,
                "categorical" => ColumnKind::Categorical,
                k => return Err(format!("column '{}': kind '{k}' is not numeric or categorical", c.name)),
            };
            Ok(ColumnInfo { name: c.name.clone(), kind, levels: c.categories.clone() })
        })
        .collect::<Result<_, String>>()?;
    let n_classes = if task == Task::Classify { file.classes.len() } else { 0 };
    if task == Task::Classify && n_classes < 2 {
        return Err("a classify model needs at least two classes".into());
    }
    let width = if task == Task::Classify { n_classes } else { 1 };
    let g = &file.grown_with;
    let criterion = match g.criterion.as_str() {
        "default" => None,
        c => Some(Criterion::parse(c).ok_or_else(|| format!("criterion '{c}' is not known"))?),
    };
    let class_weight = ClassWeight::parse(&g.class_weight).ok_or_else(|| format!("class_weight '{}' is not known", g.class_weight))?;
    let lf = &g.limits;
    let options = FitOptions {
        limits: Limits {
            max_depth: lf.max_depth,
            min_split_rows: lf.min_split_rows,
            min_leaf_rows: lf.min_leaf_rows,
            max_leaves: lf.max_leaves,
            min_gain: lf.min_gain,
            prune_alpha: lf.prune_alpha,
        },
        // Model files do not record the splitter: the tree is complete without it.
        splitter: Default::default(),
        // Nor monotone limits: the node values were clipped to them when the tree grew.
        monotone: Default::default(),
        criterion,
        class_weight,
    };
    let count = file.nodes.len();
    if count == 0 {
        return Err("the model has no nodes".into());
    }
    let mut nodes = Vec::with_capacity(count);
    let mut values = Vec::with_capacity(count * width);
    let mut class_totals = Vec::new();
    for (i, n) in file.nodes.iter().enumerate() {
        let at = format!("nodes[{i}]");
        if n.id as usize != i {
            return Err(format!("{at}: id {} is not its position", n.id));
        }
        if n.value.len() != width {
            return Err(format!("{at}: value has {} numbers, expected {width}", n.value.len()));
        }
        values.extend_from_slice(&n.value);
        if task == Task::Classify {
            if n.class_totals.len() != n_classes {
                return Err(format!("{at}: class_totals has {} numbers, expected {n_classes}", n.class_totals.len()));
            }
            class_totals.extend_from_slice(&n.class_totals);
        }
        let (split, gain, rank, left, right) = match &n.split {
            None => (None, 0.0, NO_NODE, NO_NODE, NO_NODE),
            Some(s) => {
                let col = columns
                    .get(s.column as usize)
                    .ok_or_else(|| format!("{at}: split column {} does not exist", s.column))?;
                if s.left as usize <= i || s.right as usize <= i || s.left as usize >= count || s.right as usize >= count {
                    return Err(format!("{at}: children {} and {} are not later nodes of the file", s.left, s.right));
                }
                let rule = match (&s.test, col.kind) {
                    (TestFile::AtMost(t), ColumnKind::Numeric) => SplitRule::Threshold(*t),
                    (TestFile::Present(true), ColumnKind::Numeric) => SplitRule::Threshold(f64::INFINITY),
                    (TestFile::In(names), ColumnKind::Categorical) => {
                        let mut bits = vec![0u64; col.levels.len().div_ceil(64)];
                        for name in names {
                            let c = col
                                .levels
                                .iter()
                                .position(|l| l == name)
                                .ok_or_else(|| format!("{at}: category '{name}' is not in column '{}'", col.name))?;
                            bits[c / 64] |= 1 << (c % 64);
                        }
                        SplitRule::Categories(bits)
                    }
                    _ => return Err(format!("{at}: the test does not fit {} column '{}'", col.kind, col.name)),
                };
                let between = match s.between {
                    None => None,
                    Some([lo, hi]) if rule.fits_between(lo, hi) => Some((lo, hi)),
                    Some([lo, hi]) => return Err(format!("{at}: between [{lo}, {hi}] does not surround an at_most threshold")),
                };
                (Some(Split { feature: s.column, rule, missing_left: s.missing_left, between }), s.gain, s.rank, s.left, s.right)
            }
        };
        nodes.push(Node {
            depth: n.depth,
            rows: n.rows,
            weighted_rows: n.weighted_rows,
            impurity: n.impurity,
            gain,
            split,
            left,
            right,
            rank,
        });
    }
    let decision = file.decision.map(|d| Decision { threshold: d.threshold, false_alarm: d.false_alarm, miss: d.miss });
    if let Some(d) = &decision {
        d.check(n_classes).map_err(|e| format!("decision: {e}"))?;
    }
    // Every node but the root must be the child of exactly one node.
    let mut parents = vec![0u32; count];
    for n in &nodes {
        if n.split.is_some() {
            parents[n.left as usize] += 1;
            parents[n.right as usize] += 1;
        }
    }
    if let Some(i) = (1..count).find(|&i| parents[i] != 1) {
        return Err(format!("nodes[{i}] is the child of {} nodes, expected exactly one", parents[i]));
    }
    Ok(Tree {
        task,
        target: file.target,
        labels: file.classes,
        n_features: columns.len(),
        columns,
        n_classes,
        nodes,
        values,
        class_totals,
        total_weight: file.total_weight,
        options,
        decision,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::export::text::tests::{classify_tree, hand_tree, regress_tree};

    /// Removes `between` from every split of a model file, as files written before it was
    /// kept have none.
    fn without_pairs(text: &str) -> String {
        let mut v: serde_json::Value = serde_json::from_str(text).unwrap();
        for node in v["nodes"].as_array_mut().unwrap() {
            if let Some(split) = node.get_mut("split").and_then(|s| s.as_object_mut()) {
                split.remove("between");
            }
        }
        serde_json::to_string_pretty(&v).unwrap()
    }

    #[test]
    fn the_exact_threshold_and_its_training_pair_survive_a_round_trip() {
        for tree in [classify_tree(), regress_tree()] {
            let text = to_json(&tree);
            let back = from_json(&text).unwrap();
            assert_eq!(back, tree, "{text}");
            let pairs: Vec<_> = back
                .nodes
                .iter()
                .filter_map(|n| n.split.as_ref())
                .filter_map(|s| match s.rule {
                    SplitRule::Threshold(t) if t.is_finite() => Some((t, s.between.expect("a fitted threshold has its pair"))),
                    _ => None,
                })
                .collect();
            assert!(!pairs.is_empty(), "{text}");
            for (t, (lo, hi)) in pairs {
                assert_eq!(t, lo as f64 / 2.0 + hi as f64 / 2.0, "the threshold is the exact midpoint");
                assert!(text.contains(&format!("\"at_most\": {t:?}")), "{t:?} in\n{text}");
            }
            assert!(text.contains("\"between\": ["), "{text}");
        }
    }

    #[test]
    fn pairs_keep_every_f32_exactly() {
        let mut rng = crate::sweep::folds::SplitMix64::new(17);
        for _ in 0..100_000 {
            let pair = [f32::from_bits(rng.next() as u32), f32::from_bits(rng.next() as u32)];
            if pair.iter().all(|x| x.is_finite()) {
                let back: [f32; 2] = serde_json::from_str(&serde_json::to_string(&pair).unwrap()).unwrap();
                assert_eq!(back.map(f32::to_bits), pair.map(f32::to_bits), "{pair:?}");
            }
        }
    }

    #[test]
    fn a_decision_survives_a_round_trip_and_old_files_have_none() {
        let mut tree = classify_tree();
        assert_eq!(from_json(&to_json(&tree)).unwrap().decision, None);
        assert!(!to_json(&tree).contains("decision"));
        tree.decision = Some(Decision { threshold: 0.16666666666666666, false_alarm: 1.0, miss: 5.0 });
        let text = to_json(&tree);
        assert_eq!(from_json(&text).unwrap(), tree);
        // A threshold that is not a number, costs that are not usable: refused.
        let bad = text.replace("\"miss\": 5.0", "\"miss\": -5.0");
        assert!(from_json(&bad).unwrap_err().contains("decision"), "{bad}");
    }

    #[test]
    fn files_without_the_pair_still_load() {
        for tree in [classify_tree(), regress_tree(), hand_tree()] {
            let old = without_pairs(&to_json(&tree));
            assert!(!old.contains("between"));
            let back = from_json(&old).unwrap();
            let mut expected = tree.clone();
            for n in &mut expected.nodes {
                if let Some(s) = &mut n.split {
                    s.between = None;
                }
            }
            assert_eq!(back, expected);
            let value = |text: &str| serde_json::from_str::<serde_json::Value>(text).unwrap();
            assert_eq!(value(&to_json(&back)), value(&old), "written back as it was read");
        }
    }

    #[test]
    fn a_pair_that_does_not_surround_the_threshold_is_refused() {
        let text = to_json(&regress_tree());
        assert!(text.contains("\"between\": [\n"), "{text}");
        let mut v: serde_json::Value = serde_json::from_str(&text).unwrap();
        v["nodes"][0]["split"]["between"] = serde_json::json!([6.0, 7.0]);
        let e = from_json(&v.to_string()).unwrap_err();
        assert!(e.contains("nodes[0]: between [6, 7] does not surround"), "{e}");
        v["nodes"][0]["split"]["test"] = serde_json::json!({"present": true});
        let e = from_json(&v.to_string()).unwrap_err();
        assert!(e.contains("nodes[0]: between"), "{e}");
    }
}
