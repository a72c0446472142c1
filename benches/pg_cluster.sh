# Sourced by the benchmarks that need PostgreSQL (store_overhead.sh, replicas.sh): a
# throwaway cluster (initdb in "$work/pg", the server on a free loopback port, as the
# `postgres` user when run as root), `pollard serve` processes, and their cleanup. Needs
# $work (a fresh folder), $bin (the pollard binary) and a `fail` function; sets $pgbin and
# $pg_port. Every server started is recorded in "$work/pids" and stopped on exit.
pgbin="$(pg_config --bindir 2>/dev/null || true)"
[ -x "$pgbin/initdb" ] || pgbin="$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1)"
[ -x "$pgbin/initdb" ] || fail "no PostgreSQL server programs (Debian: apt-get install postgresql)"
as_owner=()
if [ "$(id -u)" = 0 ]; then
    as_owner=(runuser -u postgres --)
fi
free_port() { python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])'; }

stop_servers() {
    for p in $(cat "$work/pids" 2>/dev/null); do kill -TERM "$p" 2>/dev/null || true; done
    for p in $(cat "$work/pids" 2>/dev/null); do while kill -0 "$p" 2>/dev/null; do sleep 0.1; done; done
    : >"$work/pids"
}

cleanup() {
    stop_servers
    [ -f "$work/pg/postmaster.pid" ] && "${as_owner[@]}" "$pgbin/pg_ctl" -D "$work/pg" -m fast -w stop >/dev/null 2>&1 || true
    rm -rf "$work"
}
trap cleanup EXIT

chmod 755 "$work"
mkdir "$work/pg"
[ ${#as_owner[@]} -gt 0 ] && chown postgres "$work/pg"
"${as_owner[@]}" "$pgbin/initdb" --no-sync --auth=trust -U pollard -E UTF8 --locale=C -D "$work/pg" >/dev/null
pg_port="$(free_port)"
"${as_owner[@]}" "$pgbin/pg_ctl" -D "$work/pg" -l "$work/pg/server.log" -w -o "-p $pg_port -h 127.0.0.1 -k ''" start >/dev/null

# A fresh database; prints its URL.
fresh_database() { # name
    "$pgbin/psql" -X -q -h 127.0.0.1 -p "$pg_port" -U pollard -d postgres -c "CREATE DATABASE $1" >/dev/null
    echo "postgres://pollard@127.0.0.1:$pg_port/$1"
}

# One query's rows, unaligned.
sql() { # database, query
    "$pgbin/psql" -X -q -At -h 127.0.0.1 -p "$pg_port" -U pollard -d "$1" -c "$2"
}

# Starts `pollard serve` with one CPU thread; prints its address.
serve() { # name, extra env...
    local name="$1"; shift
    local port; port="$(free_port)"
    # (Its output goes to files: this function runs in a command substitution.)
    env -u POLLARD_CONFIG POLLARD_CPU_THREADS=1 POLLARD_WEB_LISTEN=127.0.0.1:0 "$@" "$bin" serve --listen "127.0.0.1:$port" --data "$work/$name" >"$work/$name.out" 2>"$work/$name.log" &
    echo $! >>"$work/pids"
    for _ in $(seq 1 400); do grep -q "pollard serving" "$work/$name.log" 2>/dev/null && break; sleep 0.05; done
    grep -q "pollard serving" "$work/$name.log" || { cat "$work/$name.log" >&2; fail "the $name server did not start"; }
    echo "127.0.0.1:$port"
}
