//! `pollard demo`: the main job end to end on synthetic reefer-container voyages.
//!
//! Starts a server in this process on loopback with a temporary store (or uses `--server`
//! with `--remote`), generates the data, uploads it, sweeps all six limits, prints the best
//! settings with training and validation scores side by side and the one-SE pick, then writes
//! the model (JSON, DOT), the score table (CSV) and one SVG plot per limit.

use std::path::Path;

use tokio::sync::oneshot;

use super::client::{connect, follow, status_line, upload_bytes, Follow, Remote};
use super::output::{higher_is_better, scores_table};
use super::DemoArgs;
use crate::pb;
use crate::pb::models_client::ModelsClient;
use crate::pb::runs_client::RunsClient;
use crate::reefer::{voyages_csv, ReeferTarget};
use crate::rpc::convert;

/// The demo's data set name: it says what the data is.
pub const DATASET: &str = "reefer-voyages-synthetic";

fn values(v: &[Option<f64>]) -> Option<pb::LimitRange> {
    convert::range_to(&Some(crate::sweep::Range::Values(v.to_vec())))
}

/// The demo's sweep: every limit varies.
pub fn demo_spec(seed: u64) -> pb::SweepSpec {
    let n = |x: f64| Some(x);
    pb::SweepSpec {
        target: "excursion".into(),
        max_depth: values(&[n(1.0), n(2.0), n(3.0), n(4.0), n(5.0), n(6.0), n(8.0), n(10.0), n(14.0), None]),
        min_split_rows: values(&[n(2.0), n(20.0), n(80.0)]),
        min_leaf_rows: values(&[n(1.0), n(5.0), n(25.0)]),
        max_leaves: values(&[n(8.0), n(32.0), None]),
        min_gain: values(&[n(0.0), n(0.0005), n(0.002)]),
        prune_alpha: values(&[n(0.0), n(0.0005), n(0.002)]),
        folds: Some(pb::FoldPlan { scheme: "stratified".into(), k: 5, repeats: 1, column: String::new() }),
        metric: "accuracy".into(),
        pick: "one_se".into(),
        seed,
        ..Default::default()
    }
}

pub fn run(a: DemoArgs, remote: &Remote, json_out: bool) -> Result<(), String> {
    let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().map_err(|e| e.to_string())?;
    runtime.block_on(async move {
        let (address, stop, served) = if a.remote {
            (remote.clone(), None, None)
        } else {
            let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.map_err(|e| e.to_string())?;
            let addr = listener.local_addr().map_err(|e| e.to_string())?;
            let store = crate::store::Store::open_temporary().map_err(|e| e.to_string())?;
            let (tx, rx) = oneshot::channel::<()>();
            let config = crate::config::Config { listen: addr, ..Default::default() };
            let handle = tokio::spawn(crate::server::run(listener, config, store, async move {
                let _ = rx.await;
            }));
            (Remote::plain(format!("http://{addr}")), Some(tx), Some(handle))
        };
        let result = demo(&a, &address, json_out).await;
        if let Some(tx) = stop {
            let _ = tx.send(());
        }
        if let Some(h) = served {
            h.await.map_err(|e| e.to_string())??;
        }
        result
    })
}

async fn demo(a: &DemoArgs, address: &Remote, json_out: bool) -> Result<(), String> {
    let say = |s: &str| {
        if !json_out {
            println!("{s}");
        }
    };
    let ch = connect(address).await?;
    std::fs::create_dir_all(&a.out).map_err(|e| format!("{}: {e}", a.out.display()))?;
    let csv = voyages_csv(a.rows, a.seed, ReeferTarget::Excursion);
    let data_path = a.out.join(format!("{DATASET}.csv"));
    std::fs::write(&data_path, &csv).map_err(|e| format!("{}: {e}", data_path.display()))?;
    say(&format!("pollard demo: {} synthetic reefer-container voyages (invented data), target 'excursion' (did the cargo leave its temperature band?)", a.rows));
    let info = upload_bytes(ch.clone(), DATASET, "excursion", Vec::new(), csv.into_bytes(), !json_out).await?;
    say(&format!("uploaded dataset {} ({} rows, {} columns)", info.id, info.rows, info.columns.len()));
    let spec = demo_spec(a.seed);
    let run = RunsClient::new(ch.clone())
        .start_run(pb::StartRunRequest { dataset_id: info.id.clone(), spec: Some(spec), labels: [("source".to_string(), "demo".to_string())].into(), ..Default::default() })
        .await
        .map_err(status_line)?
        .into_inner();
    say(&format!("sweeping every limit: run {}", run.id));
    let end = follow(ch.clone(), &run.id, 0, if json_out { Follow::Silent } else { Follow::Bar }).await?;
    if end != "finished" {
        return Err(format!("the demo run ended {end}"));
    }
    let r = RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: run.id.clone() }).await.map_err(status_line)?.into_inner();
    let metric = r.metric.clone();
    if !json_out {
        println!("{} settings scored by 5-fold cross-validation", r.scores.len());
        print!("{}", scores_table(&r.scores, &metric, higher_is_better(&metric), 8, r.picked, r.best));
        if let (Some(p), Some(b)) = (r.picked, r.best) {
            let (ps, bs) = (&r.scores[p as usize], &r.scores[b as usize]);
            println!("best validation {metric}: grid# {b}, {:.4} ± {:.4} with {:.1} leaves", bs.valid_mean, bs.valid_sd, bs.mean_leaves);
            println!("one-SE pick: grid# {p}, {:.4} with {:.1} leaves (the fewest leaves within one standard error of the best)", ps.valid_mean, ps.mean_leaves);
        }
    }
    let mut models = ModelsClient::new(ch.clone());
    let mut written = vec![data_path.clone()];
    for (format, name) in [(pb::ModelFormat::Json, "model.json"), (pb::ModelFormat::Dot, "model.dot"), (pb::ModelFormat::Text, "model.txt")] {
        let f = models.get_model(pb::GetModelRequest { run_id: run.id.clone(), format: format as i32 }).await.map_err(status_line)?.into_inner();
        let path = a.out.join(name);
        std::fs::write(&path, f.text).map_err(|e| format!("{}: {e}", path.display()))?;
        written.push(path);
    }
    let scores_path = a.out.join("scores.csv");
    write_scores(&scores_path, &r.scores, r.picked, r.best)?;
    written.push(scores_path);
    let core: Vec<crate::sweep::SettingScore> = r.scores.iter().map(convert::score_from).collect();
    let metric_kind = crate::sweep::Metric::parse(&metric).unwrap_or(crate::sweep::Metric::Accuracy);
    written.extend(super::plots::limit_plots(&core, metric_kind, r.picked.map(|p| p as usize), &a.out)?);
    if json_out {
        println!(
            "{}",
            serde_json::json!({"run_id": run.id, "dataset_id": info.id, "settings": r.scores.len(), "picked": r.picked, "best": r.best,
                "files": written.iter().map(|p| p.display().to_string()).collect::<Vec<_>>()})
        );
    } else {
        println!("wrote {} files to {}:", written.len(), a.out.display());
        for p in &written {
            println!("  {}", p.display());
        }
    }
    Ok(())
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
