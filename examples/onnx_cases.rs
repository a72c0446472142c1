//! Writes the inputs of the ONNX cross-check (`tests/reference/check_onnx.sh`): for each case,
//! a tree fitted by pollard on a dataset from `tests/data` (sources and licences in
//! `tests/data/SOURCES.md`), exported with `pollard::export::to_onnx`, the feature matrix as
//! the ONNX model takes it, and pollard's own predictions for those rows.
//!
//!     cargo run --release --example onnx_cases -- OUTDIR
//!
//! Per case, `OUTDIR/<case>/`:
//! - `model.onnx`
//! - `inputs.csv`: header = feature names; one row per example, every cell the float32 the
//!   model reads (numeric value, or a categorical column's code), written as the shortest
//!   decimal of that value widened to f64 so it parses back exactly; `nan` = missing.
//! - `predictions.csv`: pollard's predictions for the same rows: classify `label` (class
//!   index) and `p_0..p_{k-1}`; regress `value`.
//! - `case.json`: task, counts, and what the case exercises.
//!
//! Rows: the training rows, then probe rows (copies of the first rows with one cell made
//! missing each, cycling through the columns) and, for categorical columns, rows with codes
//! the training data never had (`levels.len()` and -1).

use std::fmt::Write as _;
use std::fs::File;
use std::path::{Path, PathBuf};

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::data::{Column, Dataset, Frame, MISSING_CODE};
use pollard::sweep::costs::Costs;
use pollard::sweep::{self, Flow, Range, SweepSpec};
use pollard::tree::{fit, ClassWeight, FitOptions, Limits, Predictions, SplitRule, TrainSet, Tree};

struct Case {
    name: &'static str,
    file: &'static str,
    categorical: &'static [&'static str],
    /// Every `n`-th training cell of the categorical columns is blanked (0 = none).
    blank_every: usize,
    options: FitOptions,
    /// Decision costs (false alarm, miss): the tree is then the refit of a sweep's picked
    /// setting, with the decision threshold chosen on the sweep's validation folds.
    costs: Option<(f64, f64)>,
    about: &'static str,
}

fn limited(max_depth: Option<u32>, min_leaf_rows: u32, class_weight: ClassWeight) -> FitOptions {
    FitOptions { limits: Limits { max_depth, min_leaf_rows, ..Limits::default() }, class_weight, ..FitOptions::default() }
}

fn cases() -> Vec<Case> {
    let full = FitOptions::default;
    vec![
        Case { name: "iris", file: "iris.csv", categorical: &[], blank_every: 0, options: full(), costs: None, about: "open dataset, 3 classes, grown without limits" },
        Case { name: "wine", file: "wine.csv", categorical: &[], blank_every: 0, options: full(), costs: None, about: "open dataset, 3 classes, grown without limits" },
        Case { name: "breast_cancer", file: "breast_cancer.csv", categorical: &[], blank_every: 0, options: full(), costs: None, about: "open dataset, 2 classes, grown without limits" },
        Case { name: "breast_cancer_balanced_d4", file: "breast_cancer.csv", categorical: &[], blank_every: 0, options: limited(Some(4), 5, ClassWeight::Balanced), costs: None, about: "open dataset, 2 classes, balanced class weight, max_depth 4, min_leaf_rows 5" },
        Case { name: "diabetes", file: "diabetes.csv", categorical: &[], blank_every: 0, options: full(), costs: None, about: "open dataset, regression, grown without limits" },
        Case { name: "diabetes_d0", file: "diabetes.csv", categorical: &[], blank_every: 0, options: limited(Some(0), 1, ClassWeight::None), costs: None, about: "open dataset, regression, max_depth 0 (a single leaf)" },
        Case { name: "synthetic_missing", file: "synthetic_missing.csv", categorical: &[], blank_every: 0, options: full(), costs: None, about: "SYNTHETIC (tests/data/SOURCES.md), 2 classes, missing cells in 3 columns" },
        Case { name: "synthetic_missing_reg", file: "synthetic_missing_reg.csv", categorical: &[], blank_every: 0, options: limited(Some(8), 3, ClassWeight::None), costs: None, about: "SYNTHETIC (tests/data/SOURCES.md), regression, missing cells in 3 columns, max_depth 8, min_leaf_rows 3" },
        Case {
            name: "breast_cancer_costs",
            file: "breast_cancer.csv",
            categorical: &[],
            blank_every: 0,
            options: full(),
            costs: Some((1.0, 5.0)),
            about: "open dataset, 2 classes, decision costs false_alarm 1, miss 5: a sweep over max_depth 1..6 and min_leaf_rows 1,5,20 (stratified 5-fold, seed 7), the picked setting refit with the threshold chosen on the validation folds; label is p(class 1) >= threshold",
        },
        Case {
            name: "iris_categorical",
            file: "iris.csv",
            categorical: &["petal_width_cm"],
            blank_every: 10,
            options: full(),
            costs: None, about: "derived from the open iris dataset: petal_width_cm read as a categorical column (22 categories) and every 10th row's cell blanked",
        },
        Case {
            name: "diabetes_categorical",
            file: "diabetes.csv",
            categorical: &["sex", "s4"],
            blank_every: 7,
            options: limited(Some(10), 2, ClassWeight::None),
            costs: None, about: "derived from the open diabetes dataset: sex (2) and s4 (66 categories) read as categorical, every 7th row's cells in them blanked; max_depth 10, min_leaf_rows 2",
        },
    ]
}

/// Copies of the first rows with one cell missing each, and (categorical columns) unseen codes.
fn probes(frame: &Frame) -> Frame {
    let n = frame.rows.min(24);
    let mut probe = frame.take_rows(&(0..n as u32).collect::<Vec<_>>());
    let f = probe.features.len();
    for r in 0..n {
        let c = r % f;
        match &mut probe.features[c].column {
            Column::Numeric(v) => v[r] = f32::NAN,
            Column::Categorical { codes, .. } => codes[r] = MISSING_CODE,
        }
    }
    probe
}

/// The float32 cell the ONNX model reads; unseen categorical codes are set by the caller.
fn cell(column: &Column, row: usize) -> f32 {
    match column {
        Column::Numeric(v) => v[row],
        Column::Categorical { codes, .. } if codes[row] == MISSING_CODE => f32::NAN,
        Column::Categorical { codes, .. } => codes[row] as f32,
    }
}

fn fmt(x: f32) -> String {
    if x.is_nan() {
        "nan".into()
    } else {
        format!("{:?}", x as f64)
    }
}

fn write_rows(tree: &Tree, frame: &Frame, overrides: &[(usize, usize, f32)], inputs: &mut String, preds: &mut String) {
    for r in 0..frame.rows {
        let cells: Vec<String> = frame.features.iter().enumerate().map(|(c, f)| fmt(overrides.iter().find(|o| o.0 == r && o.1 == c).map_or_else(|| cell(&f.column, r), |o| o.2))).collect();
        writeln!(inputs, "{}", cells.join(",")).unwrap();
    }
    match tree.predict(frame) {
        Predictions::Classes { classes, probabilities } => {
            let k = tree.n_classes;
            for (r, c) in classes.iter().enumerate() {
                let p: Vec<String> = probabilities[r * k..(r + 1) * k].iter().map(|x| format!("{x:?}")).collect();
                writeln!(preds, "{c},{}", p.join(",")).unwrap();
            }
        }
        Predictions::Values(v) => {
            for x in v {
                writeln!(preds, "{x:?}").unwrap();
            }
        }
    }
}

fn run_case(case: &Case, data_dir: &Path, out: &Path) -> Result<String, String> {
    let mut opts = CsvOptions::new("target");
    opts.categorical = case.categorical.iter().map(|s| s.to_string()).collect();
    let path = data_dir.join(case.file);
    let mut data: Dataset = read_dataset(File::open(&path).map_err(|e| format!("{}: {e}", path.display()))?, &opts).map_err(|e| format!("{}: {e:?}", path.display()))?;
    if case.blank_every > 0 {
        for f in &mut data.frame.features {
            if let Column::Categorical { codes, .. } = &mut f.column {
                for (r, c) in codes.iter_mut().enumerate() {
                    if r % case.blank_every == case.blank_every / 2 {
                        *c = MISSING_CODE;
                    }
                }
            }
        }
    }
    let tree = match case.costs {
        None => {
            let checked = case.options.check(data.task()).map_err(|e| format!("{}: {e:?}", case.name))?;
            fit(&TrainSet::of(&data), &checked).map_err(|e| format!("{}: {e:?}", case.name))?
        }
        Some((false_alarm, miss)) => {
            let spec = SweepSpec {
                max_depth: Some(Range::Span { from: 1.0, to: 6.0, step: 1.0 }),
                min_leaf_rows: Some(Range::Values(vec![Some(1.0), Some(5.0), Some(20.0)])),
                seed: 7,
                costs: Some(Costs { false_alarm, miss }),
                ..SweepSpec::default()
            };
            let cancel = std::sync::atomic::AtomicBool::new(false);
            let (_, result) = sweep::sweep(&data, &spec, &|_, _| Flow::Continue, &cancel).map_err(|e| format!("{}: {e}", case.name))?;
            let tree = result.model.ok_or("the sweep refit no model")?;
            let d = tree.decision.ok_or("the refit has no decision")?;
            println!("onnx_cases: {}: decision threshold {} (Bayes {}), {} leaves", case.name, d.threshold, false_alarm / (false_alarm + miss), tree.n_leaves());
            tree
        }
    };
    let onnx = pollard::export::to_onnx(&tree)?;
    let dir = out.join(case.name);
    std::fs::create_dir_all(&dir).map_err(|e| format!("{}: {e}", dir.display()))?;
    std::fs::write(dir.join("model.onnx"), &onnx).map_err(|e| e.to_string())?;

    let names: Vec<&str> = data.frame.features.iter().map(|f| f.name.as_str()).collect();
    let mut inputs = format!("{}\n", names.join(","));
    let mut preds = match tree.n_classes {
        0 => "value\n".to_string(),
        k => format!("label,{}\n", (0..k).map(|i| format!("p_{i}")).collect::<Vec<_>>().join(",")),
    };
    write_rows(&tree, &data.frame, &[], &mut inputs, &mut preds);
    let probe = probes(&data.frame);
    write_rows(&tree, &probe, &[], &mut inputs, &mut preds);
    let mut rows = data.frame.rows + probe.rows;
    // Unseen categories: pollard routes code `levels.len()` (and beyond) like a missing cell;
    // the ONNX input gets that code and -1.
    let mut unseen_rows = 0;
    for (c, f) in data.frame.features.iter().enumerate() {
        if let Column::Categorical { levels, .. } = &f.column {
            let mut frame = data.frame.take_rows(&[0, 1]);
            if let Column::Categorical { codes, .. } = &mut frame.features[c].column {
                codes[0] = levels.len() as u32;
                codes[1] = levels.len() as u32;
            }
            write_rows(&tree, &frame, &[(1, c, -1.0)], &mut inputs, &mut preds);
            rows += 2;
            unseen_rows += 2;
        }
    }
    std::fs::write(dir.join("inputs.csv"), inputs).map_err(|e| e.to_string())?;
    std::fs::write(dir.join("predictions.csv"), preds).map_err(|e| e.to_string())?;
    let set_splits = tree.nodes.iter().filter(|n| matches!(n.split.as_ref().map(|s| &s.rule), Some(SplitRule::Categories(_)))).count();
    let onnx_nodes = pollard::export::onnx::ensemble(&tree)?.node_ids.len();
    let info = serde_json::json!({
        "case": case.name,
        "file": case.file,
        "about": case.about,
        "task": tree.task.as_str(),
        "n_classes": tree.n_classes,
        "n_features": tree.n_features,
        "rows": rows,
        "training_rows": data.frame.rows,
        "probe_rows": probe.rows,
        "unseen_category_rows": unseen_rows,
        "tree_nodes": tree.nodes.len(),
        "tree_leaves": tree.n_leaves(),
        "set_splits": set_splits,
        "onnx_nodes": onnx_nodes,
        "onnx_bytes": onnx.len(),
        "decision_threshold": tree.decision.map(|d| d.threshold),
    });
    std::fs::write(dir.join("case.json"), format!("{info:#}\n")).map_err(|e| e.to_string())?;
    Ok(format!("{}: {} rows, {} tree nodes ({} set splits) -> {} ONNX nodes", case.name, rows, tree.nodes.len(), set_splits, onnx_nodes))
}

fn main() {
    let Some(out) = std::env::args_os().nth(1).map(PathBuf::from) else {
        eprintln!("usage: onnx_cases OUTDIR");
        std::process::exit(2);
    };
    let data_dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data");
    for case in cases() {
        match run_case(&case, &data_dir, &out) {
            Ok(line) => println!("onnx_cases: {line}"),
            Err(e) => {
                eprintln!("onnx_cases: {}: {e}", case.name);
                std::process::exit(1);
            }
        }
    }
}
