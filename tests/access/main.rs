//! Who may call what, against real `pollard serve` processes (the spawned binary):
//! - [`roles`]: every RPC × caller (no token, a wrong token, reader, writer, admin), run
//!   owners and cancelling across tokens, token-scoped idempotency keys, the per-token cap
//! - [`tls`]: TLS and mTLS with throwaway certificates (rcgen), plain text refused,
//!   certificates reloaded without a restart
//! - [`files`]: the tokens file reloaded without a restart, the startup guard, owner-only
//!   file modes of the store
//!
//! Data: the open datasets in tests/data (sources and licences in tests/data/SOURCES.md).

#[path = "../support/process.rs"]
mod process;

mod files;
mod roles;
mod tls;

use std::path::Path;
use std::time::Instant;

use pollard::access::tokens::{file_line, new_token};
use pollard::access::Role;
use pollard::pb;
use process::{ServeOptions, TempDir, PATIENCE, POLL};
use tonic::service::interceptor::InterceptedService;
use tonic::transport::Channel;
use tonic::{Code, Status};

/// Sends `authorization: Bearer <token>` (or the raw header value given) with every call.
#[derive(Clone)]
pub struct Tok(pub Option<String>);

impl tonic::service::Interceptor for Tok {
    fn call(&mut self, mut r: tonic::Request<()>) -> Result<tonic::Request<()>, Status> {
        if let Some(t) = &self.0 {
            r.metadata_mut().insert("authorization", format!("Bearer {t}").parse().unwrap());
        }
        Ok(r)
    }
}

pub type Authed = InterceptedService<Channel, Tok>;

/// Tokens of every role (and a second writer), and the tokens file that names them.
pub struct Tokens {
    pub reader: String,
    pub writer: String,
    pub writer2: String,
    pub admin: String,
}

impl Tokens {
    pub fn new() -> Tokens {
        Tokens { reader: new_token().unwrap(), writer: new_token().unwrap(), writer2: new_token().unwrap(), admin: new_token().unwrap() }
    }

    pub fn file_text(&self) -> String {
        format!(
            "# test tokens\n{}\n{}\n{}\n{}\n",
            file_line("ro", Role::Reader, &self.reader),
            file_line("writer-a", Role::Writer, &self.writer),
            file_line("writer-b", Role::Writer, &self.writer2),
            file_line("ops", Role::Admin, &self.admin)
        )
    }
}

/// Server options with a tokens file (written into `dir`) and any further config lines.
pub fn with_tokens(dir: &TempDir, tokens: &str, more: &str) -> ServeOptions {
    let path = dir.join("tokens");
    std::fs::write(&path, tokens).unwrap();
    ServeOptions { config: Some(format!("tokens_file = {:?}\ncpu_threads = 2\n{more}", path.to_str().unwrap())), ..ServeOptions::default() }
}

/// A plain-text channel to a server, connected once it answers.
pub async fn channel(url: &str) -> Channel {
    let deadline = Instant::now() + PATIENCE;
    loop {
        if let Ok(c) = Channel::from_shared(url.to_string()).unwrap().connect().await {
            return c;
        }
        assert!(Instant::now() < deadline, "no connection to {url}");
        tokio::time::sleep(POLL).await;
    }
}

pub fn authed(ch: &Channel, token: Option<&str>) -> Authed {
    InterceptedService::new(ch.clone(), Tok(token.map(String::from)))
}

pub fn data(name: &str) -> Vec<u8> {
    std::fs::read(process::data(name)).unwrap()
}

pub async fn upload(ch: Authed, name: &str, bytes: Vec<u8>) -> Result<pb::DatasetInfo, Status> {
    let header = pb::UploadChunk { part: Some(pb::upload_chunk::Part::Header(pb::UploadHeader { name: name.into(), format: pb::DataFormat::Csv as i32, target: "target".into(), categorical: vec![] })) };
    let data = pb::UploadChunk { part: Some(pb::upload_chunk::Part::Data(bytes)) };
    pb::datasets_client::DatasetsClient::new(ch).upload(tokio_stream::iter(vec![header, data])).await.map(|r| r.into_inner())
}

/// A small sweep on iris's target.
pub fn small_spec(depths: &[f64]) -> pb::SweepSpec {
    let values = depths.iter().map(|d| pb::LimitValue { value: Some(pb::limit_value::Value::Number(*d)) }).collect();
    pb::SweepSpec { max_depth: Some(pb::LimitRange { kind: Some(pb::limit_range::Kind::Values(pb::ValueList { values })) }), seed: 1, ..Default::default() }
}

/// Asserts an error status with its code and words of its message.
pub fn expect<T: std::fmt::Debug>(what: &str, r: Result<T, Status>, code: Code, needles: &[&str]) -> Status {
    process::expect_status(what, r, code, needles)
}

/// Polls `ready` until it holds (fails the test after PATIENCE).
pub fn eventually(what: &str, mut ready: impl FnMut() -> bool) {
    let deadline = Instant::now() + PATIENCE;
    while !ready() {
        assert!(Instant::now() < deadline, "{what}: not within {PATIENCE:?}");
        std::thread::sleep(POLL);
    }
}

/// Writes a file whole (a rename), so a reload never reads half of it.
pub fn put(path: &Path, text: &str) {
    let tmp = path.with_extension("tmp");
    std::fs::write(&tmp, text).unwrap();
    std::fs::rename(&tmp, path).unwrap();
}

/// File mode bits (the permission part).
pub fn mode(p: &Path) -> u32 {
    use std::os::unix::fs::PermissionsExt;
    std::fs::metadata(p).unwrap().permissions().mode() & 0o777
}
