//! Runs and their events as plain values, with the pure state transitions. Times are Unix
//! milliseconds passed in by the caller; nothing here reads a clock.

use std::collections::BTreeMap;

use crate::sweep::{Progress, SettingScore, SweepSpec, UnitResult};
use crate::tree::Tree;

/// Where a run is in its life.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum RunState {
    Queued,
    Running,
    Finished,
    Failed,
    Cancelled,
}

impl RunState {
    pub fn as_str(self) -> &'static str {
        match self {
            RunState::Queued => "queued",
            RunState::Running => "running",
            RunState::Finished => "finished",
            RunState::Failed => "failed",
            RunState::Cancelled => "cancelled",
        }
    }

    pub fn parse(s: &str) -> Option<RunState> {
        [RunState::Queued, RunState::Running, RunState::Finished, RunState::Failed, RunState::Cancelled].into_iter().find(|r| r.as_str() == s)
    }

    /// Whether the run can change no more.
    pub fn is_terminal(self) -> bool {
        matches!(self, RunState::Finished | RunState::Failed | RunState::Cancelled)
    }

    /// Whether the run holds its dataset (a dataset in use cannot be deleted).
    pub fn is_active(self) -> bool {
        matches!(self, RunState::Queued | RunState::Running)
    }
}

/// An uploaded table as stored: its bytes live apart, chunked.
#[derive(Clone, Debug, PartialEq)]
pub struct DatasetMeta {
    /// `ds_` + hex SHA-256 of the bytes.
    pub id: String,
    pub name: String,
    pub version: u32,
    pub rows: u64,
    pub columns: Vec<ColumnMeta>,
    /// Default target column ("" when none was named).
    pub target: String,
    /// "classify" / "regress" ("" without a target).
    pub task: String,
    pub created_at: i64,
    pub bytes: u64,
    /// Feature columns read as categories even when numeric.
    pub categorical: Vec<String>,
}

#[derive(Clone, Debug, PartialEq)]
pub struct ColumnMeta {
    pub name: String,
    /// "numeric" or "categorical".
    pub kind: String,
    pub missing: u64,
    pub levels: u64,
}

/// One execution of a sweep.
#[derive(Clone, Debug, PartialEq)]
pub struct Run {
    /// `run_` + a time-ordered UUID (version 7), so ids sort by creation time.
    pub id: String,
    pub state: RunState,
    pub dataset_id: String,
    pub dataset_name: String,
    pub dataset_version: u32,
    /// The target column the sweep predicts.
    pub target: String,
    pub spec: SweepSpec,
    pub labels: BTreeMap<String, String>,
    pub idempotency_key: String,
    pub schedule_id: String,
    pub created_at: i64,
    pub started_at: Option<i64>,
    pub finished_at: Option<i64>,
    /// Why the run failed or was cancelled.
    pub reason: String,
    pub settings: u32,
    pub units_total: u32,
    pub units_done: u32,
    /// Sequence number the next event gets (events start at 1).
    pub next_sequence: u64,
}

impl Run {
    /// A new queued run.
    pub fn queued(id: String, dataset: &DatasetMeta, target: String, spec: SweepSpec, created_at: i64) -> Run {
        Run {
            id,
            state: RunState::Queued,
            dataset_id: dataset.id.clone(),
            dataset_name: dataset.name.clone(),
            dataset_version: dataset.version,
            target,
            spec,
            labels: BTreeMap::new(),
            idempotency_key: String::new(),
            schedule_id: String::new(),
            created_at,
            started_at: None,
            finished_at: None,
            reason: String::new(),
            settings: 0,
            units_total: 0,
            units_done: 0,
            next_sequence: 1,
        }
    }

    /// Queued → running.
    pub fn start(&mut self, now: i64, settings: u32, units_total: u32) {
        debug_assert_eq!(self.state, RunState::Queued);
        self.state = RunState::Running;
        self.started_at = Some(now);
        self.settings = settings;
        self.units_total = units_total;
    }

    /// Running (or queued, for cancel) → a terminal state.
    pub fn end(&mut self, state: RunState, now: i64, reason: &str) {
        debug_assert!(state.is_terminal() && !self.state.is_terminal());
        self.state = state;
        self.finished_at = Some(now);
        self.reason = reason.to_string();
    }

    /// Takes the next event sequence number.
    pub fn take_sequence(&mut self) -> u64 {
        let s = self.next_sequence;
        self.next_sequence += 1;
        s
    }
}

/// What an event says.
#[derive(Clone, Debug, PartialEq)]
pub enum EventKind {
    Progress(Progress),
    /// A setting whose every split is scored: its index in the plan's settings, and its score.
    Scored { index: u32, score: Box<SettingScore> },
    /// The run finished; the outcome holds the scores and the model.
    Finished { picked: u32, best: u32 },
    Failed(String),
    Cancelled(String),
}

/// A numbered event of a run.
#[derive(Clone, Debug, PartialEq)]
pub struct Event {
    pub sequence: u64,
    pub at: i64,
    pub kind: EventKind,
}

impl Event {
    pub fn is_terminal(&self) -> bool {
        matches!(self.kind, EventKind::Finished { .. } | EventKind::Failed(_) | EventKind::Cancelled(_))
    }
}

/// What a finished run produced.
#[derive(Clone, Debug)]
pub struct RunOutcome {
    pub scores: Vec<SettingScore>,
    pub picked: u32,
    pub best: u32,
    pub model: Option<Tree>,
    /// Per repeat, per row: the fold the row validates in (−1: none).
    pub fold_assignment: Vec<Vec<i32>>,
}

/// A stored work unit of a run.
pub type StoredUnit = UnitResult;
