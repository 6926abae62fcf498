"""A throwaway PostgreSQL cluster from Debian's packages, for the tests that need a real one.

One cluster per test session: ``initdb`` in a temporary folder, ``postgres`` listening on a free
127.0.0.1 port (and a unix socket in the same folder), removed at the end. ``initdb`` and
``postgres`` refuse to run as root, so as root they run as the ``postgres`` system user over a
folder handed to it; as anyone else they run as that user.

Each test gets a database of its own, copied from a template that already holds the schema, so a
test never sees another's rows and copying a small database is quick.

Use :func:`pg_cluster` (session) and :func:`new_database` (or the ``pg_url`` fixture in
``tests/conftest.py``). Without the binaries the fixtures skip with a message, except under
``CI=true``, where a missing PostgreSQL is a failure.
"""

from __future__ import annotations

import itertools
import os
import pwd
import shutil
import socket
import subprocess
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

from limitwatch.children import end_process

TEMPLATE = "limitwatch_template"


def _newest_debian_bin() -> Path:
    """Debian keeps each major version's server in /usr/lib/postgresql/<major>/bin."""
    found = sorted(
        Path("/usr/lib/postgresql").glob("*/bin/initdb"),
        key=lambda p: int(p.parent.parent.name) if p.parent.parent.name.isdigit() else 0,
    )
    return found[-1].parent if found else Path("/usr/lib/postgresql/15/bin")


PG_BIN = Path(os.environ.get("LIMITWATCH_PG_BIN") or _newest_debian_bin())


def pg_binaries() -> Path | None:
    """The folder holding ``initdb`` and ``postgres``, or None when PostgreSQL is missing."""
    if (PG_BIN / "initdb").is_file() and (PG_BIN / "postgres").is_file():
        return PG_BIN
    return None


def missing_postgresql() -> None:
    """Skip (or, under CI, fail) the test: there is no PostgreSQL to run it against."""
    message = (
        f"PostgreSQL is not installed (no initdb/postgres in {PG_BIN}); "
        "Debian/Ubuntu: apt-get install postgresql (scripts/test.sh does so as root)"
    )
    if os.environ.get("CI") == "true":
        pytest.fail(message)
    pytest.skip(message)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class Cluster:
    """A running cluster; ``url(db)`` names one of its databases for ``limitwatch``."""

    folder: Path
    port: int
    process: subprocess.Popen[bytes]
    user: str
    _names: itertools.count[int] = field(default_factory=lambda: itertools.count(1))

    def url(self, database: str = "postgres") -> str:
        return f"postgresql://{self.user}@127.0.0.1:{self.port}/{database}"

    def admin(self, sql: str) -> None:
        """Run one statement on the ``postgres`` database, outside a transaction."""
        import psycopg

        with psycopg.connect(self.url(), autocommit=True) as conn:
            conn.execute(sql)  # type: ignore[arg-type]  # a test's own literal statement

    def new_database(self, *, empty: bool = False) -> str:
        """A fresh database's URL: a copy of the migrated template, or an empty one."""
        name = f"t{next(self._names)}"
        template = "template0" if empty else TEMPLATE
        self.admin(f"CREATE DATABASE {name} TEMPLATE {template}")
        return self.url(name)

    def stop(self) -> None:
        end_process(self.process, grace_s=20)
        shutil.rmtree(self.folder, ignore_errors=True)


def _as_postgres(folder: Path) -> tuple[list[str], str]:
    """The command prefix that runs a PostgreSQL binary as an unprivileged user, and that
    user's name. As root: the ``postgres`` system user, owning ``folder``."""
    if os.geteuid() != 0:
        return [], pwd.getpwuid(os.geteuid()).pw_name
    try:
        entry = pwd.getpwnam("postgres")
    except KeyError:
        pytest.fail("running as root, and there is no 'postgres' user to run PostgreSQL as")
    os.chown(folder, entry.pw_uid, entry.pw_gid)
    runuser = shutil.which("runuser") or "/usr/sbin/runuser"
    return [runuser, "-u", "postgres", "--"], "postgres"


def start_cluster() -> Cluster:
    """initdb a cluster in a new temporary folder and start it on a free loopback port."""
    binaries = pg_binaries()
    if binaries is None:
        missing_postgresql()
    assert binaries is not None
    folder = Path(tempfile.mkdtemp(prefix="limitwatch-pg-"))
    folder.chmod(0o755)
    prefix, user = _as_postgres(folder)
    data = folder / "data"
    subprocess.run(
        [
            *prefix,
            str(binaries / "initdb"),
            "-D",
            str(data),
            "-U",
            user,
            "-A",
            "trust",
            "-E",
            "UTF8",
            "--locale=C",
            "--no-sync",
        ],
        check=True,
        capture_output=True,
        cwd=folder,  # the server user may not be allowed into the caller's folder
    )
    last_error = ""
    for _ in range(5):
        port = _free_port()
        log = open(folder / "postgres.log", "ab")  # noqa: SIM115 (kept open for the server's life)
        process = subprocess.Popen(
            [
                *prefix,
                str(binaries / "postgres"),
                "-D",
                str(data),
                "-p",
                str(port),
                "-h",
                "127.0.0.1",
                "-k",
                str(folder),
                "-c",
                "fsync=off",
                "-c",
                "synchronous_commit=off",
                "-c",
                "full_page_writes=off",
                "-c",
                "max_connections=200",
            ],
            stdout=log,
            stderr=subprocess.STDOUT,
            cwd=folder,
        )
        log.close()
        cluster = Cluster(folder, port, process, user)
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and process.poll() is None:
            try:
                cluster.admin("SELECT 1")
                _make_template(cluster)
                return cluster
            except Exception as exc:  # not accepting connections yet
                last_error = str(exc)
                time.sleep(0.1)
        process.kill()
        process.wait()
    text = (folder / "postgres.log").read_text(errors="replace")[-2000:]
    shutil.rmtree(folder, ignore_errors=True)
    raise RuntimeError(f"PostgreSQL did not start: {last_error}\n{text}")


def _make_template(cluster: Cluster) -> None:
    """The template every test database copies: limitwatch's schema, migrated once."""
    from limitwatch.store import open_store

    cluster.admin(f"CREATE DATABASE {TEMPLATE} TEMPLATE template0")
    open_store(cluster.url(TEMPLATE), now=0.0).close()
