# Sourced by the reference and benchmark scripts: sets `py` to a Python with exactly the
# pinned packages of requirements file $req. Uses $POLLARD_REF_VENV when set, else makes a
# venv under $tmp. Needs `say` and `fail` from the caller.
if [[ -n "${POLLARD_REF_VENV:-}" ]]; then
    venv="$POLLARD_REF_VENV"
    [[ -x "$venv/bin/python" ]] || fail "POLLARD_REF_VENV=$venv has no bin/python"
    "$venv/bin/python" -c 'import sys; assert sys.version_info >= (3, 9)' \
        || fail "POLLARD_REF_VENV=$venv: python is not usable (need >= 3.9)"
    say "using venv $venv"
else
    venv="$tmp/venv"
    say "creating venv in $venv"
    "${PYTHON:-python3}" -m venv "$venv" || fail "could not create a venv with ${PYTHON:-python3}"
fi
py="$venv/bin/python"
"$py" -m pip install --quiet -r "$req" </dev/null || fail "pip install -r $req failed"

# every pin in requirements.txt must be the installed version
"$py" - "$req" <<'EOF' || fail "installed versions do not match $req"
import sys
from importlib.metadata import version, PackageNotFoundError
bad = []
for line in open(sys.argv[1]):
    line = line.split("#", 1)[0].strip()
    if not line:
        continue
    name, want = line.split("==")
    try:
        have = version(name)
    except PackageNotFoundError:
        have = None
    if have != want:
        bad.append(f"{name}: want {want}, have {have}")
if bad:
    print("\n".join(bad), file=sys.stderr)
    sys.exit(1)
EOF
