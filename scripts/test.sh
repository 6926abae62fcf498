#!/usr/bin/env bash
# Set up a virtual environment (if needed) and run the whole test suite.
# This is the one test command the README gives and the one CI runs.
#   bash scripts/test.sh                 everything (CI)
#   bash scripts/test.sh --fast [ARGS]   leave out tests marked integration or slow (a quick lane
#                                        for edit-test loops); other arguments go to pytest
set -euo pipefail
cd "$(dirname "$0")/.."

step() { printf '==> %s\n' "$*"; }

FAST=()
if [ "${1:-}" = "--fast" ]; then
    shift
    FAST=(-m "not integration and not slow")
    export HYPOTHESIS_PROFILE=fast  # fewer property-test examples (tests/conftest.py)
fi

PY=${PYTHON:-python3}
if [ ! -x .venv/bin/python ]; then
    if ! "$PY" -c 'import sys; sys.exit(sys.version_info < (3, 11))' 2>/dev/null; then
        echo "limitwatch needs Python 3.11 or newer; $PY is $("$PY" --version 2>&1 || echo missing)." >&2
        echo "Run with PYTHON=/path/to/python3.11 bash scripts/test.sh" >&2
        exit 1
    fi
    step "making .venv with $("$PY" --version 2>&1)"
    "$PY" -m venv .venv
else
    step "using .venv ($(.venv/bin/python --version 2>&1))"
fi
step "upgrading pip in .venv"
.venv/bin/python -m pip install --quiet --disable-pip-version-check --upgrade pip
step "installing limitwatch and its test and charts extras into .venv (a minute or two the first time)"
.venv/bin/python -m pip install --quiet --disable-pip-version-check -e '.[test,charts]'

# The integration tests start their own Mosquitto broker on 127.0.0.1 and publish with
# mosquitto_pub; install Debian's packages when they are missing and we are allowed to.
if ! command -v mosquitto >/dev/null 2>&1 || ! command -v mosquitto_pub >/dev/null 2>&1; then
    if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
        step "installing Debian's mosquitto and mosquitto-clients"
        apt-get update -qq
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq mosquitto mosquitto-clients >/dev/null
    else
        echo "note: mosquitto and mosquitto-clients are not installed; the MQTT tests will be skipped" >&2
        echo "      (Debian/Ubuntu: sudo apt-get install mosquitto mosquitto-clients)" >&2
    fi
else
    step "mosquitto is installed"
fi

# The PostgreSQL store tests initdb a throwaway cluster (tests/pg.py) with Debian's server
# binaries; the service never needs them unless a store URL names PostgreSQL.
if [ -n "${LIMITWATCH_PG_BIN:-}" ]; then PG_INITDB="$LIMITWATCH_PG_BIN/initdb"
else PG_INITDB="$(ls -d /usr/lib/postgresql/*/bin/initdb 2>/dev/null | sort -V | tail -n 1)"; fi
if [ ! -x "${PG_INITDB:-/nonexistent}" ]; then
    if [ "$(id -u)" = "0" ] && command -v apt-get >/dev/null 2>&1; then
        step "installing Debian's postgresql"
        apt-get update -qq
        DEBIAN_FRONTEND=noninteractive apt-get install -y -qq postgresql >/dev/null
    else
        echo "note: PostgreSQL is not installed (no initdb); its store tests will be skipped" >&2
        echo "      (Debian/Ubuntu: sudo apt-get install postgresql)" >&2
    fi
else
    step "postgresql is installed"
fi

step "ruff check"
.venv/bin/ruff check src tests
step "mypy over src/"
.venv/bin/mypy  # configured in pyproject.toml
if [ ${#FAST[@]} -gt 0 ]; then
    step "pytest, fast lane (no integration or slow tests)"
else
    step "pytest, everything"
fi
exec .venv/bin/pytest "${FAST[@]}" "$@"
