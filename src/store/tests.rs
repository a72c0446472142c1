//! Store tests: record round trips, then the store against an in-memory model (random
//! sequences of changes with reopens in between), then crash recovery in a child process.
//!
//! Datasets stored here are opaque bytes (the store never parses them); the model trees come
//! from fits of the open iris and diabetes tables in `tests/data` (see SOURCES.md there).

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};

use proptest::prelude::*;

use super::records::{self, decode, Real};
use super::sled_store::{CHUNKS, DATASETS, NAMES, PROGRESS, RUNS, TREE_NAMES};
use super::*;
use crate::data::csv::{read_dataset, CsvOptions};
use crate::data::Task;
use crate::data::ColumnKind;
use crate::drift::Knob;
use crate::job::{ColumnMeta, FireOutcome, Retention};
use crate::schedule::CatchUp;
use crate::sweep::{FoldPlan, FoldScheme, FoldScore, Metric, PickRule, Progress, Range, Setting, SettingScore, SweepSpec};
use crate::tree::{fit, ClassWeight, Criterion, FitOptions, Limits, Monotone, Splitter, TrainSet, Tree};

/// The throwaway PostgreSQL clusters of the tests (shared with the integration targets).
#[path = "../../tests/support/postgres.rs"]
mod pg;

// ---------------------------------------------------------------------------------------
// Helpers

/// A directory under the system temporary directory, removed on drop.
struct TempDir(PathBuf);

impl TempDir {
    fn new(tag: &str) -> TempDir {
        static N: AtomicUsize = AtomicUsize::new(0);
        let n = N.fetch_add(1, Ordering::Relaxed);
        let path = std::env::temp_dir().join(format!("pollard-store-{tag}-{}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&path);
        TempDir(path)
    }
    fn path(&self) -> &Path {
        &self.0
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// Equality that sees through NaN: `{:?}` prints every f64 in shortest round-trip form, so
/// equal text means equal bits (NaN payloads aside), and NaN equals NaN.
fn same<T: std::fmt::Debug>(a: &T, b: &T) -> bool {
    format!("{a:?}") == format!("{b:?}")
}

macro_rules! assert_same {
    ($a:expr, $b:expr) => {{
        let (a, b) = (&$a, &$b);
        assert!(same(a, b), "not the same:\n left: {a:?}\nright: {b:?}");
    }};
}

pub(crate) fn meta(id: &str, name: &str, created_at: i64, bytes: u64) -> DatasetMeta {
    DatasetMeta {
        id: id.to_string(),
        content: format!("content of {id}"),
        name: name.to_string(),
        version: 0,
        rows: 150,
        columns: vec![
            ColumnMeta { name: "box_temp".into(), kind: ColumnKind::Numeric, missing: 3, levels: 0 },
            ColumnMeta { name: "site".into(), kind: ColumnKind::Categorical, missing: 0, levels: 4 },
        ],
        target: Some("spoiled".into()),
        task: Some(Task::Classify),
        created_at,
        bytes,
        categorical: vec!["site".into()],
    }
}

/// A spec that sets every field, with every kind of range.
fn full_spec(seed: u64) -> SweepSpec {
    SweepSpec {
        task: Some(Task::Classify),
        criteria: vec![Criterion::Gini, Criterion::Entropy],
        class_weights: vec![ClassWeight::None, ClassWeight::Balanced],
        max_depth: Some(Range::Values(vec![Some(2.0), None, Some(8.0)])),
        min_split_rows: Some(Range::Span { from: 2.0, to: 20.0, step: 6.0 }),
        min_leaf_rows: Some(Range::Values(vec![Some(1.0), Some(5.0)])),
        max_leaves: Some(Range::Values(vec![None, Some(16.0)])),
        min_gain: Some(Range::LogSpan { from: 1e-6, to: 0.1, count: 4 }),
        prune_alpha: Some(Range::Span { from: 0.0, to: 0.03, step: 0.01 }),
        prune_path: false,
        folds: Some(FoldPlan { scheme: FoldScheme::Grouped { column: "site".into() }, k: 4, repeats: 3 }),
        metric: Some(Metric::LogLoss),
        pick: PickRule::OneSe,
        seed,
        fit_final: false,
        max_settings: Some(5000),
        splitter: Splitter::Binned,
        outer: Some(FoldPlan { scheme: FoldScheme::Forward { column: "day".into() }, k: 3, repeats: 1 }),
        monotone: vec![("day".into(), Monotone::Increasing), ("site".into(), Monotone::Decreasing), ("x".into(), Monotone::Free)],
        costs: Some(crate::sweep::costs::Costs { false_alarm: 1.5, miss: 4.0 }),
    }
}

fn setting_score(valid_mean: f64) -> SettingScore {
    SettingScore {
        setting: Setting {
            key: 3,
            options: FitOptions {
                limits: Limits { max_depth: Some(4), min_split_rows: 7, min_leaf_rows: 2, max_leaves: None, min_gain: 1e-7, prune_alpha: 0.011699999999999999 },
                criterion: Some(Criterion::Entropy),
                class_weight: ClassWeight::Balanced,
                splitter: Splitter::Binned,
                monotone: vec![Monotone::Free, Monotone::Decreasing, Monotone::Increasing].into(),
            },
        },
        fold_scores: vec![0.1, f64::NAN, 0.3, -0.0],
        valid_mean,
        valid_sd: f64::NAN,
        train_mean: 1.0 / 3.0,
        gap: f64::INFINITY,
        mean_leaves: 5.5,
        mean_depth: f64::NEG_INFINITY,
    }
}

fn read_table(file: &str, target: &str) -> crate::data::Dataset {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data").join(file);
    read_dataset(std::fs::File::open(&path).unwrap(), &CsvOptions::new(target)).unwrap()
}

fn fitted(file: &str, limits: Limits) -> Tree {
    let data = read_table(file, "target");
    let options = FitOptions { limits, ..FitOptions::default() };
    fit(&TrainSet::of(&data), &options.check(data.task()).unwrap()).unwrap()
}

pub(crate) fn outcome(model: Option<Tree>) -> RunOutcome {
    RunOutcome {
        scores: vec![setting_score(0.9), setting_score(f64::NAN)],
        picked: 1,
        best: 0,
        model,
        fold_assignment: vec![vec![0, 1, -1, 2], vec![2, 1, 0, 0]],
        nested: None,
        permutation: Some(crate::sweep::PermutationImportance { features: vec!["a".into(), "b".into(), "c".into()], repeats: 5, per_fold: vec![vec![0.25, 0.0, -0.01], vec![0.1, f64::MIN_POSITIVE, 1.0 / 3.0]] }),
    }
}

// ---------------------------------------------------------------------------------------
// Records

#[test]
fn dataset_record_round_trips() {
    let mut m = meta("ds_ab", "reefer", -5, 1 << 40);
    m.version = 7;
    m.rows = u64::MAX;
    assert_eq!(records::decode_dataset(&records::encode_dataset(&m)).unwrap(), m);
    // A record written before versions followed names has no content: its id is `ds_` +
    // the content hash.
    let old = DatasetMeta { content: String::new(), ..m.clone() };
    let bytes = records::encode_dataset(&old);
    assert!(!String::from_utf8_lossy(&bytes).contains("content"));
    assert_eq!(records::decode_dataset(&bytes).unwrap(), DatasetMeta { content: "ab".into(), ..m });
}

#[test]
fn run_record_round_trips_every_spec_field() {
    let folds = [
        FoldScheme::Shuffled,
        FoldScheme::Stratified,
        FoldScheme::Grouped { column: "g".into() },
        FoldScheme::Forward { column: "t".into() },
        FoldScheme::Given { column: "f".into() },
    ];
    let metrics = Metric::ALL;
    for (i, scheme) in folds.into_iter().enumerate() {
        let mut spec = full_spec(u64::MAX - i as u64);
        spec.folds = Some(FoldPlan { scheme, k: 2 + i as u32, repeats: 1 });
        spec.metric = Some(metrics[i]);
        let mut run = Run::queued(format!("run_{i}"), &meta("ds_1", "reefer", 10, 0), "spoiled".into(), spec, 1_700_000_000_000);
        run.labels.insert("team".into(), "cold chain".into());
        run.idempotency_key = Some("k-1".into());
        run.schedule_id = Some("nightly".into());
        run.state = RunState::Cancelled;
        run.started_at = Some(1);
        run.finished_at = Some(i64::MIN);
        run.reason = Some("stopped by \"ops\"\n".into());
        (run.settings, run.units_total, run.units_done, run.next_sequence) = (1, 2, 3, u64::MAX);
        assert_eq!(records::decode_run(&records::encode_run(&run)).unwrap(), run);
    }
    // Defaults: every option left to the engine.
    let mut spec = SweepSpec { prune_path: true, metric: Some(Metric::R2), task: Some(Task::Regress), ..SweepSpec::default() };
    for m in &metrics[6..] {
        spec.metric = Some(*m);
        let run = Run::queued("run_d".into(), &meta("ds_1", "", 0, 0), "y".into(), spec.clone(), 0);
        assert_eq!(records::decode_run(&records::encode_run(&run)).unwrap(), run);
    }
    let run = Run::queued("run_e".into(), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), 0);
    assert_eq!(records::decode_run(&records::encode_run(&run)).unwrap(), run);
}

#[test]
fn event_records_round_trip_every_kind() {
    let kinds = vec![
        EventKind::Progress(Progress { units_done: 1, units_total: usize::MAX, scores_done: 0, scores_total: 9 }),
        EventKind::Scored { index: 4, score: Box::new(setting_score(f64::NAN)) },
        EventKind::Scored { index: 0, score: Box::new(setting_score(0.75)) },
        EventKind::Finished { picked: 2, best: 1 },
        EventKind::Failed("fit failed: limits.min_leaf_rows".into()),
        EventKind::Cancelled(String::new()),
    ];
    for (i, kind) in kinds.into_iter().enumerate() {
        let e = Event { sequence: i as u64 + 1, at: -(i as i64), kind };
        assert_same!(records::decode_event(&records::encode_event(&e)).unwrap(), e);
    }
}

#[test]
fn unit_record_keeps_every_bit() {
    // 0.011699999999999999 is one of the values serde_json's default number parser reads back
    // one unit in the last place off (to 0.0117); the records keep it exactly.
    let mut values = vec![0.011699999999999999, 0.1, 1.0 / 3.0, -0.0, 5e-324, f64::MAX, f64::MIN_POSITIVE, 1e300, 1e-300];
    // SplitMix64 (Steele, Lea & Flood, 2014) over raw bit patterns: every exponent range.
    let mut s: u64 = 42;
    for _ in 0..2000 {
        s = s.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = s;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        values.push(f64::from_bits(z ^ (z >> 31)));
    }
    let unit = UnitResult {
        unit: 12,
        scores: values.iter().enumerate().map(|(i, &v)| (i, FoldScore { valid: v, train: -v, leaves: i as u32, depth: u32::MAX })).collect(),
    };
    let back = records::decode_unit(&records::encode_unit(&unit)).unwrap();
    assert_eq!(back.unit, 12);
    for ((i, a), (j, b)) in unit.scores.iter().zip(&back.scores) {
        assert_eq!(i, j);
        assert!(a.valid.to_bits() == b.valid.to_bits() || (a.valid.is_nan() && b.valid.is_nan()), "{:e} came back as {:e}", a.valid, b.valid);
        assert!(a.train.to_bits() == b.train.to_bits() || (a.train.is_nan() && b.train.is_nan()));
        assert_eq!((a.leaves, a.depth), (b.leaves, b.depth));
    }
    // NaN and the infinities are written as names, never as JSON null.
    let text = String::from_utf8(records::encode(&vec![Real(f64::NAN), Real(f64::INFINITY), Real(f64::NEG_INFINITY)])[1..].to_vec()).unwrap();
    assert_eq!(text, r#"["NaN","inf","-inf"]"#);
}

#[test]
fn outcome_record_round_trips_with_models() {
    assert_same!(records::decode_outcome(&records::encode_outcome(&outcome(None))).unwrap(), outcome(None));
    let classify = fitted("iris.csv", Limits::default());
    let regress = fitted("diabetes.csv", Limits { max_depth: Some(4), ..Limits::default() });
    for tree in [classify, regress] {
        // Each threshold carries its pair of training values, which the round trip keeps.
        assert!(tree.nodes.iter().filter_map(|n| n.split.as_ref()).all(|s| s.between.is_some()));
        let o = outcome(Some(tree.clone()));
        let back = records::decode_outcome(&records::encode_outcome(&o)).unwrap();
        assert_same!(back.scores, o.scores);
        assert_eq!(back.model.as_ref(), Some(&tree), "the model tree changed in the round trip");
        assert_eq!(back.fold_assignment, o.fold_assignment);
        assert_eq!((back.picked, back.best), (1, 0));
    }
    // A nested sweep's outer results, NaN included, survive the round trip; plain outcomes
    // (and records written before nested sweeps) have none.
    let mut o = outcome(None);
    let fold = |fold: u32, score: f64| crate::sweep::OuterFold { repeat: 0, fold, picked: 1, inner_best: 0.93, inner_picked: 0.91, outer_score: score, leaves: 7 };
    o.nested = Some(crate::sweep::NestedResult { folds: vec![fold(0, 0.88), fold(1, f64::NAN)], outer_mean: f64::NAN, outer_sd: f64::NAN, optimism: f64::NAN });
    let back = records::decode_outcome(&records::encode_outcome(&o)).unwrap();
    assert_eq!(format!("{:?}", back.nested), format!("{:?}", o.nested));
    assert!(records::decode_outcome(&records::encode_outcome(&outcome(None))).unwrap().nested.is_none());
}

#[test]
fn unknown_or_broken_records_are_named_errors() {
    let mut bytes = records::encode_run(&Run::queued("run_1".into(), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), 0));
    bytes[0] = 7;
    let e = records::decode_run(&bytes).unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("run record") && m.contains("unknown format byte 7")), "{e}");
    let e = records::decode_event(&[]).unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("event record is empty")), "{e}");
    let e = decode::<records::UnitRecord>("unit", b"\x01{\"unit\":").err().unwrap();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("unit record (format 1) does not parse")), "{e}");
    // A state name a later build might add.
    let good = String::from_utf8(records::encode_run(&Run::queued("run_1".into(), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), 0))[1..].to_vec()).unwrap();
    let mut bad = vec![1u8];
    bad.extend_from_slice(good.replace("\"queued\"", "\"paused\"").as_bytes());
    let e = records::decode_run(&bad).unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("state 'paused' is not known")), "{e}");
    // Closed sets stored as names: a name this build does not know is a named error, and a
    // dataset stored without a target ("" task) has no task.
    let m = meta("ds_1", "", 0, 0);
    let text = String::from_utf8(records::encode_dataset(&m)[1..].to_vec()).unwrap();
    let with = |from: &str, to: &str| [&[1u8][..], text.replacen(from, to, 1).as_bytes()].concat();
    let e = records::decode_dataset(&with("\"numeric\"", "\"ordinal\"")).unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("column kind 'ordinal' is not known")), "{e}");
    let e = records::decode_dataset(&with("\"classify\"", "\"rank\"")).unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("task 'rank' is not known")), "{e}");
    assert_eq!(records::decode_dataset(&with("\"classify\"", "\"\"")).unwrap(), DatasetMeta { task: None, ..m });
}

#[test]
fn the_store_reports_a_corrupt_record_it_holds() {
    let store = SledStore::open_temporary().unwrap();
    store.tree(RUNS).insert("run_1", &[9u8, b'{', b'}'][..]).unwrap();
    let e = store.run("run_1").unwrap_err();
    assert_eq!(e, StoreError::Corrupt("run record has unknown format byte 9 (this build reads format 1)".into()));
    assert!(store.list_runs(&RunFilter::default(), None, 10).is_err());
}

// ---------------------------------------------------------------------------------------
// Datasets

/// The names in a store's dataset folder, sorted.
fn dataset_files(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = std::fs::read_dir(dir.join(files::DATASETS_DIR)).unwrap().map(|e| e.unwrap().file_name().into_string().unwrap()).collect();
    names.sort();
    names
}

#[test]
fn dataset_bytes_live_in_files_and_are_deleted_whole() {
    use std::os::unix::fs::PermissionsExt;
    let dir = TempDir::new("files");
    let store = SledStore::open(dir.path()).unwrap();
    let bytes: Vec<u8> = (0..(2 * CHUNK_BYTES + 12_345)).map(|i| (i * 7 % 251) as u8).collect();
    let PutDataset::Created(m) = store.put_dataset(meta("ds_big", "reefer", 5, bytes.len() as u64), &bytes).unwrap() else { panic!("not created") };
    assert_eq!(m.version, 1);
    assert_eq!(store.tree(CHUNKS).len(), 0);
    let file = dir.path().join("datasets/ds_big.csv");
    assert_eq!(std::fs::read(&file).unwrap(), bytes);
    assert_eq!(std::fs::metadata(&file).unwrap().permissions().mode() & 0o777, 0o600);
    assert_eq!(std::fs::metadata(dir.path().join("datasets")).unwrap().permissions().mode() & 0o777, 0o700);
    assert_eq!(store.dataset_bytes("ds_big").unwrap().unwrap(), bytes);
    // An existing id keeps its bytes.
    assert!(matches!(store.put_dataset(meta("ds_big", "other", 6, 0), &[]).unwrap(), PutDataset::Unchanged(e) if e == m));
    assert_eq!(store.dataset_bytes("ds_big").unwrap().unwrap(), bytes);
    let PutDataset::Created(m2) = store.put_dataset(meta("ds_empty", "reefer", 6, 0), &[]).unwrap() else { panic!("not created") };
    assert_eq!(m2.version, 2);
    assert_eq!(store.dataset_bytes("ds_empty").unwrap(), Some(Vec::new()));
    // A reader opened before a delete reads to the end.
    let mut early = store.dataset_reader("ds_big").unwrap().unwrap();
    assert_eq!(store.delete_dataset("ds_big").unwrap(), DeleteDataset::Deleted);
    assert!(!file.exists(), "the deleted dataset's file is removed");
    let mut read_late = Vec::new();
    std::io::Read::read_to_end(&mut early, &mut read_late).unwrap();
    assert_eq!(read_late, bytes);
    assert_eq!(store.dataset_bytes("ds_big").unwrap(), None);
    assert_eq!(store.delete_dataset("ds_big").unwrap(), DeleteDataset::NotFound);
    // Versions keep growing past deleted ones; the latest is the newest still stored.
    assert_eq!(store.delete_dataset("ds_empty").unwrap(), DeleteDataset::Deleted);
    assert_eq!(dataset_files(dir.path()), Vec::<String>::new());
    assert_eq!(store.latest_dataset("reefer").unwrap(), None);
    let PutDataset::Created(m3) = store.put_dataset(meta("ds_big", "reefer", 7, 0), &bytes).unwrap() else { panic!("not created") };
    assert_eq!(m3.version, 3);
    assert_eq!(store.latest_dataset("reefer").unwrap(), Some(m3));
    assert_eq!(store.dataset_bytes("ds_big").unwrap().unwrap(), bytes);
}

#[test]
fn a_staged_upload_is_moved_into_place() {
    let dir = TempDir::new("staged");
    let store = SledStore::open(dir.path()).unwrap();
    std::fs::create_dir_all(store.staging_dir()).unwrap();
    let staged = store.staging_dir().join("upload-1.part");
    std::fs::write(&staged, b"a,b\n1,2\n").unwrap();
    let PutDataset::Created(_) = store.put_dataset_staged(meta("ds_up", "", 1, 8), &staged).unwrap() else { panic!("not created") };
    assert!(!staged.exists(), "moved, not copied");
    assert_eq!(store.dataset_bytes("ds_up").unwrap().unwrap(), b"a,b\n1,2\n");
    // Already stored: the staged file is left to its owner, the stored bytes unchanged.
    std::fs::write(&staged, b"other").unwrap();
    assert!(matches!(store.put_dataset_staged(meta("ds_up", "", 2, 5), &staged).unwrap(), PutDataset::Unchanged(_)));
    assert!(staged.exists());
    assert_eq!(store.dataset_bytes("ds_up").unwrap().unwrap(), b"a,b\n1,2\n");
}

#[test]
fn open_removes_dataset_files_no_record_names() {
    let dir = TempDir::new("orphans");
    {
        let store = SledStore::open(dir.path()).unwrap();
        store.put_dataset(meta("ds_kept", "", 1, 4), b"kept").unwrap();
    }
    let folder = dir.path().join(files::DATASETS_DIR);
    // What a crash can leave: a placed file whose record was never stored, a temporary file.
    std::fs::write(folder.join("ds_orphan.csv"), b"orphan").unwrap();
    std::fs::write(folder.join("ds_kept.0190aa.tmp"), b"half").unwrap();
    std::fs::write(folder.join("notes.txt"), b"not ours").unwrap();
    let store = SledStore::open(dir.path()).unwrap();
    assert_eq!(dataset_files(dir.path()), ["ds_kept.csv", "notes.txt"]);
    assert_eq!(store.dataset_bytes("ds_kept").unwrap().unwrap(), b"kept");
    assert_eq!(store.dataset_bytes("ds_orphan").unwrap(), None);
}

#[test]
fn a_record_whose_file_is_missing_is_a_named_error() {
    let dir = TempDir::new("missing");
    let store = SledStore::open(dir.path()).unwrap();
    store.put_dataset(meta("ds_gone", "", 1, 4), b"gone").unwrap();
    std::fs::remove_file(dir.path().join("datasets/ds_gone.csv")).unwrap();
    let e = store.dataset_bytes("ds_gone").unwrap_err();
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("the bytes of dataset ds_gone are missing") && m.contains("ds_gone.csv")), "{e}");
    assert!(store.dataset_reader("ds_gone").is_err());
    // The record can still be deleted.
    assert_eq!(store.delete_dataset("ds_gone").unwrap(), DeleteDataset::Deleted);
    assert_eq!(store.dataset_bytes("ds_gone").unwrap(), None);
}

#[test]
fn open_moves_chunked_bytes_of_an_older_store_to_files() {
    let dir = TempDir::new("old-layout");
    let big: Vec<u8> = (0..(CHUNK_BYTES + 99)).map(|i| (i * 5 % 241) as u8).collect();
    {
        // The layout written before dataset files: the record, and its bytes in 1 MiB chunks;
        // plus the chunks of an upload a crash cut short (no record).
        let store = SledStore::open(dir.path()).unwrap();
        let mut m = meta("ds_old", "reefer", 1, big.len() as u64);
        m.version = 1;
        store.tree(DATASETS).insert("ds_old", records::encode_dataset(&m)).unwrap();
        store.tree(NAMES).insert(keys::name_version("reefer", 1), "ds_old").unwrap();
        for (i, chunk) in big.chunks(CHUNK_BYTES).enumerate() {
            store.tree(CHUNKS).insert(keys::chunk("ds_old", i as u32), chunk).unwrap();
        }
        store.tree(CHUNKS).insert(keys::chunk("ds_cut", 0), &b"partial"[..]).unwrap();
        store.flush().unwrap();
    }
    let store = SledStore::open(dir.path()).unwrap();
    assert_eq!(store.tree(CHUNKS).len(), 0, "no chunks are left");
    assert_eq!(dataset_files(dir.path()), ["ds_old.csv"]);
    assert_eq!(store.dataset_bytes("ds_old").unwrap().unwrap(), big);
    assert_eq!(store.dataset_bytes("ds_cut").unwrap(), None);
    // And it behaves like any other dataset.
    assert_eq!(store.latest_dataset("reefer").unwrap().unwrap().id, "ds_old");
    assert_eq!(store.delete_dataset("ds_old").unwrap(), DeleteDataset::Deleted);
    assert_eq!(dataset_files(dir.path()), Vec::<String>::new());
    drop(store);
    let store = SledStore::open(dir.path()).unwrap();
    assert_eq!(store.dataset_bytes("ds_old").unwrap(), None);
}

#[test]
fn concurrent_claims_take_each_run_once_in_order() {
    let store = SledStore::open_temporary().unwrap();
    store.put_dataset(meta("ds_1", "", 0, 0), b"x").unwrap();
    let n = 40;
    for i in 0..n {
        let run = Run::queued(format!("run_{i:04}"), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), i);
        assert!(matches!(store.create_run(run).unwrap(), CreateRun::Created(_)));
    }
    let claims: Vec<Vec<String>> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..4)
            .map(|_| {
                let store = store.clone();
                s.spawn(move || {
                    let mut mine = Vec::new();
                    while let Some(run) = store.claim_next(99).unwrap() {
                        assert_eq!(run.state, RunState::Running);
                        mine.push(run.id);
                    }
                    mine
                })
            })
            .collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    for mine in &claims {
        assert!(mine.windows(2).all(|w| w[0] < w[1]), "a thread claimed out of order: {mine:?}");
    }
    let mut all: Vec<String> = claims.concat();
    all.sort();
    assert_eq!(all, (0..n).map(|i| format!("run_{i:04}")).collect::<Vec<_>>());
    assert_eq!(store.running_runs().unwrap().len(), n as usize);
}

/// A version belongs to its name: equal bytes under a second name, or with a second target,
/// are a new version; the same bytes and target as the newest version of the name change
/// nothing and return that version.
#[test]
fn versions_follow_the_name() {
    let store = SledStore::open_temporary().unwrap();
    let put = |id: &str, name: &str, content: &str, target: &str| {
        let m = DatasetMeta { content: content.into(), target: crate::job::given(target.into()), ..meta(id, name, 1, 4) };
        store.put_dataset(m, content.as_bytes()).unwrap()
    };
    let PutDataset::Created(first) = put("ds_1", "voyages", "abcd", "spoiled") else { panic!("not created") };
    // Same bytes, another name: that name's version 1, with its own id and bytes.
    let PutDataset::Created(other) = put("ds_2", "bad", "abcd", "spoiled") else { panic!("not created") };
    assert_eq!((other.name.as_str(), other.version, other.content.as_str()), ("bad", 1, "abcd"));
    assert_eq!(store.latest_dataset("bad").unwrap(), Some(other.clone()));
    assert_eq!(store.dataset_bytes("ds_2").unwrap().unwrap(), b"abcd");
    // Same bytes and target as the newest version: unchanged, still v1; nothing stored.
    let chunks = store.tree(CHUNKS).len();
    assert_eq!(put("ds_3", "voyages", "abcd", "spoiled"), PutDataset::Unchanged(first.clone()));
    assert_eq!((store.dataset("ds_3").unwrap(), store.tree(CHUNKS).len()), (None, chunks));
    // Another target for the same bytes: a new version.
    let PutDataset::Created(v2) = put("ds_4", "voyages", "abcd", "box_temp") else { panic!("not created") };
    assert_eq!((v2.version, v2.target.as_deref()), (2, Some("box_temp")));
    // Back to the first target: the newest version differs, so version 3.
    let PutDataset::Created(v3) = put("ds_5", "voyages", "abcd", "spoiled") else { panic!("not created") };
    assert_eq!(v3.version, 3);
    assert_eq!(store.list_datasets(Some("voyages"), None, 10).unwrap().0.len(), 3);
}

/// A finished unit stores its progress apart: the run record (labels, spec and all) is not
/// written again, yet every read sees the progress; a full write folds it back in.
#[test]
fn a_unit_does_not_rewrite_the_run_record() {
    let store = SledStore::open_temporary().unwrap();
    store.put_dataset(meta("ds_1", "", 0, 0), b"x").unwrap();
    let mut run = Run::queued("run_0001".into(), &meta("ds_1", "", 0, 0), "y".into(), full_spec(3), 1);
    run.labels.insert("note".into(), "x".repeat(200));
    store.create_run(run).unwrap();
    store.claim_next(2).unwrap().unwrap();
    let record = || store.tree(RUNS).get("run_0001").unwrap().unwrap();
    let before = record();
    for u in 0..5 {
        assert_eq!(store.record_unit("run_0001", &unit_result(u, 10), unit_events(2, 10), 10).unwrap().len(), 2);
    }
    assert_eq!(record(), before, "the run record was rewritten");
    let run = store.run("run_0001").unwrap().unwrap();
    assert_eq!((run.units_done, run.next_sequence), (5, 11));
    assert_eq!(store.list_runs(&RunFilter::default(), None, 10).unwrap().0[0].units_done, 5);
    assert_eq!(store.running_runs().unwrap()[0].next_sequence, 11);
    assert_eq!(store.events("run_0001", 0).unwrap().len(), 10);
    // Ending the run writes it whole, progress included, and drops the progress record.
    let (ended, event) = store.end_run("run_0001", RunState::Failed, "stop", 20).unwrap().unwrap();
    assert_eq!((ended.units_done, event.sequence), (5, 11));
    assert!(store.tree(PROGRESS).get("run_0001").unwrap().is_none());
    assert_eq!(store.run("run_0001").unwrap().unwrap().units_done, 5);
}

/// A unit's progress event carries the store's count of stored units, whatever the caller
/// numbered it, and an event never takes a time before the run's previous event.
#[test]
fn progress_counts_stored_units_and_times_never_fall() {
    let store = SledStore::open_temporary().unwrap();
    store.put_dataset(meta("ds_1", "", 0, 0), b"x").unwrap();
    store.create_run(Run::queued("run_0001".into(), &meta("ds_1", "", 0, 0), "y".into(), full_spec(3), 1)).unwrap();
    store.claim_next(2).unwrap().unwrap();
    let progress = |n| vec![EventKind::Progress(Progress { units_done: n, units_total: 4, scores_done: n, scores_total: 4 })];
    // Numbered 2 and 1 by a caller that lost the race, and stamped 50 then 40.
    let first = store.record_unit("run_0001", &unit_result(0, 10), progress(2), 50).unwrap();
    let second = store.record_unit("run_0001", &unit_result(1, 10), progress(1), 40).unwrap();
    let done = |e: &Event| match &e.kind {
        EventKind::Progress(p) => p.units_done,
        other => panic!("not progress: {other:?}"),
    };
    assert_eq!((done(&first[0]), first[0].at), (1, 50));
    assert_eq!((done(&second[0]), second[0].at), (2, 50));
    let (_, ended) = store.end_run("run_0001", RunState::Cancelled, "stop", 30).unwrap().unwrap();
    assert_eq!(ended.at, 50);
}

/// A run that keeps dying without storing a unit is failed on its third resume; a clean
/// stop clears the count.
#[test]
fn resume_counts_crash_strikes() {
    let store = SledStore::open_temporary().unwrap();
    store.put_dataset(meta("ds_1", "", 0, 0), b"x").unwrap();
    for id in ["run_0001", "run_0002"] {
        store.create_run(Run::queued(id.into(), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), 1)).unwrap();
        store.claim_next(2).unwrap().unwrap();
    }
    assert!(matches!(store.resume("run_0001", 3).unwrap(), Resumed::Again(_)));
    assert!(matches!(store.resume("run_0001", 3).unwrap(), Resumed::Again(_)));
    assert!(matches!(store.resume("run_0001", 3).unwrap(), Resumed::GaveUp(_)));
    let failed = store.run("run_0001").unwrap().unwrap();
    assert_eq!(failed.state, RunState::Failed);
    assert!(failed.reason.as_deref().is_some_and(|r| r.contains("3 times")));
    assert_eq!(store.resume("run_0001", 4).unwrap(), Resumed::NotRunning);
    for _ in 0..5 {
        assert!(matches!(store.resume("run_0002", 3).unwrap(), Resumed::Again(_)));
        store.stopped_cleanly("run_0002").unwrap();
    }
}

// ---------------------------------------------------------------------------------------
// The store against a model

const NAMES_USED: [&str; 3] = ["", "reefer", "reefer-eu"];
const CONTENTS: usize = 6;
/// Idempotency keys `key-0` … are drawn from this many.
const KEYS_USED: usize = 3;

/// Content `i` of the datasets the model test stores; content 1 spans two chunks.
fn content(i: usize) -> Vec<u8> {
    match i {
        0 => b"box_temp,spoiled\n3.5,no\n".to_vec(),
        1 => (0..CHUNK_BYTES + 7).map(|j| (j % 13) as u8).collect(),
        2 => Vec::new(),
        i => format!("box_temp,spoiled\n{i},yes\n").into_bytes(),
    }
}

fn content_id(i: usize) -> String {
    format!("ds_{i:02}")
}

#[derive(Clone, Debug)]
enum Op {
    PutDataset { content: usize, name: usize },
    CreateRun { dataset: usize, key: Option<usize>, label: bool },
    Claim,
    Plan { run: usize },
    /// One unit through `record_unit`, or several in one `record_units` batch (a unit may
    /// repeat in a batch, as a stored one may be handed over again).
    RecordUnits { run: usize, units: Vec<(u32, usize)>, batch: bool },
    Progress { run: usize },
    Finish { run: usize },
    End { run: usize, cancel: bool },
    DeleteDataset { dataset: usize },
    DeleteRun { run: usize },
    Reopen,
}

fn op() -> impl Strategy<Value = Op> {
    prop_oneof![
        3 => (0..CONTENTS, 0..NAMES_USED.len()).prop_map(|(content, name)| Op::PutDataset { content, name }),
        5 => (0..64usize, proptest::option::of(0..KEYS_USED), any::<bool>()).prop_map(|(dataset, key, label)| Op::CreateRun { dataset, key, label }),
        3 => Just(Op::Claim),
        2 => (0..64usize).prop_map(|run| Op::Plan { run }),
        5 => (0..64usize, proptest::collection::vec((0..4u32, 0..3usize), 1..4), any::<bool>())
            .prop_map(|(run, units, batch)| if batch { Op::RecordUnits { run, units, batch } } else { Op::RecordUnits { run, units: units[..1].to_vec(), batch } }),
        1 => (0..64usize).prop_map(|run| Op::Progress { run }),
        2 => (0..64usize).prop_map(|run| Op::Finish { run }),
        2 => (0..64usize, any::<bool>()).prop_map(|(run, cancel)| Op::End { run, cancel }),
        2 => (0..64usize).prop_map(|dataset| Op::DeleteDataset { dataset }),
        1 => (0..64usize).prop_map(|run| Op::DeleteRun { run }),
        1 => Just(Op::Reopen),
    ]
}

/// What the store should hold, kept in plain maps.
#[derive(Default)]
struct Model {
    datasets: BTreeMap<String, (DatasetMeta, Vec<u8>)>,
    /// Highest version ever given under each name.
    versions: BTreeMap<String, u32>,
    runs: BTreeMap<String, Run>,
    /// Queued run ids, oldest first.
    queue: Vec<String>,
    idempotency: BTreeMap<String, String>,
    events: BTreeMap<String, Vec<Event>>,
    units: BTreeMap<String, BTreeMap<usize, UnitResult>>,
    outcomes: BTreeMap<String, RunOutcome>,
    /// Every run id handed out, deleted ones too.
    ids: Vec<String>,
}

impl Model {
    /// A run id for a change: mostly one the change applies to (`wanted`), sometimes any
    /// run ever made (deleted ones too), or an unknown id when none was made.
    fn pick(&self, i: usize, wanted: impl Fn(&Run) -> bool) -> String {
        let fitting: Vec<&String> = self.runs.values().filter(|r| wanted(r)).map(|r| &r.id).collect();
        if i % 5 != 0 && !fitting.is_empty() {
            fitting[i % fitting.len()].clone()
        } else if self.ids.is_empty() {
            "run_none".into()
        } else {
            self.ids[i % self.ids.len()].clone()
        }
    }

    /// A dataset content: mostly one stored, sometimes any.
    fn pick_content(&self, i: usize) -> usize {
        let stored: Vec<usize> = (0..CONTENTS).filter(|&c| self.datasets.contains_key(&content_id(c))).collect();
        if i % 5 != 0 && !stored.is_empty() {
            stored[i % stored.len()]
        } else {
            i % CONTENTS
        }
    }

    fn append(&mut self, id: &str, kind: EventKind, now: i64) -> Event {
        let run = self.runs.get_mut(id).unwrap();
        let e = Event { sequence: run.take_sequence(), at: now, kind };
        self.events.entry(id.to_string()).or_default().push(e.clone());
        e
    }

    fn oldest_active_of(&self, dataset: &str) -> Option<String> {
        self.runs.values().filter(|r| r.dataset_id == dataset && r.state.is_active()).map(|r| r.id.clone()).next()
    }
}

fn unit_result(unit: u32, now: i64) -> UnitResult {
    let valid = if now % 3 == 0 { f64::NAN } else { now as f64 / 7.0 };
    UnitResult { unit: unit as usize, scores: vec![(unit as usize, FoldScore { valid, train: 0.5, leaves: 3, depth: 2 }), (9, FoldScore { valid: 0.25, train: 1.0, leaves: 1, depth: 0 })] }
}

fn unit_events(n: usize, now: i64) -> Vec<EventKind> {
    (0..n)
        .map(|i| {
            if i % 2 == 0 {
                EventKind::Progress(Progress { units_done: i, units_total: 4, scores_done: 2 * i, scores_total: 8 })
            } else {
                EventKind::Scored { index: i as u32, score: Box::new(setting_score(now as f64 / 3.0)) }
            }
        })
        .collect()
}

fn is_running(r: &Run) -> bool {
    r.state == RunState::Running
}

/// Applies one change to the store and the model and checks they answered alike.
fn step(store: &dyn Storage, model: &mut Model, op: &Op, now: i64) {
    match op {
        Op::PutDataset { content: c, name } => {
            let bytes = content(*c);
            let m = meta(&content_id(*c), NAMES_USED[*name], now, bytes.len() as u64);
            let got = store.put_dataset(m.clone(), &bytes).unwrap();
            let want = match model.datasets.get(&m.id) {
                Some((stored, _)) => PutDataset::Unchanged(stored.clone()),
                None => {
                    let mut m = m;
                    m.version = if m.name.is_empty() {
                        1
                    } else {
                        let v = model.versions.entry(m.name.clone()).or_default();
                        *v += 1;
                        *v
                    };
                    model.datasets.insert(m.id.clone(), (m.clone(), bytes));
                    PutDataset::Created(m)
                }
            };
            assert_eq!(got, want);
        }
        Op::CreateRun { dataset, key, label } => {
            let id = format!("run_{:06}", model.ids.len());
            model.ids.push(id.clone());
            let dataset = model.pick_content(*dataset);
            let ds = model.datasets.get(&content_id(dataset)).map(|d| d.0.clone()).unwrap_or_else(|| meta(&content_id(dataset), "", 0, 0));
            let mut run = Run::queued(id.clone(), &ds, "spoiled".into(), full_spec(now as u64), now);
            if let Some(k) = key {
                run.idempotency_key = Some(format!("key-{k}"));
            }
            if *label {
                run.labels.insert("team".into(), "cold-chain".into());
            }
            let existing = run.idempotency_key.as_ref().and_then(|k| model.idempotency.get(k)).and_then(|id| model.runs.get(id));
            let want = if let Some(r) = existing {
                CreateRun::Existing(r.clone())
            } else if !model.datasets.contains_key(&run.dataset_id) {
                CreateRun::DatasetMissing
            } else {
                model.runs.insert(id.clone(), run.clone());
                model.queue.push(id.clone());
                if key.is_some() {
                    model.idempotency.insert(run.idempotency_key.clone().expect("a key"), id.clone());
                }
                CreateRun::Created(run.clone())
            };
            assert_eq!(store.create_run(run).unwrap(), want);
        }
        Op::Claim => {
            let want = if model.queue.is_empty() {
                None
            } else {
                let id = model.queue.remove(0);
                let run = model.runs.get_mut(&id).unwrap();
                run.start(now, 0, 0);
                Some(run.clone())
            };
            assert_eq!(store.claim_next(now).unwrap(), want);
        }
        Op::Plan { run } => {
            let id = model.pick(*run, is_running);
            if let Some(r) = model.runs.get_mut(&id).filter(|r| r.state == RunState::Running) {
                (r.settings, r.units_total) = (3, 4);
            }
            store.set_plan_size(&id, 3, 4).unwrap();
        }
        Op::RecordUnits { run, units, batch } => {
            let id = model.pick(*run, is_running);
            let handed: Vec<(UnitResult, Vec<EventKind>)> = units.iter().map(|&(unit, events)| (unit_result(unit, now), unit_events(events, now))).collect();
            let mut want: Vec<Event> = Vec::new();
            for (u, kinds) in &handed {
                let fresh = model.runs.get(&id).is_some_and(|r| r.state == RunState::Running) && !model.units.get(&id).is_some_and(|m| m.contains_key(&u.unit));
                if fresh {
                    model.units.entry(id.clone()).or_default().insert(u.unit, u.clone());
                    model.runs.get_mut(&id).unwrap().units_done += 1;
                    let done = model.runs[&id].units_done as usize;
                    let announced = |k: &EventKind| match k {
                        EventKind::Progress(p) => EventKind::Progress(Progress { units_done: done, ..*p }),
                        other => other.clone(),
                    };
                    want.extend(kinds.iter().map(|k| model.append(&id, announced(k), now)));
                }
            }
            let got = if *batch { store.record_units(&id, handed, now).unwrap() } else { store.record_unit(&id, &handed[0].0, handed[0].1.clone(), now).unwrap() };
            assert_same!(got, want);
        }
        Op::Progress { run } => {
            let id = model.pick(*run, is_running);
            let kind = EventKind::Progress(Progress { units_done: 1, units_total: 4, scores_done: 2, scores_total: 8 });
            let want = model.runs.get(&id).filter(|r| r.state == RunState::Running).is_some().then(|| model.append(&id, kind.clone(), now));
            assert_eq!(store.append_event(&id, kind, now).unwrap(), want);
        }
        Op::Finish { run } => {
            let id = model.pick(*run, is_running);
            let o = outcome(None);
            let want = if model.runs.get(&id).is_some_and(|r| r.state == RunState::Running) {
                let e = model.append(&id, EventKind::Finished { picked: 1, best: 0 }, now);
                model.runs.get_mut(&id).unwrap().end(RunState::Finished, now, None);
                model.outcomes.insert(id.clone(), o.clone());
                Some(e)
            } else {
                None
            };
            assert_eq!(store.finish_run(&id, &o, None, now).unwrap(), want);
        }
        Op::End { run, cancel } => {
            let id = model.pick(*run, |r| !r.state.is_terminal());
            let (state, reason) = if *cancel { (RunState::Cancelled, "asked to stop") } else { (RunState::Failed, "fit failed") };
            let want = if model.runs.get(&id).is_some_and(|r| !r.state.is_terminal()) {
                model.queue.retain(|q| *q != id);
                let kind = if *cancel { EventKind::Cancelled(reason.into()) } else { EventKind::Failed(reason.into()) };
                let e = model.append(&id, kind, now);
                let r = model.runs.get_mut(&id).unwrap();
                r.end(state, now, Some(reason));
                Some((r.clone(), e))
            } else {
                None
            };
            assert_eq!(store.end_run(&id, state, reason, now).unwrap(), want);
        }
        Op::DeleteDataset { dataset } => {
            let id = content_id(model.pick_content(*dataset));
            let want = if !model.datasets.contains_key(&id) {
                DeleteDataset::NotFound
            } else if let Some(run_id) = model.oldest_active_of(&id) {
                DeleteDataset::InUse { run_id }
            } else {
                model.datasets.remove(&id);
                DeleteDataset::Deleted
            };
            assert_eq!(store.delete_dataset(&id).unwrap(), want);
        }
        Op::DeleteRun { run } => {
            let id = model.pick(*run, |r| r.state.is_terminal());
            let want = model.runs.get(&id).is_some_and(|r| r.state.is_terminal());
            if want {
                model.runs.remove(&id);
                model.events.remove(&id);
                model.units.remove(&id);
                model.outcomes.remove(&id);
                model.idempotency.retain(|_, v| *v != id);
            }
            assert_eq!(store.delete_run(&id).unwrap(), want);
        }
        Op::Reopen => unreachable!("the caller reopens"),
    }
}

/// Checks every query against the model.
fn check(store: &dyn Storage, model: &Model) {
    for id in &model.ids {
        let want = model.runs.get(id);
        assert_eq!(store.run(id).unwrap().as_ref(), want, "run {id}");
        let events = store.events(id, 0).unwrap();
        assert_same!(events, model.events.get(id).cloned().unwrap_or_default());
        // Gapless from 1, and the run knows the next number.
        assert!(events.iter().enumerate().all(|(i, e)| e.sequence == i as u64 + 1), "sequences of {id}: {events:?}");
        if let Some(r) = want {
            assert_eq!(r.next_sequence, events.len() as u64 + 1);
        }
        let half = events.len() as u64 / 2;
        assert_same!(store.events(id, half).unwrap(), events[half as usize..].to_vec());
        let units = store.units(id).unwrap();
        assert_same!(units, model.units.get(id).map(|m| m.values().cloned().collect::<Vec<_>>()).unwrap_or_default());
        if let Some(r) = want {
            assert_eq!(r.units_done as usize, units.len());
        }
        assert_same!(store.outcome(id).unwrap(), model.outcomes.get(id).cloned());
    }
    // The queue, oldest first (run ids are time-ordered), and every idempotency key the
    // changes use, as the interface answers them.
    let mut queue: Vec<String> = all_runs(store, &RunFilter { state: Some(RunState::Queued), ..RunFilter::default() }).into_iter().map(|r| r.id).collect();
    queue.reverse();
    assert_eq!(queue, model.queue);
    assert_eq!(store.queued_count().unwrap(), model.queue.len());
    for k in 0..KEYS_USED {
        let key = format!("key-{k}");
        let got = store.run_by_idempotency(None, &key).unwrap().map(|r| r.id);
        assert_eq!(got.as_ref(), model.idempotency.get(&key), "{key}");
    }
    let running: Vec<Run> = model.runs.values().filter(|r| r.state == RunState::Running).cloned().collect();
    assert_eq!(store.running_runs().unwrap(), running);
    // Listings, two to a page.
    let newest_first: Vec<Run> = model.runs.values().rev().cloned().collect();
    assert_eq!(all_runs(store, &RunFilter::default()), newest_first);
    for filter in [
        RunFilter { state: Some(RunState::Queued), ..RunFilter::default() },
        RunFilter { label: Some(("team".into(), "cold-chain".into())), created_from: Some(3), created_to: Some(30), ..RunFilter::default() },
        RunFilter { dataset_name: Some("reefer".into()), ..RunFilter::default() },
    ] {
        let want: Vec<Run> = newest_first.iter().filter(|r| filter.admits(r)).cloned().collect();
        assert_eq!(all_runs(store, &filter), want, "{filter:?}");
    }
    for i in 0..CONTENTS {
        let id = content_id(i);
        let want = model.datasets.get(&id);
        assert_eq!(store.dataset(&id).unwrap().as_ref(), want.map(|d| &d.0));
        assert_eq!(store.dataset_bytes(&id).unwrap().as_ref(), want.map(|d| &d.1));
    }
    let mut listed: Vec<DatasetMeta> = model.datasets.values().map(|d| d.0.clone()).collect();
    listed.sort_by(|a, b| b.created_at.cmp(&a.created_at).then(a.id.cmp(&b.id)));
    assert_eq!(all_datasets(store, None), listed);
    for name in NAMES_USED.iter().filter(|n| !n.is_empty()) {
        let mine: Vec<DatasetMeta> = listed.iter().filter(|m| m.name == *name).cloned().collect();
        assert_eq!(all_datasets(store, Some(name)), mine);
        let latest = mine.iter().max_by_key(|m| m.version).cloned();
        assert_eq!(store.latest_dataset(name).unwrap(), latest);
    }
}

fn all_runs(store: &dyn Storage, filter: &RunFilter) -> Vec<Run> {
    let mut out = Vec::new();
    let mut token = None;
    loop {
        let (page, next) = store.list_runs(filter, token.as_deref(), 2).unwrap();
        assert!(page.len() <= 2);
        out.extend(page);
        match next {
            None => return out,
            Some(t) => token = Some(t),
        }
    }
}

fn all_datasets(store: &dyn Storage, name: Option<&str>) -> Vec<DatasetMeta> {
    let mut out = Vec::new();
    let mut token = None;
    loop {
        let (page, next) = store.list_datasets(name, token.as_deref(), 2).unwrap();
        assert!(page.len() <= 2 && (next.is_none() || page.len() == 2));
        out.extend(page);
        match next {
            None => return out,
            Some(t) => token = Some(t),
        }
    }
}

/// Every backend the model test checks: its name, and how to open it on a directory (again
/// after a reopen, with what it held). A new backend adds one line here. PostgreSQL joins
/// when its programs are installed (see `pg`), each directory standing for a database of
/// its own on the throwaway cluster.
fn backends() -> Vec<(&'static str, fn(&Path) -> Box<dyn Storage>)> {
    let mut out: Vec<(&'static str, fn(&Path) -> Box<dyn Storage>)> = vec![("sled", |dir| Box::new(SledStore::open(dir).unwrap()))];
    match pg::available() {
        Ok(_) => out.push(("postgres", |dir| Box::new(PostgresStore::open(&database_for(dir)).unwrap()))),
        Err(why) => eprintln!("the model test skips the postgres backend: {why}"),
    }
    out
}

/// The database standing for a test directory: made on first use, the same one after.
fn database_for(dir: &Path) -> String {
    static MADE: std::sync::Mutex<BTreeMap<PathBuf, String>> = std::sync::Mutex::new(BTreeMap::new());
    let mut made = MADE.lock().unwrap();
    made.entry(dir.to_path_buf()).or_insert_with(|| pg::available().unwrap().fresh_database("model")).clone()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, failure_persistence: None, ..ProptestConfig::default() })]

    #[test]
    fn store_agrees_with_the_model(ops in proptest::collection::vec(op(), 1..64)) {
        for (name, open) in backends() {
            let dir = TempDir::new(&format!("model-{name}"));
            let mut store = open(dir.path());
            let mut model = Model::default();
            for (t, op) in ops.iter().enumerate() {
                if let Op::Reopen = op {
                    // Every handle goes first: a backend may lock its directory.
                    drop(store);
                    store = open(dir.path());
                } else {
                    step(&*store, &mut model, op, t as i64 + 1);
                }
                check(&*store, &model);
            }
            drop(store);
        }
    }
}

// ---------------------------------------------------------------------------------------
// Crash recovery

const CRASH_DIR: &str = "POLLARD_STORE_CRASH_DIR";

/// A fixed sequence of changes touching every tree; returns nothing the caller needs, the
/// store holds it all.
fn crash_script(store: &dyn Storage) {
    let bytes = content(1);
    store.put_dataset(meta("ds_a", "reefer", 1, bytes.len() as u64), &bytes).unwrap();
    store.put_dataset(meta("ds_b", "reefer", 2, 3), b"abc").unwrap();
    let ds = store.dataset("ds_a").unwrap().unwrap();
    for i in 0..4 {
        let mut run = Run::queued(format!("run_{i}"), &ds, "spoiled".into(), full_spec(i), 10 + i as i64);
        run.idempotency_key = Some(format!("key-{i}"));
        assert!(matches!(store.create_run(run).unwrap(), CreateRun::Created(_)));
    }
    let first = store.claim_next(20).unwrap().unwrap();
    store.set_plan_size(&first.id, 3, 2).unwrap();
    for u in 0..2 {
        store.record_unit(&first.id, &unit_result(u, 21 + u as i64), unit_events(3, 21), 21).unwrap();
    }
    store.finish_run(&first.id, &outcome(Some(fitted("iris.csv", Limits { max_depth: Some(2), ..Limits::default() }))), None, 30).unwrap().unwrap();
    let second = store.claim_next(31).unwrap().unwrap();
    store.record_unit(&second.id, &unit_result(1, 32), unit_events(1, 32), 32).unwrap();
    store.end_run("run_2", RunState::Cancelled, "asked to stop", 33).unwrap().unwrap();
    assert_eq!(store.delete_dataset("ds_b").unwrap(), DeleteDataset::Deleted);
    store.append_event(&second.id, EventKind::Progress(Progress { units_done: 1, units_total: 2, scores_done: 3, scores_total: 6 }), 34).unwrap().unwrap();
}

/// Everything the store answers, as text.
fn dump(store: &SledStore) -> String {
    let mut out = String::new();
    let runs = all_runs(store, &RunFilter::default());
    for r in &runs {
        out += &format!("{r:?}\n{:?}\n{:?}\n{:?}\n", store.events(&r.id, 0).unwrap(), store.units(&r.id).unwrap(), store.outcome(&r.id).unwrap());
    }
    out += &format!("{:?}\n", all_datasets(store, None));
    for id in ["ds_a", "ds_b"] {
        out += &format!("{:?}\n", store.dataset_bytes(id).unwrap().map(|b| b.len()));
    }
    out += &format!("{:?}\n{:?}\n", store.latest_dataset("reefer").unwrap(), store.running_runs().unwrap());
    for (t, name) in TREE_NAMES.iter().enumerate() {
        out += &format!("{name} {}\n", store.tree(t).len());
    }
    out
}

/// The child half of `a_crash_keeps_every_returned_change`: runs the script on the store in
/// `$POLLARD_STORE_CRASH_DIR`, then aborts without closing or flushing anything.
#[test]
#[ignore = "run as a child process by a_crash_keeps_every_returned_change"]
fn crash_child() {
    let dir = std::env::var(CRASH_DIR).expect("run by a_crash_keeps_every_returned_change, which sets POLLARD_STORE_CRASH_DIR");
    let store = SledStore::open(Path::new(&dir)).unwrap();
    crash_script(&store);
    println!("script done");
    std::process::abort();
}

#[test]
fn a_crash_keeps_every_returned_change() {
    let dir = TempDir::new("crash");
    let out = std::process::Command::new(std::env::current_exe().unwrap())
        .args(["--exact", "store::tests::crash_child", "--ignored", "--nocapture", "--test-threads=1"])
        .env(CRASH_DIR, dir.path())
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(stdout.contains("script done"), "the child did not finish its script:\n{stdout}\n{}", String::from_utf8_lossy(&out.stderr));
    assert!(!out.status.success(), "the child was meant to abort");
    let crashed = SledStore::open(dir.path()).unwrap();
    let reference = SledStore::open_temporary().unwrap();
    crash_script(&reference);
    let (got, want) = (dump(&crashed), dump(&reference));
    assert_eq!(got, want);
    // The script left one run queued, one running, one finished and one cancelled.
    let states: Vec<RunState> = all_runs(&crashed, &RunFilter::default()).iter().map(|r| r.state).collect();
    assert_eq!(states, [RunState::Queued, RunState::Cancelled, RunState::Running, RunState::Finished]);
}

// ---------------------------------------------------------------------------------------
// A store written by an earlier release

/// Unpacks `tests/fixtures/<name>` (a tar.gz of a `data/` store directory) into `dir` with the
/// system `tar` (no archive crate in the build for one test); returns the store directory.
fn unpack_fixture(name: &str, dir: &TempDir) -> PathBuf {
    let archive = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures").join(name);
    std::fs::create_dir_all(dir.path()).unwrap();
    let status = std::process::Command::new("tar").arg("-xzf").arg(&archive).arg("-C").arg(dir.path()).status().expect("the system tar runs");
    assert!(status.success(), "tar could not unpack {}", archive.display());
    dir.path().join("data")
}

/// What the run listing of `tests/fixtures/store-v1.tar.gz` holds, newest first: id, state,
/// dataset name and version, settings scored, events, drift report, model (see the
/// fixture's README for the commands that wrote it; the counts are what that release showed).
const FIXTURE_RUNS: [(&str, RunState, &str, u32, usize, usize, bool, bool); 7] = [
    ("run_01a23ac1a923776687bfa11b17be88c6", RunState::Finished, "iris", 3, 6, 13, true, true),
    ("run_01a23ac0bec1740f97d958bbd2eec393", RunState::Finished, "iris", 2, 6, 13, true, true),
    ("run_01a23abfd462721bb1d454777baebfbc", RunState::Finished, "iris", 1, 6, 13, false, true),
    ("run_01a23abf461674ecac721ef178c7c4d4", RunState::Cancelled, "iris", 1, 0, 15, false, false),
    ("run_01a23abf2ce276d0aba574167573b53a", RunState::Finished, "diabetes", 1, 60, 86, false, true),
    ("run_01a23abf22527418a966d4303cbb7b23", RunState::Finished, "diabetes", 1, 4, 11, false, false),
    ("run_01a23abf207e728d948ac5b8799386a4", RunState::Finished, "iris", 1, 3, 7, false, true),
];

const FIXTURE_SCHEDULE: &str = "sch_01a23abf570471acb2a122c5a601946a";

/// Every record of the fixture store decodes, through the interface, to what that release
/// stored; so an old store keeps opening after records change.
#[test]
fn fixture_store_of_017cda4_decodes() {
    let dir = TempDir::new("fixture-v1");
    let data = unpack_fixture("store-v1.tar.gz", &dir);
    let sled = SledStore::open(&data).unwrap();
    let store: &dyn Storage = &sled;

    // Datasets, newest first.
    let datasets = all_datasets(store, None);
    let seen: Vec<(&str, u32, u64, Option<Task>)> = datasets.iter().map(|m| (m.name.as_str(), m.version, m.rows, m.task)).collect();
    assert_eq!(seen, [("iris", 3, 100, Some(Task::Classify)), ("iris", 2, 120, Some(Task::Classify)), ("diabetes", 1, 442, Some(Task::Regress)), ("iris", 1, 150, Some(Task::Classify))]);
    for m in &datasets {
        assert_eq!(m.target.as_deref(), Some("target"));
        assert!(m.columns.iter().all(|c| c.kind == ColumnKind::Numeric && c.missing == 0), "{:?}", m.columns);
        let bytes = store.dataset_bytes(&m.id).unwrap().unwrap();
        assert_eq!(bytes.len() as u64, m.bytes, "{}", m.id);
    }
    assert_eq!(datasets[2].columns.len(), 10);
    assert_eq!(store.latest_dataset("iris").unwrap().map(|m| m.version), Some(3));

    // Runs, newest first, with their events, units and outcomes.
    let runs = all_runs(store, &RunFilter::default());
    assert_eq!(runs.len(), FIXTURE_RUNS.len());
    for (run, &(id, state, name, version, scores, events, drift, model)) in runs.iter().zip(FIXTURE_RUNS.iter()) {
        assert_eq!((run.id.as_str(), run.state, run.dataset_name.as_str(), run.dataset_version), (id, state, name, version));
        assert_eq!(run.target, "target");
        let stored_events = store.events(id, 0).unwrap();
        assert_eq!(stored_events.len(), events, "{id}");
        assert_eq!(run.next_sequence, events as u64 + 1, "{id}");
        assert!(stored_events.last().unwrap().is_terminal(), "{id}");
        assert_eq!(store.units(id).unwrap().len() as u32, run.units_done, "{id}");
        assert_eq!(run.drift.is_some(), drift, "{id}");
        match store.outcome(id).unwrap() {
            Some(o) => {
                assert_eq!(o.scores.len(), scores, "{id}");
                assert_eq!(o.model.is_some(), model, "{id}");
            }
            None => assert_eq!((state, scores, model), (RunState::Cancelled, 0, false), "{id}"),
        }
    }
    let by_id = |id: &str| runs.iter().find(|r| r.id == id).unwrap();
    let first = by_id("run_01a23abf207e728d948ac5b8799386a4");
    assert_eq!(first.idempotency_key.as_deref(), Some("fx-iris"));
    assert_eq!(first.labels.get("fixture").map(String::as_str), Some("classify"));
    assert_eq!(first.spec.seed, 7);
    assert_eq!((first.reason.as_deref(), first.schedule_id.as_deref(), first.owner.as_deref()), (None, None, None));
    let no_refit = by_id("run_01a23abf22527418a966d4303cbb7b23");
    assert!(!no_refit.spec.fit_final);
    assert_eq!(no_refit.spec.metric, Some(Metric::Rmse));
    let cancelled = by_id("run_01a23abf461674ecac721ef178c7c4d4");
    assert_eq!((cancelled.reason.as_deref(), cancelled.units_done, cancelled.units_total), (Some("cancelled by request"), 14, 50));
    assert!(matches!(store.events(&cancelled.id, 0).unwrap().last().unwrap().kind, EventKind::Cancelled(ref r) if r == "cancelled by request"));
    for r in &runs[..3] {
        assert_eq!(r.schedule_id.as_deref(), Some(FIXTURE_SCHEDULE));
    }
    // The third scheduled run (on iris v3, two classes) moved max_depth from 2 to 1.
    let drift = runs[0].drift.as_ref().unwrap();
    assert_eq!(drift.previous_run_id, runs[1].id);
    assert_eq!((drift.previous_version, drift.version, drift.previous_rows, drift.rows), (2, 3, 120, 100));
    let moves: Vec<(Knob, &str, &str)> = drift.moved.iter().map(|m| (m.limit, m.from.as_str(), m.to.as_str())).collect();
    assert_eq!(moves, [(Knob::MaxDepth, "2", "1")]);
    assert!(drift.picked_changed && !drift.score_fell && !drift.flagged());
    assert!(runs[1].drift.as_ref().unwrap().moved.is_empty());

    // The schedule and its fires.
    let s = store.schedule(FIXTURE_SCHEDULE).unwrap().unwrap();
    assert_eq!((s.name.as_str(), s.cron.as_str(), s.time_zone.as_str(), s.dataset_name.as_str()), ("fixture-nightly", "* * * * *", "UTC", "iris"));
    assert_eq!((s.dataset_id.as_deref(), s.catch_up, s.paused, s.skip_unchanged), (None, CatchUp::Skip, false, false));
    assert_eq!(s.retention, Retention { keep_last: Some(5), keep_days: None });
    assert_eq!((s.last_run_id.as_deref(), s.last_dataset_id.as_deref(), s.next_fire_sequence), (Some(runs[0].id.as_str()), Some(runs[0].dataset_id.as_str()), 4));
    assert_eq!(s.labels.get("fixture").map(String::as_str), Some("schedule"));
    assert_eq!(store.all_schedules().unwrap().len(), 1);
    let (fires, more) = store.fires(FIXTURE_SCHEDULE, None, 10).unwrap();
    assert!(more.is_none());
    let fired: Vec<(u64, FireOutcome, &str)> = fires.iter().map(|f| (f.sequence, f.outcome, f.run_id.as_deref().unwrap_or(""))).collect();
    assert_eq!(fired, [(3, FireOutcome::Started, runs[0].id.as_str()), (2, FireOutcome::Started, runs[1].id.as_str()), (1, FireOutcome::Started, runs[2].id.as_str())]);
    assert!(fires.iter().all(|f| f.scheduled_for % 60_000 == 0 && f.missed == 0));
    assert_eq!(store.queued_count().unwrap(), 0);
    assert!(store.running_runs().unwrap().is_empty());
}

// ---------------------------------------------------------------------------------------
// The PostgreSQL test harness

#[test]
fn the_throwaway_cluster_serves_fresh_databases() {
    let Ok(cluster) = pg::available().map_err(|why| eprintln!("skipped: {why}")) else { return };
    let a = cluster.fresh_database("harness a");
    let b = cluster.fresh_database("harness b");
    assert_ne!(a, b);
    let name = a.rsplit('/').next().unwrap();
    assert_eq!(cluster.sql(name, "SELECT current_user").trim(), pg::ROLE);
    // The server never runs as root.
    let status = std::fs::read_to_string(format!("/proc/{}/status", cluster.pid)).unwrap();
    let uid = status.lines().find_map(|l| l.strip_prefix("Uid:")).and_then(|l| l.split_whitespace().next()).unwrap();
    assert_ne!(uid, "0", "the server runs as root");
}

#[test]
fn replicas_starting_together_migrate_once() {
    let Ok(cluster) = pg::available().map_err(|why| eprintln!("skipped: {why}")) else { return };
    let url = cluster.fresh_database("migrate");
    let opened: Vec<PostgresStore> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..3).map(|_| s.spawn(|| PostgresStore::open(&url).unwrap())).collect();
        handles.into_iter().map(|h| h.join().unwrap()).collect()
    });
    let name = url.rsplit('/').next().unwrap();
    let versions = cluster.sql(name, "SELECT string_agg(version::text, ',' ORDER BY version) FROM pollard_migrations");
    let want: Vec<String> = postgres::migrate::MIGRATIONS.iter().map(|m| m.0.to_string()).collect();
    assert_eq!(versions.trim(), want.join(","));
    // A database that a newer build migrated is refused, naming the versions.
    cluster.sql(name, "INSERT INTO pollard_migrations (version, name) VALUES (9999, 'from the future')");
    drop(opened);
    let e = PostgresStore::open(&url).err().expect("a newer schema is refused");
    assert!(matches!(&e, StoreError::Corrupt(m) if m.contains("9999")), "{e}");
}

/// A schedule as the scheduler's tests make it: nightly at 03:00 UTC on `reefer`.
fn schedule(id: &str, created_at: i64) -> Schedule {
    Schedule {
        id: id.into(),
        name: "nightly".into(),
        cron: "0 3 * * *".into(),
        time_zone: "UTC".into(),
        dataset_name: "reefer".into(),
        dataset_id: None,
        target: "spoiled".into(),
        spec: full_spec(3),
        labels: BTreeMap::from([("team".to_string(), "cold-chain".to_string())]),
        retention: Retention { keep_last: Some(2), keep_days: None },
        catch_up: CatchUp::Once,
        skip_unchanged: false,
        drift: crate::drift::DriftThresholds::default(),
        paused: false,
        created_at,
        considered_until: created_at,
        last_run_id: None,
        last_dataset_id: None,
        next_fire_sequence: 1,
    }
}

/// A fire as the scheduler drafts it before the store numbers it.
fn draft_fire(at: i64) -> Fire {
    Fire { sequence: 0, scheduled_for: at, handled_at: at + 1, outcome: FireOutcome::Started, run_id: Default::default(), missed: 0, detail: Default::default() }
}

/// Schedules and fires through every operation; returns each answer, to compare backends.
fn schedule_script(store: &dyn Storage) -> Vec<String> {
    let mut out = Vec::new();
    let mut say = |what: &str, answer: String| out.push(format!("{what}: {answer}"));
    let ds = match store.put_dataset(meta("ds_sched", "reefer", 1, 24), &content(0)).unwrap() {
        PutDataset::Created(m) => m,
        other => panic!("{other:?}"),
    };
    for i in 0..3 {
        say("create", format!("{:?}", store.create_schedule(&schedule(&format!("sch_{i:03}"), 10 + i)).unwrap()));
    }
    say("create again", format!("{:?}", store.create_schedule(&schedule("sch_001", 99)).unwrap()));
    say("get", format!("{:?}", store.schedule("sch_001").unwrap()));
    say("get unknown", format!("{:?}", store.schedule("sch_999").unwrap()));
    let (page1, token) = store.list_schedules(None, 2).unwrap();
    say("page 1", format!("{:?} {token:?}", page1.iter().map(|s| &s.id).collect::<Vec<_>>()));
    say("page 2", format!("{:?}", store.list_schedules(token.as_deref(), 2).unwrap().0.iter().map(|s| &s.id).collect::<Vec<_>>()));
    say("all", format!("{:?}", store.all_schedules().unwrap().iter().map(|s| &s.id).collect::<Vec<_>>()));
    let run = |n: u32, at: i64| {
        let mut r = Run::queued(format!("run_{n:06}"), &ds, "spoiled".into(), full_spec(4), at);
        r.schedule_id = Some("sch_000".into());
        r.idempotency_key = Some(format!("sch_000@{at}"));
        r
    };
    // A fire that starts a run; one whose considered_until is stale; one while the run is busy.
    say("fire 1", format!("{:?}", store.record_fire("sch_000", 10, 100, &draft_fire(100), Some(&run(1, 100))).unwrap()));
    say("fire stale", format!("{:?}", store.record_fire("sch_000", 10, 200, &draft_fire(200), Some(&run(2, 200))).unwrap()));
    say("fire busy", format!("{:?}", store.record_fire("sch_000", 100, 200, &draft_fire(200), Some(&run(2, 200))).unwrap()));
    say("claim", format!("{:?}", store.claim_next(201).unwrap().map(|r| r.id)));
    say("finish", format!("{:?}", store.finish_run("run_000001", &outcome(None), None, 202).unwrap()));
    // The same fire instant again (a second scheduler): the idempotency key names the run.
    say("fire again", format!("{:?}", store.record_fire("sch_000", 200, 300, &draft_fire(100), Some(&run(1, 100))).unwrap()));
    say("fire new", format!("{:?}", store.record_fire("sch_000", 300, 400, &draft_fire(400), Some(&run(3, 400))).unwrap()));
    say("fire without run", format!("{:?}", store.record_fire("sch_000", 400, 500, &draft_fire(500), None).unwrap()));
    say("paused", format!("{:?}", store.update_schedule("sch_000", &|s| s.paused = true).unwrap()));
    say("fire paused", format!("{:?}", store.record_fire("sch_000", 500, 600, &draft_fire(600), None).unwrap()));
    say("update unknown", format!("{:?}", store.update_schedule("sch_999", &|s| s.paused = true).unwrap()));
    let (fires, token) = store.fires("sch_000", None, 2).unwrap();
    say("fires 1", format!("{fires:?} {token:?}"));
    let token: Option<u64> = token.map(|t| t.parse().unwrap());
    say("fires 2", format!("{:?}", store.fires("sch_000", token, 2).unwrap()));
    say("fires of another", format!("{:?}", store.fires("sch_001", None, 5).unwrap()));
    // A fire whose dataset was deleted meanwhile fails, and says so.
    say("delete run", format!("{:?}", store.delete_run("run_000001").unwrap()));
    say("fire on sch_002", format!("{:?}", store.record_fire("sch_002", 12, 700, &draft_fire(700), Some(&Run::queued("run_000009".into(), &meta("ds_gone", "", 1, 1), "spoiled".into(), full_spec(4), 700))).unwrap()));
    say("delete", format!("{:?}", store.delete_schedule("sch_000").unwrap()));
    say("delete again", format!("{:?}", store.delete_schedule("sch_000").unwrap()));
    say("fires of deleted", format!("{:?}", store.fires("sch_000", None, 5).unwrap()));
    say("runs stay", format!("{:?}", store.list_runs(&RunFilter::default(), None, 10).unwrap().0.iter().map(|r| (&r.id, r.state)).collect::<Vec<_>>()));
    out
}

#[test]
fn schedules_and_fires_answer_alike_on_every_backend() {
    let mut answers: Vec<(&str, Vec<String>)> = Vec::new();
    for (name, open) in backends() {
        let dir = TempDir::new(&format!("schedules-{name}"));
        let store = open(dir.path());
        answers.push((name, schedule_script(&*store)));
    }
    let (first, want) = &answers[0];
    // The script checks itself on the first backend: the changes happened as intended.
    assert!(want.iter().any(|a| a.starts_with("fire busy") && a.contains("SkippedBusy")), "{want:#?}");
    assert!(want.iter().any(|a| a.starts_with("fire stale: None")));
    assert!(want.iter().any(|a| a.starts_with("fire on sch_002") && a.contains("Failed")), "{want:#?}");
    for (name, got) in &answers[1..] {
        for (w, g) in want.iter().zip(got) {
            assert_eq!(g, w, "{name} answers unlike {first}");
        }
        assert_eq!(got.len(), want.len());
    }
}

// ---------------------------------------------------------------------------------------
// Work claimed unit by unit

/// A worker's log for the claim tests: what it learned of others' units, and a progress
/// event per unit it stores.
#[derive(Default)]
struct TestLog {
    learned: std::sync::Mutex<Vec<usize>>,
}

impl UnitLog for TestLog {
    fn learn(&self, others: Vec<UnitResult>) {
        self.learned.lock().unwrap().extend(others.iter().map(|u| u.unit));
    }

    fn announce(&self, _unit: &UnitResult, units_done: u32) -> Vec<EventKind> {
        vec![EventKind::Progress(Progress { units_done: units_done as usize, units_total: 6, scores_done: 0, scores_total: 12 })]
    }
}

/// A running run of 6 units in `store`.
fn planned_run(store: &dyn Storage) -> String {
    store.put_dataset(meta("ds_1", "", 0, 0), b"x").unwrap();
    store.create_run(Run::queued("run_0001".into(), &meta("ds_1", "", 0, 0), "y".into(), SweepSpec::default(), 1)).unwrap();
    let run = store.claim_next(2).unwrap().unwrap();
    store.set_plan_size(&run.id, 2, 6).unwrap();
    run.id
}

/// One process owns a sled store: every unit not stored is its to compute, at once, and the
/// writer of the last unit is told so.
#[test]
fn a_store_one_process_owns_hands_out_every_unit_left() {
    let store = SledStore::open_temporary().unwrap();
    let id = planned_run(&store);
    let log = TestLog::default();
    assert_eq!(store.claim_units(&id, 6, 2).unwrap(), (0..6).collect::<Vec<_>>());
    let first = store.record_computed(&id, vec![unit_result(1, 10), unit_result(4, 10)], 0, &log, 10).unwrap();
    assert_eq!((first.stored, first.units_done, first.running, first.stored_last(6)), (2, 2, true, false));
    assert_eq!(store.claim_units(&id, 6, 2).unwrap(), vec![0, 2, 3, 5]);
    // A unit stored already is refused.
    assert_eq!(store.record_computed(&id, vec![unit_result(1, 11)], 0, &log, 11).unwrap().stored, 0);
    let last = store.record_computed(&id, [0, 2, 3, 5].into_iter().map(|u| unit_result(u, 12)).collect(), 0, &log, 12).unwrap();
    assert!(last.stored_last(6));
    let progress: Vec<usize> = store.events(&id, 0).unwrap().iter().filter_map(|e| match &e.kind {
        EventKind::Progress(p) => Some(p.units_done),
        _ => None,
    }).collect();
    assert_eq!(progress, (1..=6).collect::<Vec<_>>());
    assert!(store.claim_units(&id, 6, 2).unwrap().is_empty());
    assert!(store.join_running(&[]).unwrap().is_none());
}

/// Two replicas on one database: claims are disjoint, a second writer of a unit is refused
/// (its events too), an expired claim goes to the other replica, a replica learns the units
/// the other stored, and exactly one change stores the last unit.
#[test]
fn replicas_claim_units_apart_and_take_over_expired_claims() {
    let Some(url) = pg::fresh_database("unit claims") else { return };
    let a = PostgresStore::open_with_lease(&url, std::time::Duration::from_millis(300)).unwrap();
    let b = PostgresStore::open_with_lease(&url, std::time::Duration::from_secs(30)).unwrap();
    let id = planned_run(&a);
    let (log_a, log_b) = (TestLog::default(), TestLog::default());
    assert_eq!(a.claim_units(&id, 6, 4).unwrap(), vec![0, 1, 2, 3]);
    assert_eq!(b.claim_units(&id, 6, 4).unwrap(), vec![4, 5]);
    assert!(b.claim_units(&id, 6, 4).unwrap().is_empty(), "claimed units were handed out twice");
    assert_eq!(b.join_running(&[]).unwrap(), None, "a run with every unit claimed is not joined");
    let first = a.record_computed(&id, vec![unit_result(0, 10)], 0, &log_a, 10).unwrap();
    assert_eq!((first.stored, first.units_done, first.events.len()), (1, 1, 1));
    // b computed unit 0 too (say its claim had expired): refused, nothing announced.
    let twice = b.record_computed(&id, vec![unit_result(0, 11)], 0, &log_b, 11).unwrap();
    assert_eq!((twice.stored, twice.events.len(), twice.units_done), (0, 0, 1));
    assert_eq!(*log_b.learned.lock().unwrap(), vec![0], "b learns the unit a stored");
    // a stops renewing: its claims on 1..3 expire and go to b.
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(30);
    let taken = loop {
        let got = b.claim_units(&id, 6, 10).unwrap();
        if !got.is_empty() {
            break got;
        }
        assert!(std::time::Instant::now() < deadline, "a's claims never expired");
        // A poll interval, not a wait for its own sake.
        std::thread::sleep(std::time::Duration::from_millis(20));
    };
    assert_eq!(taken, vec![1, 2, 3]);
    let mid = b.record_computed(&id, vec![unit_result(4, 12), unit_result(1, 12)], twice.units_done, &log_b, 12).unwrap();
    assert_eq!((mid.stored, mid.units_done, mid.stored_last(6)), (2, 3, false));
    let last = b.record_computed(&id, vec![unit_result(2, 13), unit_result(3, 13), unit_result(5, 13)], mid.units_done, &log_b, 13).unwrap();
    assert_eq!((last.stored, last.units_done, last.stored_last(6)), (3, 6, true));
    assert_eq!(*log_b.learned.lock().unwrap(), vec![0], "b learns nothing it stored itself");
    // a's late copy of unit 1 is refused.
    assert_eq!(a.record_computed(&id, vec![unit_result(1, 14)], first.units_done, &log_a, 14).unwrap().stored, 0);
    assert_eq!(a.units(&id).unwrap().len(), 6);
    let name = url.rsplit('/').next().unwrap();
    let cluster = pg::available().unwrap();
    let rows = cluster.sql(name, &format!("SELECT string_agg(unit::text || ':' || (CASE worker WHEN '{}' THEN 'a' WHEN '{}' THEN 'b' ELSE '?' END) || ':' || stored_seq::text, ',' ORDER BY unit) FROM units", a.worker(), b.worker()));
    assert_eq!(rows.trim(), "0:a:1,1:b:3,2:b:4,3:b:5,4:b:2,5:b:6", "each unit's worker and stored order");
}

/// A run that was running before units were claimed one by one has no claims: its next
/// plan lays out the units it still needs (not those stored), and it finishes; a plan of a
/// run whose claims are laid out adds none.
#[test]
fn a_run_planned_before_unit_claims_gets_claims_for_the_units_it_lacks() {
    let Some(url) = pg::fresh_database("claims after upgrade") else { return };
    let a = PostgresStore::open(&url).unwrap();
    let id = planned_run(&a);
    let log = TestLog::default();
    assert_eq!(a.claim_units(&id, 6, 2).unwrap(), vec![0, 1]);
    let first = a.record_computed(&id, vec![unit_result(0, 10), unit_result(1, 10)], 0, &log, 10).unwrap();
    assert_eq!(first.stored, 2);
    // As an older release left it: units stored, no claims at all.
    let name = url.rsplit('/').next().unwrap();
    let cluster = pg::available().unwrap();
    cluster.sql(name, "DELETE FROM unit_claims");
    a.set_plan_size(&id, 2, 6).unwrap();
    assert_eq!(a.claim_units(&id, 6, 10).unwrap(), vec![2, 3, 4, 5], "the units not stored are laid out again");
    // Planned again while those are claimed: nothing is laid out twice.
    a.set_plan_size(&id, 2, 6).unwrap();
    assert!(a.claim_units(&id, 6, 10).unwrap().is_empty());
    let last = a.record_computed(&id, (2..6).map(|u| unit_result(u, 11)).collect(), first.units_done, &log, 11).unwrap();
    assert_eq!((last.stored, last.units_done, last.stored_last(6)), (4, 6, true));
    a.set_plan_size(&id, 2, 6).unwrap();
    assert!(a.claim_units(&id, 6, 10).unwrap().is_empty(), "a run with every unit stored has nothing to claim");
}

// ---------------------------------------------------------------------------------------
// TLS to the database

/// A certificate authority (PEM) and a server certificate with its key (PEM) for
/// 127.0.0.1 that it signed.
fn test_ca(name: &str) -> (String, String, String) {
    use rcgen::{BasicConstraints, CertificateParams, DnType, IsCa, Issuer, KeyPair};
    let ca_key = KeyPair::generate().unwrap();
    let mut ca = CertificateParams::new(Vec::<String>::new()).unwrap();
    ca.is_ca = IsCa::Ca(BasicConstraints::Unconstrained);
    ca.distinguished_name.push(DnType::CommonName, name);
    let ca_pem = ca.self_signed(&ca_key).unwrap().pem();
    let issuer = Issuer::new(ca, ca_key);
    let key = KeyPair::generate().unwrap();
    let server = CertificateParams::new(vec!["127.0.0.1".to_string()]).unwrap().signed_by(&key, &issuer).unwrap();
    (ca_pem, server.pem(), key.serialize_pem())
}

/// `sslmode=require` connects over TLS, verifying the database's certificate against
/// `database_ca_file`: the server sees only TLS connections from the store, a CA that did
/// not sign the certificate is refused, and a URL asking for TLS without a CA file (or a
/// CA file without TLS) is refused with a message naming the setting.
#[test]
fn sslmode_require_connects_over_verified_tls() {
    let Some(cluster) = pg::own_cluster() else { return };
    let (ca, cert, key) = test_ca("database test CA");
    cluster.serve_tls(&cert, &key);
    let dir = TempDir::new("db-tls");
    std::fs::create_dir_all(dir.path()).unwrap();
    let (ca_file, other_file) = (dir.path().join("ca.pem"), dir.path().join("other.pem"));
    std::fs::write(&ca_file, &ca).unwrap();
    std::fs::write(&other_file, test_ca("another CA").0).unwrap();
    let url = format!("{}?sslmode=require", cluster.fresh_database("tls"));
    let lease = std::time::Duration::from_secs(15);

    let store = PostgresStore::open_with(&url, lease, Some(&ca_file)).unwrap();
    store.put_dataset(meta("ds_1", "reefer", 0, 5), b"hello").unwrap();
    assert_eq!(store.dataset_bytes("ds_1").unwrap().unwrap(), b"hello");
    let name = url.rsplit('/').next().unwrap().split('?').next().unwrap();
    let seen = cluster.sql(name, "SELECT count(*) FILTER (WHERE s.ssl), count(*) FROM pg_stat_ssl s JOIN pg_stat_activity a USING (pid) WHERE a.application_name = 'pollard'");
    let (tls, all) = seen.trim().split_once('|').unwrap();
    assert!(all.parse::<u32>().unwrap() > 0 && tls == all, "store connections over TLS / all: {seen}");
    drop(store);

    let wrong = PostgresStore::open_with(&url, lease, Some(&other_file)).err().expect("a CA that did not sign the certificate is refused");
    assert!(matches!(&wrong, StoreError::Unavailable(m) if m.contains("TLS")), "{wrong}");
    let no_ca = PostgresStore::open_with(&url, lease, None).err().expect("sslmode=require needs a CA file");
    assert!(matches!(&no_ca, StoreError::Io(m) if m.contains("database_ca_file")), "{no_ca}");
    let plain = url.trim_end_matches("?sslmode=require");
    let stray = PostgresStore::open_with(plain, lease, Some(&ca_file)).err().expect("a CA file without sslmode=require is refused");
    assert!(matches!(&stray, StoreError::Io(m) if m.contains("sslmode=require")), "{stray}");
}
