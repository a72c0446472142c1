//! `pollard report RUN --out DIR`, and the files the demo writes: for one stored run, the
//! scores (CSV), one plot per varying limit (the best and the picked setting marked), the
//! model in every format (JSON, DOT, text, ONNX) and a short `summary.txt`.

use std::path::{Path, PathBuf};

use serde_json::json;

use super::client::Conn;
use super::error::{CliError, Res};
use super::output::{self, higher_is_better};
use super::ReportArgs;
use crate::pb;
use crate::pb::models_client::ModelsClient;
use crate::pb::runs_client::RunsClient;
use crate::rpc::convert;

/// Creates `dir` (and its parents) or says which path cannot be made.
pub fn make_dir(dir: &Path) -> Res {
    std::fs::create_dir_all(dir).map_err(|e| CliError::from(format!("{}: {e}", dir.display())))?;
    Ok(())
}

fn write(path: PathBuf, bytes: &[u8], written: &mut Vec<PathBuf>) -> Res {
    std::fs::write(&path, bytes).map_err(|e| format!("{}: {e}", path.display()))?;
    written.push(path);
    Ok(())
}

/// Writes the files of run `r` into `dir` (which exists); returns their paths.
pub async fn write_results(ch: Conn, r: &pb::RunInfo, dir: &Path) -> Res<Vec<PathBuf>> {
    let mut written = Vec::new();
    if !r.scores.is_empty() {
        let scores_path = dir.join("scores.csv");
        write_scores(&scores_path, &r.scores, r.picked, r.best)?;
        written.push(scores_path);
        let core: Vec<crate::sweep::SettingScore> = r.scores.iter().map(convert::score_from).collect();
        let metric = crate::sweep::Metric::parse(&r.metric).unwrap_or(crate::sweep::Metric::Accuracy);
        written.extend(super::plots::limit_plots(&core, metric, r.picked.map(|p| p as usize), dir)?);
    }
    if r.model.is_some() {
        let mut models = ModelsClient::new(ch);
        for (format, name) in [(pb::ModelFormat::Json, "model.json"), (pb::ModelFormat::Dot, "model.dot"), (pb::ModelFormat::Text, "model.txt"), (pb::ModelFormat::Onnx, "model.onnx")] {
            let f = models.get_model(pb::GetModelRequest { run_id: r.id.clone(), format: format as i32 }).await.map_err(CliError::status)?.into_inner();
            let bytes = if format == pb::ModelFormat::Onnx { f.data } else { f.text.into_bytes() };
            write(dir.join(name), &bytes, &mut written)?;
        }
    }
    write(dir.join("summary.txt"), summary(r).as_bytes(), &mut written)?;
    Ok(written)
}

/// A few lines on a run: what was swept, how it was scored, what was picked.
pub fn summary(r: &pb::RunInfo) -> String {
    let mut out = format!("run {}: {}\n", r.id, model_state(r));
    out.push_str(&format!("dataset {} v{} ({}), {} rows\n", if r.dataset_name.is_empty() { "-" } else { &r.dataset_name }, r.dataset_version, r.dataset_id, r.dataset_rows));
    out.push_str(&format!("created {}, finished {}\n", r.created_at, if r.finished_at.is_empty() { "-" } else { &r.finished_at }));
    if !r.scores.is_empty() {
        let metric = if r.metric.is_empty() { "score" } else { &r.metric };
        let folds = r.scores[0].fold_scores.len();
        out.push_str(&format!("{} settings scored by {metric} over {folds} folds ({})\n", r.scores.len(), if higher_is_better(metric) { "higher is better" } else { "lower is better" }));
        let (_, fixed) = output::split_knobs(&r.scores);
        if !fixed.is_empty() {
            out.push_str(&output::wrap("fixed: ", &fixed, output::WIDTH));
        }
        let rule = r.spec.as_ref().map_or("highest", |s| if s.pick.is_empty() { "highest" } else { s.pick.as_str() });
        for (what, i) in [("best", r.best), (rule, r.picked)] {
            if let Some(s) = i.and_then(|i| r.scores.get(i as usize)) {
                let v = output::knob_values(&s.limits.clone().unwrap_or_default());
                let knobs: Vec<String> = output::KNOBS.iter().zip(v).map(|(k, v)| format!("{k} = {v}")).collect();
                out.push_str(&format!(
                    "{what}: grid# {}, validation {:.4} ± {:.4} (sd), training {:.4}, gap {:+.4}, {:.1} leaves; {}\n",
                    s.index,
                    s.valid_mean,
                    s.valid_sd,
                    s.train_mean,
                    s.gap,
                    s.mean_leaves,
                    knobs.join(", ")
                ));
            }
        }
    }
    if let Some(m) = &r.model {
        out.push_str(&format!("model: {} nodes, {} leaves, depth {}\n", m.nodes, m.leaves, m.depth));
    }
    out
}

/// The state line of `show` and the summary: a finished run without a model says why.
pub fn model_state(r: &pb::RunInfo) -> String {
    let state = output::state_name(r.state);
    let skipped = r.spec.as_ref().is_some_and(|s| s.skip_final);
    match state {
        "finished" if r.model.is_none() && skipped => "finished (no model: skip_final was set)".into(),
        _ if r.reason.is_empty() => state.into(),
        _ => format!("{state} ({})", r.reason),
    }
}

/// `pollard report RUN --out DIR`.
pub async fn command(ch: Conn, a: ReportArgs, json_out: bool) -> Res {
    let r = RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: a.run.clone() }).await.map_err(CliError::status)?.into_inner();
    make_dir(&a.out)?;
    let written = write_results(ch, &r, &a.out).await?;
    if json_out {
        println!("{}", json!({"run_id": r.id, "state": output::state_name(r.state), "files": written.iter().map(|p| p.display().to_string()).collect::<Vec<_>>()}));
    } else {
        print_written(&written, &a.out);
    }
    Ok(())
}

/// `wrote N files to DIR:` and one path a line.
pub fn print_written(written: &[PathBuf], dir: &Path) {
    println!("wrote {} files to {}:", written.len(), dir.display());
    for p in written {
        println!("  {}", p.display());
    }
}

fn write_scores(path: &Path, scores: &[pb::SettingScore], picked: Option<u32>, best: Option<u32>) -> Result<(), String> {
    let mut w = csv::Writer::from_path(path).map_err(|e| format!("{}: {e}", path.display()))?;
    let e = |e: csv::Error| format!("{}: {e}", path.display());
    let folds = scores.first().map_or(0, |s| s.fold_scores.len());
    let mut header: Vec<String> = ["grid_index", "criterion", "class_weight", "max_depth", "min_split_rows", "min_leaf_rows", "max_leaves", "min_gain", "prune_alpha", "train_mean", "valid_mean", "valid_sd", "gap", "mean_leaves", "mean_depth"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    header.extend((0..folds).map(|i| format!("fold_{i}")));
    header.push("marks".into());
    w.write_record(&header).map_err(e)?;
    for s in scores {
        let l = s.limits.clone().unwrap_or_default();
        let mut rec = vec![
            s.index.to_string(),
            l.criterion,
            l.class_weight,
            l.max_depth.map_or("none".into(), |x| x.to_string()),
            l.min_split_rows.to_string(),
            l.min_leaf_rows.to_string(),
            l.max_leaves.map_or("none".into(), |x| x.to_string()),
            l.min_gain.to_string(),
            l.prune_alpha.to_string(),
            s.train_mean.to_string(),
            s.valid_mean.to_string(),
            s.valid_sd.to_string(),
            s.gap.to_string(),
            s.mean_leaves.to_string(),
            s.mean_depth.to_string(),
        ];
        rec.extend(s.fold_scores.iter().map(|x| x.to_string()));
        let mut marks = Vec::new();
        if best == Some(s.index) {
            marks.push("best");
        }
        if picked == Some(s.index) {
            marks.push("picked");
        }
        rec.push(marks.join(" "));
        w.write_record(&rec).map_err(e)?;
    }
    w.flush().map_err(|x| format!("{}: {x}", path.display()))
}
