//! Latency client for benches/latency.sh: one client on one connection, calls one after
//! another (no other load), against a running `pollard serve`. Measures, each `--repeats`
//! times, and prints median and p99:
//!
//! - `sweep100`: a 100-setting sweep of iris (max_depth 1..10 × ten min_leaf_rows values,
//!   the default 5-fold plan, refit of the pick), from sending StartRun to receiving the
//!   `finished` event on FollowRun;
//! - `get_run900`: GetRun of a finished 900-setting run (the reply carries every score);
//! - `list_runs50`: ListRuns of a 50-run page;
//! - `compute100`: the same 100-setting sweep run by the core in this process (plan, units,
//!   summary, refit), with no store, no transport and no parse: the part of `sweep100` that
//!   is tree work. Its median over `sweep100`'s median is the compute share.
//!
//! Lines that start with `result:` are read by benches/latency.sh; `setup:` names the dataset
//! and the 900-setting run for the Python client that runs after this one.
//!
//! cargo run --release --example latency -- --server http://127.0.0.1:7311 [--repeats 100] \
//!     [--data tests/data/iris.csv]
//!
//! Data: iris from tests/data (source and licence in tests/data/SOURCES.md).

use std::io::BufReader;
use std::sync::atomic::AtomicBool;
use std::time::{Duration, Instant};

use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::sweep::{self, Flow, Range, SweepSpec};
use tonic::transport::Channel;

#[path = "common/mod.rs"]
mod common;
use common::{connect, quantile, values};

/// The ten `min_leaf_rows` values of the 100-setting grid.
const LEAF_ROWS: [u32; 10] = [1, 2, 3, 4, 5, 6, 8, 10, 15, 20];

struct Args {
    server: String,
    repeats: usize,
    data: String,
}

fn args() -> Result<Args, String> {
    let mut a = Args { server: "http://127.0.0.1:7311".into(), repeats: 100, data: "tests/data/iris.csv".into() };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        let mut value = || it.next().ok_or_else(|| format!("{flag} needs a value"));
        match flag.as_str() {
            "--server" => a.server = value()?,
            "--repeats" => a.repeats = value()?.parse().map_err(|_| "--repeats: a number")?,
            "--data" => a.data = value()?,
            other => return Err(format!("unknown option {other}")),
        }
    }
    if !(5..=10_000).contains(&a.repeats) {
        return Err("--repeats from 5 to 10000".into());
    }
    Ok(a)
}

fn sweep100(dataset: &str) -> pb::StartRunRequest {
    pb::StartRunRequest {
        dataset_id: dataset.into(),
        spec: Some(pb::SweepSpec { max_depth: Some(values(1..=10)), min_leaf_rows: Some(values(LEAF_ROWS)), ..Default::default() }),
        ..Default::default()
    }
}

fn sweep900(dataset: &str) -> pb::StartRunRequest {
    pb::StartRunRequest {
        dataset_id: dataset.into(),
        spec: Some(pb::SweepSpec { max_depth: Some(values(1..=30)), min_leaf_rows: Some(values(1..=30)), ..Default::default() }),
        ..Default::default()
    }
}

/// Starts a run and reads its events until the terminal one; an error unless it finished.
async fn start_and_follow(runs: &mut RunsClient<Channel>, request: pb::StartRunRequest) -> Result<String, String> {
    let id = runs.start_run(request).await.map_err(|e| format!("start: {e}"))?.into_inner().id;
    let mut events = runs.follow_run(pb::FollowRunRequest { id: id.clone(), after_sequence: 0 }).await.map_err(|e| format!("follow: {e}"))?.into_inner();
    while let Some(e) = events.message().await.map_err(|e| format!("follow: {e}"))? {
        match e.kind {
            Some(pb::run_event::Kind::Finished(_)) => return Ok(id),
            Some(pb::run_event::Kind::Failed(why)) | Some(pb::run_event::Kind::Cancelled(why)) => return Err(format!("run {id} ended: {why}")),
            _ => {}
        }
    }
    Err(format!("the events of run {id} ended without a terminal event"))
}

fn report(name: &str, mut took: Vec<Duration>) {
    took.sort();
    println!("result: {name} client=rust n={} median_ms={:.3} p99_ms={:.3}", took.len(), quantile(&took, 0.5), quantile(&took, 0.99));
}

/// `repeats` timings of `call`, after `warm` untimed ones.
async fn timed<F, Fut>(repeats: usize, warm: usize, mut call: F) -> Result<Vec<Duration>, String>
where
    F: FnMut() -> Fut,
    Fut: std::future::Future<Output = Result<(), String>>,
{
    for _ in 0..warm {
        call().await?;
    }
    let mut out = Vec::with_capacity(repeats);
    for _ in 0..repeats {
        let start = Instant::now();
        call().await?;
        out.push(start.elapsed());
    }
    Ok(out)
}

/// The 100-setting sweep on the core, in this process: the tree work of `sweep100`.
fn compute(data_path: &str, repeats: usize) -> Result<Vec<Duration>, String> {
    let file = std::fs::File::open(data_path).map_err(|e| format!("{data_path}: {e}"))?;
    let options = CsvOptions::new("target");
    let data = read_dataset(BufReader::new(file), &options).map_err(|e| format!("{data_path}: {e}"))?;
    let spec = SweepSpec {
        max_depth: Some(Range::Values((1..=10).map(|d| Some(d as f64)).collect())),
        min_leaf_rows: Some(Range::Values(LEAF_ROWS.iter().map(|&d| Some(d as f64)).collect())),
        ..SweepSpec::default()
    };
    let sink = |_: &sweep::UnitResult, _: sweep::Progress| Flow::Continue;
    let once = || -> Result<Duration, String> {
        let start = Instant::now();
        let (plan, result) = sweep::sweep(&data, &spec, &sink, &AtomicBool::new(false)).map_err(|e| e.to_string())?;
        let took = start.elapsed();
        if plan.settings.len() != 100 || result.model.is_none() {
            return Err(format!("the core sweep made {} settings and {} model", plan.settings.len(), if result.model.is_some() { "a" } else { "no" }));
        }
        Ok(took)
    };
    for _ in 0..5 {
        once()?;
    }
    (0..repeats).map(|_| once()).collect()
}

async fn measure(a: &Args) -> Result<(), String> {
    let csv = std::fs::read(&a.data).map_err(|e| format!("{}: {e}", a.data))?;
    let ch = connect(&a.server).await?;
    let dataset = DatasetsClient::new(ch.clone()).upload(common::upload_request("latency-iris", "target", &csv)).await.map_err(|e| format!("upload: {e}"))?.into_inner().id;
    let mut runs = RunsClient::new(ch.clone());
    let big = start_and_follow(&mut runs, sweep900(&dataset)).await?;
    println!("setup: dataset={dataset} run900={big}");

    let sweeps = timed(a.repeats, 10, || {
        let mut runs = runs.clone();
        let request = sweep100(&dataset);
        async move { start_and_follow(&mut runs, request).await.map(drop) }
    })
    .await?;
    report("sweep100", sweeps);

    // The runs above (1 + 10 untimed + the timed sweeps), topped up to at least 50 to list.
    for _ in (a.repeats + 11)..50 {
        start_and_follow(&mut runs, sweep100(&dataset)).await?;
    }
    let gets = timed(a.repeats, 10, || {
        let mut runs = runs.clone();
        let id = big.clone();
        async move {
            let info = runs.get_run(pb::GetRunRequest { id }).await.map_err(|e| format!("get: {e}"))?.into_inner();
            if info.scores.len() != 900 {
                return Err(format!("GetRun returned {} scores, not 900", info.scores.len()));
            }
            Ok(())
        }
    })
    .await?;
    report("get_run900", gets);

    let lists = timed(a.repeats, 10, || {
        let mut runs = runs.clone();
        async move {
            let page = runs.list_runs(pb::ListRunsRequest { page_size: 50, ..Default::default() }).await.map_err(|e| format!("list: {e}"))?.into_inner();
            if page.runs.len() != 50 {
                return Err(format!("ListRuns returned {} runs, not 50", page.runs.len()));
            }
            Ok(())
        }
    })
    .await?;
    report("list_runs50", lists);

    let data = a.data.clone();
    let repeats = a.repeats;
    let work = tokio::task::spawn_blocking(move || compute(&data, repeats)).await.map_err(|e| e.to_string())??;
    report("compute100", work);
    Ok(())
}

#[tokio::main]
async fn main() {
    let a = common::or_exit("latency", args(), 2);
    common::or_exit("latency", measure(&a).await, 1);
}
