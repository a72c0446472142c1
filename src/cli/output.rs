//! What the command line prints: tables for people, JSON for scripts.

use serde_json::{json, Value};

use crate::pb;

/// One condition of a row's path in words: `petal_length_cm <= 2.45: holds`, and for a
/// blank cell (or a category the training rows did not have) the side it was sent to.
pub fn condition_words(c: &pb::PathCondition) -> String {
    let side = if c.holds { "holds" } else { "fails" };
    if c.missing {
        format!("{}: blank cell, sent to the {side} side", c.text)
    } else {
        format!("{}: {side}", c.text)
    }
}

/// One condition of a row's path as JSON fields.
pub fn condition_json(c: &pb::PathCondition) -> serde_json::Value {
    let mut v = json!({"node": c.node, "feature": c.feature, "test": c.text, "holds": c.holds, "missing": c.missing});
    if c.categories.is_empty() {
        v["threshold"] = num(c.threshold);
    } else {
        v["categories"] = json!(c.categories);
    }
    v
}

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

/// The Pareto front, fewest leaves first, wrapped to the table width:
/// `grid# 3 (4 leaves, 0.94)`.
pub fn pareto_lines(scores: &[pb::SettingScore], front: &[u32], metric: &str) -> String {
    let points: Vec<String> = front
        .iter()
        .filter_map(|&i| scores.iter().find(|s| s.index == i))
        .map(|s| format!("grid# {} ({} leaves, {})", s.index, short(s.mean_leaves), short(s.valid_mean)))
        .collect();
    wrap(&format!("no setting beats these on both {metric} and mean leaves: "), &points, 120)
}

/// What nested cross-validation measured, in words: the outer estimate, the optimism of the
/// inner best, how often each setting was picked, and one line per outer split.
pub fn nested_lines(n: &pb::NestedEstimate, metric: &str) -> String {
    let better = if higher_is_better(metric) { "higher" } else { "lower" };
    let k = n.folds.len().max(1) as f64;
    let inner_best = n.folds.iter().map(|f| f.inner_best).sum::<f64>() / k;
    let mut out = format!(
        "nested cross-validation, {} outer splits ({better} {metric} is better): outer {} ± {} sd\n  inner best {}, optimism {} (the inner best's lead over the outer score; larger means more optimistic)\n",
        n.folds.len(),
        short(n.outer_mean),
        short(n.outer_sd),
        short(inner_best),
        short(n.optimism),
    );
    let mut counts: Vec<(u32, usize)> = Vec::new();
    for f in &n.folds {
        match counts.iter_mut().find(|(p, _)| *p == f.picked) {
            Some(c) => c.1 += 1,
            None => counts.push((f.picked, 1)),
        }
    }
    counts.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
    let picks: Vec<String> = counts.iter().map(|(p, c)| format!("grid# {p} ({c}×)")).collect();
    out.push_str(&wrap("  picked by the outer splits: ", &picks, 120));
    for f in &n.folds {
        out.push_str(&format!(
            "  outer split {}.{}: grid# {}, inner best {}, inner picked {}, outer {}, {} leaves\n",
            f.repeat,
            f.fold,
            f.picked,
            short(f.inner_best),
            short(f.inner_picked),
            short(f.outer_score),
            f.leaves
        ));
    }
    out
}

/// Width of the feature column in the importance table; longer names are cut with `…`.
const FEATURE_WIDTH: usize = 40;

/// What the picked setting leans on, most first (by permutation drop, else impurity share),
/// at most `top` features and a count of the rest. Every line fits in 120 characters.
pub fn importance_lines(r: &pb::RunInfo, metric: &str, top: usize) -> String {
    if r.importances.is_empty() {
        return String::new();
    }
    let mut order: Vec<&pb::FeatureImportance> = r.importances.iter().collect();
    let key = |f: &pb::FeatureImportance| f.permutation_mean.or(f.impurity).unwrap_or(0.0);
    order.sort_by(|a, b| key(b).total_cmp(&key(a)).then(a.feature.cmp(&b.feature)));
    let folds = r.scores.first().map_or(0, |s| s.fold_scores.len());
    let mut out = String::from("what the picked setting leans on, most first:\n");
    if r.permutation_repeats > 0 {
        out += &format!("  shuffled, sd: drop in {metric} when the feature is shuffled ({} shuffles in each of {folds} validation folds)\n", r.permutation_repeats);
    }
    out += "  share: the feature's share of the model's impurity decrease\n";
    out += &format!("  {:<FEATURE_WIDTH$} {:>12} {:>10} {:>8}\n", "feature", "shuffled", "sd", "share");
    let cell = |x: Option<f64>| x.map_or("-".to_string(), |v| format!("{v:.4}"));
    for f in order.iter().take(top) {
        let name: String = if f.feature.chars().count() > FEATURE_WIDTH { f.feature.chars().take(FEATURE_WIDTH - 1).chain(['…']).collect() } else { f.feature.clone() };
        out += &format!("  {name:<FEATURE_WIDTH$} {:>12} {:>10} {:>8}\n", cell(f.permutation_mean), cell(f.permutation_sd), cell(f.impurity));
    }
    if order.len() > top {
        out += &format!("  … {} more features (--top)\n", order.len() - top);
    }
    out
}

pub fn nested_json(n: &pb::NestedEstimate) -> Value {
    json!({
        "outer_mean": n.outer_mean, "outer_sd": n.outer_sd, "optimism": n.optimism,
        "folds": n.folds.iter().map(|f| json!({
            "repeat": f.repeat, "fold": f.fold, "picked": f.picked, "inner_best": f.inner_best,
            "inner_picked": f.inner_picked, "outer_score": f.outer_score, "leaves": f.leaves,
        })).collect::<Vec<_>>(),
    })
}

pub fn importance_json(f: &pb::FeatureImportance) -> Value {
    json!({"feature": f.feature, "impurity": f.impurity.map(num), "permutation_mean": f.permutation_mean.map(num), "permutation_sd": f.permutation_sd.map(num)})
}

pub fn run_json(r: &pb::RunInfo) -> Value {
    json!({
        "id": r.id, "state": state_name(r.state), "dataset_id": r.dataset_id, "dataset_name": r.dataset_name,
        "dataset_version": r.dataset_version, "labels": r.labels, "created_at": r.created_at,
        "started_at": r.started_at, "finished_at": r.finished_at, "reason": r.reason, "metric": r.metric,
        "settings": r.settings, "units_done": r.units_done, "units_total": r.units_total,
        "picked": r.picked, "best": r.best, "pareto_front": r.pareto_front, "schedule_id": r.schedule_id, "owner": r.owner,
        "scores": r.scores.iter().map(score_json).collect::<Vec<_>>(),
        "model": r.model.as_ref().map(|m| json!({"nodes": m.nodes, "leaves": m.leaves, "depth": m.depth, "classes": m.classes, "decision": m.decision.as_ref().map(|d| decision_json(d.threshold, d.costs.unwrap_or_default()))})),
        "dataset_rows": r.dataset_rows,
        "drift": r.drift.as_ref().map(super::schedules::drift_json),
        "nested": r.nested.as_ref().map(nested_json),
        "importances": r.importances.iter().map(importance_json).collect::<Vec<_>>(),
        "permutation_repeats": r.permutation_repeats,
        "monotone": monotone_of(r).into_iter().collect::<serde_json::Map<_, _>>(),
    })
}

/// The run's monotone limits as (feature, direction word) pairs, in the order given.
fn monotone_of(r: &pb::RunInfo) -> Vec<(String, Value)> {
    let word = |d: i32| match pb::MonotoneDirection::try_from(d) {
        Ok(pb::MonotoneDirection::Increasing) => "increasing",
        Ok(pb::MonotoneDirection::Decreasing) => "decreasing",
        _ => "free",
    };
    r.spec.iter().flat_map(|s| &s.monotone).map(|m| (m.feature.clone(), Value::from(word(m.direction)))).collect()
}

/// The run's monotone limits in words, `None` when it has none:
/// `monotone limits: age increasing, debt decreasing`.
pub fn monotone_line(r: &pb::RunInfo) -> Option<String> {
    let limits = monotone_of(r);
    (!limits.is_empty()).then(|| {
        let parts: Vec<String> = limits.iter().map(|(f, d)| format!("{f} {}", d.as_str().unwrap_or(""))).collect();
        wrap("monotone limits: ", &parts, 120).trim_end().to_string()
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

/// The column names of the knobs in the scores table, in [`KNOBS`] order: short, so a table
/// of every knob fits in [`WIDTH`] columns; each one that differs from its knob's name is
/// spelled out in the table's notes.
pub const KNOB_COLUMNS: [&str; 8] = ["criterion", "weight", "depth", "split", "leaf", "leaf_cap", "gain", "alpha"];

/// How wide a table's lines may be, notes included (a common terminal is wider than this).
pub const WIDTH: usize = 120;

/// A number for a table cell: 3 significant digits as a plain decimal (0.000316), or with an
/// exponent below 0.0001 (3.16e-5), so a cell stays short whatever a range made.
pub fn compact(x: f64) -> String {
    if x == 0.0 || !x.is_finite() {
        return short(x);
    }
    // Rounded to 3 significant digits first, so 0.0000999… counts as 0.0001.
    let e = format!("{x:.2e}");
    let (mantissa, exp) = e.split_once('e').unwrap_or((&e, "0"));
    let exp: i32 = exp.parse().unwrap_or(0);
    let trim = |s: &str| if s.contains('.') { s.trim_end_matches('0').trim_end_matches('.').to_string() } else { s.to_string() };
    if exp < -4 {
        return format!("{}e{exp}", trim(mantissa));
    }
    let digits = (2 - exp).max(0) as usize;
    trim(&format!("{x:.digits$}"))
}

/// Decimals for a column of scores: 5 significant digits for the largest value (0.8533,
/// 58.123, 3456.1), never more than 4 decimals.
fn decimals(values: impl Iterator<Item = f64>) -> usize {
    let top = values.filter(|x| x.is_finite()).fold(0.0_f64, |m, x| m.max(x.abs()));
    if top < 1.0 {
        return 4;
    }
    (4 - top.log10().floor() as i64).clamp(0, 4) as usize
}

/// `prefix` and the items joined by `, `, broken into lines of at most `width` characters
/// (later lines indented by two spaces); each line ends with a newline.
pub fn wrap(prefix: &str, items: &[String], width: usize) -> String {
    let mut out = String::new();
    let mut line = prefix.to_string();
    let mut first = true;
    for (i, item) in items.iter().enumerate() {
        let piece = if i + 1 < items.len() { format!("{item},") } else { item.clone() };
        let gap = if first { "" } else { " " };
        if !first && line.chars().count() + gap.len() + piece.chars().count() > width {
            out.push_str(&line);
            out.push('\n');
            line = format!("  {piece}");
        } else {
            line.push_str(gap);
            line.push_str(&piece);
        }
        first = false;
    }
    out.push_str(&line);
    out.push('\n');
    out
}

/// The scores table: the picked setting first, then settings best first by validation score,
/// training and validation side by side. Only the knobs that vary get a column (under a short
/// name, spelled out above the table); the constant ones are listed once above the table.
/// Settings whose scores are identical on every fold (they grew the same trees) share one
/// row, shown by the lowest grid number, with how many others are alike. Every column is
/// right-aligned under its header (scripts can find a column by its name), and every line
/// fits in [`WIDTH`] columns for a grid of every knob.
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
    let firsts: Vec<&pb::SettingScore> = shown.iter().map(|(_, g)| *g.iter().min_by_key(|s| s.index).unwrap()).collect();
    let alike = shown.iter().any(|(_, g)| g.len() > 1);
    let d = decimals(firsts.iter().flat_map(|s| [s.train_mean, s.valid_mean]));
    // Cells: mark, grid#, the varying knobs, then the scores (and how many are alike).
    let mut header: Vec<String> = vec![String::new(), "grid#".into()];
    header.extend(varying.iter().map(|&k| KNOB_COLUMNS[k].to_string()));
    header.extend(["train", "valid", "sd", "gap", "leaves"].map(String::from));
    if alike {
        header.push("alike".into());
    }
    let rows: Vec<Vec<String>> = shown
        .iter()
        .zip(&firsts)
        .map(|((mark, g), s)| {
            let l = s.limits.clone().unwrap_or_default();
            let mut v = knob_values(&l);
            v[6] = compact(l.min_gain);
            v[7] = compact(l.prune_alpha);
            let mut cells = vec![mark.clone(), s.index.to_string()];
            cells.extend(varying.iter().map(|&k| v[k].clone()));
            cells.extend([format!("{:.d$}", s.train_mean), format!("{:.d$}", s.valid_mean), format!("{:.d$}", s.valid_sd), format!("{:+.d$}", s.gap), format!("{:.1}", s.mean_leaves)]);
            if alike {
                cells.push(if g.len() > 1 { format!("+{}", g.len() - 1) } else { String::new() });
            }
            cells
        })
        .collect();
    let widths: Vec<usize> = (0..header.len()).map(|c| rows.iter().map(|r| r[c].chars().count()).chain([header[c].len()]).max().unwrap_or(0)).collect();
    let line = |cells: &[String]| {
        let mut text = format!("{:<w$}", cells[0], w = widths[0]);
        for (c, cell) in cells.iter().enumerate().skip(1) {
            text.push_str(&format!(" {:>w$}", cell, w = widths[c]));
        }
        text.trim_end().to_string()
    };
    let better = if higher_is_better { "higher is better" } else { "lower is better" };
    let mut out = String::new();
    out.push_str(&format!("{metric} ({better}): train, valid = mean training and validation scores over {folds} folds\n"));
    out.push_str("sd = sample sd of the validation fold scores; gap = how much better train scores than valid (larger = more overfit)\n");
    out.push_str("leaves = mean leaves per tree");
    if alike {
        out.push_str("; alike = how many more settings grew the same trees and scored the same");
    }
    out.push('\n');
    let named: Vec<String> = varying.iter().filter(|&&k| KNOB_COLUMNS[k] != KNOBS[k]).map(|&k| format!("{} = {}", KNOB_COLUMNS[k], KNOBS[k])).collect();
    if !named.is_empty() {
        out.push_str(&wrap("columns: ", &named, WIDTH));
    }
    if !fixed.is_empty() {
        out.push_str(&wrap("fixed: ", &fixed, WIDTH));
    }
    out.push_str(&line(&header));
    out.push('\n');
    for cells in &rows {
        out.push_str(&line(cells));
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn compact_numbers_keep_three_digits() {
        let cases = [(0.0, "0"), (0.000316227766, "0.000316"), (0.00009999999, "0.0001"), (0.0000316, "3.16e-5"), (0.00001, "1e-5"), (0.03, "0.03"), (12.345, "12.3"), (100.0, "100"), (123456.0, "123456"), (-0.5, "-0.5")];
        for (x, want) in cases {
            assert_eq!(compact(x), want, "{x}");
        }
    }

    #[test]
    fn score_decimals_follow_the_largest_value() {
        assert_eq!(decimals([0.85, 0.99].into_iter()), 4);
        assert_eq!(decimals([1.0].into_iter()), 4);
        assert_eq!(decimals([54.2, 59.9].into_iter()), 3);
        assert_eq!(decimals([3456.1, f64::NAN].into_iter()), 1);
        assert_eq!(decimals([123456.0].into_iter()), 0);
    }

    #[test]
    fn wrap_breaks_between_items() {
        let items: Vec<String> = ["alpha = 1", "beta = 2", "gamma = 3"].map(String::from).into();
        assert_eq!(wrap("fixed: ", &items, 120), "fixed: alpha = 1, beta = 2, gamma = 3\n");
        assert_eq!(wrap("fixed: ", &items, 27), "fixed: alpha = 1, beta = 2,\n  gamma = 3\n");
        assert_eq!(wrap("fixed: ", &items, 10), "fixed: alpha = 1,\n  beta = 2,\n  gamma = 3\n");
    }
}

/// The decision rule of a model fitted under decision costs, in one line: the class it
/// decides when, and where the threshold came from.
pub fn decision_line(threshold: f64, costs: pb::DecisionCosts, classes: &[String]) -> String {
    let positive = classes.get(1).map_or("class 1", String::as_str);
    let bayes = costs.false_alarm / (costs.false_alarm + costs.miss);
    let rule = if threshold > 1.0 { format!("never decides {positive} (no share reaches a threshold above 1)") } else { format!("decides {positive} when p({positive}) >= {threshold:.4}") };
    format!("decision: {rule}; chosen on the validation folds for costs false alarm {} and miss {} (Bayes threshold {bayes:.4})\n", costs.false_alarm, costs.miss)
}

/// The decision rule as JSON.
pub fn decision_json(threshold: f64, costs: pb::DecisionCosts) -> serde_json::Value {
    json!({"threshold": threshold, "false_alarm": costs.false_alarm, "miss": costs.miss, "bayes_threshold": costs.false_alarm / (costs.false_alarm + costs.miss)})
}
