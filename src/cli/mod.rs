//! Command-line entry point: flags -> checked command -> serve | demo | client commands |
//! local sweep. Every command takes `--json` for machine-readable output; client commands
//! talk to `--server` (or `POLLARD_SERVER`).

mod client;
mod demo;
mod output;
pub mod plots;
pub mod ranges;
mod schedules;
mod spec;

use std::collections::HashMap;
use std::fs::File;
use std::io::Write;
use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::data::csv::{read_dataset, CsvOptions};
use crate::sweep::{FoldPlan, FoldScheme};

pub use spec::GridArgs;

/// The default server address.
pub const DEFAULT_SERVER: &str = "http://127.0.0.1:7311";

#[derive(Parser, Debug)]
#[command(name = "pollard", version, about = "Tunes the complexity limits of decision trees by cross-validated sweeps", long_about = None)]
pub struct Cli {
    /// Address of the pollard server for client commands.
    #[arg(long, global = true, env = "POLLARD_SERVER", default_value = DEFAULT_SERVER)]
    pub server: String,
    /// Print machine-readable JSON instead of tables.
    #[arg(long, global = true)]
    pub json: bool,
    /// Token for a server that needs one (sent as `authorization: Bearer`).
    #[arg(long, global = true, env = "POLLARD_TOKEN", hide_env_values = true)]
    pub token: Option<String>,
    /// CA certificate (PEM) that signed the server's certificate; needed for an https:// --server.
    #[arg(long, global = true, env = "POLLARD_CA")]
    pub ca: Option<PathBuf>,
    /// Client certificate (PEM) for a server that asks for one (with --key).
    #[arg(long, global = true, env = "POLLARD_CERT")]
    pub cert: Option<PathBuf>,
    /// Private key (PEM) of the client certificate.
    #[arg(long, global = true, env = "POLLARD_KEY")]
    pub key: Option<PathBuf>,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Run the gRPC service.
    Serve(ServeArgs),
    /// Tune a tree on synthetic reefer-container voyages, end to end, and write the results.
    Demo(DemoArgs),
    /// Upload a CSV file as a dataset.
    Put(PutArgs),
    /// List datasets.
    Datasets {
        /// Only versions of this name.
        #[arg(long)]
        name: Option<String>,
    },
    /// Start a sweep on a dataset.
    Sweep(SweepArgs),
    /// Stream a run's events until it ends.
    Follow {
        run: String,
        /// Resume after this event sequence number.
        #[arg(long, default_value_t = 0)]
        after: u64,
    },
    /// Show one run: its state, its best settings and its pick.
    Show {
        run: String,
        /// Settings to list, best first.
        #[arg(long, default_value_t = 10)]
        top: usize,
    },
    /// List runs, newest first.
    Runs(RunsArgs),
    /// Cancel a queued or running run.
    Cancel { run: String },
    /// Fetch the model of a finished run.
    Model {
        run: String,
        /// json, dot, text, protobuf or onnx (the binary formats need --out).
        #[arg(long, default_value = "text")]
        format: String,
        /// Write to this file instead of standard output.
        #[arg(long)]
        out: Option<PathBuf>,
    },
    /// Predict the rows of a CSV file with a run's model.
    Predict {
        run: String,
        file: PathBuf,
    },
    /// Run a sweep in this process on a CSV file, with no server.
    Local(LocalArgs),
    /// Print the fold assignment a sweep with this plan uses, as CSV row,repeat,fold.
    Folds(FoldsArgs),
    /// Manage schedules: recurring sweeps compared run to run.
    Schedule {
        #[command(subcommand)]
        action: schedules::ScheduleCommand,
    },
    /// Make tokens and their tokens-file lines (no server needed).
    Token {
        #[command(subcommand)]
        action: TokenCommand,
    },
}

#[derive(Subcommand, Debug)]
pub enum TokenCommand {
    /// Print a fresh random token and its line for the tokens file.
    New(TokenArgs),
    /// Read a token from standard input and print its line for the tokens file.
    Hash(TokenArgs),
}

#[derive(Args, Debug)]
pub struct TokenArgs {
    /// Name of the token (1 to 64 of letters, digits, '.', '_', '-'); runs record it as their owner.
    #[arg(long)]
    pub name: String,
    /// reader, writer or admin.
    #[arg(long)]
    pub role: String,
}

#[derive(Args, Debug)]
pub struct ServeArgs {
    /// Address to listen on, such as 127.0.0.1:7311.
    #[arg(long)]
    pub listen: Option<String>,
    /// Directory of the store.
    #[arg(long)]
    pub data: Option<String>,
    /// TOML configuration file.
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Serve without tokens on a non-loopback address: every caller is an admin.
    #[arg(long)]
    pub allow_tokenless: bool,
}

#[derive(Args, Debug)]
pub struct DemoArgs {
    /// Where to write the model, scores and plots.
    #[arg(long, default_value = "pollard-demo")]
    pub out: PathBuf,
    /// Voyages to generate.
    #[arg(long, default_value_t = 4000)]
    pub rows: usize,
    /// Use the server at --server instead of starting one in this process.
    #[arg(long)]
    pub remote: bool,
    /// Seed of the generated data.
    #[arg(long, default_value_t = 20261202)]
    pub seed: u64,
}

#[derive(Args, Debug)]
pub struct PutArgs {
    pub file: PathBuf,
    /// Name under which uploads form a version history.
    #[arg(long)]
    pub name: String,
    /// Column to predict (may also be named per sweep).
    #[arg(long, default_value = "")]
    pub target: String,
    /// Columns to read as categories even when numeric (comma-separated).
    #[arg(long, value_delimiter = ',')]
    pub categorical: Vec<String>,
}

#[derive(Args, Debug)]
pub struct SweepArgs {
    /// Dataset id (ds_...) or name (its latest version).
    #[arg(long)]
    pub dataset: String,
    #[command(flatten)]
    pub grid: GridArgs,
    /// Stream the run until it ends.
    #[arg(long)]
    pub follow: bool,
    /// Labels key=value (repeatable).
    #[arg(long = "label")]
    pub labels: Vec<String>,
    /// A retried command with the same key returns the first run.
    #[arg(long, default_value = "")]
    pub idempotency_key: String,
}

#[derive(Args, Debug)]
pub struct RunsArgs {
    #[arg(long)]
    pub dataset: Option<String>,
    /// queued, running, finished, failed or cancelled.
    #[arg(long)]
    pub state: Option<String>,
    /// key=value.
    #[arg(long)]
    pub label: Option<String>,
    #[arg(long)]
    pub schedule: Option<String>,
    /// Created at or after this RFC 3339 time.
    #[arg(long)]
    pub from: Option<String>,
    /// Created before this RFC 3339 time.
    #[arg(long)]
    pub to: Option<String>,
    /// Only runs whose drift report says the score fell.
    #[arg(long)]
    pub score_fell: bool,
    /// Only runs whose drift report raised any flag.
    #[arg(long)]
    pub flagged: bool,
    #[arg(long, default_value_t = 20)]
    pub limit: u32,
}

#[derive(Args, Debug)]
pub struct LocalArgs {
    pub file: PathBuf,
    #[command(flatten)]
    pub grid: GridArgs,
    /// Write the model (JSON) here.
    #[arg(long)]
    pub model_out: Option<PathBuf>,
    /// Settings to list, best first.
    #[arg(long, default_value_t = 10)]
    pub top: usize,
}

#[derive(Args, Debug)]
pub struct FoldsArgs {
    #[arg(long)]
    pub data: PathBuf,
    #[arg(long)]
    pub target: String,
    /// shuffled, stratified, grouped, forward or given (default: the task's).
    #[arg(long)]
    pub scheme: Option<String>,
    #[arg(long, default_value_t = 5)]
    pub k: u32,
    #[arg(long, default_value_t = 1)]
    pub repeats: u32,
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Column of grouped, forward and given plans.
    #[arg(long)]
    pub column: Option<String>,
}

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> Result<(), String> {
    let cli = match Cli::try_parse_from(std::iter::once("pollard".to_string()).chain(args.iter().cloned())) {
        Ok(c) => c,
        Err(e) if matches!(e.kind(), clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion) => {
            print!("{e}");
            return Ok(());
        }
        Err(e) => return Err(one_line_usage_error(&e.to_string())),
    };
    let remote = client::Remote { server: cli.server, token: cli.token, ca: cli.ca, cert: cli.cert, key: cli.key };
    match cli.command {
        Command::Serve(a) => serve(a),
        Command::Folds(a) => folds(a),
        Command::Local(a) => client::local(a, cli.json),
        Command::Token { action } => token(action, cli.json),
        Command::Demo(a) => demo::run(a, &remote, cli.json),
        other => client::run(other, &remote, cli.json),
    }
}

/// `pollard token new|hash`: a token's line for the tokens file (only its digest).
fn token(action: TokenCommand, json_out: bool) -> Result<(), String> {
    use crate::access::{tokens, Role};
    let (args, fresh) = match action {
        TokenCommand::New(a) => (a, true),
        TokenCommand::Hash(a) => (a, false),
    };
    tokens::check_name(&args.name).map_err(|e| format!("--name: {e}"))?;
    let role = Role::parse(&args.role).ok_or_else(|| format!("--role: '{}' is not reader, writer or admin", args.role))?;
    let token = if fresh {
        tokens::new_token()?
    } else {
        let mut text = String::new();
        std::io::Read::read_to_string(&mut std::io::stdin().lock(), &mut text).map_err(|e| format!("reading the token from standard input: {e}"))?;
        let t = text.trim().to_string();
        if t.is_empty() || t.chars().any(|c| c.is_whitespace() || c.is_control()) {
            return Err("standard input: give one token (printable, no spaces)".into());
        }
        t
    };
    let line = tokens::file_line(&args.name, role, &token);
    if json_out {
        let mut v = serde_json::json!({"name": args.name, "role": role.as_str(), "line": line});
        if fresh {
            v["token"] = serde_json::Value::String(token);
        }
        println!("{v}");
    } else {
        if fresh {
            println!("token: {token}");
        }
        println!("tokens file line: {line}");
    }
    Ok(())
}

fn folds(a: FoldsArgs) -> Result<(), String> {
    let path = a.data.display().to_string();
    let file = File::open(&a.data).map_err(|e| format!("{path}: {e}"))?;
    let data = read_dataset(file, &CsvOptions::new(a.target.clone())).map_err(|e| format!("{path}: {e}"))?;
    let column = || a.column.clone().ok_or_else(|| "--column C is required for this scheme".to_string());
    let scheme = match a.scheme.as_deref() {
        None => FoldPlan::default_for(data.task()).scheme,
        Some("shuffled") => FoldScheme::Shuffled,
        Some("stratified") => FoldScheme::Stratified,
        Some("grouped") => FoldScheme::Grouped { column: column()? },
        Some("forward") => FoldScheme::Forward { column: column()? },
        Some("given") => FoldScheme::Given { column: column()? },
        Some(s) => return Err(format!("--scheme: '{s}' is not one of shuffled, stratified, grouped, forward, given")),
    };
    let plan = FoldPlan { scheme, k: a.k, repeats: a.repeats };
    plan.check(&data).map_err(|e| e.to_string())?;
    let folds = plan.assign(&data, a.seed).map_err(|e| e.to_string())?;
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

fn serve(a: ServeArgs) -> Result<(), String> {
    let flags = crate::config::Flags { config_file: a.config, listen: a.listen, data_dir: a.data, allow_tokenless: a.allow_tokenless };
    let config = crate::config::Config::load(&flags, &|k| std::env::var(k).ok())?;
    init_logging(&config);
    crate::access::check_open(&config.access, config.listen)?;
    // The store is owner-only whatever the umask: new files 0600, directories 0700.
    #[cfg(unix)]
    // SAFETY: umask only sets the process's file-creation mask; no thread has started yet.
    unsafe {
        libc::umask(0o077);
    }
    crate::access::secure_dir(&config.data_dir)?;
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| e.to_string())?;
    runtime.block_on(async move {
        let store = crate::store::Store::open(&config.data_dir).map_err(|e| format!("{}: {e}", config.data_dir.display()))?;
        let listener = tokio::net::TcpListener::bind(config.listen).await.map_err(|e| format!("cannot listen on {}: {e}", config.listen))?;
        crate::server::run(listener, config, store, shutdown_signal()).await
    })
}

/// Completes on SIGINT or SIGTERM.
pub async fn shutdown_signal() {
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

/// A usage error as one line: the problem and any tip, without the usage block (errors are
/// one line on stderr, so scripts can log them).
fn one_line_usage_error(text: &str) -> String {
    let parts: Vec<String> = text
        .lines()
        .map(str::trim)
        .filter(|l| !l.is_empty() && !l.starts_with("Usage:") && !l.starts_with("For more information"))
        .map(|l| if l.starts_with("tip: ") { format!("({l})") } else { l.strip_prefix("error: ").unwrap_or(l).to_string() })
        .collect();
    format!("{} (try --help)", parts.join(" "))
}

/// `key=value` pairs.
fn labels(list: &[String]) -> Result<HashMap<String, String>, String> {
    list.iter()
        .map(|l| l.split_once('=').map(|(k, v)| (k.to_string(), v.to_string())).ok_or_else(|| format!("--label: '{l}' is not key=value")))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn usage_errors_are_one_line() {
        for args in [vec!["runs", "--bogus"], vec!["schedule", "create", "--cron", "x"], vec!["sweep", "--max-depth"], vec!["nonsense"]] {
            let args: Vec<String> = args.into_iter().map(String::from).collect();
            let e = run(&args).unwrap_err();
            assert_eq!(e.lines().count(), 1, "{e}");
            assert!(e.ends_with("(try --help)") && !e.contains("Usage:"), "{e}");
        }
        let e = run(&["schedule".into(), "create".into(), "--cron".into(), "x".into()]).unwrap_err();
        assert!(e.contains("--dataset"), "{e}");
    }
}
