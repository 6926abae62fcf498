"""Shared fixtures.

``fresh_db`` comes first and stands alone: a real SQLite file per test, in the test's own
temporary directory, so store and lifecycle tests exercise the same WAL file the service uses.
"""

import dataclasses
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from limitwatch.model import Reading
from limitwatch.stats.signal import Signal
from limitwatch.store import Store

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
def fresh_db(tmp_path: Path) -> Iterator[Store]:
    """A :class:`~limitwatch.store.Store` on a new file at ``tmp_path / "limitwatch.db"``."""
    store = Store.open(tmp_path / "limitwatch.db", now=0.0)
    try:
        yield store
    finally:
        store.close()


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
