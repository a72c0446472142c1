//! Every RPC × caller, run owners, cancelling across tokens, idempotency keys per token, and
//! the per-token queue cap.

use std::collections::HashMap;
use std::time::Instant;

use pollard::access::{Role, Rpc};
use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::pb::schedules_client::SchedulesClient;
use tonic::{Code, Status};

use super::process::{Serve, TempDir, PATIENCE, POLL};
use super::{authed, channel, data, expect, small_spec, upload, with_tokens, Authed, Tokens};

/// The role each RPC needs, as the access rules state it: readers get, list, follow, fetch
/// models and predict; writers also upload, start, cancel and manage schedules; admins also
/// delete. (Written out here, not read from the server's table, so the two are compared.)
fn needed(rpc: Rpc) -> Role {
    use Rpc::*;
    match rpc {
        GetDataset | ListDatasets | GetRun | ListRuns | FollowRun | FollowRunBatches | GetModel | Predict | GetSchedule | ListSchedules | ListFires => Role::Reader,
        Upload | PutTable | StartRun | CancelRun | CreateSchedule | PauseSchedule | ResumeSchedule => Role::Writer,
        DeleteDataset | DeleteSchedule => Role::Admin,
    }
}

/// Ids the reading calls use; the changing calls name ids that do not exist (or send
/// requests that are refused for their content), so an admitted call changes nothing.
struct Ids {
    dataset: String,
    run: String,
    schedule: String,
}

/// Makes one call of `rpc`; `Ok` or the status it got.
async fn call(rpc: Rpc, ch: Authed, ids: &Ids) -> Result<(), Status> {
    let missing = "none_such".to_string();
    let mut d = DatasetsClient::new(ch.clone());
    let mut r = RunsClient::new(ch.clone());
    let mut s = SchedulesClient::new(ch.clone());
    let mut m = ModelsClient::new(ch);
    match rpc {
        Rpc::Upload => d.upload(tokio_stream::iter(Vec::<pb::UploadChunk>::new())).await.map(drop),
        Rpc::PutTable => d.put_table(pb::PutTableRequest { name: "x".into(), target: "target".into(), table: None }).await.map(drop),
        Rpc::GetDataset => d.get_dataset(pb::GetDatasetRequest { id: ids.dataset.clone() }).await.map(drop),
        Rpc::ListDatasets => d.list_datasets(pb::ListDatasetsRequest::default()).await.map(drop),
        Rpc::DeleteDataset => d.delete_dataset(pb::DeleteDatasetRequest { id: missing }).await.map(drop),
        Rpc::StartRun => r.start_run(pb::StartRunRequest { dataset_id: missing, spec: Some(small_spec(&[1.0])), ..Default::default() }).await.map(drop),
        Rpc::FollowRun => r.follow_run(pb::FollowRunRequest { id: ids.run.clone(), after_sequence: 0 }).await.map(drop),
        Rpc::FollowRunBatches => r.follow_run_batches(pb::FollowRunRequest { id: ids.run.clone(), after_sequence: 0 }).await.map(drop),
        Rpc::GetRun => r.get_run(pb::GetRunRequest { id: ids.run.clone() }).await.map(drop),
        Rpc::ListRuns => r.list_runs(pb::ListRunsRequest::default()).await.map(drop),
        Rpc::CancelRun => r.cancel_run(pb::CancelRunRequest { id: missing }).await.map(drop),
        Rpc::CreateSchedule => s.create_schedule(pb::CreateScheduleRequest { cron: "not a cron".into(), dataset_id: ids.dataset.clone(), ..Default::default() }).await.map(drop),
        Rpc::GetSchedule => s.get_schedule(pb::GetScheduleRequest { id: ids.schedule.clone() }).await.map(drop),
        Rpc::ListSchedules => s.list_schedules(pb::ListSchedulesRequest::default()).await.map(drop),
        Rpc::PauseSchedule => s.pause_schedule(pb::PauseScheduleRequest { id: missing }).await.map(drop),
        Rpc::ResumeSchedule => s.resume_schedule(pb::ResumeScheduleRequest { id: missing }).await.map(drop),
        Rpc::DeleteSchedule => s.delete_schedule(pb::DeleteScheduleRequest { id: missing }).await.map(drop),
        Rpc::ListFires => s.list_fires(pb::ListFiresRequest { schedule_id: ids.schedule.clone(), ..Default::default() }).await.map(drop),
        Rpc::GetModel => m.get_model(pb::GetModelRequest { run_id: ids.run.clone(), format: pb::ModelFormat::Json as i32 }).await.map(drop),
        Rpc::Predict => m.predict(pb::PredictRequest { run_id: ids.run.clone(), rows: None, ..Default::default() }).await.map(drop),
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn every_rpc_for_every_caller() {
    let dir = TempDir::new("access-matrix");
    let t = Tokens::new();
    let server = Serve::start_with(with_tokens(&dir, &t.file_text(), ""));
    let ch = channel(&server.url).await;

    let iris = upload(authed(&ch, Some(&t.writer)), "iris", data("iris.csv")).await.unwrap();
    let run = RunsClient::new(authed(&ch, Some(&t.writer))).start_run(pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(small_spec(&[1.0, 2.0])), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(run.owner, "writer-a", "a run records the token that started it");
    let schedule = SchedulesClient::new(authed(&ch, Some(&t.writer)))
        .create_schedule(pb::CreateScheduleRequest { cron: "0 3 * * *".into(), dataset_id: iris.id.clone(), spec: Some(small_spec(&[1.0])), ..Default::default() })
        .await
        .unwrap()
        .into_inner();
    let ids = Ids { dataset: iris.id.clone(), run: run.id.clone(), schedule: schedule.id.clone() };

    let callers: [(&str, Option<String>, Option<Role>); 6] = [
        ("no token", None, None),
        ("a wrong token", Some("pollard_0000".into()), None),
        ("a withdrawn-looking token", Some(format!("{}x", t.admin)), None),
        ("reader", Some(t.reader.clone()), Some(Role::Reader)),
        ("writer", Some(t.writer.clone()), Some(Role::Writer)),
        ("admin", Some(t.admin.clone()), Some(Role::Admin)),
    ];
    let mut checked = 0;
    for (who, token, role) in &callers {
        for rpc in Rpc::ALL {
            let got = call(rpc, authed(&ch, token.as_deref()), &ids).await;
            let what = format!("{rpc:?} by {who}");
            match role {
                None => {
                    expect(&what, got, Code::Unauthenticated, &["token"]);
                }
                Some(r) if *r < needed(rpc) => {
                    expect(&what, got, Code::PermissionDenied, &[needed(rpc).as_str(), rpc.name().1]);
                }
                Some(_) => {
                    if let Err(s) = &got {
                        assert!(!matches!(s.code(), Code::Unauthenticated | Code::PermissionDenied), "{what}: admitted callers are not refused: {s:?}");
                    }
                }
            }
            checked += 1;
        }
    }
    assert_eq!(checked, 6 * 20);

    // Health stays open without a token; reflection is served to token holders only.
    use tonic_health::pb::health_client::HealthClient;
    use tonic_health::pb::HealthCheckRequest;
    let health = HealthClient::new(ch.clone()).check(HealthCheckRequest { service: "pollard.v1.Runs".into() }).await.unwrap().into_inner();
    assert_eq!(health.status, tonic_health::pb::health_check_response::ServingStatus::Serving as i32);
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::{server_reflection_request::MessageRequest, ServerReflectionRequest};
    let ask = || tokio_stream::iter(vec![ServerReflectionRequest { host: String::new(), message_request: Some(MessageRequest::ListServices(String::new())) }]);
    expect("reflection without a token", ServerReflectionClient::new(authed(&ch, None)).server_reflection_info(ask()).await, Code::Unauthenticated, &[]);
    let mut answers = ServerReflectionClient::new(authed(&ch, Some(&t.reader))).server_reflection_info(ask()).await.unwrap().into_inner();
    assert!(answers.message().await.unwrap().is_some(), "a reader gets reflection answers");
    drop(server);
}

/// A sweep on breast_cancer long enough that it is still running when the test cancels it:
/// 20 shaping keys × 100 splits (10 folds × 10 repeats).
fn long_spec() -> pb::SweepSpec {
    let numbers = |v: &[f64]| Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values: v.iter().map(|x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(*x)) }).collect() })) });
    pb::SweepSpec {
        criteria: vec!["gini".into(), "entropy".into()],
        class_weights: vec!["none".into(), "balanced".into()],
        min_leaf_rows: numbers(&[1.0, 2.0, 4.0, 8.0, 16.0]),
        max_depth: Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Span(pb::Span { from: 1.0, to: 12.0, step: 1.0 })) }),
        folds: Some(pb::FoldPlan { scheme: "stratified".into(), k: 10, repeats: 10, column: String::new() }),
        seed: 5,
        ..Default::default()
    }
}

async fn wait_state(runs: &mut RunsClient<Authed>, id: &str, state: pb::RunState) -> pb::RunInfo {
    let deadline = Instant::now() + PATIENCE;
    loop {
        let r = runs.get_run(pb::GetRunRequest { id: id.into() }).await.unwrap().into_inner();
        if r.state == state as i32 {
            return r;
        }
        assert!(Instant::now() < deadline, "run {id} never became {state:?}: {r:?}");
        tokio::time::sleep(POLL).await;
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn owners_idempotency_keys_and_the_per_token_cap() {
    let dir = TempDir::new("access-owners");
    let t = Tokens::new();
    let server = Serve::start_with(with_tokens(&dir, &t.file_text(), "concurrent_runs = 1\nmax_queued_per_token = 2\n"));
    let ch = channel(&server.url).await;
    let mut admin = RunsClient::new(authed(&ch, Some(&t.admin)));
    let mut a = RunsClient::new(authed(&ch, Some(&t.writer)));
    let mut b = RunsClient::new(authed(&ch, Some(&t.writer2)));
    let mut reader = RunsClient::new(authed(&ch, Some(&t.reader)));
    let iris = upload(authed(&ch, Some(&t.writer)), "iris", data("iris.csv")).await.unwrap();
    let cancer = upload(authed(&ch, Some(&t.admin)), "breast_cancer", data("breast_cancer.csv")).await.unwrap();
    let start = |dataset: &str, key: &str, team: &str| pb::StartRunRequest {
        dataset_id: dataset.into(),
        spec: Some(small_spec(&[1.0, 3.0])),
        idempotency_key: key.into(),
        labels: HashMap::from([("team".to_string(), team.to_string())]),
        ..Default::default()
    };

    // The admin's long run holds the one worker, so what the writers start stays queued.
    let long = admin.start_run(pb::StartRunRequest { dataset_id: cancer.id.clone(), spec: Some(long_spec()), ..Default::default() }).await.unwrap().into_inner();
    wait_state(&mut admin, &long.id, pb::RunState::Running).await;

    // Idempotency: the same request with the same key is the same run; another request with
    // that key is refused naming the key; another token's same key is its own run.
    let a1 = a.start_run(start(&iris.id, "nightly-1", "red")).await.unwrap().into_inner();
    let again = a.start_run(start(&iris.id, "nightly-1", "red")).await.unwrap().into_inner();
    assert_eq!(again.id, a1.id, "a retry returns the first run");
    expect("the key with another request", a.start_run(start(&iris.id, "nightly-1", "blue")).await, Code::AlreadyExists, &["nightly-1", &a1.id]);
    let b1 = b.start_run(start(&iris.id, "nightly-1", "red")).await.unwrap().into_inner();
    assert_ne!(b1.id, a1.id, "two tokens with one key get two runs");
    assert_eq!((a1.owner.as_str(), b1.owner.as_str()), ("writer-a", "writer-b"));

    // The per-token cap: writer-a may have two queued runs; writer-b is not held back by it.
    let a2 = a.start_run(start(&iris.id, "", "red")).await.unwrap().into_inner();
    expect("a third queued run of one token", a.start_run(start(&iris.id, "", "red")).await, Code::ResourceExhausted, &["max_queued_per_token", "2"]);
    b.start_run(start(&iris.id, "", "red")).await.expect("another token still has room");

    // Cancelling: a writer only its own runs; a reader none; an admin any.
    expect("writer-b cancels writer-a's run", b.cancel_run(pb::CancelRunRequest { id: a1.id.clone() }).await, Code::PermissionDenied, &[&a1.id, "writer-a", "admin"]);
    expect("a writer cancels the admin's run", a.cancel_run(pb::CancelRunRequest { id: long.id.clone() }).await, Code::PermissionDenied, &["admin"]);
    expect("a reader cancels", reader.cancel_run(pb::CancelRunRequest { id: a1.id.clone() }).await, Code::PermissionDenied, &["writer"]);
    assert_eq!(a.get_run(pb::GetRunRequest { id: a1.id.clone() }).await.unwrap().into_inner().state, pb::RunState::Queued as i32, "refused cancels change nothing");
    let cancelled = a.cancel_run(pb::CancelRunRequest { id: a1.id.clone() }).await.unwrap().into_inner();
    assert_eq!(cancelled.state, pb::RunState::Cancelled as i32);
    // With one run fewer queued, writer-a has room again.
    a.start_run(start(&iris.id, "", "red")).await.expect("room after a cancel");
    let by_admin = admin.cancel_run(pb::CancelRunRequest { id: a2.id.clone() }).await.unwrap().into_inner();
    assert_eq!(by_admin.state, pb::RunState::Cancelled as i32, "an admin cancels another token's run");
    admin.cancel_run(pb::CancelRunRequest { id: long.id.clone() }).await.unwrap();
    wait_state(&mut admin, &long.id, pb::RunState::Cancelled).await;
    drop(server);
}
