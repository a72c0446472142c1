#!/usr/bin/env bash
# Single-tree fit benchmark, pollard against the pinned reference library, in one run on the
# same seeded synthetic data. Prints a table and, as the very last line, the speed ratios.
#
#   bash benches/compare_fit.sh
#
# Environment:
#   POLLARD_REF_VENV      use this virtualenv (must contain bin/python) instead of making a
#                         fresh one in a temporary folder; the pins of
#                         tests/reference/requirements.txt are installed into it (a no-op
#                         when they already are).
#   PYTHON                interpreter used to make a fresh venv (default: python3).
#   POLLARD_BENCH_ROWS    rows per synthetic set (default 100000).
#   POLLARD_BENCH_REPEATS fits per side and mode; the median is reported (default 3).
#
# Nothing else should be running: the machine's cores are shared by both sides.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/.." && pwd)"
req="$root/tests/reference/requirements.txt"
rows="${POLLARD_BENCH_ROWS:-100000}"
repeats="${POLLARD_BENCH_REPEATS:-3}"
tmp="$(mktemp -d "${TMPDIR:-/tmp}/pollard-bench.XXXXXX")"
trap 'rm -rf "$tmp"' EXIT

export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1 PYTHONHASHSEED=0

fail() { echo "compare_fit: FAIL: $*" >&2; exit 1; }
say() { echo "compare_fit: $*"; }

# --- 1. interpreter with the pinned packages --------------------------------------
source "$root/tests/reference/venv.sh"

# --- 2. build the bench before any timing --------------------------------------------
say "building the fit bench (cargo bench --bench fit --no-run)"
(cd "$root" && cargo bench --bench fit --no-run --locked) >"$tmp/build.log" 2>&1 \
    || { cat "$tmp/build.log" >&2; fail "cargo bench --no-run failed"; }

# --- 3. data -----------------------------------------------------------------------
"$py" "$here/make_fit_data.py" "$tmp/data" "$rows" >/dev/null || fail "make_fit_data.py failed"
say "data: seeded synthetic, $rows rows x 20 features per task (benches/make_fit_data.py)"
say "machine: $(nproc) cores; $repeats fits per side and mode, median reported"

# --- 4. both sides, both tasks, in this run -----------------------------------------
for task in classify regress; do
    csv="$tmp/data/fit_$task.csv"
    say "$task: reference (single thread) ..."
    "$py" "$here/reference_fit.py" "$csv" "$task" "$repeats" >"$tmp/ref_$task.json" \
        || fail "reference_fit.py $task failed"
    say "$task: pollard (single thread, then parallel) ..."
    (cd "$root" && cargo bench --bench fit --locked -- "$csv" "$task" "$repeats") \
        >"$tmp/pollard_$task.json" 2>>"$tmp/build.log" \
        || { tail -n 20 "$tmp/build.log" >&2; fail "pollard fit bench $task failed"; }
done

# --- 5. table, then the ratios as the last line --------------------------------------
"$py" - "$tmp" <<'EOF'
import json, os, sys
tmp = sys.argv[1]
def load(name):
    with open(os.path.join(tmp, name)) as f:
        lines = [l for l in f if l.lstrip().startswith("{")]
    return json.loads(lines[-1])
rows = []
for task in ("classify", "regress"):
    rows.append((task, load(f"ref_{task}.json"), load(f"pollard_{task}.json")))
ref_lib = rows[0][1]["library"]
print()
print(f"single-tree full-depth fit, {rows[0][1]['rows']} rows x {rows[0][1]['features']} features "
      f"(seeded synthetic); reference: {ref_lib}; pollard parallel threads: {rows[0][2]['threads']}")
head = ("task", "reference s", "pollard 1-thread s", "pollard parallel s",
        "reference nodes", "pollard nodes", "reference depth", "pollard depth")
table = [head]
for task, r, p in rows:
    table.append((task, f"{r['single_seconds']:.3f}", f"{p['single_seconds']:.3f}",
                  f"{p['parallel_seconds']:.3f}", str(r["nodes"]), str(p["nodes"]),
                  str(r["depth"]), str(p["depth"])))
widths = [max(len(row[i]) for row in table) for i in range(len(head))]
for row in table:
    print("  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in enumerate(zip(row, widths))))
print()
for task, r, p in rows:
    print(f"runs {task}: reference {[round(t, 3) for t in r['single_runs']]}, "
          f"pollard 1-thread {[round(t, 3) for t in p['single_runs']]}, "
          f"pollard parallel {[round(t, 3) for t in p['parallel_runs']]}; "
          f"parallel tree equals serial tree: {str(p['parallel_same_tree']).lower()}")
print(f"parallel speed-up over pollard 1-thread: "
      + ", ".join(f"{task} {p['single_seconds'] / p['parallel_seconds']:.1f}x" for task, r, p in rows))
print("ratio: " + ", ".join(f"{task} {r['single_seconds'] / p['single_seconds']:.1f}x" for task, r, p in rows)
      + " (reference single-thread time / pollard single-thread time)")
EOF
