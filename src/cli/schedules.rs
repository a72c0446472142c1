//! `pollard schedule …`: create, list, show, pause, resume and delete schedules, and list
//! their fires.

use clap::{Args, Subcommand};
use serde_json::{json, Value};
use super::client::Conn;

use super::error::{CliError, Res};
use super::output;
use super::{labels, GridArgs};
use crate::pb;
use crate::pb::schedules_client::SchedulesClient;

#[derive(Subcommand, Debug)]
pub enum ScheduleCommand {
    /// Create a schedule: a sweep template started at the times of a crontab expression.
    Create(CreateArgs),
    /// List schedules, newest first.
    List,
    /// Show one schedule and its latest fires.
    Show {
        /// Schedule id (sch_...).
        schedule: String,
        /// Fires to list, newest first.
        #[arg(long, default_value_t = 10)]
        fires: u32,
    },
    /// Stop starting runs until resumed.
    Pause {
        /// Schedule id (sch_...).
        schedule: String,
    },
    /// Start runs again from the next fire (fires during the pause are not caught up).
    Resume {
        /// Schedule id (sch_...).
        schedule: String,
    },
    /// Delete a schedule and its fire records (its runs stay).
    Delete {
        /// Schedule id (sch_...).
        schedule: String,
    },
    /// List a schedule's fires, newest first: started, or skipped and why.
    Fires {
        /// Schedule id (sch_...).
        schedule: String,
        /// Fires to list at most.
        #[arg(long, default_value_t = 20)]
        limit: u32,
    },
}

#[derive(Args, Debug)]
pub struct CreateArgs {
    /// Dataset name (every fire sweeps its latest version), or one exact id (ds_...).
    #[arg(long)]
    pub dataset: String,
    /// 5-field crontab expression, e.g. "30 2 * * *" for 02:30 every night.
    #[arg(long)]
    pub cron: String,
    /// IANA time zone the expression is read in, e.g. Europe/Berlin.
    #[arg(long, default_value = "UTC")]
    pub zone: String,
    /// A name for people.
    #[arg(long, default_value = "")]
    pub name: String,
    #[command(flatten)]
    pub grid: GridArgs,
    /// Labels key=value every run carries (repeatable).
    #[arg(long = "label")]
    pub labels: Vec<String>,
    /// Keep the newest N runs.
    #[arg(long)]
    pub keep_last: Option<u32>,
    /// Keep runs younger than D days.
    #[arg(long)]
    pub keep_days: Option<u32>,
    /// After downtime: once (one run for the missed fires) or skip.
    #[arg(long, default_value = "once")]
    pub catch_up: String,
    /// Skip a fire when the dataset has no new version since the last run.
    #[arg(long)]
    pub skip_unchanged: bool,
    /// Flag a drift report when the score got worse by more than this (default 0.02).
    #[arg(long)]
    pub score_drop: Option<f64>,
    /// Flag a drift report when the tree grew or shrank by more than this factor (default 2).
    #[arg(long)]
    pub size_factor: Option<f64>,
}

pub async fn run(ch: Conn, command: ScheduleCommand, json_out: bool) -> Res {
    let mut client = SchedulesClient::new(ch);
    match command {
        ScheduleCommand::Create(a) => {
            let catch_up = match a.catch_up.as_str() {
                "once" => pb::CatchUp::Once,
                "skip" => pb::CatchUp::Skip,
                other => return Err(CliError::usage(format!("--catch-up: '{other}' is not once or skip"))),
            };
            let req = pb::CreateScheduleRequest {
                name: a.name,
                cron: a.cron,
                time_zone: a.zone,
                dataset_name: if a.dataset.starts_with("ds_") { String::new() } else { a.dataset.clone() },
                dataset_id: if a.dataset.starts_with("ds_") { a.dataset } else { String::new() },
                spec: Some(a.grid.to_spec()?),
                labels: labels(&a.labels)?,
                retention: Some(pb::Retention { keep_last: a.keep_last.unwrap_or(0), keep_days: a.keep_days.unwrap_or(0) }),
                catch_up: catch_up as i32,
                skip_unchanged: a.skip_unchanged,
                drift: Some(pb::DriftThresholds { score_drop: a.score_drop.unwrap_or(0.0), size_factor: a.size_factor.unwrap_or(0.0) }),
            };
            let s = client.create_schedule(req).await.map_err(CliError::status)?.into_inner();
            print_schedule(&s, json_out);
        }
        ScheduleCommand::List => {
            let r = client.list_schedules(pb::ListSchedulesRequest { page_size: 500, page_token: String::new() }).await.map_err(CliError::status)?.into_inner();
            if json_out {
                println!("{}", json!(r.schedules.iter().map(schedule_json).collect::<Vec<_>>()));
            } else {
                for s in &r.schedules {
                    println!("{}", schedule_line(s));
                }
            }
        }
        ScheduleCommand::Show { schedule, fires } => {
            let s = client.get_schedule(pb::GetScheduleRequest { id: schedule.clone() }).await.map_err(CliError::status)?.into_inner();
            let f = client.list_fires(pb::ListFiresRequest { schedule_id: schedule, page_size: fires.max(1), page_token: String::new() }).await.map_err(CliError::status)?.into_inner();
            if json_out {
                let mut v = schedule_json(&s);
                v["fires"] = json!(f.fires.iter().map(fire_json).collect::<Vec<_>>());
                println!("{v}");
            } else {
                println!("{}", schedule_line(&s));
                let r = s.retention.unwrap_or_default();
                let d = s.drift.unwrap_or_default();
                println!(
                    "  dataset '{}'  catch-up {}  skip unchanged {}  keep last {}  keep days {}  flags: score drop > {}, size factor > {}",
                    s.dataset_name,
                    catch_up_name(s.catch_up),
                    if s.skip_unchanged { "yes" } else { "no" },
                    if r.keep_last == 0 { "all".to_string() } else { r.keep_last.to_string() },
                    if r.keep_days == 0 { "any".to_string() } else { r.keep_days.to_string() },
                    d.score_drop,
                    d.size_factor
                );
                for fire in &f.fires {
                    println!("  {}", fire_line(fire));
                }
            }
        }
        ScheduleCommand::Pause { schedule } => print_schedule(&client.pause_schedule(pb::PauseScheduleRequest { id: schedule }).await.map_err(CliError::status)?.into_inner(), json_out),
        ScheduleCommand::Resume { schedule } => print_schedule(&client.resume_schedule(pb::ResumeScheduleRequest { id: schedule }).await.map_err(CliError::status)?.into_inner(), json_out),
        ScheduleCommand::Delete { schedule } => {
            client.delete_schedule(pb::DeleteScheduleRequest { id: schedule.clone() }).await.map_err(CliError::status)?;
            if json_out {
                println!("{}", json!({"deleted": schedule}));
            } else {
                println!("deleted {schedule}");
            }
        }
        ScheduleCommand::Fires { schedule, limit } => {
            let f = client.list_fires(pb::ListFiresRequest { schedule_id: schedule, page_size: limit.max(1), page_token: String::new() }).await.map_err(CliError::status)?.into_inner();
            if json_out {
                println!("{}", json!(f.fires.iter().map(fire_json).collect::<Vec<_>>()));
            } else {
                for fire in &f.fires {
                    println!("{}", fire_line(fire));
                }
            }
        }
    }
    Ok(())
}

fn print_schedule(s: &pb::ScheduleInfo, json_out: bool) {
    if json_out {
        println!("{}", schedule_json(s));
    } else {
        println!("{}", schedule_line(s));
    }
}

fn catch_up_name(c: i32) -> &'static str {
    match pb::CatchUp::try_from(c).unwrap_or(pb::CatchUp::Unspecified) {
        pb::CatchUp::Skip => "skip",
        _ => "once",
    }
}

fn outcome_name(o: i32) -> &'static str {
    match pb::FireOutcome::try_from(o).unwrap_or(pb::FireOutcome::Unspecified) {
        pb::FireOutcome::Started => "started",
        pb::FireOutcome::SkippedBusy => "skipped_busy",
        pb::FireOutcome::SkippedUnchanged => "skipped_unchanged",
        pb::FireOutcome::SkippedMissed => "skipped_missed",
        pb::FireOutcome::Failed => "failed",
        pb::FireOutcome::SkippedQueueFull => "skipped_queue_full",
        pb::FireOutcome::Unspecified => "unknown",
    }
}

pub fn schedule_json(s: &pb::ScheduleInfo) -> Value {
    let r = s.retention.unwrap_or_default();
    let d = s.drift.unwrap_or_default();
    json!({
        "id": s.id, "name": s.name, "cron": s.cron, "time_zone": s.time_zone, "dataset_name": s.dataset_name, "dataset_id": s.dataset_id,
        "labels": s.labels, "keep_last": r.keep_last, "keep_days": r.keep_days, "catch_up": catch_up_name(s.catch_up),
        "skip_unchanged": s.skip_unchanged, "score_drop": d.score_drop, "size_factor": d.size_factor,
        "paused": s.paused, "created_at": s.created_at, "next_fire_at": s.next_fire_at, "last_run_id": s.last_run_id,
        "last_fire": s.last_fire.as_ref().map(fire_json),
    })
}

fn fire_json(f: &pb::Fire) -> Value {
    json!({
        "sequence": f.sequence, "scheduled_for": f.scheduled_for, "handled_at": f.handled_at,
        "outcome": outcome_name(f.outcome), "run_id": f.run_id, "missed": f.missed, "detail": f.detail,
    })
}

fn schedule_line(s: &pb::ScheduleInfo) -> String {
    let when = if s.paused { "paused".to_string() } else { format!("next {}", s.next_fire_at) };
    let name = if s.name.is_empty() { String::new() } else { format!("  '{}'", s.name) };
    format!("{}{name}  \"{}\" {}  {}  on '{}'  last run {}", s.id, s.cron, s.time_zone, when, s.dataset_name, if s.last_run_id.is_empty() { "none" } else { &s.last_run_id })
}

fn fire_line(f: &pb::Fire) -> String {
    let run = if f.run_id.is_empty() { String::new() } else { format!("  {}", f.run_id) };
    let detail = if f.detail.is_empty() { String::new() } else { format!("  ({})", f.detail) };
    format!("#{:<4} for {}  {:<17}{run}{detail}", f.sequence, f.scheduled_for, outcome_name(f.outcome))
}

/// The drift report of a run, as lines for people.
pub fn drift_lines(d: &pb::DriftReport, metric: &str) -> String {
    let mut out = format!("drift against {}:\n", d.previous_run_id);
    if d.picked_changed {
        let moved: Vec<String> = d.moved.iter().map(|m| format!("{} {} -> {}", m.limit, m.from, m.to)).collect();
        out.push_str(&format!("  picked setting changed: {}\n", moved.join(", ")));
    } else {
        out.push_str("  picked setting unchanged\n");
    }
    let better = if output::higher_is_better(metric) { "higher is better" } else { "lower is better" };
    out.push_str(&format!("  {metric} ({better}) {:.4} -> {:.4} ({:+.4} ± {:.4} standard error)\n", d.previous_score, d.score, d.score_delta, d.score_delta_se));
    out.push_str(&format!("  dataset v{} ({} rows) -> v{} ({} rows)\n", d.previous_version, d.previous_rows, d.version, d.rows));
    out.push_str(&format!("  leaves {} -> {}\n", output::short(d.previous_leaves), output::short(d.leaves)));
    let flags: Vec<&str> = [(d.score_fell, "score fell"), (d.tree_grew, "tree grew"), (d.tree_shrank, "tree shrank")].into_iter().filter(|f| f.0).map(|f| f.1).collect();
    out.push_str(&format!("  flags: {}\n", if flags.is_empty() { "none".to_string() } else { flags.join(", ") }));
    out
}

pub fn drift_json(d: &pb::DriftReport) -> Value {
    json!({
        "previous_run_id": d.previous_run_id, "picked_changed": d.picked_changed,
        "moved": d.moved.iter().map(|m| json!({"limit": m.limit, "from": m.from, "to": m.to})).collect::<Vec<_>>(),
        "previous_score": output::num(d.previous_score), "score": output::num(d.score),
        "score_delta": output::num(d.score_delta), "score_delta_se": output::num(d.score_delta_se),
        "previous_dataset_id": d.previous_dataset_id, "dataset_id": d.dataset_id,
        "previous_version": d.previous_version, "version": d.version, "previous_rows": d.previous_rows, "rows": d.rows,
        "previous_leaves": d.previous_leaves, "leaves": d.leaves,
        "score_fell": d.score_fell, "tree_grew": d.tree_grew, "tree_shrank": d.tree_shrank,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The drift report shows scores, so it says which way is better for the run's metric.
    #[test]
    fn drift_lines_say_which_way_is_better() {
        let d = pb::DriftReport { previous_run_id: "run_a".into(), previous_score: 0.9, score: 0.85, score_delta: -0.05, ..Default::default() };
        let text = drift_lines(&d, "accuracy");
        assert!(text.contains("  accuracy (higher is better) 0.9000 -> 0.8500 (-0.0500"), "{text}");
        let text = drift_lines(&d, "rmse");
        assert!(text.contains("  rmse (lower is better) 0.9000 -> 0.8500"), "{text}");
    }
}
