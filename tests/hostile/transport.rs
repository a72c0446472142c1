//! Transport: messages over each service's size limit, uploads over their caps, calls that
//! stall, shutdown with streams open, and bytes on the port that are not gRPC at all.
//!
//! Async pieces run on a runtime the test owns (`block_on`); the process harness and the CLI
//! calls of `snapshot` stay synchronous, outside it.

use std::collections::HashMap;
use std::io::{Read, Write};
use std::net::{Shutdown, TcpStream};
use std::time::Instant;

use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::pb::schedules_client::SchedulesClient;
use tokio::runtime::Runtime;
use tokio::sync::mpsc;
use tokio_stream::wrappers::ReceiverStream;
use tonic::transport::Channel;
use tonic::{Code, Status};

use super::process::{data, ServeOptions, PATIENCE, POLL};
use super::*;

// ------------------------------------------------------------------ helpers

fn runtime() -> Runtime {
    tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().unwrap()
}

/// A server with these config lines.
fn serve(config: &str) -> Serve {
    Serve::start_with(ServeOptions { config: Some(config.to_string()), ..Default::default() })
}

/// A channel to the server; clients on it send messages of any size (the server's limits are
/// what is tested) and read replies up to 512 MiB.
async fn channel(server: &Serve) -> Channel {
    tonic::transport::Endpoint::from_shared(server.url.clone()).unwrap().connect().await.unwrap()
}

fn datasets(ch: &Channel) -> DatasetsClient<Channel> {
    DatasetsClient::new(ch.clone()).max_decoding_message_size(512 << 20)
}

fn runs(ch: &Channel) -> RunsClient<Channel> {
    RunsClient::new(ch.clone()).max_decoding_message_size(512 << 20)
}

fn models(ch: &Channel) -> ModelsClient<Channel> {
    ModelsClient::new(ch.clone()).max_decoding_message_size(512 << 20)
}

/// Asserts a call failed with `code` and a message holding every needle; returns the status.
fn expect<T: std::fmt::Debug>(what: &str, r: Result<T, Status>, code: Code, needles: &[&str]) -> Status {
    super::process::expect_status(what, r, code, needles)
}

fn header(name: &str, target: &str) -> pb::UploadChunk {
    pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical: vec![] })) }
}

fn chunk(bytes: &[u8]) -> pb::UploadChunk {
    pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(bytes.to_vec())) }
}

/// An upload of `bytes` in 64 KiB chunks, to its end.
async fn upload(ch: &Channel, name: &str, target: &str, bytes: &[u8]) -> Result<pb::DatasetInfo, Status> {
    let mut messages = vec![header(name, target)];
    messages.extend(bytes.chunks(64 << 10).map(chunk));
    datasets(ch).upload(tokio_stream::iter(messages)).await.map(|r| r.into_inner())
}

/// An upload the test feeds by hand: send messages, or drop the sender to end the stream.
struct OpenUpload {
    tx: mpsc::Sender<pb::UploadChunk>,
    call: tokio::task::JoinHandle<Result<pb::DatasetInfo, Status>>,
}

fn open_upload(rt: &Runtime, ch: &Channel, name: &str) -> OpenUpload {
    let (tx, rx) = mpsc::channel(16);
    let mut client = datasets(ch);
    let call = rt.spawn(async move { client.upload(ReceiverStream::new(rx)).await.map(|r| r.into_inner()) });
    rt.block_on(tx.send(header(name, "target"))).unwrap();
    OpenUpload { tx, call }
}

impl OpenUpload {
    fn send(&self, rt: &Runtime, bytes: &[u8]) {
        rt.block_on(self.tx.send(chunk(bytes))).unwrap();
    }
    /// Waits for the call's answer (the stream stays open until then).
    fn answer(self, rt: &Runtime) -> Result<pb::DatasetInfo, Status> {
        let OpenUpload { tx, call } = self;
        let r = rt.block_on(async { tokio::time::timeout(PATIENCE, call).await });
        drop(tx);
        r.expect("the upload was answered in time").unwrap()
    }
}

/// Polls `f` until it returns `Some`, up to PATIENCE.
fn until<T>(what: &str, mut f: impl FnMut() -> Option<T>) -> T {
    let deadline = Instant::now() + PATIENCE;
    loop {
        if let Some(v) = f() {
            return v;
        }
        assert!(Instant::now() < deadline, "{what}: not within {PATIENCE:?}");
        std::thread::sleep(POLL);
    }
}

/// Files in the store's staging directory (uploads still arriving).
fn staged(server: &Serve) -> usize {
    std::fs::read_dir(server.store.join("uploads")).map(|d| d.count()).unwrap_or(0)
}

fn iris() -> Vec<u8> {
    std::fs::read(data("iris.csv")).unwrap()
}

/// A CSV that is well-formed but names no column `target`: any upload of it that gets past
/// the transport is refused with INVALID_ARGUMENT, and stores nothing.
fn untargeted(bytes: usize) -> Vec<u8> {
    let mut s = String::from("a,b\n");
    while s.len() < bytes {
        s.push_str("1,2\n");
    }
    s.into_bytes()
}

/// A table of one numeric column with `rows` cells.
fn table(rows: usize) -> pb::Table {
    let values = (0..rows).map(|i| i as f64).collect();
    pb::Table { columns: vec![pb::TableColumn { name: "x".into(), cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells { values, missing: vec![] })) }] }
}

/// A big string of `n` bytes.
fn big(n: usize) -> String {
    "x".repeat(n)
}

const FIVE_MIB: usize = 5 << 20;

// ------------------------------------------------------------------ message sizes

#[test]
fn start_run_over_the_runs_request_limit_is_resource_exhausted() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let labels = HashMap::from([("note".to_string(), big(FIVE_MIB))]);
    let r = rt.block_on(runs(&ch).start_run(pb::StartRunRequest { dataset_name: "none".into(), labels, ..Default::default() }));
    expect("StartRun of 5 MiB", r, Code::ResourceExhausted, &["4194304 bytes", "pollard.v1.Runs", "runs_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn get_run_with_a_huge_id_is_resource_exhausted() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let r = rt.block_on(runs(&ch).get_run(pb::GetRunRequest { id: big(FIVE_MIB) }));
    expect("GetRun of 5 MiB", r, Code::ResourceExhausted, &["runs_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn create_schedule_over_the_schedules_request_limit_is_resource_exhausted() {
    let mut server = serve("schedules_max_request_bytes = 2048\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let request = pb::CreateScheduleRequest { name: big(4096), cron: "* * * * *".into(), dataset_name: "none".into(), ..Default::default() };
    let r = rt.block_on(SchedulesClient::new(ch.clone()).create_schedule(request));
    expect("CreateSchedule of 4 KiB", r, Code::ResourceExhausted, &["2048 bytes", "schedules_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn an_upload_chunk_over_the_datasets_request_limit_is_resource_exhausted() {
    let mut server = serve("datasets_max_request_bytes = 65536\nmax_upload_bytes = 1048576\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let messages = vec![header("big-chunk", "target"), chunk(&untargeted(100_000))];
    let r = rt.block_on(datasets(&ch).upload(tokio_stream::iter(messages)));
    expect("one 100 kB chunk", r, Code::ResourceExhausted, &["65536 bytes", "pollard.v1.Datasets", "datasets_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
    until("the staged file is removed", || (staged(&server) == 0).then_some(()));
}

#[test]
fn a_table_over_the_datasets_request_limit_is_resource_exhausted() {
    let mut server = serve("datasets_max_request_bytes = 65536\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    // 20,000 doubles: about 160 kB packed.
    let r = rt.block_on(datasets(&ch).put_table(pb::PutTableRequest { name: "t".into(), target: "x".into(), table: Some(table(20_000)) }));
    expect("PutTable of 160 kB", r, Code::ResourceExhausted, &["65536 bytes", "datasets_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn predict_over_the_models_request_limit_is_resource_exhausted() {
    let mut server = serve("models_max_request_bytes = 65536\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    // Refused before the handler looks for the run.
    let r = rt.block_on(models(&ch).predict(pb::PredictRequest { run_id: "run_none".into(), rows: Some(table(20_000)), ..Default::default() }));
    expect("Predict of 160 kB", r, Code::ResourceExhausted, &["65536 bytes", "pollard.v1.Models", "models_max_request_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn a_reply_over_the_models_reply_limit_is_resource_exhausted() {
    let mut server = serve("models_max_reply_bytes = 1024\n");
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    server.run(&["put", data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target"]).ok();
    let run = server.run(&["sweep", "--dataset", "iris", "--max-depth", "2,3", "--k", "3", "--json"]).json();
    let id = run["id"].as_str().unwrap().to_string();
    until("the run finishes", || (server.run(&["show", &id, "--json"]).json()["state"] == "finished").then_some(()));
    let before = snapshot(&server);
    // A depth-3 tree of iris as JSON is well over 1 kB.
    let r = rt.block_on(models(&ch).get_model(pb::GetModelRequest { run_id: id.clone(), format: pb::ModelFormat::Json as i32 }));
    expect("GetModel as JSON", r, Code::ResourceExhausted, &["reply message", "1024 bytes", "models_max_reply_bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

// ------------------------------------------------------------------ upload caps

#[test]
fn an_upload_over_max_upload_bytes_is_resource_exhausted_and_stores_nothing() {
    let mut server = serve("max_upload_bytes = 10000\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let wine = std::fs::read(data("wine.csv")).unwrap();
    assert!(wine.len() > 10_000);
    expect("wine over 10000 bytes", rt.block_on(upload(&ch, "wine", "target", &wine)), Code::ResourceExhausted, &["10000 bytes"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
    until("the staged file is removed", || (staged(&server) == 0).then_some(()));
}

#[test]
fn uploads_over_max_concurrent_uploads_are_resource_exhausted_until_one_ends() {
    let mut server = serve("max_concurrent_uploads = 2\nupload_wait_secs = 1\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let a = open_upload(&rt, &ch, "a");
    let b = open_upload(&rt, &ch, "b");
    // Once both hold their slots, a third waits upload_wait_secs and is refused (before that
    // it gets through to the handler and is refused there for its missing target column,
    // storing nothing).
    let third = untargeted(100);
    until("a third upload is refused for the cap", || {
        let r = rt.block_on(upload(&ch, "c", "target", &third));
        match r {
            Err(s) if s.code() == Code::ResourceExhausted => {
                assert!(s.message().contains("max_concurrent_uploads") && s.message().contains("upload_wait_secs"), "{s:?}");
                Some(())
            }
            Err(s) if s.code() == Code::InvalidArgument => None,
            other => panic!("a third upload: {other:?}"),
        }
    });
    // The same cap holds for tables.
    let r = rt.block_on(datasets(&ch).put_table(pb::PutTableRequest { name: "t".into(), target: "x".into(), table: Some(table(10)) }));
    expect("PutTable over the cap", r, Code::ResourceExhausted, &["max_concurrent_uploads"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
    // Ending one frees its slot: an upload after it is stored.
    drop(a.tx);
    expect("an upload with no data", rt.block_on(a.call).unwrap(), Code::InvalidArgument, &[]);
    let info = until("an upload gets a slot", || rt.block_on(upload(&ch, "iris", "target", &iris())).ok());
    assert_eq!(info.rows, 150);
    drop(b);
}

#[test]
fn bytes_over_max_upload_bytes_in_flight_are_resource_exhausted() {
    let mut server = serve("max_upload_bytes_in_flight = 100000\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let a = open_upload(&rt, &ch, "a");
    a.send(&rt, &untargeted(60_000));
    until("the first upload's bytes are staged", || (staged(&server) == 1).then_some(()));
    let r = rt.block_on(upload(&ch, "b", "target", &untargeted(60_000)));
    expect("a second 60 kB upload", r, Code::ResourceExhausted, &["100000 bytes", "max_upload_bytes_in_flight"]);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
    drop(a);
}

#[test]
fn a_stalled_upload_does_not_stop_other_calls_and_ends_when_idle() {
    let mut server = serve("upload_idle_secs = 1\n");
    let before = snapshot(&server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let stalled = open_upload(&rt, &ch, "stalled");
    stalled.send(&rt, b"sepal_length_cm,target\n5.1,");
    // Other calls are answered while it stalls.
    assert_alive(&mut server);
    assert_eq!(rt.block_on(upload(&ch, "iris", "target", &iris())).unwrap().rows, 150);
    expect("the stalled upload", stalled.answer(&rt), Code::DeadlineExceeded, &["upload_idle_secs"]);
    let after = snapshot(&server);
    assert_eq!(after["runs"], before["runs"]);
    assert_eq!(after["datasets"].as_array().unwrap().len(), 1, "only iris is stored: {after}");
    until("the staged file is removed", || (staged(&server) == 0).then_some(()));
}

#[test]
fn an_upload_the_caller_abandons_stores_nothing() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    // The upload gets a runtime and connection of its own: shutting that runtime down drops
    // the connection with the stream still open, as a client that dies would. (Dropping the
    // sender first would end the stream cleanly: a complete upload of what was sent.)
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    let up = open_upload(&rt, &ch, "gone");
    up.send(&rt, &iris()[..2000]);
    until("the upload is staged", || (staged(&server) == 1).then_some(()));
    rt.shutdown_background();
    until("the staged file is removed", || (staged(&server) == 0).then_some(()));
    drop(up);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

// ------------------------------------------------------------------ shutdown

#[test]
fn sigterm_with_an_open_upload_ends_it_unavailable_and_stores_nothing() {
    let mut server = serve("drain_secs = 5\n");
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    rt.block_on(upload(&ch, "iris", "target", &iris())).unwrap();
    let before = snapshot(&server);
    let open = open_upload(&rt, &ch, "half");
    open.send(&rt, &iris()[..3000]);
    until("the upload is staged", || (staged(&server) == 1).then_some(()));
    server.signal(libc::SIGTERM);
    expect("the open upload", open.answer(&rt), Code::Unavailable, &["shutting down"]);
    assert_eq!(server.wait_exit(PATIENCE), Some(Some(0)), "the server did not exit after SIGTERM:\n{}", server.log());
    let mut server = server.restart();
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before, "the half upload left something");
    assert_eq!(staged(&server), 0);
}

#[test]
fn sigterm_with_an_open_follow_ends_it_unavailable_and_exits() {
    // Each unit is held 50 ms (a test hook), so the long sweep cannot end before SIGTERM
    // however loaded the machine is.
    let mut server = Serve::start_with(ServeOptions {
        config: Some("cpu_threads = 1\ndrain_secs = 5\n".into()),
        env: vec![("POLLARD_TEST_UNIT_DELAY_MS".into(), "50".into())],
        ..Default::default()
    });
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    server.run(&["put", data("wine.csv").to_str().unwrap(), "--name", "wine", "--target", "target"]).ok();
    // A long sweep, followed while it runs (a queued run has no events yet).
    let long = ["sweep", "--dataset", "wine", "--max-depth", "lin(1,40,1)", "--min-leaf-rows", "lin(1,60,1)", "--k", "10", "--repeats", "10", "--json"];
    let id = server.run(&long).json()["id"].as_str().unwrap().to_string();
    let mut stream = rt.block_on(runs(&ch).follow_run(pb::FollowRunRequest { id, after_sequence: 0 })).unwrap().into_inner();
    // The stream is open once its first event (started) arrived.
    rt.block_on(stream.message()).unwrap().expect("a first event");
    server.signal(libc::SIGTERM);
    let end = rt.block_on(async {
        loop {
            match tokio::time::timeout(PATIENCE, stream.message()).await.expect("the follow ended in time") {
                Ok(Some(_)) => continue,
                other => return other,
            }
        }
    });
    expect("the open follow", end, Code::Unavailable, &["shutting down", "after_sequence"]);
    assert_eq!(server.wait_exit(PATIENCE), Some(Some(0)), "the server did not exit after SIGTERM:\n{}", server.log());
}

// ------------------------------------------------------------------ not gRPC

/// Writes `bytes` on a fresh connection (and half-closes it when `close` says so); reads
/// until the server closes, up to PATIENCE.
fn raw(server: &Serve, bytes: &[u8], close: bool) -> Vec<u8> {
    let mut s = TcpStream::connect(server.addr).unwrap();
    s.set_read_timeout(Some(PATIENCE)).unwrap();
    s.write_all(bytes).unwrap();
    if close {
        s.shutdown(Shutdown::Write).unwrap();
    }
    let mut out = Vec::new();
    let _ = s.read_to_end(&mut out);
    out
}

#[test]
fn garbage_bytes_on_the_port_leave_the_server_answering() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    // Seeded bytes (SplitMix64), so a failure repeats.
    let mut x: u64 = 0x9e37_79b9_7f4a_7c15;
    let garbage: Vec<u8> = (0..64 * 1024)
        .map(|_| {
            x = x.wrapping_add(0x9e37_79b9_7f4a_7c15);
            let mut z = x;
            z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
            (z ^ (z >> 31)) as u8
        })
        .collect();
    raw(&server, &garbage, false);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn an_http1_request_is_refused_and_the_server_answers() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    let reply = raw(&server, b"GET /pollard.v1.Datasets/ListDatasets HTTP/1.1\r\nHost: localhost\r\n\r\n", false);
    assert!(!String::from_utf8_lossy(&reply).contains("200 OK"), "an HTTP/1.1 request was served: {}", String::from_utf8_lossy(&reply));
    let post = raw(&server, b"POST /pollard.v1.Datasets/DeleteDataset HTTP/1.1\r\nHost: localhost\r\nContent-Type: application/grpc\r\nContent-Length: 5\r\n\r\n\0\0\0\0\0", false);
    assert!(!String::from_utf8_lossy(&post).contains("200 OK"), "an HTTP/1.1 call was served");
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn a_half_closed_connection_leaves_the_server_answering() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    // The HTTP/2 preface and then nothing: the write side closes.
    raw(&server, b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n", true);
    // Half a frame header.
    raw(&server, b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n\x00\x00", true);
    assert_alive(&mut server);
    assert_eq!(snapshot(&server), before);
}

#[test]
fn an_idle_connection_does_not_stop_other_calls() {
    let mut server = Serve::start();
    let before = snapshot(&server);
    // Connected, silent, kept open while other calls run.
    let idle = TcpStream::connect(server.addr).unwrap();
    let mut preface_only = TcpStream::connect(server.addr).unwrap();
    preface_only.write_all(b"PRI * HTTP/2.0\r\n\r\nSM\r\n\r\n").unwrap();
    assert_alive(&mut server);
    let rt = runtime();
    let ch = rt.block_on(channel(&server));
    assert_eq!(rt.block_on(upload(&ch, "iris", "target", &iris())).unwrap().rows, 150);
    drop((idle, preface_only));
    let after = snapshot(&server);
    assert_eq!(after["runs"], before["runs"]);
}
