#!/usr/bin/env bash
# Load benchmark: a real `pollard serve` on loopback with the default caps (a fresh store in
# a temporary folder), many concurrent clients calling it for a bounded time through the
# generated gRPC clients (examples/load.rs), then calls per second, p50/p99 per call type,
# errors, and the server's peak RSS (VmHWM). Exits non-zero on any error.
#
#   bash benches/load.sh                  # 64 clients for 60 s
#   bash benches/load.sh --seconds 10     # a short run
#   bash benches/load.sh --clients 16 --seconds 10
#
# Goal (issue 10): zero errors and a peak RSS under 400 MB with the default caps.
# The machine's cores are shared by the server and the clients; quote figures from a quiet
# machine and say how quiet it was.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/.." && pwd)"
seconds=60
clients=64
while [ $# -gt 0 ]; do
    case "$1" in
        --seconds) seconds="$2"; shift 2 ;;
        --clients) clients="$2"; shift 2 ;;
        *) echo "load: unknown option $1 (use --seconds N, --clients N)" >&2; exit 2 ;;
    esac
done
if [ "$seconds" -gt 600 ]; then
    echo "load: --seconds is at most 600" >&2; exit 2
fi

cd "$root"
# Build first, so no compile time is measured and the server starts at once.
cargo build --release --quiet --bin pollard --example load
bin="$root/target/release/pollard"
load="$root/target/release/examples/load"

work="$(mktemp -d)"
fail() { echo "load: $*" >&2; exit 1; }
source "$here/serve.sh"
start_server

echo "load: pollard serve pid $server_pid on 127.0.0.1:$port, default caps; $(nproc) cores, load average $(cut -d' ' -f1-3 /proc/loadavg)"
status=0
"$load" --server "http://127.0.0.1:$port" --pid "$server_pid" --clients "$clients" --seconds "$seconds" --data "$root/tests/data/iris.csv" || status=$?
echo "load: load average after $(cut -d' ' -f1-3 /proc/loadavg)"
stop_server || { echo "load: the server exited with an error after SIGTERM" >&2; status=1; }
exit "$status"
