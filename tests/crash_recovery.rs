//! Crash recovery of the real binary: `pollard serve` killed with SIGKILL at several points of
//! a run and of an upload, then restarted on the same store directory.
//!
//! - A run killed while queued, after its first unit, mid-way and just before its end
//!   finishes after the restart with the very scores, pick and model of an uninterrupted run
//!   of the same spec on a fresh server; its events, followed from 0 after the end, are
//!   numbered 1..N without a gap, and no unit is announced twice.
//! - An upload killed while its stream is open, or just after it closed, leaves no
//!   half-written dataset, and the same bytes upload afterwards.
//! - A run that cannot be resumed ends `failed` with its reason; the server stays up.
//!
//! Data: the open datasets in tests/data (sources and licences in tests/data/SOURCES.md).
//! Runs are made long enough to be caught at each point by a large grid with many folds and
//! repeats on the largest file, on one CPU thread, never by sleeping. No fixed sleeps: every
//! wait follows events or polls a condition with a deadline.

#[path = "support/process.rs"]
mod process;

use std::collections::BTreeSet;
use std::sync::OnceLock;
use std::time::Instant;

use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::run_event::Kind;
use pollard::pb::runs_client::RunsClient;
use pollard::store::{SledStore, Storage};
use process::{data, Serve, ServeOptions, PATIENCE, POLL};
use tonic::transport::Channel;

/// One CPU thread: units finish one at a time, so the points below are far apart.
fn serve_options() -> ServeOptions {
    ServeOptions { env: vec![("POLLARD_CPU_THREADS".into(), "1".into())], ..ServeOptions::default() }
}

fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap()
}

async fn channel(server: &Serve) -> Channel {
    let deadline = Instant::now() + PATIENCE;
    loop {
        match Channel::from_shared(server.url.clone()).unwrap().connect().await {
            Ok(c) => return c,
            Err(e) => assert!(Instant::now() < deadline, "cannot connect to {}: {e}", server.url),
        }
        tokio::time::sleep(POLL).await;
    }
}

/// The messages of an upload: the header, then the bytes in chunks of `chunk` bytes.
fn upload_messages(name: &str, bytes: &[u8], chunk: usize) -> Vec<pb::UploadChunk> {
    let header = pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: "target".into(), categorical: vec![] };
    let mut msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(header)) }];
    msgs.extend(bytes.chunks(chunk).map(|c| pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(c.to_vec())) }));
    msgs
}

async fn upload(ch: Channel, name: &str, bytes: &[u8]) -> pb::DatasetInfo {
    let msgs = upload_messages(name, bytes, 64 << 10);
    DatasetsClient::new(ch).upload(tokio_stream::iter(msgs)).await.unwrap_or_else(|s| panic!("upload of {name}: {s:?}")).into_inner()
}

fn file(name: &str) -> Vec<u8> {
    std::fs::read(data(name)).unwrap()
}

fn values(v: impl IntoIterator<Item = f64>) -> Option<pb::LimitRange> {
    let values = v.into_iter().map(|x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(x)) }).collect();
    Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values })) })
}

/// The sweep every run here uses: two criteria × 10 stratified folds × 20 repeats = 400
/// units on breast_cancer (569 rows, 30 features), each scoring 10 × 4 settings.
fn long_spec(seed: u64) -> pb::SweepSpec {
    pb::SweepSpec {
        criteria: vec!["gini".into(), "entropy".into()],
        max_depth: values((1..=10).map(f64::from)),
        min_split_rows: values([2.0, 5.0, 10.0, 20.0]),
        folds: Some(pb::FoldPlan { scheme: "stratified".into(), k: 10, repeats: 20, column: String::new() }),
        seed,
        ..Default::default()
    }
}

async fn start_run(ch: Channel, dataset_id: &str, spec: pb::SweepSpec) -> pb::RunInfo {
    let r = pb::StartRunRequest { dataset_id: dataset_id.into(), spec: Some(spec), ..Default::default() };
    RunsClient::new(ch).start_run(r).await.unwrap_or_else(|s| panic!("start run: {s:?}")).into_inner()
}

async fn get_run(ch: Channel, id: &str) -> pb::RunInfo {
    RunsClient::new(ch).get_run(pb::GetRunRequest { id: id.into() }).await.unwrap_or_else(|s| panic!("get run {id}: {s:?}")).into_inner()
}

/// Follows a run from `after` + 1 until `stop` says so or the stream ends; the events seen.
async fn follow_until(ch: Channel, id: &str, after: u64, stop: impl Fn(&pb::RunEvent) -> bool) -> Vec<pb::RunEvent> {
    let mut stream = RunsClient::new(ch).follow_run(pb::FollowRunRequest { id: id.into(), after_sequence: after }).await.unwrap().into_inner();
    let deadline = Instant::now() + PATIENCE;
    let mut out = Vec::new();
    loop {
        let next = tokio::time::timeout_at(deadline.into(), stream.message()).await;
        let next = next.unwrap_or_else(|_| panic!("run {id}: the events stopped after {} events", out.len()));
        match next.unwrap_or_else(|s| panic!("run {id}: {s:?}")) {
            None => return out,
            Some(ev) => {
                let done = stop(&ev);
                out.push(ev);
                if done {
                    return out;
                }
            }
        }
    }
}

/// Every event of a run that has ended, from sequence 1.
async fn history(ch: Channel, id: &str) -> Vec<pb::RunEvent> {
    follow_until(ch, id, 0, |_| false).await
}

async fn model(ch: Channel, run_id: &str) -> pb::ModelFile {
    let r = pb::GetModelRequest { run_id: run_id.into(), format: pb::ModelFormat::Protobuf as i32 };
    ModelsClient::new(ch).get_model(r).await.unwrap_or_else(|s| panic!("model of {run_id}: {s:?}")).into_inner()
}

/// What a finished run is: its info (scores, pick, folds), its model and its events.
struct Finished {
    info: pb::RunInfo,
    model: pb::ModelFile,
    events: Vec<pb::RunEvent>,
}

async fn finished(ch: Channel, id: &str) -> Finished {
    let events = history(ch.clone(), id).await;
    let info = get_run(ch.clone(), id).await;
    assert_eq!(info.state(), pb::RunState::Finished, "run {id} did not finish: {}", info.reason);
    Finished { model: model(ch, id).await, info, events }
}

/// The uninterrupted run of [`long_spec`] on a fresh server, once per test process.
fn reference() -> &'static Finished {
    static REFERENCE: OnceLock<Finished> = OnceLock::new();
    REFERENCE.get_or_init(|| {
        let server = Serve::start_with(serve_options());
        runtime().block_on(async {
            let ch = channel(&server).await;
            let ds = upload(ch.clone(), "breast_cancer", &file("breast_cancer.csv")).await;
            let run = start_run(ch.clone(), &ds.id, long_spec(7)).await;
            let f = finished(ch, &run.id).await;
            check_history(&f);
            f
        })
    })
}

/// The events of a finished run: sequences 1..N without a gap; one progress event per unit,
/// counting 1..units_total; one score per setting, equal to the run's; one terminal event,
/// the last, a finish carrying the run's scores.
fn check_history(f: &Finished) {
    let (info, events) = (&f.info, &f.events);
    let seqs: Vec<u64> = events.iter().map(|e| e.sequence).collect();
    assert_eq!(seqs, (1..=events.len() as u64).collect::<Vec<_>>(), "run {}: event sequences are not 1..N", info.id);
    let units: Vec<u32> = events.iter().filter_map(|e| if let Some(Kind::Progress(p)) = &e.kind { Some(p.units_done) } else { None }).collect();
    assert_eq!(units, (1..=info.units_total).collect::<Vec<_>>(), "run {}: progress events are not one per unit, in order", info.id);
    assert_eq!(info.units_done, info.units_total);
    let mut scored = BTreeSet::new();
    for e in events {
        if let Some(Kind::Scored(s)) = &e.kind {
            assert!(scored.insert(s.index), "run {}: setting {} scored twice", info.id, s.index);
            assert_eq!(Some(s), info.scores.get(s.index as usize), "run {}: the event's score of setting {} differs from the run's", info.id, s.index);
        }
    }
    assert_eq!(scored.len(), info.settings as usize, "run {}: not every setting was scored", info.id);
    assert_eq!(info.scores.len(), info.settings as usize);
    let terminal: Vec<usize> = events.iter().enumerate().filter(|(_, e)| matches!(e.kind, Some(Kind::Finished(_) | Kind::Failed(_) | Kind::Cancelled(_)))).map(|(i, _)| i).collect();
    assert_eq!(terminal, vec![events.len() - 1], "run {}: one terminal event, the last", info.id);
    let Some(Kind::Finished(end)) = &events.last().unwrap().kind else { unreachable!() };
    assert_eq!(end.scores, info.scores);
    assert_eq!((Some(end.picked), Some(end.best)), (info.picked, info.best));
}

/// A run that finished after a crash is the uninterrupted run: same grid, scores, pick,
/// folds and model, and a whole event history.
fn check_same_as_reference(got: &Finished) {
    let want = reference();
    check_history(got);
    let (g, w) = (&got.info, &want.info);
    assert_eq!((g.settings, g.units_total), (w.settings, w.units_total), "grid size");
    assert!(g.scores == w.scores, "run {}: the scores differ from the uninterrupted run's", g.id);
    assert_eq!((g.picked, g.best), (w.picked, w.best));
    assert_eq!(g.fold_assignment, w.fold_assignment);
    assert_eq!(got.model, want.model, "run {}: the model differs from the uninterrupted run's", g.id);
    assert_eq!(got.events.len(), want.events.len(), "run {}: a different number of events", g.id);
}

/// Where a run is killed.
#[derive(Clone, Copy, Debug)]
enum Point {
    /// Waiting behind another run.
    Queued,
    /// Once this many units are announced (`total` → count).
    Units(fn(u32) -> u32),
}

/// Starts the run, kills the server at `point`, restarts it on the same store and checks the
/// run finishes as the uninterrupted one did.
fn killed_at(point: Point) {
    let reference = reference();
    let total = reference.info.units_total;
    let mut server = Serve::start_with(serve_options());
    let rt = runtime();
    let run_id = rt.block_on(async {
        let ch = channel(&server).await;
        let ds = upload(ch.clone(), "breast_cancer", &file("breast_cancer.csv")).await;
        match point {
            Point::Queued => {
                // One run at a time (the default): a first run holds the slot.
                let first = start_run(ch.clone(), &ds.id, long_spec(8)).await;
                follow_until(ch.clone(), &first.id, 0, |e| matches!(e.kind, Some(Kind::Progress(_)))).await;
                let run = start_run(ch.clone(), &ds.id, long_spec(7)).await;
                assert_eq!(get_run(ch, &run.id).await.state(), pb::RunState::Queued);
                run.id
            }
            Point::Units(at) => {
                let want = at(total);
                let run = start_run(ch.clone(), &ds.id, long_spec(7)).await;
                let seen = follow_until(ch.clone(), &run.id, 0, |e| matches!(&e.kind, Some(Kind::Progress(p)) if p.units_done >= want)).await;
                assert!(seen.iter().all(|e| !matches!(e.kind, Some(Kind::Finished(_)))), "the run ended before the kill point");
                run.id
            }
        }
    });
    server.kill9();
    let server = server.restart();
    let got = rt.block_on(async {
        let ch = channel(&server).await;
        follow_until(ch.clone(), &run_id, 0, |_| false).await;
        finished(ch, &run_id).await
    });
    if let Point::Units(_) = point {
        // The run was running when killed, so the new process resumed it from its stored units.
        let log = server.log();
        assert!(log.contains("resuming run") && log.contains(&run_id), "run {run_id} was not resumed:\n{log}");
    }
    check_same_as_reference(&got);
}

#[test]
fn a_run_killed_while_queued_finishes_as_if_uninterrupted() {
    killed_at(Point::Queued);
}

#[test]
fn a_run_killed_after_its_first_unit_finishes_as_if_uninterrupted() {
    killed_at(Point::Units(|_| 1));
}

#[test]
fn a_run_killed_mid_way_finishes_as_if_uninterrupted() {
    killed_at(Point::Units(|total| total / 2));
}

#[test]
fn a_run_killed_just_before_its_end_finishes_as_if_uninterrupted() {
    killed_at(Point::Units(|total| total - total / 20));
}

// ------------------------------------------------------------------ uploads

/// A large CSV built from an open dataset by repeating its data rows (breast_cancer.csv,
/// whose header is kept once) until the file is at least 24 MiB: test scaffolding for an
/// upload that takes many messages, not new data. Returns the bytes and their row count.
fn large_csv() -> (Vec<u8>, u64) {
    let text = String::from_utf8(file("breast_cancer.csv")).unwrap();
    let (header, body) = text.split_once('\n').unwrap();
    let body = if body.ends_with('\n') { body.to_string() } else { format!("{body}\n") };
    let per_copy = body.lines().count() as u64;
    let mut out = format!("{header}\n").into_bytes();
    let mut rows = 0;
    while out.len() < 24 << 20 {
        out.extend_from_slice(body.as_bytes());
        rows += per_copy;
    }
    (out, rows)
}

/// With the server down: every stored dataset is whole (its bytes are all there, hash to its
/// id, and its row count is the file's); the ids found.
fn stored_datasets_are_whole(server: &Serve, rows: u64) -> Vec<String> {
    let store = SledStore::open(&server.store).unwrap();
    let (list, _) = store.list_datasets(None, None, 1000).unwrap();
    let mut ids = Vec::new();
    for m in list {
        let bytes = store.dataset_bytes(&m.id).unwrap().unwrap_or_else(|| panic!("dataset {} is listed without its bytes", m.id));
        assert_eq!(bytes.len() as u64, m.bytes, "dataset {}: {} of {} bytes stored", m.id, bytes.len(), m.bytes);
        assert_eq!(pollard::rpc::datasets::content_digest(&bytes), m.content, "dataset {}: the stored bytes are not the uploaded ones", m.id);
        assert_eq!(m.rows, rows, "dataset {}", m.id);
        ids.push(m.id);
    }
    ids
}

/// Streams the large CSV and kills the server, while the stream is open (`close` false:
/// half the chunks sent, the stream neither finished nor cancelled) or right after the last
/// chunk (`close` true: the server may be reading or storing it). Then: nothing half-written
/// is stored or listed, and the same bytes upload again.
fn upload_killed(close: bool) {
    let (bytes, rows) = large_csv();
    let mut server = Serve::start_with(serve_options());
    let rt = runtime();
    let msgs = upload_messages("large", &bytes, 256 << 10);
    let half = msgs.len() / 2;
    // The sender and the call stay alive until the process is gone.
    let (_tx, _call) = rt.block_on(async {
        let ch = channel(&server).await;
        // One message in flight at a time: a send returns once the transport took the last.
        let (tx, rx) = tokio::sync::mpsc::channel(1);
        let call = tokio::spawn(async move { DatasetsClient::new(ch).upload(tokio_stream::wrappers::ReceiverStream::new(rx)).await });
        let n = if close { msgs.len() } else { half };
        for m in msgs.into_iter().take(n) {
            tx.send(m).await.expect("the upload stream closed early");
        }
        (if close { None } else { Some(tx) }, call)
    });
    server.kill9();
    let before = stored_datasets_are_whole(&server, rows);
    if !close {
        assert!(before.is_empty(), "a dataset was stored from half an upload: {before:?}");
    }
    let server = server.restart();
    rt.block_on(async {
        let ch = channel(&server).await;
        let list = DatasetsClient::new(ch.clone()).list_datasets(pb::ListDatasetsRequest::default()).await.unwrap().into_inner();
        let listed: Vec<String> = list.datasets.iter().map(|d| d.id.clone()).collect();
        assert_eq!(listed, before, "the listing after the restart is not what the store holds");
        for d in &list.datasets {
            assert_eq!((d.rows, d.bytes), (rows, bytes.len() as u64), "a listed dataset is not the whole upload");
        }
        let again = upload(ch, "large", &bytes).await;
        assert_eq!((again.rows, again.bytes), (rows, bytes.len() as u64));
        assert_eq!(again.sha256, pollard::rpc::datasets::content_digest(&bytes));
    });
}

#[test]
fn an_upload_killed_mid_stream_leaves_nothing_and_uploads_again() {
    upload_killed(false);
}

#[test]
fn an_upload_killed_after_its_last_chunk_is_whole_or_absent_and_uploads_again() {
    upload_killed(true);
}

// ------------------------------------------------------------------ runs that cannot resume

/// Waits for a run to end and returns its info and its last event.
async fn ended(ch: Channel, id: &str) -> (pb::RunInfo, pb::RunEvent) {
    let events = history(ch.clone(), id).await;
    (get_run(ch, id).await, events.last().cloned().unwrap_or_else(|| panic!("run {id} has no events")))
}

/// The server answers calls and still runs sweeps: a small one on iris finishes.
async fn still_works(ch: Channel) {
    let ds = upload(ch.clone(), "iris", &file("iris.csv")).await;
    let spec = pb::SweepSpec { max_depth: values([1.0, 2.0, 3.0]), ..Default::default() };
    let run = start_run(ch.clone(), &ds.id, spec).await;
    let (info, _) = ended(ch, &run.id).await;
    assert_eq!(info.state(), pb::RunState::Finished, "a new run on the restarted server: {}", info.reason);
}

/// A run left running on a store whose new server refuses its dataset (the row cap was
/// lowered below the dataset's rows between the two processes): the resume fails, the run
/// ends `failed` with the reason, the server keeps serving, and a later restart does not
/// take the run up again.
#[test]
fn a_run_whose_resume_fails_ends_failed_and_the_server_stays_up() {
    let mut server = Serve::start_with(serve_options());
    let rt = runtime();
    let run_id = rt.block_on(async {
        let ch = channel(&server).await;
        let ds = upload(ch.clone(), "breast_cancer", &file("breast_cancer.csv")).await;
        let run = start_run(ch.clone(), &ds.id, long_spec(7)).await;
        follow_until(ch, &run.id, 0, |e| matches!(e.kind, Some(Kind::Progress(_)))).await;
        run.id
    });
    server.kill9();
    // breast_cancer has 569 rows, iris 150.
    server.options.env.push(("POLLARD_MAX_ROWS".into(), "200".into()));
    let mut server = server.restart();
    rt.block_on(async {
        let ch = channel(&server).await;
        let (info, last) = ended(ch.clone(), &run_id).await;
        assert_eq!(info.state(), pb::RunState::Failed, "run {run_id} after a resume that cannot read its dataset");
        assert!(info.reason.contains("200 data rows"), "the reason does not say why: {:?}", info.reason);
        assert_eq!(last.kind, Some(Kind::Failed(info.reason.clone())), "the last event is the failure");
        still_works(ch).await;
    });
    assert!(server.alive(), "the server died:\n{}", server.log());
    let server = server.restart();
    assert!(!server.log().contains("resuming run"), "a failed run was taken up again:\n{}", server.log());
    rt.block_on(async {
        let info = get_run(channel(&server).await, &run_id).await;
        assert_eq!(info.state(), pb::RunState::Failed);
    });
}

/// A run left running whose spec the sweep cannot even plan: a store written by a build that
/// checked less (put here through the library, as such a build would have left it) holds a
/// run whose `max_depth` is a log span of 4,294,967,295 values. The resume must end the run
/// `failed` with the reason and keep serving, not take the process down at every start.
#[test]
fn a_run_that_cannot_be_planned_at_resume_ends_failed_and_the_server_stays_up() {
    let mut server = Serve::start_with(serve_options());
    let rt = runtime();
    let ds = rt.block_on(async { upload(channel(&server).await, "iris", &file("iris.csv")).await });
    server.kill9();
    let run_id = {
        let store = SledStore::open(&server.store).unwrap();
        let meta = store.dataset(&ds.id).unwrap().unwrap();
        let spec = pollard::sweep::SweepSpec { max_depth: Some(pollard::sweep::Range::LogSpan { from: 1.0, to: 1e9, count: u32::MAX }), ..Default::default() };
        let now = chrono::Utc::now().timestamp_millis();
        let run = pollard::job::Run::queued(pollard::rpc::runs::new_run_id(), &meta, "target".into(), spec, now);
        assert!(matches!(store.create_run(run.clone()).unwrap(), pollard::store::CreateRun::Created(_)));
        assert_eq!(store.claim_next(now).unwrap().map(|r| r.id), Some(run.id.clone()));
        run.id
    };
    let mut server = server.restart();
    rt.block_on(async {
        let ch = channel(&server).await;
        let (info, _) = ended(ch.clone(), &run_id).await;
        assert_eq!(info.state(), pb::RunState::Failed, "run {run_id}");
        assert!(info.reason.contains("max_depth"), "the reason does not name the field: {:?}", info.reason);
        still_works(ch).await;
    });
    assert!(server.alive(), "the server died:\n{}", server.log());
}
