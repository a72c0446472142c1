#!/usr/bin/env bash
# What the PostgreSQL store costs against sled for a small sweep: one `pollard serve` on a
# fresh sled store and one on a fresh database of a throwaway PostgreSQL cluster (initdb in a
# temporary folder, the server on a free loopback port, as the `postgres` user when run as
# root), each given one CPU thread; the same 300-unit diabetes sweep (6 min_leaf_rows × 6
# max_depth, 5 folds × 10 repeats) from `pollard sweep --follow` to its end, $RUNS times.
# Prints the median end-to-end time and units per second of each, and the ratio.
#   bash benches/store_overhead.sh            # RUNS=5
set -euo pipefail
cd "$(dirname "$0")/.."
RUNS="${RUNS:-5}"
fail() { echo "store_overhead: $*" >&2; exit 1; }
say() { echo "store_overhead: $*"; }

cargo build --release --quiet --bin pollard
bin="$PWD/target/release/pollard"
work="$(mktemp -d)"
chmod 755 "$work"
pgbin="$(pg_config --bindir 2>/dev/null || true)"
[ -x "$pgbin/initdb" ] || pgbin="$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1)"
[ -x "$pgbin/initdb" ] || fail "no PostgreSQL server programs (Debian: apt-get install postgresql)"
as_owner=()
if [ "$(id -u)" = 0 ]; then
    as_owner=(runuser -u postgres --)
fi
free_port() { python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'; }

cleanup() {
    for p in $(cat "$work/pids" 2>/dev/null); do kill -TERM "$p" 2>/dev/null || true; done
    for p in $(cat "$work/pids" 2>/dev/null); do while kill -0 "$p" 2>/dev/null; do sleep 0.1; done; done
    [ -f "$work/pg/postmaster.pid" ] && "${as_owner[@]}" "$pgbin/pg_ctl" -D "$work/pg" -m fast -w stop >/dev/null 2>&1 || true
    rm -rf "$work"
}
trap cleanup EXIT

mkdir "$work/pg"
[ ${#as_owner[@]} -gt 0 ] && chown postgres "$work/pg"
"${as_owner[@]}" "$pgbin/initdb" --no-sync --auth=trust -U pollard -E UTF8 --locale=C -D "$work/pg" >/dev/null
pg_port="$(free_port)"
"${as_owner[@]}" "$pgbin/pg_ctl" -D "$work/pg" -l "$work/pg/server.log" -w -o "-p $pg_port -h 127.0.0.1 -k ''" start >/dev/null
"$pgbin/psql" -X -q -h 127.0.0.1 -p "$pg_port" -U pollard -d postgres -c "CREATE DATABASE bench" >/dev/null
url="postgres://pollard@127.0.0.1:$pg_port/bench"

serve() { # name, extra env...
    local name="$1"; shift
    local port; port="$(free_port)"
    # (Its output goes to files: this function runs in a command substitution.)
    env -u POLLARD_CONFIG POLLARD_CPU_THREADS=1 "$@" "$bin" serve --listen "127.0.0.1:$port" --data "$work/$name" >"$work/$name.out" 2>"$work/$name.log" &
    echo $! >>"$work/pids"
    for _ in $(seq 1 400); do grep -q "pollard serving" "$work/$name.log" 2>/dev/null && break; sleep 0.05; done
    grep -q "pollard serving" "$work/$name.log" || { cat "$work/$name.log" >&2; fail "the $name server did not start"; }
    echo "127.0.0.1:$port"
}

median_of_runs() { # server
    local server="$1" times=()
    "$bin" --server "$server" put --name diabetes --target target tests/data/diabetes.csv >/dev/null
    for _ in $(seq 1 "$RUNS"); do
        local t0 t1
        t0="$(date +%s.%N)"
        "$bin" --server "$server" sweep --dataset diabetes --min-leaf-rows 1,2,3,5,8,13 --max-depth 'lin(1,6,1)' --k 5 --repeats 10 --seed 11 --follow >/dev/null
        t1="$(date +%s.%N)"
        times+=("$(python3 -c "print($t1 - $t0)")")
    done
    printf '%s\n' "${times[@]}" | sort -g | awk '{a[NR]=$1} END {print a[int((NR+1)/2)]}'
}

say "$(nproc) cores, load average $(cut -d' ' -f1-3 /proc/loadavg), PostgreSQL $("$pgbin/postgres" --version | awk '{print $3}')"
sled_server="$(serve sled)"
pg_server="$(serve postgres POLLARD_STORE=postgres POLLARD_DATABASE_URL="$url")"
sled_s="$(median_of_runs "$sled_server")"
pg_s="$(median_of_runs "$pg_server")"
python3 - "$sled_s" "$pg_s" "$RUNS" <<'EOF'
import sys
sled, pg, runs = float(sys.argv[1]), float(sys.argv[2]), sys.argv[3]
units = 300
print(f"store_overhead: 300-unit sweep, median of {runs}: sled {sled:.3f} s ({units / sled:.0f} units/s), "
      f"postgres {pg:.3f} s ({units / pg:.0f} units/s), postgres/sled {pg / sled:.2f}x")
EOF
