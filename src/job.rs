//! Runs and their events as plain values, with the pure state transitions. Times are Unix
//! milliseconds passed in by the caller; nothing here reads a clock.

use std::collections::BTreeMap;

use crate::data::{ColumnKind, Task};
use crate::drift::{DriftReport, DriftThresholds};
use crate::schedule::CatchUp;
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

/// The kinds of ids the server makes, each a prefix and lowercase hex digits: runs and
/// schedules `run_` / `sch_` + a version 7 UUID (32 digits), datasets `ds_` + a SHA-256 (64).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum IdKind {
    Run,
    Dataset,
    Schedule,
}

impl IdKind {
    fn parts(self) -> (&'static str, usize) {
        match self {
            IdKind::Run => ("run_", 32),
            IdKind::Dataset => ("ds_", 64),
            IdKind::Schedule => ("sch_", 32),
        }
    }

    pub fn noun(self) -> &'static str {
        match self {
            IdKind::Run => "run",
            IdKind::Dataset => "dataset",
            IdKind::Schedule => "schedule",
        }
    }

    /// The shape in words, for messages.
    pub fn shape(self) -> String {
        let (prefix, digits) = self.parts();
        format!("'{prefix}' and {digits} lowercase hex digits")
    }

    /// Whether `id` has this kind's shape (it may still name nothing).
    pub fn is_well_formed(self, id: &str) -> bool {
        let (prefix, digits) = self.parts();
        id.strip_prefix(prefix).is_some_and(|hex| hex.len() == digits && hex.bytes().all(|b| b.is_ascii_digit() || (b'a'..=b'f').contains(&b)))
    }
}

/// `text`, or `None` when it is empty: for wire and record fields where an empty string
/// stands for "none".
pub fn given(text: String) -> Option<String> {
    Some(text).filter(|t| !t.is_empty())
}

/// An uploaded table as stored: its bytes live apart, chunked.
#[derive(Clone, Debug, PartialEq)]
pub struct DatasetMeta {
    /// `ds_` + 64 hex digits, naming this version (see `rpc::datasets::new_dataset_id`);
    /// stores written before versions followed names used the content hash.
    pub id: String,
    /// Hex SHA-256 of the bytes: equal bytes have equal content, whatever their name.
    pub content: String,
    pub name: String,
    pub version: u32,
    pub rows: u64,
    pub columns: Vec<ColumnMeta>,
    /// Default target column; `None` when none was named.
    pub target: Option<String>,
    /// The task of the default target; `None` without a target.
    pub task: Option<Task>,
    pub created_at: i64,
    pub bytes: u64,
    /// Feature columns read as categories even when numeric.
    pub categorical: Vec<String>,
}

#[derive(Clone, Debug, PartialEq)]
pub struct ColumnMeta {
    pub name: String,
    pub kind: ColumnKind,
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
    /// Rows of the dataset version the run used.
    pub dataset_rows: u64,
    /// The target column the sweep predicts.
    pub target: String,
    pub spec: SweepSpec,
    pub labels: BTreeMap<String, String>,
    /// The caller's key for retries; `None` when the request gave none.
    pub idempotency_key: Option<String>,
    /// The name of the token that started the run; `None` for a run started without
    /// tokens, by a schedule, or stored before owners were recorded.
    pub owner: Option<String>,
    /// A digest of the request that started the run (for idempotency key reuse); `None` when
    /// not recorded.
    pub request_digest: Option<String>,
    /// The schedule that started the run; `None` for a run started by a call.
    pub schedule_id: Option<String>,
    pub created_at: i64,
    pub started_at: Option<i64>,
    pub finished_at: Option<i64>,
    /// Why the run failed or was cancelled; `None` while it runs and once it finished.
    pub reason: Option<String>,
    pub settings: u32,
    pub units_total: u32,
    pub units_done: u32,
    /// Sequence number the next event gets (events start at 1).
    pub next_sequence: u64,
    /// A finished scheduled run's comparison with the previous finished run of its schedule.
    pub drift: Option<DriftReport>,
    /// Bytes the run was estimated to need when it was queued (0: not estimated).
    pub memory_estimate: u64,
    /// `units_done` when the current execution started; `None` when the run has not started
    /// or its last execution stopped cleanly (shutdown).
    pub units_at_start: Option<u32>,
    /// Executions in a row that ended with the process, not the run, stopping and with no
    /// unit stored meanwhile (see [`Run::resume`]).
    pub crash_strikes: u32,
}

/// How many executions in a row may end with the process dying and no unit stored before a
/// run is failed instead of resumed again.
pub const MAX_CRASH_STRIKES: u32 = 3;

/// What resuming a run left running by an earlier process does.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Resume {
    /// Execute it again.
    Again,
    /// Fail it with this reason: it keeps taking the process down.
    GiveUp(String),
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
            dataset_rows: dataset.rows,
            target,
            spec,
            labels: BTreeMap::new(),
            idempotency_key: None,
            owner: None,
            request_digest: None,
            schedule_id: None,
            created_at,
            started_at: None,
            finished_at: None,
            reason: None,
            settings: 0,
            units_total: 0,
            units_done: 0,
            next_sequence: 1,
            drift: None,
            memory_estimate: 0,
            units_at_start: None,
            crash_strikes: 0,
        }
    }

    /// A run found running at start-up is about to be executed again. An execution that
    /// stopped cleanly (shutdown) leaves `units_at_start` empty; one that the process's
    /// death ended leaves it set, and counts a strike when no unit was stored since it began.
    /// After [`MAX_CRASH_STRIKES`] strikes in a row the run gives up.
    pub fn resume(&mut self) -> Resume {
        match self.units_at_start {
            Some(u) if u >= self.units_done => self.crash_strikes += 1,
            _ => self.crash_strikes = 0,
        }
        self.units_at_start = Some(self.units_done);
        if self.crash_strikes >= MAX_CRASH_STRIKES {
            Resume::GiveUp(format!(
                "the server stopped unexpectedly {} times in a row while running this run, with no work unit finished in between; it is not resumed again",
                self.crash_strikes
            ))
        } else {
            Resume::Again
        }
    }

    /// Queued → running; it never starts before it was created (a claimer may read its
    /// clock before the run's creation is committed).
    pub fn start(&mut self, now: i64, settings: u32, units_total: u32) {
        debug_assert_eq!(self.state, RunState::Queued);
        self.state = RunState::Running;
        self.started_at = Some(now.max(self.created_at));
        self.units_at_start = Some(self.units_done);
        self.settings = settings;
        self.units_total = units_total;
    }

    /// Running (or queued, for cancel) → a terminal state, with why for a failure or a cancel.
    pub fn end(&mut self, state: RunState, now: i64, reason: Option<&str>) {
        debug_assert!(state.is_terminal() && !self.state.is_terminal());
        self.state = state;
        self.finished_at = Some(now);
        self.reason = reason.map(str::to_string);
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
    /// The outer loop's scores, for a nested sweep.
    pub nested: Option<crate::sweep::NestedResult>,
    /// Permutation importance of the picked setting on the validation folds; `None` for runs
    /// finished before it was computed.
    pub permutation: Option<crate::sweep::PermutationImportance>,
}

/// A stored work unit of a run.
pub type StoredUnit = UnitResult;

/// How many runs of a schedule to keep; a run is kept when either rule keeps it.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct Retention {
    /// Keep the newest N runs (`None`: no count rule).
    pub keep_last: Option<u32>,
    /// Keep runs created less than D days ago (`None`: no age rule).
    pub keep_days: Option<u32>,
}

impl Retention {
    pub fn is_unlimited(&self) -> bool {
        self.keep_last.is_none() && self.keep_days.is_none()
    }

    /// Which of a schedule's runs (given newest first) to delete at `now`. Runs count by their
    /// place among all the schedule's runs; a run is kept when either rule keeps it; queued
    /// and running runs are never deleted, nor the newest finished run (the next drift
    /// report's baseline).
    pub fn expired<'a>(&self, runs_newest_first: &'a [Run], now: i64) -> Vec<&'a Run> {
        if self.is_unlimited() {
            return Vec::new();
        }
        let baseline = runs_newest_first.iter().find(|r| r.state == RunState::Finished).map(|r| r.id.as_str());
        runs_newest_first
            .iter()
            .enumerate()
            .filter(|(i, r)| {
                let by_count = self.keep_last.is_some_and(|n| (*i as u64) < n as u64);
                let by_age = self.keep_days.is_some_and(|d| now - r.created_at < d as i64 * 86_400_000);
                r.state.is_terminal() && !(by_count || by_age || Some(r.id.as_str()) == baseline)
            })
            .map(|(_, r)| r)
            .collect()
    }
}

/// A recurring sweep: a template started at the fire times of a crontab expression.
#[derive(Clone, Debug, PartialEq)]
pub struct Schedule {
    /// `sch_` + a time-ordered UUID (version 7).
    pub id: String,
    /// A free name for people ("" allowed).
    pub name: String,
    /// 5-field crontab expression.
    pub cron: String,
    /// IANA time zone the expression is read in.
    pub time_zone: String,
    /// Every run sweeps the latest version of this dataset name at its fire.
    pub dataset_name: String,
    /// When set, every run sweeps this one dataset instead of the latest version of the name.
    pub dataset_id: Option<String>,
    /// The column to predict (the dataset's default target made explicit at creation).
    pub target: String,
    pub spec: SweepSpec,
    /// Labels every run of the schedule carries.
    pub labels: BTreeMap<String, String>,
    pub retention: Retention,
    /// What a start-up after missed fires does.
    pub catch_up: CatchUp,
    /// Skip a fire when the dataset has no version newer than the last run's.
    pub skip_unchanged: bool,
    pub drift: DriftThresholds,
    pub paused: bool,
    pub created_at: i64,
    /// Every fire instant up to this one is handled (fired, skipped or passed over).
    pub considered_until: i64,
    /// The last run the schedule started, and the dataset it used (`None` before its first run).
    pub last_run_id: Option<String>,
    pub last_dataset_id: Option<String>,
    /// Sequence number of the next fire record.
    pub next_fire_sequence: u64,
}

/// What became of one fire of a schedule.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum FireOutcome {
    /// A run was queued.
    Started,
    /// The previous run was still queued or running.
    SkippedBusy,
    /// The dataset had no new version since the last run.
    SkippedUnchanged,
    /// Fires passed while the server was down, and the catch-up rule is `skip`.
    SkippedMissed,
    /// The run could not be queued (the dataset is gone, or the spec no longer fits it).
    Failed,
    /// The queue held `max_queued_runs` runs.
    SkippedQueueFull,
}

impl FireOutcome {
    pub const ALL: [FireOutcome; 6] = [FireOutcome::Started, FireOutcome::SkippedBusy, FireOutcome::SkippedUnchanged, FireOutcome::SkippedMissed, FireOutcome::Failed, FireOutcome::SkippedQueueFull];

    pub fn as_str(self) -> &'static str {
        match self {
            FireOutcome::Started => "started",
            FireOutcome::SkippedBusy => "skipped_busy",
            FireOutcome::SkippedUnchanged => "skipped_unchanged",
            FireOutcome::SkippedMissed => "skipped_missed",
            FireOutcome::Failed => "failed",
            FireOutcome::SkippedQueueFull => "skipped_queue_full",
        }
    }

    pub fn parse(s: &str) -> Option<FireOutcome> {
        FireOutcome::ALL.into_iter().find(|o| o.as_str() == s)
    }
}

/// The record of one fire of a schedule.
#[derive(Clone, Debug, PartialEq)]
pub struct Fire {
    pub sequence: u64,
    /// The scheduled instant this fire was for.
    pub scheduled_for: i64,
    /// When the scheduler handled it.
    pub handled_at: i64,
    pub outcome: FireOutcome,
    /// The run started, or the busy run that caused a skip; `None` when the fire names no run.
    pub run_id: Option<String>,
    /// Scheduled instants passed over during downtime and covered by this fire.
    pub missed: u64,
    /// Why the fire started no run, in words; `None` when it started one.
    pub detail: Option<String>,
}

impl Fire {
    /// Turns the fire into a skip because `busy`, the schedule's previous run, is still active.
    pub fn skip_busy(&mut self, busy: Run) {
        self.outcome = FireOutcome::SkippedBusy;
        self.detail = Some(format!("the previous run {} is still {}", busy.id, busy.state.as_str()));
        self.run_id = Some(busy.id);
    }

    /// Turns the fire into a skip: the queue is full.
    pub fn skip_queue_full(&mut self, queued: usize, cap: usize) {
        self.outcome = FireOutcome::SkippedQueueFull;
        self.detail = Some(format!("{queued} runs are queued, the cap max_queued_runs = {cap}; this fire starts no run"));
    }

    /// Turns the fire into a failure: no run could be queued.
    pub fn fail(&mut self, detail: String) {
        self.outcome = FireOutcome::Failed;
        self.detail = Some(detail);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run(id: &str, state: RunState, created_at: i64) -> Run {
        let meta = DatasetMeta { id: "ds_a".into(), content: "a".into(), name: "a".into(), version: 1, rows: 3, columns: vec![], target: Some("y".into()), task: Some(Task::Classify), created_at: 0, bytes: 0, categorical: vec![] };
        Run { state, ..Run::queued(id.into(), &meta, "y".into(), SweepSpec::default(), created_at) }
    }

    const DAY: i64 = 86_400_000;

    #[test]
    fn retention_keeps_either_rule_active_runs_and_the_drift_baseline() {
        // Newest first: r5 running, r4 cancelled, r3 failed, r2 finished, r1 finished.
        let runs = vec![
            run("r5", RunState::Running, 5 * DAY),
            run("r4", RunState::Cancelled, 4 * DAY),
            run("r3", RunState::Failed, 3 * DAY),
            run("r2", RunState::Finished, 2 * DAY),
            run("r1", RunState::Finished, DAY),
        ];
        let ids = |r: Retention, now: i64| r.expired(&runs, now).iter().map(|r| r.id.clone()).collect::<Vec<_>>();
        assert!(ids(Retention::default(), 100 * DAY).is_empty());
        // Count: r5 and r4 are the newest two; r2 stays as the newest finished run.
        assert_eq!(ids(Retention { keep_last: Some(2), keep_days: None }, 6 * DAY), vec!["r3", "r1"]);
        // Age at day 6 with 3 days: r5 (1 day), r4 (2 days) are younger; r3 is exactly 3 days old, not younger.
        assert_eq!(ids(Retention { keep_last: None, keep_days: Some(3) }, 6 * DAY), vec!["r3", "r1"]);
        // Either rule keeps a run: the newest one by count, r4 by age (2.5 days old).
        assert_eq!(ids(Retention { keep_last: Some(1), keep_days: Some(3) }, 6 * DAY + DAY / 2), vec!["r3", "r1"]);
        // The running run is never deleted, even when both rules would let it go.
        assert_eq!(ids(Retention { keep_last: Some(1), keep_days: Some(1) }, 100 * DAY), vec!["r4", "r3", "r1"]);
    }

    #[test]
    fn a_run_that_keeps_taking_the_process_down_gives_up() {
        let mut r = run("run_a", RunState::Queued, 0);
        r.start(1, 0, 0);
        // Died with no unit stored, three times in a row: the third resume gives up.
        assert_eq!(r.resume(), Resume::Again);
        assert_eq!(r.resume(), Resume::Again);
        assert!(matches!(r.resume(), Resume::GiveUp(m) if m.contains("3 times")));
        // A unit stored between deaths clears the strikes.
        let mut r = run("run_b", RunState::Queued, 0);
        r.start(1, 0, 0);
        for _ in 0..10 {
            r.units_done += 1;
            assert_eq!(r.resume(), Resume::Again);
        }
        // A clean stop (shutdown) is no strike.
        for _ in 0..10 {
            r.units_at_start = None;
            assert_eq!(r.resume(), Resume::Again);
        }
        assert_eq!(r.crash_strikes, 0);
    }

    #[test]
    fn id_shapes() {
        let run_id = format!("run_{}", "0123456789abcdef".repeat(2));
        assert!(IdKind::Run.is_well_formed(&run_id));
        assert!(IdKind::Dataset.is_well_formed(&format!("ds_{}", "ab".repeat(32))));
        assert!(IdKind::Schedule.is_well_formed(&format!("sch_{}", "0".repeat(32))));
        for bad in ["", "run_", "run_nothing", &run_id.to_uppercase(), &format!("{run_id}0"), &"x".repeat(10_000), &run_id.replace("run_", "sch_")] {
            assert!(!IdKind::Run.is_well_formed(bad), "{bad}");
        }
    }
}
