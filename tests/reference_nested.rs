//! Nested cross-validation against the reference library's own nested loop (scikit-learn
//! 1.9.1: GridSearchCV with refit on each outer split's training rows, the refit tree scored
//! on the outer validation rows), golden files written by
//! `tests/reference/make_nested_golden.py` from the open datasets in `tests/data/` (sources
//! in `tests/data/SOURCES.md`).
//!
//! Both sides use pollard's folds: `tests/reference/golden/nested_folds_<dataset>.csv`
//! (`pollard folds --outer-k 5`), which this test first checks pollard still assigns. Then
//! one nested sweep per dataset over the golden grid, and for every outer split the golden
//! file calls `comparable` (the reference's five random states agree on the pick and on the
//! picked tree's outer predictions, so its answer does not hang on how it breaks equal
//! splits):
//! - pollard's inner best score equals the reference's best `mean_test_score` (1e-12 relative);
//! - pollard picks the reference's setting, or one the reference scored exactly as well
//!   (settings that grow the same tree tie; GridSearchCV takes the first in grid order,
//!   pollard the simpler tree first);
//! - when the picks agree, the outer score equals the reference's (1e-12 relative).
//!
//! At least 10 comparable outer splits over the four datasets are required (13 at the time
//! of writing), so the check cannot pass by finding nothing to compare.

use std::fs::File;
use std::path::PathBuf;
use std::sync::atomic::AtomicBool;

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::sweep::{self, Flow, FoldPlan, Metric, Range, SweepSpec};
use serde_json::Value;

const REL: f64 = 1e-12;

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn close(a: f64, b: f64) -> bool {
    a == b || (a - b).abs() <= REL * a.abs().max(b.abs())
}

/// A grid value: a number, or null for "no limit".
fn values(v: &Value) -> Vec<Option<f64>> {
    v.as_array().unwrap().iter().map(Value::as_f64).collect()
}

#[test]
fn nested_sweeps_agree_with_the_reference_nested_loop() {
    let mut comparable = 0;
    let mut same_pick = 0;
    for name in ["wine", "iris", "breast_cancer", "diabetes"] {
        let golden: Value = serde_json::from_reader(File::open(root().join(format!("tests/reference/golden/nested_{name}.json"))).unwrap()).unwrap();
        let data = read_dataset(File::open(root().join(golden["file"].as_str().unwrap())).unwrap(), &CsvOptions::new("target")).unwrap();
        let metric = Metric::parse(golden["metric"].as_str().unwrap()).unwrap();
        let grid = &golden["grid"];
        let spec = SweepSpec {
            max_depth: Some(Range::Values(values(&grid["max_depth"]))),
            min_leaf_rows: Some(Range::Values(values(&grid["min_leaf_rows"]))),
            metric: Some(metric),
            seed: golden["folds"]["seed"].as_u64().unwrap(),
            fit_final: false,
            outer: Some(FoldPlan::default_for(data.task())),
            ..Default::default()
        };
        let plan = sweep::plan(&data, &spec).unwrap();

        // The folds are the ones the golden file was made with.
        let nested = plan.nested.as_ref().expect("a nested plan");
        let mut text = String::from("outer_repeat,outer_fold,row,repeat,fold\n");
        for (o, f) in nested.outer.splits.iter().zip(&nested.inner) {
            for (rep, fold_of) in f.assignment.iter().enumerate() {
                for (row, fold) in fold_of.iter().enumerate() {
                    text.push_str(&format!("{},{},{},{rep},{fold}\n", o.repeat, o.fold, row + 1));
                }
            }
        }
        let committed = std::fs::read_to_string(root().join(golden["folds"]["file"].as_str().unwrap())).unwrap();
        assert!(text == committed, "{name}: pollard no longer assigns the nested folds of the golden file");

        let units = sweep::run(&plan, Vec::new(), &|_, _| Flow::Continue, &AtomicBool::new(false)).unwrap();
        let result = sweep::summarize(&plan, &units).nested.expect("a nested result");
        let outer = golden["outer_splits"].as_array().unwrap();
        assert_eq!(result.folds.len(), outer.len(), "{name}");
        for g in outer {
            let (rep, fold) = (g["outer_repeat"].as_u64().unwrap() as u32, g["outer_fold"].as_u64().unwrap() as u32);
            let mine = result.folds.iter().find(|f| (f.repeat, f.fold) == (rep, fold)).unwrap();
            if !g["comparable"].as_bool().unwrap() {
                continue;
            }
            comparable += 1;
            let at = format!("{name}, outer split {rep}.{fold}");
            let inner_best = g["inner_best"].as_f64().unwrap();
            assert!(close(mine.inner_best, inner_best), "{at}: inner best {} vs the reference's {inner_best}", mine.inner_best);
            // The setting pollard picked, among the reference's grid (same order: max_depth,
            // then min_leaf_rows).
            let limits = &plan.settings[mine.picked].options.limits;
            let picked = &g["picked"];
            let same = limits.max_depth.map(f64::from) == picked["max_depth"].as_f64() && Some(f64::from(limits.min_leaf_rows)) == picked["min_leaf_rows"].as_f64();
            let reference_mean_of_mine = g["inner_means"][mine.picked].as_f64().unwrap();
            assert!(same || close(reference_mean_of_mine, inner_best), "{at}: pollard picked grid# {} ({limits:?}), which the reference scored {reference_mean_of_mine}, not its best {inner_best}", mine.picked);
            if same {
                same_pick += 1;
                let outer_score = g["outer_score"].as_f64().unwrap();
                assert!(close(mine.outer_score, outer_score), "{at}: outer {} vs the reference's {outer_score}", mine.outer_score);
            }
        }
        println!("{name}: outer mean {:.6} ± {:.6}, optimism {:+.6}", result.outer_mean, result.outer_sd, result.optimism);
    }
    println!("{comparable} comparable outer splits, {same_pick} with the same pick");
    assert!(comparable >= 10, "only {comparable} comparable outer splits");
    assert!(same_pick * 2 >= comparable, "only {same_pick} of {comparable} comparable outer splits picked the reference's setting");
}
