//! What the command line prints: tables for people, JSON for scripts.

use serde_json::{json, Value};

use crate::pb;

fn limit(v: Option<u32>) -> String {
    v.map_or("none".into(), |x| x.to_string())
}

pub fn short(x: f64) -> String {
    // Plain decimals (0.0005, 0.002), rounded to 6 significant digits.
    if x == 0.0 {
        return "0".into();
    }
    let digits = (6 - 1 - x.abs().log10().floor() as i32).max(0) as usize;
    let s = format!("{x:.digits$}");
    if s.contains('.') {
        s.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        s
    }
}

pub fn limits_json(l: &pb::SettingLimits) -> Value {
    json!({
        "criterion": l.criterion, "class_weight": l.class_weight,
        "max_depth": l.max_depth, "min_split_rows": l.min_split_rows, "min_leaf_rows": l.min_leaf_rows,
        "max_leaves": l.max_leaves, "min_gain": l.min_gain, "prune_alpha": l.prune_alpha,
    })
}

pub fn num(x: f64) -> Value {
    if x.is_finite() {
        json!(x)
    } else {
        Value::Null
    }
}

pub fn score_json(s: &pb::SettingScore) -> Value {
    json!({
        "index": s.index,
        "limits": s.limits.as_ref().map(limits_json),
        "fold_scores": s.fold_scores.iter().map(|x| num(*x)).collect::<Vec<_>>(),
        "valid_mean": num(s.valid_mean), "valid_sd": num(s.valid_sd), "train_mean": num(s.train_mean),
        "gap": num(s.gap), "mean_leaves": s.mean_leaves, "mean_depth": s.mean_depth,
    })
}

pub fn state_name(s: i32) -> &'static str {
    match pb::RunState::try_from(s).unwrap_or(pb::RunState::Unspecified) {
        pb::RunState::Queued => "queued",
        pb::RunState::Running => "running",
        pb::RunState::Finished => "finished",
        pb::RunState::Failed => "failed",
        pb::RunState::Cancelled => "cancelled",
        pb::RunState::Unspecified => "unknown",
    }
}

pub fn run_json(r: &pb::RunInfo) -> Value {
    json!({
        "id": r.id, "state": state_name(r.state), "dataset_id": r.dataset_id, "dataset_name": r.dataset_name,
        "dataset_version": r.dataset_version, "labels": r.labels, "created_at": r.created_at,
        "started_at": r.started_at, "finished_at": r.finished_at, "reason": r.reason, "metric": r.metric,
        "settings": r.settings, "units_done": r.units_done, "units_total": r.units_total,
        "picked": r.picked, "best": r.best, "schedule_id": r.schedule_id, "owner": r.owner,
        "scores": r.scores.iter().map(score_json).collect::<Vec<_>>(),
        "model": r.model.as_ref().map(|m| json!({"nodes": m.nodes, "leaves": m.leaves, "depth": m.depth, "classes": m.classes})),
        "dataset_rows": r.dataset_rows,
        "drift": r.drift.as_ref().map(super::schedules::drift_json),
    })
}

pub fn dataset_json(d: &pb::DatasetInfo) -> Value {
    json!({
        "id": d.id, "name": d.name, "version": d.version, "rows": d.rows, "target": d.target, "task": d.task,
        "created_at": d.created_at, "bytes": d.bytes, "sha256": d.sha256, "unchanged": d.unchanged,
        "columns": d.columns.iter().map(|c| json!({"name": c.name, "kind": if c.kind == pb::ColumnKind::Categorical as i32 { "categorical" } else { "numeric" }, "missing": c.missing, "levels": c.levels})).collect::<Vec<_>>(),
    })
}

/// The knobs of a setting as tables and summaries name them: the criterion, the class
/// weighting and the six limits.
pub const KNOBS: [&str; 8] = ["criterion", "class_weight", "max_depth", "min_split_rows", "min_leaf_rows", "max_leaves", "min_gain", "prune_alpha"];

/// A setting's knob values as text, in [`KNOBS`] order (`-` where the task has none).
pub fn knob_values(l: &pb::SettingLimits) -> [String; 8] {
    let text = |s: &str| if s.is_empty() { "-".to_string() } else { s.to_string() };
    [text(&l.criterion), text(&l.class_weight), limit(l.max_depth), l.min_split_rows.to_string(), l.min_leaf_rows.to_string(), limit(l.max_leaves), short(l.min_gain), short(l.prune_alpha)]
}

/// Which knobs vary over these scores (indices into [`KNOBS`]), and the constant ones as
/// `name = value`.
pub fn split_knobs(scores: &[pb::SettingScore]) -> (Vec<usize>, Vec<String>) {
    let values: Vec<[String; 8]> = scores.iter().map(|s| knob_values(&s.limits.clone().unwrap_or_default())).collect();
    let mut varying = Vec::new();
    let mut fixed = Vec::new();
    for (k, name) in KNOBS.iter().enumerate() {
        match values.first() {
            Some(first) if values.iter().all(|v| v[k] == first[k]) => fixed.push(format!("{name} = {}", first[k])),
            Some(_) => varying.push(k),
            None => {}
        }
    }
    (varying, fixed)
}

/// The scores table: the picked setting first, then settings best first by validation score,
/// training and validation side by side. Only the knobs that vary get a column; the constant
/// ones are listed once above the table. Settings whose scores are identical on every fold
/// (they grew the same trees) share one row, shown by the lowest grid number, with a count.
/// Every column is right-aligned under its header (scripts can find a column by its name).
pub fn scores_table(scores: &[pb::SettingScore], metric: &str, higher_is_better: bool, top: usize, picked: Option<u32>, best: Option<u32>) -> String {
    let mut order: Vec<&pb::SettingScore> = scores.iter().collect();
    order.sort_by(|a, b| {
        let (x, y) = if higher_is_better { (b.valid_mean, a.valid_mean) } else { (a.valid_mean, b.valid_mean) };
        x.total_cmp(&y).then(a.mean_leaves.total_cmp(&b.mean_leaves)).then(a.index.cmp(&b.index))
    });
    let same = |a: &pb::SettingScore, b: &pb::SettingScore| a.fold_scores == b.fold_scores && a.train_mean == b.train_mean && a.mean_leaves == b.mean_leaves && a.mean_depth == b.mean_depth;
    // Groups of identical results, in ranking order.
    let mut groups: Vec<Vec<&pb::SettingScore>> = Vec::new();
    for s in order {
        match groups.iter_mut().find(|g| same(g[0], s)) {
            Some(g) => g.push(s),
            None => groups.push(vec![s]),
        }
    }
    let folds = scores.first().map_or(0, |s| s.fold_scores.len());
    let (varying, fixed) = split_knobs(scores);
    // The rows shown: a mark and the group.
    let find = |i: Option<u32>| i.and_then(|i| groups.iter().find(|g| g.iter().any(|s| s.index == i)));
    let mut shown: Vec<(String, &Vec<&pb::SettingScore>)> = Vec::new();
    if let Some(g) = find(picked) {
        shown.push(("picked".into(), g));
    }
    // The best is listed as #1 anyway; say so only when it is not the first group shown.
    let first_best = groups.first().is_some_and(|g| g.iter().any(|s| Some(s.index) == best));
    if best != picked && !first_best {
        if let Some(g) = find(best) {
            shown.push(("best".into(), g));
        }
    }
    for (rank, g) in groups.iter().take(top).enumerate() {
        shown.push((format!("#{}", rank + 1), g));
    }
    // Cells: mark, grid#, the varying knobs, then the scores.
    let mut header: Vec<String> = vec![String::new(), "grid#".into()];
    header.extend(varying.iter().map(|&k| KNOBS[k].to_string()));
    header.extend(["training", "validation", "sd", "gap", "leaves"].map(String::from));
    let rows: Vec<(Vec<String>, usize)> = shown
        .iter()
        .map(|(mark, g)| {
            let s = g.iter().min_by_key(|s| s.index).unwrap();
            let v = knob_values(&s.limits.clone().unwrap_or_default());
            let mut cells = vec![mark.clone(), s.index.to_string()];
            cells.extend(varying.iter().map(|&k| v[k].clone()));
            cells.extend([format!("{:.4}", s.train_mean), format!("{:.4}", s.valid_mean), format!("{:.4}", s.valid_sd), format!("{:+.4}", s.gap), format!("{:.1}", s.mean_leaves)]);
            (cells, g.len() - 1)
        })
        .collect();
    let widths: Vec<usize> = (0..header.len()).map(|c| rows.iter().map(|r| r.0[c].chars().count()).chain([header[c].len()]).max().unwrap_or(0)).collect();
    let line = |cells: &[String]| {
        let mut text = format!("{:<w$}", cells[0], w = widths[0]);
        for (c, cell) in cells.iter().enumerate().skip(1) {
            text.push_str(&format!(" {:>w$}", cell, w = widths[c]));
        }
        text
    };
    let better = if higher_is_better { "higher is better" } else { "lower is better" };
    let mut out = String::new();
    out.push_str(&format!("{metric}: training and validation means over {folds} folds ({better}); sd = sample sd of the validation fold scores\n"));
    out.push_str("gap = how much better training scores than validation (larger = more overfit); leaves = mean leaves per tree\n");
    out.push_str("(+N alike) = N more settings grew the same trees and scored the same\n");
    if !fixed.is_empty() {
        out.push_str(&format!("fixed: {}\n", fixed.join(", ")));
    }
    out.push_str(line(&header).trim_end());
    out.push('\n');
    for (cells, alike) in &rows {
        out.push_str(&line(cells));
        if *alike > 0 {
            out.push_str(&format!(" (+{alike} alike)"));
        }
        out.push('\n');
    }
    out
}

pub fn run_line(r: &pb::RunInfo) -> String {
    format!(
        "{}  {:<9}  {}@v{}  {}  {}/{} units{}",
        r.id,
        state_name(r.state),
        if r.dataset_name.is_empty() { &r.dataset_id } else { &r.dataset_name },
        r.dataset_version,
        r.created_at,
        r.units_done,
        r.units_total,
        if r.reason.is_empty() { String::new() } else { format!("  ({})", r.reason) }
    )
}

pub fn dataset_line(d: &pb::DatasetInfo) -> String {
    let unchanged = if d.unchanged { "  (unchanged: the newest version already has these bytes and target)" } else { "" };
    format!("{}  {}  v{}{unchanged}  {} rows  {} columns  target '{}' ({})  {}", d.id, d.name, d.version, d.rows, d.columns.len(), d.target, if d.task.is_empty() { "none" } else { &d.task }, d.created_at)
}

/// Whether a metric's larger values are better (by name, as the wire carries it).
pub fn higher_is_better(metric: &str) -> bool {
    crate::sweep::Metric::parse(metric).is_none_or(|m| m.higher_is_better())
}
