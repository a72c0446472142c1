//! One work unit: a fold's envelope tree for one shaping key, and every setting of that key
//! scored from it without refitting.
//!
//! The envelope tree T* grows with the loosest stopping limits of the grid. A stopping setting
//! keeps an ancestor-closed set of T*'s splits: a split is *open* when its depth, rows and gain
//! pass the setting's limits and its parent is open; with `max_leaves` = L only the first
//! L − 1 open splits in T*'s best-first order stay; `prune_alpha` then collapses weakest links
//! of that subtree. Validation and training rows are routed through T* once; each T* leaf
//! keeps its rows' aggregates, and a setting's leaf for a T* leaf is its deepest kept
//! ancestor, so a setting costs O(nodes of T*), not O(rows).

use super::metrics::{score_classes, score_values, ClassGroups, Scoring, ValueGroup};
use crate::data::{Dataset, Target};
use crate::tree::{fit_shared, fit_with_leaves, pruning_path_of, FitError, FitOptions, TrainSet, Tree, NO_NODE};
use rayon::prelude::*;

/// Envelopes of at least this many nodes, or sides of a fold of at least this many rows, are
/// routed, aggregated and scored on the pool; smaller ones on the calling thread, whose
/// neighbours are busy with other units.
pub const PARALLEL_SCORING: usize = 1 << 14;

/// Scores of one setting on one fold.
#[derive(Clone, Debug, PartialEq)]
pub struct FoldScore {
    pub valid: f64,
    pub train: f64,
    pub leaves: u32,
    pub depth: u32,
}

/// The rows of one side (training or validation) of a fold, aggregated per T* leaf.
enum LeafRows {
    /// `counts[leaf · k + class]`, unweighted.
    Classes { k: usize, counts: Vec<f64> },
    /// Per T* leaf: count, mean, M2, and the sorted values with prefix sums.
    Values { n: Vec<f64>, mean: Vec<f64>, m2: Vec<f64>, sorted: Vec<Vec<f64>>, prefix: Vec<Vec<f64>> },
}

impl LeafRows {
    /// Aggregates `rows`, whose leaves in T* are the nodes `leaf_of`.
    fn build(leaf_slot: &[u32], n_leaves: usize, data: &Dataset, rows: &[u32], leaf_of: &[u32]) -> LeafRows {
        let leaves: Vec<u32> = leaf_of.iter().map(|&node| leaf_slot[node as usize]).collect();
        match &data.target {
            Target::Classes { codes, labels } => {
                let k = labels.len();
                let mut counts = vec![0.0; n_leaves * k];
                for (&r, &l) in rows.iter().zip(&leaves) {
                    counts[l as usize * k + codes[r as usize] as usize] += 1.0;
                }
                LeafRows::Classes { k, counts }
            }
            Target::Values(y) => {
                let mut sorted = vec![Vec::new(); n_leaves];
                for (&r, &l) in rows.iter().zip(&leaves) {
                    sorted[l as usize].push(y[r as usize]);
                }
                let mut n = vec![0.0; n_leaves];
                let mut mean = vec![0.0; n_leaves];
                let mut m2 = vec![0.0; n_leaves];
                let mut prefix = Vec::with_capacity(n_leaves);
                for (j, v) in sorted.iter_mut().enumerate() {
                    v.sort_by(f64::total_cmp);
                    n[j] = v.len() as f64;
                    if !v.is_empty() {
                        mean[j] = v.iter().sum::<f64>() / n[j];
                        m2[j] = v.iter().map(|y| (y - mean[j]) * (y - mean[j])).sum();
                    }
                    let mut p = Vec::with_capacity(v.len() + 1);
                    p.push(0.0);
                    let mut acc = 0.0;
                    for y in v.iter() {
                        acc += y;
                        p.push(acc);
                    }
                    prefix.push(p);
                }
                LeafRows::Values { n, mean, m2, sorted, prefix }
            }
        }
    }

    /// Scores a setting whose leaf for T* leaf j is node `leaf_of[j]`.
    fn score(&self, metric: Scoring, tree: &Tree, leaf_of: &[u32], buf: &mut ScoreBuf) -> f64 {
        match self {
            LeafRows::Classes { k, counts } => {
                // Merge T* leaves into the setting's leaves, so ties in score are whole leaves.
                buf.slot.clear();
                buf.slot.resize(tree.nodes.len(), NO_NODE);
                buf.counts.clear();
                buf.proba.clear();
                for (j, &node) in leaf_of.iter().enumerate() {
                    let s = &mut buf.slot[node as usize];
                    if *s == NO_NODE {
                        *s = (buf.counts.len() / k) as u32;
                        buf.counts.extend(std::iter::repeat_n(0.0, *k));
                        buf.proba.extend_from_slice(tree.value(node as usize));
                    }
                    let base = *s as usize * k;
                    for c in 0..*k {
                        buf.counts[base + c] += counts[j * k + c];
                    }
                }
                score_classes(metric, &ClassGroups { k: *k, counts: &buf.counts, proba: &buf.proba })
            }
            LeafRows::Values { n, mean, m2, sorted, prefix } => {
                let groups: Vec<ValueGroup> = (0..n.len())
                    .map(|j| ValueGroup { n: n[j], mean: mean[j], m2: m2[j], sorted: &sorted[j], prefix: &prefix[j] })
                    .collect();
                let pred: Vec<f64> = leaf_of.iter().map(|&node| tree.value(node as usize)[0]).collect();
                score_values(metric.metric, &groups, &pred)
            }
        }
    }
}

#[derive(Default)]
struct ScoreBuf {
    slot: Vec<u32>,
    counts: Vec<f64>,
    proba: Vec<f64>,
}

/// A fold's envelope tree with its rows aggregated per leaf.
pub struct Envelope {
    pub tree: Tree,
    parent: Vec<u32>,
    /// Split nodes in best-first order.
    by_rank: Vec<u32>,
    /// T* leaves in preorder, and each node's position among them.
    leaves: Vec<u32>,
    valid: LeafRows,
    train: LeafRows,
}

/// The stopping limits of one group of settings (all but `prune_alpha`).
#[derive(Clone, Debug, PartialEq)]
pub struct Stopping {
    pub max_depth: Option<u32>,
    pub min_split_rows: u32,
    pub max_leaves: Option<u32>,
    pub min_gain: f64,
}

impl Envelope {
    /// Grows T* on `train` rows of `data` and aggregates both sides of the fold.
    pub fn grow(data: &Dataset, options: &FitOptions, train: &[u32], valid: &[u32]) -> Result<Envelope, FitError> {
        let checked = options.check(data.task())?;
        let set = TrainSet { frame: &data.frame, target: &data.target, target_name: &data.target_name, rows: Some(train), weights: None };
        // The grower knows each training row's leaf; only the validation rows are routed.
        let (tree, train_leaves) = fit_with_leaves(&set, &checked)?;
        Ok(Envelope::of(tree, &train_leaves, data, train, valid))
    }

    /// The envelopes of one fold for each of several `min_leaf_rows` values (in their
    /// order), the other options as `options` gives them: grown together, so that one scan
    /// per node and feature serves every value, and each equal to [`Envelope::grow`] under
    /// its value. Each envelope's rows are aggregated when the iterator reaches it, so a
    /// caller that scores and drops them one by one holds one set of aggregates at a time.
    pub fn grow_shared<'a>(data: &'a Dataset, options: &FitOptions, min_leaf_rows: &[u32], train: &'a [u32], valid: &'a [u32]) -> Result<impl Iterator<Item = Envelope> + 'a, FitError> {
        let checked = options.check(data.task())?;
        let set = TrainSet { frame: &data.frame, target: &data.target, target_name: &data.target_name, rows: Some(train), weights: None };
        let grown = fit_shared(&set, &checked, min_leaf_rows)?;
        Ok(grown.into_iter().map(move |(tree, train_leaves)| Envelope::of(tree, &train_leaves, data, train, valid)))
    }

    /// Whether scoring this envelope's settings pays for the pool's hand-off.
    pub fn is_big(&self) -> bool {
        self.tree.nodes.len() >= PARALLEL_SCORING
    }

    /// The envelope of a grown tree T*, given the leaf of each training row.
    fn of(tree: Tree, train_leaves: &[u32], data: &Dataset, train: &[u32], valid: &[u32]) -> Envelope {
        let n = tree.nodes.len();
        let mut parent = vec![NO_NODE; n];
        for (i, node) in tree.nodes.iter().enumerate() {
            if !node.is_leaf() {
                parent[node.left as usize] = i as u32;
                parent[node.right as usize] = i as u32;
            }
        }
        let mut by_rank: Vec<u32> = (0..n as u32).filter(|&i| !tree.nodes[i as usize].is_leaf()).collect();
        by_rank.sort_by_key(|&i| tree.nodes[i as usize].rank);
        let leaves = tree.leaves();
        let mut slot = vec![NO_NODE; n];
        for (j, &l) in leaves.iter().enumerate() {
            slot[l as usize] = j as u32;
        }
        let build = |rows: &[u32], leaf_of: &[u32]| LeafRows::build(&slot, leaves.len(), data, rows, leaf_of);
        let route = |&r: &u32| tree.apply_row(&data.frame, r as usize);
        let (valid_rows, train_rows) = if valid.len().max(train.len()) >= PARALLEL_SCORING {
            // A big fold: route the validation rows on the pool, and aggregate both sides at once.
            let valid_leaves: Vec<u32> = valid.par_iter().with_min_len(1024).map(route).collect();
            rayon::join(|| build(valid, &valid_leaves), || build(train, train_leaves))
        } else {
            let valid_leaves: Vec<u32> = valid.iter().map(route).collect();
            (build(valid, &valid_leaves), build(train, train_leaves))
        };
        Envelope { tree, parent, by_rank, leaves, valid: valid_rows, train: train_rows }
    }

    /// Which splits of T* a stopping setting keeps.
    pub fn keep(&self, s: &Stopping) -> Vec<bool> {
        let nodes = &self.tree.nodes;
        let mut keep = vec![false; nodes.len()];
        // Preorder: a parent comes before its children.
        for (i, node) in nodes.iter().enumerate() {
            let parent_ok = i == 0 || keep[self.parent[i] as usize];
            keep[i] = parent_ok
                && !node.is_leaf()
                && s.max_depth.is_none_or(|d| node.depth < d)
                && node.rows >= s.min_split_rows
                && node.gain + f64::EPSILON >= s.min_gain;
        }
        if let Some(l) = s.max_leaves {
            let mut budget = l.saturating_sub(1);
            for &i in &self.by_rank {
                if keep[i as usize] {
                    if budget > 0 {
                        budget -= 1;
                    } else {
                        keep[i as usize] = false;
                    }
                }
            }
            // A split dropped by the cap cuts off its subtree: keep must stay ancestor-closed.
            for i in 1..nodes.len() {
                if !keep[self.parent[i] as usize] {
                    keep[i] = false;
                }
            }
        }
        keep
    }

    /// Scores each α for one stopping setting: one pruning pass serves every α.
    pub fn score(&self, metric: impl Into<Scoring>, s: &Stopping, alphas: &[f64]) -> Vec<FoldScore> {
        let metric = metric.into();
        let keep = self.keep(s);
        let path = if alphas.iter().any(|&a| a > 0.0) { Some(pruning_path_of(&self.tree, Some(&keep))) } else { None };
        let mut buf = ScoreBuf::default();
        let mut leaf_of = vec![0u32; self.leaves.len()];
        alphas
            .iter()
            .map(|&alpha| {
                let mut k = keep.clone();
                if let Some(p) = &path {
                    for node in p.collapsed_at(alpha) {
                        k[node as usize] = false;
                    }
                }
                self.score_kept(metric, &k, &mut leaf_of, &mut buf)
            })
            .collect()
    }

    fn score_kept(&self, metric: Scoring, keep: &[bool], leaf_of: &mut [u32], buf: &mut ScoreBuf) -> FoldScore {
        let nodes = &self.tree.nodes;
        // Setting leaf of every node: itself if reached and not split, else its parent's.
        let mut at = vec![NO_NODE; nodes.len()];
        let mut leaves = 0;
        let mut depth = 0;
        for i in 0..nodes.len() {
            let above = if i == 0 { NO_NODE } else { at[self.parent[i] as usize] };
            at[i] = if above != NO_NODE {
                above
            } else if i == 0 || keep[self.parent[i] as usize] {
                if keep[i] {
                    NO_NODE
                } else {
                    leaves += 1;
                    depth = depth.max(nodes[i].depth);
                    i as u32
                }
            } else {
                NO_NODE
            };
        }
        for (j, &l) in self.leaves.iter().enumerate() {
            leaf_of[j] = at[l as usize];
        }
        FoldScore {
            valid: self.valid.score(metric, &self.tree, leaf_of, buf),
            train: self.train.score(metric, &self.tree, leaf_of, buf),
            leaves,
            depth,
        }
    }
}
