//! Costs of two-class decisions: a false alarm (deciding positive, class 1, on a negative
//! row) costs `false_alarm`, a miss (deciding negative on a positive row) costs `miss`.
//!
//! With calibrated probabilities the decision that minimises expected cost is "positive
//! when p ≥ c_fp / (c_fp + c_fn)" (Elkan, "The Foundations of Cost-Sensitive Learning",
//! IJCAI 2001, Theorem 1 with zero costs for correct decisions). A tree's leaf shares are
//! rarely that well calibrated, so [`Costs::best_threshold`] searches the threshold that
//! minimises the expected cost over pooled rows (validation predictions); the Bayes
//! threshold is the check value and breaks ties.
//!
//! In a sweep (`SweepSpec::costs`): every setting is scored on each fold by the metric
//! `expected_cost`, deciding at the Bayes threshold (no fold's own truth chooses its
//! threshold, so fold scores stay honest estimates); the picked setting's refit then gets
//! the threshold [`Costs::best_threshold`] finds on the pooled out-of-fold validation
//! predictions of that setting ([`decide`]), kept in the model as a
//! [`Decision`](crate::tree::Decision) that predictions and exports honour.

use rayon::prelude::*;

use super::{Plan, Setting};
use crate::data::Target;
use crate::tree::{fit, Decision, FitError, TrainSet, Tree};

/// Costs of the two wrong decisions.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Costs {
    pub false_alarm: f64,
    pub miss: f64,
}

/// Why a cost pair is refused.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum CostError {
    /// A cost is negative, NaN or infinite.
    NotFiniteNonNegative,
    /// Both costs are zero: every decision is free.
    BothZero,
}

impl std::fmt::Display for CostError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            CostError::NotFiniteNonNegative => f.write_str("each cost must be a finite number of at least 0"),
            CostError::BothZero => f.write_str("at least one cost must be above 0"),
        }
    }
}

impl std::error::Error for CostError {}

impl Costs {
    pub fn new(false_alarm: f64, miss: f64) -> Result<Costs, CostError> {
        if !(false_alarm.is_finite() && miss.is_finite() && false_alarm >= 0.0 && miss >= 0.0) {
            return Err(CostError::NotFiniteNonNegative);
        }
        if false_alarm + miss <= 0.0 {
            return Err(CostError::BothZero);
        }
        Ok(Costs { false_alarm, miss })
    }

    /// The Bayes-optimal threshold for calibrated probabilities, c_fp / (c_fp + c_fn).
    pub fn bayes_threshold(self) -> f64 {
        self.false_alarm / (self.false_alarm + self.miss)
    }

    /// Mean cost per row of deciding positive exactly when `p1[i] ≥ threshold`:
    /// (c_fp · false alarms + c_fn · misses) / rows; 0 for no rows.
    pub fn expected_cost(self, truth: &[bool], p1: &[f64], threshold: f64) -> f64 {
        if truth.is_empty() {
            return 0.0;
        }
        let (mut fa, mut miss) = (0usize, 0usize);
        for (&y, &p) in truth.iter().zip(p1) {
            match (y, p >= threshold) {
                (false, true) => fa += 1,
                (true, false) => miss += 1,
                _ => {}
            }
        }
        (self.false_alarm * fa as f64 + self.miss * miss as f64) / truth.len() as f64
    }

    /// The threshold with the lowest [`Costs::expected_cost`] over the rows, and that cost.
    /// Candidates are every distinct probability (positive from it upward) and +∞ (never
    /// positive); among equal costs, the one nearest the Bayes threshold, then the lower.
    /// One sort and one pass: O(n log n).
    pub fn best_threshold(self, truth: &[bool], p1: &[f64]) -> (f64, f64) {
        let n = truth.len();
        if n == 0 {
            return (self.bayes_threshold(), 0.0);
        }
        let mut order: Vec<usize> = (0..n).collect();
        order.sort_by(|&a, &b| p1[b].total_cmp(&p1[a]));
        // Threshold +∞: every positive row is a miss.
        let positives = truth.iter().filter(|&&y| y).count();
        let (mut fa, mut miss) = (0usize, positives);
        let cost = |fa: usize, miss: usize| (self.false_alarm * fa as f64 + self.miss * miss as f64) / n as f64;
        let bayes = self.bayes_threshold();
        let mut best = (f64::INFINITY, cost(fa, miss));
        let mut i = 0;
        while i < n {
            let t = p1[order[i]];
            while i < n && p1[order[i]] == t {
                if truth[order[i]] {
                    miss -= 1;
                } else {
                    fa += 1;
                }
                i += 1;
            }
            let c = cost(fa, miss);
            let nearer = (t - bayes).abs() < (best.0 - bayes).abs() || ((t - bayes).abs() == (best.0 - bayes).abs() && t < best.0);
            if c < best.1 || (c == best.1 && nearer) {
                best = (t, c);
            }
        }
        best
    }
}

/// The threshold of a decision that never picks class 1: the least double above 1.
pub const NEVER: f64 = 1.0000000000000002;

/// The class-1 probabilities of `setting` on every validation row of the plan's own folds
/// (each split's tree grown on its training rows), pooled in split order, with each row's
/// truth (class 1 or not). A row validated in several repeats appears once per repeat.
pub fn pooled_validation(plan: &Plan, setting: &Setting) -> Result<(Vec<bool>, Vec<f64>), FitError> {
    let Target::Classes { codes, .. } = &plan.data.target else { return Ok((Vec::new(), Vec::new())) };
    let checked = setting.options.check(plan.data.task())?;
    let per_split = plan
        .folds
        .splits
        .par_iter()
        .map(|fold| {
            let tree = fit(&TrainSet { rows: Some(&fold.train), ..TrainSet::of(&plan.data) }, &checked)?;
            Ok(fold.valid.iter().map(|&r| (codes[r as usize] == 1, tree.predict_row(&plan.data.frame, r as usize)[1])).collect::<Vec<_>>())
        })
        .collect::<Result<Vec<_>, FitError>>()?;
    Ok(per_split.into_iter().flatten().unzip())
}

/// Gives `tree` (the refit of `setting`) the decision of the plan's costs: the threshold
/// with the lowest expected cost over the pooled validation predictions. Unchanged when the
/// plan has no costs.
pub fn decide(plan: &Plan, setting: &Setting, mut tree: Tree) -> Result<Tree, FitError> {
    if let Some(c) = plan.spec.costs {
        let (truth, p1) = pooled_validation(plan, setting)?;
        let (threshold, _) = c.best_threshold(&truth, &p1);
        // +∞ (never class 1) is kept as the least number above 1, which no share reaches:
        // model files and messages hold finite numbers only.
        let threshold = if threshold.is_finite() { threshold } else { NEVER };
        tree.decision = Some(Decision { threshold, false_alarm: c.false_alarm, miss: c.miss });
    }
    Ok(tree)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn worked_example_by_hand() {
        // A false alarm costs 1, a miss 4: the Bayes threshold is 1 / (1 + 4) = 0.2.
        let c = Costs::new(1.0, 4.0).unwrap();
        assert_eq!(c.bayes_threshold(), 0.2);
        // Six rows: p = 0.1 (neg), 0.15 (pos), 0.3 (neg), 0.3 (pos), 0.6 (neg), 0.9 (pos).
        let truth = [false, true, false, true, false, true];
        let p = [0.1, 0.15, 0.3, 0.3, 0.6, 0.9];
        // At 0.2: positive for 0.3, 0.3, 0.6, 0.9 -> false alarms 2 (0.3 neg, 0.6 neg),
        // misses 1 (0.15 pos): (1·2 + 4·1) / 6 = 1.
        assert_eq!(c.expected_cost(&truth, &p, 0.2), 1.0);
        // At 0.15: also the 0.15 positive -> false alarms 2, misses 0: 2 / 6.
        assert_eq!(c.expected_cost(&truth, &p, 0.15), 2.0 / 6.0);
        let (t, cost) = c.best_threshold(&truth, &p);
        assert_eq!((t, cost), (0.15, 2.0 / 6.0));
        assert_eq!(Costs::new(-1.0, 1.0), Err(CostError::NotFiniteNonNegative));
        assert_eq!(Costs::new(0.0, 0.0), Err(CostError::BothZero));
    }

    #[test]
    fn searched_threshold_is_the_brute_force_minimum() {
        // Seeded rows with tied probabilities (as leaves give them); every threshold on a
        // fine grid, and every probability itself, costs at least what the search found.
        let mut rng = super::super::folds::SplitMix64::new(17);
        for case in 0..200 {
            let n = 1 + (rng.below(40) as usize);
            let levels = 1 + rng.below(6);
            let p: Vec<f64> = (0..n).map(|_| rng.below(levels + 1) as f64 / levels as f64).collect();
            let truth: Vec<bool> = p.iter().map(|&q| (rng.below(1000) as f64) < q * 1000.0).collect();
            let c = Costs::new(rng.below(10) as f64 + 0.5, rng.below(10) as f64).unwrap();
            let (t, cost) = c.best_threshold(&truth, &p);
            assert_eq!(cost, c.expected_cost(&truth, &p, t), "case {case}");
            let grid = (0..=1000).map(|i| i as f64 / 1000.0).chain(p.iter().copied()).chain([f64::INFINITY, -1.0]);
            for g in grid {
                assert!(c.expected_cost(&truth, &p, g) >= cost, "case {case}: threshold {g} beats the search's {t}");
            }
        }
    }

    /// breast_cancer from tests/data (sources in tests/data/SOURCES.md): 569 rows, 2 classes.
    fn breast_cancer() -> crate::data::Dataset {
        let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/breast_cancer.csv");
        crate::data::csv::read_dataset(std::fs::File::open(path).unwrap(), &crate::data::csv::CsvOptions::new("target")).unwrap()
    }

    fn swept(costs: Option<Costs>) -> (Plan, super::super::SweepResult) {
        let spec = super::super::SweepSpec {
            max_depth: Some(super::super::Range::Values(vec![Some(1.0), Some(3.0), Some(5.0)])),
            min_leaf_rows: Some(super::super::Range::Values(vec![Some(1.0), Some(10.0)])),
            seed: 3,
            costs,
            ..Default::default()
        };
        super::super::sweep(&breast_cancer(), &spec, &|_, _| super::super::Flow::Continue, &Default::default()).unwrap()
    }

    #[test]
    fn the_refit_keeps_the_threshold_searched_on_pooled_validation_predictions() {
        let costs = Costs::new(1.0, 5.0).unwrap();
        let (plan, result) = swept(Some(costs));
        assert_eq!(plan.spec.metric, super::super::Metric::ExpectedCost, "costs make expected_cost the default metric");
        let setting = &result.scores[result.picked].setting;
        let d = result.model.as_ref().unwrap().decision.expect("a refit under costs has a decision");
        assert_eq!((d.false_alarm, d.miss), (1.0, 5.0));
        // Pool the validation predictions again by hand: each fold's tree on its training
        // rows, class-1 shares of its validation rows.
        let checked = setting.options.check(plan.data.task()).unwrap();
        let Target::Classes { codes, .. } = &plan.data.target else { unreachable!() };
        let (mut truth, mut p1) = (Vec::new(), Vec::new());
        for fold in &plan.folds.splits {
            let tree = fit(&TrainSet { rows: Some(&fold.train), ..TrainSet::of(&plan.data) }, &checked).unwrap();
            for &r in &fold.valid {
                truth.push(codes[r as usize] == 1);
                p1.push(tree.predict_row(&plan.data.frame, r as usize)[1]);
            }
        }
        assert_eq!(truth.len(), plan.data.rows());
        // Brute force: no threshold on a fine grid, and no pooled share, costs less.
        let chosen = costs.expected_cost(&truth, &p1, d.threshold);
        for t in (0..=2000).map(|i| i as f64 / 2000.0).chain(p1.iter().copied()) {
            assert!(costs.expected_cost(&truth, &p1, t) >= chosen, "threshold {t} beats the stored {}", d.threshold);
        }
        // The check value: the Bayes threshold 1/6 costs at least as much on these rows.
        assert_eq!(costs.bayes_threshold(), 1.0 / 6.0);
        assert!(costs.expected_cost(&truth, &p1, costs.bayes_threshold()) >= chosen);
        assert_ne!(d.threshold, 0.5, "asymmetric costs move the threshold off one half");
        // The picked setting's validation score is expected_cost at the Bayes threshold,
        // fold by fold: the pooled cost at the Bayes threshold is their row-weighted mean.
        let score = &result.scores[result.picked];
        let weighted: f64 = plan.folds.splits.iter().zip(&score.fold_scores).map(|(f, s)| s * f.valid.len() as f64).sum::<f64>() / truth.len() as f64;
        assert!((weighted - costs.expected_cost(&truth, &p1, costs.bayes_threshold())).abs() < 1e-12);
        // Predictions follow the stored threshold.
        let model = result.model.as_ref().unwrap();
        for leaf in model.leaves() {
            assert_eq!(model.leaf_class(leaf), (model.value(leaf as usize)[1] >= d.threshold) as u32);
        }
    }

    #[test]
    fn without_costs_the_refit_has_no_decision() {
        let (_, result) = swept(None);
        assert_eq!(result.model.unwrap().decision, None);
    }
}
