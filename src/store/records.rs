//! Stored bytes <-> domain values: the one place that decides how a value looks on disk.
//!
//! Every record is one format byte ([`FORMAT`]) followed by a JSON document of an explicit
//! record struct below; the domain types carry no serde derives, so the layout changes only
//! here and only on purpose. A later release that changes a record adds a new format byte
//! and keeps reading the old one; a byte this build does not know is an error naming it.
//!
//! Numbers: every `f64` is written as a JSON *string* holding Rust's shortest round-trip
//! form (`"0.1"`, `"1e-300"`, `"NaN"`, `"inf"`, `"-inf"`). JSON has no NaN or infinity, and
//! a JSON number reads back exactly only when serde_json's `float_roundtrip` feature is on
//! (its default parser may land one unit in the last place off), while `str::parse::<f64>`
//! is always correctly rounded: strings give back the very same bits (NaN payloads aside)
//! whatever features the build enables.
//! Enumerations are stored by their `as_str` names, so reordering a Rust enum changes nothing.
//!
//! The model tree of a [`RunOutcome`] is stored as its `pollard.model` text
//! ([`crate::export::json`]), the format that owns trees.

use std::collections::BTreeMap;
use std::fmt;

use serde::de::DeserializeOwned;
use serde::{Deserialize, Deserializer, Serialize, Serializer};

use super::StoreError;
use crate::data::{ColumnKind, Task};
use crate::export::json::{from_json, to_json};
use crate::drift::{DriftReport, DriftThresholds, Knob, LimitMove};
use crate::job::{ColumnMeta, DatasetMeta, Event, EventKind, Fire, FireOutcome, Retention, Run, RunOutcome, RunState, Schedule};
use crate::schedule::CatchUp;
use crate::sweep::{FoldPlan, FoldScheme, FoldScore, Metric, NestedResult, OuterFold, PermutationImportance, PickRule, Progress, Range, Setting, SettingScore, SweepSpec, UnitResult};
use crate::tree::{ClassWeight, Criterion, FitOptions, Limits, Monotone, Splitter};

/// The format byte this build writes (and the only one it reads).
pub const FORMAT: u8 = 1;

/// Encodes a record: the format byte, then JSON.
pub fn encode<R: Serialize>(record: &R) -> Vec<u8> {
    let mut out = vec![FORMAT];
    serde_json::to_writer(&mut out, record).expect("records serialise: string keys, no failing serialisers");
    out
}

/// Decodes a record; `what` names the record kind in errors ("run", "event", …).
pub fn decode<R: DeserializeOwned>(what: &str, bytes: &[u8]) -> Result<R, StoreError> {
    match bytes.split_first() {
        None => Err(StoreError::Corrupt(format!("{what} record is empty (no format byte)"))),
        Some((&FORMAT, json)) => serde_json::from_slice(json).map_err(|e| StoreError::Corrupt(format!("{what} record (format {FORMAT}) does not parse: {e}"))),
        Some((&other, _)) => Err(StoreError::Corrupt(format!("{what} record has unknown format byte {other} (this build reads format {FORMAT})"))),
    }
}

fn corrupt(what: &str, message: impl fmt::Display) -> StoreError {
    StoreError::Corrupt(format!("{what} record: {message}"))
}

/// An `f64` stored exactly, NaN and infinities included (see the module notes).
#[derive(Clone, Copy, Debug)]
pub struct Real(pub f64);

impl Serialize for Real {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let x = self.0;
        // Display never uses an exponent, which makes 1e300 three hundred digits long.
        let plain = x.to_string();
        if plain.len() <= 24 {
            s.serialize_str(&plain)
        } else {
            s.serialize_str(&format!("{x:e}"))
        }
    }
}

impl<'de> Deserialize<'de> for Real {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        let text = String::deserialize(d)?;
        text.parse::<f64>().map(Real).map_err(|_| serde::de::Error::custom(format!("'{text}' is not a number")))
    }
}

fn reals(v: &[f64]) -> Vec<Real> {
    v.iter().map(|&x| Real(x)).collect()
}

fn unreal(v: &[Real]) -> Vec<f64> {
    v.iter().map(|r| r.0).collect()
}

fn parse_name<T>(what: &str, field: &str, text: &str, parse: impl Fn(&str) -> Option<T>) -> Result<T, StoreError> {
    parse(text).ok_or_else(|| corrupt(what, format!("{field} '{text}' is not known to this build")))
}

/// A stored string where "" stands for none (the record formats have always written it so).
use crate::job::given as some;

fn to_usize(what: &str, field: &str, x: u64) -> Result<usize, StoreError> {
    usize::try_from(x).map_err(|_| corrupt(what, format!("{field} {x} does not fit this machine")))
}

// ---------------------------------------------------------------------------------------
// Datasets

#[derive(Serialize, Deserialize)]
pub struct DatasetRecord {
    id: String,
    /// Absent in records written before versions followed names: their id is `ds_` + the
    /// content hash then.
    #[serde(default, skip_serializing_if = "String::is_empty")]
    content: String,
    name: String,
    version: u32,
    rows: u64,
    columns: Vec<ColumnRecord>,
    target: String,
    task: String,
    created_at: i64,
    bytes: u64,
    categorical: Vec<String>,
}

#[derive(Serialize, Deserialize)]
struct ColumnRecord {
    name: String,
    kind: String,
    missing: u64,
    levels: u64,
}

impl From<&DatasetMeta> for DatasetRecord {
    fn from(m: &DatasetMeta) -> Self {
        DatasetRecord {
            id: m.id.clone(),
            content: m.content.clone(),
            name: m.name.clone(),
            version: m.version,
            rows: m.rows,
            columns: m.columns.iter().map(|c| ColumnRecord { name: c.name.clone(), kind: c.kind.as_str().to_string(), missing: c.missing, levels: c.levels }).collect(),
            target: m.target.clone().unwrap_or_default(),
            task: m.task.map(|t| t.as_str().to_string()).unwrap_or_default(),
            created_at: m.created_at,
            bytes: m.bytes,
            categorical: m.categorical.clone(),
        }
    }
}

/// `task` is "" for a dataset without a target (`None`), as written since the first format.
impl TryFrom<DatasetRecord> for DatasetMeta {
    type Error = StoreError;
    fn try_from(r: DatasetRecord) -> Result<Self, StoreError> {
        let w = "dataset";
        Ok(DatasetMeta {
            content: if r.content.is_empty() { r.id.strip_prefix("ds_").unwrap_or(&r.id).to_string() } else { r.content },
            id: r.id,
            name: r.name,
            version: r.version,
            rows: r.rows,
            columns: r
                .columns
                .into_iter()
                .map(|c| Ok(ColumnMeta { kind: parse_name(w, "column kind", &c.kind, ColumnKind::parse)?, name: c.name, missing: c.missing, levels: c.levels }))
                .collect::<Result<_, StoreError>>()?,
            // "" stands for none in the stored record, as it always did.
            target: some(r.target),
            task: if r.task.is_empty() { None } else { Some(parse_name(w, "task", &r.task, Task::parse)?) },
            created_at: r.created_at,
            bytes: r.bytes,
            categorical: r.categorical,
        })
    }
}

// ---------------------------------------------------------------------------------------
// Sweep specs

#[derive(Serialize, Deserialize)]
pub struct SpecRecord {
    task: Option<String>,
    criteria: Vec<String>,
    class_weights: Vec<String>,
    max_depth: Option<RangeRecord>,
    min_split_rows: Option<RangeRecord>,
    min_leaf_rows: Option<RangeRecord>,
    max_leaves: Option<RangeRecord>,
    min_gain: Option<RangeRecord>,
    prune_alpha: Option<RangeRecord>,
    prune_path: bool,
    folds: Option<FoldPlanRecord>,
    metric: Option<String>,
    pick: String,
    seed: u64,
    fit_final: bool,
    max_settings: Option<u64>,
    /// Absent in records written before the binned splitter, and for the exact one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    splitter: Option<String>,
    /// Absent in records written before nested sweeps, and for plain sweeps.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    outer: Option<FoldPlanRecord>,
    /// Monotone limits by feature name; absent when none is set and in records written
    /// before them.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    monotone: Vec<MonotoneRecord>,
    /// Decision costs `[false_alarm, miss]`; absent in records written before them, and
    /// for sweeps without costs.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    costs: Option<[f64; 2]>,
}

#[derive(Serialize, Deserialize)]
struct MonotoneRecord {
    feature: String,
    /// `Monotone::as_str`.
    direction: String,
}

#[derive(Serialize, Deserialize)]
#[serde(tag = "range", rename_all = "snake_case")]
enum RangeRecord {
    /// `null` entries mean "no limit".
    Values { values: Vec<Option<Real>> },
    Span { from: Real, to: Real, step: Real },
    LogSpan { from: Real, to: Real, count: u32 },
}

#[derive(Serialize, Deserialize)]
struct FoldPlanRecord {
    /// `FoldPlan::scheme_name`.
    scheme: String,
    /// The column of `grouped`, `forward` and `given` plans; absent otherwise.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    column: Option<String>,
    k: u32,
    repeats: u32,
}

impl From<&Range> for RangeRecord {
    fn from(r: &Range) -> Self {
        match r {
            Range::Values(v) => RangeRecord::Values { values: v.iter().map(|x| x.map(Real)).collect() },
            Range::Span { from, to, step } => RangeRecord::Span { from: Real(*from), to: Real(*to), step: Real(*step) },
            Range::LogSpan { from, to, count } => RangeRecord::LogSpan { from: Real(*from), to: Real(*to), count: *count },
        }
    }
}

impl From<RangeRecord> for Range {
    fn from(r: RangeRecord) -> Self {
        match r {
            RangeRecord::Values { values } => Range::Values(values.into_iter().map(|x| x.map(|r| r.0)).collect()),
            RangeRecord::Span { from, to, step } => Range::Span { from: from.0, to: to.0, step: step.0 },
            RangeRecord::LogSpan { from, to, count } => Range::LogSpan { from: from.0, to: to.0, count },
        }
    }
}

impl From<&FoldPlan> for FoldPlanRecord {
    fn from(p: &FoldPlan) -> Self {
        FoldPlanRecord { scheme: p.scheme_name().to_string(), column: p.column().map(str::to_string), k: p.k, repeats: p.repeats }
    }
}

impl TryFrom<FoldPlanRecord> for FoldPlan {
    type Error = StoreError;
    fn try_from(r: FoldPlanRecord) -> Result<Self, StoreError> {
        let column = |scheme: &str| r.column.clone().ok_or_else(|| corrupt("run", format!("a {scheme} fold plan without its column")));
        let scheme = match r.scheme.as_str() {
            "shuffled" => FoldScheme::Shuffled,
            "stratified" => FoldScheme::Stratified,
            "grouped" => FoldScheme::Grouped { column: column("grouped")? },
            "forward" => FoldScheme::Forward { column: column("forward")? },
            "given" => FoldScheme::Given { column: column("given")? },
            other => return Err(corrupt("run", format!("fold scheme '{other}' is not known to this build"))),
        };
        Ok(FoldPlan { scheme, k: r.k, repeats: r.repeats })
    }
}

impl From<&SweepSpec> for SpecRecord {
    fn from(s: &SweepSpec) -> Self {
        let range = |r: &Option<Range>| r.as_ref().map(RangeRecord::from);
        SpecRecord {
            task: s.task.map(|t| t.as_str().to_string()),
            criteria: s.criteria.iter().map(|c| c.as_str().to_string()).collect(),
            class_weights: s.class_weights.iter().map(|w| w.as_str().to_string()).collect(),
            max_depth: range(&s.max_depth),
            min_split_rows: range(&s.min_split_rows),
            min_leaf_rows: range(&s.min_leaf_rows),
            max_leaves: range(&s.max_leaves),
            min_gain: range(&s.min_gain),
            prune_alpha: range(&s.prune_alpha),
            prune_path: s.prune_path,
            folds: s.folds.as_ref().map(FoldPlanRecord::from),
            metric: s.metric.map(|m| m.as_str().to_string()),
            pick: s.pick.as_str().to_string(),
            seed: s.seed,
            fit_final: s.fit_final,
            max_settings: s.max_settings.map(|n| n as u64),
            splitter: splitter_record(s.splitter),
            outer: s.outer.as_ref().map(FoldPlanRecord::from),
            monotone: s.monotone.iter().map(|(f, m)| MonotoneRecord { feature: f.clone(), direction: m.as_str().to_string() }).collect(),
            costs: s.costs.map(|c| [c.false_alarm, c.miss]),
        }
    }
}

impl TryFrom<SpecRecord> for SweepSpec {
    type Error = StoreError;
    fn try_from(r: SpecRecord) -> Result<Self, StoreError> {
        let w = "run";
        Ok(SweepSpec {
            task: r.task.map(|t| parse_name(w, "task", &t, Task::parse)).transpose()?,
            criteria: r.criteria.iter().map(|c| parse_name(w, "criterion", c, Criterion::parse)).collect::<Result<_, _>>()?,
            class_weights: r.class_weights.iter().map(|c| parse_name(w, "class weight", c, ClassWeight::parse)).collect::<Result<_, _>>()?,
            max_depth: r.max_depth.map(Range::from),
            min_split_rows: r.min_split_rows.map(Range::from),
            min_leaf_rows: r.min_leaf_rows.map(Range::from),
            max_leaves: r.max_leaves.map(Range::from),
            min_gain: r.min_gain.map(Range::from),
            prune_alpha: r.prune_alpha.map(Range::from),
            prune_path: r.prune_path,
            folds: r.folds.map(FoldPlan::try_from).transpose()?,
            metric: r.metric.map(|m| parse_name(w, "metric", &m, Metric::parse)).transpose()?,
            pick: parse_name(w, "pick rule", &r.pick, PickRule::parse)?,
            seed: r.seed,
            fit_final: r.fit_final,
            max_settings: r.max_settings.map(|n| to_usize(w, "max_settings", n)).transpose()?,
            splitter: splitter_of(w, r.splitter)?,
            outer: r.outer.map(FoldPlan::try_from).transpose()?,
            monotone: r.monotone.iter().map(|m| Ok((m.feature.clone(), parse_name(w, "monotone limit", &m.direction, Monotone::parse)?))).collect::<Result<_, StoreError>>()?,
            costs: r.costs.map(|[false_alarm, miss]| crate::sweep::costs::Costs { false_alarm, miss }),
        })
    }
}

// ---------------------------------------------------------------------------------------
// Runs

#[derive(Serialize, Deserialize)]
pub struct RunRecord {
    id: String,
    state: String,
    dataset_id: String,
    dataset_name: String,
    dataset_version: u32,
    /// Absent in records written before drift reports existed.
    #[serde(default)]
    dataset_rows: u64,
    target: String,
    spec: SpecRecord,
    labels: BTreeMap<String, String>,
    idempotency_key: String,
    /// Absent in records written before owners were recorded.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    owner: Option<String>,
    #[serde(default, skip_serializing_if = "String::is_empty")]
    request_digest: String,
    schedule_id: String,
    created_at: i64,
    started_at: Option<i64>,
    finished_at: Option<i64>,
    reason: String,
    settings: u32,
    units_total: u32,
    units_done: u32,
    next_sequence: u64,
    #[serde(default)]
    drift: Option<DriftRecord>,
    /// Absent in records written before memory estimates and crash strikes existed.
    #[serde(default)]
    memory_estimate: u64,
    #[serde(default)]
    units_at_start: Option<u32>,
    #[serde(default)]
    crash_strikes: u32,
}

impl From<&Run> for RunRecord {
    fn from(r: &Run) -> Self {
        RunRecord {
            id: r.id.clone(),
            state: r.state.as_str().to_string(),
            dataset_id: r.dataset_id.clone(),
            dataset_name: r.dataset_name.clone(),
            dataset_version: r.dataset_version,
            dataset_rows: r.dataset_rows,
            target: r.target.clone(),
            spec: SpecRecord::from(&r.spec),
            labels: r.labels.clone(),
            idempotency_key: r.idempotency_key.clone().unwrap_or_default(),
            owner: r.owner.clone(),
            request_digest: r.request_digest.clone().unwrap_or_default(),
            schedule_id: r.schedule_id.clone().unwrap_or_default(),
            created_at: r.created_at,
            started_at: r.started_at,
            finished_at: r.finished_at,
            reason: r.reason.clone().unwrap_or_default(),
            settings: r.settings,
            units_total: r.units_total,
            units_done: r.units_done,
            next_sequence: r.next_sequence,
            drift: r.drift.as_ref().map(DriftRecord::from),
            memory_estimate: r.memory_estimate,
            units_at_start: r.units_at_start,
            crash_strikes: r.crash_strikes,
        }
    }
}

impl TryFrom<RunRecord> for Run {
    type Error = StoreError;
    fn try_from(r: RunRecord) -> Result<Self, StoreError> {
        Ok(Run {
            state: parse_name("run", "state", &r.state, RunState::parse)?,
            spec: SweepSpec::try_from(r.spec)?,
            id: r.id,
            dataset_id: r.dataset_id,
            dataset_name: r.dataset_name,
            dataset_version: r.dataset_version,
            dataset_rows: r.dataset_rows,
            target: r.target,
            labels: r.labels,
            // "" stands for none in the stored record, as it always did.
            idempotency_key: some(r.idempotency_key),
            owner: r.owner,
            request_digest: some(r.request_digest),
            schedule_id: some(r.schedule_id),
            created_at: r.created_at,
            started_at: r.started_at,
            finished_at: r.finished_at,
            reason: some(r.reason),
            settings: r.settings,
            units_total: r.units_total,
            units_done: r.units_done,
            next_sequence: r.next_sequence,
            drift: r.drift.map(DriftReport::try_from).transpose()?,
            memory_estimate: r.memory_estimate,
            units_at_start: r.units_at_start,
            crash_strikes: r.crash_strikes,
        })
    }
}

#[derive(Serialize, Deserialize)]
struct DriftRecord {
    previous_run_id: String,
    moved: Vec<[String; 3]>,
    previous_score: Real,
    score: Real,
    score_delta: Real,
    score_delta_se: Real,
    previous_dataset_id: String,
    dataset_id: String,
    previous_version: u32,
    version: u32,
    previous_rows: u64,
    rows: u64,
    previous_leaves: Real,
    leaves: Real,
    score_fell: bool,
    tree_grew: bool,
    tree_shrank: bool,
    score_drop: Real,
    size_factor: Real,
}

impl From<&DriftReport> for DriftRecord {
    fn from(d: &DriftReport) -> Self {
        DriftRecord {
            previous_run_id: d.previous_run_id.clone(),
            moved: d.moved.iter().map(|m| [m.limit.as_str().to_string(), m.from.clone(), m.to.clone()]).collect(),
            previous_score: Real(d.previous_score),
            score: Real(d.score),
            score_delta: Real(d.score_delta),
            score_delta_se: Real(d.score_delta_se),
            previous_dataset_id: d.previous_dataset_id.clone(),
            dataset_id: d.dataset_id.clone(),
            previous_version: d.previous_version,
            version: d.version,
            previous_rows: d.previous_rows,
            rows: d.rows,
            previous_leaves: Real(d.previous_leaves),
            leaves: Real(d.leaves),
            score_fell: d.score_fell,
            tree_grew: d.tree_grew,
            tree_shrank: d.tree_shrank,
            score_drop: Real(d.thresholds.score_drop),
            size_factor: Real(d.thresholds.size_factor),
        }
    }
}

impl TryFrom<DriftRecord> for DriftReport {
    type Error = StoreError;
    fn try_from(d: DriftRecord) -> Result<Self, StoreError> {
        Ok(DriftReport {
            picked_changed: !d.moved.is_empty(),
            moved: d
                .moved
                .into_iter()
                .map(|[limit, from, to]| Ok(LimitMove { limit: parse_name("run", "drift move", &limit, Knob::parse)?, from, to }))
                .collect::<Result<_, StoreError>>()?,
            previous_run_id: d.previous_run_id,
            previous_score: d.previous_score.0,
            score: d.score.0,
            score_delta: d.score_delta.0,
            score_delta_se: d.score_delta_se.0,
            previous_dataset_id: d.previous_dataset_id,
            dataset_id: d.dataset_id,
            previous_version: d.previous_version,
            version: d.version,
            previous_rows: d.previous_rows,
            rows: d.rows,
            previous_leaves: d.previous_leaves.0,
            leaves: d.leaves.0,
            score_fell: d.score_fell,
            tree_grew: d.tree_grew,
            tree_shrank: d.tree_shrank,
            thresholds: DriftThresholds { score_drop: d.score_drop.0, size_factor: d.size_factor.0 },
        })
    }
}

// ---------------------------------------------------------------------------------------
// Schedules and their fires

#[derive(Serialize, Deserialize)]
pub struct ScheduleRecord {
    id: String,
    name: String,
    cron: String,
    time_zone: String,
    dataset_name: String,
    #[serde(default)]
    dataset_id: String,
    target: String,
    spec: SpecRecord,
    labels: BTreeMap<String, String>,
    keep_last: Option<u32>,
    keep_days: Option<u32>,
    catch_up: String,
    skip_unchanged: bool,
    score_drop: Real,
    size_factor: Real,
    paused: bool,
    created_at: i64,
    considered_until: i64,
    last_run_id: String,
    last_dataset_id: String,
    next_fire_sequence: u64,
}

impl From<&Schedule> for ScheduleRecord {
    fn from(s: &Schedule) -> Self {
        ScheduleRecord {
            id: s.id.clone(),
            name: s.name.clone(),
            cron: s.cron.clone(),
            time_zone: s.time_zone.clone(),
            dataset_name: s.dataset_name.clone(),
            dataset_id: s.dataset_id.clone().unwrap_or_default(),
            target: s.target.clone(),
            spec: SpecRecord::from(&s.spec),
            labels: s.labels.clone(),
            keep_last: s.retention.keep_last,
            keep_days: s.retention.keep_days,
            catch_up: s.catch_up.as_str().to_string(),
            skip_unchanged: s.skip_unchanged,
            score_drop: Real(s.drift.score_drop),
            size_factor: Real(s.drift.size_factor),
            paused: s.paused,
            created_at: s.created_at,
            considered_until: s.considered_until,
            last_run_id: s.last_run_id.clone().unwrap_or_default(),
            last_dataset_id: s.last_dataset_id.clone().unwrap_or_default(),
            next_fire_sequence: s.next_fire_sequence,
        }
    }
}

impl TryFrom<ScheduleRecord> for Schedule {
    type Error = StoreError;
    fn try_from(r: ScheduleRecord) -> Result<Self, StoreError> {
        Ok(Schedule {
            spec: SweepSpec::try_from(r.spec)?,
            id: r.id,
            name: r.name,
            cron: r.cron,
            time_zone: r.time_zone,
            dataset_name: r.dataset_name,
            // "" stands for none in stored schedules, as it always did.
            dataset_id: some(r.dataset_id),
            target: r.target,
            labels: r.labels,
            retention: Retention { keep_last: r.keep_last, keep_days: r.keep_days },
            // "" never was written; read as the default rule, as the scheduler always did.
            catch_up: if r.catch_up.is_empty() { CatchUp::Once } else { parse_name("schedule", "catch_up", &r.catch_up, CatchUp::parse)? },
            skip_unchanged: r.skip_unchanged,
            drift: DriftThresholds { score_drop: r.score_drop.0, size_factor: r.size_factor.0 },
            paused: r.paused,
            created_at: r.created_at,
            considered_until: r.considered_until,
            last_run_id: some(r.last_run_id),
            last_dataset_id: some(r.last_dataset_id),
            next_fire_sequence: r.next_fire_sequence,
        })
    }
}

#[derive(Serialize, Deserialize)]
pub struct FireRecord {
    sequence: u64,
    scheduled_for: i64,
    handled_at: i64,
    outcome: String,
    run_id: String,
    missed: u64,
    detail: String,
}

impl From<&Fire> for FireRecord {
    fn from(f: &Fire) -> Self {
        FireRecord {
            sequence: f.sequence,
            scheduled_for: f.scheduled_for,
            handled_at: f.handled_at,
            outcome: f.outcome.as_str().to_string(),
            run_id: f.run_id.clone().unwrap_or_default(),
            missed: f.missed,
            detail: f.detail.clone().unwrap_or_default(),
        }
    }
}

impl TryFrom<FireRecord> for Fire {
    type Error = StoreError;
    fn try_from(r: FireRecord) -> Result<Self, StoreError> {
        Ok(Fire {
            outcome: parse_name("fire", "outcome", &r.outcome, FireOutcome::parse)?,
            sequence: r.sequence,
            scheduled_for: r.scheduled_for,
            handled_at: r.handled_at,
            // "" stands for none in the stored record, as it always did.
            run_id: some(r.run_id),
            missed: r.missed,
            detail: some(r.detail),
        })
    }
}

// ---------------------------------------------------------------------------------------
// Events

#[derive(Serialize, Deserialize)]
pub struct EventRecord {
    sequence: u64,
    at: i64,
    #[serde(flatten)]
    kind: EventKindRecord,
}

#[derive(Serialize, Deserialize)]
#[serde(tag = "kind", rename_all = "snake_case")]
enum EventKindRecord {
    Progress { units_done: u64, units_total: u64, scores_done: u64, scores_total: u64 },
    /// `index` into the plan's settings, with that setting's score.
    Scored { index: u32, score: SettingScoreRecord },
    Finished { picked: u32, best: u32 },
    Failed { reason: String },
    Cancelled { reason: String },
}

impl From<&Event> for EventRecord {
    fn from(e: &Event) -> Self {
        let kind = match &e.kind {
            EventKind::Progress(p) => EventKindRecord::Progress {
                units_done: p.units_done as u64,
                units_total: p.units_total as u64,
                scores_done: p.scores_done as u64,
                scores_total: p.scores_total as u64,
            },
            EventKind::Scored { index, score } => EventKindRecord::Scored { index: *index, score: SettingScoreRecord::from(&**score) },
            EventKind::Finished { picked, best } => EventKindRecord::Finished { picked: *picked, best: *best },
            EventKind::Failed(reason) => EventKindRecord::Failed { reason: reason.clone() },
            EventKind::Cancelled(reason) => EventKindRecord::Cancelled { reason: reason.clone() },
        };
        EventRecord { sequence: e.sequence, at: e.at, kind }
    }
}

impl TryFrom<EventRecord> for Event {
    type Error = StoreError;
    fn try_from(r: EventRecord) -> Result<Self, StoreError> {
        let n = |field: &str, x: u64| to_usize("event", field, x);
        let kind = match r.kind {
            EventKindRecord::Progress { units_done, units_total, scores_done, scores_total } => EventKind::Progress(Progress {
                units_done: n("units_done", units_done)?,
                units_total: n("units_total", units_total)?,
                scores_done: n("scores_done", scores_done)?,
                scores_total: n("scores_total", scores_total)?,
            }),
            EventKindRecord::Scored { index, score } => EventKind::Scored { index, score: Box::new(SettingScore::try_from(score)?) },
            EventKindRecord::Finished { picked, best } => EventKind::Finished { picked, best },
            EventKindRecord::Failed { reason } => EventKind::Failed(reason),
            EventKindRecord::Cancelled { reason } => EventKind::Cancelled(reason),
        };
        Ok(Event { sequence: r.sequence, at: r.at, kind })
    }
}

// ---------------------------------------------------------------------------------------
// Work units

#[derive(Serialize, Deserialize)]
pub struct UnitRecord {
    unit: u64,
    scores: Vec<UnitScoreRecord>,
}

#[derive(Serialize, Deserialize)]
struct UnitScoreRecord {
    /// Index into the plan's settings.
    setting: u64,
    valid: Real,
    train: Real,
    leaves: u32,
    depth: u32,
}

impl From<&UnitResult> for UnitRecord {
    fn from(u: &UnitResult) -> Self {
        UnitRecord {
            unit: u.unit as u64,
            scores: u
                .scores
                .iter()
                .map(|(s, f)| UnitScoreRecord { setting: *s as u64, valid: Real(f.valid), train: Real(f.train), leaves: f.leaves, depth: f.depth })
                .collect(),
        }
    }
}

impl TryFrom<UnitRecord> for UnitResult {
    type Error = StoreError;
    fn try_from(r: UnitRecord) -> Result<Self, StoreError> {
        let scores = r
            .scores
            .into_iter()
            .map(|s| Ok((to_usize("unit", "setting", s.setting)?, FoldScore { valid: s.valid.0, train: s.train.0, leaves: s.leaves, depth: s.depth })))
            .collect::<Result<_, StoreError>>()?;
        Ok(UnitResult { unit: to_usize("unit", "unit", r.unit)?, scores })
    }
}

// ---------------------------------------------------------------------------------------
// Outcomes

#[derive(Serialize, Deserialize)]
pub struct OutcomeRecord {
    scores: Vec<SettingScoreRecord>,
    picked: u32,
    best: u32,
    /// The `pollard.model` JSON text of the refit tree.
    model: Option<String>,
    fold_assignment: Vec<Vec<i32>>,
    /// Absent in records written before nested sweeps, and for plain sweeps.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    nested: Option<NestedRecord>,
    /// Permutation importance (absent in records written before it was computed).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    permutation: Option<PermutationRecord>,
}

#[derive(Serialize, Deserialize)]
struct NestedRecord {
    folds: Vec<OuterFoldRecord>,
    outer_mean: Real,
    outer_sd: Real,
    optimism: Real,
}

#[derive(Serialize, Deserialize)]
struct OuterFoldRecord {
    repeat: u32,
    fold: u32,
    picked: u64,
    inner_best: Real,
    inner_picked: Real,
    outer_score: Real,
    leaves: u32,
}

impl From<&NestedResult> for NestedRecord {
    fn from(n: &NestedResult) -> Self {
        NestedRecord {
            folds: n
                .folds
                .iter()
                .map(|f| OuterFoldRecord {
                    repeat: f.repeat,
                    fold: f.fold,
                    picked: f.picked as u64,
                    inner_best: Real(f.inner_best),
                    inner_picked: Real(f.inner_picked),
                    outer_score: Real(f.outer_score),
                    leaves: f.leaves,
                })
                .collect(),
            outer_mean: Real(n.outer_mean),
            outer_sd: Real(n.outer_sd),
            optimism: Real(n.optimism),
        }
    }
}

impl TryFrom<NestedRecord> for NestedResult {
    type Error = StoreError;
    fn try_from(r: NestedRecord) -> Result<Self, StoreError> {
        let folds = r
            .folds
            .into_iter()
            .map(|f| {
                Ok(OuterFold {
                    repeat: f.repeat,
                    fold: f.fold,
                    picked: to_usize("outcome", "nested.picked", f.picked)?,
                    inner_best: f.inner_best.0,
                    inner_picked: f.inner_picked.0,
                    outer_score: f.outer_score.0,
                    leaves: f.leaves,
                })
            })
            .collect::<Result<_, StoreError>>()?;
        Ok(NestedResult { folds, outer_mean: r.outer_mean.0, outer_sd: r.outer_sd.0, optimism: r.optimism.0 })
    }
}

#[derive(Serialize, Deserialize)]
struct PermutationRecord {
    features: Vec<String>,
    repeats: u32,
    /// Per split, per feature column: the mean drop over the repeats.
    per_fold: Vec<Vec<Real>>,
}

#[derive(Serialize, Deserialize)]
struct SettingScoreRecord {
    key: u64,
    options: FitOptionsRecord,
    fold_scores: Vec<Real>,
    valid_mean: Real,
    valid_sd: Real,
    train_mean: Real,
    gap: Real,
    mean_leaves: Real,
    mean_depth: Real,
}

#[derive(Serialize, Deserialize)]
struct FitOptionsRecord {
    max_depth: Option<u32>,
    min_split_rows: u32,
    min_leaf_rows: u32,
    max_leaves: Option<u32>,
    min_gain: Real,
    prune_alpha: Real,
    /// `None`: the task's default.
    criterion: Option<String>,
    class_weight: String,
    /// Absent in records written before the binned splitter, and for the exact one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    splitter: Option<String>,
    /// Per feature (`free`, `increasing`, `decreasing`); absent when no feature is limited
    /// and in records written before monotone limits.
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    monotone: Vec<String>,
}

impl From<&FitOptions> for FitOptionsRecord {
    fn from(o: &FitOptions) -> Self {
        let l = &o.limits;
        FitOptionsRecord {
            max_depth: l.max_depth,
            min_split_rows: l.min_split_rows,
            min_leaf_rows: l.min_leaf_rows,
            max_leaves: l.max_leaves,
            min_gain: Real(l.min_gain),
            prune_alpha: Real(l.prune_alpha),
            criterion: o.criterion.map(|c| c.as_str().to_string()),
            class_weight: o.class_weight.as_str().to_string(),
            splitter: splitter_record(o.splitter),
            monotone: o.monotone.iter().map(|m| m.as_str().to_string()).collect(),
        }
    }
}

impl TryFrom<FitOptionsRecord> for FitOptions {
    type Error = StoreError;
    fn try_from(r: FitOptionsRecord) -> Result<Self, StoreError> {
        Ok(FitOptions {
            limits: Limits {
                max_depth: r.max_depth,
                min_split_rows: r.min_split_rows,
                min_leaf_rows: r.min_leaf_rows,
                max_leaves: r.max_leaves,
                min_gain: r.min_gain.0,
                prune_alpha: r.prune_alpha.0,
            },
            criterion: r.criterion.map(|c| parse_name("outcome", "criterion", &c, Criterion::parse)).transpose()?,
            class_weight: parse_name("outcome", "class weight", &r.class_weight, ClassWeight::parse)?,
            splitter: splitter_of("outcome", r.splitter)?,
            monotone: r.monotone.iter().map(|m| parse_name("outcome", "monotone limit", m, Monotone::parse)).collect::<Result<_, _>>()?,
        })
    }
}

/// The stored name of a splitter: none for the exact one, so its records are as before.
fn splitter_record(s: Splitter) -> Option<String> {
    (s != Splitter::Exact).then(|| s.as_str().to_string())
}

/// A stored splitter name; absent means exact (records written before it existed).
fn splitter_of(what: &str, name: Option<String>) -> Result<Splitter, StoreError> {
    match name {
        None => Ok(Splitter::Exact),
        Some(n) => parse_name(what, "splitter", &n, Splitter::parse),
    }
}

impl From<&SettingScore> for SettingScoreRecord {
    fn from(s: &SettingScore) -> Self {
        SettingScoreRecord {
            key: s.setting.key as u64,
            options: FitOptionsRecord::from(&s.setting.options),
            fold_scores: reals(&s.fold_scores),
            valid_mean: Real(s.valid_mean),
            valid_sd: Real(s.valid_sd),
            train_mean: Real(s.train_mean),
            gap: Real(s.gap),
            mean_leaves: Real(s.mean_leaves),
            mean_depth: Real(s.mean_depth),
        }
    }
}

impl TryFrom<SettingScoreRecord> for SettingScore {
    type Error = StoreError;
    fn try_from(s: SettingScoreRecord) -> Result<Self, StoreError> {
        Ok(SettingScore {
            setting: Setting { key: to_usize("setting score", "key", s.key)?, options: FitOptions::try_from(s.options)? },
            fold_scores: unreal(&s.fold_scores),
            valid_mean: s.valid_mean.0,
            valid_sd: s.valid_sd.0,
            train_mean: s.train_mean.0,
            gap: s.gap.0,
            mean_leaves: s.mean_leaves.0,
            mean_depth: s.mean_depth.0,
        })
    }
}

impl From<&RunOutcome> for OutcomeRecord {
    fn from(o: &RunOutcome) -> Self {
        OutcomeRecord {
            scores: o.scores.iter().map(SettingScoreRecord::from).collect(),
            picked: o.picked,
            best: o.best,
            model: o.model.as_ref().map(to_json),
            fold_assignment: o.fold_assignment.clone(),
            nested: o.nested.as_ref().map(NestedRecord::from),
            permutation: o.permutation.as_ref().map(|p| PermutationRecord { features: p.features.clone(), repeats: p.repeats, per_fold: p.per_fold.iter().map(|f| reals(f)).collect() }),
        }
    }
}

impl TryFrom<OutcomeRecord> for RunOutcome {
    type Error = StoreError;
    fn try_from(r: OutcomeRecord) -> Result<Self, StoreError> {
        let scores = r.scores.into_iter().map(SettingScore::try_from).collect::<Result<_, StoreError>>()?;
        let model = r.model.map(|text| from_json(&text).map_err(|e| corrupt("outcome", format!("model: {e}")))).transpose()?;
        let nested = r.nested.map(NestedResult::try_from).transpose()?;
        if let Some(p) = r.permutation.as_ref().filter(|p| p.per_fold.iter().any(|f| f.len() != p.features.len())) {
            return Err(corrupt("outcome", format!("permutation importance has a fold without one value per feature ({} features)", p.features.len())));
        }
        let permutation = r.permutation.map(|p| PermutationImportance { features: p.features, repeats: p.repeats, per_fold: p.per_fold.iter().map(|f| unreal(f)).collect() });
        Ok(RunOutcome { scores, picked: r.picked, best: r.best, model, fold_assignment: r.fold_assignment, nested, permutation })
    }
}

// ---------------------------------------------------------------------------------------
// Store-internal records

/// The fields of a run that change with every finished unit, stored apart from the run
/// record so a unit does not rewrite the whole run (labels, spec and all).
#[derive(Serialize, Deserialize, Clone, Copy, Debug, PartialEq, Eq)]
pub struct ProgressRecord {
    pub units_done: u32,
    pub next_sequence: u64,
}

/// The active (queued or running) runs that hold a dataset, so deleting it can be refused.
#[derive(Serialize, Deserialize, Default)]
pub struct HoldsRecord {
    pub runs: Vec<String>,
}

// ---------------------------------------------------------------------------------------
// Typed shortcuts used by the store

pub fn encode_dataset(m: &DatasetMeta) -> Vec<u8> {
    encode(&DatasetRecord::from(m))
}
pub fn decode_dataset(bytes: &[u8]) -> Result<DatasetMeta, StoreError> {
    decode::<DatasetRecord>("dataset", bytes).and_then(DatasetMeta::try_from)
}
pub fn encode_run(r: &Run) -> Vec<u8> {
    encode(&RunRecord::from(r))
}
pub fn decode_run(bytes: &[u8]) -> Result<Run, StoreError> {
    decode::<RunRecord>("run", bytes).and_then(Run::try_from)
}
pub fn encode_event(e: &Event) -> Vec<u8> {
    encode(&EventRecord::from(e))
}
pub fn decode_event(bytes: &[u8]) -> Result<Event, StoreError> {
    decode::<EventRecord>("event", bytes).and_then(Event::try_from)
}
pub fn encode_unit(u: &UnitResult) -> Vec<u8> {
    encode(&UnitRecord::from(u))
}
pub fn decode_unit(bytes: &[u8]) -> Result<UnitResult, StoreError> {
    decode::<UnitRecord>("unit", bytes).and_then(UnitResult::try_from)
}
pub fn encode_outcome(o: &RunOutcome) -> Vec<u8> {
    encode(&OutcomeRecord::from(o))
}
pub fn decode_outcome(bytes: &[u8]) -> Result<RunOutcome, StoreError> {
    decode::<OutcomeRecord>("outcome", bytes).and_then(RunOutcome::try_from)
}
pub fn encode_progress(p: &ProgressRecord) -> Vec<u8> {
    encode(p)
}
pub fn decode_progress(bytes: &[u8]) -> Result<ProgressRecord, StoreError> {
    decode("run progress", bytes)
}
pub fn encode_holds(h: &HoldsRecord) -> Vec<u8> {
    encode(h)
}
pub fn decode_holds(bytes: &[u8]) -> Result<HoldsRecord, StoreError> {
    decode("dataset holds", bytes)
}
pub fn encode_schedule(s: &Schedule) -> Vec<u8> {
    encode(&ScheduleRecord::from(s))
}
pub fn decode_schedule(bytes: &[u8]) -> Result<Schedule, StoreError> {
    decode::<ScheduleRecord>("schedule", bytes).and_then(Schedule::try_from)
}
pub fn encode_fire(f: &Fire) -> Vec<u8> {
    encode(&FireRecord::from(f))
}
pub fn decode_fire(bytes: &[u8]) -> Result<Fire, StoreError> {
    decode::<FireRecord>("fire", bytes).and_then(Fire::try_from)
}
