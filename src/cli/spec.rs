//! A sweep spec from command-line flags and, optionally, a TOML spec file (flags win).
//!
//! Spec file (every key optional; limits use the range syntax of [`super::ranges`]):
//!
//! ```toml
//! target = "excursion"
//! metric = "accuracy"
//! pick = "one_se"
//! seed = 7
//! criteria = ["gini", "entropy"]
//! class_weights = ["none", "balanced"]
//! splitter = "binned"
//! monotone = "age:+1,debt:-1"   # monotone limits, as --monotone
//! [limits]
//! max_depth = "2,4,8,none"
//! min_leaf_rows = "lin(1,21,5)"
//! min_gain = "log(0.0001,0.01,3)"
//! [folds]
//! scheme = "stratified"
//! k = 5
//! repeats = 1
//! [outer]            # nested cross-validation; same keys as [folds]
//! k = 5
//! [costs]            # two-class targets: costs of the two wrong decisions (both keys)
//! false_alarm = 1
//! miss = 5
//! ```

use std::path::PathBuf;

use clap::Args;
use serde::Deserialize;

use super::error::{CliError, Res};
use super::ranges::parse_range;
use crate::pb;
use crate::rpc::convert::range_to;

#[derive(Args, Debug, Clone, Default)]
pub struct GridArgs {
    /// TOML spec file; flags given here override it.
    #[arg(long)]
    pub spec: Option<PathBuf>,
    /// Column to predict.
    #[arg(long)]
    pub target: Option<String>,
    /// classify or regress (default: inferred from the target).
    #[arg(long)]
    pub task: Option<String>,
    /// Range of max_depth, e.g. 2,4,8,none or lin(1,12,1).
    #[arg(long)]
    pub max_depth: Option<String>,
    /// Range of min_split_rows, e.g. 2,10,50.
    #[arg(long)]
    pub min_split_rows: Option<String>,
    /// Range of min_leaf_rows, e.g. lin(1,21,5).
    #[arg(long)]
    pub min_leaf_rows: Option<String>,
    /// Range of max_leaves, e.g. 8,32,none.
    #[arg(long)]
    pub max_leaves: Option<String>,
    /// Range of min_gain, e.g. 0,0.001,0.01 or log(0.0001,0.01,3).
    #[arg(long)]
    pub min_gain: Option<String>,
    /// Range of prune_alpha, e.g. 0,0.001,0.01.
    #[arg(long)]
    pub prune_alpha: Option<String>,
    /// Score every α on the pruning path instead of a prune_alpha range.
    #[arg(long)]
    pub prune_path: bool,
    /// Criteria to try (comma-separated): gini, entropy, squared_error.
    #[arg(long, value_delimiter = ',')]
    pub criteria: Vec<String>,
    /// Class weightings to try (comma-separated): none, balanced.
    #[arg(long, value_delimiter = ',')]
    pub class_weights: Vec<String>,
    /// Fold scheme: shuffled, stratified, grouped, forward or given.
    #[arg(long, alias = "folds")]
    pub fold_scheme: Option<String>,
    /// Number of folds.
    #[arg(long)]
    pub k: Option<u32>,
    /// Repeats of the fold plan.
    #[arg(long)]
    pub repeats: Option<u32>,
    /// Column read by grouped, forward and given folds.
    #[arg(long)]
    pub fold_column: Option<String>,
    /// accuracy, balanced_accuracy, macro_f1, log_loss, brier, roc_auc, rmse, mae, r2 or
    /// expected_cost (needs the two costs; the default when they are given).
    #[arg(long)]
    pub metric: Option<String>,
    /// Two-class targets: cost of a false alarm (deciding the second class for a row of the
    /// first). Give it with --miss-cost; the model then decides with a threshold on the
    /// second class's probability, chosen on the validation folds.
    #[arg(long)]
    pub false_alarm_cost: Option<f64>,
    /// Two-class targets: cost of a miss (deciding the first class for a row of the second).
    /// Give it with --false-alarm-cost.
    #[arg(long)]
    pub miss_cost: Option<f64>,
    /// highest, one_se, max_leaves_budget:N (best tree of at most N mean leaves) or within:T
    /// (simplest setting within T of the best score).
    #[arg(long)]
    pub pick: Option<String>,
    /// Seed of the fold shuffles (the same seed gives the same folds).
    #[arg(long)]
    pub seed: Option<u64>,
    /// Do not refit the picked setting on all rows.
    #[arg(long)]
    pub skip_final: bool,
    /// Where numeric features may be cut: exact (default) or binned (at most 255 quantile
    /// bins per feature, from each fold's training rows; faster on big tables).
    #[arg(long, value_parser = ["exact", "binned"])]
    pub splitter: Option<String>,
    /// Monotone limits by feature, comma-separated `name:+1` (the prediction never falls as
    /// the feature grows), `name:-1` (never rises) or `name:0` (free); numeric features of a
    /// regress or two-class target.
    #[arg(long)]
    pub monotone: Option<String>,
    #[command(flatten)]
    pub outer: OuterArgs,
}

/// The outer fold plan of nested cross-validation; any of these flags turns it on.
#[derive(Args, Debug, Clone, Default)]
pub struct OuterArgs {
    /// Nested cross-validation: the outer fold scheme (shuffled, stratified, grouped,
    /// forward or given; default: the task's). Each outer split runs the whole sweep and pick
    /// on its training rows and scores the picked tree on its validation rows.
    #[arg(long)]
    pub outer_scheme: Option<String>,
    /// Outer folds (default 5).
    #[arg(long)]
    pub outer_k: Option<u32>,
    /// Repeats of the outer fold plan (default 1).
    #[arg(long)]
    pub outer_repeats: Option<u32>,
    /// Column read by a grouped, forward or given outer plan.
    #[arg(long)]
    pub outer_column: Option<String>,
}

impl OuterArgs {
    /// Whether any outer flag was given.
    pub fn asked(&self) -> bool {
        self.outer_scheme.is_some() || self.outer_k.is_some() || self.outer_repeats.is_some() || self.outer_column.is_some()
    }
}

#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct SpecFile {
    target: Option<String>,
    task: Option<String>,
    metric: Option<String>,
    pick: Option<String>,
    seed: Option<u64>,
    criteria: Option<Vec<String>>,
    class_weights: Option<Vec<String>>,
    prune_path: Option<bool>,
    skip_final: Option<bool>,
    splitter: Option<String>,
    monotone: Option<String>,
    #[serde(default)]
    limits: LimitsFile,
    #[serde(default)]
    folds: FoldsFile,
    outer: Option<FoldsFile>,
    costs: Option<CostsFile>,
}

#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct CostsFile {
    false_alarm: Option<f64>,
    miss: Option<f64>,
}

#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct LimitsFile {
    max_depth: Option<String>,
    min_split_rows: Option<String>,
    min_leaf_rows: Option<String>,
    max_leaves: Option<String>,
    min_gain: Option<String>,
    prune_alpha: Option<String>,
}

#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct FoldsFile {
    scheme: Option<String>,
    k: Option<u32>,
    repeats: Option<u32>,
    column: Option<String>,
}

/// `name:+1,name:-1,name:0` (also `increasing`, `decreasing`, `free`) as monotone limits; the
/// name is everything before an entry's last `:`, and the server checks it is a feature.
pub fn parse_monotone(text: &str) -> Result<Vec<pb::MonotoneLimit>, String> {
    text.split(',')
        .map(str::trim)
        .filter(|e| !e.is_empty())
        .map(|entry| {
            let Some((name, dir)) = entry.rsplit_once(':') else {
                return Err(format!("'{entry}' is not name:+1, name:-1 or name:0"));
            };
            let direction = match dir.trim() {
                "+1" | "1" | "increasing" => pb::MonotoneDirection::Increasing,
                "-1" | "decreasing" => pb::MonotoneDirection::Decreasing,
                "0" | "free" => pb::MonotoneDirection::Free,
                other => return Err(format!("'{other}' in '{entry}' is not +1, -1 or 0")),
            };
            if name.trim().is_empty() {
                return Err(format!("'{entry}' names no feature"));
            }
            Ok(pb::MonotoneLimit { feature: name.trim().to_string(), direction: direction as i32 })
        })
        .collect()
}

fn range(name: &str, flag: &Option<String>, file: &Option<String>) -> Res<Option<pb::LimitRange>> {
    match flag.as_ref().or(file.as_ref()) {
        None => Ok(None),
        Some(text) => Ok(range_to(&Some(parse_range(text).map_err(|e| CliError::usage(format!("--{}: {e}", name.replace('_', "-"))))?))),
    }
}

/// A TOML error on one line, `line L, column C: message` (the error's own text also quotes
/// the source across several lines).
fn toml_error(text: &str, e: &toml::de::Error) -> String {
    let message = e.message().trim().replace('\n', "; ");
    match e.span() {
        Some(span) => {
            let before = &text[..span.start.min(text.len())];
            let line = before.matches('\n').count() + 1;
            let column = before[before.rfind('\n').map_or(0, |i| i + 1)..].chars().count() + 1;
            format!("line {line}, column {column}: {message}")
        }
        None => message,
    }
}

impl GridArgs {
    /// The wire spec these flags (and the spec file) describe.
    pub fn to_spec(&self) -> Res<pb::SweepSpec> {
        let file: SpecFile = match &self.spec {
            None => SpecFile::default(),
            Some(p) => {
                let text = std::fs::read_to_string(p).map_err(|e| format!("{}: {e}", p.display()))?;
                toml::from_str(&text).map_err(|e: toml::de::Error| format!("{}: {}", p.display(), toml_error(&text, &e)))?
            }
        };
        let l = &file.limits;
        let pick = |flag: &Vec<String>, f: &Option<Vec<String>>| if flag.is_empty() { f.clone().unwrap_or_default() } else { flag.clone() };
        let folds = pb::FoldPlan {
            scheme: self.fold_scheme.clone().or(file.folds.scheme.clone()).unwrap_or_default(),
            k: self.k.or(file.folds.k).unwrap_or(0),
            repeats: self.repeats.or(file.folds.repeats).unwrap_or(0),
            column: self.fold_column.clone().or(file.folds.column.clone()).unwrap_or_default(),
        };
        let a = &self.outer;
        let outer = (a.asked() || file.outer.is_some()).then(|| {
            let o = file.outer.unwrap_or_default();
            pb::FoldPlan {
                scheme: a.outer_scheme.clone().or(o.scheme).unwrap_or_default(),
                k: a.outer_k.or(o.k).unwrap_or(0),
                repeats: a.outer_repeats.or(o.repeats).unwrap_or(0),
                column: a.outer_column.clone().or(o.column).unwrap_or_default(),
            }
        });
        let file_costs = file.costs.unwrap_or_default();
        let costs = match (self.false_alarm_cost.or(file_costs.false_alarm), self.miss_cost.or(file_costs.miss)) {
            (None, None) => None,
            (Some(false_alarm), Some(miss)) => Some(pb::DecisionCosts { false_alarm, miss }),
            (Some(_), None) => return Err(CliError::usage("--false-alarm-cost needs --miss-cost (or [costs] miss in the spec file)")),
            (None, Some(_)) => return Err(CliError::usage("--miss-cost needs --false-alarm-cost (or [costs] false_alarm in the spec file)")),
        };
        Ok(pb::SweepSpec {
            costs,
            outer,
            target: self.target.clone().or(file.target).unwrap_or_default(),
            task: self.task.clone().or(file.task).unwrap_or_default(),
            criteria: pick(&self.criteria, &file.criteria),
            class_weights: pick(&self.class_weights, &file.class_weights),
            max_depth: range("max_depth", &self.max_depth, &l.max_depth)?,
            min_split_rows: range("min_split_rows", &self.min_split_rows, &l.min_split_rows)?,
            min_leaf_rows: range("min_leaf_rows", &self.min_leaf_rows, &l.min_leaf_rows)?,
            max_leaves: range("max_leaves", &self.max_leaves, &l.max_leaves)?,
            min_gain: range("min_gain", &self.min_gain, &l.min_gain)?,
            prune_alpha: range("prune_alpha", &self.prune_alpha, &l.prune_alpha)?,
            prune_path: self.prune_path || file.prune_path.unwrap_or(false),
            folds: Some(folds),
            metric: self.metric.clone().or(file.metric).unwrap_or_default(),
            pick: self.pick.clone().or(file.pick).unwrap_or_default(),
            seed: self.seed.or(file.seed).unwrap_or(0),
            skip_final: self.skip_final || file.skip_final.unwrap_or(false),
            splitter: self.splitter.clone().or(file.splitter).unwrap_or_default(),
            monotone: match self.monotone.as_ref().or(file.monotone.as_ref()) {
                None => Vec::new(),
                Some(text) => parse_monotone(text).map_err(|e| CliError::usage(format!("--monotone: {e}")))?,
            },
        })
    }
}
