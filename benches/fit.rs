//! Single-tree fit benchmark: times pollard's full-depth fit on a CSV file, serial and
//! parallel, and prints one JSON line. `benches/compare_fit.sh` runs it next to the reference
//! library on the same data; see `benches/README.md`.
//!
//! ```sh
//! cargo bench --bench fit -- CSV TASK [REPEATS]
//! POLLARD_BENCH_CSV=CSV POLLARD_BENCH_TASK=TASK cargo bench --bench fit
//! ```
//!
//! TASK is `classify` or `regress`; the target column is `outcome` (override with
//! `POLLARD_BENCH_TARGET`); REPEATS (default 3, or `POLLARD_BENCH_REPEATS`) fits per mode,
//! the median is reported. Reading the file is not timed; each timed fit is the whole
//! `fit_with` call (presort, growth) with the default limits: no depth limit,
//! `min_split_rows` 2, `min_leaf_rows` 1. Without a file (as a plain `cargo bench` runs it)
//! the program prints its usage and exits 0: it makes no data of its own.

use std::fs::File;
use std::hint::black_box;
use std::io::BufReader;
use std::process::ExitCode;
use std::time::Instant;

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::data::Task;
use pollard::tree::grow::fit_with;
use pollard::tree::{FitOptions, TrainSet, Tree};

const USAGE: &str = "usage: cargo bench --bench fit -- CSV TASK [REPEATS]
   or: POLLARD_BENCH_CSV=CSV POLLARD_BENCH_TASK=TASK [POLLARD_BENCH_REPEATS=N] cargo bench --bench fit
TASK is classify or regress; the target column is 'outcome' unless POLLARD_BENCH_TARGET names
another. Make the data with: python benches/make_fit_data.py OUTDIR
Prints one JSON line: serial and parallel median fit seconds, node count, leaves, depth.";

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

fn runs_json(times: &[f64]) -> String {
    let parts: Vec<String> = times.iter().map(|t| format!("{t:.6}")).collect();
    format!("[{}]", parts.join(", "))
}

fn main() -> ExitCode {
    // `cargo bench` passes `--bench` (and may pass other flags) to a harness-less bench.
    let args: Vec<String> = std::env::args().skip(1).filter(|a| !a.starts_with("--")).collect();
    let env = |k: &str| std::env::var(k).ok().filter(|v| !v.is_empty());
    let csv_path = args.first().cloned().or_else(|| env("POLLARD_BENCH_CSV"));
    let task_text = args.get(1).cloned().or_else(|| env("POLLARD_BENCH_TASK"));
    let repeats_text = args.get(2).cloned().or_else(|| env("POLLARD_BENCH_REPEATS"));
    let target = env("POLLARD_BENCH_TARGET").unwrap_or_else(|| "outcome".to_string());

    let Some(csv_path) = csv_path else {
        println!("{USAGE}");
        return ExitCode::SUCCESS;
    };
    let Some(task) = task_text.as_deref().and_then(Task::parse) else {
        eprintln!("fit bench: TASK must be classify or regress\n{USAGE}");
        return ExitCode::from(2);
    };
    let repeats: usize = match repeats_text.as_deref().map(str::parse) {
        None => 3,
        Some(Ok(n)) if n >= 1 => n,
        _ => {
            eprintln!("fit bench: REPEATS must be a whole number >= 1\n{USAGE}");
            return ExitCode::from(2);
        }
    };

    let file = match File::open(&csv_path) {
        Ok(f) => f,
        Err(e) => {
            eprintln!("fit bench: cannot open {csv_path}: {e}");
            return ExitCode::FAILURE;
        }
    };
    let mut options = CsvOptions::new(target);
    options.task = Some(task);
    let data = match read_dataset(BufReader::new(file), &options) {
        Ok(d) => d,
        Err(e) => {
            eprintln!("fit bench: cannot read {csv_path}: {e}");
            return ExitCode::FAILURE;
        }
    };
    let checked = match FitOptions::default().check(task) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("fit bench: {e}");
            return ExitCode::FAILURE;
        }
    };
    let set = TrainSet::of(&data);

    let time_mode = |parallel: bool| -> Result<(Vec<f64>, Tree), String> {
        let mut times = Vec::with_capacity(repeats);
        let mut last = None;
        for _ in 0..repeats {
            let start = Instant::now();
            let tree = fit_with(black_box(&set), &checked, parallel).map_err(|e| e.to_string())?;
            times.push(start.elapsed().as_secs_f64());
            last = Some(black_box(tree));
        }
        Ok((times, last.expect("repeats >= 1")))
    };
    let (single, serial_tree) = match time_mode(false) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("fit bench: serial fit failed: {e}");
            return ExitCode::FAILURE;
        }
    };
    let (parallel, parallel_tree) = match time_mode(true) {
        Ok(r) => r,
        Err(e) => {
            eprintln!("fit bench: parallel fit failed: {e}");
            return ExitCode::FAILURE;
        }
    };
    // The parallel path must give the serial path's tree; report it rather than assume it.
    let same_tree = serial_tree == parallel_tree;

    println!(
        "{{\"side\": \"pollard\", \"task\": \"{}\", \"rows\": {}, \"features\": {}, \
         \"single_seconds\": {:.6}, \"single_runs\": {}, \
         \"parallel_seconds\": {:.6}, \"parallel_runs\": {}, \"threads\": {}, \
         \"nodes\": {}, \"leaves\": {}, \"depth\": {}, \"parallel_same_tree\": {}}}",
        task.as_str(),
        data.rows(),
        data.frame.n_features(),
        median(&single),
        runs_json(&single),
        median(&parallel),
        runs_json(&parallel),
        rayon::current_num_threads(),
        serial_tree.nodes.len(),
        serial_tree.n_leaves(),
        serial_tree.depth(),
        same_tree
    );
    if same_tree {
        ExitCode::SUCCESS
    } else {
        eprintln!("fit bench: the parallel fit gave a different tree from the serial fit");
        ExitCode::FAILURE
    }
}
