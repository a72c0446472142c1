//! Schedules end to end, on a test clock: firing through the scheduler at the DST instants,
//! overlap skipping, missed-fire catch-up after an outage, retention, drift reports between
//! two dataset versions, and schedules surviving a restart.
//!
//! Data: iris from tests/data (Fisher 1936, via the UCI repository; source and licence in
//! tests/data/SOURCES.md). The two dataset versions of the drift test are iris's first 100
//! rows (setosa and versicolor only) and then all 150 rows (virginica arrives). Setosa is
//! separable from the other species by one petal-length threshold (a well-known property of
//! the data, visible in Fisher's own table), so a depth-1 tree is perfect on version 1,
//! while three species need at least two splits: the picked max_depth must move up.
//!
//! Tests that only need the scheduler's decisions call [`pollard::scheduler::tick`] on a
//! shared state with no worker, so queued runs stay queued for as long as a test wants.
//! No fixed sleeps: every wait is on a condition, with a deadline.

use std::collections::BTreeSet;
use std::sync::Arc;
use std::time::{Duration, Instant};

use pollard::clock::TestClock;
use pollard::config::Config;
use pollard::job::RunState;
use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::pb::schedules_client::SchedulesClient;
use pollard::pb::schedules_server::Schedules;
use pollard::rpc::Api;
use pollard::store::{RunFilter, SledStore};
use pollard::worker::Shared;
use tonic::transport::Channel;
use tonic::{Code, Request};

const PATIENCE: Duration = Duration::from_secs(45);

/// RFC 3339 → Unix ms.
fn ms(t: &str) -> i64 {
    chrono::DateTime::parse_from_rfc3339(t).unwrap().timestamp_millis()
}

fn iris() -> String {
    std::fs::read_to_string(format!("{}/tests/data/iris.csv", env!("CARGO_MANIFEST_DIR"))).unwrap()
}

/// The header and the first `rows` data rows of iris.
fn iris_head(rows: usize) -> Vec<u8> {
    let text = iris();
    let mut lines: Vec<&str> = text.lines().take(rows + 1).collect();
    lines.push("");
    lines.join("\n").into_bytes()
}

fn depths(v: &[f64]) -> Option<pb::LimitRange> {
    let values = v.iter().map(|x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(*x)) }).collect();
    Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values })) })
}

/// A small classification template: max_depth 1..4, stratified 5-fold, accuracy.
fn template() -> pb::SweepSpec {
    pb::SweepSpec {
        target: "target".into(),
        max_depth: depths(&[1.0, 2.0, 3.0, 4.0]),
        folds: Some(pb::FoldPlan { scheme: "stratified".into(), k: 5, repeats: 1, column: String::new() }),
        metric: "accuracy".into(),
        seed: 11,
        ..Default::default()
    }
}

fn request(cron: &str, zone: &str) -> pb::CreateScheduleRequest {
    pb::CreateScheduleRequest { name: "nightly".into(), cron: cron.into(), time_zone: zone.into(), dataset_name: "iris".into(), spec: Some(template()), ..Default::default() }
}

fn config() -> Config {
    Config { cpu_threads: 2, ..Config::default() }
}

// ------------------------------------------------------------------ without a server

/// Shared state with a test clock and no worker: queued runs stay queued.
fn quiet(start: &str) -> (Api, Arc<TestClock>) {
    quiet_on(SledStore::open_temporary().unwrap(), start)
}

/// [`quiet`] on a given store (a clone of it lets the test look at its files).
fn quiet_on(store: SledStore, start: &str) -> (Api, Arc<TestClock>) {
    let clock = TestClock::new(ms(start));
    let shared = Shared::with_clock(Arc::new(store), config(), clock.clone()).unwrap();
    (Api { shared }, clock)
}

async fn put(api: &Api, bytes: Vec<u8>) -> pb::DatasetInfo {
    api.store_dataset("iris".into(), "target".into(), vec![], pollard::rpc::datasets::Bytes::Memory(bytes)).await.unwrap()
}

async fn fires(api: &Api, id: &str) -> Vec<pb::Fire> {
    let mut f = api.list_fires(Request::new(pb::ListFiresRequest { schedule_id: id.into(), page_size: 500, page_token: String::new() })).await.unwrap().into_inner().fires;
    f.reverse();
    f
}

fn outcome(f: &pb::Fire) -> pb::FireOutcome {
    pb::FireOutcome::try_from(f.outcome).unwrap()
}

fn cancel(api: &Api, run_id: &str) {
    let now = api.shared.now();
    api.shared.store.end_run(run_id, RunState::Cancelled, "test: end the run", now).unwrap().expect("the run was active");
}

#[tokio::test]
async fn a_busy_previous_run_skips_the_fire_and_an_outage_is_caught_up_once() {
    let (api, clock) = quiet("2027-05-01T00:00:00Z");
    put(&api, iris_head(150)).await;
    let s = api.create_schedule(Request::new(request("0 3 * * *", "UTC"))).await.unwrap().into_inner();
    assert_eq!(s.next_fire_at, "2027-05-01T03:00:00.000Z");

    // Day 1: on time, a run is queued (and stays queued: there is no worker).
    clock.set(ms("2027-05-01T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    // Day 2: the day-1 run is still queued, so the fire is skipped and names it.
    clock.set(ms("2027-05-02T03:00:05Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    assert_eq!(f.len(), 2, "{f:?}");
    assert_eq!(outcome(&f[0]), pb::FireOutcome::Started);
    assert_eq!(f[0].scheduled_for, "2027-05-01T03:00:00.000Z");
    assert_eq!(outcome(&f[1]), pb::FireOutcome::SkippedBusy);
    assert_eq!(f[1].run_id, f[0].run_id);
    let first = api.shared.store.run(&f[0].run_id).unwrap().unwrap();
    assert_eq!((first.state, first.schedule_id.as_deref()), (RunState::Queued, Some(s.id.as_str())));
    assert_eq!(first.created_at, ms("2027-05-01T03:00:00Z"), "the run is stamped by the server's clock");

    // An outage from just after day 2 to day 7 05:00: days 3, 4, 5, 6 and 7 (07 03:00 is two
    // hours old, past the 300 s grace) are missed; catch-up "once" starts exactly one run.
    cancel(&api, &f[0].run_id);
    clock.set(ms("2027-05-07T05:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    assert_eq!(f.len(), 3, "{f:?}");
    assert_eq!(outcome(&f[2]), pb::FireOutcome::Started);
    assert_eq!(f[2].missed, 5);
    assert_eq!(f[2].scheduled_for, "2027-05-07T03:00:00.000Z", "the catch-up run stands for the latest missed fire");
    assert_eq!(f[2].handled_at, "2027-05-07T05:00:00.000Z");
    let runs = api.shared.store.list_runs(&RunFilter { schedule_id: Some(s.id.clone()), ..RunFilter::default() }, None, 100).unwrap().0;
    assert_eq!(runs.len(), 2, "one run for day 1 and one catch-up run");

    // Another tick at the same instant changes nothing.
    pollard::scheduler::tick(&api.shared).await;
    assert_eq!(fires(&api, &s.id).await.len(), 3);

    // With catch-up "skip", the same outage starts nothing and records why.
    let skip = api.create_schedule(Request::new(pb::CreateScheduleRequest { catch_up: pb::CatchUp::Skip as i32, ..request("0 4 * * *", "UTC") })).await.unwrap().into_inner();
    clock.set(ms("2027-05-10T06:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &skip.id).await;
    assert_eq!(f.len(), 1, "{f:?}");
    assert_eq!(outcome(&f[0]), pb::FireOutcome::SkippedMissed);
    // 05-08, 05-09 and 05-10 at 04:00 fall after the creation at 05-07 05:00.
    assert_eq!(f[0].missed, 3);
    assert!(f[0].run_id.is_empty());
}

/// A fire when the queue holds max_queued_runs runs is recorded as skipped, with the cap
/// named, and starts no run; once there is room the next fire starts one.
#[tokio::test]
async fn a_fire_over_the_queue_cap_is_skipped() {
    let clock = TestClock::new(ms("2027-05-01T00:00:00Z"));
    let shared = Shared::with_clock(Arc::new(SledStore::open_temporary().unwrap()), Config { max_queued_runs: 1, ..config() }, clock.clone()).unwrap();
    let api = Api { shared };
    let iris = put(&api, iris_head(150)).await;
    let s = api.create_schedule(Request::new(request("0 3 * * *", "UTC"))).await.unwrap().into_inner();
    // One run fills the queue (there is no worker to take it).
    let other = api.queue_run(&pollard::access::Caller::anonymous(), pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(template()), ..Default::default() }).await.unwrap();
    let e = api.queue_run(&pollard::access::Caller::anonymous(), pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(template()), ..Default::default() }).await.unwrap_err();
    assert_eq!(e.code(), Code::ResourceExhausted, "{e:?}");
    assert!(e.message().contains("max_queued_runs = 1"), "{e:?}");
    clock.set(ms("2027-05-01T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    assert_eq!(f.len(), 1, "{f:?}");
    assert_eq!(outcome(&f[0]), pb::FireOutcome::SkippedQueueFull);
    assert!(f[0].run_id.is_empty() && f[0].detail.contains("max_queued_runs = 1"), "{:?}", f[0]);
    assert_eq!(api.shared.store.queued_count().unwrap(), 1);
    // Room again: the next day's fire starts its run.
    cancel(&api, &other.id);
    clock.set(ms("2027-05-02T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    assert_eq!(outcome(&f[1]), pb::FireOutcome::Started);
}

#[tokio::test]
async fn skip_unchanged_waits_for_a_new_version() {
    let (api, clock) = quiet("2027-05-01T00:00:00Z");
    put(&api, iris_head(150)).await;
    let s = api.create_schedule(Request::new(pb::CreateScheduleRequest { skip_unchanged: true, ..request("0 3 * * *", "UTC") })).await.unwrap().into_inner();
    clock.set(ms("2027-05-01T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    cancel(&api, &f[0].run_id);
    clock.set(ms("2027-05-02T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    // Iris without its last row is a new version.
    put(&api, iris_head(149)).await;
    clock.set(ms("2027-05-03T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    let outcomes: Vec<_> = f.iter().map(outcome).collect();
    assert_eq!(outcomes, vec![pb::FireOutcome::Started, pb::FireOutcome::SkippedUnchanged, pb::FireOutcome::Started], "{f:?}");
    let third = api.shared.store.run(&f[2].run_id).unwrap().unwrap();
    assert_eq!((third.dataset_version, third.dataset_rows), (2, 149));
}

#[tokio::test]
async fn a_schedule_on_one_exact_dataset_ignores_newer_versions() {
    let (api, clock) = quiet("2027-05-01T00:00:00Z");
    let v1 = put(&api, iris_head(150)).await;
    let s = api.create_schedule(Request::new(pb::CreateScheduleRequest { dataset_name: String::new(), dataset_id: v1.id.clone(), ..request("0 3 * * *", "UTC") })).await.unwrap().into_inner();
    assert_eq!((s.dataset_id.as_str(), s.dataset_name.as_str()), (v1.id.as_str(), "iris"));
    put(&api, iris_head(149)).await;
    clock.set(ms("2027-05-01T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    let f = fires(&api, &s.id).await;
    let run = api.shared.store.run(&f[0].run_id).unwrap().unwrap();
    assert_eq!((run.dataset_id.as_str(), run.dataset_version), (v1.id.as_str(), 1), "{f:?}");
}

#[tokio::test]
async fn retention_deletes_exactly_the_expired_runs_and_no_dataset_in_use() {
    let store = SledStore::open_temporary().unwrap();
    let (api, clock) = quiet_on(store.clone(), "2027-06-01T00:00:00Z");
    let v1 = put(&api, iris_head(150)).await;
    let s = api
        .create_schedule(Request::new(pb::CreateScheduleRequest { retention: Some(pb::Retention { keep_last: 2, keep_days: 0 }), ..request("0 3 * * *", "UTC") }))
        .await
        .unwrap()
        .into_inner();
    // A run outside the schedule on version 1: it keeps version 1 alive.
    let manual = pollard::rpc::runs::prepare_run(&api.shared, pb::StartRunRequest { dataset_id: v1.id.clone(), spec: Some(template()), ..Default::default() }, None).await.unwrap();
    api.shared.store.create_run(manual.clone()).unwrap();
    cancel(&api, &manual.id);
    let mut versions = vec![v1.clone()];
    let mut run_ids = Vec::new();
    for day in 1..=4 {
        if day > 1 {
            // Each day brings a new version: iris without its last `day - 1` rows.
            versions.push(put(&api, iris_head(151 - day)).await);
        }
        clock.set(ms(&format!("2027-06-0{day}T03:00:00Z")));
        pollard::scheduler::tick(&api.shared).await;
        let f = fires(&api, &s.id).await;
        let last = f.last().unwrap();
        assert_eq!(outcome(last), pb::FireOutcome::Started, "{f:?}");
        run_ids.push(last.run_id.clone());
        if day < 4 {
            cancel(&api, &last.run_id);
        }
    }
    // Newest first the schedule's runs are day 4 (queued), 3, 2, 1: keep_last 2 keeps days 4
    // and 3, so the fire of day 4 deleted the runs of days 2 and 1.
    let kept: BTreeSet<String> = api.shared.store.list_runs(&RunFilter::default(), None, 100).unwrap().0.into_iter().map(|r| r.id).collect();
    let want: BTreeSet<String> = [run_ids[3].clone(), run_ids[2].clone(), manual.id.clone()].into_iter().collect();
    assert_eq!(kept, want);
    // Version 1 was used by the deleted day-1 run and by the manual run: kept. Version 2 was
    // used only by the deleted day-2 run: deleted. Versions 3 and 4 are in use.
    let stored: BTreeSet<u32> = api.shared.store.list_datasets(Some("iris"), None, 100).unwrap().0.into_iter().map(|d| d.version).collect();
    assert_eq!(stored, [1, 3, 4].into_iter().collect());
    // The deleted version's file went with it.
    let files: BTreeSet<String> = std::fs::read_dir(store.datasets_dir()).unwrap().map(|e| e.unwrap().file_name().into_string().unwrap()).collect();
    let want: BTreeSet<String> = [0, 2, 3].iter().map(|&i| format!("{}.csv", versions[i].id)).collect();
    assert_eq!(files, want);
}

#[tokio::test]
async fn schedule_calls_check_their_arguments() {
    let (api, _clock) = quiet("2027-05-01T00:00:00Z");
    let no_data = api.create_schedule(Request::new(request("0 3 * * *", "UTC"))).await.unwrap_err();
    assert_eq!(no_data.code(), Code::NotFound, "{no_data:?}");
    put(&api, iris_head(150)).await;
    for (req, needle) in [
        (request("0 3 * *", "UTC"), "cron"),
        (request("0 0 3 * * *", "UTC"), "cron"),
        (request("0 3 * * *", "Mars/Olympus"), "time_zone"),
        (pb::CreateScheduleRequest { dataset_name: String::new(), ..request("0 3 * * *", "UTC") }, "dataset_name"),
        (pb::CreateScheduleRequest { drift: Some(pb::DriftThresholds { score_drop: 0.0, size_factor: 0.5 }), ..request("0 3 * * *", "UTC") }, "size_factor"),
        (pb::CreateScheduleRequest { spec: Some(pb::SweepSpec { target: "no_such_column".into(), ..template() }), ..request("0 3 * * *", "UTC") }, "no_such_column"),
    ] {
        let e = api.create_schedule(Request::new(req)).await.unwrap_err();
        assert_eq!(e.code(), Code::InvalidArgument, "{needle}: {e:?}");
        assert!(e.message().contains(needle), "{needle}: {}", e.message());
    }
    for e in [
        api.get_schedule(Request::new(pb::GetScheduleRequest { id: "sch_00000000000000000000000000000000".into() })).await.unwrap_err(),
        api.pause_schedule(Request::new(pb::PauseScheduleRequest { id: "sch_00000000000000000000000000000000".into() })).await.unwrap_err(),
        api.delete_schedule(Request::new(pb::DeleteScheduleRequest { id: "sch_00000000000000000000000000000000".into() })).await.unwrap_err(),
        api.list_fires(Request::new(pb::ListFiresRequest { schedule_id: "sch_00000000000000000000000000000000".into(), ..Default::default() })).await.unwrap_err(),
    ] {
        assert_eq!(e.code(), Code::NotFound, "{e:?}");
    }
    // An id that cannot be a schedule id is refused by its shape.
    let e = api.get_schedule(Request::new(pb::GetScheduleRequest { id: "sch_nope".into() })).await.unwrap_err();
    assert_eq!(e.code(), Code::InvalidArgument, "{e:?}");
    assert!(e.message().contains("not a schedule id"), "{e:?}");
}

// ------------------------------------------------------------------ with a server

#[path = "../support/server.rs"]
mod support;
use support::{start_with_clock, POLL};

async fn start(store: SledStore, clock: Arc<TestClock>) -> support::Server {
    start_with_clock(Arc::new(store), config(), clock).await
}

async fn upload(ch: &Channel, bytes: Vec<u8>) -> pb::DatasetInfo {
    let header = pb::UploadHeader { name: "iris".into(), format: pb::DataFormat::Csv as i32, target: "target".into(), categorical: vec![] };
    let msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(header)) }, pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(bytes)) }];
    DatasetsClient::new(ch.clone()).upload(tokio_stream::iter(msgs)).await.unwrap().into_inner()
}

/// Waits until the schedule has `n` fire records; returns them oldest first.
async fn wait_fires(ch: &Channel, id: &str, n: usize) -> Vec<pb::Fire> {
    support::wait_fires(ch, id, n, PATIENCE).await
}

async fn wait_finished(ch: &Channel, run_id: &str) -> pb::RunInfo {
    let deadline = Instant::now() + PATIENCE;
    loop {
        let r = RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: run_id.into() }).await.unwrap().into_inner();
        if r.state == pb::RunState::Finished as i32 {
            return r;
        }
        assert!(r.state != pb::RunState::Failed as i32 && r.state != pb::RunState::Cancelled as i32, "run ended: {}", r.reason);
        assert!(Instant::now() < deadline, "run {run_id} did not finish");
        tokio::time::sleep(POLL).await;
    }
}

/// A nightly 02:30 Europe/Berlin schedule driven through the real scheduler across both
/// transitions of 2027. Expected instants, derived by hand from the EU rule (summer time
/// from 01:00 UTC on the last Sunday of March to 01:00 UTC on the last Sunday of October;
/// CET = UTC+1, CEST = UTC+2): 2027-03-28 and 2027-10-31 are those Sundays.
#[tokio::test]
async fn a_nightly_schedule_fires_at_the_right_instants_across_both_dst_transitions() {
    let clock = TestClock::new(ms("2027-03-26T12:00:00Z"));
    let server = start(SledStore::open_temporary().unwrap(), clock.clone()).await;
    let ch = server.channel().await;
    upload(&ch, iris_head(150)).await;
    let mut schedules = SchedulesClient::new(ch.clone());
    let s = schedules.create_schedule(request("30 2 * * *", "Europe/Berlin")).await.unwrap().into_inner();
    assert_eq!(s.next_fire_at, "2027-03-27T01:30:00.000Z");
    let spring = [
        // Sat 27 March, still CET: 02:30 + 1 h offset → 01:30 UTC.
        "2027-03-27T01:30:00.000Z",
        // Sun 28 March: clocks jump 02:00 CET → 03:00 CEST, 02:30 does not exist; the next
        // valid minute is 03:00 CEST = 01:00 UTC.
        "2027-03-28T01:00:00.000Z",
        // Mon 29 March, CEST: 02:30 − 2 h → 00:30 UTC.
        "2027-03-29T00:30:00.000Z",
    ];
    let autumn = [
        // Sat 30 October, still CEST → 00:30 UTC.
        "2027-10-30T00:30:00.000Z",
        // Sun 31 October: 03:00 CEST falls back to 02:00 CET, so 02:30 happens twice
        // (00:30 UTC in CEST, 01:30 UTC in CET); it fires once, at the first.
        "2027-10-31T00:30:00.000Z",
        // Mon 1 November, CET → 01:30 UTC.
        "2027-11-01T01:30:00.000Z",
    ];
    let mut seen = 0;
    let mut runs = Vec::new();
    for (i, at) in spring.iter().chain(autumn.iter()).enumerate() {
        if i == spring.len() {
            // Skip the summer: pause, move on, resume (a resume does not catch up).
            schedules.pause_schedule(pb::PauseScheduleRequest { id: s.id.clone() }).await.unwrap();
            clock.set(ms("2027-10-29T12:00:00Z"));
            let resumed = schedules.resume_schedule(pb::ResumeScheduleRequest { id: s.id.clone() }).await.unwrap().into_inner();
            assert_eq!(resumed.next_fire_at, autumn[0]);
        }
        clock.set(ms(at));
        let f = wait_fires(&ch, &s.id, seen + 1).await;
        seen += 1;
        let fire = &f[seen - 1];
        assert_eq!((fire.scheduled_for.as_str(), fire.handled_at.as_str()), (*at, *at), "{f:?}");
        assert_eq!((outcome(fire), fire.missed), (pb::FireOutcome::Started, 0), "{fire:?}");
        // Let the run finish, so the next fire is not skipped as busy.
        runs.push(wait_finished(&ch, &fire.run_id).await);
    }
    // Exactly the six fires: none for the second 02:30 of 31 October (it would show as a
    // missed instant or an extra record).
    assert_eq!(wait_fires(&ch, &s.id, 6).await.len(), 6);
    assert!(runs.iter().all(|r| r.schedule_id == s.id));
    // The same data every night: the drift report says nothing moved.
    let d = runs[1].drift.as_ref().expect("the second run has a drift report");
    assert_eq!(d.previous_run_id, runs[0].id);
    assert!(!d.picked_changed && d.score_delta == 0.0 && !d.score_fell && !d.tree_grew && !d.tree_shrank, "{d:?}");
    assert!(runs[0].drift.is_none(), "the first run has no run before it");
    server.stop().await;
}

#[tokio::test]
async fn a_drift_report_shows_the_change_between_two_dataset_versions() {
    let clock = TestClock::new(ms("2027-07-01T00:00:00Z"));
    let server = start(SledStore::open_temporary().unwrap(), clock.clone()).await;
    let ch = server.channel().await;
    let v1 = upload(&ch, iris_head(100)).await;
    let req = pb::CreateScheduleRequest { drift: Some(pb::DriftThresholds { score_drop: 0.01, size_factor: 1.4 }), ..request("0 2 * * *", "UTC") };
    let s = SchedulesClient::new(ch.clone()).create_schedule(req).await.unwrap().into_inner();
    clock.set(ms("2027-07-01T02:00:00Z"));
    let first = wait_finished(&ch, &wait_fires(&ch, &s.id, 1).await[0].run_id).await;
    let v2 = upload(&ch, iris_head(150)).await;
    clock.set(ms("2027-07-02T02:00:00Z"));
    let second_id = wait_fires(&ch, &s.id, 2).await[1].run_id.clone();
    let second = wait_finished(&ch, &second_id).await;

    let depth = |r: &pb::RunInfo| r.scores[r.picked.unwrap() as usize].limits.as_ref().unwrap().max_depth;
    assert_eq!(depth(&first), Some(1), "setosa against versicolor is one split");
    assert!(depth(&second).unwrap() >= 2, "three species need two splits");
    let d = second.drift.clone().expect("drift report");
    assert_eq!(d.previous_run_id, first.id);
    assert!(d.picked_changed);
    let moved = d.moved.iter().find(|m| m.limit == "max_depth").expect("max_depth moved");
    assert_eq!((moved.from.as_str(), moved.to.clone()), ("1", depth(&second).unwrap().to_string()));
    assert_eq!((d.previous_dataset_id.as_str(), d.dataset_id.as_str()), (v1.id.as_str(), v2.id.as_str()));
    assert_eq!((d.previous_version, d.version, d.previous_rows, d.rows), (1, 2, 100, 150));
    // The numbers follow from the two runs' own scores.
    let picked = |r: &pb::RunInfo| r.scores[r.picked.unwrap() as usize].clone();
    let (a, b) = (picked(&first), picked(&second));
    assert_eq!(d.score_delta, b.valid_mean - a.valid_mean);
    let se = |s: &pb::SettingScore| s.valid_sd / (s.fold_scores.len() as f64).sqrt();
    assert!((d.score_delta_se - (se(&a).powi(2) + se(&b).powi(2)).sqrt()).abs() < 1e-15);
    assert_eq!(a.valid_mean, 1.0, "a depth-1 tree separates setosa from versicolor on every fold");
    assert!(d.score_fell, "accuracy fell from 1 to {}", b.valid_mean);
    assert_eq!((d.previous_leaves, d.leaves), (2.0, second.model.as_ref().unwrap().leaves as f64));
    assert!(d.tree_grew && !d.tree_shrank);

    // The finished event carries it, and listings filter by it.
    let mut events = RunsClient::new(ch.clone()).follow_run(pb::FollowRunRequest { id: second.id.clone(), after_sequence: 0 }).await.unwrap().into_inner();
    let mut finished = None;
    while let Some(e) = events.message().await.unwrap() {
        if let Some(pb::run_event::Kind::Finished(f)) = e.kind {
            finished = Some(f);
        }
    }
    assert_eq!(finished.expect("finished event").drift, Some(d));
    for (score_fell, drift_flagged) in [(true, false), (false, true)] {
        let listed = RunsClient::new(ch.clone()).list_runs(pb::ListRunsRequest { score_fell, drift_flagged, ..Default::default() }).await.unwrap().into_inner().runs;
        assert_eq!(listed.iter().map(|r| r.id.clone()).collect::<Vec<_>>(), vec![second.id.clone()]);
    }
    server.stop().await;
}

struct TempDir(std::path::PathBuf);

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

#[tokio::test]
async fn schedules_survive_a_restart_and_catch_up_the_outage_once() {
    let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_nanos();
    let dir = TempDir(std::env::temp_dir().join(format!("pollard-schedules-{}-{nanos}", std::process::id())));
    let clock = TestClock::new(ms("2027-08-01T00:00:00Z"));
    let server = start(SledStore::open(&dir.0).unwrap(), clock.clone()).await;
    let ch = server.channel().await;
    upload(&ch, iris_head(150)).await;
    let s = SchedulesClient::new(ch.clone()).create_schedule(request("15 4 * * *", "America/New_York")).await.unwrap().into_inner();
    // 04:15 EDT (UTC−4 in August) = 08:15 UTC.
    clock.set(ms("2027-08-01T08:15:00Z"));
    let first = wait_fires(&ch, &s.id, 1).await;
    wait_finished(&ch, &first[0].run_id).await;
    server.stop().await;

    // Down for three nights; the server comes back at 12:00 UTC on 4 August.
    clock.set(ms("2027-08-04T12:00:00Z"));
    let server = start(SledStore::open(&dir.0).unwrap(), clock.clone()).await;
    let ch = server.channel().await;
    let again = SchedulesClient::new(ch.clone()).get_schedule(pb::GetScheduleRequest { id: s.id.clone() }).await.unwrap().into_inner();
    // (The catch-up may already have fired: the scheduler starts with the server.)
    assert_eq!((again.cron.as_str(), again.time_zone.as_str(), again.name.as_str()), ("15 4 * * *", "America/New_York", "nightly"));
    let f = wait_fires(&ch, &s.id, 2).await;
    // 2, 3 and 4 August at 08:15 UTC were missed: one catch-up run for the last of them.
    assert_eq!(f.len(), 2, "{f:?}");
    assert_eq!((outcome(&f[1]), f[1].missed, f[1].scheduled_for.as_str()), (pb::FireOutcome::Started, 3, "2027-08-04T08:15:00.000Z"));
    assert_eq!(f[0], first[0], "the fire before the outage is still on record");
    let caught_up = wait_finished(&ch, &f[1].run_id).await;
    assert_eq!(caught_up.drift.unwrap().previous_run_id, first[0].run_id);
    // Deleting it stops it; its runs stay.
    SchedulesClient::new(ch.clone()).delete_schedule(pb::DeleteScheduleRequest { id: s.id.clone() }).await.unwrap();
    let gone = SchedulesClient::new(ch.clone()).get_schedule(pb::GetScheduleRequest { id: s.id.clone() }).await.unwrap_err();
    assert_eq!(gone.code(), Code::NotFound);
    RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: caught_up.id.clone() }).await.unwrap();
    server.stop().await;
}

// ------------------------------------------------------------------ one admission, one parse

/// A StartRun and a scheduled fire go through the same service operation: each adds one
/// to the service's admission count, and each queues one run.
#[tokio::test]
async fn start_run_and_a_scheduled_fire_share_one_admission() {
    use pollard::pb::runs_server::Runs;
    let (api, clock) = quiet("2027-03-01T00:00:00Z");
    let iris = put(&api, iris_head(150)).await;
    let s = api.create_schedule(Request::new(request("0 3 * * *", "UTC"))).await.unwrap().into_inner();
    let admitted = || api.shared.admissions.load(std::sync::atomic::Ordering::SeqCst);
    let before = admitted();
    let started = api.start_run(Request::new(pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(template()), ..Default::default() })).await.unwrap().into_inner();
    assert_eq!(admitted(), before + 1, "StartRun is one admission");
    clock.set(ms("2027-03-01T03:00:00Z"));
    pollard::scheduler::tick(&api.shared).await;
    assert_eq!(admitted(), before + 2, "a scheduled fire is one admission too");
    let f = fires(&api, &s.id).await;
    assert_eq!(f.len(), 1);
    assert_eq!(f[0].outcome, pb::FireOutcome::Started as i32, "{:?}", f[0]);
    let fired = api.shared.store.run(&f[0].run_id).unwrap().unwrap();
    let manual = api.shared.store.run(&started.id).unwrap().unwrap();
    assert_eq!((manual.state, fired.state), (RunState::Queued, RunState::Queued));
    // The same checked spec, whichever way the run came.
    assert_eq!(manual.spec, fired.spec);
}

/// A run parses its dataset's CSV once (its admission and its execution share the parse),
/// and a second run on the same dataset does not parse it at all.
#[tokio::test]
async fn back_to_back_runs_parse_their_dataset_once() {
    let (api, _clock) = quiet("2027-03-01T00:00:00Z");
    let iris = put(&api, iris_head(150)).await;
    let parses = || api.shared.frames.parses();
    let before = parses();
    for round in 0..2 {
        let run = api.queue_run(&pollard::access::Caller::anonymous(), pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(template()), ..Default::default() }).await.unwrap();
        let claimed = match api.shared.store.claim_next_within(api.shared.now(), &|_| true).unwrap() {
            pollard::store::Claim::Claimed(r) => r,
            _ => panic!("round {round}: the queued run is not claimed"),
        };
        assert_eq!(claimed.id, run.id);
        pollard::worker::execute(&api.shared, claimed, false).await;
        let done = api.shared.store.run(&run.id).unwrap().unwrap();
        assert_eq!(done.state, RunState::Finished, "round {round}: {done:?}");
        assert_eq!(parses(), before + 1, "round {round}: the CSV was parsed again");
    }
}

/// A dataset whose stored bytes are gone is the store's failure (INTERNAL), never the
/// caller's (INVALID_ARGUMENT).
#[tokio::test]
async fn a_store_failure_is_not_the_callers_fault() {
    let store = SledStore::open_temporary().unwrap();
    let files = store.datasets_dir().to_path_buf();
    let (api, _clock) = quiet_on(store, "2027-03-01T00:00:00Z");
    let iris = put(&api, iris_head(150)).await;
    std::fs::remove_file(files.join(format!("{}.csv", iris.id))).unwrap();
    let e = api.queue_run(&pollard::access::Caller::anonymous(), pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(template()), ..Default::default() }).await.unwrap_err();
    assert_eq!(e.code(), Code::Internal, "{e:?}");
    assert!(e.message().starts_with("storage: "), "{e:?}");
    let request = pollard::service::RunRequest {
        dataset: Some(pollard::service::DatasetRef::Id(iris.id.clone())),
        target: Some("target".into()),
        spec: pollard::sweep::SweepSpec::default(),
        default_fold_scheme: false,
        default_outer_scheme: false,
        idempotency_key: None,
        labels: Default::default(),
    };
    let e = api.shared.admit_run(request, None).await.unwrap_err();
    assert!(matches!(e, pollard::service::ServiceError::Storage(_)), "{e:?}");
}

// ------------------------------------------------------------------ replicas

#[path = "../support/postgres.rs"]
mod pg;

/// Three servers share one PostgreSQL database and one test clock, like three replicas:
/// over a simulated week of a schedule every six hours, each instant fires exactly once
/// (one fire record per instant, whichever replica's scheduler got there first).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_schedule_on_three_replicas_fires_once_per_instant_over_a_week() {
    let Some(url) = pg::fresh_database("replica_fires") else { return };
    let clock = TestClock::new(ms("2027-05-02T23:00:00Z"));
    let mut servers = Vec::new();
    for _ in 0..3 {
        let store = pollard::store::PostgresStore::open(&url).unwrap();
        servers.push(start_with_clock(Arc::new(store), config(), clock.clone()).await);
    }
    let mut ch = Vec::new();
    for s in &servers {
        ch.push(s.channel().await);
    }
    upload(&ch[0], iris_head(60)).await;
    let s = SchedulesClient::new(ch[1].clone()).create_schedule(request("0 */6 * * *", "UTC")).await.unwrap().into_inner();
    let mut instants = Vec::new();
    let mut at = ms("2027-05-03T00:00:00Z");
    while at < ms("2027-05-10T00:00:00Z") {
        instants.push(at);
        at += 6 * 3_600_000;
    }
    for (i, &instant) in instants.iter().enumerate() {
        clock.set(instant);
        // Read through a different replica each time.
        let fires = wait_fires(&ch[i % 3], &s.id, i + 1).await;
        assert_eq!(fires.len(), i + 1, "instant {i}: {fires:?}");
        let last = &fires[i];
        assert_eq!(ms(&last.scheduled_for), instant, "{last:?}");
        assert!(matches!(outcome(last), pb::FireOutcome::Started | pb::FireOutcome::SkippedBusy), "{last:?}");
    }
    // Every replica's scheduler has handled the last instant once this holds on each.
    let deadline = Instant::now() + PATIENCE;
    for c in &ch {
        loop {
            let got = SchedulesClient::new(c.clone()).get_schedule(pb::GetScheduleRequest { id: s.id.clone() }).await.unwrap().into_inner();
            if got.next_fire_at.as_str() > "2027-05-09T18:00:00.000Z" {
                break;
            }
            assert!(Instant::now() < deadline, "the schedule was not considered past the week: {got:?}");
            tokio::time::sleep(POLL).await;
        }
    }
    let fires = wait_fires(&ch[0], &s.id, instants.len()).await;
    assert_eq!(fires.len(), instants.len(), "one fire per instant, no more");
    let distinct: BTreeSet<&str> = fires.iter().map(|f| f.scheduled_for.as_str()).collect();
    assert_eq!(distinct.len(), instants.len());
    let started: BTreeSet<&str> = fires.iter().filter(|f| outcome(f) == pb::FireOutcome::Started).map(|f| f.run_id.as_str()).collect();
    assert_eq!(started.len(), fires.iter().filter(|f| outcome(f) == pb::FireOutcome::Started).count(), "no run started twice");
    for s in servers {
        s.stop().await;
    }
}
