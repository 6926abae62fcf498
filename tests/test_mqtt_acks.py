"""Acknowledgements in bulk: a committed batch's PUBACKs go to the broker as one write, and the
broker takes them as it takes paho's own, one by one (limitwatch.ingest.mqtt.client).

Against a real Mosquitto on 127.0.0.1 with a persistent session (MQTT 5 and 3.1.1): what was
acknowledged in bulk is never sent again, and what was not is sent again after a reconnect --
the at-least-once promise of OASIS MQTT 5.0 section 4.4 (message delivery retry) and 3.1.1
section 4.4, which is what the service's acknowledgement after commit rests on.
"""

from __future__ import annotations

import queue
import time

import pytest

from limitwatch.ingest.mqtt.client import MqttConnection, MqttSettings
from tests.service_harness import Publisher


def settings(port: int, protocol: str) -> MqttSettings:
    return MqttSettings(
        name="acks",
        host="127.0.0.1",
        port=port,
        client_id=f"ack-test-{protocol}",
        topics=(("acks/#", 1),),
        protocol=protocol,
        session_expiry_s=600,
    )


def take(intake: queue.SimpleQueue, n: int, timeout: float = 20.0) -> list[tuple]:
    got: list[tuple] = []
    deadline = time.monotonic() + timeout
    while len(got) < n:
        got.append(intake.get(timeout=max(0.01, deadline - time.monotonic())))
    return got


def settle(connection: MqttConnection) -> None:
    """Wait until the broker has read what was sent before: a QoS 1 publish on the same
    connection comes back acknowledged only after the broker read the bytes ahead of it.
    Without this, closing at once can lose the acknowledgements just written (paho closes its
    socket with the broker's next messages unread, which resets the connection), and the test
    would be about that race instead of the acknowledgements."""
    info = connection._client.publish("acks-settled", b"", qos=1)
    info.wait_for_publish(timeout=10)
    assert info.is_published()


def connect(port: int, protocol: str) -> tuple[MqttConnection, queue.SimpleQueue]:
    intake: queue.SimpleQueue = queue.SimpleQueue()
    connection = MqttConnection(settings(port, protocol), intake)
    connection.start()
    assert connection.subscribed.wait(10), connection.last_error
    return connection, intake


@pytest.mark.parametrize("protocol", ["5", "3.1.1"])
def test_what_is_acknowledged_in_bulk_is_not_sent_again_and_the_rest_is(broker, protocol):
    connection, intake = connect(broker.port, protocol)
    assert connection._queue_packet is not None  # the bulk path, not the fallback
    publisher = Publisher(broker.port)
    publisher.send_all([(f"acks/m{i}", str(i)) for i in range(60)])
    publisher.close()
    arrivals = take(intake, 60)  # (topic, payload, received_at, mid, qos, retained)
    assert [a[1] for a in arrivals] == [str(i).encode() for i in range(60)]
    # the first 40 acknowledged in two bulks, a QoS 0 entry among them changes nothing
    connection.ack_all([(a[3], a[4]) for a in arrivals[:25]] + [(0, 0)])
    connection.ack_all([(a[3], a[4]) for a in arrivals[25:40]])
    settle(connection)
    connection.close()

    again, intake = connect(broker.port, protocol)
    try:
        resent = take(intake, 20)
        assert [a[1] for a in resent] == [str(i).encode() for i in range(40, 60)]
        with pytest.raises(queue.Empty):
            intake.get(timeout=1.0)  # nothing acknowledged came back
        again.ack_all([(a[3], a[4]) for a in resent])
        settle(again)
    finally:
        again.close()
    third, intake = connect(broker.port, protocol)
    try:
        with pytest.raises(queue.Empty):
            intake.get(timeout=1.0)
    finally:
        third.close()


def test_without_paho_s_packet_queue_each_delivery_is_acknowledged_alone(broker):
    connection, intake = connect(broker.port, "5")
    connection._queue_packet = None  # as with a paho version whose internals moved
    publisher = Publisher(broker.port)
    publisher.send_all([(f"acks/m{i}", str(i)) for i in range(10)])
    publisher.close()
    arrivals = take(intake, 10)
    connection.ack_all([(a[3], a[4]) for a in arrivals])
    settle(connection)
    connection.close()
    again, intake = connect(broker.port, "5")
    try:
        with pytest.raises(queue.Empty):
            intake.get(timeout=1.0)
    finally:
        again.close()
