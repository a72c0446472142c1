//! Fuzz targets, as property tests over arbitrary bytes and structured-but-wild inputs
//! (cargo-fuzz is not installed on the build machine; proptest shrinks what it finds).
//!
//! Targets: CSV ingest, the table decoder (protobuf bytes → table → CSV or frame), spec
//! conversion (protobuf spec → core spec → checked spec), and stored-record decoding
//! (arbitrary bytes, and valid records with bytes flipped or JSON values replaced). Each
//! must return `Ok` or `Err` and never panic; where an `Ok` promises something, that is
//! checked too.
//!
//! Case counts are set per target for CI (about half a minute in release on two cores);
//! `POLLARD_FUZZ_FACTOR=10` runs ten times as many for a long local run, and
//! `POLLARD_FUZZ_CASES=N` runs every target exactly N times.
//! Every crash found becomes a plain test at the end of this file, with its minimal input.
//!
//! Data: the open datasets in tests/data (sources and licences in tests/data/SOURCES.md).

use std::sync::{Mutex, OnceLock};

use pollard::data::csv::{read_dataset, read_frame, CsvOptions};
use pollard::data::{Dataset, Task};
use pollard::job::{ColumnMeta, DatasetMeta, Event, EventKind, Run, RunOutcome};
use pollard::pb;
use pollard::rpc::convert;
use pollard::store::records;
use pollard::sweep::{self, Flow, SweepSpec, UnitResult};
use prost::Message;
use proptest::prelude::*;
use proptest::test_runner::Config;

/// The case count of a target: `POLLARD_FUZZ_CASES` when set, else `default` times
/// `POLLARD_FUZZ_FACTOR` (1 when unset).
fn cases(default: u32) -> Config {
    let env = |k: &str| std::env::var(k).ok().and_then(|v| v.parse::<u32>().ok());
    let n = env("POLLARD_FUZZ_CASES").unwrap_or_else(|| default.saturating_mul(env("POLLARD_FUZZ_FACTOR").unwrap_or(1)));
    Config { cases: n, max_shrink_iters: 2000, failure_persistence: None, ..Config::default() }
}

fn file(name: &str) -> Vec<u8> {
    std::fs::read(format!("{}/tests/data/{name}", env!("CARGO_MANIFEST_DIR"))).unwrap()
}

fn dataset(name: &str) -> Dataset {
    read_dataset(&file(name)[..], &CsvOptions::new("target")).unwrap()
}

// ------------------------------------------------------------------ CSV ingest

/// Cells a CSV writer or a careless spreadsheet might produce.
fn wild_cell() -> impl Strategy<Value = String> {
    prop_oneof![
        Just(String::new()),
        Just("NA".to_string()),
        Just("nan".to_string()),
        Just("inf".to_string()),
        Just("-1e999".to_string()),
        Just("1e38".to_string()),
        Just("3.5e38".to_string()),
        Just("\"".to_string()),
        Just("\"a,b\"".to_string()),
        Just("\"x\"\"y\"".to_string()),
        Just("\u{feff}a".to_string()),
        Just("true".to_string()),
        any::<i64>().prop_map(|v| v.to_string()),
        any::<f64>().prop_map(|v| v.to_string()),
        (0u8..30).prop_map(|v| v.to_string()),
        "[a-c]{1,3}",
        "\\PC{0,6}",
        "[ \t\r\n,;\"]{1,4}",
    ]
}

/// A CSV-shaped text: a header of up to 6 names (often "target"), rows of wild cells with
/// a ragged length now and then, mixed line ends.
fn wild_csv() -> impl Strategy<Value = Vec<u8>> {
    let header = prop::collection::vec(prop_oneof![Just("target".to_string()), Just("x".to_string()), "[a-z ]{0,4}", "\\PC{0,4}"], 0..6);
    let rows = prop::collection::vec(prop::collection::vec(wild_cell(), 0..7), 0..40);
    (header, rows, prop_oneof![Just("\n"), Just("\r\n"), Just("\r")]).prop_map(|(h, rows, end)| {
        let mut out = h.join(",");
        for r in rows {
            out.push_str(end);
            out.push_str(&r.join(","));
        }
        out.into_bytes()
    })
}

fn csv_options() -> impl Strategy<Value = CsvOptions> {
    let target = prop_oneof![Just("target".to_string()), Just("x".to_string()), "\\PC{0,3}"];
    let task = prop_oneof![Just(None), Just(Some(Task::Classify)), Just(Some(Task::Regress))];
    let categorical = prop::collection::vec(prop_oneof![Just("x".to_string()), Just("target".to_string()), "[a-z]{1,3}"], 0..3);
    let delimiter = prop_oneof![Just(b','), Just(b';'), Just(b'\t'), any::<u8>()];
    (target, task, categorical, delimiter, prop::option::of(0usize..50), prop::option::of(0usize..8)).prop_map(|(target, task, categorical, delimiter, max_rows, max_columns)| CsvOptions {
        target,
        task,
        categorical,
        delimiter,
        max_rows,
        max_columns,
    })
}

/// Reads the bytes both ways; a dataset that reads has rows, a target per row, and a
/// feature per header name but the target.
fn ingest(bytes: &[u8], options: &CsvOptions) {
    if let Ok(d) = read_dataset(bytes, options) {
        assert!(d.rows() > 0);
        assert_eq!(d.target.len(), d.rows());
        assert!(d.frame.features.iter().all(|f| f.name != options.target));
    }
    let _ = read_frame(bytes, options);
}

proptest! {
    #![proptest_config(cases(100000))]

    #[test]
    fn csv_ingest_takes_any_bytes(bytes in prop::collection::vec(any::<u8>(), 0..600), options in csv_options()) {
        ingest(&bytes, &options);
    }

}

proptest! {
    #![proptest_config(cases(25000))]

    #[test]
    fn csv_ingest_takes_any_csv_shaped_text(bytes in wild_csv(), options in csv_options()) {
        ingest(&bytes, &options);
    }

}

proptest! {
    #![proptest_config(cases(50000))]

    /// An open file with a few bytes changed (the kinds of damage a transfer does).
    #[test]
    fn csv_ingest_takes_damaged_open_files(edits in prop::collection::vec((any::<prop::sample::Index>(), any::<u8>(), 0u8..3), 1..8)) {
        let mut bytes = file("iris.csv");
        for (at, byte, how) in edits {
            let i = at.index(bytes.len());
            match how {
                0 => bytes[i] = byte,
                1 => bytes.insert(i, byte),
                _ => { bytes.remove(i); }
            }
        }
        ingest(&bytes, &CsvOptions::new("target"));
    }
}

// ------------------------------------------------------------------ the table decoder

/// A small finished sweep on iris (petal_width_cm read as categorical, so the model's
/// schema has both column kinds): its model, unit results, run and outcome, the valid
/// values the record targets start from.
struct Fitted {
    meta: DatasetMeta,
    run: Run,
    units: Vec<UnitResult>,
    outcome: RunOutcome,
}

fn fitted() -> &'static Fitted {
    static F: OnceLock<Fitted> = OnceLock::new();
    F.get_or_init(|| {
        let bytes = file("iris.csv");
        let mut options = CsvOptions::new("target");
        options.categorical = vec!["petal_width_cm".into()];
        let data = read_dataset(&bytes[..], &options).unwrap();
        let spec = SweepSpec { max_depth: Some(sweep::Range::Values(vec![Some(1.0), Some(3.0), None])), ..SweepSpec::default() };
        let units = Mutex::new(Vec::new());
        let sink = |u: &UnitResult, _: sweep::Progress| {
            units.lock().unwrap().push(u.clone());
            Flow::Continue
        };
        let (_, result) = sweep::sweep(&data, &spec, &sink, &Default::default()).unwrap();
        let meta = DatasetMeta {
            id: format!("ds_{}", pollard::rpc::datasets::content_digest(&bytes)),
            content: pollard::rpc::datasets::content_digest(&bytes),
            name: "iris".into(),
            version: 1,
            rows: 150,
            columns: vec![ColumnMeta { name: "petal_width_cm".into(), kind: pollard::data::ColumnKind::Categorical, missing: 0, levels: 22 }],
            target: Some("target".into()),
            task: Some(pollard::data::Task::Classify),
            created_at: 1_700_000_000_000,
            bytes: bytes.len() as u64,
            categorical: options.categorical.clone(),
        };
        let mut run = Run::queued("run_0123".into(), &meta, "target".into(), spec, 1_700_000_000_000);
        run.labels.insert("team".into(), "reefer".into());
        let outcome = RunOutcome { scores: result.scores, picked: result.picked as u32, best: result.best as u32, model: result.model, fold_assignment: vec![vec![0, 1, -1]], nested: result.nested, permutation: None };
        Fitted { meta, run, units: units.into_inner().unwrap(), outcome }
    })
}

/// Cells of one table column, wild in length, values and flags.
fn wild_column() -> impl Strategy<Value = pb::TableColumn> {
    let name = prop_oneof![Just("sepal_length_cm".to_string()), Just("petal_width_cm".to_string()), Just("target".to_string()), "\\PC{0,5}"];
    let flags = prop::collection::vec(any::<bool>(), 0..6);
    let numbers = (prop::collection::vec(prop_oneof![any::<f64>(), Just(f64::NAN), Just(f64::INFINITY), Just(0.2)], 0..6), flags.clone())
        .prop_map(|(values, missing)| pb::table_column::Cells::Numbers(pb::NumberCells { values, missing }));
    let texts = (prop::collection::vec(prop_oneof![Just("0.2".to_string()), Just("setosa".to_string()), "\\PC{0,5}"], 0..6), flags)
        .prop_map(|(values, missing)| pb::table_column::Cells::Texts(pb::TextCells { values, missing }));
    (name, prop::option::of(prop_oneof![numbers, texts])).prop_map(|(name, cells)| pb::TableColumn { name, cells })
}

/// A table as PutTable stores it and as Predict reads it. A table that becomes CSV reads
/// back with one row per cell.
fn decode_table(table: &pb::Table) {
    if let Ok(csv) = convert::table_to_csv(table) {
        let rows = match &table.columns[0].cells {
            Some(pb::table_column::Cells::Numbers(n)) => n.values.len(),
            Some(pb::table_column::Cells::Texts(t)) => t.values.len(),
            None => unreachable!("a column without cells is refused"),
        };
        if let Ok(frame) = read_frame(&csv[..], &CsvOptions::new("")) {
            assert_eq!(frame.rows, rows);
        }
    }
    let model = fitted().outcome.model.as_ref().unwrap();
    if let Ok(frame) = convert::table_to_frame(table, &model.columns) {
        let _ = model.predict(&frame);
    }
}

proptest! {
    #![proptest_config(cases(200000))]

    #[test]
    fn table_decoder_takes_any_bytes(bytes in prop::collection::vec(any::<u8>(), 0..400)) {
        if let Ok(r) = pb::PutTableRequest::decode(&bytes[..]) {
            decode_table(&r.table.unwrap_or_default());
        }
        if let Ok(r) = pb::PredictRequest::decode(&bytes[..]) {
            decode_table(&r.rows.unwrap_or_default());
        }
    }

}

proptest! {
    #![proptest_config(cases(100000))]

    #[test]
    fn table_decoder_takes_wild_tables(columns in prop::collection::vec(wild_column(), 0..6)) {
        let table = pb::Table { columns };
        decode_table(&table);
        // And the same table through the wire.
        let bytes = pb::PutTableRequest { name: "t".into(), target: "target".into(), table: Some(table) }.encode_to_vec();
        decode_table(&pb::PutTableRequest::decode(&bytes[..]).unwrap().table.unwrap());
    }
}

// ------------------------------------------------------------------ spec conversion

/// A limit range whose sizes stay small: every value and kind, no huge counts.
fn small_range() -> BoxedStrategy<pb::LimitRange> {
    let value = prop_oneof![
        any::<f64>().prop_map(pb::limit_value::Value::Number),
        (-3.0f64..50.0).prop_map(pb::limit_value::Value::Number),
        any::<bool>().prop_map(pb::limit_value::Value::Unlimited),
    ];
    let values = prop::collection::vec(prop::option::of(value).prop_map(|value| pb::LimitValue { value }), 0..5).prop_map(|values| pb::limit_range::Kind::Values(pb::ValueList { values }));
    let span = (-5.0f64..40.0, -5.0f64..40.0, prop_oneof![Just(0.0), Just(-1.0), 0.5f64..10.0]).prop_map(|(from, to, step)| pb::limit_range::Kind::Span(pb::Span { from, to, step }));
    let log = (-1.0f64..10.0, -1.0f64..100.0, 0u32..6).prop_map(|(from, to, count)| pb::limit_range::Kind::LogSpan(pb::LogSpan { from, to, count }));
    prop::option::of(prop_oneof![values, span, log]).prop_map(|kind| pb::LimitRange { kind }).boxed()
}

/// A limit range of any size: spans and counts up to the type's limits.
fn wild_range() -> BoxedStrategy<pb::LimitRange> {
    let span = (any::<f64>(), any::<f64>(), any::<f64>()).prop_map(|(from, to, step)| pb::limit_range::Kind::Span(pb::Span { from, to, step }));
    let log = (any::<f64>(), any::<f64>(), any::<u32>()).prop_map(|(from, to, count)| pb::limit_range::Kind::LogSpan(pb::LogSpan { from, to, count }));
    prop_oneof![small_range(), span.prop_map(|k| pb::LimitRange { kind: Some(k) }), log.prop_map(|k| pb::LimitRange { kind: Some(k) })].boxed()
}

fn name_of(known: &'static [&'static str]) -> impl Strategy<Value = String> {
    prop_oneof![prop::sample::select(known).prop_map(String::from), "\\PC{0,4}"]
}

fn wild_spec(range: BoxedStrategy<pb::LimitRange>) -> impl Strategy<Value = pb::SweepSpec> {
    let r = || prop::option::of(range.clone());
    let words = (
        name_of(&["", "classify", "regress"]),
        prop::collection::vec(name_of(&["gini", "entropy", "squared_error"]), 0..3),
        prop::collection::vec(name_of(&["none", "balanced"]), 0..3),
        name_of(&["", "accuracy", "log_loss", "roc_auc", "rmse", "r2", "expected_cost"]),
        name_of(&["", "highest", "one_se"]),
    );
    let folds = prop::option::of((name_of(&["", "shuffled", "stratified", "grouped", "forward", "given"]), prop_oneof![0u32..12, any::<u32>()], prop_oneof![0u32..4, any::<u32>()], name_of(&["", "target", "sepal_length_cm", "age"])))
        .prop_map(|f| f.map(|(scheme, k, repeats, column)| pb::FoldPlan { scheme, k, repeats, column }))
        .boxed();
    let splitter = name_of(&["", "exact", "binned", "histogram"]);
    // Decision costs: usable pairs and any numbers at all (negative, NaN, infinite, zeros).
    let cost = || prop_oneof![Just(0.0), Just(1.0), Just(5.0), any::<f64>()];
    let costs = prop::option::of((cost(), cost())).prop_map(|c| c.map(|(false_alarm, miss)| pb::DecisionCosts { false_alarm, miss }));
    // Monotone limits: real, unknown, repeated and empty feature names (the target among
    // them), every direction and numbers that name none.
    let limit = (name_of(&["", "sepal_length_cm", "petal_width_cm", "species", "age", "nope"]), prop_oneof![0i32..4, any::<i32>()]).prop_map(|(feature, direction)| pb::MonotoneLimit { feature, direction });
    let monotone = prop::collection::vec(limit, 0..4);
    // The outer plan of a nested sweep is drawn like the inner one.
    (words, (r(), r(), r(), r(), r(), r()), (folds.clone(), folds), any::<bool>(), any::<u64>(), (splitter, costs, monotone)).prop_map(|((task, criteria, class_weights, metric, pick), (d, s, l, v, g, a), (folds, outer), prune_path, seed, (splitter, costs, monotone))| pb::SweepSpec {
        costs,
        monotone,
        outer,
        target: String::new(),
        task,
        criteria,
        class_weights,
        max_depth: d,
        min_split_rows: s,
        min_leaf_rows: l,
        max_leaves: v,
        min_gain: g,
        prune_alpha: a,
        prune_path,
        folds,
        metric,
        pick,
        seed,
        skip_final: false,
        splitter,
    })
}

/// Grid size of a checked spec, counted without overflow.
fn grid_size(c: &pollard::sweep::CheckedSpec) -> u128 {
    [c.max_depth.len(), c.min_split_rows.len(), c.max_leaves.len(), c.min_gain.len(), c.keys.len(), c.prune_alpha.len().max(1)].iter().map(|&n| n as u128).product()
}

const CAP: usize = 100_000;

/// The wire spec as the server checks it (rpc::runs::check_sweep without the dataset
/// lookup): conversion, then the check against the dataset; an accepted grid is within the
/// settings cap.
fn check_spec(wire: &pb::SweepSpec, data: &Dataset) {
    let Ok(spec) = convert::spec_from(wire, data.task()) else { return };
    if let Ok(checked) = (SweepSpec { max_settings: Some(CAP), ..spec }).check(data) {
        assert!(grid_size(&checked) <= CAP as u128, "accepted a grid of {} settings", grid_size(&checked));
    }
}

fn iris() -> &'static Dataset {
    static D: OnceLock<Dataset> = OnceLock::new();
    D.get_or_init(|| dataset("iris.csv"))
}

fn diabetes() -> &'static Dataset {
    static D: OnceLock<Dataset> = OnceLock::new();
    D.get_or_init(|| dataset("diabetes.csv"))
}

proptest! {
    #![proptest_config(cases(100000))]

    #[test]
    fn spec_conversion_takes_wild_specs_of_small_size(wire in wild_spec(small_range()), regress in any::<bool>()) {
        check_spec(&wire, if regress { diabetes() } else { iris() });
    }

}

proptest! {
    #![proptest_config(cases(200000))]

    #[test]
    fn spec_conversion_takes_any_bytes(bytes in prop::collection::vec(any::<u8>(), 0..300)) {
        if let Ok(wire) = pb::SweepSpec::decode(&bytes[..]) {
            if spec_sizes_are_small(&wire) {
                check_spec(&wire, iris());
            }
        }
    }
}

/// Whether every range of a decoded spec is small enough for the many-case targets (the
/// wild-size target below takes any size): spans of at most 10,000 values, log spans of at most 10,000.
fn spec_sizes_are_small(s: &pb::SweepSpec) -> bool {
    [&s.max_depth, &s.min_split_rows, &s.min_leaf_rows, &s.max_leaves, &s.min_gain, &s.prune_alpha].iter().all(|r| match r.as_ref().and_then(|r| r.kind.as_ref()) {
        Some(pb::limit_range::Kind::Span(p)) => !(p.step > 0.0 && (p.to - p.from) / p.step > 1e4),
        Some(pb::limit_range::Kind::LogSpan(l)) => l.count <= 10_000,
        _ => true,
    })
}

proptest! {
    #![proptest_config(cases(2000))]

    /// Any sizes: returns Ok or Err, never panics, never aborts, finishes, and never accepts a
    /// grid past the cap.
    #[test]
    fn spec_conversion_takes_wild_specs_of_any_size(wire in wild_spec(wild_range())) {
        check_spec(&wire, iris());
    }
}

// ------------------------------------------------------------------ stored records

/// Every decoder of the store, on the same bytes.
fn decode_all(bytes: &[u8]) {
    let _ = records::decode_dataset(bytes);
    let _ = records::decode_run(bytes);
    let _ = records::decode_event(bytes);
    let _ = records::decode_unit(bytes);
    let _ = records::decode_outcome(bytes);
    let _ = records::decode_holds(bytes);
    let _ = records::decode_schedule(bytes);
    let _ = records::decode_fire(bytes);
}

/// Valid records of every kind the fixture has.
fn valid_records() -> &'static Vec<Vec<u8>> {
    static R: OnceLock<Vec<Vec<u8>>> = OnceLock::new();
    R.get_or_init(|| {
        let f = fitted();
        let score = f.outcome.scores[0].clone();
        let events = [
            EventKind::Progress(sweep::Progress { units_done: 1, units_total: 5, scores_done: 3, scores_total: 15 }),
            EventKind::Scored { index: 0, score: Box::new(score) },
            EventKind::Finished { picked: 1, best: 1 },
            EventKind::Failed("no".into()),
        ];
        let mut out = vec![records::encode_dataset(&f.meta), records::encode_run(&f.run), records::encode_outcome(&f.outcome), records::encode_holds(&records::HoldsRecord { runs: vec!["run_1".into()] })];
        out.extend(events.into_iter().enumerate().map(|(i, kind)| records::encode_event(&Event { sequence: i as u64 + 1, at: 5, kind })));
        out.extend(f.units.iter().take(2).map(records::encode_unit));
        out
    })
}

/// JSON values that break what a record's fields assume.
fn wild_json() -> impl Strategy<Value = serde_json::Value> {
    use serde_json::json;
    prop_oneof![
        Just(json!(null)),
        Just(json!(-1)),
        Just(json!(u64::MAX)),
        Just(json!(1e300)),
        Just(json!("NaN")),
        Just(json!("inf")),
        Just(json!("")),
        Just(json!([])),
        Just(json!({})),
        Just(json!([[]])),
        Just(json!(["x"])),
        any::<i64>().prop_map(|v| json!(v)),
        "\\PC{0,8}".prop_map(|s| json!(s)),
    ]
}

/// Replaces the `pick`-th leaf or container (in document order) of a JSON value.
fn replace_nth(v: &mut serde_json::Value, pick: &mut usize, with: &serde_json::Value) -> bool {
    if *pick == 0 {
        *v = with.clone();
        return true;
    }
    *pick -= 1;
    match v {
        serde_json::Value::Array(a) => a.iter_mut().any(|x| replace_nth(x, pick, with)),
        serde_json::Value::Object(o) => o.values_mut().any(|x| replace_nth(x, pick, with)),
        _ => false,
    }
}

proptest! {
    #![proptest_config(cases(200000))]

    #[test]
    fn record_decoders_take_any_bytes(bytes in prop::collection::vec(any::<u8>(), 0..300), json in any::<bool>()) {
        let mut bytes = bytes;
        if json && !bytes.is_empty() {
            bytes[0] = records::FORMAT;
        }
        decode_all(&bytes);
    }

}

proptest! {
    #![proptest_config(cases(200000))]

    /// Valid records with bytes flipped, inserted, removed or cut off.
    #[test]
    fn record_decoders_take_damaged_records(which in any::<prop::sample::Index>(), edits in prop::collection::vec((any::<prop::sample::Index>(), any::<u8>(), 0u8..4), 1..6)) {
        let mut bytes = which.get(valid_records()).clone();
        for (at, byte, how) in edits {
            if bytes.is_empty() {
                break;
            }
            let i = at.index(bytes.len());
            match how {
                0 => bytes[i] ^= byte | 1,
                1 => bytes.insert(i, byte),
                2 => { bytes.remove(i); }
                _ => bytes.truncate(i),
            }
        }
        decode_all(&bytes);
    }

}

proptest! {
    #![proptest_config(cases(100000))]

    /// Valid records with one JSON value replaced: the document parses, a field is wrong.
    #[test]
    fn record_decoders_take_records_with_a_wrong_field(which in any::<prop::sample::Index>(), at in 0usize..5000, with in wild_json()) {
        let valid = which.get(valid_records());
        let mut doc: serde_json::Value = serde_json::from_slice(&valid[1..]).unwrap();
        let mut pick = at;
        replace_nth(&mut doc, &mut pick, &with);
        let mut bytes = vec![records::FORMAT];
        serde_json::to_writer(&mut bytes, &doc).unwrap();
        decode_all(&bytes);
    }
}

// ------------------------------------------------------------------ crashes found, as plain tests

/// A sweep spec from the wire with one limit range.
fn spec_with(max_depth: Option<pb::LimitRange>) -> pb::SweepSpec {
    pb::SweepSpec { max_depth, ..Default::default() }
}

#[test]
fn a_log_span_of_u32_max_values_is_refused_not_allocated() {
    let wire = spec_with(Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::LogSpan(pb::LogSpan { from: 1.0, to: 1e9, count: u32::MAX })) }));
    let spec = convert::spec_from(&wire, Task::Classify).unwrap();
    let e = SweepSpec { max_settings: Some(CAP), ..spec }.check(iris()).unwrap_err();
    assert!(e.field.contains("max_depth") || e.field == "settings", "{e}");
}

#[test]
fn a_grid_of_two_to_the_64_settings_is_refused() {
    let span = |from: f64, to: f64| Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Span(pb::Span { from, to, step: 1.0 })) });
    let wire = pb::SweepSpec {
        max_depth: span(0.0, 2047.0),
        min_split_rows: span(2.0, 2049.0),
        max_leaves: span(1.0, 2048.0),
        min_gain: span(0.0, 2047.0),
        min_leaf_rows: span(1.0, 1024.0),
        prune_alpha: span(0.0, 1023.0),
        ..Default::default()
    };
    let spec = convert::spec_from(&wire, Task::Classify).unwrap();
    match (SweepSpec { max_settings: Some(CAP), ..spec }).check(iris()) {
        Ok(c) => panic!("accepted a grid of {} settings", grid_size(&c)),
        // Refused by the grid's checked size, or earlier by the cap on values per range.
        Err(e) => assert!(e.field == "settings" || e.field.ends_with(".span"), "{e}"),
    }
}

/// Found by `table_decoder_takes_wild_tables`: in a table of one column a missing cell was
/// written as an empty line, which the CSV reader skips as blank, so PutTable stored one row
/// fewer than it was sent (4 rows became 3) and said nothing.
#[test]
fn a_one_column_table_keeps_rows_whose_cell_is_missing() {
    let cells = pb::TextCells { values: vec!["0.2".into(), "0.2".into(), " ".into(), "0.2".into()], missing: vec![true, false, false, false] };
    let table = pb::Table { columns: vec![pb::TableColumn { name: "sepal_length_cm".into(), cells: Some(pb::table_column::Cells::Texts(cells)) }] };
    let csv = convert::table_to_csv(&table).unwrap();
    let frame = read_frame(&csv[..], &CsvOptions::new("")).unwrap();
    assert_eq!(frame.rows, 4, "{}", String::from_utf8_lossy(&csv));
}
