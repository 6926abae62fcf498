"""The alert tick on several workers sharing one store: each reminds the incidents of the streams
it owns, an incident that changes owner is reminded by the new one once, and the site-wide part
(a flood's end) happens once however many workers tick at the same moment.

Two :class:`AlertBook` s on two connections to one real SQLite file, and to one database of a
throwaway PostgreSQL cluster, stand for two workers; ``mine`` is what each worker's Kafka source
says it owns (:meth:`~limitwatch.ingest.kafka.source.KafkaSource.looks_after`, tested on its own
in ``test_service_kafka_mock.py``).
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from dataclasses import replace

import pytest

from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.model import Outcome, Reading, StreamSignal
from limitwatch.store import Store

T0 = 1_767_225_600.0
BOTH_BACKENDS = True  # fresh_db runs on SQLite and on PostgreSQL
POLICY = AlertPolicy(clear_after=3, repeat_every_s=600.0, escalate_after_s=None, flood_after=None)
A_STREAMS = ("kiln-1/temp", "kiln-2/temp")
B_STREAMS = ("press-1/force", "press-2/force")


def hit(t: float, stream: str) -> Outcome:
    """A monitoring reading at ``t`` beyond the upper limit."""
    signal = StreamSignal(
        stream=stream, rule="beyond-limits", chart="x", side="upper", index=int(t - T0), time=t,
        value=91.0, involved=(int(t - T0),), center=80.0, sigma=3.0, ucl=89.0, lcl=71.0,
        mr=11.0, mr_ucl=11.06, baseline_version=1,
    )
    return Outcome(
        reading=Reading(stream, t, 91.0), accepted=True, reason=None, index=int(t - T0),
        phase="monitoring", signals=(signal,),
    )


def owner_of(streams: set[str]) -> Callable[[str], bool]:
    return lambda stream: stream in streams


def reminder_keys(store: Store) -> list[str]:
    """(stream, reminder number) of every queued reminder, as idempotency keys without ids."""
    ids = {a.id: a.stream for a in store.alerts()}
    out = []
    for n in store.notifications():
        if n.payload["kind"] == "reminder":
            out.append(f"{ids[n.alert_id]}#{n.payload['number']}")
    return sorted(out)


def reminded_events(store: Store) -> dict[str, int]:
    """Stream -> how many ``reminded`` events its incident has."""
    return {
        a.stream: sum(e.kind == "reminded" for e in store.alert_events(a.id))
        for a in store.alerts()
    }


@pytest.fixture
def second(fresh_db: Store, request: pytest.FixtureRequest) -> Iterator[Callable[..., Store]]:
    """Opens another connection to ``fresh_db``'s database (another worker's), closed after
    the test unless ``keep`` (then the caller closes it, on its own thread)."""
    opened: list[Store] = []

    def open_another(keep: bool = False) -> Store:
        if fresh_db.backend == "postgresql":
            store = Store.open_postgresql(request.getfixturevalue("pg_url"))
        else:
            store = Store.open(fresh_db.path)
        if not keep:
            opened.append(store)
        return store

    yield open_another
    for store in opened:
        store.close()


def test_each_worker_reminds_its_own_streams_and_a_moved_stream_once_by_its_new_owner(
    fresh_db: Store, second: Callable[..., Store]
) -> None:
    book_a, book_b = AlertBook(fresh_db, POLICY), AlertBook(second(), POLICY)
    book_a.apply([hit(T0, s) for s in A_STREAMS], now=T0)
    book_b.apply([hit(T0, s) for s in B_STREAMS], now=T0)
    mine_a, mine_b = set(A_STREAMS), set(B_STREAMS)

    # Each reminds its own: two each, nothing twice, and again nothing on a second tick.
    assert book_a.tick(T0 + 600, owner_of(mine_a)).queued == 2
    assert book_b.tick(T0 + 600, owner_of(mine_b)).queued == 2
    assert book_a.tick(T0 + 601, owner_of(mine_a)).queued == 0
    assert book_b.tick(T0 + 601, owner_of(mine_b)).queued == 0
    assert reminder_keys(fresh_db) == sorted(f"{s}#1" for s in A_STREAMS + B_STREAMS)

    # kiln-2 moves to worker B (its partition was reassigned). In between, while neither owns
    # it (revoked here, not yet settled there), neither reminds it, though its reminder is due.
    moved = "kiln-2/temp"
    mine_a.discard(moved)
    assert book_a.tick(T0 + 1200, owner_of(mine_a)).queued == 1  # kiln-1 only
    assert book_b.tick(T0 + 1200, owner_of(mine_b)).queued == 2  # its own two
    assert f"{moved}#2" not in reminder_keys(fresh_db)
    mine_b.add(moved)
    assert book_a.tick(T0 + 1230, owner_of(mine_a)).queued == 0
    assert book_b.tick(T0 + 1230, owner_of(mine_b)).queued == 1  # the late one, by its new owner
    assert book_b.tick(T0 + 1231, owner_of(mine_b)).queued == 0
    assert book_a.tick(T0 + 1231, owner_of(mine_a)).queued == 0
    assert reminder_keys(fresh_db) == sorted(
        [f"{s}#{n}" for s in A_STREAMS + B_STREAMS for n in (1, 2)]
    )
    assert reminded_events(fresh_db) == {s: 2 for s in A_STREAMS + B_STREAMS}
    # And the next one falls due from the new owner's reminder, on the new owner only.
    assert book_b.tick(T0 + 1830, owner_of(mine_b)).queued == 3
    assert book_a.tick(T0 + 1830, owner_of(mine_a)).queued == 1
    assert reminded_events(fresh_db)[moved] == 3


def test_without_owners_a_tick_reminds_every_incident_as_a_lone_service_does(
    fresh_db: Store,
) -> None:
    book = AlertBook(fresh_db, POLICY)
    book.apply([hit(T0, s) for s in A_STREAMS + B_STREAMS], now=T0)
    assert book.tick(T0 + 600).queued == 4
    assert book.tick(T0 + 600, None).queued == 0


def test_two_ticks_at_once_end_a_flood_once_and_remind_once(
    fresh_db: Store, second: Callable[..., Store]
) -> None:
    """Two workers tick at the same moment, both over every incident (as before ticks had
    owners): the second waits for the first's commit, then finds nothing left to do."""
    policy = replace(POLICY, flood_after=2, flood_window_s=600.0)
    streams = [f"hall-b/pump-{i}" for i in range(5)]
    book_a = AlertBook(fresh_db, policy)
    book_a.apply([hit(T0 + i * 0.01, s) for i, s in enumerate(streams)], now=T0)
    assert [f.ended_at for f in fresh_db.floods()] == [None]

    reports: dict[str, object] = {}
    opened, go = threading.Event(), threading.Event()

    def tick_b() -> None:
        store = second(keep=True)  # SQLite: opened and closed on the thread that uses it
        try:
            book_b = AlertBook(store, policy)
            opened.set()
            go.wait(30)
            reports["b"] = book_b.tick(T0 + 700)
        finally:
            store.close()

    other = threading.Thread(target=tick_b)
    other.start()
    assert opened.wait(30)
    with fresh_db.transaction():  # worker A's tick, not yet committed
        reports["a"] = book_a.tick(T0 + 700)
        go.set()
        other.join(1.0)
        assert other.is_alive(), "the second tick should wait for the first one's commit"
    other.join(30)
    a, b = reports["a"], reports["b"]
    assert (a.flood_ended, a.queued) == (1, 5)  # type: ignore[attr-defined]
    assert (b.flood_ended, b.queued) == (0, 0)  # type: ignore[attr-defined]
    (flood,) = fresh_db.floods()
    assert flood.ended_at == T0 + 700
    assert reminded_events(fresh_db) == {s: 1 for s in streams}
