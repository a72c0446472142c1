//! The `pollard` binary as a user runs it: every command is a real subprocess
//! (`CARGO_BIN_EXE_pollard`), and client commands talk to a real `pollard serve` subprocess on
//! a free loopback port with its own store directory.
//!
//! Data: the open datasets in tests/data (iris, wine, breast_cancer, diabetes; sources and
//! licences in tests/data/SOURCES.md). Where a test needs a smaller file it takes the first
//! rows of one of those, and says so. The demo's data is its own synthetic reefer set.
//!
//! No fixed sleeps: every wait is on a condition (a port accepting, a run state, a process
//! ending) polled with a deadline.

use std::collections::{BTreeSet, HashMap};
use std::io::Read;
use std::net::TcpStream;
use std::path::{Path, PathBuf};
use std::process::Stdio;
use std::time::{Duration, Instant};

use serde_json::Value;

// ------------------------------------------------------------------ harness

#[path = "support/process.rs"]
mod process;
use process::*;

fn s<'a>(v: &'a Value, key: &str) -> &'a str {
    v[key].as_str().unwrap_or_else(|| panic!("'{key}' is not a string in {v}"))
}

fn u(v: &Value, key: &str) -> u64 {
    v[key].as_u64().unwrap_or_else(|| panic!("'{key}' is not a count in {v}"))
}

fn arr<'a>(v: &'a Value, key: &str) -> &'a Vec<Value> {
    v[key].as_array().unwrap_or_else(|| panic!("'{key}' is not an array in {v}"))
}

fn ids(list: &Value) -> Vec<String> {
    list.as_array().expect("a JSON list").iter().map(|r| s(r, "id").to_string()).collect()
}

/// Follows a run to its end with `follow --json`; checks the event stream's shape and returns
/// the events.
fn follow_to_end(server: &Serve, run: &str) -> Vec<Value> {
    let events = server.run(&["follow", run, "--json"]).json_lines();
    check_events(run, &events);
    events
}

fn check_events(run: &str, events: &[Value]) {
    assert!(!events.is_empty(), "no events for {run}");
    for (i, e) in events.iter().enumerate() {
        assert_eq!(s(e, "run_id"), run, "{e}");
        assert_eq!(u(e, "sequence"), i as u64 + 1, "sequence numbers run 1, 2, …: {e}");
        assert!(["progress", "scored", "finished", "failed", "cancelled"].contains(&s(e, "kind")), "{e}");
        assert!(s(e, "at").contains('T'), "RFC 3339 time: {e}");
    }
    let ends = events.iter().filter(|e| ["finished", "failed", "cancelled"].contains(&s(e, "kind"))).count();
    assert_eq!(ends, 1, "exactly one end event, and it is last: {events:?}");
    assert!(["finished", "failed", "cancelled"].contains(&s(events.last().unwrap(), "kind")));
}

/// Data rows of a `show`/`local` table: the lines between the column header and the
/// `pick rule` line.
fn table_rows(text: &str) -> Vec<String> {
    let lines: Vec<&str> = text.lines().collect();
    let head = lines.iter().position(|l| l.trim_start().starts_with("grid#")).unwrap_or_else(|| panic!("no table header in:\n{text}"));
    lines[head + 1..].iter().take_while(|l| !l.starts_with("pick rule") && !l.starts_with("model:")).map(|l| l.to_string()).collect()
}

/// The cells of one column of a `show`/`local` table, found by its header name: every column
/// is right-aligned under its name, so a cell is the word that ends where the name ends.
fn column(text: &str, name: &str) -> Vec<String> {
    let head = text.lines().find(|l| l.trim_start().starts_with("grid#")).unwrap_or_else(|| panic!("no table header in:\n{text}"));
    let start = head.split(' ').scan(0, |at, w| {
        let here = *at;
        *at += w.len() + 1;
        Some((here, w))
    });
    let end = start.filter(|(_, w)| *w == name).map(|(at, w)| at + w.len()).next().unwrap_or_else(|| panic!("no column '{name}' in {head:?}"));
    table_rows(text)
        .iter()
        .map(|row| {
            let before = &row[..end.min(row.len())];
            before.rsplit(' ').next().unwrap_or_default().to_string()
        })
        .collect()
}

/// The header names of a `show`/`local` table.
fn header_names(text: &str) -> Vec<String> {
    text.lines().find(|l| l.trim_start().starts_with("grid#")).unwrap().split_whitespace().map(String::from).collect()
}

/// Asserts every line of `text` is at most 120 characters wide (counted in characters).
fn assert_fits(text: &str) {
    for l in text.lines() {
        assert!(l.chars().count() <= 120, "a line of {} characters (at most 120):\n{l}\n--- in\n{text}", l.chars().count());
    }
}

/// Asserts a failure printed as one JSON line on stderr (`--json`), nothing on stdout, and the
/// exit code; returns the error object.
fn json_error(out: Out, exit: i32) -> Value {
    let what = out.describe();
    assert_eq!(out.code, Some(exit), "{what}");
    assert!(out.stdout.is_empty(), "{what}");
    assert_eq!(out.stderr.lines().count(), 1, "{what}");
    let v: Value = serde_json::from_str(&out.stderr).unwrap_or_else(|e| panic!("not JSON ({e}): {what}"));
    assert!(v["error"]["code"].is_string() && v["error"]["message"].is_string(), "{what}");
    v["error"].clone()
}

/// The set of values one limit takes over a run's scores (null = no limit), as text.
fn limit_values(scores: &[Value], limit: &str) -> BTreeSet<String> {
    scores.iter().map(|sc| sc["limits"][limit].to_string()).collect()
}

/// DOT node statements: `  n<id> [ …];` (edges are `n<a> -> n<b> …`).
fn dot_nodes(dot: &str) -> usize {
    dot.lines()
        .filter(|l| {
            let t = l.trim_start();
            t.starts_with('n') && t[1..].split_once(' ').is_some_and(|(id, rest)| !id.is_empty() && id.bytes().all(|b| b.is_ascii_digit()) && rest.starts_with('['))
        })
        .count()
}

fn read_tree(path: &Path) -> pollard::tree::Tree {
    pollard::export::from_json(&std::fs::read_to_string(path).unwrap()).unwrap_or_else(|e| panic!("{}: {e}", path.display()))
}

// ------------------------------------------------------------------ client commands

#[test]
fn put_sweep_follow_show_runs_model_predict() {
    let server = Serve::start();
    let tmp = TempDir::new("client");
    let iris_csv = data("iris.csv");
    let iris_path = iris_csv.to_str().unwrap();

    // put, JSON and table.
    let iris = server.run(&["put", iris_path, "--name", "iris", "--target", "target", "--json"]).json();
    let iris_id = s(&iris, "id").to_string();
    assert!(iris_id.starts_with("ds_") && iris_id.len() > 10, "{iris}");
    assert_eq!((s(&iris, "name"), u(&iris, "version"), u(&iris, "rows"), s(&iris, "target"), s(&iris, "task")), ("iris", 1, 150, "target", "classify"));
    let columns: Vec<&str> = arr(&iris, "columns").iter().map(|c| s(c, "name")).collect();
    assert_eq!(columns, ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]);
    assert!(arr(&iris, "columns").iter().all(|c| s(c, "kind") == "numeric" && u(c, "missing") == 0));
    let wine_line = server.run(&["put", data("wine.csv").to_str().unwrap(), "--name", "wine", "--target", "target"]).ok();
    assert_eq!(wine_line.lines().count(), 1, "{wine_line}");
    assert!(wine_line.starts_with("ds_") && wine_line.contains("wine") && wine_line.contains("178 rows") && wine_line.contains("13 columns"), "{wine_line}");
    let wine_id = wine_line.split_whitespace().next().unwrap().to_string();
    // The same bytes under the same name are the same dataset (its id is a content hash).
    let again = server.run(&["put", iris_path, "--name", "iris", "--target", "target", "--json"]).json();
    assert_eq!((s(&again, "id"), u(&again, "version")), (iris_id.as_str(), 1));

    // datasets, JSON, table and --name.
    let all = server.run(&["datasets", "--json"]).json();
    let mut listed = ids(&all);
    listed.sort();
    let mut want = vec![iris_id.clone(), wine_id.clone()];
    want.sort();
    assert_eq!(listed, want);
    assert!(all.as_array().unwrap().iter().all(|d| s(d, "id").starts_with("ds_") && !s(d, "created_at").is_empty()));
    let table = server.run(&["datasets"]).ok();
    assert_eq!(table.lines().count(), 2, "{table}");
    assert!(table.lines().any(|l| l.starts_with(&iris_id)) && table.lines().any(|l| l.starts_with(&wine_id)), "{table}");
    assert_eq!(ids(&server.run(&["datasets", "--name", "wine", "--json"]).json()), [wine_id.clone()]);

    // sweep with each form of the range syntax; 3 × 3 × 3 = 27 settings.
    let grid = ["--max-depth", "2,4,none", "--min-leaf-rows", "lin(1,5,2)", "--min-gain", "log(0.001,0.1,3)"];
    let mut args = vec!["sweep", "--dataset", "iris", "--label", "team=alpha", "--json"];
    args.extend_from_slice(&grid);
    let started = server.run(&args).json();
    let r1 = s(&started, "id").to_string();
    assert!(r1.starts_with("run_"), "{started}");
    assert!(["queued", "running", "finished"].contains(&s(&started, "state")), "{started}");
    assert_eq!((s(&started, "dataset_id"), s(&started, "dataset_name")), (iris_id.as_str(), "iris"));
    assert_eq!(started["labels"], serde_json::json!({"team": "alpha"}));

    // follow --json: every event, then the end.
    let events = follow_to_end(&server, &r1);
    let last = events.last().unwrap();
    assert_eq!(s(last, "kind"), "finished", "{last}");
    assert_eq!(u(&last["event"], "settings"), 27, "{last}");
    assert_eq!(events.iter().filter(|e| s(e, "kind") == "scored").count(), 27);
    assert!(events.iter().any(|e| s(e, "kind") == "progress"));
    // follow --after resumes after a sequence number.
    let resumed = server.run(&["follow", &r1, "--after", "3", "--json"]).json_lines();
    assert_eq!(resumed.len(), events.len() - 3);
    assert_eq!(resumed[0], events[3]);
    // follow as a table: one line naming the end.
    assert_eq!(server.run(&["follow", &r1]).ok(), format!("run {r1}: finished\n"));

    // show --json: the grid the range syntax described.
    let shown = server.run(&["show", &r1, "--json"]).json();
    assert_eq!((s(&shown, "id"), s(&shown, "state"), u(&shown, "settings")), (r1.as_str(), "finished", 27));
    let scores = arr(&shown, "scores");
    assert_eq!(scores.len(), 27);
    assert_eq!(limit_values(scores, "max_depth"), ["2", "4", "null"].map(String::from).into());
    assert_eq!(limit_values(scores, "min_leaf_rows"), ["1", "3", "5"].map(String::from).into());
    let gains: BTreeSet<u64> = scores.iter().map(|sc| sc["limits"]["min_gain"].as_f64().unwrap().to_bits()).collect();
    let gains: Vec<f64> = gains.into_iter().map(f64::from_bits).collect();
    assert_eq!(gains.len(), 3, "{gains:?}");
    let mut sorted = gains.clone();
    sorted.sort_by(f64::total_cmp);
    for (g, want) in sorted.iter().zip([0.001, 0.01, 0.1]) {
        assert!((g - want).abs() <= 1e-12, "min_gain {g} (want {want})");
    }
    for (i, sc) in scores.iter().enumerate() {
        assert_eq!(u(sc, "index"), i as u64);
        assert_eq!(arr(sc, "fold_scores").len(), 5, "default folds: 5");
    }
    let (picked, best) = (u(&shown, "picked"), u(&shown, "best"));
    assert!(picked < 27 && best < 27);
    let model_nodes = u(&shown["model"], "nodes");
    assert!(model_nodes >= 3 && model_nodes % 2 == 1, "{shown}");
    assert_eq!(shown["model"]["classes"], serde_json::json!(["setosa", "versicolor", "virginica"]));

    // show as a table: the run line, the top settings and the pick.
    let text = server.run(&["show", &r1, "--top", "3"]).ok();
    assert!(text.lines().next().unwrap().starts_with(&format!("{r1}  finished")), "{text}");
    let rows = table_rows(&text);
    assert!((3..=5).contains(&rows.len()), "three best, plus the pick and the best if not among them:\n{text}");
    let grid_col = column(&text, "grid#");
    assert!(rows[0].starts_with("picked") && grid_col[0] == picked.to_string(), "{text}");
    // Every limit the grid varies has a column; the constant ones are listed once above.
    assert_eq!(header_names(&text)[1..4], ["depth", "leaf", "gain"], "{text}");
    assert!(text.lines().any(|l| l.starts_with("columns: ") && l.contains("depth = max_depth, leaf = min_leaf_rows, gain = min_gain")), "{text}");
    assert!(!header_names(&text).contains(&"criterion".to_string()), "{text}");
    let fixed = text.lines().find(|l| l.starts_with("fixed: ")).unwrap_or_else(|| panic!("{text}"));
    assert!(fixed.contains("criterion = gini") && fixed.contains("max_leaves = none") && fixed.contains("min_split_rows = 2") && fixed.contains("prune_alpha = 0"), "{fixed}");
    // Settings that grew the same trees share a row, and the header says what the count means.
    assert_eq!(header_names(&text).contains(&"alike".to_string()), text.contains("alike = how many more settings grew the same trees"), "{text}");
    assert_fits(&text);
    assert!(text.contains(&format!("pick rule highest: grid# {picked}")), "{text}");
    assert!(text.contains(&format!("model: {model_nodes} nodes")), "{text}");
    // What the picked setting leans on: every iris feature, the shuffled drops and shares of
    // --json in the table, most first.
    let imps = arr(&shown, "importances");
    assert_eq!(imps.len(), 4, "{shown}");
    assert_eq!(u(&shown, "permutation_repeats"), 5);
    let share_sum: f64 = imps.iter().map(|f| f["impurity"].as_f64().unwrap()).sum();
    assert!((share_sum - 1.0).abs() < 1e-9, "{shown}");
    let mut by_drop: Vec<(f64, &str)> = imps.iter().map(|f| (f["permutation_mean"].as_f64().unwrap(), f["feature"].as_str().unwrap())).collect();
    by_drop.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(b.1)));
    let listed: Vec<&str> = text.lines().skip_while(|l| !l.starts_with("what the picked setting leans on")).filter_map(|l| l.strip_prefix("  ")).filter(|l| by_drop.iter().any(|(_, n)| l.starts_with(n))).map(|l| l.split_whitespace().next().unwrap()).collect();
    assert_eq!(listed, by_drop.iter().take(3).map(|(_, n)| *n).collect::<Vec<_>>(), "--top 3 features, most first:\n{text}");
    assert!(text.contains("  … 1 more features (--top)"), "{text}");

    // local, with the same flags, scores the same folds the same way as the server.
    let mut args = vec!["local", iris_path, "--target", "target", "--json"];
    args.extend_from_slice(&grid);
    let local = pollard(&args).json();
    let local_scores = arr(&local, "scores");
    assert_eq!(local_scores.len(), 27);
    for (a, b) in local_scores.iter().zip(scores) {
        assert_eq!(a["limits"], b["limits"]);
        assert_eq!(a["fold_scores"], b["fold_scores"], "local and served scores of setting {}", a["index"]);
    }
    assert_eq!((u(&local, "picked"), u(&local, "best")), (picked, best));

    // sweep from a TOML spec file; a flag (--k 4) wins over the file (k = 3).
    let spec = tmp.join("wine.toml");
    std::fs::write(
        &spec,
        "target = \"target\"\nmetric = \"balanced_accuracy\"\npick = \"one_se\"\nseed = 7\ncriteria = [\"gini\", \"entropy\"]\n\n[limits]\nmax_depth = \"lin(1,3,1)\"\nmin_leaf_rows = \"2\"\n\n[folds]\nscheme = \"stratified\"\nk = 3\n",
    )
    .unwrap();
    let lines = server.run(&["sweep", "--dataset", &wine_id, "--spec", spec.to_str().unwrap(), "--k", "4", "--label", "team=beta", "--follow", "--json"]).json_lines();
    let r2 = s(&lines[0], "run_id").to_string();
    check_events(&r2, &lines);
    assert_eq!(s(lines.last().unwrap(), "kind"), "finished", "{lines:?}");
    let shown2 = server.run(&["show", &r2, "--json"]).json();
    assert_eq!((s(&shown2, "state"), s(&shown2, "metric"), u(&shown2, "settings")), ("finished", "balanced_accuracy", 6));
    assert_eq!(s(&shown2, "dataset_name"), "wine");
    let scores2 = arr(&shown2, "scores");
    assert_eq!(limit_values(scores2, "max_depth"), ["1", "2", "3"].map(String::from).into());
    assert_eq!(limit_values(scores2, "criterion"), ["\"entropy\"", "\"gini\""].map(String::from).into());
    assert_eq!(limit_values(scores2, "min_leaf_rows"), ["2"].map(String::from).into());
    assert!(scores2.iter().all(|sc| arr(sc, "fold_scores").len() == 4), "--k 4 wins over the file's k = 3");
    let table2 = server.run(&["show", &r2]).ok();
    assert!(table2.contains("pick rule one_se: grid#"), "{table2}");
    // Two settings with the same max_depth differ by criterion: the criterion has a column.
    assert_eq!(header_names(&table2)[1..3], ["criterion", "depth"], "{table2}");
    let crits: BTreeSet<String> = column(&table2, "criterion").into_iter().collect();
    assert!(crits.iter().all(|c| c == "gini" || c == "entropy"), "{table2}");
    assert!(table2.lines().any(|l| l.starts_with("fixed: ") && l.contains("min_leaf_rows = 2") && l.contains("class_weight = none")), "{table2}");
    assert!(table2.contains("balanced_accuracy"), "{table2}");

    // sweep --follow as a table: started, the end, then the run shown.
    let text = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,3", "--follow"]).ok();
    let first = text.lines().next().unwrap();
    let r3 = first.strip_prefix("started ").unwrap_or_else(|| panic!("{text}")).to_string();
    assert!(r3.starts_with("run_"));
    assert!(text.contains(&format!("run {r3}: finished")), "{text}");
    assert!(text.lines().any(|l| l.starts_with(&format!("{r3}  finished"))), "{text}");
    // The pick, then both settings ranked.
    assert_eq!(table_rows(&text).len(), 3, "{text}");

    // runs: newest first, and each filter.
    let every = server.run(&["runs", "--json"]).json();
    assert_eq!(ids(&every), [r3.clone(), r2.clone(), r1.clone()]);
    assert!(every.as_array().unwrap().iter().all(|r| s(r, "state") == "finished"));
    let table = server.run(&["runs"]).ok();
    let firsts: Vec<&str> = table.lines().map(|l| l.split_whitespace().next().unwrap()).collect();
    assert_eq!(firsts, [r3.as_str(), r2.as_str(), r1.as_str()], "{table}");
    assert_eq!(ids(&server.run(&["runs", "--dataset", "wine", "--json"]).json()), [r2.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--dataset", "iris", "--json"]).json()), [r3.clone(), r1.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--state", "finished", "--json"]).json()), [r3.clone(), r2.clone(), r1.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--state", "queued", "--json"]).json()), Vec::<String>::new());
    assert_eq!(server.run(&["runs", "--state", "running"]).ok(), "");
    assert_eq!(ids(&server.run(&["runs", "--label", "team=alpha", "--json"]).json()), [r1.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--label", "team=beta", "--json"]).json()), [r2.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--limit", "1", "--json"]).json()), [r3.clone()]);
    let t2 = s(&shown2, "created_at").to_string();
    assert_eq!(ids(&server.run(&["runs", "--from", &t2, "--json"]).json()), [r3.clone(), r2.clone()], "--from {t2} is inclusive");
    assert_eq!(ids(&server.run(&["runs", "--to", &t2, "--json"]).json()), [r1.clone()], "--to {t2} is exclusive");
    assert_eq!(ids(&server.run(&["runs", "--dataset", "iris", "--label", "team=alpha", "--state", "finished", "--json"]).json()), [r1.clone()]);

    // model: json, dot and text on stdout; each to a file; protobuf to a file.
    let json_text = server.run(&["model", &r1, "--format", "json"]).ok();
    let json_file = tmp.join("model.json");
    let wrote = server.run(&["model", &r1, "--format", "json", "--out", json_file.to_str().unwrap(), "--json"]).json();
    assert_eq!((s(&wrote, "run_id"), s(&wrote, "format"), s(&wrote, "path")), (r1.as_str(), "json", json_file.to_str().unwrap()));
    assert_eq!(std::fs::read_to_string(&json_file).unwrap(), json_text, "stdout and --out carry the same bytes");
    assert_eq!(u(&wrote, "bytes"), json_text.len() as u64);
    let tree = read_tree(&json_file);
    assert_eq!(tree.nodes.len() as u64, model_nodes);
    assert_eq!(tree.labels, ["setosa", "versicolor", "virginica"]);
    let dot = server.run(&["model", &r1, "--format", "dot"]).ok();
    assert!(dot.starts_with("digraph ") && dot.trim_end().ends_with('}'), "{dot}");
    assert_eq!(dot_nodes(&dot), tree.nodes.len(), "{dot}");
    assert_eq!(dot.matches(" -> ").count(), tree.nodes.len() - 1, "{dot}");
    let text = server.run(&["model", &r1]).ok();
    assert_eq!(text, server.run(&["model", &r1, "--format", "text"]).ok(), "text is the default format");
    assert!(text.lines().last().unwrap().starts_with(&format!("{} leaves, depth {}", tree.n_leaves(), tree.depth())), "{text}");
    let pb_file = tmp.join("model.pb");
    let line = server.run(&["model", &r1, "--format", "protobuf", "--out", pb_file.to_str().unwrap()]).ok();
    let bytes = std::fs::read(&pb_file).unwrap();
    assert_eq!(line, format!("wrote {} ({} bytes)\n", pb_file.display(), bytes.len()));
    let decoded = <pollard::pb::Model as prost::Message>::decode(&bytes[..]).expect("a pollard.v1.Model message");
    assert_eq!(decoded.nodes.len(), tree.nodes.len());
    assert_eq!(pollard::rpc::convert::model_from(&decoded).unwrap(), tree, "the protobuf and the JSON model are the same tree");
    // Both carry each threshold's pair of training values, which the text shows short.
    assert!(tree.nodes.iter().filter_map(|n| n.split.as_ref()).all(|s| s.between.is_some()), "{json_text}");
    let onnx_file = tmp.join("model.onnx");
    let wrote = server.run(&["model", &r1, "--format", "onnx", "--out", onnx_file.to_str().unwrap(), "--json"]).json();
    let bytes = std::fs::read(&onnx_file).unwrap();
    assert_eq!((s(&wrote, "format"), u(&wrote, "bytes")), ("onnx", bytes.len() as u64), "{wrote}");
    assert_eq!(bytes, pollard::export::onnx::to_onnx(&tree).unwrap(), "the file is the export of the run's tree");
    let e = server.run(&["model", &r1, "--format", "onnx"]).fails();
    assert!(e.contains("--out"), "{e}");

    // predict: the server's answers are the model's own, row by row.
    let ds = pollard::data::csv::read_dataset(std::fs::File::open(&iris_csv).unwrap(), &pollard::data::csv::CsvOptions::new("target")).unwrap();
    let (classes, probabilities) = match tree.predict(&ds.frame) {
        pollard::tree::Predictions::Classes { classes, probabilities } => (classes, probabilities),
        other => panic!("{other:?}"),
    };
    // --json: one object per row, the class and each class's probability.
    let got = server.run(&["predict", &r1, iris_path, "--json"]).json_lines();
    let want_labels: Vec<&str> = classes.iter().map(|&c| tree.labels[c as usize].as_str()).collect();
    assert_eq!(got.len(), 150);
    for (i, row) in got.iter().enumerate() {
        assert_eq!((u(row, "row"), s(row, "predicted")), (i as u64 + 1, want_labels[i]), "{row}");
        let p: Vec<f64> = ["setosa", "versicolor", "virginica"].iter().map(|c| row["probabilities"][c].as_f64().unwrap()).collect();
        assert_eq!(p, probabilities[i * 3..i * 3 + 3], "{row}");
    }
    // model --json: the model file as one object.
    let m = server.run(&["model", &r1, "--format", "json", "--json"]).json();
    assert_eq!((s(&m, "run_id"), s(&m, "format")), (r1.as_str(), "json"));
    assert_eq!(m["model"], serde_json::from_str::<Value>(&json_text).unwrap());
    let m = server.run(&["model", &r1, "--json"]).json();
    assert_eq!(s(&m, "text"), text, "the text drawing as a string");
    // As CSV, on the first 20 rows of iris without the target column.
    let few = tmp.join("few.csv");
    let source = std::fs::read_to_string(&iris_csv).unwrap();
    let cut: String = source.lines().take(21).map(|l| l.rsplit_once(',').unwrap().0.to_string() + "\n").collect();
    std::fs::write(&few, cut).unwrap();
    let text = server.run(&["predict", &r1, few.to_str().unwrap()]).ok();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines[0], "row,predicted,p_setosa,p_versicolor,p_virginica");
    assert_eq!(lines.len(), 21, "{text}");
    for (i, l) in lines[1..].iter().enumerate() {
        let p = &probabilities[i * 3..i * 3 + 3];
        assert_eq!(*l, format!("{},{},{:.4},{:.4},{:.4}", i + 1, want_labels[i], p[0], p[1], p[2]));
    }
    // --explain: per row, its class, leaf and the conditions on the way, in the words of the
    // text model, one per level of the leaf.
    let model_text = s(&server.run(&["model", &r1, "--json"]).json(), "text").to_string();
    let explained = server.run(&["predict", &r1, few.to_str().unwrap(), "--explain"]).ok();
    let mut blocks = explained.split("row ").skip(1);
    for i in 0..20 {
        let block = blocks.next().unwrap_or_else(|| panic!("no block for row {}: {explained}", i + 1));
        let leaf = tree.apply_row(&ds.frame, i);
        let head = format!("{}: {} (", i + 1, want_labels[i]);
        assert!(block.starts_with(&head) && block.lines().next().unwrap().ends_with(&format!(", leaf {leaf}")), "{block}");
        let conditions: Vec<&str> = block.lines().skip(1).map(str::trim).collect();
        assert_eq!(conditions.len() as u32, tree.nodes[leaf as usize].depth, "{block}");
        for c in conditions {
            let (test, side) = c.rsplit_once(": ").unwrap();
            assert!(side == "holds" || side == "fails", "{c}");
            assert!(model_text.contains(test), "the text model says {test:?} too: {c}");
        }
    }
    assert!(blocks.next().is_none());
}

#[test]
fn cancel_a_running_and_a_queued_run() {
    let server = slow_server();
    let cancer = server.run(&["put", data("breast_cancer.csv").to_str().unwrap(), "--name", "breast_cancer", "--target", "target", "--json"]).json();
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    // Far longer than the test lets it run: 2 criteria × 2 weightings × 5 min_leaf_rows ×
    // 12 max_depth = 240 settings on 10 folds × 20 repeats (the default cap), 4,000 work units.
    let long = server
        .run(&[
            "sweep", "--dataset", s(&cancer, "id"), "--criteria", "gini,entropy", "--class-weights", "none,balanced", "--min-leaf-rows", "1,2,4,8,16", "--max-depth", "lin(1,12,1)", "--folds", "stratified",
            "--k", "10", "--repeats", "20", "--seed", "5", "--json",
        ])
        .json();
    let long_id = s(&long, "id").to_string();
    // The server runs one run at a time (the default), so this one waits.
    let queued = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2", "--json"]).json();
    let queued_id = s(&queued, "id").to_string();

    // A follower of the long run, in the background.
    let mut child = command(&["--server", &server.url, "follow", &long_id, "--json"]).stdin(Stdio::null()).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().unwrap();
    let mut so = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        so.read_to_string(&mut s).map(|_| s)
    });
    let mut follower = KillOnDrop(child);

    let deadline = Instant::now() + PATIENCE;
    let running = loop {
        let r = server.run(&["show", &long_id, "--json"]).json();
        if s(&r, "state") == "running" && u(&r, "units_done") >= 1 {
            break r;
        }
        assert!(["queued", "running"].contains(&s(&r, "state")), "{r}");
        assert!(Instant::now() < deadline, "the long run did not start: {r}");
        std::thread::sleep(POLL);
    };
    assert_eq!((u(&running, "settings"), u(&running, "units_total")), (240, 4000));
    assert_eq!(s(&server.run(&["show", &queued_id, "--json"]).json(), "state"), "queued");
    assert_eq!(ids(&server.run(&["runs", "--state", "running", "--json"]).json()), [long_id.clone()]);
    assert_eq!(ids(&server.run(&["runs", "--state", "queued", "--json"]).json()), [queued_id.clone()]);
    let refused = server.run(&["model", &long_id]).fails();
    assert!(refused.contains("FailedPrecondition") && refused.contains(&long_id), "{refused}");

    // Cancelling the queued run ends it at once.
    let c = server.run(&["cancel", &queued_id, "--json"]).json();
    assert_eq!((s(&c, "id"), s(&c, "state")), (queued_id.as_str(), "cancelled"));
    let followed = server.run(&["follow", &queued_id, "--json"]);
    assert_eq!(followed.code, Some(4), "{}", followed.describe());
    let err: Value = serde_json::from_str(&followed.stderr).unwrap_or_else(|e| panic!("{e}: {}", followed.describe()));
    assert_eq!(err["error"]["code"], "run_cancelled", "{}", followed.describe());
    let events: Vec<Value> = followed.stdout.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    check_events(&queued_id, &events);
    assert_eq!(events.len(), 1, "{events:?}");
    assert_eq!(s(&events[0], "kind"), "cancelled");

    // Cancelling the running run: it stops within a few units and the follower hears so.
    let line = server.run(&["cancel", &long_id]).ok();
    assert!(line.starts_with(&long_id), "{line}");
    let status = wait_end(&mut follower, "the follower did not end after the cancel");
    assert_eq!(status.code(), Some(4), "follow exits 4 when the run was cancelled");
    let text = reader.join().unwrap().unwrap();
    let events: Vec<Value> = text.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    check_events(&long_id, &events);
    let last = events.last().unwrap();
    assert_eq!(s(last, "kind"), "cancelled", "{last}");
    assert!(s(&last["event"], "reason").contains("cancel"), "{last}");

    let ended = server.run(&["show", &long_id, "--json"]).json();
    assert_eq!(s(&ended, "state"), "cancelled");
    assert!(s(&ended, "reason").contains("cancel") && !s(&ended, "finished_at").is_empty(), "{ended}");
    assert!(u(&ended, "units_done") < 4000);
    let text = server.run(&["show", &long_id]).ok();
    assert!(text.lines().next().unwrap().starts_with(&format!("{long_id}  cancelled")), "{text}");
    let again = server.run(&["follow", &long_id]);
    assert_eq!((again.code, again.stdout.as_str()), (Some(4), format!("run {long_id}: cancelled: {}\n", s(&last["event"], "reason")).as_str()), "{}", again.describe());
    assert_eq!(again.stderr, format!("pollard: run {long_id} cancelled: {}\n", s(&last["event"], "reason")));
    // Cancelling again says the run already ended, and changes nothing.
    let e = server.run(&["cancel", &long_id]).fails();
    assert!(e.contains(&format!("run {long_id} already cancelled")), "{e}");
    let e = json_error(server.run(&["cancel", &long_id, "--json"]), 1);
    assert_eq!(e["code"], "already_ended", "{e}");
    let mut both = ids(&server.run(&["runs", "--state", "cancelled", "--json"]).json());
    both.sort();
    let mut want = vec![long_id.clone(), queued_id.clone()];
    want.sort();
    assert_eq!(both, want);
    let refused = server.run(&["predict", &long_id, data("breast_cancer.csv").to_str().unwrap()]).fails();
    assert!(refused.contains("FailedPrecondition") && refused.contains("cancelled"), "{refused}");
}

// ------------------------------------------------------------------ errors

#[test]
fn errors_exit_non_zero_with_one_line() {
    let server = Serve::start();
    let tmp = TempDir::new("errors");
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let iris = data("iris.csv");
    let iris = iris.to_str().unwrap();

    // Unknown run ids: NotFound, naming the id, for every command that takes one.
    for args in [vec!["show", "run_00000000000000000000000000000000"], vec!["cancel", "run_00000000000000000000000000000000"], vec!["follow", "run_00000000000000000000000000000000"], vec!["model", "run_00000000000000000000000000000000", "--format", "json"], vec!["predict", "run_00000000000000000000000000000000", iris]] {
        let e = server.run(&args).fails();
        assert!(e.contains("NotFound") && e.contains("run_00000000000000000000000000000000"), "{args:?}: {e}");
    }
    // Not found exits 5; with --json the error is one JSON object on stderr.
    assert_eq!(server.run(&["show", "run_00000000000000000000000000000000"]).code, Some(5));
    let e = json_error(server.run(&["show", "run_00000000000000000000000000000000", "--json"]), 5);
    assert!(e["code"] == "not_found" && e["message"].as_str().unwrap().contains("run_00000000000000000000000000000000"), "{e}");
    let e = json_error(server.run(&["follow", "run_00000000000000000000000000000000", "--json"]), 5);
    assert_eq!(e["code"], "not_found", "{e}");
    // Usage errors exit 2, as JSON too.
    assert_eq!(pollard(&["runs", "--bogus"]).code, Some(2));
    let e = json_error(pollard(&["runs", "--bogus", "--json"]), 2);
    assert!(e["code"] == "usage" && e["message"].as_str().unwrap().contains("--bogus"), "{e}");
    let e = json_error(server.run(&["sweep", "--dataset", "iris", "--max-depth", "2,x", "--json"]), 2);
    assert!(e["message"].as_str().unwrap().contains("--max-depth"), "{e}");
    let e = json_error(pollard(&["folds", "--file", iris, "--target", "nope", "--json"]), 1);
    assert!(e["message"].as_str().unwrap().contains("nope"), "{e}");
    // An id that cannot be a run id: InvalidArgument, before any lookup.
    let e = server.run(&["show", "run_nothing"]).fails();
    assert!(e.contains("InvalidArgument") && e.contains("run_nothing") && e.contains("not a run id"), "{e}");
    let e = server.run(&["sweep", "--dataset", "no_such_name", "--max-depth", "2"]).fails();
    assert!(e.contains("NotFound") && e.contains("no_such_name"), "{e}");

    // Bad range syntax names the flag and what is wrong; nothing is started.
    for (flag, range, needle) in [
        ("--max-depth", "lin(1,2)", "three numbers"),
        ("--max-depth", "2,x", "'x'"),
        ("--min-gain", "log(0.001,0.1,2.5)", "whole number"),
        ("--min-leaf-rows", "lin(1,a,2)", "'a'"),
        ("--max-leaves", "", "at least one value"),
    ] {
        let e = server.run(&["sweep", "--dataset", "iris", flag, range]).fails();
        assert!(e.contains(flag) && e.contains(needle), "{flag} {range:?}: {e}");
        let e = pollard(&["local", iris, "--target", "target", flag, range]).fails();
        assert!(e.contains(flag) && e.contains(needle), "local {flag} {range:?}: {e}");
    }
    // Fractional counts are refused by the server, naming the field; not rounded.
    for (flag, range, field) in [("--max-depth", "2.5", "max_depth.values[0]"), ("--min-leaf-rows", "0.5", "min_leaf_rows.values[0]"), ("--min-split-rows", "lin(2,5,1.5)", "min_split_rows.span.step")] {
        let e = server.run(&["sweep", "--dataset", "iris", flag, range]).fails();
        assert!(e.contains("InvalidArgument") && e.contains(field), "{flag} {range}: {e}");
    }
    assert_eq!(ids(&server.run(&["runs", "--json"]).json()), Vec::<String>::new(), "no run was started by a bad command");

    // Usage errors from the argument parser are one line too, naming the problem.
    let e = pollard(&["runs", "--bogus"]).fails();
    assert!(e.contains("--bogus") && e.contains("--help"), "{e}");
    let e = pollard(&["schedule", "create", "--cron", "30 2 * * *"]).fails();
    assert!(e.contains("--dataset"), "{e}");

    // Other bad flags.
    let e = server.run(&["runs", "--state", "sleeping"]).fails();
    assert!(e.contains("--state") && e.contains("sleeping"), "{e}");
    let e = server.run(&["sweep", "--dataset", "iris", "--label", "nokey"]).fails();
    assert!(e.contains("--label") && e.contains("nokey"), "{e}");
    let e = server.run(&["model", "run_00000000000000000000000000000000", "--format", "xml"]).fails();
    assert!(e.contains("--format") && e.contains("xml"), "{e}");

    // An unreachable server: a clear message naming the address.
    // Port 1 (not a port picked from the ephemeral range, which a server of another test may
    // be given at the same moment); checked closed first.
    assert!(TcpStream::connect_timeout(&"127.0.0.1:1".parse().unwrap(), Duration::from_secs(1)).is_err(), "something listens on 127.0.0.1:1");
    let closed = "http://127.0.0.1:1".to_string();
    for args in [vec!["runs"], vec!["show", "run_00000000000000000000000000000000"], vec!["put", iris, "--name", "iris"]] {
        let out = client(&closed, &args);
        assert_eq!(out.code, Some(6), "unreachable exits 6: {}", out.describe());
        let e = out.fails();
        assert!(e.contains("cannot reach") && e.contains(&closed), "{args:?}: {e}");
    }
    let e = json_error(client(&closed, &["datasets", "--json"]), 6);
    assert_eq!(e["code"], "unreachable", "{e}");
    // --server takes host:port, the form --listen takes, as http://host:port.
    let bare = server.url.strip_prefix("http://").unwrap();
    assert_eq!(ids(&client(bare, &["datasets", "--json"]).json()).len(), 1);
    let e = client("127.0.0.1:1", &["runs"]).fails();
    assert!(e.contains("cannot reach") && e.contains("http://127.0.0.1:1"), "{e}");
    for bad in ["not a url", "127.0.0.1", "localhost:port", "127.0.0.1:99999", "ftp://127.0.0.1:7311", ":7311"] {
        let out = client(bad, &["runs"]);
        assert_eq!(out.code, Some(2), "a malformed address is a usage error: {}", out.describe());
        let e = out.fails();
        assert!(e.contains("--server") && e.contains(bad) && e.contains("host:port"), "{bad}: {e}");
    }

    // Missing files name the path.
    let missing = tmp.join("absent.csv");
    let missing = missing.to_str().unwrap();
    let e = server.run(&["put", missing, "--name", "x"]).fails();
    assert!(e.contains(missing), "{e}");
    let e = server.run(&["predict", "run_00000000000000000000000000000000", missing]).fails();
    assert!(e.contains(missing), "{e}");
    let e = pollard(&["local", missing, "--target", "target"]).fails();
    assert!(e.contains(missing), "{e}");
    let e = pollard(&["folds", "--file", missing, "--target", "target"]).fails();
    assert!(e.contains(missing), "{e}");
    let toml = tmp.join("absent.toml");
    let e = server.run(&["sweep", "--dataset", "iris", "--spec", toml.to_str().unwrap()]).fails();
    assert!(e.contains(toml.to_str().unwrap()), "{e}");

    // A spec file with a key of no meaning names the file and the key.
    let bad = tmp.join("bad.toml");
    std::fs::write(&bad, "[limits]\nmax_depth = \"2,4\"\ndepth_cap = \"3\"\n").unwrap();
    let e = server.run(&["sweep", "--dataset", "iris", "--spec", bad.to_str().unwrap()]).fails();
    assert!(e.contains(bad.to_str().unwrap()) && e.contains("line 3, column 1") && e.contains("depth_cap"), "{e}");
    let broken = tmp.join("broken.toml");
    std::fs::write(&broken, "metric = \"accuracy\"\n[limits\nmax_depth = \"2\"\n").unwrap();
    let e = server.run(&["sweep", "--dataset", "iris", "--spec", broken.to_str().unwrap()]).fails();
    assert!(e.contains(broken.to_str().unwrap()) && e.contains("line 2"), "{e}");
    let e = pollard(&["local", iris, "--spec", bad.to_str().unwrap()]).fails();
    assert!(e.contains("depth_cap"), "{e}");

    // Without --out, protobuf (binary) is refused rather than written to a terminal.
    let done = server.run(&["sweep", "--dataset", "iris", "--max-depth", "2", "--json"]).json();
    let id = s(&done, "id").to_string();
    follow_to_end(&server, &id);
    let e = server.run(&["model", &id, "--format", "protobuf"]).fails();
    assert!(e.contains("--out"), "{e}");
    // Writing to a directory that does not exist names the path.
    let nowhere = tmp.join("no/such/dir/model.json");
    let e = server.run(&["model", &id, "--format", "json", "--out", nowhere.to_str().unwrap()]).fails();
    assert!(e.contains(nowhere.to_str().unwrap()), "{e}");
    // A CSV whose rows are ragged (the first rows of iris with one field dropped from row 3).
    let ragged = tmp.join("ragged.csv");
    let text: Vec<String> = std::fs::read_to_string(iris).unwrap().lines().take(5).map(String::from).collect();
    let mut text = text;
    text[3] = text[3].rsplit_once(',').unwrap().0.to_string();
    std::fs::write(&ragged, text.join("\n") + "\n").unwrap();
    let e = server.run(&["predict", &id, ragged.to_str().unwrap()]).fails();
    assert!(e.contains(ragged.to_str().unwrap()) && e.contains("row 3"), "{e}");

    // Local and folds without a target.
    let e = pollard(&["local", iris, "--max-depth", "2"]).fails();
    assert!(e.contains("--target"), "{e}");
    let e = pollard(&["folds", "--file", iris, "--target", "target", "--fold-scheme", "grouped"]).fails();
    assert!(e.contains("--fold-column"), "{e}");
    // The old names stay as hidden aliases.
    let e = pollard(&["folds", "--data", iris, "--target", "target", "--scheme", "lucky"]).fails();
    assert!(e.contains("--fold-scheme") && e.contains("lucky"), "{e}");
}

// ------------------------------------------------------------------ no server

#[test]
fn local_and_folds() {
    let tmp = TempDir::new("local");
    let iris = data("iris.csv");
    let iris = iris.to_str().unwrap();
    let model = tmp.join("model.json");
    // 3 × 2 × 2 = 12 settings on 3 folds.
    let r = pollard(&[
        "local", iris, "--target", "target", "--max-depth", "1,3,none", "--min-split-rows", "lin(2,12,10)", "--prune-alpha", "log(0.001,0.01,2)", "--k", "3", "--seed", "11", "--model-out", model.to_str().unwrap(),
        "--json",
    ])
    .json();
    let scores = arr(&r, "scores");
    assert_eq!(scores.len(), 12, "the grid's size");
    assert_eq!(s(&r, "metric"), "accuracy");
    assert_eq!(s(&r, "pick"), "highest");
    assert!(scores.iter().all(|sc| arr(sc, "fold_scores").len() == 3));
    assert_eq!(limit_values(scores, "min_split_rows"), ["12", "2"].map(String::from).into());
    assert_eq!(limit_values(scores, "max_depth"), ["1", "3", "null"].map(String::from).into());
    let picked = u(&r, "picked") as usize;
    let best = u(&r, "best") as usize;
    assert!(picked < 12 && best < 12);
    let best_mean = scores[best]["valid_mean"].as_f64().unwrap();
    assert!(scores.iter().all(|sc| sc["valid_mean"].as_f64().unwrap() <= best_mean), "best has the highest validation accuracy");
    let tree = read_tree(&model);
    assert_eq!(u(&r["model"], "nodes"), tree.nodes.len() as u64);
    assert_eq!(u(&r["model"], "leaves"), tree.n_leaves() as u64);
    let folds = arr(&r, "fold_assignment");
    assert_eq!(folds.len(), 1);
    assert_eq!(arr(&r, "fold_assignment")[0].as_array().unwrap().len(), 150);

    // The fold assignment `folds` prints is the one the sweep used.
    let text = pollard(&["folds", "--data", iris, "--target", "target", "--k", "3", "--seed", "11"]).ok();
    let lines: Vec<&str> = text.lines().collect();
    assert_eq!(lines[0], "row,repeat,fold");
    assert_eq!(lines.len(), 151, "a header and one line per row");
    let mut per_fold: HashMap<u32, usize> = HashMap::new();
    for (i, l) in lines[1..].iter().enumerate() {
        let f: Vec<&str> = l.split(',').collect();
        assert_eq!(f.len(), 3, "{l}");
        assert_eq!((f[0].parse::<usize>().unwrap(), f[1]), (i + 1, "0"));
        let fold: u32 = f[2].parse().unwrap();
        assert_eq!(Value::from(fold), folds[0][i], "row {}", i + 1);
        *per_fold.entry(fold).or_default() += 1;
    }
    assert_eq!(per_fold, HashMap::from([(0, 50), (1, 50), (2, 50)]), "stratified folds of iris (50 per class) are even");
    // Two repeats: a line per row per repeat; a different seed, a different assignment.
    let two = pollard(&["folds", "--data", iris, "--target", "target", "--k", "5", "--repeats", "2", "--seed", "3"]).ok();
    assert_eq!(two.lines().count(), 1 + 300);
    assert_eq!(two.lines().filter(|l| l.contains(",1,")).count(), 150);
    assert_ne!(pollard(&["folds", "--data", iris, "--target", "target", "--k", "3", "--seed", "12"]).ok(), text);
    // --json: the same assignment as one object; --fold-scheme and --folds name the same plan.
    let j = pollard(&["folds", "--file", iris, "--target", "target", "--k", "3", "--seed", "11", "--fold-scheme", "stratified", "--json"]).json();
    assert_eq!((u(&j, "rows"), u(&j, "k"), u(&j, "repeats")), (150, 3, 1));
    assert_eq!(&j["assignment"][0], &folds[0]);

    // As a table.
    let text = pollard(&["local", iris, "--target", "target", "--max-depth", "1,3,none", "--top", "2"]).ok();
    let rows = table_rows(&text);
    assert!((2..=4).contains(&rows.len()), "{text}");
    assert!(text.contains("accuracy (higher is better): train, valid = mean training and validation scores"), "{text}");
    assert!(text.contains("pick rule highest: grid# "), "{text}");
    assert!(text.lines().any(|l| l.starts_with("model: ") && l.contains(" nodes")), "{text}");
}

#[test]
fn demo_writes_files_that_parse() {
    let tmp = TempDir::new("demo");
    let out = tmp.join("out");
    let r = pollard(&["demo", "--out", out.to_str().unwrap(), "--rows", "1500", "--json"]).json();
    assert!(s(&r, "run_id").starts_with("run_"), "{r}");
    assert!(s(&r, "dataset_id").starts_with("ds_"), "{r}");
    // 10 max_depth × 3 of each of the other five limits.
    let settings = u(&r, "settings") as usize;
    assert_eq!(settings, 10 * 3 * 3 * 3 * 3 * 3);
    let (picked, best) = (u(&r, "picked"), u(&r, "best"));
    let files: Vec<PathBuf> = arr(&r, "files").iter().map(|f| PathBuf::from(f.as_str().unwrap())).collect();
    for f in &files {
        assert!(f.is_file(), "{} is listed but not written", f.display());
        assert!(f.starts_with(&out), "{}", f.display());
    }
    let names: BTreeSet<String> = files.iter().map(|f| f.file_name().unwrap().to_string_lossy().into_owned()).collect();
    for want in ["model.json", "model.dot", "model.txt", "scores.csv", "reefer-voyages-synthetic.csv"] {
        assert!(names.contains(want), "{want} missing from {names:?}");
    }
    let on_disk: BTreeSet<String> = std::fs::read_dir(&out).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    assert_eq!(on_disk, names, "every file written is listed");

    // One well-formed SVG per limit (all six vary).
    let svgs: Vec<&PathBuf> = files.iter().filter(|f| f.extension().is_some_and(|e| e == "svg")).collect();
    let svg_names: BTreeSet<String> = svgs.iter().map(|f| f.file_stem().unwrap().to_string_lossy().into_owned()).collect();
    assert_eq!(svg_names, ["max_depth", "min_split_rows", "min_leaf_rows", "max_leaves", "min_gain", "prune_alpha"].map(String::from).into());
    for f in &svgs {
        let text = std::fs::read_to_string(f).unwrap();
        let doc = roxmltree::Document::parse(&text).unwrap_or_else(|e| panic!("{}: not well-formed XML: {e}", f.display()));
        let root = doc.root_element();
        assert_eq!(root.tag_name().name(), "svg", "{}", f.display());
        assert_eq!(root.tag_name().namespace(), Some("http://www.w3.org/2000/svg"), "{}", f.display());
        assert!(root.descendants().any(|n| n.has_tag_name("title")), "{}", f.display());
    }

    // The model: JSON readable by the library, DOT with a node statement per node, text
    // whose summary agrees.
    let tree = read_tree(&out.join("model.json"));
    assert_eq!(tree.target, "excursion");
    let dot = std::fs::read_to_string(out.join("model.dot")).unwrap();
    assert_eq!(dot_nodes(&dot), tree.nodes.len(), "{dot}");
    let txt = std::fs::read_to_string(out.join("model.txt")).unwrap();
    assert!(txt.lines().last().unwrap().starts_with(&format!("{} leaves, depth {}, 1500 rows", tree.n_leaves(), tree.depth())), "{txt}");

    // scores.csv: a header and one row per setting, the best and the pick marked once.
    let mut reader = csv::Reader::from_path(out.join("scores.csv")).unwrap();
    let header: Vec<String> = reader.headers().unwrap().iter().map(String::from).collect();
    assert_eq!(header[0], "grid_index");
    assert!(header.iter().any(|h| h == "valid_mean") && header.iter().any(|h| h == "train_mean"));
    assert_eq!(header.iter().filter(|h| h.starts_with("fold_")).count(), 5);
    assert_eq!(header.last().unwrap(), "marks");
    let records: Vec<csv::StringRecord> = reader.records().map(|r| r.unwrap()).collect();
    assert_eq!(records.len(), settings);
    let marks = header.len() - 1;
    for (i, rec) in records.iter().enumerate() {
        assert_eq!(rec.len(), header.len());
        assert_eq!(rec[0].parse::<usize>().unwrap(), i);
    }
    let marked = |word: &str| records.iter().filter(|r| r[marks].split(' ').any(|m| m == word)).map(|r| r[0].parse::<u64>().unwrap()).collect::<Vec<_>>();
    assert_eq!(marked("best"), [best]);
    assert_eq!(marked("picked"), [picked]);
    let data_rows = std::fs::read_to_string(out.join("reefer-voyages-synthetic.csv")).unwrap().lines().count();
    assert_eq!(data_rows, 1 + 1500);

    // The same demo for people: it says what it did and where the files went.
    let out2 = tmp.join("people");
    let text = pollard(&["demo", "--out", out2.to_str().unwrap(), "--rows", "1500"]).ok();
    assert!(text.contains("synthetic") && text.contains(&format!("{settings} settings scored")), "{text}");
    assert!(text.contains(&format!("wrote {} files to {}", files.len(), out2.display())), "{text}");
    assert!(text.contains(&format!("one-SE pick: grid# {picked}")), "the same seed gives the same pick:\n{text}");
    // Every line fits in 120 columns (the paths of the files written are as long as --out).
    let listed = format!("  {}", out2.display());
    let said: String = text.lines().filter(|l| !l.starts_with(&listed)).map(|l| format!("{l}\n")).collect();
    assert!(said.contains("higher is better") && said.contains("larger = more overfit") && said.contains("alpha = prune_alpha"), "{text}");
    assert_fits(&said);
}

/// A grid where all six limits, the criterion and the class weighting vary: the tables of
/// `sweep --follow`, `show` and `local` each give every knob a column and fit in 120 columns.
/// wine is the open UCI wine dataset (tests/data/SOURCES.md); diabetes likewise, for a
/// regress run whose scores are in the tens.
#[test]
fn score_tables_of_every_knob_fit_in_120_columns() {
    let server = Serve::start();
    let wine = data("wine.csv");
    server.run(&["put", wine.to_str().unwrap(), "--name", "wine", "--target", "target", "--json"]).json();
    let grid = [
        "--criteria", "gini,entropy", "--class-weights", "none,balanced", "--max-depth", "2,4,none", "--min-split-rows", "2,10", "--min-leaf-rows", "1,5",
        "--max-leaves", "8,none", "--min-gain", "log(0.0001,0.01,5)", "--prune-alpha", "0,0.0005,0.03",
    ];
    let mut args = vec!["sweep", "--dataset", "wine", "--follow"];
    args.extend_from_slice(&grid);
    let followed = server.run(&args).ok();
    let id = followed.lines().next().unwrap().strip_prefix("started ").unwrap_or_else(|| panic!("{followed}")).to_string();
    let shown = server.run(&["show", &id]).ok();
    let mut args = vec!["local", wine.to_str().unwrap(), "--target", "target"];
    args.extend_from_slice(&grid);
    let local = pollard(&args).ok();
    for text in [&followed, &shown, &local] {
        assert_eq!(header_names(text)[1..9], ["criterion", "weight", "depth", "split", "leaf", "leaf_cap", "gain", "alpha"], "{text}");
        assert!(!text.lines().any(|l| l.starts_with("fixed: ")), "every knob varies: {text}");
        for name in ["weight = class_weight", "depth = max_depth", "split = min_split_rows", "leaf = min_leaf_rows", "leaf_cap = max_leaves", "gain = min_gain", "alpha = prune_alpha"] {
            assert!(text.contains(name), "the header note spells out {name:?}:\n{text}");
        }
        assert!(text.contains("accuracy (higher is better)") && text.contains("larger = more overfit"), "{text}");
        assert_eq!(table_rows(text).len(), 11, "the pick and the ten best:\n{text}");
        assert_fits(text);
    }
    // The values a log range made stay short: min_gain 0.000316… shows as 0.000316.
    let gains: BTreeSet<String> = column(&local, "gain").into_iter().collect();
    assert!(gains.iter().all(|g| ["0.0001", "0.000316", "0.001", "0.00316", "0.01"].contains(&g.as_str())), "{gains:?}\n{local}");

    // A regress run of the six limits: lower is better, scores in the tens.
    server.run(&["put", data("diabetes.csv").to_str().unwrap(), "--name", "diabetes", "--target", "target", "--json"]).json();
    let text = server
        .run(&["sweep", "--dataset", "diabetes", "--follow", "--max-depth", "2,4,none", "--min-split-rows", "2,40", "--min-leaf-rows", "1,10", "--max-leaves", "8,none", "--min-gain", "0,100", "--prune-alpha", "0,50"])
        .ok();
    assert_eq!(header_names(&text)[1..7], ["depth", "split", "leaf", "leaf_cap", "gain", "alpha"], "{text}");
    assert!(text.contains("rmse (lower is better)") && text.contains("fixed: criterion = squared_error, class_weight = none"), "{text}");
    assert_fits(&text);
}

// ------------------------------------------------------------------ regress runs

/// A run whose spec names no metric is scored by the task's default; `show` must name that
/// metric and, for a lower-is-better metric, list the lowest first.
/// Significant digits of a plain decimal: `1.75` has 3, `0.8` 1.
fn sig_digits(shown: &str) -> usize {
    let digits: String = shown.chars().filter(char::is_ascii_digit).collect();
    digits.trim_start_matches('0').trim_end_matches('0').len()
}

/// The text and DOT models of an iris run show each threshold as the short decimal between
/// the training values around it (`4.95`, not `4.9499998`).
#[test]
fn model_text_shows_short_thresholds() {
    let server = Serve::start();
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let lines = server.run(&["sweep", "--dataset", "iris", "--max-depth", "3,4", "--follow", "--json"]).json_lines();
    let id = s(&lines[0], "run_id").to_string();
    assert_eq!(s(lines.last().unwrap(), "kind"), "finished", "{lines:?}");
    let text = server.run(&["model", &id, "--format", "text"]).ok();
    let shown: Vec<&str> = text.lines().filter_map(|l| l.split_once(" <= ")).map(|(_, rest)| rest.split_whitespace().next().unwrap()).collect();
    assert!(shown.len() >= 2, "{text}");
    for x in &shown {
        assert!(x.parse::<f64>().is_ok(), "{x} in\n{text}");
        assert!(sig_digits(x) <= 3 && !x.contains("99999") && !x.contains("00001"), "{x} in\n{text}");
    }
    assert!(shown.iter().any(|x| (2..=3).contains(&sig_digits(x))), "{text}");
    let dot = server.run(&["model", &id, "--format", "dot"]).ok();
    for x in &shown {
        assert!(dot.contains(&format!(" <= {x}\\n")), "{x} in\n{dot}");
    }
}

#[test]
fn show_names_the_default_metric_of_a_regress_run() {
    let server = Serve::start();
    server.run(&["put", data("diabetes.csv").to_str().unwrap(), "--name", "diabetes", "--target", "target", "--json"]).json();
    let lines = server.run(&["sweep", "--dataset", "diabetes", "--max-depth", "1,3,none", "--follow", "--json"]).json_lines();
    let id = s(&lines[0], "run_id").to_string();
    assert_eq!(s(lines.last().unwrap(), "kind"), "finished");
    let r = server.run(&["show", &id, "--json"]).json();
    assert_eq!(s(&r, "metric"), "rmse", "the run names the metric it was scored by: {r}");
    let text = server.run(&["show", &id]).ok();
    assert!(text.contains("rmse (lower is better): train, valid = mean training and validation scores"), "{text}");
    let rows = table_rows(&text);
    // Under `highest` the pick is the best: the first ranked row (lowest RMSE) shows it.
    let grid = column(&text, "grid#");
    assert!(rows[0].starts_with("picked") && rows[1].starts_with("#1") && grid[0] == grid[1], "best first:\n{text}");
    let rmse: Vec<f64> = column(&text, "valid").iter().map(|v| v.parse().unwrap()).collect();
    assert!(rmse[1] <= rmse[2], "lower RMSE ranks first:\n{text}");
    assert!(text.contains("lower is better") && text.contains("fixed: criterion = squared_error"), "{text}");
    // predict --json on a regress run: one object per row with its value.
    let rows = server.run(&["predict", &id, data("diabetes.csv").to_str().unwrap(), "--json"]).json_lines();
    assert_eq!(rows.len(), 442);
    assert!(rows.iter().enumerate().all(|(i, r)| u(r, "row") == i as u64 + 1 && r["value"].is_f64() && r.get("predicted").is_none()), "{:?}", &rows[..2]);
    // The gap grows with overfitting whichever way the metric points: an unlimited tree
    // fits its training rows almost exactly (RMSE near 0) and validates worse, so its gap
    // (validation RMSE minus training RMSE) is positive and the largest of the three.
    let scores = arr(&r, "scores");
    let gap_of = |depth: Value| scores.iter().find(|sc| sc["limits"]["max_depth"] == depth).map(|sc| sc["gap"].as_f64().unwrap()).unwrap();
    let (g1, g3, gn) = (gap_of(Value::from(1)), gap_of(Value::from(3)), gap_of(Value::Null));
    assert!(gn > 0.0 && gn > g3 && gn > g1, "gaps: depth 1 {g1}, depth 3 {g3}, no limit {gn}");
    for sc in scores {
        let want = sc["valid_mean"].as_f64().unwrap() - sc["train_mean"].as_f64().unwrap();
        assert!((sc["gap"].as_f64().unwrap() - want).abs() < 1e-9, "{sc}");
    }

    // Monotone limits by column name: stored with the run and shown by `show`; a bad
    // direction is a usage error naming the flag, an unknown column the server's refusal.
    let lines = server.run(&["sweep", "--dataset", "diabetes", "--max-depth", "2,4", "--monotone", "bmi:+1,s3:-1", "--follow", "--json"]).json_lines();
    let limited = s(&lines[0], "run_id").to_string();
    assert_eq!(s(lines.last().unwrap(), "kind"), "finished");
    let text = server.run(&["show", &limited]).ok();
    assert!(text.contains("monotone limits: bmi increasing, s3 decreasing"), "{text}");
    let r = server.run(&["show", &limited, "--json"]).json();
    assert_eq!(r["monotone"], serde_json::json!({"bmi": "increasing", "s3": "decreasing"}), "{r}");
    assert!(!server.run(&["show", &id]).ok().contains("monotone"), "a run without limits shows none");
    let e = json_error(server.run(&["sweep", "--dataset", "diabetes", "--monotone", "bmi:up", "--json"]), 2);
    assert!(e["message"].as_str().unwrap().contains("--monotone") && e["message"].as_str().unwrap().contains("up"), "{e}");
    let e = server.run(&["sweep", "--dataset", "diabetes", "--monotone", "bmi:+1,weight:-1"]).fails();
    assert!(e.contains("InvalidArgument") && e.contains("spec.monotone[1]") && e.contains("weight"), "{e}");
}

#[test]
fn schedule_commands() {
    let server = Serve::start();
    let iris = data("iris.csv");
    server.run(&["put", iris.to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    // Created: a nightly re-tune at 02:30 Berlin time, keeping the newest 5 runs.
    let created = server
        .run(&["schedule", "create", "--dataset", "iris", "--cron", "30 2 * * *", "--zone", "Europe/Berlin", "--name", "iris nightly", "--max-depth", "1,2,3", "--k", "3", "--keep-last", "5", "--catch-up", "skip", "--skip-unchanged", "--score-drop", "0.05", "--label", "team=triage", "--json"])
        .json();
    let id = s(&created, "id").to_string();
    assert!(id.starts_with("sch_"), "{created}");
    assert_eq!((s(&created, "cron"), s(&created, "time_zone"), s(&created, "catch_up")), ("30 2 * * *", "Europe/Berlin", "skip"));
    assert_eq!((u(&created, "keep_last"), created["skip_unchanged"].as_bool(), created["score_drop"].as_f64()), (5, Some(true), Some(0.05)));
    assert_eq!(created["labels"]["team"], "triage");
    // The next fire is at 02:30 in Berlin: 00:30 or 01:30 UTC by the season.
    let next = s(&created, "next_fire_at");
    assert!(next.ends_with("T00:30:00.000Z") || next.ends_with("T01:30:00.000Z"), "{next}");

    let listed = server.run(&["schedule", "list", "--json"]).json();
    assert_eq!(ids(&listed), vec![id.clone()]);
    let shown = server.run(&["schedule", "show", &id, "--json"]).json();
    assert_eq!((s(&shown, "id"), shown["fires"].as_array().map(|f| f.is_empty())), (id.as_str(), Some(true)));
    let paused = server.run(&["schedule", "pause", &id, "--json"]).json();
    assert_eq!((paused["paused"].as_bool(), s(&paused, "next_fire_at")), (Some(true), ""));
    let resumed = server.run(&["schedule", "resume", &id, "--json"]).json();
    assert_eq!(resumed["paused"].as_bool(), Some(false));
    assert_eq!(server.run(&["schedule", "fires", &id, "--json"]).json(), serde_json::json!([]));

    // Human output: one line per schedule, and the show screen names the rules.
    let text = server.run(&["schedule", "list"]).ok();
    assert!(text.contains(&id) && text.contains("Europe/Berlin") && text.contains("next "), "{text}");
    let text = server.run(&["schedule", "show", &id]).ok();
    assert!(text.contains("catch-up skip") && text.contains("keep last 5"), "{text}");

    // Drift filters on run listings.
    assert_eq!(server.run(&["runs", "--score-fell", "--json"]).json(), serde_json::json!([]));
    assert_eq!(server.run(&["runs", "--flagged", "--json"]).json(), serde_json::json!([]));

    // Errors: one line, the field named.
    let e = server.run(&["schedule", "create", "--dataset", "iris", "--cron", "30 2 * *"]).fails();
    assert!(e.contains("InvalidArgument") && e.contains("cron"), "{e}");
    for never in ["0 0 30 2 *", "0 0 31 4 *"] {
        let e = server.run(&["schedule", "create", "--dataset", "iris", "--cron", never]).fails();
        assert!(e.contains("InvalidArgument") && e.contains("cron") && e.contains("never fires"), "{never}: {e}");
    }
    let e = server.run(&["schedule", "create", "--dataset", "iris", "--cron", "30 2 * * *", "--zone", "Europe/Atlantis"]).fails();
    assert!(e.contains("time_zone") && e.contains("Europe/Atlantis"), "{e}");
    let e = server.run(&["schedule", "create", "--dataset", "no_such_name", "--cron", "30 2 * * *"]).fails();
    assert!(e.contains("NotFound") && e.contains("no_such_name"), "{e}");
    let e = server.run(&["schedule", "create", "--dataset", "iris", "--cron", "30 2 * * *", "--catch-up", "twice"]).fails();
    assert!(e.contains("--catch-up") && e.contains("twice"), "{e}");

    let deleted = server.run(&["schedule", "delete", &id, "--json"]).json();
    assert_eq!(s(&deleted, "deleted"), id);
    for action in ["show", "pause", "resume", "delete", "fires"] {
        let e = server.run(&["schedule", action, &id]).fails();
        assert!(e.contains("NotFound") && e.contains(&id), "{action}: {e}");
    }
}

#[test]
fn a_second_serve_on_a_store_in_use_says_so_and_exits() {
    let server = Serve::start();
    let store = server.store.to_str().unwrap().to_string();
    let e = pollard(&["serve", "--listen", "127.0.0.1:0", "--data", &store]).fails();
    assert!(e.contains("in use") && e.contains(&store), "{e}");
    // The first server is unharmed.
    server.run(&["runs", "--json"]).json();
}

/// A version belongs to its name: bytes uploaded before under another name are that name's
/// version 1; the same bytes and target again change nothing ("unchanged, still v1"); a
/// second target is version 2.
#[test]
fn dataset_versions_follow_the_name() {
    let server = Serve::start();
    let iris = data("iris.csv");
    let iris = iris.to_str().unwrap();
    let first = server.run(&["put", iris, "--name", "voyages", "--target", "target", "--json"]).json();
    let bad = server.run(&["put", iris, "--name", "bad", "--target", "target", "--json"]).json();
    assert_eq!((s(&bad, "name"), u(&bad, "version"), bad["unchanged"].as_bool()), ("bad", 1, Some(false)), "{bad}");
    assert_ne!(s(&bad, "id"), s(&first, "id"));
    assert_eq!(s(&bad, "sha256"), s(&first, "sha256"), "equal bytes, equal content hash");
    assert_eq!(ids(&server.run(&["datasets", "--name", "bad", "--json"]).json()), vec![s(&bad, "id").to_string()]);
    let again = server.run(&["put", iris, "--name", "bad", "--target", "target", "--json"]).json();
    assert_eq!((s(&again, "id"), u(&again, "version"), again["unchanged"].as_bool()), (s(&bad, "id"), 1, Some(true)), "{again}");
    let text = server.run(&["put", iris, "--name", "bad", "--target", "target"]).ok();
    assert!(text.contains("v1") && text.contains("unchanged"), "{text}");
    let other = server.run(&["put", iris, "--name", "bad", "--target", "sepal_length_cm", "--json"]).json();
    assert_eq!((u(&other, "version"), other["unchanged"].as_bool(), s(&other, "target")), (2, Some(false), "sepal_length_cm"), "{other}");
    assert_eq!(server.run(&["datasets", "--name", "bad", "--json"]).json().as_array().map(Vec::len), Some(2));
    // The first name's history is untouched.
    assert_eq!(ids(&server.run(&["datasets", "--name", "voyages", "--json"]).json()), vec![s(&first, "id").to_string()]);
}

// ------------------------------------------------------------------ exit codes, report, logs

/// A sweep far longer than any test lets it run on breast_cancer (4,000 work units) on a
/// server from [`slow_server`].
const LONG: [&str; 16] = ["--criteria", "gini,entropy", "--class-weights", "none,balanced", "--min-leaf-rows", "1,2,4,8,16", "--max-depth", "lin(1,12,1)", "--fold-scheme", "stratified", "--k", "10", "--repeats", "20", "--seed", "5"];

/// A server that holds each finished unit 5 ms before storing it, so a run of [`LONG`]
/// lasts at least 20 s however fast the machine grows its trees (the whole sweep takes
/// about a second otherwise), and a test can act while it runs.
fn slow_server() -> Serve {
    Serve::start_with(ServeOptions { env: vec![("POLLARD_TEST_UNIT_DELAY_MS".into(), "5".into())], ..ServeOptions::default() })
}

/// Waits until a background command ends; its exit status.
fn wait_end(child: &mut KillOnDrop, what: &str) -> std::process::ExitStatus {
    let deadline = Instant::now() + PATIENCE;
    loop {
        if let Some(st) = child.0.try_wait().unwrap() {
            return st;
        }
        assert!(Instant::now() < deadline, "{what}");
        std::thread::sleep(POLL);
    }
}

/// Waits until `run` is running with at least one unit done.
fn wait_running(server: &Serve, run: &str) {
    let deadline = Instant::now() + PATIENCE;
    loop {
        let r = server.run(&["show", run, "--json"]).json();
        if s(&r, "state") == "running" && u(&r, "units_done") >= 1 {
            return;
        }
        assert!(["queued", "running"].contains(&s(&r, "state")), "{r}");
        assert!(Instant::now() < deadline, "the run did not start: {r}");
        std::thread::sleep(POLL);
    }
}

/// `sweep --follow` exits 4 when its run is cancelled; `follow` exits 3 on a failed run.
#[test]
fn follow_exits_with_the_way_the_run_ended() {
    let server = slow_server();
    server.run(&["put", data("breast_cancer.csv").to_str().unwrap(), "--name", "breast_cancer", "--target", "target", "--json"]).json();
    let mut args = vec!["--server", &server.url, "sweep", "--dataset", "breast_cancer", "--follow", "--json"];
    args.extend_from_slice(&LONG);
    let mut child = command(&args).stdin(Stdio::null()).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().unwrap();
    // Both pipes are read while the command runs: one left unread fills (64 KiB of events)
    // and blocks the command before it can end.
    let read_all = |mut pipe: Box<dyn Read + Send>| std::thread::spawn(move || {
        let mut text = String::new();
        pipe.read_to_string(&mut text).map(|_| text)
    });
    let (out_reader, err_reader) = (read_all(Box::new(child.stdout.take().unwrap())), read_all(Box::new(child.stderr.take().unwrap())));
    let mut sweeper = KillOnDrop(child);
    let deadline = Instant::now() + PATIENCE;
    let id = loop {
        if let Some(id) = ids(&server.run(&["runs", "--state", "running", "--json"]).json()).pop() {
            break id;
        }
        assert!(Instant::now() < deadline, "the sweep did not start");
        std::thread::sleep(POLL);
    };
    wait_running(&server, &id);
    server.run(&["cancel", &id, "--json"]).json();
    let status = wait_end(&mut sweeper, "sweep --follow did not end after the cancel");
    assert_eq!(status.code(), Some(4), "sweep --follow of a cancelled run exits 4");
    let (stdout, stderr) = (out_reader.join().unwrap().unwrap(), err_reader.join().unwrap().unwrap());
    let events: Vec<Value> = stdout.lines().map(|l| serde_json::from_str(l).unwrap()).collect();
    check_events(&id, &events);
    assert_eq!(s(events.last().unwrap(), "kind"), "cancelled");
    let err: Value = serde_json::from_str(&stderr).unwrap_or_else(|e| panic!("{e}: {stderr}"));
    assert_eq!(err["error"]["code"], "run_cancelled", "{stderr}");

    // A run that fails: left running by a killed server whose successor refuses its dataset
    // (breast_cancer has 569 rows; the new row cap is 200), so its resume fails.
    let mut args = vec!["sweep", "--dataset", "breast_cancer", "--json"];
    args.extend_from_slice(&LONG);
    let long = s(&server.run(&args).json(), "id").to_string();
    wait_running(&server, &long);
    let mut server = server;
    server.kill9();
    server.options.env.push(("POLLARD_MAX_ROWS".into(), "200".into()));
    let server = server.restart();
    let out = server.run(&["follow", &long]);
    assert_eq!(out.code, Some(3), "follow of a failed run exits 3: {}", out.describe());
    assert!(out.stdout.starts_with(&format!("run {long}: failed: ")), "{}", out.describe());
    assert!(out.stderr.starts_with(&format!("pollard: run {long} failed: ")) && out.stderr.lines().count() == 1, "{}", out.describe());
    assert_eq!(s(&server.run(&["show", &long, "--json"]).json(), "state"), "failed");
    // A finished run cannot be cancelled either.
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let lines = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2", "--follow", "--json"]).json_lines();
    let done = s(&lines[0], "run_id").to_string();
    let e = server.run(&["cancel", &done]).fails();
    assert!(e.contains(&format!("run {done} already finished")), "{e}");
    let e = server.run(&["cancel", &long]).fails();
    assert!(e.contains(&format!("run {long} already failed")), "{e}");
}

/// `report` writes what the demo writes, for any stored run; a run without a final model
/// says why.
#[test]
fn report_writes_the_results_of_a_stored_run() {
    let server = Serve::start();
    let tmp = TempDir::new("report");
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let lines = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,3,none", "--criteria", "gini,entropy", "--pick", "one_se", "--follow", "--json"]).json_lines();
    let id = s(&lines[0], "run_id").to_string();
    let shown = server.run(&["show", &id, "--json"]).json();
    let out = tmp.join("r1");
    let r = server.run(&["report", &id, "--out", out.to_str().unwrap(), "--json"]).json();
    assert_eq!(s(&r, "run_id"), id);
    let files: BTreeSet<String> = arr(&r, "files").iter().map(|f| Path::new(f.as_str().unwrap()).file_name().unwrap().to_string_lossy().into_owned()).collect();
    let on_disk: BTreeSet<String> = std::fs::read_dir(&out).unwrap().map(|e| e.unwrap().file_name().to_string_lossy().into_owned()).collect();
    assert_eq!(files, on_disk, "every file written is listed");
    let want: BTreeSet<String> = ["scores.csv", "max_depth.svg", "model.json", "model.dot", "model.txt", "model.onnx", "summary.txt"].map(String::from).into();
    assert_eq!(files, want);
    let tree = read_tree(&out.join("model.json"));
    assert_eq!(tree.nodes.len() as u64, u(&shown["model"], "nodes"));
    assert_eq!(std::fs::read(out.join("model.onnx")).unwrap(), pollard::export::onnx::to_onnx(&tree).unwrap());
    assert_eq!(csv::Reader::from_path(out.join("scores.csv")).unwrap().records().count(), 6);
    let svg = std::fs::read_to_string(out.join("max_depth.svg")).unwrap();
    roxmltree::Document::parse(&svg).unwrap();
    assert!(svg.contains("picked"), "the plot marks the picked setting");
    let summary = std::fs::read_to_string(out.join("summary.txt")).unwrap();
    assert!(summary.starts_with(&format!("run {id}: finished\n")), "{summary}");
    for want in [format!("one_se: grid# {}", u(&shown, "picked")), format!("best: grid# {}", u(&shown, "best")), "higher is better".into(), "fixed: class_weight = none".into()] {
        assert!(summary.contains(&want), "{want} missing:\n{summary}");
    }
    // For people: the files, one a line.
    let text = server.run(&["report", &id, "--out", tmp.join("r2").to_str().unwrap()]).ok();
    assert!(text.starts_with(&format!("wrote 7 files to {}", tmp.join("r2").display())), "{text}");

    // Without a final model: show and the summary say so; no model files.
    let lines = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2", "--skip-final", "--follow", "--json"]).json_lines();
    let bare = s(&lines[0], "run_id").to_string();
    let text = server.run(&["show", &bare]).ok();
    assert!(text.contains("finished (no model: skip_final was set)"), "{text}");
    let r = server.run(&["report", &bare, "--out", tmp.join("r3").to_str().unwrap(), "--json"]).json();
    assert_eq!(arr(&r, "files").len(), 3, "scores, one plot, summary: {r}");
    assert!(std::fs::read_to_string(tmp.join("r3/summary.txt")).unwrap().contains("finished (no model: skip_final was set)"));
    // Errors: an unknown run, and a folder that cannot be made.
    assert_eq!(server.run(&["report", "run_00000000000000000000000000000000", "--out", tmp.join("r4").to_str().unwrap()]).code, Some(5));
    let file = tmp.join("plain-file");
    std::fs::write(&file, "x").unwrap();
    let under = file.join("out");
    let e = server.run(&["report", &id, "--out", under.to_str().unwrap()]).fails();
    assert!(e.contains(under.to_str().unwrap()), "{e}");
}

/// `pollard --help` lists the exit codes and the README's table says the same, code for code;
/// the README states the minimum Rust version (Cargo.toml's `rust-version`) in its quick
/// start, and how to put `pollard` on the PATH before the command line's first example.
#[test]
fn help_and_readme_agree_on_exit_codes_and_setup() {
    let help = pollard(&["--help"]).ok();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let readme = std::fs::read_to_string(root.join("README.md")).unwrap();
    let table = readme.split("Exit codes, for scripts").nth(1).unwrap_or_else(|| panic!("the README has no exit-code table"));
    let rows: Vec<(String, String)> = table
        .lines()
        .skip_while(|l| !l.starts_with('|'))
        .take_while(|l| l.starts_with('|'))
        .filter_map(|l| {
            let cells: Vec<&str> = l.split('|').map(str::trim).collect();
            (cells.len() == 4 && cells[1].parse::<u8>().is_ok()).then(|| (cells[1].to_string(), cells[2].replace('`', "")))
        })
        .collect();
    let codes: Vec<&str> = rows.iter().map(|r| r.0.as_str()).collect();
    assert_eq!(codes, ["0", "1", "2", "3", "4", "5", "6"], "{table}");
    let listed: Vec<&str> = help.lines().skip_while(|l| *l != "Exit codes:").skip(1).take_while(|l| !l.is_empty()).collect();
    assert_eq!(listed.len(), rows.len(), "{help}");
    for ((code, meaning), line) in rows.iter().zip(&listed) {
        assert_eq!(line.trim_start(), format!("{code}  {meaning}"), "--help and the README differ on exit code {code}");
    }
    let cargo = std::fs::read_to_string(root.join("Cargo.toml")).unwrap();
    let version = cargo.lines().find_map(|l| l.strip_prefix("rust-version = ")).unwrap().trim_matches('"');
    let cli = readme.find("\n## The command line\n").expect("a command line section");
    assert!(readme[..cli].contains(&format!("Rust {version} or newer")), "the README does not state Rust {version} before the command line");
    let on_path = readme.find("cargo install --path .").expect("the README says how to put pollard on the PATH");
    let first_example = cli + readme[cli..].find("\npollard ").expect("an example");
    assert!(on_path < first_example, "the PATH comes after the first example");
}

/// `demo --out` to a path that cannot be made fails at once, naming it (tests run as root, so
/// a read-only folder would not stop them: the path is under a regular file).
#[test]
fn demo_out_that_cannot_be_made_fails_at_once() {
    let tmp = TempDir::new("demo-out");
    let file = tmp.join("plain-file");
    std::fs::write(&file, "x").unwrap();
    let under = file.join("results");
    let out = pollard(&["demo", "--out", under.to_str().unwrap(), "--rows", "200"]);
    assert_eq!(out.code, Some(1), "{}", out.describe());
    let e = out.fails();
    assert!(e.contains(under.to_str().unwrap()), "{e}");
    let e = json_error(pollard(&["demo", "--out", under.to_str().unwrap(), "--rows", "200", "--json"]), 1);
    assert!(e["message"].as_str().unwrap().contains(under.to_str().unwrap()), "{e}");
}

/// `serve` logging to a file (not a terminal) writes no colour codes, with or without NO_COLOR.
#[test]
fn serve_log_to_a_file_has_no_colour_codes() {
    let tmp = TempDir::new("ansi");
    let log = tmp.join("serve.log");
    let listen = format!("127.0.0.1:{}", free_port());
    let mut cmd = command(&["serve", "--listen", &listen, "--data", tmp.join("store").to_str().unwrap()]);
    cmd.env_remove("NO_COLOR");
    let child = cmd.stdin(Stdio::null()).stdout(Stdio::null()).stderr(std::fs::File::create(&log).unwrap()).spawn().unwrap();
    let mut child = KillOnDrop(child);
    let deadline = Instant::now() + PATIENCE;
    let text = loop {
        let text = std::fs::read_to_string(&log).unwrap_or_default();
        if text.contains("pollard serving") && text.contains('\n') {
            break text;
        }
        assert!(child.0.try_wait().unwrap().is_none(), "serve exited:\n{text}");
        assert!(Instant::now() < deadline, "serve did not log its start:\n{text}");
        std::thread::sleep(POLL);
    };
    assert!(!text.contains('\u{1b}'), "colour codes in a log file: {text:?}");
    assert!(text.contains(&format!("addr={listen}")), "{text}");
}

/// `sweep --idempotency-key`: the same command again is the same run; another request under
/// that key is refused, naming the key and the first run, and queues nothing.
#[test]
fn an_idempotency_key_reused_with_another_request_is_refused() {
    let server = Serve::start();
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let sweep = |depth: &str, json: bool| {
        let mut args = vec!["sweep", "--dataset", "iris", "--max-depth", depth, "--idempotency-key", "nightly-7"];
        if json {
            args.push("--json");
        }
        server.run(&args)
    };
    let first = sweep("1,2", true).json();
    let again = sweep("1,2", true).json();
    assert_eq!(s(&again, "id"), s(&first, "id"), "a retry returns the first run");
    let e = sweep("1,3", false).fails();
    assert!(e.contains("nightly-7") && e.contains(s(&first, "id")), "{e}");
    let out = sweep("1,3", true);
    assert_eq!(out.code, Some(1), "{}", out.describe());
    let e: Value = serde_json::from_str(out.stderr.trim()).unwrap_or_else(|_| panic!("{}", out.describe()));
    assert_eq!(e["error"]["code"], "already_exists", "{e}");
    assert!(e["error"]["message"].as_str().is_some_and(|m| m.contains("nightly-7")), "{e}");
    let runs = server.run(&["runs", "--json"]).json();
    assert_eq!(runs.as_array().map(Vec::len), Some(1), "the refused request queued a run: {runs}");
}

/// A nested sweep, served and local, on wine (tests/data, see SOURCES.md): both report the
/// same outer scores, the outer folds recomputed here from `pollard folds --outer-k` and the
/// reported picks, the words in `show`, and the nested folds CSV has the shape it promises.
/// (The scores themselves are checked against the reference's nested loop in
/// tests/reference_nested.rs.)
#[test]
fn nested_sweeps_served_and_local_agree() {
    let server = Serve::start();
    let wine = data("wine.csv");
    let wine = wine.to_str().unwrap();
    server.run(&["put", wine, "--name", "wine", "--target", "target"]).ok();
    let grid = ["--max-depth", "1,2,4,none", "--min-leaf-rows", "1,5", "--seed", "5", "--outer-k", "3", "--k", "4"];
    let mut args = vec!["sweep", "--dataset", "wine", "--follow", "--json"];
    args.extend_from_slice(&grid);
    let lines = server.run(&args).json_lines();
    let run = s(&lines[0], "run_id").to_string();
    check_events(&run, &lines);
    assert_eq!(s(lines.last().unwrap(), "kind"), "finished", "{lines:?}");
    let shown = server.run(&["show", &run, "--json"]).json();
    // Main splits 4, and per outer split 1 + 4 inner splits: (4 + 3 × 5) × 2 keys.
    assert_eq!(u(&shown, "units_total"), 38);
    let nested = &shown["nested"];
    let folds = arr(nested, "folds");
    assert_eq!(folds.len(), 3, "{nested}");
    let mean = folds.iter().map(|f| f["outer_score"].as_f64().unwrap()).sum::<f64>() / 3.0;
    assert!((mean - nested["outer_mean"].as_f64().unwrap()).abs() < 1e-12, "{nested}");
    let inner_best = folds.iter().map(|f| f["inner_best"].as_f64().unwrap()).sum::<f64>() / 3.0;
    assert!((inner_best - mean - nested["optimism"].as_f64().unwrap()).abs() < 1e-12, "accuracy: optimism = inner best − outer, {nested}");
    for f in folds {
        assert!(u(f, "picked") < 8 && f["inner_picked"].as_f64().unwrap() <= f["inner_best"].as_f64().unwrap(), "{f}");
    }
    // The main table is the plain sweep's: 4 folds per setting.
    assert!(arr(&shown, "scores").iter().all(|sc| arr(sc, "fold_scores").len() == 4));

    let mut args = vec!["local", wine, "--target", "target", "--json"];
    args.extend_from_slice(&grid);
    let local = pollard(&args).json();
    assert_eq!(local["nested"], shown["nested"], "local and served nested sweeps agree");

    let text = server.run(&["show", &run]).ok();
    assert!(text.contains("nested cross-validation, 3 outer splits (higher accuracy is better): outer "), "{text}");
    assert!(text.contains("picked by the outer splits: grid# "), "{text}");
    assert_fits(&text);

    // The nested folds: per outer split, every row once; −2 on exactly the outer validation
    // rows, and the outer validation rows of the three splits cover every row once.
    let csv = pollard(&["folds", "--file", wine, "--target", "target", "--k", "4", "--seed", "5", "--outer-k", "3"]).ok();
    let mut lines = csv.lines();
    assert_eq!(lines.next(), Some("outer_repeat,outer_fold,row,repeat,fold"));
    let mut valid_rows: HashMap<usize, usize> = HashMap::new();
    let mut count = 0;
    for l in lines {
        let f: Vec<i64> = l.split(',').map(|x| x.parse().unwrap()).collect();
        count += 1;
        assert!((-2..4).contains(&f[4]) && f[4] != -1, "{l}");
        if f[4] == -2 {
            *valid_rows.entry(f[2] as usize).or_default() += 1;
        }
    }
    assert_eq!(count, 3 * 178);
    assert_eq!(valid_rows.len(), 178);
    assert!(valid_rows.values().all(|&n| n == 1));

    // Refused: path α values with an outer loop, and an outer plan that asks too much.
    let e = pollard(&["local", wine, "--target", "target", "--prune-path", "--outer-k", "3"]).fails();
    assert!(e.contains("outer: nested cross-validation needs a prune_alpha range"), "{e}");
    let e = pollard(&["local", wine, "--target", "target", "--outer-k", "1"]).fails();
    assert!(e.contains("outer.k: must be at least 2"), "{e}");
    let e = server.run(&["sweep", "--dataset", "wine", "--outer-k", "200"]).fails();
    assert!(e.contains("outer.k") && e.contains("max_folds"), "{e}");
}

/// Decision costs end to end: a sweep of breast_cancer (tests/data) with a false alarm
/// costing 1 and a miss 5 scores by expected_cost, stores a threshold searched on the
/// validation folds (not one half), and `predict` decides by it.
#[test]
fn costs_give_a_threshold_that_predictions_follow() {
    let server = Serve::start();
    let tmp = TempDir::new("costs");
    let bc = data("breast_cancer.csv");
    let bc = bc.to_str().unwrap();
    server.run(&["put", bc, "--name", "bc", "--target", "target"]).ok();
    let lines = server.run(&["sweep", "--dataset", "bc", "--max-depth", "1,2,3,5", "--false-alarm-cost", "1", "--miss-cost", "5", "--follow", "--json"]).json_lines();
    let run = lines.iter().find_map(|l| l["run_id"].as_str()).expect("the sweep names its run").to_string();
    let shown = server.run(&["show", &run, "--json"]).json();
    assert_eq!(s(&shown, "metric"), "expected_cost", "{shown}");
    let decision = &shown["model"]["decision"];
    let threshold = decision["threshold"].as_f64().unwrap_or_else(|| panic!("no decision: {shown}"));
    assert_eq!((decision["false_alarm"].as_f64(), decision["miss"].as_f64(), decision["bayes_threshold"].as_f64()), (Some(1.0), Some(5.0), Some(1.0 / 6.0)));
    assert_ne!(threshold, 0.5, "{decision}");
    let table = server.run(&["show", &run]).ok();
    assert!(table.contains("decision: decides malignant when p(malignant) >= ") && table.contains("lower is better"), "{table}");
    // The model file keeps it.
    let model = tmp.path().join("model.json");
    server.run(&["model", &run, "--format", "json", "--out", model.to_str().unwrap()]).ok();
    let tree = read_tree(&model);
    assert_eq!(tree.decision.map(|d| d.threshold), Some(threshold));
    // Every row's class is p(malignant) >= threshold, and some differ from the likelier class.
    let rows = server.run(&["predict", &run, bc, "--json"]).json_lines();
    assert_eq!(rows.len(), 569);
    let mut moved = 0;
    for row in &rows {
        let p1 = row["probabilities"]["malignant"].as_f64().unwrap();
        let p0 = row["probabilities"]["benign"].as_f64().unwrap();
        assert_eq!(s(row, "predicted"), if p1 >= threshold { "malignant" } else { "benign" }, "{row}");
        moved += (s(row, "predicted") == "malignant" && p0 > p1) as usize;
    }
    assert!(moved > 0, "a threshold below one half must move some rows to malignant");
    // The same flags without a server, and a flag alone refused.
    let local = server.run(&["local", bc, "--target", "target", "--max-depth", "1,2,3,5", "--false-alarm-cost", "1", "--miss-cost", "5", "--json"]).json();
    assert_eq!(local["model"]["decision"]["threshold"].as_f64(), Some(threshold), "{local}");
    let alone = server.run(&["local", bc, "--target", "target", "--miss-cost", "5"]).fails();
    assert!(alone.contains("--false-alarm-cost"), "{alone}");
}
