//! Bad tables and unknown ids: the requests pollard already refuses cleanly. Each case checks
//! the status code, that the message names the row, column or field at fault, that the
//! server is alive and answering, and that the store holds what it held before.
//!
//! Where a case needs a shape the open files do not have (a ragged row, a BOM, UTF-16, a
//! NaN target, a duplicate header name), it is derived from iris.csv (tests/data) by the
//! change its comment states: test scaffolding, not data.

use super::*;

use std::time::Instant;

use pollard::pb;
use pollard::pb::datasets_client::DatasetsClient;
use pollard::pb::models_client::ModelsClient;
use pollard::pb::runs_client::RunsClient;
use pollard::pb::schedules_client::SchedulesClient;
use tonic::transport::Channel;
use tonic::{Code, Status};

/// A running server with iris uploaded (name "iris", target "target") and one finished run
/// on it, the store's state before any case, and a gRPC channel.
struct Fixture {
    server: Serve,
    rt: tokio::runtime::Runtime,
    ch: Channel,
    dataset: String,
    run: String,
    before: Value,
}

fn iris() -> String {
    std::fs::read_to_string(process::data("iris.csv")).unwrap()
}

fn fixture() -> Fixture {
    let server = Serve::start();
    let rt = tokio::runtime::Builder::new_current_thread().enable_all().build().unwrap();
    let ch = rt.block_on(async {
        let deadline = Instant::now() + process::PATIENCE;
        loop {
            match Channel::from_shared(server.url.clone()).unwrap().connect().await {
                Ok(c) => break c,
                Err(e) => assert!(Instant::now() < deadline, "cannot connect: {e}"),
            }
            tokio::time::sleep(process::POLL).await;
        }
    });
    let dataset = server.run(&["put", process::data("iris.csv").to_str().unwrap(), "--name", "iris", "--target", "target", "--json"]).json()["id"].as_str().unwrap().to_string();
    let lines = server.run(&["sweep", "--dataset", "iris", "--max-depth", "1,2,3", "--follow", "--json"]).json_lines();
    let run = lines.iter().find_map(|l| l["run_id"].as_str()).expect("the sweep names its run").to_string();
    let before = snapshot(&server);
    let state = &before["runs"][0]["state"];
    assert_eq!(state, "finished", "the fixture's run: {before}");
    Fixture { server, rt, ch, dataset, run, before }
}

impl Fixture {
    /// Checks one refused request: its code, that its message holds every needle, that the
    /// server is alive and that the store is unchanged.
    fn refused<T: std::fmt::Debug>(&mut self, what: &str, r: Result<T, Status>, code: Code, needles: &[&str]) {
        process::expect_status(what, r, code, needles);
        assert_alive(&mut self.server);
        assert_eq!(snapshot(&self.server), self.before, "{what}: the store changed");
    }

    /// Uploads `bytes` as a CSV named "bad" with the target "target".
    fn upload(&self, bytes: &[u8]) -> Result<pb::DatasetInfo, Status> {
        self.upload_with("target", bytes)
    }

    fn upload_with(&self, target: &str, bytes: &[u8]) -> Result<pb::DatasetInfo, Status> {
        let header = pb::UploadHeader { name: "bad".into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical: vec![] };
        let mut msgs = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(header)) }];
        msgs.extend(bytes.chunks(1000).map(|c| pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(c.to_vec())) }));
        self.rt.block_on(DatasetsClient::new(self.ch.clone()).upload(tokio_stream::iter(msgs))).map(|r| r.into_inner())
    }

    fn upload_refused(&mut self, what: &str, bytes: &[u8], needles: &[&str]) {
        let r = self.upload(bytes);
        self.refused(what, r, Code::InvalidArgument, needles);
    }

    fn datasets(&self) -> DatasetsClient<Channel> {
        DatasetsClient::new(self.ch.clone())
    }
    fn runs(&self) -> RunsClient<Channel> {
        RunsClient::new(self.ch.clone())
    }
    fn models(&self) -> ModelsClient<Channel> {
        ModelsClient::new(self.ch.clone())
    }
    fn schedules(&self) -> SchedulesClient<Channel> {
        SchedulesClient::new(self.ch.clone())
    }
}

/// iris.csv with line `line` (1-based, the header is line 1) replaced.
fn iris_with_line(line: usize, text: &str) -> Vec<u8> {
    let mut lines: Vec<String> = iris().lines().map(String::from).collect();
    lines[line - 1] = text.to_string();
    (lines.join("\n") + "\n").into_bytes()
}

// ------------------------------------------------------------------ tables

#[test]
fn ragged_rows_are_refused_with_their_row() {
    let mut f = fixture();
    // Data row 3 (line 4) loses its last field; then row 5 gains one.
    f.upload_refused("a short row", &iris_with_line(4, "4.7,3.2,1.3,0.2"), &["row 3", "line 4", "4", "5"]);
    f.upload_refused("a long row", &iris_with_line(6, "5.0,3.6,1.4,0.2,setosa,extra"), &["row 5", "line 6"]);
}

#[test]
fn bad_encodings_are_refused_and_a_bom_is_not_a_column_name() {
    let mut f = fixture();
    // Data row 2 (line 3): its species cell holds the byte 0xFF, never valid UTF-8.
    let mut bytes = iris_with_line(3, "4.9,3.0,1.4,0.2,seto\u{1}sa");
    let at = bytes.iter().position(|&b| b == 1).unwrap();
    bytes[at] = 0xFF;
    f.upload_refused("invalid UTF-8 in a cell", &bytes, &["row 2", "target", "UTF-8"]);
    // The same file as UTF-16 (little-endian, with its byte-order mark).
    let utf16: Vec<u8> = [0xFF, 0xFE].into_iter().chain(iris().encode_utf16().flat_map(|u| u.to_le_bytes())).collect();
    let r = f.upload(&utf16);
    f.refused("UTF-16", r, Code::InvalidArgument, &["UTF-8"]);
    // A UTF-8 byte-order mark before the header: either read past, or refused by name.
    let bom: Vec<u8> = [0xEF, 0xBB, 0xBF].into_iter().chain(iris().into_bytes()).collect();
    match f.upload_with("sepal_length_cm", &bom) {
        Ok(info) => assert_eq!(info.columns.first().map(|c| c.name.as_str()), Some("sepal_width_cm"), "the mark became part of a name: {info:?}"),
        Err(s) => f.refused("a UTF-8 BOM", Err::<(), _>(s), Code::InvalidArgument, &["sepal_length_cm"]),
    }
}

#[test]
fn targets_that_are_missing_or_not_finite_are_refused_with_their_row() {
    let mut f = fixture();
    let diabetes = std::fs::read_to_string(process::data("diabetes.csv")).unwrap();
    let with_target = |row: usize, cell: &str| {
        // diabetes.csv with the target (last) cell of data row `row` replaced.
        let mut lines: Vec<String> = diabetes.lines().map(String::from).collect();
        let (head, _) = lines[row].rsplit_once(',').unwrap();
        lines[row] = format!("{head},{cell}");
        (lines.join("\n") + "\n").into_bytes()
    };
    for (cell, needle) in [("", "row 4"), ("NaN", "row 4"), ("inf", "row 4"), ("-inf", "row 4"), ("1e999", "row 4")] {
        let r = f.upload(&with_target(4, cell));
        f.refused(&format!("regression target {cell:?}"), r, Code::InvalidArgument, &[needle, "target"]);
    }
    // iris: an empty class label in data row 7.
    f.upload_refused("an empty class label", &iris_with_line(8, "4.6,3.4,1.4,0.3,"), &["row 7", "target"]);
}

#[test]
fn header_problems_are_refused_by_name() {
    let mut f = fixture();
    f.upload_refused("a duplicate column name", &iris_with_line(1, "sepal_length_cm,sepal_length_cm,petal_length_cm,petal_width_cm,target"), &["sepal_length_cm"]);
    f.upload_refused("an empty column name", &iris_with_line(1, "sepal_length_cm,,petal_length_cm,petal_width_cm,target"), &["line 1"]);
    let r = f.upload_with("species", iris().as_bytes());
    f.refused("an unknown target", r, Code::InvalidArgument, &["species", "target"]);
    f.upload_refused("a header and no rows", b"sepal_length_cm,sepal_width_cm,target\n", &["rows"]);
    f.upload_refused("no bytes at all", b"", &["empty"]);
    f.upload_refused("one class only", b"x,target\n1,a\n2,a\n3,a\n", &["target", "one"]);
    f.upload_refused("a non-finite feature", &iris_with_line(10, "4.4,inf,1.4,0.2,setosa"), &["row 9", "sepal_width_cm"]);
}

#[test]
fn malformed_upload_streams_are_refused() {
    let mut f = fixture();
    let r = f.rt.block_on(f.datasets().upload(tokio_stream::iter(Vec::<pb::UploadChunk>::new())));
    f.refused("an empty stream", r, Code::InvalidArgument, &["empty", "header"]);
    let data_first = vec![pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(iris().into_bytes())) }];
    let r = f.rt.block_on(f.datasets().upload(tokio_stream::iter(data_first)));
    f.refused("data before the header", r, Code::InvalidArgument, &["header"]);
    let header = pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: "bad".into(), format: 7, ..Default::default() })) };
    let r = f.rt.block_on(f.datasets().upload(tokio_stream::iter(vec![header])));
    f.refused("an unknown format", r, Code::InvalidArgument, &["header.format", "7"]);
    let h = || pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: "bad".into(), ..Default::default() })) };
    let r = f.rt.block_on(f.datasets().upload(tokio_stream::iter(vec![h(), h()])));
    f.refused("two headers", r, Code::InvalidArgument, &["one header"]);
}

fn numbers(name: &str, v: &[f64]) -> pb::TableColumn {
    pb::TableColumn { name: name.into(), cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells { values: v.to_vec(), missing: vec![] })) }
}

fn texts(name: &str, v: &[&str]) -> pb::TableColumn {
    pb::TableColumn { name: name.into(), cells: Some(pb::table_column::Cells::Texts(pb::TextCells { values: v.iter().map(|s| s.to_string()).collect(), missing: vec![] })) }
}

#[test]
fn bad_tables_are_refused_by_column() {
    let mut f = fixture();
    let put = |f: &Fixture, columns: Vec<pb::TableColumn>| f.rt.block_on(f.datasets().put_table(pb::PutTableRequest { name: "bad".into(), target: "y".into(), table: Some(pb::Table { columns }) }));
    let r = put(&f, vec![numbers("x", &[1.0, 2.0, 3.0]), texts("y", &["a", "b"])]);
    f.refused("columns of different lengths", r, Code::InvalidArgument, &["table.columns[1]", "'y'"]);
    let r = put(&f, vec![numbers("x", &[1.0, f64::INFINITY]), texts("y", &["a", "b"])]);
    f.refused("an infinite number", r, Code::InvalidArgument, &["table.columns[0]", "row 2", "'x'"]);
    let r = put(&f, vec![numbers(" ", &[1.0, 2.0]), texts("y", &["a", "b"])]);
    f.refused("a blank column name", r, Code::InvalidArgument, &["table.columns[0].name"]);
    let r = put(&f, vec![pb::TableColumn { name: "x".into(), cells: None }, texts("y", &["a", "b"])]);
    f.refused("a column without cells", r, Code::InvalidArgument, &["table.columns[0]", "'x'"]);
    let r = put(&f, vec![]);
    f.refused("no columns", r, Code::InvalidArgument, &["table.columns"]);
    let flags = pb::TableColumn { name: "x".into(), cells: Some(pb::table_column::Cells::Numbers(pb::NumberCells { values: vec![1.0, 2.0], missing: vec![true] })) };
    let r = put(&f, vec![flags, texts("y", &["a", "b"])]);
    f.refused("missing flags of the wrong length", r, Code::InvalidArgument, &["table.columns[0].missing"]);
    let r = put(&f, vec![numbers("x", &[1.0, 2.0]), numbers("x", &[3.0, 4.0]), texts("y", &["a", "b"])]);
    f.refused("a duplicate column", r, Code::InvalidArgument, &["'x'"]);
    let r = f.rt.block_on(f.datasets().put_table(pb::PutTableRequest { name: "bad".into(), target: "y".into(), table: None }));
    f.refused("no table", r, Code::InvalidArgument, &["table"]);
}

// ------------------------------------------------------------------ unknown ids

#[test]
fn unknown_ids_are_not_found_for_every_call() {
    let mut f = fixture();
    let ghost_run = "run_0000000000000000000000000000dead";
    let ghost_ds = "ds_00000000000000000000000000000000000000000000000000000000deadbeef";
    let ghost_sch = "sch_0000000000000000000000000000dead";
    let r = f.rt.block_on(f.datasets().get_dataset(pb::GetDatasetRequest { id: ghost_ds.into() }));
    f.refused("GetDataset", r, Code::NotFound, &[ghost_ds]);
    let r = f.rt.block_on(f.datasets().delete_dataset(pb::DeleteDatasetRequest { id: ghost_ds.into() }));
    f.refused("DeleteDataset", r, Code::NotFound, &[ghost_ds]);
    let r = f.rt.block_on(f.runs().get_run(pb::GetRunRequest { id: ghost_run.into() }));
    f.refused("GetRun", r, Code::NotFound, &[ghost_run]);
    let r = f.rt.block_on(f.runs().cancel_run(pb::CancelRunRequest { id: ghost_run.into() }));
    f.refused("CancelRun", r, Code::NotFound, &[ghost_run]);
    let r = f.rt.block_on(f.runs().follow_run(pb::FollowRunRequest { id: ghost_run.into(), after_sequence: 0 })).map(|_| ());
    f.refused("FollowRun", r, Code::NotFound, &[ghost_run]);
    let r = f.rt.block_on(f.models().get_model(pb::GetModelRequest { run_id: ghost_run.into(), format: pb::ModelFormat::Json as i32 }));
    f.refused("GetModel", r, Code::NotFound, &[ghost_run]);
    let r = f.rt.block_on(f.models().predict(pb::PredictRequest { run_id: ghost_run.into(), rows: Some(pb::Table::default()), ..Default::default() }));
    f.refused("Predict", r, Code::NotFound, &[ghost_run]);
    let start = pb::StartRunRequest { dataset_id: ghost_ds.into(), ..Default::default() };
    let r = f.rt.block_on(f.runs().start_run(start));
    f.refused("StartRun on an unknown dataset id", r, Code::NotFound, &[ghost_ds]);
    let start = pb::StartRunRequest { dataset_name: "no-such-name".into(), ..Default::default() };
    let r = f.rt.block_on(f.runs().start_run(start));
    f.refused("StartRun on an unknown dataset name", r, Code::NotFound, &["no-such-name"]);
    let r = f.rt.block_on(f.schedules().get_schedule(pb::GetScheduleRequest { id: ghost_sch.into() }));
    f.refused("GetSchedule", r, Code::NotFound, &[ghost_sch]);
    let r = f.rt.block_on(f.schedules().pause_schedule(pb::PauseScheduleRequest { id: ghost_sch.into() }));
    f.refused("PauseSchedule", r, Code::NotFound, &[ghost_sch]);
    let r = f.rt.block_on(f.schedules().resume_schedule(pb::ResumeScheduleRequest { id: ghost_sch.into() }));
    f.refused("ResumeSchedule", r, Code::NotFound, &[ghost_sch]);
    let r = f.rt.block_on(f.schedules().delete_schedule(pb::DeleteScheduleRequest { id: ghost_sch.into() }));
    f.refused("DeleteSchedule", r, Code::NotFound, &[ghost_sch]);
    let r = f.rt.block_on(f.schedules().list_fires(pb::ListFiresRequest { schedule_id: ghost_sch.into(), ..Default::default() }));
    f.refused("ListFires", r, Code::NotFound, &[ghost_sch]);
    // The CLI says the same, on one line.
    let line = f.server.run(&["show", ghost_run]).fails();
    assert!(line.contains("NotFound") && line.contains(ghost_run), "{line}");
}

// ------------------------------------------------------------------ models and runs

#[test]
fn predict_with_the_wrong_columns_is_refused_by_column() {
    let mut f = fixture();
    let run = f.run.clone();
    let predict = |f: &Fixture, columns: Vec<pb::TableColumn>| f.rt.block_on(f.models().predict(pb::PredictRequest { run_id: run.clone(), rows: Some(pb::Table { columns }), ..Default::default() }));
    let r = predict(&f, vec![numbers("sepal_length_cm", &[5.1]), numbers("sepal_width_cm", &[3.5])]);
    f.refused("a missing feature column", r, Code::InvalidArgument, &["rows.columns", "petal_length_cm"]);
    let four = |w: pb::TableColumn| vec![numbers("sepal_length_cm", &[5.1]), numbers("sepal_width_cm", &[3.5]), numbers("petal_length_cm", &[1.4]), w];
    let r = predict(&f, four(texts("petal_width_cm", &["wide"])));
    f.refused("text for a numeric column", r, Code::InvalidArgument, &["petal_width_cm", "number"]);
    let r = predict(&f, four(numbers("petal_width_cm", &[0.2, 0.3])));
    f.refused("columns of different lengths", r, Code::InvalidArgument, &["petal_width_cm"]);
    let r = f.rt.block_on(f.models().predict(pb::PredictRequest { run_id: f.run.clone(), rows: None, ..Default::default() }));
    f.refused("no rows", r, Code::InvalidArgument, &["rows"]);
    let r = f.rt.block_on(f.models().get_model(pb::GetModelRequest { run_id: f.run.clone(), format: 99 }));
    f.refused("an unknown model format", r, Code::InvalidArgument, &["format", "99"]);
}

#[test]
fn bad_sweep_requests_are_refused_by_field() {
    let mut f = fixture();
    let start = |f: &Fixture, spec: pb::SweepSpec| {
        let req = pb::StartRunRequest { dataset_id: f.dataset.clone(), spec: Some(spec), ..Default::default() };
        f.rt.block_on(f.runs().start_run(req))
    };
    let r = start(&f, pb::SweepSpec { target: "no_such_column".into(), ..Default::default() });
    f.refused("an unknown target", r, Code::InvalidArgument, &["no_such_column"]);
    let r = start(&f, pb::SweepSpec { metric: "rmse".into(), ..Default::default() });
    f.refused("a regression metric on classes", r, Code::InvalidArgument, &["spec.metric", "rmse"]);
    let r = start(&f, pb::SweepSpec { criteria: vec!["gini".into(), "purity".into()], ..Default::default() });
    f.refused("an unknown criterion", r, Code::InvalidArgument, &["spec.criteria[1]", "purity"]);
    let r = start(&f, pb::SweepSpec { folds: Some(pb::FoldPlan { scheme: "grouped".into(), k: 3, ..Default::default() }), ..Default::default() });
    f.refused("a grouped plan without a column", r, Code::InvalidArgument, &["spec.folds.column"]);
    let r = start(&f, pb::SweepSpec { folds: Some(pb::FoldPlan { k: 1000, ..Default::default() }), ..Default::default() });
    f.refused("more folds than the cap", r, Code::ResourceExhausted, &["folds.k", "1000", "max_folds"]);
    // Within the cap (100) but more folds than a class has rows (iris: 50 per class).
    let r = start(&f, pb::SweepSpec { folds: Some(pb::FoldPlan { k: 60, ..Default::default() }), ..Default::default() });
    f.refused("more folds than a class has rows", r, Code::InvalidArgument, &["folds.k", "60"]);
    let span = pb::LimitRange { kind: Some(pb::limit_range::Kind::Span(pb::Span { from: 5.0, to: 1.0, step: 1.0 })) };
    let r = start(&f, pb::SweepSpec { max_depth: Some(span), ..Default::default() });
    f.refused("an inverted span", r, Code::InvalidArgument, &["spec.max_depth.span"]);
    // Counts are whole numbers: a fraction is refused, naming the value, never rounded.
    let values = |v: Vec<f64>| {
        let values = v.into_iter().map(|x| pb::LimitValue { value: Some(pb::limit_value::Value::Number(x)) }).collect();
        Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values })) })
    };
    let r = start(&f, pb::SweepSpec { max_depth: values(vec![3.0, 2.5]), ..Default::default() });
    f.refused("a fractional max_depth", r, Code::InvalidArgument, &["spec.max_depth.values[1]"]);
    let step = pb::LimitRange { kind: Some(pb::limit_range::Kind::Span(pb::Span { from: 2.0, to: 5.0, step: 1.5 })) };
    let r = start(&f, pb::SweepSpec { min_split_rows: Some(step), ..Default::default() });
    f.refused("a fractional min_split_rows step", r, Code::InvalidArgument, &["spec.min_split_rows.span.step"]);
    let r = start(&f, pb::SweepSpec { min_leaf_rows: Some(pb::LimitRange { kind: None }), ..Default::default() });
    f.refused("a range of no kind", r, Code::InvalidArgument, &["spec.min_leaf_rows"]);
    // Monotone limits: each entry checked by name and direction, then the target's classes.
    let limit = |feature: &str, d: pb::MonotoneDirection| pb::MonotoneLimit { feature: feature.into(), direction: d as i32 };
    let (up, down) = (pb::MonotoneDirection::Increasing, pb::MonotoneDirection::Decreasing);
    let r = start(&f, pb::SweepSpec { monotone: vec![limit("petal_length_cm", up), limit("no_such_column", down)], ..Default::default() });
    f.refused("a monotone limit on an unknown column", r, Code::InvalidArgument, &["spec.monotone[1]", "no_such_column", "not a feature"]);
    let r = start(&f, pb::SweepSpec { monotone: vec![limit("target", up)], ..Default::default() });
    f.refused("a monotone limit on the target", r, Code::InvalidArgument, &["spec.monotone[0]", "is the target"]);
    let r = start(&f, pb::SweepSpec { monotone: vec![limit("petal_length_cm", up), limit("petal_length_cm", down)], ..Default::default() });
    f.refused("a feature limited twice", r, Code::InvalidArgument, &["spec.monotone[1]", "twice"]);
    let r = start(&f, pb::SweepSpec { monotone: vec![pb::MonotoneLimit { feature: "petal_length_cm".into(), direction: 7 }], ..Default::default() });
    f.refused("a monotone direction that is none", r, Code::InvalidArgument, &["spec.monotone[0].direction", "7"]);
    let r = start(&f, pb::SweepSpec { monotone: vec![limit("", up)], ..Default::default() });
    f.refused("a monotone limit naming no feature", r, Code::InvalidArgument, &["spec.monotone[0].feature"]);
    let r = start(&f, pb::SweepSpec { monotone: vec![limit("petal_length_cm", up)], ..Default::default() });
    f.refused("monotone limits on three classes", r, Code::InvalidArgument, &["spec.monotone", "3 classes"]);
    // Decision costs: usable numbers, for two classes only (iris has three; its numeric
    // columns make regress targets), and expected_cost only with them.
    let costs = |false_alarm, miss| Some(pb::DecisionCosts { false_alarm, miss });
    let r = start(&f, pb::SweepSpec { costs: costs(1.0, 5.0), ..Default::default() });
    f.refused("costs on three classes", r, Code::InvalidArgument, &["spec.costs", "two classes", "has 3"]);
    let r = start(&f, pb::SweepSpec { target: "sepal_length_cm".into(), costs: costs(1.0, 5.0), ..Default::default() });
    f.refused("costs on a regress target", r, Code::InvalidArgument, &["spec.costs", "regress"]);
    let r = start(&f, pb::SweepSpec { costs: costs(-1.0, 5.0), ..Default::default() });
    f.refused("a negative false alarm cost", r, Code::InvalidArgument, &["spec.costs.false_alarm", "-1"]);
    let r = start(&f, pb::SweepSpec { costs: costs(1.0, f64::NAN), ..Default::default() });
    f.refused("a miss cost that is not a number", r, Code::InvalidArgument, &["spec.costs.miss", "NaN"]);
    let r = start(&f, pb::SweepSpec { costs: costs(0.0, 0.0), ..Default::default() });
    f.refused("two zero costs", r, Code::InvalidArgument, &["spec.costs", "above 0"]);
    let r = start(&f, pb::SweepSpec { metric: "expected_cost".into(), ..Default::default() });
    f.refused("expected_cost without costs", r, Code::InvalidArgument, &["spec.metric", "expected_cost", "costs.miss"]);
    let req = pb::StartRunRequest { ..Default::default() };
    let r = f.rt.block_on(f.runs().start_run(req));
    f.refused("no dataset named", r, Code::InvalidArgument, &["dataset_id", "dataset_name"]);
    let r = f.rt.block_on(f.runs().list_runs(pb::ListRunsRequest { created_from: "yesterday".into(), ..Default::default() }));
    f.refused("a listing bound that is no time", r, Code::InvalidArgument, &["created_from", "yesterday"]);
    let r = f.rt.block_on(f.runs().list_runs(pb::ListRunsRequest { state: 42, ..Default::default() }));
    f.refused("a listing state that is no state", r, Code::InvalidArgument, &["state", "42"]);
}

#[test]
fn bad_schedules_are_refused_by_field() {
    let mut f = fixture();
    let create = |f: &Fixture, cron: &str, zone: &str, dataset: &str| {
        let req = pb::CreateScheduleRequest { cron: cron.into(), time_zone: zone.into(), dataset_name: dataset.into(), ..Default::default() };
        f.rt.block_on(f.schedules().create_schedule(req))
    };
    let r = create(&f, "61 * * * *", "UTC", "iris");
    f.refused("a minute of 61", r, Code::InvalidArgument, &["61"]);
    let r = create(&f, "every day", "UTC", "iris");
    f.refused("a cron that is words", r, Code::InvalidArgument, &["cron"]);
    let r = create(&f, "0 3 * * *", "Mars/Olympus_Mons", "iris");
    f.refused("an unknown time zone", r, Code::InvalidArgument, &["Mars/Olympus_Mons"]);
    let r = create(&f, "0 3 * * *", "UTC", "");
    f.refused("no dataset", r, Code::InvalidArgument, &["dataset_name"]);
    let r = create(&f, "0 3 * * *", "UTC", "no-such-name");
    f.refused("an unknown dataset name", r, Code::NotFound, &["no-such-name"]);
}

#[test]
fn cancelling_or_deleting_what_cannot_be_is_refused() {
    let mut f = fixture();
    // The fixture's run has finished: cancelling it changes nothing.
    let r = f.rt.block_on(f.runs().cancel_run(pb::CancelRunRequest { id: f.run.clone() }));
    match r {
        Ok(info) => {
            assert_eq!(info.into_inner().state(), pb::RunState::Finished);
            assert_alive(&mut f.server);
            assert_eq!(snapshot(&f.server), f.before, "cancelling a finished run changed the store");
        }
        Err(s) => f.refused("cancel a finished run", Err::<(), _>(s), Code::FailedPrecondition, &[&f.run.clone()]),
    }
    // A labelled listing with a label that is not key=value.
    let r = f.rt.block_on(f.runs().list_runs(pb::ListRunsRequest { label: "novalue".into(), ..Default::default() }));
    f.refused("a label filter without '='", r, Code::InvalidArgument, &["label", "novalue"]);
}
