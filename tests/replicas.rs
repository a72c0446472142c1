//! Several `pollard serve` processes sharing one PostgreSQL database (store = "postgres"):
//! a throwaway cluster (tests/support/postgres.rs) and three real server processes on
//! loopback ports (tests/support/process.rs).
//!
//! Data: the open diabetes table in tests/data (source and licence in tests/data/SOURCES.md).
//! No fixed sleeps: every wait is on a condition with a deadline.

use std::sync::Arc;
use std::time::{Duration, Instant};

use pollard::clock::TestClock;
use pollard::config::Config;
use pollard::pb;
use pollard::pb::schedules_client::SchedulesClient;
use pollard::store::PostgresStore;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::runs_client::RunsClient;
use tonic::transport::Channel;

#[path = "support/postgres.rs"]
mod pg;
#[path = "support/process.rs"]
mod process;
#[path = "support/server.rs"]
mod server;
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

/// One database, three replicas: a run started on replica 1 is followed on replica 3;
/// replica 2, which computes some of its units, is killed with SIGKILL mid-run. Its claimed
/// units go to the others once their lease expires; the follower gets every event once; the
/// scores equal a single-node sled run of the same spec; the unit rows name at least two
/// replicas as their workers.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn three_replicas_share_one_database_and_survive_a_sigkill() {
    let Some(cluster) = pg::own_cluster() else { return };
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
    // The worker name replica 2 records in the unit rows it stores (host:pid).
    let victim = format!("%:{}", replicas[1].pid());

    upload(ch[0].clone()).await;
    let run = start_run(ch[0].clone()).await;
    let follower = tokio::spawn(follow(ch[2].clone(), run.id.clone()));
    // Wait until replica 2 stored a few units of the run and the run is far from done.
    let deadline = Instant::now() + PATIENCE;
    loop {
        let row = cluster.sql(&database, &format!("SELECT count(*) FILTER (WHERE worker LIKE '{}'), count(*) FROM units WHERE run_id = '{}'", victim, run.id));
        let (mine, all) = row.trim().split_once('|').unwrap();
        let (mine, all): (u32, u32) = (mine.parse().unwrap(), all.parse().unwrap());
        assert!(all < 200, "the run got far ({all} units) before replica 2 stored 3 of them: {row}");
        if mine >= 3 {
            break;
        }
        assert!(Instant::now() < deadline, "replica 2 stored no units of the run: {row}");
        std::thread::sleep(POLL);
    }
    replicas[1].kill9();
    let held = cluster.sql(&database, &format!("SELECT count(*) FROM unit_claims WHERE run_id = '{}' AND owner LIKE '{}'", run.id, victim));
    eprintln!("replica 2 killed holding {} unit claim(s)", held.trim());

    let events = follower.await.unwrap();
    let got = finished(ch[2].clone(), &run.id).await;
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
    // Each setting's score announced once, whichever replica stored its key's last split.
    let mut scored: Vec<u32> = events.iter().filter_map(|e| match &e.kind {
        Some(pb::run_event::Kind::Scored(s)) => Some(s.index),
        _ => None,
    }).collect();
    scored.sort_unstable();
    assert_eq!(scored, (0..got.scores.len() as u32).collect::<Vec<u32>>(), "one scored event per setting");
    let workers = cluster.sql(&database, &format!("SELECT count(DISTINCT worker), count(*), count(DISTINCT unit) FROM units WHERE run_id = '{}'", run.id));
    let cols: Vec<&str> = workers.trim().split('|').collect();
    assert_eq!(&cols[1..], ["300", "300"], "every unit stored once");
    assert!(cols[0].parse::<u32>().unwrap() >= 2, "units were computed by {} replica(s)", cols[0]);
    let survivors = cluster.sql(&database, &format!("SELECT count(DISTINCT worker) FROM units WHERE run_id = '{}' AND worker NOT LIKE '{}'", run.id, victim));
    assert!(survivors.trim().parse::<u32>().unwrap() >= 1, "no surviving replica computed a unit");
    assert_eq!(cluster.sql(&database, "SELECT count(*) FROM unit_claims").trim(), "0", "claims outlived the finished run");
    // A postgres replica keeps nothing in the data directory it was given.
    for r in &replicas {
        assert!(!r.store.exists(), "{} was created", r.store.display());
    }

    // The same spec on one sled server scores the same.
    let single = Serve::start_with(ServeOptions::default());
    let sch = channel(&single).await;
    upload(sch.clone()).await;
    let alone = start_run(sch.clone()).await;
    let alone_events = follow(sch.clone(), alone.id.clone()).await;
    let alone = finished(sch, &alone.id).await;
    assert_eq!(got.scores, alone.scores);
    assert_eq!((got.picked, got.best), (alone.picked, alone.best));
    assert_eq!(events.len(), alone_events.len(), "the same number of events as on one node");
    drop(replicas);
}

/// Unix milliseconds of an RFC 3339 instant.
fn ms(t: &str) -> i64 {
    chrono::DateTime::parse_from_rfc3339(t).unwrap().timestamp_millis()
}

fn rfc3339(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms).unwrap().to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

/// Three replicas (servers in this process, each with its own store on one database) on
/// one test clock: a schedule every 6 hours fires once per instant over a simulated week,
/// whichever replica gets there first, and each fire queues one run.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_schedule_on_three_replicas_fires_once_per_instant_over_a_simulated_week() {
    let Some(url) = pg::fresh_database("replica_schedules") else { return };
    let clock = TestClock::new(ms("2027-05-02T23:00:00Z"));
    let config = Config { cpu_threads: 1, lease_secs: 3, ..Config::default() };
    let mut servers = Vec::new();
    let mut ch = Vec::new();
    for _ in 0..3 {
        let store = PostgresStore::open(&url).unwrap();
        let server = server::start_with_clock(Arc::new(store), config.clone(), clock.clone()).await;
        ch.push(server.channel().await);
        servers.push(server);
    }
    upload(ch[0].clone()).await;
    let spec = pb::SweepSpec { max_depth: spec().max_depth, folds: Some(pb::FoldPlan { scheme: "shuffled".into(), k: 3, repeats: 1, column: String::new() }), seed: 5, ..Default::default() };
    let request = pb::CreateScheduleRequest { name: "six-hourly".into(), cron: "0 */6 * * *".into(), time_zone: "UTC".into(), dataset_name: "diabetes".into(), spec: Some(spec), ..Default::default() };
    let schedule = SchedulesClient::new(ch[1].clone()).create_schedule(request).await.unwrap().into_inner();
    let instants: Vec<i64> = (0..28).map(|i| ms("2027-05-03T00:00:00Z") + i * 6 * 3_600_000).collect();
    for (i, &at) in instants.iter().enumerate() {
        clock.set(at);
        let fires = wait_fires(&ch[i % 3], &schedule.id, i + 1).await;
        let fire = fires.last().unwrap();
        assert_eq!(fire.scheduled_for, rfc3339(at), "fire {i}");
        assert!(!fire.run_id.is_empty(), "fire {i} queued no run: {fire:?}");
        follow(ch[(i + 1) % 3].clone(), fire.run_id.clone()).await;
        finished(ch[(i + 2) % 3].clone(), &fire.run_id).await;
    }
    // Every replica has seen the last instant; none records another fire.
    let fires = wait_fires(&ch[2], &schedule.id, instants.len()).await;
    assert_eq!(fires.len(), instants.len(), "one fire per instant");
    assert_eq!(fires.iter().map(|f| f.sequence).collect::<Vec<_>>(), (1..=instants.len() as u64).collect::<Vec<_>>());
    assert_eq!(fires.iter().map(|f| f.scheduled_for.clone()).collect::<Vec<_>>(), instants.iter().map(|&t| rfc3339(t)).collect::<Vec<_>>());
    let runs = RunsClient::new(ch[0].clone()).list_runs(pb::ListRunsRequest { schedule_id: schedule.id.clone(), page_size: 100, ..Default::default() }).await.unwrap().into_inner().runs;
    assert_eq!(runs.len(), instants.len(), "one run per fire");
    for s in servers {
        s.stop().await;
    }
}

/// Waits until the schedule has `n` fire records; returns them oldest first.
async fn wait_fires(ch: &Channel, id: &str, n: usize) -> Vec<pb::Fire> {
    server::wait_fires(ch, id, n, PATIENCE).await
}

async fn futures_join(replicas: &[Serve]) -> Vec<Channel> {
    let mut out = Vec::new();
    for r in replicas {
        out.push(channel(r).await);
    }
    out
}
