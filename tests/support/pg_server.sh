#!/usr/bin/env bash
# A throwaway PostgreSQL cluster for the store tests: started as the postgres user (the server
# refuses to run as root), on loopback and a Unix socket in its own temporary folder.
#   tests/support/pg_server.sh start   -> prints the URL (postgresql://station@127.0.0.1:PORT/station)
#   tests/support/pg_server.sh stop DIR
# (between the two, `pg_ctl -D DIR/data stop|start` as that user pauses and resumes it)
set -euo pipefail
action=${1:-start}
bindir=${PG_BINDIR:-$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1)}
[ -x "$bindir/initdb" ] || { echo "pg_server: no initdb found (apt-get install postgresql)" >&2; exit 1; }
runas() { if [ "$(id -u)" = 0 ]; then su postgres -s /bin/sh -c "$*"; else sh -c "$*"; fi; }
case "$action" in
  start)
    port=${PG_PORT:-$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')}
    dir=$(mktemp -d /tmp/station-pg.XXXXXX)
    chmod 755 "$dir"
    [ "$(id -u)" = 0 ] && chown postgres "$dir"
    runas "$bindir/initdb -D $dir/data -U station --auth=trust -E UTF8 >$dir/initdb.log 2>&1"
    # Settings in the cluster's own config, so that a plain `pg_ctl start` (after a test stopped
    # the server) comes back on the same port. fsync off: a throwaway cluster.
    printf "port = %s\nlisten_addresses = '127.0.0.1'\nunix_socket_directories = '%s'\nfsync = off\n" \
      "$port" "$dir" >> "$dir/data/postgresql.conf"
    runas "$bindir/pg_ctl -D $dir/data -l $dir/server.log -w start >/dev/null"
    runas "$bindir/createdb -h 127.0.0.1 -p $port -U station station"
    echo "$dir" > "$dir/dir"
    echo "postgresql://station@127.0.0.1:$port/station $dir"
    ;;
  stop)
    dir=$2
    runas "$bindir/pg_ctl -D $dir/data -m fast -w stop >/dev/null" || true
    rm -rf "$dir"
    ;;
  *) echo "usage: pg_server.sh start | stop DIR" >&2; exit 2 ;;
esac
