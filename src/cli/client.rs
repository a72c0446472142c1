//! Client commands against a pollard server, and the local (in-process) sweep.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::time::Duration;

use indicatif::{ProgressBar, ProgressStyle};
use serde_json::json;
use tonic::service::interceptor::InterceptedService;
use tonic::transport::{Certificate, Channel, ClientTlsConfig, Identity};

use super::error::{CliError, Exit, Res};
use super::output::{self, higher_is_better};
use super::{labels, Command, LocalArgs, PutArgs, RunsArgs, SweepArgs};
use crate::data::csv::{read_dataset, CsvOptions};
use crate::pb;
use crate::pb::datasets_client::DatasetsClient;
use crate::pb::models_client::ModelsClient;
use crate::pb::runs_client::RunsClient;
use crate::rpc::convert;


/// How client commands reach the server: its address, the token, and for an `https://`
/// address the CA and an optional client certificate.
#[derive(Clone, Debug, Default)]
pub struct Remote {
    pub server: String,
    pub token: Option<String>,
    pub ca: Option<PathBuf>,
    pub cert: Option<PathBuf>,
    pub key: Option<PathBuf>,
}

impl Remote {
    /// A server without TLS or tokens (the demo's own).
    pub fn plain(server: String) -> Remote {
        Remote { server, ..Remote::default() }
    }
}

/// Adds `authorization: Bearer <token>` to every call (nothing without a token).
#[derive(Clone)]
pub struct Bearer(Option<tonic::metadata::MetadataValue<tonic::metadata::Ascii>>);

impl tonic::service::Interceptor for Bearer {
    fn call(&mut self, mut request: tonic::Request<()>) -> Result<tonic::Request<()>, tonic::Status> {
        if let Some(v) = &self.0 {
            request.metadata_mut().insert("authorization", v.clone());
        }
        Ok(request)
    }
}

/// A connection to the server that sends the token with every call.
pub type Conn = InterceptedService<Channel, Bearer>;

/// An error with its causes, on one line (a transport error alone says only "transport error").
fn with_causes(e: &dyn std::error::Error) -> String {
    let mut text = e.to_string();
    let mut source = e.source();
    while let Some(s) = source {
        let s_text = s.to_string();
        if !text.contains(&s_text) {
            text = format!("{text}: {s_text}");
        }
        source = s.source();
    }
    text
}

/// The `--server` value as a URL: `host:port` (the form `--listen` takes) means
/// `http://host:port`; `http://` and `https://` addresses pass as they are. Anything else is a
/// usage error naming the flag.
pub fn server_url(server: &str) -> Res<String> {
    let bad = |why: &str| CliError::usage(format!("--server '{server}': {why}; give host:port (as --listen takes), http://host:port or https://host:port"));
    let (url, authority) = match server.split_once("://") {
        Some((scheme, rest)) => {
            if scheme != "http" && scheme != "https" {
                return Err(bad(&format!("the scheme '{scheme}' is not http or https")));
            }
            (server.to_string(), rest.trim_end_matches('/'))
        }
        None => (format!("http://{server}"), server),
    };
    let host_port = match authority.rsplit_once(':') {
        Some((host, port)) => !host.is_empty() && port.parse::<u16>().is_ok_and(|p| p > 0),
        None => false,
    };
    let clean = !authority.is_empty() && authority.chars().all(|c| c.is_ascii_alphanumeric() || ".-_:[]".contains(c));
    if !clean || (!host_port && !server.contains("://")) {
        return Err(bad("not an address"));
    }
    url.parse::<http::Uri>().map_err(|e| bad(&e.to_string()))?;
    Ok(url)
}

fn read_pem(flag: &str, path: &Path) -> Result<Vec<u8>, String> {
    std::fs::read(path).map_err(|e| format!("{flag} {}: {e}", path.display()))
}

pub async fn connect(remote: &Remote) -> Res<Conn> {
    let url = server_url(&remote.server)?;
    let server = url.as_str();
    let mut endpoint = Channel::from_shared(url.clone()).map_err(|e| CliError::usage(format!("--server '{server}': {e}")))?.connect_timeout(Duration::from_secs(5));
    if server.starts_with("https://") {
        // An https:// address is TLS or nothing: never plain text.
        let ca = remote.ca.as_deref().ok_or_else(|| format!("--server {server} uses TLS: give --ca FILE, the CA certificate (PEM) that signed the server's certificate"))?;
        let mut tls = ClientTlsConfig::new().ca_certificate(Certificate::from_pem(read_pem("--ca", ca)?));
        match (&remote.cert, &remote.key) {
            (Some(c), Some(k)) => tls = tls.identity(Identity::from_pem(read_pem("--cert", c)?, read_pem("--key", k)?)),
            (None, None) => {}
            _ => return Err(CliError::usage("--cert and --key go together: the client certificate and its private key (PEM)")),
        }
        endpoint = endpoint.tls_config(tls).map_err(|e| format!("--server {server}: {}", with_causes(&e)))?;
    } else if remote.ca.is_some() || remote.cert.is_some() || remote.key.is_some() {
        return Err(CliError::usage(format!("--ca, --cert and --key are for https:// addresses; --server {server} is plain text")));
    }
    let bearer = match remote.token.as_deref().filter(|t| !t.is_empty()) {
        None => None,
        Some(t) => Some(format!("Bearer {t}").parse().map_err(|_| "--token: a token is printable ASCII without spaces".to_string())?),
    };
    // On a runtime thread (see [`block_sigpipe`]): the TLS handshake writes to the socket.
    let connecting = tokio::spawn(async move { endpoint.connect().await });
    let channel = connecting
        .await
        .map_err(|e| e.to_string())?
        .map_err(|e| CliError::new(Exit::Unreachable, "unreachable", format!("cannot reach the pollard server at {server} ({}); start one with `pollard serve` or set --server", with_causes(&e))))?;
    Ok(InterceptedService::new(channel, Bearer(bearer)))
}

fn runtime() -> Result<tokio::runtime::Runtime, String> {
    tokio::runtime::Builder::new_multi_thread().worker_threads(2).on_thread_start(block_sigpipe).enable_all().build().map_err(|e| e.to_string())
}

/// Client commands die quietly of SIGPIPE when their standard output closes (see main.rs);
/// a socket the server closed must be an error instead. The runtime's threads, which do all
/// the network I/O ([`connect`] included), block SIGPIPE, so a write there gets EPIPE.
fn block_sigpipe() {
    #[cfg(unix)]
    // SAFETY: changes only the calling thread's signal mask, with a set built right here.
    unsafe {
        let mut set: libc::sigset_t = std::mem::zeroed();
        libc::sigemptyset(&mut set);
        libc::sigaddset(&mut set, libc::SIGPIPE);
        libc::pthread_sigmask(libc::SIG_BLOCK, &set, std::ptr::null_mut());
    }
}

pub fn run(command: Command, remote: &Remote, json_out: bool) -> Res {
    runtime()?.block_on(async move {
        let ch = connect(remote).await?;
        match command {
            Command::Put(a) => put(ch, a, json_out).await,
            Command::Datasets { name } => datasets(ch, name, json_out).await,
            Command::Sweep(a) => sweep(ch, a, json_out).await,
            Command::Follow { run, after } => follow(ch, &run, after, if json_out { Follow::JsonLines } else { Follow::Bar }).await?.check(&run),
            Command::Show { run, top } => show(ch, &run, top, json_out).await,
            Command::Runs(a) => runs(ch, a, json_out).await,
            Command::Cancel { run } => cancel(ch, run, json_out).await,
            Command::Model { run, format, out } => model(ch, &run, &format, out, json_out).await,
            Command::Predict { run, file, explain } => predict(ch, &run, &file, explain, json_out).await,
            Command::Report(a) => super::report::command(ch, a, json_out).await,
            Command::Schedule { action } => super::schedules::run(ch, action, json_out).await,
            _ => unreachable!("handled by the caller"),
        }
    })
}

/// Cancels a queued or running run; a run that already ended is an error that says so.
async fn cancel(ch: Conn, id: String, json_out: bool) -> Res {
    let mut client = RunsClient::new(ch);
    let before = client.get_run(pb::GetRunRequest { id: id.clone() }).await.map_err(CliError::status)?.into_inner();
    if ended(before.state) {
        let state = output::state_name(before.state);
        return Err(CliError::new(Exit::Other, "already_ended", format!("run {id} already {state}; nothing to cancel")));
    }
    let r = client.cancel_run(pb::CancelRunRequest { id }).await.map_err(CliError::status)?.into_inner();
    print_run(&r, json_out);
    Ok(())
}

/// Whether a run state is an end (finished, failed or cancelled).
pub fn ended(state: i32) -> bool {
    matches!(pb::RunState::try_from(state), Ok(pb::RunState::Finished | pb::RunState::Failed | pb::RunState::Cancelled))
}

fn print_run(r: &pb::RunInfo, json_out: bool) {
    if json_out {
        println!("{}", output::run_json(r));
    } else {
        println!("{}", output::run_line(r));
    }
}

/// Uploads a file in chunks with a progress bar.
pub async fn upload_bytes(ch: Conn, name: &str, target: &str, categorical: Vec<String>, bytes: Vec<u8>, show: bool) -> Res<pb::DatasetInfo> {
    let bar = if show { ProgressBar::new(bytes.len() as u64) } else { ProgressBar::hidden() };
    bar.set_style(ProgressStyle::with_template("uploading {bar:30} {bytes}/{total_bytes}").unwrap());
    let header = pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: target.into(), categorical })) };
    let chunks: Vec<pb::UploadChunk> = bytes.chunks(256 << 10).map(|c| pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(c.to_vec())) }).collect();
    let b = bar.clone();
    let stream = tokio_stream::iter(std::iter::once(header).chain(chunks.into_iter().inspect(move |c| {
        if let Some(pb::upload_chunk::Part::Data(d)) = &c.part {
            b.inc(d.len() as u64);
        }
    })));
    let info = DatasetsClient::new(ch).upload(stream).await.map_err(CliError::status)?.into_inner();
    bar.finish_and_clear();
    Ok(info)
}

async fn put(ch: Conn, a: PutArgs, json_out: bool) -> Res {
    let bytes = std::fs::read(&a.file).map_err(|e| format!("{}: {e}", a.file.display()))?;
    let info = upload_bytes(ch, &a.name, &a.target, a.categorical, bytes, !json_out).await?;
    if json_out {
        println!("{}", output::dataset_json(&info));
    } else {
        println!("{}", output::dataset_line(&info));
    }
    Ok(())
}

async fn datasets(ch: Conn, name: Option<String>, json_out: bool) -> Res {
    let mut client = DatasetsClient::new(ch);
    let mut token = String::new();
    let mut all = Vec::new();
    loop {
        let r = client.list_datasets(pb::ListDatasetsRequest { name: name.clone().unwrap_or_default(), page_size: 100, page_token: token }).await.map_err(CliError::status)?.into_inner();
        all.extend(r.datasets);
        if r.next_page_token.is_empty() {
            break;
        }
        token = r.next_page_token;
    }
    if json_out {
        println!("{}", json!(all.iter().map(output::dataset_json).collect::<Vec<_>>()));
    } else {
        for d in &all {
            println!("{}", output::dataset_line(d));
        }
    }
    Ok(())
}

async fn sweep(ch: Conn, a: SweepArgs, json_out: bool) -> Res {
    let spec = a.grid.to_spec()?;
    let (dataset_id, dataset_name) = if a.dataset.starts_with("ds_") { (a.dataset.clone(), String::new()) } else { (String::new(), a.dataset.clone()) };
    let req = pb::StartRunRequest { dataset_id, dataset_name, spec: Some(spec), idempotency_key: a.idempotency_key, labels: labels(&a.labels)? };
    let run = RunsClient::new(ch.clone()).start_run(req).await.map_err(CliError::status)?.into_inner();
    if !a.follow {
        print_run(&run, json_out);
        return Ok(());
    }
    if !json_out {
        println!("started {}", run.id);
    }
    let end = follow(ch.clone(), &run.id, 0, if json_out { Follow::JsonLines } else { Follow::Bar }).await?;
    if !json_out {
        show(ch, &run.id, 10, false).await?;
    }
    end.check(&run.id)
}

/// How a follower shows events.
#[derive(Clone, Copy, PartialEq, Eq)]
pub enum Follow {
    /// A live progress bar, then one line with the end.
    Bar,
    /// One JSON object per event.
    JsonLines,
    /// Nothing.
    Silent,
}

/// How a followed run ended.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum End {
    /// The stream closed before an end event.
    Open,
    Finished,
    Failed(String),
    Cancelled(String),
}

impl End {
    /// As the follower prints it: `finished`, `failed: REASON`, `cancelled: REASON`.
    pub fn text(&self) -> String {
        match self {
            End::Open => "running".into(),
            End::Finished => "finished".into(),
            End::Failed(m) => format!("failed: {m}"),
            End::Cancelled(m) => format!("cancelled: {m}"),
        }
    }

    /// Success only for a finished run; failed and cancelled runs have their own exit codes.
    pub fn check(self, id: &str) -> Res {
        match self {
            End::Finished => Ok(()),
            End::Failed(m) => Err(CliError::new(Exit::RunFailed, "run_failed", format!("run {id} failed: {m}"))),
            End::Cancelled(m) => Err(CliError::new(Exit::RunCancelled, "run_cancelled", format!("run {id} cancelled: {m}"))),
            End::Open => Err(CliError::new(Exit::Unreachable, "unreachable", format!("the event stream of run {id} closed before the run ended"))),
        }
    }
}

/// The follower's progress line: no bar and no count until the run has work units (a queued
/// run's 0 of 0 would draw a full bar).
pub fn bar_template(units_total: u32) -> &'static str {
    if units_total == 0 {
        "{spinner} waiting for the run to start (settings scored {msg}) [{elapsed}]"
    } else {
        "{spinner} work units {pos}/{len} {bar:30} settings scored {msg} [{elapsed}]"
    }
}

/// Streams a run's events; returns how it ended.
pub async fn follow(ch: Conn, id: &str, after: u64, mode: Follow) -> Res<End> {
    let json_out = mode == Follow::JsonLines;
    let mut stream = RunsClient::new(ch).follow_run(pb::FollowRunRequest { id: id.into(), after_sequence: after }).await.map_err(CliError::status)?.into_inner();
    let bar = if mode == Follow::Bar { ProgressBar::no_length() } else { ProgressBar::hidden() };
    bar.set_style(ProgressStyle::with_template(bar_template(0)).unwrap());
    bar.enable_steady_tick(Duration::from_millis(200));
    let mut scored = 0;
    let mut end = End::Open;
    while let Some(ev) = stream.message().await.map_err(CliError::status)? {
        if json_out {
            println!("{}", event_json(&ev));
        }
        match ev.kind {
            Some(pb::run_event::Kind::Progress(p)) => {
                bar.set_style(ProgressStyle::with_template(bar_template(p.units_total)).unwrap());
                bar.set_length(p.units_total as u64);
                bar.set_position(p.units_done as u64);
            }
            Some(pb::run_event::Kind::Scored(_)) => {
                scored += 1;
                bar.set_message(scored.to_string());
            }
            Some(pb::run_event::Kind::Finished(_)) => end = End::Finished,
            Some(pb::run_event::Kind::Failed(m)) => end = End::Failed(m),
            Some(pb::run_event::Kind::Cancelled(m)) => end = End::Cancelled(m),
            None => {}
        }
    }
    bar.finish_and_clear();
    if mode == Follow::Bar {
        println!("run {id}: {}", end.text());
    }
    Ok(end)
}

fn event_json(e: &pb::RunEvent) -> serde_json::Value {
    let (kind, body) = match &e.kind {
        Some(pb::run_event::Kind::Progress(p)) => ("progress", json!({"units_done": p.units_done, "units_total": p.units_total, "scores_done": p.scores_done, "scores_total": p.scores_total})),
        Some(pb::run_event::Kind::Scored(s)) => ("scored", output::score_json(s)),
        Some(pb::run_event::Kind::Finished(f)) => ("finished", json!({"picked": f.picked, "best": f.best, "settings": f.scores.len(), "model_nodes": f.model.as_ref().map(|m| m.nodes.len())})),
        Some(pb::run_event::Kind::Failed(m)) => ("failed", json!({"reason": m})),
        Some(pb::run_event::Kind::Cancelled(m)) => ("cancelled", json!({"reason": m})),
        None => ("unknown", json!({})),
    };
    json!({"sequence": e.sequence, "run_id": e.run_id, "at": e.at, "kind": kind, "event": body})
}

pub async fn show(ch: Conn, id: &str, top: usize, json_out: bool) -> Res {
    let r = RunsClient::new(ch).get_run(pb::GetRunRequest { id: id.into() }).await.map_err(CliError::status)?.into_inner();
    if json_out {
        println!("{}", output::run_json(&r));
        return Ok(());
    }
    println!("{}", output::run_line(&r));
    if let Some(line) = output::monotone_line(&r) {
        println!("{line}");
    }
    if r.model.is_none() && r.spec.as_ref().is_some_and(|s| s.skip_final) && output::state_name(r.state) == "finished" {
        println!("{}", super::report::model_state(&r));
    }
    if !r.scores.is_empty() {
        let metric = if r.metric.is_empty() { "score" } else { &r.metric };
        print!("{}", output::scores_table(&r.scores, metric, higher_is_better(metric), top, r.picked, r.best));
        let rule = r.spec.as_ref().map_or("highest", |s| if s.pick.is_empty() { "highest" } else { s.pick.as_str() }).to_string();
        if let Some(p) = r.picked {
            println!("pick rule {rule}: grid# {p}");
        }
        if !r.pareto_front.is_empty() {
            print!("{}", output::pareto_lines(&r.scores, &r.pareto_front, metric));
        }
        if let Some(n) = &r.nested {
            print!("{}", output::nested_lines(n, metric));
        }
    }
    if let Some(m) = &r.model {
        println!("model: {} nodes, {} leaves, depth {}", m.nodes, m.leaves, m.depth);
        if let Some(d) = &m.decision {
            print!("{}", output::decision_line(d.threshold, d.costs.unwrap_or_default(), &m.classes));
        }
    }
    print!("{}", output::importance_lines(&r, if r.metric.is_empty() { "score" } else { &r.metric }, top));
    if let Some(d) = &r.drift {
        print!("{}", super::schedules::drift_lines(d, if r.metric.is_empty() { "score" } else { &r.metric }));
    }
    Ok(())
}

async fn runs(ch: Conn, a: RunsArgs, json_out: bool) -> Res {
    let state = match a.state.as_deref() {
        None => 0,
        Some(s) => convert::state_to(crate::job::RunState::parse(s).ok_or_else(|| CliError::usage(format!("--state: '{s}' is not queued, running, finished, failed or cancelled")))?) as i32,
    };
    let req = pb::ListRunsRequest {
        dataset_name: a.dataset.unwrap_or_default(),
        state,
        label: a.label.unwrap_or_default(),
        schedule_id: a.schedule.unwrap_or_default(),
        created_from: a.from.unwrap_or_default(),
        created_to: a.to.unwrap_or_default(),
        page_size: a.limit,
        page_token: String::new(),
        score_fell: a.score_fell,
        drift_flagged: a.flagged,
    };
    let r = RunsClient::new(ch).list_runs(req).await.map_err(CliError::status)?.into_inner();
    if json_out {
        println!("{}", json!(r.runs.iter().map(output::run_json).collect::<Vec<_>>()));
    } else {
        for run in &r.runs {
            println!("{}", output::run_line(run));
        }
    }
    Ok(())
}

fn model_format(f: &str) -> Res<pb::ModelFormat> {
    Ok(match f {
        "json" => pb::ModelFormat::Json,
        "dot" => pb::ModelFormat::Dot,
        "text" => pb::ModelFormat::Text,
        "protobuf" => pb::ModelFormat::Protobuf,
        "onnx" => pb::ModelFormat::Onnx,
        _ => return Err(CliError::usage(format!("--format: '{f}' is not json, dot, text, protobuf or onnx"))),
    })
}

async fn model(ch: Conn, id: &str, format: &str, out: Option<std::path::PathBuf>, json_out: bool) -> Res {
    let f = model_format(format)?;
    let file = ModelsClient::new(ch).get_model(pb::GetModelRequest { run_id: id.into(), format: f as i32 }).await.map_err(CliError::status)?.into_inner();
    let bytes = match f {
        pb::ModelFormat::Protobuf => prost::Message::encode_to_vec(&file.model.unwrap_or_default()),
        pb::ModelFormat::Onnx => file.data,
        _ => file.text.into_bytes(),
    };
    match out {
        Some(p) => {
            std::fs::write(&p, &bytes).map_err(|e| format!("{}: {e}", p.display()))?;
            if json_out {
                println!("{}", json!({"run_id": id, "format": format, "path": p.display().to_string(), "bytes": bytes.len()}));
            } else {
                println!("wrote {} ({} bytes)", p.display(), bytes.len());
            }
        }
        None if matches!(f, pb::ModelFormat::Protobuf | pb::ModelFormat::Onnx) => return Err(CliError::usage(format!("--format {format} is binary; give --out FILE"))),
        // One object: the model file itself (json), or the drawing as a string (dot, text).
        None if json_out => {
            let text = String::from_utf8_lossy(&bytes);
            let body = match f {
                pb::ModelFormat::Json => json!({"run_id": id, "format": format, "model": serde_json::from_str::<serde_json::Value>(&text).map_err(|e| format!("the server's model JSON: {e}"))?}),
                _ => json!({"run_id": id, "format": format, "text": text}),
            };
            println!("{body}");
        }
        None => print!("{}", String::from_utf8_lossy(&bytes)),
    }
    Ok(())
}

async fn predict(ch: Conn, id: &str, file: &std::path::Path, explain: bool, json_out: bool) -> Res {
    let bytes = std::fs::read(file).map_err(|e| format!("{}: {e}", file.display()))?;
    let table = csv_table(&bytes).map_err(|e| format!("{}: {e}", file.display()))?;
    let r = ModelsClient::new(ch).predict(pb::PredictRequest { run_id: id.into(), rows: Some(table), explain }).await.map_err(CliError::status)?.into_inner();
    if json_out {
        // One object per row: the class and each class's probability, or the value; with
        // --explain, the leaf and the path's conditions too.
        let k = r.classes.len();
        let mut out = std::io::BufWriter::new(std::io::stdout().lock());
        let w = |e: std::io::Error| e.to_string();
        let with_path = |i: usize, mut row: serde_json::Value| {
            if let Some(p) = r.paths.get(i) {
                row["leaf"] = json!(p.leaf);
                row["path"] = p.conditions.iter().map(output::condition_json).collect();
            }
            row
        };
        for (i, p) in r.predicted.iter().enumerate() {
            let probs: serde_json::Map<String, serde_json::Value> = r.classes.iter().cloned().zip(r.probabilities[i * k..(i + 1) * k].iter().map(|&x| output::num(x))).collect();
            writeln!(out, "{}", with_path(i, json!({"row": i + 1, "predicted": p, "probabilities": probs}))).map_err(w)?;
        }
        for (i, v) in r.values.iter().enumerate() {
            writeln!(out, "{}", with_path(i, json!({"row": i + 1, "value": output::num(*v)}))).map_err(w)?;
        }
        out.flush().map_err(w)?;
    } else if explain {
        let outcome = |i: usize| match r.predicted.get(i) {
            Some(p) => {
                let k = r.classes.len();
                let share = r.classes.iter().position(|c| c == p).map_or(f64::NAN, |c| r.probabilities[i * k + c]);
                format!("{p} ({:.1}% of the leaf)", share * 100.0)
            }
            None => format!("{}", r.values.get(i).copied().unwrap_or(f64::NAN)),
        };
        for (i, p) in r.paths.iter().enumerate() {
            println!("row {}: {}, leaf {}", i + 1, outcome(i), p.leaf);
            for c in &p.conditions {
                println!("  {}", output::condition_words(c));
            }
        }
    } else if !r.predicted.is_empty() {
        println!("row,predicted,{}", r.classes.iter().map(|c| format!("p_{c}")).collect::<Vec<_>>().join(","));
        let k = r.classes.len();
        for (i, p) in r.predicted.iter().enumerate() {
            let probs: Vec<String> = r.probabilities[i * k..(i + 1) * k].iter().map(|x| format!("{x:.4}")).collect();
            println!("{},{p},{}", i + 1, probs.join(","));
        }
    } else {
        println!("row,value");
        for (i, v) in r.values.iter().enumerate() {
            println!("{},{v}", i + 1);
        }
    }
    Ok(())
}

/// A CSV file as a columnar table: a column whose every present cell is a number travels as
/// numbers, any other as texts; empty, NA, N/A and NaN cells are missing.
pub fn csv_table(bytes: &[u8]) -> Result<pb::Table, String> {
    let mut r = csv::ReaderBuilder::new().from_reader(bytes);
    let header: Vec<String> = r.headers().map_err(|e| e.to_string())?.iter().map(|h| h.trim().to_string()).collect();
    let mut cells: Vec<Vec<String>> = vec![Vec::new(); header.len()];
    for (i, rec) in r.records().enumerate() {
        let rec = rec.map_err(|e| format!("row {}: {e}", i + 1))?;
        if rec.len() != header.len() {
            return Err(format!("row {} has {} fields, the header has {}", i + 1, rec.len(), header.len()));
        }
        for (c, v) in rec.iter().enumerate() {
            cells[c].push(v.trim().to_string());
        }
    }
    let missing = |s: &str| s.is_empty() || s == "NA" || s == "N/A" || s.eq_ignore_ascii_case("nan");
    let columns = header
        .into_iter()
        .zip(cells)
        .map(|(name, v)| {
            let numeric = v.iter().all(|s| missing(s) || s.parse::<f64>().is_ok());
            let flags: Vec<bool> = v.iter().map(|s| missing(s)).collect();
            let cells = if numeric {
                pb::table_column::Cells::Numbers(pb::NumberCells { values: v.iter().map(|s| s.parse().unwrap_or(f64::NAN)).collect(), missing: flags })
            } else {
                pb::table_column::Cells::Texts(pb::TextCells { values: v, missing: flags })
            };
            pb::TableColumn { name, cells: Some(cells) }
        })
        .collect();
    Ok(pb::Table { columns })
}

/// A sweep in this process, no server: same flags and the same table.
pub fn local(a: LocalArgs, json_out: bool) -> Res {
    let wire = a.grid.to_spec()?;
    if wire.target.is_empty() {
        return Err(CliError::usage("--target: name the column to predict"));
    }
    // Read through a buffer, not whole into memory, and let the parsed table go once the plan
    // holds its own copy: a big table is in memory once while the sweep runs.
    let file = std::fs::File::open(&a.file).map_err(|e| format!("{}: {e}", a.file.display()))?;
    let mut options = CsvOptions::new(wire.target.clone());
    options.task = crate::data::Task::parse(&wire.task);
    let data = read_dataset(std::io::BufReader::with_capacity(1 << 20, file), &options).map_err(|e| format!("{}: {e}", a.file.display()))?;
    let spec = convert::spec_from(&wire, data.task()).map_err(|s| s.message().to_string())?;
    let plan = crate::sweep::plan(&data, &spec).map_err(|e| e.to_string())?;
    drop(data);
    let bar = if json_out { ProgressBar::hidden() } else { ProgressBar::new(plan.units.len() as u64) };
    bar.set_style(ProgressStyle::with_template("{spinner} work units {pos}/{len} {bar:30} [{elapsed}]").unwrap());
    let cancel = AtomicBool::new(false);
    let b = bar.clone();
    let units = crate::sweep::run(&plan, Vec::new(), &move |_, p| {
        b.set_position(p.units_done as u64);
        crate::sweep::Flow::Continue
    }, &cancel)
    .map_err(|e| e.to_string())?;
    bar.finish_and_clear();
    let result = crate::sweep::summarize(&plan, &units);
    let scores: Vec<pb::SettingScore> = result.scores.iter().enumerate().map(|(i, s)| convert::score_to(i, s)).collect();
    let model = if spec.fit_final { Some(crate::sweep::fit_final(&plan, &result.scores[result.picked].setting).map_err(|e| e.to_string())?) } else { None };
    let nested = result.nested.as_ref().map(convert::nested_to);
    let front: Vec<u32> = crate::sweep::pareto_front(&result.scores, result.metric).into_iter().map(|i| i as u32).collect();
    if let (Some(m), Some(p)) = (&model, &a.model_out) {
        std::fs::write(p, crate::export::to_json(m)).map_err(|e| format!("{}: {e}", p.display()))?;
    }
    if json_out {
        println!(
            "{}",
            json!({
                "metric": result.metric.as_str(), "pick": result.pick_rule.as_str(), "picked": result.picked, "best": result.best,
                "scores": scores.iter().map(output::score_json).collect::<Vec<_>>(),
                "fold_assignment": plan.folds.assignment,
                "pareto_front": front,
                "nested": nested.as_ref().map(output::nested_json),
                "model": model.as_ref().map(|m| json!({"nodes": m.nodes.len(), "leaves": m.n_leaves(), "depth": m.depth(), "decision": m.decision.map(|d| output::decision_json(d.threshold, costs_pb(d)))})),
            })
        );
    } else {
        print!("{}", output::scores_table(&scores, result.metric.as_str(), result.metric.higher_is_better(), a.top, Some(result.picked as u32), Some(result.best as u32)));
        println!("pick rule {}: grid# {}", result.pick_rule.as_str(), result.picked);
        print!("{}", output::pareto_lines(&scores, &front, result.metric.as_str()));
        if let Some(n) = &nested {
            print!("{}", output::nested_lines(n, result.metric.as_str()));
        }
        if let Some(m) = &model {
            println!("model: {} nodes, {} leaves, depth {}", m.nodes.len(), m.n_leaves(), m.depth());
            if let Some(d) = m.decision {
                print!("{}", output::decision_line(d.threshold, costs_pb(d), &m.labels));
            }
        }
    }
    Ok(())
}

fn costs_pb(d: crate::tree::Decision) -> pb::DecisionCosts {
    pb::DecisionCosts { false_alarm: d.false_alarm, miss: d.miss }
}
