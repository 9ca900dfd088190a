#!/usr/bin/env bash
# Create ./.venv if needed and install watcher into it (with extras given as $1, e.g. "test").
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  "$PY" -m venv .venv
fi
extras=${1:-}
spec="."
[ -n "$extras" ] && spec=".[$extras]"
.venv/bin/python -m pip install --quiet --disable-pip-version-check -e "$spec"
