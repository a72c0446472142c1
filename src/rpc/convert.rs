//! The one place where protobuf messages and core values meet, both ways.

use chrono::{DateTime, SecondsFormat, Utc};
use tonic::Status;

use crate::data::{Column, ColumnKind, Feature, Frame, Task, MISSING_CODE};
use crate::drift::{DriftReport, DriftThresholds};
use crate::job::{given, DatasetMeta, Event, EventKind, Fire, FireOutcome, Retention, Run, RunOutcome, RunState, Schedule};
use crate::schedule::CatchUp;
use crate::pb;
use crate::rpc::error::{echo, ServiceError};
use crate::service::models::RowPath;
use crate::service::{DatasetRef, RunRequest, SchemeDefaults};
use crate::sweep::costs::Costs;
use crate::sweep::{FoldPlan, FoldScheme, Metric, PickRule, Range, SettingScore, SweepSpec};
use crate::tree::{ClassWeight, ColumnInfo, Criterion, Decision, FitOptions, Limits, Monotone, Node, Split, SplitRule, Splitter, Tree, NO_NODE};

fn invalid(field: &str, message: impl std::fmt::Display) -> Status {
    ServiceError::invalid(field, message.to_string()).into()
}

/// Unix milliseconds as RFC 3339 in UTC.
pub fn time(ms: i64) -> String {
    DateTime::<Utc>::from_timestamp_millis(ms).map(|t| t.to_rfc3339_opts(SecondsFormat::Millis, true)).unwrap_or_default()
}

pub fn opt_time(ms: Option<i64>) -> String {
    ms.map(time).unwrap_or_default()
}

/// RFC 3339 to Unix milliseconds; empty means none.
pub fn parse_time(field: &str, s: &str) -> Result<Option<i64>, Status> {
    if s.is_empty() {
        return Ok(None);
    }
    DateTime::parse_from_rfc3339(s).map(|t| Some(t.timestamp_millis())).map_err(|e| invalid(field, format!("'{s}' is not an RFC 3339 time ({e})")))
}

// ------------------------------------------------------------------ datasets

pub fn dataset_info(m: &DatasetMeta) -> pb::DatasetInfo {
    pb::DatasetInfo {
        id: m.id.clone(),
        name: m.name.clone(),
        version: m.version,
        sha256: m.content.clone(),
        unchanged: false,
        rows: m.rows,
        columns: m
            .columns
            .iter()
            .map(|c| pb::ColumnSummary {
                name: c.name.clone(),
                kind: if c.kind == ColumnKind::Categorical { pb::ColumnKind::Categorical } else { pb::ColumnKind::Numeric } as i32,
                missing: c.missing,
                levels: c.levels,
            })
            .collect(),
        target: m.target.clone().unwrap_or_default(),
        task: m.task.map(|t| t.as_str().to_string()).unwrap_or_default(),
        created_at: time(m.created_at),
        bytes: m.bytes,
    }
}

/// Writes a columnar table as CSV (the stored form of every dataset), checking its shape.
pub fn table_to_csv(table: &pb::Table) -> Result<Vec<u8>, Status> {
    if table.columns.is_empty() {
        return Err(invalid("table.columns", "the table has no columns"));
    }
    let rows = cell_count(&table.columns[0]);
    for (i, c) in table.columns.iter().enumerate() {
        if c.name.trim().is_empty() {
            return Err(invalid(&format!("table.columns[{i}].name"), "is empty"));
        }
        if c.cells.is_none() {
            return Err(invalid(&format!("table.columns[{i}]"), format!("column '{}' has neither numbers nor texts", c.name)));
        }
        if cell_count(c) != rows {
            return Err(invalid(&format!("table.columns[{i}]"), format!("column '{}' has {} cells, column '{}' has {rows}", c.name, cell_count(c), table.columns[0].name)));
        }
        let (n_missing, n_cells) = match &c.cells {
            Some(pb::table_column::Cells::Numbers(n)) => (n.missing.len(), n.values.len()),
            Some(pb::table_column::Cells::Texts(t)) => (t.missing.len(), t.values.len()),
            None => (0, 0),
        };
        if n_missing != 0 && n_missing != n_cells {
            return Err(invalid(&format!("table.columns[{i}].missing"), format!("has {n_missing} flags for {n_cells} cells")));
        }
    }
    let mut w = csv::Writer::from_writer(Vec::new());
    let header: Vec<&str> = table.columns.iter().map(|c| c.name.as_str()).collect();
    w.write_record(&header).map_err(|e| Status::internal(e.to_string()))?;
    let mut record: Vec<String> = Vec::with_capacity(header.len());
    for r in 0..rows {
        record.clear();
        for (ci, c) in table.columns.iter().enumerate() {
            record.push(match &c.cells {
                Some(pb::table_column::Cells::Numbers(n)) => {
                    let v = n.values[r];
                    if n.missing.get(r).copied().unwrap_or(false) || v.is_nan() {
                        String::new()
                    } else if !v.is_finite() {
                        return Err(invalid(&format!("table.columns[{ci}]"), format!("row {}, column '{}': {v} is not a finite number", r + 1, c.name)));
                    } else {
                        format!("{v}")
                    }
                }
                Some(pb::table_column::Cells::Texts(t)) => {
                    if t.missing.get(r).copied().unwrap_or(false) {
                        String::new()
                    } else {
                        t.values[r].clone()
                    }
                }
                None => unreachable!("checked above"),
            });
        }
        // In a table of one column an empty cell would be a blank line, which the CSV reader
        // skips: the row would be lost. `NA` reads back as the same missing cell.
        if record.len() == 1 && record[0].trim_ascii().is_empty() {
            record[0] = "NA".into();
        }
        w.write_record(&record).map_err(|e| Status::internal(e.to_string()))?;
    }
    w.into_inner().map_err(|e| Status::internal(e.to_string()))
}

fn cell_count(c: &pb::TableColumn) -> usize {
    match &c.cells {
        Some(pb::table_column::Cells::Numbers(n)) => n.values.len(),
        Some(pb::table_column::Cells::Texts(t)) => t.values.len(),
        None => 0,
    }
}

/// A table's columns laid out as a tree's features, for prediction. Unseen categories get
/// a code past the dictionary, which prediction routes like missing cells.
pub fn table_to_frame(table: &pb::Table, columns: &[ColumnInfo]) -> Result<Frame, Status> {
    let mut features = Vec::with_capacity(columns.len());
    let mut rows = None;
    for info in columns {
        let Some(c) = table.columns.iter().find(|c| c.name == info.name) else {
            return Err(invalid("rows.columns", format!("the model needs column '{}', which the table does not have", info.name)));
        };
        let n = cell_count(c);
        if *rows.get_or_insert(n) != n {
            return Err(invalid("rows.columns", format!("column '{}' has {n} cells, the others {}", c.name, rows.unwrap())));
        }
        let column = match (info.kind, &c.cells) {
            (ColumnKind::Numeric, Some(pb::table_column::Cells::Numbers(v))) => Column::Numeric(
                v.values.iter().enumerate().map(|(i, &x)| if v.missing.get(i).copied().unwrap_or(false) { f32::NAN } else { x as f32 }).collect(),
            ),
            (ColumnKind::Categorical, Some(pb::table_column::Cells::Texts(t))) => Column::Categorical {
                codes: t
                    .values
                    .iter()
                    .enumerate()
                    .map(|(i, s)| {
                        if t.missing.get(i).copied().unwrap_or(false) {
                            MISSING_CODE
                        } else {
                            info.levels.iter().position(|l| l == s).unwrap_or(info.levels.len()) as u32
                        }
                    })
                    .collect(),
                levels: info.levels.clone(),
            },
            // Numbers given for a categorical column: compare them as text.
            (ColumnKind::Categorical, Some(pb::table_column::Cells::Numbers(v))) => Column::Categorical {
                codes: v
                    .values
                    .iter()
                    .enumerate()
                    .map(|(i, x)| {
                        if v.missing.get(i).copied().unwrap_or(false) || x.is_nan() {
                            MISSING_CODE
                        } else {
                            let s = format!("{x}");
                            info.levels.iter().position(|l| *l == s).unwrap_or(info.levels.len()) as u32
                        }
                    })
                    .collect(),
                levels: info.levels.clone(),
            },
            _ => return Err(invalid("rows.columns", format!("column '{}' must hold {} cells", c.name, if info.kind == ColumnKind::Numeric { "number" } else { "text" }))),
        };
        features.push(Feature { name: info.name.clone(), column });
    }
    Frame::new(features).map_err(|e| invalid("rows", e))
}

// ------------------------------------------------------------------ sweep spec

fn range_from(field: &str, r: &Option<pb::LimitRange>) -> Result<Option<Range>, Status> {
    let Some(r) = r else { return Ok(None) };
    Ok(Some(match &r.kind {
        None => return Err(invalid(field, "a range needs values, a span or a log_span")),
        Some(pb::limit_range::Kind::Values(v)) => Range::Values(
            v.values
                .iter()
                .enumerate()
                .map(|(i, x)| match x.value {
                    Some(pb::limit_value::Value::Number(n)) => Ok(Some(n)),
                    Some(pb::limit_value::Value::Unlimited(true)) => Ok(None),
                    _ => Err(invalid(&format!("{field}.values[{i}]"), "needs a number or unlimited = true")),
                })
                .collect::<Result<_, _>>()?,
        ),
        Some(pb::limit_range::Kind::Span(s)) => Range::Span { from: s.from, to: s.to, step: s.step },
        Some(pb::limit_range::Kind::LogSpan(s)) => Range::LogSpan { from: s.from, to: s.to, count: s.count },
    }))
}

pub fn range_to(r: &Option<Range>) -> Option<pb::LimitRange> {
    r.as_ref().map(|r| pb::LimitRange {
        kind: Some(match r {
            Range::Values(v) => pb::limit_range::Kind::Values(pb::ValueList {
                values: v
                    .iter()
                    .map(|x| pb::LimitValue {
                        value: Some(match x {
                            Some(n) => pb::limit_value::Value::Number(*n),
                            None => pb::limit_value::Value::Unlimited(true),
                        }),
                    })
                    .collect(),
            }),
            Range::Span { from, to, step } => pb::limit_range::Kind::Span(pb::Span { from: *from, to: *to, step: *step }),
            Range::LogSpan { from, to, count } => pb::limit_range::Kind::LogSpan(pb::LogSpan { from: *from, to: *to, count: *count }),
        }),
    })
}

/// The wire spec as a core spec; the target stays with the caller. `data_task` is the
/// dataset's task, which picks the default fold scheme.
pub fn spec_from(s: &pb::SweepSpec, data_task: Task) -> Result<SweepSpec, Status> {
    Ok(spec_with(s, Some(data_task))?.0)
}

/// A StartRun request in core types, for [`crate::service::Service::queue_run`].
pub fn run_request(r: pb::StartRunRequest) -> Result<RunRequest, Status> {
    let wire = r.spec.unwrap_or_default();
    let (spec, defaults) = spec_request(&wire)?;
    Ok(RunRequest {
        dataset: DatasetRef::of(&r.dataset_id, &r.dataset_name),
        target: given(wire.target),
        spec,
        default_fold_scheme: defaults.folds,
        default_outer_scheme: defaults.outer,
        idempotency_key: given(r.idempotency_key),
        labels: r.labels.into_iter().collect(),
    })
}

/// The wire spec of a request as a core spec, and which of its fold schemes are left to the
/// data's task.
pub fn spec_request(s: &pb::SweepSpec) -> Result<(SweepSpec, SchemeDefaults), Status> {
    spec_with(s, None)
}

/// The wire spec as a core spec, and which fold schemes are left to the data's task: a plan
/// that gives fold counts but no scheme when neither the spec nor `data_task` says the task
/// (the scheme is then a placeholder the service replaces).
fn spec_with(s: &pb::SweepSpec, data_task: Option<Task>) -> Result<(SweepSpec, SchemeDefaults), Status> {
    let task = match s.task.as_str() {
        "" => None,
        t => Some(Task::parse(t).ok_or_else(|| invalid("spec.task", format!("'{}' is not classify or regress", echo(t))))?),
    };
    let mut defaults = SchemeDefaults::default();
    let criteria = s
        .criteria
        .iter()
        .enumerate()
        .map(|(i, c)| Criterion::parse(c).ok_or_else(|| invalid(&format!("spec.criteria[{i}]"), format!("'{c}' is not gini, entropy or squared_error"))))
        .collect::<Result<_, _>>()?;
    let class_weights = s
        .class_weights
        .iter()
        .enumerate()
        .map(|(i, c)| ClassWeight::parse(c).ok_or_else(|| invalid(&format!("spec.class_weights[{i}]"), format!("'{c}' is not none or balanced"))))
        .collect::<Result<_, _>>()?;
    let mut fold_plan = |name: &str, plan: &Option<pb::FoldPlan>| -> Result<Option<FoldPlan>, Status> {
        Ok(match plan {
            None => None,
            Some(f) if name == "folds" && f.scheme.is_empty() && f.k == 0 && f.repeats == 0 && f.column.is_empty() => None,
            Some(f) => {
                let column = || {
                    if f.column.is_empty() {
                        Err(invalid(&format!("spec.{name}.column"), format!("a {} plan needs a column", f.scheme)))
                    } else {
                        Ok(f.column.clone())
                    }
                };
                let scheme = match f.scheme.as_str() {
                    "" => match task.or(data_task) {
                        Some(t) => FoldPlan::default_for(t).scheme,
                        None => {
                            if name == "folds" {
                                defaults.folds = true;
                            } else {
                                defaults.outer = true;
                            }
                            FoldScheme::Shuffled
                        }
                    },
                    "shuffled" => FoldScheme::Shuffled,
                    "stratified" => FoldScheme::Stratified,
                    "grouped" => FoldScheme::Grouped { column: column()? },
                    "forward" => FoldScheme::Forward { column: column()? },
                    "given" => FoldScheme::Given { column: column()? },
                    other => return Err(invalid(&format!("spec.{name}.scheme"), format!("'{}' is not shuffled, stratified, grouped, forward or given", echo(other)))),
                };
                Some(FoldPlan { scheme, k: if f.k == 0 { 5 } else { f.k }, repeats: f.repeats.max(1) })
            }
        })
    };
    let folds = fold_plan("folds", &s.folds)?;
    let outer = fold_plan("outer", &s.outer)?;
    let metric = match s.metric.as_str() {
        "" => None,
        m => Some(Metric::parse(m).ok_or_else(|| invalid("spec.metric", format!("'{m}' is not a metric pollard knows")))?),
    };
    let splitter = match s.splitter.as_str() {
        "" => Splitter::Exact,
        x => Splitter::parse(x).ok_or_else(|| invalid("spec.splitter", format!("'{}' is not exact or binned", echo(x))))?,
    };
    let monotone = s
        .monotone
        .iter()
        .enumerate()
        .map(|(i, m)| {
            if m.feature.is_empty() {
                return Err(invalid(&format!("spec.monotone[{i}].feature"), "name a feature column"));
            }
            let direction = match pb::MonotoneDirection::try_from(m.direction) {
                Ok(pb::MonotoneDirection::Increasing) => Monotone::Increasing,
                Ok(pb::MonotoneDirection::Decreasing) => Monotone::Decreasing,
                Ok(pb::MonotoneDirection::Free) => Monotone::Free,
                _ => return Err(invalid(&format!("spec.monotone[{i}].direction"), format!("{} is not INCREASING, DECREASING or FREE", m.direction))),
            };
            Ok((m.feature.clone(), direction))
        })
        .collect::<Result<_, _>>()?;
    let pick = match s.pick.as_str() {
        "" => PickRule::Highest,
        p => PickRule::parse(p).ok_or_else(|| invalid("spec.pick", format!("'{}' is not {}", echo(p), PickRule::CHOICES)))?,
    };
    Ok((SweepSpec {
        task,
        criteria,
        class_weights,
        max_depth: range_from("spec.max_depth", &s.max_depth)?,
        min_split_rows: range_from("spec.min_split_rows", &s.min_split_rows)?,
        min_leaf_rows: range_from("spec.min_leaf_rows", &s.min_leaf_rows)?,
        max_leaves: range_from("spec.max_leaves", &s.max_leaves)?,
        min_gain: range_from("spec.min_gain", &s.min_gain)?,
        prune_alpha: range_from("spec.prune_alpha", &s.prune_alpha)?,
        prune_path: s.prune_path,
        folds,
        metric,
        pick,
        seed: s.seed,
        fit_final: !s.skip_final,
        max_settings: None,
        splitter,
        outer,
        monotone,
        costs: s.costs.map(|c| Costs { false_alarm: c.false_alarm, miss: c.miss }),
    }, defaults))
}

pub fn spec_to(s: &SweepSpec, target: &str) -> pb::SweepSpec {
    pb::SweepSpec {
        target: target.to_string(),
        task: s.task.map(|t| t.as_str().to_string()).unwrap_or_default(),
        criteria: s.criteria.iter().map(|c| c.as_str().to_string()).collect(),
        class_weights: s.class_weights.iter().map(|c| c.as_str().to_string()).collect(),
        max_depth: range_to(&s.max_depth),
        min_split_rows: range_to(&s.min_split_rows),
        min_leaf_rows: range_to(&s.min_leaf_rows),
        max_leaves: range_to(&s.max_leaves),
        min_gain: range_to(&s.min_gain),
        prune_alpha: range_to(&s.prune_alpha),
        prune_path: s.prune_path,
        folds: s.folds.as_ref().map(fold_plan_to),
        outer: s.outer.as_ref().map(fold_plan_to),
        costs: s.costs.map(|c| pb::DecisionCosts { false_alarm: c.false_alarm, miss: c.miss }),
        metric: s.metric.map(|m| m.as_str().to_string()).unwrap_or_default(),
        pick: s.pick.as_str().to_string(),
        seed: s.seed,
        skip_final: !s.fit_final,
        splitter: match s.splitter {
            Splitter::Exact => String::new(),
            other => other.as_str().to_string(),
        },
        monotone: s.monotone.iter().map(|(f, m)| pb::MonotoneLimit { feature: f.clone(), direction: monotone_to(*m) as i32 }).collect(),
    }
}

fn monotone_to(m: Monotone) -> pb::MonotoneDirection {
    match m {
        Monotone::Free => pb::MonotoneDirection::Free,
        Monotone::Increasing => pb::MonotoneDirection::Increasing,
        Monotone::Decreasing => pb::MonotoneDirection::Decreasing,
    }
}

fn fold_plan_to(f: &FoldPlan) -> pb::FoldPlan {
    pb::FoldPlan { scheme: f.scheme_name().to_string(), k: f.k, repeats: f.repeats, column: f.column().unwrap_or_default().to_string() }
}

// ------------------------------------------------------------------ runs

pub fn state_to(s: RunState) -> pb::RunState {
    match s {
        RunState::Queued => pb::RunState::Queued,
        RunState::Running => pb::RunState::Running,
        RunState::Finished => pb::RunState::Finished,
        RunState::Failed => pb::RunState::Failed,
        RunState::Cancelled => pb::RunState::Cancelled,
    }
}

pub fn state_from(s: i32) -> Result<Option<RunState>, Status> {
    Ok(match pb::RunState::try_from(s).map_err(|_| invalid("state", format!("{s} is not a run state")))? {
        pb::RunState::Unspecified => None,
        pb::RunState::Queued => Some(RunState::Queued),
        pb::RunState::Running => Some(RunState::Running),
        pb::RunState::Finished => Some(RunState::Finished),
        pb::RunState::Failed => Some(RunState::Failed),
        pb::RunState::Cancelled => Some(RunState::Cancelled),
    })
}

pub fn limits_to(o: &FitOptions) -> pb::SettingLimits {
    let l = &o.limits;
    pb::SettingLimits {
        criterion: o.criterion.map(|c| c.as_str().to_string()).unwrap_or_default(),
        class_weight: o.class_weight.as_str().to_string(),
        max_depth: l.max_depth,
        min_split_rows: l.min_split_rows,
        min_leaf_rows: l.min_leaf_rows,
        max_leaves: l.max_leaves,
        min_gain: l.min_gain,
        prune_alpha: l.prune_alpha,
    }
}

pub fn score_to(index: usize, s: &SettingScore) -> pb::SettingScore {
    pb::SettingScore {
        index: index as u32,
        limits: Some(limits_to(&s.setting.options)),
        fold_scores: s.fold_scores.clone(),
        valid_mean: s.valid_mean,
        valid_sd: s.valid_sd,
        train_mean: s.train_mean,
        gap: s.gap,
        mean_leaves: s.mean_leaves,
        mean_depth: s.mean_depth,
    }
}

pub fn nested_to(n: &crate::sweep::NestedResult) -> pb::NestedEstimate {
    pb::NestedEstimate {
        outer_mean: n.outer_mean,
        outer_sd: n.outer_sd,
        optimism: n.optimism,
        folds: n
            .folds
            .iter()
            .map(|f| pb::OuterFold {
                repeat: f.repeat,
                fold: f.fold,
                picked: f.picked as u32,
                inner_best: f.inner_best,
                inner_picked: f.inner_picked,
                outer_score: f.outer_score,
                leaves: f.leaves,
            })
            .collect(),
    }
}

/// A run for the wire; `outcome` adds the scores, pick, folds and model summary.
pub fn run_info(r: &Run, outcome: Option<&RunOutcome>) -> pb::RunInfo {
    let mut info = pb::RunInfo {
        id: r.id.clone(),
        state: state_to(r.state) as i32,
        dataset_id: r.dataset_id.clone(),
        dataset_name: r.dataset_name.clone(),
        dataset_version: r.dataset_version,
        spec: Some(spec_to(&r.spec, &r.target)),
        labels: r.labels.clone().into_iter().collect(),
        created_at: time(r.created_at),
        started_at: opt_time(r.started_at),
        finished_at: opt_time(r.finished_at),
        reason: r.reason.clone().unwrap_or_default(),
        metric: r.spec.metric.map(|m| m.as_str().to_string()).unwrap_or_default(),
        settings: r.settings,
        units_done: r.units_done,
        units_total: r.units_total,
        schedule_id: r.schedule_id.clone().unwrap_or_default(),
        drift: r.drift.as_ref().map(drift_to),
        dataset_rows: r.dataset_rows,
        owner: r.owner.clone().unwrap_or_default(),
        ..Default::default()
    };
    if let Some(o) = outcome {
        info.scores = o.scores.iter().enumerate().map(|(i, s)| score_to(i, s)).collect();
        info.picked = Some(o.picked);
        info.best = Some(o.best);
        if let Some(metric) = r.spec.metric {
            info.pareto_front = crate::sweep::pareto_front(&o.scores, metric).into_iter().map(|i| i as u32).collect();
        }
        info.nested = o.nested.as_ref().map(nested_to);
        info.fold_assignment = o.fold_assignment.iter().map(|f| pb::FoldAssignment { folds: f.clone() }).collect();
        if let Some(m) = &o.model {
            info.model = Some(pb::ModelSummary { nodes: m.nodes.len() as u32, leaves: m.n_leaves() as u32, depth: m.depth(), classes: m.labels.clone(), decision: m.decision.map(decision_to) });
        }
        info.importances = importances_to(o);
        info.permutation_repeats = o.permutation.as_ref().map_or(0, |p| p.repeats);
    }
    info
}

/// Per feature column of a finished run: impurity importance in the refit model and
/// permutation importance over the validation folds, whichever the run has.
fn importances_to(o: &RunOutcome) -> Vec<pb::FeatureImportance> {
    let impurity = o.model.as_ref().map(|m| m.impurity_importances());
    let (mean, sd) = o.permutation.as_ref().map(|p| (p.mean(), p.sd())).unzip();
    let n = impurity.as_ref().map(Vec::len).or(mean.as_ref().map(Vec::len)).unwrap_or(0);
    (0..n)
        .map(|j| pb::FeatureImportance {
            feature: o.permutation.as_ref().and_then(|p| p.features.get(j).cloned()).or_else(|| o.model.as_ref().and_then(|m| m.columns.get(j)).map(|c| c.name.clone())).unwrap_or_default(),
            impurity: impurity.as_ref().and_then(|v| v.get(j).copied()),
            permutation_mean: mean.as_ref().and_then(|v| v.get(j).copied()),
            permutation_sd: sd.as_ref().and_then(|v| v.get(j).copied()),
        })
        .collect()
}

/// An event for the wire; a finished event takes its scores and model from `outcome`.
pub fn event_to(run_id: &str, e: &Event, outcome: Option<&RunOutcome>, drift: Option<&DriftReport>) -> pb::RunEvent {
    use pb::run_event::Kind;
    let kind = match &e.kind {
        EventKind::Progress(p) => Kind::Progress(pb::ProgressEvent {
            units_done: p.units_done as u32,
            units_total: p.units_total as u32,
            scores_done: p.scores_done as u32,
            scores_total: p.scores_total as u32,
        }),
        EventKind::Scored { index, score } => Kind::Scored(score_to(*index as usize, score)),
        EventKind::Finished { picked, best } => Kind::Finished(pb::FinishedEvent {
            picked: *picked,
            best: *best,
            scores: outcome.map(|o| o.scores.iter().enumerate().map(|(i, s)| score_to(i, s)).collect()).unwrap_or_default(),
            model: outcome.and_then(|o| o.model.as_ref()).map(model_to),
            drift: drift.map(drift_to),
        }),
        EventKind::Failed(m) => Kind::Failed(m.clone()),
        EventKind::Cancelled(m) => Kind::Cancelled(m.clone()),
    };
    pb::RunEvent { sequence: e.sequence, run_id: run_id.to_string(), at: time(e.at), kind: Some(kind) }
}

pub fn drift_to(d: &DriftReport) -> pb::DriftReport {
    pb::DriftReport {
        previous_run_id: d.previous_run_id.clone(),
        picked_changed: d.picked_changed,
        moved: d.moved.iter().map(|m| pb::LimitChange { limit: m.limit.as_str().to_string(), from: m.from.clone(), to: m.to.clone() }).collect(),
        previous_score: d.previous_score,
        score: d.score,
        score_delta: d.score_delta,
        score_delta_se: d.score_delta_se,
        previous_dataset_id: d.previous_dataset_id.clone(),
        dataset_id: d.dataset_id.clone(),
        previous_version: d.previous_version,
        version: d.version,
        previous_rows: d.previous_rows,
        rows: d.rows,
        previous_leaves: d.previous_leaves,
        leaves: d.leaves,
        score_fell: d.score_fell,
        tree_grew: d.tree_grew,
        tree_shrank: d.tree_shrank,
        thresholds: Some(thresholds_to(&d.thresholds)),
    }
}

pub fn thresholds_to(t: &DriftThresholds) -> pb::DriftThresholds {
    pb::DriftThresholds { score_drop: t.score_drop, size_factor: t.size_factor }
}

// ------------------------------------------------------------------ schedules

/// Wire thresholds, zeros taking the defaults.
pub fn thresholds_from(t: Option<&pb::DriftThresholds>) -> Result<DriftThresholds, Status> {
    let d = DriftThresholds::default();
    let t = match t {
        None => d,
        Some(t) => DriftThresholds { score_drop: if t.score_drop == 0.0 { d.score_drop } else { t.score_drop }, size_factor: if t.size_factor == 0.0 { d.size_factor } else { t.size_factor } },
    };
    t.check().map_err(Status::invalid_argument)?;
    Ok(t)
}

pub fn retention_from(r: Option<&pb::Retention>) -> Retention {
    let nonzero = |n: u32| (n > 0).then_some(n);
    r.map_or(Retention::default(), |r| Retention { keep_last: nonzero(r.keep_last), keep_days: nonzero(r.keep_days) })
}

pub fn catch_up_from(c: i32) -> Result<CatchUp, Status> {
    match pb::CatchUp::try_from(c).map_err(|_| invalid("catch_up", format!("{c} is not a catch-up rule")))? {
        pb::CatchUp::Unspecified | pb::CatchUp::Once => Ok(CatchUp::Once),
        pb::CatchUp::Skip => Ok(CatchUp::Skip),
    }
}

fn catch_up_to(rule: CatchUp) -> pb::CatchUp {
    match rule {
        CatchUp::Skip => pb::CatchUp::Skip,
        CatchUp::Once => pb::CatchUp::Once,
    }
}

fn fire_outcome_to(o: FireOutcome) -> pb::FireOutcome {
    match o {
        FireOutcome::Started => pb::FireOutcome::Started,
        FireOutcome::SkippedBusy => pb::FireOutcome::SkippedBusy,
        FireOutcome::SkippedUnchanged => pb::FireOutcome::SkippedUnchanged,
        FireOutcome::SkippedMissed => pb::FireOutcome::SkippedMissed,
        FireOutcome::Failed => pb::FireOutcome::Failed,
        FireOutcome::SkippedQueueFull => pb::FireOutcome::SkippedQueueFull,
    }
}

pub fn fire_to(f: &Fire) -> pb::Fire {
    pb::Fire {
        sequence: f.sequence,
        scheduled_for: time(f.scheduled_for),
        handled_at: time(f.handled_at),
        outcome: fire_outcome_to(f.outcome) as i32,
        run_id: f.run_id.clone().unwrap_or_default(),
        missed: f.missed,
        detail: f.detail.clone().unwrap_or_default(),
    }
}

/// A schedule for the wire; `next_fire` is computed by the caller (empty while paused).
pub fn schedule_info(s: &Schedule, next_fire: Option<i64>, last_fire: Option<&Fire>) -> pb::ScheduleInfo {
    pb::ScheduleInfo {
        id: s.id.clone(),
        name: s.name.clone(),
        cron: s.cron.clone(),
        time_zone: s.time_zone.clone(),
        dataset_name: s.dataset_name.clone(),
        dataset_id: s.dataset_id.clone().unwrap_or_default(),
        spec: Some(spec_to(&s.spec, &s.target)),
        labels: s.labels.clone().into_iter().collect(),
        retention: Some(pb::Retention { keep_last: s.retention.keep_last.unwrap_or(0), keep_days: s.retention.keep_days.unwrap_or(0) }),
        catch_up: catch_up_to(s.catch_up) as i32,
        skip_unchanged: s.skip_unchanged,
        drift: Some(thresholds_to(&s.drift)),
        paused: s.paused,
        created_at: time(s.created_at),
        next_fire_at: if s.paused { String::new() } else { opt_time(next_fire) },
        last_run_id: s.last_run_id.clone().unwrap_or_default(),
        last_fire: last_fire.map(fire_to),
    }
}

// ------------------------------------------------------------------ models

fn kind_to(k: ColumnKind) -> pb::ColumnKind {
    match k {
        ColumnKind::Numeric => pb::ColumnKind::Numeric,
        ColumnKind::Categorical => pb::ColumnKind::Categorical,
    }
}

/// A row's way to its leaf for the wire: each condition with its feature, test, outcome and
/// the test in the text model's words.
pub fn path_to(tree: &Tree, (leaf, steps): &RowPath) -> pb::RowPath {
    let conditions = steps
        .iter()
        .filter_map(|step| {
            let split = tree.nodes[step.node as usize].split.as_ref()?;
            let column = &tree.columns[split.feature as usize];
            let (threshold, categories) = match &split.rule {
                SplitRule::Threshold(t) => (*t, Vec::new()),
                SplitRule::Categories(bits) => (0.0, column.levels.iter().enumerate().filter(|(code, _)| SplitRule::category_left(bits, *code as u32)).map(|(_, l)| l.clone()).collect()),
            };
            Some(pb::PathCondition { node: step.node, feature: column.name.clone(), threshold, categories, holds: step.left, missing: step.missing, text: crate::export::text::describe_test(tree, split) })
        })
        .collect();
    pb::RowPath { leaf: *leaf, conditions }
}

/// A tree as the native protobuf model.
pub fn model_to(t: &Tree) -> pb::Model {
    let l = &t.options.limits;
    pb::Model {
        task: t.task.as_str().to_string(),
        target: t.target.clone(),
        classes: t.labels.clone(),
        columns: t.columns.iter().map(|c| pb::ModelColumn { name: c.name.clone(), kind: kind_to(c.kind) as i32, categories: c.levels.clone() }).collect(),
        nodes: t
            .nodes
            .iter()
            .enumerate()
            .map(|(i, n)| pb::TreeNode {
                depth: n.depth,
                rows: n.rows as u64,
                weighted_rows: n.weighted_rows,
                impurity: n.impurity,
                value: t.value(i).to_vec(),
                class_totals: if t.n_classes > 0 { t.class_total(i).to_vec() } else { Vec::new() },
                split: n.split.as_ref().map(|s| pb::NodeSplit {
                    column: s.feature,
                    test: Some(match &s.rule {
                        SplitRule::Threshold(x) if *x == f64::INFINITY => pb::node_split::Test::Present(true),
                        SplitRule::Threshold(x) => pb::node_split::Test::AtMost(*x),
                        SplitRule::Categories(bits) => pb::node_split::Test::In(pb::CategorySet {
                            codes: (0..t.columns[s.feature as usize].levels.len() as u32).filter(|&c| SplitRule::category_left(bits, c)).collect(),
                        }),
                    }),
                    missing_left: s.missing_left,
                    gain: n.gain,
                    rank: n.rank,
                    left: n.left,
                    right: n.right,
                    between: s.between.map(|(lo, hi)| pb::Between { lo, hi }),
                }),
            })
            .collect(),
        grown_with: Some(pb::GrownWith {
            criterion: t.options.criterion.map(|c| c.as_str().to_string()).unwrap_or_default(),
            class_weight: t.options.class_weight.as_str().to_string(),
            max_depth: l.max_depth,
            min_split_rows: l.min_split_rows,
            min_leaf_rows: l.min_leaf_rows,
            max_leaves: l.max_leaves,
            min_gain: l.min_gain,
            prune_alpha: l.prune_alpha,
        }),
        total_weight: t.total_weight,
        importances: t.impurity_importances(),
        decision: t.decision.map(decision_to),
    }
}

fn decision_to(d: Decision) -> pb::ModelDecision {
    pb::ModelDecision { threshold: d.threshold, costs: Some(pb::DecisionCosts { false_alarm: d.false_alarm, miss: d.miss }) }
}

/// The native protobuf model back as a tree (for clients and tests that hold a `Model`).
pub fn model_from(m: &pb::Model) -> Result<Tree, String> {
    let task = Task::parse(&m.task).ok_or_else(|| format!("task '{}' is not classify or regress", m.task))?;
    let columns: Vec<ColumnInfo> = m
        .columns
        .iter()
        .map(|c| ColumnInfo {
            name: c.name.clone(),
            kind: if c.kind == pb::ColumnKind::Categorical as i32 { ColumnKind::Categorical } else { ColumnKind::Numeric },
            levels: c.categories.clone(),
        })
        .collect();
    let n_classes = if task == Task::Classify { m.classes.len() } else { 0 };
    let mut values = Vec::new();
    let mut class_totals = Vec::new();
    let mut nodes = Vec::with_capacity(m.nodes.len());
    for n in &m.nodes {
        values.extend_from_slice(&n.value);
        class_totals.extend_from_slice(&n.class_totals);
        let (split, gain, rank, left, right) = match &n.split {
            None => (None, 0.0, NO_NODE, NO_NODE, NO_NODE),
            Some(s) => {
                let rule = match &s.test {
                    Some(pb::node_split::Test::AtMost(x)) => SplitRule::Threshold(*x),
                    Some(pb::node_split::Test::Present(_)) => SplitRule::Threshold(f64::INFINITY),
                    Some(pb::node_split::Test::In(set)) => {
                        let levels = columns.get(s.column as usize).map_or(0, |c| c.levels.len());
                        let mut bits = vec![0u64; levels.div_ceil(64)];
                        for &c in &set.codes {
                            if (c as usize) < levels {
                                bits[(c / 64) as usize] |= 1 << (c % 64);
                            }
                        }
                        SplitRule::Categories(bits)
                    }
                    None => return Err("a split has no test".into()),
                };
                let between = match s.between {
                    None => None,
                    Some(pb::Between { lo, hi }) if rule.fits_between(lo, hi) => Some((lo, hi)),
                    Some(pb::Between { lo, hi }) => return Err(format!("between [{lo}, {hi}] does not surround an at_most threshold")),
                };
                (Some(Split { feature: s.column, rule, missing_left: s.missing_left, between }), s.gain, s.rank, s.left, s.right)
            }
        };
        nodes.push(Node { depth: n.depth, rows: n.rows as u32, weighted_rows: n.weighted_rows, impurity: n.impurity, gain, split, left, right, rank });
    }
    let g = m.grown_with.clone().unwrap_or_default();
    let decision = match &m.decision {
        None => None,
        Some(d) => {
            let c = d.costs.unwrap_or_default();
            let d = Decision { threshold: d.threshold, false_alarm: c.false_alarm, miss: c.miss };
            d.check(n_classes).map_err(|e| format!("decision: {e}"))?;
            Some(d)
        }
    };
    Ok(Tree {
        decision,
        task,
        target: m.target.clone(),
        labels: m.classes.clone(),
        n_features: columns.len(),
        columns,
        n_classes,
        nodes,
        values,
        class_totals,
        total_weight: m.total_weight,
        options: FitOptions {
            limits: Limits {
                max_depth: g.max_depth,
                min_split_rows: g.min_split_rows,
                min_leaf_rows: g.min_leaf_rows,
                max_leaves: g.max_leaves,
                min_gain: g.min_gain,
                prune_alpha: g.prune_alpha,
            },
            criterion: Criterion::parse(&g.criterion),
            class_weight: ClassWeight::parse(&g.class_weight).unwrap_or_default(),
            splitter: Default::default(),
            monotone: Default::default(),
        },
    })
}

/// A setting score from the wire (for clients that plot or store what a server sent).
pub fn score_from(s: &pb::SettingScore) -> SettingScore {
    let l = s.limits.clone().unwrap_or_default();
    SettingScore {
        setting: crate::sweep::Setting {
            key: 0,
            options: FitOptions {
                limits: Limits {
                    max_depth: l.max_depth,
                    min_split_rows: l.min_split_rows,
                    min_leaf_rows: l.min_leaf_rows,
                    max_leaves: l.max_leaves,
                    min_gain: l.min_gain,
                    prune_alpha: l.prune_alpha,
                },
                criterion: Criterion::parse(&l.criterion),
                class_weight: ClassWeight::parse(&l.class_weight).unwrap_or_default(),
                splitter: Default::default(),
                monotone: Default::default(),
            },
        },
        fold_scores: s.fold_scores.clone(),
        valid_mean: s.valid_mean,
        valid_sd: s.valid_sd,
        train_mean: s.train_mean,
        gap: s.gap,
        mean_leaves: s.mean_leaves,
        mean_depth: s.mean_depth,
    }
}
