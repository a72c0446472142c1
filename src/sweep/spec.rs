//! What a sweep is asked to do, checked once: the [`SweepSpec`] becomes a [`CheckedSpec`]
//! whose grid of settings is expanded and whose every value is in its domain.

use std::fmt;

use super::folds::FoldPlan;
use super::metrics::Metric;
use crate::data::{Dataset, Task};
use crate::tree::{ClassWeight, Criterion, FitOptions, Limits};

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
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Default)]
pub enum PickRule {
    /// Best `valid_mean`; ties go to fewer mean leaves, then shallower, then grid order.
    #[default]
    Highest,
    /// Fewest mean leaves among the settings whose `valid_mean` is within one standard error
    /// (sd/√folds) of the best (Breiman et al., 1984, §3.4.3; Hastie, Tibshirani & Friedman,
    /// *The Elements of Statistical Learning*, 2nd ed., §7.10); ties go shallower, then to
    /// the better `valid_mean`, then grid order.
    OneSe,
}

impl PickRule {
    pub fn as_str(self) -> &'static str {
        match self {
            PickRule::Highest => "highest",
            PickRule::OneSe => "one_se",
        }
    }
    pub fn parse(s: &str) -> Option<PickRule> {
        match s {
            "highest" => Some(PickRule::Highest),
            "one_se" => Some(PickRule::OneSe),
            _ => None,
        }
    }
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
        }
    }
}

/// Why a sweep spec cannot run.
#[derive(Clone, Debug, PartialEq)]
pub struct SpecError {
    /// Field path of the value at fault, such as `max_depth.values[2]` or `folds.k`.
    pub field: String,
    pub message: String,
}

impl fmt::Display for SpecError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.field, self.message)
    }
}

impl std::error::Error for SpecError {}

pub(crate) fn spec_error(field: impl Into<String>, message: impl Into<String>) -> SpecError {
    SpecError { field: field.into(), message: message.into() }
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
}

impl SweepSpec {
    /// Checks the spec against the dataset it will run on.
    pub fn check(&self, data: &Dataset) -> Result<CheckedSpec, SpecError> {
        let task = self.task.unwrap_or(data.task());
        if task != data.task() {
            return Err(spec_error("task", format!("the target '{}' is read as {}, not {task}", data.target_name, data.task())));
        }
        let metric = self.metric.unwrap_or(match task {
            Task::Classify => Metric::Accuracy,
            Task::Regress => Metric::Rmse,
        });
        if metric.task() != task {
            return Err(spec_error("metric", format!("{} scores {} targets, this target is {task}", metric.as_str(), metric.task())));
        }
        let criteria = dedup(if self.criteria.is_empty() {
            vec![match task {
                Task::Classify => Criterion::Gini,
                Task::Regress => Criterion::SquaredError,
            }]
        } else {
            self.criteria.clone()
        });
        for (i, c) in criteria.iter().enumerate() {
            if c.task() != task {
                return Err(spec_error(format!("criteria[{i}]"), format!("{} is for {} targets, this target is {task}", c.as_str(), c.task())));
            }
        }
        let class_weights = dedup(if self.class_weights.is_empty() { vec![ClassWeight::None] } else { self.class_weights.clone() });
        if task == Task::Regress && class_weights.iter().any(|w| *w != ClassWeight::None) {
            return Err(spec_error("class_weights", "class weighting needs a classify target"));
        }
        let max_depth = optional_counts("max_depth", &self.max_depth, 0)?;
        let min_split_rows = counts("min_split_rows", &self.min_split_rows, 2, 2)?;
        let min_leaf_rows = counts("min_leaf_rows", &self.min_leaf_rows, 1, 1)?;
        let max_leaves = optional_counts("max_leaves", &self.max_leaves, 1)?;
        let min_gain = reals("min_gain", &self.min_gain)?;
        let prune_alpha = if self.prune_path {
            if self.prune_alpha.is_some() {
                return Err(spec_error("prune_alpha", "give either a prune_alpha range or prune_path, not both"));
            }
            Vec::new()
        } else {
            reals("prune_alpha", &self.prune_alpha)?
        };
        let mut keys = Vec::new();
        for &criterion in &criteria {
            for &class_weight in &class_weights {
                for &min_leaf_rows in &min_leaf_rows {
                    keys.push(ShapingKey { criterion, class_weight, min_leaf_rows });
                }
            }
        }
        let folds = match &self.folds {
            Some(f) => f.clone(),
            None => FoldPlan::default_for(task),
        };
        folds.check(data)?;
        let checked = CheckedSpec { spec: self.clone(), task, metric, folds, keys, criteria, class_weights, min_leaf_rows, max_depth, min_split_rows, max_leaves, min_gain, prune_alpha };
        let cap = self.max_settings.unwrap_or(DEFAULT_MAX_SETTINGS);
        // In path mode the α count is known only after growth; count one per key here.
        let n = checked.stopping_count() * checked.keys.len() * checked.prune_alpha.len().max(1);
        if n > cap {
            return Err(spec_error("settings", format!("the grid has {n} settings, more than the cap of {cap}")));
        }
        Ok(checked)
    }
}

impl CheckedSpec {
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
                                        let options = FitOptions { limits, criterion: Some(k.criterion), class_weight: k.class_weight };
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

/// Expands a range into real values, checking each.
fn expand(field: &str, range: &Range) -> Result<Vec<Option<f64>>, SpecError> {
    let out: Vec<Option<f64>> = match range {
        Range::Values(v) => {
            if v.is_empty() {
                return Err(spec_error(format!("{field}.values"), "is empty"));
            }
            v.clone()
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
            let n = ((to - from) / step + 1e-6).floor() as usize + 1;
            if n > 1_000_000 {
                return Err(spec_error(format!("{field}.span"), format!("gives {n} values")));
            }
            (0..n).map(|i| Some(from + i as f64 * step)).collect()
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

fn dedup<T: PartialEq + Clone>(v: Vec<T>) -> Vec<T> {
    let mut out: Vec<T> = Vec::with_capacity(v.len());
    for x in v {
        if !out.contains(&x) {
            out.push(x);
        }
    }
    out
}

/// Whole-number limit values (rounded to the nearest whole number from a span), each `>= min`.
fn to_count(field: &str, i: usize, x: f64, min: u32) -> Result<u32, SpecError> {
    let r = x.round();
    if r < min as f64 {
        return Err(spec_error(format!("{field}.values[{i}]"), format!("must be at least {min}, got {x}")));
    }
    if r > u32::MAX as f64 {
        return Err(spec_error(format!("{field}.values[{i}]"), format!("{x} is too large")));
    }
    Ok(r as u32)
}

fn counts(field: &str, range: &Option<Range>, min: u32, default: u32) -> Result<Vec<u32>, SpecError> {
    let Some(range) = range else { return Ok(vec![default]) };
    let mut out = Vec::new();
    for (i, v) in expand(field, range)?.into_iter().enumerate() {
        let Some(x) = v else { return Err(spec_error(format!("{field}.values[{i}]"), "cannot be 'no limit'")) };
        out.push(to_count(field, i, x, min)?);
    }
    Ok(dedup(out))
}

fn optional_counts(field: &str, range: &Option<Range>, min: u32) -> Result<Vec<Option<u32>>, SpecError> {
    let Some(range) = range else { return Ok(vec![None]) };
    let mut out = Vec::new();
    for (i, v) in expand(field, range)?.into_iter().enumerate() {
        out.push(match v {
            None => None,
            Some(x) => Some(to_count(field, i, x, min)?),
        });
    }
    Ok(dedup(out))
}

fn reals(field: &str, range: &Option<Range>) -> Result<Vec<f64>, SpecError> {
    let Some(range) = range else { return Ok(vec![0.0]) };
    let mut out = Vec::new();
    for (i, v) in expand(field, range)?.into_iter().enumerate() {
        let Some(x) = v else { return Err(spec_error(format!("{field}.values[{i}]"), "cannot be 'no limit'; use 0")) };
        if x < 0.0 {
            return Err(spec_error(format!("{field}.values[{i}]"), format!("must be >= 0, got {x}")));
        }
        out.push(x);
    }
    Ok(dedup(out))
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
}
