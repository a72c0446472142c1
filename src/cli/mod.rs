//! Command-line entry point: flags -> checked command -> serve | demo | client commands |
//! local sweep. Every command takes `--json` for machine-readable output; client commands
//! talk to `--server` (or `POLLARD_SERVER`).

mod client;
mod demo;
pub mod error;
mod output;
pub mod plots;
pub mod ranges;
mod report;
mod schedules;
mod spec;

use std::collections::HashMap;
use std::fs::File;
use std::io::Write;
use std::path::PathBuf;

use clap::{Args, CommandFactory, FromArgMatches, Parser, Subcommand};

use crate::data::csv::{read_dataset, CsvOptions};
use crate::sweep::{FoldPlan, FoldScheme};

pub use error::{CliError, Exit, Res};
pub use spec::GridArgs;

/// The default server address.
pub const DEFAULT_SERVER: &str = "http://127.0.0.1:7311";

#[derive(Parser, Debug)]
#[command(name = "pollard", version, about = "Tunes the complexity limits of decision trees by cross-validated sweeps", long_about = None, after_help = error::EXIT_CODES)]
pub struct Cli {
    /// Address of the pollard server for client commands: host:port, http://host:port or https://host:port.
    #[arg(long, global = true, env = "POLLARD_SERVER", default_value = DEFAULT_SERVER)]
    pub server: String,
    /// Print machine-readable JSON instead of tables (errors too, as one JSON line on stderr).
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
    /// Stream a run's events until it ends; exits 3 if the run failed, 4 if it was cancelled.
    Follow {
        /// Run id (run_...).
        run: String,
        /// Resume after this event sequence number.
        #[arg(long, default_value_t = 0)]
        after: u64,
    },
    /// Show one run: its state, its best settings and its pick.
    Show {
        /// Run id (run_...).
        run: String,
        /// Settings to list, best first.
        #[arg(long, default_value_t = 10)]
        top: usize,
    },
    /// List runs, newest first.
    Runs(RunsArgs),
    /// Cancel a queued or running run (a run that already ended is an error).
    Cancel {
        /// Run id (run_...).
        run: String,
    },
    /// Fetch the model of a finished run.
    Model {
        /// Run id (run_...) of a finished run.
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
        /// Run id (run_...) of a finished run.
        run: String,
        /// CSV file with a header row and the model's feature columns.
        file: PathBuf,
        /// Also show, for each row, the conditions that led to its leaf (in words; as fields
        /// with --json).
        #[arg(long)]
        explain: bool,
    },
    /// Write a stored run's results to a folder: scores CSV, plots, the model in every format, summary.txt.
    Report(ReportArgs),
    /// Run a sweep in this process on a CSV file, with no server.
    Local(LocalArgs),
    /// Print the fold assignment a sweep with this plan uses, as CSV row,repeat,fold (or JSON with --json).
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
    #[arg(long, value_name = "DIR")]
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
    /// Seed of the generated data and of the folds.
    #[arg(long, default_value_t = 20261202)]
    pub seed: u64,
}

#[derive(Args, Debug)]
pub struct PutArgs {
    /// CSV file with a header row.
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
    /// Stream the run until it ends; exits 3 if it failed, 4 if it was cancelled.
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
    /// Only runs on datasets of this name.
    #[arg(long)]
    pub dataset: Option<String>,
    /// queued, running, finished, failed or cancelled.
    #[arg(long)]
    pub state: Option<String>,
    /// key=value.
    #[arg(long)]
    pub label: Option<String>,
    /// Only runs started by this schedule (sch_...).
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
    /// Runs to list at most.
    #[arg(long, default_value_t = 20)]
    pub limit: u32,
}

#[derive(Args, Debug)]
pub struct ReportArgs {
    /// Run id (run_...).
    pub run: String,
    /// Folder to write to (made if missing).
    #[arg(long)]
    pub out: PathBuf,
}

#[derive(Args, Debug)]
pub struct LocalArgs {
    /// CSV file with a header row.
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
    /// CSV file with a header row.
    #[arg(long, alias = "data")]
    pub file: PathBuf,
    /// Column to predict.
    #[arg(long)]
    pub target: String,
    /// Fold scheme: shuffled, stratified, grouped, forward or given (default: the task's).
    #[arg(long, alias = "scheme")]
    pub fold_scheme: Option<String>,
    /// Number of folds.
    #[arg(long, default_value_t = 5)]
    pub k: u32,
    /// Repeats of the fold plan.
    #[arg(long, default_value_t = 1)]
    pub repeats: u32,
    /// Seed of the shuffles.
    #[arg(long, default_value_t = 0)]
    pub seed: u64,
    /// Column read by grouped, forward and given folds.
    #[arg(long, alias = "column")]
    pub fold_column: Option<String>,
    /// With any --outer-* flag the CSV is outer_repeat,outer_fold,row,repeat,fold: per outer
    /// split, each row's inner fold, −2 for the outer split's own validation rows.
    #[command(flatten)]
    pub outer: spec::OuterArgs,
}

/// A fold scheme named on the command line (`flag` names the flags in messages).
fn scheme_of(flag: &str, name: Option<&str>, column: Option<String>, task: crate::data::Task) -> Res<FoldScheme> {
    let column = || column.clone().ok_or_else(|| CliError::usage(format!("--{flag}-column C is required for this scheme")));
    Ok(match name {
        None => FoldPlan::default_for(task).scheme,
        Some("shuffled") => FoldScheme::Shuffled,
        Some("stratified") => FoldScheme::Stratified,
        Some("grouped") => FoldScheme::Grouped { column: column()? },
        Some("forward") => FoldScheme::Forward { column: column()? },
        Some("given") => FoldScheme::Given { column: column()? },
        Some(s) => return Err(CliError::usage(format!("--{flag}-scheme: '{s}' is not one of shuffled, stratified, grouped, forward, given"))),
    })
}

/// The options that only client commands use: hidden from the help of commands that never
/// talk to a server.
const CLIENT_ONLY: [&str; 5] = ["server", "token", "ca", "cert", "key"];

/// The parser: [`Cli`] with the client-only options hidden where they mean nothing.
pub fn command() -> clap::Command {
    let mut cmd = Cli::command();
    // The connection options and --json after each command's own.
    for (i, id) in CLIENT_ONLY.iter().chain(&["json"]).enumerate() {
        cmd = cmd.mut_arg(*id, |a| a.display_order(1000 + i));
    }
    // A subcommand that has an argument of a global's id keeps its own: hidden copies here.
    let hidden = |ids: &[&str]| -> Vec<clap::Arg> { cmd.get_arguments().filter(|a| ids.contains(&a.get_id().as_str())).map(|a| a.clone().global(false).hide(true)).collect() };
    let client_only = hidden(&CLIENT_ONLY);
    let with_json = hidden(&[&CLIENT_ONLY[..], &["json"]].concat());
    for name in ["local", "folds", "token"] {
        let args = client_only.clone();
        cmd = cmd.mut_subcommand(name, |sub| sub.args(args));
    }
    cmd.mut_subcommand("serve", |sub| sub.args(with_json))
}

/// Whether the command line asks for JSON (so that even a usage error is printed as JSON).
pub fn wants_json(args: &[String]) -> bool {
    args.iter().take_while(|a| *a != "--").any(|a| a == "--json")
}

/// Runs the command named by `args` (without the program name).
pub fn run(args: &[String]) -> Res {
    let matches = match command().try_get_matches_from(std::iter::once("pollard".to_string()).chain(args.iter().cloned())) {
        Ok(m) => m,
        Err(e) if matches!(e.kind(), clap::error::ErrorKind::DisplayHelp | clap::error::ErrorKind::DisplayVersion) => {
            print!("{e}");
            return Ok(());
        }
        Err(e) => return Err(CliError::usage(one_line_usage_error(&e.to_string()))),
    };
    let cli = Cli::from_arg_matches(&matches).map_err(|e| CliError::usage(one_line_usage_error(&e.to_string())))?;
    let remote = client::Remote { server: cli.server, token: cli.token, ca: cli.ca, cert: cli.cert, key: cli.key };
    match cli.command {
        Command::Serve(a) => Ok(serve(a)?),
        Command::Folds(a) => folds(a, cli.json),
        Command::Local(a) => client::local(a, cli.json),
        Command::Token { action } => Ok(token(action, cli.json)?),
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

fn folds(a: FoldsArgs, json_out: bool) -> Res {
    let path = a.file.display().to_string();
    let file = File::open(&a.file).map_err(|e| format!("{path}: {e}"))?;
    let data = read_dataset(file, &CsvOptions::new(a.target.clone())).map_err(|e| format!("{path}: {e}"))?;
    let scheme = scheme_of("fold", a.fold_scheme.as_deref(), a.fold_column.clone(), data.task())?;
    let plan = FoldPlan { scheme, k: a.k, repeats: a.repeats };
    plan.check(&data).map_err(|e| e.to_string())?;
    let mut out = std::io::BufWriter::new(std::io::stdout().lock());
    let w = |e: std::io::Error| e.to_string();
    if a.outer.asked() {
        let o = &a.outer;
        let scheme = scheme_of("outer", o.outer_scheme.as_deref(), o.outer_column.clone(), data.task())?;
        let outer = FoldPlan { scheme, k: o.outer_k.unwrap_or(5), repeats: o.outer_repeats.unwrap_or(1) };
        outer.check(&data).map_err(|e| crate::sweep::spec::as_outer(e).to_string())?;
        let nested = crate::sweep::nest(&data, &plan, &outer, a.seed).map_err(|e| e.to_string())?;
        if json_out {
            let splits: Vec<_> = nested.outer.splits.iter().zip(&nested.inner).map(|(o, f)| serde_json::json!({"outer_repeat": o.repeat, "outer_fold": o.fold, "assignment": f.assignment})).collect();
            writeln!(out, "{}", serde_json::json!({"rows": data.rows(), "k": a.k, "repeats": a.repeats, "seed": a.seed, "outer_k": outer.k, "outer": splits})).map_err(w)?;
            return Ok(out.flush().map_err(w)?);
        }
        writeln!(out, "outer_repeat,outer_fold,row,repeat,fold").map_err(w)?;
        for (o, f) in nested.outer.splits.iter().zip(&nested.inner) {
            for (rep, fold_of) in f.assignment.iter().enumerate() {
                for (row, fold) in fold_of.iter().enumerate() {
                    writeln!(out, "{},{},{},{rep},{fold}", o.repeat, o.fold, row + 1).map_err(w)?;
                }
            }
        }
        return Ok(out.flush().map_err(w)?);
    }
    let folds = plan.assign(&data, a.seed).map_err(|e| e.to_string())?;
    if json_out {
        // One object: the plan and, per repeat, each row's fold (row 1 first).
        let v = serde_json::json!({"rows": folds.assignment.first().map_or(0, Vec::len), "k": a.k, "repeats": a.repeats, "seed": a.seed, "assignment": folds.assignment});
        writeln!(out, "{v}").map_err(w)?;
        return Ok(out.flush().map_err(w)?);
    }
    writeln!(out, "row,repeat,fold").map_err(w)?;
    for (rep, fold_of) in folds.assignment.iter().enumerate() {
        for (row, fold) in fold_of.iter().enumerate() {
            writeln!(out, "{},{rep},{fold}", row + 1).map_err(w)?;
        }
    }
    Ok(out.flush().map_err(w)?)
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
    if config.store == crate::config::StoreChoice::Sled {
        crate::access::secure_dir(&config.data_dir)?;
    }
    let runtime = tokio::runtime::Builder::new_multi_thread().enable_all().build().map_err(|e| e.to_string())?;
    runtime.block_on(async move {
        let store: std::sync::Arc<dyn crate::store::Storage> = match &config.store {
            crate::config::StoreChoice::Sled => std::sync::Arc::new(crate::store::SledStore::open(&config.data_dir).map_err(|e| format!("{}: {e}", config.data_dir.display()))?),
            crate::config::StoreChoice::Postgres(url) => std::sync::Arc::new(crate::store::PostgresStore::open_with(&url.0, std::time::Duration::from_secs(config.lease_secs), config.database_ca_file.as_deref()).map_err(|e| format!("database {}: {e}", url.redacted()))?),
        };
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
    let builder = tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr).with_ansi(log_colours(std::io::IsTerminal::is_terminal(&std::io::stderr()), std::env::var_os("NO_COLOR")));
    let _ = match config.log_format {
        crate::config::LogFormat::Json => builder.json().try_init(),
        crate::config::LogFormat::Plain => builder.try_init(),
    };
}

/// Colour codes in the log only on a terminal, and never when NO_COLOR is set to anything
/// but the empty string (no-color.org).
fn log_colours(terminal: bool, no_color: Option<std::ffi::OsString>) -> bool {
    terminal && no_color.is_none_or(|v| v.is_empty())
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
fn labels(list: &[String]) -> Res<HashMap<String, String>> {
    list.iter()
        .map(|l| l.split_once('=').map(|(k, v)| (k.to_string(), v.to_string())).ok_or_else(|| CliError::usage(format!("--label: '{l}' is not key=value"))))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A queued run (0 of 0 work units) shows no bar, which would be drawn full, and no count.
    #[test]
    fn a_queued_run_shows_no_full_bar() {
        let waiting = client::bar_template(0);
        assert!(!waiting.contains("{bar") && !waiting.contains("{len}") && !waiting.contains("{pos}"), "{waiting}");
        let running = client::bar_template(12);
        assert!(running.contains("{bar") && running.contains("{pos}/{len}"), "{running}");
    }

    /// Every argument of every command, with the path of commands it sits under.
    fn all_arguments() -> Vec<(String, clap::Arg)> {
        fn walk(cmd: &mut clap::Command, path: &str, out: &mut Vec<(String, clap::Arg)>) {
            for a in cmd.get_arguments() {
                out.push((path.to_string(), a.clone()));
            }
            for sub in cmd.get_subcommands_mut() {
                let p = format!("{path} {}", sub.get_name());
                walk(sub, &p, out);
            }
        }
        let mut cmd = command();
        cmd.build();
        let mut out = Vec::new();
        walk(&mut cmd, "pollard", &mut out);
        out
    }

    /// The range examples in the help (`e.g. A or B`) are ranges our syntax reads, and each
    /// limit's examples name values that limit takes (whole numbers for the counts).
    #[test]
    fn range_examples_in_the_help_parse() {
        let args = all_arguments();
        let iris = read_dataset(File::open(concat!(env!("CARGO_MANIFEST_DIR"), "/tests/data/iris.csv")).unwrap(), &CsvOptions::new("target")).unwrap();
        let mut seen = 0;
        for (path, a) in &args {
            let help = a.get_help().map(|h| h.to_string()).unwrap_or_default();
            let Some(rest) = help.strip_prefix("Range of ") else { continue };
            let (limit, examples) = rest.split_once(", e.g. ").unwrap_or_else(|| panic!("{path} {help}: no example"));
            for example in examples.trim_end_matches('.').split(" or ") {
                let flag = a.get_long().unwrap();
                let range = Some(ranges::parse_range(example).unwrap_or_else(|e| panic!("{path} --{flag}: example {example:?}: {e}")));
                let mut spec = crate::sweep::SweepSpec::default();
                match limit {
                    "max_depth" => spec.max_depth = range,
                    "min_split_rows" => spec.min_split_rows = range,
                    "min_leaf_rows" => spec.min_leaf_rows = range,
                    "max_leaves" => spec.max_leaves = range,
                    "min_gain" => spec.min_gain = range,
                    "prune_alpha" => spec.prune_alpha = range,
                    _ => panic!("{path} --{flag}: {limit} is not a limit"),
                }
                spec.check(&iris).unwrap_or_else(|e| panic!("{path} --{flag}: example {example:?} is refused: {e}"));
                seen += 1;
            }
        }
        assert!(seen >= 8, "the range examples were found: {seen}");
    }

    /// One flag name per concept: names retired for the one name are hidden aliases, never
    /// shown in a help; `--data` names the store directory, shown only by `serve`.
    #[test]
    fn retired_flag_names_are_hidden() {
        let args = all_arguments();
        for (path, a) in &args {
            let Some(long) = a.get_long() else { continue };
            assert!(!["scheme", "column", "folds"].contains(&long), "{path} shows --{long}, a retired name");
            if long == "data" {
                assert!(path == "pollard serve" || a.is_hide_set(), "{path} shows --data for something other than the store");
            }
        }
        // The retired names still parse where they were used.
        let folds = |flag: &str| Cli::try_parse_from(["pollard", "folds", flag, "x.csv", "--target", "y"]).is_ok();
        assert!(folds("--data") && folds("--file"));
    }

    /// Every argument and option of every command says what it is for.
    #[test]
    fn every_argument_has_help() {
        let missing: Vec<String> = all_arguments()
            .into_iter()
            .filter(|(_, a)| !matches!(a.get_id().as_str(), "help" | "version") && a.get_help().is_none_or(|h| h.to_string().trim().is_empty()))
            .map(|(path, a)| format!("{path} {}", a.get_long().map_or(format!("<{}>", a.get_id()), |l| format!("--{l}"))))
            .collect();
        assert!(missing.is_empty(), "arguments without help: {missing:?}");
    }

    /// `serve` lists no client-only options; client commands do.
    #[test]
    fn serve_help_has_no_client_options() {
        let mut cmd = command();
        cmd.build();
        let serve = cmd.find_subcommand_mut("serve").unwrap().render_long_help().to_string();
        for flag in ["--server", "--token", "--ca", "--cert", "--key", "--json"] {
            assert!(!serve.contains(flag), "serve --help lists {flag}:\n{serve}");
        }
        let runs = cmd.find_subcommand_mut("runs").unwrap().render_long_help().to_string();
        assert!(runs.contains("--server") && runs.contains("--json"), "{runs}");
        let top = cmd.render_long_help().to_string();
        assert!(top.contains("Exit codes:") && top.contains("4  the run followed ended cancelled"), "{top}");
    }

    #[test]
    fn log_colours_only_on_a_terminal_without_no_color() {
        assert!(log_colours(true, None));
        assert!(log_colours(true, Some("".into())));
        assert!(!log_colours(true, Some("1".into())));
        assert!(!log_colours(false, None));
    }

    #[test]
    fn usage_errors_are_one_line() {
        for args in [vec!["runs", "--bogus"], vec!["schedule", "create", "--cron", "x"], vec!["sweep", "--max-depth"], vec!["nonsense"]] {
            let args: Vec<String> = args.into_iter().map(String::from).collect();
            let e = run(&args).unwrap_err();
            assert_eq!(e.exit, Exit::Usage, "{e:?}");
            let e = e.message;
            assert_eq!(e.lines().count(), 1, "{e}");
            assert!(e.ends_with("(try --help)") && !e.contains("Usage:"), "{e}");
        }
        let e = run(&["schedule".into(), "create".into(), "--cron".into(), "x".into()]).unwrap_err().message;
        assert!(e.contains("--dataset"), "{e}");
    }
}
