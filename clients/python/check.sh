#!/usr/bin/env bash
# The Python client's tests: a fresh venv with the pinned packages of requirements-test.txt,
# the package installed the way users install it (`pip install ./clients/python`, whose build
# generates the stubs from proto/), then pytest against real `pollard serve` processes
# started from target/release/pollard (build it first: `cargo build --release`).
#
#   bash clients/python/check.sh [PYTEST ARGS...]
#
# Environment:
#   POLLARD_PY_VENV  a virtualenv to use (its bin/python) instead of a fresh one in a
#                    temporary folder; the pins and the package are installed into it.
#   PYTHON           interpreter for a fresh venv (default python3).
#   POLLARD_BIN      the pollard binary the tests start (default target/release/pollard).
set -euo pipefail

here="$(cd "$(dirname "${BASH_SOURCE[0]}")" && pwd)"
root="$(cd "$here/../.." && pwd)"
export PIP_DISABLE_PIP_VERSION_CHECK=1 PIP_NO_INPUT=1
fail() { echo "python client: FAIL: $*" >&2; exit 1; }

test -x "${POLLARD_BIN:-$root/target/release/pollard}" || fail "no pollard binary: run cargo build --release first"
command -v openssl >/dev/null || fail "the TLS test makes its certificates with the openssl command (Debian's openssl package)"
if [ -n "${POLLARD_PY_VENV:-}" ]; then
    venv="$POLLARD_PY_VENV"
else
    tmp="$(mktemp -d "${TMPDIR:-/tmp}/pollard-py.XXXXXX")"
    trap 'rm -rf "$tmp"' EXIT
    venv="$tmp/venv"
    "${PYTHON:-python3}" -m venv "$venv" || fail "could not create a venv"
fi
py="$venv/bin/python"
"$py" -m pip install --quiet -r "$here/requirements-test.txt" </dev/null || fail "pip install -r requirements-test.txt failed"
"$py" -m pip install --quiet --force-reinstall --no-deps "$here" </dev/null || fail "pip install ./clients/python failed"
"$py" -m pip check >/dev/null || fail "the installed packages disagree: $("$py" -m pip check)"
cd "$here"
"$py" -m pytest -q -p no:cacheprovider "$@"
