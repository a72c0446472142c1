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
source benches/pg_cluster.sh
url="$(fresh_database bench)"

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
