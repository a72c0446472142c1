//! The service end to end: a real server on 127.0.0.1 (port 0) and the generated client.
//! Data: the open datasets in tests/data (sources in tests/data/SOURCES.md).

use std::time::Duration;

use pollard::config::Config;
use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::store::Store;
use tokio::sync::oneshot;
use tonic::transport::Channel;

struct Server {
    addr: std::net::SocketAddr,
    stop: Option<oneshot::Sender<()>>,
    done: tokio::task::JoinHandle<Result<(), String>>,
}

async fn start(store: Store, config: Config) -> Server {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let (tx, rx) = oneshot::channel();
    let done = tokio::spawn(pollard::server::run(listener, config, store, async move {
        let _ = rx.await;
    }));
    Server { addr, stop: Some(tx), done }
}

impl Server {
    async fn channel(&self) -> Channel {
        let url = format!("http://{}", self.addr);
        for _ in 0..100 {
            if let Ok(c) = Channel::from_shared(url.clone()).unwrap().connect().await {
                return c;
            }
            tokio::time::sleep(Duration::from_millis(20)).await;
        }
        panic!("server did not come up");
    }

    async fn stop(mut self) {
        let _ = self.stop.take().unwrap().send(());
        self.done.await.unwrap().unwrap();
    }
}

fn test_config() -> Config {
    Config { cpu_threads: 2, ..Config::default() }
}

async fn upload(client: &mut DatasetsClient<Channel>, name: &str, target: &str, bytes: Vec<u8>) -> Result<pb::DatasetInfo, tonic::Status> {
    let mut msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical: vec![] })) }];
    for chunk in bytes.chunks(4096) {
        msgs.push(pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(chunk.to_vec())) });
    }
    client.upload(tokio_stream::iter(msgs)).await.map(|r| r.into_inner())
}

fn values(v: &[f64]) -> Option<pb::LimitRange> {
    Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values: v.iter().map(|x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(*x)) }).collect() })) })
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sweep_over_grpc() {
    let server = start(Store::open_temporary().unwrap(), test_config()).await;
    let ch = server.channel().await;
    let mut datasets = DatasetsClient::new(ch.clone());
    let mut runs = RunsClient::new(ch.clone());
    let mut models = ModelsClient::new(ch.clone());
    let iris = std::fs::read(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/data/iris.csv")).unwrap();
    let ds = upload(&mut datasets, "iris", "target", iris.clone()).await.unwrap();
    assert_eq!(ds.rows, 150);
    assert_eq!(ds.task, "classify");
    let again = upload(&mut datasets, "iris", "target", iris).await.unwrap();
    assert_eq!(again.id, ds.id, "the same bytes get the same id");
    let spec = pb::SweepSpec { max_depth: values(&[1.0, 2.0, 3.0, 5.0]), min_leaf_rows: values(&[1.0, 5.0]), seed: 7, ..Default::default() };
    let run = runs.start_run(pb::StartRunRequest { dataset_name: "iris".into(), spec: Some(spec), ..Default::default() }).await.unwrap().into_inner();
    let mut stream = runs.follow_run(pb::FollowRunRequest { id: run.id.clone(), after_sequence: 0 }).await.unwrap().into_inner();
    let mut scored = std::collections::BTreeSet::new();
    let mut last = 0;
    let mut finished = None;
    while let Some(ev) = stream.message().await.unwrap() {
        assert_eq!(ev.sequence, last + 1, "gapless sequence");
        last = ev.sequence;
        match ev.kind.unwrap() {
            pb::run_event::Kind::Scored(s) => assert!(scored.insert(s.index), "setting {} scored twice", s.index),
            pb::run_event::Kind::Finished(f) => finished = Some(f),
            pb::run_event::Kind::Failed(m) | pb::run_event::Kind::Cancelled(m) => panic!("run ended: {m}"),
            pb::run_event::Kind::Progress(_) => {}
        }
    }
    let finished = finished.expect("a finished event");
    assert_eq!(scored.len(), 8);
    assert_eq!(finished.scores.len(), 8);
    assert!(finished.model.is_some());
    let got = runs.get_run(pb::GetRunRequest { id: run.id.clone() }).await.unwrap().into_inner();
    assert_eq!(got.state, pb::RunState::Finished as i32);
    assert_eq!(got.scores.len(), 8);
    let text = models.get_model(pb::GetModelRequest { run_id: run.id.clone(), format: pb::ModelFormat::Text as i32 }).await.unwrap().into_inner();
    assert!(text.text.contains("leaves"));
    server.stop().await;
}
