#!/usr/bin/env bash
# One command on a fresh machine: install watcher into ./.venv and run the built-in demo site.
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup-venv.sh
exec .venv/bin/watcher demo "$@"
