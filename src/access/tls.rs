//! TLS (and mTLS) on our own accept loop: each connection's handshake uses the server
//! configuration current when it was accepted, so a reload swaps certificates for new
//! connections without a restart. A connection that does not complete a TLS handshake
//! (plain text, a client certificate the CA did not sign) is closed.

use std::path::PathBuf;
use std::sync::{Arc, RwLock};
use std::time::Duration;

use rustls_pki_types::pem::PemObject;
use rustls_pki_types::{CertificateDer, PrivateKeyDer};
use tokio::net::{TcpListener, TcpStream};
use tokio_rustls::rustls::server::WebPkiClientVerifier;
use tokio_rustls::rustls::{RootCertStore, ServerConfig};
use tokio_rustls::server::TlsStream;
use tokio_rustls::TlsAcceptor;
use tokio_stream::wrappers::ReceiverStream;

/// How long a new connection may take to finish its handshake.
const HANDSHAKE: Duration = Duration::from_secs(10);

/// Where the PEM files are.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct TlsFiles {
    pub cert: PathBuf,
    pub key: PathBuf,
    /// Verify client certificates against this CA (mTLS); `None`: no client certificates.
    pub client_ca: Option<PathBuf>,
}

impl TlsFiles {
    /// Every file, in a fixed order (what the watcher compares).
    pub fn paths(&self) -> Vec<PathBuf> {
        let mut v = vec![self.cert.clone(), self.key.clone()];
        v.extend(self.client_ca.clone());
        v
    }
}

fn read(path: &PathBuf) -> Result<Vec<u8>, String> {
    std::fs::read(path).map_err(|e| format!("{}: {e}", path.display()))
}

/// Every PEM certificate in a file (at least one).
pub(crate) fn certs(path: &PathBuf) -> Result<Vec<CertificateDer<'static>>, String> {
    let bytes = read(path)?;
    let certs = CertificateDer::pem_slice_iter(&bytes).collect::<Result<Vec<_>, _>>().map_err(|e| format!("{}: {e}", path.display()))?;
    if certs.is_empty() {
        return Err(format!("{}: no PEM certificate in the file", path.display()));
    }
    Ok(certs)
}

/// Reads the files and builds a server configuration (HTTP/2 only).
pub fn server_config(files: &TlsFiles) -> Result<ServerConfig, String> {
    let provider = Arc::new(tokio_rustls::rustls::crypto::ring::default_provider());
    let chain = certs(&files.cert)?;
    let key = PrivateKeyDer::from_pem_slice(&read(&files.key)?).map_err(|e| format!("{}: no PEM private key ({e})", files.key.display()))?;
    let builder = ServerConfig::builder_with_provider(provider.clone()).with_safe_default_protocol_versions().map_err(|e| format!("TLS: {e}"))?;
    let builder = match &files.client_ca {
        None => builder.with_no_client_auth(),
        Some(ca) => {
            let mut roots = RootCertStore::empty();
            for c in certs(ca)? {
                roots.add(c).map_err(|e| format!("{}: {e}", ca.display()))?;
            }
            let verifier = WebPkiClientVerifier::builder_with_provider(Arc::new(roots), provider).build().map_err(|e| format!("{}: {e}", ca.display()))?;
            builder.with_client_cert_verifier(verifier)
        }
    };
    let mut config = builder.with_single_cert(chain, key).map_err(|e| format!("{} and {}: {e}", files.cert.display(), files.key.display()))?;
    config.alpn_protocols = vec![b"h2".to_vec()];
    Ok(config)
}

/// The configuration new connections get; swapped whole on reload.
pub struct TlsState {
    pub files: TlsFiles,
    current: RwLock<Arc<ServerConfig>>,
}

impl TlsState {
    pub fn load(files: TlsFiles) -> Result<TlsState, String> {
        let config = server_config(&files)?;
        Ok(TlsState { files, current: RwLock::new(Arc::new(config)) })
    }

    /// Rebuilds from the files; on an error the old configuration stays.
    pub fn reload(&self) -> Result<(), String> {
        let config = server_config(&self.files)?;
        *self.current.write().unwrap_or_else(|e| e.into_inner()) = Arc::new(config);
        Ok(())
    }

    fn acceptor(&self) -> TlsAcceptor {
        TlsAcceptor::from(self.current.read().unwrap_or_else(|e| e.into_inner()).clone())
    }
}

/// Accepts TCP connections and hands on those that complete a TLS handshake. Ends (and
/// closes the listener) when the receiving side is dropped.
pub fn incoming(listener: TcpListener, tls: Arc<TlsState>) -> ReceiverStream<Result<TlsStream<TcpStream>, std::io::Error>> {
    let (tx, rx) = tokio::sync::mpsc::channel(64);
    tokio::spawn(async move {
        loop {
            let accepted = tokio::select! {
                a = listener.accept() => a,
                _ = tx.closed() => return,
            };
            let (tcp, peer) = match accepted {
                Ok(a) => a,
                Err(e) => {
                    // Out of file descriptors and the like: wait a moment rather than spin.
                    tracing::warn!("accepting a connection: {e}");
                    tokio::time::sleep(Duration::from_millis(50)).await;
                    continue;
                }
            };
            let _ = tcp.set_nodelay(true);
            let acceptor = tls.acceptor();
            let tx = tx.clone();
            tokio::spawn(async move {
                match tokio::time::timeout(HANDSHAKE, acceptor.accept(tcp)).await {
                    Ok(Ok(stream)) => {
                        let _ = tx.send(Ok(stream)).await;
                    }
                    Ok(Err(e)) => tracing::debug!(%peer, "TLS handshake failed: {e}"),
                    Err(_) => tracing::debug!(%peer, "TLS handshake timed out"),
                }
            });
        }
    });
    ReceiverStream::new(rx)
}
