//! The drift report: how a scheduled run's answer differs from the previous finished run of
//! its schedule. Pure: both sides are passed in as plain values.
//!
//! The score delta is `current − previous` in the metric's own units, and its standard error
//! treats the two picked settings' cross-validated means as independent estimates:
//! `se = sqrt(sd₁²/n₁ + sd₂²/n₂)`, the usual standard error of a difference of two
//! independent means (the same quantity Welch's t-test divides by; Welch, Biometrika 34,
//! 1947). Folds of two datasets share no rows only in part, so this is an approximation;
//! it is meant to say whether a change is large next to the noise of the folds, not to test.

use crate::sweep::{Metric, SettingScore};
use crate::tree::FitOptions;

/// When a drift report raises a flag.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct DriftThresholds {
    /// Flag when the picked setting's validation score got worse by more than this, in the
    /// metric's units (a fall for accuracy-like metrics, a rise for errors and losses).
    pub score_drop: f64,
    /// Flag when the picked tree's leaf count grew or shrank by more than this factor (> 1).
    pub size_factor: f64,
}

impl Default for DriftThresholds {
    /// Our own defaults: two points of accuracy is a change most teams want to hear about,
    /// and a tree that doubled or halved is a different model to read.
    fn default() -> Self {
        DriftThresholds { score_drop: 0.02, size_factor: 2.0 }
    }
}

impl DriftThresholds {
    /// Checks the thresholds; the error names the field.
    pub fn check(&self) -> Result<(), String> {
        if !(self.score_drop.is_finite() && self.score_drop >= 0.0) {
            return Err(format!("drift.score_drop: {} is not a finite number ≥ 0", self.score_drop));
        }
        if !(self.size_factor.is_finite() && self.size_factor > 1.0) {
            return Err(format!("drift.size_factor: {} is not a finite number > 1", self.size_factor));
        }
        Ok(())
    }
}

/// One side of the comparison: what a finished run used and picked.
#[derive(Clone, Debug)]
pub struct RunSide<'a> {
    pub run_id: &'a str,
    pub dataset_id: &'a str,
    pub dataset_version: u32,
    pub rows: u64,
    pub metric: Metric,
    pub picked: &'a SettingScore,
    /// Leaves of the picked tree: the refit model's, or the folds' mean when there is none.
    pub leaves: f64,
}

/// A setting's knob, as drift reports name it: a limit, the criterion or the class weight.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Knob {
    Criterion,
    ClassWeight,
    MaxDepth,
    MinSplitRows,
    MinLeafRows,
    MaxLeaves,
    MinGain,
    PruneAlpha,
}

impl Knob {
    /// In the order reports list them.
    pub const ALL: [Knob; 8] = [Knob::Criterion, Knob::ClassWeight, Knob::MaxDepth, Knob::MinSplitRows, Knob::MinLeafRows, Knob::MaxLeaves, Knob::MinGain, Knob::PruneAlpha];

    pub fn as_str(self) -> &'static str {
        match self {
            Knob::Criterion => "criterion",
            Knob::ClassWeight => "class_weight",
            Knob::MaxDepth => "max_depth",
            Knob::MinSplitRows => "min_split_rows",
            Knob::MinLeafRows => "min_leaf_rows",
            Knob::MaxLeaves => "max_leaves",
            Knob::MinGain => "min_gain",
            Knob::PruneAlpha => "prune_alpha",
        }
    }

    pub fn parse(text: &str) -> Option<Knob> {
        Knob::ALL.into_iter().find(|k| k.as_str() == text)
    }
}

/// A limit (or criterion, or class weight) whose picked value changed.
#[derive(Clone, Debug, PartialEq)]
pub struct LimitMove {
    pub limit: Knob,
    pub from: String,
    pub to: String,
}

/// The comparison of a scheduled run with the previous finished run of its schedule.
#[derive(Clone, Debug, PartialEq)]
pub struct DriftReport {
    pub previous_run_id: String,
    /// Whether any value of the picked setting differs.
    pub picked_changed: bool,
    pub moved: Vec<LimitMove>,
    pub previous_score: f64,
    pub score: f64,
    /// `score − previous_score` (NaN when the two runs used different metrics).
    pub score_delta: f64,
    /// Standard error of `score_delta` (see the module notes).
    pub score_delta_se: f64,
    pub previous_dataset_id: String,
    pub dataset_id: String,
    pub previous_version: u32,
    pub version: u32,
    pub previous_rows: u64,
    pub rows: u64,
    pub previous_leaves: f64,
    pub leaves: f64,
    /// The score got worse by more than `thresholds.score_drop`.
    pub score_fell: bool,
    /// The picked tree has more than `size_factor` times the leaves it had.
    pub tree_grew: bool,
    /// The picked tree has fewer than 1 / `size_factor` times the leaves it had.
    pub tree_shrank: bool,
    pub thresholds: DriftThresholds,
}

impl DriftReport {
    /// Whether any flag is raised.
    pub fn flagged(&self) -> bool {
        self.score_fell || self.tree_grew || self.tree_shrank
    }
}

/// The values of a setting by name, in the order reports list them.
pub fn setting_values(o: &FitOptions) -> Vec<(Knob, String)> {
    let l = &o.limits;
    let opt = |v: Option<u32>| v.map_or("none".to_string(), |v| v.to_string());
    vec![
        (Knob::Criterion, o.criterion.map_or("default".to_string(), |c| c.as_str().to_string())),
        (Knob::ClassWeight, o.class_weight.as_str().to_string()),
        (Knob::MaxDepth, opt(l.max_depth)),
        (Knob::MinSplitRows, l.min_split_rows.to_string()),
        (Knob::MinLeafRows, l.min_leaf_rows.to_string()),
        (Knob::MaxLeaves, opt(l.max_leaves)),
        (Knob::MinGain, l.min_gain.to_string()),
        (Knob::PruneAlpha, l.prune_alpha.to_string()),
    ]
}

/// Standard error of a cross-validated mean: `sd / sqrt(n)` (0 for fewer than two scores).
fn standard_error(s: &SettingScore) -> f64 {
    let n = s.fold_scores.len();
    if n < 2 || !s.valid_sd.is_finite() {
        return 0.0;
    }
    s.valid_sd / (n as f64).sqrt()
}

/// Compares `current` with `previous`.
pub fn compare(previous: &RunSide, current: &RunSide, thresholds: DriftThresholds) -> DriftReport {
    let before = setting_values(&previous.picked.setting.options);
    let after = setting_values(&current.picked.setting.options);
    let moved: Vec<LimitMove> = before
        .into_iter()
        .zip(after)
        .filter(|(b, a)| b.1 != a.1)
        .map(|(b, a)| LimitMove { limit: b.0, from: b.1, to: a.1 })
        .collect();
    let same_metric = previous.metric == current.metric;
    let (p, c) = (previous.picked.valid_mean, current.picked.valid_mean);
    let score_delta = if same_metric { c - p } else { f64::NAN };
    let se_p = standard_error(previous.picked);
    let se_c = standard_error(current.picked);
    let score_delta_se = (se_p * se_p + se_c * se_c).sqrt();
    // How much worse the new score is, in the metric's direction.
    let worse_by = if current.metric.higher_is_better() { -score_delta } else { score_delta };
    let ratio = current.leaves / previous.leaves;
    DriftReport {
        previous_run_id: previous.run_id.to_string(),
        picked_changed: !moved.is_empty(),
        moved,
        previous_score: p,
        score: c,
        score_delta,
        score_delta_se,
        previous_dataset_id: previous.dataset_id.to_string(),
        dataset_id: current.dataset_id.to_string(),
        previous_version: previous.dataset_version,
        version: current.dataset_version,
        previous_rows: previous.rows,
        rows: current.rows,
        previous_leaves: previous.leaves,
        leaves: current.leaves,
        score_fell: same_metric && worse_by > thresholds.score_drop,
        tree_grew: previous.leaves > 0.0 && ratio > thresholds.size_factor,
        tree_shrank: previous.leaves > 0.0 && ratio < 1.0 / thresholds.size_factor,
        thresholds,
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::sweep::Setting;
    use crate::tree::{ClassWeight, Limits};

    fn score(depth: Option<u32>, folds: &[f64]) -> SettingScore {
        let n = folds.len() as f64;
        let mean = folds.iter().sum::<f64>() / n;
        let sd = (folds.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt();
        SettingScore {
            setting: Setting { key: 0, options: FitOptions { limits: Limits { max_depth: depth, ..Limits::default() }, criterion: None, class_weight: ClassWeight::None, ..FitOptions::default() } },
            fold_scores: folds.to_vec(),
            valid_mean: mean,
            valid_sd: sd,
            train_mean: 1.0,
            gap: 1.0 - mean,
            mean_leaves: 2.0,
            mean_depth: 1.0,
        }
    }

    fn side<'a>(id: &'a str, s: &'a SettingScore, metric: Metric, leaves: f64) -> RunSide<'a> {
        RunSide { run_id: id, dataset_id: id, dataset_version: 1, rows: 100, metric, picked: s, leaves }
    }

    #[test]
    fn reports_moved_limits_and_the_standard_error_of_the_delta() {
        let a = score(Some(1), &[1.0, 1.0, 0.9, 1.0]);
        let b = score(Some(3), &[0.9, 0.8, 0.9, 0.8]);
        let r = compare(&side("a", &a, Metric::Accuracy, 2.0), &side("b", &b, Metric::Accuracy, 5.0), DriftThresholds::default());
        assert!(r.picked_changed);
        assert_eq!(r.moved, vec![LimitMove { limit: Knob::MaxDepth, from: "1".into(), to: "3".into() }]);
        // Worked by hand: means 0.975 and 0.85, delta −0.125. Sample variances: (3·0.025² +
        // 0.075²)/3 = 0.0025 and 4·0.05²/3 = 0.0033…; se² = 0.0025/4 + 0.003333…/4 = 0.0014583…
        assert!((r.score_delta + 0.125).abs() < 1e-12);
        assert!((r.score_delta_se - 0.001_458_333_333_333_333_3_f64.sqrt()).abs() < 1e-12);
        assert!(r.score_fell && r.tree_grew && !r.tree_shrank && r.flagged());
    }

    #[test]
    fn lower_is_better_metrics_fall_when_they_rise() {
        let a = score(Some(2), &[3.0, 3.2, 2.8]);
        let b = score(Some(2), &[2.0, 2.2, 1.8]);
        let better = compare(&side("a", &a, Metric::Rmse, 4.0), &side("b", &b, Metric::Rmse, 4.0), DriftThresholds::default());
        assert!(!better.picked_changed && better.moved.is_empty());
        assert!(!better.score_fell && !better.flagged());
        let worse = compare(&side("b", &b, Metric::Rmse, 4.0), &side("a", &a, Metric::Rmse, 1.5), DriftThresholds::default());
        assert!(worse.score_fell && worse.tree_shrank && !worse.tree_grew);
    }

    #[test]
    fn thresholds_are_checked() {
        assert!(DriftThresholds::default().check().is_ok());
        assert!(DriftThresholds { score_drop: -1.0, size_factor: 2.0 }.check().unwrap_err().starts_with("drift.score_drop"));
        assert!(DriftThresholds { score_drop: 0.0, size_factor: 1.0 }.check().unwrap_err().starts_with("drift.size_factor"));
    }
}
