#!/usr/bin/env bash
# Latency benchmark: a real `pollard serve` on loopback (a fresh store in a temporary folder,
# default config), one client at a time, calls one after another. For a Rust client
# (examples/latency.rs, tonic) and a Python client (benches/latency_client.py, grpcio) it
# prints each call's median and p99:
#   sweep100     StartRun of a 100-setting iris sweep until its `finished` event (the Rust
#                client on FollowRun; the Python client on FollowRunBatches, as the client
#                package follows, and as `sweep100_each` on FollowRun, one message per event)
#   get_run900   GetRun of a finished 900-setting run
#   list_runs50  ListRuns of a 50-run page
# and the compute: the same 100-setting sweep run by the core in the client's process (no
# store, transport or parse), with its share of sweep100's median.
#
#   bash benches/latency.sh                # 100 timed calls of each
#   bash benches/latency.sh --repeats 300
#
# Environment:
#   POLLARD_LATENCY_VENV  a virtualenv to use (its bin/python) instead of a fresh one; the pins
#                         of benches/latency-requirements.txt are installed into it.
#   PYTHON                interpreter for a fresh venv (default python3).
# Goals (issue 13): sweep100 median under 10 ms from both clients; unary calls under 2 ms.
# Nothing else should be running: the machine's cores are shared by server and client.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/.." && pwd)"
repeats=100
while [ $# -gt 0 ]; do
    case "$1" in
        --repeats) repeats="$2"; shift 2 ;;
        *) echo "latency: unknown option $1 (use --repeats N)" >&2; exit 2 ;;
    esac
done
fail() { echo "latency: FAIL: $*" >&2; exit 1; }
say() { echo "latency: $*"; }

work="$(mktemp -d "${TMPDIR:-/tmp}/pollard-latency.XXXXXX")"
export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1

# --- the Python client's packages and stubs --------------------------------------------
req="$here/latency-requirements.txt"
if [ -n "${POLLARD_LATENCY_VENV:-}" ]; then
    venv="$POLLARD_LATENCY_VENV"
else
    venv="$work/venv"
    "${PYTHON:-python3}" -m venv "$venv" || fail "could not create a venv"
fi
py="$venv/bin/python"
"$py" -m pip install --quiet -r "$req" </dev/null || fail "pip install -r $req failed"
mkdir -p "$work/stubs"
"$py" -m grpc_tools.protoc -I "$root/proto" --python_out="$work/stubs" --grpc_python_out="$work/stubs" \
    "$root"/proto/pollard/v1/*.proto || fail "generating the Python stubs failed"

# --- build first, so no compile time is measured ---------------------------------------
cd "$root"
cargo build --release --quiet --bin pollard --example latency
bin="$root/target/release/pollard"
client="$root/target/release/examples/latency"

source "$here/serve.sh"
start_server
say "pollard serve pid $server_pid on 127.0.0.1:$port; $(nproc) cores, load average $(cut -d' ' -f1-3 /proc/loadavg)"

"$client" --server "http://127.0.0.1:$port" --repeats "$repeats" --data "$root/tests/data/iris.csv" | tee "$work/rust.txt" \
    || fail "the Rust client failed"
setup="$(grep '^setup:' "$work/rust.txt")"
dataset="$(sed -n 's/.*dataset=\([^ ]*\).*/\1/p' <<<"$setup")"
run900="$(sed -n 's/.*run900=\([^ ]*\).*/\1/p' <<<"$setup")"
"$py" "$here/latency_client.py" "$work/stubs" "127.0.0.1:$port" "$dataset" "$run900" "$repeats" | tee "$work/python.txt" \
    || fail "the Python client failed"
say "load average after $(cut -d' ' -f1-3 /proc/loadavg)"

# --- the summary ---------------------------------------------------------------------------
"$py" - "$work/rust.txt" "$work/python.txt" <<'PYEOF'
import re, sys
rows = {}
for path in sys.argv[1:]:
    for line in open(path):
        m = re.match(r"result: (\S+) client=(\S+) n=(\d+) median_ms=([\d.]+) p99_ms=([\d.]+)", line)
        if m:
            rows[(m[1], m[2])] = (int(m[3]), float(m[4]), float(m[5]))
print()
print(f"{'call':<14} {'client':<7} {'n':>5} {'median ms':>10} {'p99 ms':>10}")
for (call, client), (n, med, p99) in rows.items():
    print(f"{call:<14} {client:<7} {n:>5} {med:>10.2f} {p99:>10.2f}")
compute = rows.get(("compute100", "rust"))
for client in ("rust", "python"):
    e2e = rows.get(("sweep100", client))
    if compute and e2e:
        print(f"compute share of sweep100 ({client}): {compute[1] / e2e[1] * 100:.0f} % "
              f"({compute[1]:.2f} ms of {e2e[1]:.2f} ms)")
PYEOF
stop_server || fail "the server exited with an error after SIGTERM"
