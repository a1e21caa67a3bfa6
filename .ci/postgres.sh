# shellcheck shell=bash
# Start a throwaway PostgreSQL server on loopback for the tests; source this file, then call
# `pg_test_server_start` (exports RISKPREM_TEST_PG_URL) and `pg_test_server_stop` (also on EXIT).
#
# The server lives in a temporary folder, listens on a free 127.0.0.1 port and trusts local
# connections: it is for tests only.  Durability is switched off (fsync, synchronous_commit,
# full_page_writes) because a test database is thrown away; it makes CREATE DATABASE cheap.

pg_test_bin() {
    local found
    found=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1)
    if [ -z "$found" ] && [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null; then
        echo "PostgreSQL not found: installing the Debian postgresql package" >&2
        DEBIAN_FRONTEND=noninteractive apt-get update -qq >&2 \
            && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >&2
        found=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1)
    fi
    [ -n "$found" ] && echo "$found"
}

# Run a PostgreSQL binary as the postgres user when we are root (initdb refuses to run as root).
_pg_as_owner() {
    if [ "$(id -u)" = 0 ]; then
        runuser -u postgres -- "$@"
    else
        "$@"
    fi
}

pg_test_server_start() {
    local bin port
    bin=$(pg_test_bin) || { echo "no PostgreSQL server binaries; PostgreSQL tests will be skipped" >&2; return 1; }
    PG_TEST_DIR=$(mktemp -d /tmp/riskprem-pg.XXXXXX)
    [ "$(id -u)" = 0 ] && chown postgres: "$PG_TEST_DIR"
    PG_TEST_BIN=$bin
    port=$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
    _pg_as_owner "$bin/initdb" -D "$PG_TEST_DIR/data" -U postgres -A trust -E UTF8 --no-sync >/dev/null \
        || { echo "initdb failed; PostgreSQL tests will be skipped" >&2; return 1; }
    _pg_as_owner "$bin/pg_ctl" -D "$PG_TEST_DIR/data" -l "$PG_TEST_DIR/server.log" -w -s start -o \
        "-c listen_addresses=127.0.0.1 -p $port -k $PG_TEST_DIR -c fsync=off -c synchronous_commit=off -c full_page_writes=off" \
        || { cat "$PG_TEST_DIR/server.log" >&2; echo "PostgreSQL did not start; its tests will be skipped" >&2; return 1; }
    export RISKPREM_TEST_PG_URL="postgresql+psycopg://postgres@127.0.0.1:$port/postgres"
    echo "PostgreSQL $("$bin/postgres" --version | awk '{print $3}') test server on 127.0.0.1:$port" >&2
}

pg_test_server_stop() {
    if [ -n "${PG_TEST_DIR:-}" ] && [ -d "$PG_TEST_DIR/data" ]; then
        _pg_as_owner "$PG_TEST_BIN/pg_ctl" -D "$PG_TEST_DIR/data" -s -m fast stop >/dev/null 2>&1 || true
    fi
    [ -n "${PG_TEST_DIR:-}" ] && rm -rf "$PG_TEST_DIR"
    PG_TEST_DIR=
}
