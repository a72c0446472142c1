//! Server configuration: defaults, then a TOML file, then `POLLARD_*` environment variables,
//! then command-line flags; checked once into a [`Config`].

use std::net::SocketAddr;
use std::path::PathBuf;

use serde::Deserialize;

/// How log lines are written.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum LogFormat {
    Plain,
    Json,
}

/// A checked server configuration.
#[derive(Clone, Debug, PartialEq)]
pub struct Config {
    pub listen: SocketAddr,
    /// Where the store lives.
    pub data_dir: PathBuf,
    /// Runs executed at the same time; more wait in the queue.
    pub concurrent_runs: usize,
    /// Threads of the CPU pool that fits trees (0: one per core).
    pub cpu_threads: usize,
    /// Largest dataset upload, in bytes.
    pub max_upload_bytes: u64,
    pub max_rows: usize,
    pub max_columns: usize,
    /// Most settings in one sweep.
    pub max_settings: usize,
    /// How late a schedule's fire may be handled and still count as on time (seconds); older
    /// fires count as missed (caught up once, or skipped, by the schedule's rule).
    pub fire_grace_secs: u64,
    /// Largest request and reply message of each service, in bytes (see [`MessageLimits`]).
    pub messages: MessageLimits,
    /// Uploads (Upload, PutTable) at the same time; more wait for a slot.
    pub max_concurrent_uploads: usize,
    /// How long an upload waits for a slot before RESOURCE_EXHAUSTED (seconds).
    pub upload_wait_secs: u64,
    /// Request bytes the calls that send a table (Upload, PutTable, Predict) may hold at the
    /// same time, across calls; a call that would go over gets RESOURCE_EXHAUSTED.
    pub max_upload_bytes_in_flight: u64,
    /// A call that sends a table and receives no data for this long is ended (seconds).
    pub upload_idle_secs: u64,
    /// After SIGTERM, how long open calls (uploads, follows) may take to end before the
    /// server closes them and exits (seconds).
    pub drain_secs: u64,
    pub log_format: LogFormat,
    /// A tracing filter such as `info` or `pollard=debug`.
    pub log_filter: String,
}

impl Default for Config {
    fn default() -> Self {
        Config {
            listen: "127.0.0.1:7311".parse().unwrap(),
            data_dir: PathBuf::from("pollard-data"),
            concurrent_runs: 1,
            cpu_threads: 0,
            max_upload_bytes: 256 << 20,
            max_rows: 5_000_000,
            max_columns: 2_000,
            max_settings: 100_000,
            fire_grace_secs: 300,
            messages: MessageLimits::default(),
            max_concurrent_uploads: 4,
            upload_wait_secs: 10,
            max_upload_bytes_in_flight: 256 << 20,
            upload_idle_secs: 30,
            drain_secs: 5,
            log_format: LogFormat::Plain,
            log_filter: "info".into(),
        }
    }
}

/// Message size limits per service, in bytes: `request` for what a caller sends (larger
/// messages are refused before a handler runs), `reply` for what the server sends.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct MessageLimits {
    pub datasets: Limit,
    pub runs: Limit,
    pub models: Limit,
    pub schedules: Limit,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Limit {
    pub request: usize,
    pub reply: usize,
}

/// Requests of the services that carry tables: the default upload cap and 1 MiB for the rest
/// of the message.
pub const TABLE_REQUEST_BYTES: usize = (256 << 20) + (1 << 20);
/// Requests of the other services (the usual gRPC default).
pub const SMALL_REQUEST_BYTES: usize = 4 << 20;
/// Replies of every service.
pub const REPLY_BYTES: usize = 256 << 20;

impl Default for MessageLimits {
    fn default() -> Self {
        let table = Limit { request: TABLE_REQUEST_BYTES, reply: REPLY_BYTES };
        let small = Limit { request: SMALL_REQUEST_BYTES, reply: REPLY_BYTES };
        MessageLimits { datasets: table, runs: small, models: table, schedules: small }
    }
}

impl MessageLimits {
    /// The limits of a service by its full name (`pollard.v1.Runs`) with the config key of
    /// its request limit; `None` for services pollard does not configure (health, reflection).
    pub fn of(&self, service: &str) -> Option<(Limit, &'static str, &'static str)> {
        match service {
            "pollard.v1.Datasets" => Some((self.datasets, "datasets_max_request_bytes", "datasets_max_reply_bytes")),
            "pollard.v1.Runs" => Some((self.runs, "runs_max_request_bytes", "runs_max_reply_bytes")),
            "pollard.v1.Models" => Some((self.models, "models_max_request_bytes", "models_max_reply_bytes")),
            "pollard.v1.Schedules" => Some((self.schedules, "schedules_max_request_bytes", "schedules_max_reply_bytes")),
            _ => None,
        }
    }
}

/// The TOML file's shape; every key optional.
#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
struct FileConfig {
    listen: Option<String>,
    data_dir: Option<String>,
    concurrent_runs: Option<usize>,
    cpu_threads: Option<usize>,
    max_upload_bytes: Option<u64>,
    max_rows: Option<usize>,
    max_columns: Option<usize>,
    max_settings: Option<usize>,
    fire_grace_secs: Option<u64>,
    datasets_max_request_bytes: Option<usize>,
    datasets_max_reply_bytes: Option<usize>,
    runs_max_request_bytes: Option<usize>,
    runs_max_reply_bytes: Option<usize>,
    models_max_request_bytes: Option<usize>,
    models_max_reply_bytes: Option<usize>,
    schedules_max_request_bytes: Option<usize>,
    schedules_max_reply_bytes: Option<usize>,
    max_concurrent_uploads: Option<usize>,
    upload_wait_secs: Option<u64>,
    max_upload_bytes_in_flight: Option<u64>,
    upload_idle_secs: Option<u64>,
    drain_secs: Option<u64>,
    log_format: Option<String>,
    log_filter: Option<String>,
}

/// Values given on the command line.
#[derive(Default, Debug, Clone)]
pub struct Flags {
    pub config_file: Option<PathBuf>,
    pub listen: Option<String>,
    pub data_dir: Option<String>,
}

impl Config {
    /// Builds the configuration from a file (if named), the environment and flags.
    pub fn load(flags: &Flags, env: &dyn Fn(&str) -> Option<String>) -> Result<Config, String> {
        let file = match &flags.config_file {
            None => FileConfig::default(),
            Some(p) => {
                let text = std::fs::read_to_string(p).map_err(|e| format!("config file {}: {e}", p.display()))?;
                toml::from_str(&text).map_err(|e| format!("config file {}: {e}", p.display()))?
            }
        };
        let mut c = Config::default();
        // Where a value comes from, for messages: a flag beats the environment beats the file.
        let set = |key: &str, file_value: Option<String>, env_key: &str, flag: Option<&String>| -> Option<(String, String)> {
            flag.cloned().map(|v| (format!("--{key}"), v)).or_else(|| env(env_key).map(|v| (env_key.to_string(), v))).or(file_value.map(|v| (format!("{key} in the config file"), v)))
        };
        if let Some((from, v)) = set("listen", file.listen, "POLLARD_LISTEN", flags.listen.as_ref()) {
            c.listen = v.parse().map_err(|e| format!("{from}: '{v}' is not an address such as 127.0.0.1:7311 ({e})"))?;
        }
        if let Some((_, v)) = set("data", file.data_dir, "POLLARD_DATA", flags.data_dir.as_ref()) {
            c.data_dir = PathBuf::from(v);
        }
        let number = |from: &str, v: &str| v.parse::<u64>().map_err(|_| format!("{from}: '{v}' is not a whole number"));
        macro_rules! num {
            ($field:ident, $key:literal, $env:literal, $ty:ty) => {
                num!(c.$field, $field, $key, $env, $ty)
            };
            ($target:expr, $field:ident, $key:literal, $env:literal, $ty:ty) => {
                if let Some((from, v)) = set($key, file.$field.map(|x| x.to_string()), $env, None) {
                    $target = number(&from, &v)? as $ty;
                }
            };
        }
        num!(concurrent_runs, "concurrent_runs", "POLLARD_CONCURRENT_RUNS", usize);
        num!(cpu_threads, "cpu_threads", "POLLARD_CPU_THREADS", usize);
        num!(max_upload_bytes, "max_upload_bytes", "POLLARD_MAX_UPLOAD_BYTES", u64);
        num!(max_rows, "max_rows", "POLLARD_MAX_ROWS", usize);
        num!(max_columns, "max_columns", "POLLARD_MAX_COLUMNS", usize);
        num!(max_settings, "max_settings", "POLLARD_MAX_SETTINGS", usize);
        num!(fire_grace_secs, "fire_grace_secs", "POLLARD_FIRE_GRACE_SECS", u64);
        num!(c.messages.datasets.request, datasets_max_request_bytes, "datasets_max_request_bytes", "POLLARD_DATASETS_MAX_REQUEST_BYTES", usize);
        num!(c.messages.datasets.reply, datasets_max_reply_bytes, "datasets_max_reply_bytes", "POLLARD_DATASETS_MAX_REPLY_BYTES", usize);
        num!(c.messages.runs.request, runs_max_request_bytes, "runs_max_request_bytes", "POLLARD_RUNS_MAX_REQUEST_BYTES", usize);
        num!(c.messages.runs.reply, runs_max_reply_bytes, "runs_max_reply_bytes", "POLLARD_RUNS_MAX_REPLY_BYTES", usize);
        num!(c.messages.models.request, models_max_request_bytes, "models_max_request_bytes", "POLLARD_MODELS_MAX_REQUEST_BYTES", usize);
        num!(c.messages.models.reply, models_max_reply_bytes, "models_max_reply_bytes", "POLLARD_MODELS_MAX_REPLY_BYTES", usize);
        num!(c.messages.schedules.request, schedules_max_request_bytes, "schedules_max_request_bytes", "POLLARD_SCHEDULES_MAX_REQUEST_BYTES", usize);
        num!(c.messages.schedules.reply, schedules_max_reply_bytes, "schedules_max_reply_bytes", "POLLARD_SCHEDULES_MAX_REPLY_BYTES", usize);
        num!(max_concurrent_uploads, "max_concurrent_uploads", "POLLARD_MAX_CONCURRENT_UPLOADS", usize);
        num!(upload_wait_secs, "upload_wait_secs", "POLLARD_UPLOAD_WAIT_SECS", u64);
        num!(max_upload_bytes_in_flight, "max_upload_bytes_in_flight", "POLLARD_MAX_UPLOAD_BYTES_IN_FLIGHT", u64);
        num!(upload_idle_secs, "upload_idle_secs", "POLLARD_UPLOAD_IDLE_SECS", u64);
        num!(drain_secs, "drain_secs", "POLLARD_DRAIN_SECS", u64);
        if let Some((from, v)) = set("log_format", file.log_format, "POLLARD_LOG_FORMAT", None) {
            c.log_format = match v.as_str() {
                "plain" => LogFormat::Plain,
                "json" => LogFormat::Json,
                _ => return Err(format!("{from}: '{v}' is not plain or json")),
            };
        }
        if let Some((_, v)) = set("log_filter", file.log_filter, "POLLARD_LOG", None) {
            c.log_filter = v;
        }
        if c.concurrent_runs == 0 {
            return Err("concurrent_runs must be at least 1".into());
        }
        if c.max_settings == 0 || c.max_rows == 0 || c.max_columns == 0 || c.max_upload_bytes == 0 {
            return Err("the caps (max_upload_bytes, max_rows, max_columns, max_settings) must be at least 1".into());
        }
        if c.max_concurrent_uploads == 0 || c.max_upload_bytes_in_flight == 0 || c.upload_idle_secs == 0 {
            return Err("max_concurrent_uploads, max_upload_bytes_in_flight and upload_idle_secs must be at least 1".into());
        }
        let m = c.messages;
        for service in [m.datasets, m.runs, m.models, m.schedules] {
            // A message must at least hold its 5-byte gRPC frame header and a few fields.
            if service.request < 1024 || service.reply < 1024 {
                return Err("the message limits (*_max_request_bytes, *_max_reply_bytes) must be at least 1024".into());
            }
        }
        Ok(c)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn flags_beat_environment_beat_file() {
        let dir = std::env::temp_dir().join(format!("pollard-config-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("pollard.toml");
        std::fs::write(&path, "listen = \"127.0.0.1:9000\"\nmax_rows = 10\nconcurrent_runs = 3\n").unwrap();
        let env = |k: &str| (k == "POLLARD_MAX_ROWS").then(|| "20".to_string());
        let flags = Flags { config_file: Some(path.clone()), listen: Some("127.0.0.1:9100".into()), data_dir: None };
        let c = Config::load(&flags, &env).unwrap();
        assert_eq!(c.listen.port(), 9100);
        assert_eq!(c.max_rows, 20);
        assert_eq!(c.concurrent_runs, 3);
        std::fs::write(&path, "listen = 5\n").unwrap();
        assert!(Config::load(&flags, &|_| None).unwrap_err().contains("config file"));
        std::fs::write(&path, "lisen = \"x\"\n").unwrap();
        assert!(Config::load(&flags, &|_| None).unwrap_err().contains("unknown field"));
        let bad = |k: &str| (k == "POLLARD_LOG_FORMAT").then(|| "xml".to_string());
        assert!(Config::load(&Flags::default(), &bad).unwrap_err().contains("POLLARD_LOG_FORMAT"));
        std::fs::remove_dir_all(&dir).ok();
    }
}
