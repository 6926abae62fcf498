"""Shared fixtures.

``fresh_db`` comes first and stands alone: a real SQLite file per test, in the test's own
temporary directory, so store and lifecycle tests exercise the same WAL file the service uses.
"""

from collections.abc import Iterator
from pathlib import Path

import pytest

from limitwatch.store import Store


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
