//! Permutation importance of the picked setting (Breiman, 2001, "Random Forests", §10; the
//! model-agnostic form of Fisher, Rudin & Dominici, 2019): on each validation fold, the tree
//! of the picked setting grown on the fold's training rows is scored on the fold's
//! validation rows, then again with one feature's values shuffled among those rows. The
//! drop in score, averaged over [`PERMUTATION_REPEATS`] shuffles, is the feature's importance
//! on that fold; a run reports its mean and sample standard deviation over the folds.
//!
//! Drops are oriented like the run's gap: score − shuffled score where higher is better,
//! shuffled score − score where lower is better, so a larger value always means the model
//! leans on the feature more. A feature the tree never splits on has exactly 0.
//!
//! Shuffles are seeded: repeat r of feature j on split s uses the r-th Fisher–Yates shuffle
//! (Knuth, TAOCP vol. 2, Algorithm P) of a SplitMix64 stream seeded from the run's seed, s
//! and j ([`permutations`]), so a run's importances depend on nothing but its inputs, and
//! another tool can replay the very same shuffles.

use rayon::prelude::*;

use super::folds::SplitMix64;
use super::metrics::{rows, Scoring};
use super::{Plan, Setting};
use crate::data::{Dataset, Target};
use crate::tree::{fit, FitError, TrainSet, Tree};

/// Shuffles per feature and fold. Five, as the reference library's default
/// (`n_repeats=5`): common practice, enough for a mean whose spread the fold sd shows.
pub const PERMUTATION_REPEATS: u32 = 5;

/// Permutation importances of a run's picked setting.
#[derive(Clone, Debug, PartialEq)]
pub struct PermutationImportance {
    /// Feature column names, in the order of the drops.
    pub features: Vec<String>,
    /// Shuffles per feature and fold.
    pub repeats: u32,
    /// Per split (fold), per feature column: the mean drop over the repeats.
    pub per_fold: Vec<Vec<f64>>,
}

impl PermutationImportance {
    /// Per feature: the mean of the fold drops.
    pub fn mean(&self) -> Vec<f64> {
        let k = self.per_fold.len() as f64;
        let f = self.per_fold.first().map_or(0, Vec::len);
        (0..f).map(|j| self.per_fold.iter().map(|d| d[j]).sum::<f64>() / k).collect()
    }

    /// Per feature: the sample standard deviation (ddof = 1) of the fold drops; 0 with one fold.
    pub fn sd(&self) -> Vec<f64> {
        let k = self.per_fold.len();
        self.mean()
            .iter()
            .enumerate()
            .map(|(j, m)| if k > 1 { (self.per_fold.iter().map(|d| (d[j] - m) * (d[j] - m)).sum::<f64>() / (k as f64 - 1.0)).sqrt() } else { 0.0 })
            .collect()
    }
}

/// The seed of split `split`'s shuffles in a run seeded `seed`.
pub fn split_seed(seed: u64, split: usize) -> u64 {
    SplitMix64::new(seed ^ 0x7065_726d_7574_6521).next().wrapping_add(split as u64)
}

/// The `repeats` row orders of feature `feature` over `n` rows: shuffled value r of repeat
/// k takes the cell of row `order[k][r]` (the reference library's `X[perm, j]`).
pub fn permutations(seed: u64, feature: usize, repeats: u32, n: usize) -> Vec<Vec<u32>> {
    let mut rng = SplitMix64::new(seed ^ SplitMix64::new(feature as u64).next());
    (0..repeats)
        .map(|_| {
            let mut order: Vec<u32> = (0..n as u32).collect();
            rng.shuffle(&mut order);
            order
        })
        .collect()
}

/// Score of `tree` on every row of `data` under `metric`, each row routed by `leaf`.
fn score_leaves(tree: &Tree, data: &Dataset, metric: Scoring, leaf: impl Fn(usize) -> u32) -> f64 {
    match &data.target {
        Target::Classes { codes, .. } => {
            let k = tree.n_classes;
            let mut proba = Vec::with_capacity(codes.len() * k);
            for r in 0..codes.len() {
                proba.extend_from_slice(tree.value(leaf(r) as usize));
            }
            rows::classes(metric, k, codes, &proba)
        }
        Target::Values(y) => {
            let pred: Vec<f64> = (0..y.len()).map(|r| tree.value(leaf(r) as usize)[0]).collect();
            rows::values(metric.metric, y, &pred)
        }
    }
}

/// The score of `tree` on `data` and, per feature column, the score after each of the
/// shuffles of [`permutations`]`(seed, j, repeats, rows)`.
pub fn shuffled_scores(tree: &Tree, data: &Dataset, metric: impl Into<Scoring>, seed: u64, repeats: u32) -> (f64, Vec<Vec<f64>>) {
    let metric = metric.into();
    let frame = &data.frame;
    let base = score_leaves(tree, data, metric, |r| tree.apply_row(frame, r));
    let per_feature = (0..frame.n_features())
        .into_par_iter()
        .map(|j| {
            permutations(seed, j, repeats, data.rows())
                .iter()
                .map(|order| score_leaves(tree, data, metric, |r| tree.apply_row_swapped(frame, r, j as u32, order[r] as usize)))
                .collect()
        })
        .collect();
    (base, per_feature)
}

/// Per feature column: the mean oriented drop of [`shuffled_scores`].
pub fn drops(tree: &Tree, data: &Dataset, metric: impl Into<Scoring>, seed: u64, repeats: u32) -> Vec<f64> {
    let metric = metric.into();
    let (base, shuffled) = shuffled_scores(tree, data, metric, seed, repeats);
    let sign = if metric.metric.higher_is_better() { 1.0 } else { -1.0 };
    shuffled.iter().map(|s| s.iter().map(|x| sign * (base - x)).sum::<f64>() / s.len() as f64).collect()
}

/// Permutation importance of `setting` over the plan's validation folds, shuffles seeded
/// from `seed` (the run's seed).
pub fn permutation_importance(plan: &Plan, setting: &Setting, seed: u64, repeats: u32) -> Result<PermutationImportance, FitError> {
    let checked = setting.options.check(plan.data.task())?;
    let per_fold = plan
        .folds
        .splits
        .iter()
        .enumerate()
        .map(|(s, fold)| {
            let tree = fit(&TrainSet { rows: Some(&fold.train), ..TrainSet::of(&plan.data) }, &checked)?;
            Ok(drops(&tree, &plan.data.take_rows(&fold.valid), plan.spec.scoring(), split_seed(seed, s), repeats))
        })
        .collect::<Result<_, FitError>>()?;
    let features = plan.data.frame.features.iter().map(|f| f.name.clone()).collect();
    Ok(PermutationImportance { features, repeats, per_fold })
}
