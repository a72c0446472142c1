//! Sizes computed from a request: grids, repeats, folds, units, spans, labels, ids, the
//! queue, the memory budget, and runs that panic or take the process down. Each refused
//! request gets RESOURCE_EXHAUSTED or INVALID_ARGUMENT naming the field and the cap, the
//! server stays up and answering, and the store holds what it held before.
//!
//! Data: iris (tests/data/iris.csv; source and licence in tests/data/SOURCES.md).

use std::collections::HashMap;
use std::time::Instant;

use pollard::pb;
use pollard::pb::runs_client::RunsClient;
use serde_json::Value;

use super::process::{command, data, KillOnDrop, ServeOptions, TempDir, PATIENCE, POLL};
use super::*;

/// A server with `config` (TOML) and `env`, and iris uploaded as `iris`.
fn server_with(config: &str, env: &[(&str, &str)]) -> Serve {
    let server = Serve::start_with(ServeOptions {
        config: Some(config.to_string()),
        env: env.iter().map(|(k, v)| (k.to_string(), v.to_string())).collect(),
        ..Default::default()
    });
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    server
}

fn server() -> Serve {
    server_with("", &[])
}

/// Runs a client command that must be refused: the line names `code` and every needle, the
/// server is still up, and the store is as it was.
fn refused(server: &mut Serve, args: &[&str], code: &str, needles: &[&str]) -> String {
    let before = snapshot(server);
    let line = server.run(args).fails();
    assert!(line.contains(code), "expected {code}: {line}");
    for n in needles {
        assert!(line.contains(n), "expected {n:?} in: {line}");
    }
    assert!(line.len() < 600, "an error message stays short ({} bytes): {}", line.len(), &line[..300]);
    assert_alive(server);
    assert_eq!(snapshot(server), before, "a refused request changed the store");
    line
}

/// Starts a sweep on iris that must be accepted; returns the run id.
fn started(server: &Serve, args: &[&str]) -> String {
    let mut all = vec!["sweep", "--dataset", "iris", "--json"];
    all.extend_from_slice(args);
    let run = server.run(&all).json();
    run["id"].as_str().unwrap().to_string()
}

fn sweep_args<'a>(args: &[&'a str]) -> Vec<&'a str> {
    let mut all = vec!["sweep", "--dataset", "iris"];
    all.extend_from_slice(args);
    all
}

fn show(server: &Serve, id: &str) -> Value {
    server.run(&["show", id, "--json"]).json()
}

fn state(server: &Serve, id: &str) -> String {
    show(server, id)["state"].as_str().unwrap().to_string()
}

/// The states of runs `a` and `b`, where `b` was started after `a` and starts only after
/// `a` ends: `b` is read first, so `b` running at its read means `a` had ended by then,
/// and `a` read later cannot be running (the reverse order could see both running).
fn states(server: &Serve, a: &str, b: &str) -> (String, String) {
    let sb = state(server, b);
    (state(server, a), sb)
}

/// Polls `cond` until it holds, failing after PATIENCE.
fn wait_until(what: &str, mut cond: impl FnMut() -> bool) {
    let deadline = Instant::now() + PATIENCE;
    while !cond() {
        assert!(Instant::now() < deadline, "timed out waiting for {what}");
        std::thread::sleep(POLL);
    }
}

fn wait_terminal(server: &Serve, id: &str) -> Value {
    let mut last = Value::Null;
    wait_until(&format!("run {id} to end"), || {
        last = show(server, id);
        matches!(last["state"].as_str(), Some("finished" | "failed" | "cancelled"))
    });
    last
}

fn rt() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap()
}

fn iris_id(server: &Serve) -> String {
    server.run(&["datasets", "--json"]).json()[0]["id"].as_str().unwrap().to_string()
}

/// StartRun through the generated client, for requests the command line cannot make.
fn start_raw(server: &Serve, labels: HashMap<String, String>) -> Result<pb::RunInfo, tonic::Status> {
    let (url, dataset_id) = (server.url.clone(), iris_id(server));
    rt().block_on(async move {
        let mut c = RunsClient::connect(url).await.unwrap().max_decoding_message_size(64 << 20);
        let spec = pb::SweepSpec { max_depth: None, ..Default::default() };
        c.start_run(pb::StartRunRequest { dataset_id, spec: Some(spec), labels, ..Default::default() }).await.map(|r| r.into_inner())
    })
}

/// A StartRun refused with `code`, the message naming every needle; alive, store unchanged.
fn refused_raw(server: &mut Serve, labels: HashMap<String, String>, code: tonic::Code, needles: &[&str]) {
    let before = snapshot(server);
    let e = start_raw(server, labels).expect_err("the request was accepted");
    assert_eq!(e.code(), code, "{e:?}");
    for n in needles {
        assert!(e.message().contains(n), "expected {n:?} in: {}", e.message());
    }
    assert!(e.message().len() < 600, "long message: {} bytes", e.message().len());
    assert_alive(server);
    assert_eq!(snapshot(server), before);
}

// ------------------------------------------------------------------ grids and spans

/// The reproduction: 2048 × 2049 − 1 … a grid of 2^64 settings, whose u64 count
/// wraps to 0. With the default caps each of its ranges is over max_values_per_range.
#[test]
fn grid_of_2_pow_64_settings_is_refused_by_its_ranges() {
    let mut s = server();
    let args = sweep_args(&[
        "--max-depth", "lin(0,2047,1)", "--min-split-rows", "lin(2,2049,1)", "--max-leaves", "lin(1,2048,1)",
        "--min-gain", "lin(0,2047,1)", "--min-leaf-rows", "lin(1,1024,1)", "--prune-alpha", "lin(0,1023,1)",
    ]);
    refused(&mut s, &args, "ResourceExhausted", &["spec.max_depth.span", "2048 values", "max_values_per_range = 1000"]);
}

/// The same grid with ranges allowed to be that long: the grid's size is counted without
/// wrapping and refused against max_settings.
#[test]
fn grid_of_2_pow_64_settings_is_refused_by_its_size() {
    let mut s = server_with("max_values_per_range = 4096\n", &[]);
    let args = sweep_args(&[
        "--max-depth", "lin(0,2047,1)", "--min-split-rows", "lin(2,2049,1)", "--max-leaves", "lin(1,2048,1)",
        "--min-gain", "lin(0,2047,1)", "--min-leaf-rows", "lin(1,1024,1)", "--prune-alpha", "lin(0,1023,1)",
    ]);
    refused(&mut s, &args, "ResourceExhausted", &["spec.settings", "18446744073709551616 settings", "max_settings = 100000"]);
}

#[test]
fn settings_at_the_cap_pass_and_above_are_refused() {
    let mut s = server_with("max_settings = 100\n", &[]);
    started(&s, &["--max-depth", "lin(1,10,1)", "--min-split-rows", "lin(2,11,1)"]);
    refused(&mut s, &sweep_args(&["--max-depth", "lin(1,10,1)", "--min-split-rows", "lin(2,12,1)"]), "ResourceExhausted", &["spec.settings", "110 settings", "max_settings = 100"]);
}

/// A 300,000-value span is counted, not made (it took 25 s of CPU before).
#[test]
fn a_300000_value_span_is_refused_by_its_count() {
    let mut s = server();
    refused(&mut s, &sweep_args(&["--max-depth", "lin(1,300000,1)"]), "ResourceExhausted", &["spec.max_depth.span", "300000 values", "max_values_per_range = 1000"]);
    // An unrelated upload is answered right after.
    s.run(&["put", data("wine.csv").to_str().unwrap(), "--name", "wine", "--json"]).json();
}

#[test]
fn values_per_range_at_the_cap_pass_and_above_are_refused() {
    let mut s = server_with("max_values_per_range = 50\n", &[]);
    started(&s, &["--max-depth", "lin(1,50,1)"]);
    refused(&mut s, &sweep_args(&["--max-depth", "lin(1,51,1)"]), "ResourceExhausted", &["spec.max_depth.span", "51 values", "max_values_per_range = 50"]);
    let list: Vec<String> = (1..=51).map(|i| i.to_string()).collect();
    refused(&mut s, &sweep_args(&["--min-split-rows", &list.join(",")]), "ResourceExhausted", &["spec.min_split_rows.values", "max_values_per_range = 50"]);
}

#[test]
fn an_absurd_span_count_is_refused_at_the_call() {
    let mut s = server();
    refused(&mut s, &sweep_args(&["--min-gain", "lin(0,1e300,1e-300)"]), "ResourceExhausted", &["spec.min_gain.span", "more than 2^53 values", "max_values_per_range"]);
    refused(&mut s, &sweep_args(&["--min-gain", "log(0.001,1,4000000000)"]), "ResourceExhausted", &["spec.min_gain.log_span.count", "4000000000 values"]);
}

#[test]
fn non_finite_range_values_are_refused_at_the_call() {
    let mut s = server();
    refused(&mut s, &sweep_args(&["--min-gain", "lin(0,inf,1)"]), "InvalidArgument", &["spec.min_gain.span", "finite"]);
    refused(&mut s, &sweep_args(&["--prune-alpha", "0,NaN"]), "InvalidArgument", &["spec.prune_alpha.values[1]", "not a finite number"]);
    refused(&mut s, &sweep_args(&["--max-depth", "lin(1,10,1e-320)"]), "ResourceExhausted", &["spec.max_depth.span", "max_values_per_range"]);
}

// ------------------------------------------------------------------ folds, repeats, units

/// The reproduction: 4,000,000,000 repeats on iris (the server aborted at 5 GB).
#[test]
fn four_billion_repeats_are_refused() {
    let mut s = server();
    refused(&mut s, &sweep_args(&["--max-depth", "2", "--repeats", "4000000000"]), "ResourceExhausted", &["spec.folds.repeats", "4000000000 repeats", "max_repeats = 20"]);
}

#[test]
fn repeats_at_the_cap_pass_and_above_are_refused() {
    let mut s = server_with("max_repeats = 3\n", &[]);
    started(&s, &["--max-depth", "2", "--repeats", "3"]);
    refused(&mut s, &sweep_args(&["--max-depth", "2", "--repeats", "4"]), "ResourceExhausted", &["spec.folds.repeats", "max_repeats = 3"]);
}

#[test]
fn folds_at_the_cap_pass_and_above_are_refused() {
    let mut s = server_with("max_folds = 10\n", &[]);
    started(&s, &["--max-depth", "2", "--k", "10"]);
    refused(&mut s, &sweep_args(&["--max-depth", "2", "--k", "11"]), "ResourceExhausted", &["spec.folds.k", "11 folds", "max_folds = 10"]);
}

#[test]
fn work_units_at_the_cap_pass_and_above_are_refused() {
    // 5 folds × 2 shaping keys = 10 units; × 3 keys = 15.
    let mut s = server_with("max_units_per_run = 10\n", &[]);
    started(&s, &["--min-leaf-rows", "1,2"]);
    refused(&mut s, &sweep_args(&["--min-leaf-rows", "1,2,3"]), "ResourceExhausted", &["spec.folds", "15 work units", "max_units_per_run = 10"]);
}

// ------------------------------------------------------------------ memory

/// The estimate a refused run gave, from its message.
fn estimate_of(line: &str) -> u64 {
    let after = line.split("needs about ").nth(1).unwrap_or_else(|| panic!("no estimate in: {line}"));
    after.split(' ').next().unwrap().parse().unwrap()
}

#[test]
fn a_run_above_the_memory_budget_is_refused_at_start() {
    let mut s = server_with("run_memory_bytes = 1000\n", &[]);
    let line = refused(&mut s, &sweep_args(&["--max-depth", "2"]), "ResourceExhausted", &["memory", "run_memory_bytes = 1000", "150 rows × 4 features"]);
    assert!(estimate_of(&line) > 1000, "{line}");
}

/// Two runs that fit the budget one at a time, with two worker slots: the second waits in
/// the queue until the first has ended, then runs.
#[test]
fn a_queued_run_waits_while_the_budget_is_taken() {
    let probe = Serve::start_with(ServeOptions { config: Some("run_memory_bytes = 1\ncpu_threads = 1\n".into()), ..Default::default() });
    probe.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json();
    let spec = ["--min-leaf-rows", "lin(1,4,1)"];
    let line = probe.run(&sweep_args(&spec)).fails();
    let need = estimate_of(&line);
    drop(probe);
    let config = format!("run_memory_bytes = {}\nconcurrent_runs = 2\ncpu_threads = 1\n", need + need / 2);
    let mut s = server_with(&config, &[("POLLARD_TEST_UNIT_DELAY_MS", "50")]);
    let a = started(&s, &spec);
    let b = started(&s, &spec);
    let (mut both, mut waited) = (false, false);
    wait_until("both runs to end", || {
        let (sa, sb) = states(&s, &a, &b);
        both |= sa == "running" && sb == "running";
        waited |= sa == "running" && sb == "queued";
        sa == "finished" && sb == "finished"
    });
    assert!(!both, "two runs ran at once over the memory budget");
    assert!(waited, "the second run was never seen waiting");
    assert!(s.log().contains("queued run waits for memory"), "{}", s.log());
    assert_alive(&mut s);
}

// ------------------------------------------------------------------ labels and listings

fn labels(n: usize, key_len: usize, value_len: usize) -> HashMap<String, String> {
    (0..n).map(|i| (format!("{i:0>key_len$}"), "v".repeat(value_len))).collect()
}

/// The reproduction: a 3.5 MB label (every unit rewrote it, the store grew 347 MB).
#[test]
fn a_3_5_mb_label_is_refused() {
    let mut s = server();
    let big = HashMap::from([("note".to_string(), "x".repeat(3_500_000))]);
    refused_raw(&mut s, big, tonic::Code::ResourceExhausted, &["labels['note']", "3500000 bytes", "max_label_value_bytes = 256"]);
}

#[test]
fn label_count_at_the_cap_passes_and_above_is_refused() {
    let mut s = server();
    start_raw(&s, labels(32, 4, 8)).unwrap();
    refused_raw(&mut s, labels(33, 4, 8), tonic::Code::ResourceExhausted, &["labels", "33 labels", "max_labels = 32"]);
}

#[test]
fn label_key_and_value_lengths_at_the_cap_pass_and_above_are_refused() {
    let mut s = server();
    start_raw(&s, labels(1, 64, 256)).unwrap();
    refused_raw(&mut s, labels(1, 65, 1), tonic::Code::ResourceExhausted, &["the key has 65 bytes", "max_label_key_bytes = 64"]);
    refused_raw(&mut s, labels(1, 1, 257), tonic::Code::ResourceExhausted, &["the value has 257 bytes", "max_label_value_bytes = 256"]);
    // A key of 10,000 bytes is quoted cut short.
    refused_raw(&mut s, labels(1, 10_000, 1), tonic::Code::ResourceExhausted, &["…", "max_label_key_bytes = 64"]);
}

#[test]
fn schedule_labels_are_capped_too() {
    let mut s = server();
    let key = "k".repeat(65);
    let label = format!("{key}=v");
    refused(&mut s, &["schedule", "create", "--dataset", "iris", "--cron", "30 2 * * *", "--max-depth", "2", "--label", &label], "ResourceExhausted", &["max_label_key_bytes = 64"]);
}

/// A listing page ends before it passes list_page_bytes and goes on with its token.
#[test]
fn a_listing_page_is_bounded_by_bytes() {
    let mut s = server_with("list_page_bytes = 4000\n", &[]);
    let mut ids = Vec::new();
    for _ in 0..6 {
        ids.push(start_raw(&s, labels(4, 8, 256)).unwrap().id);
    }
    let url = s.url.clone();
    let (pages, listed) = rt().block_on(async move {
        let mut c = RunsClient::connect(url).await.unwrap();
        let (mut pages, mut listed, mut token) = (Vec::new(), Vec::new(), String::new());
        loop {
            let r = c.list_runs(pb::ListRunsRequest { page_size: 50, page_token: token.clone(), ..Default::default() }).await.unwrap().into_inner();
            pages.push((r.runs.len(), r.runs.iter().map(prost::Message::encoded_len).sum::<usize>()));
            listed.extend(r.runs.into_iter().map(|x| x.id));
            if r.next_page_token.is_empty() {
                return (pages, listed);
            }
            token = r.next_page_token;
        }
    });
    assert!(pages.len() > 1, "one page held them all: {pages:?}");
    assert!(pages.iter().all(|&(n, bytes)| n == 1 || bytes <= 4000), "{pages:?}");
    ids.reverse();
    assert_eq!(listed, ids, "every run listed once, newest first");
    assert_alive(&mut s);
}

// ------------------------------------------------------------------ ids

/// The reproduction: a 10,000-character id (its echo was an 8 KB message).
#[test]
fn a_10000_character_id_is_refused_by_its_shape() {
    let mut s = server();
    let id = format!("run_{}", "a".repeat(10_000));
    for cmd in ["show", "cancel", "follow"] {
        refused(&mut s, &[cmd, &id], "InvalidArgument", &["not a run id", "…"]);
    }
    refused(&mut s, &["model", &id, "--format", "json"], "InvalidArgument", &["run_id", "not a run id"]);
    let sch = format!("sch_{}", "b".repeat(10_000));
    refused(&mut s, &["schedule", "show", &sch], "InvalidArgument", &["not a schedule id"]);
    let ds = format!("ds_{}", "c".repeat(10_000));
    refused(&mut s, &["sweep", "--dataset", &ds, "--max-depth", "2"], "InvalidArgument", &["dataset_id", "not a dataset id"]);
}

#[test]
fn unknown_well_formed_ids_are_not_found_and_long_names_are_cut() {
    let mut s = server();
    refused(&mut s, &["show", &format!("run_{}", "0".repeat(32))], "NotFound", &["no run with id"]);
    let name = "n".repeat(10_000);
    refused(&mut s, &["sweep", "--dataset", &name, "--max-depth", "2"], "NotFound", &["no dataset named", "…"]);
    refused(&mut s, &["runs", "--label", &name], "InvalidArgument", &["label", "not key=value", "…"]);
}

// ------------------------------------------------------------------ the queue

/// A slow first run holds the one worker; three more fill the queue; the next is refused,
/// and an idempotent retry of a queued run still gets its run.
#[test]
fn the_queue_is_capped_in_total() {
    // The first run's first unit is held for a minute: nothing moves while the test runs.
    let mut s = server_with("max_queued_runs = 3\ncpu_threads = 1\n", &[("POLLARD_TEST_UNIT_DELAY_MS", "60000")]);
    let first = started(&s, &["--min-leaf-rows", "lin(1,20,1)"]);
    wait_until("the first run to be planned", || show(&s, &first)["units_total"].as_u64().unwrap_or(0) > 0);
    let queued: Vec<String> = (0..3).map(|i| started(&s, &["--max-depth", "2", "--idempotency-key", &format!("k{i}")])).collect();
    refused(&mut s, &sweep_args(&["--max-depth", "2"]), "ResourceExhausted", &["queue", "3 runs are queued", "max_queued_runs = 3"]);
    assert_eq!(started(&s, &["--max-depth", "2", "--idempotency-key", "k1"]), queued[1]);
    // A queued run cancelled makes room for one more.
    s.run(&["cancel", &queued[0], "--json"]).json();
    started(&s, &["--max-depth", "2"]);
    refused(&mut s, &sweep_args(&["--max-depth", "3"]), "ResourceExhausted", &["max_queued_runs = 3"]);
}

// ------------------------------------------------------------------ failures of a run

#[test]
fn a_unit_that_panics_fails_its_run_not_the_server() {
    let mut s = server_with("", &[("POLLARD_TEST_PANIC_UNIT", "*")]);
    let id = started(&s, &["--max-depth", "2"]);
    let run = wait_terminal(&s, &id);
    assert_eq!(run["state"], "failed", "{run}");
    let reason = run["reason"].as_str().unwrap();
    assert!(reason.contains("internal error") && reason.contains("panics on purpose"), "{reason}");
    assert_alive(&mut s);
    // The next run is taken as usual (and fails the same way).
    let next = started(&s, &["--max-depth", "3"]);
    assert_eq!(wait_terminal(&s, &next)["state"], "failed");
}

/// Killed mid-way, then restarted where every unit panics: the resumed run ends failed,
/// and a further restart leaves it failed with the server up (no crash loop).
#[test]
fn a_run_that_panics_on_resume_ends_failed() {
    let mut s = server_with("cpu_threads = 1\n", &[("POLLARD_TEST_UNIT_DELAY_MS", "100")]);
    let id = started(&s, &["--min-leaf-rows", "lin(1,20,1)"]);
    wait_until("a unit to be stored", || show(&s, &id)["units_done"].as_u64().unwrap_or(0) >= 1);
    s.kill9();
    let mut options = s.options.clone();
    options.store = Some(s.store.clone());
    options.env = vec![("POLLARD_TEST_PANIC_UNIT".into(), "*".into())];
    let mut again = Serve::start_with(options);
    let run = wait_terminal(&again, &id);
    assert_eq!(run["state"], "failed", "{run}");
    assert!(run["reason"].as_str().unwrap().contains("panics on purpose"), "{run}");
    assert_alive(&mut again);
    let mut third = again.restart();
    assert_eq!(state(&third, &id), "failed");
    assert_alive(&mut third);
}

/// A run whose every execution aborts the process: after three deaths in a row with no
/// unit stored, the next start fails it instead of resuming it.
#[test]
fn a_run_that_keeps_killing_the_process_is_failed_not_resumed_forever() {
    // The first death is a SIGKILL while the run is running (each unit is held 2 s before it
    // is stored, so none is): an abort there could come before the StartRun reply.
    let mut s = server_with("", &[("POLLARD_TEST_UNIT_DELAY_MS", "2000")]);
    let id = started(&s, &["--max-depth", "2"]);
    wait_until("the run to start", || state(&s, &id) == "running");
    s.kill9();
    // Two more starts on the store, each aborting in the resumed run.
    for _ in 0..2 {
        let dir = TempDir::new("abort");
        let listen = format!("127.0.0.1:{}", super::process::free_port());
        let mut cmd = command(&["serve", "--listen", &listen, "--data", s.store.to_str().unwrap()]);
        cmd.env("POLLARD_TEST_ABORT_UNIT", "*").stdout(std::process::Stdio::null()).stderr(std::fs::File::create(dir.join("log")).unwrap());
        let mut child = KillOnDrop(cmd.spawn().unwrap());
        wait_until("the restarted process to abort", || child.0.try_wait().unwrap().is_some());
        assert!(!child.0.try_wait().unwrap().unwrap().success());
    }
    let mut options = s.options.clone();
    options.store = Some(s.store.clone());
    options.env.clear();
    let mut up = Serve::start_with(options);
    let run = wait_terminal(&up, &id);
    assert_eq!(run["state"], "failed", "{run}");
    assert!(run["reason"].as_str().unwrap().contains("stopped unexpectedly 3 times"), "{run}");
    assert_alive(&mut up);
}

/// The reproduction: with concurrent_runs = 1, a SIGKILL and a restart ran two runs
/// at once (the resumed one outside the worker slots).
#[test]
fn concurrent_runs_holds_after_a_restart() {
    let s = server_with("concurrent_runs = 1\ncpu_threads = 1\n", &[("POLLARD_TEST_UNIT_DELAY_MS", "50")]);
    let a = started(&s, &["--min-leaf-rows", "lin(1,12,1)"]);
    wait_until("the first run to store a unit", || show(&s, &a)["units_done"].as_u64().unwrap_or(0) >= 1);
    let b = started(&s, &["--min-leaf-rows", "lin(1,12,1)"]);
    assert_eq!(state(&s, &b), "queued");
    let mut s = s.restart();
    let (mut both, mut seen_a_alone) = (false, false);
    wait_until("both runs to finish", || {
        let (sa, sb) = states(&s, &a, &b);
        both |= sa == "running" && sb == "running";
        seen_a_alone |= sa == "running" && sb == "queued";
        sa == "finished" && sb == "finished"
    });
    assert!(!both, "two runs ran at once with concurrent_runs = 1");
    assert!(seen_a_alone, "the resumed run was never seen running alone");
    assert_alive(&mut s);
}

// ------------------------------------------------------------------ configuration

#[test]
fn caps_of_zero_are_refused_at_start() {
    let dir = TempDir::new("zero-cap");
    for (key, value) in [("max_queued_runs", "0"), ("run_memory_bytes", "0"), ("max_labels", "0"), ("max_folds", "1"), ("max_repeats", "5000000000")] {
        let path = dir.join("pollard.toml");
        std::fs::write(&path, format!("{key} = {value}\n")).unwrap();
        let store = dir.join("store");
        let e = super::process::pollard(&["serve", "--listen", "127.0.0.1:0", "--data", store.to_str().unwrap(), "--config", path.to_str().unwrap()]).fails();
        assert!(e.contains(key), "{key}: {e}");
    }
}

/// Explaining predictions sends a path per row back, so the rows one call may explain are
/// capped; predicting the same rows without paths is not.
#[test]
fn explained_rows_at_the_cap_pass_and_above_are_refused() {
    let mut s = server_with("max_explained_rows = 150\n", &[]);
    let id = started(&s, &["--max-depth", "1,3"]);
    assert_eq!(wait_terminal(&s, &id)["state"], "finished");
    let iris = data("iris.csv");
    let lines = s.run(&["predict", &id, iris.to_str().unwrap(), "--explain", "--json"]).json_lines();
    assert_eq!(lines.len(), 150);
    assert!(lines.iter().all(|l| l["path"].as_array().is_some_and(|p| !p.is_empty()) && l["leaf"].is_u64()), "{:?}", lines[0]);
    let dir = TempDir::new("explain-cap");
    let bigger = dir.join("iris151.csv");
    let text = std::fs::read_to_string(&iris).unwrap();
    let last = text.lines().last().unwrap().to_string();
    std::fs::write(&bigger, format!("{}\n{last}\n", text.trim_end())).unwrap();
    refused(&mut s, &["predict", &id, bigger.to_str().unwrap(), "--explain"], "ResourceExhausted", &["explain", "151 rows", "max_explained_rows = 150"]);
    assert_eq!(s.run(&["predict", &id, bigger.to_str().unwrap(), "--json"]).json_lines().len(), 151);
}
