//! `pollard demo`: the main job end to end on synthetic reefer-container voyages.
//!
//! Starts a server in this process on loopback with a temporary store (or uses `--server`
//! with `--remote`), generates the data, uploads it, sweeps all six limits, prints the best
//! settings with training and validation scores side by side and the one-SE pick, then writes
//! the model (JSON, DOT), the score table (CSV) and one SVG plot per limit.

use std::path::PathBuf;

use tokio::sync::oneshot;

use super::client::{connect, follow, upload_bytes, Follow, Remote};
use super::error::{CliError, Res};
use super::output::{higher_is_better, scores_table};
use super::report::{make_dir, print_written, write_results};
use super::DemoArgs;
use crate::pb;
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
        // Nested cross-validation: how much the best of this grid flatters itself.
        outer: Some(pb::FoldPlan { scheme: "stratified".into(), k: 5, repeats: 1, column: String::new() }),
        metric: "accuracy".into(),
        pick: "one_se".into(),
        seed,
        ..Default::default()
    }
}

pub fn run(a: DemoArgs, remote: &Remote, json_out: bool) -> Res {
    // The output folder and the data file come first, before any server starts: a path that
    // cannot be made fails at once, naming it.
    make_dir(&a.out)?;
    let csv = voyages_csv(a.rows, a.seed, ReeferTarget::Excursion);
    let data_path = a.out.join(format!("{DATASET}.csv"));
    std::fs::write(&data_path, &csv).map_err(|e| format!("{}: {e}", data_path.display()))?;
    let runtime = tokio::runtime::Builder::new_multi_thread().worker_threads(2).enable_all().build().map_err(|e| e.to_string())?;
    runtime.block_on(async move {
        let (address, stop, served) = if a.remote {
            (remote.clone(), None, None)
        } else {
            let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.map_err(|e| e.to_string())?;
            let addr = listener.local_addr().map_err(|e| e.to_string())?;
            let store = std::sync::Arc::new(crate::store::SledStore::open_temporary().map_err(|e| e.to_string())?);
            let (tx, rx) = oneshot::channel::<()>();
            let config = crate::config::Config { listen: addr, ..Default::default() };
            let handle = tokio::spawn(crate::server::run(listener, config, store, async move {
                let _ = rx.await;
            }));
            (Remote::plain(format!("http://{addr}")), Some(tx), Some(handle))
        };
        let result = demo(&a, &address, json_out, csv, data_path).await;
        if let Some(tx) = stop {
            let _ = tx.send(());
        }
        if let Some(h) = served {
            h.await.map_err(|e| e.to_string())??;
        }
        result
    })
}

async fn demo(a: &DemoArgs, address: &Remote, json_out: bool, csv: String, data_path: PathBuf) -> Res {
    let say = |s: &str| {
        if !json_out {
            println!("{s}");
        }
    };
    let ch = connect(address).await?;
    say(&format!("pollard demo: {} synthetic reefer-container voyages (invented data)", a.rows));
    say("target 'excursion': did the cargo leave its temperature band?");
    let info = upload_bytes(ch.clone(), DATASET, "excursion", Vec::new(), csv.into_bytes(), !json_out).await?;
    say(&format!("uploaded dataset {} ({} rows, {} columns)", info.id, info.rows, info.columns.len()));
    let spec = demo_spec(a.seed);
    let run = RunsClient::new(ch.clone())
        .start_run(pb::StartRunRequest { dataset_id: info.id.clone(), spec: Some(spec), labels: [("source".to_string(), "demo".to_string())].into(), ..Default::default() })
        .await
        .map_err(CliError::status)?
        .into_inner();
    say(&format!("sweeping every limit: run {}", run.id));
    follow(ch.clone(), &run.id, 0, if json_out { Follow::Silent } else { Follow::Bar }).await?.check(&run.id)?;
    let r = RunsClient::new(ch.clone()).get_run(pb::GetRunRequest { id: run.id.clone() }).await.map_err(CliError::status)?.into_inner();
    let metric = r.metric.clone();
    if !json_out {
        println!("{} settings scored by 5-fold cross-validation", r.scores.len());
        print!("{}", scores_table(&r.scores, &metric, higher_is_better(&metric), 8, r.picked, r.best));
        if let (Some(p), Some(b)) = (r.picked, r.best) {
            let (ps, bs) = (&r.scores[p as usize], &r.scores[b as usize]);
            println!("best validation {metric}: grid# {b}, {:.4} ± {:.4} with {:.1} leaves", bs.valid_mean, bs.valid_sd, bs.mean_leaves);
            println!("one-SE pick: grid# {p}, {:.4} with {:.1} leaves (the fewest leaves within one standard error of the best)", ps.valid_mean, ps.mean_leaves);
        }
        print!("{}", super::output::pareto_lines(&r.scores, &r.pareto_front, &metric));
        if let Some(n) = &r.nested {
            print!("{}", super::output::nested_lines(n, &metric));
        }
    }
    let mut written = vec![data_path];
    written.extend(write_results(ch, &r, &a.out).await?);
    if json_out {
        println!(
            "{}",
            serde_json::json!({"run_id": run.id, "dataset_id": info.id, "settings": r.scores.len(), "picked": r.picked, "best": r.best,
                "pareto_front": r.pareto_front, "nested": r.nested.as_ref().map(super::output::nested_json),
                "files": written.iter().map(|p| p.display().to_string()).collect::<Vec<_>>()})
        );
    } else {
        print_written(&written, &a.out);
    }
    Ok(())
}
