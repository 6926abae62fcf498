"""``[[sources]]`` with ``type = "mqtt"``: the broker connection, its topics and payloads.

>>> source = MqttSourceConfig.model_validate({
...     "type": "mqtt", "name": "gateway", "host": "127.0.0.1", "client_id": "lw-1",
...     "topics": [{"filter": "plant/+/+", "stream": "{2}/{3}", "payload": "number"}]})
>>> source.status_topic, source.subscriptions
('limitwatch/lw-1/status', (('plant/+/+', 1),))

References
----------
OASIS, *MQTT Version 3.1.1* (2014) and *MQTT Version 5.0* (2019) for the broker settings.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Annotated, Any, Literal

from pydantic import BeforeValidator, Field, ValidationInfo, field_validator, model_validator

from limitwatch.config import (
    ConfigPath,
    Duration,
    EnvName,
    FieldPath,
    PositiveDuration,
    Problem,
    SecretRef,
    SourceSettings,
    TimeFormat,
    TlsSettings,
    _fail,
    _Section,
)
from limitwatch.ingest.streamid import stream_id_problem
from limitwatch.ingest.topics import (
    TopicMapper,
    filters_overlap,
    validate_filter,
    validate_topic_name,
)

__all__ = ["BrokerSettings", "MqttSourceConfig", "MqttTopic"]


def _protocol(value: Any) -> Any:
    return "5" if value == 5 and not isinstance(value, bool) else value


_NUMBER_HAS_NO_FIELDS = "a plain-number payload has no fields; {key} needs payload = 'json'"


class MqttTopic(_Section):
    """``[[sources.topics]]``: one topic filter, the stream template, and the payload layout."""

    filter: str
    stream: str
    payload: Literal["number", "json"]
    value: FieldPath = "value"
    time: FieldPath | None = None
    time_format: TimeFormat = "auto"
    seq: FieldPath | None = None
    qos: Literal[0, 1] = 1

    # Field validators run in field order and see the fields before them in ``info.data``, so
    # each problem is found even when another key of the same entry is wrong too.

    @field_validator("filter")
    @classmethod
    def _filter(cls, value: str) -> str:
        validate_filter(value)
        return value

    @field_validator("stream")
    @classmethod
    def _template(cls, value: str, info: ValidationInfo) -> str:
        topic_filter = info.data.get("filter")
        if topic_filter is not None:
            TopicMapper(topic_filter, value)  # StreamTemplateError is a ValueError
        # The template's own text is part of every stream id it makes (topics are checked as
        # they arrive); a control character here would refuse every message.
        problem = stream_id_problem(re.sub(r"\{[^{}]*\}", "", value))
        if problem is not None:
            raise ValueError(f"the text of this stream template {problem}")
        return value

    @field_validator("time", "seq")
    @classmethod
    def _json_only(cls, value: str | None, info: ValidationInfo) -> str | None:
        if value is not None and info.data.get("payload") == "number":
            raise ValueError(_NUMBER_HAS_NO_FIELDS.format(key=info.field_name))
        return value

    @model_validator(mode="after")
    def _layout(self) -> MqttTopic:
        if self.payload == "number" and "value" in self.model_fields_set:
            raise _fail((("value",), _NUMBER_HAS_NO_FIELDS.format(key="value")))
        return self


class BrokerSettings(SourceSettings):
    """The broker connection of a source that reads MQTT (persistent session, QoS 1, manual
    acks): the keys ``type = "mqtt"`` and ``type = "sparkplug"`` share."""

    host: str = Field(min_length=1)
    port: int = Field(1883, ge=1, le=65535)
    protocol: Annotated[Literal["5", "3.1.1"], BeforeValidator(_protocol)] = "5"
    client_id: str = Field(min_length=1)
    keepalive_s: int = Field(30, ge=0, le=65535)
    session_expiry: Duration = 86400.0
    receive_maximum: int = Field(1000, ge=1, le=65535)
    username: str | None = None
    password_env: EnvName | None = None
    password_file: ConfigPath | None = None
    tls: TlsSettings | None = None
    max_payload_bytes: int = Field(65536, ge=1, le=268_435_455)
    reconnect_min_s: int = Field(1, ge=1, le=3600)
    reconnect_max_s: int = Field(60, ge=1, le=86400)

    @field_validator("client_id")
    @classmethod
    def _client_id(cls, value: str) -> str:
        if len(value.encode("utf-8")) > 65535 or "\x00" in value:
            raise ValueError("a client id is at most 65535 bytes of UTF-8 without U+0000")
        return value

    @field_validator("session_expiry")
    @classmethod
    def _expiry(cls, value: float) -> float:
        # MQTT 5.0 section 3.1.2.11.2: a four-byte integer of seconds
        if value > 0xFFFFFFFF:
            raise ValueError("must be at most 4294967295 seconds (about 136 years)")
        return float(math.ceil(value))

    @model_validator(mode="after")
    def _connection(self) -> BrokerSettings:
        problems: list[tuple[tuple[str | int, ...], str]] = []
        if self.password_env is not None and self.password_file is not None:
            problems.append((("password_file",), "give password_env or password_file, not both"))
        has_password = self.password_env is not None or self.password_file is not None
        if has_password and self.username is None and self.protocol == "3.1.1":
            problems.append(
                (
                    ("username",),
                    "MQTT 3.1.1 sends a password only with a user name (section 3.1.2.9); "
                    "set username",
                )
            )
        if self.reconnect_max_s < self.reconnect_min_s:
            problems.append(
                (
                    ("reconnect_max_s",),
                    f"must not be below reconnect_min_s ({self.reconnect_min_s})",
                )
            )
        if problems:
            raise _fail(*problems)
        return self

    # ---- what check and the service's advice need to know

    def secret_refs(self, where: str) -> list[SecretRef]:
        refs = SecretRef.either(
            where,
            "password",
            self.password_env,
            self.password_file,
            f"broker password for source {self.name!r}",
        )
        if self.tls is not None and self.tls.key_file is not None:
            refs.append(
                SecretRef(
                    f"{where}.tls.key_file",
                    None,
                    self.tls.key_file,
                    f"TLS client key for source {self.name!r}",
                )
            )
        return refs

    def files_needed(self, where: str) -> list[tuple[str, Path]]:
        if self.tls is None:
            return []
        return [
            (f"{where}.tls.{key}", value)
            for key in ("ca_file", "cert_file")
            if (value := getattr(self.tls, key)) is not None
        ]

    def advice(self, where: str) -> list[Problem]:
        out: list[Problem] = []
        has_password = self.password_env is not None or self.password_file is not None
        if has_password and self.tls is None:
            out.append(
                Problem(
                    f"{where}.tls",
                    "the broker password would travel unencrypted; add [sources.tls]",
                )
            )
        if self.protocol == "5" and self.session_expiry == 0:
            out.append(
                Problem(
                    f"{where}.session_expiry",
                    "0 ends the session at every disconnect, so the broker keeps nothing "
                    "for us while the service is down",
                )
            )
        return out


class MqttSourceConfig(BrokerSettings):
    """``type = "mqtt"``: readings on topics of our own choosing, one per message."""

    type: Literal["mqtt"]
    status_topic: str | None = None
    """Where ``online``/``offline`` is published, retained; filled in as
    ``limitwatch/<client_id>/status`` when left out (so it is None only on a failed load)."""
    reorder_within: PositiveDuration | None = None
    """Hold each reading this long and apply a stream's held readings in sequence (else time)
    order: a reading overtaken by up to this much is applied in its place instead of being
    refused as ``late``. Off by default: it delays every reading of the source by this much."""
    topics: list[MqttTopic] = Field(min_length=1)

    @model_validator(mode="before")
    @classmethod
    def _default_status_topic(cls, data: Any) -> Any:
        if isinstance(data, Mapping) and "status_topic" not in data:
            client_id = data.get("client_id")
            if isinstance(client_id, str) and client_id:
                data = {**data, "status_topic": f"limitwatch/{client_id}/status"}
        return data

    @field_validator("status_topic")
    @classmethod
    def _status(cls, value: str | None) -> str | None:
        if value is None:
            return None
        try:
            validate_topic_name(value)
        except ValueError as exc:
            raise ValueError(
                f"{value!r} cannot be the status topic ({exc}); the default is "
                "limitwatch/<client_id>/status, so set status_topic when the client id holds "
                "'+' or '#'"
            ) from None
        return value

    @property
    def subscriptions(self) -> tuple[tuple[str, int], ...]:
        """``(filter, qos)`` pairs to subscribe to."""
        return tuple((t.filter, t.qos) for t in self.topics)

    def advice(self, where: str) -> list[Problem]:
        out = super().advice(where)
        for j, topic in enumerate(self.topics):
            entry = f"{where}.topics[{j}]"
            if topic.qos == 0:
                out.append(
                    Problem(
                        f"{entry}.qos",
                        "QoS 0: the broker keeps nothing for us while the service is down, "
                        "so readings sent then are lost",
                    )
                )
            for k in range(j):
                other = self.topics[k]
                if filters_overlap(other.filter, topic.filter) and (
                    topic.seq is None or other.seq is None
                ):
                    out.append(
                        Problem(
                            f"{entry}.filter",
                            f"overlaps {where}.topics[{k}].filter "
                            f"({other.filter!r}); a broker may deliver a message once per "
                            "matching subscription, and without seq a copy is counted "
                            "twice",
                        )
                    )
        return out

    def describe(self) -> str:
        tls = ", TLS" if self.tls is not None else ""
        filters = ", ".join(t.filter for t in self.topics)
        return (
            f"{self.name} (mqtt {self.protocol}{tls}): {self.host}:{self.port} as "
            f"{self.client_id!r}, topics {filters}"
        )
