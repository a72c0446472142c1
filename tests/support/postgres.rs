//! A throwaway PostgreSQL cluster for tests: `initdb` into a fresh temporary folder, the
//! server on a free loopback port, a fresh database per test. Shared by the library's store
//! tests and the integration targets through `#[path]`; it uses only std and libc.
//!
//! - The server programs are found through `POLLARD_PG_BINDIR`, then `pg_config --bindir`,
//!   then the newest `/usr/lib/postgresql/<version>/bin` (Debian's `postgresql` package), then
//!   `PATH`.
//! - When the tests run as root, the cluster belongs to an unprivileged user (`postgres` when
//!   that user exists, else `nobody`): the server refuses to run as root.
//! - The server runs in the foreground as a child of a keeper thread (not daemonised through
//!   `pg_ctl`), with the parent-death signal set: when the test process ends, however it
//!   ends, the kernel stops the server. Folders left by such ends are removed by the next
//!   start (their owner process is gone).
//! - No PostgreSQL programs: [`available`] says why and the caller skips, unless
//!   `POLLARD_REQUIRE_POSTGRES=1` (CI), which turns the skip into a failure.
//!
//! Durability settings are relaxed (`fsync=off`): the tests kill pollard processes, never the
//! database server, and the relaxed settings keep a shared 2-core machine responsive.
#![allow(dead_code)]

use std::ffi::CString;
use std::net::TcpListener;
use std::os::unix::process::CommandExt;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{mpsc, OnceLock};
use std::time::{Duration, Instant};

/// Set to `1` to make a missing PostgreSQL a test failure instead of a skip.
pub const REQUIRE: &str = "POLLARD_REQUIRE_POSTGRES";
/// The database role of the throwaway clusters (trust authentication on loopback).
pub const ROLE: &str = "pollard";
const PATIENCE: Duration = Duration::from_secs(90);
const POLL: Duration = Duration::from_millis(25);

/// A running throwaway cluster; stopped (and its folder removed) on drop.
pub struct Cluster {
    pub port: u16,
    bindir: PathBuf,
    base: PathBuf,
    /// The postmaster's process id.
    pub pid: u32,
    keeper: Option<std::thread::JoinHandle<()>>,
}

/// The cluster this test process shares (started on first use), or why there is none. With
/// `POLLARD_REQUIRE_POSTGRES=1`, no cluster is a panic.
pub fn available() -> Result<&'static Cluster, String> {
    static SHARED: OnceLock<Result<Cluster, String>> = OnceLock::new();
    let got = SHARED.get_or_init(Cluster::start).as_ref().map_err(Clone::clone);
    if let Err(why) = &got {
        assert!(std::env::var(REQUIRE).as_deref() != Ok("1"), "{REQUIRE}=1 and PostgreSQL is not usable: {why}");
    }
    got
}

/// A fresh database on the shared cluster, as a URL; `None` (after printing why, once per
/// caller tag) when PostgreSQL is not installed and not required.
pub fn fresh_database(tag: &str) -> Option<String> {
    match available() {
        Ok(c) => Some(c.fresh_database(tag)),
        Err(why) => {
            eprintln!("skipped the PostgreSQL part of {tag}: {why}");
            None
        }
    }
}

/// A cluster of the caller's own (for a test that changes its settings or wants it alone),
/// or `None` after printing why, when PostgreSQL is not installed and not required.
pub fn own_cluster() -> Option<Cluster> {
    match Cluster::start() {
        Ok(c) => Some(c),
        Err(why) => {
            assert!(std::env::var(REQUIRE).as_deref() != Ok("1"), "{REQUIRE}=1 and PostgreSQL is not usable: {why}");
            eprintln!("skipped: {why}");
            None
        }
    }
}

impl Cluster {
    /// `initdb` into a new temporary folder and the server on a free loopback port.
    pub fn start() -> Result<Cluster, String> {
        let bindir = bindir()?;
        remove_abandoned();
        let owner = unprivileged_owner()?;
        let base = std::env::temp_dir().join(format!("pollard-pg-{}-{}", std::process::id(), unique()));
        std::fs::create_dir_all(&base).map_err(|e| format!("cannot create {}: {e}", base.display()))?;
        std::fs::write(base.join("owner.pid"), std::process::id().to_string()).map_err(|e| e.to_string())?;
        if let Some((uid, gid)) = owner {
            chown(&base, uid, gid)?;
        }
        let data = base.join("data");
        let mut initdb = Command::new(bindir.join("initdb"));
        initdb.args(["--no-sync", "--auth=trust", "--encoding=UTF8", "--locale=C", "-U", ROLE, "-D"]).arg(&data);
        let out = as_owner(&mut initdb, owner, &base).output().map_err(|e| format!("cannot run initdb: {e}"))?;
        if !out.status.success() {
            let _ = std::fs::remove_dir_all(&base);
            return Err(format!("initdb failed: {}", String::from_utf8_lossy(&out.stderr)));
        }
        let mut last = String::new();
        for _ in 0..3 {
            let port = free_port();
            match Cluster::serve(&bindir, &base, owner, port) {
                Ok(c) => return Ok(c),
                // Another process may have taken the port between our probe and the bind.
                Err(e) => last = e,
            }
        }
        let _ = std::fs::remove_dir_all(&base);
        Err(last)
    }

    fn serve(bindir: &Path, base: &Path, owner: Option<(u32, u32)>, port: u16) -> Result<Cluster, String> {
        let log = std::fs::File::create(base.join("server.log")).map_err(|e| e.to_string())?;
        if let Some((uid, gid)) = owner {
            chown(&base.join("server.log"), uid, gid)?;
        }
        let mut cmd = Command::new(bindir.join("postgres"));
        cmd.arg("-D").arg(base.join("data")).args(["-p", &port.to_string(), "-h", "127.0.0.1", "-k", ""]);
        for setting in ["fsync=off", "synchronous_commit=off", "full_page_writes=off", "max_connections=300", "shared_buffers=32MB"] {
            cmd.args(["-c", setting]);
        }
        cmd.stdin(Stdio::null()).stdout(log.try_clone().map_err(|e| e.to_string())?).stderr(log);
        as_owner(&mut cmd, owner, base);
        // SAFETY: prctl is async-signal-safe; nothing else runs between fork and exec.
        unsafe {
            cmd.pre_exec(|| {
                if libc::prctl(libc::PR_SET_PDEATHSIG, libc::SIGQUIT) != 0 {
                    return Err(std::io::Error::last_os_error());
                }
                Ok(())
            });
        }
        // The keeper thread owns the child for its whole life: the parent-death signal
        // follows the thread that forked, so it must live as long as the server.
        let (tx, rx) = mpsc::channel();
        let keeper = std::thread::Builder::new()
            .name(format!("postgres-{port}"))
            .spawn(move || match cmd.spawn() {
                Ok(mut child) => {
                    let _ = tx.send(Ok(child.id()));
                    let _ = child.wait();
                }
                Err(e) => {
                    let _ = tx.send(Err(format!("cannot start postgres: {e}")));
                }
            })
            .map_err(|e| e.to_string())?;
        let pid = rx.recv().map_err(|e| e.to_string())??;
        let deadline = Instant::now() + PATIENCE;
        loop {
            if keeper.is_finished() {
                let log = std::fs::read_to_string(base.join("server.log")).unwrap_or_default();
                return Err(format!("postgres on port {port} stopped at start: {log}"));
            }
            let ready = Command::new(bindir.join("pg_isready")).args(["-q", "-h", "127.0.0.1", "-p", &port.to_string(), "-U", ROLE]).status();
            if ready.is_ok_and(|s| s.success()) {
                return Ok(Cluster { port, bindir: bindir.to_path_buf(), base: base.to_path_buf(), pid, keeper: Some(keeper) });
            }
            if Instant::now() > deadline {
                // SAFETY: a plain signal to our own child.
                unsafe { libc::kill(pid as libc::pid_t, libc::SIGQUIT) };
                let _ = keeper.join();
                return Err(format!("postgres on port {port} did not accept connections within {PATIENCE:?}"));
            }
            std::thread::sleep(POLL);
        }
    }

    /// The URL of the cluster's `postgres` database (for administration).
    pub fn url(&self, database: &str) -> String {
        format!("postgres://{ROLE}@127.0.0.1:{}/{database}", self.port)
    }

    /// Creates a new, empty database and returns its URL.
    pub fn fresh_database(&self, tag: &str) -> String {
        let clean: String = tag.chars().map(|c| if c.is_ascii_alphanumeric() { c.to_ascii_lowercase() } else { '_' }).take(30).collect();
        let name = format!("t_{clean}_{}_{}", std::process::id(), unique());
        self.sql("postgres", &format!("CREATE DATABASE {name}"));
        self.url(&name)
    }

    /// Runs SQL with `psql` against a database of the cluster; panics with psql's message
    /// when it fails. Returns what psql printed (unaligned, tuples only).
    pub fn sql(&self, database: &str, sql: &str) -> String {
        let out = Command::new(self.bindir.join("psql"))
            .args(["-X", "-q", "-A", "-t", "-v", "ON_ERROR_STOP=1", "-h", "127.0.0.1", "-p", &self.port.to_string(), "-U", ROLE, "-d", database, "-c", sql])
            .output()
            .expect("psql runs");
        assert!(out.status.success(), "psql {sql:?}: {}", String::from_utf8_lossy(&out.stderr));
        String::from_utf8_lossy(&out.stdout).into_owned()
    }

    /// Serves TLS from now on (plain connections stay allowed) with this certificate and
    /// key (PEM); returns once a new connection sees `ssl = on`.
    pub fn serve_tls(&self, cert_pem: &str, key_pem: &str) {
        use std::os::unix::fs::PermissionsExt;
        let owner = unprivileged_owner().expect("the owner found at start");
        for (name, text) in [("server.crt", cert_pem), ("server.key", key_pem)] {
            let path = self.base.join("data").join(name);
            std::fs::write(&path, text).unwrap();
            std::fs::set_permissions(&path, std::fs::Permissions::from_mode(0o600)).unwrap();
            if let Some((uid, gid)) = owner {
                chown(&path, uid, gid).unwrap();
            }
        }
        self.sql("postgres", "ALTER SYSTEM SET ssl = on");
        self.sql("postgres", "SELECT pg_reload_conf()");
        let deadline = Instant::now() + PATIENCE;
        while self.sql("postgres", "SHOW ssl").trim() != "on" {
            assert!(Instant::now() < deadline, "the server did not turn TLS on: {}", std::fs::read_to_string(self.base.join("server.log")).unwrap_or_default());
            std::thread::sleep(POLL);
        }
    }

    /// Starts the stopped server again, on the same port and data.
    pub fn restart(&mut self) {
        assert!(self.keeper.is_none(), "the server is running");
        let owner = unprivileged_owner().expect("the owner found at start");
        let again = Cluster::serve(&self.bindir, &self.base, owner, self.port).unwrap_or_else(|e| panic!("restarting postgres: {e}"));
        self.pid = again.pid;
        // The new handle's keeper now belongs to this one; its folder is this one's.
        let mut again = again;
        self.keeper = again.keeper.take();
        again.base = PathBuf::new();
    }

    /// Stops the server (fast shutdown) and waits for it to end.
    pub fn stop(&mut self) {
        if let Some(keeper) = self.keeper.take() {
            // SAFETY: a plain signal to our own child.
            unsafe { libc::kill(self.pid as libc::pid_t, libc::SIGINT) };
            let _ = keeper.join();
        }
    }
}

impl Drop for Cluster {
    fn drop(&mut self) {
        self.stop();
        if !self.base.as_os_str().is_empty() {
            let _ = std::fs::remove_dir_all(&self.base);
        }
    }
}

fn unique() -> usize {
    static N: AtomicUsize = AtomicUsize::new(0);
    let nanos = std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map(|d| d.subsec_nanos()).unwrap_or(0) as usize;
    nanos.wrapping_mul(31).wrapping_add(N.fetch_add(1, Ordering::Relaxed)) % 1_000_000_000
}

fn free_port() -> u16 {
    TcpListener::bind("127.0.0.1:0").and_then(|l| l.local_addr()).map(|a| a.port()).expect("a free loopback port")
}

/// The folder of the server programs (see the module notes).
pub fn bindir() -> Result<PathBuf, String> {
    let has_server = |d: &Path| d.join("initdb").is_file() && d.join("postgres").is_file();
    if let Some(d) = std::env::var_os("POLLARD_PG_BINDIR") {
        let d = PathBuf::from(d);
        return if has_server(&d) { Ok(d) } else { Err(format!("POLLARD_PG_BINDIR={} holds no initdb and postgres", d.display())) };
    }
    if let Ok(out) = Command::new("pg_config").arg("--bindir").output() {
        let d = PathBuf::from(String::from_utf8_lossy(&out.stdout).trim());
        if out.status.success() && has_server(&d) {
            return Ok(d);
        }
    }
    let mut versions: Vec<(u32, PathBuf)> = std::fs::read_dir("/usr/lib/postgresql")
        .into_iter()
        .flatten()
        .flatten()
        .filter_map(|e| Some((e.file_name().to_str()?.parse().ok()?, e.path().join("bin"))))
        .filter(|(_, d)| has_server(d))
        .collect();
    versions.sort();
    if let Some((_, d)) = versions.pop() {
        return Ok(d);
    }
    for d in std::env::split_paths(&std::env::var_os("PATH").unwrap_or_default()) {
        if has_server(&d) {
            return Ok(d);
        }
    }
    Err("no PostgreSQL server programs (initdb, postgres) found: not in POLLARD_PG_BINDIR, `pg_config --bindir`, /usr/lib/postgresql/*/bin or PATH (Debian: apt-get install postgresql)".into())
}

/// The user the cluster runs as when the tests run as root: `postgres`, else `nobody`.
fn unprivileged_owner() -> Result<Option<(u32, u32)>, String> {
    // SAFETY: geteuid has no preconditions.
    if unsafe { libc::geteuid() } != 0 {
        return Ok(None);
    }
    for name in ["postgres", "nobody"] {
        let c = CString::new(name).expect("no NUL");
        // SAFETY: getpwnam returns a pointer into static storage or null; read at once.
        let pw = unsafe { libc::getpwnam(c.as_ptr()) };
        if !pw.is_null() {
            // SAFETY: non-null, as checked.
            let (uid, gid) = unsafe { ((*pw).pw_uid, (*pw).pw_gid) };
            if uid != 0 {
                return Ok(Some((uid, gid)));
            }
        }
    }
    Err("the tests run as root and there is neither a `postgres` nor a `nobody` user to run the server as".into())
}

fn chown(path: &Path, uid: u32, gid: u32) -> Result<(), String> {
    std::os::unix::fs::chown(path, Some(uid), Some(gid)).map_err(|e| format!("cannot hand {} to uid {uid}: {e}", path.display()))
}

/// Runs `cmd` as the unprivileged owner, if any, from a folder it may enter.
fn as_owner<'a>(cmd: &'a mut Command, owner: Option<(u32, u32)>, base: &Path) -> &'a mut Command {
    cmd.current_dir(base).env("LC_ALL", "C");
    if let Some((uid, gid)) = owner {
        // (std drops root's supplementary groups when it sets the uid.)
        cmd.uid(uid).gid(gid).env("HOME", base);
    }
    cmd
}

/// Removes the folders of clusters whose test process is gone (their server went with it).
fn remove_abandoned() {
    let Ok(entries) = std::fs::read_dir(std::env::temp_dir()) else { return };
    for e in entries.flatten() {
        let path = e.path();
        if !e.file_name().to_string_lossy().starts_with("pollard-pg-") {
            continue;
        }
        let owner = std::fs::read_to_string(path.join("owner.pid")).ok().and_then(|s| s.trim().parse::<i32>().ok());
        // SAFETY: signal 0 only checks that the process exists.
        let alive = owner.is_some_and(|pid| unsafe { libc::kill(pid, 0) } == 0 || std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM));
        if owner.is_some() && !alive {
            let _ = std::fs::remove_dir_all(&path);
        }
    }
}
