"""Are notifications getting through? The outbox against a real local webhook receiver and a
real SQLite file: one WARNING when a notifier starts failing and one when it recovers (not a line
per row per attempt), per-notifier series on /metrics, and /health of the real service turning
degraded when a notifier has failed for longer than ``notifier_failing_after``."""

from __future__ import annotations

import json
import logging
import random
import socket
import urllib.error
import urllib.request

from prometheus_client import CollectorRegistry, generate_latest

from limitwatch.alerts.delivery_watch import DeliveryCollector
from limitwatch.alerts.outbox import OutboxWorker
from limitwatch.store import Store
from tests.helpers import run_cli
from tests.receivers import WebhookReceiver
from tests.service_harness import ServiceProcess, wait_until
from tests.test_outbox import T0, enqueue, hook
from tests.test_service_files import file_config, write_rows


def metric(text: str, name: str, notifier: str) -> float:
    for line in text.splitlines():
        if line.startswith(f'{name}{{notifier="{notifier}"}} '):
            return float(line.split()[-1])
    raise AssertionError(f"no {name} for {notifier} in:\n{text}")


def test_an_outage_logs_twice_and_shows_on_metrics(fresh_db: Store, caplog) -> None:
    with WebhookReceiver(statuses=[503] * 40) as rx:
        worker = OutboxWorker(fresh_db.path, {"ops-hook": hook(rx)}, rng=random.Random(5))
        registry = CollectorRegistry()
        now = [T0]
        registry.register(DeliveryCollector(worker.watch, lambda: now[0]))
        for alert_id in range(1, 11):
            enqueue(fresh_db, alert_id, "ops-hook", now=T0)
        with caplog.at_level(logging.DEBUG, logger="limitwatch"):
            for step in range(8):  # eight passes through the outage, every row due each time
                now[0] = T0 + 1000.0 * step
                fresh_db.db.execute("UPDATE outbox SET next_attempt_at = ?", (now[0],))
                worker.deliver_due(now[0])
            text = generate_latest(registry).decode()
            assert metric(text, "limitwatch_notifications_pending", "ops-hook") == 10
            assert metric(text, "limitwatch_notification_failed_attempts_total", "ops-hook") == 8
            assert metric(text, "limitwatch_notification_oldest_pending_seconds", "ops-hook") == (
                7000.0
            )
            assert metric(text, "limitwatch_notifier_failing", "ops-hook") == 1
            assert worker.watch.failing_longer_than(3600.0, now[0]) == ["ops-hook"]
            rx.statuses.clear()  # the receiver is back
            now[0] += 1000.0
            fresh_db.db.execute("UPDATE outbox SET next_attempt_at = ?", (now[0],))
            worker.deliver_due(now[0])
        worker.close()
    text = generate_latest(registry).decode()
    assert metric(text, "limitwatch_notifications_delivered_total", "ops-hook") == 10
    assert metric(text, "limitwatch_notifications_pending", "ops-hook") == 0
    assert metric(text, "limitwatch_notifier_failing", "ops-hook") == 0
    loud = [r.getMessage() for r in caplog.records if r.levelno >= logging.INFO]
    assert len(loud) == 2, loud
    assert loud[0].startswith("notifier ops-hook is failing: ")
    assert loud[1].startswith("notifier ops-hook delivers again after 2h13m20s of failures")
    assert "8 failed attempt(s)" in loud[1]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def get_health(port: int) -> tuple[int, dict]:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as r:
            return r.status, json.loads(r.read())
    except urllib.error.HTTPError as exc:
        return exc.code, json.loads(exc.read())
    except urllib.error.URLError:
        return 0, {}  # not listening yet


def test_health_turns_degraded_when_a_notifier_fails_too_long(tmp_path) -> None:
    port, dead = free_port(), free_port()  # nothing listens on the webhook's port
    extra = f"""
[[notifiers]]
name = "ops-hook"
type = "webhook"
url = "http://127.0.0.1:{dead}/hook"
connect_timeout_s = 1

[[routes]]
name = "all"
notifiers = ["ops-hook"]
"""
    config = file_config(tmp_path, extra=extra)
    text = config.read_text().replace(
        "[service]\n", f'[service]\nmetrics_listen = "127.0.0.1:{port}"\n'
        'notifier_failing_after = "2s"\n'
    )
    config.write_text(text)
    t0 = 1_767_225_600.0  # 2026-01-01: in the past, as the service wants readings
    rows = [(t0 + 60 * i, "press-1/cycle-time", 20.0 + (i % 5) * 0.5) for i in range(25)]
    rows.append((t0 + 60 * 25, "press-1/cycle-time", 90.0))  # beyond the limits: an alert
    write_rows(tmp_path / "data" / "export.csv", rows)
    svc = ServiceProcess(config).start()
    try:
        wait_until(
            lambda: get_health(port)[1].get("notifiers", {}).get("ops-hook", {}).get("state")
            == "failing",
            timeout=60,
            what="the webhook failing",
        )
        _, body = get_health(port)
        assert body["notifiers"]["ops-hook"]["pending"] >= 1
        assert body["notifiers"]["ops-hook"]["failing_since"].endswith("Z")
        assert body["last_commit"].startswith("20") and body["last_commit"].endswith("Z")
        wait_until(lambda: get_health(port)[0] == 503, timeout=30, what="/health degraded")
        _, body = get_health(port)
        assert body["status"] == "degraded" and body["notifiers_failing_too_long"] == ["ops-hook"]
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as r:
            metrics = r.read().decode()
        assert metric(metrics, "limitwatch_notifications_pending", "ops-hook") >= 1
        assert metric(metrics, "limitwatch_notification_failed_attempts_total", "ops-hook") >= 1
    finally:
        assert svc.stop() == 0
    assert svc.logs().count("notifier ops-hook is failing") == 1


def test_the_notifications_command_answers_per_notifier(tmp_path) -> None:
    now = __import__("time").time()
    db = tmp_path / "lw.db"
    with (
        Store.open(db, now=now) as store,
        WebhookReceiver(statuses=[503, 503]) as down,
        WebhookReceiver() as up,
        WebhookReceiver(statuses=[400]) as refusing,
    ):
        notifiers = {
            "ops-hook": hook(down),
            "pager": hook(up, "pager"),
            "picky": hook(refusing, "picky"),
        }
        worker = OutboxWorker(db, notifiers, rng=random.Random(1))
        for alert_id in (1, 2):
            for route in notifiers:
                enqueue(store, alert_id, route, now=now - 600)
        worker.deliver_due(now - 300)  # ops-hook fails (503), pager delivers, picky 400 once
        worker.close()
    result = run_cli("notifications", "--db", str(db))
    assert result.returncode == 0, result.stderr
    lines = {line.split()[0]: line.split() for line in result.stdout.splitlines() if line}
    # notifier, delivered, waiting, failed tries, given up
    assert lines["ops-hook"][1:5] == ["0", "2", "2", "0"]  # one 503, one not tried
    assert lines["pager"][1:5] == ["2", "0", "0", "0"]
    assert lines["picky"][1:5] == ["1", "0", "1", "1"]  # 400: given up at once; then 200
    assert "ops-hook: last error:" in result.stdout and "503" in result.stdout
    data = json.loads(
        run_cli(
            "notifications", "--db", str(db), "--state", "given-up", "--format", "json"
        ).stdout
    )
    picky = next(s for s in data["notifiers"] if s["notifier"] == "picky")
    assert picky["given_up"] == 1 and picky["delivered"] == 1
    ops = next(s for s in data["notifiers"] if s["notifier"] == "ops-hook")
    assert ops["oldest_waiting_at"].endswith("Z") and ops["oldest_waiting_age_s"] >= 600
    assert [n["notifier"] for n in data["notifications"]] == ["picky"]
    assert data["notifications"][0]["state"] == "given-up"
