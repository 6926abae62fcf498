"""Publish each notification's JSON to an MQTT topic and wait until the broker has it.

Why these choices:

* One connection kept across deliveries (paho's network thread, its own reconnect with backoff):
  a plant broker may see thousands of notifications a day and a connect per message is waste.
* ``deliver`` runs in the outbox worker's thread and waits there, with a timeout, for the
  broker's acknowledgement (PUBACK for QoS 1, PUBCOMP for QoS 2). Only then is the row marked
  delivered. The paho callbacks do nothing but flip a flag, so the network loop never blocks.
* When no acknowledgement comes in time the client is thrown away and the next attempt opens a
  fresh session. Otherwise paho would re-send its queued copy on reconnect *and* the outbox
  would retry, doubling the message. Delivery is at-least-once either way; subscribers can drop
  repeats by the ``event_id`` field.
* TLS when ``ca_file`` is given (``tls_set(ca_certs=...)``, verification on). A login is only
  sent over TLS.

>>> s = MqttNotifier.Settings(type="mqtt", name="gateway", host="broker.local",
...                           topic="plant/alerts")
>>> s.port, s.qos, s.retain
(1883, 1, False)

References
----------
OASIS, *MQTT Version 3.1.1* (2014), sections 4.3.2 (QoS 1: PUBACK) and 4.3.3 (QoS 2); Eclipse
paho-mqtt 2.x documentation, "Client" (CallbackAPIVersion.VERSION2, loop_start, tls_set).
"""

from __future__ import annotations

import json
import logging
import threading
from pathlib import Path
from typing import Any, Literal, Self

import paho.mqtt.client as mqtt
from pydantic import Field, field_validator, model_validator

from limitwatch.alerts.notifiers.base import DeliveryError, Notifier, NotifierSettings
from limitwatch.secrets import resolve_secret

log = logging.getLogger(__name__)


class MqttNotifier(Notifier):
    """Publishes ``{**notification, "event_id": ...}`` as JSON to ``topic``."""

    class Settings(NotifierSettings):
        type: Literal["mqtt"] = "mqtt"
        host: str = Field(min_length=1)
        port: int = Field(1883, ge=1, le=65535)
        topic: str = Field(min_length=1)
        qos: Literal[0, 1, 2] = 1
        retain: bool = False
        client_id: str | None = None
        username: str | None = None
        password_env: str | None = None
        password_file: Path | None = None
        ca_file: Path | None = None
        timeout_s: float = Field(10.0, gt=0, le=300)

        @field_validator("topic")
        @classmethod
        def _publishable(cls, topic: str) -> str:
            if "+" in topic or "#" in topic:
                raise ValueError(f"topic {topic!r} contains a wildcard; one cannot publish to it")
            return topic

        @model_validator(mode="after")
        def _login_needs_tls(self) -> Self:
            has_password = self.password_env is not None or self.password_file is not None
            if has_password and self.username is None:
                raise ValueError("a password source is set but no username to log in with")
            if self.username is not None and self.ca_file is None:
                raise ValueError(
                    "a login needs TLS (set ca_file); limitwatch does not send passwords in clear"
                )
            return self

    def __init__(
        self,
        name: str,
        *,
        host: str,
        topic: str,
        port: int = 1883,
        qos: int = 1,
        retain: bool = False,
        client_id: str | None = None,
        username: str | None = None,
        password: str | None = None,
        ca_file: str | Path | None = None,
        timeout_s: float = 10.0,
    ) -> None:
        super().__init__(name)
        self.host, self.port, self.topic = host, port, topic
        self.qos, self.retain = qos, retain
        self.client_id = client_id
        self.username, self._password = username, password
        self.ca_file = ca_file
        self.timeout_s = timeout_s
        self._client: mqtt.Client | None = None
        self._connected = threading.Event()
        self._last_refusal = ""

    @classmethod
    def from_settings(cls, settings: Settings) -> Self:
        password = resolve_secret(
            env=settings.password_env,
            file=settings.password_file,
            what=f"MQTT password of notifier {settings.name!r}",
        )
        return cls(
            settings.name,
            host=settings.host,
            port=settings.port,
            topic=settings.topic,
            qos=settings.qos,
            retain=settings.retain,
            client_id=settings.client_id,
            username=settings.username,
            password=password,
            ca_file=settings.ca_file,
            timeout_s=settings.timeout_s,
        )

    # ---- connection

    def start(self) -> None:
        """Begin connecting in the background; deliveries wait for the connection."""
        if self._client is not None:
            return
        client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=self.client_id or "",
            clean_session=True,
            protocol=mqtt.MQTTv311,
        )
        if self.ca_file is not None:
            client.tls_set(ca_certs=str(self.ca_file))
        if self.username is not None:
            client.username_pw_set(self.username, self._password)
        client.reconnect_delay_set(min_delay=1, max_delay=30)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        self._connected.clear()
        client.connect_async(self.host, self.port, keepalive=60)
        client.loop_start()
        self._client = client

    def close(self) -> None:
        client, self._client = self._client, None
        self._connected.clear()
        if client is not None:
            try:
                client.disconnect()
            finally:
                client.loop_stop()

    def _on_connect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            if reason_code.is_failure:
                self._last_refusal = str(reason_code)
            else:
                self._connected.set()
        except Exception:  # an exception here would end paho's network thread
            log.exception("MQTT notifier %r: on_connect failed", self.name)

    def _on_disconnect(self, client, userdata, flags, reason_code, properties) -> None:
        try:
            self._connected.clear()
        except Exception:
            log.exception("MQTT notifier %r: on_disconnect failed", self.name)

    # ---- delivery

    def deliver(self, notification: dict[str, Any], *, event_id: str) -> None:
        body = json.dumps({**notification, "event_id": event_id}, allow_nan=False)
        where = f"MQTT broker {self.host}:{self.port} (notifier {self.name!r})"
        self.start()
        assert self._client is not None
        if not self._connected.wait(self.timeout_s):
            why = f": {self._last_refusal}" if self._last_refusal else ""
            raise DeliveryError(
                f"{where}: not connected within {self.timeout_s:g} s{why}", retryable=True
            )
        info = self._client.publish(self.topic, body, qos=self.qos, retain=self.retain)
        if info.rc != mqtt.MQTT_ERR_SUCCESS:
            self.close()
            raise DeliveryError(
                f"{where}: publish failed ({mqtt.error_string(info.rc)})", retryable=True
            )
        try:
            info.wait_for_publish(self.timeout_s)
        except (RuntimeError, ValueError) as exc:
            self.close()
            raise DeliveryError(f"{where}: publish failed ({exc})", retryable=True) from exc
        if not info.is_published():
            self.close()  # drop paho's queued copy; the outbox's retry is the only one
            raise DeliveryError(
                f"{where}: no acknowledgement for QoS {self.qos} within {self.timeout_s:g} s",
                retryable=True,
            )
