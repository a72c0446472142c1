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
    pub log_format: LogFormat,
    /// A tracing filter such as `info` or `pollard=debug`.
    pub log_filter: String,
    /// Access: tokens, TLS, reflection (see [`AccessConfig`]).
    pub access: AccessConfig,
}

/// Who may call, and over what (see `crate::access`).
#[derive(Clone, Debug, PartialEq)]
pub struct AccessConfig {
    /// The tokens file (`NAME ROLE SHA256-HEX` lines); `None`: every caller is an anonymous
    /// admin, which only a loopback address or `allow_tokenless` permits.
    pub tokens_file: Option<PathBuf>,
    /// Serve without tokens on a non-loopback address.
    pub allow_tokenless: bool,
    /// Serve gRPC reflection (to callers with a token, when tokens are on).
    pub reflection: bool,
    /// TLS certificate chain and private key (PEM); both or neither.
    pub tls_cert_file: Option<PathBuf>,
    pub tls_key_file: Option<PathBuf>,
    /// Require client certificates signed by this CA (PEM): mTLS.
    pub tls_client_ca_file: Option<PathBuf>,
    /// Most queued runs one token may have.
    pub max_queued_per_token: usize,
    /// A second, plain-text address that serves only gRPC health checks (for probes that
    /// cannot speak TLS, such as the kubelet's).
    pub health_listen: Option<SocketAddr>,
}

impl Default for AccessConfig {
    fn default() -> Self {
        AccessConfig { tokens_file: None, allow_tokenless: false, reflection: true, tls_cert_file: None, tls_key_file: None, tls_client_ca_file: None, max_queued_per_token: 100, health_listen: None }
    }
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
            log_format: LogFormat::Plain,
            log_filter: "info".into(),
            access: AccessConfig::default(),
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
    log_format: Option<String>,
    log_filter: Option<String>,
    tokens_file: Option<String>,
    allow_tokenless: Option<bool>,
    reflection: Option<bool>,
    tls_cert_file: Option<String>,
    tls_key_file: Option<String>,
    tls_client_ca_file: Option<String>,
    max_queued_per_token: Option<usize>,
    health_listen: Option<String>,
}

/// Values given on the command line.
#[derive(Default, Debug, Clone)]
pub struct Flags {
    pub config_file: Option<PathBuf>,
    pub listen: Option<String>,
    pub data_dir: Option<String>,
    /// `--allow-tokenless`.
    pub allow_tokenless: bool,
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
        load_access(&mut c.access, &file, flags, env)?;
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
                if let Some((from, v)) = set($key, file.$field.map(|x| x.to_string()), $env, None) {
                    c.$field = number(&from, &v)? as $ty;
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
        Ok(c)
    }
}

/// The access keys: file, then environment, then flags.
fn load_access(a: &mut AccessConfig, file: &FileConfig, flags: &Flags, env: &dyn Fn(&str) -> Option<String>) -> Result<(), String> {
    let path = |env_key: &str, v: &Option<String>| env(env_key).or_else(|| v.clone()).filter(|s| !s.is_empty()).map(PathBuf::from);
    let flag = |key: &str, env_key: &str, v: Option<bool>| -> Result<Option<bool>, String> {
        match env(env_key) {
            None => Ok(v),
            Some(s) => match s.as_str() {
                "true" | "1" => Ok(Some(true)),
                "false" | "0" => Ok(Some(false)),
                _ => Err(format!("{env_key}: '{s}' is not true or false (for {key})")),
            },
        }
    };
    a.tokens_file = path("POLLARD_TOKENS_FILE", &file.tokens_file).or(a.tokens_file.take());
    a.tls_cert_file = path("POLLARD_TLS_CERT_FILE", &file.tls_cert_file).or(a.tls_cert_file.take());
    a.tls_key_file = path("POLLARD_TLS_KEY_FILE", &file.tls_key_file).or(a.tls_key_file.take());
    a.tls_client_ca_file = path("POLLARD_TLS_CLIENT_CA_FILE", &file.tls_client_ca_file).or(a.tls_client_ca_file.take());
    if let Some(v) = flag("allow_tokenless", "POLLARD_ALLOW_TOKENLESS", file.allow_tokenless)? {
        a.allow_tokenless = v;
    }
    a.allow_tokenless |= flags.allow_tokenless;
    if let Some(v) = flag("reflection", "POLLARD_REFLECTION", file.reflection)? {
        a.reflection = v;
    }
    match env("POLLARD_MAX_QUEUED_PER_TOKEN") {
        Some(v) => a.max_queued_per_token = v.parse().map_err(|_| format!("POLLARD_MAX_QUEUED_PER_TOKEN: '{v}' is not a whole number"))?,
        None => a.max_queued_per_token = file.max_queued_per_token.unwrap_or(a.max_queued_per_token),
    }
    if let Some(v) = env("POLLARD_HEALTH_LISTEN").or_else(|| file.health_listen.clone()).filter(|s| !s.is_empty()) {
        a.health_listen = Some(v.parse().map_err(|e| format!("health_listen: '{v}' is not an address such as 0.0.0.0:7312 ({e})"))?);
    }
    if a.max_queued_per_token == 0 {
        return Err("max_queued_per_token must be at least 1".into());
    }
    if a.tls_cert_file.is_some() != a.tls_key_file.is_some() {
        return Err("tls_cert_file and tls_key_file go together: give both for TLS, or neither".into());
    }
    if a.tls_client_ca_file.is_some() && a.tls_cert_file.is_none() {
        return Err("tls_client_ca_file (client certificates) needs TLS: give tls_cert_file and tls_key_file too".into());
    }
    Ok(())
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
        let flags = Flags { config_file: Some(path.clone()), listen: Some("127.0.0.1:9100".into()), ..Flags::default() };
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
