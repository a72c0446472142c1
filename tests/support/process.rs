//! The `pollard` binary as a separate process (`CARGO_BIN_EXE_pollard`): client commands run
//! to their end, and `pollard serve` on a free loopback port with its own store directory,
//! killed on drop (or with SIGKILL on purpose) and restarted on the same store. Shared by the
//! test targets that need the real binary through `#[path]`.
//!
//! No fixed sleeps: every wait is on a condition (a port accepting, a log line, a process
//! ending) polled with a deadline.
#![allow(dead_code)]

use std::io::Read;
use std::net::{SocketAddr, TcpListener, TcpStream};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::{Duration, Instant};

use serde_json::Value;

pub const BIN: &str = env!("CARGO_BIN_EXE_pollard");
/// Interval between polls of a condition (never a wait for its own sake).
pub const POLL: Duration = Duration::from_millis(25);
/// How long any one command or condition may take before the test fails.
pub const PATIENCE: Duration = Duration::from_secs(45);

/// Asserts a gRPC call failed with `code` and a message holding every needle; returns the
/// status.
pub fn expect_status<T: std::fmt::Debug>(what: &str, r: Result<T, tonic::Status>, code: tonic::Code, needles: &[&str]) -> tonic::Status {
    let s = match r {
        Ok(v) => panic!("{what}: expected {code:?}, got Ok({v:?})"),
        Err(s) => s,
    };
    assert_eq!(s.code(), code, "{what}: {s:?}");
    for n in needles {
        assert!(s.message().contains(n), "{what}: the message {:?} does not name {n:?}", s.message());
    }
    s
}

/// A file of tests/data (open datasets; sources and licences in tests/data/SOURCES.md).
pub fn data(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data").join(name)
}

/// A fresh directory under the system temp dir, removed on drop.
pub struct TempDir(pub PathBuf);

impl TempDir {
    pub fn new(what: &str) -> TempDir {
        static N: AtomicUsize = AtomicUsize::new(0);
        let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).unwrap().as_nanos();
        let p = std::env::temp_dir().join(format!("pollard-test-{what}-{}-{nanos}-{}", std::process::id(), N.fetch_add(1, Ordering::Relaxed)));
        std::fs::create_dir_all(&p).unwrap();
        TempDir(p)
    }
    pub fn join(&self, name: &str) -> PathBuf {
        self.0.join(name)
    }
    pub fn path(&self) -> &Path {
        &self.0
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

/// A `pollard` command line with no `POLLARD_*` variables from the test's environment.
pub fn command(args: &[&str]) -> Command {
    let mut c = Command::new(BIN);
    c.args(args);
    for (k, _) in std::env::vars() {
        if k.starts_with("POLLARD_") {
            c.env_remove(k);
        }
    }
    c.env("NO_COLOR", "1");
    // The web view on a free port, so servers of tests running at once never contend for
    // its fixed default; a test that wants another sets POLLARD_WEB_LISTEN itself.
    c.env("POLLARD_WEB_LISTEN", "127.0.0.1:0");
    c
}

/// A child process killed (and reaped) on drop, so a failing test leaves nothing running.
pub struct KillOnDrop(pub Child);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// What a finished command printed, and how it exited.
pub struct Out {
    pub args: String,
    pub code: Option<i32>,
    pub stdout: String,
    pub stderr: String,
}

impl Out {
    pub fn describe(&self) -> String {
        format!("`pollard {}` exited {:?}\n--- stdout\n{}\n--- stderr\n{}", self.args, self.code, self.stdout, self.stderr)
    }

    /// Asserts success with nothing on stderr; returns stdout.
    pub fn ok(self) -> String {
        assert_eq!(self.code, Some(0), "{}", self.describe());
        assert!(self.stderr.is_empty(), "a successful command wrote to stderr: {}", self.describe());
        self.stdout
    }

    pub fn json(self) -> Value {
        let what = self.describe();
        let text = self.ok();
        assert_eq!(text.trim_end().lines().count(), 1, "--json output is one line: {what}");
        serde_json::from_str(&text).unwrap_or_else(|e| panic!("not JSON ({e}): {what}"))
    }

    /// One JSON object per line.
    pub fn json_lines(self) -> Vec<Value> {
        let what = self.describe();
        self.ok().lines().map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("line {l:?} is not JSON ({e}): {what}"))).collect()
    }

    /// Asserts failure with exactly one line on stderr, `pollard: …`, and nothing on stdout;
    /// returns that line.
    pub fn fails(self) -> String {
        assert!(matches!(self.code, Some(c) if c != 0), "expected a non-zero exit: {}", self.describe());
        let lines: Vec<&str> = self.stderr.lines().collect();
        assert_eq!(lines.len(), 1, "an error is one line on stderr: {}", self.describe());
        assert!(lines[0].starts_with("pollard: ") && lines[0].len() > "pollard: ".len() + 10, "{}", self.describe());
        assert!(self.stdout.is_empty(), "a failed command printed to stdout: {}", self.describe());
        lines[0].to_string()
    }
}

/// Runs a prepared command to its end (killed after PATIENCE).
pub fn finish(mut cmd: Command, what: &str) -> Out {
    let mut child = cmd.stdin(Stdio::null()).stdout(Stdio::piped()).stderr(Stdio::piped()).spawn().expect("start pollard");
    let mut so = child.stdout.take().unwrap();
    let mut se = child.stderr.take().unwrap();
    let t_out = std::thread::spawn(move || {
        let mut s = String::new();
        so.read_to_string(&mut s).map(|_| s)
    });
    let t_err = std::thread::spawn(move || {
        let mut s = String::new();
        se.read_to_string(&mut s).map(|_| s)
    });
    let mut child = KillOnDrop(child);
    let deadline = Instant::now() + PATIENCE;
    let status = loop {
        if let Some(s) = child.0.try_wait().unwrap() {
            break s;
        }
        assert!(Instant::now() < deadline, "`pollard {what}` did not end within {PATIENCE:?}");
        std::thread::sleep(POLL);
    };
    Out { args: what.to_string(), code: status.code(), stdout: t_out.join().unwrap().unwrap(), stderr: t_err.join().unwrap().unwrap() }
}

/// Runs `pollard ARGS` to its end (killed after PATIENCE).
pub fn pollard(args: &[&str]) -> Out {
    finish(command(args), &args.join(" "))
}

/// `pollard --server URL ARGS`.
pub fn client(server: &str, args: &[&str]) -> Out {
    let mut all = vec!["--server", server];
    all.extend_from_slice(args);
    pollard(&all)
}

pub fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0").unwrap().local_addr().unwrap().port()
}

/// How to start a `pollard serve`: extra arguments, environment, a config file's text, and
/// the store directory (a fresh one inside the server's own temp dir when `None`).
#[derive(Clone, Default)]
pub struct ServeOptions {
    pub args: Vec<String>,
    pub env: Vec<(String, String)>,
    /// TOML text written to `pollard.toml` in the server's temp dir and passed as `--config`.
    pub config: Option<String>,
    pub store: Option<PathBuf>,
    /// The URL scheme clients use (`http`, or `https` once TLS is configured).
    pub scheme: Option<String>,
}

/// `pollard serve` on a free loopback port; killed on drop.
pub struct Serve {
    pub url: String,
    pub addr: SocketAddr,
    /// The store directory the server was given.
    pub store: PathBuf,
    pub options: ServeOptions,
    child: Option<KillOnDrop>,
    log: PathBuf,
    dir: TempDir,
    /// Temp dirs of earlier processes on the same store (removed with this one).
    kept: Vec<TempDir>,
}

impl Serve {
    /// A server with defaults and a fresh store.
    pub fn start() -> Serve {
        Serve::start_with(ServeOptions::default())
    }

    pub fn start_with(options: ServeOptions) -> Serve {
        // The port is free when picked; should another process take it before the server
        // binds, the server exits with "cannot listen" and we try another.
        for _ in 0..3 {
            let dir = TempDir::new("serve");
            match Serve::spawn(options.clone(), dir) {
                Some(s) => return s,
                None => continue,
            }
        }
        panic!("could not start pollard serve on a free port");
    }

    /// Starts the binary and waits until it takes calls; `None` if the port was taken.
    fn spawn(options: ServeOptions, dir: TempDir) -> Option<Serve> {
        let port = free_port();
        let log = dir.join("serve.log");
        let listen = format!("127.0.0.1:{port}");
        let store = options.store.clone().unwrap_or_else(|| dir.join("store"));
        let mut args: Vec<String> = vec!["serve".into(), "--listen".into(), listen.clone(), "--data".into(), store.to_str().unwrap().into()];
        if let Some(text) = &options.config {
            let path = dir.join("pollard.toml");
            std::fs::write(&path, text).unwrap();
            args.push("--config".into());
            args.push(path.to_str().unwrap().into());
        }
        args.extend(options.args.iter().cloned());
        let argv: Vec<&str> = args.iter().map(|s| s.as_str()).collect();
        let mut cmd = command(&argv);
        for (k, v) in &options.env {
            cmd.env(k, v);
        }
        let child = cmd
            .stdin(Stdio::null())
            .stdout(std::fs::File::create(dir.join("serve.out")).unwrap())
            .stderr(std::fs::File::create(&log).unwrap())
            .spawn()
            .expect("start pollard serve");
        let mut child = KillOnDrop(child);
        let addr: SocketAddr = listen.parse().unwrap();
        let deadline = Instant::now() + PATIENCE;
        loop {
            if let Some(status) = child.0.try_wait().unwrap() {
                let text = std::fs::read_to_string(&log).unwrap_or_default();
                assert!(text.contains("cannot listen"), "pollard serve exited {status} before taking calls:\n{text}");
                return None;
            }
            // Ready once this child says it serves on this port (so a connect that reaches
            // some other process that took the port cannot pass for it) and takes a connection.
            let said = std::fs::read_to_string(&log).unwrap_or_default();
            if said.contains(&format!("pollard serving addr={listen} ")) && TcpStream::connect_timeout(&addr, Duration::from_millis(200)).is_ok() {
                let scheme = options.scheme.clone().unwrap_or_else(|| "http".into());
                return Some(Serve { url: format!("{scheme}://{listen}"), addr, store, options, child: Some(child), log, dir, kept: Vec::new() });
            }
            assert!(Instant::now() < deadline, "pollard serve did not take calls within {PATIENCE:?}:\n{said}");
            std::thread::sleep(POLL);
        }
    }

    /// `pollard --server URL ARGS` against this server.
    pub fn run(&self, args: &[&str]) -> Out {
        client(&self.url, args)
    }

    pub fn pid(&self) -> u32 {
        self.child.as_ref().expect("server is running").0.id()
    }

    /// Whether the process is still running.
    pub fn alive(&mut self) -> bool {
        match self.child.as_mut() {
            None => false,
            Some(c) => c.0.try_wait().unwrap().is_none(),
        }
    }

    /// The web view's base URL (`http://127.0.0.1:PORT`), from the address the server
    /// logged; `None` when it serves none.
    pub fn web_url(&self) -> Option<String> {
        let log = self.log();
        let at = log.lines().rev().find_map(|l| l.split("web view serving addr=").nth(1))?;
        Some(format!("http://{}", at.split_whitespace().next()?))
    }

    /// What the server logged so far.
    pub fn log(&self) -> String {
        std::fs::read_to_string(&self.log).unwrap_or_default()
    }

    /// The server's own temp directory (holds its log and config file).
    pub fn dir(&self) -> &Path {
        self.dir.path()
    }

    /// Kills the process with SIGKILL and reaps it; the store stays.
    pub fn kill9(&mut self) {
        if let Some(mut c) = self.child.take() {
            let _ = c.0.kill();
            let _ = c.0.wait();
        }
    }

    /// Sends a signal (e.g. `libc::SIGTERM`) to the process.
    pub fn signal(&self, sig: i32) {
        let rc = unsafe { libc::kill(self.pid() as i32, sig) };
        assert_eq!(rc, 0, "kill({}, {sig})", self.pid());
    }

    /// Waits until the process ends by itself, up to `patience`; its exit code, or `None`
    /// if it was still running then.
    pub fn wait_exit(&mut self, patience: Duration) -> Option<Option<i32>> {
        let deadline = Instant::now() + patience;
        loop {
            let c = self.child.as_mut()?;
            if let Some(status) = c.0.try_wait().unwrap() {
                self.child = None;
                return Some(status.code());
            }
            if Instant::now() >= deadline {
                return None;
            }
            std::thread::sleep(POLL);
        }
    }

    /// Starts a new server process on the same store with the same options (a new port):
    /// the old process is killed with SIGKILL first if it is still running.
    pub fn restart(mut self) -> Serve {
        self.kill9();
        let mut options = self.options.clone();
        options.store = Some(self.store.clone());
        for _ in 0..3 {
            if let Some(mut s) = Serve::spawn(options.clone(), TempDir::new("serve")) {
                // The old temp dir may hold the store: it lives as long as the new server.
                s.kept.append(&mut self.kept);
                s.kept.push(std::mem::replace(&mut self.dir, TempDir(PathBuf::new())));
                s.options.store = self.options.store.clone();
                return s;
            }
        }
        panic!("could not restart pollard serve on a free port");
    }
}

impl Drop for Serve {
    fn drop(&mut self) {
        drop(self.child.take());
        if std::thread::panicking() {
            eprintln!("--- server log\n{}", self.log());
        }
    }
}
