#!/usr/bin/env bash
# Create .venv and install streamguard with its test tools. Idempotent: a second run is quick.
set -euo pipefail
cd "$(dirname "$0")/.."
PYTHON=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
  "$PYTHON" -m venv .venv
fi
stamp=.venv/.streamguard-installed
if [ ! -f "$stamp" ] || [ pyproject.toml -nt "$stamp" ]; then
  .venv/bin/python -m pip install --quiet --upgrade pip
  .venv/bin/python -m pip install --quiet -e ".[test]"
  touch "$stamp"
fi
