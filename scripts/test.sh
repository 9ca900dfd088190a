#!/usr/bin/env bash
# One command on a fresh machine: install what the tests need and run the whole suite.
# Exits non-zero when any check fails. Extra arguments go to pytest.
set -euo pipefail
cd "$(dirname "$0")/.."
if ! command -v mosquitto >/dev/null 2>&1 && [ ! -x /usr/sbin/mosquitto ]; then
  if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
    echo "test.sh: installing mosquitto (the MQTT tests start their own broker on loopback)"
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto >/dev/null
  else
    echo "test.sh: mosquitto is missing and cannot be installed here (need root and apt-get)" >&2
  fi
fi
bash scripts/setup-venv.sh test
.venv/bin/ruff check watcher tests bench
exec .venv/bin/python -m pytest "$@"
