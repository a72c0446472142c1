//! CART trees: growth under the six complexity limits, the pruning path, predict and apply.
//!
//! Reading order: [`limits`] (what a fit may do), [`criterion`] (impurities), [`grow`]
//! (presort once, split search, stable partitioning), [`prune`] (minimal cost-complexity
//! pruning), [`predict`].
//!
//! Determinism: features are visited in index order and a candidate replaces the best only
//! when strictly better, so a fit depends on nothing but its inputs, serial or parallel.

pub mod criterion;
pub mod grow;
pub mod importance;
pub mod limits;
pub mod predict;
pub mod prune;
mod split;

pub use criterion::Criterion;
pub use grow::{fit, fit_shared, fit_with_leaves, TrainSet};
pub use limits::{CheckedOptions, ClassWeight, FitError, FitOptions, Limits, Monotone, Splitter, MAX_BINS};
pub use predict::{PathStep, Predictions};
pub use prune::{prune, pruning_path, pruning_path_of, PruneStep, PruningPath};

use crate::data::{ColumnKind, Task};

/// Marks "no node" in child and rank fields.
pub const NO_NODE: u32 = u32::MAX;

/// How a split sends rows left.
#[derive(Clone, Debug, PartialEq)]
pub enum SplitRule {
    /// Numeric: a row goes left when `(value as f64) <= threshold`.
    Threshold(f64),
    /// Categorical: bit `code` set means the category goes left. Categories the node never
    /// saw carry the missing direction, so known-but-absent and unseen categories and missing
    /// cells all go the same way.
    Categories(Vec<u64>),
}

/// The split of an internal node.
#[derive(Clone, Debug, PartialEq)]
pub struct Split {
    pub feature: u32,
    pub rule: SplitRule,
    /// Where missing cells (and unseen categories) go.
    pub missing_left: bool,
    /// For a numeric threshold, the training values around the cut as the fit saw them at
    /// this node: the largest present value that went left and the smallest that went right
    /// (the threshold is their midpoint). Only for showing the threshold; `None` for the
    /// `is present` test, category sets and trees read from files written before it was kept.
    pub between: Option<(f32, f32)>,
}

impl SplitRule {
    /// Whether `(lo, hi)` can be a split's `between` pair under this rule: both finite and
    /// the rule a finite threshold that sends `lo` left and `hi` right.
    pub fn fits_between(&self, lo: f32, hi: f32) -> bool {
        match self {
            SplitRule::Threshold(t) => t.is_finite() && lo.is_finite() && hi.is_finite() && (lo as f64) <= *t && *t < hi as f64,
            SplitRule::Categories(_) => false,
        }
    }

    /// Whether a known category code goes left.
    pub fn category_left(bits: &[u64], code: u32) -> bool {
        let word = (code / 64) as usize;
        word < bits.len() && (bits[word] >> (code % 64)) & 1 == 1
    }
}

/// One node of a fitted tree, with what the sweep needs later.
#[derive(Clone, Debug, PartialEq)]
pub struct Node {
    /// Root has depth 0.
    pub depth: u32,
    /// Training rows (with nonzero weight) that reached the node.
    pub rows: u32,
    pub weighted_rows: f64,
    pub impurity: f64,
    /// Weighted impurity decrease of the split, N_t/N · (I(t) − N_L/N_t · I(L) − N_R/N_t · I(R)); 0 on leaves.
    pub gain: f64,
    pub split: Option<Split>,
    pub left: u32,
    pub right: u32,
    /// Position of this split in best-first order (largest gain first); [`NO_NODE`] on leaves.
    pub rank: u32,
}

impl Node {
    pub fn is_leaf(&self) -> bool {
        self.split.is_none()
    }
}

/// A feature column as the tree was trained on it.
#[derive(Clone, Debug, PartialEq)]
pub struct ColumnInfo {
    pub name: String,
    pub kind: ColumnKind,
    /// Category names in code order (categorical columns only).
    pub levels: Vec<String>,
}

/// A two-class decision kept with a tree fitted under decision costs: class 1 when
/// p(class 1) ≥ `threshold`, else class 0. `false_alarm` and `miss` are the costs it was
/// chosen for (see `sweep::costs`); the class probabilities are not changed by it.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Decision {
    pub threshold: f64,
    pub false_alarm: f64,
    pub miss: f64,
}

impl Decision {
    /// Checks a decision read from a file or a message for a tree of `n_classes` classes:
    /// two classes, a finite threshold, costs as `sweep::costs::Costs::new` takes them.
    pub fn check(&self, n_classes: usize) -> Result<(), String> {
        if n_classes != 2 {
            return Err(format!("a decision threshold needs two classes, the model has {n_classes}"));
        }
        if !self.threshold.is_finite() {
            return Err(format!("decision threshold {} is not a finite number", self.threshold));
        }
        crate::sweep::costs::Costs::new(self.false_alarm, self.miss).map(|_| ()).map_err(|e| format!("decision costs: {e}"))
    }
}

/// A fitted tree: a flat arena of nodes in preorder (left subtree first), root at 0.
#[derive(Clone, Debug, PartialEq)]
pub struct Tree {
    pub task: Task,
    /// Name of the target column.
    pub target: String,
    /// Class labels in code order (classify only).
    pub labels: Vec<String>,
    pub columns: Vec<ColumnInfo>,
    /// Number of classes (classify); 0 when regressing.
    pub n_classes: usize,
    pub n_features: usize,
    pub nodes: Vec<Node>,
    /// Per node, `width()` values: class fractions (classify) or the mean (regress).
    pub values: Vec<f64>,
    /// Per node, weighted class totals (classify only; empty when regressing).
    pub class_totals: Vec<f64>,
    /// Total training weight N used in gains and pruning.
    pub total_weight: f64,
    pub options: FitOptions,
    /// The two-class decision rule of a model fitted under decision costs; `None`: the most
    /// likely class.
    pub decision: Option<Decision>,
}

impl Tree {
    /// Values per node: the number of classes, or 1.
    pub fn width(&self) -> usize {
        if self.task == Task::Classify {
            self.n_classes
        } else {
            1
        }
    }

    pub fn value(&self, node: usize) -> &[f64] {
        let w = self.width();
        &self.values[node * w..(node + 1) * w]
    }

    pub fn class_total(&self, node: usize) -> &[f64] {
        let k = self.n_classes;
        &self.class_totals[node * k..(node + 1) * k]
    }

    pub fn n_leaves(&self) -> usize {
        self.nodes.iter().filter(|n| n.is_leaf()).count()
    }

    pub fn depth(&self) -> u32 {
        self.nodes.iter().map(|n| n.depth).max().unwrap_or(0)
    }

    /// Node ids of the leaves, in preorder.
    pub fn leaves(&self) -> Vec<u32> {
        (0..self.nodes.len() as u32).filter(|&i| self.nodes[i as usize].is_leaf()).collect()
    }

    /// The subtree that keeps the splits of nodes with `keep[node]` and makes every other
    /// reached node a leaf. `keep` must be false on leaves. Nodes keep their statistics;
    /// best-first ranks are renumbered in the same relative order.
    pub fn collapse(&self, keep: &[bool]) -> Tree {
        let mut nodes = Vec::new();
        let w = self.width();
        let k = self.n_classes;
        let mut values = Vec::new();
        let mut totals = Vec::new();
        // Explicit stack: (old id, slot in parent to patch).
        let mut stack: Vec<(u32, Option<(usize, bool)>)> = vec![(0, None)];
        while let Some((old, parent)) = stack.pop() {
            let new = nodes.len() as u32;
            if let Some((p, is_left)) = parent {
                let pn: &mut Node = &mut nodes[p];
                if is_left {
                    pn.left = new;
                } else {
                    pn.right = new;
                }
            }
            let src = &self.nodes[old as usize];
            let mut node = src.clone();
            values.extend_from_slice(&self.values[old as usize * w..(old as usize + 1) * w]);
            if k > 0 && !self.class_totals.is_empty() {
                totals.extend_from_slice(&self.class_totals[old as usize * k..(old as usize + 1) * k]);
            }
            if src.is_leaf() || !keep[old as usize] {
                node.split = None;
                node.gain = 0.0;
                node.left = NO_NODE;
                node.right = NO_NODE;
                node.rank = NO_NODE;
                nodes.push(node);
            } else {
                nodes.push(node);
                let idx = nodes.len() - 1;
                stack.push((src.right, Some((idx, false))));
                stack.push((src.left, Some((idx, true))));
            }
        }
        let mut ranked: Vec<usize> = (0..nodes.len()).filter(|&i| nodes[i].rank != NO_NODE).collect();
        ranked.sort_by_key(|&i| nodes[i].rank);
        for (r, &i) in ranked.iter().enumerate() {
            nodes[i].rank = r as u32;
        }
        Tree { nodes, values, class_totals: totals, ..self.clone_header() }
    }

    fn clone_header(&self) -> Tree {
        Tree {
            task: self.task,
            target: self.target.clone(),
            labels: self.labels.clone(),
            columns: self.columns.clone(),
            n_classes: self.n_classes,
            n_features: self.n_features,
            nodes: Vec::new(),
            values: Vec::new(),
            class_totals: Vec::new(),
            total_weight: self.total_weight,
            options: self.options.clone(),
            decision: self.decision,
        }
    }
}
