#!/usr/bin/env bash
# Set up, then run every check: lint (ruff), types (mypy), and the test suite (pytest).
set -euo pipefail
cd "$(dirname "$0")/.."
bash scripts/setup.sh
# Tests that touch MQTT start their own broker process and use mosquitto_sub/pub as an independent
# client; install Debian's mosquitto and mosquitto-clients when they are missing.
if { ! command -v mosquitto >/dev/null 2>&1 && [ ! -x /usr/sbin/mosquitto ]; } || ! command -v mosquitto_sub >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto mosquitto-clients >/dev/null
  else
    sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto mosquitto-clients >/dev/null
  fi
fi
# The report test renders the HTML once in headless Chromium; install Debian's when it is missing.
if ! command -v chromium >/dev/null 2>&1 && [ ! -x /usr/bin/chromium ]; then
  if [ "$(id -u)" = 0 ]; then
    apt-get update -qq && DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
  else
    sudo apt-get update -qq && sudo DEBIAN_FRONTEND=noninteractive apt-get install -y -qq chromium >/dev/null
  fi
fi
.venv/bin/ruff check streamguard tests scripts benchmarks
.venv/bin/mypy
.venv/bin/python -m pytest -q "$@"
