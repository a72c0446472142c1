//! Sweeps: cross-validated scores for every setting of a grid, from one growth per fold
//! and shaping key.
//!
//! Reading order: [`spec`] (what is asked, checked once), [`folds`] (fold plans),
//! [`metrics`], [`envelope`] (one work unit), then this module: [`plan`] fixes the folds and
//! settings, [`run`] scores every work unit on rayon and reports each to a sink, [`summarize`]
//! turns unit results into setting scores and applies the pick rule, [`fit_final`] refits.
//!
//! `valid_sd` is the sample standard deviation of the fold scores (ddof = 1; 0 with one fold).

pub mod costs;
pub mod envelope;
pub mod importance;
pub mod folds;
pub mod memory;
pub mod metrics;
pub mod spec;

use std::sync::atomic::{AtomicBool, Ordering};

use rayon::prelude::*;

pub use envelope::{Envelope, FoldScore, Stopping};
pub use importance::{permutation_importance, PermutationImportance, PERMUTATION_REPEATS};
pub use folds::{FoldPlan, FoldScheme, FoldSplit, Folds};
pub use memory::RunSize;
pub use metrics::Metric;
pub use spec::{CheckedSpec, PickRule, Range, Setting, ShapingKey, SpecCaps, SpecError, SpecErrorKind, SweepSpec};

use crate::data::{Dataset, Frame};
use crate::tree::{fit, fit_shared, pruning_path, FitError, FitOptions, TrainSet, Tree};

/// A sweep ready to run: the checked spec, its folds, its settings and its work units.
#[derive(Clone, Debug)]
pub struct Plan {
    pub spec: CheckedSpec,
    pub folds: Folds,
    /// Every setting, in grid order.
    pub settings: Vec<Setting>,
    /// Work units: (split index, shaping key index), split-major: the splits of `folds`
    /// first, then those of `nested` (see [`Plan::split`]).
    pub units: Vec<(usize, usize)>,
    /// The dataset as the trees see it: the fold plans' columns left out of the features.
    pub data: Dataset,
    /// The outer loop of a nested sweep.
    pub nested: Option<Nested>,
    /// Score the groups of units one at a time, each with the pool's threads on its big
    /// nodes, rather than as many groups at once as the pool has threads: set for a table
    /// of at least [`ONE_GROUP_AT_A_TIME`] cells (one group's buffers in memory). Either
    /// way gives the same results (checked in sweep_equivalence).
    pub groups_one_at_a_time: bool,
}

/// The splits of a nested sweep. Split numbers after the main plan's run outer split by
/// outer split: the outer split itself, then the inner splits of its training rows.
#[derive(Clone, Debug, PartialEq)]
pub struct Nested {
    /// The outer plan's folds on every row.
    pub outer: Folds,
    /// Per outer split: the inner plan's folds of its training rows, with row numbers of
    /// the whole dataset. In `assignment`, rows outside the outer training rows are −2.
    pub inner: Vec<Folds>,
}

/// The seed of the outer plan: the sweep's seed moved by a fixed odd constant (the 64-bit
/// golden-ratio increment of SplitMix64), so outer and inner folds are not cut alike.
pub fn outer_seed(seed: u64) -> u64 {
    seed ^ 0x9E37_79B9_7F4A_7C15
}

/// One outer split of a nested sweep: what the inner sweep picked and how it scored.
#[derive(Clone, Debug, PartialEq)]
pub struct OuterFold {
    pub repeat: u32,
    pub fold: u32,
    /// Index into the plan's settings of the setting the inner sweep picked.
    pub picked: usize,
    /// The inner sweep's best validation mean (the pick rule `highest`).
    pub inner_best: f64,
    /// The inner validation mean of the picked setting.
    pub inner_picked: f64,
    /// The picked setting's tree, grown on the outer training rows, scored on the outer
    /// validation rows.
    pub outer_score: f64,
    /// Leaves of that tree.
    pub leaves: u32,
}

/// What nested cross-validation measured.
#[derive(Clone, Debug, PartialEq)]
pub struct NestedResult {
    pub folds: Vec<OuterFold>,
    /// Mean and sample standard deviation (ddof = 1) of the outer scores.
    pub outer_mean: f64,
    pub outer_sd: f64,
    /// The mean inner best score minus the mean outer score, oriented like the overfit gap
    /// (positive: the inner best promised more than unseen rows gave): the selection
    /// optimism of picking the best of a grid.
    pub optimism: f64,
}

/// Scores of every setting of one shaping key on one split.
#[derive(Clone, Debug, PartialEq)]
pub struct UnitResult {
    /// Index into [`Plan::units`].
    pub unit: usize,
    /// Indices into [`Plan::settings`], with their fold scores.
    pub scores: Vec<(usize, FoldScore)>,
}

/// How far a run has come.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Progress {
    pub units_done: usize,
    pub units_total: usize,
    /// Setting × split scores done (a setting is complete when all its splits are).
    pub scores_done: usize,
    pub scores_total: usize,
}

/// What a sink answers after each unit.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Flow {
    Continue,
    Stop,
}

/// Why a sweep did not finish.
#[derive(Clone, Debug, PartialEq)]
pub enum SweepError {
    Spec(SpecError),
    Fit(FitError),
    /// The cancel flag was raised or the sink said stop.
    Cancelled,
}

impl std::fmt::Display for SweepError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            SweepError::Spec(e) => write!(f, "{e}"),
            SweepError::Fit(e) => write!(f, "{e}"),
            SweepError::Cancelled => f.write_str("the sweep was cancelled"),
        }
    }
}

impl std::error::Error for SweepError {}

impl From<SpecError> for SweepError {
    fn from(e: SpecError) -> Self {
        SweepError::Spec(e)
    }
}
impl From<FitError> for SweepError {
    fn from(e: FitError) -> Self {
        SweepError::Fit(e)
    }
}

/// One setting's result over all splits.
#[derive(Clone, Debug, PartialEq)]
pub struct SettingScore {
    pub setting: Setting,
    /// Validation score per split, in split order.
    pub fold_scores: Vec<f64>,
    pub valid_mean: f64,
    /// Sample standard deviation (ddof = 1) of `fold_scores`.
    pub valid_sd: f64,
    pub train_mean: f64,
    /// `train_mean − valid_mean`.
    pub gap: f64,
    pub mean_leaves: f64,
    pub mean_depth: f64,
}

/// A finished sweep.
#[derive(Clone, Debug)]
pub struct SweepResult {
    pub metric: Metric,
    pub pick_rule: PickRule,
    pub scores: Vec<SettingScore>,
    /// Index into `scores` of the picked setting.
    pub picked: usize,
    /// Index into `scores` of the best `valid_mean` (equal to `picked` under `highest`).
    pub best: usize,
    /// The picked setting refit on all rows, when asked.
    pub model: Option<Tree>,
    /// The outer loop's scores, for a nested sweep.
    pub nested: Option<NestedResult>,
}

/// Checks the spec (with its default caps), assigns folds and expands the grid.
pub fn plan(data: &Dataset, spec: &SweepSpec) -> Result<Plan, SweepError> {
    plan_with(data, spec, &spec.default_caps())
}

/// Checks the spec within `caps`, assigns folds and expands the grid.
pub fn plan_with(data: &Dataset, spec: &SweepSpec, caps: &SpecCaps) -> Result<Plan, SweepError> {
    let checked = spec.check_with(data, caps)?;
    let folds = checked.folds.assign(data, spec.seed)?;
    let nested = match &checked.outer {
        None => None,
        Some((outer, _)) => Some(nest(data, &checked.folds, outer, spec.seed)?),
    };
    let mut plan_columns = folds.plan_columns.clone();
    if let Some(n) = &nested {
        plan_columns.extend(n.outer.plan_columns.iter().cloned());
    }
    let features: Vec<_> = data.frame.features.iter().filter(|f| !plan_columns.contains(&f.name)).cloned().collect();
    let frame = Frame::new(features).expect("a subset of valid columns");
    let data = Dataset { frame, target_name: data.target_name.clone(), target: data.target.clone() };
    let alphas_per_key: Vec<Vec<f64>> = if spec.prune_path {
        path_alphas(&data, &checked)?
    } else {
        vec![checked.prune_alpha.clone(); checked.keys.len()]
    };
    // Counted before the settings are made (path mode knows its α counts only now).
    let n = alphas_per_key.iter().try_fold(0u128, |acc, a| spec::checked_product(&[checked.stopping_count(), a.len()]).and_then(|k| acc.checked_add(k)));
    if n.is_none_or(|n| n > caps.max_settings as u128) {
        let shown = n.map_or_else(|| "too many".to_string(), |n| n.to_string());
        return Err(spec::cap_error("settings", format!("the grid has {shown} settings"), "max_settings", caps.max_settings as u64).into());
    }
    let settings = checked.settings(&alphas_per_key);
    let n_splits = folds.splits.len() + nested.as_ref().map_or(0, |n| n.inner.iter().map(|f| f.splits.len() + 1).sum());
    if n_splits.checked_mul(checked.keys.len()).is_none_or(|u| u > caps.max_units) {
        return Err(spec::cap_error("outer", format!("{n_splits} splits × {} shaping keys", checked.keys.len()), "max_units_per_run", caps.max_units as u64).into());
    }
    let units = (0..n_splits).flat_map(|s| (0..checked.keys.len()).map(move |k| (s, k))).collect();
    let groups_one_at_a_time = one_group_at_a_time(data.rows(), data.frame.features.len());
    Ok(Plan { spec: checked, folds, settings, units, data, nested, groups_one_at_a_time })
}

/// The outer folds of a nested sweep on every row, and the inner plan's folds of each outer
/// split's training rows (the sweep's own seed, so a nested sweep's inner folds of one outer
/// split are what a plain sweep of those rows would use).
pub fn nest(data: &Dataset, inner: &FoldPlan, outer: &FoldPlan, seed: u64) -> Result<Nested, SpecError> {
    let outer_folds = outer.assign(data, outer_seed(seed)).map_err(spec::as_outer)?;
    let mut all = Vec::with_capacity(outer_folds.splits.len());
    for o in &outer_folds.splits {
        let rows = &o.train;
        let sub = data.take_rows(rows);
        let within = |e: SpecError| SpecError { message: format!("in the training rows of outer split {} (repeat {}): {}", o.fold, o.repeat, e.message), ..e };
        inner.check(&sub).map_err(within)?;
        let f = inner.assign(&sub, seed).map_err(within)?;
        let whole = |v: &[u32]| v.iter().map(|&i| rows[i as usize]).collect::<Vec<u32>>();
        let splits = f.splits.iter().map(|s| FoldSplit { repeat: s.repeat, fold: s.fold, train: whole(&s.train), valid: whole(&s.valid) }).collect();
        let assignment = f
            .assignment
            .iter()
            .map(|a| {
                let mut full = vec![-2i32; data.rows()];
                for (i, &r) in rows.iter().enumerate() {
                    full[r as usize] = a[i];
                }
                full
            })
            .collect();
        all.push(Folds { splits, assignment, plan_columns: f.plan_columns });
    }
    Ok(Nested { outer: outer_folds, inner: all })
}

/// The α values a path-mode sweep scores for each key: geometric means of consecutive α on
/// the pruning path of the tree grown on all rows (the cross-validation of Breiman et al.,
/// 1984, §3.4.2), and the last α, which leaves the root alone. The trees of keys that differ
/// only in `min_leaf_rows` grow together.
fn path_alphas(data: &Dataset, spec: &CheckedSpec) -> Result<Vec<Vec<f64>>, FitError> {
    let keys = &spec.keys;
    let mut out = vec![Vec::new(); keys.len()];
    let mut done = vec![false; keys.len()];
    for i in 0..keys.len() {
        if done[i] {
            continue;
        }
        let group: Vec<usize> = (i..keys.len()).filter(|&j| keys[j].criterion == keys[i].criterion && keys[j].class_weight == keys[i].class_weight).collect();
        let options = envelope_options(spec, &keys[i]).check(data.task())?;
        let msl: Vec<u32> = group.iter().map(|&j| keys[j].min_leaf_rows).collect();
        for (&j, (tree, _)) in group.iter().zip(fit_shared(&TrainSet::of(data), &options, &msl)?) {
            let a = pruning_path(&tree).alphas();
            let mut alphas: Vec<f64> = a.windows(2).map(|w| (w[0] * w[1]).sqrt()).collect();
            alphas.push(*a.last().unwrap());
            alphas.dedup();
            out[j] = alphas;
            done[j] = true;
        }
    }
    Ok(out)
}

fn envelope_options(spec: &CheckedSpec, key: &ShapingKey) -> FitOptions {
    FitOptions { limits: spec.envelope_limits(key), criterion: Some(key.criterion), class_weight: key.class_weight, splitter: spec.spec.splitter, monotone: spec.monotone.clone() }
}

/// Where a split number points.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SplitRole {
    /// A split of the sweep's own fold plan: its scores make the score table.
    Main,
    /// Outer split `o` of a nested sweep.
    Outer(usize),
    /// Inner split `i` of outer split `o`.
    Inner(usize, usize),
}

impl Plan {
    /// What split `i` is.
    pub fn role(&self, mut i: usize) -> SplitRole {
        if i < self.folds.splits.len() {
            return SplitRole::Main;
        }
        i -= self.folds.splits.len();
        for (o, f) in self.nested.iter().flat_map(|n| n.inner.iter()).enumerate() {
            if i == 0 {
                return SplitRole::Outer(o);
            }
            if i <= f.splits.len() {
                return SplitRole::Inner(o, i - 1);
            }
            i -= f.splits.len() + 1;
        }
        panic!("split {i} past the plan's splits")
    }

    /// The rows of split `i`.
    pub fn split(&self, i: usize) -> &FoldSplit {
        match self.role(i) {
            SplitRole::Main => &self.folds.splits[i],
            SplitRole::Outer(o) => &self.nested.as_ref().unwrap().outer.splits[o],
            SplitRole::Inner(o, j) => &self.nested.as_ref().unwrap().inner[o].splits[j],
        }
    }

    /// Setting × split scores per unit.
    pub fn unit_size(&self, unit: usize) -> usize {
        let key = self.units[unit].1;
        self.settings.iter().filter(|s| s.key == key).count()
    }

    /// Scores one work unit.
    pub fn run_unit(&self, unit: usize) -> Result<UnitResult, FitError> {
        Ok(self.run_units(&[unit])?.remove(0))
    }

    /// Scores work units of one split whose shaping keys differ only in `min_leaf_rows`
    /// (see [`Plan::growth_groups`]), their envelopes grown together.
    pub fn run_units(&self, units: &[usize]) -> Result<Vec<UnitResult>, FitError> {
        let (split, key) = self.units[units[0]];
        let fold = self.split(split);
        let msl: Vec<u32> = units.iter().map(|&u| self.spec.keys[self.units[u].1].min_leaf_rows).collect();
        let envelopes = Envelope::grow_shared(&self.data, &envelope_options(&self.spec, &self.spec.keys[key]), &msl, &fold.train, &fold.valid)?;
        // Scored one by one: each envelope's aggregates are dropped before the next is made.
        Ok(units.iter().zip(envelopes).map(|(&u, env)| self.score_unit(u, &env)).collect())
    }

    /// Groups units to grow together: those of one split whose shaping keys share the
    /// criterion and class weighting (and so differ only in `min_leaf_rows`), in the order
    /// of their first unit.
    pub fn growth_groups(&self, units: &[usize]) -> Vec<Vec<usize>> {
        let mut index = std::collections::HashMap::new();
        let mut groups: Vec<Vec<usize>> = Vec::new();
        for &u in units {
            let (split, key) = self.units[u];
            let k = &self.spec.keys[key];
            let g = *index.entry((split, k.criterion, k.class_weight)).or_insert_with(|| {
                groups.push(Vec::new());
                groups.len() - 1
            });
            groups[g].push(u);
        }
        groups
    }

    /// Scores every setting of a unit from its envelope: settings that differ only in α in
    /// one pass; those passes on the pool for a big envelope.
    fn score_unit(&self, unit: usize, env: &Envelope) -> UnitResult {
        let key = self.units[unit].1;
        let mine: Vec<usize> = (0..self.settings.len()).filter(|&i| self.settings[i].key == key).collect();
        // α varies fastest in grid order: settings that differ only in α are consecutive.
        let mut blocks = Vec::new();
        let mut i = 0;
        while i < mine.len() {
            let l = &self.settings[mine[i]].options.limits;
            let mut j = i;
            while j < mine.len() && same_stopping(&self.settings[mine[j]].options.limits, l) {
                j += 1;
            }
            blocks.push(&mine[i..j]);
            i = j;
        }
        let score_block = |block: &&[usize]| -> Vec<(usize, FoldScore)> {
            let l = &self.settings[block[0]].options.limits;
            let stopping = Stopping { max_depth: l.max_depth, min_split_rows: l.min_split_rows, max_leaves: l.max_leaves, min_gain: l.min_gain };
            let alphas: Vec<f64> = block.iter().map(|&s| self.settings[s].options.limits.prune_alpha).collect();
            block.iter().copied().zip(env.score(self.spec.scoring(), &stopping, &alphas)).collect()
        };
        let scored: Vec<Vec<(usize, FoldScore)>> = if env.is_big() { blocks.par_iter().map(score_block).collect() } else { blocks.iter().map(score_block).collect() };
        UnitResult { unit, scores: scored.into_iter().flatten().collect() }
    }
}

fn same_stopping(a: &crate::tree::Limits, b: &crate::tree::Limits) -> bool {
    a.max_depth == b.max_depth && a.min_split_rows == b.min_split_rows && a.max_leaves == b.max_leaves && a.min_gain == b.min_gain
}

/// Tables of at least this many cells (rows × features) are swept one group of units at a
/// time: each group's growth searches the features of its big nodes in parallel, so the
/// cores stay busy while memory holds one group's presorted columns, trees and leaf
/// aggregates instead of one per thread. (On 1,000,000 × 20 with two threads, two groups at
/// once peaked at 747 MB against 443 MB for one; see the README's performance section.)
pub const ONE_GROUP_AT_A_TIME: usize = 1 << 22;

/// See [`ONE_GROUP_AT_A_TIME`].
pub fn one_group_at_a_time(rows: usize, features: usize) -> bool {
    rows.saturating_mul(features) >= ONE_GROUP_AT_A_TIME
}

/// Scores every unit not in `done`, in parallel, calling `sink` after each (from the worker
/// thread that finished it, one call at a time, with progress numbers in call order). Units
/// whose envelopes grow together ([`Plan::growth_groups`]) finish together. The cancel flag
/// is checked before each group of units starts; a raised flag or a `Stop` from the sink
/// ends the run with [`SweepError::Cancelled`].
pub fn run(
    plan: &Plan,
    done: Vec<UnitResult>,
    sink: &(dyn Fn(&UnitResult, Progress) -> Flow + Sync),
    cancel: &AtomicBool,
) -> Result<Vec<UnitResult>, SweepError> {
    let no_clock = || None;
    run_timed(plan, done, &|r, p, _| sink(r, p), cancel, &no_clock)
}

/// A sink that is also told how long each unit took.
pub type TimedSink<'a> = dyn Fn(&UnitResult, Progress, Option<std::time::Duration>) -> Flow + Sync + 'a;

/// A monotonic clock the caller lends the core (which reads none itself); `None`: no durations.
pub type Clock<'a> = dyn Fn() -> Option<std::time::Instant> + Sync + 'a;

/// [`run`], also telling the sink how long each unit took by the caller's clock `now`.
pub fn run_timed(plan: &Plan, done: Vec<UnitResult>, sink: &TimedSink, cancel: &AtomicBool, now: &Clock) -> Result<Vec<UnitResult>, SweepError> {
    let mut finished = vec![false; plan.units.len()];
    for r in &done {
        finished[r.unit] = true;
    }
    let todo: Vec<usize> = (0..plan.units.len()).filter(|&u| !finished[u]).collect();
    let fresh = run_some_timed(plan, &todo, &done, sink, cancel, now)?;
    let mut all = done;
    all.extend(fresh);
    all.sort_by_key(|r| r.unit);
    Ok(all)
}

/// Scores the units `todo` (indices into [`Plan::units`]) as [`run`] scores the units not
/// done, counting progress on from `done`; only the fresh results, in the order of their
/// growth groups ([`Plan::growth_groups`]).
pub fn run_some(
    plan: &Plan,
    todo: &[usize],
    done: &[UnitResult],
    sink: &(dyn Fn(&UnitResult, Progress) -> Flow + Sync),
    cancel: &AtomicBool,
) -> Result<Vec<UnitResult>, SweepError> {
    let no_clock = || None;
    run_some_timed(plan, todo, done, &|r, p, _| sink(r, p), cancel, &no_clock)
}

/// [`run_some`], also telling the sink how long each unit took by the caller's clock `now`.
pub fn run_some_timed(plan: &Plan, todo: &[usize], done: &[UnitResult], sink: &TimedSink, cancel: &AtomicBool, now: &Clock) -> Result<Vec<UnitResult>, SweepError> {
    let sizes: Vec<usize> = (0..plan.units.len()).map(|u| plan.unit_size(u)).collect();
    let total_scores: usize = sizes.iter().sum();
    let already_units = done.len();
    let already_scores: usize = done.iter().map(|r| sizes[r.unit]).sum();
    let progress = std::sync::Mutex::new((already_units, already_scores));
    let score_group = |group: &Vec<usize>| -> Result<Vec<UnitResult>, FitError> {
        if cancel.load(Ordering::Relaxed) {
            return Ok(Vec::new());
        }
        let began = now();
        let results = plan.run_units(group)?;
        // A group's units grow together: each is given an equal share of its time.
        let took = began.zip(now()).map(|(a, b)| b.saturating_duration_since(a) / results.len().max(1) as u32);
        // The sink runs under the lock that numbers the progress, so units reach it one
        // at a time in the order of their numbers (a sink that stores them stores them in
        // that order). A panicking sink fails the run; it does not poison the others.
        let mut g = progress.lock().unwrap_or_else(|e| e.into_inner());
        for r in &results {
            g.0 += 1;
            g.1 += sizes[r.unit];
            let p = Progress { units_done: g.0, units_total: plan.units.len(), scores_done: g.1, scores_total: total_scores };
            if sink(r, p, took) == Flow::Stop {
                cancel.store(true, Ordering::Relaxed);
            }
        }
        drop(g);
        Ok(results)
    };
    let groups = plan.growth_groups(todo);
    // A big table's groups go one at a time, each growing with the pool's threads on its
    // big nodes' features: one group's buffers in memory instead of one per thread.
    let fresh: Vec<Result<Vec<UnitResult>, FitError>> = if plan.groups_one_at_a_time { groups.iter().map(score_group).collect() } else { groups.par_iter().map(score_group).collect() };
    let mut all = Vec::with_capacity(todo.len());
    for r in fresh {
        all.extend(r?);
    }
    if cancel.load(Ordering::Relaxed) {
        return Err(SweepError::Cancelled);
    }
    Ok(all)
}

/// Turns unit results into setting scores and picks one.
pub fn summarize(plan: &Plan, units: &[UnitResult]) -> SweepResult {
    let metric = plan.spec.metric;
    let scores = table(plan, units, |split| (plan.role(split) == SplitRole::Main).then_some(split));
    let best = pick(&scores, PickRule::Highest, metric);
    let picked = pick(&scores, plan.spec.spec.pick, metric);
    let nested = plan.nested.as_ref().map(|n| nested_result(plan, n, units));
    SweepResult { metric, pick_rule: plan.spec.spec.pick, scores, picked, best, model: None, nested }
}

/// Setting scores over the splits that `column` numbers (0, 1, … in split order), from
/// every unit of those splits.
fn table(plan: &Plan, units: &[UnitResult], column: impl Fn(usize) -> Option<usize>) -> Vec<SettingScore> {
    let width = (0..plan.units.len()).filter_map(|u| column(plan.units[u].0)).max().map_or(0, |c| c + 1);
    let mut per: Vec<Vec<Option<FoldScore>>> = vec![vec![None; width]; plan.settings.len()];
    for r in units {
        if let Some(c) = column(plan.units[r.unit].0) {
            for (s, score) in &r.scores {
                per[*s][c] = Some(score.clone());
            }
        }
    }
    per.into_iter()
        .zip(&plan.settings)
        .map(|(folds, setting)| aggregate(setting, &folds.into_iter().map(|x| x.expect("every unit scored")).collect::<Vec<_>>(), plan.spec.metric))
        .collect()
}

/// Per outer split: the inner sweep's pick, and the picked setting's score on the outer
/// validation rows (its tree grown on the outer training rows, which is what the outer
/// split's own unit scored).
fn nested_result(plan: &Plan, nested: &Nested, units: &[UnitResult]) -> NestedResult {
    let metric = plan.spec.metric;
    let folds: Vec<OuterFold> = nested
        .outer
        .splits
        .iter()
        .enumerate()
        .map(|(o, split)| {
            let inner = table(plan, units, |s| match plan.role(s) {
                SplitRole::Inner(oo, j) if oo == o => Some(j),
                _ => None,
            });
            let picked = pick(&inner, plan.spec.spec.pick, metric);
            let best = pick(&inner, PickRule::Highest, metric);
            let outer = units
                .iter()
                .filter(|r| plan.role(plan.units[r.unit].0) == SplitRole::Outer(o))
                .flat_map(|r| &r.scores)
                .find(|(s, _)| *s == picked)
                .map(|(_, f)| f.clone())
                .expect("every unit scored");
            OuterFold {
                repeat: split.repeat,
                fold: split.fold,
                picked,
                inner_best: inner[best].valid_mean,
                inner_picked: inner[picked].valid_mean,
                outer_score: outer.valid,
                leaves: outer.leaves,
            }
        })
        .collect();
    let k = folds.len() as f64;
    let outer_mean = folds.iter().map(|f| f.outer_score).sum::<f64>() / k;
    let outer_sd = if folds.len() > 1 { (folds.iter().map(|f| (f.outer_score - outer_mean).powi(2)).sum::<f64>() / (k - 1.0)).sqrt() } else { 0.0 };
    let inner_best = folds.iter().map(|f| f.inner_best).sum::<f64>() / k;
    NestedResult { optimism: overfit_gap(inner_best, outer_mean, metric), folds, outer_mean, outer_sd }
}

/// One setting's score from its fold scores, in split order. The gap is oriented by the
/// metric so that a larger gap always means more overfitting: training minus validation
/// where higher is better (accuracy), validation minus training where lower is better (RMSE).
pub fn aggregate(setting: &Setting, f: &[FoldScore], metric: Metric) -> SettingScore {
    let k = f.len() as f64;
    let fold_scores: Vec<f64> = f.iter().map(|x| x.valid).collect();
    let valid_mean = fold_scores.iter().sum::<f64>() / k;
    let valid_sd = if f.len() > 1 { (fold_scores.iter().map(|v| (v - valid_mean) * (v - valid_mean)).sum::<f64>() / (k - 1.0)).sqrt() } else { 0.0 };
    let train_mean = f.iter().map(|x| x.train).sum::<f64>() / k;
    SettingScore {
        setting: setting.clone(),
        fold_scores,
        valid_mean,
        valid_sd,
        train_mean,
        gap: overfit_gap(train_mean, valid_mean, metric),
        mean_leaves: f.iter().map(|x| x.leaves as f64).sum::<f64>() / k,
        mean_depth: f.iter().map(|x| x.depth as f64).sum::<f64>() / k,
    }
}

/// How far training scores better than validation, in the metric's units; positive when the
/// tree fits its training rows better than unseen rows, whichever way the metric points.
pub fn overfit_gap(train_mean: f64, valid_mean: f64, metric: Metric) -> f64 {
    if metric.higher_is_better() {
        train_mean - valid_mean
    } else {
        valid_mean - train_mean
    }
}

/// Scores of the settings of shaping key `key`, once every split of that key is in `units`;
/// `None` while some split is missing.
pub fn key_scores(plan: &Plan, units: &[UnitResult], key: usize) -> Option<Vec<(usize, SettingScore)>> {
    let n_splits = plan.folds.splits.len();
    let mine: Vec<&UnitResult> = units.iter().filter(|r| plan.units[r.unit].1 == key && plan.role(plan.units[r.unit].0) == SplitRole::Main).collect();
    // Too few units to cover every split: answered without building the table, so a run
    // that asks after each unit spends time linear in its units, not quadratic.
    if mine.len() < n_splits {
        return None;
    }
    let mut per: std::collections::BTreeMap<usize, Vec<Option<FoldScore>>> = std::collections::BTreeMap::new();
    for r in mine {
        let split = plan.units[r.unit].0;
        for (s, score) in &r.scores {
            per.entry(*s).or_insert_with(|| vec![None; n_splits])[split] = Some(score.clone());
        }
    }
    let mut out = Vec::new();
    for (s, folds) in per {
        let folds: Option<Vec<FoldScore>> = folds.into_iter().collect();
        out.push((s, aggregate(&plan.settings[s], &folds?, plan.spec.metric)));
    }
    (!out.is_empty()).then_some(out)
}

/// A setting's validation score oriented so that larger is better, NaN lowest.
fn oriented(s: &SettingScore, metric: Metric) -> f64 {
    let v = if metric.higher_is_better() { s.valid_mean } else { -s.valid_mean };
    if v.is_nan() {
        f64::NEG_INFINITY
    } else {
        v
    }
}

/// Applies a pick rule; NaN means count as the worst.
pub fn pick(scores: &[SettingScore], rule: PickRule, metric: Metric) -> usize {
    let good = |s: &SettingScore| oriented(s, metric);
    let simpler = |a: &SettingScore, b: &SettingScore| a.mean_leaves.total_cmp(&b.mean_leaves).then(a.mean_depth.total_cmp(&b.mean_depth));
    let best = (0..scores.len())
        .min_by(|&a, &b| good(&scores[b]).total_cmp(&good(&scores[a])).then(simpler(&scores[a], &scores[b])).then(a.cmp(&b)))
        .expect("at least one setting");
    // The simplest setting scoring at least `floor`, ties to the better score.
    let simplest_above = |floor: f64| {
        (0..scores.len())
            .filter(|&i| good(&scores[i]) >= floor)
            .min_by(|&a, &b| simpler(&scores[a], &scores[b]).then(good(&scores[b]).total_cmp(&good(&scores[a]))).then(a.cmp(&b)))
            .unwrap_or(best)
    };
    match rule {
        PickRule::Highest => best,
        PickRule::OneSe => {
            let b = &scores[best];
            let se = b.valid_sd / (b.fold_scores.len() as f64).sqrt();
            simplest_above(good(b) - se)
        }
        PickRule::Within(tolerance) => simplest_above(good(&scores[best]) - tolerance),
        PickRule::MaxLeavesBudget(n) => (0..scores.len())
            .filter(|&i| scores[i].mean_leaves <= n as f64)
            .min_by(|&a, &b| good(&scores[b]).total_cmp(&good(&scores[a])).then(simpler(&scores[a], &scores[b])).then(a.cmp(&b)))
            .unwrap_or_else(|| simplest_above(f64::NEG_INFINITY)),
    }
}

/// The settings no other setting beats on both validation score and mean leaves (at least
/// as good on both and better on one), fewest leaves first: the choices a caller who trades
/// score against size can make. Of settings equal on both, the first in grid order stands
/// for them. NaN scores count as the worst.
pub fn pareto_front(scores: &[SettingScore], metric: Metric) -> Vec<usize> {
    let good = |s: &SettingScore| oriented(s, metric);
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].mean_leaves.total_cmp(&scores[b].mean_leaves).then(good(&scores[b]).total_cmp(&good(&scores[a]))).then(a.cmp(&b)));
    let mut front = Vec::new();
    let mut best_so_far = f64::NEG_INFINITY;
    for i in order {
        // Fewer or equal leaves came first: this one stands only if it scores strictly better.
        if front.is_empty() || good(&scores[i]) > best_so_far {
            best_so_far = good(&scores[i]);
            front.push(i);
        }
    }
    front
}

/// Refits a setting on every row of the plan's dataset (with the decision of the plan's
/// costs, when it has them: [`costs::decide`]).
pub fn fit_final(plan: &Plan, setting: &Setting) -> Result<Tree, FitError> {
    let checked = setting.options.check(plan.data.task())?;
    costs::decide(plan, setting, fit(&TrainSet::of(&plan.data), &checked)?)
}

/// Plans, runs, summarizes and (when the spec asks) refits, in one call.
pub fn sweep(data: &Dataset, spec: &SweepSpec, sink: &(dyn Fn(&UnitResult, Progress) -> Flow + Sync), cancel: &AtomicBool) -> Result<(Plan, SweepResult), SweepError> {
    let plan = plan(data, spec)?;
    let units = run(&plan, Vec::new(), sink, cancel)?;
    let mut result = summarize(&plan, &units);
    if spec.fit_final {
        result.model = Some(fit_final(&plan, &result.scores[result.picked].setting)?);
    }
    Ok((plan, result))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::tree::FitOptions;

    fn score(mean: f64, se: f64, leaves: f64) -> SettingScore {
        // Two folds at mean ± se have sample sd se·√2, so sd/√2 = se.
        SettingScore {
            setting: Setting { key: 0, options: FitOptions::default() },
            fold_scores: vec![mean - se, mean + se],
            valid_mean: mean,
            valid_sd: se * 2f64.sqrt(),
            train_mean: 0.0,
            gap: 0.0,
            mean_leaves: leaves,
            mean_depth: leaves - 1.0,
        }
    }

    /// A published worked example of the one-standard-error rule: the cost-complexity table
    /// (splits, cross-validated relative error, its standard error) quoted and worked in the
    /// Cross Validated question "R rpart cross validation and 1 SE rule, why is the column in
    /// cptable called 'xstd'" (stats.stackexchange.com). The minimum error 0.7248227 is at
    /// 11 splits; 0.7248227 + 0.01526605 = 0.7400887, and the smallest tree under that bound
    /// is the one with 6 splits (error 0.7356289), as the worked answer there says.
    #[test]
    fn one_se_rule_published_example() {
        let table = [
            (0.0, 1.0002790, 0.01853630),
            (1.0, 0.8385070, 0.01749290),
            (2.0, 0.7963870, 0.01709283),
            (3.0, 0.7695997, 0.01653832),
            (4.0, 0.7560406, 0.01606136),
            (5.0, 0.7466449, 0.01600352),
            (6.0, 0.7356289, 0.01549501),
            (8.0, 0.7388091, 0.01559568),
            (10.0, 0.7254237, 0.01522645),
            (11.0, 0.7248227, 0.01526605),
        ];
        // Leaves = splits + 1; an error, so lower is better (log loss stands in for it).
        let scores: Vec<SettingScore> = table.iter().map(|&(splits, err, se)| score(err, se, splits + 1.0)).collect();
        assert_eq!(pick(&scores, PickRule::Highest, Metric::LogLoss), 9);
        assert_eq!(pick(&scores, PickRule::OneSe, Metric::LogLoss), 6);
        // The same table as a score where higher is better (1 − error) picks the same rows.
        let flipped: Vec<SettingScore> = table.iter().map(|&(splits, err, se)| score(1.0 - err, se, splits + 1.0)).collect();
        assert_eq!(pick(&flipped, PickRule::Highest, Metric::Accuracy), 9);
        assert_eq!(pick(&flipped, PickRule::OneSe, Metric::Accuracy), 6);

        // The same table, worked by hand for the other rules.
        // A budget of 5 leaves (4 splits): the best error among rows 0–4 is row 4's 0.7560.
        assert_eq!(pick(&scores, PickRule::MaxLeavesBudget(5), Metric::LogLoss), 4);
        // A budget every row fits: the best, row 9.
        assert_eq!(pick(&scores, PickRule::MaxLeavesBudget(100), Metric::LogLoss), 9);
        // Within 0.02 of 0.7248227: errors at most 0.7448227; the fewest splits among them
        // is row 6 (0.7356289; row 5's 0.7466449 is over). Within 0.03: at most 0.7548227,
        // so row 5. Within 0: only the best.
        assert_eq!(pick(&scores, PickRule::Within(0.02), Metric::LogLoss), 6);
        assert_eq!(pick(&scores, PickRule::Within(0.03), Metric::LogLoss), 5);
        assert_eq!(pick(&scores, PickRule::Within(0.0), Metric::LogLoss), 9);
        assert_eq!(pick(&flipped, PickRule::Within(0.03), Metric::Accuracy), 5);
        // The Pareto front of (error, leaves): the error falls with every added split except
        // at 8 splits (0.7388091 > 0.7356289 at 6), so every row but row 7.
        assert_eq!(pareto_front(&scores, Metric::LogLoss), vec![0, 1, 2, 3, 4, 5, 6, 8, 9]);
        assert_eq!(pareto_front(&flipped, Metric::Accuracy), vec![0, 1, 2, 3, 4, 5, 6, 8, 9]);
    }

    #[test]
    fn a_leaf_budget_no_setting_fits_picks_the_smallest_tree() {
        let scores = vec![score(0.9, 0.01, 8.0), score(0.7, 0.01, 3.0), score(0.8, 0.01, 3.0)];
        assert_eq!(pick(&scores, PickRule::MaxLeavesBudget(2), Metric::Accuracy), 2);
        assert_eq!(pick(&scores, PickRule::MaxLeavesBudget(3), Metric::Accuracy), 2);
        assert_eq!(pick(&scores, PickRule::MaxLeavesBudget(8), Metric::Accuracy), 0);
        // Equal on both: the first in grid order stands for both on the front.
        let tied = vec![score(0.8, 0.01, 3.0), score(0.8, 0.01, 3.0), score(0.9, 0.01, 5.0)];
        assert_eq!(pareto_front(&tied, Metric::Accuracy), vec![0, 2]);
    }

    #[test]
    fn pick_rules_read_and_write_their_text() {
        for rule in [PickRule::Highest, PickRule::OneSe, PickRule::MaxLeavesBudget(12), PickRule::Within(0.005)] {
            assert_eq!(PickRule::parse(&rule.as_str()), Some(rule));
        }
        for bad in ["", "best", "max_leaves_budget:0", "max_leaves_budget:-1", "max_leaves_budget:x", "within:-0.1", "within:nan", "within:inf", "within", "one_se:1"] {
            assert_eq!(PickRule::parse(bad), None, "{bad}");
        }
    }

    #[test]
    fn highest_breaks_ties_toward_the_simpler_tree() {
        let scores = vec![score(0.9, 0.01, 8.0), score(0.9, 0.01, 4.0), score(0.8, 0.01, 2.0)];
        assert_eq!(pick(&scores, PickRule::Highest, Metric::Accuracy), 1);
        // NaN scores never win.
        let scores = vec![score(f64::NAN, 0.0, 1.0), score(0.5, 0.0, 9.0)];
        assert_eq!(pick(&scores, PickRule::Highest, Metric::Accuracy), 1);
        assert_eq!(pick(&scores, PickRule::Highest, Metric::LogLoss), 1);
    }
}
