//! The service end to end: real servers on 127.0.0.1 (port 0) and the generated clients.
//!
//! Data: the open datasets in tests/data (iris, wine, breast_cancer, diabetes; sources and
//! licences in tests/data/SOURCES.md). Where a test needs a shape those files do not have (a
//! text column, missing cells, a ragged row), it derives it from an open file in a helper
//! whose comment says exactly what was changed; such changes are test scaffolding, not data.
//!
//! No fixed sleeps: every wait is on a condition (a stream event, a run state) with a deadline.

use std::collections::{BTreeSet, HashMap};
use std::path::PathBuf;
use std::sync::Arc;
use std::time::{Duration, Instant};

use pollard::config::Config;
use pollard::data::csv::{read_dataset, CsvOptions};
use pollard::data::{Column, Feature, Frame, MISSING_CODE};
use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::store::{PostgresStore, SledStore, Storage};
use pollard::tree::{Predictions, SplitRule, Tree};
use tonic::transport::Channel;
use tonic::{Code, Status};

// ------------------------------------------------------------------ harness

#[path = "support/server.rs"]
mod support;
#[path = "support/process.rs"]
mod process;
#[path = "support/postgres.rs"]
mod pg;
use process::expect_status;
use support::{start, POLL};


/// Where a test's store lives: every test here runs once on each backend.
enum Place {
    Sled(TempDir),
    /// A fresh database on the throwaway cluster (tests/support/postgres.rs).
    Postgres(String),
}

impl Place {
    /// A fresh place on each backend: sled always, PostgreSQL when its programs are
    /// installed (always in CI, which sets POLLARD_REQUIRE_POSTGRES=1).
    fn each(test: &str) -> Vec<Place> {
        let mut out = vec![Place::Sled(TempDir::new(test))];
        out.extend(pg::fresh_database(test).map(Place::Postgres));
        out
    }

    fn name(&self) -> &'static str {
        match self {
            Place::Sled(_) => "sled",
            Place::Postgres(_) => "postgres",
        }
    }

    /// Opens the store, waiting until a previous server has let go of a sled directory.
    async fn open(&self) -> Arc<dyn Storage> {
        match self {
            Place::Sled(dir) => Arc::new(reopen(&dir.0).await),
            Place::Postgres(url) => Arc::new(PostgresStore::open(url).unwrap()),
        }
    }
}

/// How long any one condition may take before the test fails.
const PATIENCE: Duration = Duration::from_secs(45);

fn test_config() -> Config {
    Config { cpu_threads: 2, ..Config::default() }
}

/// Bytes per upload message: small, so every upload here is several chunks.
const CHUNK: usize = 1000;

async fn upload(client: &mut DatasetsClient<Channel>, name: &str, target: &str, bytes: Vec<u8>) -> Result<pb::DatasetInfo, Status> {
    let mut msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical: vec![] })) }];
    for chunk in bytes.chunks(CHUNK) {
        msgs.push(pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(chunk.to_vec())) });
    }
    client.upload(tokio_stream::iter(msgs)).await.map(|r| r.into_inner())
}

fn data_file(name: &str) -> Vec<u8> {
    std::fs::read(format!("{}/tests/data/{name}", env!("CARGO_MANIFEST_DIR"))).unwrap()
}

fn number(x: f64) -> pb::LimitValue {
    pb::LimitValue { value: Some(pb::limit_value::Value::Number(x)) }
}

fn values(v: &[f64]) -> Option<pb::LimitRange> {
    Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values: v.iter().map(|x| number(*x)).collect() })) })
}

fn span(from: f64, to: f64, step: f64) -> Option<pb::LimitRange> {
    Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Span(pb::Span { from, to, step })) })
}

fn folds(scheme: &str, k: u32, repeats: u32) -> Option<pb::FoldPlan> {
    Some(pb::FoldPlan { scheme: scheme.into(), k, repeats, column: String::new() })
}

fn strings(v: &[&str]) -> Vec<String> {
    v.iter().map(|s| s.to_string()).collect()
}

fn rfc3339(s: &str) -> chrono::DateTime<chrono::FixedOffset> {
    chrono::DateTime::parse_from_rfc3339(s).unwrap_or_else(|e| panic!("'{s}' is not RFC 3339: {e}"))
}

/// Every message of a server stream until it ends (within the patience).
async fn drain<T>(mut stream: tonic::Streaming<T>, id: &str) -> Vec<T> {
    let deadline = Instant::now() + PATIENCE;
    let mut out = Vec::new();
    loop {
        let next = tokio::time::timeout_at(deadline.into(), stream.message()).await.unwrap_or_else(|_| panic!("run {id}: no end of the stream after {} messages", out.len()));
        match next.unwrap() {
            Some(m) => out.push(m),
            None => return out,
        }
    }
}

/// Follows a run from `after` + 1 until its stream ends (the run ended and every event was
/// sent).
async fn follow(runs: &mut RunsClient<Channel>, id: &str, after: u64) -> Vec<pb::RunEvent> {
    drain(runs.follow_run(pb::FollowRunRequest { id: id.into(), after_sequence: after }).await.unwrap().into_inner(), id).await
}

/// FollowRunBatches from `after` + 1 until its stream ends: the batches as sent.
async fn follow_batches(runs: &mut RunsClient<Channel>, id: &str, after: u64) -> Vec<pb::RunEventBatch> {
    drain(runs.follow_run_batches(pb::FollowRunRequest { id: id.into(), after_sequence: after }).await.unwrap().into_inner(), id).await
}

/// Polls a run until `ready` holds.
async fn wait_run(runs: &mut RunsClient<Channel>, id: &str, what: &str, ready: impl Fn(&pb::RunInfo) -> bool) -> pb::RunInfo {
    let deadline = Instant::now() + PATIENCE;
    loop {
        let r = runs.get_run(pb::GetRunRequest { id: id.into() }).await.unwrap().into_inner();
        if ready(&r) {
            return r;
        }
        assert!(Instant::now() < deadline, "run {id} never became {what}: {:?} with {}/{} units", r.state(), r.units_done, r.units_total);
        tokio::time::sleep(POLL).await;
    }
}

/// Checks the complete event history of a finished run (sequence 1 to the end) and returns
/// its finished event: gapless sequence numbers from 1; every setting scored exactly once;
/// one progress event per work unit, counting 1..=units_total once each; exactly one
/// terminal event, `finished`, last.
fn check_finished_history(run_id: &str, events: &[pb::RunEvent], settings: u32, units_total: u32) -> pb::FinishedEvent {
    use pb::run_event::Kind;
    assert!(!events.is_empty());
    let mut scored = BTreeSet::new();
    let mut progress = BTreeSet::new();
    let mut finished = None;
    for (i, ev) in events.iter().enumerate() {
        assert_eq!(ev.sequence, i as u64 + 1, "gapless sequence numbers from 1");
        assert_eq!(ev.run_id, run_id);
        rfc3339(&ev.at);
        match ev.kind.clone().expect("an event has a kind") {
            Kind::Scored(s) => {
                assert!(s.index < settings, "scored index {} of {settings} settings", s.index);
                assert!(scored.insert(s.index), "setting {} scored twice", s.index);
            }
            Kind::Progress(p) => {
                assert_eq!(p.units_total, units_total);
                assert!(p.scores_done <= p.scores_total);
                assert!(progress.insert(p.units_done), "progress for unit count {} twice", p.units_done);
            }
            Kind::Finished(f) => {
                assert_eq!(i + 1, events.len(), "the finished event is the last");
                finished = Some(f);
            }
            Kind::Failed(m) | Kind::Cancelled(m) => panic!("run {run_id} ended: {m}"),
        }
    }
    assert_eq!(scored, (0..settings).collect::<BTreeSet<_>>(), "every setting scored once");
    assert_eq!(progress, (1..=units_total).collect::<BTreeSet<_>>(), "one progress event per unit");
    let f = finished.expect("a finished event");
    assert_eq!(f.scores.len(), settings as usize);
    f
}

/// A CSV file as header and rows of cells (the csv crate, not pollard's reader).
fn csv_cells(bytes: &[u8]) -> (Vec<String>, Vec<Vec<String>>) {
    let mut r = csv::Reader::from_reader(bytes);
    let header = r.headers().unwrap().iter().map(String::from).collect();
    let rows = r.records().map(|rec| rec.unwrap().iter().map(String::from).collect()).collect();
    (header, rows)
}

/// Checks every row's decision path in a Predict reply against the tree and the request's
/// own cells: the path walks from the root through each condition to its leaf; a blank
/// cell (or a category the tree never saw) is flagged and takes the split's blank-cell side;
/// any other cell holds exactly when its number is at most the threshold (as the f32 the
/// table is read into) or its text is one of the listed categories; the leaf gives the
/// reply's prediction.
fn check_paths(tree: &Tree, table: &pb::Table, reply: &pb::PredictReply) {
    let rows = reply.predicted.len().max(reply.values.len());
    assert_eq!(reply.paths.len(), rows, "one path per row");
    let column = |name: &str| table.columns.iter().find(|c| c.name == name).unwrap_or_else(|| panic!("no column {name}"));
    for (r, path) in reply.paths.iter().enumerate() {
        let mut at = 0u32;
        for c in &path.conditions {
            assert_eq!(c.node, at, "row {r}: the path skips a node");
            let node = &tree.nodes[at as usize];
            let split = node.split.as_ref().expect("a condition is at a split");
            let info = &tree.columns[split.feature as usize];
            assert_eq!(c.feature, info.name);
            assert!(c.text.starts_with(&info.name), "{c:?}");
            let (blank, holds) = match column(&c.feature).cells.as_ref().unwrap() {
                pb::table_column::Cells::Numbers(n) => (n.missing[r], !n.missing[r] && (n.values[r] as f32 as f64) <= c.threshold),
                pb::table_column::Cells::Texts(t) => {
                    let unseen = t.missing[r] || !info.levels.contains(&t.values[r]);
                    (unseen, !unseen && c.categories.contains(&t.values[r]))
                }
            };
            assert_eq!(c.missing, blank, "row {r} at node {at}: {c:?}");
            assert_eq!(c.holds, if blank { split.missing_left } else { holds }, "row {r} at node {at}: {c:?}");
            at = if c.holds { node.left } else { node.right };
        }
        assert_eq!(at, path.leaf, "row {r}: the path ends at its leaf");
        assert!(tree.nodes[at as usize].is_leaf());
        match reply.predicted.get(r) {
            Some(p) => assert_eq!(p, &tree.labels[tree.leaf_class(at) as usize]),
            None => assert_eq!(reply.values[r], tree.value(at as usize)[0]),
        }
    }
}

/// A CSV file as a columnar table: columns whose every cell parses as a number become
/// number columns (empty cells missing), the rest text columns.
fn csv_table(bytes: &[u8]) -> pb::Table {
    let (header, rows) = csv_cells(bytes);
    let columns = header
        .iter()
        .enumerate()
        .map(|(c, name)| {
            let cells: Vec<&str> = rows.iter().map(|r| r[c].as_str()).collect();
            let numbers: Option<Vec<f64>> = cells.iter().map(|s| if s.is_empty() { Some(f64::NAN) } else { s.parse().ok() }).collect();
            let missing = cells.iter().map(|s| s.is_empty()).collect();
            pb::TableColumn {
                name: name.clone(),
                cells: Some(match numbers {
                    Some(values) => pb::table_column::Cells::Numbers(pb::NumberCells { values, missing }),
                    None => pb::table_column::Cells::Texts(pb::TextCells { values: cells.iter().map(|s| s.to_string()).collect(), missing }),
                }),
            }
        })
        .collect();
    pb::Table { columns }
}

/// Rows of whole lines of a CSV file (header kept), for cutting open files into test inputs.
fn lines(bytes: &[u8]) -> Vec<String> {
    String::from_utf8(bytes.to_vec()).unwrap().lines().map(String::from).collect()
}

fn join(lines: &[String]) -> Vec<u8> {
    let mut s = lines.join("\n");
    s.push('\n');
    s.into_bytes()
}

/// A columnar table derived from tests/data/iris.csv (open data): `petal_band` puts
/// petal_length_cm into three named bands (below 2.5 "short", below 4.8 "mid", else "long"),
/// `sepal_width_cm` is copied, `target` is the species. Test scaffolding, not data: every 7th
/// band (rows 0, 7, 14, …) and every 11th width (rows 0, 11, 22, …) is blanked, a synthetic
/// pattern chosen only to exercise missing cells.
fn iris_band_table() -> pb::Table {
    let (header, rows) = csv_cells(&data_file("iris.csv"));
    let col = |n: &str| header.iter().position(|h| h == n).unwrap();
    let (pl, sw, t) = (col("petal_length_cm"), col("sepal_width_cm"), col("target"));
    let band = |r: &Vec<String>| {
        let x: f64 = r[pl].parse().unwrap();
        if x < 2.5 {
            "short"
        } else if x < 4.8 {
            "mid"
        } else {
            "long"
        }
    };
    let n = rows.len();
    pb::Table {
        columns: vec![
            pb::TableColumn {
                name: "petal_band".into(),
                cells: Some(pb::table_column::Cells::Texts(pb::TextCells {
                    values: rows.iter().enumerate().map(|(i, r)| if i % 7 == 0 { String::new() } else { band(r).to_string() }).collect(),
                    missing: (0..n).map(|i| i % 7 == 0).collect(),
                })),
            },
            pb::TableColumn {
                name: "sepal_width_cm".into(),
                cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells {
                    values: rows.iter().enumerate().map(|(i, r)| if i % 11 == 0 { f64::NAN } else { r[sw].parse().unwrap() }).collect(),
                    missing: (0..n).map(|i| i % 11 == 0).collect(),
                })),
            },
            pb::TableColumn { name: "target".into(), cells: Some(pb::table_column::Cells::Texts(pb::TextCells { values: rows.iter().map(|r| r[t].clone()).collect(), missing: vec![] })) },
        ],
    }
}

async fn all_datasets(datasets: &mut DatasetsClient<Channel>) -> Vec<pb::DatasetInfo> {
    let r = datasets.list_datasets(pb::ListDatasetsRequest { page_size: 500, ..Default::default() }).await.unwrap().into_inner();
    assert!(r.next_page_token.is_empty());
    r.datasets
}

async fn model_tree(models: &mut ModelsClient<Channel>, run_id: &str) -> Tree {
    let json = models.get_model(pb::GetModelRequest { run_id: run_id.into(), format: pb::ModelFormat::Json as i32 }).await.unwrap().into_inner();
    assert_eq!(json.format, pb::ModelFormat::Json as i32);
    pollard::export::from_json(&json.text).unwrap()
}

/// Starts a run and follows it to its end; checks its history; returns the run as GetRun
/// reports it and the finished event.
async fn sweep_to_end(runs: &mut RunsClient<Channel>, request: pb::StartRunRequest) -> (pb::RunInfo, pb::FinishedEvent, Vec<pb::RunEvent>) {
    let run = runs.start_run(request).await.unwrap().into_inner();
    let events = follow(runs, &run.id, 0).await;
    let got = runs.get_run(pb::GetRunRequest { id: run.id.clone() }).await.unwrap().into_inner();
    assert_eq!(got.state(), pb::RunState::Finished, "reason: {}", got.reason);
    let finished = check_finished_history(&run.id, &events, got.settings, got.units_total);
    (got, finished, events)
}

// ------------------------------------------------------------------ datasets

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn datasets_upload_version_list_delete_and_refuse() {
    for place in Place::each("datasets_upload_version_list_delete_and_refuse") {
        eprintln!("datasets_upload_version_list_delete_and_refuse on {}", place.name());
        datasets_upload_version_list_delete_and_refuse_on(&place).await;
    }
}

async fn datasets_upload_version_list_delete_and_refuse_on(place: &Place) {
    let config = Config { max_upload_bytes: 10_000, max_rows: 160, ..test_config() };
    let server = start(place.open().await, config).await;
    let mut datasets = DatasetsClient::new(server.channel().await);
    let iris = data_file("iris.csv");
    assert!(iris.len() > 3 * CHUNK, "the upload goes in several chunks");

    // Upload (client streaming), the same bytes again, and a second version.
    let v1 = upload(&mut datasets, "flowers", "target", iris.clone()).await.unwrap();
    assert!(v1.id.starts_with("ds_") && v1.id.len() == 3 + 64, "{}", v1.id);
    assert_eq!((v1.name.as_str(), v1.version, v1.rows, v1.bytes), ("flowers", 1, 150, iris.len() as u64));
    assert_eq!((v1.target.as_str(), v1.task.as_str()), ("target", "classify"));
    assert_eq!(v1.columns.iter().map(|c| c.name.as_str()).collect::<Vec<_>>(), ["sepal_length_cm", "sepal_width_cm", "petal_length_cm", "petal_width_cm"]);
    assert!(v1.columns.iter().all(|c| c.kind() == pb::ColumnKind::Numeric && c.missing == 0));
    rfc3339(&v1.created_at);
    let again = upload(&mut datasets, "flowers", "target", iris.clone()).await.unwrap();
    assert_eq!(again, pb::DatasetInfo { unchanged: true, ..v1.clone() }, "the same bytes and target are unchanged, still version 1");
    let all_lines = lines(&iris);
    let v2 = upload(&mut datasets, "flowers", "target", join(&all_lines[..all_lines.len() - 1])).await.unwrap();
    assert_eq!((v2.version, v2.rows), (2, 149));
    assert_ne!(v2.id, v1.id);

    // A columnar table with numbers, texts and missing cells.
    let table = iris_band_table();
    let v3 = datasets.put_table(pb::PutTableRequest { name: "flowers".into(), target: "target".into(), table: Some(table.clone()) }).await.unwrap().into_inner();
    assert_eq!((v3.version, v3.rows, v3.task.as_str()), (3, 150, "classify"));
    let band = &v3.columns[0];
    assert_eq!((band.name.as_str(), band.kind(), band.missing, band.levels), ("petal_band", pb::ColumnKind::Categorical, 22, 3));
    let width = &v3.columns[1];
    assert_eq!((width.name.as_str(), width.kind(), width.missing), ("sepal_width_cm", pb::ColumnKind::Numeric, 14));
    let again = datasets.put_table(pb::PutTableRequest { name: "flowers".into(), target: "target".into(), table: Some(table.clone()) }).await.unwrap().into_inner();
    assert_eq!(again.id, v3.id, "the same table gets the same id");
    assert_eq!(again.version, 3);
    let got = datasets.get_dataset(pb::GetDatasetRequest { id: v2.id.clone() }).await.unwrap().into_inner();
    assert_eq!(got, v2);

    // Listing by name, one per page, until the token runs out.
    let mut paged = Vec::new();
    let mut token = String::new();
    for pages in 1.. {
        let r = datasets.list_datasets(pb::ListDatasetsRequest { name: "flowers".into(), page_size: 1, page_token: token.clone() }).await.unwrap().into_inner();
        assert!(r.datasets.len() <= 1);
        paged.extend(r.datasets);
        if r.next_page_token.is_empty() {
            break;
        }
        token = r.next_page_token;
        assert!(pages < 10, "paging does not end");
    }
    let ids: BTreeSet<&str> = paged.iter().map(|d| d.id.as_str()).collect();
    assert_eq!(ids.len(), 3, "no duplicates across pages: {paged:?}");
    assert_eq!(paged.iter().map(|d| d.version).collect::<BTreeSet<_>>(), BTreeSet::from([1, 2, 3]));
    assert!(paged.windows(2).all(|w| rfc3339(&w[0].created_at) >= rfc3339(&w[1].created_at)), "newest first");
    let whole = datasets.list_datasets(pb::ListDatasetsRequest { name: "flowers".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(whole.datasets, paged, "pages add up to the whole listing");
    let other = upload(&mut datasets, "other", "target", join(&all_lines[..101])).await.unwrap();
    assert_eq!(other.version, 1, "versions count per name");
    let only = datasets.list_datasets(pb::ListDatasetsRequest { name: "other".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(only.datasets, vec![other.clone()]);
    assert_eq!(all_datasets(&mut datasets).await.len(), 4);

    // Deleting an unused dataset; versions under the name keep growing.
    datasets.delete_dataset(pb::DeleteDatasetRequest { id: v2.id.clone() }).await.unwrap();
    expect_status("get a deleted dataset", datasets.get_dataset(pb::GetDatasetRequest { id: v2.id.clone() }).await, Code::NotFound, &[&v2.id]);
    expect_status("delete twice", datasets.delete_dataset(pb::DeleteDatasetRequest { id: v2.id.clone() }).await, Code::NotFound, &[&v2.id]);
    let left = datasets.list_datasets(pb::ListDatasetsRequest { name: "flowers".into(), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(left.datasets.iter().map(|d| d.version).collect::<BTreeSet<_>>(), BTreeSet::from([1, 3]));
    let v4 = upload(&mut datasets, "flowers", "target", join(&all_lines[..all_lines.len() - 2])).await.unwrap();
    assert_eq!(v4.version, 4, "a deleted version's number is not reused");
    expect_status("unknown dataset", datasets.get_dataset(pb::GetDatasetRequest { id: "ds_1111111111111111111111111111111111111111111111111111111111111111".into() }).await, Code::NotFound, &["ds_1111111111111111111111111111111111111111111111111111111111111111"]);

    // Bad uploads: each refused with the place of the fault, none leaves a dataset behind.
    let before = all_datasets(&mut datasets).await;
    // Row 3 (line 4) loses its last feature cell.
    let mut ragged = all_lines.clone();
    ragged[3] = "4.7,3.2,1.3,setosa".into();
    expect_status("ragged row", upload(&mut datasets, "bad", "target", join(&ragged)).await, Code::InvalidArgument, &["row 3", "line 4", "expected 5 fields", "found 4"]);
    // Row 5 gets a number too large for a 32-bit float in sepal_length_cm.
    let mut huge = all_lines.clone();
    huge[5] = huge[5].replacen("5.0", "1e39", 1);
    assert_ne!(huge[5], all_lines[5]);
    expect_status("number out of range", upload(&mut datasets, "bad", "target", join(&huge)).await, Code::InvalidArgument, &["row 5", "column 'sepal_length_cm'", "1e39"]);
    // Row 7 has no target cell.
    let mut no_target = all_lines.clone();
    no_target[7] = no_target[7].trim_end_matches("setosa").to_string();
    expect_status("missing target cell", upload(&mut datasets, "bad", "target", join(&no_target)).await, Code::InvalidArgument, &["row 7", "column 'target'", "missing"]);
    expect_status("unknown target", upload(&mut datasets, "bad", "species", iris.clone()).await, Code::InvalidArgument, &["'species'", "not in the header"]);
    // The first 50 rows of iris are all setosa.
    expect_status("one-class target", upload(&mut datasets, "bad", "target", join(&all_lines[..51])).await, Code::InvalidArgument, &["setosa", "two classes"]);
    let wine = data_file("wine.csv");
    assert!(wine.len() > 10_000);
    expect_status("upload over max_upload_bytes", upload(&mut datasets, "bad", "target", wine).await, Code::ResourceExhausted, &["10000 bytes"]);
    // Iris rows twice over: 300 rows in about 7.6 kB, under the byte cap, over the row cap.
    let mut twice = all_lines.clone();
    twice.extend_from_slice(&all_lines[1..]);
    assert!(join(&twice).len() < 10_000);
    expect_status("rows over max_rows", upload(&mut datasets, "bad", "target", join(&twice)).await, Code::ResourceExhausted, &["160 data rows"]);
    let mut long_table = csv_table(&join(&twice));
    expect_status(
        "table rows over max_rows",
        datasets.put_table(pb::PutTableRequest { name: "bad".into(), target: "target".into(), table: Some(long_table.clone()) }).await,
        Code::ResourceExhausted,
        &["160 data rows"],
    );
    if let Some(pb::table_column::Cells::Numbers(n)) = &mut long_table.columns[1].cells {
        n.values.truncate(299);
        n.missing.truncate(299);
    }
    expect_status(
        "table with a short column",
        datasets.put_table(pb::PutTableRequest { name: "bad".into(), target: "target".into(), table: Some(long_table) }).await,
        Code::InvalidArgument,
        &["table.columns[1]", "'sepal_width_cm' has 299 cells"],
    );
    expect_status("upload with no header", datasets.upload(tokio_stream::iter(vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(iris.clone())) }])).await, Code::InvalidArgument, &["header"]);
    assert_eq!(all_datasets(&mut datasets).await, before, "bad uploads leave no dataset behind");
    let bad = datasets.list_datasets(pb::ListDatasetsRequest { name: "bad".into(), ..Default::default() }).await.unwrap().into_inner();
    assert!(bad.datasets.is_empty());
    server.stop().await;
}

// ------------------------------------------------------------------ sweeps and models

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn sweep_follow_inspect_export_and_predict() {
    for place in Place::each("sweep_follow_inspect_export_and_predict") {
        eprintln!("sweep_follow_inspect_export_and_predict on {}", place.name());
        sweep_follow_inspect_export_and_predict_on(&place).await;
    }
}

async fn sweep_follow_inspect_export_and_predict_on(place: &Place) {
    let server = start(place.open().await, test_config()).await;
    let ch = server.channel().await;
    let mut datasets = DatasetsClient::new(ch.clone());
    let mut runs = RunsClient::new(ch.clone());
    let mut models = ModelsClient::new(ch.clone());
    let iris = data_file("iris.csv");
    let ds = upload(&mut datasets, "iris", "target", iris.clone()).await.unwrap();

    // By id, with an idempotency key: a retried StartRun gets the same run.
    let spec = pb::SweepSpec { max_depth: values(&[1.0, 2.0, 3.0, 5.0]), min_leaf_rows: values(&[1.0, 5.0]), folds: folds("stratified", 5, 2), seed: 7, ..Default::default() };
    let labels = HashMap::from([("case".to_string(), "by_id".to_string())]);
    let request = pb::StartRunRequest { dataset_id: ds.id.clone(), spec: Some(spec.clone()), idempotency_key: "iris-by-id".into(), labels: labels.clone(), ..Default::default() };
    let first = runs.start_run(request.clone()).await.unwrap().into_inner();
    assert!(first.id.starts_with("run_"), "{}", first.id);
    assert_eq!(first.state(), pb::RunState::Queued);
    let retried = runs.start_run(request.clone()).await.unwrap().into_inner();
    assert_eq!(retried.id, first.id, "a retried StartRun returns the first call's run");
    let events = follow(&mut runs, &first.id, 0).await;
    let got = runs.get_run(pb::GetRunRequest { id: first.id.clone() }).await.unwrap().into_inner();
    assert_eq!(got.state(), pb::RunState::Finished, "reason: {}", got.reason);
    assert_eq!(got.settings, 8);
    // 10 splits (5 folds, 2 repeats) times 2 shaping keys (min_leaf_rows 1 and 5).
    assert_eq!((got.units_done, got.units_total), (20, 20));
    let finished = check_finished_history(&first.id, &events, 8, 20);
    let again = runs.start_run(request).await.unwrap().into_inner();
    assert_eq!((again.id.as_str(), again.state()), (first.id.as_str(), pb::RunState::Finished));

    // Resuming: after_sequence = N gives exactly the events after N; after the last, none.
    for n in [1, events.len() as u64 / 2, events.len() as u64 - 1] {
        assert_eq!(follow(&mut runs, &first.id, n).await, events[n as usize..].to_vec(), "after_sequence {n}");
    }
    assert!(follow(&mut runs, &first.id, events.len() as u64).await.is_empty());
    // FollowRunBatches: the same events in the same order, several to a message, none empty.
    for n in [0, 1, events.len() as u64 / 2, events.len() as u64 - 1] {
        let batches = follow_batches(&mut runs, &first.id, n).await;
        assert!(batches.iter().all(|b| !b.events.is_empty()), "after_sequence {n}: an empty batch");
        if n == 0 {
            assert!(batches.len() < events.len() / 2, "{} batches for {} events of a finished run", batches.len(), events.len());
        }
        let flat: Vec<pb::RunEvent> = batches.into_iter().flat_map(|b| b.events).collect();
        assert_eq!(flat, events[n as usize..].to_vec(), "batches after_sequence {n}");
    }
    assert!(follow_batches(&mut runs, &first.id, events.len() as u64).await.is_empty());

    // GetRun: spec, state, timings, every score, the pick, the folds, the model summary.
    assert_eq!((got.dataset_id.as_str(), got.dataset_name.as_str(), got.dataset_version), (ds.id.as_str(), "iris", 1));
    assert_eq!(got.labels, labels);
    let echoed = got.spec.clone().unwrap();
    assert_eq!((echoed.target.as_str(), echoed.seed, echoed.skip_final), ("target", 7, false));
    assert_eq!((&echoed.max_depth, &echoed.min_leaf_rows), (&spec.max_depth, &spec.min_leaf_rows));
    assert_eq!(echoed.folds.as_ref().map(|f| (f.scheme.as_str(), f.k, f.repeats)), Some(("stratified", 5, 2)));
    let (created, started, ended) = (rfc3339(&got.created_at), rfc3339(&got.started_at), rfc3339(&got.finished_at));
    assert!(created <= started && started <= ended, "{created} {started} {ended}");
    assert_eq!(got.scores.len(), 8);
    for (i, s) in got.scores.iter().enumerate() {
        assert_eq!(s.index, i as u32);
        assert_eq!(s.fold_scores.len(), 10, "one score per split");
        let mean = s.fold_scores.iter().sum::<f64>() / 10.0;
        assert!((s.valid_mean - mean).abs() < 1e-12, "valid_mean is the mean of the fold scores");
        assert!((0.0..=1.0).contains(&s.valid_mean), "accuracy {}", s.valid_mean);
        // Accuracy: higher is better, so the gap is training minus validation.
        assert!((s.gap - (s.train_mean - s.valid_mean)).abs() < 1e-12);
        let limits = s.limits.clone().unwrap();
        assert!([1, 2, 3, 5].contains(&limits.max_depth.unwrap()) && [1, 5].contains(&limits.min_leaf_rows));
        assert!(s.mean_depth <= limits.max_depth.unwrap() as f64);
    }
    let picked = got.picked.expect("a picked setting") as usize;
    assert_eq!(got.best, Some(picked as u32), "highest picks the best valid_mean");
    assert!(got.scores.iter().all(|s| s.valid_mean <= got.scores[picked].valid_mean));
    assert_eq!(finished.scores, got.scores);
    assert_eq!((finished.picked, finished.best), (picked as u32, picked as u32));
    assert_eq!(got.fold_assignment.len(), 2, "one assignment per repeat");
    for a in &got.fold_assignment {
        assert_eq!(a.folds.len(), 150, "one entry per row");
        assert_eq!(a.folds.iter().copied().collect::<BTreeSet<_>>(), (0..5).collect::<BTreeSet<_>>());
    }
    let summary = got.model.clone().expect("a model summary");
    assert_eq!(summary.classes, ["setosa", "versicolor", "virginica"]);

    // The model in all four formats.
    let tree = model_tree(&mut models, &first.id).await;
    let proto = models.get_model(pb::GetModelRequest { run_id: first.id.clone(), format: pb::ModelFormat::Protobuf as i32 }).await.unwrap().into_inner();
    let proto = proto.model.expect("the protobuf format carries the model");
    assert_eq!(pollard::rpc::convert::model_from(&proto).unwrap(), tree, "protobuf and JSON give the same tree");
    assert_eq!(finished.model.as_ref(), Some(&proto), "the finished event carries the model");
    assert_eq!((summary.nodes as usize, summary.leaves as usize, summary.depth), (tree.nodes.len(), tree.n_leaves(), tree.depth()));
    assert!(tree.nodes.len() > 1, "the picked iris tree splits");
    let dot = models.get_model(pb::GetModelRequest { run_id: first.id.clone(), format: pb::ModelFormat::Dot as i32 }).await.unwrap().into_inner().text;
    assert!(dot.starts_with("digraph"));
    let node_statements = dot.lines().filter(|l| l.trim_start().strip_prefix('n').is_some_and(|r| r.split(' ').next().is_some_and(|id| id.parse::<u32>().is_ok()) && r.split(' ').nth(1).is_some_and(|w| w.starts_with('[')))).count();
    assert_eq!(node_statements, tree.nodes.len(), "one node statement per tree node:\n{dot}");
    assert_eq!(dot.matches(" -> ").count(), 2 * (tree.nodes.len() - tree.n_leaves()), "two edges per split");
    let text = models.get_model(pb::GetModelRequest { run_id: first.id.clone(), format: pb::ModelFormat::Text as i32 }).await.unwrap().into_inner().text;
    assert_eq!(text.lines().count(), tree.nodes.len() + 1, "one line per node and a summary:\n{text}");
    // ONNX: the bytes the core export writes for this tree, as a model with one tree node
    // per pollard node (iris has no categorical columns, so no set-split chains).
    let onnx = models.get_model(pb::GetModelRequest { run_id: first.id.clone(), format: pb::ModelFormat::Onnx as i32 }).await.unwrap().into_inner();
    assert_eq!(onnx.format, pb::ModelFormat::Onnx as i32);
    assert_eq!(onnx.data, pollard::export::onnx::to_onnx(&tree).unwrap(), "the served ONNX is the export of the served tree");
    let decoded = <pollard::onnx_pb::ModelProto as prost::Message>::decode(&onnx.data[..]).expect("an onnx ModelProto");
    let ensemble = decoded.graph.as_ref().unwrap().node.iter().find(|n| n.op_type.as_deref() == Some("TreeEnsembleClassifier")).expect("a tree ensemble node");
    let node_ids = ensemble.attribute.iter().find(|a| a.name.as_deref() == Some("nodes_nodeids")).expect("nodes_nodeids");
    assert_eq!(node_ids.ints.len(), tree.nodes.len());
    for n in tree.nodes.iter().filter_map(|n| n.split.as_ref()) {
        let column = &tree.columns[n.feature as usize].name;
        assert!(text.contains(column.as_str()), "the text names split column {column}:\n{text}");
    }

    // The served model is the engine's own refit of the picked setting.
    let data = read_dataset(&iris[..], &CsvOptions::new("target")).unwrap();
    let core_spec = pollard::rpc::convert::spec_from(&spec, data.task()).unwrap();
    let plan = pollard::sweep::plan(&data, &core_spec).unwrap();
    let local = pollard::sweep::fit_final(&plan, &plan.settings[picked]).unwrap();
    assert_eq!(local, tree, "served model = local refit of the picked setting");

    // Importances in GetRun: impurity shares of the served model, and permutation drops equal
    // to the engine's own computation for the picked setting on the run's folds and seed.
    let perm = pollard::sweep::permutation_importance(&plan, &plan.settings[picked], core_spec.seed, pollard::sweep::PERMUTATION_REPEATS).unwrap();
    assert_eq!(perm.per_fold.len(), 10, "5 folds x 2 repeats");
    assert_eq!(got.permutation_repeats, pollard::sweep::PERMUTATION_REPEATS);
    let shares = tree.impurity_importances();
    assert!((shares.iter().sum::<f64>() - 1.0).abs() < 1e-12, "{shares:?}");
    assert_eq!(got.importances.len(), 4);
    for (j, f) in got.importances.iter().enumerate() {
        assert_eq!(f.feature, tree.columns[j].name);
        assert_eq!((f.impurity, f.permutation_mean, f.permutation_sd), (Some(shares[j]), Some(perm.mean()[j]), Some(perm.sd()[j])), "{}", f.feature);
    }
    assert!(got.importances.iter().any(|f| f.permutation_mean.unwrap() > 0.05), "iris leans on some feature: {:?}", got.importances);
    let json_model = models.get_model(pb::GetModelRequest { run_id: first.id.clone(), format: pb::ModelFormat::Json as i32 }).await.unwrap().into_inner();
    let doc: serde_json::Value = serde_json::from_str(&json_model.text).unwrap();
    assert_eq!(doc["importances"].as_array().unwrap().iter().map(|v| v.as_f64().unwrap()).collect::<Vec<_>>(), shares, "the model file carries the shares");

    // Predicting every iris row from a table matches the tree's own predictions.
    let reply = models.predict(pb::PredictRequest { run_id: first.id.clone(), rows: Some(csv_table(&iris)), ..Default::default() }).await.unwrap().into_inner();
    let Predictions::Classes { classes, probabilities } = tree.predict(&data.frame) else { panic!("a classify tree") };
    assert_eq!(reply.classes, tree.labels);
    assert_eq!(reply.predicted, classes.iter().map(|&c| tree.labels[c as usize].clone()).collect::<Vec<_>>());
    assert_eq!(reply.probabilities, probabilities);
    assert_eq!(reply.probabilities.len(), 150 * 3);
    assert!(reply.values.is_empty() && reply.paths.is_empty());
    // Explained: the same predictions, and every row's path checked against its cells.
    let explained = models.predict(pb::PredictRequest { run_id: first.id.clone(), rows: Some(csv_table(&iris)), explain: true }).await.unwrap().into_inner();
    assert_eq!((&explained.predicted, &explained.probabilities), (&reply.predicted, &reply.probabilities));
    check_paths(&tree, &csv_table(&iris), &explained);
    assert!(explained.paths.iter().any(|p| p.conditions.iter().any(|c| c.holds)) && explained.paths.iter().any(|p| p.conditions.iter().any(|c| !c.holds)));

    // Pick rules with a budget or a tolerance, checked against the run's own scores by brute
    // force, and the Pareto front of (accuracy, mean leaves) reported with the run.
    let front_of = |scores: &[pb::SettingScore]| -> Vec<u32> {
        let beats = |j: &pb::SettingScore, i: &pb::SettingScore| j.valid_mean >= i.valid_mean && j.mean_leaves <= i.mean_leaves && (j.valid_mean > i.valid_mean || j.mean_leaves < i.mean_leaves);
        let mut front: Vec<&pb::SettingScore> = scores
            .iter()
            .enumerate()
            .filter(|(k, i)| !scores.iter().any(|j| beats(j, i)) && !scores[..*k].iter().any(|j| j.valid_mean == i.valid_mean && j.mean_leaves == i.mean_leaves))
            .map(|(_, i)| i)
            .collect();
        front.sort_by(|a, b| a.mean_leaves.total_cmp(&b.mean_leaves));
        front.iter().map(|s| s.index).collect()
    };
    assert_eq!(got.pareto_front, front_of(&got.scores));
    assert!(got.pareto_front.len() >= 2, "{:?}", got.pareto_front);
    let best_mean = got.scores.iter().map(|s| s.valid_mean).fold(f64::MIN, f64::max);
    for (rule, ok) in [
        ("max_leaves_budget:3", Box::new(|s: &pb::SettingScore, all: &[pb::SettingScore]| s.mean_leaves <= 3.0 && all.iter().filter(|t| t.mean_leaves <= 3.0).all(|t| t.valid_mean <= s.valid_mean)) as Box<dyn Fn(&pb::SettingScore, &[pb::SettingScore]) -> bool>),
        ("within:0.02", Box::new(move |s: &pb::SettingScore, all: &[pb::SettingScore]| s.valid_mean >= best_mean - 0.02 && all.iter().filter(|t| t.valid_mean >= best_mean - 0.02).all(|t| t.mean_leaves >= s.mean_leaves))),
    ] {
        let ruled = pb::SweepSpec { pick: rule.into(), ..spec.clone() };
        let (r, done, _) = sweep_to_end(&mut runs, pb::StartRunRequest { dataset_id: ds.id.clone(), spec: Some(ruled), ..Default::default() }).await;
        assert_eq!(r.spec.as_ref().unwrap().pick, rule);
        let picked = &r.scores[r.picked.unwrap() as usize];
        assert!(ok(picked, &r.scores), "{rule} picked {picked:?}");
        assert_eq!(done.picked, r.picked.unwrap());
    }
    for bad in ["max_leaves_budget:0", "within:-0.1", "best"] {
        let ruled = pb::SweepSpec { pick: bad.into(), ..spec.clone() };
        expect_status(bad, runs.start_run(pb::StartRunRequest { dataset_id: ds.id.clone(), spec: Some(ruled), ..Default::default() }).await, Code::InvalidArgument, &["spec.pick", "max_leaves_budget:N"]);
    }

    // By name: the latest version of "iris"; the same spec and seed give the same scores.
    let by_name = pb::StartRunRequest { dataset_name: "iris".into(), spec: Some(spec.clone()), ..Default::default() };
    let (named, named_done, _) = sweep_to_end(&mut runs, by_name).await;
    assert_ne!(named.id, first.id);
    assert_eq!((named.dataset_id.as_str(), named.dataset_version), (ds.id.as_str(), 1));
    assert_eq!(named_done.scores, finished.scores);

    // Regression on diabetes: values, no classes.
    let diabetes = data_file("diabetes.csv");
    upload(&mut datasets, "diabetes", "target", diabetes.clone()).await.unwrap();
    let reg_spec = pb::SweepSpec { max_depth: values(&[2.0, 4.0, 6.0]), min_leaf_rows: values(&[5.0, 20.0]), folds: folds("shuffled", 4, 1), seed: 3, ..Default::default() };
    let (reg, _, _) = sweep_to_end(&mut runs, pb::StartRunRequest { dataset_name: "diabetes".into(), spec: Some(reg_spec), ..Default::default() }).await;
    assert_eq!(reg.settings, 6);
    assert!(reg.model.as_ref().unwrap().classes.is_empty());
    let reg_tree = model_tree(&mut models, &reg.id).await;
    let reg_data = read_dataset(&diabetes[..], &CsvOptions::new("target")).unwrap();
    let reply = models.predict(pb::PredictRequest { run_id: reg.id.clone(), rows: Some(csv_table(&diabetes)), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(reg_tree.predict(&reg_data.frame), Predictions::Values(reply.values.clone()));
    assert_eq!(reply.values.len(), 442);
    assert!(reply.predicted.is_empty() && reply.probabilities.is_empty() && reply.classes.is_empty());
    let explained = models.predict(pb::PredictRequest { run_id: reg.id.clone(), rows: Some(csv_table(&diabetes)), explain: true }).await.unwrap().into_inner();
    check_paths(&reg_tree, &csv_table(&diabetes), &explained);

    // A table with a text column: unseen categories and missing cells are predicted, the
    // unseen category taking the missing cells' way at every split.
    datasets.put_table(pb::PutTableRequest { name: "iris_bands".into(), target: "target".into(), table: Some(iris_band_table()) }).await.unwrap();
    let band_spec = pb::SweepSpec { max_depth: values(&[1.0, 2.0, 3.0]), seed: 11, ..Default::default() };
    let (bands, _, _) = sweep_to_end(&mut runs, pb::StartRunRequest { dataset_name: "iris_bands".into(), spec: Some(band_spec), ..Default::default() }).await;
    let band_tree = model_tree(&mut models, &bands.id).await;
    let band_col = band_tree.columns.iter().position(|c| c.name == "petal_band").unwrap();
    assert!(
        band_tree.nodes.iter().any(|n| n.split.as_ref().is_some_and(|s| s.feature as usize == band_col && matches!(s.rule, SplitRule::Categories(_)))),
        "the band tree splits on the text column"
    );
    let band_rows = pb::Table {
        columns: vec![
            pb::TableColumn {
                name: "petal_band".into(),
                cells: Some(pb::table_column::Cells::Texts(pb::TextCells { values: strings(&["unseen_band", "", "short", "long"]), missing: vec![false, true, false, false] })),
            },
            pb::TableColumn { name: "sepal_width_cm".into(), cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells { values: vec![3.0, 3.0, 3.0, 0.0], missing: vec![false, false, false, true] })) },
        ],
    };
    let reply = models.predict(pb::PredictRequest { run_id: bands.id.clone(), rows: Some(band_rows.clone()), explain: true }).await.unwrap().into_inner();
    check_paths(&band_tree, &band_rows, &reply);
    // The unseen category and the blank cell are both flagged at the band split.
    for r in [0, 1] {
        assert!(reply.paths[r].conditions.iter().any(|c| c.feature == "petal_band" && c.missing && !c.categories.is_empty()), "row {r}: {:?}", reply.paths[r]);
    }
    assert_eq!(reply.predicted.len(), 4);
    assert_eq!(reply.predicted[0], reply.predicted[1]);
    assert_eq!(reply.probabilities[0..3], reply.probabilities[3..6]);
    for row in reply.probabilities.chunks(3) {
        assert!((row.iter().sum::<f64>() - 1.0).abs() < 1e-9, "{row:?}");
    }
    // The same rows as a frame built by hand: unseen = a code past the dictionary.
    let levels = band_tree.columns[band_col].levels.clone();
    let code = |s: &str| levels.iter().position(|l| l == s).unwrap() as u32;
    let mut features = Vec::new();
    for c in &band_tree.columns {
        features.push(match c.name.as_str() {
            "petal_band" => Feature { name: c.name.clone(), column: Column::Categorical { codes: vec![levels.len() as u32, MISSING_CODE, code("short"), code("long")], levels: levels.clone() } },
            "sepal_width_cm" => Feature { name: c.name.clone(), column: Column::Numeric(vec![3.0, 3.0, 3.0, f32::NAN]) },
            other => panic!("unexpected model column {other}"),
        });
    }
    let Predictions::Classes { classes, probabilities } = band_tree.predict(&Frame::new(features).unwrap()) else { panic!("a classify tree") };
    assert_eq!(reply.predicted, classes.iter().map(|&c| band_tree.labels[c as usize].clone()).collect::<Vec<_>>());
    assert_eq!(reply.probabilities, probabilities);
    server.stop().await;
}

// ------------------------------------------------------------------ queue, cancel, listing, errors

/// A sweep on breast_cancer that takes far longer than the test lets it run: 20 shaping keys
/// (2 criteria × 2 class weights × 5 min_leaf_rows) on 300 splits (10 folds × 30 repeats) is
/// 6,000 work units, each a tree grown on about 512 rows × 30 columns.
fn long_spec() -> pb::SweepSpec {
    pb::SweepSpec {
        criteria: strings(&["gini", "entropy"]),
        class_weights: strings(&["none", "balanced"]),
        min_leaf_rows: values(&[1.0, 2.0, 4.0, 8.0, 16.0]),
        max_depth: span(1.0, 12.0, 1.0),
        folds: folds("stratified", 10, 30),
        seed: 5,
        ..Default::default()
    }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn queue_cancel_list_and_refuse() {
    for place in Place::each("queue_cancel_list_and_refuse") {
        eprintln!("queue_cancel_list_and_refuse on {}", place.name());
        queue_cancel_list_and_refuse_on(&place).await;
    }
}

async fn queue_cancel_list_and_refuse_on(place: &Place) {
    // long_spec's 30 repeats are above the default cap of 20.
    let config = Config { concurrent_runs: 1, max_settings: 500, max_repeats: 30, ..test_config() };
    let server = start(place.open().await, config).await;
    let ch = server.channel().await;
    let mut datasets = DatasetsClient::new(ch.clone());
    let mut runs = RunsClient::new(ch.clone());
    let mut models = ModelsClient::new(ch.clone());
    let iris = upload(&mut datasets, "iris", "target", data_file("iris.csv")).await.unwrap();
    let cancer = upload(&mut datasets, "breast_cancer", "target", data_file("breast_cancer.csv")).await.unwrap();
    let wine = upload(&mut datasets, "wine", "target", data_file("wine.csv")).await.unwrap();
    let label = |team: &str| HashMap::from([("team".to_string(), team.to_string())]);

    // R1: a small run to completion.
    let small = pb::SweepSpec { max_depth: values(&[1.0, 3.0]), seed: 1, ..Default::default() };
    let (r1, _, _) = sweep_to_end(&mut runs, pb::StartRunRequest { dataset_id: iris.id.clone(), spec: Some(small.clone()), labels: label("alpha"), ..Default::default() }).await;

    // R2: a long run, followed from the start; R3 waits behind it (one run at a time).
    let r2 = runs.start_run(pb::StartRunRequest { dataset_id: cancer.id.clone(), spec: Some(long_spec()), labels: label("beta"), ..Default::default() }).await.unwrap().into_inner();
    let mut follower = runs.clone();
    let r2_id = r2.id.clone();
    let r2_events = tokio::spawn(async move { follow(&mut follower, &r2_id, 0).await });
    let running = wait_run(&mut runs, &r2.id, "running with a unit done", |r| r.state() == pb::RunState::Running && r.units_done >= 1).await;
    assert_eq!((running.settings, running.units_total), (240, 6000));
    expect_status("model of a running run", models.get_model(pb::GetModelRequest { run_id: r2.id.clone(), format: pb::ModelFormat::Json as i32 }).await, Code::FailedPrecondition, &[&r2.id, "running"]);
    expect_status("delete a dataset a running run uses", datasets.delete_dataset(pb::DeleteDatasetRequest { id: cancer.id.clone() }).await, Code::FailedPrecondition, &[&cancer.id, &r2.id]);

    let r3 = runs.start_run(pb::StartRunRequest { dataset_name: "wine".into(), spec: Some(small.clone()), labels: label("alpha"), ..Default::default() }).await.unwrap().into_inner();
    assert_eq!(runs.get_run(pb::GetRunRequest { id: r3.id.clone() }).await.unwrap().into_inner().state(), pb::RunState::Queued);
    expect_status("delete a dataset a queued run uses", datasets.delete_dataset(pb::DeleteDatasetRequest { id: wine.id.clone() }).await, Code::FailedPrecondition, &[&wine.id, &r3.id]);
    expect_status("model of a queued run", models.get_model(pb::GetModelRequest { run_id: r3.id.clone(), format: pb::ModelFormat::Json as i32 }).await, Code::FailedPrecondition, &[&r3.id, "queued"]);
    let listed = |state: pb::RunState| pb::ListRunsRequest { state: state as i32, ..Default::default() };
    let ids = |reply: pb::ListRunsReply| reply.runs.into_iter().map(|r| r.id).collect::<Vec<_>>();
    assert_eq!(ids(runs.list_runs(listed(pb::RunState::Queued)).await.unwrap().into_inner()), [r3.id.clone()]);
    assert_eq!(ids(runs.list_runs(listed(pb::RunState::Running)).await.unwrap().into_inner()), [r2.id.clone()]);

    // Cancelling the queued run: it ends at once and its follower hears so.
    let mut follower = runs.clone();
    let r3_id = r3.id.clone();
    let r3_events = tokio::spawn(async move { follow(&mut follower, &r3_id, 0).await });
    let cancelled = runs.cancel_run(pb::CancelRunRequest { id: r3.id.clone() }).await.unwrap().into_inner();
    assert_eq!(cancelled.state(), pb::RunState::Cancelled);
    let r3_events = tokio::time::timeout(PATIENCE, r3_events).await.unwrap().unwrap();
    assert_eq!(r3_events.len(), 1, "{r3_events:?}");
    assert_eq!(r3_events[0].sequence, 1);
    assert!(matches!(&r3_events[0].kind, Some(pb::run_event::Kind::Cancelled(m)) if m.contains("cancel")), "{r3_events:?}");
    expect_status("model of a cancelled run", models.get_model(pb::GetModelRequest { run_id: r3.id.clone(), format: pb::ModelFormat::Json as i32 }).await, Code::FailedPrecondition, &[&r3.id, "cancelled"]);
    datasets.delete_dataset(pb::DeleteDatasetRequest { id: wine.id.clone() }).await.expect("a cancelled run no longer holds its dataset");

    // Cancelling the long run: it stops within a few units and its follower gets the event.
    runs.cancel_run(pb::CancelRunRequest { id: r2.id.clone() }).await.unwrap();
    let r2_events = tokio::time::timeout(PATIENCE, r2_events).await.expect("the long run's follower never ended").unwrap();
    let last = r2_events.last().unwrap();
    assert!(matches!(&last.kind, Some(pb::run_event::Kind::Cancelled(m)) if m.contains("cancel")), "{last:?}");
    assert!(r2_events.iter().enumerate().all(|(i, e)| e.sequence == i as u64 + 1), "gapless sequence numbers");
    assert_eq!(r2_events.iter().filter(|e| matches!(e.kind, Some(pb::run_event::Kind::Cancelled(_)))).count(), 1);
    let r2_end = runs.get_run(pb::GetRunRequest { id: r2.id.clone() }).await.unwrap().into_inner();
    assert_eq!(r2_end.state(), pb::RunState::Cancelled);
    assert!(r2_end.reason.contains("cancel") && !r2_end.finished_at.is_empty());
    assert!(r2_end.units_done >= 1 && r2_end.units_done < r2_end.units_total, "{}/{}", r2_end.units_done, r2_end.units_total);
    assert!(r2_end.scores.is_empty() && r2_end.model.is_none());
    expect_status("model of a cancelled run", models.predict(pb::PredictRequest { run_id: r2.id.clone(), rows: Some(csv_table(&data_file("breast_cancer.csv"))), ..Default::default() }).await, Code::FailedPrecondition, &[&r2.id, "cancelled"]);
    datasets.delete_dataset(pb::DeleteDatasetRequest { id: cancer.id.clone() }).await.expect("a cancelled run no longer holds its dataset");
    let again = runs.cancel_run(pb::CancelRunRequest { id: r2.id.clone() }).await.unwrap().into_inner();
    assert_eq!(again.state(), pb::RunState::Cancelled, "cancelling twice is harmless");

    // Listing: newest first, each filter, paging.
    let lister = runs.clone();
    let list = move |r: pb::ListRunsRequest| {
        let mut c = lister.clone();
        async move { c.list_runs(r).await.map(|x| x.into_inner()) }
    };
    let newest_first = vec![r3.id.clone(), r2.id.clone(), r1.id.clone()];
    let everything = list(pb::ListRunsRequest::default()).await.unwrap();
    assert_eq!(ids(everything.clone()), newest_first);
    assert!(everything.runs.iter().all(|r| r.scores.is_empty()), "listings carry no scores");
    assert_eq!(ids(list(pb::ListRunsRequest { dataset_name: "iris".into(), ..Default::default() }).await.unwrap()), [r1.id.clone()]);
    assert_eq!(ids(list(pb::ListRunsRequest { dataset_name: "wine".into(), ..Default::default() }).await.unwrap()), [r3.id.clone()]);
    assert!(list(pb::ListRunsRequest { dataset_name: "diabetes".into(), ..Default::default() }).await.unwrap().runs.is_empty());
    assert_eq!(ids(list(listed(pb::RunState::Finished)).await.unwrap()), [r1.id.clone()]);
    assert_eq!(ids(list(listed(pb::RunState::Cancelled)).await.unwrap()), [r3.id.clone(), r2.id.clone()]);
    assert!(list(listed(pb::RunState::Running)).await.unwrap().runs.is_empty());
    assert!(list(listed(pb::RunState::Failed)).await.unwrap().runs.is_empty());
    assert_eq!(ids(list(pb::ListRunsRequest { label: "team=alpha".into(), ..Default::default() }).await.unwrap()), [r3.id.clone(), r1.id.clone()]);
    assert_eq!(ids(list(pb::ListRunsRequest { label: "team=beta".into(), ..Default::default() }).await.unwrap()), [r2.id.clone()]);
    assert!(list(pb::ListRunsRequest { label: "team=gamma".into(), ..Default::default() }).await.unwrap().runs.is_empty());
    assert_eq!(ids(list(pb::ListRunsRequest { label: "team=alpha".into(), state: pb::RunState::Cancelled as i32, ..Default::default() }).await.unwrap()), [r3.id.clone()]);
    assert_eq!(ids(list(pb::ListRunsRequest { schedule_id: String::new(), ..Default::default() }).await.unwrap()), newest_first, "an empty schedule id filters nothing");
    assert!(list(pb::ListRunsRequest { schedule_id: "sch_none".into(), ..Default::default() }).await.unwrap().runs.is_empty());
    // R1 ended before R2 was created, and R3 was created while R2 ran: distinct instants.
    let (t2, t3) = (everything.runs[1].created_at.clone(), everything.runs[0].created_at.clone());
    assert!(rfc3339(&everything.runs[2].created_at) < rfc3339(&t2) && rfc3339(&t2) < rfc3339(&t3));
    assert_eq!(ids(list(pb::ListRunsRequest { created_from: t2.clone(), ..Default::default() }).await.unwrap()), [r3.id.clone(), r2.id.clone()], "created_from is inclusive");
    assert_eq!(ids(list(pb::ListRunsRequest { created_to: t2.clone(), ..Default::default() }).await.unwrap()), [r1.id.clone()], "created_to is exclusive");
    assert_eq!(ids(list(pb::ListRunsRequest { created_from: t2.clone(), created_to: t3.clone(), ..Default::default() }).await.unwrap()), [r2.id.clone()]);
    // The same instant written with an offset.
    let t2_offset = rfc3339(&t2).with_timezone(&chrono::FixedOffset::east_opt(2 * 3600).unwrap()).to_rfc3339();
    assert_eq!(ids(list(pb::ListRunsRequest { created_to: t2_offset, ..Default::default() }).await.unwrap()), [r1.id.clone()]);
    assert!(list(pb::ListRunsRequest { created_from: "2999-01-01T00:00:00Z".into(), ..Default::default() }).await.unwrap().runs.is_empty());
    let mut paged = Vec::new();
    let mut token = String::new();
    for pages in 1.. {
        let r = list(pb::ListRunsRequest { page_size: 1, page_token: token.clone(), ..Default::default() }).await.unwrap();
        assert!(r.runs.len() <= 1);
        paged.extend(r.runs.into_iter().map(|r| r.id));
        if r.next_page_token.is_empty() {
            break;
        }
        token = r.next_page_token;
        assert!(pages < 10, "paging does not end");
    }
    assert_eq!(paged, newest_first, "pages of one add up to the listing, no duplicates");
    let page = list(pb::ListRunsRequest { label: "team=alpha".into(), page_size: 1, ..Default::default() }).await.unwrap();
    assert_eq!(ids(page.clone()), [r3.id.clone()]);
    let rest = list(pb::ListRunsRequest { label: "team=alpha".into(), page_size: 1, page_token: page.next_page_token, ..Default::default() }).await.unwrap();
    assert_eq!(ids(rest.clone()), [r1.id.clone()]);
    assert!(rest.next_page_token.is_empty());
    expect_status("label without =", list(pb::ListRunsRequest { label: "team".into(), ..Default::default() }).await, Code::InvalidArgument, &["label", "key=value"]);
    expect_status("bad time", list(pb::ListRunsRequest { created_from: "yesterday".into(), ..Default::default() }).await, Code::InvalidArgument, &["created_from", "RFC 3339"]);

    // Refused sweeps: each names its field; none is queued.
    let starter = runs.clone();
    let iris_id = iris.id.clone();
    let start = move |spec: pb::SweepSpec| {
        let mut c = starter.clone();
        let id = iris_id.clone();
        async move { c.start_run(pb::StartRunRequest { dataset_id: id, spec: Some(spec), ..Default::default() }).await.map(|r| r.into_inner()) }
    };
    expect_status("unknown target", start(pb::SweepSpec { target: "petal_colour".into(), ..small.clone() }).await, Code::InvalidArgument, &["'petal_colour'", "not in the header"]);
    expect_status("inverted span", start(pb::SweepSpec { max_depth: span(5.0, 1.0, 1.0), ..Default::default() }).await, Code::InvalidArgument, &["spec.max_depth.span", "inverted"]);
    expect_status("stratified k above the rarest class", start(pb::SweepSpec { folds: folds("stratified", 60, 1), ..small.clone() }).await, Code::InvalidArgument, &["spec.folds.k", "60", "only 50 rows"]);
    // 30 max_depth values × 20 min_split_rows values = 600 settings, above the cap of 500.
    expect_status(
        "settings over max_settings",
        start(pb::SweepSpec { max_depth: span(1.0, 30.0, 1.0), min_split_rows: span(2.0, 21.0, 1.0), ..Default::default() }).await,
        Code::ResourceExhausted,
        &["spec.settings", "600", "500"],
    );
    expect_status("metric of another task", start(pb::SweepSpec { metric: "rmse".into(), ..small.clone() }).await, Code::InvalidArgument, &["spec.metric", "rmse"]);
    expect_status(
        "unknown dataset id",
        runs.start_run(pb::StartRunRequest { dataset_id: "ds_0000000000000000000000000000000000000000000000000000000000000000".into(), spec: Some(small.clone()), ..Default::default() }).await,
        Code::NotFound,
        &["ds_0000000000000000000000000000000000000000000000000000000000000000"],
    );
    expect_status("deleted dataset", runs.start_run(pb::StartRunRequest { dataset_name: "wine".into(), spec: Some(small.clone()), ..Default::default() }).await, Code::NotFound, &["'wine'"]);
    expect_status("unknown run", runs.get_run(pb::GetRunRequest { id: "run_00000000000000000000000000000000".into() }).await, Code::NotFound, &["run_00000000000000000000000000000000"]);
    expect_status("follow unknown run", runs.follow_run(pb::FollowRunRequest { id: "run_00000000000000000000000000000000".into(), after_sequence: 0 }).await.map(|_| ()), Code::NotFound, &["run_00000000000000000000000000000000"]);
    expect_status("cancel unknown run", runs.cancel_run(pb::CancelRunRequest { id: "run_00000000000000000000000000000000".into() }).await, Code::NotFound, &["run_00000000000000000000000000000000"]);
    expect_status("model of unknown run", models.get_model(pb::GetModelRequest { run_id: "run_00000000000000000000000000000000".into(), format: 0 }).await, Code::NotFound, &["run_00000000000000000000000000000000"]);
    assert_eq!(ids(list(pb::ListRunsRequest::default()).await.unwrap()), newest_first, "refused sweeps queue nothing");
    server.stop().await;
}

// ------------------------------------------------------------------ restart

/// A folder under the system temp dir, removed when dropped (also when the test fails).
struct TempDir(PathBuf);

impl TempDir {
    fn new(tag: &str) -> TempDir {
        let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_nanos();
        let dir = std::env::temp_dir().join(format!("pollard-e2e-{tag}-{}-{nanos}", std::process::id()));
        assert!(!dir.exists());
        TempDir(dir)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Opens the store in `dir`, waiting until the previous server has let go of it.
async fn reopen(dir: &std::path::Path) -> SledStore {
    let deadline = Instant::now() + PATIENCE;
    loop {
        match SledStore::open(dir) {
            Ok(s) => return s,
            Err(e) => {
                assert!(Instant::now() < deadline, "cannot reopen the store: {e}");
                tokio::time::sleep(POLL).await;
            }
        }
    }
}

/// A diabetes sweep with `repeats` repeated 5-fold splits and 6 shaping keys (min_leaf_rows):
/// 30 × `repeats` work units.
fn restart_spec(repeats: u32) -> pb::SweepSpec {
    pb::SweepSpec { min_leaf_rows: values(&[1.0, 2.0, 3.0, 5.0, 8.0, 13.0]), max_depth: span(1.0, 8.0, 1.0), folds: folds("shuffled", 5, repeats), seed: 17, ..Default::default() }
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn restart_resumes_a_run_without_repeating_units() {
    for backend in 0..Place::each("restart").len() {
        restart_on(backend).await;
    }
}

/// The restart test on the backend at `backend` in [`Place::each`].
async fn restart_on(backend: usize) {
    // If the run ends before the stop takes effect, the attempt proves nothing: try again
    // with a bigger run, on a fresh store.
    for repeats in [10, 40, 160] {
        let place = Place::each("restart").swap_remove(backend);
        eprintln!("restart on {}, {repeats} repeats", place.name());
        let mut server = start(place.open().await, test_config()).await;
        let ch = server.channel().await;
        let mut datasets = DatasetsClient::new(ch.clone());
        let mut runs = RunsClient::new(ch.clone());
        upload(&mut datasets, "diabetes", "target", data_file("diabetes.csv")).await.unwrap();
        let run = runs.start_run(pb::StartRunRequest { dataset_name: "diabetes".into(), spec: Some(restart_spec(repeats)), ..Default::default() }).await.unwrap().into_inner();
        let mut stream = runs.follow_run(pb::FollowRunRequest { id: run.id.clone(), after_sequence: 0 }).await.unwrap().into_inner();
        let mut seen: Vec<pb::RunEvent> = Vec::new();
        let deadline = Instant::now() + PATIENCE;
        let mut ended_by = None;
        loop {
            let next = tokio::time::timeout_at(deadline.into(), stream.message()).await.expect("no events from the first server");
            match next {
                Ok(Some(ev)) => {
                    let progress = matches!(ev.kind, Some(pb::run_event::Kind::Progress(_)));
                    seen.push(ev);
                    // Stop the server as soon as the first unit is stored.
                    if progress && server.stop.is_some() {
                        server.signal_stop();
                    }
                }
                Ok(None) => break,
                Err(status) => {
                    ended_by = Some(status);
                    break;
                }
            }
        }
        drop((stream, runs, datasets, ch));
        tokio::time::timeout(PATIENCE, server.done).await.expect("the server did not drain").unwrap().unwrap();
        if let Some(status) = &ended_by {
            assert_eq!(status.code(), Code::Unavailable, "{status:?}");
            assert!(status.message().contains("after_sequence"), "{status:?}");
        }

        // The stopped server left the run running, with its finished units stored.
        let store = place.open().await;
        let stored = store.run(&run.id).unwrap().unwrap();
        if stored.state == pollard::job::RunState::Finished {
            eprintln!("the run of {repeats} repeats finished before the stop; trying a bigger one");
            continue;
        }
        assert!(ended_by.is_some(), "the follower ended without the shutdown status");
        assert_eq!(stored.state, pollard::job::RunState::Running);
        let units_before = stored.units_done;
        assert!(units_before >= 1 && units_before < stored.units_total, "{units_before}/{}", stored.units_total);
        assert_eq!(store.units(&run.id).unwrap().len() as u32, units_before, "every counted unit is stored");
        let last_stored_sequence = stored.next_sequence - 1;
        assert!(seen.len() as u64 <= last_stored_sequence);

        // A new server on the same folder resumes the run; the follower picks up after the
        // last event it saw.
        let server = start(store, test_config()).await;
        let ch = server.channel().await;
        let mut runs = RunsClient::new(ch.clone());
        let after = seen.last().map_or(0, |e| e.sequence);
        let rest = follow(&mut runs, &run.id, after).await;
        let got = runs.get_run(pb::GetRunRequest { id: run.id.clone() }).await.unwrap().into_inner();
        assert_eq!(got.state(), pb::RunState::Finished, "reason: {}", got.reason);
        assert_eq!(got.units_total, 30 * repeats);
        assert_eq!(got.units_done, got.units_total);
        let mut history = seen.clone();
        history.extend(rest);
        // Gapless, nothing twice or missing, exactly units_total progress events in all.
        let finished = check_finished_history(&run.id, &history, got.settings, got.units_total);
        assert!(finished.model.is_some());
        // The first server's events count units 1..=units_before, the second server's the rest:
        // no finished unit was counted again.
        let counted = |events: &[pb::RunEvent]| -> BTreeSet<u32> {
            events
                .iter()
                .filter_map(|e| match &e.kind {
                    Some(pb::run_event::Kind::Progress(p)) => Some(p.units_done),
                    _ => None,
                })
                .collect()
        };
        let (before, after) = history.split_at(last_stored_sequence as usize);
        assert_eq!(counted(before), (1..=units_before).collect::<BTreeSet<_>>());
        assert_eq!(counted(after), (units_before + 1..=got.units_total).collect::<BTreeSet<_>>());
        assert_eq!(got.scores.len() as u32, got.settings);
        drop((runs, ch));
        server.stop().await;
        return;
    }
    panic!("every run finished before the server could stop it");
}

// ------------------------------------------------------------------ health and reflection

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn health_and_reflection() {
    for place in Place::each("health_and_reflection") {
        eprintln!("health_and_reflection on {}", place.name());
        health_and_reflection_on(&place).await;
    }
}

async fn health_and_reflection_on(place: &Place) {
    use tonic_health::pb::health_check_response::ServingStatus;
    use tonic_health::pb::health_client::HealthClient;
    use tonic_health::pb::HealthCheckRequest;
    use tonic_reflection::pb::v1::server_reflection_client::ServerReflectionClient;
    use tonic_reflection::pb::v1::server_reflection_request::MessageRequest;
    use tonic_reflection::pb::v1::server_reflection_response::MessageResponse;
    use tonic_reflection::pb::v1::ServerReflectionRequest;

    let server = start(place.open().await, test_config()).await;
    let ch = server.channel().await;
    let mut health = HealthClient::new(ch.clone());
    for service in pollard::server::SERVICES {
        let r = health.check(HealthCheckRequest { service: service.into() }).await.unwrap().into_inner();
        assert_eq!(r.status(), ServingStatus::Serving, "{service}");
    }
    let runs = health.check(HealthCheckRequest { service: "pollard.v1.Runs".into() }).await.unwrap().into_inner();
    assert_eq!(runs.status(), ServingStatus::Serving);
    expect_status("health of an unknown service", health.check(HealthCheckRequest { service: "pollard.v1.Nothing".into() }).await, Code::NotFound, &[]);

    let mut reflection = ServerReflectionClient::new(ch.clone());
    let ask = |m: MessageRequest| ServerReflectionRequest { host: String::new(), message_request: Some(m) };
    let mut answers = reflection
        .server_reflection_info(tokio_stream::iter(vec![ask(MessageRequest::ListServices(String::new())), ask(MessageRequest::FileContainingSymbol("pollard.v1.Runs".into()))]))
        .await
        .unwrap()
        .into_inner();
    let Some(MessageResponse::ListServicesResponse(list)) = answers.message().await.unwrap().unwrap().message_response else { panic!("a service list") };
    let names: BTreeSet<String> = list.service.into_iter().map(|s| s.name).collect();
    for service in pollard::server::SERVICES {
        assert!(names.contains(service), "reflection lists {service}: {names:?}");
    }
    let Some(MessageResponse::FileDescriptorResponse(files)) = answers.message().await.unwrap().unwrap().message_response else { panic!("a file descriptor") };
    assert!(!files.file_descriptor_proto.is_empty());
    assert!(files.file_descriptor_proto.iter().any(|f| f.windows(b"StartRun".len()).any(|w| w == b"StartRun")), "the descriptor declares StartRun");
    drop((health, reflection, answers));
    server.stop().await;
}

/// Two CPU threads finish units side by side: the stored progress events still count the
/// stored units in order (`units_done` is 1, 2, 3, … by sequence, and `scores_done` never
/// falls), and event times never go backwards within the run.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn progress_rises_with_the_sequence_on_two_threads() {
    for place in Place::each("progress_rises_with_the_sequence_on_two_threads") {
        eprintln!("progress_rises_with_the_sequence_on_two_threads on {}", place.name());
        progress_rises_with_the_sequence_on_two_threads_on(&place).await;
    }
}

async fn progress_rises_with_the_sequence_on_two_threads_on(place: &Place) {
    let server = start(place.open().await, test_config()).await;
    let ch = server.channel().await;
    let mut datasets = DatasetsClient::new(ch.clone());
    let mut runs = RunsClient::new(ch.clone());
    upload(&mut datasets, "diabetes", "target", data_file("diabetes.csv")).await.unwrap();
    // 6 shaping keys × 5 folds × 8 repeats = 240 units, each small.
    let spec = pb::SweepSpec { min_leaf_rows: values(&[1.0, 2.0, 3.0, 5.0, 8.0, 13.0]), max_depth: span(1.0, 3.0, 1.0), folds: folds("shuffled", 5, 8), seed: 5, ..Default::default() };
    let run = runs.start_run(pb::StartRunRequest { dataset_name: "diabetes".into(), spec: Some(spec), ..Default::default() }).await.unwrap().into_inner();
    let events = follow(&mut runs, &run.id, 0).await;
    let mut units = 0u32;
    let mut scores = 0u32;
    let mut last_at = chrono::DateTime::<chrono::FixedOffset>::MIN_UTC.fixed_offset();
    for (i, ev) in events.iter().enumerate() {
        assert_eq!(ev.sequence, i as u64 + 1, "events come in sequence order");
        let at = chrono::DateTime::parse_from_rfc3339(&ev.at).unwrap();
        assert!(at >= last_at, "event {} at {} is earlier than the event before it ({last_at})", ev.sequence, ev.at);
        last_at = at;
        if let Some(pb::run_event::Kind::Progress(p)) = &ev.kind {
            assert_eq!(p.units_done, units + 1, "event {}: units_done {} after {units}", ev.sequence, p.units_done);
            assert!(p.scores_done > scores, "event {}: scores_done {} after {scores}", ev.sequence, p.scores_done);
            (units, scores) = (p.units_done, p.scores_done);
        }
    }
    assert_eq!(units, 240, "every unit announced its progress once");
    assert!(matches!(events.last().and_then(|e| e.kind.as_ref()), Some(pb::run_event::Kind::Finished(_))), "the run finished");
    server.stop().await;
}

// ------------------------------------------------------------------ an unreachable database

/// The database stops under a running server: health turns NOT_SERVING and calls fail at
/// once with UNAVAILABLE naming the database; once it is back, the server serves again
/// with nothing lost.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_database_that_goes_away_is_reported_not_hung_on() {
    use tonic_health::pb::health_check_response::ServingStatus;
    use tonic_health::pb::health_client::HealthClient;
    use tonic_health::pb::HealthCheckRequest;

    let mut cluster = match pg::Cluster::start() {
        Ok(c) => c,
        Err(why) => {
            assert!(std::env::var(pg::REQUIRE).as_deref() != Ok("1"), "{}=1 and PostgreSQL is not usable: {why}", pg::REQUIRE);
            eprintln!("skipped: {why}");
            return;
        }
    };
    let url = cluster.fresh_database("gone");
    let server = start(Arc::new(PostgresStore::open(&url).unwrap()), test_config()).await;
    let ch = server.channel().await;
    let mut health = HealthClient::new(ch.clone());
    let mut datasets = DatasetsClient::new(ch.clone());
    let status_of = |h: &mut HealthClient<Channel>| {
        let mut h = h.clone();
        async move { h.check(HealthCheckRequest { service: "pollard.v1.Runs".into() }).await.unwrap().into_inner().status() }
    };
    assert_eq!(status_of(&mut health).await, ServingStatus::Serving);
    upload(&mut datasets, "iris", "target", data_file("iris.csv")).await.unwrap();

    cluster.stop();
    let deadline = Instant::now() + PATIENCE;
    while status_of(&mut health).await != ServingStatus::NotServing {
        assert!(Instant::now() < deadline, "health still says SERVING with the database stopped");
        tokio::time::sleep(POLL).await;
    }
    let listed = tokio::time::timeout(PATIENCE, datasets.list_datasets(pb::ListDatasetsRequest::default())).await.expect("a call hung on the stopped database");
    expect_status("ListDatasets with the database stopped", listed, Code::Unavailable, &["database"]);

    cluster.restart();
    while status_of(&mut health).await != ServingStatus::Serving {
        assert!(Instant::now() < deadline, "health did not come back after the database did");
        tokio::time::sleep(POLL).await;
    }
    let names: Vec<String> = all_datasets(&mut datasets).await.into_iter().map(|d| d.name).collect();
    assert_eq!(names, ["iris"]);
    drop((health, datasets, ch));
    server.stop().await;
}
