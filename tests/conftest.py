"""Shared fixtures, and the ``integration`` marker put on tests that start a process or server.

``fresh_db`` comes first and stands alone: a real SQLite file per test, in the test's own
temporary directory, so store and lifecycle tests exercise the same WAL file the service uses.
"""

import dataclasses
import inspect
import os
import types
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from hypothesis import settings

from limitwatch.model import Reading
from limitwatch.stats.signal import Signal
from limitwatch.store import Store

# `scripts/test.sh --fast` sets HYPOTHESIS_PROFILE=fast: fewer examples for property tests that
# take hypothesis's default, for quick edit-test loops. The full run (CI) keeps the default 100;
# tests that choose their own max_examples keep it in both.
settings.register_profile("fast", max_examples=25)
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "default"))

# -- Readings and signals are read-only -----------------------------------------------------------
# Reading and Signal are plain (not frozen) slotted dataclasses because one is made per message
# (per signal) and a frozen one's __init__ cost three to five times as much. Throughout the tests
# each refuses a change after construction, so code that would change one fails here
# (tests/test_model.py checks it).


def _read_only(obj: Any, name: str, value: Any) -> None:
    try:
        getattr(obj, name)
    except AttributeError:  # not set yet: __init__, or unpickling
        object.__setattr__(obj, name, value)
        return
    kind = type(obj).__name__
    raise dataclasses.FrozenInstanceError(f"a {kind} is read-only: cannot assign to {name!r}")


def _no_delete(obj: Any, name: str) -> None:
    kind = type(obj).__name__
    raise dataclasses.FrozenInstanceError(f"a {kind} is read-only: cannot delete {name!r}")


for _kind in (Reading, Signal):
    _kind.__setattr__ = _read_only  # type: ignore[method-assign,assignment]
    _kind.__delattr__ = _no_delete  # type: ignore[method-assign,assignment]


@pytest.fixture
def fresh_db(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Store]:
    """A :class:`~limitwatch.store.Store` on a new file at ``tmp_path / "limitwatch.db"``; in a
    module that sets ``BOTH_BACKENDS = True`` also (as a second run of each test) on a new
    database of a throwaway PostgreSQL cluster (``tests/pg.py``)."""
    if getattr(request, "param", "sqlite") == "postgresql":
        store = Store.open_postgresql(request.getfixturevalue("pg_url"), now=0.0)
    else:
        store = Store.open(tmp_path / "limitwatch.db", now=0.0)
    try:
        yield store
    finally:
        store.close()


# -- a real PostgreSQL from Debian's packages ------------------------------------------------------

from tests.pg import Cluster, start_cluster  # noqa: E402


@pytest.fixture(scope="session")
def pg_cluster() -> Iterator[Cluster]:
    """One throwaway PostgreSQL cluster for the session (initdb in a temporary folder, a free
    127.0.0.1 port), removed at the end. Skips without PostgreSQL, fails under ``CI=true``."""
    cluster = start_cluster()
    try:
        yield cluster
    finally:
        cluster.stop()


@pytest.fixture
def pg_url(pg_cluster: Cluster) -> str:
    """The URL of a new database holding limitwatch's schema, for this test alone."""
    return pg_cluster.new_database()


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    """Run a store test on both backends where its module asks for it (``BOTH_BACKENDS``)."""
    if "fresh_db" not in metafunc.fixturenames:
        return
    if not getattr(metafunc.module, "BOTH_BACKENDS", False):
        return
    if metafunc.definition.get_closest_marker("sqlite_only") is not None:
        return
    metafunc.parametrize("fresh_db", ["sqlite", "postgresql"], indirect=True)


# -- a real Mosquitto broker on loopback -------------------------------------------------------

from tests.broker import Broker, mosquitto_path  # noqa: E402


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    """A fresh Mosquitto on a free 127.0.0.1 port, persistence on; stopped after the test.
    Skips only when mosquitto is not installed (scripts/test.sh installs it)."""
    if mosquitto_path() is None:
        pytest.skip("mosquitto is not installed")
    instance = Broker(tmp_path / "broker").start()
    try:
        yield instance
    finally:
        instance.stop()


# -- the integration marker, put on by what a test uses ---------------------------------------

INTEGRATION_FIXTURES = {"broker", "kafka_broker", "pg_cluster", "pg_url"}
"""Fixtures that start a process or a server: every test that uses one is an integration test."""

INTEGRATION_MODULES = (
    "subprocess",
    "multiprocessing",
    "http.server",
    "socketserver",
    "aiosmtpd",
    "tests.broker",
    "tests.kafka_broker",
    "tests.receivers",
    "tests.service_harness",
    "limitwatch.localbroker",
    "limitwatch.alerts.notifiers.command",
)
"""Modules whose use starts a process or a server (a real broker, ``limitwatch serve``, an HTTP or
SMTP receiver, the command notifier's child). A test or fixture that names anything from one is
marked ``integration``."""

INTEGRATION_NAMES = {"run_cli"}
"""Helpers that start a process but live in a module the fast tests share (tests.helpers)."""


def _starts_a_process_or_server(value: object) -> bool:
    if isinstance(value, types.ModuleType):
        module = value.__name__
    elif inspect.isfunction(value) or inspect.isclass(value):
        module = value.__module__ or ""  # None for classes made at run time (protobuf's)
        if value.__name__ in INTEGRATION_NAMES and module == "tests.helpers":
            return True
    else:
        return False
    return any(module == m or module.startswith(m + ".") for m in INTEGRATION_MODULES)


def _global_names(code: types.CodeType) -> Iterator[str]:
    """Global names a function uses, its nested functions and lambdas included."""
    yield from code.co_names
    for const in code.co_consts:
        if isinstance(const, types.CodeType):
            yield from _global_names(const)


def _uses_integration_parts(func: object, seen: set[object]) -> bool:
    func = inspect.unwrap(func)  # type: ignore[arg-type]
    if func in seen or not hasattr(func, "__code__") or not hasattr(func, "__globals__"):
        return False
    seen.add(func)
    scope = func.__globals__
    for name in _global_names(func.__code__):
        value = scope.get(name)
        if value is None:
            continue
        if _starts_a_process_or_server(value):
            return True
        # a helper function or class of the test's own module (never a library's)
        if getattr(value, "__module__", None) != func.__module__:
            continue
        if inspect.isfunction(value) and _uses_integration_parts(value, seen):
            return True
        if inspect.isclass(value) and value not in seen:
            seen.add(value)
            methods = [m for m in vars(value).values() if inspect.isfunction(m)]
            if any(_uses_integration_parts(m, seen) for m in methods):
                return True
    return False


@pytest.hookimpl(tryfirst=True)
def pytest_collection_modifyitems(items: list[pytest.Item]) -> None:
    """Mark ``integration`` every test that uses a broker, a receiver, the service harness or a
    subprocess, directly, through a fixture or through a helper in its own module, so that
    ``scripts/test.sh --fast`` (``-m "not integration and not slow"``) leaves it out without anyone
    remembering to mark it. Modules may also say ``pytestmark = pytest.mark.integration``."""
    for item in items:
        if item.get_closest_marker("integration") is not None:
            continue
        if not isinstance(item, pytest.Function):
            continue
        if INTEGRATION_FIXTURES & set(item.fixturenames):
            item.add_marker(pytest.mark.integration)
            continue
        callspec = getattr(item, "callspec", None)
        if callspec is not None and callspec.params.get("fresh_db") == "postgresql":
            item.add_marker(pytest.mark.integration)
            continue
        funcs: list[object] = [item.function]
        for defs in item._fixtureinfo.name2fixturedefs.values():
            funcs.extend(d.func for d in defs if d.baseid != "")
        seen: set[object] = set()
        if any(_uses_integration_parts(f, seen) for f in funcs):
            item.add_marker(pytest.mark.integration)


# -- a real Kafka-protocol broker (Tansu) on loopback ------------------------------------------


@pytest.fixture
def kafka_broker(tmp_path: Path) -> Iterator[Any]:
    """Tansu on a free 127.0.0.1 port; skips (fails under CI=true) without the binary."""
    from tests.kafka_broker import KafkaBroker

    instance = KafkaBroker(tmp_path / "kafka").start()
    try:
        yield instance
    finally:
        instance.stop()
