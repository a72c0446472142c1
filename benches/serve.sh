# Sourced by the benchmarks that talk to a real server (load.sh, latency.sh): starts
# `pollard serve` ($bin) on a free loopback port with a fresh store under $work and the
# default config, waits until it serves, and stops it on exit. Sets `port` and `server_pid`;
# `stop_server` sends SIGTERM and returns non-zero when the server does not exit cleanly. Needs `bin`,
# `work` and `fail` from the caller.
server_pid=""
cleanup() {
    if [ -n "$server_pid" ] && kill -0 "$server_pid" 2>/dev/null; then
        kill -TERM "$server_pid" 2>/dev/null || true
        wait "$server_pid" 2>/dev/null || true
    fi
    rm -rf "$work"
}
trap cleanup EXIT

start_server() {
    # A free port: bind port 0 and read what the kernel gave.
    port="$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')"
    env -u POLLARD_CONFIG "$bin" serve --listen "127.0.0.1:$port" --data "$work/store" 2>"$work/serve.log" &
    server_pid=$!
    for _ in $(seq 1 400); do
        grep -q "pollard serving" "$work/serve.log" 2>/dev/null && break
        kill -0 "$server_pid" 2>/dev/null || { cat "$work/serve.log" >&2; fail "the server exited"; }
        sleep 0.05
    done
    grep -q "pollard serving" "$work/serve.log" || { cat "$work/serve.log" >&2; fail "the server did not start"; }
}

stop_server() {
    local rc=0
    kill -TERM "$server_pid"
    wait "$server_pid" || rc=$?
    server_pid=""
    return "$rc"
}
