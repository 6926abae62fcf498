"""Which store the cluster bench's workers share, made empty for every run.

Why empty each run: a rate counted as "readings in the store" needs a store that held none, and
a failover figure needs partitions nobody owned yet. On SQLite that is a new file in the run's
own folder. On PostgreSQL the bench is given a database of its own and refuses one that holds
anything, so it can never mix its rows with a site's; inside it, each run gets a scratch schema
(``limitwatch_bench_<pid>_<n>``) that the workers reach through ``search_path`` in their store
URL, dropped when the run ends. The bench drops only schemas it made in this process, never
anything it found.

>>> bench_store(None).backend, bench_store("sqlite").backend
('sqlite', 'sqlite')
>>> bench_store("postgresql://bench@127.0.0.1:5432/scratch").backend
'postgresql'
"""

from __future__ import annotations

import contextlib
import itertools
import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import parse_qsl, quote, urlsplit, urlunsplit

from limitwatch.store import is_postgresql
from limitwatch.store.location import redacted

SCHEMA_PREFIX = "limitwatch_bench_"
_runs = itertools.count(1)


class BenchStoreRefused(ValueError):
    """The store given to the cluster bench cannot be used; the message says why and what to
    give instead."""


@dataclass(frozen=True)
class BenchStore:
    """``url`` None: a new SQLite file per run; else an empty PostgreSQL database."""

    url: str | None = None

    @property
    def backend(self) -> str:
        return "sqlite" if self.url is None else "postgresql"

    def check_ready(self) -> None:
        """Refuse a PostgreSQL database that holds anything, before any run starts."""
        if self.url is None:
            return
        with _admin(self.url) as conn:
            found = conn.execute(
                """SELECT n.nspname || '.' || c.relname FROM pg_class c
                   JOIN pg_namespace n ON n.oid = c.relnamespace
                   WHERE n.nspname NOT IN ('pg_catalog', 'information_schema')
                     AND c.relkind NOT IN ('i', 'I')
                     AND n.nspname NOT LIKE 'pg\\_toast%' AND n.nspname NOT LIKE 'pg\\_temp%'
                   UNION ALL
                   SELECT nspname FROM pg_namespace
                   WHERE nspname NOT IN ('public', 'information_schema')
                     AND nspname NOT LIKE 'pg\\_%'
                   LIMIT 6"""
            ).fetchall()
        if found:
            names = ", ".join(str(r[0]) for r in found[:5])
            leftover = all(str(r[0]).startswith(SCHEMA_PREFIX) for r in found)
            hint = (
                " (schemas an interrupted bench left behind: drop them yourself once you "
                "are sure nothing else uses them)"
                if leftover
                else ""
            )
            raise BenchStoreRefused(
                f"{redacted(self.url)} is not empty: it holds {names}{hint}. The cluster bench "
                "needs a database of its own (e.g. CREATE DATABASE limitwatch_bench), so that "
                "it never touches data it did not make; it creates and drops a scratch schema "
                "per run inside it"
            )

    def describe(self) -> str:
        """The store as the figure's conditions name it."""
        if self.url is None:
            return "one SQLite file (WAL) shared by the workers, a new file per run"
        with _admin(self.url) as conn:
            version, fsync, sync = (
                str(conn.execute(f"SHOW {name}").fetchone()[0])
                for name in ("server_version", "fsync", "synchronous_commit")
            )
        return (
            f"PostgreSQL {version} at {redacted(self.url)} (fsync {fsync}, synchronous_commit "
            f"{sync}) shared by the workers, a new scratch schema per run"
        )

    @contextlib.contextmanager
    def fresh(self, folder: Path) -> Iterator[str]:
        """An empty store for one run: what the workers' ``[store] path`` names."""
        if self.url is None:
            path = folder / "bench.db"
            if path.exists():
                raise BenchStoreRefused(f"{path} exists already; the bench needs a new folder")
            yield str(path)
            return
        schema = f"{SCHEMA_PREFIX}{os.getpid()}_{next(_runs)}"
        with _admin(self.url) as conn:
            conn.execute(f'CREATE SCHEMA "{schema}"')
        try:
            yield with_search_path(self.url, schema)
        finally:
            with _admin(self.url) as conn:
                conn.execute(f'DROP SCHEMA "{schema}" CASCADE')


def bench_store(text: str | None) -> BenchStore:
    """Read ``--store``: left out or ``sqlite`` (a new file per run in the bench's folder), or
    the ``postgresql://`` URL of an empty database. Checks the text only; :meth:`BenchStore.
    check_ready` looks inside the database."""
    if text is None or text.strip().lower() == "sqlite":
        return BenchStore()
    if not is_postgresql(text):
        raise BenchStoreRefused(
            f"{text!r} is no store the cluster bench can use: leave --store out (or give "
            "'sqlite') for a new SQLite file per run in the bench's own folder, or give "
            "postgresql://user@host:port/database naming an empty database"
        )
    try:
        parts = urlsplit(text)
        password = parts.password
        _ = parts.port
    except ValueError as exc:
        raise BenchStoreRefused(f"{text!r} is not a usable URL ({exc})") from None
    if password is not None:
        raise BenchStoreRefused(
            "the URL carries a password, which would be written into the workers' config "
            "files; put it in PGPASSWORD or ~/.pgpass instead (the workers inherit both)"
        )
    if not parts.path.strip("/"):
        raise BenchStoreRefused(
            f"{text!r} names no database: add /database, an empty one made for the bench"
        )
    if any(key == "options" for key, _value in parse_qsl(parts.query)):
        raise BenchStoreRefused(
            f"{redacted(text)} sets options; the bench sets them itself (search_path to its "
            "scratch schema): leave them out"
        )
    return BenchStore(text)


def with_search_path(url: str, schema: str) -> str:
    """``url`` with libpq's ``options`` putting ``schema`` first on the search path.

    >>> with_search_path("postgresql://u@h/db?sslmode=disable", "s1")
    'postgresql://u@h/db?sslmode=disable&options=-csearch_path%3Ds1'
    """
    parts = urlsplit(url)
    option = "options=" + quote(f"-csearch_path={schema}", safe="-_")
    query = f"{parts.query}&{option}" if parts.query else option
    return urlunsplit(parts._replace(query=query))


@contextlib.contextmanager
def _admin(url: str) -> Iterator[Any]:
    """A short autocommit connection for the bench's own checks and schema work."""
    try:
        import psycopg
    except ImportError:
        raise BenchStoreRefused(
            "psycopg is not installed: pip install 'limitwatch[postgresql]'"
        ) from None
    try:
        conn = psycopg.connect(url, autocommit=True, connect_timeout=10)
    except psycopg.Error as exc:
        words = " ".join(str(exc).split())
        raise BenchStoreRefused(f"cannot connect to {redacted(url)} ({words})") from None
    with conn:
        try:
            yield conn
        except psycopg.Error as exc:
            words = " ".join(str(exc).split())
            raise BenchStoreRefused(
                f"{redacted(url)} refused the bench's work ({words}); its user needs CREATE "
                "on the database to make its scratch schemas"
            ) from None
