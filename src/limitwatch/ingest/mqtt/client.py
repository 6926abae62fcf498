"""MQTT intake with at-least-once delivery and acknowledgement after commit.

The paho-mqtt network thread only ever puts an :data:`Arrival` on a queue; the connection process
(:mod:`limitwatch.ingest.mqtt.process`) passes it up to the service as a :class:`Delivery`. All
parsing, evaluation and database work happens in the service's single worker, and
:meth:`MqttConnection.ack` is called for each delivery, in arrival order, once the transaction
holding its effect has committed. With a fixed client id, QoS 1 and a persistent session the
broker keeps everything not yet acknowledged -- across our crashes and its restarts -- and
sends it again.

Why each setting (paho-mqtt 2.x):

* ``CallbackAPIVersion.VERSION2`` -- the supported callback signatures.
* ``manual_ack=True`` -- paho would otherwise acknowledge on receipt, before anything is stored.
* MQTT 5: ``clean_start=False`` with a ``SessionExpiryInterval``; 3.1.1: ``clean_session=False``.
* Subscribing in ``on_connect`` -- subscriptions return after every reconnect, even if the
  broker lost the session.
* ``connect_async`` + ``loop_start`` + ``reconnect_delay_set`` -- paho's own reconnect with
  backoff; no second reconnect loop on top.
* ``ReceiveMaximum`` (MQTT 5) -- how many unacknowledged messages the broker may have in flight
  to us; it bounds the intake queue, so nothing needs to be dropped when we fall behind.
* A last will of ``offline`` and a retained ``online`` on connect on the status topic.
"""

from __future__ import annotations

import inspect
import logging
import queue
import ssl
import struct
import threading
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any, NamedTuple

import paho.mqtt.client as mqtt
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

log = logging.getLogger("limitwatch.mqtt")


class Delivery(NamedTuple):
    """One message as received; ``mid`` is only good for acknowledging it (packet ids are
    reused, so they are never a deduplication key). A named tuple: one is made per message on
    the network thread, and a tuple is the cheapest immutable record to make."""

    source: str
    topic: str
    payload: bytes
    received_at: float
    mid: int
    qos: int
    retained: bool
    epoch: int = 0
    """Which connection process received it (see :mod:`limitwatch.ingest.mqtt.process`): an
    acknowledgement only goes back through the process that got the message."""


Arrival = tuple[str, bytes, float, int, int, bool]
"""(topic, payload, received_at, mid, qos, retained): what the network thread queues. A plain
tuple: made on the network thread for every message and pickled up a pipe, where a named
tuple's Python-level ``__new__`` and ``__getnewargs__`` cost more than everything else."""


@dataclass(frozen=True)
class MqttSettings:
    """The connection part of an MQTT source; built from the config's source section."""

    name: str
    host: str
    port: int
    client_id: str
    topics: tuple[tuple[str, int], ...]
    """(topic filter, QoS) pairs."""
    protocol: str = "5"
    keepalive_s: int = 30
    session_expiry_s: int = 86_400
    receive_maximum: int = 1000
    username: str | None = None
    password: str | None = None
    tls: bool = False
    """TLS on; without ``ca_file`` the system's certificate authorities are trusted."""
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    status_topic: str | None = None
    online_payload: str | bytes = "online"
    """Published retained on ``status_topic`` at every connect."""
    offline_payload: str | bytes = "offline"
    """The last will on ``status_topic``, and what a clean close publishes there."""
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = 60.0
    clean: bool = False
    """A clean session (3.1.1 ``clean_session``; 5 ``clean_start`` and a session expiry of 0):
    the broker keeps nothing for us between connections. Only for a source whose protocol
    demands it (Sparkplug's host applications); the default keeps the session."""


_PUBACK = 0x40
"""MQTT's PUBACK control packet type, in the high nibble of the fixed header's first byte."""

_PUBACK_PACKET = struct.Struct("!BBH")
"""One PUBACK: packet type, remaining length 2, packet id (MQTT 3.1.1 section 3.4 and 5.0
section 3.4: without a reason code it means success)."""


def _pubacks(mids: Sequence[int]) -> bytes:
    """The PUBACK packets for ``mids``, one after the other in one byte string.

    >>> _pubacks([1, 258]).hex()
    '4002000140020102'
    """
    pack = _PUBACK_PACKET.pack
    return b"".join([pack(_PUBACK, 2, mid) for mid in mids])


def _packet_queue_of(client: mqtt.Client) -> Callable[..., Any] | None:
    """paho's method that queues an outgoing packet and wakes its network thread (the one its
    own ``ack`` uses); None when a paho version has changed it, so acknowledgements fall back
    to one ``ack`` each."""
    queue_packet = getattr(client, "_packet_queue", None)
    if queue_packet is None:
        return None
    try:
        params = list(inspect.signature(queue_packet).parameters)
    except (TypeError, ValueError):
        return None
    return queue_packet if params[:4] == ["command", "packet", "mid", "qos"] else None


class MqttConnection:
    """One broker connection feeding ``intake``."""

    def __init__(
        self,
        settings: MqttSettings,
        intake: queue.SimpleQueue[Any],
        clock: Callable[[], float] = time.time,
        on_change: Callable[[], None] | None = None,
    ) -> None:
        self.settings = settings
        self.name = settings.name
        self._intake = intake
        self._clock = clock
        self._on_change = on_change or (lambda: None)
        self.connected = threading.Event()
        self.subscribed = threading.Event()
        self.last_error: str | None = None
        self.connects = 0
        self._client = self._make_client()
        self._queue_packet = _packet_queue_of(self._client)
        """paho's own queue of outgoing packets, for acknowledgements in bulk; None (one by one
        through ``ack``) if this paho version has none by that name."""

    # -- set-up -----------------------------------------------------------------------------------

    def _make_client(self) -> mqtt.Client:
        s = self.settings
        v5 = s.protocol == "5"
        client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=s.client_id,
            protocol=mqtt.MQTTv5 if v5 else mqtt.MQTTv311,
            clean_session=None if v5 else s.clean,
            manual_ack=True,
        )
        if s.username is not None:
            client.username_pw_set(s.username, s.password)
        if s.tls or s.ca_file is not None:
            client.tls_set(
                ca_certs=s.ca_file,
                certfile=s.cert_file,
                keyfile=s.key_file,
                cert_reqs=ssl.CERT_REQUIRED,
            )
        if s.status_topic:
            client.will_set(s.status_topic, s.offline_payload, qos=1, retain=True)
        # paho's hint says int, but it sleeps for these seconds and takes a float as well
        client.reconnect_delay_set(
            min_delay=s.reconnect_min_s,  # type: ignore[arg-type]
            max_delay=s.reconnect_max_s,  # type: ignore[arg-type]
        )
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        client.on_connect_fail = self._on_connect_fail
        return client

    def start(self) -> None:
        s = self.settings
        if s.protocol == "5":
            props = Properties(PacketTypes.CONNECT)
            props.SessionExpiryInterval = 0 if s.clean else s.session_expiry_s
            props.ReceiveMaximum = s.receive_maximum
            self._client.connect_async(
                s.host, s.port, keepalive=s.keepalive_s, clean_start=s.clean, properties=props
            )
        else:
            self._client.connect_async(s.host, s.port, keepalive=s.keepalive_s)
        self._client.loop_start()

    def close(self) -> None:
        """Say ``offline`` (retained) and disconnect cleanly; unacknowledged messages stay with
        the broker for our next session."""
        s = self.settings
        try:
            if s.status_topic and self.connected.is_set():
                info = self._client.publish(s.status_topic, s.offline_payload, qos=1, retain=True)
                info.wait_for_publish(timeout=5)
            self._client.disconnect()
        except Exception:  # closing must not fail the shutdown
            log.exception("mqtt %s: error while disconnecting", self.name)
        finally:
            self._client.loop_stop()

    def publish(self, topic: str, payload: bytes, qos: int, retain: bool) -> None:
        """Publish without waiting (paho queues it; while disconnected, QoS 1 waits for the
        reconnect): a source's own messages to its senders, such as a rebirth request."""
        try:
            self._client.publish(topic, payload, qos=qos, retain=retain)
        except Exception:  # a refused publish must not end the connection process
            log.exception("mqtt %s: could not publish on %s", self.name, topic)

    def ack(self, mid: int, qos: int) -> None:
        """Acknowledge one delivery; called by the worker after its batch committed."""
        if qos > 0:
            self._client.ack(mid, qos)

    def ack_all(self, acks: Sequence[tuple[int, int]]) -> None:
        """Acknowledge a committed batch's deliveries, (packet id, QoS) in arrival order.

        Why in bulk: paho queues each acknowledgement as a packet of its own, wakes its network
        thread for it and writes it with a send of its own, four bytes at a time; a batch of
        500 cost 500 wake-ups and 500 system calls here and 500 reads at the broker. A run of
        QoS 1 acknowledgements is queued instead as one packet holding every PUBACK, byte for
        byte what paho would send one by one (fixed header, remaining length 2, packet id: a
        success without a reason code, MQTT 5 section 3.4.2.1), so paho's network thread writes
        them with one send, in the order given. QoS 2 completions go through paho one by one.
        """
        queue_packet = self._queue_packet
        client = self._client
        if queue_packet is None:
            for mid, qos in acks:
                self.ack(mid, qos)
            return
        run: list[int] = []
        for mid, qos in acks:
            if qos == 1:
                run.append(mid)
                continue
            if run:
                queue_packet(_PUBACK, _pubacks(run), run[-1], 1)
                run = []
            if qos > 0:
                client.ack(mid, qos)
        if run:
            queue_packet(_PUBACK, _pubacks(run), run[-1], 1)

    # -- callbacks: never block, never raise ------------------------------------------------------

    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            if reason_code.is_failure:
                self.last_error = f"connection refused: {reason_code}"
                log.error("mqtt %s: %s", self.name, self.last_error)
                self._on_change()
                return
            self.connects += 1
            self.last_error = None
            client.subscribe(list(self.settings.topics))
            if self.settings.status_topic:
                client.publish(
                    self.settings.status_topic, self.settings.online_payload, qos=1, retain=True
                )
            self.connected.set()
            self._on_change()
            log.info(
                "mqtt %s: connected to %s:%s (session present: %s)",
                self.name,
                self.settings.host,
                self.settings.port,
                getattr(flags, "session_present", None),
            )
        except Exception:
            log.exception("mqtt %s: error in on_connect", self.name)

    def _on_subscribe(self, client, userdata, mid, reason_codes, properties) -> None:
        try:
            failed = [rc for rc in reason_codes if rc.is_failure]
            if failed:
                self.last_error = f"subscription refused: {failed}"
                log.error("mqtt %s: %s", self.name, self.last_error)
            else:
                self.subscribed.set()
                log.info("mqtt %s: subscriptions granted", self.name)
            self._on_change()
        except Exception:
            log.exception("mqtt %s: error in on_subscribe", self.name)

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            self.connected.clear()
            self.subscribed.clear()
            if reason_code != 0:
                self.last_error = f"disconnected: {reason_code}"
                log.warning("mqtt %s: %s; paho reconnects with backoff", self.name, reason_code)
            self._on_change()
        except Exception:
            log.exception("mqtt %s: error in on_disconnect", self.name)

    def _on_connect_fail(self, client, userdata) -> None:
        try:
            self.last_error = "connection failed (network, TLS or broker down)"
            log.warning("mqtt %s: %s", self.name, self.last_error)
            self._on_change()
        except Exception:
            log.exception("mqtt %s: error in on_connect_fail", self.name)

    def _on_message(self, client, userdata, message) -> None:
        try:
            # an Arrival: (topic, payload, received_at, mid, qos, retained)
            self._intake.put_nowait(
                (
                    message.topic,
                    message.payload,
                    self._clock(),
                    message.mid,
                    message.qos,
                    bool(message.retain),
                )
            )
        except Exception:
            log.exception("mqtt %s: could not queue a message on %s", self.name, message.topic)
