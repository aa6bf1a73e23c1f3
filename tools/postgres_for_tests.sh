#!/usr/bin/env bash
# Start a throwaway PostgreSQL server on 127.0.0.1:$PORT (default 54329) for the ledger tests.
# Installs Debian's postgresql if it is missing. Prints the data folder; stop it with
#   su postgres -s /bin/sh -c "pg_ctl -D <folder>/data stop"
set -euo pipefail
PORT=${PORT:-54329}
pgbin() { ls -d /usr/lib/postgresql/*/bin 2>/dev/null | sort -V | tail -1; }
PGBIN=$(pgbin || true)
if [ -z "$PGBIN" ] || [ ! -x "$PGBIN/postgres" ]; then
  apt-get update -qq >/dev/null
  DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >/dev/null
  PGBIN=$(pgbin)
fi
DIR=$(mktemp -d /tmp/chainproof-pg.XXXXXX)
chown postgres "$DIR"
su postgres -s /bin/sh -c "'$PGBIN/initdb' -D '$DIR/data' -A trust -U postgres >/dev/null"
su postgres -s /bin/sh -c "'$PGBIN/pg_ctl' -D '$DIR/data' -l '$DIR/log' -w \
  -o \"-p $PORT -k $DIR -c listen_addresses=127.0.0.1\" start >/dev/null"
echo "$DIR"
