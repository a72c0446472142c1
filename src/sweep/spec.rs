//! What a sweep is asked to do, checked once: the [`SweepSpec`] becomes a [`CheckedSpec`]
//! whose grid of settings is expanded and whose every value is in its domain.

use std::fmt;

use super::costs::{CostError, Costs};
use super::folds::FoldPlan;
use super::metrics::{Metric, Scoring};
use crate::data::{Dataset, Task};
use std::sync::Arc;

use crate::data::ColumnKind;
use crate::tree::{ClassWeight, Criterion, FitOptions, Limits, Monotone, Splitter};

/// The values to try for one limit.
#[derive(Clone, Debug, PartialEq)]
pub enum Range {
    /// Explicit values, in order. For `max_depth` and `max_leaves`, `None` means "no limit".
    Values(Vec<Option<f64>>),
    /// from, from + step, … up to `to` inclusive (within a millionth of a step).
    Span { from: f64, to: f64, step: f64 },
    /// `count` values from `from` to `to` inclusive, evenly spaced on a log scale.
    LogSpan { from: f64, to: f64, count: u32 },
}

/// How the winning setting is chosen.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum PickRule {
    /// Best `valid_mean`; ties go to fewer mean leaves, then shallower, then grid order.
    #[default]
    Highest,
    /// Fewest mean leaves among the settings whose `valid_mean` is within one standard error
    /// (sd/√folds) of the best (Breiman et al., 1984, §3.4.3; Hastie, Tibshirani & Friedman,
    /// *The Elements of Statistical Learning*, 2nd ed., §7.10); ties go shallower, then to
    /// the better `valid_mean`, then grid order.
    OneSe,
    /// `max_leaves_budget:N`: the best `valid_mean` among the settings whose mean leaves are
    /// at most N (a tree that must fit a rules engine or a review), ties as `Highest`. When
    /// no setting fits the budget, the setting with the fewest mean leaves (then the better
    /// score) is picked.
    MaxLeavesBudget(u32),
    /// `within:T`: the simplest setting (fewest mean leaves, then shallower) whose
    /// `valid_mean` is within T, in the metric's units, of the best; ties go to the better
    /// `valid_mean`, then grid order. `one_se` with a tolerance the caller chooses.
    Within(f64),
}

impl PickRule {
    /// The rule as written on the wire, in records and on the command line.
    pub fn as_str(self) -> std::borrow::Cow<'static, str> {
        match self {
            PickRule::Highest => "highest".into(),
            PickRule::OneSe => "one_se".into(),
            PickRule::MaxLeavesBudget(n) => format!("max_leaves_budget:{n}").into(),
            PickRule::Within(t) => format!("within:{t}").into(),
        }
    }

    /// `highest`, `one_se`, `max_leaves_budget:N` (N ≥ 1) or `within:T` (T finite, ≥ 0).
    pub fn parse(s: &str) -> Option<PickRule> {
        match s.split_once(':') {
            None => match s {
                "highest" => Some(PickRule::Highest),
                "one_se" => Some(PickRule::OneSe),
                _ => None,
            },
            Some(("max_leaves_budget", n)) => n.parse::<u32>().ok().filter(|&n| n >= 1).map(PickRule::MaxLeavesBudget),
            Some(("within", t)) => t.parse::<f64>().ok().filter(|t| t.is_finite() && *t >= 0.0).map(PickRule::Within),
            Some(_) => None,
        }
    }

    /// The words naming every rule, for error messages.
    pub const CHOICES: &'static str = "highest, one_se, max_leaves_budget:N (N at least 1) or within:T (T a tolerance in the metric's units, at least 0)";
}

/// A request to score many settings by cross-validation.
#[derive(Clone, Debug, PartialEq)]
pub struct SweepSpec {
    /// `None`: the dataset's own task.
    pub task: Option<Task>,
    /// Criteria to try; empty means the task's default.
    pub criteria: Vec<Criterion>,
    /// Class weightings to try; empty means none.
    pub class_weights: Vec<ClassWeight>,
    pub max_depth: Option<Range>,
    pub min_split_rows: Option<Range>,
    pub min_leaf_rows: Option<Range>,
    pub max_leaves: Option<Range>,
    pub min_gain: Option<Range>,
    pub prune_alpha: Option<Range>,
    /// Score every α on each fold's pruning path (the geometric means of consecutive path
    /// values of the tree grown on all rows) instead of a `prune_alpha` range.
    pub prune_path: bool,
    /// `None`: stratified 5-fold for classification, shuffled 5-fold for regression.
    pub folds: Option<FoldPlan>,
    /// `None`: accuracy for classification, RMSE for regression.
    pub metric: Option<Metric>,
    pub pick: PickRule,
    pub seed: u64,
    /// Refit the picked setting on all rows.
    pub fit_final: bool,
    /// Most settings allowed (a guard for the service); `None` uses [`DEFAULT_MAX_SETTINGS`].
    pub max_settings: Option<usize>,
    /// Where numeric features may be cut, for every tree of the sweep (exact by default).
    pub splitter: Splitter,
    /// Nested cross-validation: an outer fold plan. For each outer split, the whole sweep
    /// (with `folds` as the inner plan) and the pick run on the outer training rows, and the
    /// picked setting is scored once on the outer validation rows. `None`: no outer loop.
    pub outer: Option<FoldPlan>,
    /// Monotone limits by feature name, for every tree of the sweep and the refit; features
    /// not named are free. Numeric features of a regress or two-class target only.
    pub monotone: Vec<(String, Monotone)>,
    /// Costs of the two wrong decisions of a two-class target (class 1 of the dataset's class
    /// list is the positive class): they define the metric `expected_cost` (the default
    /// metric when costs are given) and make the refit model decide with a threshold on
    /// p(class 1) searched on the pooled validation predictions (see [`super::costs`]).
    pub costs: Option<Costs>,
}

impl SweepSpec {
    /// The spec as the text a request digest is taken of: every field that existed when
    /// digests were first taken, in the form they were first written in, then each field
    /// added since, only when it is not its default. So a retry of a request stored by an
    /// older build still matches, and requests that differ in any field differ. The struct
    /// is taken apart without `..`: a new field does not compile until it is added here.
    pub fn digest_text(&self) -> String {
        let SweepSpec { task, criteria, class_weights, max_depth, min_split_rows, min_leaf_rows, max_leaves, min_gain, prune_alpha, prune_path, folds, metric, pick, seed, fit_final, max_settings, splitter, outer, monotone, costs } = self;
        let mut text = format!(
            "SweepSpec {{ task: {task:?}, criteria: {criteria:?}, class_weights: {class_weights:?}, max_depth: {max_depth:?}, min_split_rows: {min_split_rows:?}, min_leaf_rows: {min_leaf_rows:?}, max_leaves: {max_leaves:?}, min_gain: {min_gain:?}, prune_alpha: {prune_alpha:?}, prune_path: {prune_path:?}, folds: {folds:?}, metric: {metric:?}, pick: {pick:?}, seed: {seed:?}, fit_final: {fit_final:?}, max_settings: {max_settings:?}, splitter: {splitter:?}"
        );
        // Added later: written only when set.
        if let Some(o) = outer {
            text.push_str(&format!(", outer: Some({o:?})"));
        }
        if !monotone.is_empty() {
            text.push_str(&format!(", monotone: {monotone:?}"));
        }
        if let Some(c) = costs {
            text.push_str(&format!(", costs: Some({c:?})"));
        }
        text.push_str(" }");
        text
    }
}

/// Default cap on the number of settings in one sweep.
pub const DEFAULT_MAX_SETTINGS: usize = 100_000;

impl Default for SweepSpec {
    fn default() -> Self {
        SweepSpec {
            task: None,
            criteria: Vec::new(),
            class_weights: Vec::new(),
            max_depth: None,
            min_split_rows: None,
            min_leaf_rows: None,
            max_leaves: None,
            min_gain: None,
            prune_alpha: None,
            prune_path: false,
            folds: None,
            metric: None,
            pick: PickRule::Highest,
            seed: 0,
            fit_final: true,
            max_settings: None,
            splitter: Splitter::Exact,
            outer: None,
            monotone: Vec::new(),
            costs: None,
        }
    }
}

/// Why a sweep spec cannot run.
#[derive(Clone, Debug, PartialEq)]
pub struct SpecError {
    /// Field path of the value at fault, such as `max_depth.values[2]` or `folds.k`.
    pub field: String,
    pub message: String,
    pub kind: SpecErrorKind,
}

/// Whether a spec is wrong, or asks for more than a cap allows.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SpecErrorKind {
    Invalid,
    /// More than the cap named (by its configuration key) allows; `limit` is its value.
    OverCap { cap: &'static str, limit: u64 },
}

impl fmt::Display for SpecError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.kind {
            SpecErrorKind::Invalid => write!(f, "{}: {}", self.field, self.message),
            SpecErrorKind::OverCap { cap, limit } => write!(f, "{}: {}, more than the cap {cap} = {limit}", self.field, self.message),
        }
    }
}

impl std::error::Error for SpecError {}

pub(crate) fn spec_error(field: impl Into<String>, message: impl Into<String>) -> SpecError {
    SpecError { field: field.into(), message: message.into(), kind: SpecErrorKind::Invalid }
}

/// A cap exceeded: `message` says how much was asked (the cap is appended when shown).
pub(crate) fn cap_error(field: impl Into<String>, message: impl Into<String>, cap: &'static str, limit: u64) -> SpecError {
    SpecError { field: field.into(), message: message.into(), kind: SpecErrorKind::OverCap { cap, limit } }
}

/// A fold plan error of the outer plan, named by its own field (`outer.k`, not `folds.k`).
pub fn as_outer(mut e: SpecError) -> SpecError {
    if let Some(rest) = e.field.strip_prefix("folds") {
        e.field = format!("outer{rest}");
    }
    e
}

/// What one sweep may ask for at most. Every size computed from a spec is counted (with
/// checked arithmetic) against these before anything of that size is made. The names in
/// messages are the server's configuration keys.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct SpecCaps {
    /// Settings in the grid (`max_settings`).
    pub max_settings: usize,
    /// Values one limit's range may give before duplicates are removed (`max_values_per_range`).
    pub max_values_per_range: usize,
    /// Folds of a plan (`k`, or the fold numbers of a `given` column) (`max_folds`).
    pub max_folds: u32,
    /// Repeats of a fold plan (`max_repeats`).
    pub max_repeats: u32,
    /// Work units: splits × shaping keys (`max_units_per_run`).
    pub max_units: usize,
}

impl Default for SpecCaps {
    fn default() -> Self {
        SpecCaps { max_settings: DEFAULT_MAX_SETTINGS, max_values_per_range: 1_000, max_folds: 100, max_repeats: 20, max_units: 10_000 }
    }
}

/// The values of one shaping key: the options that change which split a node takes.
#[derive(Clone, Debug, PartialEq)]
pub struct ShapingKey {
    pub criterion: Criterion,
    pub class_weight: ClassWeight,
    pub min_leaf_rows: u32,
}

/// One combination of limit values, with its shaping key.
#[derive(Clone, Debug, PartialEq)]
pub struct Setting {
    /// Index into [`CheckedSpec::keys`].
    pub key: usize,
    pub options: FitOptions,
}

/// A spec that passed [`SweepSpec::check`] against a dataset.
#[derive(Clone, Debug, PartialEq)]
pub struct CheckedSpec {
    pub spec: SweepSpec,
    pub task: Task,
    pub metric: Metric,
    pub folds: FoldPlan,
    /// Shaping keys, nested criterion → class weight → `min_leaf_rows`.
    pub keys: Vec<ShapingKey>,
    pub criteria: Vec<Criterion>,
    pub class_weights: Vec<ClassWeight>,
    pub min_leaf_rows: Vec<u32>,
    /// Stopping values per limit (expanded ranges).
    pub max_depth: Vec<Option<u32>>,
    pub min_split_rows: Vec<u32>,
    pub max_leaves: Vec<Option<u32>>,
    pub min_gain: Vec<f64>,
    /// Explicit α values (empty in path mode, where each key gets its own).
    pub prune_alpha: Vec<f64>,
    /// Training/validation splits the fold plan makes on the dataset.
    pub splits: usize,
    /// The outer fold plan of a nested sweep, with the splits it makes on the dataset.
    pub outer: Option<(FoldPlan, usize)>,
    /// The monotone limit per feature of the dataset; empty when none is set.
    pub monotone: Arc<[Monotone]>,
    /// The decision costs, checked (two classes, usable numbers).
    pub costs: Option<Costs>,
}

impl SweepSpec {
    /// Checks the spec against the dataset it will run on, with the default caps (and the
    /// spec's own `max_settings`).
    pub fn check(&self, data: &Dataset) -> Result<CheckedSpec, SpecError> {
        self.check_with(data, &self.default_caps())
    }

    /// The default caps, with the spec's own `max_settings` when it has one.
    pub fn default_caps(&self) -> SpecCaps {
        SpecCaps { max_settings: self.max_settings.unwrap_or(DEFAULT_MAX_SETTINGS), ..SpecCaps::default() }
    }

    /// Checks the spec against the dataset it will run on, within `caps`: no size is
    /// made before it is counted and found within its cap.
    pub fn check_with(&self, data: &Dataset, caps: &SpecCaps) -> Result<CheckedSpec, SpecError> {
        let task = self.task.unwrap_or(data.task());
        if task != data.task() {
            return Err(spec_error("task", format!("the target '{}' is read as {}, not {task}", data.target_name, data.task())));
        }
        let costs = self.costs.map(|c| check_costs(c, data)).transpose()?;
        let metric = self.metric.unwrap_or(match (task, costs) {
            (Task::Classify, Some(_)) => Metric::ExpectedCost,
            (Task::Classify, None) => Metric::Accuracy,
            (Task::Regress, _) => Metric::Rmse,
        });
        if metric.task() != task {
            return Err(spec_error("metric", format!("{} scores {} targets, this target is {task}", metric.as_str(), metric.task())));
        }
        if metric == Metric::ExpectedCost && costs.is_none() {
            return Err(spec_error("metric", "expected_cost needs the costs of a false alarm and of a miss (costs.false_alarm, costs.miss)"));
        }
        let criteria = dedup_by(if self.criteria.is_empty() {
            vec![match task {
                Task::Classify => Criterion::Gini,
                Task::Regress => Criterion::SquaredError,
            }]
        } else {
            self.criteria.clone()
        }, |c| *c);
        for (i, c) in criteria.iter().enumerate() {
            if c.task() != task {
                return Err(spec_error(format!("criteria[{i}]"), format!("{} is for {} targets, this target is {task}", c.as_str(), c.task())));
            }
        }
        let class_weights = dedup_by(if self.class_weights.is_empty() { vec![ClassWeight::None] } else { self.class_weights.clone() }, |w| *w);
        if task == Task::Regress && class_weights.iter().any(|w| *w != ClassWeight::None) {
            return Err(spec_error("class_weights", "class weighting needs a classify target"));
        }
        let cap = caps.max_values_per_range;
        let max_depth = optional_counts("max_depth", &self.max_depth, 0, cap)?;
        let min_split_rows = counts("min_split_rows", &self.min_split_rows, 2, 2, cap)?;
        let min_leaf_rows = counts("min_leaf_rows", &self.min_leaf_rows, 1, 1, cap)?;
        let max_leaves = optional_counts("max_leaves", &self.max_leaves, 1, cap)?;
        let min_gain = reals("min_gain", &self.min_gain, cap)?;
        let prune_alpha = if self.prune_path {
            if self.prune_alpha.is_some() {
                return Err(spec_error("prune_alpha", "give either a prune_alpha range or prune_path, not both"));
            }
            Vec::new()
        } else {
            reals("prune_alpha", &self.prune_alpha, cap)?
        };
        // The grid's size, counted before any setting is made. In path mode the α count is
        // known only after growth; count one per key here (the plan counts again).
        let factors = [criteria.len(), class_weights.len(), min_leaf_rows.len(), max_depth.len(), min_split_rows.len(), max_leaves.len(), min_gain.len(), prune_alpha.len().max(1)];
        let n = checked_product(&factors);
        if n.is_none_or(|n| n > caps.max_settings as u128) {
            let shown = n.map_or_else(|| "more than 2^128".to_string(), |n| n.to_string());
            return Err(cap_error("settings", format!("the grid has {shown} settings"), "max_settings", caps.max_settings as u64));
        }
        let folds = match &self.folds {
            Some(f) => f.clone(),
            None => FoldPlan::default_for(task),
        };
        if folds.k > caps.max_folds {
            return Err(cap_error("folds.k", format!("asks for {} folds", folds.k), "max_folds", caps.max_folds as u64));
        }
        if folds.repeats > caps.max_repeats {
            return Err(cap_error("folds.repeats", format!("asks for {} repeats", folds.repeats), "max_repeats", caps.max_repeats as u64));
        }
        let splits = folds.check(data)?;
        if matches!(folds.scheme, super::folds::FoldScheme::Given { .. }) && splits > caps.max_folds as usize {
            return Err(cap_error("folds.column", format!("holds {splits} fold numbers"), "max_folds", caps.max_folds as u64));
        }
        let outer = match &self.outer {
            None => None,
            Some(o) => {
                if self.prune_path {
                    return Err(spec_error(
                        "outer",
                        "nested cross-validation needs a prune_alpha range: prune_path takes its α values from a tree grown on all rows, outer validation rows included",
                    ));
                }
                if o.k > caps.max_folds {
                    return Err(cap_error("outer.k", format!("asks for {} folds", o.k), "max_folds", caps.max_folds as u64));
                }
                if o.repeats > caps.max_repeats {
                    return Err(cap_error("outer.repeats", format!("asks for {} repeats", o.repeats), "max_repeats", caps.max_repeats as u64));
                }
                let n = o.check(data).map_err(as_outer)?;
                if matches!(o.scheme, super::folds::FoldScheme::Given { .. }) && n > caps.max_folds as usize {
                    return Err(cap_error("outer.column", format!("holds {n} fold numbers"), "max_folds", caps.max_folds as u64));
                }
                Some((o.clone(), n))
            }
        };
        let n_keys = criteria.len() * class_weights.len() * min_leaf_rows.len();
        // A nested sweep adds, per outer split, that split and the inner plan's splits of its
        // training rows (at most `splits`: a `given` column may lose fold numbers there).
        let all_splits = match outer {
            None => Some(splits as u128),
            Some((_, n)) => checked_product(&[n, splits + 1]).and_then(|x| x.checked_add(splits as u128)),
        };
        let units = all_splits.and_then(|s| s.checked_mul(n_keys as u128));
        if units.is_none_or(|u| u > caps.max_units as u128) {
            let shown = units.map_or_else(|| "too many".to_string(), |u| u.to_string());
            let field = if outer.is_some() { "outer" } else { "folds" };
            let what = all_splits.map_or_else(|| "too many".to_string(), |s| s.to_string());
            return Err(cap_error(field, format!("{what} splits × {n_keys} shaping keys make {shown} work units"), "max_units_per_run", caps.max_units as u64));
        }
        let mut keys = Vec::with_capacity(n_keys);
        for &criterion in &criteria {
            for &class_weight in &class_weights {
                for &min_leaf_rows in &min_leaf_rows {
                    keys.push(ShapingKey { criterion, class_weight, min_leaf_rows });
                }
            }
        }
        let monotone = self.monotone_of(data, task)?;
        let checked = CheckedSpec { spec: self.clone(), task, metric, folds, keys, criteria, class_weights, min_leaf_rows, max_depth, min_split_rows, max_leaves, min_gain, prune_alpha, splits, outer, monotone, costs };
        Ok(checked)
    }
}

impl SweepSpec {
    /// The monotone limits per feature of `data`: each name a feature of the dataset (not
    /// the target), named once, numeric; the target regress or two-class. Empty when none
    /// is set.
    fn monotone_of(&self, data: &Dataset, task: Task) -> Result<Arc<[Monotone]>, SpecError> {
        if self.monotone.is_empty() {
            return Ok(Arc::default());
        }
        let features = &data.frame.features;
        // By name in one map: a long list costs one lookup per entry (at most one entry
        // per feature passes, a repeat is refused).
        let index: std::collections::HashMap<&str, usize> = features.iter().enumerate().map(|(j, f)| (f.name.as_str(), j)).collect();
        let mut out = vec![Monotone::Free; features.len()];
        let mut named = vec![false; features.len()];
        for (i, (name, m)) in self.monotone.iter().enumerate() {
            let field = format!("monotone[{i}]");
            // Quoted back cut to 100 characters, as callers' text is elsewhere.
            let shown: String = name.chars().take(100).collect();
            let Some(&j) = index.get(name.as_str()) else {
                let why = if *name == data.target_name { "is the target".to_string() } else { "is not a feature of the dataset".to_string() };
                return Err(spec_error(field, format!("'{shown}' {why}")));
            };
            if std::mem::replace(&mut named[j], true) {
                return Err(spec_error(field, format!("'{name}' is named twice")));
            }
            if *m != Monotone::Free && features[j].column.kind() == ColumnKind::Categorical {
                return Err(spec_error(field, format!("'{name}' is categorical; a monotone limit needs a numeric feature")));
            }
            out[j] = *m;
        }
        if !out.iter().any(|&m| m != Monotone::Free) {
            return Ok(Arc::default());
        }
        if let crate::data::Target::Classes { labels, .. } = &data.target {
            if labels.len() > 2 && task == Task::Classify {
                return Err(spec_error("monotone", format!("monotone limits need a regress or two-class target; '{}' has {} classes", data.target_name, labels.len())));
            }
        }
        Ok(out.into())
    }
}

/// Decision costs must be usable numbers, for a two-class target; the field at fault named.
fn check_costs(c: Costs, data: &Dataset) -> Result<Costs, SpecError> {
    let costs = Costs::new(c.false_alarm, c.miss).map_err(|e| match e {
        CostError::NotFiniteNonNegative => {
            let (field, x) = if Costs::new(c.false_alarm, 1.0).is_err() { ("costs.false_alarm", c.false_alarm) } else { ("costs.miss", c.miss) };
            spec_error(field, format!("{e}, got {x}"))
        }
        CostError::BothZero => spec_error("costs", e.to_string()),
    })?;
    match &data.target {
        crate::data::Target::Classes { labels, .. } if labels.len() == 2 => Ok(costs),
        crate::data::Target::Classes { labels, .. } => Err(spec_error("costs", format!("decision costs need a target of two classes, '{}' has {}", data.target_name, labels.len()))),
        crate::data::Target::Values(_) => Err(spec_error("costs", format!("decision costs need a classify target of two classes, '{}' is regress", data.target_name))),
    }
}

impl CheckedSpec {
    /// The metric with the costs it may need.
    pub fn scoring(&self) -> Scoring {
        Scoring { metric: self.metric, costs: self.costs }
    }

    /// Combinations of the four stopping limits other than `prune_alpha`.
    pub fn stopping_count(&self) -> usize {
        self.max_depth.len() * self.min_split_rows.len() * self.max_leaves.len() * self.min_gain.len()
    }

    /// The loosest stopping limits of the grid: what each envelope tree grows with.
    pub fn envelope_limits(&self, key: &ShapingKey) -> Limits {
        Limits {
            max_depth: if self.max_depth.contains(&None) { None } else { self.max_depth.iter().flatten().max().copied() },
            min_split_rows: *self.min_split_rows.iter().min().unwrap(),
            min_leaf_rows: key.min_leaf_rows,
            max_leaves: None,
            min_gain: self.min_gain.iter().copied().fold(f64::INFINITY, f64::min),
            prune_alpha: 0.0,
        }
    }

    /// Every setting for the given α values per key, in grid order: criterion, class weight,
    /// `max_depth`, `min_split_rows`, `min_leaf_rows`, `max_leaves`, `min_gain`,
    /// `prune_alpha`, the last varying fastest.
    pub fn settings(&self, alphas_per_key: &[Vec<f64>]) -> Vec<Setting> {
        let (nw, nl) = (self.class_weights.len(), self.min_leaf_rows.len());
        let mut out = Vec::new();
        for ci in 0..self.criteria.len() {
            for wi in 0..nw {
                for &max_depth in &self.max_depth {
                    for &min_split_rows in &self.min_split_rows {
                        for li in 0..nl {
                            let key = (ci * nw + wi) * nl + li;
                            let k = &self.keys[key];
                            for &max_leaves in &self.max_leaves {
                                for &min_gain in &self.min_gain {
                                    for &prune_alpha in &alphas_per_key[key] {
                                        let limits = Limits { max_depth, min_split_rows, min_leaf_rows: k.min_leaf_rows, max_leaves, min_gain, prune_alpha };
                                        let options = FitOptions { limits, criterion: Some(k.criterion), class_weight: k.class_weight, splitter: self.spec.splitter, monotone: self.monotone.clone() };
                                        out.push(Setting { key, options });
                                    }
                                }
                            }
                        }
                    }
                }
            }
        }
        out
    }
}

/// The product of `factors`, `None` when it does not fit in a u128.
pub fn checked_product(factors: &[usize]) -> Option<u128> {
    factors.iter().try_fold(1u128, |acc, &f| acc.checked_mul(f as u128))
}

impl Range {
    /// How many values the range gives, counted without making any. A span whose count is
    /// not a finite number below 2^53 (such as `lin(0, 1e300, 1e-300)`) counts as
    /// `u64::MAX`. Checks that the range's numbers are usable first.
    pub fn count(&self, field: &str) -> Result<u64, SpecError> {
        match self {
            Range::Values(v) => {
                if v.is_empty() {
                    return Err(spec_error(format!("{field}.values"), "is empty"));
                }
                Ok(v.len() as u64)
            }
            Range::Span { from, to, step } => {
                if !(from.is_finite() && to.is_finite() && step.is_finite()) {
                    return Err(spec_error(format!("{field}.span"), "from, to and step must be finite numbers"));
                }
                if *step <= 0.0 {
                    return Err(spec_error(format!("{field}.span.step"), format!("must be > 0, got {step}")));
                }
                if to < from {
                    return Err(spec_error(format!("{field}.span"), format!("is inverted: from {from} is above to {to}")));
                }
                // (to − from) / step may overflow to infinity; 2^53 is where f64 stops
                // counting whole numbers exactly.
                let q = (to - from) / step + 1e-6;
                if !q.is_finite() || q >= 9_007_199_254_740_992.0 {
                    return Ok(u64::MAX);
                }
                Ok(q.floor() as u64 + 1)
            }
            Range::LogSpan { from, to, count } => {
                if !(from.is_finite() && to.is_finite()) || *from <= 0.0 || *to <= 0.0 {
                    return Err(spec_error(format!("{field}.log_span"), "from and to must be finite numbers > 0"));
                }
                if to < from {
                    return Err(spec_error(format!("{field}.log_span"), format!("is inverted: from {from} is above to {to}")));
                }
                if *count == 0 {
                    return Err(spec_error(format!("{field}.log_span.count"), "must be at least 1"));
                }
                Ok(*count as u64)
            }
        }
    }
}

/// Expands a range into real values, checking each; the values are counted first and
/// refused above `cap` before any is made.
fn expand(field: &str, range: &Range, cap: usize) -> Result<Vec<Option<f64>>, SpecError> {
    let n = range.count(field)?;
    if n > cap as u64 {
        let what = match range {
            Range::Values(_) => format!("{field}.values"),
            Range::Span { .. } => format!("{field}.span"),
            Range::LogSpan { .. } => format!("{field}.log_span.count"),
        };
        let shown = if n == u64::MAX { "more than 2^53".to_string() } else { n.to_string() };
        return Err(cap_error(what, format!("gives {shown} values"), "max_values_per_range", cap as u64));
    }
    let n = n as usize;
    let out: Vec<Option<f64>> = match range {
        Range::Values(v) => v.clone(),
        Range::Span { from, step, .. } => (0..n).map(|i| Some(from + i as f64 * step)).collect(),
        Range::LogSpan { from, to, count } => {
            if *count == 1 {
                vec![Some(*from)]
            } else {
                let (a, b) = (from.ln(), to.ln());
                (0..*count)
                    .map(|i| {
                        let v = if i + 1 == *count { *to } else { (a + (b - a) * i as f64 / (*count - 1) as f64).exp() };
                        Some(v)
                    })
                    .collect()
            }
        }
    };
    for (i, v) in out.iter().enumerate() {
        if let Some(x) = v {
            if !x.is_finite() {
                return Err(spec_error(format!("{field}.values[{i}]"), format!("{x} is not a finite number")));
            }
        }
    }
    Ok(out)
}

/// Keeps the first of each run of equal keys, in order; linear in the length.
fn dedup_by<T, K: std::hash::Hash + Eq>(v: Vec<T>, key: impl Fn(&T) -> K) -> Vec<T> {
    let mut seen = std::collections::HashSet::with_capacity(v.len());
    v.into_iter().filter(|x| seen.insert(key(x))).collect()
}

/// A hashable stand-in for a finite f64 that equal values share (0.0 and −0.0 included).
fn real_key(x: f64) -> u64 {
    if x == 0.0 {
        0
    } else {
        x.to_bits()
    }
}

/// Whole-number limit values (rounded to the nearest whole number from a span), each `>= min`.
/// The numbers a count limit's range was given must be whole: explicit values, a linear
/// span's `from`, `to` and `step` (so every value is whole), a log span's `from` and `to`. A
/// log span's inner points are not whole by construction: they are rounded to the nearest
/// whole number (equal ones then count once).
fn whole_given(field: &str, range: &Range) -> Result<(), SpecError> {
    let check = |path: String, x: f64| if x.is_finite() && x.fract() != 0.0 { Err(spec_error(path, format!("counts rows, levels or leaves: {x:?} is not a whole number"))) } else { Ok(()) };
    match range {
        Range::Values(v) => v.iter().enumerate().try_for_each(|(i, x)| x.map_or(Ok(()), |x| check(format!("{field}.values[{i}]"), x))),
        Range::Span { from, to, step } => {
            check(format!("{field}.span.from"), *from)?;
            check(format!("{field}.span.to"), *to)?;
            check(format!("{field}.span.step"), *step)
        }
        Range::LogSpan { from, to, .. } => {
            check(format!("{field}.log_span.from"), *from)?;
            check(format!("{field}.log_span.to"), *to)
        }
    }
}

fn to_count(field: &str, i: usize, x: f64, min: u32) -> Result<u32, SpecError> {
    // Whole already (see `whole_given`), but for a log span's inner points.
    let r = x.round();
    if r < min as f64 {
        return Err(spec_error(format!("{field}.values[{i}]"), format!("must be at least {min}, got {x}")));
    }
    if r > u32::MAX as f64 {
        return Err(spec_error(format!("{field}.values[{i}]"), format!("{x} is too large")));
    }
    Ok(r as u32)
}

fn counts(field: &str, range: &Option<Range>, min: u32, default: u32, cap: usize) -> Result<Vec<u32>, SpecError> {
    let Some(range) = range else { return Ok(vec![default]) };
    let values = expand(field, range, cap)?;
    whole_given(field, range)?;
    let mut out = Vec::new();
    for (i, v) in values.into_iter().enumerate() {
        let Some(x) = v else { return Err(spec_error(format!("{field}.values[{i}]"), "cannot be 'no limit'")) };
        out.push(to_count(field, i, x, min)?);
    }
    Ok(dedup_by(out, |c| *c))
}

fn optional_counts(field: &str, range: &Option<Range>, min: u32, cap: usize) -> Result<Vec<Option<u32>>, SpecError> {
    let Some(range) = range else { return Ok(vec![None]) };
    let values = expand(field, range, cap)?;
    whole_given(field, range)?;
    let mut out = Vec::new();
    for (i, v) in values.into_iter().enumerate() {
        out.push(match v {
            None => None,
            Some(x) => Some(to_count(field, i, x, min)?),
        });
    }
    Ok(dedup_by(out, |c| *c))
}

fn reals(field: &str, range: &Option<Range>, cap: usize) -> Result<Vec<f64>, SpecError> {
    let Some(range) = range else { return Ok(vec![0.0]) };
    let mut out = Vec::new();
    for (i, v) in expand(field, range, cap)?.into_iter().enumerate() {
        let Some(x) = v else { return Err(spec_error(format!("{field}.values[{i}]"), "cannot be 'no limit'; use 0")) };
        if x < 0.0 {
            return Err(spec_error(format!("{field}.values[{i}]"), format!("must be >= 0, got {x}")));
        }
        out.push(x);
    }
    Ok(dedup_by(out, |x| real_key(*x)))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::data::{Column, Feature, Frame, Target};
    use crate::sweep::folds::FoldScheme;

    fn data(task: Task) -> Dataset {
        let x: Vec<f32> = (0..20).map(|i| i as f32).collect();
        let target = match task {
            Task::Classify => Target::Classes { codes: (0..20).map(|i| (i % 2) as u32).collect(), labels: vec!["a".into(), "b".into()] },
            Task::Regress => Target::Values((0..20).map(|i| i as f64).collect()),
        };
        let frame = Frame::new(vec![
            Feature { name: "x".into(), column: Column::Numeric(x) },
            Feature { name: "same".into(), column: Column::Numeric(vec![1.0; 20]) },
        ])
        .unwrap();
        Dataset::new(frame, "y".into(), target).unwrap()
    }

    fn field_of(spec: SweepSpec, task: Task) -> String {
        spec.check(&data(task)).unwrap_err().field
    }

    /// The digest text of a spec without the fields added later is the text digests were
    /// first taken of (the spec's derived `Debug`), so stored digests still match; a field
    /// added later is written as `Debug` writes it once it is set. The hex digest of one spec
    /// is pinned: a change to how any part is written breaks retries of stored requests.
    #[test]
    fn digest_text_is_the_first_text_and_pinned() {
        use sha2::{Digest, Sha256};
        let plain = SweepSpec {
            criteria: vec![Criterion::Gini, Criterion::Entropy],
            max_depth: Some(Range::Values(vec![Some(2.0), None])),
            min_leaf_rows: Some(Range::Span { from: 1.0, to: 9.0, step: 2.0 }),
            folds: Some(FoldPlan { scheme: FoldScheme::Stratified, k: 5, repeats: 2 }),
            pick: PickRule::Within(0.01),
            seed: 7,
            ..SweepSpec::default()
        };
        // The derived Debug without the fields added later, where they hold their defaults.
        let without_later = |s: &SweepSpec| format!("{s:?}").replacen(", outer: None", "", 1).replacen(", monotone: []", "", 1).replacen(", costs: None", "", 1);
        assert_eq!(plain.digest_text(), without_later(&plain));
        let nested = SweepSpec { outer: Some(FoldPlan { scheme: FoldScheme::Shuffled, k: 3, repeats: 1 }), ..plain.clone() };
        assert_eq!(nested.digest_text(), without_later(&nested));
        assert_ne!(nested.digest_text(), plain.digest_text());
        let costed = SweepSpec { costs: Some(Costs { false_alarm: 1.0, miss: 5.0 }), ..plain.clone() };
        assert_eq!(costed.digest_text(), without_later(&costed));
        assert_ne!(costed.digest_text(), plain.digest_text());
        let limited = SweepSpec { monotone: vec![("age".into(), Monotone::Increasing)], ..plain.clone() };
        assert_eq!(limited.digest_text(), without_later(&limited));
        assert_ne!(limited.digest_text(), plain.digest_text());
        let hex: String = Sha256::digest(plain.digest_text().as_bytes()).iter().map(|b| format!("{b:02x}")).collect();
        assert_eq!(hex, "8d8a89ba73e1ebeb4ee1a0af271375a7f00c1e1ca4c815e90b9101ca6aeaf44b", "the pinned digest of this spec (taken when the digest text was made explicit)");
    }

    #[test]
    fn monotone_limits_resolve_by_name_and_refuse_categorical_features() {
        let mut d = data(Task::Regress);
        let spec = SweepSpec { monotone: vec![("same".into(), Monotone::Free), ("x".into(), Monotone::Decreasing)], ..SweepSpec::default() };
        assert_eq!(&*spec.check(&d).unwrap().monotone, &[Monotone::Decreasing, Monotone::Free]);
        let free = SweepSpec { monotone: vec![("x".into(), Monotone::Free)], ..SweepSpec::default() };
        assert!(free.check(&d).unwrap().monotone.is_empty(), "all free is no limit");
        d.frame.features[1].column = Column::Categorical { codes: vec![0; 20], levels: vec!["a".into()] };
        let on_categorical = SweepSpec { monotone: vec![("same".into(), Monotone::Increasing)], ..SweepSpec::default() };
        let e = on_categorical.check(&d).unwrap_err();
        assert_eq!((e.field.as_str(), e.message.contains("categorical")), ("monotone[0]", true));
        let unknown = SweepSpec { monotone: vec![("y".into(), Monotone::Increasing)], ..SweepSpec::default() };
        assert_eq!(field_of(unknown, Task::Classify), "monotone[0]");
    }

    #[test]
    fn ranges_expand() {
        let c = SweepSpec {
            max_depth: Some(Range::Values(vec![Some(3.0), None, Some(3.0)])),
            min_split_rows: Some(Range::Span { from: 2.0, to: 10.0, step: 4.0 }),
            min_gain: Some(Range::LogSpan { from: 0.001, to: 0.1, count: 3 }),
            ..SweepSpec::default()
        }
        .check(&data(Task::Classify))
        .unwrap();
        assert_eq!(c.max_depth, vec![Some(3), None]);
        assert_eq!(c.min_split_rows, vec![2, 6, 10]);
        assert_eq!(c.min_gain.len(), 3);
        assert!((c.min_gain[1] - 0.01).abs() < 1e-15);
        assert_eq!(c.min_gain[2], 0.1);
        // 2 depths × 3 split floors × 3 gain floors.
        assert_eq!(c.settings(&[vec![0.0]]).len(), 18);
    }

    #[test]
    fn bad_specs_name_their_field() {
        let t = Task::Classify;
        assert_eq!(field_of(SweepSpec { max_depth: Some(Range::Values(vec![])), ..Default::default() }, t), "max_depth.values");
        assert_eq!(field_of(SweepSpec { max_depth: Some(Range::Span { from: 5.0, to: 1.0, step: 1.0 }), ..Default::default() }, t), "max_depth.span");
        assert_eq!(field_of(SweepSpec { max_depth: Some(Range::Values(vec![Some(-1.0)])), ..Default::default() }, t), "max_depth.values[0]");
        assert_eq!(field_of(SweepSpec { min_leaf_rows: Some(Range::Values(vec![Some(0.0)])), ..Default::default() }, t), "min_leaf_rows.values[0]");
        assert_eq!(field_of(SweepSpec { prune_alpha: Some(Range::Values(vec![Some(-0.1)])), ..Default::default() }, t), "prune_alpha.values[0]");
        assert_eq!(field_of(SweepSpec { min_gain: Some(Range::LogSpan { from: 0.0, to: 1.0, count: 3 }), ..Default::default() }, t), "min_gain.log_span");
        assert_eq!(field_of(SweepSpec { metric: Some(Metric::RocAuc), ..Default::default() }, Task::Regress), "metric");
        assert_eq!(field_of(SweepSpec { criteria: vec![Criterion::SquaredError], ..Default::default() }, t), "criteria[0]");
        let many = Some(Range::Span { from: 1.0, to: 400.0, step: 1.0 });
        assert_eq!(field_of(SweepSpec { max_depth: many.clone(), max_leaves: many, ..Default::default() }, t), "settings");
        let folds = |scheme, k| Some(FoldPlan { scheme, k, repeats: 1 });
        // Each class has 10 rows: 11 stratified folds cannot work.
        assert_eq!(field_of(SweepSpec { folds: folds(FoldScheme::Stratified, 11), ..Default::default() }, t), "folds.k");
        assert_eq!(field_of(SweepSpec { folds: folds(FoldScheme::Given { column: "same".into() }, 0), ..Default::default() }, t), "folds.column");
        assert_eq!(field_of(SweepSpec { folds: folds(FoldScheme::Grouped { column: "same".into() }, 2), ..Default::default() }, t), "folds.k");
        assert_eq!(field_of(SweepSpec { folds: folds(FoldScheme::Grouped { column: "nope".into() }, 2), ..Default::default() }, t), "folds.column");
    }

    #[test]
    fn fractional_counts_are_refused_with_their_field() {
        let t = Task::Classify;
        let v = |x: f64| Some(Range::Values(vec![Some(3.0), Some(x)]));
        assert_eq!(field_of(SweepSpec { max_depth: v(2.5), ..Default::default() }, t), "max_depth.values[1]");
        assert_eq!(field_of(SweepSpec { min_split_rows: v(4.2), ..Default::default() }, t), "min_split_rows.values[1]");
        assert_eq!(field_of(SweepSpec { min_leaf_rows: v(0.5), ..Default::default() }, t), "min_leaf_rows.values[1]");
        assert_eq!(field_of(SweepSpec { max_leaves: v(7.999), ..Default::default() }, t), "max_leaves.values[1]");
        // A linear span whose values are not whole: 1, 1.5, 2, ...
        assert_eq!(field_of(SweepSpec { max_depth: Some(Range::Span { from: 1.0, to: 4.0, step: 0.5 }), ..Default::default() }, t), "max_depth.span.step");
        assert_eq!(field_of(SweepSpec { max_leaves: Some(Range::Span { from: 2.5, to: 8.0, step: 1.0 }), ..Default::default() }, t), "max_leaves.span.from");
        // A log span of a count needs whole ends; its inner points are rounded.
        assert_eq!(field_of(SweepSpec { max_leaves: Some(Range::LogSpan { from: 2.0, to: 100.5, count: 4 }), ..Default::default() }, t), "max_leaves.log_span.to");
        let c = SweepSpec { max_leaves: Some(Range::LogSpan { from: 2.0, to: 128.0, count: 4 }), max_depth: Some(Range::Span { from: 1.0, to: 4.0, step: 1.0 }), ..Default::default() }.check(&data(t)).unwrap();
        assert_eq!(c.max_leaves, vec![Some(2), Some(8), Some(32), Some(128)]);
        assert_eq!(c.max_depth, vec![Some(1), Some(2), Some(3), Some(4)]);
        // Reals stay reals.
        assert!(SweepSpec { min_gain: Some(Range::Values(vec![Some(0.25)])), ..Default::default() }.check(&data(t)).is_ok());
    }

    fn over_cap(spec: SweepSpec, caps: &SpecCaps) -> (String, &'static str, String) {
        let e = spec.check_with(&data(Task::Classify), caps).unwrap_err();
        match e.kind {
            SpecErrorKind::OverCap { cap, .. } => (e.field.clone(), cap, e.to_string()),
            SpecErrorKind::Invalid => panic!("not a cap error: {e}"),
        }
    }

    #[test]
    fn a_grid_whose_size_overflows_u64_is_refused() {
        // 2048 × 2048 × 2048 × 2048 × 1024 × 1024 = 2^64 settings: a u64 product wraps to 0.
        let span = |from: f64, n: f64| Some(Range::Span { from, to: from + n - 1.0, step: 1.0 });
        let spec = SweepSpec {
            max_depth: span(0.0, 2048.0),
            min_split_rows: span(2.0, 2048.0),
            max_leaves: span(1.0, 2048.0),
            min_gain: span(0.0, 2048.0),
            min_leaf_rows: span(1.0, 1024.0),
            prune_alpha: span(0.0, 1024.0),
            ..SweepSpec::default()
        };
        assert_eq!(2048u64.wrapping_mul(2048).wrapping_mul(2048).wrapping_mul(2048).wrapping_mul(1024).wrapping_mul(1024), 0);
        let caps = SpecCaps { max_values_per_range: 4096, ..SpecCaps::default() };
        let (field, cap, text) = over_cap(spec.clone(), &caps);
        assert_eq!((field.as_str(), cap), ("settings", "max_settings"));
        assert!(text.contains("18446744073709551616 settings"), "{text}");
        // With the default caps each range is already over the cap on values.
        let (field, cap, _) = over_cap(spec, &SpecCaps::default());
        assert_eq!((field.as_str(), cap), ("max_depth.span", "max_values_per_range"));
        assert_eq!(checked_product(&[usize::MAX, usize::MAX, 2]), None);
        assert_eq!(checked_product(&[3, 4]), Some(12));
    }

    #[test]
    fn spans_are_counted_before_they_are_made() {
        let cases = [
            Range::Span { from: 0.0, to: 10.0, step: 1.0 },
            Range::Span { from: 0.0, to: 1.0, step: 0.1 },
            Range::Span { from: 2.0, to: 20.0, step: 6.0 },
            Range::Span { from: 0.5, to: 0.5, step: 3.0 },
            Range::Span { from: 1.0, to: 2.0, step: 0.3 },
            Range::LogSpan { from: 0.001, to: 10.0, count: 9 },
            Range::Values(vec![Some(1.0), None, Some(1.0)]),
        ];
        for r in cases {
            let counted = r.count("f").unwrap();
            assert_eq!(counted as usize, expand("f", &r, 1_000).unwrap().len(), "{r:?}");
        }
        // lin(0, 1e300, 1e-300): (to − from) / step overflows; counted, never made.
        let absurd = Range::Span { from: 0.0, to: 1e300, step: 1e-300 };
        assert_eq!(absurd.count("min_gain").unwrap(), u64::MAX);
        let (field, cap, text) = over_cap(SweepSpec { min_gain: Some(absurd), ..SweepSpec::default() }, &SpecCaps::default());
        assert_eq!((field.as_str(), cap), ("min_gain.span", "max_values_per_range"));
        assert!(text.contains("more than 2^53 values") && text.contains("= 1000"), "{text}");
        // 300,000 values of max_depth: refused by their count.
        let (field, _, text) = over_cap(SweepSpec { max_depth: Some(Range::Span { from: 1.0, to: 300_000.0, step: 1.0 }), ..SweepSpec::default() }, &SpecCaps::default());
        assert_eq!(field, "max_depth.span");
        assert!(text.contains("gives 300000 values"), "{text}");
        let (field, _, _) = over_cap(SweepSpec { min_gain: Some(Range::LogSpan { from: 1e-9, to: 1.0, count: 4_000_000_000 }), ..SweepSpec::default() }, &SpecCaps::default());
        assert_eq!(field, "min_gain.log_span.count");
        // At the cap passes; duplicates count toward it (they are counted before removal).
        let caps = SpecCaps { max_values_per_range: 5, ..SpecCaps::default() };
        let at = SweepSpec { max_depth: Some(Range::Span { from: 1.0, to: 5.0, step: 1.0 }), ..SweepSpec::default() };
        assert_eq!(at.check_with(&data(Task::Classify), &caps).unwrap().max_depth.len(), 5);
        let above = SweepSpec { max_depth: Some(Range::Values(vec![Some(1.0); 6])), ..SweepSpec::default() };
        assert_eq!(over_cap(above, &caps).0, "max_depth.values");
    }

    #[test]
    fn folds_repeats_and_units_are_capped() {
        let caps = SpecCaps { max_folds: 4, max_repeats: 3, max_units: 20, ..SpecCaps::default() };
        let plan = |k, repeats| Some(FoldPlan { scheme: FoldScheme::Shuffled, k, repeats });
        assert_eq!(over_cap(SweepSpec { folds: plan(5, 1), ..Default::default() }, &caps).1, "max_folds");
        assert_eq!(over_cap(SweepSpec { folds: plan(2, 4_000_000_000), ..Default::default() }, &caps).1, "max_repeats");
        // 4 folds × 3 repeats = 12 splits; × 2 shaping keys = 24 units > 20.
        let keys = Some(Range::Values(vec![Some(1.0), Some(2.0)]));
        let (field, cap, _) = over_cap(SweepSpec { folds: plan(4, 3), min_leaf_rows: keys.clone(), ..Default::default() }, &caps);
        assert_eq!((field.as_str(), cap), ("folds", "max_units_per_run"));
        let ok = SweepSpec { folds: plan(4, 2), min_leaf_rows: keys, ..Default::default() }.check_with(&data(Task::Classify), &caps).unwrap();
        assert_eq!((ok.splits, ok.keys.len()), (8, 2));
    }

    #[test]
    fn costs_are_refused_where_they_cannot_apply() {
        let costs = |false_alarm, miss| Some(Costs { false_alarm, miss });
        let t = Task::Classify;
        assert_eq!(field_of(SweepSpec { costs: costs(1.0, 5.0), ..Default::default() }, Task::Regress), "costs");
        assert_eq!(field_of(SweepSpec { costs: costs(-1.0, 5.0), ..Default::default() }, t), "costs.false_alarm");
        assert_eq!(field_of(SweepSpec { costs: costs(f64::NAN, 5.0), ..Default::default() }, t), "costs.false_alarm");
        assert_eq!(field_of(SweepSpec { costs: costs(1.0, f64::INFINITY), ..Default::default() }, t), "costs.miss");
        assert_eq!(field_of(SweepSpec { costs: costs(0.0, 0.0), ..Default::default() }, t), "costs");
        assert_eq!(field_of(SweepSpec { metric: Some(Metric::ExpectedCost), ..Default::default() }, t), "metric");
        // Three classes.
        let mut three = data(t);
        three.target = Target::Classes { codes: (0..20).map(|i| (i % 3) as u32).collect(), labels: vec!["a".into(), "b".into(), "c".into()] };
        let e = SweepSpec { costs: costs(1.0, 5.0), ..Default::default() }.check(&three).unwrap_err();
        assert_eq!(e.field, "costs");
        assert!(e.message.contains("has 3"), "{e}");
        // Costs make expected_cost the default metric; another metric may be named.
        let c = SweepSpec { costs: costs(1.0, 5.0), ..Default::default() }.check(&data(t)).unwrap();
        assert_eq!((c.metric, c.costs), (Metric::ExpectedCost, costs(1.0, 5.0)));
        let c = SweepSpec { costs: costs(0.0, 5.0), metric: Some(Metric::RocAuc), ..Default::default() }.check(&data(t)).unwrap();
        assert_eq!(c.scoring(), Scoring { metric: Metric::RocAuc, costs: costs(0.0, 5.0) });
    }
}
