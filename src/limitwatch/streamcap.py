"""A ceiling on how many streams each source may bring into being.

Why: a stream is made from whatever a topic or a file row names, and each costs a monitor in
memory, a checkpoint and rows in the store. A gateway publishing on 50,000 topics by mistake
(a serial number in the topic, a loop in a script) became 50,000 streams in five seconds, held
for ever. Past its source's ``max_streams``, a reading for a stream that does not exist yet is
refused as a dead letter (``too-many-streams``); readings for streams that exist go on as
before. A WARNING says so, at most once a minute per source, with how many were refused.

A source's count is the streams it has fed since the service started, created or not: streams
restored from the store are not refused, and count once their source feeds them again.

>>> cap = StreamCap({"gateway": 2}, monotonic=lambda: 0.0)
>>> [cap.admit("gateway", s, exists=False) for s in ("a", "b", "c", "a")]
[True, True, False, True]
>>> cap.admit("gateway", "restored", exists=True), cap.count("gateway"), cap.refused["gateway"]
(True, 3, 1)
"""

from __future__ import annotations

import logging
import math
import time
from collections.abc import Callable, Mapping

log = logging.getLogger("limitwatch.streams")

REASON = "too-many-streams"
WARN_EVERY_S = 60.0
"""Least time between two WARNING lines about one source's refusals."""


class StreamCap:
    """Counts each source's streams and refuses new ones past its limit."""

    def __init__(
        self,
        limits: Mapping[str, int],
        monotonic: Callable[[], float] = time.monotonic,
        warn_every_s: float = WARN_EVERY_S,
    ) -> None:
        self.limits = dict(limits)
        self._streams: dict[str, set[str]] = {name: set() for name in limits}
        self.refused: dict[str, int] = dict.fromkeys(limits, 0)
        """Readings refused for each source since the start."""
        self._monotonic = monotonic
        self._warn_every_s = warn_every_s
        self._warned_at: dict[str, float] = dict.fromkeys(limits, -math.inf)
        self._unwarned: dict[str, int] = dict.fromkeys(limits, 0)

    def count(self, source: str) -> int:
        """Streams the source has fed since the start."""
        return len(self._streams.get(source, ()))

    def admit(self, source: str, stream: str, *, exists: bool) -> bool:
        """True when a reading from ``source`` for ``stream`` may go on; ``exists`` says the
        stream already has a monitor (it is then never refused)."""
        seen = self._streams.get(source)
        if seen is None or stream in seen:
            return True
        if exists or len(seen) < self.limits[source]:
            seen.add(stream)
            return True
        self.refused[source] += 1
        self._unwarned[source] += 1
        now = self._monotonic()
        if now - self._warned_at[source] >= self._warn_every_s:
            log.warning(
                "source %s: %d readings for new streams refused (%s), e.g. stream %r: it "
                "already feeds its max_streams of %d streams; raise max_streams if the site "
                "really has more",
                source,
                self._unwarned[source],
                REASON,
                stream[:200],
                self.limits[source],
            )
            self._warned_at[source] = now
            self._unwarned[source] = 0
        return False
