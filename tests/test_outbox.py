"""The outbox worker against a real SQLite file and real receivers.

What must hold: a notification is accepted by its receiver exactly once however often it had to
be tried, with the same event id on every attempt; retries wait by exponential backoff with full
jitter (Brooker 2015, below); a dead or slow notifier neither blocks other notifiers' rows nor
holds the database; expiry gives up with the reason recorded; and a restart continues where the
last worker stopped, sending nothing twice (counted at the receiver).
"""

from __future__ import annotations

import json
import random
import threading
import time
from collections import Counter
from pathlib import Path

import pytest

from limitwatch import SAFETY_CAUTION
from limitwatch.alerts.lifecycle import AlertBook, AlertPolicy
from limitwatch.alerts.notifiers.base import Notifier
from limitwatch.alerts.notifiers.command import CommandNotifier
from limitwatch.alerts.notifiers.webhook import WebhookNotifier
from limitwatch.alerts.outbox import GAVE_UP, PARKED_AT, OutboxWorker, backoff_delay
from limitwatch.model import StreamSignal
from limitwatch.store import Store
from tests.receivers import WebhookReceiver
from tests.test_notifiers import payload

T0 = 1_900_000_000.0

BOTH_BACKENDS = True  # tests taking fresh_db run on SQLite and on PostgreSQL


def hook(receiver: WebhookReceiver, name: str = "ops-hook", **kw: float) -> WebhookNotifier:
    return WebhookNotifier(
        name, receiver.url, **{"connect_timeout_s": 1, "read_timeout_s": 2, **kw}
    )


def enqueue(store: Store, alert_id: int, route: str, *, now: float = T0, **kw: float) -> str:
    note = payload(alert_id=alert_id)
    store.enqueue_notification(
        f"{note['event_id']}:{route}", alert_id=None, route=route, payload=note, now=now, **kw
    )
    return note["event_id"]


def events(receiver: WebhookReceiver, *, accepted_only: bool = True) -> Counter[str]:
    got = receiver.accepted() if accepted_only else receiver.all()
    return Counter(r.headers["X-Limitwatch-Event"] for r in got)


def the_row(store: Store):
    (row,) = store.notifications()
    return row


# --------------------------------------------------------------------------- backoff


def test_backoff_is_full_jitter_with_base_5_s_and_a_15_minute_cap() -> None:
    # Brooker, "Exponential Backoff And Jitter" (AWS Architecture Blog, 2015), "Full Jitter":
    # sleep = random_between(0, min(cap, base * 2 ** attempt)).
    rng = random.Random(2024)
    for failures, ceiling in [(0, 5.0), (1, 10.0), (3, 40.0), (7, 640.0), (8, 900.0), (60, 900.0)]:
        draws = [backoff_delay(failures, rng) for _ in range(400)]
        assert all(0.0 <= d <= ceiling for d in draws)
        # Full jitter spreads over the whole interval (not "equal jitter", which stays above half).
        assert min(draws) < 0.05 * ceiling and max(draws) > 0.95 * ceiling


# --------------------------------------------------------------------------- retry and give-up


def test_503_twice_then_200_is_accepted_once_with_one_event_id(fresh_db: Store) -> None:
    with WebhookReceiver(statuses=[503, 503]) as rx:
        worker = OutboxWorker(fresh_db.path, {"ops-hook": hook(rx)}, rng=random.Random(3))
        event_id = enqueue(fresh_db, 12, "ops-hook")
        first = worker.run_once(T0)
        assert (first.retried, first.delivered) == (1, 0)
        row = the_row(fresh_db)
        assert row.attempts == 1 and "503" in (row.last_error or "")
        assert T0 <= row.next_attempt_at <= T0 + 5.0  # first backoff: U(0, 5 s)
        assert worker.run_once(row.next_attempt_at - 0.001).picked == 0  # not due yet
        t1 = row.next_attempt_at
        assert worker.run_once(t1).retried == 1
        row = the_row(fresh_db)
        assert row.attempts == 2 and t1 <= row.next_attempt_at <= t1 + 10.0  # U(0, 10 s)
        t2 = row.next_attempt_at
        assert worker.run_once(t2).delivered == 1
        assert the_row(fresh_db).delivered_at == t2
        assert worker.run_once(T0 + 86_400).picked == 0  # never offered again
        worker.close()
    statuses = [r.status for r in rx.all()]
    assert statuses == [503, 503, 200]
    assert events(rx, accepted_only=False) == Counter({event_id: 3})  # same id every attempt
    assert events(rx) == Counter({event_id: 1})
    assert len({r.body for r in rx.all()}) == 1  # the same body every attempt


def test_a_refusal_is_not_retried(fresh_db: Store) -> None:
    with WebhookReceiver(default=404) as rx:
        worker = OutboxWorker(fresh_db.path, {"ops-hook": hook(rx)})
        enqueue(fresh_db, 12, "ops-hook")
        assert worker.run_once(T0).gave_up == 1
        assert worker.run_once(T0 + 10**6).picked == 0
        worker.close()
    assert len(rx.all()) == 1
    row = the_row(fresh_db)
    assert row.delivered_at is None and row.next_attempt_at == PARKED_AT
    assert row.last_error.startswith(GAVE_UP) and "404" in row.last_error


def test_retries_stop_when_the_notification_expires(fresh_db: Store) -> None:
    with WebhookReceiver(default=503) as rx:
        worker = OutboxWorker(fresh_db.path, {"ops-hook": hook(rx)}, rng=random.Random(11))
        enqueue(fresh_db, 12, "ops-hook", expires_at=T0 + 60)
        now, passes = T0, 0
        while the_row(fresh_db).next_attempt_at != PARKED_AT:
            worker.run_once(now)
            passes += 1
            assert passes < 100, "never gave up"
            row = the_row(fresh_db)
            assert row.next_attempt_at < T0 + 60 or row.next_attempt_at == PARKED_AT
            now = row.next_attempt_at
        assert worker.run_once(T0 + 59.9).picked == 0
        worker.close()
    row = the_row(fresh_db)
    assert row.delivered_at is None
    assert row.last_error.startswith(GAVE_UP) and "expires at" in row.last_error
    assert "503" in row.last_error  # the last error is kept with the reason
    assert row.attempts == len(rx.all()) == passes >= 2


def test_rows_that_expired_while_the_service_was_down_are_recorded_not_sent(
    fresh_db: Store,
) -> None:
    with WebhookReceiver() as rx:
        worker = OutboxWorker(fresh_db.path, {"ops-hook": hook(rx)})
        enqueue(fresh_db, 12, "ops-hook", expires_at=T0 + 3600)
        report = worker.run_once(T0 + 7200)
        assert report.gave_up == 1 and report.picked == 0
        assert worker.run_once(T0 + 7300).rows == []  # recorded once
        worker.close()
    assert rx.all() == []
    row = the_row(fresh_db)
    assert row.attempts == 0 and row.next_attempt_at == PARKED_AT
    assert row.last_error.startswith(GAVE_UP + "expired at")


# --------------------------------------------------------------------------- isolation


class BuggyPlugin(Notifier):
    """A third-party notifier with a bug: it raises something other than DeliveryError."""

    def __init__(self) -> None:
        super().__init__("buggy")

    @classmethod
    def from_settings(cls, settings: object) -> BuggyPlugin:
        return cls()

    def deliver(self, notification: dict, *, event_id: str) -> None:
        raise KeyError(notification["no-such-field"])


def test_dead_notifiers_and_unknown_routes_do_not_block_other_rows(fresh_db: Store) -> None:
    with WebhookReceiver(delay_s=1.0) as slow, WebhookReceiver() as good:
        notifiers = {
            "slow-hook": hook(slow, "slow-hook", read_timeout_s=0.2),
            "good-hook": hook(good, "good-hook"),
            "buggy": BuggyPlugin(),
        }
        worker = OutboxWorker(fresh_db.path, notifiers, rng=random.Random(5))
        sent = []
        for i in range(1, 5):
            enqueue(fresh_db, i, "slow-hook")
            enqueue(fresh_db, i, "buggy")
            enqueue(fresh_db, i, "no-such-route")
            sent.append(enqueue(fresh_db, i, "good-hook"))
        report = worker.run_once(T0)
        assert Counter(r.result for r in report.rows) == Counter(
            {"delivered": 4, "retry": 8, "gave-up": 4}
        )
        assert events(good) == Counter(dict.fromkeys(sent, 1))
        # The slow notifier cost one timeout in this pass, not one per row.
        assert len(slow.all()) == 1
        worker.run_once(T0 + 10**5)
        assert len(slow.all()) == 2
        worker.close()
    rows = fresh_db.notifications()
    lost = [r for r in rows if r.route == "no-such-route"]
    assert all(r.last_error.startswith(GAVE_UP + "no notifier or route") for r in lost)
    assert all("good-hook" in r.last_error and "slow-hook" in r.last_error for r in lost)
    buggy = [r for r in rows if r.route == "buggy"]
    assert all(r.delivered_at is None and "KeyError" in r.last_error for r in buggy)
    assert sum("not tried" in (r.last_error or "") for r in rows if r.route == "slow-hook") == 3


def test_delivery_holds_no_database_lock_while_a_notifier_is_slow(tmp_path: Path) -> None:
    path = tmp_path / "plant.db"
    arrived = threading.Event()
    with (
        WebhookReceiver(delay_s=1.0, on_request=lambda r: arrived.set()) as rx,
        Store.open(path, now=0.0) as ingest,
    ):
        enqueue(ingest, 1, "ops-hook", now=time.time())
        worker = OutboxWorker(path, {"ops-hook": hook(rx, read_timeout_s=3)}, poll_interval_s=0.05)
        worker.start()
        try:
            assert arrived.wait(10), "the worker never delivered"
            # The worker is now waiting on the receiver. A batch commit with a short busy
            # timeout must still go through at once.
            with Store.open(path, busy_timeout_s=0.1) as other, other.transaction():
                other.add_dead_letter("line-4/csv", b"x,,", "no value column", now=time.time())
        finally:
            worker.stop()
    assert len(rx.all()) == 1
    with Store.open(path) as store:
        assert the_row(store).delivered_at is not None


# --------------------------------------------------------------------------- restart and wake


def test_a_new_worker_delivers_the_rest_after_a_stop_and_nothing_twice(tmp_path: Path) -> None:
    path = tmp_path / "plant.db"
    second = threading.Event()
    with WebhookReceiver(delay_s=0.15) as rx:
        rx.on_request = lambda r: second.set() if len(rx.all()) >= 2 else None
        with Store.open(path, now=0.0) as store:
            sent = [enqueue(store, i, "ops-hook", now=time.time()) for i in range(1, 7)]
        first = OutboxWorker(path, {"ops-hook": hook(rx)}, poll_interval_s=0.05)
        first.start()
        assert second.wait(10)
        first.stop()  # while the second delivery is in flight
        assert len(rx.all()) == 2
        with Store.open(path) as store:
            done = [r for r in store.notifications() if r.delivered_at is not None]
        assert len(done) == 2
        # A new process: new connection, new notifier object, same file.
        restarted = OutboxWorker(path, {"ops-hook": hook(rx)})
        assert restarted.run_once(time.time()).delivered == 4
        assert restarted.run_once(time.time() + 10**5).picked == 0
        restarted.close()
    assert events(rx, accepted_only=False) == Counter(dict.fromkeys(sent, 1))


def test_wake_starts_a_pass_without_waiting_for_the_poll(tmp_path: Path) -> None:
    path = tmp_path / "plant.db"
    arrived = threading.Event()
    with WebhookReceiver(on_request=lambda r: arrived.set()) as rx, Store.open(path) as store:
        worker = OutboxWorker(path, {"ops-hook": hook(rx)}, poll_interval_s=120)
        worker.start()
        try:
            time.sleep(0.1)  # let the first (empty) pass finish and the loop go to sleep
            enqueue(store, 1, "ops-hook", now=time.time())
            assert not arrived.wait(0.3)  # nothing happens on its own for two minutes ...
            worker.wake()
            assert arrived.wait(10)  # ... but a wake-up delivers at once
        finally:
            worker.stop()
        assert not worker.running


# --------------------------------------------------------------------------- routes


def test_route_rows_are_handed_on_one_row_per_notifier(fresh_db: Store, tmp_path: Path) -> None:
    log = tmp_path / "paged.txt"
    script = tmp_path / "page.sh"
    script.write_text(f'#!/bin/sh\ncat > /dev/null\necho "$LIMITWATCH_EVENT_ID" >> {log}\n')
    script.chmod(0o755)
    with WebhookReceiver(statuses=[503]) as rx:
        notifiers = {"hook-a": hook(rx, "hook-a"), "pager": CommandNotifier("pager", [str(script)])}
        routes = {"ops": ["hook-a", "pager"], "oncall": ["hook-a"]}
        worker = OutboxWorker(fresh_db.path, notifiers, routes=routes, rng=random.Random(1))
        # One event queued for two routes that share a notifier.
        event_id = enqueue(fresh_db, 12, "ops")
        enqueue(fresh_db, 12, "oncall")
        assert worker.run_once(T0).handed_on == 2
        keys = sorted(r.idempotency_key for r in fresh_db.notifications())
        assert keys == sorted(
            [f"{event_id}:ops", f"{event_id}:oncall", f"{event_id}:hook-a", f"{event_id}:pager"]
        )
        second = worker.run_once(T0)  # hook-a gets 503, the pager succeeds
        assert (second.retried, second.delivered) == (1, 1)
        assert worker.run_once(T0 + 10**4).delivered == 1  # only hook-a is tried again
        assert worker.run_once(T0 + 10**5).picked == 0
        worker.close()
    assert events(rx) == Counter({event_id: 1})
    assert log.read_text().split() == [event_id]  # the pager ran once, not once per retry
    assert all(r.delivered_at is not None for r in fresh_db.notifications())


def test_route_configuration_errors_are_caught_up_front(tmp_path: Path) -> None:
    n = {"hook-a": WebhookNotifier("hook-a", "http://127.0.0.1:9/x")}
    with pytest.raises(ValueError, match="unknown notifier"):
        OutboxWorker(tmp_path / "a.db", n, routes={"ops": ["hook-a", "hook-b"]})
    with pytest.raises(ValueError, match="both a route and a notifier"):
        OutboxWorker(tmp_path / "a.db", n, routes={"hook-a": ["hook-a"]})
    with pytest.raises(ValueError, match="names no notifiers"):
        OutboxWorker(tmp_path / "a.db", n, routes={"ops": []})
    with pytest.raises(ValueError, match="filed under a different name"):
        OutboxWorker(tmp_path / "a.db", {"other": n["hook-a"]})


def test_lifecycle_rows_reach_the_receiver_through_a_route(fresh_db: Store) -> None:
    signal = StreamSignal(
        stream="line-2/gearbox-temp", rule="beyond-limits", chart="x", side="upper", index=40,
        time=T0, value=91.0, involved=(40,), center=80.0, sigma=3.0, ucl=89.0, lcl=71.0,
        mr=11.0, mr_ucl=11.06, baseline_version=2,
    )  # fmt: skip
    book = AlertBook(fresh_db, AlertPolicy(route="default"))
    assert book.apply_signals([signal], now=T0).queued == 1
    with WebhookReceiver() as rx:
        worker = OutboxWorker(
            fresh_db.path, {"ops-hook": hook(rx)}, routes={"default": ["ops-hook"]}
        )
        worker.run_once(T0)
        worker.run_once(T0)
        worker.close()
    (got,) = rx.accepted()
    body = json.loads(got.body)
    assert got.headers["X-Limitwatch-Event"] == body["event_id"]
    assert body["stream"] == "line-2/gearbox-temp" and body["value"] == 91.0
    assert (body["lcl"], body["ucl"]) == (71.0, 89.0)
    assert body["caution"] == SAFETY_CAUTION


def test_worker_from_the_service_config_delivers_by_its_routes(tmp_path: Path) -> None:
    from limitwatch.config import config_from_dict

    log = tmp_path / "paged.txt"
    script = tmp_path / "page.sh"
    script.write_text(f'#!/bin/sh\ncat > /dev/null\necho "$LIMITWATCH_EVENT_ID" >> {log}\n')
    script.chmod(0o755)
    path = tmp_path / "plant.db"

    def signal(stream: str) -> StreamSignal:
        return StreamSignal(
            stream=stream, rule="beyond-limits", chart="x", side="upper", index=40, time=T0,
            value=91.0, involved=(40,), center=80.0, sigma=3.0, ucl=89.0, lcl=71.0, mr=11.0,
            mr_ucl=11.06, baseline_version=2,
        )  # fmt: skip

    with WebhookReceiver() as rx:
        config = config_from_dict(
            {
                "store": {"path": str(path)},
                "notifiers": [
                    {"type": "webhook", "name": "ops-hook", "url": rx.url, "read_timeout_s": 2},
                    {"type": "command", "name": "pager", "argv": [str(script)]},
                ],
                "routes": [
                    {"name": "kilns", "streams": "kiln-*", "notifiers": ["ops-hook"]},
                    {"name": "everything", "notifiers": ["pager"]},
                ],
            }
        )
        with Store.open(path, now=T0) as store:
            book = AlertBook(store, config.alert_policy())
            for stream in ("kiln-3/temp", "pack-2/downtime"):
                book.apply_signals([signal(stream)], now=T0)
            routes = Counter(r.route for r in store.notifications())
        assert routes == Counter({"ops-hook": 1, "pager": 2})
        worker = OutboxWorker.from_config(config)
        assert worker.run_once(T0).delivered == 3
        worker.close()
    (got,) = rx.accepted()
    assert json.loads(got.body)["stream"] == "kiln-3/temp"
    assert sorted(log.read_text().split()) == ["1:opened:0", "2:opened:0"]
