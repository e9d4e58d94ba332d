#!/usr/bin/env bash
# Makes sure Postgres server binaries (initdb, pg_ctl, postgres) and
# postgres_fdw are on this machine. Installs Debian's postgresql package when
# they are missing and we may (root or passwordless sudo); otherwise prints
# the exact command to run and fails.
set -euo pipefail

have_server() {
  local d
  if command -v initdb >/dev/null 2>&1 && command -v postgres >/dev/null 2>&1; then
    return 0
  fi
  for d in /usr/lib/postgresql/*/bin; do
    [[ -x $d/initdb && -x $d/postgres ]] && return 0
  done
  return 1
}

if have_server; then
  exit 0
fi

cmd="apt-get update && apt-get install -y --no-install-recommends postgresql postgresql-contrib"
echo "ensure-postgres: Postgres server binaries not found; installing Debian's postgresql package" >&2
if [[ $(id -u) == 0 ]]; then
  DEBIAN_FRONTEND=noninteractive bash -c "$cmd"
elif command -v sudo >/dev/null 2>&1 && sudo -n true 2>/dev/null; then
  sudo DEBIAN_FRONTEND=noninteractive bash -c "$cmd"
else
  echo "ensure-postgres: cannot install as $(id -un). Run as root:" >&2
  echo "  $cmd" >&2
  exit 1
fi
have_server || { echo "ensure-postgres: install finished but initdb is still missing" >&2; exit 1; }
