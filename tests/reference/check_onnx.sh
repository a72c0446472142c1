#!/usr/bin/env bash
# Cross-check pollard's ONNX export against onnxruntime: fit trees on the datasets in
# tests/data, export them (examples/onnx_cases.rs), and compare onnxruntime's outputs with
# pollard's predictions row for row (tests/reference/check_onnx.py). Exits non-zero on any
# mismatch.
#
#   bash tests/reference/check_onnx.sh
#
# Environment:
#   POLLARD_ONNX_VENV  use this virtualenv (must contain bin/python) instead of making a fresh
#                      one in a temporary folder; requirements-onnx.txt is installed into it.
#                      POLLARD_REF_VENV is not used, so the golden check's venv keeps its pins.
#   PYTHON             interpreter used to make a fresh venv (default: python3).
set -euo pipefail

start=$(date +%s)
here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/../.." && pwd)"
req="$here/requirements-onnx.txt"
tmp="$(mktemp -d "${TMPDIR:-/tmp}/pollard-onnx.XXXXXX")"
trap 'rm -rf "$tmp"' EXIT

export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1 PYTHONHASHSEED=0

fail() { echo "check_onnx: FAIL: $*" >&2; exit 1; }
say() { echo "check_onnx: $*"; }

# --- 1. interpreter with the pinned packages (venv.sh reads POLLARD_REF_VENV) -------
if [[ -n "${POLLARD_ONNX_VENV:-}" ]]; then
    export POLLARD_REF_VENV="$POLLARD_ONNX_VENV"
else
    unset POLLARD_REF_VENV
fi
source "$here/venv.sh"
say "packages: $(tr '\n' ' ' < <(grep -v '^#' "$req" | grep .))"
t_env=$(date +%s)

# --- 2. pollard fits, exports and predicts -----------------------------------------
(cd "$root" && cargo run --release --quiet --example onnx_cases -- "$tmp/cases") || fail "examples/onnx_cases.rs failed"
t_cases=$(date +%s)

# --- 3. onnxruntime on the same rows ------------------------------------------------
status=0
"$py" "$here/check_onnx.py" "$tmp/cases" || status=1
end=$(date +%s)
say "time: environment $((t_env - start)) s, pollard $((t_cases - t_env)) s, onnxruntime check $((end - t_cases)) s, total $((end - start)) s"
[[ $status -eq 0 ]] || fail "onnxruntime disagrees with pollard (rows above)"
