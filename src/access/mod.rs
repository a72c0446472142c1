//! Who may call what: bearer tokens with roles, the one table of the role each RPC needs,
//! the tower layer that admits calls, TLS on our own accept loop, and the watcher that
//! reloads the tokens file and the certificates without a restart.
//!
//! A call carries `authorization: Bearer <token>`. The tokens file stores only SHA-256
//! digests of the tokens ([`tokens`]); a presented token is hashed and compared with every
//! digest in constant time. With no tokens file, every caller is an anonymous admin.

pub mod layer;
pub mod tls;
pub mod tokens;
pub mod watch;

use std::fmt;
use std::net::SocketAddr;
use std::sync::Arc;

use crate::config::AccessConfig;

/// What a token may do; each role may do everything the roles below it may.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum Role {
    /// Read datasets, runs, schedules and models; follow runs; predict.
    Reader,
    /// Also upload datasets, start runs, cancel its own runs, manage schedules.
    Writer,
    /// Also delete datasets and schedules, and cancel any caller's runs.
    Admin,
}

impl Role {
    pub const ALL: [Role; 3] = [Role::Reader, Role::Writer, Role::Admin];

    pub fn as_str(self) -> &'static str {
        match self {
            Role::Reader => "reader",
            Role::Writer => "writer",
            Role::Admin => "admin",
        }
    }

    pub fn parse(s: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.as_str() == s)
    }
}

impl fmt::Display for Role {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// The caller of one call, put into the request's extensions by [`layer::AuthLayer`].
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Caller {
    /// The token's name; `None` when the server runs without tokens (anonymous).
    pub name: Option<String>,
    pub role: Role,
}

impl Caller {
    /// Every caller of a server without tokens.
    pub fn anonymous() -> Caller {
        Caller { name: None, role: Role::Admin }
    }

    /// The caller of a request. The layer admits every call before a handler sees it, so a
    /// request without one reaches a handler only through a server built without the layer:
    /// such a request gets the least power.
    pub fn of<T>(request: &tonic::Request<T>) -> Caller {
        request.extensions().get::<Caller>().cloned().unwrap_or(Caller { name: None, role: Role::Reader })
    }

    /// Whether this caller may act on a run (or anything else) whose owner is `owner`: an
    /// admin on anything, anyone else only on what its own token made.
    pub fn owns(&self, owner: Option<&str>) -> bool {
        self.role == Role::Admin || (self.name.is_some() && self.name.as_deref() == owner)
    }

    /// How logs and messages name the caller.
    pub fn label(&self) -> &str {
        self.name.as_deref().unwrap_or("anonymous")
    }
}

/// Every RPC the server answers, by service and method.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Rpc {
    Upload,
    PutTable,
    GetDataset,
    ListDatasets,
    DeleteDataset,
    StartRun,
    FollowRun,
    FollowRunBatches,
    GetRun,
    ListRuns,
    CancelRun,
    CreateSchedule,
    GetSchedule,
    ListSchedules,
    PauseSchedule,
    ResumeSchedule,
    DeleteSchedule,
    ListFires,
    GetModel,
    Predict,
}

/// What a method path needs.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Need {
    /// No token (gRPC health checks).
    Nothing,
    /// At least this role.
    Role(Role),
}

impl Rpc {
    pub const ALL: [Rpc; 20] = [
        Rpc::Upload,
        Rpc::PutTable,
        Rpc::GetDataset,
        Rpc::ListDatasets,
        Rpc::DeleteDataset,
        Rpc::StartRun,
        Rpc::FollowRun,
        Rpc::FollowRunBatches,
        Rpc::GetRun,
        Rpc::ListRuns,
        Rpc::CancelRun,
        Rpc::CreateSchedule,
        Rpc::GetSchedule,
        Rpc::ListSchedules,
        Rpc::PauseSchedule,
        Rpc::ResumeSchedule,
        Rpc::DeleteSchedule,
        Rpc::ListFires,
        Rpc::GetModel,
        Rpc::Predict,
    ];

    /// The role table: the least role that may make each call. (Cancelling another
    /// token's run also needs admin; the handler checks the owner.)
    pub fn needs(self) -> Role {
        use Rpc::*;
        match self {
            GetDataset | ListDatasets | FollowRun | FollowRunBatches | GetRun | ListRuns | GetSchedule | ListSchedules | ListFires | GetModel | Predict => Role::Reader,
            Upload | PutTable | StartRun | CancelRun | CreateSchedule | PauseSchedule | ResumeSchedule => Role::Writer,
            DeleteDataset | DeleteSchedule => Role::Admin,
        }
    }

    /// (service, method) as the wire names them.
    pub fn name(self) -> (&'static str, &'static str) {
        use Rpc::*;
        match self {
            Upload => ("Datasets", "Upload"),
            PutTable => ("Datasets", "PutTable"),
            GetDataset => ("Datasets", "GetDataset"),
            ListDatasets => ("Datasets", "ListDatasets"),
            DeleteDataset => ("Datasets", "DeleteDataset"),
            StartRun => ("Runs", "StartRun"),
            FollowRun => ("Runs", "FollowRun"),
            FollowRunBatches => ("Runs", "FollowRunBatches"),
            GetRun => ("Runs", "GetRun"),
            ListRuns => ("Runs", "ListRuns"),
            CancelRun => ("Runs", "CancelRun"),
            CreateSchedule => ("Schedules", "CreateSchedule"),
            GetSchedule => ("Schedules", "GetSchedule"),
            ListSchedules => ("Schedules", "ListSchedules"),
            PauseSchedule => ("Schedules", "PauseSchedule"),
            ResumeSchedule => ("Schedules", "ResumeSchedule"),
            DeleteSchedule => ("Schedules", "DeleteSchedule"),
            ListFires => ("Schedules", "ListFires"),
            GetModel => ("Models", "GetModel"),
            Predict => ("Models", "Predict"),
        }
    }

    /// The HTTP/2 path of the call: `/pollard.v1.Service/Method`.
    pub fn path(self) -> String {
        let (s, m) = self.name();
        format!("/pollard.v1.{s}/{m}")
    }

    pub fn from_path(path: &str) -> Option<Rpc> {
        let rest = path.strip_prefix("/pollard.v1.")?;
        let (s, m) = rest.split_once('/')?;
        Rpc::ALL.into_iter().find(|r| r.name() == (s, m))
    }
}

/// What a call to `path` needs: health checks nothing; pollard's RPCs their role; anything
/// else (reflection, unknown paths) a reader, so only a caller with a token learns even
/// that a path does not exist.
pub fn need(path: &str) -> Need {
    if path.starts_with("/grpc.health.v1.Health/") {
        return Need::Nothing;
    }
    Need::Role(Rpc::from_path(path).map_or(Role::Reader, Rpc::needs))
}

/// The access parts of a server: its gate, its TLS state, and what the watcher reloads.
pub struct Access {
    pub gate: Arc<layer::Gate>,
    pub tls: Option<Arc<tls::TlsState>>,
    sources: Vec<watch::Source>,
}

impl Access {
    /// Loads the tokens file and the TLS files, and refuses to serve on a non-loopback
    /// address without tokens unless `allow_tokenless` says so.
    pub fn load(config: &AccessConfig, addr: SocketAddr) -> Result<Access, String> {
        let mut sources = Vec::new();
        let gate = match &config.tokens_file {
            None => Arc::new(layer::Gate::open()),
            Some(path) => {
                let table = watch::load_tokens(path)?;
                if table.is_empty() {
                    tracing::warn!("tokens file {} holds no token: every call but health checks is refused", path.display());
                }
                let gate = Arc::new(layer::Gate::with_tokens(table));
                sources.push(watch::Source::Tokens { path: path.clone(), gate: gate.clone() });
                gate
            }
        };
        check_open(config, addr)?;
        if !gate.needs_tokens() && !addr.ip().is_loopback() {
            tracing::warn!(%addr, "serving without tokens on a non-loopback address (allow_tokenless): every caller is an admin");
        }
        let tls = match (&config.tls_cert_file, &config.tls_key_file) {
            (Some(cert), Some(key)) => {
                let state = Arc::new(tls::TlsState::load(tls::TlsFiles { cert: cert.clone(), key: key.clone(), client_ca: config.tls_client_ca_file.clone() })?);
                sources.push(watch::Source::Tls(state.clone()));
                Some(state)
            }
            _ => None,
        };
        Ok(Access { gate, tls, sources })
    }

    /// Starts the task that reloads the files (until `shutdown` changes).
    pub fn spawn_watcher(&mut self, shutdown: tokio::sync::watch::Receiver<bool>) {
        let sources = std::mem::take(&mut self.sources);
        tokio::spawn(watch::watch(sources, shutdown));
    }
}

/// The startup guard: no tokens on a non-loopback address only with `allow_tokenless`.
pub fn check_open(config: &AccessConfig, addr: SocketAddr) -> Result<(), String> {
    if config.tokens_file.is_none() && !addr.ip().is_loopback() && !config.allow_tokenless {
        return Err(format!(
            "refusing to serve on {addr} without tokens: anyone who reaches the port could read, cancel and delete everything. Set tokens_file, or listen on a loopback address, or set allow_tokenless = true (--allow-tokenless) to serve every caller as admin"
        ));
    }
    Ok(())
}

/// Makes the data directory and everything in it owner-only (0700 directories, 0600
/// files), creating it if needed. Files created later are owner-only through the umask
/// `pollard serve` sets.
#[cfg(unix)]
pub fn secure_dir(dir: &std::path::Path) -> Result<(), String> {
    use std::os::unix::fs::{DirBuilderExt, PermissionsExt};
    let err = |p: &std::path::Path, e: std::io::Error| format!("{}: {e}", p.display());
    std::fs::DirBuilder::new().recursive(true).mode(0o700).create(dir).map_err(|e| err(dir, e))?;
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        std::fs::set_permissions(&d, std::fs::Permissions::from_mode(0o700)).map_err(|e| err(&d, e))?;
        for entry in std::fs::read_dir(&d).map_err(|e| err(&d, e))? {
            let entry = entry.map_err(|e| err(&d, e))?;
            let kind = entry.file_type().map_err(|e| err(&entry.path(), e))?;
            if kind.is_dir() {
                stack.push(entry.path());
            } else if kind.is_file() {
                std::fs::set_permissions(entry.path(), std::fs::Permissions::from_mode(0o600)).map_err(|e| err(&entry.path(), e))?;
            }
        }
    }
    Ok(())
}

#[cfg(not(unix))]
pub fn secure_dir(dir: &std::path::Path) -> Result<(), String> {
    std::fs::create_dir_all(dir).map_err(|e| format!("{}: {e}", dir.display()))
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every `rpc` line of the wire contract is in the role table, and nothing else is.
    #[test]
    fn role_table_covers_every_rpc_of_the_contract() {
        let proto = include_str!("../../proto/pollard/v1/pollard.proto");
        let mut service = "";
        let mut seen = Vec::new();
        for line in proto.lines().map(str::trim) {
            if let Some(rest) = line.strip_prefix("service ") {
                service = rest.split_whitespace().next().unwrap();
            } else if let Some(rest) = line.strip_prefix("rpc ") {
                let method = rest.split('(').next().unwrap().trim();
                let path = format!("/pollard.v1.{service}/{method}");
                let rpc = Rpc::from_path(&path).unwrap_or_else(|| panic!("{path} is not in the role table"));
                assert_eq!(rpc.path(), path);
                seen.push(rpc);
            }
        }
        assert_eq!(seen.len(), Rpc::ALL.len(), "the table names an RPC the contract does not have");
    }

    #[test]
    fn health_is_open_and_everything_else_needs_a_role() {
        assert_eq!(need("/grpc.health.v1.Health/Check"), Need::Nothing);
        assert_eq!(need("/grpc.reflection.v1.ServerReflection/ServerReflectionInfo"), Need::Role(Role::Reader));
        assert_eq!(need("/pollard.v1.Datasets/DeleteDataset"), Need::Role(Role::Admin));
        assert_eq!(need("/pollard.v1.Runs/CancelRun"), Need::Role(Role::Writer));
        assert_eq!(need("/nope"), Need::Role(Role::Reader));
        assert!(Role::Reader < Role::Writer && Role::Writer < Role::Admin);
    }

    #[test]
    fn owners() {
        let w = Caller { name: Some("ci".into()), role: Role::Writer };
        assert!(w.owns(Some("ci")) && !w.owns(Some("other")) && !w.owns(None));
        assert!(Caller::anonymous().owns(None) && Caller::anonymous().owns(Some("ci")));
    }
}
