//! Command-line entry point.
//!
//! Commands so far:
//! - `pollard demo`: placeholder until the demo is built.
//! - `pollard serve [--listen ADDR] [--data DIR] [--config FILE]`: the gRPC service (see
//!   [`crate::config`] for the file and the `POLLARD_*` environment variables).
//! - `pollard folds --data FILE --target NAME [--scheme S] [--k K] [--repeats R] [--seed N]
//!   [--column C]`: prints the fold assignment a sweep with that plan uses, as CSV
//!   `row,repeat,fold` (rows from 1, as in error messages; fold −1 = in no validation set), so
//!   the same folds can be used by another tool.

use std::collections::HashMap;
use std::fs::File;
use std::io::Write;

use crate::data::csv::{read_dataset, CsvOptions};
use crate::sweep::{FoldPlan, FoldScheme};

const USAGE: &str = "usage: pollard demo
       pollard serve [--listen ADDR] [--data DIR] [--config FILE]
       pollard folds --data FILE --target NAME [--scheme shuffled|stratified|grouped|forward|given] [--k K] [--repeats R] [--seed N] [--column C]";

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> Result<(), String> {
    match args.first().map(String::as_str) {
        Some("demo") => {
            println!("pollard demo: not built yet; the demo arrives with the command-line issue");
            Ok(())
        }
        Some("folds") => folds(&flags(&args[1..])?),
        Some("serve") => serve(&flags(&args[1..])?),
        _ => Err(USAGE.to_string()),
    }
}

/// `--name value` pairs.
fn flags(args: &[String]) -> Result<HashMap<String, String>, String> {
    let mut out = HashMap::new();
    let mut it = args.iter();
    while let Some(a) = it.next() {
        let Some(name) = a.strip_prefix("--") else { return Err(format!("unexpected argument '{a}'\n{USAGE}")) };
        let Some(v) = it.next() else { return Err(format!("--{name} needs a value")) };
        out.insert(name.to_string(), v.clone());
    }
    Ok(out)
}

fn number<T: std::str::FromStr>(f: &HashMap<String, String>, name: &str, default: T) -> Result<T, String> {
    match f.get(name) {
        None => Ok(default),
        Some(v) => v.parse().map_err(|_| format!("--{name}: '{v}' is not a whole number")),
    }
}

fn folds(f: &HashMap<String, String>) -> Result<(), String> {
    let path = f.get("data").ok_or("--data FILE is required")?;
    let target = f.get("target").ok_or("--target NAME is required")?;
    let file = File::open(path).map_err(|e| format!("{path}: {e}"))?;
    let data = read_dataset(file, &CsvOptions::new(target.clone())).map_err(|e| format!("{path}: {e}"))?;
    let column = || f.get("column").cloned().ok_or_else(|| "--column C is required for this scheme".to_string());
    let scheme = match f.get("scheme").map(String::as_str) {
        None => FoldPlan::default_for(data.task()).scheme,
        Some("shuffled") => FoldScheme::Shuffled,
        Some("stratified") => FoldScheme::Stratified,
        Some("grouped") => FoldScheme::Grouped { column: column()? },
        Some("forward") => FoldScheme::Forward { column: column()? },
        Some("given") => FoldScheme::Given { column: column()? },
        Some(s) => return Err(format!("--scheme: '{s}' is not one of shuffled, stratified, grouped, forward, given")),
    };
    let plan = FoldPlan { scheme, k: number(f, "k", 5)?, repeats: number(f, "repeats", 1)? };
    plan.check(&data).map_err(|e| e.to_string())?;
    let folds = plan.assign(&data, number(f, "seed", 0)?).map_err(|e| e.to_string())?;
    let mut out = std::io::BufWriter::new(std::io::stdout().lock());
    let w = |e: std::io::Error| e.to_string();
    writeln!(out, "row,repeat,fold").map_err(w)?;
    for (rep, fold_of) in folds.assignment.iter().enumerate() {
        for (row, fold) in fold_of.iter().enumerate() {
            writeln!(out, "{},{rep},{fold}", row + 1).map_err(w)?;
        }
    }
    out.flush().map_err(w)
}

fn serve(f: &HashMap<String, String>) -> Result<(), String> {
    for k in f.keys() {
        if !["listen", "data", "config"].contains(&k.as_str()) {
            return Err(format!("serve: unknown flag --{k}\n{USAGE}"));
        }
    }
    let flags = crate::config::Flags { config_file: f.get("config").map(Into::into), listen: f.get("listen").cloned(), data_dir: f.get("data").cloned() };
    let config = crate::config::Config::load(&flags, &|k| std::env::var(k).ok())?;
    init_logging(&config);
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| e.to_string())?;
    runtime.block_on(async move {
        let store = crate::store::Store::open(&config.data_dir).map_err(|e| format!("{}: {e}", config.data_dir.display()))?;
        let listener = tokio::net::TcpListener::bind(config.listen).await.map_err(|e| format!("cannot listen on {}: {e}", config.listen))?;
        crate::server::run(listener, config, store, shutdown_signal()).await
    })
}

/// Completes on SIGINT or SIGTERM.
async fn shutdown_signal() {
    let interrupt = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(t) => t,
            Err(_) => return interrupt.await.unwrap_or(()),
        };
        tokio::select! {
            _ = interrupt => {}
            _ = term.recv() => {}
        }
    }
    #[cfg(not(unix))]
    interrupt.await.unwrap_or(());
}

/// Log lines through `tracing`, plain or JSON; every line of a run carries its id.
pub fn init_logging(config: &crate::config::Config) {
    let filter = tracing_subscriber::EnvFilter::try_new(&config.log_filter).unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("info"));
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr);
    let _ = match config.log_format {
        crate::config::LogFormat::Json => builder.json().try_init(),
        crate::config::LogFormat::Plain => builder.try_init(),
    };
}
