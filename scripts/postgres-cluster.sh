#!/usr/bin/env bash
# A throwaway PostgreSQL cluster on a loopback port, for the store and replica
# tests (see DEVELOPERS.md, "Testing on PostgreSQL").
#
#   scripts/postgres-cluster.sh start   # prints `export` lines to eval
#   scripts/postgres-cluster.sh stop    # stops the cluster $PLIMSOLL_PG_CLUSTER names
#
# Installs Debian's `postgresql` package when no server binaries are found.
# The cluster trusts local connections, skips fsync (it lives for one test
# run; PLIMSOLL_PG_DURABLE=1 keeps PostgreSQL's defaults, fsync on, as for the
# load example's figures) and listens on 127.0.0.1 only.
set -euo pipefail

server_bin() {
  local d
  d=$(ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -n 1 || true)
  if [ -n "$d" ] && [ -x "$d/initdb" ] && [ -x "$d/postgres" ]; then
    echo "$d"
  fi
}

as_owner() {
  # initdb and postgres refuse to run as root: run them as the package's user.
  if [ "$(id -u)" = 0 ]; then
    runuser -u postgres -- "$@"
  else
    "$@"
  fi
}

case "${1:-}" in
start)
  bin=$(server_bin)
  if [ -z "$bin" ]; then
    echo "scripts/postgres-cluster.sh: installing Debian's postgresql package" >&2
    sudo=()
    [ "$(id -u)" = 0 ] || sudo=(sudo)
    "${sudo[@]}" apt-get update -qq >&2
    DEBIAN_FRONTEND=noninteractive "${sudo[@]}" apt-get install -y -qq postgresql >&2
    bin=$(server_bin)
    [ -n "$bin" ] || { echo "scripts/postgres-cluster.sh: no PostgreSQL server after installing" >&2; exit 1; }
  fi
  dir=$(mktemp -d /tmp/plimsoll-pg.XXXXXX)
  chmod 755 "$dir"
  [ "$(id -u)" = 0 ] && chown postgres "$dir"
  as_owner "$bin/initdb" -D "$dir/data" -U postgres -A trust --no-sync >"$dir/initdb.log" 2>&1 \
    || { cat "$dir/initdb.log" >&2; exit 1; }
  port=$(python3 -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1])')
  nosync="-F"
  [ "${PLIMSOLL_PG_DURABLE:-0}" = 1 ] && nosync=""
  as_owner "$bin/pg_ctl" -D "$dir/data" -l "$dir/server.log" -w -t 60 \
    -o "-h 127.0.0.1 -p $port -k $dir $nosync -c max_connections=400" start >&2 \
    || { cat "$dir/server.log" >&2; exit 1; }
  echo "export PLIMSOLL_TEST_POSTGRES=postgres://postgres@127.0.0.1:$port/postgres"
  echo "export PLIMSOLL_PG_CLUSTER=$dir"
  echo "export PLIMSOLL_PG_BIN=$bin"
  ;;
stop)
  dir=${PLIMSOLL_PG_CLUSTER:?no cluster to stop}
  bin=${PLIMSOLL_PG_BIN:-$(server_bin)}
  as_owner "$bin/pg_ctl" -D "$dir/data" -m immediate -w stop >/dev/null 2>&1 || true
  rm -rf "$dir"
  ;;
*)
  echo "usage: $0 start|stop" >&2
  exit 2
  ;;
esac
