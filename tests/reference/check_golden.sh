#!/usr/bin/env bash
# Regenerate the reference data, golden trees and golden sweeps in a temporary folder and compare
# them byte-for-byte with the committed files. Exits non-zero on any difference.
#
#   bash tests/reference/check_golden.sh
#
# Environment:
#   POLLARD_REF_VENV  use this virtualenv (must contain bin/python) instead of making a
#                     fresh one in a temporary folder; the pinned requirements are
#                     installed into it (a no-op when they already are).
#   PYTHON            interpreter used to make a fresh venv (default: python3).
set -euo pipefail

start=$(date +%s)
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/../.." && pwd)"
req="$here/requirements.txt"
tmp="$(mktemp -d "${TMPDIR:-/tmp}/pollard-ref.XXXXXX")"
trap 'rm -rf "$tmp"' EXIT

export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1 PYTHONHASHSEED=0

fail() { echo "check_golden: FAIL: $*" >&2; exit 1; }
say() { echo "check_golden: $*"; }

# --- 1. interpreter with the pinned packages --------------------------------------
source "$here/venv.sh"
say "packages: $(tr '\n' ' ' < <(grep -v '^#' "$req" | grep .))"
t_env=$(date +%s)

status=0

# --- 2. datasets -------------------------------------------------------------------
mkdir -p "$tmp/data"
"$py" "$here/make_synthetic.py" "$tmp/data" >/dev/null || fail "make_synthetic.py failed"
"$py" "$here/export_datasets.py" "$tmp/data" >/dev/null || fail "export_datasets.py failed"
gen_list=$(cd "$tmp/data" && ls -1 *.csv | sort)
com_list=$(cd "$root/tests/data" && ls -1 *.csv | sort)
if [[ "$gen_list" != "$com_list" ]]; then
    echo "check_golden: CSV file sets differ (generated vs committed tests/data):" >&2
    diff <(echo "$gen_list") <(echo "$com_list") >&2 || true
    status=1
fi
for f in $gen_list; do
    if [[ ! -f "$root/tests/data/$f" ]]; then
        continue
    elif cmp -s "$tmp/data/$f" "$root/tests/data/$f"; then
        say "tests/data/$f: identical"
    else
        echo "check_golden: FAIL: tests/data/$f differs from a fresh regeneration" >&2
        diff "$tmp/data/$f" "$root/tests/data/$f" | head -n 10 >&2 || true
        status=1
    fi
done

# --- 3. golden trees (read from the committed CSVs) ---------------------------------
(cd "$root" && "$py" "$here/make_golden.py" "$tmp/golden") || fail "make_golden.py failed"

# --- 4. golden sweeps (read the committed CSVs and the committed fold files) ----------
# folds_<dataset>.csv are inputs written by pollard (`pollard folds`), not by Python; they
# are copied as they are, and tests/reference_sweep.rs checks pollard still assigns them.
(cd "$root" && "$py" "$here/make_sweep_golden.py" "$tmp/golden") || fail "make_sweep_golden.py failed"
# The nested check's fold files (`pollard folds --outer-k 5`) are pollard's inputs too;
# tests/reference_nested.rs checks pollard still assigns them.
(cd "$root" && "$py" "$here/make_nested_golden.py" "$tmp/golden") || fail "make_nested_golden.py failed"
cp "$here"/golden/folds_*.csv "$here"/golden/nested_folds_*.csv "$tmp/golden/"

# --- 5. golden importances (read the committed CSVs and pollard's shuffle files) -------
# permutations_<dataset>.csv are inputs written by pollard (POLLARD_WRITE_PERMUTATIONS=1
# cargo test --release --test reference_tree permutation_orders); copied as they are, and
# tests/reference_tree.rs checks pollard still draws them.
cp "$here"/golden/permutations_*.csv "$tmp/golden/"
(cd "$root" && "$py" "$here/make_importance_golden.py" "$tmp/golden") || fail "make_importance_golden.py failed"
if diff -r -q "$tmp/golden" "$here/golden" >"$tmp/golden.diff" 2>&1; then
    say "tests/reference/golden: identical ($(ls "$here/golden" | wc -l) files, $(ls "$here"/golden/folds_*.csv "$here"/golden/nested_folds_*.csv | wc -l) of them pollard's fold files)"
else
    echo "check_golden: FAIL: tests/reference/golden differs from a fresh regeneration:" >&2
    cat "$tmp/golden.diff" >&2
    diff -r "$tmp/golden" "$here/golden" | head -n 40 >&2 || true
    status=1
fi

end=$(date +%s)
say "time: environment $((t_env - start)) s, regeneration and compare $((end - t_env)) s, total $((end - start)) s"
if [[ $status -ne 0 ]]; then
    echo "check_golden: FAIL (regenerate with the commands in tests/reference/README.md if the change is intended)" >&2
    exit 1
fi
say "OK: all reference files reproduce exactly"
