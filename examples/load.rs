//! Load client for benches/load.sh: many concurrent clients, each on its own connection,
//! calling a running `pollard serve` in a fixed mix for a bounded time, then a summary:
//! calls per second, p50/p99 latency per call type, errors, and the server's peak RSS
//! (VmHWM of `/proc/PID/status`).
//!
//! cargo run --release --example load -- --server http://127.0.0.1:7311 --pid PID \
//!     [--clients 64] [--seconds 60] [--data tests/data/iris.csv]
//!
//! Data: iris from tests/data (source and licence in tests/data/SOURCES.md).

use std::collections::BTreeMap;
use std::time::{Duration, Instant};

use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use tonic::transport::Channel;
use tonic::Status;

#[path = "common/mod.rs"]
mod common;
use common::{connect, quantile, values};

/// The call types, in the order of the mix (each client walks it round and round from its
/// own starting point); a name listed twice is called twice as often.
const MIX: [Call; 10] = [Call::ListDatasets, Call::Predict, Call::GetRun, Call::ListRuns, Call::Upload, Call::Predict, Call::StartRun, Call::FollowRun, Call::ListDatasets, Call::GetRun];

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
enum Call {
    Upload,
    StartRun,
    GetRun,
    ListRuns,
    FollowRun,
    Predict,
    ListDatasets,
}

struct Args {
    server: String,
    pid: Option<u32>,
    clients: usize,
    seconds: u64,
    data: String,
}

fn args() -> Result<Args, String> {
    let mut a = Args { server: "http://127.0.0.1:7311".into(), pid: None, clients: 64, seconds: 60, data: "tests/data/iris.csv".into() };
    let mut it = std::env::args().skip(1);
    while let Some(flag) = it.next() {
        let mut value = || it.next().ok_or_else(|| format!("{flag} needs a value"));
        match flag.as_str() {
            "--server" => a.server = value()?,
            "--pid" => a.pid = Some(value()?.parse().map_err(|_| "--pid: a process id")?),
            "--clients" => a.clients = value()?.parse().map_err(|_| "--clients: a number")?,
            "--seconds" => a.seconds = value()?.parse().map_err(|_| "--seconds: a number")?,
            "--data" => a.data = value()?,
            other => return Err(format!("unknown option {other}")),
        }
    }
    if a.clients == 0 || a.seconds == 0 || a.seconds > 600 {
        return Err("--clients at least 1, --seconds from 1 to 600".into());
    }
    Ok(a)
}

/// What every client needs: the CSV bytes, a dataset, and a finished run with a model.
#[derive(Clone)]
struct Fixture {
    csv: Vec<u8>,
    dataset: String,
    run: String,
    /// Feature rows for Predict (iris's first 20 rows).
    rows: pb::Table,
}

fn upload_request(csv: &[u8]) -> impl tokio_stream::Stream<Item = pb::UploadChunk> {
    common::upload_request("load-iris", "target", csv)
}

fn small_sweep(dataset: &str) -> pb::StartRunRequest {
    pb::StartRunRequest {
        dataset_id: dataset.into(),
        spec: Some(pb::SweepSpec { max_depth: Some(values([1, 2, 3])), folds: Some(pb::FoldPlan { k: 3, ..Default::default() }), ..Default::default() }),
        ..Default::default()
    }
}

/// Iris's first 20 rows as a table of the four feature columns.
fn feature_rows(csv: &[u8]) -> pb::Table {
    let text = String::from_utf8_lossy(csv);
    let mut lines = text.lines();
    let names: Vec<String> = lines.next().unwrap_or_default().split(',').map(str::to_string).collect();
    let rows: Vec<Vec<f64>> = lines.take(20).map(|l| l.split(',').map(|c| c.parse().unwrap_or(f64::NAN)).collect()).collect();
    let columns = names
        .iter()
        .enumerate()
        .filter(|(_, n)| n.as_str() != "target")
        .map(|(i, n)| pb::TableColumn { name: n.clone(), cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells { values: rows.iter().map(|r| r[i]).collect(), missing: vec![] })) })
        .collect();
    pb::Table { columns }
}

async fn fixture(server: &str, data: &str) -> Result<Fixture, String> {
    let csv = std::fs::read(data).map_err(|e| format!("{data}: {e}"))?;
    let ch = connect(server).await?;
    let dataset = DatasetsClient::new(ch.clone()).upload(upload_request(&csv)).await.map_err(|e| format!("upload: {e}"))?.into_inner().id;
    let mut runs = RunsClient::new(ch);
    let run = runs.start_run(small_sweep(&dataset)).await.map_err(|e| format!("start: {e}"))?.into_inner().id;
    let deadline = Instant::now() + Duration::from_secs(60);
    loop {
        let info = runs.get_run(pb::GetRunRequest { id: run.clone() }).await.map_err(|e| format!("get: {e}"))?.into_inner();
        match info.state() {
            pb::RunState::Finished => break,
            pb::RunState::Failed | pb::RunState::Cancelled => return Err(format!("the fixture run ended {:?}: {}", info.state(), info.reason)),
            _ if Instant::now() > deadline => return Err("the fixture run did not finish within 60 s".into()),
            _ => tokio::time::sleep(Duration::from_millis(50)).await,
        }
    }
    let rows = feature_rows(&csv);
    Ok(Fixture { csv, dataset, run, rows })
}

async fn call(kind: Call, ch: &Channel, f: &Fixture) -> Result<(), Status> {
    match kind {
        Call::Upload => DatasetsClient::new(ch.clone()).upload(upload_request(&f.csv)).await.map(drop),
        Call::StartRun => RunsClient::new(ch.clone()).start_run(small_sweep(&f.dataset)).await.map(drop),
        Call::GetRun => RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: f.run.clone() }).await.map(drop),
        Call::ListRuns => RunsClient::new(ch.clone()).list_runs(pb::ListRunsRequest { page_size: 20, ..Default::default() }).await.map(drop),
        Call::FollowRun => {
            // The finished run's whole history, to its terminal event.
            let mut s = RunsClient::new(ch.clone()).follow_run(pb::FollowRunRequest { id: f.run.clone(), after_sequence: 0 }).await?.into_inner();
            while s.message().await?.is_some() {}
            Ok(())
        }
        Call::Predict => ModelsClient::new(ch.clone()).predict(pb::PredictRequest { run_id: f.run.clone(), rows: Some(f.rows.clone()), ..Default::default() }).await.map(drop),
        Call::ListDatasets => DatasetsClient::new(ch.clone()).list_datasets(pb::ListDatasetsRequest { page_size: 20, ..Default::default() }).await.map(drop),
    }
}

/// What one client saw: latencies per call type, and errors.
#[derive(Default)]
struct Tally {
    latencies: BTreeMap<Call, Vec<Duration>>,
    errors: BTreeMap<Call, Vec<String>>,
}

async fn client(index: usize, server: String, f: Fixture, until: Instant) -> Tally {
    let mut t = Tally::default();
    let ch = match connect(&server).await {
        Ok(c) => c,
        Err(e) => {
            t.errors.entry(Call::ListDatasets).or_default().push(format!("connect: {e}"));
            return t;
        }
    };
    let mut i = index;
    while Instant::now() < until {
        let kind = MIX[i % MIX.len()];
        i += 1;
        let start = Instant::now();
        let r = call(kind, &ch, &f).await;
        let took = start.elapsed();
        match r {
            Ok(()) => t.latencies.entry(kind).or_default().push(took),
            Err(e) => t.errors.entry(kind).or_default().push(format!("{:?}: {}", e.code(), e.message())),
        }
    }
    t
}

/// A `kB` line of /proc/PID/status, in MB.
fn status_mb(pid: u32, key: &str) -> Option<f64> {
    let text = std::fs::read_to_string(format!("/proc/{pid}/status")).ok()?;
    let line = text.lines().find(|l| l.starts_with(key))?;
    let kb: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kb / 1000.0)
}

#[tokio::main]
async fn main() {
    let a = common::or_exit("load", args(), 2);
    let f = common::or_exit("load", fixture(&a.server, &a.data).await.map_err(|e| format!("setting up: {e}")), 1);
    let rss_before = a.pid.and_then(|p| status_mb(p, "VmRSS:"));
    let start = Instant::now();
    let until = start + Duration::from_secs(a.seconds);
    let tasks: Vec<_> = (0..a.clients).map(|i| tokio::spawn(client(i, a.server.clone(), f.clone(), until))).collect();
    let mut all = Tally::default();
    for t in tasks {
        let t = t.await.expect("a client task panicked");
        for (k, v) in t.latencies {
            all.latencies.entry(k).or_default().extend(v);
        }
        for (k, v) in t.errors {
            all.errors.entry(k).or_default().extend(v);
        }
    }
    let elapsed = start.elapsed().as_secs_f64();
    let calls: usize = all.latencies.values().map(Vec::len).sum();
    let errors: usize = all.errors.values().map(Vec::len).sum();
    println!("{} clients for {:.1} s against {}", a.clients, elapsed, a.server);
    println!("{:<14} {:>8} {:>10} {:>10} {:>10}", "call", "calls", "per s", "p50 ms", "p99 ms");
    for (kind, mut l) in all.latencies {
        l.sort();
        println!("{:<14} {:>8} {:>10.1} {:>10.2} {:>10.2}", format!("{kind:?}"), l.len(), l.len() as f64 / elapsed, quantile(&l, 0.5), quantile(&l, 0.99));
    }
    println!("{:<14} {:>8} {:>10.1}", "all", calls, calls as f64 / elapsed);
    println!("errors: {errors}");
    for (kind, e) in &all.errors {
        println!("  {kind:?}: {} (first: {})", e.len(), e[0]);
    }
    if let Some(pid) = a.pid {
        let show = |v: Option<f64>| v.map(|x| format!("{x:.0} MB")).unwrap_or_else(|| "unknown".into());
        println!("server RSS before the load: {}; now: {}; peak (VmHWM): {}", show(rss_before), show(status_mb(pid, "VmRSS:")), show(status_mb(pid, "VmHWM:")));
    }
    if errors > 0 {
        std::process::exit(1);
    }
}
