//! Reloads the tokens file and the TLS files without a restart: on SIGHUP, and when their
//! contents change (read once a second; they are small). A file that does not load keeps
//! what was loaded before and logs an error.

use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use tracing::{error, info};

use super::layer::Gate;
use super::tls::TlsState;
use super::tokens::TokenTable;

/// How often the files are read for changes.
pub const POLL: Duration = Duration::from_secs(1);

/// Something loaded from files.
pub enum Source {
    Tokens { path: PathBuf, gate: Arc<Gate> },
    Tls(Arc<TlsState>),
}

/// Reads and checks a tokens file.
pub fn load_tokens(path: &PathBuf) -> Result<TokenTable, String> {
    let text = std::fs::read_to_string(path).map_err(|e| format!("tokens file {}: {e}", path.display()))?;
    TokenTable::parse(&text).map_err(|e| format!("tokens file {}: {e}", path.display()))
}

impl Source {
    fn paths(&self) -> Vec<PathBuf> {
        match self {
            Source::Tokens { path, .. } => vec![path.clone()],
            Source::Tls(t) => t.files.paths(),
        }
    }

    /// The files' bytes (`None` for an unreadable file), to notice a change.
    fn snapshot(&self) -> Vec<Option<Vec<u8>>> {
        self.paths().iter().map(|p| std::fs::read(p).ok()).collect()
    }

    fn reload(&self) -> Result<String, String> {
        match self {
            Source::Tokens { path, gate } => {
                let table = load_tokens(path)?;
                let n = table.len();
                gate.replace(table);
                Ok(format!("tokens file {} reloaded: {n} tokens", path.display()))
            }
            Source::Tls(t) => {
                t.reload()?;
                Ok(format!("TLS files reloaded ({})", t.files.cert.display()))
            }
        }
    }
}

/// Watches `sources` until `shutdown` changes.
pub async fn watch(sources: Vec<Source>, mut shutdown: tokio::sync::watch::Receiver<bool>) {
    if sources.is_empty() {
        return;
    }
    let mut seen: Vec<_> = sources.iter().map(Source::snapshot).collect();
    #[cfg(unix)]
    let mut hangup = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::hangup()).ok();
    let mut tick = tokio::time::interval(POLL);
    tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    loop {
        #[cfg(unix)]
        let hup = async {
            match hangup.as_mut() {
                Some(h) => h.recv().await,
                None => std::future::pending().await,
            }
        };
        #[cfg(not(unix))]
        let hup = std::future::pending::<Option<()>>();
        let forced = tokio::select! {
            _ = tick.tick() => false,
            _ = hup => true,
            _ = shutdown.changed() => return,
        };
        for (source, seen) in sources.iter().zip(seen.iter_mut()) {
            let now = source.snapshot();
            if !forced && now == *seen {
                continue;
            }
            *seen = now;
            match source.reload() {
                Ok(m) => info!("{m}"),
                Err(e) => error!("{e}; keeping what was loaded before"),
            }
        }
    }
}
