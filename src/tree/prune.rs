//! Minimal cost-complexity pruning (Breiman, Friedman, Olshen & Stone, *Classification and
//! Regression Trees*, 1984, ch. 3.3).
//!
//! With R(t) = N_t/N · I(t) and R(T_t) the sum of R over the leaves below t, the weakest
//! link is the internal node with the smallest α_t = (R(t) − R(T_t)) / (|leaves(T_t)| − 1).
//! Collapsing weakest links one at a time gives the pruning path; `prune_alpha` = α keeps
//! collapsing while the weakest link's α_t ≤ α. Ties go to the lowest node id (preorder).

use std::cmp::Ordering;
use std::collections::BinaryHeap;

use super::{Tree, NO_NODE};

/// One step of the pruning path.
#[derive(Clone, Debug, PartialEq)]
pub struct PruneStep {
    /// Effective α of the collapse (0 for the first entry, the unpruned tree).
    pub alpha: f64,
    /// Node collapsed into a leaf at this step ([`NO_NODE`] for the first entry).
    pub node: u32,
    /// Leaves of the subtree after this step.
    pub leaves: usize,
    /// Σ R(leaf) of the subtree after this step.
    pub impurity: f64,
}

/// The whole pruning sequence of a tree, from the tree itself down to its root alone.
#[derive(Clone, Debug, PartialEq)]
pub struct PruningPath {
    pub steps: Vec<PruneStep>,
}

impl PruningPath {
    pub fn alphas(&self) -> Vec<f64> {
        self.steps.iter().map(|s| s.alpha).collect()
    }

    pub fn impurities(&self) -> Vec<f64> {
        self.steps.iter().map(|s| s.impurity).collect()
    }

    /// Nodes collapsed when pruning at `alpha`: every step up to the first whose α exceeds it.
    /// α = 0 collapses nothing, even splits whose own α is 0 (splits that lower no
    /// impurity): `prune_alpha` = 0 means the grown tree, as in the reference library.
    pub fn collapsed_at(&self, alpha: f64) -> impl Iterator<Item = u32> + '_ {
        let steps = if alpha > 0.0 { &self.steps[1..] } else { &self.steps[..0] };
        steps.iter().take_while(move |s| s.alpha <= alpha).map(|s| s.node)
    }
}

#[derive(PartialEq)]
struct Link {
    alpha: f64,
    node: u32,
    version: u32,
}
impl Eq for Link {}
impl PartialOrd for Link {
    fn partial_cmp(&self, o: &Self) -> Option<Ordering> {
        Some(self.cmp(o))
    }
}
impl Ord for Link {
    // BinaryHeap pops the largest: make the smallest α (then lowest id) the largest.
    fn cmp(&self, o: &Self) -> Ordering {
        o.alpha.total_cmp(&self.alpha).then(o.node.cmp(&self.node))
    }
}

/// The pruning path of the subtree of `tree` whose splits are the nodes with `keep[node]`
/// (every split of the tree when `keep` is `None`). Node ids must be in preorder.
pub fn pruning_path_of(tree: &Tree, keep: Option<&[bool]>) -> PruningPath {
    let nodes = &tree.nodes;
    let n = nodes.len();
    let is_split = |i: usize| !nodes[i].is_leaf() && keep.is_none_or(|k| k[i]);
    let mut parent = vec![NO_NODE; n];
    let mut reached = vec![false; n];
    let mut internal = vec![false; n];
    let mut stack = vec![0usize];
    while let Some(i) = stack.pop() {
        reached[i] = true;
        if is_split(i) {
            internal[i] = true;
            let (l, r) = (nodes[i].left as usize, nodes[i].right as usize);
            parent[l] = i as u32;
            parent[r] = i as u32;
            stack.push(r);
            stack.push(l);
        }
    }
    let root_w = nodes[0].weighted_rows;
    let r_node: Vec<f64> = nodes.iter().map(|nd| nd.weighted_rows * nd.impurity / root_w).collect();
    let mut r_branch = vec![0.0; n];
    let mut n_leaves = vec![0usize; n];
    // Bubble each leaf's R up to its ancestors, leaves in id order.
    for i in 0..n {
        if reached[i] && !internal[i] {
            let mut a = i as u32;
            while a != NO_NODE {
                r_branch[a as usize] += r_node[i];
                n_leaves[a as usize] += 1;
                a = parent[a as usize];
            }
        }
    }
    // α is never negative (R(t) ≥ R(T_t), Breiman et al. 1984, §3.3); a split with no gain
    // can still come out a few ulps below 0 from rounding, which would order the path wrongly
    // against pruning at α ≥ 0, so such a link gets 0.
    let alpha_of = |t: usize, r_branch: &[f64], n_leaves: &[usize]| ((r_node[t] - r_branch[t]) / (n_leaves[t] - 1) as f64).max(0.0);
    let mut version = vec![0u32; n];
    let mut heap = BinaryHeap::new();
    for t in 0..n {
        if internal[t] {
            heap.push(Link { alpha: alpha_of(t, &r_branch, &n_leaves), node: t as u32, version: 0 });
        }
    }
    let mut steps = vec![PruneStep { alpha: 0.0, node: NO_NODE, leaves: n_leaves[0], impurity: r_branch[0] }];
    let mut removed = vec![false; n];
    while internal[0] {
        let Some(link) = heap.pop() else { break };
        let t = link.node as usize;
        if !internal[t] || removed[t] || link.version != version[t] {
            continue;
        }
        let r_diff = r_branch[t] - r_node[t];
        let leaves_diff = n_leaves[t] - 1;
        // Everything below t leaves the subtree.
        let mut below = vec![nodes[t].left as usize, nodes[t].right as usize];
        while let Some(d) = below.pop() {
            removed[d] = true;
            if internal[d] {
                internal[d] = false;
                below.push(nodes[d].left as usize);
                below.push(nodes[d].right as usize);
            }
        }
        internal[t] = false;
        r_branch[t] = r_node[t];
        n_leaves[t] = 1;
        let mut a = parent[t];
        while a != NO_NODE {
            let au = a as usize;
            r_branch[au] -= r_diff;
            n_leaves[au] -= leaves_diff;
            version[au] += 1;
            heap.push(Link { alpha: alpha_of(au, &r_branch, &n_leaves), node: a, version: version[au] });
            a = parent[au];
        }
        steps.push(PruneStep { alpha: link.alpha, node: t as u32, leaves: n_leaves[0], impurity: r_branch[0] });
    }
    PruningPath { steps }
}

/// The pruning path of a whole tree.
pub fn pruning_path(tree: &Tree) -> PruningPath {
    pruning_path_of(tree, None)
}

/// The tree pruned at `alpha`.
pub fn prune(tree: &Tree, alpha: f64) -> Tree {
    let path = pruning_path(tree);
    let mut keep: Vec<bool> = tree.nodes.iter().map(|n| !n.is_leaf()).collect();
    for node in path.collapsed_at(alpha) {
        keep[node as usize] = false;
    }
    tree.collapse(&keep)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::{Column, Feature, Frame, Target};
    use crate::tree::{fit, FitOptions, TrainSet};

    /// Four rows on one feature, classes [0, 0, 1, 0]: a hand-checked path.
    #[test]
    fn path_of_a_small_tree() {
        let frame = Frame::new(vec![Feature { name: "x".into(), column: Column::Numeric(vec![1.0, 2.0, 3.0, 4.0]) }]).unwrap();
        let target = Target::Classes { codes: vec![0, 0, 1, 0], labels: vec!["a".into(), "b".into()] };
        let opts = FitOptions::default().check(crate::data::Task::Classify).unwrap();
        let tree = fit(&TrainSet::new(&frame, &target), &opts).unwrap();
        assert_eq!(tree.n_leaves(), 3);
        let path = pruning_path(&tree);
        // Root [3, 1]: Gini 0.375, R = 0.375. Root split x <= 2.5 (proxy 4/2 + 2/2 = 3 beats
        // 5/3 + 1 for 1.5 and 3.5); its right child {3, 4} = [1, 1] has Gini 0.5,
        // R = 2/4 · 0.5 = 0.25 and splits into pure leaves, so R(T) = 0.
        // α(right) = 0.25 / (2 − 1) = 0.25; α(root) = 0.375 / (3 − 1) = 0.1875, the weakest
        // link: the first step collapses the whole tree.
        let alphas = path.alphas();
        assert_eq!(alphas.len(), 2);
        assert_eq!(alphas[0], 0.0);
        assert!((alphas[1] - 0.1875).abs() < 1e-15);
        assert_eq!(path.steps[1].node, 0);
        assert_eq!(path.steps[1].leaves, 1);
        assert!((path.steps[1].impurity - 0.375).abs() < 1e-15);
    }
}
