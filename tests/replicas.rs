//! Several `pollard serve` processes sharing one PostgreSQL database (store = "postgres"):
//! a throwaway cluster (tests/support/postgres.rs) and three real server processes on
//! loopback ports (tests/support/process.rs).
//!
//! Data: the open diabetes table in tests/data (source and licence in tests/data/SOURCES.md).
//! No fixed sleeps: every wait is on a condition with a deadline.

use std::time::{Duration, Instant};

use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::runs_client::RunsClient;
use tonic::transport::Channel;

#[path = "support/postgres.rs"]
mod pg;
#[path = "support/process.rs"]
mod process;
use process::{Serve, ServeOptions, POLL};

const PATIENCE: Duration = Duration::from_secs(120);

async fn channel(s: &Serve) -> Channel {
    Channel::from_shared(s.url.clone()).unwrap().connect().await.unwrap()
}

async fn upload(ch: Channel) -> pb::DatasetInfo {
    let bytes = std::fs::read(process::data("diabetes.csv")).unwrap();
    let mut msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: "diabetes".into(), format: pb::DataFormat::Csv as i32, target: "target".into(), categorical: vec![] })) }];
    for chunk in bytes.chunks(64 * 1024) {
        msgs.push(pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(chunk.to_vec())) });
    }
    DatasetsClient::new(ch).upload(tokio_stream::iter(msgs)).await.unwrap().into_inner()
}

/// 6 shaping keys (min_leaf_rows) × 5 folds × 10 repeats = 300 work units.
fn spec() -> pb::SweepSpec {
    let values = |v: &[f64]| Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values: v.iter().map(|&x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(x)) }).collect() })) });
    pb::SweepSpec {
        min_leaf_rows: values(&[1.0, 2.0, 3.0, 5.0, 8.0, 13.0]),
        max_depth: values(&[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
        folds: Some(pb::FoldPlan { scheme: "shuffled".into(), k: 5, repeats: 10, column: String::new() }),
        seed: 11,
        ..Default::default()
    }
}

async fn start_run(ch: Channel) -> pb::RunInfo {
    RunsClient::new(ch).start_run(pb::StartRunRequest { dataset_name: "diabetes".into(), spec: Some(spec()), ..Default::default() }).await.unwrap().into_inner()
}

/// Every event of a run from the start until its stream ends.
async fn follow(ch: Channel, id: String) -> Vec<pb::RunEvent> {
    let mut stream = RunsClient::new(ch).follow_run(pb::FollowRunRequest { id: id.clone(), after_sequence: 0 }).await.unwrap().into_inner();
    let deadline = Instant::now() + PATIENCE;
    let mut out = Vec::new();
    loop {
        let next = tokio::time::timeout_at(deadline.into(), stream.message()).await.unwrap_or_else(|_| panic!("run {id}: no end of events after {} events", out.len()));
        match next.unwrap() {
            Some(ev) => out.push(ev),
            None => return out,
        }
    }
}

async fn finished(ch: Channel, id: &str) -> pb::RunInfo {
    let run = RunsClient::new(ch).get_run(pb::GetRunRequest { id: id.into() }).await.unwrap().into_inner();
    assert_eq!(run.state(), pb::RunState::Finished, "reason: {}", run.reason);
    run
}

/// One database, three replicas: a run started on one is followed on another; the replica
/// executing it is killed with SIGKILL mid-run. Another replica takes the run over once
/// the lease expires; the follower gets every event once; the scores equal a single-node
/// sled run of the same spec; the units were computed by at least two replicas.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_replicas_share_one_database_and_survive_a_sigkill() {
    let cluster = match pg::Cluster::start() {
        Ok(c) => c,
        Err(why) => {
            assert!(std::env::var(pg::REQUIRE).as_deref() != Ok("1"), "{}=1 and PostgreSQL is not usable: {why}", pg::REQUIRE);
            eprintln!("skipped: {why}");
            return;
        }
    };
    let url = cluster.fresh_database("replicas");
    let database = url.rsplit('/').next().unwrap().to_string();
    let options = ServeOptions {
        config: Some(format!("store = \"postgres\"\ndatabase_url = \"{url}\"\nlease_secs = 3\ncpu_threads = 1\n")),
        // Slow units down, so the kill lands mid-run.
        env: vec![("POLLARD_TEST_UNIT_DELAY_MS".into(), "20".into())],
        ..ServeOptions::default()
    };
    let mut replicas: Vec<Serve> = (0..3).map(|_| Serve::start_with(options.clone())).collect();
    let ch: Vec<Channel> = futures_join(&replicas).await;

    upload(ch[0].clone()).await;
    let run = start_run(ch[0].clone()).await;
    // Wait until a replica leased the run and stored a few units.
    let deadline = Instant::now() + PATIENCE;
    let owner = loop {
        let row = cluster.sql(&database, &format!("SELECT coalesce(lease_owner, ''), (SELECT count(*) FROM units WHERE run_id = '{0}') FROM runs WHERE id = '{0}'", run.id));
        let (owner, units) = row.trim().split_once('|').unwrap();
        if !owner.is_empty() && units.parse::<u32>().unwrap() >= 5 {
            break owner.to_string();
        }
        assert!(Instant::now() < deadline, "no replica stored units of the run: {row}");
        std::thread::sleep(POLL);
    };
    let victim = replicas.iter().position(|r| owner.ends_with(&format!(":{}", r.pid()))).unwrap_or_else(|| panic!("the lease owner {owner} is none of the replicas"));
    let watcher = (victim + 1) % 3;
    let follower = tokio::spawn(follow(ch[watcher].clone(), run.id.clone()));
    replicas[victim].kill9();

    let events = follower.await.unwrap();
    let got = finished(ch[watcher].clone(), &run.id).await;
    assert_eq!(got.units_done, got.units_total);
    assert_eq!(got.units_total, 300);
    // Every event once, in order, ending with the finish.
    for (i, e) in events.iter().enumerate() {
        assert_eq!(e.sequence, i as u64 + 1, "event {i} of {}", events.len());
    }
    assert!(matches!(events.last().and_then(|e| e.kind.as_ref()), Some(pb::run_event::Kind::Finished(_))));
    let progress: Vec<u32> = events.iter().filter_map(|e| match &e.kind {
        Some(pb::run_event::Kind::Progress(p)) => Some(p.units_done),
        _ => None,
    }).collect();
    assert_eq!(progress, (1..=300).collect::<Vec<u32>>(), "one progress event per unit, counted once");
    let workers = cluster.sql(&database, &format!("SELECT count(DISTINCT worker), count(*) FROM units WHERE run_id = '{}'", run.id));
    let (workers, units) = workers.trim().split_once('|').unwrap();
    assert_eq!(units, "300");
    assert!(workers.parse::<u32>().unwrap() >= 2, "units were computed by {workers} replica(s)");
    // A postgres replica keeps nothing in the data directory it was given.
    for r in &replicas {
        assert!(!r.store.exists(), "{} was created", r.store.display());
    }

    // The same spec on one sled server scores the same.
    let single = Serve::start_with(ServeOptions::default());
    let sch = channel(&single).await;
    upload(sch.clone()).await;
    let alone = start_run(sch.clone()).await;
    follow(sch.clone(), alone.id.clone()).await;
    let alone = finished(sch, &alone.id).await;
    assert_eq!(got.scores, alone.scores);
    assert_eq!((got.picked, got.best), (alone.picked, alone.best));
    drop(replicas);
}

async fn futures_join(replicas: &[Serve]) -> Vec<Channel> {
    let mut out = Vec::new();
    for r in replicas {
        out.push(channel(r).await);
    }
    out
}
