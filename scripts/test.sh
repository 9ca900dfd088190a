#!/usr/bin/env bash
# One command on a fresh machine: install what the tests need and run the whole suite.
# Exits non-zero when any check fails. Extra arguments go to pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
need() {  # need COMMAND PACKAGE WHY: install a Debian package when its command is missing
  if command -v "$1" >/dev/null 2>&1 || [ -x "/usr/sbin/$1" ]; then return; fi
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
    echo "test.sh: installing $2 ($3)"
    if [ -z "${APT_UPDATED:-}" ]; then apt-get update -qq; APT_UPDATED=1; fi
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "$2" >/dev/null
  else
    echo "test.sh: $1 is missing and cannot be installed here (need root and apt-get)" >&2
  fi
}
need mosquitto mosquitto "the MQTT tests start their own broker on loopback"
need chromium chromium "the weekly summary is rendered in headless Chromium"
need faketime faketime "the clock tests run watcher with its wall clock offset and stepped (libfaketime)"
if ! ls /usr/lib/postgresql/*/bin/initdb >/dev/null 2>&1; then  # Debian keeps the server off PATH
  need initdb postgresql "the PostgreSQL tests start their own server on loopback as an unprivileged user"
fi
bash scripts/setup-venv.sh test
.venv/bin/ruff check watcher tests bench
.venv/bin/lint-imports --no-cache
exec .venv/bin/python -m pytest "$@"
