//! Sweep benchmark: times one pollard sweep (plan, run, summarize) over a grid of limits on a
//! CSV file and prints one JSON line. `benches/compare.sh` runs it next to the reference
//! library's grid search on the same data, folds and grid; see `benches/README.md`.
//!
//! ```sh
//! cargo bench --bench sweep -- CSV [LIMIT=V,V,..]... [seed=N] [k=K] [repeats=N] [folds=FILE] [out=FILE]
//! ```
//!
//! LIMIT is `max_depth`, `min_split_rows`, `min_leaf_rows` or `max_leaves`; each value is a
//! whole number or `none` (no limit; `max_depth` and `max_leaves` only). A limit not given
//! keeps its default single value. The fold plan is stratified, `k` folds (default 5), seeded
//! with `seed` (default 0); the metric is accuracy; the target column is `outcome` (override
//! with `POLLARD_BENCH_TARGET`) and is read as a classify target.
//!
//! Timed: `plan` + `run` + `summarize` (no refit of the picked setting), on rayon's default
//! pool, `repeats` times (default 3, or `POLLARD_BENCH_REPEATS`); the median is reported.
//! Reading the file is not timed. The bench fails if two repeats give different scores.
//! With `folds=FILE` (the CSV `row,repeat,fold` printed by `pollard folds`), it also fails
//! unless the sweep's fold assignment is exactly the one in FILE, so a caller that hands that
//! file to another tool knows both use the same folds. With `out=FILE` every setting's limits
//! and `valid_mean` go to FILE (one JSON object per line, in grid order) instead of into the
//! printed line. Without a file (as a plain `cargo bench` runs it) the program prints its
//! usage and exits 0: it makes no data of its own.

use std::fs::File;
use std::hint::black_box;
use std::io::{BufRead, BufReader, BufWriter, Write};
use std::process::ExitCode;
use std::sync::atomic::AtomicBool;
use std::time::Instant;

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::data::Task;
use pollard::sweep::{self, Flow, FoldPlan, FoldScheme, Metric, Range, SweepResult, SweepSpec};
use serde_json::{json, Value};

const USAGE: &str = "usage: cargo bench --bench sweep -- CSV [LIMIT=V,V,..]... [seed=N] [k=K] [repeats=N] [folds=FILE] [out=FILE]
LIMIT is max_depth, min_split_rows, min_leaf_rows or max_leaves; a value is a whole number or
'none' (no limit). The target column is 'outcome' unless POLLARD_BENCH_TARGET names another;
folds are stratified (k folds, default 5, seeded with seed, default 0); the metric is accuracy.
Make data with: python benches/make_fit_data.py OUTDIR ROWS   (use fit_classify.csv)
Prints one JSON line: median seconds of plan + run + summarize, runs, settings, threads, and
every setting's limits and valid_mean (written to FILE instead with out=FILE).";

const LIMITS: [&str; 4] = ["max_depth", "min_split_rows", "min_leaf_rows", "max_leaves"];

fn median(times: &[f64]) -> f64 {
    let mut t = times.to_vec();
    t.sort_by(|a, b| a.total_cmp(b));
    let n = t.len();
    if n % 2 == 1 {
        t[n / 2]
    } else {
        (t[n / 2 - 1] + t[n / 2]) / 2.0
    }
}

/// `2,4,none` -> values of a range; `none` is "no limit".
fn parse_values(name: &str, text: &str) -> Result<Range, String> {
    let mut out = Vec::new();
    for part in text.split(',') {
        let part = part.trim();
        if part.eq_ignore_ascii_case("none") {
            out.push(None);
        } else {
            let v: u32 = part.parse().map_err(|_| format!("{name}: '{part}' is not a whole number or 'none'"))?;
            out.push(Some(v as f64));
        }
    }
    Ok(Range::Values(out))
}

/// The fold column of a `pollard folds` file (`row,repeat,fold`, repeat 0 only).
fn read_folds(path: &str) -> Result<Vec<i32>, String> {
    let f = File::open(path).map_err(|e| format!("cannot open {path}: {e}"))?;
    let mut out = Vec::new();
    for (i, line) in BufReader::new(f).lines().enumerate() {
        let line = line.map_err(|e| format!("{path}: {e}"))?;
        if i == 0 {
            if line.trim() != "row,repeat,fold" {
                return Err(format!("{path}: header is '{line}', expected 'row,repeat,fold'"));
            }
            continue;
        }
        let cells: Vec<&str> = line.split(',').collect();
        let bad = || format!("{path} line {}: '{line}' is not row,repeat,fold", i + 1);
        if cells.len() != 3 {
            return Err(bad());
        }
        let row: usize = cells[0].parse().map_err(|_| bad())?;
        let repeat: u32 = cells[1].parse().map_err(|_| bad())?;
        let fold: i32 = cells[2].parse().map_err(|_| bad())?;
        if repeat != 0 || row != out.len() + 1 {
            return Err(format!("{path} line {}: expected row {} of repeat 0", i + 1, out.len() + 1));
        }
        out.push(fold);
    }
    Ok(out)
}

fn limit_json(v: Option<u32>) -> Value {
    v.map_or(Value::Null, |x| json!(x))
}

/// One JSON object per setting, in grid order.
fn score_rows(result: &SweepResult) -> Vec<Value> {
    result
        .scores
        .iter()
        .map(|s| {
            let l = &s.setting.options.limits;
            json!({
                "max_depth": limit_json(l.max_depth),
                "min_split_rows": l.min_split_rows,
                "min_leaf_rows": l.min_leaf_rows,
                "max_leaves": limit_json(l.max_leaves),
                "valid_mean": s.valid_mean,
            })
        })
        .collect()
}

fn main() -> ExitCode {
    match real_main() {
        Ok(code) => code,
        Err(e) => {
            eprintln!("sweep bench: {e}");
            ExitCode::FAILURE
        }
    }
}

fn real_main() -> Result<ExitCode, String> {
    // `cargo bench` passes `--bench` (and may pass other flags) to a harness-less bench.
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    let target = env("POLLARD_BENCH_TARGET").unwrap_or_else(|| "outcome".to_string());

    let Some(csv_path) = args.first().cloned() else {
        println!("{USAGE}");
        return Ok(ExitCode::SUCCESS);
    };
    let mut spec = SweepSpec { fit_final: false, metric: Some(Metric::Accuracy), task: Some(Task::Classify), ..SweepSpec::default() };
    let mut k: u32 = 5;
    let mut repeats: usize = match env("POLLARD_BENCH_REPEATS").map(|v| v.parse()) {
        None => 3,
        Some(Ok(n)) if n >= 1 => n,
        _ => return Err(format!("POLLARD_BENCH_REPEATS must be a whole number >= 1\n{USAGE}")),
    };
    let mut folds_path = None;
    let mut out_path = None;
    for a in &args[1..] {
        let Some((name, value)) = a.split_once('=') else {
            eprintln!("sweep bench: unexpected argument '{a}'\n{USAGE}");
            return Ok(ExitCode::from(2));
        };
        let whole = |v: &str| v.parse::<u64>().map_err(|_| format!("{name}: '{v}' is not a whole number"));
        match name {
            "max_depth" => spec.max_depth = Some(parse_values(name, value)?),
            "min_split_rows" => spec.min_split_rows = Some(parse_values(name, value)?),
            "min_leaf_rows" => spec.min_leaf_rows = Some(parse_values(name, value)?),
            "max_leaves" => spec.max_leaves = Some(parse_values(name, value)?),
            "seed" => spec.seed = whole(value)?,
            "k" => k = whole(value)? as u32,
            "repeats" => repeats = whole(value)?.max(1) as usize,
            "folds" => folds_path = Some(value.to_string()),
            "out" => out_path = Some(value.to_string()),
            _ => {
                eprintln!("sweep bench: unknown argument '{name}' (limits: {})\n{USAGE}", LIMITS.join(", "));
                return Ok(ExitCode::from(2));
            }
        }
    }
    spec.folds = Some(FoldPlan { scheme: FoldScheme::Stratified, k, repeats: 1 });

    let file = File::open(&csv_path).map_err(|e| format!("cannot open {csv_path}: {e}"))?;
    let mut options = CsvOptions::new(target);
    options.task = Some(Task::Classify);
    let data = read_dataset(BufReader::new(file), &options).map_err(|e| format!("cannot read {csv_path}: {e}"))?;

    let never = AtomicBool::new(false);
    let sink = |_: &sweep::UnitResult, _: sweep::Progress| Flow::Continue;
    let mut times = Vec::with_capacity(repeats);
    let mut results: Vec<(sweep::Plan, SweepResult)> = Vec::new();
    for _ in 0..repeats {
        let start = Instant::now();
        let plan = sweep::plan(black_box(&data), &spec).map_err(|e| e.to_string())?;
        let units = sweep::run(&plan, Vec::new(), &sink, &never).map_err(|e| e.to_string())?;
        let result = sweep::summarize(&plan, &units);
        times.push(start.elapsed().as_secs_f64());
        results.push((plan, black_box(result)));
    }
    let (plan, result) = results.last().expect("repeats >= 1");
    // Every repeat must score every setting the same; report rather than assume it.
    let same_scores = results.iter().all(|(_, r)| r.scores == result.scores);
    if !same_scores {
        return Err("two repeats of the same sweep gave different scores".to_string());
    }
    let folds_match = match &folds_path {
        None => Value::Null,
        Some(p) => {
            let given = read_folds(p)?;
            if given != plan.folds.assignment[0] {
                return Err(format!("the sweep's fold assignment is not the one in {p}"));
            }
            Value::Bool(true)
        }
    };

    let rows = score_rows(result);
    let mut line = json!({
        "side": "pollard",
        "rows": data.rows(),
        "features": plan.data.frame.n_features(),
        "folds": plan.folds.splits.len(),
        "fold_seed": spec.seed,
        "settings": result.scores.len(),
        "work_units": plan.units.len(),
        "seconds": median(&times),
        "runs": times,
        "threads": rayon::current_num_threads(),
        "repeats_same_scores": same_scores,
        "folds_match_file": folds_match,
    });
    match &out_path {
        Some(p) => {
            let f = File::create(p).map_err(|e| format!("cannot create {p}: {e}"))?;
            let mut w = BufWriter::new(f);
            for r in &rows {
                writeln!(w, "{r}").map_err(|e| format!("{p}: {e}"))?;
            }
            w.flush().map_err(|e| format!("{p}: {e}"))?;
            line["scores_file"] = json!(p);
        }
        None => line["scores"] = Value::Array(rows),
    }
    println!("{line}");
    Ok(ExitCode::SUCCESS)
}
