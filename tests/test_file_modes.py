"""The files the service writes are its own: database, WAL, shared memory and lock are created
0600 under the usual 022 umask; and a missing database folder is a clear error, not a traceback."""

from __future__ import annotations

import os
import stat
from collections.abc import Iterator
from pathlib import Path

import pytest

from limitwatch.instance import InstanceLock, LockError
from limitwatch.store import Store
from tests.helpers import run_cli


@pytest.fixture
def usual_umask() -> Iterator[None]:
    old = os.umask(0o022)
    try:
        yield
    finally:
        os.umask(old)


def mode(path: Path) -> int:
    return stat.S_IMODE(path.stat().st_mode)


def test_database_wal_shm_and_lock_are_created_owner_only(tmp_path: Path, usual_umask) -> None:
    db = tmp_path / "plant.db"
    lock = InstanceLock(db)
    lock.acquire()
    try:
        with Store.open(db, now=1_900_000_000.0) as store:
            store.db.execute("CREATE TABLE probe (x)")  # a write, so the WAL exists
            files = [db, Path(f"{db}-wal"), Path(f"{db}-shm"), Path(f"{db}.lock")]
            assert all(f.exists() for f in files)
            assert {f.name: oct(mode(f)) for f in files} == {f.name: "0o600" for f in files}
    finally:
        lock.release()


def test_an_existing_database_keeps_the_mode_its_owner_gave_it(tmp_path: Path, usual_umask):
    db = tmp_path / "plant.db"
    Store.open(db, now=1_900_000_000.0).close()
    db.chmod(0o640)  # a site that chose group read
    Store.open(db, now=1_900_000_000.0).close()
    assert mode(db) == 0o640


def test_the_lock_names_a_missing_database_folder(tmp_path: Path) -> None:
    missing = tmp_path / "no-such-folder"
    with pytest.raises(LockError, match=str(missing)):
        InstanceLock(missing / "plant.db").acquire()
    assert not missing.exists()


def test_serve_with_a_missing_database_folder_says_so_without_a_traceback(tmp_path: Path) -> None:
    missing = tmp_path / "var" / "lib" / "limitwatch"
    config = tmp_path / "site.toml"
    config.write_text(f'[store]\npath = "{missing / "plant.db"}"\n')
    done = run_cli("serve", "--config", str(config))
    assert done.returncode == 1
    assert "Traceback" not in done.stderr
    assert f"the database folder {missing} does not exist" in done.stderr
