"""Saying in the log that input is being refused, without one line per refused input.

Dead letters are kept in the store, but nobody reads a table they do not know is filling. So the
worker tells the log: the first refusal of a (source, reason) pair at once, then at most one
line per pair every ``every`` seconds, carrying the count since the previous line. A gateway that
sends a thousand bad payloads a minute makes one line a minute, not a thousand.

Time comes in as ``now`` (epoch seconds), so tests need no clock.

>>> import logging
>>> lines = []
>>> refusals = RefusalLog(every=60.0, emit=lines.append)
>>> refusals.note("gateway", "bad-json", now=0.0)
>>> refusals.note("gateway", "bad-json", now=10.0)
>>> refusals.note("gateway", "bad-json", now=20.0)
>>> refusals.flush(now=60.0)
>>> len(lines), lines[1].split(";")[0]
(2, 'source gateway: 2 more inputs refused as bad-json in the last 1m')
"""

from __future__ import annotations

import logging
from collections.abc import Callable
from dataclasses import dataclass

from limitwatch.durations import format_elapsed

log = logging.getLogger("limitwatch.refusals")

EVERY_S = 60.0
"""Longest a pair's refusals go unmentioned in the log, once it has been mentioned."""


@dataclass(slots=True)
class _Pair:
    logged_at: float
    unlogged: int = 0


class RefusalLog:
    """Rate-limited WARNING lines about dead letters, per source and reason."""

    def __init__(
        self, every: float = EVERY_S, emit: Callable[[str], None] | None = None
    ) -> None:
        self.every = every
        self._emit = emit or (lambda line: log.warning("%s", line))
        self._pairs: dict[tuple[str, str], _Pair] = {}

    def note(self, source: str, reason: str, now: float) -> None:
        """One input from ``source`` refused as ``reason`` at ``now``."""
        pair = self._pairs.get((source, reason))
        if pair is None:
            self._pairs[(source, reason)] = _Pair(now)
            self._emit(
                f"source {source}: an input was refused as {reason}; it is kept as a dead "
                f"letter ({_hint(source, reason)}). Further refusals of this kind are counted "
                f"in one line at most every {format_elapsed(self.every)}"
            )
            return
        pair.unlogged += 1
        if now - pair.logged_at >= self.every:
            self._line(source, reason, pair, now)

    def flush(self, now: float) -> None:
        """Write the count of every pair whose quiet time is over (call it now and then: a
        pair that stops being refused would otherwise never report its last few)."""
        for (source, reason), pair in self._pairs.items():
            if pair.unlogged and now - pair.logged_at >= self.every:
                self._line(source, reason, pair, now)

    def _line(self, source: str, reason: str, pair: _Pair, now: float) -> None:
        count = pair.unlogged
        self._emit(
            f"source {source}: {count} more input{'s' if count != 1 else ''} refused as "
            f"{reason} in the last {format_elapsed(now - pair.logged_at)}; {_hint(source, reason)}"
        )
        pair.logged_at, pair.unlogged = now, 0


def _hint(source: str, reason: str) -> str:
    return f"limitwatch dead-letters --source {source} --reason {reason} lists them"
