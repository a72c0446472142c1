"""Fixtures: a real `pollard serve` process (the release binary of this checkout, or
POLLARD_BIN) on a free loopback port with a temporary store, and one with tokens.

No fixed sleeps: a server is ready when its log says it serves on its port and the port
takes a connection, polled with a deadline."""

from __future__ import annotations

import json
import os
import socket
import subprocess
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Dict, Iterator, List, Optional

import pytest

import pollard

REPO = Path(__file__).resolve().parents[3]
#: How long a server may take to start or stop, and any one condition to hold.
PATIENCE = 45.0
POLL = 0.025


def data(name: str) -> Path:
    """A file of tests/data (open datasets; sources and licences in tests/data/SOURCES.md)."""
    return REPO / "tests" / "data" / name


def binary() -> Path:
    path = Path(os.environ.get("POLLARD_BIN") or REPO / "target" / "release" / "pollard")
    if not path.is_file():
        pytest.fail(f"no pollard binary at {path}: run `cargo build --release` first (or set POLLARD_BIN)")
    return path


def pollard_cli(*args: str, server: Optional["Server"] = None, token: Optional[str] = None) -> subprocess.CompletedProcess:
    """Runs the `pollard` command line to its end (checked), without POLLARD_* from outside."""
    argv = [str(binary())]
    if server is not None:
        argv += ["--server", server.url]
    if token is not None:
        argv += ["--token", token]
    env = {k: v for k, v in os.environ.items() if not k.startswith("POLLARD_")}
    done = subprocess.run(argv + list(args), capture_output=True, text=True, env=env, timeout=PATIENCE)
    assert done.returncode == 0, f"pollard {' '.join(args)} exited {done.returncode}:\n{done.stdout}\n{done.stderr}"
    return done


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@dataclass
class Server:
    url: str
    address: str
    process: subprocess.Popen
    log: Path

    def log_text(self) -> str:
        return self.log.read_text(errors="replace")

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=PATIENCE)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()


def start_server(folder: Path, config: str = "") -> Server:
    """`pollard serve` on a free loopback port with its store in `folder` and `config` as
    its config file; retried on another port if the picked one was taken meanwhile."""
    for attempt in range(3):
        port = free_port()
        address = f"127.0.0.1:{port}"
        log = folder / f"serve-{attempt}.log"
        argv = [str(binary()), "serve", "--listen", address, "--data", str(folder / "store")]
        if config:
            (folder / "pollard.toml").write_text(config)
            argv += ["--config", str(folder / "pollard.toml")]
        env = {k: v for k, v in os.environ.items() if not k.startswith("POLLARD_")}
        env["POLLARD_WEB_LISTEN"] = ""  # no web view: these tests speak gRPC only
        with open(log, "wb") as err:
            process = subprocess.Popen(argv, stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=err, env=env)
        deadline = time.monotonic() + PATIENCE
        while True:
            said = log.read_text(errors="replace")
            if process.poll() is not None:
                if "cannot listen" in said:
                    break
                pytest.fail(f"pollard serve exited {process.returncode} before taking calls:\n{said}")
            if f"pollard serving addr={address} " in said:
                try:
                    socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                    return Server(f"http://{address}", address, process, log)
                except OSError:
                    pass
            if time.monotonic() > deadline:
                process.kill()
                pytest.fail(f"pollard serve did not take calls within {PATIENCE} s:\n{said}")
            time.sleep(POLL)
    pytest.fail("could not start pollard serve on a free port")


@pytest.fixture(scope="session")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    s = start_server(tmp_path_factory.mktemp("serve"))
    yield s
    s.stop()


@pytest.fixture()
def client(server: Server) -> Iterator[pollard.Client]:
    with pollard.connect(server.url) as c:
        yield c


@dataclass
class TokenServer:
    server: Server
    #: Token by name: "reader" (reader role), "writer" (writer role).
    tokens: Dict[str, str]


@pytest.fixture(scope="session")
def token_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TokenServer]:
    folder = tmp_path_factory.mktemp("serve-tokens")
    tokens: Dict[str, str] = {}
    lines: List[str] = []
    for name, role in (("reader", "reader"), ("writer", "writer")):
        made = json.loads(pollard_cli("token", "new", "--name", f"py-{name}", "--role", role, "--json").stdout)
        tokens[name] = made["token"]
        lines.append(made["line"])
    (folder / "tokens").write_text("\n".join(lines) + "\n")
    s = start_server(folder, f"tokens_file = {json.dumps(str(folder / 'tokens'))}\n")
    yield TokenServer(s, tokens)
    s.stop()


def openssl(*args: str) -> None:
    done = subprocess.run(["openssl", *args], capture_output=True, text=True, timeout=PATIENCE)
    assert done.returncode == 0, f"openssl {' '.join(args)}:\n{done.stderr}"


def sign(folder: Path, name: str, subject: str, extensions: str) -> None:
    """A P-256 key `<name>.key` and its certificate `<name>.pem`, signed by `ca`."""
    openssl("genpkey", "-algorithm", "EC", "-pkeyopt", "ec_paramgen_curve:P-256", "-out", str(folder / f"{name}.key"))
    openssl("req", "-new", "-key", str(folder / f"{name}.key"), "-subj", subject, "-out", str(folder / f"{name}.csr"))
    (folder / f"{name}.ext").write_text(extensions)
    openssl("x509", "-req", "-in", str(folder / f"{name}.csr"), "-CA", str(folder / "ca.pem"), "-CAkey", str(folder / "ca.key"), "-CAcreateserial", "-days", "2", "-extfile", str(folder / f"{name}.ext"), "-out", str(folder / f"{name}.pem"))


@dataclass
class TlsServer:
    server: Server
    #: The folder with ca.pem, client.pem and client.key.
    certs: Path


@pytest.fixture(scope="session")
def tls_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[TlsServer]:
    """A server with TLS that asks for client certificates (mTLS): throwaway certificates
    made by the openssl command line, a CA that signs the server's (for 127.0.0.1) and a
    client's."""
    folder = tmp_path_factory.mktemp("serve-tls")
    openssl("req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes", "-keyout", str(folder / "ca.key"), "-out", str(folder / "ca.pem"), "-days", "2", "-subj", "/CN=pollard test CA")
    sign(folder, "server", "/CN=127.0.0.1", "subjectAltName=IP:127.0.0.1\nbasicConstraints=CA:FALSE\nextendedKeyUsage=serverAuth\n")
    sign(folder, "client", "/CN=python client", "basicConstraints=CA:FALSE\nextendedKeyUsage=clientAuth\n")
    config = "".join(f"{key} = {json.dumps(str(folder / file))}\n" for key, file in (("tls_cert_file", "server.pem"), ("tls_key_file", "server.key"), ("tls_client_ca_file", "ca.pem")))
    s = start_server(folder, config)
    s.url = s.url.replace("http://", "https://")
    yield TlsServer(s, folder)
    s.stop()
