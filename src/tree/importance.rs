//! Impurity-based feature importance ("mean decrease in impurity", Breiman et al., 1984,
//! §5.3.4): per feature, the total weighted impurity decrease of the splits on it, read from
//! the finished tree's node statistics, normalised to sum 1.

use super::Tree;
use crate::data::Frame;

impl Tree {
    /// Per feature column (in column order): Σ over the splits on it of
    /// (N_t·I(t) − N_L·I(L) − N_R·I(R)) / N, divided by the sum over all features so the
    /// shares add up to 1. All zeros for a tree without splits (a lone leaf) or whose splits
    /// decrease nothing. Computed from the nodes' weighted rows and impurities, so a pruned
    /// tree or one read back from a file gives the same shares as the tree it came from.
    pub fn impurity_importances(&self) -> Vec<f64> {
        let mut total = vec![0.0; self.columns.len().max(self.n_features)];
        for node in &self.nodes {
            let Some(split) = &node.split else { continue };
            let (l, r) = (&self.nodes[node.left as usize], &self.nodes[node.right as usize]);
            let decrease = node.weighted_rows * node.impurity - l.weighted_rows * l.impurity - r.weighted_rows * r.impurity;
            total[split.feature as usize] += decrease / self.total_weight;
        }
        let sum: f64 = total.iter().sum();
        if sum > 0.0 {
            for v in &mut total {
                *v /= sum;
            }
        }
        total
    }

    /// The leaf row `row` of `frame` reaches when its cell of column `feature` is replaced by
    /// row `other`'s: the walk of a permutation test, without copying the column.
    pub fn apply_row_swapped(&self, frame: &Frame, row: usize, feature: u32, other: usize) -> u32 {
        let mut i = 0usize;
        loop {
            let node = &self.nodes[i];
            let Some(split) = &node.split else { return i as u32 };
            let r = if split.feature == feature { other } else { row };
            i = if self.takes_left(split, frame, r).0 { node.left } else { node.right } as usize;
        }
    }
}

#[cfg(test)]
mod tests {
    use crate::data::{Column, Dataset, Feature, Frame, Target};
    use crate::tree::{fit, FitOptions, TrainSet};

    #[test]
    fn worked_example_by_hand() {
        // x0 separates the classes at the root; x1 is noise the tree never needs.
        // Root: 4 rows, 2 of each class, Gini 0.5; both children pure: decrease 4·0.5/4 = 0.5,
        // all of it on x0, so the shares are [1, 0].
        let x0 = Column::Numeric(vec![1.0, 2.0, 3.0, 4.0]);
        let x1 = Column::Numeric(vec![5.0, 5.0, 5.0, 5.0]);
        let frame = Frame::new(vec![Feature { name: "x0".into(), column: x0 }, Feature { name: "x1".into(), column: x1 }]).unwrap();
        let target = Target::Classes { codes: vec![0, 0, 1, 1], labels: vec!["a".into(), "b".into()] };
        let data = Dataset::new(frame, "y".into(), target).unwrap();
        let tree = fit(&TrainSet::of(&data), &FitOptions::default().check(data.task()).unwrap()).unwrap();
        assert_eq!(tree.impurity_importances(), vec![1.0, 0.0]);
        // A lone leaf: nothing to share.
        let leaf = tree.collapse(&vec![false; tree.nodes.len()]);
        assert_eq!(leaf.impurity_importances(), vec![0.0, 0.0]);
    }
}
