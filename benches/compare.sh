#!/usr/bin/env bash
# Sweep benchmark: pollard's sweep against the pinned reference library's grid search, in one
# run, on the same seeded synthetic data, the same folds and the same grid. Prints both times
# and the per-setting score agreement and, as the very last line, `speedup: X` (reference
# time / pollard time).
#
#   bash benches/compare.sh --quick   # 10,000 x 20, 216 settings, whole grid on both sides
#   bash benches/compare.sh --full    # 100,000 x 20, 900 settings; the reference runs a seeded
#                                     # 10 % sample and its time is extrapolated to the grid
#
# Environment:
#   POLLARD_REF_VENV      use this virtualenv (must contain bin/python) instead of making a
#                         fresh one in a temporary folder; the pins of
#                         tests/reference/requirements.txt are installed into it (a no-op
#                         when they already are).
#   PYTHON                interpreter used to make a fresh venv (default: python3).
#   POLLARD_BENCH_REPEATS pollard sweeps timed; the median is reported (default 3). The
#                         reference runs once.
#
# Nothing else should be running: the machine's cores are shared by both sides.
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/.." && pwd)"
req="$root/tests/reference/requirements.txt"
repeats="${POLLARD_BENCH_REPEATS:-3}"

fail() { echo "compare: FAIL: $*" >&2; exit 1; }
say() { echo "compare: $*"; }

mode="${1:-}"
case "$mode" in
    --quick)
        rows=10000
        grid=(max_depth=2,4,8,12,16,none min_split_rows=2,10,50 min_leaf_rows=1,5,20 max_leaves=none,16,64,256)
        sample=""
        goal=500
        ;;
    --full)
        rows=100000
        grid=(max_depth=2,4,6,8,10,12,16,20,none min_split_rows=2,5,10,20,50 min_leaf_rows=1,2,5,10,20 max_leaves=none,16,64,256)
        sample=0.1
        goal=1000
        ;;
    *)
        echo "usage: bash benches/compare.sh --quick|--full" >&2
        exit 2
        ;;
esac
# Fixed seeds: the fold assignment (pollard's stratified plan) and the reference's sample.
fold_seed=1
sample_seed=0

tmp="$(mktemp -d "${TMPDIR:-/tmp}/pollard-sweep-bench.XXXXXX")"
trap 'rm -rf "$tmp"' EXIT
export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1 PYTHONHASHSEED=0

# --- 1. interpreter with the pinned packages --------------------------------------
source "$root/tests/reference/venv.sh"

# --- 2. build the bench and the binary before any timing ------------------------------
say "building the sweep bench and the pollard binary (release)"
(cd "$root" && cargo bench --bench sweep --no-run --locked --message-format=json >"$tmp/build.json" \
    && cargo build --release --locked --bin pollard --message-format=json >>"$tmp/build.json") \
    2>"$tmp/build.log" || { cat "$tmp/build.log" >&2; fail "cargo build failed"; }
# The executables just built are run directly, so a source edit made meanwhile (in a shared
# checkout) cannot trigger a rebuild between the two sides or mix two builds in one run.
artifact() {
    "$py" - "$tmp/build.json" "$1" <<'PYEOF'
import json, sys
for line in open(sys.argv[1]):
    try:
        m = json.loads(line)
    except ValueError:
        continue
    if m.get("reason") == "compiler-artifact" and m.get("executable") and m["target"]["name"] == sys.argv[2]:
        print(m["executable"])
PYEOF
}
bench="$(artifact sweep | tail -n 1)"
pollard="$(artifact pollard | tail -n 1)"
[[ -x "$bench" ]] || fail "no sweep bench executable in the cargo output"
[[ -x "$pollard" ]] || fail "no pollard executable in the cargo output"

# --- 3. data and folds -----------------------------------------------------------------
"$py" "$here/make_fit_data.py" "$tmp/data" "$rows" >/dev/null || fail "make_fit_data.py failed"
csv="$tmp/data/fit_classify.csv"
"$pollard" folds --data "$csv" --target outcome --scheme stratified --k 5 --seed "$fold_seed" \
    >"$tmp/folds.csv" || fail "pollard folds failed"
say "data: seeded synthetic, $rows rows x 20 features, two-class target (benches/make_fit_data.py)"
say "folds: pollard's stratified 5-fold plan, seed $fold_seed (pollard folds), given to the reference as PredefinedSplit"
say "grid: ${grid[*]}"
say "machine: $(nproc) cores; load before timing: $(cut -d' ' -f1-3 /proc/loadavg)"

# --- 4. both sides, in this run ----------------------------------------------------------
sample_args=()
if [[ -n "$sample" ]]; then
    sample_args=(sample="$sample" sample_seed="$sample_seed")
    say "reference: grid search (n_jobs=2, refit=False) on a seeded ${sample} sample of the settings ..."
else
    say "reference: grid search (n_jobs=2, refit=False) on the whole grid ..."
fi
"$py" "$here/reference_sweep.py" "$csv" "$tmp/folds.csv" "$tmp/ref_scores.jsonl" "${grid[@]}" "${sample_args[@]}" \
    >"$tmp/ref.json" || fail "reference_sweep.py failed"
say "pollard: sweep on the whole grid, $repeats times ..."
"$bench" "$csv" "${grid[@]}" seed="$fold_seed" k=5 repeats="$repeats" folds="$tmp/folds.csv" \
    out="$tmp/pollard_scores.jsonl" >"$tmp/pollard.json" || fail "pollard sweep bench failed"

# --- 5. times, agreement, then the speed-up as the last line -----------------------------
"$py" - "$tmp" "$mode" "$goal" <<'EOF'
import json, os, sys
tmp, mode, goal = sys.argv[1], sys.argv[2], float(sys.argv[3])
def load(name):
    with open(os.path.join(tmp, name)) as f:
        lines = [l for l in f if l.lstrip().startswith("{")]
    return json.loads(lines[-1])
def rows(name):
    with open(os.path.join(tmp, name)) as f:
        return [json.loads(l) for l in f if l.strip()]
LIMITS = ("max_depth", "min_split_rows", "min_leaf_rows", "max_leaves")
key = lambda r: tuple(r[k] for k in LIMITS)
ref, pol = load("ref.json"), load("pollard.json")
ref_scores = {key(r): r["valid_mean"] for r in rows("ref_scores.jsonl")}
pol_scores = {key(r): r["valid_mean"] for r in rows("pollard_scores.jsonl")}
if pol["settings"] != ref["grid_settings"] or len(pol_scores) != pol["settings"]:
    sys.exit(f"compare: FAIL: pollard swept {pol['settings']} settings, the grid has {ref['grid_settings']}")
missing = [k for k in ref_scores if k not in pol_scores]
if missing:
    sys.exit(f"compare: FAIL: {len(missing)} reference settings are not in pollard's grid, e.g. {missing[0]}")
if not pol["folds_match_file"]:
    sys.exit("compare: FAIL: pollard's folds were not checked against the folds file")

grid = ref["grid_settings"]
ref_grid_seconds = ref["seconds"] * grid / ref["settings_run"]
print()
print(f"sweep {mode}: {pol['rows']} rows x {pol['features']} features (seeded synthetic), "
      f"{pol['folds']} stratified folds (pollard's, seed {pol['fold_seed']}), {grid} settings, accuracy")
print(f"reference: {ref['library']}, grid search, n_jobs={ref['n_jobs']}, refit=False, "
      f"same folds as PredefinedSplit")
if ref["settings_run"] == grid:
    print(f"reference time: {ref['seconds']:.2f} s for the whole grid ({grid} settings)")
else:
    print(f"reference time: {ref['seconds']:.2f} s for a seeded sample of {ref['settings_run']} of the {grid} "
          f"settings ({ref['sample_fraction']:.0%}, sample seed {ref['sample_seed']})")
    print(f"reference time for the whole grid: {ref_grid_seconds:.1f} s ({ref_grid_seconds / 60:.1f} min), "
          f"EXTRAPOLATED linearly from the sample (x {grid}/{ref['settings_run']}), not measured")
print(f"pollard time: {pol['seconds']:.3f} s for the whole grid ({pol['settings']} settings, "
      f"{pol['work_units']} envelope trees, {pol['threads']} threads; median of "
      f"{[round(t, 3) for t in pol['runs']]}; fold assignment checked against the folds file)")

common = list(ref_scores)  # the reference's run order, which is grid order
diffs = [abs(pol_scores[k] - ref_scores[k]) for k in common]
equal = sum(d <= 1e-12 for d in diffs)
worst = max(range(len(common)), key=lambda i: diffs[i])
print(f"agreement on the {len(common)} settings both ran (pollard valid_mean vs reference mean validation accuracy): "
      f"{equal} equal to 1e-12, {len(common) - equal} differ; "
      f"mean |difference| {sum(diffs) / len(diffs):.3g}, max {diffs[worst]:.3g} at "
      + ", ".join(f"{n}={v if v is not None else 'none'}" for n, v in zip(LIMITS, common[worst])))
print("  differences come from the reference's random tie-breaking among equally good splits "
      "(it visits features in a random order at each node; pollard visits them in index order)")
speedup = ref_grid_seconds / pol["seconds"]
print(f"goal: speedup >= {goal:g} on {mode}: {'met' if speedup >= goal else 'NOT met'}"
      + ("" if ref["settings_run"] == grid else " (reference time extrapolated from the sample)"))
print(f"speedup: {speedup:.1f}")
EOF
