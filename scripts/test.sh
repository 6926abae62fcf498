#!/usr/bin/env bash
# Set up a virtual environment (if needed) and run the whole test suite.
# This is the one test command the README gives and the one CI runs.
#   bash scripts/test.sh                 everything (CI)
#   bash scripts/test.sh --fast [ARGS]   leave out tests marked integration or slow (a quick lane
#                                        for edit-test loops); other arguments go to pytest
set -euo pipefail
cd "$(dirname "$0")/.."

FAST=()
if [ "${1:-}" = "--fast" ]; then
    shift
    FAST=(-m "not integration and not slow")
    export HYPOTHESIS_PROFILE=fast  # fewer property-test examples (tests/conftest.py)
fi

PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
    "$PY" -m venv .venv
fi
.venv/bin/python -m pip install --quiet --upgrade pip
.venv/bin/python -m pip install --quiet -e '.[test,charts]'

# The integration tests start their own Mosquitto broker on 127.0.0.1 and publish with
# mosquitto_pub; install Debian's packages when they are missing and we are allowed to.
if ! command -v mosquitto >/dev/null 2>&1 || ! command -v mosquitto_pub >/dev/null 2>&1; then
    if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
        apt-get update -qq
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto mosquitto-clients >/dev/null
    else
        echo "note: mosquitto and mosquitto-clients are not installed; the MQTT tests will be skipped" >&2
        echo "      (Debian/Ubuntu: sudo apt-get install mosquitto mosquitto-clients)" >&2
    fi
fi

.venv/bin/ruff check src tests
.venv/bin/mypy  # over src/, configured in pyproject.toml
exec .venv/bin/pytest "${FAST[@]}" "$@"
