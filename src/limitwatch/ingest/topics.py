"""Which MQTT topics a source takes, and which stream each topic feeds.

A source subscribes with topic filters such as ``plant/+/+/temp`` and names the stream of each
message with a *stream template* over the topic's levels. The template syntax is our own and
deliberately small:

``{1}``, ``{2}``, ...
    the topic level at that position, counted from 1 (``plant/pack-1/temp``: ``{2}`` is
    ``pack-1``). Only positions the filter itself spells out (a name or ``+``) may be used, so
    every matching topic has them.
``{#}``
    everything a trailing ``#`` matched, levels joined with ``/``. A topic that stops at the
    parent level (``plant`` for ``plant/#``) leaves ``{#}`` empty and is treated as unmapped.
``{topic}``
    the whole topic.
``{{`` and ``}}``
    literal braces. Everything else is copied as written.

>>> mapper = TopicMapper("quillmoor/+/+/reading", "{2}/{3}")
>>> mapper.stream_for("quillmoor/pack-1/downtime/reading")
'pack-1/downtime'
>>> mapper.stream_for("quillmoor/pack-1/reading") is None
True
>>> TopicMapper("site/#", "site-a/{#}").stream_for("site/oven-1/energy")
'site-a/oven-1/energy'

Filters are checked against the rules of MQTT 3.1.1, section 4.7 (kept unchanged in MQTT 5.0,
section 4.7): ``#`` only as the whole last level, ``+`` only as a whole level, no U+0000, at least
one character and at most 65535 bytes of UTF-8; a filter that starts with a wildcard does not
match topics starting with ``$`` (4.7.2). Shared subscriptions (``$share/...``) are refused: they
spread one stream's readings over several clients, and the charts depend on each stream's
readings arriving in order at one place.

References
----------
OASIS, *MQTT Version 3.1.1* (2014), section 4.7 "Topic Names and Topic Filters";
OASIS, *MQTT Version 5.0* (2019), sections 4.7 and 4.8.2 (shared subscriptions).
"""

from __future__ import annotations

import re

__all__ = [
    "StreamTemplateError",
    "TopicFilterError",
    "TopicMapper",
    "filters_overlap",
    "topic_matches",
    "validate_filter",
    "validate_topic_name",
]

MAX_TOPIC_BYTES = 65535
"""MQTT 3.1.1 section 4.7.3: a topic name or filter encodes to at most 65535 bytes."""


class TopicFilterError(ValueError):
    """A topic filter or topic name that breaks the MQTT rules (section 4.7)."""


class StreamTemplateError(ValueError):
    """A stream template that cannot be filled from every topic its filter matches."""


def _check_common(text: str, what: str) -> None:
    if not isinstance(text, str) or text == "":
        raise TopicFilterError(
            f"a {what} must be at least one character long (MQTT 3.1.1 section 4.7.3)"
        )
    if "\x00" in text:
        raise TopicFilterError(
            f"a {what} must not contain the null character U+0000 (MQTT 3.1.1 section 4.7.3)"
        )
    if len(text.encode("utf-8")) > MAX_TOPIC_BYTES:
        raise TopicFilterError(
            f"a {what} must encode to at most {MAX_TOPIC_BYTES} bytes (MQTT 3.1.1 section 4.7.3)"
        )


def validate_filter(topic_filter: str) -> None:
    """Raise :class:`TopicFilterError` unless ``topic_filter`` is a valid MQTT topic filter.

    >>> validate_filter("plant/+/temp"), validate_filter("plant/#"), validate_filter("#")
    (None, None, None)
    >>> try:
    ...     validate_filter("plant/#/temp")
    ... except TopicFilterError as exc:
    ...     print(exc)
    '#' must be the last level of a topic filter, on its own (MQTT 3.1.1 section 4.7.1.2)
    """
    _check_common(topic_filter, "topic filter")
    levels = topic_filter.split("/")
    for i, level in enumerate(levels):
        if "#" in level and (level != "#" or i != len(levels) - 1):
            raise TopicFilterError(
                "'#' must be the last level of a topic filter, on its own "
                "(MQTT 3.1.1 section 4.7.1.2)"
            )
        if "+" in level and level != "+":
            raise TopicFilterError(
                f"'+' must fill a whole topic level, not {level!r} (MQTT 3.1.1 section 4.7.1.3)"
            )
    if levels[0] == "$share":
        raise TopicFilterError(
            "shared subscriptions ($share/...) are not supported: they split one stream's "
            "readings between clients and break their order; give each instance its own "
            "topic subtree instead"
        )


def validate_topic_name(topic: str) -> None:
    """Raise :class:`TopicFilterError` unless ``topic`` can be published to (no wildcards).

    >>> validate_topic_name("limitwatch/plant-a/status")
    """
    _check_common(topic, "topic name")
    if "+" in topic or "#" in topic:
        raise TopicFilterError(
            "a topic name (for publishing) must not contain the wildcards '+' or '#' "
            "(MQTT 3.1.1 section 4.7.1.1)"
        )


def _match(levels: tuple[str, ...], topic: str) -> list[str] | None:
    """The topic's levels when it matches the (already validated) filter levels, else None."""
    parts = topic.split("/")
    if topic.startswith("$") and levels[0] in ("+", "#"):
        return None  # MQTT 3.1.1 section 4.7.2
    for i, level in enumerate(levels):
        if level == "#":
            return parts
        if i >= len(parts):
            return None
        if level != "+" and level != parts[i]:
            return None
    return parts if len(parts) == len(levels) else None


def topic_matches(topic_filter: str, topic: str) -> bool:
    """True when ``topic`` matches ``topic_filter`` by the MQTT rules.

    >>> topic_matches("sport/#", "sport"), topic_matches("+/x", "$SYS/x")
    (True, False)
    """
    validate_filter(topic_filter)
    return _match(tuple(topic_filter.split("/")), topic) is not None


def filters_overlap(a: str, b: str) -> bool:
    """True when some topic matches both filters.

    Overlapping subscriptions of one client may be delivered once per subscription (MQTT 3.1.1
    section 3.3.5; MQTT 5.0 section 4.8.1 leaves it to the server), which would count a
    reading twice when its time is the receive time.

    >>> filters_overlap("plant/+/temp", "plant/oven/#"), filters_overlap("a/+", "b/#")
    (True, False)
    """
    la, lb = a.split("/"), b.split("/")
    if (a.startswith("$") and lb[0] in ("+", "#")) or (b.startswith("$") and la[0] in ("+", "#")):
        return False
    for i in range(max(len(la), len(lb))):
        x = la[i] if i < len(la) else None
        y = lb[i] if i < len(lb) else None
        if x == "#" or y == "#":
            return True  # '#' also matches the parent level, so a shorter other side fits
        if x is None or y is None:
            return False
        if x != y and x != "+" and y != "+":
            return False
    return True


_PLACEHOLDER = re.compile(r"\{\{|\}\}|\{([^{}]*)\}|[{}]")
_TEMPLATE_HINT = "use {1}, {2}, ... for topic levels, {#} for what '#' matched, {topic}"


class TopicMapper:
    """One topic filter and the stream template that names its streams.

    >>> TopicMapper("gw/+/+", "{3}@{2}").stream_for("gw/comp-a/discharge-temp")
    'discharge-temp@comp-a'
    """

    __slots__ = ("_levels", "_multi", "_parts", "filter", "template")

    def __init__(self, topic_filter: str, template: str) -> None:
        validate_filter(topic_filter)
        self.filter = topic_filter
        self.template = template
        self._levels = tuple(topic_filter.split("/"))
        self._multi = self._levels[-1] == "#"
        self._parts = self._compile(template)

    def _compile(self, template: str) -> tuple[str | int, ...]:
        """Literal text stays a str; a level is its 0-based int; ``-1`` is ``{#}``, ``-2``
        the whole topic."""
        if not isinstance(template, str) or not template.strip():
            raise StreamTemplateError(f"the stream template is empty; {_TEMPLATE_HINT}")
        fixed = len(self._levels) - (1 if self._multi else 0)
        parts: list[str | int] = []
        pos = 0
        for m in _PLACEHOLDER.finditer(template):
            if m.start() > pos:
                parts.append(template[pos : m.start()])
            pos = m.end()
            token = m.group(0)
            if token in ("{{", "}}"):
                parts.append(token[0])
                continue
            name = m.group(1)
            if name is None:
                raise StreamTemplateError(
                    f"unmatched {token!r} in stream template {template!r}; write {token * 2} "
                    "for a literal brace"
                )
            name = name.strip()
            if name == "#":
                if not self._multi:
                    raise StreamTemplateError(
                        f"{{#}} needs a filter ending in '#', and {self.filter!r} does not"
                    )
                parts.append(-1)
            elif name == "topic":
                parts.append(-2)
            elif name.isdigit():
                level = int(name)
                if level == 0:
                    raise StreamTemplateError("topic levels count from 1: {1} is the first level")
                if level > fixed:
                    raise StreamTemplateError(
                        f"{{{level}}} is past the levels that filter {self.filter!r} fixes "
                        f"(it has {fixed}); "
                        + ("use {#} for the rest" if self._multi else _TEMPLATE_HINT)
                    )
                parts.append(level - 1)
            else:
                raise StreamTemplateError(
                    f"unknown placeholder {{{name}}} in stream template {template!r}; "
                    f"{_TEMPLATE_HINT}"
                )
        if pos < len(template):
            parts.append(template[pos:])
        return tuple(parts)

    def matches(self, topic: str) -> bool:
        return _match(self._levels, topic) is not None

    def stream_for(self, topic: str) -> str | None:
        """The stream id for ``topic``, or None when the filter does not match it."""
        levels = _match(self._levels, topic)
        if levels is None:
            return None
        out: list[str] = []
        for part in self._parts:
            if isinstance(part, str):
                out.append(part)
            elif part >= 0:
                out.append(levels[part])
            elif part == -1:
                rest = levels[len(self._levels) - 1 :]
                if not rest:
                    return None  # the topic is the parent level of '#': nothing to name
                out.append("/".join(rest))
            else:
                out.append(topic)
        stream = "".join(out)
        return stream if stream.strip() else None

    def __repr__(self) -> str:
        return f"TopicMapper({self.filter!r}, {self.template!r})"
