//! Scores of predictions. Every metric is computed over *groups* of rows that share one
//! prediction: a sweep passes one group per leaf, a row-by-row check passes one group per
//! row, and the same code serves both.

use std::fmt;

use super::costs::Costs;
use crate::data::Task;

/// How predictions are scored.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Metric {
    /// Share of rows whose most likely class is the true class.
    Accuracy,
    /// Mean recall over the classes present in the truth.
    BalancedAccuracy,
    /// Mean F1 over the classes present in the truth or the predictions; F1 = 2TP/(2TP+FP+FN).
    MacroF1,
    /// Mean −ln p(true class), p clipped to [1e-15, 1 − 1e-15].
    LogLoss,
    /// Mean Σ_k (p_k − [y = k])² (Brier, 1950); with two classes, half of it: (p_1 − y)².
    Brier,
    /// Area under the ROC curve (two classes, class 1 positive); macro mean of one-vs-rest
    /// areas for more classes. Ties count one half (Mann–Whitney U / (P·N)).
    RocAuc,
    /// Root mean squared error.
    Rmse,
    /// Mean absolute error.
    Mae,
    /// Coefficient of determination, 1 − SSE/SST (1 when SST = SSE = 0, 0 when only SST = 0).
    R2,
    /// Two classes with decision costs ([`Costs`]): the mean cost per row of deciding class 1
    /// when p(class 1) ≥ the Bayes threshold c_fp / (c_fp + c_fn) (Elkan, 2001),
    /// (c_fp · false alarms + c_fn · misses) / rows. Lower is better; needs [`Scoring::costs`].
    ExpectedCost,
}

/// A metric with what it needs besides predictions and truth: the decision costs of
/// [`Metric::ExpectedCost`] (`None` for every other metric, which ignores them).
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Scoring {
    pub metric: Metric,
    pub costs: Option<Costs>,
}

impl From<Metric> for Scoring {
    fn from(metric: Metric) -> Scoring {
        Scoring { metric, costs: None }
    }
}

/// Clip bounds of [`Metric::LogLoss`].
pub const LOG_LOSS_CLIP: f64 = 1e-15;

impl Metric {
    pub const ALL: [Metric; 10] = [
        Metric::Accuracy,
        Metric::BalancedAccuracy,
        Metric::MacroF1,
        Metric::LogLoss,
        Metric::Brier,
        Metric::RocAuc,
        Metric::Rmse,
        Metric::Mae,
        Metric::R2,
        Metric::ExpectedCost,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            Metric::Accuracy => "accuracy",
            Metric::BalancedAccuracy => "balanced_accuracy",
            Metric::MacroF1 => "macro_f1",
            Metric::LogLoss => "log_loss",
            Metric::Brier => "brier",
            Metric::RocAuc => "roc_auc",
            Metric::Rmse => "rmse",
            Metric::Mae => "mae",
            Metric::R2 => "r2",
            Metric::ExpectedCost => "expected_cost",
        }
    }

    pub fn parse(s: &str) -> Option<Metric> {
        Metric::ALL.into_iter().find(|m| m.as_str() == s)
    }

    pub fn task(self) -> Task {
        match self {
            Metric::Rmse | Metric::Mae | Metric::R2 => Task::Regress,
            _ => Task::Classify,
        }
    }

    pub fn higher_is_better(self) -> bool {
        matches!(self, Metric::Accuracy | Metric::BalancedAccuracy | Metric::MacroF1 | Metric::RocAuc | Metric::R2)
    }

    /// Whether the metric counts rows only (its value is a ratio of whole numbers), so two
    /// computations agree exactly rather than to rounding.
    pub fn is_count(self) -> bool {
        matches!(self, Metric::Accuracy | Metric::BalancedAccuracy | Metric::MacroF1 | Metric::RocAuc)
    }
}

impl fmt::Display for Metric {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Classification groups: group g has `counts[g·k + c]` rows of true class c, all predicted
/// with the probabilities `proba[g·k ..][..k]`.
pub struct ClassGroups<'a> {
    pub k: usize,
    pub counts: &'a [f64],
    pub proba: &'a [f64],
}

/// Most likely class; the lowest class on ties.
pub fn argmax(p: &[f64]) -> usize {
    let mut best = 0;
    for c in 1..p.len() {
        if p[c] > p[best] {
            best = c;
        }
    }
    best
}

/// Scores classification groups.
pub fn score_classes(scoring: impl Into<Scoring>, g: &ClassGroups) -> f64 {
    let Scoring { metric, costs } = scoring.into();
    let k = g.k;
    let n_groups = g.counts.len() / k;
    let counts = |i: usize| &g.counts[i * k..(i + 1) * k];
    let proba = |i: usize| &g.proba[i * k..(i + 1) * k];
    let total: f64 = g.counts.iter().sum();
    match metric {
        Metric::Accuracy => {
            let correct: f64 = (0..n_groups).map(|i| counts(i)[argmax(proba(i))]).sum();
            correct / total
        }
        Metric::BalancedAccuracy | Metric::MacroF1 => {
            // Confusion totals per class: true positives, truth count, predicted count.
            let mut tp = vec![0.0; k];
            let mut truth = vec![0.0; k];
            let mut predicted = vec![0.0; k];
            for i in 0..n_groups {
                let p = argmax(proba(i));
                let c = counts(i);
                tp[p] += c[p];
                for (t, x) in truth.iter_mut().zip(c) {
                    *t += x;
                }
                predicted[p] += c.iter().sum::<f64>();
            }
            if metric == Metric::BalancedAccuracy {
                let present: Vec<usize> = (0..k).filter(|&c| truth[c] > 0.0).collect();
                present.iter().map(|&c| tp[c] / truth[c]).sum::<f64>() / present.len() as f64
            } else {
                let present: Vec<usize> = (0..k).filter(|&c| truth[c] > 0.0 || predicted[c] > 0.0).collect();
                let f1 = |c: usize| {
                    let d = truth[c] + predicted[c];
                    if d == 0.0 {
                        0.0
                    } else {
                        2.0 * tp[c] / d
                    }
                };
                present.iter().map(|&c| f1(c)).sum::<f64>() / present.len() as f64
            }
        }
        Metric::LogLoss => {
            let mut s = 0.0;
            for i in 0..n_groups {
                for (c, &n) in counts(i).iter().enumerate() {
                    if n > 0.0 {
                        let p = proba(i)[c].clamp(LOG_LOSS_CLIP, 1.0 - LOG_LOSS_CLIP);
                        s += n * -p.ln();
                    }
                }
            }
            s / total
        }
        Metric::Brier => {
            let mut s = 0.0;
            for i in 0..n_groups {
                let p = proba(i);
                for (c, &n) in counts(i).iter().enumerate() {
                    if n > 0.0 {
                        let sq: f64 = p.iter().enumerate().map(|(j, &pj)| if j == c { (1.0 - pj) * (1.0 - pj) } else { pj * pj }).sum();
                        s += n * sq;
                    }
                }
            }
            let s = s / total;
            if k == 2 {
                s / 2.0
            } else {
                s
            }
        }
        Metric::RocAuc => {
            if k == 2 {
                auc_one_vs_rest(g, 1)
            } else {
                (0..k).map(|c| auc_one_vs_rest(g, c)).sum::<f64>() / k as f64
            }
        }
        Metric::ExpectedCost => {
            let c = costs.expect("expected_cost is scored with costs (the spec check refuses it without)");
            assert_eq!(k, 2, "expected_cost scores two classes");
            let t = c.bayes_threshold();
            // Whole-row counts first, so every grouping of the same rows gives the same value.
            let (mut false_alarms, mut misses) = (0.0, 0.0);
            for i in 0..n_groups {
                if proba(i)[1] >= t {
                    false_alarms += counts(i)[0];
                } else {
                    misses += counts(i)[1];
                }
            }
            (c.false_alarm * false_alarms + c.miss * misses) / total
        }
        Metric::Rmse | Metric::Mae | Metric::R2 => panic!("{metric} scores regress targets"),
    }
}

/// ROC AUC of class `c` against the rest with score p_c: NaN when the truth has one side only.
fn auc_one_vs_rest(g: &ClassGroups, c: usize) -> f64 {
    let k = g.k;
    let n_groups = g.counts.len() / k;
    let mut items: Vec<(f64, f64, f64)> = (0..n_groups)
        .map(|i| {
            let cnt = &g.counts[i * k..(i + 1) * k];
            let pos = cnt[c];
            let neg: f64 = cnt.iter().sum::<f64>() - pos;
            (g.proba[i * k + c], pos, neg)
        })
        .filter(|(_, p, n)| p + n > 0.0)
        .collect();
    items.sort_by(|a, b| a.0.total_cmp(&b.0));
    let (mut u, mut neg_below, mut pos_total, mut neg_total) = (0.0, 0.0, 0.0, 0.0);
    let mut i = 0;
    while i < items.len() {
        let (mut p, mut n) = (0.0, 0.0);
        let score = items[i].0;
        while i < items.len() && items[i].0 == score {
            p += items[i].1;
            n += items[i].2;
            i += 1;
        }
        u += p * (neg_below + 0.5 * n);
        neg_below += n;
        pos_total += p;
        neg_total += n;
    }
    if pos_total == 0.0 || neg_total == 0.0 {
        return f64::NAN;
    }
    u / (pos_total * neg_total)
}

/// A group of regression rows sharing one prediction: their count, mean, sum of squared
/// deviations from the mean, and their values sorted with prefix sums (for absolute error).
pub struct ValueGroup<'a> {
    pub n: f64,
    pub mean: f64,
    pub m2: f64,
    pub sorted: &'a [f64],
    /// `prefix[i]` = Σ sorted[..i]; one longer than `sorted`.
    pub prefix: &'a [f64],
}

impl ValueGroup<'_> {
    /// Σ |y − p| over the group's rows.
    fn abs_error(&self, p: f64) -> f64 {
        let below = self.sorted.partition_point(|&y| y < p);
        let total = self.prefix[self.sorted.len()];
        let (lo, hi) = (self.prefix[below], total - self.prefix[below]);
        (p * below as f64 - lo) + (hi - p * (self.sorted.len() - below) as f64)
    }
}

/// Scores regression groups, group g predicted `pred[g]`.
pub fn score_values(metric: Metric, groups: &[ValueGroup], pred: &[f64]) -> f64 {
    let n: f64 = groups.iter().map(|g| g.n).sum();
    // SSE = Σ_g M2_g + n_g (mean_g − p_g)²: no cancellation between large sums.
    let sse = || groups.iter().zip(pred).map(|(g, &p)| g.m2 + g.n * (g.mean - p) * (g.mean - p)).sum::<f64>();
    match metric {
        Metric::Rmse => (sse() / n).sqrt(),
        Metric::Mae => groups.iter().zip(pred).map(|(g, &p)| g.abs_error(p)).sum::<f64>() / n,
        Metric::R2 => {
            let mean = groups.iter().map(|g| g.n * g.mean).sum::<f64>() / n;
            let sst: f64 = groups.iter().map(|g| g.m2 + g.n * (g.mean - mean) * (g.mean - mean)).sum();
            let sse = sse();
            if sst == 0.0 {
                if sse == 0.0 {
                    1.0
                } else {
                    0.0
                }
            } else {
                1.0 - sse / sst
            }
        }
        _ => panic!("{metric} scores classify targets"),
    }
}

/// Row-level helpers: one group per row.
pub mod rows {
    use super::*;

    /// Scores class predictions: `truth[i]` is row i's class, `proba[i·k..][..k]` its probabilities.
    pub fn classes(metric: impl Into<Scoring>, k: usize, truth: &[u32], proba: &[f64]) -> f64 {
        let mut counts = vec![0.0; truth.len() * k];
        for (i, &c) in truth.iter().enumerate() {
            counts[i * k + c as usize] = 1.0;
        }
        score_classes(metric, &ClassGroups { k, counts: &counts, proba })
    }

    /// Scores value predictions.
    pub fn values(metric: Metric, truth: &[f64], pred: &[f64]) -> f64 {
        let prefix: Vec<[f64; 2]> = truth.iter().map(|&y| [0.0, y]).collect();
        let groups: Vec<ValueGroup> = truth
            .iter()
            .zip(&prefix)
            .map(|(&y, p)| ValueGroup { n: 1.0, mean: y, m2: 0.0, sorted: std::slice::from_ref(&p[1]), prefix: &p[..] })
            .collect();
        score_values(metric, &groups, pred)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_examples() {
        // Accuracy: 3 of 4 right.
        let truth = [0, 1, 1, 0];
        let proba = [0.9, 0.1, 0.2, 0.8, 0.6, 0.4, 0.7, 0.3];
        assert_eq!(rows::classes(Metric::Accuracy, 2, &truth, &proba), 0.75);
        // AUC: positives score 0.8 and 0.4, negatives 0.1 and 0.3: pairs (0.8>0.1, 0.8>0.3,
        // 0.4>0.1, 0.4>0.3) all won, AUC = 1.
        assert_eq!(rows::classes(Metric::RocAuc, 2, &truth, &proba), 1.0);
        // Brier, two classes: ((0.1)² + (0.2)² + (0.6)² + (0.3)²)/4 = 0.5/4 = 0.125.
        assert!((rows::classes(Metric::Brier, 2, &truth, &proba) - 0.125).abs() < 1e-15);
        // RMSE of errors (1, −1, 2, 0): sqrt(6/4).
        let r = rows::values(Metric::Rmse, &[1.0, 2.0, 3.0, 4.0], &[0.0, 3.0, 1.0, 4.0]);
        assert!((r - 1.5f64.sqrt()).abs() < 1e-15);
        // MAE of the same: 4/4.
        assert_eq!(rows::values(Metric::Mae, &[1.0, 2.0, 3.0, 4.0], &[0.0, 3.0, 1.0, 4.0]), 1.0);
    }

    #[test]
    fn expected_cost_worked_by_hand() {
        // A false alarm costs 1, a miss 4: decide class 1 when p1 >= 1/5 (Elkan, 2001).
        let costs = Some(Costs::new(1.0, 4.0).unwrap());
        let scoring = Scoring { metric: Metric::ExpectedCost, costs };
        // Rows (truth, p1): (0, 0.1) right; (1, 0.15) a miss; (0, 0.3) a false alarm;
        // (1, 0.3) right; (0, 0.2) a false alarm (at the threshold decides 1); (1, 0.9) right.
        let truth = [0, 1, 0, 1, 0, 1];
        let p1 = [0.1, 0.15, 0.3, 0.3, 0.2, 0.9];
        let proba: Vec<f64> = p1.iter().flat_map(|&p| [1.0 - p, p]).collect();
        // (1 · 2 false alarms + 4 · 1 miss) / 6 rows = 1.
        assert_eq!(rows::classes(scoring, 2, &truth, &proba), 1.0);
        // The same rows as groups (one group per distinct p1) give the same value.
        let counts = [1.0, 0.0, 0.0, 1.0, 1.0, 1.0, 1.0, 0.0, 0.0, 1.0];
        let grouped = [0.9, 0.1, 0.85, 0.15, 0.7, 0.3, 0.8, 0.2, 0.1, 0.9];
        assert_eq!(score_classes(scoring, &ClassGroups { k: 2, counts: &counts, proba: &grouped }), 1.0);
        assert!(!Metric::ExpectedCost.higher_is_better());
        assert_eq!(Metric::parse("expected_cost"), Some(Metric::ExpectedCost));
    }
}
