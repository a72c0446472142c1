//! The shared growth must give every setting the fold scores that fitting that setting on its
//! own and scoring row by row gives: exactly for metrics that count rows, to 1e-12 relative
//! for metrics that sum floating-point terms. Random datasets (both tasks, missing cells,
//! categorical columns) and random grids, over every fold plan; seeded, so a failure repeats.
//! And the open datasets of tests/data (see SOURCES.md there) with many `min_leaf_rows`
//! values, whose envelopes grow together (one scan per node and feature for all values).
//! Every pick rule and the Pareto front chosen from the sweep's table equal those chosen
//! from the refits' table.

use std::path::PathBuf;
use std::sync::atomic::AtomicBool;

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::data::{Column, Dataset, Feature, Frame, Target, Task, MISSING_CODE};
use pollard::sweep::costs::Costs;
use pollard::sweep::metrics::{rows, Scoring};
use pollard::sweep::{self, FoldPlan, FoldScheme, Flow, Metric, PickRule, Range, SweepSpec};
use pollard::tree::{fit, ClassWeight, Criterion, Monotone, Predictions, TrainSet};

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
        pick: match g.below(4) {
            0 => PickRule::Highest,
            1 => PickRule::OneSe,
            2 => PickRule::MaxLeavesBudget(1 + g.below(8) as u32),
            _ => PickRule::Within(g.below(5) as f64 * 0.01),
        },
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

/// Runs the plan and checks every setting × split score against a refit of that setting on
/// the split's training rows, scored row by row; returns how many were compared.
fn sweep_equals_refits(plan: &sweep::Plan, label: &str) -> usize {
    let cancel = AtomicBool::new(false);
    let units = sweep::run(plan, Vec::new(), &|_, _| Flow::Continue, &cancel).unwrap();
    let result = sweep::summarize(plan, &units);
    let metric = plan.spec.metric;
    let task = plan.data.task();
    let mut compared = 0;
    // The setting table as the refits give it, for the pick rules below.
    let mut refit_table = Vec::with_capacity(result.scores.len());
    for score in &result.scores {
        let options = score.setting.options.check(task).unwrap();
        let (mut valids, mut trains, mut leaves, mut depths) = (Vec::new(), Vec::new(), 0.0, 0.0);
        for (si, split) in plan.folds.splits.iter().enumerate() {
            let set = TrainSet { frame: &plan.data.frame, target: &plan.data.target, target_name: "y", rows: Some(&split.train), weights: None };
            let tree = fit(&set, &options).unwrap();
            let valid = row_score(plan.spec.scoring(), &tree, &plan.data, &split.valid);
            let train = row_score(plan.spec.scoring(), &tree, &plan.data, &split.train);
            let ctx = || format!("{label}, metric {metric}, split {si}, setting {:?}", score.setting.options);
            assert!(close(metric, score.fold_scores[si], valid), "validation {} vs refit {valid}: {}", score.fold_scores[si], ctx());
            let unit = units.iter().find(|u| plan.units[u.unit].0 == si && u.scores.iter().any(|(s, _)| plan.settings[*s] == score.setting)).unwrap();
            let fs = &unit.scores.iter().find(|(s, _)| plan.settings[*s] == score.setting).unwrap().1;
            assert!(close(metric, fs.train, train), "training {} vs refit {train}: {}", fs.train, ctx());
            assert_eq!(fs.leaves as usize, tree.n_leaves(), "leaves: {}", ctx());
            assert_eq!(fs.depth, tree.depth(), "depth: {}", ctx());
            compared += 1;
            valids.push(valid);
            trains.push(train);
            leaves += tree.n_leaves() as f64;
            depths += tree.depth() as f64;
        }
        refit_table.push(setting_score(score.setting.clone(), valids, &trains, leaves, depths, metric));
    }
    picks_equal_refit_picks(plan, &result, &refit_table, label);
    compared
}

/// A setting's row of the table from its per-split scores (mean; sample sd, ddof = 1; the
/// gap oriented so that positive means training scores better), as the pick rules read it.
fn setting_score(setting: sweep::Setting, valids: Vec<f64>, trains: &[f64], leaves: f64, depths: f64, metric: Metric) -> sweep::SettingScore {
    let n = valids.len() as f64;
    let valid_mean = valids.iter().sum::<f64>() / n;
    let valid_sd = if valids.len() > 1 { (valids.iter().map(|v| (v - valid_mean).powi(2)).sum::<f64>() / (n - 1.0)).sqrt() } else { 0.0 };
    let train_mean = trains.iter().sum::<f64>() / n;
    let gap = if metric.higher_is_better() { train_mean - valid_mean } else { valid_mean - train_mean };
    sweep::SettingScore { setting, fold_scores: valids, valid_mean, valid_sd, train_mean, gap, mean_leaves: leaves / n, mean_depth: depths / n }
}

/// Every pick rule (the spec's own, best, one standard error, leaf budgets, score
/// tolerances) and the Pareto front chosen from the sweep's table equal those chosen from
/// the refits' table. The tables agree to 1e-12 relative for metrics that sum floats, so
/// both are read with their scores rounded to 10 significant digits: settings whose scores
/// tie but for rounding tie exactly in both, and the rules' tie-breaking decides alike.
fn picks_equal_refit_picks(plan: &sweep::Plan, result: &sweep::SweepResult, refits: &[sweep::SettingScore], label: &str) {
    let metric = plan.spec.metric;
    let snap = |x: f64| {
        if x == 0.0 || !x.is_finite() {
            return x;
        }
        let scale = 10f64.powi(9 - x.abs().log10().floor() as i32);
        (x * scale).round() / scale
    };
    let rounded = |table: &[sweep::SettingScore]| -> Vec<sweep::SettingScore> {
        table.iter().map(|s| sweep::SettingScore { valid_mean: snap(s.valid_mean), valid_sd: snap(s.valid_sd), ..s.clone() }).collect()
    };
    let (ours_table, refit_table) = (rounded(&result.scores), rounded(refits));
    let (lo, hi) = refits.iter().fold((f64::INFINITY, 0.0f64), |(lo, hi), s| (lo.min(s.mean_leaves), hi.max(s.mean_leaves)));
    let spread = refits.iter().map(|s| s.valid_mean).filter(|v| v.is_finite()).fold(0.0f64, |m, v| m.max(v.abs()));
    let mut rules = vec![plan.spec.spec.pick, PickRule::Highest, PickRule::OneSe, PickRule::Within(0.0), PickRule::Within(snap(0.05 * spread))];
    for budget in [lo.floor(), ((lo + hi) / 2.0).floor(), hi.ceil()] {
        rules.push(PickRule::MaxLeavesBudget(budget.max(0.0) as u32));
    }
    for rule in rules {
        let (ours, theirs) = (sweep::pick(&ours_table, rule, metric), sweep::pick(&refit_table, rule, metric));
        assert_eq!(ours, theirs, "{label}: rule {} picks setting {ours} from the sweep, {theirs} from the refits", rule.as_str());
    }
    assert_eq!(result.picked, sweep::pick(&result.scores, plan.spec.spec.pick, metric), "{label}: the run's pick is its rule's");
    assert_eq!(sweep::pareto_front(&ours_table, metric), sweep::pareto_front(&refit_table, metric), "{label}: Pareto fronts");
}

/// The open datasets (and our two synthetic sets with missing cells, once with some columns
/// read as categorical), eight `min_leaf_rows` values from 1 to 50, both criteria and both
/// class weightings: every unit of a split and criterion × weighting grows in one group of
/// eight, and every setting still scores exactly as its refit does.
#[test]
fn many_min_leaf_rows_values_grow_together_on_open_datasets() {
    let cases: [(&str, &[&str], Metric); 8] = [
        ("iris.csv", &[], Metric::Accuracy),
        ("wine.csv", &[], Metric::LogLoss),
        ("breast_cancer.csv", &[], Metric::BalancedAccuracy),
        ("diabetes.csv", &[], Metric::Rmse),
        ("synthetic_missing.csv", &[], Metric::Accuracy),
        ("synthetic_missing.csv", &["grade", "flag", "n_events"], Metric::Brier),
        ("synthetic_missing_reg.csv", &[], Metric::Mae),
        ("synthetic_missing_reg.csv", &["grade", "n_events"], Metric::R2),
    ];
    let mut compared = 0;
    for (file, categorical, metric) in cases {
        compared += open_dataset_case(file, categorical, metric, &[]);
    }
    eprintln!("sweep_equivalence: {compared} setting × split scores compared on the open datasets");
}

/// The same under monotone limits (some features limited each way): the trees of a shared
/// node share its bounds, and every setting scores exactly as its refit under the limits.
#[test]
fn monotone_limits_grow_together_on_open_datasets() {
    use Monotone::{Decreasing, Increasing};
    let cases: [(&str, &[(&str, Monotone)], Metric); 4] = [
        ("diabetes.csv", &[("bmi", Increasing), ("s3", Decreasing), ("s5", Increasing)], Metric::Rmse),
        ("breast_cancer.csv", &[("mean_radius", Increasing), ("worst_texture", Decreasing)], Metric::Brier),
        ("synthetic_missing.csv", &[("grade", Increasing), ("x_norm", Decreasing)], Metric::Accuracy),
        ("synthetic_missing_reg.csv", &[("grade", Increasing), ("n_events", Increasing), ("x_norm", Decreasing)], Metric::Mae),
    ];
    let mut compared = 0;
    for (file, limits, metric) in cases {
        compared += open_dataset_case(file, &[], metric, limits);
    }
    eprintln!("sweep_equivalence: {compared} setting × split scores compared under monotone limits");
}

/// One open dataset's sweep of eight `min_leaf_rows` values (grown in groups of eight),
/// checked setting by setting against refits; the number of scores compared.
fn open_dataset_case(file: &str, categorical: &[&str], metric: Metric, monotone: &[(&str, Monotone)]) -> usize {
    let data_dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/data");
    let msl = [1.0, 2.0, 3.0, 5.0, 8.0, 13.0, 20.0, 50.0];
    {
        let mut options = CsvOptions::new("target");
        options.categorical = categorical.iter().map(|c| c.to_string()).collect();
        let data = read_dataset(std::fs::File::open(data_dir.join(file)).unwrap(), &options).unwrap();
        let classify = data.task() == Task::Classify;
        let spec = SweepSpec {
            criteria: if classify { vec![Criterion::Gini, Criterion::Entropy] } else { vec![] },
            class_weights: if classify { vec![ClassWeight::None, ClassWeight::Balanced] } else { vec![] },
            max_depth: Some(Range::Values(vec![None, Some(2.0), Some(4.0)])),
            min_split_rows: Some(Range::Values(vec![Some(2.0), Some(30.0)])),
            min_leaf_rows: Some(Range::Values(msl.iter().map(|&m| Some(m)).collect())),
            max_leaves: Some(Range::Values(vec![None, Some(6.0)])),
            min_gain: Some(Range::Values(vec![Some(0.0)])),
            prune_alpha: Some(Range::Values(vec![Some(0.0), Some(0.01)])),
            folds: Some(FoldPlan { scheme: FoldScheme::Shuffled, k: 3, repeats: 1 }),
            metric: Some(metric),
            seed: 7,
            fit_final: false,
            monotone: monotone.iter().map(|(f, m)| (f.to_string(), *m)).collect(),
            ..SweepSpec::default()
        };
        let plan = sweep::plan(&data, &spec).unwrap();
        assert_eq!(plan.settings.iter().filter(|s| s.options.monotone.is_empty()).count(), if monotone.is_empty() { plan.settings.len() } else { 0 }, "{file}: every setting carries the limits");
        let all: Vec<usize> = (0..plan.units.len()).collect();
        let groups = plan.growth_groups(&all);
        assert_eq!(groups.len(), plan.units.len() / msl.len(), "{file}: units grow in groups of eight");
        assert!(groups.iter().all(|g| g.len() == msl.len()), "{file}: {groups:?}");
        let label = format!("{file} {categorical:?} {monotone:?}");
        schedules_agree(&plan, &label);
        sweep_equals_refits(&plan, &label)
    }
}

/// Scoring the growth groups one at a time (as the sweep of a big table does) gives exactly
/// the unit results of scoring them in parallel (as a small table's sweep does).
fn schedules_agree(plan: &sweep::Plan, label: &str) {
    let cancel = AtomicBool::new(false);
    let run = |one_at_a_time: bool| {
        let plan = sweep::Plan { groups_one_at_a_time: one_at_a_time, ..plan.clone() };
        sweep::run(&plan, Vec::new(), &|_, _| Flow::Continue, &cancel).unwrap()
    };
    let (one, all) = (run(true), run(false));
    assert_eq!(one.len(), plan.units.len(), "{label}");
    // Compared as text: every float written in full (shortest round trip), NaN equal to NaN.
    assert!(format!("{one:?}") == format!("{all:?}"), "{label}: the two schedules give different unit results");
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
        *per_metric.entry(plan.spec.metric.as_str()).or_insert(0) += 1;
        compared += sweep_equals_refits(&plan, &format!("case {cases}, {name}"));
        *per_scheme.entry(name).or_insert(0) += 1;
        cases += 1;
    }
    eprintln!("sweep_equivalence: {cases} cases ({path_cases} in pruning-path mode), {compared} setting × split scores compared; cases per fold plan: {per_scheme:?}; per metric: {per_metric:?}");
    assert!(per_metric.get("expected_cost").is_some_and(|&n| n >= 5), "expected_cost must be exercised: {per_metric:?}");
    assert!(path_cases >= 10, "pruning-path mode must be exercised");
    assert!(per_scheme.len() >= 7, "every fold plan must be exercised: {per_scheme:?}");
}
