//! Prediction: route a row to its leaf (`apply`), then read the leaf's value.

use rayon::prelude::*;

use super::{Split, SplitRule, Tree};
use crate::data::{Column, Frame, MISSING_CODE};

/// Predictions for a batch of rows.
#[derive(Clone, Debug, PartialEq)]
pub enum Predictions {
    /// Class code per row (the most likely class, lowest code on ties, or the class the
    /// tree's [`Decision`](super::Decision) picks) and, per row, the
    /// class probabilities (`n_classes` values each, row after row).
    Classes { classes: Vec<u32>, probabilities: Vec<f64> },
    Values(Vec<f64>),
}

/// One condition a row met on its way to its leaf: the node whose split it is, which way
/// the row went (`left`: the split's test holds), and whether it went that way because its
/// cell was missing (or held a category the training data did not have).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct PathStep {
    pub node: u32,
    pub left: bool,
    pub missing: bool,
}

/// Rows per parallel chunk in batch prediction.
const CHUNK: usize = 4096;

impl Tree {
    /// Checks that `frame` has the columns the tree was trained on, in order and of the same
    /// kind; categorical codes must index the training dictionary (unseen ones may be
    /// `levels.len()` or more).
    pub fn check_frame(&self, frame: &Frame) -> Result<(), String> {
        if frame.n_features() != self.columns.len() {
            return Err(format!("the tree needs {} feature columns, the frame has {}", self.columns.len(), frame.n_features()));
        }
        for (f, c) in frame.features.iter().zip(&self.columns) {
            if f.name != c.name {
                return Err(format!("column '{}' stands where the tree expects '{}'", f.name, c.name));
            }
            if f.column.kind() != c.kind {
                return Err(format!("column '{}' is {}, the tree was trained on {}", f.name, f.column.kind(), c.kind));
            }
        }
        Ok(())
    }

    /// The leaf (node id) that row `row` of `frame` reaches.
    ///
    /// Missing cells, and category codes the training data did not have (codes at or beyond
    /// the split's dictionary, or [`MISSING_CODE`]), follow the split's missing direction.
    pub fn apply_row(&self, frame: &Frame, row: usize) -> u32 {
        let mut i = 0usize;
        loop {
            let node = &self.nodes[i];
            let Some(split) = &node.split else { return i as u32 };
            i = if self.takes_left(split, frame, row).0 { node.left } else { node.right } as usize;
        }
    }

    /// The leaf row `row` of `frame` reaches and, root first, every condition it met on the
    /// way: the same walk as [`Tree::apply_row`], written down.
    pub fn path_row(&self, frame: &Frame, row: usize) -> (u32, Vec<PathStep>) {
        let mut steps = Vec::new();
        let mut i = 0usize;
        loop {
            let node = &self.nodes[i];
            let Some(split) = &node.split else { return (i as u32, steps) };
            let (left, missing) = self.takes_left(split, frame, row);
            steps.push(PathStep { node: i as u32, left, missing });
            i = if left { node.left } else { node.right } as usize;
        }
    }

    /// Whether row `row` goes left at `split`, and whether it went there as a missing cell
    /// (or a category the training data did not have) following the split's missing side.
    pub(super) fn takes_left(&self, split: &Split, frame: &Frame, row: usize) -> (bool, bool) {
        let col = &frame.features[split.feature as usize].column;
        match (&split.rule, col) {
            (SplitRule::Threshold(t), Column::Numeric(v)) => {
                let x = v[row];
                if x.is_nan() {
                    (split.missing_left, true)
                } else {
                    ((x as f64) <= *t, false)
                }
            }
            (SplitRule::Categories(bits), Column::Categorical { codes, .. }) => {
                let c = codes[row];
                if c == MISSING_CODE || c as usize >= self.columns[split.feature as usize].levels.len() {
                    (split.missing_left, true)
                } else {
                    (SplitRule::category_left(bits, c), false)
                }
            }
            // A frame that passed `check_frame` never gets here; send the row with missing cells.
            _ => (split.missing_left, true),
        }
    }

    /// Leaf ids for every row of `frame`.
    pub fn apply(&self, frame: &Frame) -> Vec<u32> {
        let mut out = vec![0u32; frame.rows];
        out.par_chunks_mut(CHUNK).enumerate().for_each(|(c, chunk)| {
            for (j, o) in chunk.iter_mut().enumerate() {
                *o = self.apply_row(frame, c * CHUNK + j);
            }
        });
        out
    }

    /// The class a leaf decides: with a [`Decision`](super::Decision) (two classes), class 1
    /// when its share is at least the threshold; otherwise the most likely class, the
    /// largest fraction, lowest class code on ties.
    pub fn leaf_class(&self, leaf: u32) -> u32 {
        let v = self.value(leaf as usize);
        if let (Some(d), 2) = (self.decision, v.len()) {
            return (v[1] >= d.threshold) as u32;
        }
        let mut best = 0;
        for k in 1..v.len() {
            if v[k] > v[best] {
                best = k;
            }
        }
        best as u32
    }

    /// Class probabilities (classify) or the value (regress, one element) for one row.
    pub fn predict_row(&self, frame: &Frame, row: usize) -> &[f64] {
        self.value(self.apply_row(frame, row) as usize)
    }

    /// Predictions for every row of `frame`.
    pub fn predict(&self, frame: &Frame) -> Predictions {
        let leaves = self.apply(frame);
        if self.n_classes > 0 {
            let classes = leaves.iter().map(|&l| self.leaf_class(l)).collect();
            let mut probabilities = Vec::with_capacity(leaves.len() * self.n_classes);
            for &l in &leaves {
                probabilities.extend_from_slice(self.value(l as usize));
            }
            Predictions::Classes { classes, probabilities }
        } else {
            Predictions::Values(leaves.iter().map(|&l| self.value(l as usize)[0]).collect())
        }
    }
}
