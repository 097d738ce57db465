#!/usr/bin/env bash
# Install (if missing) and start the servers the tests use, on loopback only.
# Prints the environment lines to export: TREE2SQL_PG_URL.
set -euo pipefail

PG_PORT="${TREE2SQL_PG_PORT:-54329}"
PG_DIR="${TREE2SQL_PG_DIR:-/tmp/tree2sql-pg}"

pg_bin() {
    local found
    found=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1 || true)
    echo "$found"
}

if [ -z "$(pg_bin)" ] || [ ! -x "$(pg_bin)/initdb" ]; then
    echo "installing PostgreSQL server (Debian package)" >&2
    apt-get update -qq >&2
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >&2
fi
if ! command -v java >/dev/null 2>&1; then
    echo "installing Java 17 for Spark local mode (Debian package)" >&2
    apt-get update -qq >&2
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq openjdk-17-jre-headless >&2
fi

BIN="$(pg_bin)"
if ! id postgres >/dev/null 2>&1; then
    useradd --system --home "$PG_DIR" postgres
fi
if [ ! -f "$PG_DIR/data/PG_VERSION" ]; then
    rm -rf "$PG_DIR"
    mkdir -p "$PG_DIR"
    chown postgres "$PG_DIR"
    su postgres -s /bin/sh -c "$BIN/initdb -D $PG_DIR/data -U postgres -A trust" >/dev/null
fi
if ! su postgres -s /bin/sh -c "$BIN/pg_ctl -D $PG_DIR/data status" >/dev/null 2>&1; then
    su postgres -s /bin/sh -c "$BIN/pg_ctl -D $PG_DIR/data -l $PG_DIR/log -w start \
        -o '-c listen_addresses=127.0.0.1 -p $PG_PORT -k $PG_DIR'" >/dev/null
fi
su postgres -s /bin/sh -c "$BIN/psql -h 127.0.0.1 -p $PG_PORT -U postgres -tAc \
    \"SELECT 1 FROM pg_database WHERE datname = 'tree2sql_test'\"" | grep -q 1 \
    || su postgres -s /bin/sh -c "$BIN/createdb -h 127.0.0.1 -p $PG_PORT -U postgres tree2sql_test"
echo "export TREE2SQL_PG_URL=postgresql+psycopg://postgres@127.0.0.1:$PG_PORT/tree2sql_test"
