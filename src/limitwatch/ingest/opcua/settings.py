"""``[[sources]]`` with ``type = "opcua"``: one OPC UA server, the variables to watch, security.

>>> source = OpcuaSourceConfig.model_validate({
...     "type": "opcua", "name": "press-hall", "endpoint": "opc.tcp://10.0.4.20:4840",
...     "stream": "press-hall/{name}",
...     "items": [{"node": "ns=2;s=Press1.OilTemp"},
...               {"path": ["2:Press2", "2:RamForce"], "stream": "press-2/ram-force"},
...               {"node": "ns=3;i=1007"}]})
>>> [source.stream_for(i) for i in range(3)]
['press-hall/Press1.OilTemp', 'press-2/ram-force', 'press-hall/1007']
>>> source.items[1].path
('2:Press2', '2:RamForce')

References
----------
IEC 62541-3 (OPC UA part 3, address space): node ids and browse names qualified by a namespace
index; their string form (``ns=<index>;i=|s=|g=|b=<identifier>``) is the one IEC 62541-6
(mappings) gives. IEC 62541-4 (services): the sampling interval of a monitored item and the
publishing interval of a subscription (0 asks for the fastest the server supports). IEC
62541-7 (profiles): the security policies ``None`` and ``Basic256Sha256`` and the message
security modes ``Sign`` and ``SignAndEncrypt``. Section numbers are left out: they moved
between editions.
"""

from __future__ import annotations

import re
import string
from pathlib import Path
from typing import Literal

from pydantic import Field, field_validator, model_validator

from limitwatch.config import (
    ConfigPath,
    Duration,
    EnvName,
    PositiveDuration,
    Problem,
    SecretRef,
    SourceSettings,
    _fail,
    _Section,
)
from limitwatch.ingest.streamid import stream_id_problem

__all__ = ["OpcuaItem", "OpcuaSecurity", "OpcuaSourceConfig", "node_parts"]

_PLACES = ("name", "ns")
_NODE_ID = re.compile(r"(?:ns=(\d{1,5});)?(i|s|g|b)=(.+)", re.DOTALL)
_GUID = re.compile(r"[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}")
_QUALIFIED = re.compile(r"(?:(\d{1,5}):)?(.+)", re.DOTALL)


def node_parts(node: str) -> tuple[int, str]:
    """(namespace index, identifier text) of a node id in its string form; raises ValueError
    with the reason for one that is not.

    >>> node_parts("ns=2;s=Line1.Temp"), node_parts("i=2258")
    ((2, 'Line1.Temp'), (0, '2258'))
    """
    found = _NODE_ID.fullmatch(node)
    if found is None:
        raise ValueError(
            f"{node[:80]!r} is not a node id; write ns=<index>;s=<name> or ns=<index>;i=<number> "
            "(also g=<guid>, b=<base64>)"
        )
    ns = int(found.group(1) or 0)
    kind, ident = found.group(2), found.group(3)
    if ns > 65535:
        raise ValueError(f"namespace index {ns} is over 65535")
    if kind == "i" and not (ident.isdigit() and int(ident) <= 0xFFFFFFFF):
        raise ValueError(f"i={ident[:40]} is not a whole number from 0 to 4294967295")
    if kind == "g" and _GUID.fullmatch(ident) is None:
        raise ValueError(f"g={ident[:40]} is not a GUID (8-4-4-4-12 hex digits)")
    return ns, ident


def qualified_parts(name: str) -> tuple[int, str]:
    """(namespace index, name) of a browse name written ``<index>:<name>`` (no index: 0)."""
    found = _QUALIFIED.fullmatch(name)
    if found is None or not found.group(2):
        raise ValueError(f"{name[:80]!r} is not a browse name; write <index>:<name>, e.g. 2:Temp")
    ns = int(found.group(1) or 0)
    if ns > 65535:
        raise ValueError(f"namespace index {ns} is over 65535")
    return ns, found.group(2)


def _template_problem(template: str) -> str | None:
    try:
        parts = list(string.Formatter().parse(template))
    except ValueError as exc:
        return f"is not a template ({exc}); write e.g. press-hall/{{name}}"
    for _, name, spec, conversion in parts:
        if name is not None and (name not in _PLACES or spec or conversion):
            return (
                f"has a place {name!r} it cannot fill (with no format); the places are "
                "{name}, {ns}"
            )
    text = "".join(literal for literal, _, _, _ in parts)
    problem = stream_id_problem(text)
    return None if problem is None else f"has text that {problem}"


class OpcuaItem(_Section):
    """``[[sources.items]]``: one variable to watch, by node id or by browse path."""

    node: str | None = None
    """Node id, e.g. ``ns=2;s=Press1.OilTemp`` or ``ns=2;i=1007``."""
    path: tuple[str, ...] | None = Field(None, min_length=1)
    """Browse names from the Objects folder down, each ``<namespace index>:<name>``."""
    stream: str | None = None
    """Stream id (a template with ``{name}`` and ``{ns}``); else the source's ``stream``."""

    @field_validator("node")
    @classmethod
    def _node(cls, value: str | None) -> str | None:
        if value is not None:
            node_parts(value)
        return value

    @field_validator("path")
    @classmethod
    def _path(cls, value: tuple[str, ...] | None) -> tuple[str, ...] | None:
        for part in value or ():
            qualified_parts(part)
        return value

    @field_validator("stream")
    @classmethod
    def _stream(cls, value: str | None) -> str | None:
        if value is not None and (problem := _template_problem(value)) is not None:
            raise ValueError(f"this stream template {problem}")
        return value

    @model_validator(mode="after")
    def _one_of(self) -> OpcuaItem:
        if (self.node is None) == (self.path is None):
            raise _fail((("node",), "give node (a node id) or path (browse names), one of them"))
        return self

    @property
    def parts(self) -> tuple[int, str]:
        """(namespace index, name) that fill the stream template."""
        if self.node is not None:
            return node_parts(self.node)
        assert self.path is not None
        return qualified_parts(self.path[-1])

    @property
    def label(self) -> str:
        """How the item is named in logs and dead letters."""
        return self.node if self.node is not None else "/".join(self.path or ())


class OpcuaSecurity(_Section):
    """``[sources.security]``: how messages to the server are protected."""

    policy: Literal["None", "Basic256Sha256"] = "None"
    mode: Literal["Sign", "SignAndEncrypt"] | None = None
    """Message security mode; needed with ``Basic256Sha256``."""
    cert_file: ConfigPath | None = None
    """Our client certificate (PEM or DER); its URI names our application."""
    key_file: ConfigPath | None = None
    """Its private key (PEM), readable only by the service user."""
    server_cert_file: ConfigPath | None = None
    """The server's own certificate: only a server holding it is talked to."""
    ca_file: ConfigPath | None = None
    """Or a CA certificate: a server certificate it signed is accepted."""

    @model_validator(mode="after")
    def _complete(self) -> OpcuaSecurity:
        problems: list[tuple[tuple[str | int, ...], str]] = []
        if self.policy == "None":
            for key in ("mode", "cert_file", "key_file", "server_cert_file", "ca_file"):
                if getattr(self, key) is not None:
                    problems.append(((key,), 'has no use with policy = "None"; leave it out'))
        else:
            if self.mode is None:
                problems.append(
                    (("mode",), 'Basic256Sha256 needs mode = "Sign" or "SignAndEncrypt"')
                )
            if self.cert_file is None:
                problems.append((("cert_file",), "Basic256Sha256 needs our client certificate"))
            if self.key_file is None:
                problems.append(
                    (("key_file",), "Basic256Sha256 needs the client certificate's key")
                )
            if self.server_cert_file is None and self.ca_file is None:
                problems.append(
                    (
                        ("server_cert_file",),
                        "give the server's certificate (server_cert_file) or the CA that signed "
                        "it (ca_file), so that only the right server is trusted",
                    )
                )
        if problems:
            raise _fail(*problems)
        return self


class OpcuaSourceConfig(SourceSettings):
    """``type = "opcua"``: data change notifications of one server's variables."""

    type: Literal["opcua"]
    endpoint: str
    """``opc.tcp://host:port[/path]``."""
    items: list[OpcuaItem] = Field(min_length=1)
    stream: str = "{name}"
    """Stream id template for items without their own: ``{name}`` is the node id's identifier
    (or the path's last browse name), ``{ns}`` its namespace index."""
    sampling_interval: Duration = 1.0
    """How often the server samples each variable (0: as fast as it can)."""
    publishing_interval: PositiveDuration = 1.0
    """How often the server sends the changes it has collected."""
    queue_size: int = Field(10, ge=1, le=10_000)
    """Changes the server keeps per variable between two publishes (more are dropped, oldest
    first)."""
    uncertain: Literal["accept", "refuse"] = "refuse"
    """A value with an Uncertain status: a reading, or an ``uncertain-status`` dead letter."""
    username: str | None = None
    password_env: EnvName | None = None
    password_file: ConfigPath | None = None
    security: OpcuaSecurity = Field(default_factory=OpcuaSecurity)
    backfill: bool = True
    """After a lost connection or a restart, read what the stream missed from the server's
    history (HistoryRead), when the server keeps it."""
    backfill_max: PositiveDuration = 86400.0
    """How far back a backfill reads at most."""
    request_timeout: PositiveDuration = 10.0
    """How long to wait for the server's answer to a request (connect, browse, subscribe)."""
    reconnect_min_s: float = Field(1.0, ge=0.1, le=3600)
    reconnect_max_s: float = Field(60.0, ge=0.1, le=86400)

    @field_validator("endpoint")
    @classmethod
    def _endpoint(cls, value: str) -> str:
        if not value.startswith("opc.tcp://") or len(value) <= len("opc.tcp://"):
            raise ValueError("an endpoint is opc.tcp://host:port, e.g. opc.tcp://10.0.4.20:4840")
        if any(ord(c) < 32 or c.isspace() for c in value):
            raise ValueError("an endpoint URL holds no spaces or control characters")
        return value

    @field_validator("stream")
    @classmethod
    def _stream(cls, value: str) -> str:
        problem = _template_problem(value)
        if problem is not None:
            raise ValueError(f"this stream template {problem}")
        return value

    @field_validator("sampling_interval")
    @classmethod
    def _sampling(cls, value: float) -> float:
        if value < 0:
            raise ValueError("must be 0 (as fast as the server can) or longer")
        if value > 86400:
            raise ValueError("must be at most a day")
        return value

    @field_validator("publishing_interval")
    @classmethod
    def _publishing(cls, value: float) -> float:
        if value > 86400:
            raise ValueError("must be at most a day")
        return value

    @model_validator(mode="after")
    def _whole(self) -> OpcuaSourceConfig:
        problems: list[tuple[tuple[str | int, ...], str]] = []
        if self.password_env is not None and self.password_file is not None:
            problems.append((("password_file",), "give password_env or password_file, not both"))
        has_password = self.password_env is not None or self.password_file is not None
        if has_password and self.username is None:
            problems.append((("username",), "a password needs the user name it belongs to"))
        if self.username is not None and not has_password:
            problems.append(
                (
                    ("password_env",),
                    "a user name needs its password (password_env or password_file)",
                )
            )
        if self.reconnect_max_s < self.reconnect_min_s:
            problems.append(
                (
                    ("reconnect_max_s",),
                    f"must not be below reconnect_min_s ({self.reconnect_min_s:g})",
                )
            )
        seen: dict[str, int] = {}
        for i, item in enumerate(self.items):
            key = item.node if item.node is not None else "/".join(item.path or ())
            if key in seen:
                problems.append(
                    ((("items", i, "node" if item.node else "path")), f"repeats items[{seen[key]}]")
                )
            seen.setdefault(key, i)
            stream = self.stream_for(i)
            problem = stream_id_problem(stream)
            if problem is not None:
                problems.append(
                    ((("items", i, "stream")), f"the stream id {stream[:80]!r} {problem}")
                )
        if problems:
            raise _fail(*problems)
        return self

    def stream_for(self, index: int) -> str:
        """The stream id of ``items[index]``."""
        item = self.items[index]
        ns, name = item.parts
        template = item.stream if item.stream is not None else self.stream
        return template.format(name=name, ns=ns)

    # ---- what check and the service's advice need to know

    def secret_refs(self, where: str) -> list[SecretRef]:
        refs = SecretRef.either(
            where,
            "password",
            self.password_env,
            self.password_file,
            f"OPC UA password for source {self.name!r}",
        )
        if self.security.key_file is not None:
            refs.append(
                SecretRef(
                    f"{where}.security.key_file",
                    None,
                    self.security.key_file,
                    f"OPC UA client key for source {self.name!r}",
                )
            )
        return refs

    def files_needed(self, where: str) -> list[tuple[str, Path]]:
        return [
            (f"{where}.security.{key}", value)
            for key in ("cert_file", "server_cert_file", "ca_file")
            if (value := getattr(self.security, key)) is not None
        ]

    def advice(self, where: str) -> list[Problem]:
        out: list[Problem] = []
        if self.username is not None and self.security.policy == "None":
            out.append(
                Problem(
                    f"{where}.security.policy",
                    "with policy None the user's password is protected only if the server's "
                    "user token policy encrypts it; prefer Basic256Sha256 with SignAndEncrypt",
                )
            )
        if self.security.mode == "Sign" and self.username is not None:
            out.append(
                Problem(
                    f"{where}.security.mode",
                    "Sign protects the messages from change but not from being read",
                )
            )
        streams: dict[str, int] = {}
        for i in range(len(self.items)):
            stream = self.stream_for(i)
            if stream in streams:
                out.append(
                    Problem(
                        f"{where}.items[{i}]",
                        f"feeds the same stream {stream!r} as items[{streams[stream]}]; their "
                        "readings would interleave in one chart",
                    )
                )
            streams.setdefault(stream, i)
        return out

    def describe(self) -> str:
        security: str = self.security.policy
        if self.security.mode is not None:
            security += f" {self.security.mode}"
        return (
            f"{self.name} (opcua, {security}): {self.endpoint}, {len(self.items)} item(s), "
            f"sampling {self.sampling_interval:g} s, publishing {self.publishing_interval:g} s"
        )
