#!/usr/bin/env bash
# One sweep spread over 1, 2 and 3 replicas sharing one PostgreSQL database: the
# 100,000 × 20, 900-setting sweep of `compare.sh --full` (seeded synthetic two-class set from
# benches/make_fit_data.py; max_depth 2,4,6,8,10,12,16,20,none × min_split_rows 2,5,10,20,50
# × min_leaf_rows 1,2,5,10,20 × max_leaves none,16,64,256; stratified 5 folds, seed 1;
# accuracy; no final refit), so 5 folds × 5 shaping keys = 25 work units. For each count N,
# a fresh database on a throwaway cluster (benches/pg_cluster.sh) and N `pollard serve`
# processes with one CPU thread each; the sweep is started and followed on the first, the
# others join it. Prints the end-to-end time (`pollard sweep --follow` to its end), units
# per second, and how many units each replica computed (from the unit rows). Run once:
#   bash benches/replicas.sh
# A python with numpy makes the data: POLLARD_BENCH_PY, else a venv made here (pip).
set -euo pipefail
cd "$(dirname "$0")/.."
fail() { echo "replicas: $*" >&2; exit 1; }
say() { echo "replicas: $*"; }

cargo build --release --quiet --bin pollard
bin="$PWD/target/release/pollard"
work="$(mktemp -d)"
source benches/pg_cluster.sh

py="${POLLARD_BENCH_PY:-}"
if [ -z "$py" ]; then
    python3 -m venv "$work/venv" && "$work/venv/bin/pip" install --quiet "numpy==2.4.6" </dev/null || fail "cannot install numpy"
    py="$work/venv/bin/python"
fi
"$py" benches/make_fit_data.py "$work/data" 100000 >/dev/null || fail "make_fit_data.py failed"
csv="$work/data/fit_classify.csv"

say "$(nproc) cores; uptime:$(uptime | sed 's/.*up/ up/')"
for n in ${COUNTS:-1 2 3}; do
    url="$(fresh_database replicas$n)"
    servers=()
    for i in $(seq 1 "$n"); do
        servers+=("$(serve "r$n-$i" POLLARD_STORE=postgres POLLARD_DATABASE_URL="$url")")
    done
    "$bin" --server "${servers[0]}" put --name fit --target outcome "$csv" >/dev/null
    t0="$(date +%s.%N)"
    "$bin" --server "${servers[0]}" sweep --dataset fit --fold-scheme stratified --k 5 --seed 1 --metric accuracy --skip-final \
        --max-depth 2,4,6,8,10,12,16,20,none --min-split-rows 2,5,10,20,50 --min-leaf-rows 1,2,5,10,20 --max-leaves none,16,64,256 \
        --follow >/dev/null
    t1="$(date +%s.%N)"
    units="$(sql "replicas$n" "SELECT count(*) FROM units")"
    per="$(sql "replicas$n" "SELECT string_agg(n::text, '+' ORDER BY n DESC) FROM (SELECT count(*) AS n FROM units GROUP BY worker) w")"
    python3 -c "import sys; n, u, s, per = sys.argv[1:]; s = float(s); print(f'replicas: {n} replica(s): {s:.1f} s end to end, {int(u) / s:.2f} units/s, units per replica {per}')" "$n" "$units" "$(python3 -c "print($t1 - $t0)")" "$per"
    for i in $(seq 1 "$n"); do
        say "  replica $i: $(grep -c 'joining a run' "$work/r$n-$i.log" || true) join(s); $(grep -o 'sweep planned.*\|no unit of the run left.*' "$work/r$n-$i.log" | tr '\n' ';' || true)"
    done
    [ -n "${KEEP_LOGS:-}" ] && cp "$work"/r$n-*.log "$KEEP_LOGS"/
    stop_servers
done
say "uptime after:$(uptime | sed 's/.*up/ up/')"
