//! The shared growth must give every setting the fold scores that fitting that setting on its
//! own and scoring row by row gives: exactly for metrics that count rows, to 1e-12 relative
//! for metrics that sum floating-point terms. Random datasets (both tasks, missing cells,
//! categorical columns) and random grids, over every fold plan; seeded, so a failure repeats.

use std::sync::atomic::AtomicBool;

use pollard::data::{Column, Dataset, Feature, Frame, Target, Task, MISSING_CODE};
use pollard::sweep::costs::Costs;
use pollard::sweep::metrics::{rows, Scoring};
use pollard::sweep::{self, FoldPlan, FoldScheme, Flow, Metric, PickRule, Range, SweepSpec};
use pollard::tree::{fit, ClassWeight, Criterion, Predictions, TrainSet};

/// A small seeded generator for test data (xorshift64*, Vigna 2016).
struct Gen(u64);

impl Gen {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_F491_4F6C_DD1D)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
    fn chance(&mut self, p: f64) -> bool {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64 <= p
    }
    fn pick<T: Clone>(&mut self, v: &[T]) -> T {
        v[self.below(v.len() as u64) as usize].clone()
    }
    /// A non-empty random subset, in the given order.
    fn subset<T: Clone>(&mut self, v: &[T]) -> Vec<T> {
        loop {
            let s: Vec<T> = v.iter().filter(|_| self.chance(0.4)).cloned().collect();
            if !s.is_empty() {
                return s;
            }
        }
    }
}

fn dataset(g: &mut Gen, task: Task) -> Dataset {
    let n = 30 + g.below(90) as usize;
    let n_features = 1 + g.below(4) as usize;
    let mut features = Vec::new();
    for f in 0..n_features {
        let missing = if g.chance(0.5) { 0.15 } else { 0.0 };
        let column = if g.chance(0.3) {
            let levels = 2 + g.below(6) as u32;
            Column::Categorical {
                codes: (0..n).map(|_| if g.chance(missing) { MISSING_CODE } else { g.below(levels as u64) as u32 }).collect(),
                levels: (0..levels).map(|l| format!("c{l}")).collect(),
            }
        } else {
            let distinct = 2 + g.below(12);
            Column::Numeric((0..n).map(|_| if g.chance(missing) { f32::NAN } else { g.below(distinct) as f32 * 0.5 - 1.0 }).collect())
        };
        features.push(Feature { name: format!("x{f}"), column });
    }
    // The target follows the first feature loosely, so trees have something to find.
    let signal: Vec<f64> = match &features[0].column {
        Column::Numeric(v) => v.iter().map(|x| if x.is_nan() { 0.0 } else { *x as f64 }).collect(),
        Column::Categorical { codes, .. } => codes.iter().map(|&c| if c == MISSING_CODE { 0.0 } else { c as f64 }).collect(),
    };
    let target = match task {
        Task::Classify => {
            let k = 2 + g.below(2) as u32;
            let codes = signal.iter().map(|s| if g.chance(0.7) { (*s as i64).rem_euclid(k as i64) as u32 } else { g.below(k as u64) as u32 }).collect();
            Target::Classes { codes, labels: (0..k).map(|c| format!("k{c}")).collect() }
        }
        Task::Regress => Target::Values(signal.iter().map(|s| s * 2.0 + g.below(7) as f64 * 0.25).collect()),
    };
    // Plan columns: a group id, a time, and a given fold number.
    features.push(Feature { name: "group".into(), column: Column::Numeric((0..n).map(|_| g.below(9) as f32).collect()) });
    features.push(Feature { name: "time".into(), column: Column::Numeric((0..n).map(|_| g.below(1000) as f32).collect()) });
    features.push(Feature { name: "fold".into(), column: Column::Numeric((0..n).map(|i| (i % 3) as f32).collect()) });
    Dataset::new(Frame::new(features).unwrap(), "y".into(), target).unwrap()
}

fn values(g: &mut Gen, options: &[Option<f64>]) -> Option<Range> {
    if g.chance(0.2) {
        None
    } else {
        Some(Range::Values(g.subset(options)))
    }
}

fn spec(g: &mut Gen, task: Task, plan: FoldPlan) -> SweepSpec {
    let metrics: Vec<Metric> = Metric::ALL.into_iter().filter(|m| m.task() == task).collect();
    let metric = g.pick(&metrics);
    // Sometimes score every α on the pruning path instead of listed values.
    let path_mode = g.chance(0.15);
    SweepSpec {
        criteria: if task == Task::Classify { g.subset(&[Criterion::Gini, Criterion::Entropy]) } else { vec![] },
        class_weights: if task == Task::Classify { g.subset(&[ClassWeight::None, ClassWeight::Balanced]) } else { vec![] },
        max_depth: values(g, &[None, Some(0.0), Some(1.0), Some(2.0), Some(3.0), Some(5.0)]),
        min_split_rows: values(g, &[Some(2.0), Some(4.0), Some(10.0)]),
        min_leaf_rows: values(g, &[Some(1.0), Some(2.0), Some(5.0)]),
        max_leaves: values(g, &[None, Some(1.0), Some(2.0), Some(3.0), Some(5.0), Some(8.0)]),
        min_gain: values(g, &[Some(0.0), Some(0.001), Some(0.02)]),
        prune_alpha: if path_mode { None } else { values(g, &[Some(0.0), Some(0.005), Some(0.02), Some(0.1)]) },
        prune_path: path_mode,
        folds: Some(plan),
        metric: Some(metric),
        // expected_cost needs costs (a spec on three classes is refused and is no case).
        costs: (metric == Metric::ExpectedCost).then(|| Costs { false_alarm: g.below(4) as f64 + 0.5, miss: g.below(6) as f64 }),
        pick: if g.chance(0.5) { PickRule::Highest } else { PickRule::OneSe },
        seed: g.next(),
        fit_final: false,
        ..SweepSpec::default()
    }
}

/// Equal for count metrics; 1e-12 relative otherwise. R² = 1 − SSE/SST is compared through
/// SSE/SST, the ratio of the two sums, since near R² = 0 the subtraction magnifies rounding.
fn close(metric: Metric, a: f64, b: f64) -> bool {
    if a.is_nan() && b.is_nan() {
        return true;
    }
    let (a, b) = if metric == Metric::R2 { (1.0 - a, 1.0 - b) } else { (a, b) };
    if metric.is_count() {
        a == b
    } else {
        a == b || (a - b).abs() <= 1e-12 * a.abs().max(b.abs())
    }
}

/// Row-by-row score of `tree` on `rows` of `data`.
fn row_score(metric: Scoring, tree: &pollard::tree::Tree, data: &Dataset, rows_: &[u32]) -> f64 {
    let sub = data.take_rows(rows_);
    match (tree.predict(&sub.frame), &sub.target) {
        (Predictions::Classes { probabilities, .. }, Target::Classes { codes, labels }) => rows::classes(metric, labels.len(), codes, &probabilities),
        (Predictions::Values(p), Target::Values(y)) => rows::values(metric.metric, y, &p),
        _ => unreachable!(),
    }
}

#[test]
fn shared_growth_equals_fitting_each_setting() {
    let mut g = Gen(0x5EED_2026_1202);
    let mut cases = 0;
    let mut compared = 0usize;
    let mut per_scheme = std::collections::BTreeMap::new();
    let mut path_cases = 0;
    let mut per_metric = std::collections::BTreeMap::new();
    while cases < 240 {
        let task = if g.chance(0.5) { Task::Classify } else { Task::Regress };
        let data = dataset(&mut g, task);
        let k = 2 + g.below(3) as u32;
        let scheme = match g.below(6) {
            0 => FoldScheme::Shuffled,
            1 if task == Task::Classify => FoldScheme::Stratified,
            1 | 2 => FoldScheme::Grouped { column: "group".into() },
            3 => FoldScheme::Forward { column: "time".into() },
            4 => FoldScheme::Given { column: "fold".into() },
            _ => FoldScheme::Shuffled,
        };
        let repeats = if matches!(scheme, FoldScheme::Shuffled | FoldScheme::Stratified) && g.chance(0.3) { 2 } else { 1 };
        let name = format!("{scheme:?}").split([' ', '{']).next().unwrap().to_string() + if repeats > 1 { "+repeated" } else { "" };
        let spec = spec(&mut g, task, FoldPlan { scheme, k, repeats });
        path_cases += spec.prune_path as usize;
        let plan = match sweep::plan(&data, &spec) {
            Ok(p) => p,
            // A plan that cannot work here (too few rows of a class, say) is no case.
            Err(sweep::SweepError::Spec(_)) => continue,
            Err(e) => panic!("{e}"),
        };
        let cancel = AtomicBool::new(false);
        let units = sweep::run(&plan, Vec::new(), &|_, _| Flow::Continue, &cancel).unwrap();
        let result = sweep::summarize(&plan, &units);
        let metric = plan.spec.metric;
        *per_metric.entry(metric.as_str()).or_insert(0) += 1;
        for score in &result.scores {
            let options = score.setting.options.check(task).unwrap();
            for (si, split) in plan.folds.splits.iter().enumerate() {
                let set = TrainSet { frame: &plan.data.frame, target: &plan.data.target, target_name: "y", rows: Some(&split.train), weights: None };
                let tree = fit(&set, &options).unwrap();
                let valid = row_score(plan.spec.scoring(), &tree, &plan.data, &split.valid);
                let train = row_score(plan.spec.scoring(), &tree, &plan.data, &split.train);
                let ctx = || format!("case {cases}, {name}, metric {metric}, split {si}, setting {:?}", score.setting.options);
                assert!(close(metric, score.fold_scores[si], valid), "validation {} vs refit {valid}: {}", score.fold_scores[si], ctx());
                let unit = units.iter().find(|u| plan.units[u.unit].0 == si && u.scores.iter().any(|(s, _)| plan.settings[*s] == score.setting)).unwrap();
                let fs = &unit.scores.iter().find(|(s, _)| plan.settings[*s] == score.setting).unwrap().1;
                assert!(close(metric, fs.train, train), "training {} vs refit {train}: {}", fs.train, ctx());
                assert_eq!(fs.leaves as usize, tree.n_leaves(), "leaves: {}", ctx());
                assert_eq!(fs.depth, tree.depth(), "depth: {}", ctx());
                compared += 1;
            }
        }
        *per_scheme.entry(name).or_insert(0) += 1;
        cases += 1;
    }
    eprintln!("sweep_equivalence: {cases} cases ({path_cases} in pruning-path mode), {compared} setting × split scores compared; cases per fold plan: {per_scheme:?}; per metric: {per_metric:?}");
    assert!(per_metric.get("expected_cost").is_some_and(|&n| n >= 5), "expected_cost must be exercised: {per_metric:?}");
    assert!(path_cases >= 10, "pruning-path mode must be exercised");
    assert!(per_scheme.len() >= 7, "every fold plan must be exercised: {per_scheme:?}");
}
