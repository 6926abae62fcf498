"""The Sparkplug B source through the real service, a real Mosquitto and the package's edge
node simulator (limitwatch.ingest.sparkplug.simulate) publishing real protobuf births, data by
alias, a seq gap, an unknown alias, deaths of nodes and devices, and rebirths."""

from __future__ import annotations

import json
import random
import threading
import time
import urllib.error
import urllib.request
from pathlib import Path

import paho.mqtt.client as mqtt
import pytest

from limitwatch.config import load_config
from limitwatch.ingest.sparkplug.simulate import EdgeNode
from tests.broker import free_port
from tests.receivers import WebhookReceiver
from tests.service_harness import ServiceProcess, count, process_gone, query, wait_until

pytestmark = pytest.mark.integration

T0 = int((time.time() - 86_400) * 1000)  # yesterday, in ms: readings are never in the future
METRICS = {"oil/temp": 1, "ram/force": 2}


def sparkplug_config(
    folder: Path, port: int, health_port: int | None = None, extra: str = ""
) -> Path:
    listen = f'metrics_listen = "127.0.0.1:{health_port}"\n' if health_port else ""
    path = folder / "site.toml"
    path.write_text(
        f"""
[store]
path = "service.db"

[service]
batch_wait = "50ms"
{listen}
[defaults]
learn_count = 10

[[sources]]
type = "sparkplug"
name = "presses"
host = "127.0.0.1"
port = {port}
client_id = "limitwatch-host"
host_id = "limitwatch-test"
edge_nodes = ["plant-a/press-1"]
rebirth_every = "200ms"
reconnect_min_s = 1
reconnect_max_s = 2
{extra}"""
    )
    return path


def hooked_service(folder: Path, port: int, hook: WebhookReceiver) -> ServiceProcess:
    """The service with its notices going to ``hook``."""
    extra = (
        f'\n[[notifiers]]\nname = "ops-hook"\ntype = "webhook"\nurl = "{hook.url}"\n'
        "connect_timeout_s = 2\nread_timeout_s = 5\n"
    )
    return ServiceProcess(sparkplug_config(folder, port, extra=extra)).start()


def health(port: int) -> dict:
    try:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/health", timeout=5) as answer:
            return json.loads(answer.read())
    except urllib.error.HTTPError as exc:
        return json.loads(exc.read())
    except urllib.error.URLError:
        return {}


class StateWatcher:
    """Keeps the last STATE message of our host id (retained) as the spec's other hosts and
    edge nodes would see it."""

    def __init__(self, port: int, client_id: str = "state-watcher") -> None:
        self.last: dict | None = None
        self.retained = False
        self.client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id)
        self.client.on_message = self._on_message
        self.client.connect("127.0.0.1", port)
        self.client.subscribe("spBv1.0/STATE/limitwatch-test", qos=1)
        self.client.loop_start()

    def _on_message(self, client, userdata, message) -> None:
        self.last = json.loads(message.payload)
        self.retained = bool(message.retain)

    def close(self) -> None:
        self.client.loop_stop()
        self.client.disconnect()


def values(i: int) -> dict[str, float]:
    return {"oil/temp": 40.0 + (i % 7) * 0.25, "ram/force": 120.0 + (i % 5)}


def test_births_aliases_gaps_deaths_and_rebirths_through_the_service(broker, tmp_path):
    health_port = free_port()
    config = sparkplug_config(tmp_path, broker.port, health_port)
    assert load_config(config).sources[0].type == "sparkplug"  # what `limitwatch check` reads
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    node = EdgeNode(broker.port, "plant-a", "press-1", METRICS)
    watcher = StateWatcher(broker.port)
    sent = 0  # readings sent that should be stored
    try:
        wait_until(lambda: "connected to" in svc.logs(), what="the service connected")
        wait_until(lambda: health(health_port).get("sources") == {"presses": True})
        wait_until(lambda: watcher.last is not None, what="the STATE message")
        assert watcher.last["online"] is True and isinstance(watcher.last["timestamp"], int)
        late = StateWatcher(broker.port, "late-watcher")  # subscribes after: gets it retained
        wait_until(lambda: late.last is not None, what="the retained STATE message")
        assert late.retained and late.last == watcher.last
        late.close()

        node.connect()
        node.birth(values(0), T0)
        sent += 2
        for i in range(1, 11):
            node.data(values(i), T0 + 60_000 * i)
            sent += 2
        wait_until(lambda: count(db, "readings") == sent, what="the birth and data by alias")
        assert node.rebirths_asked() == 0

        # a seq gap: one message lost on the way. The one in hand is used, a rebirth asked.
        node.seq += 1
        node.data(values(11), T0 + 60_000 * 11)
        sent += 2
        assert node.wait_for_command(), "the edge node was asked for a rebirth"
        wait_until(lambda: node.rebirths_asked() >= 1)
        wait_until(lambda: count(db, "dead_letters", "reason LIKE 'seq-gap:%'") == 1)
        node.birth(values(12), T0 + 60_000 * 12)  # the rebirth: same bdSeq, seq from 0
        sent += 2

        # an alias the births never gave: refused, never guessed, and a rebirth asked again
        time.sleep(0.3)  # past rebirth_every
        node.send("NDATA", [{"alias": 99, "timestamp": T0 + 60_000 * 13, "double_value": 5.0}])
        wait_until(lambda: count(db, "dead_letters", "reason LIKE 'unknown-alias:%'") == 1)
        wait_until(lambda: node.rebirths_asked() >= 2, what="a second rebirth request")
        for i in range(14, 20):
            node.data(values(i), T0 + 60_000 * i)
            sent += 2
        wait_until(lambda: count(db, "readings") == sent, what="data after the rebirth")

        # historical metrics: in order they are readings, behind their stream they are late
        old = {"alias": 1, "timestamp": T0 + 60_000 * 20, "double_value": 40.5}
        node.send("NDATA", [{**old, "is_historical": True}])
        sent += 1
        node.send("NDATA", [{**old, "timestamp": T0 + 60_000 * 3, "is_historical": True}])
        wait_until(lambda: count(db, "dead_letters", "reason LIKE 'late:%'") == 1)
        wait_until(lambda: count(db, "readings") == sent, what="the historical reading")

        # the node goes offline: a dead letter and /health say so; data before a new birth
        # is refused; the next birth (a new bdSeq) brings it back
        node.die()
        wait_until(lambda: count(db, "dead_letters", "reason LIKE 'node-offline:%'") == 1)
        state = health(health_port)["source_state"]["presses"]
        assert "reported offline" in state["edge_nodes"]["plant-a/press-1"]
        node.birth(values(21), T0 + 60_000 * 21)
        sent += 2
        for i in range(22, 30):
            node.data(values(i), T0 + 60_000 * i)
            sent += 2
        wait_until(lambda: count(db, "readings") == sent, what="data after the new birth")
        assert "born" in health(health_port)["source_state"]["presses"]["edge_nodes"][
            "plant-a/press-1"
        ]
    finally:
        node.close()
        code = svc.stop()
    assert code == 0
    wait_until(lambda: watcher.last is not None and watcher.last["online"] is False)
    watcher.close()
    # every reading once, in the streams the template names
    streams = {s for (s,) in query(db, "SELECT DISTINCT stream FROM readings")}
    assert streams == {"plant-a/press-1/oil/temp", "plant-a/press-1/ram/force"}
    assert query(db, "SELECT count(DISTINCT stream || time) FROM readings")[0][0] == sent
    reasons = sorted(r.split(":")[0] for (r,) in query(db, "SELECT reason FROM dead_letters"))
    assert reasons == ["late", "node-offline", "seq-gap", "unknown-alias"]


@pytest.mark.parametrize("how", ["ndeath", "will"])
def test_a_death_opens_the_stale_incidents_at_once_and_a_rebirth_clears_them(
    broker, tmp_path, how
):
    """NDEATH (the node's own, or its will that the broker sends when the node's connection
    drops) opens a stale incident on each of its streams in the batch that commits the death, long
    before any stale check could (none is configured: no cadence), and the notification says
    the node reported offline and when its last reading was. The new birth's data clears them."""
    db = tmp_path / "service.db"
    with WebhookReceiver() as hook:
        svc = hooked_service(tmp_path, broker.port, hook)
        node = EdgeNode(broker.port, "plant-a", "press-1", METRICS)
        try:
            wait_until(lambda: "connected to" in svc.logs(), what="the service connected")
            node.connect()
            node.birth(steady(0), T0)
            for i in range(1, 15):
                node.data(steady(i), T0 + 60_000 * i)
            wait_until(lambda: count(db, "readings") == 30, what="the birth and data")
            assert count(db, "alerts") == 0

            if how == "will":
                node.vanish()
                node = EdgeNode(broker.port, "plant-a", "press-1", METRICS)  # comes back later
                node.bd_seq = 1
            else:
                node.die()
            wait_until(lambda: count(db, "alerts", "rule = 'stale' AND state = 'open'") == 2,
                       what="both streams' stale incidents")  # fmt: skip
            wait_until(lambda: len(_bodies(hook, "opened")) == 2, what="both notifications")
            if how == "will":
                node.connect()
            node.birth(steady(15), T0 + 60_000 * 15)
            node.data(steady(16), T0 + 60_000 * 16)
            wait_until(lambda: count(db, "alerts", "state = 'cleared'") == 2,
                       what="the rebirth's readings clear them")  # fmt: skip
            wait_until(lambda: len(_bodies(hook, "cleared")) == 2, what="both cleared notices")
        finally:
            node.close()
            assert svc.stop() == 0
    opened, cleared = _bodies(hook, "opened"), _bodies(hook, "cleared")
    assert_offline_notices(
        opened,
        ["plant-a/press-1/oil/temp", "plant-a/press-1/ram/force"],
        "the edge node plant-a/press-1 reported offline (NDEATH)",
        last_reading_ms=T0 + 60_000 * 14,
    )
    assert {b["stream"] for b in cleared} == {b["stream"] for b in opened}
    assert count(db, "alerts") == 2  # the rebirth opened nothing new


PUMPS = {"pump-2": {"flow": 3, "pressure": 4}, "pump-3": {"flow": 5, "pressure": 6}}


def pump(i: int) -> dict[str, float]:
    noise = random.Random(1000 + i)
    return {"flow": 8.0 + noise.gauss(0, 0.1), "pressure": 3.2 + noise.gauss(0, 0.05)}


def test_a_device_death_on_a_real_broker_opens_its_streams_stale_incidents_at_once(
    broker, tmp_path
):
    """An edge node publishes DBIRTHs of two pumps, their DDATA by alias, then a DDEATH of
    one pump, all through a real Mosquitto. The running service opens a stale incident on
    each of that pump's streams in the batch of the death ("offline" words, no cadence and no
    stale check needed) and on no other stream. DDATA of the dead pump before its DBIRTH is
    refused and a rebirth asked for; the next DBIRTH's readings clear the incidents. Then the
    node's connection drops without a DISCONNECT: the broker's will (NDEATH) opens the stale
    incidents of the node's and every device's streams."""
    db = tmp_path / "service.db"
    with WebhookReceiver() as hook:
        svc = hooked_service(tmp_path, broker.port, hook)
        node = EdgeNode(broker.port, "plant-a", "press-1", METRICS, devices=PUMPS)
        try:
            wait_until(lambda: "connected to" in svc.logs(), what="the service connected")
            node.connect()
            node.birth(steady(0), T0)
            for device in PUMPS:
                node.device_birth(device, pump(0), T0)
            for i in range(1, 13):
                for device in PUMPS:
                    node.device_data(device, pump(i), T0 + 60_000 * i)
            wait_until(lambda: count(db, "readings") == 2 + 4 * 13, what="births and data")
            assert count(db, "alerts") == 0

            node.device_death("pump-2")
            wait_until(lambda: count(db, "alerts", "rule = 'stale' AND state = 'open'") == 2,
                       what="pump-2's stale incidents")  # fmt: skip
            wait_until(lambda: len(_bodies(hook, "opened")) == 2, what="both notifications")
            # data of the dead device is refused until it is born again, and a rebirth asked
            node.device_data("pump-2", pump(13), T0 + 60_000 * 13)
            node.device_data("pump-3", pump(13), T0 + 60_000 * 13)  # the live pump goes on
            assert node.wait_for_command(), "the edge node was asked for a rebirth"
            wait_until(lambda: count(db, "dead_letters", "reason LIKE 'not-born:%'") == 1)
            assert count(db, "alerts", "state = 'open'") == 2
            node.device_birth("pump-2", pump(14), T0 + 60_000 * 14)
            node.device_data("pump-2", pump(15), T0 + 60_000 * 15)
            wait_until(lambda: count(db, "alerts", "state = 'cleared'") == 2,
                       what="the rebirth's readings clear them")  # fmt: skip
            wait_until(lambda: len(_bodies(hook, "cleared")) == 2, what="both cleared notices")
            assert count(db, "alerts") == 2  # nothing on the node's or the other pump's streams
            assert count(db, "readings") == 2 + 4 * 13 + 2 + 2 + 2  # see below

            # the node's connection drops hard: the broker sends its will, the NDEATH, which
            # takes the node and every device with it, each stream that had a reading
            node.vanish()
            wait_until(lambda: count(db, "alerts", "rule = 'stale' AND state = 'open'") == 6,
                       what="every stream's stale incident after the will")  # fmt: skip
        finally:
            node.close()
            assert svc.stop() == 0
    will = [b for b in _bodies(hook, "opened") if "(NDEATH)" in b["rule_words"]]
    assert len({b["stream"] for b in will}) == 6
    assert all("the edge node plant-a/press-1 reported offline" in b["rule_words"] for b in will)
    assert_offline_notices(
        [b for b in _bodies(hook, "opened") if "(DDEATH)" in b["rule_words"]],
        ["plant-a/press-1/pump-2/flow", "plant-a/press-1/pump-2/pressure"],
        "the device plant-a/press-1/pump-2 reported offline (DDEATH)",
        last_reading_ms=T0 + 60_000 * 12,
    )
    reasons = sorted(r.split(":")[0] for (r,) in query(db, "SELECT reason FROM dead_letters"))
    assert reasons == ["device-offline", "node-offline", "not-born"]
    # readings: the node's birth, 13 of each pump's two metrics, then pump-3's 13th and
    # pump-2's 14th and 15th; the refused DDATA of the dead pump-2 is no reading


def steady(i: int) -> dict[str, float]:
    """In-control values (independent normal noise), so only the death opens incidents."""
    noise = random.Random(i)
    return {"oil/temp": 40.0 + noise.gauss(0, 0.2), "ram/force": 120.0 + noise.gauss(0, 1.0)}


def assert_offline_notices(
    opened: list[dict], streams: list[str], words: str, last_reading_ms: int
) -> None:
    """One stale notice per stream, saying who reported offline and when the stream's last
    reading was."""
    assert sorted(b["stream"] for b in opened) == streams
    for body in opened:
        assert body["rule"] == "stale"
        assert words in body["rule_words"]
        assert body["silent_since"] == last_reading_ms / 1000


def _bodies(hook: WebhookReceiver, kind: str) -> list[dict]:
    return [b for b in (json.loads(r.body) for r in hook.accepted()) if b["kind"] == kind]


def test_kill_9_mid_stream_loses_nothing(broker, tmp_path):
    """The service is killed with SIGKILL twice while an edge node publishes (QoS 1) 400
    messages of two metrics each: afterwards every reading is stored exactly once, read with
    the birth that came before the crash."""
    config = sparkplug_config(tmp_path, broker.port)
    db = tmp_path / "service.db"
    svc = ServiceProcess(config).start()
    wait_until(lambda: "connected to" in svc.logs(), what="the service connected")
    node = EdgeNode(broker.port, "plant-a", "press-1", METRICS)
    node.connect()
    node.birth(values(0), T0)
    total = 400

    def publish() -> None:
        for i in range(1, total + 1):
            node.data(values(i), T0 + 1000 * i)
            if i % 25 == 0:
                time.sleep(0.25)

    sender = threading.Thread(target=publish)
    sender.start()
    kills = 0
    at_kill = []
    try:
        while kills < 2:
            before = count(db, "readings")
            wait_until(lambda b=before: count(db, "readings") >= b + 60, what="readings flowing")
            connection = svc.children()
            svc.kill()
            at_kill.append(count(db, "readings"))
            kills += 1
            for pid in connection:
                wait_until(lambda pid=pid: process_gone(pid), timeout=10, what=f"{pid} to exit")
            svc = ServiceProcess(config).start()
            wait_until(
                lambda svc=svc, k=kills: svc.logs().count("connected to") > k, what="reconnected"
            )
        sender.join()
        wait_until(lambda: count(db, "readings") == 2 * (total + 1), timeout=60, what="all")
    finally:
        node.close()
        assert svc.stop() == 0
    assert all(n < 2 * (total + 1) for n in at_kill), at_kill  # killed mid-stream
    assert query(db, "SELECT count(DISTINCT stream || time) FROM readings")[0][0] == 2 * (total + 1)
    reasons = {r.split(":")[0] for (r,) in query(db, "SELECT reason FROM dead_letters")}
    assert reasons <= {"duplicate"}, reasons
    assert (tmp_path / "service.db.source-presses.json").stat().st_mode & 0o077 == 0


def test_with_clean_session_the_broker_keeps_nothing_for_the_host(broker, tmp_path):
    """clean_session = true, as Sparkplug 3.0 asks of host applications: what the edge node
    publishes while the service is down is not kept for it (the persistent default keeps it,
    as the kill -9 test shows)."""
    config = sparkplug_config(tmp_path, broker.port)
    config.write_text(config.read_text() + "clean_session = true\n")
    db = tmp_path / "service.db"
    node = EdgeNode(broker.port, "plant-a", "press-1", METRICS)
    node.connect()
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: "subscriptions granted" in svc.logs(), what="the service subscribed")
        node.birth(values(0), T0)
        wait_until(lambda: count(db, "readings") == 2, what="the birth")
    finally:
        assert svc.stop() == 0
    for i in range(1, 6):  # while the service is down
        node.data(values(i), T0 + 60_000 * i)
    svc = ServiceProcess(config).start()
    try:
        wait_until(lambda: svc.logs().count("subscriptions granted") >= 2, what="subscribed")
        node.data(values(6), T0 + 60_000 * 6)
        wait_until(lambda: count(db, "readings") == 4, what="the readings sent after")
        assert "session present: False" in svc.logs().rsplit("connected to", 1)[1]
    finally:
        node.close()
        assert svc.stop() == 0
    assert count(db, "readings") == 4  # the birth's two and the last message's two
    times = sorted({t for (t,) in query(db, "SELECT time FROM readings")})
    assert times == [T0 / 1000, T0 / 1000 + 360]
