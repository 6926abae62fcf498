"""The service against a real Mosquitto broker on 127.0.0.1, through the real `limitwatch serve`.

Readings are JSON {"v": value, "t": epoch seconds, "seq": n} on plant/<line>/<sensor>/reading.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import threading
import time
from pathlib import Path

import numpy as np
import paho.mqtt.client as mqtt
import pytest

from limitwatch.config import load_config
from limitwatch.engine import StreamMonitor
from limitwatch.model import Reading
from tests.helpers import CLI
from tests.receivers import WebhookReceiver, make_ca
from tests.service_harness import (
    Publisher,
    ServiceProcess,
    checkpoints,
    count,
    mqtt_config,
    process_gone,
    query,
    wait_until,
)

pytestmark = pytest.mark.integration  # a real Mosquitto and `limitwatch serve` processes

T0 = 1_767_225_600.0  # 2026-01-01T00:00:00Z: in the past, as the service wants readings


def reading_messages(streams: list[str], n: int, seed: int = 3, wild_at: int | None = None):
    """Per stream: n readings one minute apart, seq 1..n; optionally one wild reading."""
    rng = np.random.default_rng(seed)
    per_stream = {}
    for s in streams:
        values = rng.normal(50.0, 1.0, n).round(3)
        if wild_at is not None:
            values[wild_at] = 58.0
        per_stream[s] = [
            (f"plant/{s}/reading", json.dumps({"v": float(v), "t": T0 + 60 * i, "seq": i + 1}))
            for i, v in enumerate(values)
        ]
    # interleave the streams as a gateway would
    return [m for group in zip(*per_stream.values(), strict=True) for m in group], per_stream


def service_up(svc: ServiceProcess) -> bool:
    return "connected to" in svc.logs()


def test_readings_over_mqtt_open_an_alert_that_reaches_a_webhook(broker, tmp_path):
    with WebhookReceiver() as hook:
        config = mqtt_config(tmp_path, broker.port, webhook_url=hook.url, rules="limits")
        svc = ServiceProcess(config).start()
        try:
            wait_until(lambda: service_up(svc), what="service connected")
            messages, _ = reading_messages(["line-1/bearing-temp"], 30, wild_at=25)
            # the first few with Debian's mosquitto_pub, as an integrator's script would
            for topic, payload in messages[:5]:
                broker.publish(topic, payload)
            pub = Publisher(broker.port)
            pub.send_all(messages[5:])
            pub.close()
            got = wait_until(hook.accepted, timeout=30, what="webhook delivery")
            db = tmp_path / "service.db"
            wait_until(lambda: count(db, "readings") == 30, what="30 readings committed")
        finally:
            assert svc.stop() == 0
    bodies = [json.loads(r.body) for r in got]
    hits = [b for b in bodies if b["rule"] == "beyond-limits"]
    assert hits, bodies
    alert = hits[0]
    assert alert["stream"] == "line-1/bearing-temp"
    assert alert["value"] == 58.0 and alert["kind"] == "opened"
    assert alert["ucl"] < 58.0
    assert "not a safety system" in alert["caution"]
    assert got[0].headers["X-Limitwatch-Event"] == alert["event_id"]


def test_kill_9_repeatedly_loses_nothing_and_applies_each_reading_once(broker, tmp_path):
    """Crash test: the service is killed with SIGKILL again and again while a publisher sends
    3,000 QoS 1 readings with sequence numbers. Afterwards every reading was applied exactly once:
    the committed state equals an uninterrupted replay, and no notification went out twice."""
    streams = ["line-1/bearing-temp", "line-2/bearing-temp", "line-3/motor-current"]
    messages, _ = reading_messages(streams, 1000, seed=9)
    # a few real shifts so alerts and notifications happen during the crashes
    shifted = []
    for topic, payload in messages:
        body = json.loads(payload)
        if body["seq"] in range(300, 340) or body["seq"] in range(700, 720):
            body["v"] = round(body["v"] + 4.0, 3)
        shifted.append((topic, json.dumps(body)))
    with WebhookReceiver() as hook:
        config = mqtt_config(tmp_path, broker.port, webhook_url=hook.url, batch_max=100)
        db = tmp_path / "service.db"
        svc = ServiceProcess(config).start()
        wait_until(lambda: service_up(svc), what="service connected")
        pub = Publisher(broker.port)
        sender = threading.Thread(
            target=pub.send_all, args=(shifted,), kwargs={"pause_every": 100, "pause_s": 0.25}
        )
        sender.start()  # about 8 s of steady publishing
        kills = 0
        while sender.is_alive() or kills < 3:
            before = count(db, "readings")
            # kill only once this process is connected and committing, i.e. mid-stream
            wait_until(
                lambda before=before: count(db, "readings") >= min(before + 50, 3000),
                timeout=60,
                what="readings flowing",
            )
            if count(db, "readings") >= 3000 and kills >= 3:
                break
            connection = svc.children()
            assert connection, "each MQTT source runs in a connection process"
            svc.kill()
            kills += 1
            # A killed service's connection process leaves too, or it would fight the next
            # service for the client id.
            for pid in connection:
                wait_until(lambda pid=pid: process_gone(pid), timeout=10, what=f"{pid} to exit")
            svc = ServiceProcess(config).start()
            wait_until(
                lambda svc=svc, kills=kills: svc.logs().count("connected to") > kills,
                what="reconnected",
            )
        sender.join()
        pub.close()
        wait_until(lambda: count(db, "readings") == 3000, timeout=90, what="all 3000 readings")
        wait_until(
            lambda: count(db, "outbox", "delivered_at IS NULL") == 0,
            timeout=30,
            what="outbox drained",
        )
        assert svc.stop() == 0
    assert kills >= 3
    # exactly once: every (stream, seq) once, and nothing refused except redeliveries
    assert query(db, "SELECT count(DISTINCT stream || ':' || seq) FROM readings")[0][0] == 3000
    reasons = {r[0].split(":")[0] for r in query(db, "SELECT reason FROM dead_letters")}
    assert reasons <= {"duplicate"}, reasons
    # final state equals an uninterrupted replay of the same readings
    settings = load_config(config)
    for stream in streams:
        monitor = StreamMonitor(stream, settings.stream_settings(stream).monitor_settings())
        for _, payload in [m for m in shifted if f"/{stream}/" in m[0]]:
            body = json.loads(payload)
            monitor.update(Reading(stream, body["t"], body["v"], seq=body["seq"]))
        assert checkpoints(db)[stream] == json.loads(json.dumps(monitor.state())), stream
    # Notifications: every event reached the receiver, none was invented, and a receiver that
    # honours the event id saw each one exactly once. A kill -9 landing in the milliseconds
    # between the receiver's 200 and the outbox recording it can repeat a delivery; the repeat
    # carries the same event id and body (at-least-once with a stable id; see the README).
    accepted = hook.accepted()
    ids = [r.headers["X-Limitwatch-Event"] for r in accepted]
    assert ids, "the shifts must have opened alerts"
    keys = {k.rsplit(":", 1)[0] for (k,) in query(db, "SELECT idempotency_key FROM outbox")}
    assert set(ids) == keys
    bodies: dict[str, bytes] = {}
    for r in accepted:
        event = r.headers["X-Limitwatch-Event"]
        assert json.loads(bodies.setdefault(event, r.body)) == json.loads(r.body)
    assert len(ids) - len(set(ids)) <= kills


def test_a_killed_connection_process_is_replaced_and_nothing_is_lost(broker, tmp_path):
    """The MQTT client runs in a connection process of its own. If that process dies, the
    service says so, starts a new one, and every reading still lands exactly once."""
    config = mqtt_config(tmp_path, broker.port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: service_up(svc), what="connected")
        messages, _ = reading_messages(["line-1/bearing-temp", "line-2/bearing-temp"], 300)
        pub = Publisher(broker.port)
        pub.send_all(messages[:200])
        wait_until(lambda: count(db, "readings") >= 100, what="first readings")
        (first,) = svc.children()
        os.kill(first, signal.SIGKILL)
        wait_until(lambda: "connection process exited unexpectedly" in svc.logs(), what="log")
        wait_until(lambda: svc.logs().count("connected to") >= 2, what="a new connection")
        pub.send_all(messages[200:])
        pub.close()
        wait_until(lambda: count(db, "readings") == 600, what="all 600 readings")
        assert svc.alive()
        (second,) = svc.children()
        assert second != first and process_gone(first)
        distinct = "SELECT count(DISTINCT stream || ':' || seq) FROM readings"
        assert query(db, distinct)[0][0] == 600
        reasons = {r[0].split(":")[0] for r in query(db, "SELECT reason FROM dead_letters")}
        assert reasons <= {"duplicate"}, reasons  # only what the broker sent again
    finally:
        assert svc.stop() == 0
    assert all(process_gone(pid) for pid in [first, second])


@pytest.mark.parametrize("sig", [signal.SIGTERM, signal.SIGINT])
def test_a_signal_to_the_whole_process_group_stops_the_service_cleanly(broker, tmp_path, sig):
    """systemd stops a unit by signalling all its processes, and Ctrl-C reaches the whole
    foreground group: the connection process must leave it to the service, which sends the
    last acknowledgements, says offline and exits 0, so nothing is delivered twice."""
    config = mqtt_config(tmp_path, broker.port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start(own_group=True)
    wait_until(lambda: service_up(svc), what="connected")
    messages, _ = reading_messages(["line-1/bearing-temp"], 60)
    pub = Publisher(broker.port)
    pub.send_all(messages)
    pub.close()
    wait_until(lambda: count(db, "readings") == 60, what="readings")
    connection = svc.children()
    assert svc.stop_group(sig) == 0
    assert "exited unexpectedly" not in svc.logs() and "Traceback" not in svc.logs()
    assert all(process_gone(pid) for pid in connection)
    again = ServiceProcess(config).start()
    try:
        wait_until(lambda: again.logs().count("connected to") >= 2, what="reconnected")
        time.sleep(1.0)  # anything the broker still held would arrive now
    finally:
        assert again.stop() == 0
    assert count(db, "readings") == 60 and count(db, "dead_letters") == 0


def test_a_second_service_on_the_same_database_is_refused_and_a_crash_leaves_no_lock(
    broker, tmp_path
):
    config = mqtt_config(tmp_path, broker.port)
    first = ServiceProcess(config).start()
    wait_until(lambda: service_up(first), what="first connected")
    pid = first.process.pid
    second = subprocess.run(
        [str(CLI), "serve", "--config", str(config)], capture_output=True, text=True, timeout=60
    )
    assert second.returncode == 1
    assert f"process {pid}" in second.stderr and "service.db" in second.stderr, second.stderr
    assert first.alive()
    first.kill()  # kill -9: the kernel drops the lock with the process
    third = ServiceProcess(config).start()
    try:
        wait_until(lambda: third.logs().count("connected to") >= 2, what="third connected")
    finally:
        assert third.stop() == 0


def test_broker_restart_while_running_loses_nothing(broker, tmp_path):
    config = mqtt_config(tmp_path, broker.port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: service_up(svc), what="service connected")
        messages, _ = reading_messages(["line-1/bearing-temp", "line-2/bearing-temp"], 200)
        pub = Publisher(broker.port)
        pub.send_all(messages[:200])
        pub.close()
        broker.restart()
        wait_until(lambda: svc.logs().count("connected to") >= 2, timeout=30, what="reconnect")
        pub = Publisher(broker.port, client_id="test-publisher-2")
        pub.send_all(messages[200:])
        pub.close()
        wait_until(lambda: count(db, "readings") == 400, timeout=60, what="all 400 readings")
        assert svc.alive()
    finally:
        assert svc.stop() == 0
    assert query(db, "SELECT count(DISTINCT stream || ':' || seq) FROM readings")[0][0] == 400


BAD = [
    (b"not json", "bad-json"),
    (json.dumps({"v": "hot", "t": T0 + 1, "seq": 1}).encode(), "not-a-number"),
    (b'{"v": NaN, "t": 1767225602, "seq": 2}', "not-finite"),
    (json.dumps({"t": T0 + 3, "seq": 3}).encode(), "missing-field"),
    (json.dumps({"v": 1.0, "t": "tuesday", "seq": 4}).encode(), "bad-time"),
    (json.dumps({"v": 1.0, "t": T0 + 5, "seq": -5}).encode(), "bad-seq"),
    (b"{" + b" " * 70_000 + b"}", "oversize"),
]


def test_every_kind_of_bad_payload_becomes_a_dead_letter_and_the_service_goes_on(broker, tmp_path):
    # A second source whose filter "plant/#" also matches the bare topic "plant", where "{#}"
    # is empty: that message maps to no stream (unmapped-topic).
    extra = f"""
[[sources]]
type = "mqtt"
name = "catch-all"
host = "127.0.0.1"
port = {broker.port}
client_id = "limitwatch-test-catch-all"
[[sources.topics]]
filter = "plant/#"
stream = "{{#}}"
payload = "number"
"""
    config = mqtt_config(tmp_path, broker.port, extra=extra)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    topic = "plant/line-1/temp/reading"

    def good(seq: int, t: float) -> str:
        return json.dumps({"v": 1.0 + seq / 10, "t": T0 + t, "seq": seq})

    try:
        wait_until(lambda: svc.logs().count("connected to") >= 2, what="both sources connected")
        pub = Publisher(broker.port)
        for payload, _ in BAD:
            pub.send(topic, payload).wait_for_publish(10)
        pub.send("plant", b"5").wait_for_publish(10)
        pub.send(topic, good(10, 10)).wait_for_publish(10)
        pub.send(topic, good(10, 10)).wait_for_publish(10)  # the same reading again
        pub.send(topic, good(11, 5)).wait_for_publish(10)  # back in time
        pub.send(topic, good(12, 20)).wait_for_publish(10)  # fine
        pub.close()
        wait_until(lambda: count(db, "readings", "stream = 'line-1/temp'") == 2, what="good ones")

        def reasons(source: str) -> set[str]:
            rows = query(db, "SELECT reason FROM dead_letters WHERE source = ?", (source,))
            return {r[0].split(":")[0] for r in rows}

        want = {reason for _, reason in BAD} | {"duplicate", "out-of-order"}
        wait_until(lambda: want <= reasons("gateway"), what=f"dead letters {want}")
        wait_until(lambda: "unmapped-topic" in reasons("catch-all"), what="unmapped topic")
        assert svc.alive()
    finally:
        assert svc.stop() == 0
    letters = query(db, "SELECT source, reason, payload FROM dead_letters WHERE source = 'gateway'")
    kept = [bytes(row[2]) for row in letters if row[1].startswith("bad-json")]
    assert kept and kept[0].endswith(b"not json") and kept[0].startswith(topic.encode())


def test_tls_with_the_right_ca_connects_and_the_wrong_ca_is_refused(broker, tmp_path):
    ca = make_ca(tmp_path / "ca")
    cert, key = ca.server_files(tmp_path / "ca")
    other = make_ca(tmp_path / "other", common_name="Some Other Root")
    broker.stop()
    broker.extra = [f"cafile {ca.cert_path}", f"certfile {cert}", f"keyfile {key}"]
    broker.start()
    good_dir, bad_dir = tmp_path / "good", tmp_path / "bad"
    good_dir.mkdir()
    bad_dir.mkdir()
    good = ServiceProcess(mqtt_config(good_dir, broker.port, tls_ca=ca.cert_path)).start()
    bad_config = mqtt_config(bad_dir, broker.port, tls_ca=other.cert_path)
    bad_config.write_text(bad_config.read_text().replace("limitwatch-test", "limitwatch-test-bad"))
    bad = ServiceProcess(bad_config).start()
    try:
        wait_until(lambda: service_up(good), what="TLS connection with the right CA")
        wait_until(lambda: "connection failed" in bad.logs(), what="the wrong CA refused")
        # readings published over TLS reach the service that trusts the broker's CA
        pub = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="tls-publisher")
        pub.tls_set(ca_certs=str(ca.cert_path))
        pub.connect("localhost", broker.port)
        pub.loop_start()
        messages, _ = reading_messages(["line-1/bearing-temp"], 5)
        for topic, payload in messages:
            pub.publish(topic, payload, qos=1).wait_for_publish(10)
        pub.disconnect()
        pub.loop_stop()
        wait_until(
            lambda: count(good_dir / "service.db", "readings") == 5, what="readings over TLS"
        )
        assert not service_up(bad)
        assert count(bad_dir / "service.db", "readings") == 0
        assert bad.alive(), "a refused connection is retried, not fatal"
    finally:
        assert good.stop() == 0
        assert bad.stop() == 0


def test_mqtt_311_persistent_session_keeps_readings_while_the_service_is_down(broker, tmp_path):
    config = mqtt_config(tmp_path, broker.port, protocol="3.1.1")
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    wait_until(lambda: service_up(svc), what="connected")
    assert svc.stop() == 0  # the session stays with the broker (clean session off)
    messages, _ = reading_messages(["line-9/flow"], 50)
    pub = Publisher(broker.port)
    pub.send_all(messages)
    pub.close()
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: count(db, "readings") == 50, timeout=30, what="readings kept by broker")
    finally:
        assert svc.stop() == 0


def test_metrics_and_health_endpoints(broker, tmp_path):
    import urllib.request

    from tests.broker import free_port

    port = free_port()
    config = mqtt_config(tmp_path, broker.port)
    config.write_text(
        config.read_text().replace(
            'batch_wait = "50ms"', f'batch_wait = "50ms"\nmetrics_listen = "127.0.0.1:{port}"'
        )
    )
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: service_up(svc), what="connected")
        messages, _ = reading_messages(["line-1/bearing-temp"], 25)
        pub = Publisher(broker.port)
        pub.send_all(messages)
        pub.close()
        wait_until(lambda: count(tmp_path / "service.db", "readings") == 25, what="readings")
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as reply:
            health = json.loads(reply.read())
            assert reply.status == 200
        assert health["status"] == "ok" and health["sources"] == {"gateway": True}
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as reply:
            text = reply.read().decode()
        assert 'limitwatch_readings_total{result="accepted"} 25.0' in text
        assert "limitwatch_batch_seconds_bucket" in text
        assert 'limitwatch_connection_restarts{source="gateway"} 0.0' in text
        assert "limitwatch_worker_last_round_seconds " in text
        broker.stop()

        def metrics_say_down() -> bool:  # /metrics alone: nobody asks /health meanwhile
            with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as reply:
                return 'limitwatch_source_connected{source="gateway"} 0.0' in reply.read().decode()

        wait_until(metrics_say_down, what="/metrics to show the source down")

        def degraded() -> bool:
            try:
                urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5)
            except urllib.error.HTTPError as exc:
                return exc.code == 503
            return False

        wait_until(degraded, what="health 503 while the broker is down")
    finally:
        assert svc.stop() == 0


def test_poison_messages_are_dead_letters_and_monitoring_goes_on_across_a_restart(
    broker, tmp_path
):
    """Each of these once ended the service, and, never acknowledged, came back after every
    restart (issue 11). Now each is a dead letter with its reason, the good readings around
    them are stored, the process stays up, and a restart does not see them again."""
    config = mqtt_config(tmp_path, broker.port, rules="limits")
    db = tmp_path / "service.db"
    topic = "plant/line-4/flow/reading"

    def reading(i: int, **change) -> str:
        return json.dumps({"v": 50.0 + (i % 3) * 0.5, "t": T0 + 60 * i, "seq": i, **change})

    poison = [
        (topic, b'{"v": ' + b"[" * 1000 + b"]" * 1000 + b"}", "bad-json"),  # RecursionError
        (topic, reading(21, seq="9" * 5000), "bad-seq"),  # the interpreter's digit limit
        (topic, reading(22, v=1e308), "off-scale"),  # z overflowed inside the detectors
        (topic, reading(23, t=253402300799), "in-the-future"),  # 9999-12-31 blinded the stream
        (f"plant/{'x' * 300}/flow/reading", reading(1), "bad-stream"),  # a 300-character id
    ]
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: service_up(svc), what="service connected")
        pub = Publisher(broker.port)
        pub.send_all([(topic, reading(i)) for i in range(1, 21)])  # learning: 20 readings
        pub.send_all([(t, p) for t, p, _ in poison])
        pub.send_all([(topic, reading(i)) for i in range(24, 30)])
        pub.close()
        wait_until(lambda: count(db, "readings") == 26, what="every good reading stored")
        letters = query(db, "SELECT reason FROM dead_letters")
        assert sorted(r[0].split(":")[0] for r in letters) == sorted(w for _, _, w in poison)
        assert svc.alive()
        phase = query(db, "SELECT phase FROM readings WHERE seq = 29")[0][0]
        assert phase == "monitoring", "the huge reading came after learning, and was refused"
    finally:
        assert svc.stop() == 0
    again = ServiceProcess(config).start()
    try:
        wait_until(lambda: again.logs().count("connected to") >= 2, what="reconnected")
        time.sleep(1.0)  # anything the broker still held would arrive now
        assert again.alive()
    finally:
        assert again.stop() == 0
    assert count(db, "dead_letters") == len(poison) and count(db, "readings") == 26
    assert "Traceback" not in svc.logs()


def _validate_body(body: dict) -> None:
    """Check a real body against the published schema (docs/notification.schema.json)."""
    import jsonschema

    schema_path = Path(__file__).parent.parent / "docs" / "notification.schema.json"
    schema = json.loads(schema_path.read_text(encoding="utf-8"))
    jsonschema.validate(body, schema, format_checker=jsonschema.FormatChecker())


def test_one_shift_is_one_incident_heard_from_opened_to_cleared(broker, tmp_path):
    # 25 in-control readings (20 learn the baseline), 10 shifted up by four sigma (several
    # Western Electric rules and the moving-range limit fire), then 25 back in control: the
    # receiver must hear one "opened" and, ten quiet readings later, one "cleared".
    rng = np.random.default_rng(11)
    values = np.concatenate(
        [rng.normal(50.0, 1.0, 25), rng.normal(54.0, 1.0, 10), rng.normal(50.0, 1.0, 25)]
    ).round(3)
    messages = [
        ("plant/line-1/bearing-temp/reading", json.dumps({"v": float(v), "t": T0 + 60 * i,
                                                          "seq": i + 1}))
        for i, v in enumerate(values)
    ]  # fmt: skip
    describe = (
        '[[streams]]\nmatch = "line-1/*"\ndescription = "bearing temperature, line 1 fan"\n'
        'unit = "degC"\n'
    )
    with WebhookReceiver() as hook:
        config = mqtt_config(tmp_path, broker.port, webhook_url=hook.url, extra=describe)
        svc = ServiceProcess(config).start()
        try:
            wait_until(lambda: service_up(svc), what="service connected")
            pub = Publisher(broker.port)
            pub.send_all(messages)
            pub.close()
            db = tmp_path / "service.db"
            wait_until(lambda: count(db, "readings") == len(values), what="readings committed")
            wait_until(lambda: len(hook.accepted()) >= 2, timeout=30, what="opened and cleared")
            time.sleep(2.0)  # any third notification would have arrived by now
            got = hook.accepted()
            rules = query(db, "SELECT rule FROM incident_rules")
        finally:
            assert svc.stop() == 0
    bodies = [json.loads(r.body) for r in got]
    assert [b["kind"] for b in bodies] == ["opened", "cleared"], bodies
    assert len({r[0] for r in rules}) >= 2  # several rules fired, and joined one incident
    opened, cleared = bodies
    assert opened["incident_id"] == cleared["incident_id"]
    assert opened["value"] > opened["ucl"] or opened["rule"] != "beyond-limits"
    assert (opened["unit"], opened["description"]) == ("degC", "bearing temperature, line 1 fan")
    assert "degC" in opened["text"] and "bearing temperature, line 1 fan" in opened["text"]
    assert f"limitwatch ack {opened['incident_id']}" in opened["text"]
    assert cleared["lasted_s"] > 0 and "it lasted" in cleared["text"]
    for body in bodies:
        _validate_body(body)
        assert "not a safety system" in body["text"]
    assert [r.headers["X-Limitwatch-Event"] for r in got] == [b["event_id"] for b in bodies]
